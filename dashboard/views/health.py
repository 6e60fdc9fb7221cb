"""Data health: the ingest log, rejected rows with their reasons (downloadable), superseded data and when
each tool last reported."""

from __future__ import annotations

import streamlit as st

from dashboard import data, widgets

STATUSES = ("all", "loaded", "failed", "duplicate")


def main() -> None:
    st.title("Data health")
    left, right = st.columns(2)
    status = widgets.choice("Ingest status", STATUSES, key="status", default="all", container=left)
    files = data.load_one("ingest_log", status=None, limit=100_000)
    with_rejects = ["all", *[str(f) for f in files.filter(files["rows_rejected"] > 0)["file_id"].to_list()]]
    picked = widgets.choice("Rejects of file", with_rejects, key="file", default="all", container=right,
                            format_func=lambda v: "every file" if v == "all" else f"file {v}")  # fmt: skip
    file_id = None if picked == "all" else int(picked)
    extent = data.load_one("data_time_range")
    last_at = extent["last_at"][0] if extent.height else None
    frames = data.load(
        {
            "log": ("ingest_log", {"status": None if status == "all" else status}),
            "rejects": ("rejects", {"file_id": file_id, "limit": 100_000}),
            "superseded": ("superseded_rows", {}),
            "fresh": ("tool_freshness", {"now": last_at}),
        }
    )

    st.subheader("Ingest log")
    # the message beside the status: a failed file's reason was past the right edge of the table
    widgets.table(frames["log"], key="ingest_log",
                  columns=["file_id", "loaded_at", "status", "message", "path", "kind", "profile", "rows_loaded",
                           "rows_rejected", "rows_skipped", "rows_superseded", "loaded_by", "size_bytes", "sha256"])  # fmt: skip

    st.subheader("Rejected rows" + (f" of file {file_id}" if file_id is not None else ""))
    st.caption("Each row says where it was (file, line, column), what was found and how to fix it.")
    rej = frames["rejects"]
    if rej.height == 0:
        st.info("No rejected rows.")
    else:
        st.download_button("Download rejects (CSV)", rej.write_csv(), file_name="lotline_rejects.csv",
                           mime="text/csv", key="download_rejects")  # fmt: skip
        widgets.table(rej, key="rejects")

    st.subheader("Superseded data (corrected re-exports)")
    sup = frames["superseded"]
    if sup.height == 0:
        st.info("No corrected re-export has replaced stored rows.")
    else:
        widgets.table(sup, key="superseded")

    st.subheader("Tools: last seen")
    if last_at is not None:
        st.caption(f"Relative to the newest data in the warehouse, {last_at:%Y-%m-%d %H:%M} UTC.")
    widgets.table(frames["fresh"], key="tool_last_seen")


main()
