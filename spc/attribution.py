"""Did the process move, or the gauge? A small, explainable vote over three lines of evidence.

When a chart of measured lots shifts, the first question is whether the wafers changed or the metrology
tool that measured them did. Three pieces of evidence answer it, each casting at most one vote:

1. **Monitor wafers on the measuring tool.** A monitor (a reference wafer measured on a schedule) that
   drifted or read out of its limits in the window says the gauge moved: a vote for *metrology*, provided
   (when the monitor's own shift is known) that it moved the same way as the excursion and by at least
   ``explain_fraction`` of it; a monitor that moved the other way or too little casts no vote. A monitor
   with enough readings and no flag says the gauge held: a vote for *process*. Too few readings: no vote.
2. **The same layer's lots on other metrology tools.** Their shifts are pooled by inverse variance. If they
   show the shift too (same sign, at least ``explain_fraction`` of its size, and ``cross_tool_z`` standard
   errors from zero): *process*. If they clearly do not (less than ``explain_fraction`` of it, and
   ``cross_tool_z`` standard errors short of it): *metrology*. In between, or no readings: no vote.
3. **The measuring tool's offset to the fleet.** If its interval excludes the offset it had in the
   baseline, and the change points the same way as the shift and covers at least ``explain_fraction`` of
   it: *metrology*. If the interval still holds the baseline offset: *process*. Otherwise: no vote.

The verdict is "likely metrology" or "likely process" when one side leads by at least ``margin`` votes
(default 2: two agreeing lines of evidence and none against), else "undecided". Every vote, and every
missing piece, is written out as a sentence.

This advises; it does not decide. The fab's out-of-control action plan (OCAP) and a qualified engineer
decide holds, releases and tool downs.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

__all__ = [
    "Attribution",
    "AttributionSettings",
    "CrossToolReading",
    "ExcursionEvidence",
    "FleetOffset",
    "MonitorEvidence",
    "classify_excursion",
]

LIKELY_PROCESS = "likely process"
LIKELY_METROLOGY = "likely metrology"
UNDECIDED = "undecided"
CAUTION = (
    "Advice only: the fab's out-of-control action plan (OCAP) and a qualified engineer decide holds, "
    "releases and tool downs."
)


@dataclass(frozen=True)
class MonitorEvidence:
    """Monitor-wafer readings of the measuring tool in the excursion window."""

    n_points: int  #: monitor readings in the window
    max_abs_z: float | None = None  #: largest |z| of a reading against the monitor's baseline limits
    drift_flagged: bool = False  #: a drift chart (EWMA, CUSUM) on the monitor signalled in the window
    shift_nm: float | None = None  #: monitor mean in the window minus its baseline mean, when known


@dataclass(frozen=True)
class CrossToolReading:
    """The same layer's lots measured on another metrology tool in the window."""

    metrology_tool: str  #: the other tool
    n_lots: int  #: lots it measured in the window
    shift_nm: float  #: their mean in the window minus the baseline mean
    shift_se_nm: float  #: standard error of that shift


@dataclass(frozen=True)
class FleetOffset:
    """The measuring tool's offset to the fleet of tools, now and in the baseline."""

    offset_nm: float  #: offset to the fleet mean in the window
    ci_low_nm: float  #: lower end of its interval
    ci_high_nm: float  #: upper end of its interval
    baseline_offset_nm: float = 0.0  #: offset the tool had in the baseline (0 if matched)


@dataclass(frozen=True)
class ExcursionEvidence:
    """What is known about one excursion: its size and the three lines of evidence (any may be missing)."""

    metrology_tool: str  #: tool that measured the excursion
    shift_nm: float  #: excursion size on that tool: window mean minus baseline mean
    monitor: MonitorEvidence | None = None
    cross_tool: tuple[CrossToolReading, ...] = ()
    fleet_offset: FleetOffset | None = None


@dataclass(frozen=True)
class AttributionSettings:
    """Thresholds of the vote; the defaults are common practice for 3-sigma charts."""

    monitor_z: float = 3.0  #: |z| of a monitor reading that counts as out of limits
    min_monitor_points: int = 3  #: readings needed before a quiet monitor counts as a vote
    cross_tool_z: float = 2.0  #: standard errors that make a cross-tool shift (or its absence) clear
    min_cross_lots: int = 3  #: lots an other tool must have measured for its reading to count
    explain_fraction: float = 0.5  #: share of the shift a line of evidence must account for
    margin: int = 2  #: votes one side must lead by for a verdict


@dataclass(frozen=True)
class Attribution:
    """Verdict, the votes behind it, and one sentence per line of evidence."""

    verdict: str
    process_votes: int
    metrology_votes: int
    evidence: tuple[str, ...] = field(default_factory=tuple)
    caution: str = CAUTION


def _n(x: float) -> str:
    return f"{x:+.2f} nm"


