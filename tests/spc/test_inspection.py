"""Inspection tool health and capacity planning against scipy, the NIST c-chart example and the 16x rule."""

import datetime as dt
from pathlib import Path

import numpy as np
import polars as pl
import pytest
from scipy import stats

from spc.inspection import (
    BeamSetup,
    calibrate_area_rate_constant,
    compare_tool_counts,
    defect_size_slowdown,
    estimate_area_rate,
    evaluate_capture_rate,
    evaluate_count_stability,
    evaluate_density_trend,
    evaluate_size_calibration,
    plan_inspection_capacity,
    proportion_interval,
)

DATA = Path(__file__).parents[1] / "data" / "tool_health"
CASES = [(0, 10), (1, 10), (5, 10), (10, 10), (0, 1), (47, 50), (50, 50), (3, 679), (250, 400)]


@pytest.mark.parametrize("method, scipy_method", [("clopper-pearson", "exact"), ("wilson", "wilson")])
def test_proportion_interval_matches_scipy_binomtest(method, scipy_method):
    k, n = (np.array(v) for v in zip(*CASES, strict=True))
    for conf in (0.9, 0.95, 0.99):
        lo, hi = proportion_interval(k, n, confidence=conf, method=method)
        for i, (ki, ni) in enumerate(CASES):
            ci = stats.binomtest(int(ki), int(ni)).proportion_ci(confidence_level=conf, method=scipy_method)
            assert lo[i] == pytest.approx(ci.low, abs=1e-10)
            assert hi[i] == pytest.approx(ci.high, abs=1e-10)


def test_proportion_interval_unknown_method_raises():
    with pytest.raises(ValueError, match='unknown interval method "agresti"'):
        proportion_interval(1, 2, method="agresti")


def test_capture_rate_pools_inspections_per_tool():
    frame = pl.DataFrame(
        {
            "tool": ["I1", "I1", "I2", "I2"],
            "day": [1, 2, 1, 2],
            "placed": [60, 60, 60, 60],
            "found": [58, 57, 49, 51],
        }
    )
    got = evaluate_capture_rate(frame).sort("tool")
    assert got["found"].to_list() == [115, 100]
    assert got["capture_rate"].to_list() == pytest.approx([115 / 120, 100 / 120])
    ci = stats.binomtest(100, 120).proportion_ci(method="exact")
    assert (got["capture_lo"][1], got["capture_hi"][1]) == pytest.approx((ci.low, ci.high), abs=1e-10)
    per_day = evaluate_capture_rate(frame, by=["tool", "day"], method="wilson")
    assert per_day.height == 4 and per_day["n_inspections"].to_list() == [1, 1, 1, 1]


def test_count_stability_matches_nist_c_chart_example():
    # NIST/SEMATECH e-Handbook §6.3.3.1 wafer defect counts (from memory, as recomputed in the
    # reference notes): c-bar 16, UCL 28, LCL 4; wafer 24 (31) is beyond the UCL, wafer 3 (28)
    # lies on it and is not beyond it.
    counts = pl.read_csv(DATA / "wafer_defect_counts.csv")
    frame = counts.select(
        pl.lit("I1").alias("tool"), pl.col("wafer").alias("inspected_at"), pl.col("defects").alias("count")
    )
    got = evaluate_count_stability(frame, baseline_n=25)
    assert got["expected_count"].unique().to_list() == [16.0]
    assert got["ucl"][0] == 28.0 and got["lcl"][0] == 4.0
    assert got.filter(pl.col("signal"))["inspected_at"].to_list() == [24]


