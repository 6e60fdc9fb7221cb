"""Frames in, plotly figures out: every chart of the dashboard, built without rendering (no ``st.*`` here).

Each builder takes the frame a :mod:`warehouse.queries` function (or an ``spc`` function) returned and plots
its columns as they are: the numbers come from the warehouse or the engine, this module only draws them.
The points of a control chart carry their drill-down keys in ``customdata`` (:data:`POINT_KEYS`), and
:func:`selected_points` reads them back out of a Streamlit plotly selection event.

Colours: wafer maps and the overview grid use perceptually uniform scales (viridis, cividis); categorical
colours (splits, defect classes) use the Okabe–Ito palette, which stays distinguishable with the common
colour-vision deficiencies.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import plotly.graph_objects as go
import polars as pl

WAFER_RADIUS_MM = 150.0
"""300 mm wafer outline drawn on every wafer and defect map."""

POINT_KEYS = ("lot_id", "wafer_id", "point_key")
"""Drill-down keys carried in the ``customdata`` of control-chart points, in this order."""

WAFER_SCALE = "Viridis"
GRID_SCALE = "Cividis"
OKABE_ITO = ("#0072B2", "#E69F00", "#009E73", "#CC79A7", "#56B4E9", "#D55E00", "#F0E442", "#000000")

ZONE_RULES = frozenset({"we2", "we3", "n5", "n6", "n7", "n8"})
"""Run rules that look at the 1/2/3-sigma zones: zone bands are drawn when one of them applies."""

RULE_SYMBOLS = {
    "we1": "x", "n1": "x", "oos": "star",
    "we2": "triangle-up", "n5": "triangle-up", "we3": "triangle-down", "n6": "triangle-down",
    "we4": "square", "n2": "square", "n3": "diamond", "n4": "hourglass", "n7": "circle-open", "n8": "cross",
    "ewma": "pentagon", "cusum_hi": "triangle-right", "cusum_lo": "triangle-left",
}  # fmt: skip

_LIMIT_LINE = {"color": "#444444", "width": 1.4, "dash": "dash"}
_CENTER_LINE = {"color": "#444444", "width": 1.2}
_SPEC_LINE = {"color": "#B8322A", "width": 1.4, "dash": "dot"}
_SIGNAL_COLOR = "#C0392B"


def _layout(fig: go.Figure, *, title: str = "", height: int = 380, **extra: Any) -> go.Figure:
    fig.update_layout(
        title={"text": title, "x": 0.0, "xanchor": "left", "font": {"size": 15}},
        height=height,
        margin={"l": 60, "r": 20, "t": 40 if title else 15, "b": 40},
        template="plotly_white",
        legend={"orientation": "h", "yanchor": "top", "y": -0.12, "xanchor": "left", "x": 0.0},
        **extra,
    )
    return fig


def empty_figure(message: str, *, height: int = 260) -> go.Figure:
    """A blank figure that says why it is blank."""
    fig = go.Figure()
    fig.add_annotation(text=message, showarrow=False, x=0.5, y=0.5, xref="paper", yref="paper")
    fig.update_xaxes(visible=False)
    fig.update_yaxes(visible=False)
    return _layout(fig, height=height)


# ------------------------------------------------------------------------------------------ control chart


def _split_labels(points: pl.DataFrame, split: str | None) -> list[str]:
    if split and split in points.columns:
        return [("(none)" if v is None else str(v)) for v in points[split].to_list()]
    return ["points"] * points.height


def _customdata(points: pl.DataFrame) -> list[list[Any]]:
    cols = [points[c].to_list() if c in points.columns else [None] * points.height for c in POINT_KEYS]
    return [list(row) for row in zip(*cols, strict=True)]


def _step_line(
    fig: go.Figure, x: list, y: list, *, name: str, line: dict, legendgroup: str, show: bool
) -> None:
    fig.add_trace(
        go.Scatter(
            x=x, y=y, mode="lines", name=name, line={**line, "shape": "hv"}, hoverinfo="skip",
            legendgroup=legendgroup, showlegend=show,
        )
    )  # fmt: skip


def control_chart(
    points: pl.DataFrame,
    signals: pl.DataFrame | None = None,
    *,
    spec: Mapping[str, float | None] | None = None,
    rules: Sequence[str] = (),
    split: str | None = None,
    title: str = "",
    unit: str = "",
    x: str = "point_at",
) -> go.Figure:
    """Control chart of one series: points coloured by ``split``, centre line, control and spec limits.

    ``points`` needs ``x`` (default ``point_at``), ``value``, ``center``, ``sigma``, ``lcl``, ``ucl`` and the
    :data:`POINT_KEYS`; the limits are drawn per point, so a new limit version shows as a step. Zone bands
    (1 and 2 sigma) are drawn when one of ``rules`` uses zones. ``signals`` (``point_key``, ``rule``,
    ``value``, ``point_at``) are marked with one symbol per rule. ``spec`` holds ``lsl``, ``target``, ``usl``.
    Point traces come first, one per split value, with ``customdata`` = :data:`POINT_KEYS`.
    """
    if points.height == 0:
        return empty_figure("No points in this window.")
    fig = go.Figure()
    xs = points[x].to_list()
    labels = _split_labels(points, split)
    custom = _customdata(points)
    values = points["value"].to_list()
    order: list[str] = []
    for lab in labels:
        if lab not in order:
            order.append(lab)
    for i, lab in enumerate(order):
        idx = [j for j, v in enumerate(labels) if v == lab]
        fig.add_trace(
            go.Scatter(
                x=[xs[j] for j in idx], y=[values[j] for j in idx], customdata=[custom[j] for j in idx],
                mode="markers+lines" if len(order) == 1 else "markers", name=lab,
                marker={"size": 7, "color": OKABE_ITO[i % len(OKABE_ITO)]},
                line={"color": "#9AA5B1", "width": 1},
                hovertemplate="lot %{customdata[0]}<br>wafer %{customdata[1]}<br>%{x}<br>%{y:.4g}"
                + (f" {unit}" if unit else "") + "<extra>%{fullData.name}</extra>",
            )
        )  # fmt: skip
    n_point_traces = len(order)

    zones = bool(ZONE_RULES & set(rules))
    if zones and "sigma" in points.columns:
        center = points["center"].to_list()
        sigma = points["sigma"].to_list()
        for k, alpha in ((2, 0.07), (1, 0.10)):
            upper = [
                c + k * s if c is not None and s is not None else None
                for c, s in zip(center, sigma, strict=True)
            ]
            lower = [
                c - k * s if c is not None and s is not None else None
                for c, s in zip(center, sigma, strict=True)
            ]
            fig.add_trace(
                go.Scatter(
                    x=xs,
                    y=upper,
                    mode="lines",
                    line={"width": 0, "shape": "hv"},
                    hoverinfo="skip",
                    showlegend=False,
                    legendgroup="zones",
                )
            )
            fig.add_trace(go.Scatter(x=xs, y=lower, mode="lines", line={"width": 0, "shape": "hv"}, fill="tonexty",
                                     fillcolor=f"rgba(0,114,178,{alpha})", hoverinfo="skip",
                                     name=f"zone ±{k}σ", legendgroup="zones", showlegend=(k == 1)))  # fmt: skip

    _step_line(
        fig, xs, points["center"].to_list(), name="centre", line=_CENTER_LINE, legendgroup="cl", show=True
    )
    for i, col in enumerate(("ucl", "lcl")):
        if col in points.columns and points[col].null_count() < points.height:
            _step_line(fig, xs, points[col].to_list(), name="control limits", line=_LIMIT_LINE,
                       legendgroup="limits", show=(i == 0))  # fmt: skip
    if spec:
        shown = False
        for key in ("usl", "lsl"):
            v = spec.get(key)
            if v is not None and not (isinstance(v, float) and math.isnan(v)):
                _step_line(fig, [xs[0], xs[-1]], [v, v], name="spec limits", line=_SPEC_LINE, legendgroup="spec",
                           show=not shown)  # fmt: skip
                shown = True
        tgt = spec.get("target")
        if tgt is not None and not (isinstance(tgt, float) and math.isnan(tgt)):
            _step_line(fig, [xs[0], xs[-1]], [tgt, tgt], name="target", legendgroup="spec", show=True,
                       line={"color": "#B8322A", "width": 1})  # fmt: skip

    if signals is not None and signals.height:
        for rule in sorted(set(signals["rule"].to_list())):
            s = signals.filter(pl.col("rule") == rule)
            # an out-of-spec mark sits at the charted value, but what left the spec is its worst site value
            # (the signal's statistic); say so, or a wafer mean inside the spec lines looks wrongly flagged
            worst = (
                [None if v is None else f"{v:.4g}" for v in s["statistic"].to_list()]
                if rule == "oos" and "statistic" in s.columns
                else None
            )
            fig.add_trace(
                go.Scatter(
                    x=s["point_at"].to_list(), y=s["value"].to_list(), mode="markers", name=f"signal {rule}",
                    marker={"symbol": RULE_SYMBOLS.get(rule, "circle-open"), "size": 13, "color": _SIGNAL_COLOR,
                            "line": {"width": 1.5, "color": _SIGNAL_COLOR}},
                    customdata=[[a, b, c] for a, b, c in zip(s["lot_id"].to_list(), s["wafer_id"].to_list(),
                                                              s["point_key"].to_list(), strict=True)],
                    text=worst,
                    hovertemplate=(
                        f"rule {rule}<br>lot %{{customdata[0]}}<br>%{{x}}<br>%{{y:.4g}}"
                        + ("<br>value beyond spec: %{text}" if worst is not None else "")
                        + "<extra></extra>"
                    ),
                )
            )  # fmt: skip
    fig.update_yaxes(title_text=unit or "value")
    # No dragmode here: Streamlit turns click-to-select off when the figure starts in box-select mode.
    _layout(fig, title=title, height=470)
    fig.layout.meta = {"point_traces": n_point_traces}
    return fig


def ewma_chart(ewma_points: pl.DataFrame, *, x: str = "point_at", title: str = "EWMA") -> go.Figure:
    """EWMA panel from :func:`spc.ewma.evaluate_ewma` points: ``ewma``, ``ewma_lcl``, ``ewma_ucl``, ``center``."""
    if ewma_points.height == 0:
        return empty_figure("No EWMA for this series.", height=220)
    fig = go.Figure()
    xs = ewma_points[x].to_list()
    fig.add_trace(
        go.Scatter(
            x=xs,
            y=ewma_points["ewma"].to_list(),
            mode="lines+markers",
            name="EWMA",
            marker={"size": 5, "color": OKABE_ITO[0]},
            line={"color": OKABE_ITO[0], "width": 1.3},
        )
    )
    _step_line(
        fig,
        xs,
        ewma_points["center"].to_list(),
        name="centre",
        line=_CENTER_LINE,
        legendgroup="c",
        show=False,
    )
    _step_line(
        fig,
        xs,
        ewma_points["ewma_ucl"].to_list(),
        name="EWMA limits",
        line=_LIMIT_LINE,
        legendgroup="l",
        show=True,
    )
    _step_line(fig, xs, ewma_points["ewma_lcl"].to_list(), name="EWMA limits", line=_LIMIT_LINE, legendgroup="l",
               show=False)  # fmt: skip
    if "ewma_signal" in ewma_points.columns:
        hit = ewma_points.filter(pl.col("ewma_signal"))
        if hit.height:
            fig.add_trace(
                go.Scatter(
                    x=hit[x].to_list(),
                    y=hit["ewma"].to_list(),
                    mode="markers",
                    name="signal ewma",
                    marker={"symbol": RULE_SYMBOLS["ewma"], "size": 11, "color": _SIGNAL_COLOR},
                )
            )
    return _layout(fig, title=title, height=300)


def cusum_chart(
    cusum_points: pl.DataFrame, *, h: float, x: str = "point_at", title: str = "CUSUM"
) -> go.Figure:
    """CUSUM panel from :func:`spc.cusum.evaluate_cusum` points: ``cusum_hi``, ``cusum_lo`` (sigma units)."""
    if cusum_points.height == 0:
        return empty_figure("No CUSUM for this series.", height=220)
    fig = go.Figure()
    xs = cusum_points[x].to_list()
    hi = cusum_points["cusum_hi"].to_list()
    lo = [-v if v is not None else None for v in cusum_points["cusum_lo"].to_list()]
    fig.add_trace(
        go.Scatter(
            x=xs, y=hi, mode="lines+markers", name="upper sum", marker={"size": 5, "color": OKABE_ITO[5]}
        )
    )
    fig.add_trace(go.Scatter(x=xs, y=lo, mode="lines+markers", name="lower sum (shown negative)",
                             marker={"size": 5, "color": OKABE_ITO[0]}))  # fmt: skip
    _step_line(
        fig,
        [xs[0], xs[-1]],
        [h, h],
        name="decision interval ±h",
        line=_LIMIT_LINE,
        legendgroup="h",
        show=True,
    )
    _step_line(fig, [xs[0], xs[-1]], [-h, -h], name="decision interval ±h", line=_LIMIT_LINE, legendgroup="h",
               show=False)  # fmt: skip
    fig.update_yaxes(title_text="sigma units")
    return _layout(fig, title=title, height=300)


# ------------------------------------------------------------------------------------------ drill-down keys


@dataclass(frozen=True)
class PointRef:
    """The keys of one selected chart point."""

    lot_id: str
    wafer_id: str | None
    point_key: str | None


def selected_points(selection: Mapping[str, Any] | None) -> list[PointRef]:
    """Drill-down keys of the points in a plotly selection event (``event.selection``), in click order.

    Reads ``customdata`` (:data:`POINT_KEYS`); points without a lot id in their customdata (limit lines,
    zone bands) are ignored, and each point appears once.

    Example:
        >>> selected_points({"points": [{"customdata": ["L1", "W1", "L1|W1"]}], "box": []})
        [PointRef(lot_id='L1', wafer_id='W1', point_key='L1|W1')]
    """
    if not selection:
        return []
    out: list[PointRef] = []
    seen: set[tuple] = set()
    for p in selection.get("points") or []:
        data = p.get("customdata") if isinstance(p, Mapping) else None
        if not isinstance(data, list | tuple) or not data or not data[0]:
            continue
        lot = str(data[0])
        wafer = None if len(data) < 2 or data[1] in (None, "") else str(data[1])
        key = None if len(data) < 3 or data[2] in (None, "") else str(data[2])
        if (lot, wafer, key) not in seen:
            seen.add((lot, wafer, key))
            out.append(PointRef(lot, wafer, key))
    return out


# ------------------------------------------------------------------------------------------ wafers


def _wafer_outline(fig: go.Figure) -> None:
    r = WAFER_RADIUS_MM
    fig.add_shape(type="circle", x0=-r, y0=-r, x1=r, y1=r, line={"color": "#333333", "width": 1.5})
    # notch at 6 o'clock (orientation mark)
    fig.add_shape(type="path", path=f"M -4 {-r} L 0 {-r + 5} L 4 {-r} Z", line={"color": "#333333", "width": 1},
                  fillcolor="#333333")  # fmt: skip
    lim = r * 1.08
    fig.update_xaxes(range=[-lim, lim], title_text="x (mm)", zeroline=False, constrain="domain")
    fig.update_yaxes(range=[-lim, lim], title_text="y (mm)", zeroline=False, scaleanchor="x", scaleratio=1)


def wafer_map(sites: pl.DataFrame, *, title: str = "", unit: str = "") -> go.Figure:
    """Site values on the wafer (``x_mm``, ``y_mm``, ``value``, ``site_id``) with a uniform colour scale."""
    if sites.height == 0:
        return empty_figure("No site values for this wafer.", height=420)
    fig = go.Figure(
        go.Scatter(
            x=sites["x_mm"].to_list(), y=sites["y_mm"].to_list(), mode="markers",
            marker={"size": 16, "color": sites["value"].to_list(), "colorscale": WAFER_SCALE, "showscale": True,
                    "colorbar": {"title": {"text": unit or "value"}}, "line": {"width": 0.5, "color": "#333333"}},
            customdata=sites["site_id"].to_list(), name="sites",
            hovertemplate="site %{customdata}<br>x %{x:.1f} mm, y %{y:.1f} mm<br>%{marker.color:.4g}<extra></extra>",
        )
    )  # fmt: skip
    _wafer_outline(fig)
    return _layout(fig, title=title, height=440)


def radial_profile(sites: pl.DataFrame, *, title: str = "Radial profile", unit: str = "") -> go.Figure:
    """Site value against radius from the wafer centre (``r_mm``, ``value``)."""
    if sites.height == 0:
        return empty_figure("No site values.", height=300)
    fig = go.Figure(
        go.Scatter(x=sites["r_mm"].to_list(), y=sites["value"].to_list(), mode="markers", name="sites",
                   marker={"size": 8, "color": OKABE_ITO[0]},
                   hovertemplate="r %{x:.1f} mm<br>%{y:.4g}<extra></extra>")
    )  # fmt: skip
    fig.update_xaxes(title_text="radius (mm)", range=[0, WAFER_RADIUS_MM])
    fig.update_yaxes(title_text=unit or "value")
    return _layout(fig, title=title, height=300)


def zone_means_chart(zones: pl.DataFrame, *, title: str = "Zone means", unit: str = "") -> go.Figure:
    """Mean ± SD per radial zone (``zone``, ``mean``, optional ``sd``, ``n_sites``), zones in the frame's order.

    Dots with error bars rather than bars from zero: the zones of one wafer differ by tenths of a nm.
    """
    if zones.height == 0:
        return empty_figure("No zone means.", height=300)
    n_col = "n_sites" if "n_sites" in zones.columns else "n"
    text = [f"n={n}" for n in zones[n_col].to_list()] if n_col in zones.columns else None
    error = None
    if "sd" in zones.columns:
        error = {
            "type": "data",
            "array": [0.0 if v is None else v for v in zones["sd"].to_list()],
            "visible": True,
        }
    fig = go.Figure(
        go.Scatter(x=zones["zone"].to_list(), y=zones["mean"].to_list(), text=text, mode="markers+text",
                   textposition="middle right", error_y=error, name="zone mean",
                   marker={"size": 11, "color": OKABE_ITO[2]})
    )  # fmt: skip
    fig.update_xaxes(type="category")
    fig.update_yaxes(title_text=unit or "mean")
    return _layout(fig, title=title, height=300)


def defect_map(defects: pl.DataFrame, *, title: str = "") -> go.Figure:
    """Defect positions (``x_mm``, ``y_mm``) coloured by ``defect_class``, on the wafer outline."""
    if defects.height == 0:
        return empty_figure("No defect coordinates for this wafer.", height=420)
    fig = go.Figure()
    classes = [("(unclassified)" if c is None else str(c)) for c in defects["defect_class"].to_list()]
    xs, ys = defects["x_mm"].to_list(), defects["y_mm"].to_list()
    for i, cls in enumerate(sorted(set(classes))):
        idx = [j for j, c in enumerate(classes) if c == cls]
        fig.add_trace(go.Scatter(x=[xs[j] for j in idx], y=[ys[j] for j in idx], mode="markers", name=cls,
                                 marker={"size": 6, "color": OKABE_ITO[i % len(OKABE_ITO)]}))  # fmt: skip
    _wafer_outline(fig)
    return _layout(fig, title=title, height=440)


# ------------------------------------------------------------------------------------------ overview


def ooc_grid(grid: pl.DataFrame, *, value: str = "signals", title: str = "") -> go.Figure:
    """Tool × layer heatmap of ``value`` from a frame with ``tool``, ``layer`` and that count column.

    Cells with no row stay blank (no count was computed for them); every shown number is a cell's count.
    """
    if grid.height == 0:
        return empty_figure("No out-of-control points in this window.", height=300)
    tools = sorted(set(grid["tool"].to_list()))
    layers = sorted(set(grid["layer"].to_list()))
    cell = {(t, ly): v for t, ly, v in grid.select("tool", "layer", value).iter_rows()}
    z = [[cell.get((t, ly)) for ly in layers] for t in tools]
    text = [["" if v is None else str(v) for v in row] for row in z]
    fig = go.Figure(
        go.Heatmap(z=z, x=layers, y=tools, text=text, texttemplate="%{text}", colorscale=GRID_SCALE,
                   hovertemplate="tool %{y}<br>layer %{x}<br>%{z}<extra></extra>", colorbar={"title": {"text": value}})
    )  # fmt: skip
    fig.update_yaxes(autorange="reversed", type="category")
    fig.update_xaxes(type="category")
    return _layout(fig, title=title, height=max(260, 60 + 34 * len(tools)))
