"""Small view pieces shared by the pages: URL-backed inputs, tables, links and caution texts.

Every input of a view reads its start value from ``st.query_params`` and writes its value back, so the
address bar always holds the whole view and a pasted link reopens it. A value from the URL is only ever
used to pick among known options or passed as a bound parameter to a warehouse query; an unknown value
falls back to the default (choices) or shows "not found" (free-text keys such as a lot id).
"""

from __future__ import annotations

import json
from collections.abc import Callable, Sequence
from typing import Any
from urllib.parse import urlencode

import polars as pl
import streamlit as st

from warehouse.points import split_text

PAGES = {
    "overview": "views/overview.py",
    "chart": "views/chart.py",
    "lot": "views/lot.py",
    "excursions": "views/excursions.py",
    "health": "views/health.py",
}
"""Page files by short name (paths relative to dashboard/app.py)."""

URL_PATHS = {"overview": "", "chart": "chart", "lot": "lot", "excursions": "excursions", "health": "health"}

MAX_PARAM_LEN = 200

CAUTIONS = {
    "signals": (
        "Signals advise; they do not decide. Holds, releases, rework and tool downs are decided under the "
        "fab's out-of-control action plan (OCAP) by a qualified engineer, who records the decision here."
    ),
    "commonality": (
        "Commonality is association, not proof of cause: a shared tool, chamber or recipe is a lead to check. "
        "A tool that ran most lots shows up whether or not it is the cause."
    ),
    "rework_before_etch": (
        "Develop-stage (resist) data: rework is possible only until this layer is etched (check the lot's "
        "route above), and only if the OCAP calls for it."
    ),
    "rework_etched_since": (
        "Develop-stage (resist) data, but this lot has after-etch measurements since ({layer} at {at}): its "
        "pattern has most likely been transferred, so rework is likely no longer possible. The OCAP decides."
    ),
    "rework_after_etch": "After-etch data: the pattern is transferred, rework is no longer possible.",
    "disposition": (
        "A disposition records what was decided under the fab's OCAP and by whom. This software operates "
        "no equipment."
    ),
}


def param(key: str) -> str | None:
    """The URL query value ``key`` (last one if repeated), stripped and bounded in length; None if absent."""
    value = st.query_params.get(key)
    if value is None:
        return None
    value = str(value).strip()[:MAX_PARAM_LEN]
    return value or None


def set_param(key: str, value: Any) -> None:
    """Write ``value`` into the URL query (remove the key for None or empty)."""
    if value is None or value == "":
        if key in st.query_params:
            del st.query_params[key]
        return
    text = str(value)
    if st.query_params.get(key) != text:
        st.query_params[key] = text


def int_param(key: str, default: int | None = None) -> int | None:
    """An integer from the URL query; anything that is not a plain integer gives ``default``."""
    value = param(key)
    if value is None:
        return default
    text = value.lstrip("-")
    if not text.isdigit() or len(text) > 18:
        return default
    return int(value)


def choice(
    label: str,
    options: Sequence[Any],
    *,
    key: str,
    default: Any = None,
    format_func: Callable[[Any], str] = str,
    container: Any = None,
) -> Any:
    """A selectbox whose start value comes from the URL query ``key`` and whose value goes back there.

    A URL value that is not among ``options`` is ignored (the default is shown instead).
    """
    options = list(options)
    if not options:
        return None
    by_text = {str(o): i for i, o in enumerate(options)}
    wanted = param(key)
    if wanted is not None and wanted in by_text:
        index = by_text[wanted]
    elif default is not None and str(default) in by_text:
        index = by_text[str(default)]
    else:
        index = 0
    host = container or st
    value = host.selectbox(label, options, index=index, key=f"w_{key}", format_func=format_func)
    set_param(key, value)
    return value


def text_param(label: str, *, key: str, placeholder: str = "", container: Any = None) -> str | None:
    """A text input backed by the URL query ``key``."""
    host = container or st
    current = param(key) or ""
    value = host.text_input(
        label, value=current, key=f"w_{key}", placeholder=placeholder, max_chars=MAX_PARAM_LEN
    )
    value = (value or "").strip()
    set_param(key, value or None)
    return value or None


def series_label(row: dict) -> str:
    """A series as engineers read it: layer · parameter · split keys (``key=value``, sorted)."""
    split = split_text(row["split_json"], sep=", ")
    return f"{row['layer']} · {row['parameter']}" + (f" · {split}" if split else "")


def json_list_text(text: str | None) -> str:
    """A stored JSON list (rules, lots) as comma-separated text; the raw text if it is not a list."""
    try:
        items = json.loads(text) if text else []
    except ValueError:
        return text or ""
    return ", ".join(str(i) for i in items) if isinstance(items, list) else str(text)


def page_url(page: str, **query: Any) -> str:
    """A relative link to ``page`` with the query ``query`` (values URL-encoded), e.g. ``lot?lot=L01``."""
    q = {k: str(v) for k, v in query.items() if v is not None and v != ""}
    path = URL_PATHS[page]
    return f"./{path}" + (f"?{urlencode(q)}" if q else "")


def table(
    frame: pl.DataFrame, *, columns: Sequence[str] | None = None, key: str | None = None, **config: Any
) -> None:
    """Show a frame as a table (selected columns, no index)."""
    if columns:
        frame = frame.select([c for c in columns if c in frame.columns])
    st.dataframe(frame, hide_index=True, width="stretch", key=key, column_config=config or None)


def non_empty(frame: pl.DataFrame, columns: Sequence[str]) -> list[str]:
    """The ``columns`` of ``frame`` that hold at least one value (split columns a view does not use drop out)."""
    return [c for c in columns if c in frame.columns and frame[c].null_count() < frame.height]


def static_table(frame: pl.DataFrame, *, columns: Sequence[str] | None = None) -> None:
    """Show a short frame as a plain HTML table (text in the page, no grid widget)."""
    if columns:
        frame = frame.select([c for c in columns if c in frame.columns])
    if frame.height == 0:
        st.caption("(none)")
        return
    st.table(frame.with_columns(pl.col(pl.Datetime).dt.strftime("%Y-%m-%d %H:%M:%S")), hide_index=True)


def caution(kind: str, **values: Any) -> None:
    """Show one of the standard caution texts (``values`` fill its ``{placeholders}``)."""
    st.caption(":warning: " + CAUTIONS[kind].format(**values))


def not_found(what: str, value: str | None) -> None:
    """Say that ``what`` is unknown, echo the value as plain text, and stop the page."""
    st.info(f"{what} not found.")
    if value:
        st.text(f"Looked for: {value}")
    st.stop()


def nothing(message: str = "No data found.") -> None:
    """The normal empty path: say so and stop the page."""
    st.info(message)
    st.stop()


def defect_limits_note(lim: dict) -> str:
    """How a defect chart's limits are drawn: at the baseline's mean inspected area above, per point below."""
    if lim["sigma_source"] == "negative_binomial":
        model = f"negative-binomial count model, clustering 1/α = {lim['overdispersion']:.3g}"
    elif lim["sigma_source"] == "laney_u_prime":
        model = f"Laney u′, σ_z = {lim['overdispersion']:.3g}"
    else:
        model = "Poisson count model"
    return (
        f"Limits above are those of a wafer of the baseline's mean inspected area ({lim['n_ref']:.4g} cm²); "
        f"each point's limits follow its own area ({model})."
    )
