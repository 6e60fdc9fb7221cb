"""Two-sided tabular CUSUM (Page 1954), vectorised across series, with fast initial response and reset.

On the standardised points ``u_t = (value_t - center_t) / sigma_t`` (k and h in sigma units):
``s_hi_t = max(0, s_hi_{t-1} + u_t - k)``, ``s_lo_t = max(0, s_lo_{t-1} - u_t - k)``; a point signals when
``s_hi_t > h`` (rule ``cusum_hi``) or ``s_lo_t > h`` (``cusum_lo``). Both sums start at ``headstart``
(0 by default; h/2 is the fast initial response of Lucas & Crosier 1982) and, with ``reset=True``, restart
at ``headstart`` after every signal. NIST/SEMATECH e-Handbook §6.3.2.3.1 tabulates the same recursion.

The recursion is computed with cumulative sums and cumulative minima (the Lindley form
``s_t = d_t - min(0, min_{j<=t} d_j)``, ``d_t = s_0 + sum(u - k)``) over blocks of points for all series at
once; resets restart the block after the signalling point, so Python iterates over signals, never over points.

State for incremental evaluation: ``s_hi`` and ``s_lo`` of the last point (after any reset) per series.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import polars as pl

from spc.ewma import _final_state, _initial_series
from spc.frames import Layout, gather_signals, layout_points

CUSUM_HI = "cusum_hi"
CUSUM_LO = "cusum_lo"
STATE_HI = "s_hi"
STATE_LO = "s_lo"
_BLOCK = 4096  # points per series per pass
_RESTART_BLOCK = 256  # points per series per pass after the first
_CELLS = 2_000_000  # cells of one pass's 2-D work array


@dataclass(frozen=True)
class CusumParams:
    """CUSUM design in sigma units: reference value `k`, decision interval `h`, FIR `headstart`."""

    k: float = 0.5
    h: float = 5.0
    headstart: float = 0.0
    reset: bool = True


@dataclass(frozen=True)
class CusumResult:
    """Per-point sums (sigma units), the signals frame and the final state per series."""

    points: pl.DataFrame
    signals: pl.DataFrame
    state: pl.DataFrame


def cusum_arrays(lay: Layout, p: CusumParams, state: pl.DataFrame | None = None):
    """Return (s_hi, s_lo, state_hi, state_lo); state_* (sums carried on, after any reset) hold at each series' last row."""
    n = lay.frame.height
    u = lay.z
    hi, lo = (v.copy() for v in _initial_series(lay, state, [STATE_HI, STATE_LO], p.headstart))
    starts = np.flatnonzero(lay.start)
    ends = np.append(starts[1:], n)
    cur = starts.copy()
    s_hi, s_lo = np.empty(n), np.empty(n)
    c_hi, c_lo = np.empty(n), np.empty(n)
    active = np.flatnonzero(cur < ends)
    block = _BLOCK
    while active.size:
        # Each pass runs every active series up to its next signal (or one block); chunks bound memory.
        # After the first pass only series that signalled remain, so shorter blocks waste less padding.
        width = int(min(block, (ends[active] - cur[active]).max()))
        step = max(1, _CELLS // width)
        for a in np.array_split(active, -(-active.size // step)):
            _advance(u, p, a, cur, ends, hi, lo, s_hi, s_lo, c_hi, c_lo, width)
        active = active[cur[active] < ends[active]]
        block = _RESTART_BLOCK
    return s_hi, s_lo, c_hi, c_lo


def _advance(u, p, active, cur, ends, hi, lo, s_hi, s_lo, c_hi, c_lo, block) -> None:
    """Advance the series in `active` to their first signal or the end of one block, in place.

    Rows after a signal are written too; a later pass (restarting after the signal) overwrites them.
    """
    n = u.size
    c = cur[active]
    ln = np.minimum(ends[active] - c, block)
    width = int(ln.max())
    rows = active.size
    if np.all(ln == width) and (rows == 1 or np.all(np.diff(c) == width)):
        flat = slice(int(c[0]), int(c[0]) + rows * width)  # contiguous equal blocks: a view, no gather
        y = u[flat].reshape(rows, width)
        idx = None
    else:
        off = np.arange(width)
        valid = off[None, :] < ln[:, None]
        idx = np.minimum(c[:, None] + off[None, :], n - 1)
        y = np.where(valid, u[idx], 0.0)
    sh = _lindley(hi[active], y - p.k)
    sl = _lindley(lo[active], -y - p.k)
    if p.reset:
        sig = (sh > p.h) | (sl > p.h)
        if idx is not None:
            sig &= valid
        any_sig = sig.any(axis=1)
        first = np.where(any_sig, np.argmax(sig, axis=1), ln - 1)
    else:
        any_sig = np.zeros(rows, dtype=bool)
        first = ln - 1
    if idx is None:
        s_hi[flat], s_lo[flat] = sh.ravel(), sl.ravel()
    else:
        w = idx[valid]
        s_hi[w], s_lo[w] = sh[valid], sl[valid]
    r = np.arange(rows)
    last_rows = c + first
    c_hi[last_rows] = np.where(any_sig, p.headstart, sh[r, first])
    c_lo[last_rows] = np.where(any_sig, p.headstart, sl[r, first])
    hi[active], lo[active] = c_hi[last_rows], c_lo[last_rows]
    cur[active] = c + first + 1


def _lindley(s0: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Row-wise s_t = max(0, s_{t-1} + y_t) from s0, via cumulative sums and cumulative minima."""
    y[:, 0] += s0  # y is a fresh array; summing s0 first keeps the loop's order of additions
    d = np.cumsum(y, axis=1)
    return d - np.minimum(0.0, np.minimum.accumulate(d, axis=1))


def evaluate_cusum(
    points: pl.DataFrame,
    params: CusumParams = CusumParams(),
    *,
    state: pl.DataFrame | None = None,
    passthrough: Sequence[str] = (),
) -> CusumResult:
    """Tabular CUSUM sums and signals for every series at once.

    >>> pts = pl.DataFrame({"series": "A", "seq": [1, 2, 3], "value": [2.0, 3.0, 1.5], "center": 0.0, "sigma": 1.0})
    >>> r = evaluate_cusum(pts, CusumParams(k=0.5, h=4.0))
    >>> r.points["cusum_hi"].to_list(), r.signals["rule"].to_list(), r.state.rows()
    ([1.5, 4.0, 5.0], ['cusum_hi'], [('A', 0.0, 0.0)])
    """
    lay = layout_points(points)
    s_hi, s_lo, c_hi, c_lo = cusum_arrays(lay, params, state)
    pts = lay.frame.with_columns(pl.Series(CUSUM_HI, s_hi), pl.Series(CUSUM_LO, s_lo))
    hits = [(CUSUM_HI, s_hi > params.h), (CUSUM_LO, s_lo > params.h)]
    signals = gather_signals(lay, hits, passthrough, {CUSUM_HI: s_hi, CUSUM_LO: s_lo})
    return CusumResult(pts, signals, _final_state(lay, {STATE_HI: c_hi, STATE_LO: c_lo}))
