"""The column contract shared by every charting function in ``spc``.

A *points frame* holds many series at once, one row per plotted point:

==========  =========  ==============================================================
column      dtype      meaning
==========  =========  ==============================================================
``series``  string     series key (one control chart); any hashable dtype works
``seq``     int        order of the point; strictly increasing within a series
``value``   float64    the plotted statistic (site value, wafer mean, defect density …)
``center``  float64    centre line for this row (limits may change between versions)
``sigma``   float64    sigma *of the plotted statistic* for this row (> 0)
``n``       int        optional subgroup size / inspected area weight
==========  =========  ==============================================================

Rows of one series must be contiguous; if they are not (or ``seq`` is out of order) the functions sort
by (series, seq) themselves, which costs time on large frames. Extra columns are allowed; functions take
a ``passthrough`` list of column names (for example lineage ids such as ``_row``) and copy them into
their outputs.

A *signals frame* has one row per signal: ``series``, ``seq``, ``rule``, ``value`` plus the passthrough
columns, in the order of the input points (ties broken by the order of the requested rules).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import polars as pl

SERIES = "series"
SEQ = "seq"
VALUE = "value"
CENTER = "center"
SIGMA = "sigma"
N = "n"
RULE = "rule"

POINT_COLUMNS = (SERIES, SEQ, VALUE, CENTER, SIGMA)
SIGNAL_COLUMNS = (SERIES, SEQ, RULE, VALUE)


@dataclass(frozen=True)
class Layout:
    """A points frame in series order with the numpy arrays the vectorised kernels need."""

    frame: pl.DataFrame  # sorted so that each series is contiguous and seq increases
    value: np.ndarray  # float64
    z: np.ndarray  # (value - center) / sigma
    start: np.ndarray  # bool, True at the first row of each series
    pos: np.ndarray  # int64, 0-based position of the row within its series
    block: np.ndarray  # int64, 0-based series number (in frame order)
    n_series: int


def check_columns(frame: pl.DataFrame, required: Sequence[str]) -> None:
    """Raise ValueError naming missing columns and the ones that exist.

    >>> check_columns(pl.DataFrame({"series": ["a"]}), ["series", "seq"])
    Traceback (most recent call last):
    ...
    ValueError: points frame lacks column(s) seq. Existing columns: series.
    """
    missing = [c for c in required if c not in frame.columns]
    if missing:
        raise ValueError(
            f"points frame lacks column(s) {', '.join(missing)}. Existing columns: {', '.join(frame.columns)}."
        )


def layout_points(points: pl.DataFrame, *, need_limits: bool = True, in_order: bool = False) -> Layout:
    """Validate a points frame, sort it into series order if needed, and return its `Layout`.

    ``in_order=True`` says the caller already holds the frame in series order (as `series_order` returns
    it, or a row slice of such a frame), so the order check is skipped; the null and sigma checks still run.

    >>> lay = layout_points(pl.DataFrame({"series": ["b", "a", "a"], "seq": [1, 2, 1],
    ...     "value": [1.0, 2.0, 3.0], "center": 0.0, "sigma": 1.0}))
    >>> lay.frame["value"].to_list(), lay.pos.tolist()
    ([3.0, 2.0, 1.0], [0, 1, 0])
    """
    required = POINT_COLUMNS if need_limits else (SERIES, SEQ, VALUE)
    check_columns(points, required)
    frame = points if in_order else series_order(points)
    cols = [VALUE, CENTER, SIGMA] if need_limits else [VALUE]
    for c in cols:
        if frame[c].null_count():
            raise ValueError(f"points frame column {c} has {frame[c].null_count()} null value(s).")
    value = frame[VALUE].cast(pl.Float64).to_numpy()
    if need_limits:
        sigma = frame[SIGMA].cast(pl.Float64).to_numpy()
        if frame.height and not np.all(sigma > 0):
            raise ValueError("points frame column sigma must be > 0 on every row.")
        z = (value - frame[CENTER].cast(pl.Float64).to_numpy()) / sigma
    else:
        z = value
    block = frame[SERIES].rle_id().cast(pl.Int64).to_numpy() if frame.height else np.zeros(0, np.int64)
    start = np.ones(frame.height, dtype=bool)
    start[1:] = block[1:] != block[:-1]
    idx = np.arange(frame.height, dtype=np.int64)
    first = np.maximum.accumulate(np.where(start, idx, 0)) if frame.height else idx
    n_series = int(block[-1]) + 1 if frame.height else 0
    return Layout(frame, value, z, start, idx - first, block, n_series)


def series_order(frame: pl.DataFrame) -> pl.DataFrame:
    """The frame in series order, sorted by (series, seq) when it is not already; ValueError on repeated seq."""
    if frame.height and not _is_laid_out(frame):
        frame = frame.sort([SERIES, SEQ], maintain_order=True)
        if not _is_laid_out(frame):
            raise ValueError("points frame has repeated seq values within a series; seq must be unique.")
    return frame


def _is_laid_out(frame: pl.DataFrame) -> bool:
    # numpy comparisons of neighbours instead of polars shifts and boolean-indexed copies: 5.5 ms instead of
    # 26 ms on 1M points in 1000 series.
    series = frame[SERIES]
    b = series.rle_id().to_numpy()
    new = b[1:] != b[:-1]
    if b[-1] > 0:  # more than one series: each must be one block
        firsts = series.filter(pl.Series(np.concatenate([[True], new])))
        if firsts.n_unique() != firsts.len():
            return False
    seq = frame[SEQ].to_numpy()
    return bool(((seq[1:] > seq[:-1]) | new).all())


def run_length(cond: np.ndarray, start: np.ndarray) -> np.ndarray:
    """Length of the run of True values ending at each row, restarting at every series start.

    >>> run_length(np.array([True, True, False, True, True]), np.array([1, 0, 0, 1, 0], bool)).tolist()
    [1, 2, 0, 1, 2]
    """
    idx = np.arange(cond.size, dtype=np.int64)
    last_break = np.where(cond, -1, idx)
    last_break = np.where(start & cond, idx - 1, last_break)
    return idx - np.maximum.accumulate(last_break) if cond.size else idx


def window_count(cond: np.ndarray, pos: np.ndarray, width: int) -> np.ndarray:
    """Number of True values among the last `width` rows of the same series (fewer at a series start).

    >>> window_count(np.array([1, 1, 0, 1], bool), np.array([0, 1, 2, 3]), 3).tolist()
    [1, 2, 2, 2]
    """
    idx = np.arange(cond.size, dtype=np.int64)
    cs = np.concatenate([[0], np.cumsum(cond, dtype=np.int64)])
    lo = np.maximum(idx + 1 - width, idx - pos)
    return cs[idx + 1] - cs[lo]


def window_all(cond: np.ndarray, pos: np.ndarray, width: int) -> np.ndarray:
    """True where the last `width` rows of the same series are all True (needs `width` rows to exist).

    Computed by doubling (log2(width) shifted ANDs over boolean arrays), equal to ``run_length >= width``.

    >>> window_all(np.array([1, 1, 1, 0, 1, 1], bool), np.arange(6), 2).tolist()
    [False, True, True, False, False, True]
    """
    out = cond.copy()
    span = 1  # `acc` holds "the last `span` rows are all True"
    acc = cond.copy()
    need = width - 1  # extra rows still to cover beyond the current one
    done = 0
    while need:
        if need & 1:
            # cover `span` more rows ending `done + 1` rows back (rows before that have no such window)
            sh = done + 1
            out[sh:] &= acc[: max(out.size - sh, 0)]
            out[:sh] = False
            done += span
        need >>= 1
        if need:
            acc[span:] &= acc[: max(acc.size - span, 0)]  # overlapping operands: numpy reads a copy
            acc[:span] = False
            span *= 2
    return out & (pos >= width - 1)


def window_count_small(cond: np.ndarray, pos: np.ndarray, width: int, reach=None) -> np.ndarray:
    """`window_count` for short windows by shifted additions (cheaper than cumulative sums).

    `reach(j)`, if given, returns ``pos[j:] >= j`` (the rows whose series reaches j rows back), so that
    several counts over one layout can share those masks.
    """
    out = cond.astype(np.int16)
    for j in range(1, width):
        back = reach(j) if reach is not None else pos[j:] >= j
        out[j:] += cond[:-j] & back
    return out


def gather_signals(
    lay: Layout,
    hits: Sequence[tuple[str, np.ndarray]],
    passthrough: Sequence[str],
    values: dict | None = None,
) -> pl.DataFrame:
    """Build a signals frame from (rule id, boolean mask) pairs; `values` may override the value column.

    A `values` entry is an array over all rows, or a function of the signalling row indices that returns
    the values at those rows (so a statistic need only be computed where a rule signalled).
    """
    check_columns(lay.frame, passthrough)
    rows, order, names = [], [], []
    for k, (rule, mask) in enumerate(hits):
        ix = np.flatnonzero(mask)
        rows.append(ix)
        order.append(np.full(ix.size, k, dtype=np.int64))
        names.append(rule)
    cols = [SERIES, SEQ, *[c for c in passthrough if c not in (SERIES, SEQ, VALUE, RULE)]]
    if not rows:
        return _empty_signals(lay.frame, cols)
    ix = np.concatenate(rows)
    kk = np.concatenate(order)
    srt = np.lexsort((kk, ix))
    ix, kk = ix[srt], kk[srt]
    out = lay.frame.select(cols)[ix]
    val = np.concatenate(
        [_values_at((values or {}).get(n, lay.value), r) for n, r in zip(names, rows, strict=True)]
    )
    rule = pl.Series(RULE, names, dtype=pl.String).gather(kk)  # a gather, not a Series built from Python str
    out = out.with_columns(rule, pl.Series(VALUE, val[srt], dtype=pl.Float64))
    return out.select([SERIES, SEQ, RULE, VALUE, *cols[2:]])


def _values_at(values, rows: np.ndarray) -> np.ndarray:
    return values(rows) if callable(values) else values[rows]


def _empty_signals(frame: pl.DataFrame, cols: list[str]) -> pl.DataFrame:
    out = frame.select(cols).clear()
    return out.with_columns(
        pl.lit(None, pl.String).alias(RULE), pl.lit(None, pl.Float64).alias(VALUE)
    ).select([SERIES, SEQ, RULE, VALUE, *cols[2:]])
