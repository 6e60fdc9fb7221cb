"""Figure builders of the tool-health views: frame -> plotly figure, no Streamlit calls.

Shared by the dashboard page ``pages/tool_health.py`` and the static weekly report (``dashboard.report``).
Every number plotted comes from ``warehouse.health``; nothing is computed here beyond picking columns.
"""

from __future__ import annotations

import plotly.graph_objects as go
import polars as pl

__all__ = [
    "accuracy_figure",
    "capture_trend_figure",
    "fleet_offset_figure",
    "monitor_figure",
    "ooc_rate_figure",
    "repeat_sd_figure",
    "shrink_figure",
]

_LAYOUT = dict(
    template="plotly_white",
    height=360,
    margin=dict(l=60, r=20, t=50, b=50),
    legend=dict(orientation="h", y=-0.2),
)


def _empty(title: str, text: str = "No data for this week.") -> go.Figure:
    fig = go.Figure()
    fig.add_annotation(text=text, showarrow=False, x=0.5, y=0.5, xref="paper", yref="paper")
    fig.update_layout(title=title, xaxis_visible=False, yaxis_visible=False, **_LAYOUT)
    return fig


def monitor_figure(daily: pl.DataFrame) -> go.Figure:
    """Monitor-wafer daily mean and EWMA per CD-SEM, as deviation from each tool's baseline mean (nm)."""
    title = "Monitor wafer: deviation from baseline and EWMA per CD-SEM"
    if daily.height == 0:
        return _empty(title)
    fig = go.Figure()
    for tool, g in daily.sort("tool", "day").group_by("tool", maintain_order=True):
        name = tool[0]
        fig.add_trace(
            go.Scatter(
                x=g["day"],
                y=g["deviation_nm"],
                mode="markers",
                name=f"{name} daily",
                legendgroup=name,
                marker=dict(size=5, opacity=0.5),
            )
        )
        fig.add_trace(
            go.Scatter(
                x=g["day"], y=g["ewma_deviation_nm"], mode="lines", name=f"{name} EWMA", legendgroup=name
            )
        )
    lim = daily.group_by("day").agg(pl.col("ewma_limit_nm").mean()).sort("day")
    fig.add_trace(
        go.Scatter(
            x=lim["day"],
            y=lim["ewma_limit_nm"],
            mode="lines",
            name="EWMA limit (mean)",
            line=dict(dash="dash", color="grey"),
        )
    )
    fig.add_trace(
        go.Scatter(
            x=lim["day"],
            y=-lim["ewma_limit_nm"],
            mode="lines",
            showlegend=False,
            line=dict(dash="dash", color="grey"),
        )
    )
    fig.update_layout(title=title, yaxis_title="nm from baseline", **_LAYOUT)
    return fig


def repeat_sd_figure(daily: pl.DataFrame) -> go.Figure:
    """S chart of the monitor repeats: daily SD of repeats per CD-SEM (mean over targets) and its UCL."""
    title = "Monitor repeats: SD per day (S chart)"
    if daily.height == 0:
        return _empty(title)
    fig = go.Figure()
    for tool, g in daily.sort("tool", "day").group_by("tool", maintain_order=True):
        fig.add_trace(
            go.Scatter(
                x=g["day"],
                y=g["sd_nm"],
                mode="lines+markers",
                name=tool[0],
                legendgroup=tool[0],
                marker=dict(size=4),
            )
        )
        fig.add_trace(
            go.Scatter(
                x=g["day"],
                y=g["s_ucl"],
                mode="lines",
                name=f"{tool[0]} UCL",
                legendgroup=tool[0],
                line=dict(dash="dot"),
                showlegend=False,
            )
        )
    fig.update_layout(title=title, yaxis_title="SD of repeats (nm)", **_LAYOUT)
    return fig


def shrink_figure(means: pl.DataFrame) -> go.Figure:
    """Repeat study: mean deviation of each repeat from its session mean, per CD-SEM (resist shrink)."""
    title = "Repeat study: reading vs repeat index"
    if means.height == 0:
        return _empty(title, "No repeat study before the end of this week.")
    fig = go.Figure()
    for tool, g in means.sort("tool", "repeat").group_by("tool", maintain_order=True):
        fig.add_trace(go.Scatter(x=g["repeat"], y=g["deviation_nm"], mode="lines+markers", name=tool[0]))
    fig.update_layout(title=title, xaxis_title="repeat", yaxis_title="nm from session mean", **_LAYOUT)
    return fig


