"""Monitor-wafer health: EWMA drift, S chart, bias and fleet offsets/matching vs published values and loops."""

import datetime as dt
from pathlib import Path

import numpy as np
import polars as pl
import pytest
from scipy import stats

from spc.metrology import (
    MonitorSettings,
    estimate_fleet_matching,
    estimate_fleet_offsets,
    evaluate_monitor_health,
    summarise_monitor_days,
)

DATA = Path(__file__).parents[1] / "data" / "tool_health"


def _fleet(
    seed: int,
    *,
    days: int = 40,
    tools: tuple[str, ...] = ("SEM1", "SEM2", "SEM3", "SEM4"),
    targets: dict[str, float] | None = None,
    repeats: int = 5,
    offsets: dict[str, float] | None = None,
    gains: dict[str, float] | None = None,
    drift_per_day: dict[str, float] | None = None,
    noisy_after: dict[str, int] | None = None,
) -> pl.DataFrame:
    """Invented fleet of CD-SEMs measuring one etched monitor wafer daily (repeat noise 0.3 nm)."""
    rng = np.random.default_rng(seed)
    targets = targets or {"T32": 32.0, "T45": 45.0, "T90": 90.0}
    rows = {"tool": [], "target": [], "day": [], "repeat": [], "value": []}
    start = dt.date(2024, 3, 1)
    for tool in tools:
        for name, size in targets.items():
            for d in range(days):
                mu = (offsets or {}).get(tool, 0.0) + (gains or {}).get(tool, 1.0) * size
                mu += rng.normal(0, 0.1)  # day-to-day reproducibility
                if d >= 20:
                    mu += (drift_per_day or {}).get(tool, 0.0) * (d - 20)
                sd = 0.3 * (3.0 if d >= (noisy_after or {}).get(tool, 10**9) else 1.0)
                for r in range(repeats):
                    rows["tool"].append(tool)
                    rows["target"].append(name)
                    rows["day"].append(start + dt.timedelta(days=d))
                    rows["repeat"].append(r + 1)
                    rows["value"].append(mu + rng.normal(0, sd))
    return pl.DataFrame(rows)


def test_monitor_ewma_and_limits_match_textbook_loop():
    frame = _fleet(1, days=30, drift_per_day={"SEM2": 0.03})
    settings = MonitorSettings(baseline_days=15, ewma_lambda=0.2, ewma_width=2.7)
    got = evaluate_monitor_health(frame, settings=settings)
    daily = summarise_monitor_days(frame)
    for (tool, target), part in daily.group_by("tool", "target"):
        part = part.sort("day")
        means = part["mean_nm"].to_numpy()
        mu0, sigma = means[:15].mean(), means[:15].std(ddof=1)
        z, prev, lcl, ucl = [], mu0, [], []
        for i, m in enumerate(means, start=1):  # EWMA recursion, exact limits (NIST e-Handbook §6.3.2.4)
            prev = 0.2 * m + 0.8 * prev
            z.append(prev)
            half = 2.7 * sigma * np.sqrt(0.2 / 1.8 * (1 - 0.8 ** (2 * i)))
            lcl.append(mu0 - half)
            ucl.append(mu0 + half)
        mine = got.filter((pl.col("tool") == tool) & (pl.col("target") == target)).sort("day")
        np.testing.assert_allclose(mine["ewma_nm"].to_numpy(), z, rtol=1e-12)
        np.testing.assert_allclose(mine["ewma_lcl"].to_numpy(), lcl, rtol=1e-12)
        np.testing.assert_allclose(mine["ewma_ucl"].to_numpy(), ucl, rtol=1e-12)
        assert mine["baseline_mean_nm"][0] == pytest.approx(mu0, rel=1e-12)


def test_monitor_drift_after_baseline_signals_on_drifting_tool_only():
    frame = _fleet(2, drift_per_day={"SEM3": 0.05})  # 0.05 nm/day from day 20 on
    got = evaluate_monitor_health(frame, settings=MonitorSettings(baseline_days=20))
    by_tool = got.group_by("tool").agg(pl.col("ewma_signal").sum()).sort("tool")
    signals = dict(zip(by_tool["tool"], by_tool["ewma_signal"], strict=True))
    assert signals["SEM3"] >= 3 * 10  # every target flags most of the last 20 days
    assert max(signals["SEM1"], signals["SEM2"], signals["SEM4"]) <= 3