def test_count_stability_dispersion_index_separates_poisson_from_clustered():
    rng = np.random.default_rng(21)
    n = 400
    poisson = rng.poisson(40.0, size=n)
    clustered = rng.negative_binomial(2.0, 2.0 / (2.0 + 40.0), size=n)  # mean 40, alpha = 2
    frame = pl.DataFrame(
        {
            "tool": ["P"] * n + ["C"] * n,
            "inspected_at": list(range(n)) * 2,
            "count": np.r_[poisson, clustered],
        }
    )
    got = (
        evaluate_count_stability(frame, baseline_n=n).group_by("tool").agg(pl.col("dispersion_index").first())
    )
    d = dict(got.iter_rows())
    assert d["P"] == pytest.approx(1.0, abs=0.2)
    assert d["C"] > 10  # variance = mu + mu^2/alpha = 840 for mu 40: index ~ 21


def test_count_stability_uses_inspected_area():
    frame = pl.DataFrame(
        {"tool": "I1", "inspected_at": [1, 2, 3], "count": [10, 20, 30], "area_cm2": [100.0, 200.0, 300.0]}
    )
    got = evaluate_count_stability(frame, baseline_n=3)
    assert got["expected_count"].to_list() == pytest.approx([10.0, 20.0, 30.0])
    assert got["dispersion_index"][0] == pytest.approx(0.0)


def test_size_calibration_matches_numpy_and_linregress():
    rng = np.random.default_rng(4)
    known = np.repeat([40.0, 60.0, 80.0, 120.0], 25)
    reported = 3.0 + 1.05 * known + rng.normal(0, 2.0, size=known.size)
    frame = pl.DataFrame({"tool": "I1", "known_size_nm": known, "reported_size_nm": reported})
    got = evaluate_size_calibration(frame).row(0, named=True)
    err = reported - known
    ref = stats.linregress(known, reported)
    assert got["n"] == 100
    assert got["mean_error_nm"] == pytest.approx(err.mean(), rel=1e-12)
    assert got["sd_error_nm"] == pytest.approx(err.std(ddof=1), rel=1e-12)
    assert got["rms_error_nm"] == pytest.approx(np.sqrt(np.mean(err**2)), rel=1e-12)
    assert got["mean_relative_error"] == pytest.approx(np.mean(err / known), rel=1e-12)
    assert got["slope"] == pytest.approx(ref.slope, rel=1e-10)
    assert got["intercept_nm"] == pytest.approx(ref.intercept, rel=1e-9)
    one_size = evaluate_size_calibration(frame, by=["tool", "known_size_nm"])
    assert one_size.height == 4 and one_size["slope"].null_count() == 4


def test_compare_tool_counts_exact_ratio_interval_matches_binomtest():
    frame = pl.DataFrame(
        {
            "wafer": ["W1"] * 3 + ["W2"] * 3,
            "tool": ["I1", "I2", "I3"] * 2,
            "count": [120, 131, 180, 0, 4, 0],
            "area_cm2": [679.0, 679.0, 600.0, 679.0, 679.0, 679.0],
        }
    )
    got = compare_tool_counts(frame, reference_tool="I1").sort("wafer", "tool")
    assert got.select("wafer", "tool").rows() == [("W1", "I2"), ("W1", "I3"), ("W2", "I2"), ("W2", "I3")]
    for row in got.iter_rows(named=True):
        c, cref = row["count"], row["reference_count"]
        a = 600.0 if (row["wafer"], row["tool"]) == ("W1", "I3") else 679.0
        if c + cref == 0:
            assert row["ratio_lo"] is None
            continue
        # exact conditional interval: c | N ~ Binomial(N, R a / (R a + a_ref))  (scipy binomtest)
        ci = stats.binomtest(c, c + cref).proportion_ci(method="exact")
        lo = ci.low / (1 - ci.low) * 679.0 / a
        hi = ci.high / (1 - ci.high) * 679.0 / a if ci.high < 1 else np.inf
        assert row["ratio_lo"] == pytest.approx(lo, rel=1e-9)
        assert row["ratio_hi"] == pytest.approx(hi, rel=1e-9)
    w1 = {r["tool"]: r for r in got.filter(pl.col("wafer") == "W1").iter_rows(named=True)}
    assert w1["I2"]["matched"]  # 131 vs 120 on the same area
    assert w1["I3"]["density_ratio"] == pytest.approx((180 / 600) / (120 / 679))
    assert not w1["I3"]["matched"]


