"""End to end on the demo fab: each injected fault's excursion is explained as the ground truth says.

Ground truth: ``DemoData.faults`` (the responsible process tool, chamber or metrology tool of each fault) and
``DemoData.fault_lots`` (the lots each fault touched), the same facts ``truth.json`` records. The matching
excursion of a fault is the one of its layer that holds the most of the fault's lots.
"""

from __future__ import annotations

import json

import pytest

from warehouse import drilldown, store

# Faults with a responsible process tool or chamber, and the chart of the demo check plan that watches them.
PROCESS_FAULTS = ("chamber_shift", "slow_drift", "bake_plate_edge", "defect_burst", "scratch")
MIN_LOTS_FOR_RANKING = 3
"""A commonality ranking needs a few affected lots: with one lot every chamber it ran ties (common practice)."""


def _fault(data, kind: str):
    return next(f for f in data.faults if f.kind == kind)


def _matching(con, data, fault, *, layer: str) -> tuple[int, int]:
    lots = set(data.fault_lots.get(fault.id, []))
    rows = con.execute(
        "SELECT e.excursion_id, e.lots_json FROM excursions e JOIN chart_series s USING (series_id) "
        "WHERE s.layer = ? ORDER BY e.excursion_id",
        [layer],
    ).fetchall()
    best = max(rows, key=lambda r: (len(lots & set(json.loads(r[1]))), -r[0]))
    return best[0], len(lots & set(json.loads(best[1])))


@pytest.fixture(scope="module")
def demo(demo_db):
    path, data = demo_db
    out = {}
    with store.open_warehouse(path, read_only=True) as con:
        for kind in PROCESS_FAULTS:
            f = _fault(data, kind)
            eid, overlap = _matching(con, data, f, layer=f.layer)
            out[kind] = (f, overlap, drilldown.explain_excursion(con, eid))
        f = _fault(data, "metrology_offset")
        eid, overlap = _matching(con, data, f, layer="CONT_ETCH")  # the plan charts CONT_ETCH per CD-SEM
        out["metrology_offset"] = (f, overlap, drilldown.explain_excursion(con, eid))
    out["_data"] = data
    return out


@pytest.mark.parametrize("kind", PROCESS_FAULTS)
def test_explain_demo_fault_excursion_ranks_the_responsible_chamber_first(demo, kind):
    fault, overlap, ex = demo[kind]
    assert overlap >= 1, f"{fault.id}: no excursion holds a lot of the fault"
    if len(ex.affected_lots) < MIN_LOTS_FOR_RANKING:
        pytest.skip(
            f"{fault.id}: its excursion has {len(ex.affected_lots)} lot(s); too few to rank (see the scratch "
            "cluster check instead)"
        )
    top = ex.commonality.row(0, named=True)
    assert (top["process_tool"], top["chamber"]) == (fault.process_tool, fault.chamber), ex.commonality.head(
        5
    )


def test_explain_demo_metrology_offset_is_likely_metrology(demo):
    fault, overlap, ex = demo["metrology_offset"]
    assert overlap >= 10
    assert ex.excursion["split"]["metrology_tool"] == fault.metrology_tool
    assert ex.verdict == "likely metrology", ex.attribution.evidence


def test_explain_demo_scratch_is_found_as_a_cluster(demo):
    fault, _, ex = demo["scratch"]
    fault_lots = demo["_data"].fault_lots[fault.id]
    assert ex.defect_clusters is not None
    scratches = ex.defect_clusters.filter(ex.defect_clusters["kind"] == "scratch")
    assert scratches.height == 1
    r = scratches.row(0, named=True)
    assert r["lot_id"] in set(ex.affected_lots) and [r["lot_id"]] == fault_lots
    # the demo draws 45 scratch defects along a 60 mm line (demo_fab.faults F07); random defects may join it
    assert r["n_defects"] >= 45
    assert 50.0 <= r["length_mm"] <= 70.0