def fleet_offset_figure(card: pl.DataFrame) -> go.Figure:
    """Offset of each CD-SEM to the fleet mean this week, with its confidence interval."""
    title = "Offset to fleet (monitor wafer) with interval"
    if card.height == 0 or "fleet_offset_nm" not in card.columns:
        return _empty(title)
    c = card.filter(pl.col("fleet_offset_nm").is_not_null()).sort("tool")
    if c.height == 0:
        return _empty(title)
    fig = go.Figure(
        go.Scatter(
            x=c["tool"],
            y=c["fleet_offset_nm"],
            mode="markers",
            marker=dict(size=10),
            name="offset",
            error_y=dict(
                type="data",
                symmetric=False,
                array=(c["fleet_offset_hi"] - c["fleet_offset_nm"]).to_list(),
                arrayminus=(c["fleet_offset_nm"] - c["fleet_offset_lo"]).to_list(),
            ),
        )
    )
    fig.add_hline(y=0, line_color="grey")
    fig.update_layout(title=title, yaxis_title="nm", **_LAYOUT)
    return fig


def accuracy_figure(pairs: pl.DataFrame) -> go.Figure:
    """Each feature's CD-SEM reading minus its reference value, per tool and reference method, with the
    tool's Mandel fit as the same difference (offset + (slope - 1) * reference).

    Drawn as the difference, not as reading against reference: on a 30-90 nm axis a 1 nm offset or a
    slope of 0.98 cannot be seen next to the y = x line.
    """
    title = "Accuracy: CD-SEM minus reference, with errors-in-variables fit"
    if pairs.height == 0:
        return _empty(title, "No reference measurements before the end of this week.")
    fig = go.Figure()
    lo, hi = float(pairs["reference"].min()), float(pairs["reference"].max())
    for (tool, method), g in pairs.sort("tool", "reference_method", "reference").group_by(
        "tool", "reference_method", maintain_order=True
    ):
        name = f"{tool} / {method}"
        fig.add_trace(
            go.Scatter(
                x=g["reference"],
                y=g["measured"] - g["reference"],
                mode="markers",
                name=name,
                legendgroup=name,
            )
        )
        b, a = g["fit_slope"][0], g["fit_offset_nm"][0]
        if b is not None and a is not None:
            fig.add_trace(
                go.Scatter(
                    x=[lo, hi],
                    y=[a + (b - 1.0) * lo, a + (b - 1.0) * hi],
                    mode="lines",
                    legendgroup=name,
                    showlegend=False,
                    line=dict(width=1),
                )
            )
    fig.add_hline(y=0.0, line=dict(dash="dash", color="grey"))
    layout = {**_LAYOUT, "height": 420, "legend": dict(orientation="h", y=-0.28)}
    fig.update_layout(
        title=title, xaxis_title="reference (nm)", yaxis_title="CD-SEM - reference (nm)", **layout
    )
    return fig


def capture_trend_figure(trend: pl.DataFrame) -> go.Figure:
    """Capture rate of each inspection tool on the standard-defect wafer, per inspection, with its interval."""
    title = "Standard-defect wafer: capture rate per inspection"
    if trend.height == 0:
        return _empty(title, "No standard-defect inspections.")
    fig = go.Figure()
    for tool, g in trend.sort("tool", "inspected_at").group_by("tool", maintain_order=True):
        fig.add_trace(
            go.Scatter(
                x=g["inspected_at"],
                y=g["capture_rate"],
                mode="lines+markers",
                name=tool[0],
                marker=dict(size=4),
                error_y=dict(
                    type="data",
                    symmetric=False,
                    array=(g["capture_hi"] - g["capture_rate"]).to_list(),
                    arrayminus=(g["capture_rate"] - g["capture_lo"]).to_list(),
                    thickness=0.5,
                ),
            )
        )
    fig.update_layout(title=title, yaxis_title="capture rate", yaxis_tickformat=".0%", **_LAYOUT)
    return fig


def ooc_rate_figure(process: pl.DataFrame, top: int = 20) -> go.Figure:
    """Out-of-control rate (signalled / charted points) by process tool and chamber, worst first."""
    title = "Out-of-control rate by process chamber"
    if process.height == 0 or "ooc_rate" not in process.columns:
        return _empty(title)
    p = process.filter(pl.col("ooc_rate").is_not_null()).sort("ooc_rate", descending=True).head(top)
    if p.height == 0:
        return _empty(title)
    label = (p["process_tool"] + "/" + p["chamber"]).to_list()
    fig = go.Figure(
        go.Bar(
            x=label,
            y=p["ooc_rate"],
            text=[f"{v:.0%}" for v in p["ooc_rate"]],
            customdata=p.select("signalled_points", "chart_points").rows(),
            hovertemplate="%{x}: %{y:.1%} (%{customdata[0]} of %{customdata[1]} points)<extra></extra>",
        )
    )
    fig.update_layout(title=title, yaxis_title="OOC rate", yaxis_tickformat=".0%", **_LAYOUT)
    return fig