def test_density_trend_matches_linregress_and_flags_rising_density():
    rng = np.random.default_rng(8)
    days = np.arange(60)
    area = 679.0
    rising = rng.poisson((0.10 + 0.002 * days) * area)
    flat = rng.poisson(0.10 * area, size=days.size)
    start = dt.datetime(2024, 5, 1, 7, 0, tzinfo=dt.UTC)
    stamps = [start + dt.timedelta(days=int(d), hours=2) for d in days]
    frame = pl.DataFrame(
        {
            "tool": ["I1"] * 60 + ["I2"] * 60,
            "inspected_at": stamps * 2,
            "count": np.r_[rising, flat],
            "area_cm2": area,
        }
    )
    got = evaluate_density_trend(frame).sort("tool")
    ref = stats.linregress(days, rising / area)
    i1 = got.row(0, named=True)
    assert i1["slope_per_day"] == pytest.approx(ref.slope, rel=1e-9)
    assert i1["slope_se"] == pytest.approx(ref.stderr, rel=1e-9)
    assert i1["p_value"] == pytest.approx(ref.pvalue, rel=1e-6)
    assert i1["trend_detected"]
    assert not got.row(1, named=True)["trend_detected"]


def test_capacity_halving_defect_size_is_16_times_slower():
    # common practice (reference notes): area rate ~ beams * J * C^2 * pixel^4 at fixed current
    # density, so halving the defect (pixel) size makes the inspection ~16x slower
    assert float(defect_size_slowdown(0.5)) == 16.0
    ref = BeamSetup(beams=1, current_density_a_per_cm2=0.8, contrast=0.3, pixel_nm=10.0)
    k = calibrate_area_rate_constant(ref, area_rate_cm2_per_h=2.0)
    assert estimate_area_rate(ref, k) == pytest.approx(2.0, rel=1e-12)
    options = pl.DataFrame(
        {
            "beams": [1, 1, 9],
            "current_density_a_per_cm2": [0.8, 0.8, 0.8],
            "contrast": [0.3, 0.3, 0.3],
            "pixel_nm": [10.0, 5.0, 10.0],
            "care_area_cm2": [1.0, 1.0, 1.0],
        }
    )
    plan = plan_inspection_capacity(options, rate_constant=k)
    assert plan["area_rate_cm2_per_h"][0] == pytest.approx(2.0, rel=1e-12)
    assert plan["scan_s_per_wafer"][0] == pytest.approx(1800.0, rel=1e-12)
    assert plan["scan_s_per_wafer"][1] / plan["scan_s_per_wafer"][0] == pytest.approx(16.0, rel=1e-12)
    assert plan["wafers_per_hour"][2] / plan["wafers_per_hour"][0] == pytest.approx(9.0, rel=1e-12)


def test_capacity_contrast_squared_and_overhead():
    k = calibrate_area_rate_constant(BeamSetup(1, 1.0, 0.2, 8.0), area_rate_cm2_per_h=0.5)
    options = pl.DataFrame(
        {
            "beams": [1, 1],
            "current_density_a_per_cm2": [1.0, 1.0],
            "contrast": [0.2, 0.4],
            "pixel_nm": [8.0, 8.0],
            "care_area_cm2": [0.25, 0.25],
            "overhead_s": [60.0, 60.0],
        }
    )
    plan = plan_inspection_capacity(options, rate_constant=k)
    assert plan["area_rate_cm2_per_h"].to_list() == pytest.approx([0.5, 2.0])  # C^2: double contrast, 4x rate
    assert plan["total_s_per_wafer"].to_list() == pytest.approx([1800.0 + 60.0, 450.0 + 60.0])
    assert plan["wafers_per_hour"][1] == pytest.approx(3600.0 / 510.0)
