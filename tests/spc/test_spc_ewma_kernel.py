"""The vectorised EWMA kernel against a plain per-point loop of its recursion, on ragged series and states.

`spc.ewma` runs ``w_t = w_{t-1} + lam * (u_t - w_{t-1})`` in exactly that form, so the loop below (one point
at a time, Python floats) must agree bit for bit, whatever the mix of series lengths: short series, one-point
series, many equal series, few long ones.
"""

from __future__ import annotations

import math

import numpy as np
import polars as pl
import pytest
from spc_oracles import ewma_loop

from spc.ewma import EwmaParams, evaluate_ewma
from spc.signals import evaluate_signals


def _frame(lengths, seed=0, shuffle=False):
    rng = np.random.default_rng(seed)
    lengths = np.asarray(lengths)
    b = np.repeat(np.arange(lengths.size), lengths)
    first = np.repeat(np.cumsum(lengths) - lengths, lengths)
    pos = np.arange(b.size) - first
    pts = pl.DataFrame(
        {
            "series": pl.Series([f"S{i:05d}" for i in range(lengths.size)]).gather(b),
            "seq": pos + 1,
            "value": rng.standard_normal(b.size) * 1.7 + 4.0 + (pos > 20) * 0.9,
            "center": np.where(pos > 30, 4.2, 4.0),
            "sigma": np.where(pos > 40, 1.5, 1.7),
        }
    )
    return pts.sample(fraction=1.0, shuffle=True, seed=seed) if shuffle else pts


def _loop(pts, lam, L, exact, state=None):
    """Per series, one point at a time: (w, limit) per point in (series, seq) order, and the final state."""
    start = {} if state is None else {s: (z, c) for s, z, c in state.iter_rows()}
    ws, lims, final = [], [], []
    asym = L * math.sqrt(lam / (2.0 - lam))
    for (key,), g in pts.sort("series", "seq").group_by("series", maintain_order=True):
        w, count = start.get(key, (0.0, 0))
        for x, c, s in zip(g["value"], g["center"], g["sigma"], strict=True):
            u = (x - c) / s
            w = w + lam * (u - w)
            count += 1
            ws.append(w)
            lims.append(asym * math.sqrt(1.0 - (1.0 - lam) ** (2.0 * count)) if exact else asym)
        final.append((key, w, count))
    return ws, lims, final


LENGTHS = {
    "ragged 1..50": np.random.default_rng(1).integers(1, 51, size=400),
    "one-point series": [1] * 300,
    "short 3..10": np.random.default_rng(2).integers(3, 11, size=2000),
    "equal series": [200] * 30,
    "few long and many short": [30_000, 12_000, *[5] * 200, 1, 2],
    "one long series": [50_000],
}


@pytest.mark.parametrize("lam", [0.2, 0.05, 0.137, 1.0])
@pytest.mark.parametrize("case", list(LENGTHS))
def test_ewma_equals_per_point_recursion_exactly(case, lam):
    pts = _frame(LENGTHS[case], seed=len(case), shuffle=case == "ragged 1..50")
    r = evaluate_ewma(pts, EwmaParams(lam=lam, L=2.8))
    ws, lims, final = _loop(pts, lam, 2.8, True)
    sigma = r.points["sigma"].to_numpy()
    center = r.points["center"].to_numpy()
    assert r.points["ewma"].to_list() == (center + sigma * np.array(ws)).tolist()
    assert r.points["ewma_ucl"].to_list() == (center + sigma * np.array(lims)).tolist()
    assert r.points["ewma_signal"].to_list() == (np.abs(ws) > np.array(lims)).tolist()
    assert r.state.rows() == final