def _monitor_vote(ev: ExcursionEvidence, s: AttributionSettings) -> tuple[int, str]:
    m, tool = ev.monitor, ev.metrology_tool
    if m is None or m.n_points == 0:
        return 0, f"No monitor-wafer readings on {tool} in the window: no vote."
    z = m.max_abs_z
    if m.drift_flagged or (z is not None and z >= s.monitor_z):
        why = "a drift chart signalled" if m.drift_flagged else f"a reading at |z| = {z:.1f}"
        if m.shift_nm is not None and ev.shift_nm != 0:
            same_way = math.copysign(1.0, m.shift_nm) == math.copysign(1.0, ev.shift_nm)
            if not same_way or abs(m.shift_nm) < s.explain_fraction * abs(ev.shift_nm):
                return 0, (
                    f"Monitor wafer on {tool} moved in the window ({why}), but by {_n(m.shift_nm)} against an "
                    f"excursion of {_n(ev.shift_nm)}: it does not account for the shift, no vote."
                )
        return (
            -1,
            f"Monitor wafer on {tool} moved in the window ({why}): the gauge itself changed (metrology).",
        )
    if m.n_points >= s.min_monitor_points:
        ztxt = f", largest |z| = {z:.1f}" if z is not None else ""
        return 1, (
            f"Monitor wafer on {tool} stayed in control ({m.n_points} readings{ztxt}): the gauge held (process)."
        )
    return 0, (
        f"Only {m.n_points} monitor reading(s) on {tool} in the window (need {s.min_monitor_points}): no vote."
    )


def _cross_vote(ev: ExcursionEvidence, s: AttributionSettings) -> tuple[int, str]:
    usable = [r for r in ev.cross_tool if r.n_lots >= s.min_cross_lots and r.shift_se_nm > 0]
    if not usable:
        return 0, "No other metrology tool measured enough lots of this layer in the window: no vote."
    w = [1.0 / r.shift_se_nm**2 for r in usable]
    pooled = sum(wi * r.shift_nm for wi, r in zip(w, usable, strict=True)) / sum(w)
    se = math.sqrt(1.0 / sum(w))
    tools = ", ".join(r.metrology_tool for r in usable)
    lots = sum(r.n_lots for r in usable)
    shift = ev.shift_nm
    head = (
        f"Other tools ({tools}; {lots} lots) read a shift of {_n(pooled)} ± {se:.2f} (SE) against {_n(shift)}"
    )
    same_way = pooled * shift > 0 and abs(pooled) >= s.explain_fraction * abs(shift)
    if same_way and abs(pooled) / se >= s.cross_tool_z:
        return 1, f"{head}: they see it too, so the wafers changed (process)."
    if abs(pooled) < s.explain_fraction * abs(shift) and abs(shift - pooled) / se >= s.cross_tool_z:
        return -1, f"{head}: they do not see it, so it is local to {ev.metrology_tool} (metrology)."
    return 0, f"{head}: not clear either way, no vote."


def _fleet_vote(ev: ExcursionEvidence, s: AttributionSettings) -> tuple[int, str]:
    f = ev.fleet_offset
    if f is None:
        return 0, f"No fleet offset for {ev.metrology_tool} in the window: no vote."
    change = f.offset_nm - f.baseline_offset_nm
    head = (
        f"{ev.metrology_tool} reads {_n(f.offset_nm)} to the fleet (interval {f.ci_low_nm:+.2f} to "
        f"{f.ci_high_nm:+.2f} nm; baseline {_n(f.baseline_offset_nm)})"
    )
    if f.ci_low_nm <= f.baseline_offset_nm <= f.ci_high_nm:
        return 1, f"{head}: still matched to the fleet (process)."
    share = change / ev.shift_nm if ev.shift_nm else math.inf
    if share >= s.explain_fraction:
        return (
            -1,
            f"{head}: its offset moved by {_n(change)}, {100 * min(share, 9.99):.0f} % of the shift (metrology).",
        )
    return (
        0,
        f"{head}: its offset moved by {_n(change)}, too little or the wrong way to explain the shift; no vote.",
    )


def classify_excursion(
    evidence: ExcursionEvidence, settings: AttributionSettings | None = None
) -> Attribution:
    """Vote "likely process", "likely metrology" or "undecided" for one excursion (see the module doc).

    Args:
        evidence: the excursion's size on its metrology tool and whatever monitor, cross-tool and fleet
            evidence exists.
        settings: vote thresholds.

    Returns:
        An :class:`Attribution` with the verdict, the vote counts, one sentence per line of evidence and
        a caution that the fab's OCAP and a qualified engineer decide.

    Example:
        >>> ev = ExcursionEvidence(
        ...     metrology_tool="SEM-3",
        ...     shift_nm=1.2,
        ...     monitor=MonitorEvidence(n_points=6, max_abs_z=4.1),
        ...     cross_tool=(CrossToolReading("SEM-1", n_lots=8, shift_nm=0.05, shift_se_nm=0.15),),
        ... )
        >>> res = classify_excursion(ev)
        >>> res.verdict, res.metrology_votes, res.process_votes
        ('likely metrology', 2, 0)
    """
    s = settings or AttributionSettings()
    votes = [_monitor_vote(evidence, s), _cross_vote(evidence, s), _fleet_vote(evidence, s)]
    process = sum(1 for v, _ in votes if v > 0)
    metrology = sum(1 for v, _ in votes if v < 0)
    if metrology - process >= s.margin:
        verdict = LIKELY_METROLOGY
    elif process - metrology >= s.margin:
        verdict = LIKELY_PROCESS
    else:
        verdict = UNDECIDED
    return Attribution(verdict, process, metrology, tuple(text for _, text in votes))
