"""Archives of readings, and the truth of simulated runs, as CSV or Parquet files.

An archive holds what a plant historian would: readings of tags at times. Two
layouts are read and written (the format follows the file name: ``.csv``,
``.csv.gz`` or ``.parquet``):

- long form, one reading a row: ``time, tag, value`` and optionally ``received``
  (when the reading reached the historian, for late lab results);
- wide form, one time a row: ``time`` and one column per tag, empty (NaN) where a
  tag has no reading at that time. Wide form has no ``received`` column.

Times are epoch seconds (floats) or ISO 8601 strings with a UTC offset
(``2026-03-02T08:00:00+00:00``); both are read, and Parquet timestamps too.
Values are in each tag's configured unit, as a historian holds them
(:func:`simulation_columns` and :func:`to_si` convert).

Reading checks the shape of the file, not the plant: unsorted rows and duplicate
readings are kept as they are and counted by :func:`archive_stats`; the replay
decides what to do with them.
"""

from __future__ import annotations

import os
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any, Literal

import numpy as np
from numpy.typing import NDArray

from estimator.config import TrainConfig
from estimator.model import FloatArray, IntArray, TrainModel
from estimator.simulate import Simulation

__all__ = [
    "ArchiveColumns",
    "ArchiveError",
    "archive_stats",
    "read_archive",
    "read_truth",
    "simulation_columns",
    "to_si",
    "truth_columns",
    "write_archive",
    "write_truth",
]

Form = Literal["long", "wide"]
TimeFormat = Literal["epoch", "iso"]

_US = 1_000_000


class ArchiveError(ValueError):
    """An archive that cannot be read or written as asked; the message names the file."""


@dataclass(frozen=True)
class ArchiveColumns:
    """Readings as columns: what :func:`read_archive` returns and :func:`write_archive` takes.

    Attributes
    ----------
    names : tuple of str
        Tag names; ``codes`` index into them.
    codes : ndarray of int, shape (m,)
        Tag of each reading.
    times : ndarray, shape (m,)
        Time stamp of each reading [epoch s].
    values : ndarray, shape (m,)
        Value of each reading [the tag's unit]; NaN for an empty cell.
    received : ndarray, shape (m,), or None
        When each reading reached the historian [epoch s]; None when the archive
        does not say (then it is the time stamp).
    """

    names: tuple[str, ...]
    codes: IntArray
    times: FloatArray
    values: FloatArray
    received: FloatArray | None = None

    def __len__(self) -> int:
        return len(self.times)

    @property
    def tags(self) -> NDArray[np.str_]:
        """Tag name of each reading, shape (m,)."""
        return np.array(self.names, dtype=np.str_)[self.codes] if self.names else np.array([])

    @classmethod
    def from_readings(
        cls,
        tags: Any,
        times: Any,
        values: Any,
        received: Any = None,
    ) -> ArchiveColumns:
        """Build columns from a tag name per reading.

        Parameters
        ----------
        tags : sequence of str, shape (m,)
            Tag of each reading.
        times : array_like, shape (m,)
            Time stamps [epoch s].
        values : array_like, shape (m,)
            Values [tag unit].
        received : array_like, shape (m,), optional
            Arrival times [epoch s].

        Returns
        -------
        ArchiveColumns
            With ``names`` in order of first appearance.
        """
        tag_array = np.asarray(tags, dtype=object)
        names, first, codes = np.unique(tag_array, return_index=True, return_inverse=True)
        order = np.argsort(first)
        rank = np.empty(len(order), dtype=np.int64)
        rank[order] = np.arange(len(order))
        return cls(
            names=tuple(str(n) for n in names[order]),
            codes=rank[codes.reshape(-1)].astype(np.int64),
            times=np.asarray(times, dtype=np.float64),
            values=np.asarray(values, dtype=np.float64),
            received=None if received is None else np.asarray(received, dtype=np.float64),
        )


def _convert(columns: ArchiveColumns, config: TrainConfig, to_si_units: bool) -> ArchiveColumns:
    units = config.tag_units()
    scale = np.array([units.get(n, ("", 1.0, 0.0))[1] for n in columns.names] or [1.0])
    offset = np.array([units.get(n, ("", 1.0, 0.0))[2] for n in columns.names] or [0.0])
    s, o = scale[columns.codes], offset[columns.codes]
    values = s * columns.values + o if to_si_units else (columns.values - o) / s
    return replace(columns, values=values)


