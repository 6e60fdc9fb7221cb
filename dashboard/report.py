"""The weekly tool-health report as one self-contained HTML file (and optionally a PDF of it).

``render_weekly_report`` turns a :class:`warehouse.health.WeeklyHealth` into HTML: per tool family a scorecard
table and its key charts, what changed since last week, and the cautions. plotly.js is embedded once, with
the first figure (``include_plotlyjs=True``); the other figures reuse it, so the file works offline.
``print_pdf`` prints the HTML with headless Chromium. No Streamlit here; every number comes from
``warehouse.health``.
"""

from __future__ import annotations

import html
import shutil
import subprocess
from collections.abc import Callable, Sequence
from pathlib import Path

import plotly.graph_objects as go
import polars as pl

from dashboard import health_charts as hc

__all__ = [
    "CDSEM_COLUMNS",
    "INSPECTION_COLUMNS",
    "PROCESS_COLUMNS",
    "print_pdf",
    "render_weekly_report",
    "scorecard_frame",
    "scorecard_rows",
]

Cell = Callable[[dict], str]


def _num(col: str, nd: int = 2, signed: bool = False) -> Cell:
    def f(r: dict) -> str:
        v = r.get(col)
        if v is None:
            return ""
        if isinstance(v, bool):
            return "yes" if v else "no"
        if isinstance(v, int):
            return str(v)
        return f"{v:+.{nd}f}" if signed else f"{v:.{nd}f}"

    return f


def _pct(col: str) -> Cell:
    return lambda r: "" if r.get(col) is None else f"{r[col]:.1%}"


def _interval(col: str, lo: str, hi: str, nd: int = 2, pct: bool = False, signed: bool = False) -> Cell:
    def f(r: dict) -> str:
        v, a, b = r.get(col), r.get(lo), r.get(hi)
        if v is None:
            return ""
        fmt = (lambda x: f"{x:.1%}") if pct else (lambda x: f"{x:+.{nd}f}" if signed else f"{x:.{nd}f}")
        return f"{fmt(v)} [{fmt(a)}, {fmt(b)}]" if a is not None and b is not None else fmt(v)

    return f


def _text(col: str) -> Cell:
    return lambda r: "" if r.get(col) is None else str(r[col])


def _flag(col: str) -> Cell:
    return lambda r: "" if r.get(col) is None else ("yes" if r[col] else "no")


CDSEM_COLUMNS: Sequence[tuple[str, Cell]] = (
    ("CD-SEM", _text("tool")),
    ("monitor", _text("monitor_status")),
    ("EWMA drift (nm)", _num("drift_nm", signed=True)),
    ("shape", _text("change_shape")),
    ("drift rate (nm/day)", _num("drift_rate_nm_per_day", 3, signed=True)),
    (
        "step (nm) / day",
        lambda r: "" if r.get("step_nm") is None else f"{r['step_nm']:+.2f} / {r.get('step_day')}",
    ),
    ("bias (nm)", _num("bias_nm", signed=True)),
    (
        "offset to fleet (nm) [95 %]",
        _interval("fleet_offset_nm", "fleet_offset_lo", "fleet_offset_hi", signed=True),
    ),
    ("matching slope", _interval("matching_slope", "matching_slope_lo", "matching_slope_hi")),
    ("repeatability (nm)", _num("repeatability_nm", 3)),
    ("reproducibility (nm)", _num("reproducibility_nm", 3)),
    ("worst P/T", _num("worst_p_to_t", 3)),
    ("P/T verdict", _text("pt_verdict")),
    ("resist shrink (nm/repeat)", _num("shrink_nm_per_repeat", 3, signed=True)),
    ("accuracy slope [95 %]", _interval("accuracy_slope", "accuracy_slope_lo", "accuracy_slope_hi", 3)),
    ("accuracy offset (nm)", _num("accuracy_mean_offset_nm", signed=True)),
    ("TMU (nm)", _num("tmu_nm")),
)
PT_COLUMNS: Sequence[tuple[str, Cell]] = (
    ("CD-SEM", _text("tool")),
    ("layer", _text("layer")),
    ("product", _text("product")),
    ("LSL", _num("lsl")),
    ("USL", _num("usl")),
    ("sigma meas (nm)", _num("reproducibility_nm", 3)),
    ("P/T", _num("p_to_t", 3)),
    ("verdict", _text("verdict")),
)
INSPECTION_COLUMNS: Sequence[tuple[str, Cell]] = (
    ("inspection tool", _text("tool")),
    ("std inspections", _num("std_inspections")),
    ("capture rate [95 %]", _interval("capture_rate", "capture_lo", "capture_hi", pct=True)),
    ("baseline capture", _pct("baseline_capture")),
    ("capture fell", _flag("capture_fell")),
    ("count ratio to fleet [95 %]", _interval("count_ratio_to_fleet", "count_ratio_lo", "count_ratio_hi", 3)),
    ("size error (nm)", _num("size_error_nm", signed=True)),
    ("density (/cm²)", _num("density_per_cm2", 4)),
    ("density trends", _text("density_trends")),
)
PROCESS_COLUMNS: Sequence[tuple[str, Cell]] = (
    ("process tool", _text("process_tool")),
    ("chamber", _text("chamber")),
    ("layers", _text("layers")),
    ("chart points", _num("chart_points")),
    ("signalled", _num("signalled_points")),
    ("OOC rate", _pct("ooc_rate")),
    ("worst Cpk [95 %]", _interval("worst_cpk", "worst_cpk_lo", "worst_cpk_hi")),
    ("worst Cpk run", _text("worst_cpk_run")),
    ("open excursions", _num("open_excursions")),
    ("oldest open (days)", _num("oldest_open_age_days", 1)),
    ("excursions (trailing)", _num("recent_excursions")),
    ("repeat offender", _flag("repeat_offender")),
)
LIMIT_COLUMNS: Sequence[tuple[str, Cell]] = (
    ("chart", _text("chart")),
    ("layer", _text("layer")),
    ("series", _text("split_json")),
    ("version", _num("version")),
    ("centre", _num("center", 3)),
    ("previous centre", _num("previous_center", 3)),
    ("sigma", _num("sigma", 3)),
    ("frozen", _text("frozen_at")),
    ("by", _text("frozen_by")),
    ("reason", _text("reason")),
)
NEW_EXCURSION_COLUMNS: Sequence[tuple[str, Cell]] = (
    ("excursion", _num("excursion_id")),
    ("chart", _text("chart")),
    ("layer", _text("layer")),
    ("process tool", _text("process_tool")),
    ("chamber", _text("chamber")),
    ("metrology tool", _text("metrology_tool")),
    ("state", _text("state")),
    ("severity", _text("severity")),
    ("first point", _text("first_at")),
    ("signals", _num("n_signals")),
)
CLOSED_COLUMNS: Sequence[tuple[str, Cell]] = (
    ("excursion", _num("excursion_id")),
    ("chart", _text("chart")),
    ("closed", _text("changed_at")),
    ("by", _text("changed_by")),
    ("classification", _text("classification")),
    ("cause", _text("cause_category")),
    ("action", _text("action")),
    ("comment", _text("comment")),
)


