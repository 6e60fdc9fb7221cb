"""Run rules: the four Western Electric rules and Nelson's eight tests, vectorised across series.

Zones are measured in sigma of the plotted statistic from the row's centre line: zone C within 1 sigma,
zone B between 1 and 2, zone A between 2 and 3. Comparisons are strict ("beyond" means ``|z| > k``, a point
exactly on the centre line is on neither side and breaks a same-side run; equal consecutive values break
a trend or an alternation).

A rule signals at *each* point that completes its pattern: the current point is one of the qualifying
points and the pattern lies within the last ``window`` points of the same series. Windows at the start of a
series count only the points that exist (two points in zone A at positions 1 and 2 already make "2 of 3").
Nothing is reset after a signal, so a long run signals at every point from the one that completes it.

Incremental evaluation: prepend, per series, the last ``context_points(rules)`` points already evaluated,
run `evaluate_rules`, and keep the signals at the new points; they equal those of a full run, because every
rule looks back at most ``context_points`` points.

Sources: Western Electric Co. (1956) *Statistical Quality Control Handbook*, pp. 25–28;
L. S. Nelson (1984) "The Shewhart control chart—tests for special causes", *J. Quality Technology* 16(4),
237–239.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, replace

import numpy as np
import polars as pl

from spc.frames import Layout, gather_signals, layout_points, window_all, window_count, window_count_small


@dataclass(frozen=True)
class BeyondLimits:
    """One point more than `k` sigma from the centre line."""

    id: str
    k: float = 3.0


@dataclass(frozen=True)
class ZoneCount:
    """`m` of the last `window` points more than `k` sigma from the centre line on the same side."""

    id: str
    m: int = 2
    window: int = 3
    k: float = 2.0


@dataclass(frozen=True)
class SameSideRun:
    """`length` points in a row on the same side of the centre line."""

    id: str
    length: int = 8


@dataclass(frozen=True)
class Trend:
    """`length` points in a row steadily increasing, or steadily decreasing (values, not zones)."""

    id: str
    length: int = 6


@dataclass(frozen=True)
class Alternation:
    """`length` points in a row alternating up and down."""

    id: str
    length: int = 14


@dataclass(frozen=True)
class InnerRun:
    """`length` points in a row within `k` sigma of the centre line (either side)."""

    id: str
    length: int = 15
    k: float = 1.0


@dataclass(frozen=True)
class OuterRun:
    """`length` points in a row more than `k` sigma from the centre line (either side).

    Nelson's wording is "on both sides of the center line with none in zone C"; with
    ``require_both_sides=True`` the run must also contain points on both sides.
    """

    id: str
    length: int = 8
    k: float = 1.0
    require_both_sides: bool = False


RuleParams = BeyondLimits | ZoneCount | SameSideRun | Trend | Alternation | InnerRun | OuterRun

_WE = "Western Electric Statistical Quality Control Handbook (1956)"
_NELSON = "Nelson (1984), J. Quality Technology 16(4) 237-239"


@dataclass(frozen=True)
class Rule:
    """A registered rule: its id, default parameters and a one-line description naming the source."""

    id: str
    params: RuleParams
    description: str


# The single place where rule defaults live.
RULES: dict[str, Rule] = {
    r.id: r
    for r in (
        Rule("we1", BeyondLimits("we1", 3.0), f"One point beyond 3 sigma (zone A or beyond) - {_WE}, rule 1"),
        Rule(
            "we2",
            ZoneCount("we2", 2, 3, 2.0),
            f"2 of 3 successive points beyond 2 sigma, same side - {_WE}, rule 2",
        ),
        Rule(
            "we3",
            ZoneCount("we3", 4, 5, 1.0),
            f"4 of 5 successive points beyond 1 sigma, same side - {_WE}, rule 3",
        ),
        Rule(
            "we4",
            SameSideRun("we4", 8),
            f"8 successive points on one side of the centre line - {_WE}, rule 4",
        ),
        Rule(
            "nelson1", BeyondLimits("nelson1", 3.0), f"One point beyond zone A (3 sigma) - {_NELSON}, test 1"
        ),
        Rule(
            "nelson2",
            SameSideRun("nelson2", 9),
            f"Nine points in a row on one side of the centre line - {_NELSON}, test 2",
        ),
        Rule(
            "nelson3",
            Trend("nelson3", 6),
            f"Six points in a row steadily increasing or decreasing - {_NELSON}, test 3",
        ),
        Rule(
            "nelson4",
            Alternation("nelson4", 14),
            f"Fourteen points in a row alternating up and down - {_NELSON}, test 4",
        ),
        Rule(
            "nelson5",
            ZoneCount("nelson5", 2, 3, 2.0),
            f"Two of three points in a row in zone A or beyond, same side - {_NELSON}, test 5",
        ),
        Rule(
            "nelson6",
            ZoneCount("nelson6", 4, 5, 1.0),
            f"Four of five points in a row in zone B or beyond, same side - {_NELSON}, test 6",
        ),
        Rule(
            "nelson7",
            InnerRun("nelson7", 15, 1.0),
            f"Fifteen points in a row in zone C, either side - {_NELSON}, test 7",
        ),
        Rule(
            "nelson8",
            OuterRun("nelson8", 8, 1.0),
            f"Eight points in a row with none in zone C, either side - {_NELSON}, test 8",
        ),
    )
}

WESTERN_ELECTRIC = ("we1", "we2", "we3", "we4")
NELSON = tuple(f"nelson{i}" for i in range(1, 9))


def rule_params(rule: str | RuleParams, **overrides) -> RuleParams:
    """Resolve a rule id (or parameters) to parameters, applying keyword overrides.

    >>> rule_params("we4", length=7)
    SameSideRun(id='we4', length=7)
    """
    if isinstance(rule, str):
        if rule not in RULES:
            raise ValueError(f"unknown rule {rule!r}; known rules: {', '.join(RULES)}.")
        rule = RULES[rule].params
    return replace(rule, **overrides) if overrides else rule


def context_points(rules: Sequence[str | RuleParams]) -> int:
    """Trailing points per series an incremental caller must prepend to get identical signals.

    >>> context_points(["we1"]), context_points(["we2", "nelson4"])
    (0, 13)
    """
    need = 0
    for r in map(rule_params, rules):
        if isinstance(r, BeyondLimits):
            n = 0
        elif isinstance(r, ZoneCount):
            n = r.window - 1
        else:
            n = r.length - 1
        need = max(need, n)
    return need


def rule_masks(lay: Layout, rules: Sequence[str | RuleParams]) -> list[tuple[str, np.ndarray]]:
    """Boolean signal mask per rule over a laid-out points frame (the vectorised kernels).

    Rules with equal parameters (we1 and nelson1, we2 and nelson5, we3 and nelson6) share one computation.
    """
    z, start, pos = lay.z, lay.start, lay.pos
    memo: dict = {}

    def cached(key, fn):
        if key not in memo:
            memo[key] = fn()
        return memo[key]

    def reach(j):
        return cached(("reach", j), lambda: pos[j:] >= j)

    def count(cond_key, cond, width):
        if width <= 8:
            return cached(("count", cond_key, width), lambda: window_count_small(cond(), pos, width, reach))
        return cached(("count", cond_key, width), lambda: window_count(cond(), pos, width))

    above = lambda k: cached(("gt", k), lambda: z > k)  # noqa: E731
    below = lambda k: cached(("lt", k), lambda: z < -k)  # noqa: E731
    absz = lambda: cached("abs", lambda: np.abs(z))  # noqa: E731

    def diff():
        def make():
            d = np.zeros_like(lay.value)
            d[1:] = lay.value[1:] - lay.value[:-1]
            d[start] = 0.0
            return d

        return cached("diff", make)

    def one(r: RuleParams) -> np.ndarray:
        if isinstance(r, BeyondLimits):
            return absz() > r.k
        if isinstance(r, ZoneCount):
            up, dn = above(r.k), below(r.k)
            return (up & (count(("gt", r.k), lambda: up, r.window) >= r.m)) | (
                dn & (count(("lt", r.k), lambda: dn, r.window) >= r.m)
            )
        if isinstance(r, SameSideRun):
            return window_all(above(0.0), pos, r.length) | window_all(below(0.0), pos, r.length)
        if isinstance(r, Trend):
            d = diff()
            # L points in a row rising = L-1 rises; rows at a series start carry d = 0.
            return window_all(d > 0, pos, r.length - 1) | window_all(d < 0, pos, r.length - 1)
        if isinstance(r, Alternation):
            d = diff()
            alt = np.zeros(z.size, dtype=bool)
            alt[1:] = (d[1:] * d[:-1]) < 0
            alt &= pos >= 2
            return window_all(alt, pos, r.length - 2)
        if isinstance(r, InnerRun):
            return window_all(absz() < r.k, pos, r.length)
        if isinstance(r, OuterRun):
            m = window_all(absz() > r.k, pos, r.length)
            if r.require_both_sides:
                m &= (window_count(above(r.k), pos, r.length) > 0) & (
                    window_count(below(r.k), pos, r.length) > 0
                )
            return m
        raise TypeError(f"not a rule: {r!r}")  # pragma: no cover - RuleParams is closed

    out = []
    for r in map(rule_params, rules):
        key = ("rule", replace(r, id=""))
        out.append((r.id, cached(key, lambda r=r: one(r))))
    return out


def evaluate_rules(
    points: pl.DataFrame, rules: Sequence[str | RuleParams], *, passthrough: Sequence[str] = ()
) -> pl.DataFrame:
    """Evaluate run rules on every series at once; one row per signal (see `spc.frames`).

    >>> pts = pl.DataFrame({"series": "A", "seq": range(1, 5), "value": [0.0, 2.5, 2.6, 3.5],
    ...                     "center": 0.0, "sigma": 1.0})
    >>> evaluate_rules(pts, ["we1", "we2"]).rows()
    [('A', 3, 'we2', 2.6), ('A', 4, 'we1', 3.5), ('A', 4, 'we2', 3.5)]
    """
    lay = layout_points(points)
    return gather_signals(lay, rule_masks(lay, rules), passthrough)
