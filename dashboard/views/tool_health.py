"""Tool health: the weekly scorecards of CD-SEMs, inspection tools and process chambers, with their charts."""

from __future__ import annotations

import streamlit as st

from dashboard import data, health_charts, report, widgets


def main() -> None:
    st.title("Tool health")
    weeks, _ = data.weekly_health(None)
    if not weeks:
        widgets.nothing("No measurements or inspections in the warehouse yet.")
    week = widgets.choice("Week", weeks, key="week", default=weeks[0])
    _, h = data.weekly_health(week)
    st.caption(
        f"{h.week.start:%Y-%m-%d} to {h.week.end:%Y-%m-%d} (UTC, end exclusive); compared with "
        f"{h.previous.label}."
    )
    for text in h.cautions:
        st.caption(":warning: " + text)
    st.subheader("Needs a look")
    if h.attention:
        st.markdown("\n".join(f"- {a}" for a in h.attention))
    else:
        st.info("No tool flagged this week.")
    for note in h.notes:
        st.caption(note)

    cd, ins, proc, changes = st.tabs(["CD-SEMs", "Inspection tools", "Process chambers", "What changed"])
    with cd:
        st.dataframe(report.scorecard_frame(h.cdsem, report.CDSEM_COLUMNS), hide_index=True, key="cdsem_card")
        st.caption("P/T per measured layer (6 sigma / (USL - LSL): < 0.1 good, <= 0.3 acceptable).")
        st.dataframe(report.scorecard_frame(h.cdsem_pt, report.PT_COLUMNS), hide_index=True, key="cdsem_pt")
        st.plotly_chart(health_charts.monitor_figure(h.monitor_daily), key="monitor_fig")
        st.plotly_chart(health_charts.fleet_offset_figure(h.cdsem), key="offset_fig")
        st.plotly_chart(health_charts.repeat_sd_figure(h.monitor_daily), key="sd_fig")
        st.plotly_chart(health_charts.shrink_figure(h.repeat_means), key="shrink_fig")
        st.plotly_chart(health_charts.accuracy_figure(h.accuracy_pairs), key="accuracy_fig")
    with ins:
        st.dataframe(
            report.scorecard_frame(h.inspection, report.INSPECTION_COLUMNS),
            hide_index=True,
            key="inspection_card",
        )
        st.plotly_chart(health_charts.capture_trend_figure(h.capture_trend), key="capture_fig")
    with proc:
        st.dataframe(
            report.scorecard_frame(h.process, report.PROCESS_COLUMNS), hide_index=True, key="process_card"
        )
        st.plotly_chart(health_charts.ooc_rate_figure(h.process), key="ooc_fig")
    with changes:
        st.caption(f"Control limits frozen this week: {h.limit_changes.height}")
        st.dataframe(
            report.scorecard_frame(h.limit_changes, report.LIMIT_COLUMNS), hide_index=True, key="limits"
        )
        st.caption(f"New excursions: {h.new_excursions.height}")
        st.dataframe(
            report.scorecard_frame(h.new_excursions, report.NEW_EXCURSION_COLUMNS),
            hide_index=True,
            key="new_exc",
        )
        st.caption(f"Dispositions closed: {h.closed_dispositions.height}")
        st.dataframe(
            report.scorecard_frame(h.closed_dispositions, report.CLOSED_COLUMNS),
            hide_index=True,
            key="closed",
        )


main()
