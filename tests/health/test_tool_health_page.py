"""The Tool health page under Streamlit's AppTest on the demo warehouse."""

from __future__ import annotations

import shutil
from pathlib import Path

from streamlit.testing.v1 import AppTest

APP = Path(__file__).resolve().parents[2] / "dashboard" / "app.py"


def test_tool_health_page_shows_scorecards_of_the_latest_week(demo_fab, demo_health, tmp_path, monkeypatch):
    db = tmp_path / "demo.duckdb"
    shutil.copyfile(demo_fab[0], db)
    monkeypatch.setenv("LOTLINE_DB", str(db))
    at = AppTest.from_file(str(APP), default_timeout=60)
    at.run()
    at.switch_page("views/tool_health.py").run()
    assert not at.exception
    assert at.title[0].value == "Tool health"
    assert at.selectbox(key="w_week").value == demo_health.week.label
    cards = {i: d.value for i, d in enumerate(at.dataframe)}
    cdsem = next(v for v in cards.values() if "CD-SEM" in v.columns and "monitor" in v.columns)
    assert sorted(cdsem["CD-SEM"]) == sorted(demo_health.cdsem["tool"].to_list())
    insp = next(v for v in cards.values() if "inspection tool" in v.columns)
    assert sorted(insp["inspection tool"]) == ["INS-B1", "INS-B2"]
    text = " ".join(m.value for m in at.markdown)
    assert "INS-B2" in text and "SEM-02" in text
