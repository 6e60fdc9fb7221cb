"""Excursions: grouping of signals and the append-only disposition trail."""

from __future__ import annotations

from datetime import datetime

import pytest

from tests.monitoring.conftest import load, make_lots, site_rows
from warehouse import evaluate, excursions, queries, store


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
