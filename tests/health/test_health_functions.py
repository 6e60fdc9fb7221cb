"""warehouse.health on a small warehouse built here, against values computed independently in the test."""

from __future__ import annotations

from datetime import date, datetime, timedelta

import numpy as np
import polars as pl
import pytest
from scipy import stats

from tests.health.demo_warehouse import insert_frame
from warehouse import health, schema, store
from warehouse.errors import ConfigError

T0 = datetime(2026, 11, 2)  # a Monday: ISO week 2026-W45 (checked with date.isocalendar below)
TOOLS = {"SEM-A": 0.0, "SEM-B": 0.0, "SEM-C": 1.0}  # SEM-C reads 1 nm high from the first day
DAYS, SITES, REPEATS = 28, 2, 3
PLACED = 240


@pytest.fixture(scope="module")
def small_db(tmp_path_factory):
    rng = np.random.default_rng(2026)
    rows, insp, prod = [], [], []
    for d in range(DAYS):
        for t, off in TOOLS.items():
            day_effect = rng.normal(0, 0.05)
            for s in range(1, SITES + 1):
                for r in range(1, REPEATS + 1):
                    rows.append(
                        dict(
                            lot_id="MON",
                            wafer_id="MON-01",
                            site_id=str(s),
                            product="ENG",
                            layer="MON",
                            stage="etch",
                            parameter="cd_mid",
                            feature="M45",
                            value=round(45.0 + off + 0.2 * s + day_effect + rng.normal(0, 0.2), 4),
                            unit="nm",
                            measured_at=T0 + timedelta(days=d, hours=6, minutes=10 * s + r),
                            metrology_tool=t,
                            repeat=r,
                            sample_kind="monitor",
                        )
                    )
            prod.append(
                dict(
                    lot_id=f"L{d:02d}{t[-1]}",
                    wafer_id=f"L{d:02d}{t[-1]}.1",
                    site_id="1",
                    product="P1",
                    layer="L1",
                    stage="etch",
                    parameter="cd_mid",
                    feature=None,
                    value=40.0,
                    unit="nm",
                    measured_at=T0 + timedelta(days=d, hours=9),
                    metrology_tool=t,
                    repeat=1,
                    sample_kind="production",
                )
            )
        for tool, found in (("INS-1", 228), ("INS-2", 228 if d < 21 else 190)):
            insp.append(
                dict(
                    lot_id="STD",
                    wafer_id="STD-01",
                    product="ENG",
                    layer="STD",
                    inspection_tool=tool,
                    inspected_at=T0 + timedelta(days=d, hours=4),
                    inspected_area_cm2=679.0,
                    defect_count=found,
                    sample_kind="standard_defect",
                )
            )
    ref = pl.DataFrame(
        dict(
            feature=["F1", "F2", "F3", "F4"],
            layer="L1",
            parameter="cd_mid",
            reference_value=[30.0, 45.0, 60.0, 75.0],
            reference_uncertainty=0.4,
            unit="nm",
            reference_method="xsem_tem",
        )
    )
    refm = [
        dict(
            lot_id="REF",
            wafer_id="REF-01",
            site_id=f,
            product="ENG",
            layer="L1",
            stage="etch",
            parameter="cd_mid",
            feature=f,
            value=v + 0.5 + 0.1 * r,
            unit="nm",
            measured_at=T0 + timedelta(days=1, hours=12, minutes=r),
            metrology_tool="SEM-A",
            repeat=r,
            sample_kind="reference_feature",
        )
        for f, v in zip(["F1", "F2", "F3", "F4"], [30.0, 45.0, 60.0, 75.0], strict=True)
        for r in (1, 2)
    ]
    spec = pl.DataFrame(
        dict(
            product="*",
            layer="L1",
            parameter="cd_mid",
            lsl=36.0,
            target=40.0,
            usl=44.0,
            unit="nm",
            effective_from=datetime(2026, 1, 1),
        )
    )
    path = tmp_path_factory.mktemp("small") / "small.duckdb"
    with store.open_warehouse(path, create=True) as con, store.transaction(con):
        insert_frame(con, schema.MEASUREMENTS, pl.DataFrame(rows + prod + refm), file_id=1)
        insert_frame(con, schema.INSPECTIONS, pl.DataFrame(insp), file_id=2)
        insert_frame(con, schema.REFERENCE_VALUES, ref, file_id=3)
        insert_frame(con, schema.SPEC_LIMITS, spec, file_id=4)
    return path, pl.DataFrame(rows)


def test_parse_week_matches_iso_calendar():
    w = health.parse_week("2026-W48")
    assert w.start == datetime.combine(date.fromisocalendar(2026, 48, 1), datetime.min.time())  # ISO 8601
    assert w.end - w.start == timedelta(days=7)
    assert health.week_of(datetime(2027, 1, 1)).label == "2026-W53"  # 2026 has 53 ISO weeks (Python calendar)
    with pytest.raises(ConfigError, match="not an ISO week"):
        health.parse_week("2026-W60")


