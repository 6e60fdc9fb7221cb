"""explain_excursion on a line with planted faults: the planted chamber ranks first, and the process and the
metrology fault are told apart. The expected answers are the faults planted in fixture_warehouse.py."""

from __future__ import annotations

import json

import pytest

from tests.drilldown import fixture_warehouse as fw
from warehouse import drilldown, store


@pytest.fixture(scope="module")
def explained(fixture_db):
    with store.open_warehouse(fixture_db, read_only=True) as con:
        proc_id = fw.largest_excursion(con, chart="l1_cd_by_chamber", process_tool=fw.PROCESS_TOOL,
                                       chamber=fw.PROCESS_CHAMBER)  # fmt: skip
        metro_id = fw.largest_excursion(con, chart="l2_cd_by_sem", metrology_tool=fw.METROLOGY_TOOL)
        return drilldown.explain_excursion(con, proc_id), drilldown.explain_excursion(con, metro_id)


def test_explain_process_fault_ranks_planted_chamber_first(explained):
    proc, _ = explained
    top = proc.commonality.row(0, named=True)
    assert (top["step"], top["kind"], top["process_tool"], top["chamber"]) == (
        "S2_ETCH",
        "chamber",
        fw.PROCESS_TOOL,
        fw.PROCESS_CHAMBER,
    )
    assert top["n_affected"] == len(proc.affected_lots)
    assert top["q_best"] < 0.01


def test_explain_process_fault_reference_lots_come_from_the_same_chart_and_period(explained):
    proc, _ = explained
    assert proc.reference_lots and not set(proc.reference_lots) & set(proc.affected_lots)
    steps = set(proc.commonality["step"].to_list())
    # history before the measured layer only: S3/S4 run after L1_ETCH is measured
    assert steps == {"S1_DEP", "S2_ETCH"}


def test_explain_process_fault_is_likely_process(explained):
    proc, _ = explained
    assert proc.verdict == "likely process"
    assert proc.attribution.process_votes >= 2 and proc.attribution.metrology_votes == 0


def test_explain_metrology_fault_is_likely_metrology(explained):
    _, metro = explained
    assert metro.verdict == "likely metrology"
    assert metro.evidence.metrology_tool == fw.METROLOGY_TOOL
    # the planted offset is 1.5 nm; the excursion's size on SEM-B must be of that order
    assert 0.75 < metro.evidence.shift_nm < 2.25
    assert metro.evidence.monitor.drift_flagged


def test_explain_signatures_cover_every_affected_wafer(explained):
    proc, _ = explained
    assert set(proc.signatures["lot_id"].to_list()) == set(proc.affected_lots)
    assert proc.signatures.height == 3 * len(proc.affected_lots)  # lot-mean points: every wafer of the lot


def test_explain_to_dict_is_json_with_cautions(explained):
    proc, metro = explained
    for ex in (proc, metro):
        d = json.loads(json.dumps(ex.to_dict()))
        assert d["verdict"] == ex.verdict
        assert d["commonality"][0]["candidate"] == ex.commonality["candidate"][0]
        assert any("association, not proof" in c for c in d["cautions"])
        assert any("OCAP" in c for c in d["cautions"])
        assert any("After-etch data: rework is no longer possible" in c for c in d["cautions"])


def test_explain_unknown_excursion_names_the_fix(fixture_db):
    with pytest.raises(drilldown.ExcursionNotFoundError) as err:
        drilldown.explain_excursion(fixture_db, 10_000)
    msg = str(err.value)
    assert "excursion 10000 is not in the warehouse (found 10000, expected an id from 1 to" in msg
    assert "Fix: run `lotline excursions list` to see the excursion ids." in msg
