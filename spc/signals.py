"""One driver for a chart check: run rules, EWMA and CUSUM over every series in one pass.

Signal rule ids: the run-rule ids of `spc.rules`, ``ewma`` (value = the EWMA statistic in data units) and
``cusum_hi`` / ``cusum_lo`` (value = the sum in sigma units). Signals advise; the fab's OCAP decides.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import polars as pl

from spc.cusum import CUSUM_HI, CUSUM_LO, CusumParams, cusum_arrays
from spc.ewma import EWMA, EwmaParams, ewma_limit, ewma_w
from spc.frames import POINT_COLUMNS, check_columns, gather_signals, layout_points, series_order
from spc.rules import RuleParams, rule_masks

CHUNK_POINTS = 1_000_000
"""Frames bigger than this are evaluated in slices of whole series of about this many points. Series are
independent, so the result is the same; memory stays bounded (measured with bench/bench_rules.py, all
rules + EWMA + CUSUM, 10M points, peak RSS with the 0.62 GB input frame: one pass 1.54 GB, slices of 3M
0.92 GB, of 1M 0.78 GB, of 250k 0.70 GB; best-of-3 times 1.99-2.13 s for all four, within the noise)."""


def evaluate_signals(
    points: pl.DataFrame,
    rules: Sequence[str | RuleParams] = (),
    *,
    ewma: EwmaParams | None = None,
    cusum: CusumParams | None = None,
    passthrough: Sequence[str] = (),
    chunk_points: int = CHUNK_POINTS,
) -> pl.DataFrame:
    """Signals frame of the requested rules, EWMA and CUSUM, in point order.

    >>> pts = pl.DataFrame({"series": "A", "seq": [1, 2, 3], "value": [0.0, 3.2, 0.1],
    ...                     "center": 0.0, "sigma": 1.0})
    >>> evaluate_signals(pts, ["we1"], ewma=EwmaParams(lam=0.5, L=2.0)).select("seq", "rule").rows()
    [(2, 'we1'), (2, 'ewma')]
    """
    if points.height <= chunk_points:
        return _evaluate_one(layout_points(points), rules, ewma, cusum, passthrough)
    check_columns(points, POINT_COLUMNS)
    frame = series_order(points)  # checked once here; slices of whole series stay in order
    return pl.concat(
        [
            _evaluate_one(
                layout_points(frame.slice(a, b - a), in_order=True), rules, ewma, cusum, passthrough
            )
            for a, b in series_slices(frame, chunk_points)
        ]
    )


def series_slices(frame: pl.DataFrame, size: int) -> list[tuple[int, int]]:
    """(start, end) row ranges of a frame in series order, each of whole series and about ``size`` rows."""
    block = frame["series"].rle_id().to_numpy()
    starts = np.flatnonzero(np.concatenate([[True], block[1:] != block[:-1]]))
    out, a = [], 0
    while a < frame.height:
        # the first series start at or after a + size ends this slice (a series longer than size stays whole)
        k = int(np.searchsorted(starts, a + size))
        b = int(starts[k]) if k < starts.size else frame.height
        out.append((a, b))
        a = b
    return out


def _evaluate_one(lay, rules, ewma, cusum, passthrough) -> pl.DataFrame:
    hits = rule_masks(lay, rules)
    values: dict = {}
    if ewma is not None:
        w, count_prev = ewma_w(lay, ewma)
        hits.append((EWMA, np.abs(w) > ewma_limit(lay, ewma, count_prev)))
        center, sigma = (lay.frame[c].cast(pl.Float64).to_numpy() for c in ("center", "sigma"))
        values[EWMA] = lambda ix: center[ix] + sigma[ix] * w[ix]  # the statistic at signalling rows only
    if cusum is not None:
        s_hi, s_lo, _, _ = cusum_arrays(lay, cusum)
        hits += [(CUSUM_HI, s_hi > cusum.h), (CUSUM_LO, s_lo > cusum.h)]
        values[CUSUM_HI], values[CUSUM_LO] = s_hi, s_lo
    return gather_signals(lay, hits, passthrough, values)
