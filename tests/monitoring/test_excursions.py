"""Excursions: grouping of signals and the append-only disposition trail."""

from __future__ import annotations

from datetime import datetime, timedelta

import pytest

from tests.monitoring.conftest import PLAN, load, make_lots, site_rows
from warehouse import evaluate, excursions, queries, store
from warehouse.plan import parse_plan, store_plan


def _with_two_bursts(wh):
    lots = make_lots(60)
    # two separate out-of-control bursts: lots 30-31 and lot 50 (far above the 45 nm process)
    for i in (30, 31, 50):
        lots[i] = site_rows(f"L{i:04d}", f"L{i:04d}-01", [49.0] * 5, lots[i][0]["measured_at"])
    load(wh, lots)
    evaluate.evaluate_warehouse(wh, user="t")


def test_group_signals_consecutive_points_share_an_excursion_distant_ones_do_not(wh):
    _with_two_bursts(wh)
    with store.open_warehouse(wh, read_only=True) as con:
        exc = queries.list_excursions(con).sort("first_at")
    assert exc.height == 2
    assert exc["lots_json"].to_list()[0].startswith('["L0030","L0031"')
    assert exc["state"].to_list() == ["open", "open"]
    assert exc["severity"].to_list() == ["high", "high"]


def test_record_disposition_appends_audit_rows_and_never_rewrites_them(wh):
    _with_two_bursts(wh)
    with store.open_warehouse(wh, read_only=True) as con:
        xid = int(queries.list_excursions(con).sort("first_at")["excursion_id"][0])
    excursions.record_disposition(wh, xid, user="a.engineer", state="acknowledged", comment="looking")
    excursions.record_disposition(
        wh,
        xid,
        user="a.engineer",
        state="closed",
        classification="measurement",
        cause="metrology",
        action="re-measured on SEM-02",
        lots=["L0031", "L0030"],
    )
    with store.open_warehouse(wh, read_only=True) as con:
        hist = queries.excursion_history(con, excursion_id=xid)
        det = queries.excursion_detail(con, excursion_id=xid)
    assert hist.select("changed_by", "from_state", "to_state").rows() == [
        ("lotline-auto", None, "open"),
        ("a.engineer", "open", "acknowledged"),
        ("a.engineer", "acknowledged", "closed"),
    ]
    assert hist["lots_affected_json"][2] == '["L0030","L0031"]'
    assert hist["classification"][2] == "measurement"
    assert det["state"][0] == "closed"


def test_record_disposition_refuses_closing_without_classification(wh):
    _with_two_bursts(wh)
    with pytest.raises(excursions.DispositionError, match="closing an excursion needs a classification"):
        excursions.record_disposition(wh, 1, user="a.engineer", state="closed")


def test_record_disposition_unknown_id_names_the_fix(wh):
    _with_two_bursts(wh)
    with pytest.raises(excursions.DispositionError) as err:
        excursions.record_disposition(wh, 999, user="a.engineer", state="acknowledged")
    assert str(err.value) == (
        "no excursion with this id (found 999).\n  Fix: list them with `lotline excursions list`."
    )


def test_excursion_whose_signals_are_withdrawn_closes_with_an_audit_row(wh):
    lots = make_lots(40)
    lots.append(site_rows("L9999", "L9999-01", [49.0] * 5, datetime(2026, 9, 15)))
    load(wh, lots)
    evaluate.evaluate_warehouse(wh, user="t")
    from tests.monitoring.facts import insert_facts
    from warehouse import schema

    with store.open_warehouse(wh) as con:
        insert_facts(
            con,
            schema.MEASUREMENTS,
            site_rows("L9999", "L9999-01", [45.0] * 5, datetime(2026, 9, 15)),
            supersede=True,
        )
    evaluate.evaluate_warehouse(wh, user="t")
    with store.open_warehouse(wh, read_only=True) as con:
        exc = queries.list_excursions(con)
        hist = queries.excursion_history(con, excursion_id=int(exc["excursion_id"][0]))
    assert exc["state"].to_list() == ["closed"]
    assert hist["to_state"].to_list() == ["open", "closed"]
    assert hist["comment"][1] == "all signals withdrawn (superseded data or re-evaluation)"


