"""Gauge R&R by ANOVA against a textbook worked example and an independent numpy ANOVA."""

import numpy as np
import polars as pl
import pytest
from scipy import stats

from spc.gauge import GaugeStudySettings, analyse_gauge_rr

# Montgomery, Introduction to Statistical Quality Control (gauge R&R by ANOVA example) and
# Design and Analysis of Experiments (two-factor random-effects example): 20 parts, 3 operators,
# 2 measurements each. Rows: operator 1 (measurement 1, 2), operator 2 (1, 2), operator 3 (1, 2);
# columns: parts 1..20. Values as transcribed in two independent public course scripts, which agree.
MONTGOMERY = [
    [21, 24, 20, 27, 19, 23, 22, 19, 24, 25, 21, 18, 23, 24, 29, 26, 20, 19, 25, 19],
    [20, 23, 21, 27, 18, 21, 21, 17, 23, 23, 20, 19, 25, 24, 30, 26, 20, 21, 26, 19],
    [20, 24, 19, 28, 19, 24, 22, 18, 25, 26, 20, 17, 25, 23, 30, 25, 19, 19, 25, 18],
    [20, 24, 21, 26, 18, 21, 24, 20, 23, 25, 20, 19, 25, 25, 28, 26, 20, 19, 24, 17],
    [19, 23, 20, 27, 18, 23, 22, 19, 24, 24, 21, 18, 25, 24, 31, 25, 20, 21, 25, 19],
    [21, 24, 22, 28, 21, 22, 20, 18, 24, 25, 20, 19, 25, 25, 30, 27, 20, 23, 25, 17],
]


def _frame(cube: np.ndarray) -> pl.DataFrame:
    """part x appraiser x repeat cube -> long frame."""
    p, o, r = np.meshgrid(*(np.arange(k) for k in cube.shape), indexing="ij")
    return pl.DataFrame(
        {
            "part": p.ravel() + 1,
            "appraiser": [f"op{k}" for k in o.ravel()],
            "repeat": r.ravel(),
            "value": cube.ravel(),
        }
    )


def _montgomery_cube() -> np.ndarray:
    return np.asarray(MONTGOMERY, dtype=float).reshape(3, 2, 20).transpose(2, 0, 1)


def _numpy_anova(y: np.ndarray) -> dict[str, float]:
    """Textbook two-way crossed ANOVA with replication, written directly with numpy."""
    p, o, r = y.shape
    grand = y.mean()
    cell = y.mean(axis=2)
    ss_p = o * r * np.sum((y.mean(axis=(1, 2)) - grand) ** 2)
    ss_o = p * r * np.sum((y.mean(axis=(0, 2)) - grand) ** 2)
    ss_po = r * np.sum((cell - y.mean(axis=(1, 2))[:, None] - y.mean(axis=(0, 2))[None, :] + grand) ** 2)
    ss_e = np.sum((y - cell[..., None]) ** 2)
    df = {"part": p - 1, "appraiser": o - 1, "interaction": (p - 1) * (o - 1), "error": p * o * (r - 1)}
    ss = {"part": ss_p, "appraiser": ss_o, "interaction": ss_po, "error": ss_e}
    ms = {k: ss[k] / df[k] for k in ss}
    return {
        "ms": ms,
        "df": df,
        "p_int": stats.f.sf(ms["interaction"] / ms["error"], df["interaction"], df["error"]),
    }


def test_gauge_rr_montgomery_example_matches_published_anova():
    # Montgomery (ISQC gauge R&R example / DAE two-factor random example), from memory:
    # MS parts 62.39, operators 1.31, parts x operators 0.71, error 0.99; interaction P = 0.862,
    # so the interaction is pooled; reduced model sigma^2 = 0.88, sigma^2_operator = 0.0108
    # (the book divides rounded mean squares), sigma^2_part = 10.25, sigma^2_gauge = 0.89.
    got = analyse_gauge_rr(_frame(_montgomery_cube())).row(0, named=True)
    assert (got["n_parts"], got["n_appraisers"], got["n_repeats"]) == (20, 3, 2)
    assert [round(got[f"ms_{k}"], 2) for k in ("part", "appraiser", "interaction", "error")] == [
        62.39,
        1.31,
        0.71,
        0.99,
    ]
    # the printed P = 0.862 follows from the rounded mean squares (F = 0.71/0.99); unrounded: 0.8614
    assert got["p_interaction"] == pytest.approx(0.862, abs=0.001)
    assert got["interaction_pooled"]
    assert round(got["var_repeatability"], 2) == 0.88
    assert got["var_appraiser"] == pytest.approx(0.0108, abs=0.0003)
    assert round(got["var_part"], 2) == 10.25
    assert round(got["var_grr"], 2) == 0.89
    assert got["var_interaction"] == 0.0


