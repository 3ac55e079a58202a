"""The windows the alert rules keep: thinned series, folded NIS sums, rolling slopes.

Pure array helpers of :mod:`estimator.alerts`. The rules look back over windows of
hours; to keep a train's memory bounded whatever the reading rate, the series
they keep are thinned to a grid (:func:`grid_first`) and old NIS rows and reading
counts are folded into sums per bin (:func:`fold_nis`, :func:`fold_counts`), in
ways that do not depend on how the readings were batched.
"""

from __future__ import annotations

import math

import numpy as np

from estimator.model import FloatArray

__all__ = [
    "BINS_PER_WINDOW",
    "FOLDED",
    "ROWS_PER_WINDOW",
    "bin_sums",
    "fold_counts",
    "fold_nis",
    "grid_first",
    "merge_nis",
    "merge_series",
    "rolling_slope",
    "sorted_nis",
]

#: Resolution of the windows the rules keep, as a fraction of each window: the
#: activity and expectation series keep one row per window/720 (10 s of a 2 h
#: window); NIS rows and reading counts older than the fold age are summed per
#: window/240 (30 s of a 2 h window).
ROWS_PER_WINDOW = 720
BINS_PER_WINDOW = 240
#: Offset of a folded NIS row's group, so its (time, group) key never meets a raw one.
FOLDED = 1_000_000.0


def grid_first(times: FloatArray, previous: float, step: float) -> np.ndarray:
    """Mask of the rows that open a new grid interval of ``step`` [s].

    ``previous`` is the time of the last row already kept (or -inf). Batching
    does not change the answer: a row is kept when its interval differs from the
    row before it, wherever the batch boundary falls.
    """
    if step <= 0.0:
        return np.ones(len(times), dtype=bool)
    bins = np.floor(np.asarray(times, dtype=np.float64) / step)
    before = np.floor(previous / step) if math.isfinite(previous) else -np.inf
    return bins != np.concatenate([[before], bins[:-1]])


def bin_sums(keys: FloatArray, values: FloatArray) -> tuple[FloatArray, FloatArray]:
    """Return the sorted unique ``keys`` (k,) and the column sums of ``values`` per key."""
    uniq, inverse = np.unique(keys, return_inverse=True)
    sums = np.column_stack(
        [
            np.bincount(inverse, weights=values[:, c], minlength=len(uniq))
            for c in range(values.shape[1])
        ]
    )
    return np.asarray(uniq, dtype=np.float64), sums.astype(np.float64)


def fold_nis(rows: FloatArray, until: float, step: float) -> FloatArray:
    """Sum the raw NIS rows older than ``until`` per bin of ``step`` [s] and group.

    A folded row is (bin end time, group + FOLDED, NIS sum, dof sum); the result
    stays sorted by (time, group).
    """
    old = (rows[:, 0] < until) & (rows[:, 1] < FOLDED)
    if not old.any():
        return rows
    part = rows[old]
    end = (np.floor(part[:, 0] / step) + 1.0) * step
    folded = np.column_stack([end, part[:, 1] + FOLDED, part[:, 2:]])
    rest = rows[~old]
    both = np.concatenate([rest[rest[:, 1] >= FOLDED], folded])
    pieces = [rest[rest[:, 1] < FOLDED]]
    for group in np.unique(both[:, 1]).tolist():  # a few measurement groups
        mine = both[both[:, 1] == group]
        ends, sums = bin_sums(mine[:, 0], mine[:, 2:])
        pieces.append(np.column_stack([ends, np.full(len(ends), group), sums]))
    merged = np.concatenate(pieces)
    return merged[np.lexsort((merged[:, 1], merged[:, 0]))]


def fold_counts(binned: FloatArray, times: FloatArray, step: float) -> FloatArray:
    """Add reading ``times`` to per-bin counts (rows of bin end time [s], count)."""
    end = (np.floor(times / step) + 1.0) * step
    rows = np.concatenate([binned, np.column_stack([end, np.ones(len(end))])])
    keys, sums = bin_sums(rows[:, 0], rows[:, 1:])
    return np.column_stack([keys, sums])


def merge_nis(held: FloatArray, new: FloatArray) -> FloatArray:
    """Rows (time, group, NIS, dof) of both, sorted by (time, group); new rows win a tie.

    Only the held rows from the new rows' earliest time on are sorted again (a
    rewind reruns the recent past; new rows usually all come after the held ones).
    """
    if len(new) == 0:
        return held
    cut = int(np.searchsorted(held[:, 0], new[:, 0].min(), side="left"))
    return np.concatenate([held[:cut], sorted_nis(np.concatenate([held[cut:], new]))])


def sorted_nis(rows: FloatArray) -> FloatArray:
    """Sort NIS rows by (time, group), the last of equal keys kept."""
    order = np.lexsort((np.arange(len(rows)), rows[:, 1], rows[:, 0]))
    rows = rows[order]
    last = np.ones(len(rows), dtype=bool)
    last[:-1] = (rows[1:, 0] != rows[:-1, 0]) | (rows[1:, 1] != rows[:-1, 1])
    return rows[last]


def merge_series(
    times: FloatArray, values: FloatArray, new_t: FloatArray, new_v: FloatArray
) -> tuple[FloatArray, FloatArray]:
    """Union of two time series, sorted; a time given twice keeps the newer value."""
    t = np.concatenate([times, new_t])
    v = np.concatenate([values, new_v])
    order = np.argsort(t, kind="stable")
    t, v = t[order], v[order]
    last = np.append(t[1:] != t[:-1], True)
    return t[last], v[last]


def rolling_slope(
    t: FloatArray, y: FloatArray, std: FloatArray, window: float, start: int
) -> tuple[FloatArray, FloatArray, np.ndarray]:
    """Least-squares slope over the trailing window at each row from ``start`` on.

    Returns slope [1/s], its standard error [1/s] and whether the window held
    enough data (three rows, three quarters of the window spanned).

    Notes
    -----
    Consecutive filter estimates are not independent samples, so the residual-based
    standard error of ordinary least squares understates the uncertainty of the
    slope; the error used is the larger of it and ``sqrt(s_0^2 + s_1^2) / span``
    from the filter's own 1-sigma at the window's ends.
    """
    x = (t - t[0]) / window
    yc = y - y[0]

    def prefix(z: FloatArray) -> FloatArray:
        return np.concatenate([[0.0], np.cumsum(z)])

    s_x, s_y = prefix(x), prefix(yc)
    s_xx, s_xy, s_yy = prefix(x * x), prefix(x * yc), prefix(yc * yc)
    rows = np.arange(start, len(t))
    first = np.searchsorted(t, t[rows] - window, side="left")
    n = (rows + 1 - first).astype(np.float64)
    hi, lo = rows + 1, first
    sx, sy = s_x[hi] - s_x[lo], s_y[hi] - s_y[lo]
    suu = s_xx[hi] - s_xx[lo] - sx * sx / n
    suv = s_xy[hi] - s_xy[lo] - sx * sy / n
    svv = s_yy[hi] - s_yy[lo] - sy * sy / n
    span = t[rows] - t[first]
    ok = (n >= 3) & (span >= 0.75 * window) & (suu > 0.0)
    safe_suu = np.where(ok, suu, 1.0)
    b = np.where(ok, suv / safe_suu, 0.0)
    rss = np.maximum(svv - b * suv, 0.0)
    se_ols = np.sqrt(rss / np.maximum(n - 2.0, 1.0) / safe_suu) / window
    se_ends = np.hypot(std[first], std[rows]) / np.where(span > 0.0, span, 1.0)
    return b / window, np.maximum(se_ols, se_ends), ok