def scorecard_rows(frame: pl.DataFrame, columns: Sequence[tuple[str, Cell]]) -> list[dict[str, str]]:
    """Rows of a scorecard as display strings keyed by column header (shared by the page and the report)."""
    return [{h: f(r) for h, f in columns} for r in frame.iter_rows(named=True)]


def scorecard_frame(frame: pl.DataFrame, columns: Sequence[tuple[str, Cell]]) -> pl.DataFrame:
    """A scorecard as a frame of display strings, one column per header (for interactive tables)."""
    rows = scorecard_rows(frame, columns)
    return (
        pl.DataFrame(rows, schema={h: pl.String for h, _ in columns}, orient="row")
        if rows
        else pl.DataFrame(schema={h: pl.String for h, _ in columns})
    )


def _table(
    frame: pl.DataFrame,
    columns: Sequence[tuple[str, Cell]],
    *,
    css: str,
    limit: int | None = None,
    empty: str = "Nothing this week.",
) -> str:
    if frame.height == 0:
        return f"<p class='empty'>{html.escape(empty)}</p>"
    rows = scorecard_rows(frame.head(limit) if limit else frame, columns)
    head = "".join(f"<th>{html.escape(h)}</th>" for h, _ in columns)
    body = "".join("<tr>" + "".join(f"<td>{html.escape(v)}</td>" for v in r.values()) + "</tr>" for r in rows)
    more = (
        f"<p class='note'>Showing {limit} of {frame.height} rows.</p>"
        if limit and frame.height > limit
        else ""
    )
    return f"<table class='{css}'><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>{more}"


_CSS = """
body{font-family:system-ui,-apple-system,Segoe UI,sans-serif;margin:24px;color:#1b1f24;max-width:1400px}
h1{font-size:1.6em} h2{border-bottom:2px solid #d0d7de;padding-bottom:4px;margin-top:2em}
table{border-collapse:collapse;font-size:0.85em;margin:8px 0 16px} th,td{border:1px solid #d0d7de;padding:3px 6px}
th{background:#f3f5f7;text-align:left} td{white-space:nowrap}
.caution{background:#fff8e6;border-left:4px solid #d4a017;padding:8px 12px;margin:6px 0}
.attention li{margin:3px 0} .empty,.note{color:#57606a;font-style:italic}
.charts{display:grid;grid-template-columns:repeat(auto-fit,minmax(560px,1fr));gap:12px}
@media print{.charts{display:block}}
"""


_FIT_CHARTS_JS = (
    "window.addEventListener('load',function(){if(window.Plotly){"
    "document.querySelectorAll('.js-plotly-plot').forEach(function(el){Plotly.Plots.resize(el);});}});"
)
"""Each chart is drawn as its div is parsed, at the width its grid cell has then: the first chart of a grid
is drawn before the second cell exists, over the whole row, and would stay cut off at the right. Once the
page has loaded, every chart is fitted to its cell."""