def test_weekly_health_default_week_and_monitor_rows(small_db):
    path, rows = small_db
    with store.open_warehouse(path, read_only=True) as con:
        assert health.latest_week(con).label == "2026-W48"  # T0 + 27 days = 2026-11-29, ISO week 48
        runs = health.monitor_runs(con, end=T0 + timedelta(days=DAYS))
    assert runs.height == rows.height
    assert sorted(runs["target"].unique()) == ["M45/1", "M45/2"]


def test_weekly_health_fleet_offset_and_repeatability_equal_direct_computation(small_db):
    path, rows = small_db
    h = health.read_weekly_health(path, week="2026-W48")
    wk = rows.filter(pl.col("measured_at") >= h.week.start).with_columns(
        pl.col("measured_at").dt.date().alias("day")
    )
    daily = wk.group_by("metrology_tool", "site_id", "day").agg(
        pl.col("value").mean().alias("m"), pl.col("value").var(ddof=1).alias("v")
    )
    daily = daily.with_columns((pl.col("m") - pl.col("m").mean().over("site_id", "day")).alias("off"))
    for tool in TOOLS:
        per_day = (
            daily.filter(pl.col("metrology_tool") == tool).group_by("day").agg(pl.col("off").mean())["off"]
        )
        x = per_day.to_numpy()
        half = stats.t.ppf(0.975, x.size - 1) * x.std(ddof=1) / np.sqrt(x.size)
        row = h.cdsem.filter(pl.col("tool") == tool).row(0, named=True)
        assert row["fleet_offset_nm"] == pytest.approx(x.mean(), abs=1e-9)
        assert row["fleet_offset_hi"] - row["fleet_offset_nm"] == pytest.approx(half, rel=1e-9)
        # repeatability: pooled within-day SD of repeats (equal n: root mean of the variances), NIST §2.4.4
        pooled = np.sqrt(daily.filter(pl.col("metrology_tool") == tool)["v"].mean())
        assert row["repeatability_nm"] == pytest.approx(pooled, rel=1e-9)
        # P/T = 6 sigma / (USL - LSL) against L1's spec (common practice)
        pt = h.cdsem_pt.filter(pl.col("tool") == tool).row(0, named=True)
        assert pt["p_to_t"] == pytest.approx(6 * row["reproducibility_nm"] / 8.0, rel=1e-12)
    assert h.cdsem.filter(pl.col("offset_flag"))["tool"].to_list() == ["SEM-C"]


def test_weekly_health_capture_rate_equals_exact_binomial_interval(small_db):
    path, _ = small_db
    h = health.read_weekly_health(
        path, week="2026-W48", settings=health.HealthSettings(standard_placed=PLACED)
    )
    row = h.inspection.filter(pl.col("tool") == "INS-2").row(0, named=True)
    ci = stats.binomtest(190 * 7, PLACED * 7).proportion_ci(0.95, method="exact")  # Clopper-Pearson (scipy)
    assert row["capture_rate"] == pytest.approx(190 / PLACED)
    assert (row["capture_lo"], row["capture_hi"]) == pytest.approx((ci.low, ci.high), rel=1e-9)
    assert row["baseline_capture"] == pytest.approx(228 / PLACED)
    assert h.inspection.filter(pl.col("capture_fell"))["tool"].to_list() == ["INS-2"]


def test_reference_pairs_average_repeats_per_feature(small_db):
    path, _ = small_db
    with store.open_warehouse(path, read_only=True) as con:
        pairs = health.reference_pairs(con, end=T0 + timedelta(days=DAYS))
    assert pairs["reference"].to_list() == [30.0, 45.0, 60.0, 75.0]
    assert pairs["measured"].to_list() == pytest.approx([30.65, 45.65, 60.65, 75.65])
    assert set(pairs["n_repeats"]) == {2}


def test_monitor_call_names_a_drift_or_step_only_where_that_shape_beats_a_constant_level():
    # EWMA signal days with the shape fit of the recent days (spc.shape: BIC of step, ramp and constant);
    # an EWMA signal over noise about a level is a "signal" of no clear shape, not a drift
    card = pl.DataFrame(
        {
            "tool": ["A", "B", "C", "D", "E", "F"],
            "monitor_days": [7, 7, 7, 7, 7, None],
            "ewma_signal_days": [3, 3, 3, 3, 0, None],
            "change_shape": ["ramp", "ramp", "step", "step", "ramp", None],
            "change_clear": [True, False, True, False, True, None],
            "drift_nm": [-0.6, 0.04, 1.2, 0.05, -0.6, None],
        }
    )
    flagged = health._flag_cdsems(card, health.HealthSettings())
    # F ran no monitor in the week (a tool that stopped reporting): not "ok"
    assert flagged["monitor_status"].to_list() == ["drift", "signal", "step", "signal", "ok", "no data"]


def test_attention_names_tool_level_charts_by_the_tool_not_as_a_chamber_called_all():
    # series split by process tool only fill the scorecard's chamber column with WHOLE_TOOL
    assert (
        health._chamber_name("ETCH-D", health.WHOLE_TOOL)
        == "Process tool ETCH-D (charts not split by chamber)"
    )
    assert health._chamber_name("ETCH-D", "CH1") == "Process chamber ETCH-D/CH1"
