"""Tag mapping: a source's tag or node id -> a train's tag, in the train's unit.

Each ``[[tags]]`` entry of the bridge file maps one historian tag (or OPC UA node
id) onto one train tag, with linear scaling and a unit conversion
(:attr:`~service.bridge.config.TagMapConfig.gain_and_bias`). An entry that names
its source applies to that source only; one without applies to every source. A
tag may feed several trains (one entry each). A CSV source with a default
``train`` passes tags without an entry under their own name; other unmapped tags
are counted and skipped, with one warning per tag.

A reading with no value, or with a bad quality while ``forward.bad_quality`` is
``"withhold"``, is mapped all the same and spooled as withheld, with the reason:
the record shows what the source said, and nothing unusable reaches the filter.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass

from service.bridge.config import TagMapConfig
from service.bridge.sources import SourceReading, is_bad
from service.bridge.spool import SpoolEntry

__all__ = ["MappedBatch", "TagMapper"]

log = logging.getLogger("stagewatch.bridge")


@dataclass(frozen=True, slots=True)
class _Target:
    train: str
    tag: str
    gain: float
    bias: float


@dataclass(frozen=True, slots=True)
class MappedBatch:
    """A source batch after mapping: spool entries, and readings no entry maps."""

    entries: list[SpoolEntry]
    unmapped: int


class TagMapper:
    """Maps source readings onto train tags (see the module notes).

    Parameters
    ----------
    tags : iterable of TagMapConfig
        The ``[[tags]]`` entries.
    default_trains : Mapping
        Source name -> train for unmapped tags (None: skip them).
    send_bad : bool
        Whether a bad-quality reading with a value is posted (True) or withheld.
    """

    def __init__(
        self,
        tags: Iterable[TagMapConfig],
        default_trains: Mapping[str, str | None],
        send_bad: bool = False,
    ) -> None:
        self._specific: dict[tuple[str, str], list[_Target]] = {}
        self._generic: dict[str, list[_Target]] = {}
        for entry in tags:
            gain, bias = entry.gain_and_bias
            target = _Target(entry.train, entry.tag, gain, bias)
            if entry.source is None:
                self._generic.setdefault(entry.source_tag, []).append(target)
            else:
                self._specific.setdefault((entry.source, entry.source_tag), []).append(target)
        self._defaults = dict(default_trains)
        self._send_bad = send_bad
        self._warned: set[tuple[str, str]] = set()

    def targets(self, source: str, source_tag: str) -> list[_Target]:
        """Where one source tag goes: its entries, else the source's default train."""
        found = self._specific.get((source, source_tag)) or self._generic.get(source_tag)
        if found:
            return found
        train = self._defaults.get(source)
        return [_Target(train, source_tag, 1.0, 0.0)] if train is not None else []

    def map(self, source: str, readings: Sequence[SourceReading]) -> MappedBatch:
        """Map one source batch.

        Parameters
        ----------
        source : str
            The source's name.
        readings : sequence of SourceReading
            Raw values in the source's units.

        Returns
        -------
        MappedBatch
            One entry per reading and target, values in the train tag's unit.
        """
        entries: list[SpoolEntry] = []
        unmapped = 0
        for reading in readings:
            targets = self.targets(source, reading.source_tag)
            if not targets:
                unmapped += 1
                key = (source, reading.source_tag)
                if key not in self._warned:
                    self._warned.add(key)
                    log.warning(
                        "source %s: tag %r has no [[tags]] entry and the source no default "
                        "train: its readings are skipped",
                        source,
                        reading.source_tag,
                    )
                continue
            for target in targets:
                entries.append(self._entry(source, reading, target))
        return MappedBatch(entries, unmapped)

    def _entry(self, source: str, reading: SourceReading, target: _Target) -> SpoolEntry:
        value = None if reading.value is None else target.gain * reading.value + target.bias
        withhold = None
        said = f" ({reading.status})" if reading.status else ""
        if value is None:
            withhold = f"no value: quality {reading.quality}{said}"
        elif not math.isfinite(value):
            withhold = f"not a finite number after conversion: {value}"
            value = None
        elif is_bad(reading.quality) and not self._send_bad:
            withhold = f"bad quality {reading.quality}{said}"
        return SpoolEntry(
            train=target.train,
            tag=target.tag,
            time=reading.time,
            value=value,
            quality=reading.quality,
            status=reading.status,
            source=source,
            source_tag=reading.source_tag,
            withhold=withhold,
        )