@pytest.mark.parametrize("limits", ["exact", "asymptotic"])
def test_ewma_from_state_equals_per_point_recursion(limits):
    # states with large counts (past the point where the exact limit equals the asymptote) and fresh series
    pts = _frame(LENGTHS["ragged 1..50"], seed=7)
    keys = pts["series"].unique(maintain_order=True)
    rng = np.random.default_rng(8)
    state = pl.DataFrame(
        {
            "series": keys[::2],
            "ewma_z": rng.standard_normal(keys[::2].len()) * 0.3,
            "ewma_count": rng.choice([1, 3, 40, 90, 10_000_000], size=keys[::2].len()),
        }
    )
    p = EwmaParams(lam=0.1, L=2.7, limits=limits)
    r = evaluate_ewma(pts, p, state=state)
    ws, lims, final = _loop(pts, p.lam, p.L, limits == "exact", state)
    sigma = r.points["sigma"].to_numpy()
    center = r.points["center"].to_numpy()
    assert r.points["ewma"].to_list() == (center + sigma * np.array(ws)).tolist()
    assert r.points["ewma_ucl"].to_list() == (center + sigma * np.array(lims)).tolist()
    assert r.state.rows() == final


def test_ewma_state_count_that_is_not_a_whole_number_uses_the_formula():
    pts = _frame([5, 3], seed=3)
    state = pl.DataFrame({"series": ["S00000"], "ewma_z": [0.25], "ewma_count": [2.5]})
    r = evaluate_ewma(pts, EwmaParams(lam=0.3, L=3.0), state=state)
    asym = 3.0 * math.sqrt(0.3 / 1.7)
    counts = [3.5, 4.5, 5.5, 6.5, 7.5, 1, 2, 3]
    want = [asym * math.sqrt(1.0 - 0.7 ** (2.0 * c)) for c in counts]
    got = ((r.points["ewma_ucl"] - r.points["center"]) / r.points["sigma"]).to_list()
    assert got == pytest.approx(want, rel=1e-14)


def test_ewma_incremental_run_equals_full_run_on_unrounded_values():
    pts = _frame(LENGTHS["ragged 1..50"], seed=11)
    p = EwmaParams(lam=0.137, L=2.9)
    full = evaluate_ewma(pts, p)
    for cut in (1, 7, 25):
        old, new = pts.filter(pl.col("seq") <= cut), pts.filter(pl.col("seq") > cut)
        part = evaluate_ewma(new, p, state=evaluate_ewma(old, p).state)
        assert part.points.equals(full.points.filter(pl.col("seq") > cut))
        assert part.signals.equals(full.signals.filter(pl.col("seq") > cut))


def test_ewma_textbook_values_on_short_and_one_point_series():
    lengths = [1, 1, 2, 3, 1]
    pts = _frame(lengths, seed=5).with_columns(center=pl.lit(4.0), sigma=pl.lit(1.7))
    r = evaluate_ewma(pts, EwmaParams(lam=0.3, L=2.0))
    for _, g in r.points.group_by("series", maintain_order=True):
        ref = ewma_loop(g["value"].to_list(), 4.0, 1.7, 0.3, 2.0)
        assert g["ewma"].to_list() == pytest.approx([t[0] for t in ref], rel=1e-12)
        assert g["ewma_ucl"].to_list() == pytest.approx([t[2] for t in ref], rel=1e-12)


def test_ewma_and_signals_on_an_empty_frame():
    pts = _frame([3]).clear()
    assert evaluate_ewma(pts, EwmaParams()).points.height == 0
    assert evaluate_signals(pts, ["we1"], ewma=EwmaParams()).height == 0


def test_evaluate_signals_ewma_values_are_the_statistic_at_signalling_points():
    pts = _frame(LENGTHS["few long and many short"], seed=9)
    p = EwmaParams(lam=0.2, L=2.0)
    ws, lims, _ = _loop(pts, p.lam, p.L, True)
    sig = evaluate_signals(pts, [], ewma=p)
    srt = pts.sort("series", "seq")
    want = [
        (s, q, c + sd * w)
        for s, q, c, sd, w, lim in zip(
            srt["series"], srt["seq"], srt["center"], srt["sigma"], ws, lims, strict=True
        )
        if abs(w) > lim
    ]
    assert sig.height > 1000
    assert sig.select("series", "seq", "value").rows() == want


def test_evaluate_signals_in_slices_still_rejects_repeated_seq():
    pts = _frame([40, 40, 40], seed=2)
    dup = pl.concat([pts, pts.head(1)])
    for chunk in (10, 1_000_000):
        with pytest.raises(ValueError, match="repeated seq"):
            evaluate_signals(dup, ["we1"], chunk_points=chunk)
