"""The bridge's counts: one status line per interval, and Prometheus metrics.

Every stage a reading passes counts it once:

- ``read``: taken from a source into the bridge (a CSV file waiting for room
  in the spool is counted once it is taken);
- ``spooled``: committed to the spool as pending (``duplicate``: already there;
  ``withheld``: stored but never to be posted; ``unmapped``: no train for it);
- ``dropped``: lost because the spool was full (live values only; a CSV file
  waits in its folder instead);
- ``sent``: taken by the service; ``refused``: refused by it, reason kept.

The status line gives the counts since the previous line, the pending readings,
how full the spool is and the lag: the age of the oldest pending reading, i.e.
how far behind the service the bridge is [s].

Metrics (own registry; served on ``status.metrics_port`` when set):
``stagewatch_bridge_readings_total{outcome}``, ``stagewatch_bridge_files_total{outcome}``,
``stagewatch_bridge_post_failures_total``, ``stagewatch_bridge_writeback_total``,
``stagewatch_bridge_spool_pending``, ``stagewatch_bridge_spool_fill_ratio`` and
``stagewatch_bridge_lag_seconds``.
"""

from __future__ import annotations

from collections import Counter as Tally
from typing import Any

from prometheus_client import CollectorRegistry, Counter, Gauge

__all__ = ["OUTCOMES", "BridgeStats", "status_line"]

OUTCOMES = ("read", "spooled", "duplicate", "withheld", "unmapped", "dropped", "sent", "refused")
"""The stages a reading is counted at, in the order the status line shows them."""


class BridgeStats:
    """Counts since the last status line, running totals, and the metrics registry."""

    def __init__(self) -> None:
        self.registry = CollectorRegistry()
        self.totals: Tally[str] = Tally()
        self._interval: Tally[str] = Tally()
        self.readings = Counter(
            "stagewatch_bridge_readings",
            "Readings by what became of them",
            ["outcome"],
            registry=self.registry,
        )
        for outcome in OUTCOMES:
            self.readings.labels(outcome)
        self.files = Counter(
            "stagewatch_bridge_files",
            "CSV files taken (done) or moved aside (failed)",
            ["outcome"],
            registry=self.registry,
        )
        self.post_failures = Counter(
            "stagewatch_bridge_post_failures",
            "Posts that failed on the network or with a 5xx, 401, 403 or 429 answer",
            registry=self.registry,
        )
        self.writeback = Counter(
            "stagewatch_bridge_writeback",
            "Estimates published back to the plant (one per train and publication)",
            registry=self.registry,
        )
        self.pending = Gauge(
            "stagewatch_bridge_spool_pending",
            "Readings waiting in the spool",
            registry=self.registry,
        )
        self.fill = Gauge(
            "stagewatch_bridge_spool_fill_ratio",
            "Pending readings as a share of spool.max_readings [-]",
            registry=self.registry,
        )
        self.lag = Gauge(
            "stagewatch_bridge_lag_seconds",
            "Age of the oldest pending reading [s]",
            registry=self.registry,
        )

    def count(self, **counts: int) -> None:
        """Add to the counts of some outcomes (names from :data:`OUTCOMES`)."""
        for outcome, n in counts.items():
            if outcome not in OUTCOMES:
                raise ValueError(f"unknown outcome {outcome!r}")
            if n:
                self.totals[outcome] += n
                self._interval[outcome] += n
                self.readings.labels(outcome).inc(n)

    def take_interval(self) -> dict[str, int]:
        """Return the counts since the previous call, every outcome present; reset them."""
        counts = {outcome: self._interval[outcome] for outcome in OUTCOMES}
        self._interval.clear()
        return counts

    def set_spool(self, pending: int, fill: float, lag: float) -> None:
        """Update the spool gauges: pending readings, fill share [-], lag [s]."""
        self.pending.set(pending)
        self.fill.set(fill)
        self.lag.set(lag)


def status_line(counts: dict[str, int], pending: int, fill: float, lag: float, **extra: Any) -> str:
    """Write one status line.

    Parameters
    ----------
    counts : dict
        Outcome -> readings since the previous line.
    pending : int
        Readings waiting in the spool.
    fill : float
        Pending share of the spool's limit [-].
    lag : float
        Age of the oldest pending reading [s].
    **extra
        More ``key value`` pairs to append (e.g. ``retry_in``).

    Returns
    -------
    str
        ``bridge: read 120, spooled 118, ..., pending 18 (0.0% of the spool), lag 3.2 s``.
    """
    shown = [f"{outcome} {counts.get(outcome, 0)}" for outcome in OUTCOMES]
    tail = [f"pending {pending} ({100 * fill:.1f}% of the spool)", f"lag {lag:.1f} s"]
    tail += [f"{key.replace('_', ' ')} {value}" for key, value in extra.items()]
    return "bridge: " + ", ".join(shown + tail)
