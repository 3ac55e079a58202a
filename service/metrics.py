"""Prometheus metrics and JSON logs of the service.

Each app gets its own registry (tests build several apps in one process), exposed
in Prometheus's text format at /metrics:

- ``stagewatch_readings_accepted_total`` and ``stagewatch_readings_duplicate_total``
- ``stagewatch_readings_refused_total{reason}``
- ``stagewatch_estimates_total``: estimate rows produced (filter steps reported)
- ``stagewatch_ingest_seconds``: histogram of a posted batch's handling time
- ``stagewatch_estimate_age_seconds{train}``: wall time since each train's newest
  estimate, computed at scrape time
"""

from __future__ import annotations

import json
import logging
import time
from collections.abc import Callable, Iterable

from prometheus_client import CollectorRegistry, Counter, Histogram
from prometheus_client.core import GaugeMetricFamily, Metric
from prometheus_client.registry import Collector


class ServiceMetrics:
    """The service's counters and histograms, in a registry of their own."""

    def __init__(self, estimate_times: Callable[[], dict[str, float | None]]) -> None:
        self.registry = CollectorRegistry()
        self.accepted = Counter(
            "stagewatch_readings_accepted", "Readings journaled and applied", registry=self.registry
        )
        self.duplicates = Counter(
            "stagewatch_readings_duplicate",
            "Readings posted again with the same value (stored once)",
            registry=self.registry,
        )
        self.refused = Counter(
            "stagewatch_readings_refused",
            "Readings refused, by reason",
            ["reason"],
            registry=self.registry,
        )
        self.estimates = Counter(
            "stagewatch_estimates", "Estimate rows produced", registry=self.registry
        )
        self.deferred_writes = Counter(
            "stagewatch_deferred_writes",
            "Ingests whose estimate, gated-reading, alert-event or checkpoint writes failed "
            "after the journal took the batch (kept and written with a later one)",
            registry=self.registry,
        )
        self.ingest_seconds = Histogram(
            "stagewatch_ingest_seconds",
            "Time to screen, journal, apply and store one posted batch [s]",
            buckets=(0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5),
            registry=self.registry,
        )
        self.registry.register(_EstimateAge(estimate_times))


class _EstimateAge(Collector):
    """Seconds since each train's newest estimate, at scrape time."""

    def __init__(self, estimate_times: Callable[[], dict[str, float | None]]) -> None:
        self._times = estimate_times

    def collect(self) -> Iterable[Metric]:
        family = GaugeMetricFamily(
            "stagewatch_estimate_age_seconds",
            "Wall time since the train's newest estimate [s]",
            labels=["train"],
        )
        now = time.time()
        for name, stamp in self._times().items():
            if stamp is not None:
                family.add_metric([name], now - stamp)
        yield family


class JsonFormatter(logging.Formatter):
    """One JSON object per log line: time, level, logger, message, and extras."""

    def format(self, record: logging.LogRecord) -> str:
        """Render a record as a JSON line."""
        entry = {
            "time": self.formatTime(record, "%Y-%m-%dT%H:%M:%S%z"),
            "level": record.levelname,
            "logger": record.name,
            "message": record.getMessage(),
        }
        if record.exc_info:
            entry["exception"] = self.formatException(record.exc_info)
        return json.dumps(entry)


def configure_logging(json_lines: bool) -> None:
    """Send stagewatch's logs to stderr, as JSON lines when asked."""
    handler = logging.StreamHandler()
    if json_lines:
        handler.setFormatter(JsonFormatter())
    root = logging.getLogger("stagewatch")
    root.handlers[:] = [handler]
    root.setLevel(logging.INFO)
    root.propagate = False
