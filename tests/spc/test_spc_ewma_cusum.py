"""EWMA and CUSUM: NIST worked examples, agreement with a per-point loop, incremental state."""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import polars as pl
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from polars.testing import assert_frame_equal
from spc_oracles import cusum_loop, ewma_loop

from spc.cusum import CusumParams, evaluate_cusum
from spc.ewma import EwmaParams, evaluate_ewma
from spc.signals import evaluate_signals

EXAMPLES = json.loads(
    (Path(__file__).resolve().parents[1] / "data/reference/worked_examples/examples.json").read_text()
)
SCHEMA = {
    "series": pl.String,
    "seq": pl.Int64,
    "value": pl.Float64,
    "center": pl.Float64,
    "sigma": pl.Float64,
}


def _points(values, series="A", center=0.0, sigma=1.0):
    n = len(values)
    return pl.DataFrame(
        {
            "series": [series] * n,
            "seq": list(range(1, n + 1)),
            "value": list(map(float, values)),
            "center": [center] * n,
            "sigma": [sigma] * n,
        },
        schema=SCHEMA,
    )


def test_evaluate_ewma_matches_nist_worked_example():
    ex = EXAMPLES["ewma_nist_6_3_2_4"]  # NIST/SEMATECH e-Handbook §6.3.2.4, EWMA worked example
    p = ex["parameters"]
    pts = _points(ex["data"], center=p["target"], sigma=p["sigma"])
    for limits in ("exact", "asymptotic"):
        r = evaluate_ewma(pts, EwmaParams(lam=p["lambda"], L=p["L"], limits=limits))
        assert [round(v, 2) for v in r.points["ewma"]] == ex["published"]["ewma_2dp"]
        assert r.signals.height == len(ex["published"]["signals"]) == 0
    r = evaluate_ewma(pts, EwmaParams(lam=p["lambda"], L=p["L"], limits="asymptotic"))
    assert r.points["ewma_ucl"][0] == pytest.approx(ex["published"]["ucl_asymptotic"], abs=1e-4)
    assert r.points["ewma_lcl"][0] == pytest.approx(ex["published"]["lcl_asymptotic"], abs=1e-4)


def test_evaluate_cusum_matches_nist_tabular_example():
    ex = EXAMPLES["cusum_nist_6_3_2_3"]  # NIST/SEMATECH e-Handbook §6.3.2.3.1, tabular CUSUM example
    p = ex["parameters"]
    s = p["sigma_xbar"]
    pts = _points(ex["data_subgroup_means"], center=p["target"], sigma=s)
    # The handbook gives k and h in data units and does not restart after a signal.
    r = evaluate_cusum(pts, CusumParams(k=p["k"] / s, h=p["h"] / s, reset=False))
    got = [v * s for v in r.points["cusum_hi"]]
    assert got == pytest.approx(ex["published"]["s_hi_2dp"], abs=ex["published"]["tolerance"])
    hi = r.signals.filter(pl.col("rule") == "cusum_hi")["seq"].to_list()
    assert hi == ex["published"]["points_beyond_h"]
    assert hi[0] == ex["published"]["first_signal_point"]
    # With the restart after a signal, the first signal stays at the same point.
    first = evaluate_cusum(pts, CusumParams(k=p["k"] / s, h=p["h"] / s)).signals["seq"][0]
    assert first == ex["published"]["first_signal_point"]


_series = st.lists(st.integers(-40, 40), min_size=0, max_size=60)
_frames = st.lists(_series, min_size=1, max_size=4)


def _frame(lists, scale=1.0, center=0.0):
    return pl.concat(
        [_points([v / 8 * scale + center for v in vs], f"S{i}", center, scale) for i, vs in enumerate(lists)]
    )


@settings(max_examples=50, deadline=None)
@given(
    _frames,
    st.sampled_from([0.05, 0.1, 0.2, 0.3, 1.0]),
    st.sampled_from([2.0, 2.7, 3.0]),
    st.sampled_from(["exact", "asymptotic"]),
    st.sampled_from([0.5, 1.0, 3.0]),
    st.integers(-5, 5),
)
def test_evaluate_ewma_matches_textbook_loop(lists, lam, L, limits, scale, center):
    pts = _frame(lists, scale, float(center))
    r = evaluate_ewma(pts, EwmaParams(lam=lam, L=L, limits=limits))
    for i, vs in enumerate(lists):
        got = r.points.filter(pl.col("series") == f"S{i}")
        ref = ewma_loop([v / 8 * scale + center for v in vs], center, scale, lam, L, limits == "exact")
        assert got["ewma"].to_list() == pytest.approx([t[0] for t in ref], rel=1e-12, abs=1e-12)
        assert got["ewma_ucl"].to_list() == pytest.approx([t[2] for t in ref], rel=1e-12)
        # Signals must agree exactly, except where the EWMA sits on a limit to within rounding (e.g. z = 0.925
        # against LCL = 0.925 for lambda 0.05): there the side is decided by the last bit of two computations
        # that each agree with the exact value to 1e-12, so neither answer is wrong.
        ties = [abs(abs(t[0] - center) - (t[2] - center)) <= 1e-9 * scale for t in ref]
        got_sig = got["ewma_signal"].to_list()
        assert [g for g, tie in zip(got_sig, ties, strict=True) if not tie] == [
            t[3] for t, tie in zip(ref, ties, strict=True) if not tie
        ]


