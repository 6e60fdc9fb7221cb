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


# ------------------------------------------------------------------ negative-binomial probability limits


def _nb_pmf(c: int, mu: float, inv_alpha: float) -> float:
    """P(C = c) of the gamma-Poisson (negative binomial) count with mean mu and variance mu + inv_alpha mu^2,
    written from its textbook form Gamma(c + a) / (Gamma(a) c!) p^a (1 - p)^c, a = 1/inv_alpha,
    p = a / (a + mu) (Johnson, Kotz & Kemp, Univariate Discrete Distributions, ch. 5, from memory);
    the Poisson pmf e^-mu mu^c / c! when inv_alpha is 0. Independent of scipy."""
    if inv_alpha == 0:
        return math.exp(-mu + c * math.log(mu) - math.lgamma(c + 1))
    a = 1.0 / inv_alpha
    p = a / (a + mu)
    return math.exp(
        math.lgamma(c + a) - math.lgamma(a) - math.lgamma(c + 1) + a * math.log(p) + c * math.log1p(-p)
    )


@pytest.mark.parametrize(
    ("ubar", "inv_alpha", "area"),
    [(0.1, 1.0, 679.0), (0.12, 1.25, 650.0), (0.05, 0.5, 300.0), (0.1, 0.0, 679.0), (0.02, 0.0, 150.0)],
)
def test_negbin_count_limits_are_the_smallest_counts_with_tails_at_most_the_3_sigma_normal_tail(
    ubar, inv_alpha, area
):
    from spc.attributes import negbin_count_limits

    tail = stats.norm.sf(
        3.0
    )  # one-sided normal tail beyond 3 sigma, 1 - 0.99865 (NIST/SEMATECH e-Handbook §1.3.6.7.1)
    lo, hi = negbin_count_limits(ubar, inv_alpha, [area], k=3.0)
    lo, hi = int(lo[0]), int(hi[0])
    mu = ubar * area
    cdf = np.cumsum([_nb_pmf(c, mu, inv_alpha) for c in range(hi + 1)])
    assert 1.0 - cdf[hi] <= tail + 1e-12 < 1.0 - cdf[hi - 1]  # P(C > U) <= tail < P(C > U - 1)
    assert lo == 0 or (cdf[lo - 1] < tail <= cdf[lo] + 1e-12)  # P(C < L) < tail <= P(C <= L)


def test_negbin_fit_recovers_the_clustering_of_simulated_counts():
    # simulation truth: counts drawn gamma-Poisson with alpha = 0.8 (1/alpha = 1.25) and u = 0.12 /cm2
    # over areas of 600-680 cm2; the moment estimator's expectation is 1/alpha (module doc)
    from spc.attributes import negbin_fit

    rng = np.random.default_rng(11)
    area = rng.uniform(600.0, 680.0, 40_000)
    mu = 0.12 * area
    counts = rng.negative_binomial(0.8, 0.8 / (0.8 + mu))
    fit = negbin_fit(counts, area)
    assert fit.ubar == pytest.approx(0.12, rel=0.02)
    assert fit.inv_alpha == pytest.approx(1.25, rel=0.05)
    pois = negbin_fit(rng.poisson(mu), area)  # no clustering: about 0
    assert pois.inv_alpha < 0.01


def test_on_clustered_counts_negbin_limits_keep_the_nominal_rate_where_laney_u_prime_over_alarms():
    # the case the chart exists for (notes/domain.md: clustered counts over-alarm plain u charts); truth
    # from simulation: in-control gamma-Poisson counts, alpha = 1, about 68 defects a wafer
    from spc.attributes import laney_u_points, negbin_count_limits, negbin_fit

    rng = np.random.default_rng(5)
    area = rng.uniform(600.0, 680.0, 200_000)
    counts = rng.negative_binomial(1.0, 1.0 / (1.0 + 0.1 * area))
    base = slice(0, 2_000)
    fit = negbin_fit(counts[base], area[base])
    lo, hi = negbin_count_limits(fit.ubar, fit.inv_alpha, area)
    nb_rate = float(np.mean((counts > hi) | (counts < lo)))
    laney = laney_u_points(pl.DataFrame({"series": "s", "count": counts[base], "area_cm2": area[base]}))
    ubar, sz = float(laney["center"][0]), float(laney["sigma_z"][0])
    ucl = ubar + 3.0 * sz * np.sqrt(ubar / area)
    laney_rate = float(np.mean(counts / area > ucl))
    assert nb_rate < 0.005  # 2 x 0.135 % nominal, with the baseline's estimation error
    assert laney_rate > 4 * nb_rate  # an exponential-like tail beyond mean + 3 SD: about e^-4 = 1.8 %
