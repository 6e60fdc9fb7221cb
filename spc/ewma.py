"""EWMA chart (Roberts 1959), vectorised across series, with exact time-varying or asymptotic limits.

For each series, on the standardised points ``u_t = (value_t - center_t) / sigma_t``:
``w_t = w_{t-1} + lam * (u_t - w_{t-1})`` (the same as ``lam*u_t + (1-lam)*w_{t-1}``), ``w_0 = 0`` (z0 at
the target). The plotted statistic is ``ewma_t = center_t + sigma_t * w_t``; it signals when
``|w_t| > L * sqrt(lam / (2 - lam) * (1 - (1 - lam)**(2 t)))`` (exact limits, t = points so far) or
``L * sqrt(lam / (2 - lam))`` (asymptotic). NIST/SEMATECH e-Handbook §6.3.2.4. No reset after a signal.

State for incremental evaluation: ``ewma_z`` (``w`` of the last point) and ``ewma_count`` (its t), one row
per series. Passing the state returned for an earlier batch gives exactly the result of a full run.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import polars as pl

from spc.frames import SERIES, Layout, gather_signals, layout_points

EWMA = "ewma"
EWMA_LCL = "ewma_lcl"
EWMA_UCL = "ewma_ucl"
EWMA_SIGNAL = "ewma_signal"
STATE_Z = "ewma_z"
STATE_COUNT = "ewma_count"


@dataclass(frozen=True)
class EwmaParams:
    """EWMA design: weight `lam` (0 < lam <= 1), limit width `L` (sigma units), limit kind."""

    lam: float = 0.2
    L: float = 3.0
    limits: str = "exact"  # "exact" (time-varying) or "asymptotic" (steady state)

    def __post_init__(self) -> None:
        if not 0 < self.lam <= 1:
            raise ValueError(f"EWMA lam must be in (0, 1], found {self.lam}.")
        if self.limits not in ("exact", "asymptotic"):
            raise ValueError(f"EWMA limits must be 'exact' or 'asymptotic', found {self.limits!r}.")


@dataclass(frozen=True)
class EwmaResult:
    """Per-point EWMA columns, the signals frame (rule ``ewma``) and the final state per series."""

    points: pl.DataFrame
    signals: pl.DataFrame
    state: pl.DataFrame


def _initial(
    lay: Layout, state: pl.DataFrame | None, cols: Sequence[str], default: float
) -> list[np.ndarray]:
    """Per-row starting values (meaningful at series starts) from a state frame keyed by series."""
    n = lay.frame.height
    if state is None or state.height == 0:
        return [np.full(n, default) for _ in cols]
    firsts = lay.frame.select(SERIES).filter(pl.Series(lay.start))
    joined = firsts.join(state.select([SERIES, *cols]), on=SERIES, how="left", maintain_order="left")
    out = []
    for c in cols:
        per_series = joined[c].cast(pl.Float64).fill_null(default).to_numpy()
        out.append(per_series[lay.block])
    return out


def ewma_arrays(lay: Layout, p: EwmaParams, state: pl.DataFrame | None = None):
    """Return (w, limit, count) arrays for a laid-out frame: standardised EWMA, its limit, point count."""
    w_prev, count_prev = _initial(lay, state, [STATE_Z, STATE_COUNT], 0.0)
    u = lay.z.copy()
    # polars' ewm_mean(adjust=False) starts at its first input; feed it w_1 itself.
    u[lay.start] = w_prev[lay.start] + p.lam * (u[lay.start] - w_prev[lay.start])
    w = (
        pl.DataFrame({"b": lay.block, "u": u})
        .select(pl.col("u").ewm_mean(alpha=p.lam, adjust=False).over("b"))
        .to_series()
        .to_numpy()
    )
    count = count_prev + lay.pos + 1
    asym = p.L * np.sqrt(p.lam / (2.0 - p.lam))
    if p.limits == "asymptotic":
        limit = np.full(w.size, asym)
    else:
        limit = asym * np.sqrt(1.0 - (1.0 - p.lam) ** (2.0 * count))
    return w, limit, count


def evaluate_ewma(
    points: pl.DataFrame,
    params: EwmaParams = EwmaParams(),
    *,
    state: pl.DataFrame | None = None,
    passthrough: Sequence[str] = (),
) -> EwmaResult:
    """EWMA statistic, limits and signals for every series at once.

    >>> pts = pl.DataFrame({"series": "A", "seq": [1, 2], "value": [52.0, 47.0], "center": 50.0, "sigma": 2.0})
    >>> r = evaluate_ewma(pts, EwmaParams(lam=0.3, L=3.0))
    >>> [round(v, 2) for v in r.points["ewma"]], r.state["ewma_count"].to_list()
    ([50.6, 49.52], [2])
    """
    lay = layout_points(points)
    w, limit, count = ewma_arrays(lay, params, state)
    center = lay.frame["center"].cast(pl.Float64).to_numpy()
    sigma = lay.frame["sigma"].cast(pl.Float64).to_numpy()
    ewma = center + sigma * w
    sig = np.abs(w) > limit
    pts = lay.frame.with_columns(
        pl.Series(EWMA, ewma),
        pl.Series(EWMA_LCL, center - sigma * limit),
        pl.Series(EWMA_UCL, center + sigma * limit),
        pl.Series(EWMA_SIGNAL, sig),
    )
    signals = gather_signals(lay, [(EWMA, sig)], passthrough, {EWMA: ewma})
    return EwmaResult(pts, signals, _final_state(lay, {STATE_Z: w, STATE_COUNT: count.astype(np.int64)}))


def _final_state(lay: Layout, cols: dict[str, np.ndarray]) -> pl.DataFrame:
    last = np.ones(lay.frame.height, dtype=bool)
    last[:-1] = lay.start[1:]
    base = lay.frame.select(SERIES).filter(pl.Series(last))
    return base.with_columns(pl.Series(k, v[last]) for k, v in cols.items())
