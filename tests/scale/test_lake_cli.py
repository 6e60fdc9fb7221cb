"""`lotline lake export` from the command line: idempotent re-runs, JSON summary, usage errors."""

from __future__ import annotations

import json
import shutil

import pytest
from click.testing import CliRunner

from lotline import cli
from warehouse.lake import read_manifest

pytestmark = pytest.mark.slow


def test_lake_export_cli_run_twice_second_run_writes_nothing(demo_lake, tmp_path):
    lake = tmp_path / "lake"
    runner = CliRunner()
    first = runner.invoke(cli, ["lake", "export", str(lake), "--db", str(demo_lake.db), "--json"])
    assert first.exit_code == 0, first.output
    written = json.loads(first.output)
    assert written["measurements"]["files"] > 0 and written["signals"]["rows"] == demo_lake.signals
    files_before = sorted(p.relative_to(lake) for p in lake.rglob("*") if p.is_file())
    manifest_before = read_manifest(lake)

    second = runner.invoke(cli, ["lake", "export", str(lake), "--db", str(demo_lake.db), "--json"])

    assert second.exit_code == 0, second.output
    assert all(v == {"rows": 0, "files": 0} for v in json.loads(second.output).values())
    assert sorted(p.relative_to(lake) for p in lake.rglob("*") if p.is_file()) == files_before
    assert read_manifest(lake) == manifest_before


def test_lake_export_cli_text_output_names_tables(demo_lake, tmp_path):
    result = CliRunner().invoke(cli, ["lake", "export", str(tmp_path / "lake"), "--db", str(demo_lake.db)])
    assert result.exit_code == 0, result.output
    assert "measurements:" in result.output and "control_limits:" in result.output


def test_evaluate_cli_spark_engine_without_lake_is_a_usage_error(tmp_path):
    result = CliRunner().invoke(cli, ["evaluate", "--engine", "spark", "--db", str(tmp_path / "x.duckdb")])
    assert result.exit_code == 2
    assert "--lake DIR" in result.output


def test_lake_export_after_new_snapshot_only_changed_tables_get_files(demo_lake, tmp_path):
    # a copy of the lake whose manifest forgets the limits snapshot's fingerprint: only limits are re-exported
    lake = tmp_path / "lake"
    shutil.copytree(demo_lake.lake, lake)
    manifest = read_manifest(lake)
    manifest["snapshots"]["control_limits"]["fingerprint"] = "stale"
    (lake / "_manifest.json").write_text(json.dumps(manifest), encoding="utf-8")
    result = CliRunner().invoke(cli, ["lake", "export", str(lake), "--db", str(demo_lake.db), "--json"])
    assert result.exit_code == 0, result.output
    out = json.loads(result.output)
    assert out["control_limits"]["files"] == 1
    assert {k for k, v in out.items() if v["files"]} == {"control_limits"}
    new = read_manifest(lake)
    assert new["snapshots"]["control_limits"]["id"] == manifest["snapshot_seq"] + 1
