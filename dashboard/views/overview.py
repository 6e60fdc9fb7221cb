"""Line overview: the morning check. Open excursions by severity, the tool × layer out-of-control grid for
the chosen window, the newest signals, and tools that stopped reporting."""

from __future__ import annotations

from datetime import timedelta

import polars as pl
import streamlit as st

from dashboard import charts, data, widgets
from warehouse import queries

WINDOWS = (1, 3, 7, 14, 30, 90)
TOOL_KEYS = {"process_tool": "process tool", "chamber": "chamber", "metrology_tool": "metrology tool"}
SEVERITIES = ("critical", "high", "medium", "low")
STALE_AFTER_H = (4, 8, 12, 24, 48, 72)


def main() -> None:
    st.title("Line overview")
    extent = data.load_one("data_time_range")
    last_at = extent["last_at"][0] if extent.height else None
    if last_at is None:
        widgets.nothing("The warehouse holds no measurements or inspections yet.")

    left, mid, right = st.columns(3)
    days = widgets.choice("Window (days)", WINDOWS, key="days", default=7, container=left)
    tool_key = widgets.choice("Grid rows", list(TOOL_KEYS), key="by", default="process_tool",
                              format_func=TOOL_KEYS.get, container=mid)  # fmt: skip
    stale_h = widgets.choice("Stale after (hours)", STALE_AFTER_H, key="stale", default=24, container=right)
    start = last_at - timedelta(days=int(days))
    st.caption(f"Window: {start:%Y-%m-%d %H:%M} to {last_at:%Y-%m-%d %H:%M} UTC (ends at the newest data).")

    frames = data.load(
        {
            "severity": ("open_excursions_by_severity", {}),
            "grid": (
                "ooc_by_tool_layer",
                {"start": start, "end": last_at + timedelta(seconds=1), "tool_key": tool_key},
            ),
            "newest": ("newest_signals", {"limit": 50, "since": start}),
            "fresh": ("tool_freshness", {"now": last_at, "stale_after_h": float(stale_h)}),
        }
    )

    st.subheader("Open excursions by severity")
    sev = frames["severity"]
    counts = {r["severity"]: r for r in sev.iter_rows(named=True)}
    cols = st.columns(len(SEVERITIES))
    for col, name in zip(cols, SEVERITIES, strict=True):
        row = counts.get(name)
        col.metric(name.capitalize(), row["total"] if row else 0,
                   help=(f"open {row['open']}, acknowledged {row['acknowledged']}" if row else "none open"))  # fmt: skip
    st.page_link(widgets.PAGES["excursions"], label="All open excursions", icon=":material/arrow_forward:",
                 query_params={"state": "open"})  # fmt: skip

    st.subheader(f"Out-of-control points by {TOOL_KEYS[tool_key]} and layer")
    st.plotly_chart(charts.ooc_grid(frames["grid"], value="signals"), key="ooc_grid", width="stretch")
    if frames["grid"].filter(pl.col("tool") == queries.NOT_SPLIT).height:
        st.caption(f"Row {queries.NOT_SPLIT}: signals of charts whose series are not split by "
                   f"{TOOL_KEYS[tool_key]}; they are not counted in the rows above it.")  # fmt: skip

    st.subheader("Newest signals")
    newest = frames["newest"]
    if newest.height == 0:
        st.info("No signals in this window.")
    else:
        newest = newest.with_columns(
            pl.col("lot_id").map_elements(lambda v: widgets.page_url("lot", lot=v), return_dtype=pl.String).alias("open lot"),
            pl.col("series_id").map_elements(lambda v: widgets.page_url("chart", series=v), return_dtype=pl.String)
            .alias("open chart"),
        )  # fmt: skip
        # the links first: the table is wider than the page
        cols = ["open lot", "open chart", "point_at", "lot_id", "wafer_id", "layer", "parameter", "process_tool",
                "chamber", "metrology_tool", "rule", "value", "severity", "excursion_id", "first_detected_at"]  # fmt: skip
        widgets.table(
            newest,
            columns=widgets.non_empty(newest, cols),
            key="newest_signals",
            **{
                "open lot": st.column_config.LinkColumn("open lot", display_text="lot"),
                "open chart": st.column_config.LinkColumn("open chart", display_text="chart"),
            },
        )
    widgets.caution("signals")

    st.subheader("Data freshness")
    fresh = frames["fresh"]
    if fresh.height == 0:
        st.info("No tool has reported data yet.")
    else:
        stale = fresh.filter(pl.col("stale"))
        if stale.height:
            st.warning(f"{stale.height} tool(s) stopped reporting: " + ", ".join(stale["tool"].to_list()))
        else:
            st.success("Every tool reported within the stale limit.")
        widgets.table(fresh, key="freshness")


main()
