"""What every source of readings offers the bridge, and the quality scale they share.

A source reads plant values and hands them, as :class:`SourceReading` objects, to
a sink: the bridge's intake, which maps each tag onto a train, writes the
readings to the spool and returns only once they are committed there. A source
may therefore let go of what it read (move a CSV file to its done folder) as
soon as the sink returns. When the spool is full, the sink raises
:class:`SpoolFull` and the source keeps what it can (a CSV file stays where it
is) or counts the loss (a live OPC UA value cannot wait).

A site adds its own source by subclassing :class:`Source`: implement
:meth:`Source.read_once` (read what is available now) and, if the source can do
better than polling, :meth:`Source.run`; then hand it to
``Bridge(config, key, extra_sources=[...])`` in a small launcher of its own. Its
tags map through the ``[[tags]]`` entries that name no source.

Quality is one byte, the scale the OPC UA status-code severity maps onto: bad
0-63, uncertain 64-191, good 192-255 (:data:`GOOD` 192, :data:`UNCERTAIN` 64,
:data:`BAD` 0).
"""

from __future__ import annotations

import abc
import asyncio
import logging
from collections.abc import Callable, Sequence
from dataclasses import dataclass

__all__ = [
    "BAD",
    "GOOD",
    "UNCERTAIN",
    "Sink",
    "Source",
    "SourceReading",
    "SpoolFull",
    "is_bad",
]

GOOD = 192
"""Quality byte of a good value."""
UNCERTAIN = 64
"""Quality byte of an uncertain value (usable with care)."""
BAD = 0
"""Quality byte of a bad value (not to be used as a measurement)."""

log = logging.getLogger("stagewatch.bridge")


def is_bad(quality: int | None) -> bool:
    """Whether a quality byte says bad (below :data:`UNCERTAIN`); None counts as good."""
    return quality is not None and quality < UNCERTAIN


@dataclass(frozen=True, slots=True)
class SourceReading:
    """One value as a source read it, before tag mapping.

    Attributes
    ----------
    source_tag : str
        The historian's tag or the OPC UA node id.
    time : float
        When the value was sampled, epoch seconds [s].
    value : float or None
        The raw value in the source's unit; None when the source gave none (a
        bad status code).
    quality : int or None
        Quality byte 0-255 (see the module notes); None when the source has none.
    status : str
        The source's own word for the quality (``"BadSensorFailure"``), or ``""``.
    """

    source_tag: str
    time: float
    value: float | None
    quality: int | None = None
    status: str = ""


class SpoolFull(Exception):
    """The spool has no room for a batch; nothing of it was written.

    Parameters
    ----------
    needed : int
        Readings in the batch.
    room : int
        Readings the spool could still take.
    capacity : int
        Most readings the spool holds (``spool.max_readings``).
    """

    def __init__(self, needed: int, room: int, capacity: int) -> None:
        self.needed = needed
        self.room = room
        self.capacity = capacity
        super().__init__(f"spool full: {needed} readings to write, room for {room} of {capacity}")


Sink = Callable[[Sequence[SourceReading]], int]
"""Takes a source's batch into the spool (committed on return), returns how many
readings it took; raises :class:`SpoolFull` when there is no room."""


class Source(abc.ABC):
    """A source of plant readings behind the bridge's one interface.

    Parameters
    ----------
    name : str
        The source's name in the bridge file (``sources[i].name``).
    interval : float
        Time between reads when the source is polled [s].

    Attributes
    ----------
    dropped : int
        Readings lost because the spool was full (live values cannot wait).
    """

    def __init__(self, name: str, interval: float) -> None:
        self.name = name
        self.interval = interval
        self.dropped = 0

    @abc.abstractmethod
    async def read_once(self, sink: Sink) -> int:
        """Read what is available now and hand it to ``sink``.

        Parameters
        ----------
        sink : Sink
            Takes the readings into the spool.

        Returns
        -------
        int
            Readings read (handed to the sink).
        """

    async def run(self, sink: Sink, stop: asyncio.Event) -> None:
        """Read until ``stop`` is set: by default :meth:`read_once` every interval.

        A failed read is logged and tried again at the next interval; the
        bridge keeps running.
        """
        while not stop.is_set():
            try:
                await self.read_once(sink)
            except Exception as exc:  # a source's trouble must not stop the bridge
                log.error("source %s: %s", self.name, exc)
            try:
                await asyncio.wait_for(stop.wait(), timeout=self.interval)
            except TimeoutError:
                pass

    async def close(self) -> None:  # noqa: B027 - optional hook, most sources hold nothing
        """Release what the source holds (connections); the default holds nothing."""
