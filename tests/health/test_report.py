"""The weekly HTML report and the tool-health commands."""

from __future__ import annotations

import json
import re

import pytest
from click.testing import CliRunner

import lotline


def test_render_weekly_report_embeds_plotly_once_and_holds_every_scorecard(demo_report, demo_health):
    text = demo_report.read_text(encoding="utf-8")
    assert text.startswith("<!doctype html>")
    assert len(re.findall(r"plotly\.js v\d", text)) == 1  # the library banner appears once
    assert not re.search(r"<script[^>]+src=", text)  # no external script: everything is inline
    for css in ("scorecard cdsem", "scorecard inspection", "scorecard process"):
        assert f"<table class='{css}'>" in text
    for tool in demo_health.cdsem["tool"].to_list() + demo_health.inspection["tool"].to_list():
        assert tool in text
    assert "OCAP" in text and "safety procedures" in text
    assert f"What changed since {demo_health.previous.label}" in text
    assert text.count('class="plotly-graph-div"') == 7


def test_report_weekly_cli_writes_the_html_and_lists_what_needs_a_look(demo_fab, demo_health, tmp_path):
    out = tmp_path / "week.html"
    res = CliRunner().invoke(lotline.cli, ["report", "weekly", "--db", str(demo_fab[0]), "--out", str(out)])
    assert res.exit_code == 0, res.output
    assert res.output.startswith(f"Week {demo_health.week.label}: wrote {out}")
    assert "INS-B2" in res.output
    assert out.stat().st_size > 1_000_000  # plotly.js is inside


def test_report_weekly_cli_bad_week_reports_the_expected_form(demo_fab, tmp_path):
    res = CliRunner().invoke(
        lotline.cli,
        [
            "report",
            "weekly",
            "--db",
            str(demo_fab[0]),
            "--week",
            "2026-48",
            "--out",
            str(tmp_path / "x.html"),
        ],
    )
    assert res.exit_code == 1
    assert res.output == (
        'Error: not an ISO week (found "2026-48", expected YYYY-Www, e.g. 2026-W48).\n'
        "  Fix: pass --week as year, '-W' and the two-digit ISO week number (01..53).\n"
    )


def test_capacity_cli_times_follow_the_shot_noise_scaling():
    # common practice: rate = k * beams * J * C^2 * pixel^4, k from the reference point (computed here by hand)
    k = 0.8 / (1 * 0.5 * 0.3**2 * 10.0**4)
    rate = k * 9 * 0.5 * 0.3**2 * 10.0**4
    res = CliRunner().invoke(
        lotline.cli,
        [
            "capacity",
            "--beams",
            "9",
            "--current-density",
            "0.5",
            "--contrast",
            "0.3",
            "--pixel-nm",
            "10",
            "--care-area-cm2",
            "5",
            "--reference",
            "1,0.5,0.3,10,0.8",
            "--json",
        ],
    )
    assert res.exit_code == 0, res.output
    out = json.loads(res.output)
    assert out["area_rate_cm2_per_h"] == pytest.approx(rate)
    assert out["s_per_wafer"] == pytest.approx(3600 * 5 / rate)
    assert out["wafers_per_hour"] == pytest.approx(rate / 5)
    assert out["half_size_s_per_wafer"] == pytest.approx(16 * 3600 * 5 / rate)  # 2^4 (domain notes)


def test_capacity_cli_without_reference_prints_only_the_relative_cost():
    res = CliRunner().invoke(
        lotline.cli,
        [
            "capacity",
            "--beams",
            "1",
            "--current-density",
            "0.5",
            "--contrast",
            "0.3",
            "--pixel-nm",
            "10",
            "--care-area-cm2",
            "5",
        ],
    )
    assert res.exit_code == 0
    assert (
        res.output.splitlines()[0]
        == "half the defect size: 16x the scan time (rate ∝ pixel⁴ at fixed current density)."
    )