def simulation_columns(
    simulation: Simulation, config: TrainConfig, *, units: Literal["tag", "si"] = "tag"
) -> ArchiveColumns:
    """Return a simulation's readings as archive columns.

    Parameters
    ----------
    simulation : Simulation
        From :func:`estimator.simulate.simulate`.
    config : TrainConfig
        The simulated train, for each tag's unit.
    units : {"tag", "si"}
        ``"tag"``: values in each tag's configured unit (m^3/h, degC, ...), as a
        historian holds them; ``"si"``: as simulated [m^3/s, K, mol/m^3].

    Returns
    -------
    ArchiveColumns
        With ``received`` from the simulation (later than ``times`` for delayed
        lab results).
    """
    columns = ArchiveColumns(
        names=simulation.tag_names,
        codes=simulation.reading_tags,
        times=simulation.reading_times,
        values=simulation.reading_values,
        received=simulation.received,
    )
    return columns if units == "si" else _convert(columns, config, to_si_units=False)


def to_si(columns: ArchiveColumns, config: TrainConfig) -> ArchiveColumns:
    """Convert values from each tag's configured unit to SI [m^3/s, K, mol/m^3].

    Tags the train does not know are left as they are (the filter refuses them).
    """
    return _convert(columns, config, to_si_units=True)


# ---------------------------------------------------------------------- files


def archive_kind(path: Path) -> Literal["csv", "parquet"]:
    """Tell the archive's file type from its name (.csv, .csv.gz, .parquet)."""
    name = path.name.lower()
    if name.endswith((".parquet", ".pq")):
        return "parquet"
    if name.endswith((".csv", ".csv.gz")):
        return "csv"
    raise ArchiveError(f"{path}: unknown archive type; name it .csv, .csv.gz or .parquet")


def _iso(times: FloatArray) -> NDArray[np.str_]:
    """Epoch seconds as ISO 8601 strings with a ``+00:00`` offset, as short as exact."""
    micro = np.round(times * _US).astype(np.int64)
    unit: Literal["s", "ms", "us"] = "us"
    if np.all(micro % _US == 0):
        unit = "s"
    elif np.all(micro % 1000 == 0):
        unit = "ms"
    stamps: NDArray[np.datetime64] = micro.astype("datetime64[us]")
    text = np.datetime_as_string(stamps, unit=unit)
    return np.char.add(text, "+00:00")


def _time_column(times: FloatArray, time_format: TimeFormat) -> Any:
    return times if time_format == "epoch" else _iso(times)


@dataclass(frozen=True)
class _Categorical:
    """A column of names given as codes into a list: a Parquet dictionary column."""

    codes: IntArray
    names: tuple[str, ...]


