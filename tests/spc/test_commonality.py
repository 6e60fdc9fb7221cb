"""Commonality ranking checked against scipy.stats and a published multiple-testing example."""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest
from scipy import stats
from scipy.stats.contingency import expected_freq
from scipy.stats.contingency import odds_ratio as scipy_odds_ratio

from spc.commonality import (
    adjust_benjamini_hochberg,
    fisher_exact_two_sided,
    odds_ratio_woolf,
    rank_commonality,
)

# Benjamini and Hochberg (1995), J. R. Statist. Soc. B 57(1), section 4.2: 15 p-values from a clinical
# trial; at q* = 0.05 the step-up procedure rejects the four smallest (Bonferroni rejects three).
# from memory: figures recalled, not checked against a copy of the paper here.
BH_1995_P = [
    0.0001, 0.0004, 0.0019, 0.0095, 0.0201, 0.0278, 0.0298, 0.0344,
    0.0459, 0.3240, 0.4262, 0.5719, 0.6528, 0.7590, 1.000,
]  # fmt: skip


def test_adjust_benjamini_hochberg_published_example_rejects_four():
    q = adjust_benjamini_hochberg(BH_1995_P)
    assert int((q <= 0.05).sum()) == 4  # Benjamini & Hochberg 1995 §4.2 (from memory)
    assert int((np.asarray(BH_1995_P) <= 0.05 / 15).sum()) == 3  # Bonferroni, same example


def test_adjust_benjamini_hochberg_matches_scipy_false_discovery_control():
    rng = np.random.default_rng(7)
    p = np.concatenate([rng.uniform(size=200), rng.uniform(0, 1e-3, size=20)])
    rng.shuffle(p)
    np.testing.assert_allclose(adjust_benjamini_hochberg(p), stats.false_discovery_control(p), rtol=1e-12)


def test_adjust_benjamini_hochberg_nan_entries_are_left_out():
    p = np.array([0.01, np.nan, 0.04, 0.03])
    q = adjust_benjamini_hochberg(p)
    assert np.isnan(q[1])
    np.testing.assert_allclose(q[[0, 2, 3]], stats.false_discovery_control(p[[0, 2, 3]]))


def test_fisher_exact_two_sided_matches_scipy_on_random_tables():
    rng = np.random.default_rng(11)
    tables = rng.integers(0, 25, size=(300, 4))
    tables[::7, 0] = 0  # zero cells
    tables[::11, 3] = 0
    got = fisher_exact_two_sided(*tables.T, chunk=64)
    want = [stats.fisher_exact(t.reshape(2, 2)).pvalue for t in tables]
    np.testing.assert_allclose(got, want, rtol=1e-6, atol=1e-300)


def test_odds_ratio_woolf_matches_scipy_sample_interval():
    rng = np.random.default_rng(3)
    tables = rng.integers(1, 60, size=(50, 4))
    orr, lo, hi = odds_ratio_woolf(*tables.T, confidence=0.9)
    for i, t in enumerate(tables):
        res = scipy_odds_ratio(t.reshape(2, 2), kind="sample")
        ci = res.confidence_interval(confidence_level=0.9)
        assert orr[i] == pytest.approx(res.statistic, rel=1e-12)
        assert (lo[i], hi[i]) == pytest.approx((ci.low, ci.high), rel=1e-9)


def test_odds_ratio_woolf_zero_cell_uses_haldane_correction():
    # Haldane (1956): add 0.5 to every cell; Woolf (1955) interval on the log scale.
    orr, lo, hi = odds_ratio_woolf([0], [10], [5], [20])
    a, b, c, d = 0.5, 10.5, 5.5, 20.5
    se = np.sqrt(1 / a + 1 / b + 1 / c + 1 / d)
    want = a * d / (b * c)
    assert orr[0] == pytest.approx(want)
    assert (lo[0], hi[0]) == pytest.approx(
        (want * np.exp(-1.959963985 * se), want * np.exp(1.959963985 * se))
    )


def _random_history(seed: int, n_lots: int = 300, n_steps: int = 4):
    rng = np.random.default_rng(seed)
    lots = np.array([f"LOT{i:04d}" for i in range(n_lots)])
    rows = []
    for s in range(n_steps):
        n_tools = 2 + s % 3
        tool = rng.integers(0, n_tools, n_lots)
        # Skewed tool use, so that some tables have small expected counts (Fisher) and some not (χ²).
        tool = np.where(rng.random(n_lots) < 0.04, n_tools, tool)
        chamber = rng.integers(0, 2, n_lots)
        recipe = rng.integers(0, 2, n_lots)
        for i in range(n_lots):
            rows.append((lots[i], f"step{s}", f"T{s}{tool[i]}", f"CH{chamber[i]}", f"R{s}{recipe[i]}"))
    hist = pl.DataFrame(rows, schema=["lot_id", "step", "process_tool", "chamber", "recipe"], orient="row")
    affected = lots[rng.random(n_lots) < 0.2]
    values = pl.DataFrame(
        {"lot_id": lots, "value": np.round(rng.normal(50, 2, n_lots), 1)}
    )  # rounding makes ties
    return hist, affected, values