def test_gauge_rr_montgomery_example_matches_numpy_anova():
    cube = _montgomery_cube()
    ref = _numpy_anova(cube)
    got = analyse_gauge_rr(_frame(cube), tolerance=55.0).row(0, named=True)
    for k in ("part", "appraiser", "interaction", "error"):
        assert got[f"ms_{k}"] == pytest.approx(ref["ms"][k], rel=1e-10)
        assert got[f"df_{k}"] == ref["df"][k]
    assert got["p_interaction"] == pytest.approx(ref["p_int"], rel=1e-10)
    ms = ref["ms"]
    pooled = (ms["interaction"] * 38 + ms["error"] * 60) / 98
    var_rep, var_op, var_part = pooled, (ms["appraiser"] - pooled) / 40, (ms["part"] - pooled) / 6
    grr = np.sqrt(var_rep + var_op)
    pv = np.sqrt(var_part)
    assert got["sd_grr"] == pytest.approx(grr, rel=1e-10)
    assert got["pct_grr_total"] == pytest.approx(100 * grr / np.sqrt(grr**2 + pv**2), rel=1e-10)
    assert got["pct_grr_tolerance"] == pytest.approx(100 * 6 * grr / 55.0, rel=1e-10)
    assert got["ndc"] == int(np.floor(1.41 * pv / grr))  # AIAG MSA manual, common practice


def test_gauge_rr_significant_interaction_is_kept_and_matches_numpy():
    rng = np.random.default_rng(11)
    p, o, r = 10, 3, 3
    parts = rng.normal(0, 2.0, size=(p, 1, 1))
    ops = rng.normal(0, 0.3, size=(1, o, 1))
    inter = rng.normal(0, 0.8, size=(p, o, 1))
    cube = 50 + parts + ops + inter + rng.normal(0, 0.2, size=(p, o, r))
    ref = _numpy_anova(cube)
    got = analyse_gauge_rr(_frame(cube)).row(0, named=True)
    assert ref["p_int"] < 0.25
    assert not got["interaction_pooled"]
    ms = ref["ms"]
    assert got["var_repeatability"] == pytest.approx(ms["error"], rel=1e-10)
    assert got["var_interaction"] == pytest.approx((ms["interaction"] - ms["error"]) / r, rel=1e-10)
    assert got["var_appraiser"] == pytest.approx(
        max((ms["appraiser"] - ms["interaction"]) / (p * r), 0), abs=1e-12
    )
    assert got["var_part"] == pytest.approx((ms["part"] - ms["interaction"]) / (o * r), rel=1e-10)
    assert got["var_reproducibility"] == pytest.approx(
        got["var_appraiser"] + got["var_interaction"], rel=1e-12
    )


def test_gauge_rr_by_key_runs_studies_independently():
    a = _frame(_montgomery_cube()).with_columns(pl.lit("L1").alias("layer"))
    b = _frame(_montgomery_cube() * 2.0).with_columns(pl.lit("L2").alias("layer"))
    got = analyse_gauge_rr(pl.concat([b, a]), by=["layer"]).sort("layer")
    assert got["ms_part"][1] == pytest.approx(4 * got["ms_part"][0], rel=1e-12)
    assert got["pct_grr_total"][1] == pytest.approx(got["pct_grr_total"][0], rel=1e-12)


def test_gauge_rr_interaction_alpha_setting_controls_pooling():
    got = analyse_gauge_rr(_frame(_montgomery_cube()), settings=GaugeStudySettings(interaction_alpha=0.9))
    assert not got["interaction_pooled"].item()  # p = 0.862 < 0.9: kept; its negative estimate floors at 0
    assert got["var_interaction"].item() == 0.0


def test_gauge_rr_unbalanced_design_raises_with_fix():
    frame = _frame(_montgomery_cube()).slice(1)
    with pytest.raises(ValueError, match="not a balanced crossed design.*Fix: drop incomplete"):
        analyse_gauge_rr(frame)
