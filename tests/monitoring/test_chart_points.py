"""chart_points (written by evaluation) equals the points recomputed from the facts, after full and incremental runs.

The oracle is the points query over the current facts (``evaluate.series_points_from_facts``), the read the
dashboard used before the table existed; the data are the incremental property test's lots.
"""

from __future__ import annotations

import tempfile
from pathlib import Path

import pytest
from polars.testing import assert_frame_equal

from tests.monitoring.facts import insert_facts
from tests.monitoring.test_incremental import LOTS, N_BASE, _new_db
from warehouse import evaluate, schema, store
from warehouse.plan import current_plan


def _series_ids(path: Path) -> list[int]:
    with store.open_warehouse(path, read_only=True) as con:
        return [r[0] for r in con.execute("SELECT series_id FROM chart_series ORDER BY series_id").fetchall()]


def _assert_stored_equals_facts(path: Path) -> int:
    """Every series' stored points equal the points computed from the facts; returns the points compared."""
    n = 0
    with store.open_warehouse(path, read_only=True) as con:
        plan = current_plan(con)
        for sid, chart in con.execute(
            "SELECT series_id, chart FROM chart_series ORDER BY series_id"
        ).fetchall():
            stored = evaluate._stored_points(con, plan.entry(chart), series_id=sid)
            assert stored is not None, f"series {sid}: chart_points not current after an evaluation"
            facts = evaluate.series_points_from_facts(con, series_id=sid)
            assert_frame_equal(stored, facts)
            assert_frame_equal(evaluate.series_points(con, series_id=sid), facts)
            n += stored.height
    return n


def _stored_table(path: Path) -> list[tuple]:
    with store.open_warehouse(path, read_only=True) as con:
        return con.execute(
            """SELECT c.chart, c.split_json, p.seq, p.point_key, round(p.value, 9), p.n, round(p.center, 9),
                      round(p.sigma, 9), p.limit_version
               FROM chart_points p JOIN chart_series c USING (series_id) ORDER BY ALL"""
        ).fetchall()


@pytest.fixture()
def tmp():
    with tempfile.TemporaryDirectory() as d:
        yield Path(d)


def test_chart_points_full_run_equals_points_from_the_facts(tmp):
    db = _new_db(tmp, "full.duckdb")
    with store.open_warehouse(db) as con:
        insert_facts(con, schema.MEASUREMENTS, [r for lot in LOTS for r in lot])
    s = evaluate.evaluate_warehouse(db, user="t")
    assert s.mode == "full"
    assert _assert_stored_equals_facts(db) == s.points > 0


def test_chart_points_incremental_runs_equal_points_from_the_facts_and_a_full_run(tmp):
    inc = _new_db(tmp, "inc.duckdb")
    with store.open_warehouse(inc) as con:
        insert_facts(con, schema.MEASUREMENTS, [r for lot in LOTS[:N_BASE] for r in lot])
    evaluate.evaluate_warehouse(inc, user="t")
    # in order (appends), then a late lot (recompute), then the rest split over two files
    order = list(range(N_BASE, len(LOTS)))
    late = order.pop(3)
    batches = [order[:5], [late], order[5:10], order[10:]]
    modes = []
    for batch in batches:
        with store.open_warehouse(inc) as con:
            for i in batch:
                insert_facts(con, schema.MEASUREMENTS, LOTS[i][:2])
                insert_facts(con, schema.MEASUREMENTS, LOTS[i][2:])
        s = evaluate.evaluate_warehouse(inc, user="t")
        modes.append((s.mode, s.series_appended, s.series_recomputed))
        _assert_stored_equals_facts(inc)
    assert any(a > 0 for _, a, _ in modes) and any(r > 0 for _, _, r in modes)
    full = _new_db(tmp, "full.duckdb")
    with store.open_warehouse(full) as con:
        insert_facts(con, schema.MEASUREMENTS, [r for lot in LOTS for r in lot])
    evaluate.evaluate_warehouse(full, user="t")
    assert _stored_table(inc) == _stored_table(full)


def test_chart_points_superseding_reexport_replaces_the_series_points(tmp):
    db = _new_db(tmp, "sup.duckdb")
    with store.open_warehouse(db) as con:
        insert_facts(con, schema.MEASUREMENTS, [r for lot in LOTS[:20] for r in lot])
    evaluate.evaluate_warehouse(db, user="t")
    fixed = [{**r, "value": r["value"] + 1.5} for r in LOTS[17][:3]]  # corrected re-export, fewer sites
    with store.open_warehouse(db) as con:
        insert_facts(con, schema.MEASUREMENTS, fixed, supersede=True)
    s = evaluate.evaluate_warehouse(db, user="t")
    assert s.series_recomputed > 0
    _assert_stored_equals_facts(db)


def test_series_points_after_a_new_limit_version_falls_back_to_the_facts(tmp):
    db = _new_db(tmp, "frz.duckdb")
    with store.open_warehouse(db) as con:
        insert_facts(con, schema.MEASUREMENTS, [r for lot in LOTS for r in lot])
    evaluate.evaluate_warehouse(db, user="t")
    evaluate.freeze_limits(db, chart="wafer-ewma", first=8, reason="longer baseline", user="a.engineer")
    with store.open_warehouse(db, read_only=True) as con:
        plan = current_plan(con)
        for sid in _series_ids(db):
            e = plan.entry(
                con.execute("SELECT chart FROM chart_series WHERE series_id = ?", [sid]).fetchall()[0][0]
            )
            got = evaluate.series_points(con, series_id=sid)
            assert_frame_equal(got, evaluate.series_points_from_facts(con, series_id=sid))
            if e.name == "wafer-ewma":
                assert evaluate._stored_points(con, e, series_id=sid) is None
                assert set(got["limit_version"]) == {2}


def test_evaluation_after_migration_four_runs_full_and_fills_chart_points(tmp):
    db = _new_db(tmp, "mig.duckdb")
    with store.open_warehouse(db) as con:
        insert_facts(con, schema.MEASUREMENTS, [r for lot in LOTS for r in lot])
    evaluate.evaluate_warehouse(db, user="t")
    with store.open_warehouse(db) as con:  # the state migration 4 leaves on a warehouse evaluated before it
        con.execute("DELETE FROM chart_points")
        con.execute("DELETE FROM meta WHERE key = ?", [evaluate.CHART_POINTS_RUN])
    s = evaluate.evaluate_warehouse(db, user="t")
    assert s.mode == "full"
    assert (s.signals_new, s.signals_withdrawn) == (0, 0)
    assert _assert_stored_equals_facts(db) > 0
