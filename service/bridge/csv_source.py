"""The CSV drop folder: historian exports, each file taken once.

The historian writes scheduled exports into a folder. Each file that matches the
pattern and has not changed for ``settle`` seconds is read whole; if every line
can be read, its readings go to the spool and the file moves to the done folder;
if not, nothing of it is spooled and it moves to the failed folder with
``<file>.reason.txt`` beside it, listing the lines at fault. A file is moved only
after its readings are committed to the spool, so a bridge killed in between
reads the file again on restart, and the spool, which stores a reading once,
takes nothing twice.

Layouts (column names configurable):

- long: ``tag,time,value[,quality]``, one reading per line; other columns are
  ignored;
- wide: ``time,<tag>,<tag>,...``, one time per line; an empty cell is no reading.

Times are ISO 8601, epoch seconds or a ``strptime`` pattern; a time without an
offset is read in the configured time zone (for a repeated hour at the end of
summer time, the first occurrence is taken: prefer exports in UTC or with
offsets). Values may use a decimal comma (the column separator then defaults to
``;``).
"""

from __future__ import annotations

import asyncio
import csv
import logging
import math
import shutil
import time
import zoneinfo
from collections.abc import Callable, Iterator, Sequence
from datetime import datetime, tzinfo
from pathlib import Path

from service.bridge.config import CsvFolderSourceConfig
from service.bridge.sources import BAD, GOOD, UNCERTAIN, Sink, Source, SourceReading, SpoolFull

__all__ = ["CsvFileError", "CsvFolderSource", "read_csv_file"]

log = logging.getLogger("stagewatch.bridge.csv")

_MAX_LISTED = 20
_QUALITY_WORDS = {"good": GOOD, "uncertain": UNCERTAIN, "bad": BAD}


class CsvFileError(ValueError):
    """A file that cannot be taken, with every problem found (up to a limit)."""

    def __init__(self, problems: Sequence[str], more: int = 0) -> None:
        self.problems = list(problems)
        self.more = more
        lines = list(self.problems)
        if more:
            lines.append(f"... and {more} more")
        super().__init__("\n".join(lines))


class _Parser:
    """Reads the cells of one file under one source's settings."""

    def __init__(self, config: CsvFolderSourceConfig) -> None:
        self.config = config
        self.zone: tzinfo = zoneinfo.ZoneInfo(config.time_zone)
        self.codes = dict(config.quality_codes)

    def number(self, text: str) -> float:
        cell = text.strip()
        if self.config.decimal == ",":
            if "." in cell:
                raise ValueError(f"{cell!r} has a '.', but the decimal mark is ','")
            cell = cell.replace(",", ".")
        elif "," in cell:
            raise ValueError(f"{cell!r} has a ',', but the decimal mark is '.'")
        try:
            value = float(cell)
        except ValueError:
            raise ValueError(f"not a number: {text.strip()!r}") from None
        if not math.isfinite(value):
            raise ValueError(f"not a finite number: {text.strip()!r}")
        return value

    def time(self, text: str) -> float:
        cell = text.strip()
        form = self.config.time_format
        if form == "epoch":
            try:
                return self.number(cell)
            except ValueError:
                raise ValueError(f"not epoch seconds: {cell!r}") from None
        try:
            if form == "iso":
                stamp = datetime.fromisoformat(cell)
            else:
                stamp = datetime.strptime(cell, form)
        except ValueError:
            wanted = "ISO 8601" if form == "iso" else repr(form)
            raise ValueError(f"time {cell!r} does not match {wanted}") from None
        if stamp.tzinfo is None:
            stamp = stamp.replace(tzinfo=self.zone)
        return stamp.timestamp()

    def quality(self, text: str) -> int | None:
        cell = text.strip()
        if not cell:
            return None
        if cell in self.codes:
            return self.codes[cell]
        if self.codes:
            known = ", ".join(repr(c) for c in self.codes)
            raise ValueError(f"quality {cell!r} is not one of the configured codes ({known})")
        word = _QUALITY_WORDS.get(cell.lower())
        if word is not None:
            return word
        if cell.isdigit() and 0 <= int(cell) <= 255:
            return int(cell)
        raise ValueError(f"quality must be 0-255, good, uncertain or bad, got {cell!r}")


