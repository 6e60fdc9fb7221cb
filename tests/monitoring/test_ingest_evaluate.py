"""`lotline ingest --evaluate` runs an incremental evaluation after loading."""

from __future__ import annotations

import sys
from pathlib import Path

from click.testing import CliRunner

from tests.monitoring.conftest import PLAN

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))
from lotline import cli  # noqa: E402

HEADER = "LotID,WaferID,Slot,Site,X_mm,Y_mm,Product,Layer,Stage,Parameter,Feature,Value_nm,MeasTime,Tool,Recipe,Repeat,SampleType"


def _export(path: Path, lots: range, value=lambda i, s: 45.0 + 0.1 * ((i * 7 + s * 3) % 5 - 2)) -> None:
    lines = [HEADER]
    for i in lots:
        for s in range(1, 6):
            lines.append(
                f"L{i:03d},L{i:03d}-01,1,{s},{s}.0,0.0,AX14,M1_DEV,DEV,CD_MID,,{value(i, s):.3f},"
                f"2026-09-{1 + i // 4:02d}T{(i % 4) * 6:02d}:00:0{s}Z,CDS-1,R1,1,PROD"
            )
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")


def test_ingest_evaluate_flag_evaluates_after_loading(tmp_path):
    db = tmp_path / "w.duckdb"
    plan = tmp_path / "plan.toml"
    plan.write_text(PLAN, encoding="utf-8")
    assert CliRunner().invoke(cli, ["plan", "load", str(plan), "--db", str(db)]).exit_code == 0
    _export(tmp_path / "a.csv", range(0, 24))
    r = CliRunner().invoke(cli, ["ingest", str(tmp_path / "a.csv"), "--db", str(db), "--evaluate"])
    assert r.exit_code == 0, r.output
    assert "evaluated: 1 series, 0 new signals, 0 withdrawn, 0 excursions opened" in r.output
    _export(tmp_path / "b.csv", range(24, 26), value=lambda i, s: 49.0)
    r = CliRunner().invoke(cli, ["ingest", str(tmp_path / "b.csv"), "--db", str(db), "--evaluate"])
    assert r.exit_code == 0, r.output
    assert "evaluated: 1 series, " in r.output and " 0 new signals" not in r.output


def test_ingest_evaluate_without_plan_prints_a_notice(tmp_path):
    db = tmp_path / "w.duckdb"
    _export(tmp_path / "a.csv", range(0, 3))
    r = CliRunner().invoke(cli, ["ingest", str(tmp_path / "a.csv"), "--db", str(db), "--evaluate"])
    assert r.exit_code == 0, r.output
    assert "notice: no monitoring plan loaded; nothing evaluated" in r.output


def test_watch_evaluate_runs_one_evaluation_per_poll_not_per_file(tmp_path):
    import duckdb

    db = tmp_path / "w.duckdb"
    plan = tmp_path / "plan.toml"
    plan.write_text(PLAN, encoding="utf-8")
    assert CliRunner().invoke(cli, ["plan", "load", str(plan), "--db", str(db)]).exit_code == 0
    drop = tmp_path / "drop"
    drop.mkdir()
    for name, lots in (("a.csv", range(0, 12)), ("b.csv", range(12, 24)), ("c.csv", range(24, 30))):
        _export(drop / name, lots)
    r = CliRunner().invoke(cli, ["watch", str(drop), "--db", str(db), "--once", "--evaluate"])
    assert r.exit_code == 0, r.output
    assert r.output.count("loaded") >= 3, r.output
    # three files in one poll: one evaluation after the batch, covering all three
    assert r.output.count("evaluated: ") == 1, r.output
    with duckdb.connect(str(db), read_only=True) as con:
        runs = con.execute("SELECT count(*), max(watermark_file_id) FROM evaluation_runs").fetchall()[0]
        files = con.execute("SELECT max(file_id) FROM source_files").fetchall()[0][0]
    assert runs == (1, files)