@settings(max_examples=50, deadline=None)
@given(
    _frames,
    st.sampled_from([0.25, 0.5, 1.0]),
    st.sampled_from([2.0, 4.0, 5.0]),
    st.sampled_from([0.0, 2.5]),
    st.booleans(),
)
def test_evaluate_cusum_matches_per_point_loop_exactly(lists, k, h, headstart, reset):
    pts = _frame(lists)
    r = evaluate_cusum(pts, CusumParams(k=k, h=h, headstart=headstart, reset=reset))
    for i, vs in enumerate(lists):
        got = r.points.filter(pl.col("series") == f"S{i}")
        ref = cusum_loop([v / 8 for v in vs], k, h, headstart, reset)
        assert got["cusum_hi"].to_list() == [t[0] for t in ref]
        assert got["cusum_lo"].to_list() == [t[1] for t in ref]
        sig = r.signals.filter(pl.col("series") == f"S{i}")["seq"].unique(maintain_order=True).to_list()
        assert sig == [j + 1 for j, t in enumerate(ref) if t[2]]


@settings(max_examples=40, deadline=None)
@given(_frames, st.integers(0, 60))
def test_ewma_and_cusum_incremental_state_equals_full_run(lists, cut):
    pts = _frame(lists)
    old, new = pts.filter(pl.col("seq") <= cut), pts.filter(pl.col("seq") > cut)
    ep, cp = EwmaParams(lam=0.2, L=2.5), CusumParams(k=0.5, h=3.0)
    full_e, full_c = evaluate_ewma(pts, ep), evaluate_cusum(pts, cp)
    part_e = evaluate_ewma(new, ep, state=evaluate_ewma(old, ep).state)
    part_c = evaluate_cusum(new, cp, state=evaluate_cusum(old, cp).state)
    assert part_e.points.equals(full_e.points.filter(pl.col("seq") > cut))
    assert part_c.points.equals(full_c.points.filter(pl.col("seq") > cut))
    assert part_c.signals.equals(full_c.signals.filter(pl.col("seq") > cut))
    assert part_e.signals.equals(full_e.signals.filter(pl.col("seq") > cut))


def test_evaluate_cusum_long_shifted_series_resets_after_every_signal():
    # 3 sigma shift, k = 0.5, h = 4: the sum goes 2.5, 5.0 -> signal and restart, so every second point.
    pts = _points([3.0] * 10_000)
    r = evaluate_cusum(pts, CusumParams(k=0.5, h=4.0))
    ref = cusum_loop([3.0] * 10_000, 0.5, 4.0)
    assert r.signals["seq"].to_list() == [j + 1 for j, t in enumerate(ref) if t[2]]
    assert r.signals.height == 5000


def test_evaluate_signals_combines_rules_ewma_cusum_in_point_order():
    pts = _points([0.0, 3.5, 3.0, 3.0])
    out = evaluate_signals(
        pts, ["we1", "we2"], ewma=EwmaParams(lam=0.5, L=3.0), cusum=CusumParams(k=0.5, h=4.0)
    )
    assert out.select("seq", "rule").rows() == [
        (2, "we1"),
        (2, "ewma"),
        (3, "we2"),
        (3, "ewma"),
        (3, "cusum_hi"),
        (4, "we2"),
        (4, "ewma"),
    ]
    assert out.filter(pl.col("rule") == "cusum_hi")["value"].to_list() == [5.5]
    ewma3 = out.filter((pl.col("rule") == "ewma") & (pl.col("seq") == 3))["value"][0]
    assert ewma3 == pytest.approx(0.5 * 3.0 + 0.25 * 3.5)  # textbook recursion by hand, z0 = 0
    assert math.isfinite(out["value"].sum())


def test_evaluate_signals_in_slices_of_whole_series_equals_one_pass():
    # series are independent: slicing a big frame by whole series must not change a single signal
    from spc.rules import NELSON, WESTERN_ELECTRIC

    rng = np.random.default_rng(3)
    lengths = rng.integers(1, 400, size=60)
    series = np.repeat([f"T{i:03d}" for i in range(lengths.size)], lengths)
    seq = np.concatenate([rng.permutation(n) + 1 for n in lengths])
    pts = pl.DataFrame(
        {
            "series": series,
            "seq": seq,
            "value": rng.standard_normal(series.size) * 2.0 + 10.0 + (seq > 150) * 1.5,
            "center": 10.0,
            "sigma": 2.0,
            "lot_id": [f"L{i}" for i in range(series.size)],
        }
    ).sample(fraction=1.0, shuffle=True, seed=5)  # not in series order: the driver sorts first
    kw = dict(ewma=EwmaParams(lam=0.2, L=3.0), cusum=CusumParams(k=0.5, h=4.0), passthrough=["lot_id"])
    rules = list(WESTERN_ELECTRIC + NELSON)
    whole = evaluate_signals(pts, rules, **kw)
    for chunk in (1, 97, 1000, 5000):
        assert_frame_equal(evaluate_signals(pts, rules, chunk_points=chunk, **kw), whole)
    assert whole.height > 100 and whole["rule"].n_unique() > 10
