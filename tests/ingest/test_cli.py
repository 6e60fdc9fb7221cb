"""The ingest commands through click's CliRunner: exit codes and exact output lines."""

from __future__ import annotations

import json

from click.testing import CliRunner
from ingest_cases import LONG_HEADER, long_row

from lotline import cli


def _run(*args):
    return CliRunner().invoke(cli, [str(a) for a in args], catch_exceptions=False)


def test_cli_init_creates_then_opens(db):
    r = _run("init", "--db", db)
    assert r.exit_code == 0
    assert r.stdout.startswith(f"created {db} (schema version ")
    assert _run("init", "--db", db).stdout.startswith(f"opened {db} (schema version ")


def test_cli_ingest_prints_summary_table_and_exits_0(db, case):
    p = case("measurements/cdsem_long_v2.csv")
    r = _run("ingest", p, "--db", db)
    assert r.exit_code == 0, r.output
    assert r.stdout.splitlines() == [
        f"{'file':<{len(str(p))}}  profile        loaded  rejected  superseded  skipped  status",
        f"{p}  cdsem_long_v2       5         0           0        0  loaded",
    ]
    again = _run("ingest", p, "--db", db)
    assert again.exit_code == 0
    # columns: file, profile (width of "profile"), then right-aligned counts under their headers
    assert (
        again.stdout.splitlines()[1] == f"{p}  {'-':<7}  {'0':>6}  {'0':>8}  {'0':>10}  {'0':>7}  duplicate"
    )


def test_cli_ingest_rejected_rows_exit_1_and_rejects_lists_them(db, write):
    p = write("r.csv", "\n".join([LONG_HEADER, long_row("S01", value="-3"), long_row("S02")]) + "\n")
    r = _run("ingest", p, "--db", db)
    assert r.exit_code == 1
    assert r.stdout.splitlines()[1] == f"{p}  cdsem_long_v2       1         1           0        0  loaded"
    out = _run("rejects", "--db", db)
    assert out.exit_code == 0
    assert out.stdout.splitlines() == [f'{p}:2: Value_nm "-3": a length must be > 0']


def test_cli_rejects_of_a_whole_row_name_file_and_line_without_an_empty_column(db, write):
    row = long_row("S01")
    p = write("d.csv", "\n".join([LONG_HEADER, row, row]) + "\n")
    assert _run("ingest", p, "--db", db).exit_code == 1
    (line,) = _run("rejects", "--db", db).stdout.splitlines()
    assert line.startswith(f"{p}:3: duplicate natural key "), line  # not "...:3:: duplicate"


def test_cli_ingest_failed_file_prints_error_on_stderr_and_exits_1(db, write):
    p = write("e.csv", b"")
    r = _run("ingest", p, "--db", db)
    assert r.exit_code == 1
    assert r.stdout.splitlines()[1].endswith("failed")
    assert (
        r.stderr.splitlines()[0]
        == f'Error: {p}:1:1: file is empty (found "0 bytes", expected a csv header line).'
    )


def test_cli_ingest_json_output(db, case):
    p = case("measurements/cdsem_long_v2.csv")
    r = _run("ingest", p, "--db", db, "--json")
    assert r.exit_code == 0
    doc = json.loads(r.stdout)
    assert doc["exit_code"] == 0
    assert {k: doc["files"][0][k] for k in ("path", "status", "profile", "rows_loaded")} == {
        "path": str(p),
        "status": "loaded",
        "profile": "cdsem_long_v2",
        "rows_loaded": 5,
    }


def test_cli_ingest_missing_path_is_usage_error_2(db, tmp_path):
    r = _run("ingest", tmp_path / "nope.csv", "--db", db)
    assert r.exit_code == 2
    assert f"{tmp_path / 'nope.csv'}: no such file or folder." in r.output


def test_cli_ingest_bad_profile_folder_is_exit_2(db, case, tmp_path):
    (tmp_path / "profiles").mkdir()
    (tmp_path / "profiles" / "x.toml").write_text('name = "x"\nkind = "measurements"\nformat = "xlsx"\n')
    r = _run("ingest", case("measurements/native.csv"), "--db", db, "--profiles", tmp_path / "profiles")
    assert r.exit_code == 2
    assert r.stderr.splitlines()[0] == (
        f"Error: {tmp_path / 'profiles' / 'x.toml'}: unknown format "
        '(found "xlsx", expected csv, parquet, jsonl).'
    )


def test_cli_watch_once_ingests_new_files_once(db, case, tmp_path):
    drop = tmp_path / "cases" / "measurements"
    case("measurements/cdsem_long_v2.csv")
    r = _run("watch", drop, "--db", db, "--once")
    assert r.exit_code == 0
    assert r.stdout.splitlines() == [
        f"{drop / 'cdsem_long_v2.csv'}  cdsem_long_v2  {'5':>6}  {'0':>8}  {'0':>10}  {'0':>7}  loaded"
    ]
    assert _run("watch", drop, "--db", db, "--once").stdout == ""  # nothing new
    assert (drop / "cdsem_long_v2.csv").exists()  # never moved or deleted