def _candidate_lots(hist: pl.DataFrame) -> dict[tuple[str, str, str], set[str]]:
    out: dict[tuple[str, str, str], set[str]] = {}
    for lot, step, tool, chamber, recipe in hist.iter_rows():
        out.setdefault((step, "tool", tool), set()).add(lot)
        out.setdefault((step, "chamber", f"{tool}/{chamber}"), set()).add(lot)
        out.setdefault((step, "recipe", recipe), set()).add(lot)
    return out


def test_rank_commonality_association_matches_fisher_and_chi2_contingency():
    hist, affected, _ = _random_history(5)
    out = rank_commonality(hist, affected)
    aff = set(affected)
    step_lots = {s: set(g["lot_id"]) for (s,), g in hist.group_by(["step"])}
    seen = {"fisher": 0, "chi2": 0}
    for (step, kind, cand), lots in _candidate_lots(hist).items():
        row = out.filter((pl.col("step") == step) & (pl.col("kind") == kind) & (pl.col("candidate") == cand))
        rest = step_lots[step] - lots
        table = np.array([[len(lots & aff), len(lots - aff)], [len(rest & aff), len(rest - aff)]])
        assert row["n_lots"].item() == len(lots)
        if (table.sum(axis=0) == 0).any() or (table.sum(axis=1) == 0).any():
            assert row["p_assoc"].is_nan().item()
            continue
        if expected_freq(table).min() < 5:  # Cochran (1954) rule for small expected counts
            want = stats.fisher_exact(table).pvalue
            assert row["test"].item() == "fisher"
        else:
            want = stats.chi2_contingency(table).pvalue  # Yates-corrected for 2×2, scipy default
            assert row["test"].item() == "chi2"
        seen[row["test"].item()] += 1
        assert row["p_assoc"].item() == pytest.approx(want, rel=1e-6)
    assert seen["fisher"] > 0 and seen["chi2"] > 0


def test_rank_commonality_value_tests_match_scipy():
    hist, affected, values = _random_history(9)
    out = rank_commonality(hist, affected, values=values)
    value_of = dict(values.iter_rows())
    cands = _candidate_lots(hist)
    step_lots = {s: set(g["lot_id"]) for (s,), g in hist.group_by(["step"])}
    for (step, kind, cand), lots in cands.items():
        row = out.filter((pl.col("step") == step) & (pl.col("kind") == kind) & (pl.col("candidate") == cand))
        x = np.array([value_of[lot] for lot in sorted(lots)])
        y = np.array([value_of[lot] for lot in sorted(step_lots[step] - lots)])
        if len(x) < 2 or len(y) < 2:
            continue
        res = stats.ttest_ind(x, y, equal_var=False)
        ci = res.confidence_interval(0.95)
        assert row["p_welch"].item() == pytest.approx(res.pvalue, rel=1e-6)
        assert row["mean_diff"].item() == pytest.approx(x.mean() - y.mean(), rel=1e-9, abs=1e-9)
        assert (row["mean_diff_ci_low"].item(), row["mean_diff_ci_high"].item()) == pytest.approx(
            (ci.low, ci.high), rel=1e-6
        )
    for step in step_lots:
        for kind in ("tool", "chamber", "recipe"):
            groups = [
                np.array([value_of[lot] for lot in sorted(lots)])
                for (s, k, _), lots in sorted(cands.items())
                if s == step and k == kind
            ]
            row = out.filter((pl.col("step") == step) & (pl.col("kind") == kind)).head(1)
            assert row["p_anova"].item() == pytest.approx(stats.f_oneway(*groups).pvalue, rel=1e-6)
            assert row["p_kruskal"].item() == pytest.approx(stats.kruskal(*groups).pvalue, rel=1e-6)


def test_rank_commonality_q_values_are_one_bh_over_all_tests():
    hist, affected, values = _random_history(13)
    out = rank_commonality(hist, affected, values=values)
    per_step = out.unique(["step", "kind"])
    p = np.concatenate(
        [
            out["p_assoc"].to_numpy(),
            out["p_welch"].to_numpy(),
            per_step["p_anova"].to_numpy(),
            per_step["p_kruskal"].to_numpy(),
        ]
    )
    p = p[np.isfinite(p)]
    q = stats.false_discovery_control(p)
    qmap = dict(zip(p.tolist(), q.tolist(), strict=True))  # equal p-values get equal q
    for pv, qv in out.select("p_assoc", "q_assoc").drop_nans().iter_rows():
        assert qv == pytest.approx(qmap[pv], rel=1e-9)


