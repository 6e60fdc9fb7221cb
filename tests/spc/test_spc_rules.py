"""Run rules: published rule texts, agreement with a per-point loop, invariances, incremental runs."""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from spc_oracles import signals_loop

from spc.rules import NELSON, RULES, WESTERN_ELECTRIC, OuterRun, context_points, evaluate_rules, rule_params

ALL = list(WESTERN_ELECTRIC + NELSON)


def _points(values, series="A", center=0.0, sigma=1.0):
    n = len(values)
    return pl.DataFrame(
        {
            "series": [series] * n,
            "seq": list(range(1, n + 1)),
            "value": [float(v) for v in values],
            "center": [center] * n,
            "sigma": [sigma] * n,
        },
        schema={
            "series": pl.String,
            "seq": pl.Int64,
            "value": pl.Float64,
            "center": pl.Float64,
            "sigma": pl.Float64,
        },
    )


def _hits(values, rule):
    return evaluate_rules(_points(values), [rule])["seq"].to_list()


# Each case follows the rule's published wording: Western Electric Statistical Quality Control Handbook
# (1956) pp. 25-28 for we1-we4; Nelson (1984) J. Quality Technology 16(4) for nelson1-nelson8.
@pytest.mark.parametrize(
    ("rule", "values", "expected"),
    [
        ("we1", [0, 3.01, -3.2, 3.0, -3.0], [2, 3]),  # beyond 3 sigma, strictly
        ("we2", [2.1, 0, 2.2, -2.5, 0, 0, -2.1], [3]),  # 2 of 3 beyond 2 sigma on the SAME side
        ("we2", [0, 2.5, 0, 0, 2.5], []),  # 2 beyond 2 sigma but 4 points apart
        ("we3", [1.5, 1.2, 0.5, 1.1, 1.3, 1.4, -1.2], [5, 6]),  # 4 of 5 beyond 1 sigma, same side
        ("we4", [0.1] * 7 + [-0.1] + [0.2] * 8, [16]),  # 8 successive points on one side
        ("nelson2", [0.1] * 8 + [0.0] + [-0.1] * 9, [18]),  # nine in a row; a point on the centre breaks it
        ("nelson3", [0, 1, 2, 3, 4, 5, 5, 4, 3, 2, 1, 0], [6, 12]),  # six increasing / decreasing; ties break
        ("nelson4", [0, 1] * 7, [14]),  # fourteen alternating up and down
        ("nelson4", [0, 1] * 6 + [0], []),  # thirteen alternating points are not enough
        ("nelson5", [0, 2.5, 2.7, 0], [3]),
        ("nelson6", [-1.5, -1.2, 0, -1.1, -1.3], [5]),
        ("nelson7", [0.5, -0.5] * 7 + [0.2, 1.5], [15]),  # fifteen in zone C, either side
        ("nelson8", [1.5, -1.5] * 4 + [0.5], [8]),  # eight with none in zone C
    ],
)
def test_evaluate_rules_published_pattern_signals_at_completing_point(rule, values, expected):
    assert _hits(values, rule) == expected


def test_evaluate_rules_nelson8_both_sides_variant_needs_both_sides():
    both = OuterRun("nelson8", 8, 1.0, require_both_sides=True)
    assert evaluate_rules(_points([1.5] * 8), [both]).height == 0
    assert evaluate_rules(_points([1.5] * 7 + [-1.5]), [both])["seq"].to_list() == [8]


def test_rule_registry_every_rule_names_its_source_and_has_a_published_check():
    assert sorted(RULES) == sorted(ALL)
    for rid, rule in RULES.items():
        src = "Western Electric" if rid.startswith("we") else "Nelson (1984)"
        assert src in rule.description, rid
        assert rule.params.id == rid


def test_rule_params_unknown_rule_lists_known_ids():
    with pytest.raises(ValueError, match="unknown rule 'we9'; known rules: we1, we2"):
        rule_params("we9")


def test_evaluate_rules_passthrough_columns_are_carried_and_order_is_by_point_then_rule():
    pts = _points([3.5, 2.5, 2.6]).with_columns(pl.Series("_row", [10, 11, 12]))
    out = evaluate_rules(pts, ["we2", "we1"], passthrough=["_row"])
    assert out.columns == ["series", "seq", "rule", "value", "_row"]
    assert out.select("seq", "rule", "_row").rows() == [(1, "we1", 10), (2, "we2", 11), (3, "we2", 12)]