class _Figures:
    """Embeds plotly.js with the first figure only; the rest are plain divs that reuse it."""

    def __init__(self) -> None:
        self.first = True

    def __call__(self, fig: go.Figure) -> str:
        out = fig.to_html(full_html=False, include_plotlyjs=self.first, config={"displaylogo": False})
        self.first = False
        return out


def render_weekly_report(h) -> str:
    """The weekly tool-health review of ``h`` (a ``WeeklyHealth``) as one self-contained HTML document."""
    fig = _Figures()
    esc = html.escape
    parts = [
        "<!doctype html><html lang='en'><head><meta charset='utf-8'>",
        f"<title>lotline tool health {esc(h.week.label)}</title><style>{_CSS}</style></head><body>",
        f"<h1>Tool health, week {esc(h.week.label)}</h1>",
        f"<p>{h.week.start:%Y-%m-%d} to {h.week.end:%Y-%m-%d} (UTC, end exclusive); compared with "
        f"{esc(h.previous.label)}.</p>",
    ]
    parts += [f"<div class='caution'>{esc(c)}</div>" for c in h.cautions]
    parts.append("<h2>Needs a look</h2>")
    if h.attention:
        parts.append("<ul class='attention'>" + "".join(f"<li>{esc(a)}</li>" for a in h.attention) + "</ul>")
    else:
        parts.append("<p class='empty'>No tool flagged this week.</p>")
    parts += [f"<p class='note'>{esc(n)}</p>" for n in h.notes]

    parts.append("<h2>CD-SEMs</h2>")
    parts.append(_table(h.cdsem, CDSEM_COLUMNS, css="scorecard cdsem", empty="No CD-SEM data."))
    parts.append("<h3>P/T per measured layer</h3>")
    parts.append(_table(h.cdsem_pt, PT_COLUMNS, css="pt", empty="No spec limits for the layers measured."))
    parts.append("<div class='charts'>")
    for f in (
        hc.monitor_figure(h.monitor_daily),
        hc.fleet_offset_figure(h.cdsem),
        hc.repeat_sd_figure(h.monitor_daily),
        hc.shrink_figure(h.repeat_means),
        hc.accuracy_figure(h.accuracy_pairs),
    ):
        parts.append(f"<div>{fig(f)}</div>")
    parts.append("</div>")

    parts.append("<h2>Inspection tools</h2>")
    parts.append(
        _table(h.inspection, INSPECTION_COLUMNS, css="scorecard inspection", empty="No inspection data.")
    )
    parts.append(f"<div class='charts'><div>{fig(hc.capture_trend_figure(h.capture_trend))}</div></div>")

    parts.append("<h2>Process tools and chambers</h2>")
    parts.append(
        _table(h.process, PROCESS_COLUMNS, css="scorecard process", empty="No charted process chambers.")
    )
    parts.append(f"<div class='charts'><div>{fig(hc.ooc_rate_figure(h.process))}</div></div>")

    parts.append(f"<h2>What changed since {esc(h.previous.label)}</h2>")
    parts.append(f"<h3>Control limits frozen this week ({h.limit_changes.height})</h3>")
    parts.append(_table(h.limit_changes, LIMIT_COLUMNS, css="changes", limit=50))
    parts.append(f"<h3>New excursions ({h.new_excursions.height})</h3>")
    parts.append(_table(h.new_excursions, NEW_EXCURSION_COLUMNS, css="changes", limit=50))
    parts.append(f"<h3>Dispositions closed ({h.closed_dispositions.height})</h3>")
    parts.append(_table(h.closed_dispositions, CLOSED_COLUMNS, css="changes", limit=50))
    parts.append(
        "<p class='note'>Generated by lotline from the warehouse; statistics advise, engineers decide.</p>"
    )
    parts.append(f"<script>{_FIT_CHARTS_JS}</script></body></html>")
    return "\n".join(parts)


def chromium_path() -> str | None:
    """The headless browser used for PDFs: Debian's ``chromium`` (or ``chromium-browser``) on PATH."""
    return shutil.which("chromium") or shutil.which("chromium-browser")


def print_pdf(html_path: Path, pdf_path: Path, *, timeout_s: float = 120.0) -> Path:
    """Print an HTML file to PDF with headless Chromium; raise RuntimeError when no browser is found or it fails."""
    exe = chromium_path()
    if exe is None:
        raise RuntimeError("no chromium on PATH (install Debian's chromium package) to print the PDF")
    cmd = [
        exe,
        "--headless",
        "--no-sandbox",
        "--disable-gpu",
        "--disable-background-networking",
        "--no-first-run",
        "--run-all-compositor-stages-before-draw",
        "--virtual-time-budget=10000",
        f"--print-to-pdf={Path(pdf_path).resolve()}",
        "--no-pdf-header-footer",
        Path(html_path).resolve().as_uri(),
    ]
    res = subprocess.run(cmd, capture_output=True, text=True, timeout=timeout_s, check=False)
    if res.returncode != 0 or not Path(pdf_path).exists():
        raise RuntimeError(
            f"chromium could not print the PDF (exit {res.returncode}): {res.stderr.strip()[-300:]}"
        )
    return Path(pdf_path)