def _write_table(path: Path, columns: dict[str, Any]) -> None:
    kind = archive_kind(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    if kind == "csv":
        import pandas as pd

        plain = {
            name: np.array(col.names, dtype=object)[col.codes]
            if isinstance(col, _Categorical)
            else col
            for name, col in columns.items()
        }
        pd.DataFrame(plain).to_csv(path, index=False, na_rep="", compression="infer")
        return
    import pyarrow as pa
    import pyarrow.parquet as pq

    arrays = {}
    for name, col in columns.items():
        if isinstance(col, _Categorical):
            arrays[name] = pa.DictionaryArray.from_arrays(
                pa.array(col.codes.astype(np.int32)), pa.array(list(col.names), pa.string())
            )
        else:
            arrays[name] = pa.array(col)
    floats = [n for n, a in arrays.items() if pa.types.is_floating(a.type)]
    dictionaries = [n for n, a in arrays.items() if pa.types.is_dictionary(a.type)]
    # Byte-stream splitting puts the bytes of like magnitude together, which roughly
    # halves the zstd size of slowly varying floats (times, analyzer values).
    pq.write_table(
        pa.table(arrays),
        path,
        compression="zstd",
        compression_level=9,
        use_dictionary=dictionaries or False,
        use_byte_stream_split=floats or False,
    )


def write_archive(
    path: str | os.PathLike[str],
    readings: ArchiveColumns,
    form: Form = "long",
    *,
    time_format: TimeFormat = "epoch",
) -> None:
    """Write readings to an archive file.

    Parameters
    ----------
    path : str or os.PathLike
        ``.csv``, ``.csv.gz`` or ``.parquet`` (zstd-compressed).
    readings : ArchiveColumns
        The readings, written in their order (long form) or by time (wide form).
    form : {"long", "wide"}
        Long: ``time, tag, value`` (+ ``received`` when given). Wide: ``time`` and
        a column per tag in ``readings.names`` order.
    time_format : {"epoch", "iso"}
        Times as epoch seconds [s] or as ISO 8601 strings with a UTC offset.

    Raises
    ------
    ArchiveError
        Unknown file type; wide form asked for readings that have a ``received``
        time later than their stamp (wide form cannot carry it) or two readings
        of one tag at one time.
    """
    file = Path(path)
    archive_kind(file)
    if form == "long":
        columns: dict[str, Any] = {
            "time": _time_column(readings.times, time_format),
            "tag": _Categorical(readings.codes, readings.names),
            "value": readings.values,
        }
        if readings.received is not None:
            columns["received"] = _time_column(readings.received, time_format)
        _write_table(file, columns)
        return
    if form != "wide":
        raise ArchiveError(f"{file}: unknown archive form {form!r}; use 'long' or 'wide'")
    received = readings.received
    if received is not None and not np.array_equal(received, readings.times, equal_nan=True):
        raise ArchiveError(
            f"{file}: wide form has no 'received' column and some readings arrive after "
            "their time stamp; write the long form, or drop received first"
        )
    times, row = np.unique(readings.times, return_inverse=True)
    grid = np.full((len(times), len(readings.names)), np.nan)
    filled = np.zeros(grid.shape, dtype=bool)
    row = row.reshape(-1)
    if np.any(np.bincount(row * len(readings.names) + readings.codes, minlength=grid.size) > 1):
        raise ArchiveError(
            f"{file}: a tag has two readings at one time, which wide form cannot hold; "
            "write the long form"
        )
    grid[row, readings.codes] = readings.values
    filled[row, readings.codes] = True
    columns = {"time": _time_column(times, time_format)}
    for j, name in enumerate(readings.names):
        if name == "time":
            raise ArchiveError(f"{file}: a tag named 'time' cannot be a wide-form column")
        columns[name] = grid[:, j]
    _write_table(file, columns)


def _raw_columns(file: Path) -> dict[str, Any]:
    """Every column of the file: numeric numpy arrays, or object arrays of str."""
    kind = archive_kind(file)
    if not file.is_file():
        raise ArchiveError(f"{file}: no such file")
    if kind == "csv":
        import pandas as pd

        try:
            frame = pd.read_csv(
                file, dtype=str, keep_default_na=False, na_filter=False, compression="infer"
            )
        except (OSError, ValueError, UnicodeDecodeError) as exc:
            raise ArchiveError(f"{file}: cannot read as CSV ({exc})") from None
        return {str(c): frame[c].to_numpy(dtype=object) for c in frame.columns}
    import pyarrow as pa
    import pyarrow.parquet as pq

    try:
        table = pq.read_table(file)
    except (OSError, pa.ArrowException) as exc:
        raise ArchiveError(f"{file}: cannot read as Parquet ({exc})") from None
    out: dict[str, Any] = {}
    for name in table.column_names:
        col = table.column(name).combine_chunks()
        if pa.types.is_dictionary(col.type):
            out[name] = (np.asarray(col.indices.fill_null(-1)), col.dictionary.to_pylist())
        elif pa.types.is_timestamp(col.type):
            us = col.cast(pa.timestamp("us", tz="UTC")).cast(pa.int64())
            out[name] = _from_micro(np.asarray(us.fill_null(np.iinfo(np.int64).min)))
        elif pa.types.is_integer(col.type) or pa.types.is_floating(col.type):
            out[name] = np.asarray(col.cast(pa.float64()).fill_null(np.nan))
        else:
            out[name] = np.array(col.cast(pa.string()).fill_null("").to_pylist(), dtype=object)
    return out


def _from_micro(micro: IntArray) -> FloatArray:
    seconds = (micro // _US).astype(np.float64) + (micro % _US).astype(np.float64) / _US
    return np.where(micro == np.iinfo(np.int64).min, np.nan, seconds)


def _strings(raw: Any) -> NDArray[np.object_]:
    if isinstance(raw, tuple):
        codes, names = raw
        lookup = np.array([*map(str, names), ""], dtype=object)
        return lookup[np.where(codes < 0, len(names), codes)]
    return np.asarray(raw, dtype=object)


def _numbers(raw: Any, file: Path, column: str) -> FloatArray:
    """Read a numeric column; empty cells become NaN."""
    if isinstance(raw, np.ndarray) and raw.dtype.kind in "fiu":
        return raw.astype(np.float64)
    text = _strings(raw)
    empty = np.array([not s.strip() for s in text.tolist()], dtype=bool)
    out = np.full(len(text), np.nan)
    try:
        out[~empty] = text[~empty].astype(np.float64)
    except ValueError:
        for i, s in enumerate(text.tolist()):
            try:
                float(s) if s.strip() else None
            except ValueError:
                raise ArchiveError(
                    f"{file}: column {column!r}: {s!r} at data row {i + 1} is not a number"
                ) from None
    return out


def _times(raw: Any, file: Path, column: str, *, allow_empty: bool = False) -> FloatArray:
    """Read a time column as epoch seconds: numbers, ISO 8601 strings with offset, timestamps."""
    if isinstance(raw, np.ndarray) and raw.dtype.kind in "fiu":
        times = raw.astype(np.float64)
        bad = ~np.isfinite(times)
        if allow_empty:
            bad &= ~np.isnan(times)
        if np.any(bad):
            i = int(np.flatnonzero(bad)[0])
            raise ArchiveError(f"{file}: column {column!r}: no time at data row {i + 1}")
        return times
    text = _strings(raw)
    listed = text.tolist()
    empty = np.array([not s.strip() for s in listed], dtype=bool)
    if np.any(empty) and not allow_empty:
        i = int(np.flatnonzero(empty)[0])
        raise ArchiveError(f"{file}: column {column!r}: no time at data row {i + 1}")
    out = np.full(len(text), np.nan)
    if np.all(empty):
        return out
    first = listed[int(np.flatnonzero(~empty)[0])]
    try:
        float(first)
        numeric = True
    except ValueError:
        numeric = False
    if numeric:
        try:
            out[~empty] = text[~empty].astype(np.float64)
        except ValueError:
            pass
        else:
            bad = ~empty & ~np.isfinite(out)
            if np.any(bad):
                i = int(np.flatnonzero(bad)[0])
                raise ArchiveError(
                    f"{file}: column {column!r}: {listed[i]!r} at data row {i + 1} is not a time"
                )
            return out
    import pandas as pd

    series = pd.Series(text[~empty], dtype=object)
    parsed = pd.to_datetime(series, utc=True, format="ISO8601", errors="coerce")
    failed = parsed.isna().to_numpy()
    no_offset = ~series.str.contains(r"(?:Z|[+-]\d\d(?::?\d\d)?)\s*$", regex=True).to_numpy(bool)
    rows = np.flatnonzero(~empty)
    if np.any(failed):
        i = int(np.flatnonzero(failed)[0])
        raise ArchiveError(
            f"{file}: column {column!r}: cannot read {series.iloc[i]!r} at data row "
            f"{rows[i] + 1} as a time (epoch seconds, or ISO 8601 with a UTC offset)"
        )
    if np.any(no_offset):
        i = int(np.flatnonzero(no_offset)[0])
        raise ArchiveError(
            f"{file}: column {column!r}: time {series.iloc[i]!r} at data row {rows[i] + 1} "
            "has no UTC offset; write it as e.g. '2026-03-02T08:00:00+00:00'"
        )
    micro = parsed.dt.tz_localize(None).to_numpy(dtype="datetime64[us]").astype(np.int64)
    out[~empty] = _from_micro(micro)
    return out


def _tags(raw: Any, file: Path) -> tuple[tuple[str, ...], IntArray]:
    if isinstance(raw, tuple):
        codes, names = raw
        if np.any(codes < 0) or any(not str(n).strip() for n in names):
            i = int(np.flatnonzero(codes < 0)[0]) if np.any(codes < 0) else 0
            raise ArchiveError(f"{file}: column 'tag': empty tag at data row {i + 1}")
        used, inverse = np.unique(codes, return_inverse=True)
        return tuple(str(names[u]) for u in used), inverse.reshape(-1).astype(np.int64)
    import pandas as pd

    text = [str(t) for t in _strings(raw).tolist()]
    blank = np.array([not t.strip() for t in text], dtype=bool)
    if np.any(blank):
        raise ArchiveError(
            f"{file}: column 'tag': empty tag at data row {int(np.flatnonzero(blank)[0]) + 1}"
        )
    codes, uniques = pd.factorize(np.array(text, dtype=object))
    return tuple(str(u) for u in uniques), np.asarray(codes, dtype=np.int64)


def read_archive(path: str | os.PathLike[str]) -> ArchiveColumns:
    """Read an archive in long or wide form.

    A file with a ``tag`` or a ``value`` column is long form and needs ``time``,
    ``tag`` and ``value`` (``received`` optional); any other file is wide form and
    needs ``time``, every other column being a tag.

    Parameters
    ----------
    path : str or os.PathLike
        A ``.csv``, ``.csv.gz`` or ``.parquet`` file.

    Returns
    -------
    ArchiveColumns
        Rows in file order (wide form: by row, then by column); tag names in
        order of first appearance (long CSV), of the dictionary (long Parquet),
        or of the columns (wide form).

    Raises
    ------
    ArchiveError
        The file is missing or unreadable, a required column is missing, a time
        cannot be read (or has no UTC offset), or a value is not a number; the
        message names the file, the column and the first row at fault.
    """
    file = Path(path)
    raw = _raw_columns(file)
    found = ", ".join(raw) or "none"
    if "tag" in raw or "value" in raw:
        for name in ("time", "tag", "value"):
            if name not in raw:
                raise ArchiveError(
                    f"{file}: no {name!r} column; a long-form archive needs time, tag and "
                    f"value (found: {found})"
                )
        times = _times(raw["time"], file, "time")
        names, codes = _tags(raw["tag"], file)
        values = _numbers(raw["value"], file, "value")
        received = None
        if "received" in raw:
            received = _times(raw["received"], file, "received", allow_empty=True)
        return ArchiveColumns(names, codes, times, values, received)
    if "time" not in raw:
        raise ArchiveError(
            f"{file}: no 'time' column; a wide-form archive needs time and a column per tag "
            f"(found: {found})"
        )
    times = _times(raw["time"], file, "time")
    tag_names = tuple(c for c in raw if c != "time")
    if not tag_names:
        raise ArchiveError(f"{file}: no tag columns beside 'time'")
    grid = np.column_stack([_numbers(raw[c], file, c) for c in tag_names])
    rows, cols = np.nonzero(~np.isnan(grid))
    return ArchiveColumns(tag_names, cols.astype(np.int64), times[rows], grid[rows, cols])


def archive_stats(columns: ArchiveColumns) -> dict[str, int | float]:
    """Count what a replay must handle: disorder, repeats, gaps in values.

    Parameters
    ----------
    columns : ArchiveColumns
        As read.

    Returns
    -------
    dict
        ``rows``; ``tags`` (distinct tags with readings); ``first_time`` and
        ``last_time`` [epoch s] (NaN when empty); ``unsorted``, rows stamped
        earlier than a row above them; ``duplicates``, rows equal in tag, time
        and value to an earlier row; ``conflicts``, further distinct values of a
        tag at a time it already has; ``not_finite``, values that are NaN or
        infinite; ``late``, rows received after their time stamp.
    """
    n = len(columns)
    times = columns.times
    if n == 0:
        nan = float("nan")
        return dict(
            rows=0, tags=0, first_time=nan, last_time=nan, unsorted=0, duplicates=0,
            conflicts=0, not_finite=0, late=0,
        )  # fmt: skip
    running = np.maximum.accumulate(times)
    unsorted = int(np.count_nonzero(times[1:] < running[:-1]))
    # Compare bit patterns, so NaN values equal NaN values.
    value_bits = columns.values.view(np.int64)
    time_bits = times.view(np.int64)
    keys = np.column_stack([columns.codes, time_bits])
    unique_keys = len(np.unique(keys, axis=0))
    unique_rows = len(np.unique(np.column_stack([keys, value_bits]), axis=0))
    late = 0
    if columns.received is not None:
        late = int(np.count_nonzero(columns.received > times))
    return {
        "rows": n,
        "tags": len(np.unique(columns.codes)),
        "first_time": float(np.nanmin(times)),
        "last_time": float(np.nanmax(times)),
        "unsorted": unsorted,
        "duplicates": n - unique_rows,
        "conflicts": unique_rows - unique_keys,
        "not_finite": int(np.count_nonzero(~np.isfinite(columns.values))),
        "late": late,
    }


# ---------------------------------------------------------------------- truth


def truth_columns(
    simulation: Simulation, model: TrainModel, *, every: float | None = None
) -> dict[str, FloatArray]:
    """Return the truth of a simulation as named columns, optionally down-sampled.

    Parameters
    ----------
    simulation : Simulation
        From :func:`estimator.simulate.simulate`.
    model : TrainModel
        The simulated train, for vessel and species names.
    every : float, optional
        Keep one step in ``every`` seconds (rounded to whole steps) [s]; all when None.

    Returns
    -------
    dict of str to ndarray
        ``time`` [epoch s]; ``<vessel>.<species>`` [mol/m^3] for every vessel and
        species; ``activity`` [-]; the true inputs ``flow`` [m^3/s],
        ``temperature:<vessel>`` [K] and ``feed:<species>`` [mol/m^3].
    """
    cfg = model.config
    times = simulation.times
    stride = 1
    if every is not None and len(times) > 1:
        stride = max(1, int(round(every / (times[1] - times[0]))))
    rows = slice(None, None, stride)
    out: dict[str, FloatArray] = {"time": times[rows]}
    for i, vessel in enumerate(cfg.vessels):
        for s, species in enumerate(cfg.species):
            col = model.layout.concentration(i, s)
            out[f"{vessel.name}.{species}"] = simulation.truth[rows, col]
    out["activity"] = simulation.true_activity[rows]
    out["flow"] = simulation.inputs[rows, 0]
    for i, vessel in enumerate(cfg.vessels):
        out[f"temperature:{vessel.name}"] = simulation.inputs[rows, 1 + i]
    for s, species in enumerate(cfg.species):
        out[f"feed:{species}"] = simulation.inputs[rows, 1 + len(cfg.vessels) + s]
    return out


def write_truth(
    path: str | os.PathLike[str],
    simulation: Simulation,
    model: TrainModel,
    *,
    every: float | None = None,
) -> int:
    """Write the truth of a simulation in wide form (see :func:`truth_columns`).

    Parameters
    ----------
    path : str or os.PathLike
        ``.csv``, ``.csv.gz`` or ``.parquet``.
    simulation : Simulation
        The run.
    model : TrainModel
        The simulated train.
    every : float, optional
        Down-sampling interval [s]; every step when None.

    Returns
    -------
    int
        Rows written.
    """
    file = Path(path)
    columns = truth_columns(simulation, model, every=every)
    _write_table(file, dict(columns))
    return len(columns["time"])


def read_truth(path: str | os.PathLike[str]) -> dict[str, FloatArray]:
    """Read a truth file written by :func:`write_truth`.

    Returns
    -------
    dict of str to ndarray
        Every column as float64; ``time`` in [epoch s].

    Raises
    ------
    ArchiveError
        Missing file, no ``time`` column, an unreadable time or value.
    """
    file = Path(path)
    raw = _raw_columns(file)
    if "time" not in raw:
        raise ArchiveError(f"{file}: no 'time' column (found: {', '.join(raw) or 'none'})")
    out = {"time": _times(raw["time"], file, "time")}
    for name, col in raw.items():
        if name != "time":
            out[name] = _numbers(col, file, name)
    return out
