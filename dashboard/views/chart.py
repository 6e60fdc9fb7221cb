"""Chart: one series in depth. Points coloured by split, centre line, control and spec limits, zone bands
where run rules apply, signals by rule, EWMA and CUSUM panels, and the limit version with its baseline.
Clicking a point opens its lot."""

from __future__ import annotations

import json
from datetime import timedelta

import polars as pl
import streamlit as st

from dashboard import charts, data, widgets
from warehouse.plan import CHART_PARAMS

WINDOWS = (0, 7, 30, 90, 180, 365)


def _json(text: str | None, default):
    try:
        value = json.loads(text) if text else default
    except ValueError:
        return default
    return value if isinstance(value, type(default)) else default


def main() -> None:
    st.title("Chart")
    series = data.load_one("series_info")
    if series.height == 0:
        widgets.nothing("No series yet: load a monitoring plan and run an evaluation first.")

    wanted = widgets.int_param("series")
    known = set(series["series_id"].to_list())
    if widgets.param("series") is not None and wanted not in known:
        widgets.not_found("Series", widgets.param("series"))
    default_chart = series.filter(pl.col("series_id") == wanted)["chart"][0] if wanted in known else None

    c1, c2, c3 = st.columns([2, 4, 1])
    chart_names = sorted(set(series["chart"].to_list()))
    chart = widgets.choice("Plan entry", chart_names, key="chart", default=default_chart, container=c1)
    rows = {r["series_id"]: r for r in series.filter(pl.col("chart") == chart).iter_rows(named=True)}
    series_id = widgets.choice("Series", list(rows), key="series", default=wanted,
                               format_func=lambda sid: widgets.series_label(rows[sid]), container=c2)  # fmt: skip
    days = widgets.choice("Days (0 = all)", WINDOWS, key="days", default=0, container=c3)
    info = rows[series_id]

    frames = data.load(
        {
            "points": ("series_points", {"series_id": series_id}),
            "signals": ("series_signals", {"series_id": series_id, "include_withdrawn": False}),
            "limits": ("series_limits", {"series_id": series_id}),
            "plan": ("series_plan", {"series_id": series_id}),
            "spec": ("series_spec", {"series_id": series_id, "at": info["last_point_at"]}),
        }
    )
    all_points, signals, limits, plan = frames["points"], frames["signals"], frames["limits"], frames["plan"]
    points = all_points
    plan_row = plan.row(0, named=True) if plan.height else {}
    rules = _json(plan_row.get("rules_json"), [])
    params = _json(plan_row.get("params_json"), {})
    spec = frames["spec"].row(0, named=True) if frames["spec"].height else None
    unit = (spec or {}).get("unit") or ""

    if points.height == 0:
        widgets.nothing("This series has no current points.")
    if days:
        since = points["point_at"].max() - timedelta(days=int(days))
        points = points.filter(pl.col("point_at") >= since)
        signals = signals.filter(pl.col("point_at") >= since)

    split_cols = [
        c for c in ("process_tool", "chamber", "metrology_tool", "limit_version") if c in points.columns
    ]
    split = (
        widgets.choice("Colour points by", ["(none)", *split_cols], key="color", default="(none)")
        if split_cols
        else None
    )
    split = None if split in (None, "(none)") else split

    title = f"{info['chart']}: {widgets.series_label(info)} ({plan_row.get('statistic', '')}, {plan_row.get('chart_type', '')})"
    fig = charts.control_chart(points, signals, spec=spec, rules=rules, split=split, title=title, unit=unit)
    event = st.plotly_chart(fig, key="control_chart", on_select="rerun", selection_mode=("points", "box"),
                            width="stretch")  # fmt: skip
    picked = charts.selected_points(event.selection if event else None)
    st.caption(
        "Click a point (or box-select points) to open its lot. Rules: " + (", ".join(rules) or "none listed")
    )
    if picked:
        ref = picked[0]
        st.switch_page(widgets.PAGES["lot"], query_params={k: v for k, v in
                       {"lot": ref.lot_id, "wafer": ref.wafer_id, "series": series_id, "layer": info["layer"],
                        "parameter": info["parameter"]}.items() if v is not None})  # fmt: skip

    # EWMA and CUSUM panels use the entry's own design when it is an EWMA or CUSUM chart, else the defaults.
    chart_type = plan_row.get("chart_type")
    ewma_p = {**CHART_PARAMS["ewma"], **(params if chart_type == "ewma" else {})}
    cusum_p = {**CHART_PARAMS["cusum"], **(params if chart_type == "cusum" else {})}
    ewma, cusum = data.series_drift(
        all_points,
        series_id, lam=ewma_p["lambda"], L=ewma_p["L"], limits=ewma_p["limits"], k=cusum_p["cusum_k"],
        h=cusum_p["h"], headstart=cusum_p["headstart"],
    )  # fmt: skip
    if days and ewma.height:
        ewma = ewma.filter(pl.col("point_at") >= since)
        cusum = cusum.filter(pl.col("point_at") >= since)
    e_col, c_col = st.columns(2)
    e_col.plotly_chart(charts.ewma_chart(ewma, title=f"EWMA (λ = {ewma_p['lambda']:g}, L = {ewma_p['L']:g})"),
                       key="ewma_chart", width="stretch")  # fmt: skip
    c_col.plotly_chart(charts.cusum_chart(cusum, h=float(cusum_p["h"]),
                                          title=f"CUSUM (k = {cusum_p['cusum_k']:g}, h = {cusum_p['h']:g})"),
                       key="cusum_chart", width="stretch")  # fmt: skip

    st.subheader("Control limits")
    current = limits.filter(pl.col("current")) if limits.height else limits
    if current.height:
        lim = current.row(0, named=True)
        m = st.columns(5)
        m[0].metric("Limit version", lim["version"])
        m[1].metric("Centre", f"{lim['center']:.4g}")
        m[2].metric("Sigma", f"{lim['sigma']:.4g}", help=f"{lim['sigma_level']} level, {lim['sigma_source']}")
        m[3].metric("LCL", "—" if lim["lcl"] is None else f"{lim['lcl']:.4g}")
        m[4].metric("UCL", "—" if lim["ucl"] is None else f"{lim['ucl']:.4g}")
        st.caption(
            f"Baseline: {lim['baseline_n']} points from {lim['baseline_from']} to {lim['baseline_to']}; "
            f"frozen {lim['frozen_at']} by {lim['frozen_by']} ({lim['reason']})."
        )
        if lim["n_ref"] is not None:
            st.caption(widgets.defect_limits_note(lim))
    else:
        st.info("No frozen limits for this series yet.")
    if spec:
        st.caption(
            f"Spec limits ({spec['product']}): LSL {spec['lsl']}, target {spec['target']}, USL {spec['usl']} {unit}"
        )
    with st.expander("Limit history"):
        widgets.table(limits, key="limit_history")
    with st.expander("Signals of this series"):
        widgets.table(signals, columns=["point_at", "lot_id", "wafer_id", "rule", "value", "statistic",
                                        "limit_version", "severity", "excursion_id", "first_detected_at"],
                      key="series_signals")  # fmt: skip
    widgets.caution("signals")


main()
