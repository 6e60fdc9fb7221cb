"""Precision study, S-chart factors, repeat trend and P/T against published data and numpy oracles."""

from pathlib import Path

import numpy as np
import polars as pl
import pytest

from spc.precision import (
    c4,
    classify_precision_to_tolerance,
    estimate_precision_levels,
    evaluate_repeat_trend,
    precision_to_tolerance,
    s_chart_factors,
    summarise_repeats,
)

DATA = Path(__file__).parents[1] / "data" / "tool_health"


def _resistivity() -> pl.DataFrame:
    raw = pl.read_csv(DATA / "resistivity_gauge_study.csv")
    return raw.select(
        "probe",
        pl.col("wafer").alias("artifact"),
        "run",
        # two rows of one probe can share a calendar day; the row order within a run is the day index
        pl.int_range(pl.len()).over("run", "wafer", "probe").alias("day"),
        pl.col("average_ohm_cm").alias("mean"),
        pl.col("stddev_ohm_cm").alias("sd"),
        pl.lit(6).alias("n"),  # each row: 6 repetitions at the wafer centre (e-Handbook §2.6.1)
    )


def test_s_chart_factors_match_printed_table():
    # ASTM Manual on Presentation of Data and Control Chart Analysis / Walpole et al. Table A.22
    table = pl.read_csv(DATA / "control_chart_factors.csv")
    f = s_chart_factors(table["n"].to_numpy())
    for name in ("c4", "B3", "B4", "B5", "B6"):
        np.testing.assert_allclose(f[name], table[name].to_numpy(), atol=0.001, err_msg=name)


def test_c4_below_two_observations_is_nan():
    assert np.isnan(c4(1))
    assert np.isfinite(c4(2))


def test_precision_levels_resistivity_probe_2362_level1_matches_data():
    # NIST/SEMATECH e-Handbook §2.6.1 / §2.4.4.3: the page prints level-1 SDs 0.0658 (run 1),
    # 0.0758 (run 2), 0.071 (pooled) for probe 2362. Those do NOT follow from the published data
    # file: pooling its row SDs gives 0.0675 / 0.0779 / 0.0729 (about 2.6 % higher), so we assert
    # the figures the data supports.
    s = _resistivity().filter(pl.col("probe") == 2362)
    per_run = estimate_precision_levels(s, by=["run"]).filter(pl.col("level") == 1).sort("run")
    assert per_run["sd"].round(4).to_list() == [0.0675, 0.0779]
    assert per_run["df"].to_list() == [150, 150]  # 5 wafers x 6 days x (6 - 1)
    pooled = estimate_precision_levels(s).filter(pl.col("level") == 1)
    assert pooled["sd"].round(4).item() == 0.0729
    assert pooled["df"].item() == 300


def test_precision_levels_resistivity_probe_2362_level3_matches_handbook():
    # NIST/SEMATECH e-Handbook §2.4.4.3 / §2.6.1: level-3 (run-to-run) pooled SD 0.0197 with 5 df
    # for probe 2362; the data file gives 0.01965, i.e. the printed value to rounding.
    s = _resistivity().filter(pl.col("probe") == 2362)
    lvl3 = estimate_precision_levels(s).filter(pl.col("level") == 3)
    assert lvl3["sd"].item() == pytest.approx(0.0197, abs=0.0001)
    assert lvl3["df"].item() == 5


def test_precision_levels_all_probes_match_numpy_oracle():
    s = _resistivity()
    got = estimate_precision_levels(s, by=["probe"]).sort("probe", "level")
    for probe in s["probe"].unique().sort().to_list():
        p = s.filter(pl.col("probe") == probe).sort("run", "artifact", "day")
        means = p["mean"].to_numpy().reshape(2, 5, 6)  # run x wafer x day
        sds = p["sd"].to_numpy().reshape(2, 5, 6)
        s1 = np.sqrt(np.mean(sds**2))
        s2 = np.sqrt(np.mean(np.var(means, axis=2, ddof=1)))
        s3 = np.sqrt(np.mean(np.var(means.mean(axis=2), axis=0, ddof=1)))
        mine = got.filter(pl.col("probe") == probe)
        np.testing.assert_allclose(mine["sd"].to_numpy(), [s1, s2, s3], rtol=1e-12)
        assert mine["df"].to_list() == [300, 50, 5]
        comp = mine["component_sd"].to_numpy()
        np.testing.assert_allclose(comp[1], np.sqrt(max(s2**2 - s1**2 / 6, 0.0)), rtol=1e-12)
        np.testing.assert_allclose(comp[2], np.sqrt(max(s3**2 - s2**2 / 6, 0.0)), rtol=1e-12)