def _planted_history(seed: int):
    """Three tools of two chambers each at every step; chamber B of tool ETCH2 at step 'etch' spoils lots."""
    rng = np.random.default_rng(seed)
    n_lots = 400
    lots = [f"P{i:04d}" for i in range(n_lots)]
    steps = ["litho", "etch", "clean", "depo"]
    rows = []
    bad = set()
    for s in steps:
        tools = rng.integers(1, 4, n_lots)
        chambers = rng.choice(["A", "B"], n_lots)
        for i, lot in enumerate(lots):
            tool = f"{s.upper()}{tools[i]}"
            rows.append((lot, s, tool, chambers[i], f"{s}-std"))
            if s == "etch" and tool == "ETCH2" and chambers[i] == "B":
                bad.add(lot)
    hist = pl.DataFrame(rows, schema=["lot_id", "step", "process_tool", "chamber", "recipe"], orient="row")
    # Most lots through the bad chamber are affected; a few unrelated lots are affected too.
    affected = [lot for lot in lots if (lot in bad and rng.random() < 0.7) or rng.random() < 0.03]
    shift = np.array([3.0 if lot in bad else 0.0 for lot in lots])
    values = pl.DataFrame({"lot_id": lots, "value": rng.normal(0, 1, n_lots) + shift})
    return hist, affected, values


@pytest.mark.parametrize("with_values", [False, True])
def test_rank_commonality_planted_chamber_ranks_first(with_values):
    hist, affected, values = _planted_history(21)
    out = rank_commonality(hist, affected, values=values if with_values else None)
    top = out.row(0, named=True)
    assert (top["step"], top["kind"], top["candidate"]) == ("etch", "chamber", "ETCH2/B")
    assert top["q_best"] < 1e-6
    assert top["reason"].startswith("chamber ETCH2/B at step etch:")


def test_rank_commonality_flags_tool_that_ran_most_lots_and_aliases():
    lots = [f"L{i:03d}" for i in range(100)]
    rows = []
    for i, lot in enumerate(lots):
        rows.append((lot, "coat", "COAT1" if i < 90 else "COAT2", None, "r1"))  # COAT1 ran 90 %
        rows.append((lot, "bake", "BAKE1" if i % 2 else "BAKE2", "X", "r2"))  # one chamber per tool: aliases
    hist = pl.DataFrame(rows, schema=["lot_id", "step", "process_tool", "chamber", "recipe"], orient="row")
    out = rank_commonality(hist, lots[:30])
    coat1 = out.filter(pl.col("candidate") == "COAT1").row(0, named=True)
    assert coat1["ran_most_lots"] is True
    assert "ran most lots (90 % of the step); not a finding by itself" in coat1["reason"]
    bake1 = out.filter((pl.col("kind") == "tool") & (pl.col("candidate") == "BAKE1")).row(0, named=True)
    assert bake1["aliases"] == ["chamber BAKE1/X at step bake"]
    assert bake1["alias_jaccard"] == 1.0
    # the recipe of a step every lot ran is not testable
    r1 = out.filter(pl.col("candidate") == "r1").row(0, named=True)
    assert r1["test"] is None and np.isnan(r1["p_assoc"])


def test_rank_commonality_missing_column_names_what_exists():
    hist = pl.DataFrame({"lot_id": ["A"], "step": ["s"]})
    with pytest.raises(ValueError) as err:
        rank_commonality(hist, ["A"])
    assert str(err.value) == (
        "rank_commonality history: missing column(s) process_tool (found lot_id, step, expected lot_id, step, "
        "process_tool). Fix: rename or add the column(s) before calling."
    )


def test_rank_commonality_overlapping_reference_is_rejected():
    hist = pl.DataFrame({"lot_id": ["A", "B"], "step": ["s", "s"], "process_tool": ["T1", "T2"]})
    with pytest.raises(ValueError, match="both affected and reference"):
        rank_commonality(hist, ["A"], reference_lots=["A", "B"])


def test_rank_commonality_wafer_level_rows_count_each_lot_once():
    hist, affected, values = _random_history(17, n_lots=120, n_steps=2)
    doubled = pl.concat([hist, hist])  # every lot×step twice, as with per-wafer tracking
    a = rank_commonality(hist, affected, values=values).sort(["step", "kind", "candidate"])
    b = rank_commonality(doubled, affected, values=values).sort(["step", "kind", "candidate"])
    assert a["n_lots"].to_list() == b["n_lots"].to_list()
    np.testing.assert_allclose(a["p_assoc"].to_numpy(), b["p_assoc"].to_numpy(), rtol=1e-12)
    np.testing.assert_allclose(a["p_welch"].to_numpy(), b["p_welch"].to_numpy(), rtol=1e-9)


def test_rank_commonality_affected_lots_without_history_are_reported():
    hist = pl.DataFrame({"lot_id": ["A", "B"], "step": ["s", "s"], "process_tool": ["T1", "T2"]})
    with pytest.raises(ValueError) as err:
        rank_commonality(hist, ["Z9"])
    assert str(err.value) == (
        "rank_commonality: none of the 1 affected lots has process history (found e.g. 'Z9', expected lot ids "
        "present in history.lot_id). Fix: load the lots' history first."
    )
