"""Entry point of the lotline dashboard: page setup and navigation (``lotline serve`` runs this file).

The pages live in ``dashboard/views/``; each arranges widgets, tables and charts over the data that
``dashboard/data.py`` fetches from the warehouse. (Not ``pages/``: Streamlit treats a ``pages/`` folder
beside the entry script as a legacy multipage app and then never runs this file's ``st.navigation``.)
"""

from __future__ import annotations

import sys
from pathlib import Path

import streamlit as st

# `streamlit run dashboard/app.py` puts dashboard/ (not the project root) on sys.path.
_ROOT = str(Path(__file__).resolve().parents[1])
if _ROOT not in sys.path:
    sys.path.insert(0, _ROOT)

from dashboard.widgets import PAGES, URL_PATHS  # noqa: E402

TITLES = {
    "overview": "Line overview",
    "chart": "Chart",
    "lot": "Lot",
    "excursions": "Excursions",
    "health": "Data health",
}
ICONS = {
    "overview": ":material/dashboard:",
    "chart": ":material/show_chart:",
    "lot": ":material/grain:",
    "excursions": ":material/report:",
    "health": ":material/database:",
}


def main() -> None:
    st.set_page_config(page_title="lotline", page_icon=":material/monitoring:", layout="wide")
    pages = [
        st.Page(
            PAGES[name], title=TITLES[name], icon=ICONS[name], url_path=URL_PATHS[name] or None,
            default=(name == "overview"),
        )
        for name in PAGES
    ]  # fmt: skip
    pages.append(
        st.Page("views/tool_health.py", title="Tool health", icon=":material/build:", url_path="tool-health")
    )
    st.navigation(pages, position="sidebar").run()


main()
