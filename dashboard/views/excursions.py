"""Excursions: the list with filters, one excursion's signals and audit history, and the disposition form
(state, classification, cause, action, comment) that writes through the warehouse."""

from __future__ import annotations

import json

import polars as pl
import streamlit as st

from dashboard import data, widgets

STATES = ("open", "acknowledged", "closed", "all")
SEVERITIES = ("all", "critical", "high", "medium", "low")
CLASSIFICATIONS = ("real", "measurement", "false_alarm")
FLASH = "disposition_recorded"
CAUSES = (
    "",
    "process_tool",
    "chamber",
    "recipe",
    "metrology",
    "material",
    "mask",
    "handling",
    "unknown",
    "other",
)


def _filters(frame: pl.DataFrame) -> pl.DataFrame:
    c1, c2, c3, c4 = st.columns(4)
    state = widgets.choice("State", STATES, key="state", default="open", container=c1)
    severity = widgets.choice("Severity", SEVERITIES, key="severity", default="all", container=c2)
    layers = ["all", *sorted({v for v in frame["layer"].to_list() if v is not None})]
    layer = widgets.choice("Layer", layers, key="layer", default="all", container=c3)
    charts_ = ["all", *sorted(set(frame["chart"].to_list()))]
    chart = widgets.choice("Plan entry", charts_, key="chart", default="all", container=c4)
    if state != "all":
        frame = frame.filter(pl.col("state") == state)
    if severity != "all":
        frame = frame.filter(pl.col("severity") == severity)
    if layer != "all":
        frame = frame.filter(pl.col("layer") == layer)
    if chart != "all":
        frame = frame.filter(pl.col("chart") == chart)
    return frame


def _submit(excursion_id: int, author, suffix: str) -> None:
    """Form callback: runs before the page reruns, so the page then shows the new audit entry."""
    ss = st.session_state
    v = {
        name: ss[f"f_{name}{suffix}"]
        for name in ("state", "classification", "cause", "action", "comment", "lots")
    }
    try:
        data.record_disposition(
            excursion_id=excursion_id, to_state=v["state"], classification=v["classification"],
            cause_category=v["cause"] or None, action=(v["action"] or "").strip() or None,
            comment=(v["comment"] or "").strip() or None, lots_affected=list(v["lots"]), author=author,
        )  # fmt: skip
    except (ValueError, data.LotlineError) as exc:
        ss[FLASH] = ("error", f"Not recorded: {exc}")
    else:
        ss[FLASH] = ("success", f"Recorded for excursion {excursion_id} by {author.name}.")


def _form(detail: dict, author, n_audit: int) -> None:
    st.subheader("Record a disposition")
    widgets.caution("disposition")
    lots = json.loads(detail["lots_json"] or "[]")
    # A new form after every recorded change, so its defaults follow the excursion's new state. Widget keys
    # keep the plain name for the first form (tests and links rely on f_state, f_comment, ...).
    suffix = "" if n_audit <= 1 else f"_{n_audit}"
    with st.form(f"disposition{suffix}"):
        st.text(f"Author: {author.label}")
        c1, c2, c3 = st.columns(3)
        states = list(STATES[:3])
        c1.selectbox(
            "New state",
            states,
            index=states.index(detail["state"]) if detail["state"] in states else 0,
            key=f"f_state{suffix}",
        )
        c2.selectbox(
            "Classification",
            CLASSIFICATIONS,
            index=None,
            placeholder="choose",
            key=f"f_classification{suffix}",
        )
        c3.selectbox(
            "Cause category", CAUSES, format_func=lambda v: v or "(not known yet)", key=f"f_cause{suffix}"
        )
        st.text_input("Action (as decided under the OCAP)", max_chars=500, key=f"f_action{suffix}")
        st.multiselect("Lots covered", lots, default=lots, key=f"f_lots{suffix}")
        st.text_area("Comment", max_chars=4000, key=f"f_comment{suffix}")
        st.form_submit_button(
            "Record disposition", type="primary", key=f"f_submit{suffix}", on_click=_submit,
            args=(int(detail["excursion_id"]), author, suffix),
        )  # fmt: skip


def main() -> None:
    st.title("Excursions")
    listing = data.load_one("list_excursions")
    if listing.height == 0:
        widgets.nothing("No excursions recorded yet.")
    shown = _filters(listing)
    st.caption(f"{shown.height} of {listing.height} excursions match the filters.")
    shown = shown.with_columns(
        pl.col("excursion_id").map_elements(lambda v: widgets.page_url("excursions", excursion=v), return_dtype=pl.String)
        .alias("open")
    )  # fmt: skip
    # the link first: the table is wider than the page, and a link in the last column was off screen
    widgets.table(shown, columns=["open", "excursion_id", "state", "severity", "chart", "layer", "parameter",
                                  "process_tool", "chamber", "metrology_tool", "first_at", "last_at", "n_signals",
                                  "updated_at"],
                  key="excursion_list", open=st.column_config.LinkColumn("open", display_text="open"))  # fmt: skip

    raw = widgets.param("excursion")
    excursion_id = widgets.int_param("excursion")
    if raw is None:
        st.info("Open an excursion from the list to see its signals, history and disposition form.")
        return
    frames = data.load(
        {
            "detail": (
                "excursion_detail",
                {"excursion_id": excursion_id if excursion_id is not None else -1},
            ),
            "signals": (
                "excursion_signals",
                {"excursion_id": excursion_id if excursion_id is not None else -1},
            ),
            "history": (
                "excursion_history",
                {"excursion_id": excursion_id if excursion_id is not None else -1},
            ),
        }
    )
    if excursion_id is None or frames["detail"].height == 0:
        widgets.not_found("Excursion", raw)
    detail = frames["detail"].row(0, named=True)
    if FLASH in st.session_state:
        kind, message = st.session_state.pop(FLASH)
        (st.success if kind == "success" else st.error)(message)
    st.header(
        f"Excursion {detail['excursion_id']}: {detail['chart']} ({detail['severity']}, {detail['state']})"
    )
    st.caption(
        f"{widgets.series_label(detail)} · rules {widgets.json_list_text(detail['rules_json'])} · "
        f"first {detail['first_at']} · last {detail['last_at']} · {detail['n_signals']} standing signals"
    )
    st.page_link(widgets.PAGES["chart"], label="Open its chart", icon=":material/show_chart:",
                 query_params={"series": str(detail["series_id"])})  # fmt: skip
    lots = json.loads(detail["lots_json"] or "[]")
    if lots:
        st.page_link(widgets.PAGES["lot"], label=f"Open lot {lots[0]}", icon=":material/grain:",
                     query_params={"lot": lots[0], "excursion": str(detail["excursion_id"])})  # fmt: skip
    st.subheader("Signals")
    widgets.table(frames["signals"], columns=["point_at", "lot_id", "wafer_id", "rule", "value", "statistic",
                                              "limit_version", "severity", "withdrawn_at", "withdrawn_reason"],
                  key="excursion_signals")  # fmt: skip
    st.subheader("Audit history")
    # A static table: the trail is short, and every entry stays readable (and selectable) as text.
    history = frames["history"].with_columns(
        pl.col("lots_affected_json").map_elements(widgets.json_list_text, return_dtype=pl.String).alias("lots affected")
    )  # fmt: skip
    widgets.static_table(history, columns=["audit_id", "changed_at", "changed_by", "from_state", "to_state",
                                           "classification", "cause_category", "action", "comment",
                                           "lots affected"])  # fmt: skip
    _form(detail, data.current_author(), frames["history"].height)
    widgets.caution("signals")


main()
