"""Every demo export ingests through a shipped profile, with exactly the rejects and failures truth.json plans."""

import json
from pathlib import Path

import pytest

jobs = pytest.importorskip("ingest.jobs", reason="needs the ingest job runner (ingest/jobs.py)")
store = pytest.importorskip("warehouse.store", reason="needs the warehouse store")
load = pytest.importorskip("warehouse.load", reason="needs the warehouse loader (rejects listing)")


@pytest.fixture(scope="module")
def ingested(small_demo, tmp_path_factory):
    db = tmp_path_factory.mktemp("wh") / "demo.duckdb"
    report = jobs.ingest_paths([small_demo / "exports"], db=db, user="demo-test")
    truth = json.loads((small_demo / "truth.json").read_text())
    return small_demo, db, report, truth


def _rel(root: Path, path: str) -> str:
    return str(Path(path).resolve().relative_to(root.resolve()))


def test_demo_ingest_every_file_matches_a_shipped_profile(ingested):
    root, _, report, truth = ingested
    failed = {f["file"] for f in truth["planned_failed_files"]}
    exported = sum(truth["files"].values())
    assert len(report.files) == exported
    for r in report.files:
        if _rel(root, r.path) in failed:
            continue
        assert r.status == "loaded", (r.path, r.message)
        assert r.profile, r.path


def test_demo_ingest_fails_exactly_the_planned_files(ingested):
    root, _, report, truth = ingested
    got = {_rel(root, r.path): r.message or "" for r in report.files if r.status == "failed"}
    want = {f["file"]: f["reason_contains"] for f in truth["planned_failed_files"]}
    assert set(got) == set(want)
    for f, reason in want.items():
        assert reason.lower() in got[f].lower(), got[f]


def test_demo_ingest_rejects_exactly_the_planned_rows(ingested):
    root, db, _, truth = ingested
    with store.open_warehouse(db, read_only=True) as con:
        rej = load.list_rejects(con, limit=100_000)
    got = sorted((_rel(root, p), int(line), col, v, reason) for p, line, col, v, reason in rej.iter_rows())
    want = sorted(
        (r["file"], r["line"], r["column"], r["value"], r["reason_contains"])
        for r in truth["planned_rejects"]
    )
    assert [g[:2] for g in got] == [w[:2] for w in want]
    for (_, _, col, value, reason), (_, _, want_col, want_value, want_reason) in zip(got, want, strict=True):
        assert want_reason.lower() in reason.lower(), reason
        if want_col is not None:
            assert col == want_col, (col, want_col)
        if want_value is not None:
            assert value == want_value, (value, want_value)


def test_demo_ingest_stores_the_expected_rows_and_supersedes_the_corrected_lot(ingested):
    _, db, report, truth = ingested
    rx = truth["corrected_reexports"][0]
    with store.open_warehouse(db, read_only=True) as con:
        counts = store.table_counts(con)
    superseded = sum(r.rows_superseded for r in report.files)
    assert superseded == rx["rows"]
    expected = truth["expected_rows"]
    assert counts["measurements"] == expected["measurements"] + rx["rows"]
    for table in (
        "inspections",
        "defect_counts",
        "defects",
        "process_history",
        "tool_events",
        "spec_limits",
        "reference_values",
    ):
        assert counts[table] == expected[table], table