def test_monitor_s_chart_limits_match_printed_b3_b4_factors():
    # ASTM manual / Walpole et al. Table A.22, n = 5: B3 = 0, B4 = 2.089 applied to s-bar
    table = pl.read_csv(DATA / "control_chart_factors.csv").filter(pl.col("n") == 5).row(0, named=True)
    frame = _fleet(3, days=25, tools=("SEM1",), targets={"T45": 45.0})
    got = evaluate_monitor_health(frame, settings=MonitorSettings(baseline_days=25))
    s_bar = got["sd_nm"].mean()
    assert got["s_ucl"][0] == pytest.approx(table["B4"] * s_bar, rel=0.001)
    assert got["s_lcl"][0] == pytest.approx(table["B3"] * s_bar, abs=1e-12)
    assert got["s_center"][0] == pytest.approx(s_bar, rel=1e-12)


def test_monitor_s_chart_flags_degraded_precision():
    frame = _fleet(4, noisy_after={"SEM1": 30})  # repeat SD triples from day 30
    got = evaluate_monitor_health(frame)
    late = got.filter((pl.col("tool") == "SEM1") & (pl.col("day_index") > 30))
    early = got.filter(pl.col("in_baseline"))
    # P(s > B6 sigma) when sigma triples, n = 5: P(chi2_4 > 4 (1.964/3)^2) = 0.79
    assert late["s_signal"].mean() > 0.6
    assert early["s_signal"].mean() < 0.05


def test_monitor_bias_uses_reference_when_given_else_baseline():
    frame = _fleet(5, days=10, tools=("SEM1",), targets={"T45": 45.0, "T90": 90.0}, offsets={"SEM1": 0.6})
    reference = pl.DataFrame({"target": ["T45"], "reference_nm": [45.0]})
    got = evaluate_monitor_health(frame, reference=reference, settings=MonitorSettings(baseline_days=5))
    t45 = got.filter(pl.col("target") == "T45")
    assert t45["reference_source"].unique().to_list() == ["reference"]
    np.testing.assert_allclose(t45["bias_nm"].to_numpy(), t45["mean_nm"].to_numpy() - 45.0)
    assert t45["bias_nm"].mean() == pytest.approx(0.6, abs=0.15)
    t90 = got.filter(pl.col("target") == "T90")
    assert t90["reference_source"].unique().to_list() == ["baseline"]
    np.testing.assert_allclose(
        t90["bias_nm"].to_numpy(), (t90["mean_nm"] - t90["baseline_mean_nm"]).to_numpy()
    )


def test_monitor_single_baseline_day_leaves_ewma_empty():
    frame = _fleet(12, days=3, tools=("SEM1",), targets={"T45": 45.0})
    got = evaluate_monitor_health(frame, settings=MonitorSettings(baseline_days=1))
    assert got["ewma_nm"].null_count() == 3
    assert not got["ewma_signal"].any()
    assert got["s_ucl"].null_count() == 0  # the S chart needs only the repeats of one day


def test_monitor_accepts_measured_at_timestamps():
    frame = _fleet(6, days=5, tools=("SEM1",), targets={"T45": 45.0})
    stamped = frame.with_columns(
        (
            pl.col("day").cast(pl.Datetime("us", "UTC"))
            + pl.duration(hours=6)
            + pl.duration(minutes=pl.col("repeat"))
        ).alias("measured_at")
    ).drop("day")
    a = evaluate_monitor_health(frame, settings=MonitorSettings(baseline_days=3))
    b = evaluate_monitor_health(stamped, settings=MonitorSettings(baseline_days=3))
    assert a.equals(b)