def _excursion_rows(wh) -> list[tuple]:
    with store.open_warehouse(wh, read_only=True) as con:
        return con.execute(
            """SELECT e.chart, e.state, e.severity, e.first_at, e.last_at, e.rules_json, e.lots_json, e.n_signals,
                      (SELECT count(*) FROM excursion_audit a WHERE a.excursion_id = e.excursion_id),
                      (SELECT list(s.point_key || '/' || s.rule ORDER BY s.point_key, s.rule) FROM signals s
                       WHERE s.excursion_id = e.excursion_id AND s.withdrawn_at IS NULL)
               FROM excursions e ORDER BY e.first_at"""
        ).fetchall()


def test_signals_of_appended_points_group_as_in_one_run(tmp_path):
    """An excursion that goes on across runs (the second run appends points to the series) ends with the
    same signals, lots, rules, times and audit rows as when the same data is evaluated in one run."""
    lots = make_lots(60)
    # a burst at lots 30-31, one at lot 33 (one unsignalled point later: the same excursion) and one at 50
    for i in (30, 31, 33, 50):
        lots[i] = site_rows(f"L{i:04d}", f"L{i:04d}-01", [49.0] * 5, lots[i][0]["measured_at"])
    one, two = tmp_path / "one.duckdb", tmp_path / "two.duckdb"
    for p in (one, two):
        with store.open_warehouse(p, create=True) as con:
            store_plan(con, parse_plan(PLAN, path="p.toml"), user="t")
    load(one, lots)
    evaluate.evaluate_warehouse(one, user="t")
    load(two, lots[:32])
    evaluate.evaluate_warehouse(two, user="t")
    load(two, lots[32:])
    run = evaluate.evaluate_warehouse(two, user="t")
    assert run.mode == "incremental" and run.series_appended == 1 and run.series_recomputed == 0
    assert run.signals_new > 0
    got, want = _excursion_rows(two), _excursion_rows(one)
    assert got == want
    # the first burst's excursion went on in the second run: its lots span both loads
    assert any('"L0031"' in r[6] and '"L0033"' in r[6] for r in got)
    assert any(r[6].startswith('["L0050"') for r in got)


@pytest.mark.parametrize("gap", [0, 2, 20])
def test_excursion_gap_of_the_plan_entry_sets_how_far_apart_signals_still_share_an_excursion(tmp_path, gap):
    # the grouping rule (issue 4): a signal joins its series' open excursion when at most `gap` unsignalled
    # points lie between them; counted here from the stored signals' point numbers
    path = tmp_path / "wh.duckdb"
    with store.open_warehouse(path, create=True) as con:
        store_plan(con, parse_plan(PLAN + f"excursion_gap = {gap}\n", path="plan.toml"), user="t")
    _with_two_bursts(path)
    with store.open_warehouse(path, read_only=True) as con:
        seqs = sorted(
            {r[0] for r in con.execute("SELECT point_seq FROM signals WHERE withdrawn_at IS NULL").fetchall()}
        )
        n_exc = queries.list_excursions(con).height
    expected = 1 + sum(1 for a, b in zip(seqs, seqs[1:], strict=False) if b - a > gap + 1)
    assert n_exc == expected
    if gap == 20:  # the two bursts (lots 30-31 and lot 50) are 18 unsignalled points apart: one excursion
        assert n_exc == 1


def test_first_signal_on_lots_counts_an_excursion_from_its_first_signal_on_those_lots(tmp_path):
    # with a wide gap the burst at lot 50 joins the excursion opened at lot 30; asked about lot 50, the
    # excursion counts from lot 50's point, not from its own first point
    path = tmp_path / "wh.duckdb"
    with store.open_warehouse(path, create=True) as con:
        store_plan(con, parse_plan(PLAN + "excursion_gap = 20\n", path="plan.toml"), user="t")
    _with_two_bursts(path)
    with store.open_warehouse(path, read_only=True) as con:
        (exc,) = queries.list_excursions(con).iter_rows(named=True)
        lot50 = con.execute("SELECT min(measured_at) FROM measurements WHERE lot_id = 'L0050'").fetchall()[0][
            0
        ]
        hits = queries.first_signal_on_lots(
            con, lot_ids=["L0050"], start=datetime(2026, 9, 1), end=datetime(2026, 10, 1)
        )
        none = queries.first_signal_on_lots(
            con, lot_ids=["L0050"], start=lot50 + timedelta(hours=1), end=datetime(2026, 10, 1)
        )
    assert exc["first_at"] < lot50
    assert hits.rows() == [(exc["excursion_id"], lot50)]  # a wafer mean's time is its first site's
    assert none.height == 0
