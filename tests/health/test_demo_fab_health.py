"""The weekly review on the demo fab names the tools its injected faults made unhealthy (ground truth).

The truth is the demo's fault list (``DemoData.faults``), the same records ``truth.json`` is written from.
"""

from __future__ import annotations

import polars as pl


def _fault(data, kind):
    return next(f for f in data.faults if f.kind == kind)


def test_weekly_health_demo_default_week_is_the_last_week_with_data(demo_fab, demo_health):
    _, data = demo_fab
    last = data.measurements["measured_at"].max()
    iso = last.isocalendar()  # ISO 8601 week of the newest measurement (Python's calendar)
    assert demo_health.week.label == f"{iso[0]}-W{iso[1]:02d}"


def test_weekly_health_demo_names_the_drifting_cdsem(demo_fab, demo_health):
    drift = _fault(demo_fab[1], "metrology_drift")
    card = demo_health.cdsem.filter(pl.col("monitor_status") == "drift")
    assert card["tool"].to_list() == [drift.metrology_tool]
    # the drift is downward in truth (negative magnitude) and in the fitted rate
    assert drift.magnitude < 0 and card["drift_rate_nm_per_day"][0] < 0
    assert any(
        a.startswith(f"CD-SEM {drift.metrology_tool}: monitor drifting") for a in demo_health.attention
    )


def test_weekly_health_demo_names_the_offset_cdsem_with_its_step(demo_fab, demo_health):
    off = _fault(demo_fab[1], "metrology_offset")
    row = demo_health.cdsem.filter(pl.col("tool") == off.metrology_tool).row(0, named=True)
    assert row["monitor_status"] == "step" and row["offset_flag"]
    # step size within 0.3 nm of the injected offset; the step day is the fault's start day or the next run
    assert abs(row["step_nm"] - off.magnitude) < 0.3
    assert 0 <= (row["step_day"] - off.start.date()).days <= 1
    stepped = demo_health.cdsem.filter(pl.col("monitor_status") == "step")["tool"].to_list()
    assert stepped == [off.metrology_tool]


def test_weekly_health_demo_names_the_inspection_tool_whose_capture_fell(demo_fab, demo_health):
    loss = _fault(demo_fab[1], "capture_loss")
    fell = demo_health.inspection.filter(pl.col("capture_fell"))["tool"].to_list()
    assert fell == [loss.inspection_tool]


def test_weekly_health_demo_worst_ooc_chamber_is_a_faulty_chamber(demo_fab, demo_health):
    _, data = demo_fab
    wk = demo_health.week
    active = {
        (f.process_tool, f.chamber)
        for f in data.faults
        if f.kind in ("chamber_shift", "slow_drift") and f.start < wk.end and f.end > wk.start
    }
    worst = (
        demo_health.process.filter(pl.col("ooc_rate").is_not_null())
        .sort("ooc_rate", descending=True)
        .row(0, named=True)
    )
    assert (worst["process_tool"], worst["chamber"]) in active


def test_weekly_report_demo_names_the_unhealthy_tools(demo_fab, demo_report):
    _, data = demo_fab
    text = demo_report.read_text(encoding="utf-8")
    for kind, attr in (
        ("metrology_drift", "metrology_tool"),
        ("metrology_offset", "metrology_tool"),
        ("capture_loss", "inspection_tool"),
    ):
        assert getattr(_fault(data, kind), attr) in text
    assert "Process chamber" in text and "OOC rate" in text