def test_fleet_offsets_match_explicit_welch_computation():
    daily = summarise_monitor_days(_fleet(7, days=3, offsets={"SEM2": 0.5}, repeats=4))
    # one tool misses a day: T varies between days
    daily = daily.filter(~((pl.col("tool") == "SEM4") & (pl.col("day") == dt.date(2024, 3, 2))))
    got = estimate_fleet_offsets(daily, confidence=0.9)
    for (target, day), part in daily.group_by("target", "day"):
        m, s, n = (part[c].to_numpy().astype(float) for c in ("mean_nm", "sd_nm", "n"))
        T = len(m)
        v = s**2 / n
        for i, tool in enumerate(part["tool"]):
            c = np.full(T, -1.0 / T)
            c[i] += 1.0
            off, var = c @ m, np.sum(c**2 * v)
            dof = var**2 / np.sum((c**2 * v) ** 2 / (n - 1))  # Welch-Satterthwaite
            q = stats.t.ppf(0.95, dof)
            row = got.filter((pl.col("tool") == tool) & (pl.col("target") == target) & (pl.col("day") == day))
            row = row.row(0, named=True)
            assert row["n_tools"] == T
            assert row["fleet_offset_nm"] == pytest.approx(off, abs=1e-12)
            assert row["fleet_offset_se"] == pytest.approx(np.sqrt(var), rel=1e-10)
            assert row["fleet_offset_df"] == pytest.approx(dof, rel=1e-10)
            assert row["fleet_offset_lo"] == pytest.approx(off - q * np.sqrt(var), rel=1e-9)


def test_fleet_offsets_single_tool_has_no_interval():
    daily = summarise_monitor_days(_fleet(8, days=2, tools=("SEM1",)))
    got = estimate_fleet_offsets(daily)
    assert got["fleet_offset_nm"].to_list() == [0.0] * got.height
    assert got["fleet_offset_lo"].null_count() == got.height


def test_fleet_matching_recovers_offset_and_gain():
    frame = _fleet(9, days=30, offsets={"SEM2": 0.8}, gains={"SEM3": 1.02})
    daily = summarise_monitor_days(frame)
    got = estimate_fleet_matching(daily).sort("tool")
    sem2 = got.filter(pl.col("tool") == "SEM2").row(0, named=True)
    # the fleet mean holds SEM2's own 0.8 nm (1/4 of it) and SEM3's gain error 0.02 x feature size
    expected = 0.8 * (1 - 1 / 4) - 0.02 * np.mean([32.0, 45.0, 90.0]) / 4
    assert sem2["offset_lo"] < expected < sem2["offset_hi"]
    assert sem2["offset_lo"] > 0.0
    sem3 = got.filter(pl.col("tool") == "SEM3").row(0, named=True)
    assert sem3["slope_lo"] > 1.0
    assert sem3["n_targets"] == 3
    # slope oracle: scipy.stats.linregress on the per-target means
    fleet = estimate_fleet_offsets(daily).filter(pl.col("tool") == "SEM3")
    per_target = (
        fleet.group_by("target").agg(pl.col("fleet_mean_nm").mean(), pl.col("mean_nm").mean()).sort("target")
    )
    ref = stats.linregress(per_target["fleet_mean_nm"].to_numpy(), per_target["mean_nm"].to_numpy())
    assert sem3["slope"] == pytest.approx(ref.slope, rel=1e-10)
    assert sem3["slope_se"] == pytest.approx(ref.stderr, rel=1e-8)
    assert sem3["intercept_nm"] == pytest.approx(ref.intercept, rel=1e-8, abs=1e-9)
    # offset oracle: mean and t interval of the per-day (target-averaged) offsets
    sem2_days = (
        estimate_fleet_offsets(daily)
        .filter(pl.col("tool") == "SEM2")
        .group_by("day")
        .agg(pl.col("fleet_offset_nm").mean())["fleet_offset_nm"]
        .to_numpy()
    )
    ci = stats.ttest_1samp(sem2_days, 0.0).confidence_interval(0.95)
    assert (sem2["offset_lo"], sem2["offset_hi"]) == pytest.approx((ci.low, ci.high), rel=1e-9)


def test_fleet_matching_ignores_targets_not_shared_by_every_tool():
    frame = _fleet(10, days=5)
    extra = _fleet(11, days=5, tools=("SEM1",), targets={"T20": 20.0})
    got = estimate_fleet_matching(summarise_monitor_days(pl.concat([frame, extra])))
    assert got["n_targets"].to_list() == [3, 3, 3, 3]
