"""Process-or-metrology vote. The decision rules are common practice (no published table to check against):
a gauge that moved shows on its own monitor wafer and in its offset to the fleet, not on other gauges."""

from __future__ import annotations

import math

import numpy as np
import pytest

from spc.attribution import (
    AttributionSettings,
    CrossToolReading,
    ExcursionEvidence,
    FleetOffset,
    MonitorEvidence,
    classify_excursion,
)

QUIET_MONITOR = MonitorEvidence(n_points=8, max_abs_z=1.2)
MOVED_MONITOR = MonitorEvidence(n_points=8, max_abs_z=1.5, drift_flagged=True)
OTHERS_SEE_IT = (
    CrossToolReading("SEM-1", n_lots=6, shift_nm=1.1, shift_se_nm=0.2),
    CrossToolReading("SEM-2", n_lots=5, shift_nm=0.9, shift_se_nm=0.25),
)
OTHERS_DO_NOT = (CrossToolReading("SEM-1", n_lots=9, shift_nm=0.1, shift_se_nm=0.15),)
MATCHED = FleetOffset(offset_nm=0.1, ci_low_nm=-0.2, ci_high_nm=0.4)
OFFSET_MOVED = FleetOffset(offset_nm=0.9, ci_low_nm=0.6, ci_high_nm=1.2)


def _ev(**kw):
    return ExcursionEvidence(metrology_tool="SEM-3", shift_nm=1.0, **kw)


def test_classify_excursion_all_evidence_for_process_is_likely_process():
    res = classify_excursion(_ev(monitor=QUIET_MONITOR, cross_tool=OTHERS_SEE_IT, fleet_offset=MATCHED))
    assert (res.verdict, res.process_votes, res.metrology_votes) == ("likely process", 3, 0)
    assert (
        res.evidence[0]
        == "Monitor wafer on SEM-3 stayed in control (8 readings, largest |z| = 1.2): the gauge held (process)."
    )
    assert "OCAP" in res.caution


def test_classify_excursion_gauge_moved_is_likely_metrology():
    res = classify_excursion(_ev(monitor=MOVED_MONITOR, cross_tool=OTHERS_DO_NOT, fleet_offset=OFFSET_MOVED))
    assert (res.verdict, res.process_votes, res.metrology_votes) == ("likely metrology", 0, 3)
    assert res.evidence[1].endswith("they do not see it, so it is local to SEM-3 (metrology).")
    assert res.evidence[2] == (
        "SEM-3 reads +0.90 nm to the fleet (interval +0.60 to +1.20 nm; baseline +0.00 nm): "
        "its offset moved by +0.90 nm, 90 % of the shift (metrology)."
    )


def test_classify_excursion_conflicting_evidence_is_undecided():
    res = classify_excursion(_ev(monitor=MOVED_MONITOR, cross_tool=OTHERS_SEE_IT, fleet_offset=MATCHED))
    assert (res.verdict, res.process_votes, res.metrology_votes) == ("undecided", 2, 1)


def test_classify_excursion_single_line_of_evidence_is_undecided():
    res = classify_excursion(_ev(cross_tool=OTHERS_SEE_IT))
    assert res.verdict == "undecided" and res.process_votes == 1
    assert res.evidence[0] == "No monitor-wafer readings on SEM-3 in the window: no vote."
    assert res.evidence[2] == "No fleet offset for SEM-3 in the window: no vote."


def test_classify_excursion_pools_other_tools_by_inverse_variance():
    res = classify_excursion(_ev(cross_tool=OTHERS_SEE_IT))
    w = np.array([1 / 0.2**2, 1 / 0.25**2])
    pooled = (w * [1.1, 0.9]).sum() / w.sum()  # inverse-variance weighted mean (common practice)
    se = math.sqrt(1 / w.sum())
    assert f"{pooled:+.2f} nm ± {se:.2f} (SE)" in res.evidence[1]
    assert "(SEM-1, SEM-2; 11 lots)" in res.evidence[1]


def test_classify_excursion_ignores_tools_with_too_few_lots():
    few = (CrossToolReading("SEM-9", n_lots=2, shift_nm=1.0, shift_se_nm=0.1),)
    res = classify_excursion(_ev(cross_tool=few))
    assert res.evidence[1].endswith("no vote.") and res.process_votes == 0


def test_classify_excursion_negative_shift_is_symmetric():
    ev = ExcursionEvidence(
        metrology_tool="SEM-3",
        shift_nm=-1.0,
        monitor=QUIET_MONITOR,
        cross_tool=tuple(
            CrossToolReading(r.metrology_tool, r.n_lots, -r.shift_nm, r.shift_se_nm) for r in OTHERS_SEE_IT
        ),
        fleet_offset=FleetOffset(offset_nm=-0.9, ci_low_nm=-1.2, ci_high_nm=-0.6),
    )
    res = classify_excursion(ev)
    assert (res.process_votes, res.metrology_votes, res.verdict) == (2, 1, "undecided")


def test_classify_excursion_monitor_with_few_points_casts_no_vote():
    res = classify_excursion(_ev(monitor=MonitorEvidence(n_points=2, max_abs_z=0.5)))
    assert res.evidence[0] == "Only 2 monitor reading(s) on SEM-3 in the window (need 3): no vote."


@pytest.mark.parametrize("margin,verdict", [(1, "likely process"), (2, "undecided")])
def test_classify_excursion_margin_setting_controls_the_verdict(margin, verdict):
    res = classify_excursion(_ev(cross_tool=OTHERS_SEE_IT), AttributionSettings(margin=margin))
    assert res.verdict == verdict


@pytest.mark.parametrize(
    ("monitor_shift", "votes"),
    [
        (0.9, (0, 1)),  # moved the same way and explains most of the shift: metrology
        (-0.3, (0, 0)),  # moved the other way: it cannot explain the excursion, no vote
        (0.2, (0, 0)),  # moved the same way but explains only a fifth of it: no vote
    ],
)
def test_classify_excursion_monitor_vote_needs_same_direction_and_size(monitor_shift, votes):
    # common practice: a gauge drift explains an excursion only if it points the same way and is comparable.
    moved = MonitorEvidence(n_points=8, max_abs_z=4.0, drift_flagged=True, shift_nm=monitor_shift)
    res = classify_excursion(_ev(monitor=moved))
    assert (res.process_votes, res.metrology_votes) == votes
    if votes == (0, 0):
        assert "does not account for the shift, no vote." in res.evidence[0]