def _rows(path: Path, config: CsvFolderSourceConfig) -> Iterator[tuple[int, list[str]]]:
    with path.open(newline="", encoding=config.encoding) as handle:
        reader = csv.reader(handle, delimiter=config.column_separator)
        for row in reader:
            yield reader.line_num, row


def read_csv_file(path: Path, config: CsvFolderSourceConfig) -> list[SourceReading]:
    """Read every reading of one export file, or say why it cannot be taken.

    Parameters
    ----------
    path : Path
        The file.
    config : CsvFolderSourceConfig
        The source's layout, time and number settings.

    Returns
    -------
    list of SourceReading
        In file order; values in the source's units.

    Raises
    ------
    CsvFileError
        Listing each line at fault (``line 7: time '31.02.2026' does not match
        ...``), at most 20 and a count of the rest; nothing is returned then.
    """
    parser = _Parser(config)
    problems: list[str] = []
    more = 0

    def problem(text: str) -> None:
        nonlocal more
        if len(problems) < _MAX_LISTED:
            problems.append(text)
        else:
            more += 1

    readings: list[SourceReading] = []
    try:
        rows = _rows(path, config)
        header_line = next(rows, None)
        if header_line is None:
            raise CsvFileError(["the file is empty: expected a header line"])
        header = [cell.strip() for cell in header_line[1]]
        if config.form == "long":
            readings = _read_long(rows, header, config, parser, problem)
        else:
            readings = _read_wide(rows, header, config, parser, problem)
    except UnicodeDecodeError as exc:
        reason = f"not {config.encoding} text: {exc.reason} at byte {exc.start}"
        raise CsvFileError([reason]) from None
    except csv.Error as exc:
        raise CsvFileError([f"not readable as CSV: {exc}"]) from None
    if problems:
        raise CsvFileError(problems, more)
    return readings


def _read_long(
    rows: Iterator[tuple[int, list[str]]],
    header: list[str],
    config: CsvFolderSourceConfig,
    parser: _Parser,
    problem: Callable[[str], None],
) -> list[SourceReading]:
    wanted = (config.tag_column, config.time_column, config.value_column)
    missing = [name for name in wanted if name not in header]
    if missing:
        raise CsvFileError(
            [
                f"line 1: the header lacks the column(s) {', '.join(map(repr, missing))} "
                f"(long form wants {', '.join(map(repr, wanted))}; "
                f"found {', '.join(map(repr, header))})"
            ]
        )
    at_tag, at_time, at_value = (header.index(name) for name in wanted)
    at_quality = header.index(config.quality_column) if config.quality_column in header else None
    readings: list[SourceReading] = []
    for line, row in rows:
        if not any(cell.strip() for cell in row):
            continue
        if len(row) != len(header):
            problem(f"line {line}: {len(row)} fields, the header has {len(header)}")
            continue
        tag = row[at_tag].strip()
        if not tag:
            problem(f"line {line}: the tag is empty")
            continue
        try:
            stamp = parser.time(row[at_time])
            quality = parser.quality(row[at_quality]) if at_quality is not None else None
            text = row[at_value].strip()
            if text:
                value: float | None = parser.number(text)
            elif quality is not None and quality < UNCERTAIN:
                value = None  # a bad reading without a value: kept, with its quality
            else:
                raise ValueError("the value is empty")
        except ValueError as exc:
            problem(f"line {line}: {exc}")
            continue
        status = row[at_quality].strip() if at_quality is not None else ""
        readings.append(SourceReading(tag, stamp, value, quality, status))
    return readings