def test_evaluate_rules_empty_frame_returns_empty_signals_with_schema():
    out = evaluate_rules(_points([]), ALL)
    assert out.height == 0 and out.columns == ["series", "seq", "rule", "value"]


def test_evaluate_rules_missing_column_names_missing_and_existing():
    with pytest.raises(
        ValueError, match="lacks column\\(s\\) sigma. Existing columns: series, seq, value, center"
    ):
        evaluate_rules(_points([1]).drop("sigma"), ["we1"])


def test_evaluate_rules_repeated_seq_is_refused():
    pts = _points([1, 2]).with_columns(pl.lit(1).alias("seq"))
    with pytest.raises(ValueError, match="repeated seq"):
        evaluate_rules(pts, ["we1"])


# Values on a 1/8 grid: every z and difference is exact in floating point, so agreement must be exact.
_series = st.lists(st.integers(-28, 28), min_size=0, max_size=40)
_frames = st.lists(_series, min_size=1, max_size=4)


def _frame(lists, sigma=1.0, center=0.0):
    parts = [
        _points([v / 8 * sigma + center for v in vs], series=f"S{i}", center=center, sigma=sigma)
        for i, vs in enumerate(lists)
    ]
    return pl.concat(parts)


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(_frames)
def test_evaluate_rules_all_rules_match_per_point_loop(lists):
    pts = _frame(lists)
    out = evaluate_rules(pts, ALL)
    assert out.select("series", "seq", "rule").rows() == signals_loop(pts, ALL)


@settings(max_examples=30, deadline=None)
@given(_frames, st.integers(-1000, 1000), st.sampled_from([0.25, 2.0, 8.0]))
def test_evaluate_rules_shift_and_scale_leave_signals_unchanged(lists, shift, scale):
    base = evaluate_rules(_frame(lists), ALL).select("series", "seq", "rule")
    moved = evaluate_rules(_frame(lists, sigma=scale, center=float(shift)), ALL).select(
        "series", "seq", "rule"
    )
    assert moved.equals(base)


@settings(max_examples=30, deadline=None)
@given(_frames, st.randoms(use_true_random=False))
def test_evaluate_rules_series_are_independent_of_each_other_and_of_row_order(lists, rnd):
    pts = _frame(lists)
    together = evaluate_rules(pts, ALL).select("series", "seq", "rule")
    alone = pl.concat(
        [together.clear()]
        + [
            evaluate_rules(g, ALL).select("series", "seq", "rule")
            for _, g in pts.group_by("series", maintain_order=True)
        ]
    )
    order = list(range(pts.height))
    rnd.shuffle(order)
    shuffled = evaluate_rules(pts[order], ALL).select("series", "seq", "rule")
    assert together.equals(alone)
    assert shuffled.sort("series", "seq", maintain_order=True).equals(
        together.sort("series", "seq", maintain_order=True)
    )


@settings(max_examples=40, deadline=None)
@given(_frames, st.integers(0, 40), st.sampled_from([["we1"], ["we2", "we3"], ALL, ["nelson4"], ["nelson7"]]))
def test_evaluate_rules_incremental_with_context_points_equals_full_run(lists, cut, rules):
    pts = _frame(lists)
    full = evaluate_rules(pts, rules).select("series", "seq", "rule")
    ctx = context_points(rules)
    new = pts.filter(pl.col("seq") > cut)
    old_tail = pts.filter(pl.col("seq") <= cut).filter(pl.col("seq") > cut - ctx)
    batch = evaluate_rules(pl.concat([old_tail, new]), rules).filter(pl.col("seq") > cut)
    assert batch.select("series", "seq", "rule").equals(full.filter(pl.col("seq") > cut))


def test_evaluate_rules_ten_thousand_series_match_loop_on_a_sample():
    rng = np.random.default_rng(7)
    n_series, length = 200, 150
    pts = pl.DataFrame(
        {
            "series": np.repeat([f"T{i:03d}" for i in range(n_series)], length),
            "seq": np.tile(np.arange(length), n_series),
            "value": np.round(rng.standard_normal(n_series * length) * 8) / 8,
            "center": 0.0,
            "sigma": 1.0,
        }
    )
    out = evaluate_rules(pts, ALL)
    sample = pts.filter(pl.col("series").is_in(["T000", "T077", "T199"]))
    assert out.filter(pl.col("series").is_in(["T000", "T077", "T199"])).select(
        "series", "seq", "rule"
    ).rows() == signals_loop(sample, ALL)
