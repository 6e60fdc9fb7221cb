"""The benchmark harness's growth exponent: the least-squares slope of log time on log size."""

from __future__ import annotations

import pytest

from bench.run import growth_checks, growth_exponent


def test_growth_exponent_of_an_exact_power_law_is_its_power():
    # t = c * n**k gives log t = log c + k log n exactly, so the fitted slope is k (common practice)
    pts = [(n, 0.004 * n**1.25) for n in (1_000_000, 10_000_000, 30_000_000)]
    assert growth_exponent(pts) == pytest.approx(1.25, rel=1e-12)
    assert growth_exponent([(1_000_000, 2.0)]) is None


def test_growth_checks_flag_ingest_faster_than_linear_growth():
    rows = [
        {"name": "ingest_long_csv", "size": 1_000_000, "seconds": 2.0},
        {"name": "ingest_long_csv", "size": 10_000_000, "seconds": 2.0 * 10**1.2},
        {"name": "evaluate: incremental (one day) vs full", "size": 1_000_000, "baseline_seconds": 1.0},
        {"name": "evaluate: incremental (one day) vs full", "size": 10_000_000, "baseline_seconds": 10.0},
    ]
    checks = {c["name"]: c for c in growth_checks(rows, (1_000_000, 10_000_000))}
    assert checks["growth exponent: ingest time"]["ratio"] == pytest.approx(1.2, abs=1e-3)
    assert checks["growth exponent: ingest time"]["ok"] is False
    assert checks["growth exponent: full evaluation time"]["ratio"] == pytest.approx(1.0, abs=1e-3)
    assert checks["growth exponent: full evaluation time"]["ok"] is True


def test_write_readme_replaces_only_the_benchmark_block(tmp_path):
    from bench.run import README_END, README_START, write_readme

    readme = tmp_path / "README.md"
    readme.write_text(f"# top\n\ntext before\n{README_START}\nold table\n{README_END}\ntext after\n")
    rows = [
        {
            "name": "ingest_long_csv",
            "size": 1000,
            "seconds": 2.0,
            "baseline_seconds": 1.0,
            "ratio": 2.0,
            "target": 1.5,
            "ok": False,
            "growth_exponent": 0.9,
            "stage": "ingest",
        },
    ]
    write_readme(readme, rows, "Last run: test.")
    text = readme.read_text()
    assert text.startswith("# top\n\ntext before\n") and text.endswith(f"{README_END}\ntext after\n")
    assert "old table" not in text and "Last run: test." in text
    assert "| ingest_long_csv | 1,000 | 2.000 | 1.000 | 2.000 | 1.5 | NO |" in text
    assert "| ingest_long_csv | 0.90 |" in text


def test_drill_down_target_is_checked_at_its_window_and_the_cap_is_informative():
    # the < 1 s target is stated for one 2,000-lot window (issue text); 20,000 lots is the bench's cap
    from bench.bench_commonality import _row, bench_sizes

    assert bench_sizes((1_000_000, 10_000_000, 30_000_000)) == (100_000, 1_000_000)
    assert bench_sizes((200_000,)) == (100_000, 200_000)
    slow_window = _row("commonality: association", 100_000, 1.2, 10.0, of_lots=2_000)
    assert (slow_window["ok"], slow_window["target"]) == (False, "< 1 s")
    fast_window = _row("commonality: association", 100_000, 0.4, 10.0, of_lots=2_000)
    assert fast_window["ok"] is True
    cap = _row("commonality: association", 1_000_000, 1.2, 10.0, of_lots=20_000)
    assert cap["ok"] is True and cap["target"].startswith("informative (20,000 lots")


def test_io_floor_reads_and_writes_exactly_the_points_the_incremental_run_evaluates(tmp_path):
    # the floor row is a lower bound only if it does the run's reads: the same points, not fewer
    import shutil

    import duckdb

    from bench.bench_evaluate import build, io_floor, load_day
    from warehouse import evaluate

    db, days, rows = tmp_path / "w.duckdb", 6, 200_000  # every series past its baseline by the last day
    build(db, rows, days)
    evaluate.evaluate_warehouse(db, user="bench")
    load_day(db, rows, days, days - 1)
    copy = tmp_path / "floor.duckdb"
    shutil.copy(db, copy)
    steps = io_floor(copy)
    run = evaluate.evaluate_warehouse(db, user="bench")
    assert run.mode == "incremental" and run.series_recomputed == 0 and run.points > 0
    con = duckdb.connect(str(copy), read_only=True)
    try:
        written = con.execute("SELECT count(*) FROM bench_floor_points").fetchall()[0][0]
    finally:
        con.close()
    assert written == run.points
    assert set(steps) == {"open", "changes", "points reads", "points write", "commit", "close"}
