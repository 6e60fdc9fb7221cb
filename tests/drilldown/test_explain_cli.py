"""`lotline explain` through click's CliRunner on the planted-fault warehouse."""

from __future__ import annotations

import json

from click.testing import CliRunner

import lotline
from tests.drilldown import fixture_warehouse as fw
from warehouse import store


def _metrology_id(db) -> int:
    with store.open_warehouse(db, read_only=True) as con:
        return fw.largest_excursion(con, chart="l2_cd_by_sem", metrology_tool=fw.METROLOGY_TOOL)


def test_explain_cli_report_has_header_table_verdict_and_cautions(fixture_db):
    eid = _metrology_id(fixture_db)
    res = CliRunner().invoke(lotline.cli, ["explain", str(eid), "--db", str(fixture_db)])
    assert res.exit_code == 0, res.output
    lines = res.output.splitlines()
    assert lines[0] == f"Excursion #{eid} (open, high): chart l2_cd_by_sem"
    assert lines[1] == "  layer L2_ETCH  parameter cd_mid  statistic lot_mean  chart ewma"
    assert lines[2] == "  split metrology_tool=SEM-B"
    assert any(line.startswith("Commonality: ") and " affected vs " in line for line in lines)
    assert "  rank  step         kind     candidate        affected  lots         q  flags" in lines
    assert "Process or metrology: likely metrology" in lines
    assert any(line.startswith("  - Monitor wafer on SEM-B moved in the window") for line in lines)
    assert "Cautions:" in lines
    assert any("association, not proof of cause" in line for line in lines)
    assert any("out-of-control action plan (OCAP)" in line for line in lines)


def test_explain_cli_json_round_trips(fixture_db):
    eid = _metrology_id(fixture_db)
    res = CliRunner().invoke(lotline.cli, ["explain", str(eid), "--db", str(fixture_db), "--json"])
    assert res.exit_code == 0, res.output
    d = json.loads(res.output)
    assert d["excursion"]["excursion_id"] == eid
    assert d["verdict"] == "likely metrology"


def test_explain_cli_unknown_id_exits_1_with_fix(fixture_db):
    res = CliRunner().invoke(lotline.cli, ["explain", "9999", "--db", str(fixture_db)])
    assert res.exit_code == 1
    assert "excursion 9999 is not in the warehouse" in res.output
    assert "Fix: run `lotline excursions list` to see the excursion ids." in res.output


def test_explain_cli_missing_warehouse_names_the_fix(tmp_path):
    res = CliRunner().invoke(lotline.cli, ["explain", "1", "--db", str(tmp_path / "none.duckdb")])
    assert res.exit_code == 1
    assert "warehouse not found" in res.output
