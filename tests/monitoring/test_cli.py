"""Monitoring commands through click's CliRunner: exit codes and output."""

from __future__ import annotations

import json
import sys
from pathlib import Path

import pytest
from click.testing import CliRunner

from tests.monitoring.conftest import PLAN, load, make_lots, site_rows
from warehouse import store

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))
from lotline import cli  # noqa: E402

CAUTION = (
    "Signals advise; they do not decide. The fab's out-of-control action plan (OCAP) and a qualified "
    "engineer decide holds, releases, rework and tool downs."
)


@pytest.fixture()
def db(tmp_path):
    plan = tmp_path / "plan.toml"
    plan.write_text(PLAN, encoding="utf-8")
    path = tmp_path / "wh.duckdb"
    r = CliRunner().invoke(cli, ["plan", "load", str(plan), "--db", str(path)])
    assert r.exit_code == 0, r.output
    lots = make_lots(40)
    lots.append(site_rows("L9999", "L9999-01", [49.0] * 5, lots[-1][0]["measured_at"].replace(hour=23)))
    load(path, lots)
    return path


def test_plan_load_malformed_prints_location_and_exits_1(tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text(
        '[[chart]]\nname = "x"\nselect = { layer = "M1", parameter = "cd_mid" }\n'
        'statistic = "wafer_mean"\nchart = "ewmaa"\n',
        encoding="utf-8",
    )
    r = CliRunner().invoke(cli, ["plan", "load", str(bad), "--db", str(tmp_path / "w.duckdb")])
    assert r.exit_code == 1
    assert r.output == (
        f'Error: {bad}:5:9: chart "ewmaa" is not known (expected one of individuals, xbar_s, xbar_r, ewma, cusum, u, '
        'laney_u, negbin_u).\n  Fix: did you mean "ewma"? Use one of the listed values.\n'
    )
    assert not (tmp_path / "w.duckdb").exists()


def test_plan_show_prints_arl_beside_rules(db):
    r = CliRunner().invoke(cli, ["plan", "show", "--db", str(db), "--json"])
    assert r.exit_code == 0, r.output
    rows = json.loads(r.output)
    assert rows[0]["chart"] == "m1-cd" and rows[0]["rules"] == ["we1", "we2"]
    assert set(rows[0]["in_control_arl"]) == {"rules", "chart", "combined"}
    text = CliRunner().invoke(cli, ["plan", "show", "--db", str(db)]).output
    assert "in-control ARL" in text


def test_evaluate_then_excursions_list_json_has_the_documented_keys(db):
    r = CliRunner().invoke(cli, ["evaluate", "--db", str(db)])
    assert r.exit_code == 0, r.output
    assert r.output.startswith("full evaluation: 1 series")
    assert r.output.endswith(CAUTION + "\n")
    r = CliRunner().invoke(cli, ["excursions", "list", "--open", "--json", "--db", str(db)])
    rows = json.loads(r.output)
    assert rows and set(rows[0]) >= {
        "id",
        "state",
        "severity",
        "chart",
        "layer",
        "parameter",
        "split",
        "rules",
        "first_at",
        "last_at",
        "lots",
    }
    assert rows[0]["split"] == {"metrology_tool": "CDS-1"}
    assert "L9999" in rows[0]["lots"]


def test_excursions_set_records_the_disposition(db):
    CliRunner().invoke(cli, ["evaluate", "--db", str(db)])
    r = CliRunner().invoke(
        cli, ["excursions", "set", "1", "--state", "acknowledged", "--by", "a.engineer", "--db", str(db)]
    )
    assert r.exit_code == 0, r.output
    assert r.output == f"excursion #1: open -> acknowledged by a.engineer\n{CAUTION}\n"
    r = CliRunner().invoke(
        cli, ["excursions", "set", "1", "--state", "closed", "--by", "a.engineer", "--db", str(db)]
    )
    assert r.exit_code == 1
    assert "closing an excursion needs a classification" in r.output


def test_limits_freeze_show_history(db):
    CliRunner().invoke(cli, ["evaluate", "--db", str(db)])
    r = CliRunner().invoke(
        cli,
        [
            "limits",
            "freeze",
            "--chart",
            "m1-cd",
            "--window",
            "2026-09-01..2026-09-06",
            "--reason",
            "first week",
            "--by",
            "a.engineer",
            "--db",
            str(db),
        ],
    )
    assert r.exit_code == 0, r.output
    assert r.output.startswith("series 1: v2 center ")
    hist = json.loads(CliRunner().invoke(cli, ["limits", "history", "--json", "--db", str(db)]).output)
    assert [h["frozen_by"] for h in hist] == ["lotline-auto", "a.engineer"]
    assert hist[1]["reason"] == "first week"
    # 6 h spacing from 2026-09-01 00:00 to 2026-09-06 00:00 inclusive: 21 points
    assert hist[1]["baseline_n"] == 21
    shown = json.loads(CliRunner().invoke(cli, ["limits", "show", "--json", "--db", str(db)]).output)
    assert shown[0]["limit_version"] == 2


def test_limits_freeze_unknown_chart_suggests_the_name(db):
    r = CliRunner().invoke(cli, ["limits", "freeze", "--chart", "m1-cdd", "--reason", "x", "--db", str(db)])
    assert r.exit_code == 1
    assert 'the monitoring plan has no chart "m1-cdd"' in r.output and 'did you mean "m1-cd"?' in r.output


def test_limits_show_and_history_of_an_unknown_chart_say_so_instead_of_printing_nothing(db):
    CliRunner().invoke(cli, ["evaluate", "--db", str(db)])
    for cmd in ("show", "history"):
        r = CliRunner().invoke(cli, ["limits", cmd, "--chart", "m1-cdd", "--db", str(db)])
        assert r.exit_code == 1, cmd
        assert 'the monitoring plan has no chart "m1-cdd"' in r.output and 'did you mean "m1-cd"?' in r.output
        ok = CliRunner().invoke(cli, ["limits", cmd, "--chart", "m1-cd", "--db", str(db)])
        assert ok.exit_code == 0 and " m1-cd " in ok.output, ok.output
        assert " metrology_tool=CDS-1: " in ok.output  # the split as text
        assert '{"metrology_tool"' not in ok.output  # not as stored JSON


def test_excursions_list_text_shows_ten_lots_and_how_many_more():
    from lotline import _lots_text

    lots = [f"L{i:02d}" for i in range(14)]
    assert _lots_text(lots) == ",".join(lots[:10]) + " (+4 more)"
    assert _lots_text(lots[:3]) == "L00,L01,L02"


def test_every_monitoring_command_help_ends_with_an_example():
    for args in (
        ["plan", "load"],
        ["plan", "show"],
        ["limits", "show"],
        ["limits", "freeze"],
        ["limits", "history"],
        ["evaluate"],
        ["excursions", "list"],
        ["excursions", "set"],
    ):
        r = CliRunner().invoke(cli, [*args, "--help"])
        assert r.exit_code == 0
        assert "Example: lotline " in r.output, args


def test_evaluate_without_plan_says_how_to_load_one(tmp_path):
    path = tmp_path / "w.duckdb"
    store.init_warehouse(path)
    r = CliRunner().invoke(cli, ["evaluate", "--db", str(path)])
    assert r.exit_code == 1
    assert r.output == (
        "Error: no monitoring plan is loaded.\n  Fix: run `lotline plan load PLAN.toml` first.\n"
    )
