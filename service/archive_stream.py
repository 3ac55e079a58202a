"""Archives read a record batch at a time, so a replay's memory does not grow with them.

:func:`service.archive.read_archive` reads a whole file into memory, which suits
tests, tools and month-long archives. A replay of a year of 10 s data must not hold
it all: :class:`ArchiveStream` reads the same files (CSV, gzipped CSV or Parquet;
long form ``time, tag, value[, received]`` or wide form ``time`` + one column per
tag) one Arrow record batch at a time and yields each as numpy columns. Times are
read as epoch seconds, ISO 8601 text with a UTC offset, or zoned Parquet
timestamps; wide-form empty cells are no readings. Errors are
:class:`~service.archive.ArchiveError` with the message naming the file, the
column and, where it helps, the data row.
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Literal

import numpy as np

from estimator.model import FloatArray, IntArray
from service.archive import ArchiveError, archive_kind

__all__ = ["ArchiveBatch", "ArchiveStream"]

_BATCH_ROWS = 1 << 16
_CSV_BLOCK = 4 << 20


@dataclass
class ArchiveBatch:
    """The readings of one record batch, as columns.

    Attributes
    ----------
    codes : ndarray of int, shape (m,)
        Tag of each reading, an index into :attr:`ArchiveStream.names` (which
        grows as a long-form archive shows new tags).
    times : ndarray, shape (m,)
        Time stamp of each reading [s since the epoch].
    values : ndarray, shape (m,)
        Values in each tag's own unit; NaN for an empty long-form cell (wide-form
        empty cells are no readings and are left out).
    received : ndarray, shape (m,), or None
        When each reading reached the historian [s since the epoch]; NaN where the
        cell is empty; None without a ``received`` column.
    rows : int
        Data rows of the file in this batch.
    progress : float
        Rows (Parquet) or bytes (CSV) of the file read so far, out of
        :attr:`ArchiveStream.total`.
    """

    codes: IntArray
    times: FloatArray
    values: FloatArray
    received: FloatArray | None
    rows: int
    progress: float




class ArchiveStream:
    """An archive read one record batch at a time, as :class:`ArchiveBatch` columns.

    Parameters
    ----------
    path : pathlib.Path
        ``.csv``, ``.csv.gz`` or ``.parquet`` (``.pq``).

    Attributes
    ----------
    form : {"long", "wide"}
        Long when the file has a ``tag`` or ``value`` column.
    names : list of str
        Tag names seen so far (wide form: every tag column).
    has_received : bool
        Whether a long-form file has a ``received`` column.
    total : float
        Rows (Parquet) or bytes (CSV) in the file, for progress.

    Raises
    ------
    service.archive.ArchiveError
        Unknown file type, a missing or unreadable file, or a missing column
        (long form: ``time``, ``tag``, ``value``; wide form: ``time`` and a tag).
    """

    def __init__(self, path: Path) -> None:
        self.path = path
        self.kind = archive_kind(path)
        if not path.is_file():
            raise ArchiveError(f"{path}: no such file")
        self.columns = self._header()
        found = ", ".join(self.columns) or "none"
        self.form: Literal["long", "wide"] = (
            "long" if ("tag" in self.columns or "value" in self.columns) else "wide"
        )
        if self.form == "long":
            for name in ("time", "tag", "value"):
                if name not in self.columns:
                    raise ArchiveError(
                        f"{path}: no {name!r} column; a long-form archive needs time, tag and "
                        f"value (found: {found})"
                    )
            self.names: list[str] = []
        else:
            if "time" not in self.columns:
                raise ArchiveError(
                    f"{path}: no 'time' column; a wide-form archive needs time and a column "
                    f"per tag (found: {found})"
                )
            self.names = [c for c in self.columns if c != "time"]
            if not self.names:
                raise ArchiveError(f"{path}: no tag columns beside 'time'")
        self.has_received = self.form == "long" and "received" in self.columns
        self._code = {name: i for i, name in enumerate(self.names)}
        self.total = float(path.stat().st_size)
        if self.kind == "parquet":
            self.total = float(self._parquet().metadata.num_rows)

    def _parquet(self) -> Any:
        import pyarrow as pa
        import pyarrow.parquet as pq

        try:
            return pq.ParquetFile(self.path)
        except (OSError, pa.ArrowException) as exc:
            raise ArchiveError(f"{self.path}: cannot read as Parquet ({exc})") from None

    def _header(self) -> list[str]:
        if self.kind == "parquet":
            return list(self._parquet().schema_arrow.names)
        import pyarrow as pa
        import pyarrow.csv as pa_csv

        compression = "gzip" if self.path.name.lower().endswith(".gz") else None
        try:
            with pa.input_stream(str(self.path), compression=compression) as stream:
                reader = pa_csv.open_csv(
                    stream, read_options=pa_csv.ReadOptions(block_size=1 << 16)
                )
                return list(reader.schema.names)
        except (OSError, pa.ArrowException) as exc:
            raise ArchiveError(f"{self.path}: cannot read as CSV ({_arrow_text(exc)})") from None

    def _record_batches(self, columns: list[str] | None = None) -> Iterator[tuple[Any, float]]:
        """Arrow record batches with the progress reached (rows or bytes read)."""
        import pyarrow as pa

        if self.kind == "parquet":
            file = self._parquet()
            done = 0
            try:
                for batch in file.iter_batches(batch_size=_BATCH_ROWS, columns=columns):
                    done += batch.num_rows
                    yield batch, float(done)
            except (OSError, pa.ArrowException) as exc:
                raise ArchiveError(f"{self.path}: cannot read as Parquet ({exc})") from None
            return
        import pyarrow.csv as pa_csv

        numeric = ["value"] if self.form == "long" else self.names
        types = {name: pa.float64() for name in numeric}
        types.update({name: pa.string() for name in ("time", "received", "tag")})
        with open(self.path, "rb") as raw:
            compression = "gzip" if self.path.name.lower().endswith(".gz") else None
            try:
                stream = pa.input_stream(raw, compression=compression)
                reader = pa_csv.open_csv(
                    stream,
                    read_options=pa_csv.ReadOptions(block_size=_CSV_BLOCK),
                    convert_options=pa_csv.ConvertOptions(
                        column_types=types,
                        strings_can_be_null=True,
                        include_columns=columns,
                    ),
                )
                for batch in reader:
                    yield batch, float(raw.tell())
            except (OSError, pa.ArrowException) as exc:
                raise ArchiveError(
                    f"{self.path}: cannot read as CSV ({_arrow_text(exc)})"
                ) from None

    def tag_names(self) -> list[str]:
        """Return every tag of the archive, in order of appearance.

        Wide form: the tag columns. Long form: one pass over the ``tag`` column
        alone, so that unknown tags can be reported before any work is done.
        """
        if self.form == "wide":
            return list(self.names)
        seen: dict[str, None] = {}
        for batch, _ in self._record_batches(["tag"]):
            for name in _dictionary(batch.column(0))[1]:
                if name is not None:
                    seen.setdefault(str(name), None)
        return list(seen)

    def __iter__(self) -> Iterator[ArchiveBatch]:
        row0 = 0
        for batch, progress in self._record_batches():
            n = batch.num_rows
            cols = dict(zip(batch.schema.names, batch.columns, strict=True))
            times = _time_column(cols["time"], self.path, "time", row0)
            if self.form == "long":
                codes = self._tag_codes(cols["tag"], row0)
                values = _number_column(cols["value"], self.path, "value", row0)
                received = None
                if self.has_received:
                    received = _time_column(
                        cols["received"], self.path, "received", row0, allow_empty=True
                    )
                yield ArchiveBatch(codes, times, values, received, n, progress)
            else:
                grid = np.column_stack(
                    [_number_column(cols[c], self.path, c, row0) for c in self.names]
                )
                rows, tags = np.nonzero(~np.isnan(grid))
                yield ArchiveBatch(
                    tags.astype(np.int64), times[rows], grid[rows, tags], None, n, progress
                )
            row0 += n

    def _tag_codes(self, column: Any, row0: int) -> IntArray:
        indices, names = _dictionary(column)
        lookup = np.empty(len(names) + 1, dtype=np.int64)
        for i, name in enumerate(names):
            text = "" if name is None else str(name)
            if not text.strip():
                lookup[i] = -1
                continue
            if text not in self._code:
                self._code[text] = len(self.names)
                self.names.append(text)
            lookup[i] = self._code[text]
        lookup[-1] = -1
        codes = lookup[np.where(indices < 0, len(names), indices)]
        if np.any(codes < 0):
            row = row0 + int(np.flatnonzero(codes < 0)[0]) + 1
            raise ArchiveError(f"{self.path}: column 'tag': empty tag at data row {row}")
        return codes


def _arrow_text(exc: Exception) -> str:
    return " ".join(str(exc).split())


def _dictionary(column: Any) -> tuple[IntArray, list[Any]]:
    """Return a string or dictionary column as (indices, -1 for null; dictionary values)."""
    import pyarrow as pa
    import pyarrow.compute as pc

    if not pa.types.is_dictionary(column.type):
        column = pc.dictionary_encode(column.cast(pa.string()))
    indices = np.asarray(column.indices.fill_null(-1), dtype=np.int64)
    return indices, column.dictionary.to_pylist()


def _number_column(column: Any, file: Path, name: str, row0: int) -> FloatArray:
    """Read a numeric column as float64, empty cells NaN."""
    import pyarrow as pa
    import pyarrow.compute as pc

    if pa.types.is_integer(column.type) or pa.types.is_floating(column.type):
        return np.asarray(column.cast(pa.float64()).fill_null(np.nan))
    if pa.types.is_null(column.type):
        return np.full(len(column), np.nan)
    text = column.cast(pa.string())
    try:
        return np.asarray(pc.cast(text, pa.float64()).fill_null(np.nan))
    except pa.ArrowInvalid:
        for i, s in enumerate(text.to_pylist()):
            try:
                float(s) if s is not None and s.strip() else None
            except ValueError:
                raise ArchiveError(
                    f"{file}: column {name!r}: {s!r} at data row {row0 + i + 1} is not a number"
                ) from None
        raise


def _time_column(
    column: Any, file: Path, name: str, row0: int, *, allow_empty: bool = False
) -> FloatArray:
    """Read a time column as epoch seconds: numbers, timestamps, or ISO 8601 with offset."""
    import pyarrow as pa
    import pyarrow.compute as pc

    if pa.types.is_timestamp(column.type):
        if column.type.tz is None:
            raise ArchiveError(
                f"{file}: column {name!r}: timestamps without a time zone; store them in UTC "
                "with the zone, or as epoch seconds"
            )
        micro = column.cast(pa.timestamp("us", tz="UTC")).cast(pa.int64())
        out = np.asarray(micro.cast(pa.float64()).fill_null(np.nan)) / 1e6
    elif pa.types.is_integer(column.type) or pa.types.is_floating(column.type):
        out = np.asarray(column.cast(pa.float64()).fill_null(np.nan))
    elif pa.types.is_null(column.type):
        out = np.full(len(column), np.nan)
    else:
        text = column.cast(pa.string())
        try:
            out = np.asarray(pc.cast(text, pa.float64()).fill_null(np.nan))
        except pa.ArrowInvalid:
            try:
                stamps = pc.cast(text, pa.timestamp("us", tz="UTC")).cast(pa.int64())
            except pa.ArrowInvalid:
                raise ArchiveError(_bad_time(text.to_pylist(), file, name, row0)) from None
            out = np.asarray(stamps.cast(pa.float64()).fill_null(np.nan)) / 1e6
    if not allow_empty and not np.all(np.isfinite(out)):
        row = row0 + int(np.flatnonzero(~np.isfinite(out))[0]) + 1
        raise ArchiveError(f"{file}: column {name!r}: no time at data row {row}")
    return out


def _bad_time(text: Sequence[str | None], file: Path, name: str, row0: int) -> str:
    """Describe the first cell of ``text`` that is no time."""
    from datetime import datetime

    for i, cell in enumerate(text):
        if cell is None or not cell.strip():
            continue
        try:
            float(cell)
            continue
        except ValueError:
            pass
        try:
            stamp = datetime.fromisoformat(cell.strip())
        except ValueError:
            return (
                f"{file}: column {name!r}: cannot read {cell!r} at data row {row0 + i + 1} as a "
                "time (epoch seconds, or ISO 8601 with a UTC offset)"
            )
        if stamp.tzinfo is None:
            return (
                f"{file}: column {name!r}: time {cell!r} at data row {row0 + i + 1} has no UTC "
                "offset; write it as e.g. '2026-03-02T08:00:00+00:00'"
            )
    return f"{file}: column {name!r}: times mix epoch seconds and ISO 8601 text"