def _read_wide(
    rows: Iterator[tuple[int, list[str]]],
    header: list[str],
    config: CsvFolderSourceConfig,
    parser: _Parser,
    problem: Callable[[str], None],
) -> list[SourceReading]:
    if config.time_column not in header:
        raise CsvFileError(
            [
                f"line 1: the header lacks the time column {config.time_column!r} "
                f"(found {', '.join(map(repr, header))})"
            ]
        )
    at_time = header.index(config.time_column)
    tags = [(i, name) for i, name in enumerate(header) if i != at_time]
    empty = [i + 1 for i, name in tags if not name]
    if empty:
        raise CsvFileError([f"line 1: column(s) {empty} have no tag name"])
    if len({name for _, name in tags}) != len(tags):
        raise CsvFileError(["line 1: a tag appears in two columns"])
    readings: list[SourceReading] = []
    for line, row in rows:
        if not any(cell.strip() for cell in row):
            continue
        if len(row) != len(header):
            problem(f"line {line}: {len(row)} fields, the header has {len(header)}")
            continue
        try:
            stamp = parser.time(row[at_time])
        except ValueError as exc:
            problem(f"line {line}: {exc}")
            continue
        for i, tag in tags:
            if not row[i].strip():
                continue
            try:
                readings.append(SourceReading(tag, stamp, parser.number(row[i])))
            except ValueError as exc:
                problem(f"line {line}, column {tag!r}: {exc}")
    return readings


def _move(path: Path, folder: Path) -> Path:
    """Move a file into a folder without overwriting a file of the same name."""
    folder.mkdir(parents=True, exist_ok=True)
    target = folder / path.name
    if target.exists():
        stamp = time.strftime("%Y%m%dT%H%M%S")
        target = folder / f"{path.stem}.{stamp}.{time.monotonic_ns()}{path.suffix}"
    shutil.move(str(path), str(target))
    return target


class CsvFolderSource(Source):
    """Takes each export file in a folder once (see the module notes).

    Parameters
    ----------
    config : CsvFolderSourceConfig
        The source's entry of the bridge file.
    """

    def __init__(self, config: CsvFolderSourceConfig) -> None:
        super().__init__(config.name, config.poll)
        self.config = config
        self.files_done = 0
        self.files_failed = 0
        self._waiting: set[str] = set()

    def ready_files(self, now: float | None = None) -> list[Path]:
        """Files matching the pattern that have not changed for ``settle`` seconds, oldest first."""
        now = time.time() if now is None else now
        found = []
        for path in self.config.folder.glob(self.config.pattern):
            try:
                stat = path.stat()
            except FileNotFoundError:
                continue  # taken away meanwhile
            if path.is_file() and now - stat.st_mtime >= self.config.settle:
                found.append((stat.st_mtime, path.name, path))
        return [path for _, _, path in sorted(found)]

    async def read_once(self, sink: Sink) -> int:
        """Take every ready file: spool it and move it to done, or move it to failed.

        Parameters
        ----------
        sink : Sink
            Takes a file's readings into the spool.

        Returns
        -------
        int
            Readings read from the files taken.

        Raises
        ------
        FileNotFoundError
            The drop folder does not exist.
        """
        if not self.config.folder.is_dir():
            raise FileNotFoundError(
                f"sources {self.name}: folder {self.config.folder} does not exist"
            )
        total = 0
        for path in self.ready_files():
            try:
                readings = await asyncio.to_thread(read_csv_file, path, self.config)
            except CsvFileError as exc:
                self._fail(path, str(exc))
                continue
            except OSError as exc:
                log.error("source %s: cannot read %s: %s", self.name, path.name, exc)
                continue
            try:
                sink(readings)
            except SpoolFull as exc:
                if exc.needed > exc.capacity:
                    self._fail(
                        path,
                        f"the file holds {exc.needed} readings, more than the spool can ever "
                        f"hold ({exc.capacity}); split the export or raise spool.max_readings",
                    )
                    continue
                if path.name not in self._waiting:
                    self._waiting.add(path.name)
                    log.warning(
                        "source %s: %s stays in the folder until the spool has room (%s)",
                        self.name,
                        path.name,
                        exc,
                    )
                return total
            self._waiting.discard(path.name)
            _move(path, self.config.done)
            self.files_done += 1
            total += len(readings)
            log.info("source %s: took %s (%d readings)", self.name, path.name, len(readings))
        return total

    def _fail(self, path: Path, reason: str) -> None:
        target = _move(path, self.config.failed)
        target.with_name(target.name + ".reason.txt").write_text(
            f"{path.name} was not taken; nothing of it was spooled.\n{reason}\n", encoding="utf-8"
        )
        self.files_failed += 1
        first = reason.splitlines()[0] if reason else ""
        log.error(
            "source %s: %s moved to %s: %s", self.name, path.name, self.config.failed, first
        )
