"""charts.py without Streamlit: figure traces, limits and the drill-down keys of a selection event."""

from __future__ import annotations

from datetime import datetime, timedelta

import polars as pl
import pytest

from dashboard import charts
from dashboard.charts import PointRef, selected_points

T = datetime(2026, 9, 1)


def _points(n: int = 6, *, version_change_at: int | None = None) -> pl.DataFrame:
    center = [45.0 if version_change_at is None or i < version_change_at else 46.0 for i in range(n)]
    return pl.DataFrame({
        "seq": list(range(1, n + 1)), "point_key": [f"L{i}|W{i}" for i in range(n)], "lot_id": [f"L{i}" for i in range(n)],
        "wafer_id": [f"W{i}" for i in range(n)], "point_at": [T + timedelta(hours=i) for i in range(n)],
        "value": [45.0 + 0.1 * i for i in range(n)], "center": center, "sigma": [0.5] * n,
        "lcl": [c - 1.5 for c in center], "ucl": [c + 1.5 for c in center], "limit_version": [1] * n,
        "metrology_tool": ["CD1", "CD2"] * (n // 2),
    })  # fmt: skip


def _trace(fig, name):
    return [t for t in fig.data if t.name == name]


def test_control_chart_points_carry_drilldown_keys_in_customdata():
    fig = charts.control_chart(_points())
    pts = fig.data[0]
    assert list(pts.y) == pytest.approx([45.0, 45.1, 45.2, 45.3, 45.4, 45.5])
    assert [tuple(c) for c in pts.customdata][0] == ("L0", "W0", "L0|W0")
    assert fig.layout.meta["point_traces"] == 1


def test_control_chart_limits_follow_the_version_in_force_as_steps():
    fig = charts.control_chart(_points(version_change_at=3))
    ucl, lcl = _trace(fig, "control limits")
    assert list(ucl.y) == [46.5] * 3 + [47.5] * 3
    assert list(lcl.y) == [43.5] * 3 + [44.5] * 3
    assert ucl.line.shape == "hv"
    assert list(_trace(fig, "centre")[0].y) == [45.0] * 3 + [46.0] * 3


def test_control_chart_zone_bands_only_when_a_zone_rule_applies():
    assert not [t for t in charts.control_chart(_points(), rules=["we1"]).data if t.legendgroup == "zones"]
    bands = [
        t for t in charts.control_chart(_points(), rules=["we1", "we2"]).data if t.legendgroup == "zones"
    ]
    # 1 and 2 sigma either side of the centre line (zones C and B, Western Electric handbook 1956)
    assert sorted(round(b.y[0], 9) for b in bands) == [44.0, 44.5, 45.5, 46.0]


def test_control_chart_spec_limits_and_signals_by_rule():
    sig = pl.DataFrame({"point_key": ["L5|W5", "L4|W4"], "lot_id": ["L5", "L4"], "wafer_id": ["W5", "W4"],
                        "point_at": [T + timedelta(hours=5), T + timedelta(hours=4)], "rule": ["we1", "we2"],
                        "value": [45.5, 45.4]})  # fmt: skip
    fig = charts.control_chart(_points(), sig, spec={"lsl": 40.5, "target": 45.0, "usl": 49.5})
    spec = _trace(fig, "spec limits")
    assert sorted(t.y[0] for t in spec) == [40.5, 49.5]
    assert _trace(fig, "target")[0].y[0] == 45.0
    we1, we2 = _trace(fig, "signal we1")[0], _trace(fig, "signal we2")[0]
    assert list(we1.y) == [45.5] and we1.marker.symbol == "x"
    assert list(we2.y) == [45.4] and we2.marker.symbol == "triangle-up"
    assert tuple(we1.customdata[0]) == ("L5", "W5", "L5|W5")


def test_control_chart_out_of_spec_mark_names_the_value_beyond_the_spec():
    # a wafer mean inside the spec lines is flagged when one of its sites is outside: the hover says which
    sig = pl.DataFrame({"point_key": ["L5|W5", "L4|W4"], "lot_id": ["L5", "L4"], "wafer_id": ["W5", "W4"],
                        "point_at": [T + timedelta(hours=5), T + timedelta(hours=4)], "rule": ["oos", "we1"],
                        "value": [45.5, 45.4], "statistic": [40.21, None]})  # fmt: skip
    fig = charts.control_chart(_points(), sig, spec={"lsl": 40.5, "usl": 49.5})
    oos, we1 = _trace(fig, "signal oos")[0], _trace(fig, "signal we1")[0]
    assert list(oos.text) == ["40.21"] and "value beyond spec: %{text}" in oos.hovertemplate
    assert we1.text is None and "beyond spec" not in we1.hovertemplate
    assert tuple(oos.customdata[0]) == ("L5", "W5", "L5|W5")  # the drill-down keys are unchanged


def test_control_chart_split_gives_one_point_trace_per_value():
    fig = charts.control_chart(_points(), split="metrology_tool")
    assert [t.name for t in fig.data[:2]] == ["CD1", "CD2"]
    assert fig.layout.meta["point_traces"] == 2
    assert [c[0] for c in fig.data[1].customdata] == ["L1", "L3", "L5"]


def test_control_chart_empty_frame_gives_a_blank_figure_that_says_so():
    fig = charts.control_chart(_points().head(0))
    assert fig.layout.annotations[0].text == "No points in this window."


def test_wafer_map_uses_uniform_scale_and_a_150_mm_outline():
    sites = pl.DataFrame(
        {"site_id": ["1", "2"], "x_mm": [0.0, 100.0], "y_mm": [0.0, -50.0], "value": [45.0, 46.0]}
    )
    fig = charts.wafer_map(sites, unit="nm")
    circle = fig.layout.shapes[0]
    assert (circle.type, circle.x0, circle.x1, circle.y0, circle.y1) == ("circle", -150, 150, -150, 150)
    assert fig.data[0].marker.colorscale[0][1].lower() == "#440154"  # viridis starts at #440154 (matplotlib)
    assert fig.layout.yaxis.scaleanchor == "x"
    assert list(fig.data[0].marker.color) == [45.0, 46.0]


def test_defect_map_colours_by_class_on_the_wafer_outline():
    d = pl.DataFrame(
        {"x_mm": [1.0, 2.0, 3.0], "y_mm": [0.0, 0.0, 0.0], "defect_class": ["scratch", "particle", None]}
    )
    fig = charts.defect_map(d)
    assert [t.name for t in fig.data] == ["(unclassified)", "particle", "scratch"]
    assert fig.layout.shapes[0].x1 == 150


def test_radial_profile_and_zone_means_plot_the_given_columns():
    sites = pl.DataFrame({"r_mm": [0.0, 70.0], "value": [45.0, 45.2]})
    assert list(charts.radial_profile(sites).data[0].x) == [0.0, 70.0]
    zones = pl.DataFrame(
        {"zone": ["centre", "edge"], "n_sites": [1, 4], "mean": [45.0, 45.6], "sd": [None, 0.2]}
    )
    dots = charts.zone_means_chart(zones).data[0]
    assert list(dots.x) == ["centre", "edge"] and list(dots.text) == ["n=1", "n=4"]
    assert list(dots.y) == [45.0, 45.6] and list(dots.error_y.array) == [0.0, 0.2]


def test_ooc_grid_leaves_cells_without_counts_blank():
    grid = pl.DataFrame({"tool": ["T1", "T2"], "layer": ["A", "B"], "signals": [3, 1]})
    heat = charts.ooc_grid(grid).data[0]
    assert list(heat.x) == ["A", "B"] and list(heat.y) == ["T1", "T2"]
    assert [list(r) for r in heat.text] == [["3", ""], ["", "1"]]


def test_ewma_and_cusum_panels_plot_engine_columns():
    e = pl.DataFrame({"point_at": [T, T + timedelta(hours=1)], "ewma": [45.0, 45.2], "ewma_lcl": [44.0, 43.9],
                      "ewma_ucl": [46.0, 46.1], "center": [45.0, 45.0], "ewma_signal": [False, True]})  # fmt: skip
    fig = charts.ewma_chart(e)
    assert list(fig.data[0].y) == [45.0, 45.2]
    assert list(_trace(fig, "signal ewma")[0].y) == [45.2]
    c = pl.DataFrame({"point_at": [T], "cusum_hi": [1.5], "cusum_lo": [0.5]})
    fig = charts.cusum_chart(c, h=5.0)
    assert list(fig.data[1].y) == [-0.5]
    assert sorted(t.y[0] for t in _trace(fig, "decision interval ±h")) == [-5.0, 5.0]


# ------------------------------------------------------------------------------------------ selection


def test_selected_points_reads_customdata_of_a_click():
    event = {"points": [{"curve_number": 0, "point_index": 3, "x": "2026-09-01 05:30", "y": 45.3,
                         "customdata": ["L3", "W3", "L3|W3"]}], "point_indices": [3], "box": [], "lasso": []}  # fmt: skip
    assert selected_points(event) == [PointRef("L3", "W3", "L3|W3")]


def test_selected_points_box_selection_keeps_order_and_drops_duplicates():
    event = {"points": [{"customdata": ["L2", "W2", "k2"]}, {"customdata": ["L1", None, ""]},
                        {"customdata": ["L2", "W2", "k2"]}], "box": [{"x": [0, 1], "y": [0, 1]}]}  # fmt: skip
    assert selected_points(event) == [PointRef("L2", "W2", "k2"), PointRef("L1", None, None)]


@pytest.mark.parametrize(
    "event",
    [None, {}, {"points": []}, {"points": [{"x": 1, "y": 2}]}, {"points": [{"customdata": None}]},
     {"points": [{"customdata": [None, "W1"]}]}, {"points": ["not a dict"]}],
)  # fmt: skip
def test_selected_points_without_keys_selects_nothing(event):
    assert selected_points(event) == []


def test_accuracy_figure_draws_each_reading_and_the_fit_as_the_difference_to_the_reference():
    from dashboard import health_charts

    # SEM-A reads 1 nm high with slope 1; SEM-B reads 2 % low (slope 0.98, no offset)
    pairs = pl.DataFrame({
        "tool": ["SEM-A", "SEM-A", "SEM-B", "SEM-B"], "reference_method": ["afm"] * 4,
        "reference": [30.0, 90.0, 30.0, 90.0], "measured": [31.0, 91.0, 29.4, 88.2],
        "fit_slope": [1.0, 1.0, 0.98, 0.98], "fit_offset_nm": [1.0, 1.0, 0.0, 0.0],
    })  # fmt: skip
    fig = health_charts.accuracy_figure(pairs)
    a_pts, a_fit, b_pts, b_fit = fig.data
    assert list(a_pts.y) == pytest.approx([1.0, 1.0]) and list(b_pts.y) == pytest.approx([-0.6, -1.8])
    assert list(a_fit.y) == pytest.approx([1.0, 1.0]) and list(b_fit.y) == pytest.approx([-0.6, -1.8])
    assert fig.layout.shapes[0].y0 == 0.0  # the zero line: no bias