def test_summarise_repeats_feeds_precision_levels_like_numpy():
    rng = np.random.default_rng(7)
    values = 50.0 + rng.normal(0, 0.3, size=(2, 3, 4, 5))  # run x artifact x day x repeat
    run, art, day, rep = np.meshgrid(*(np.arange(k) for k in values.shape), indexing="ij")
    raw = pl.DataFrame(
        {
            "run": run.ravel(),
            "artifact": art.ravel(),
            "day": day.ravel(),
            "repeat": rep.ravel(),
            "value": values.ravel(),
        }
    )
    levels = estimate_precision_levels(summarise_repeats(raw, by=["artifact", "run", "day"]))
    expected_s1 = np.sqrt(np.mean(np.var(values, axis=3, ddof=1)))
    assert levels["sd"][0] == pytest.approx(expected_s1, rel=1e-12)
    assert levels["df"].to_list() == [2 * 3 * 4 * 4, 2 * 3 * 3, 3]


def _shrink_frame(slope: float, seed: int) -> pl.DataFrame:
    rng = np.random.default_rng(seed)
    sessions, repeats, sigma = 12, 10, 0.25
    start = 45.0 + rng.normal(0, 1.0, size=(sessions, 1))
    idx = np.arange(1, repeats + 1)
    values = start + slope * idx + rng.normal(0, sigma, size=(sessions, repeats))
    sess = np.repeat(np.arange(sessions), repeats)
    return pl.DataFrame(
        {"tool": "SEM1", "session": sess, "repeat": np.tile(idx, sessions), "value": values.ravel()}
    )


def test_repeat_trend_resist_shrink_is_detected_and_detrended():
    frame = _shrink_frame(slope=-0.15, seed=3)  # 0.15 nm lost per repeat, true repeatability 0.25 nm
    got = evaluate_repeat_trend(frame, by=["tool"], session=["session"]).row(0, named=True)
    # oracle: least squares with one intercept per session and a common slope (numpy lstsq)
    sess = frame["session"].to_numpy()
    design = np.column_stack([(sess[:, None] == np.arange(12)).astype(float), frame["repeat"].to_numpy()])
    y = frame["value"].to_numpy()
    beta, rss, *_ = np.linalg.lstsq(design, y, rcond=None)
    dof = len(y) - design.shape[1]
    assert got["slope_per_repeat"] == pytest.approx(beta[-1], rel=1e-10)
    assert got["sd_detrended"] == pytest.approx(np.sqrt(rss[0] / dof), rel=1e-10)
    assert got["df"] == dof
    assert got["trend_detected"]
    assert got["sd_raw"] > 1.5 * got["sd_detrended"]  # the trend inflates the naive repeatability
    assert got["repeatability_sd"] == got["sd_detrended"]


def test_repeat_trend_etched_feature_without_trend_keeps_raw_sd():
    got = evaluate_repeat_trend(_shrink_frame(slope=0.0, seed=5)).row(0, named=True)
    assert not got["trend_detected"]
    assert got["repeatability_sd"] == got["sd_raw"]
    assert got["sd_raw"] == pytest.approx(0.25, rel=0.15)


def test_precision_to_tolerance_bands_follow_common_practice():
    # common practice: P/T < 0.1 good, <= 0.3 acceptable, above not capable
    ratio = precision_to_tolerance([0.1, 0.5, 0.6, 2.0], 45.0, 55.0)
    np.testing.assert_allclose(ratio, [0.06, 0.3, 0.36, 1.2])
    assert classify_precision_to_tolerance(ratio).tolist() == [
        "good",
        "acceptable",
        "not capable",
        "not capable",
    ]
    assert classify_precision_to_tolerance(precision_to_tolerance(0.2, 50.0, 50.0)).tolist() == "unknown"
