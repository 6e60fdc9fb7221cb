"""Defect/proportion charts on NIST data; capability indices and their intervals."""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import polars as pl
import pytest
from scipy import stats

from spc.attributes import c_points, laney_u_points, p_points, test_overdispersion, u_points
from spc.capability import evaluate_capability
from spc.rules import evaluate_rules

REF = Path(__file__).resolve().parents[1] / "data/reference"
EXAMPLES = json.loads((REF / "worked_examples/examples.json").read_text())


def test_c_points_nist_wafer_defects_limits_and_signal():
    ex = EXAMPLES["c_chart_nist_6_3_3_1"]  # NIST/SEMATECH e-Handbook §6.3.3.1 (limits from memory)
    df = pl.read_csv(REF / "nist/wafer_defect_counts.csv").with_columns(
        pl.lit("W").alias("series"), pl.col("wafer").alias("seq")
    )
    pts = c_points(df, count="defects")
    center, sigma = pts["center"][0], pts["sigma"][0]
    assert center == ex["published"]["c_bar"]
    assert center + 3 * sigma == ex["published"]["ucl"] and center - 3 * sigma == ex["published"]["lcl"]
    # Wafer 24 (31) is beyond the UCL; wafer 3 (28) sits exactly on it and is not beyond.
    assert evaluate_rules(pts, ["we1"])["seq"].to_list() == [24]


def test_p_points_nist_fraction_defective_center():
    ex = EXAMPLES["p_chart_nist_6_3_3_2"]  # NIST/SEMATECH e-Handbook §6.3.3.2, 50 chips per wafer
    df = pl.read_csv(REF / "nist/wafer_fraction_defective.csv").with_columns(
        pl.lit("P").alias("series"),
        pl.col("wafer").alias("seq"),
        pl.lit(50).alias("n"),
        (pl.col("fraction_defective") * 50).round().alias("defective"),
    )
    pts = p_points(df)
    assert round(pts["center"][0], 4) == ex["published"]["p_bar"]
    assert pts["sigma"][0] == pytest.approx(math.sqrt(0.2313 * (1 - 0.2313) / 50), rel=1e-3)


def test_u_points_variable_area_uses_per_row_sigma():
    df = pl.DataFrame({"series": "T", "seq": [1, 2], "count": [10, 30], "area_cm2": [100.0, 200.0]})
    pts = u_points(df)
    ubar = 40 / 300  # pooled rate, defects per cm2
    assert pts["center"].to_list() == pytest.approx([ubar, ubar])
    assert pts["sigma"].to_list() == pytest.approx([math.sqrt(ubar / 100), math.sqrt(ubar / 200)])


def test_overdispersion_clustered_counts_recommend_laney_and_widen_limits():
    rng = np.random.default_rng(1)
    areas = np.full(60, 679.0)  # 300 mm wafer, 3 mm edge exclusion (common practice)
    lam = rng.gamma(shape=1.0, scale=0.1, size=60) * areas  # clustered: negative-binomial counts
    counts = rng.poisson(lam)
    t = test_overdispersion(counts, areas)
    assert t.recommend_laney and t.ratio > 5
    steady = test_overdispersion([66, 70, 68, 71, 65, 68], [679.0] * 6)  # less spread than Poisson
    assert not steady.recommend_laney and steady.p_value > 0.9
    df = pl.DataFrame({"series": "D", "seq": range(60), "count": counts, "area_cm2": areas})
    assert laney_u_points(df)["sigma"][0] > u_points(df)["sigma"][0] * 2
    # Statistic equals scipy's chi-square dispersion form (sum of squared Pearson residuals).
    exp = areas * counts.sum() / areas.sum()
    assert t.statistic == pytest.approx(float(((counts - exp) ** 2 / exp).sum()))


def test_evaluate_capability_intervals_follow_chi_square_and_bissell():
    rng = np.random.default_rng(3)
    x = rng.normal(10.0, 0.1, 100)
    c = evaluate_capability(x, lsl=9.5, usl=10.6)
    s = x.std(ddof=1)
    assert c.pp == pytest.approx(1.1 / (6 * s))
    lo = c.pp * math.sqrt(stats.chi2.ppf(0.025, 99) / 99)  # Montgomery SQC §8.3, chi-square interval
    assert c.pp_ci[0] == pytest.approx(lo)
    half = stats.norm.ppf(0.975) * math.sqrt(1 / 900 + c.ppk**2 / 198)  # Bissell (1990)
    assert c.ppk_ci == pytest.approx((c.ppk - half, c.ppk + half))
    assert c.normality_p > 0.05 and c.warnings == ()


def test_evaluate_capability_refuses_few_points_and_warns_non_normal():
    with pytest.raises(ValueError, match="at least 10 values, found 5"):
        evaluate_capability([1, 2, 3, 4, 5], lsl=0, usl=6)
    skewed = np.random.default_rng(0).exponential(1.0, 25)
    c = evaluate_capability(skewed, usl=10.0)
    assert c.cp is None and any("non-normal" in w for w in c.warnings)
    assert any("only 25 values" in w for w in c.warnings)
