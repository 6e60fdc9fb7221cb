"""Average run length (ARL) design: how often a chart false-alarms and how fast it catches a mean shift.

All ARLs are two-sided and count plotted points until the first signal; a shift is in sigma units of the
plotted statistic (points are N(shift, 1) in z units).

* Shewhart charts with any set of zone/run rules: an exact Markov chain on the rule states (zone history,
  run lengths), as in Champ & Woodall (1987), Technometrics 29(4). The trend and alternation tests
  (nelson3, nelson4) have no finite state; rule sets containing them are simulated with a seeded generator
  and carry a standard error.
* EWMA with asymptotic limits: the Markov-chain approximation of Lucas & Saccucci (1990), Technometrics
  32(1) (the EWMA range split into ``states`` intervals).
* Two-sided tabular CUSUM: the Markov chain of Brook & Evans (1972), Biometrika 59(3), per side, combined
  with ``1/ARL = 1/ARL_hi + 1/ARL_lo`` (exact when the two sums cannot both be positive; an approximation
  to well below the discretisation error otherwise, Lucas & Crosier 1982).

Inverse solvers find the limit width for a target in-control ARL. `simulate_arl` runs the real charting
functions (`spc.rules`, `spc.ewma`, `spc.cusum`) in chunks with their incremental state, so the simulation
also checks those functions.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, replace

import numpy as np
import polars as pl
from scipy import optimize, sparse
from scipy.sparse import linalg as splinalg
from scipy.stats import norm

from spc.cusum import CusumParams, cusum_arrays
from spc.ewma import EwmaParams, ewma_arrays
from spc.frames import Layout
from spc.rules import (
    Alternation,
    BeyondLimits,
    InnerRun,
    OuterRun,
    RuleParams,
    SameSideRun,
    Trend,
    ZoneCount,
    context_points,
    rule_masks,
    rule_params,
)


@dataclass(frozen=True)
class ArlResult:
    """An ARL with its standard error (0 for a Markov-chain value) and how it was obtained."""

    shift: float
    arl: float
    se: float
    method: str  # "markov" or "simulation"


# ---------------------------------------------------------------- Shewhart run rules: Markov chain


def _step_rule(r: RuleParams, state, z: float):
    """One point through one rule's finite state machine: (new state, signalled)."""
    if isinstance(r, BeyondLimits):
        return None, abs(z) > r.k
    if isinstance(r, ZoneCount):
        s = 1 if z > r.k else (-1 if z < -r.k else 0)
        win = (*state, s)
        hit = s != 0 and sum(1 for v in win if v == s) >= r.m
        return win[1:], hit
    if isinstance(r, SameSideRun):
        if z > 0:
            run = max(state, 0) + 1
        elif z < 0:
            run = min(state, 0) - 1
        else:
            run = 0
        hit = abs(run) >= r.length
        return max(-(r.length - 1), min(r.length - 1, run)), hit
    if isinstance(r, InnerRun):
        run = state + 1 if abs(z) < r.k else 0
        return min(run, r.length - 1), run >= r.length
    if isinstance(r, OuterRun):
        run, up_age, dn_age = state
        if abs(z) > r.k:
            run += 1
            up_age = 0 if z > 0 else min(up_age + 1, r.length)
            dn_age = 0 if z < 0 else min(dn_age + 1, r.length)
        else:
            run, up_age, dn_age = 0, r.length, r.length
        hit = run >= r.length and (not r.require_both_sides or (up_age < r.length and dn_age < r.length))
        if not r.require_both_sides:
            up_age = dn_age = r.length
        return (min(run, r.length - 1), up_age, dn_age), hit
    raise TypeError(f"rule {r.id} has no finite-state chain")


def _start_state(r: RuleParams):
    if isinstance(r, ZoneCount):
        return (0,) * (r.window - 1)
    if isinstance(r, OuterRun):
        return (0, r.length, r.length)
    if isinstance(r, BeyondLimits):
        return None
    return 0


def _has_finite_chain(rules: Sequence[RuleParams]) -> bool:
    return not any(isinstance(r, Trend | Alternation) for r in rules)


def _zone_chain(rules: Sequence[RuleParams]):
    """Reachable non-signalling states and transitions (state, interval, next state) of a rule set."""
    cuts = sorted({0.0} | {s * r.k for r in rules if hasattr(r, "k") for s in (1, -1)})
    edges = [-math.inf, *cuts, math.inf]
    reps = [
        (a + b) / 2 if math.isfinite(a) and math.isfinite(b) else (b - 1 if math.isfinite(b) else a + 1)
        for a, b in zip(edges[:-1], edges[1:], strict=True)
    ]
    start = tuple(_start_state(r) for r in rules)
    index = {start: 0}
    todo = [start]
    trans: list[tuple[int, int, int]] = []
    while todo:
        st = todo.pop()
        i = index[st]
        for j, z in enumerate(reps):
            nxt, hit = [], False
            for r, s in zip(rules, st, strict=True):
                ns, h = _step_rule(r, s, z)
                nxt.append(ns)
                hit |= h
            if hit:
                continue
            key = tuple(nxt)
            if key not in index:
                index[key] = len(index)
                todo.append(key)
            trans.append((i, j, index[key]))
    return edges, len(index), np.array(trans, dtype=np.int64).reshape(-1, 3)


def _markov_arl(edges, n_states: int, trans: np.ndarray, shift: float) -> float:
    cdf = norm.cdf(np.array(edges) - shift)
    p = np.diff(cdf)
    q = sparse.csr_matrix((p[trans[:, 1]], (trans[:, 0], trans[:, 2])), shape=(n_states, n_states))
    a = sparse.identity(n_states, format="csc") - q.tocsc()
    x = splinalg.spsolve(a, np.ones(n_states))
    return float(np.atleast_1d(x)[0])


def shewhart_arl(
    rules: Sequence[str | RuleParams],
    shifts: Sequence[float] = (0.0,),
    *,
    n_rep: int = 4000,
    seed: int = 0,
    method: str = "auto",
) -> list[ArlResult]:
    """ARL of a Shewhart chart with run rules for each mean shift (sigma units).

    >>> round(shewhart_arl(["we1"])[0].arl, 1)
    370.4
    """
    params = [rule_params(r) for r in rules]
    if not params:
        raise ValueError("shewhart_arl needs at least one rule.")
    use_markov = method == "markov" or (method == "auto" and _has_finite_chain(params))
    if use_markov:
        edges, n, trans = _zone_chain(params)
        return [ArlResult(float(s), _markov_arl(edges, n, trans, float(s)), 0.0, "markov") for s in shifts]
    return [simulate_arl("shewhart", params, float(s), n_rep=n_rep, seed=seed) for s in shifts]


def expected_arl(rules: Sequence[str | RuleParams], *, seed: int = 0) -> ArlResult:
    """In-control ARL of a rule set: the false-alarm cost to show beside a chart plan.

    >>> round(expected_arl(["we1", "we2", "we3", "we4"]).arl, 2)  # Champ & Woodall (1987): 91.75
    91.75
    """
    return shewhart_arl(rules, (0.0,), seed=seed)[0]


# ---------------------------------------------------------------- EWMA and CUSUM: Markov chains


def ewma_arl(lam: float, L: float, shifts: Sequence[float] = (0.0,), *, states: int = 401) -> list[ArlResult]:
    """ARL of a two-sided EWMA with asymptotic limits +-L*sqrt(lam/(2-lam)), z0 at the target.

    >>> round(ewma_arl(0.1, 2.814)[0].arl, -1)  # Lucas & Saccucci (1990): 500 (from memory)
    500.0
    """
    if states % 2 == 0:
        states += 1
    h = L * math.sqrt(lam / (2 - lam))
    w = 2 * h / states
    centers = -h + (np.arange(states) + 0.5) * w
    lo, hi = centers - w / 2, centers + w / 2
    out = []
    for s in shifts:
        base = (1 - lam) * centers[:, None]
        q = norm.cdf((hi[None, :] - base) / lam - s) - norm.cdf((lo[None, :] - base) / lam - s)
        x = np.linalg.solve(np.eye(states) - q, np.ones(states))
        out.append(ArlResult(float(s), float(x[states // 2]), 0.0, "markov"))
    return out


def _cusum_one_sided(k: float, h: float, shift: float, headstart: float, states: int) -> float:
    w = 2 * h / (2 * states - 1)
    i = np.arange(states)
    upper = (i[None, :] + 0.5) * w - i[:, None] * w + k - shift
    cdf = norm.cdf(upper)
    q = np.diff(np.concatenate([np.zeros((states, 1)), cdf], axis=1), axis=1)
    x = np.linalg.solve(np.eye(states) - q, np.ones(states))
    return float(x[min(states - 1, int(round(headstart / w)))])


def cusum_arl(
    k: float, h: float, shifts: Sequence[float] = (0.0,), *, headstart: float = 0.0, states: int = 400
) -> list[ArlResult]:
    """ARL of a two-sided tabular CUSUM (k, h in sigma units) by Brook & Evans chains for each side.

    >>> round(cusum_arl(0.5, 5.0)[0].arl)  # Montgomery, Table of CUSUM ARLs (k = 1/2, h = 5): 465 (from memory)
    465
    """
    out = []
    for s in shifts:
        up = _cusum_one_sided(k, h, float(s), headstart, states)
        dn = _cusum_one_sided(k, h, -float(s), headstart, states)
        out.append(ArlResult(float(s), 1.0 / (1.0 / up + 1.0 / dn), 0.0, "markov"))
    return out


# ---------------------------------------------------------------- inverse solvers


def _solve(f, lo: float, hi: float, target: float) -> float:
    if target <= 1:
        raise ValueError(f"target in-control ARL must be > 1, found {target}.")
    g = lambda x: math.log(f(x)) - math.log(target)  # noqa: E731
    return float(optimize.brentq(g, lo, hi, xtol=1e-6))


def solve_ewma_width(lam: float, target_arl: float) -> float:
    """Limit width L giving the target in-control ARL for an EWMA with weight lam.

    >>> round(solve_ewma_width(0.1, 500.0), 2)  # Lucas & Saccucci (1990): 2.814 (from memory)
    2.81
    """
    return _solve(lambda L: ewma_arl(lam, L)[0].arl, 0.5, 6.0, target_arl)


def solve_cusum_h(k: float, target_arl: float, *, headstart: float = 0.0) -> float:
    """Decision interval h giving the target in-control ARL for a two-sided CUSUM with reference k."""
    return _solve(lambda h: cusum_arl(k, h, headstart=headstart)[0].arl, 0.05, 40.0, target_arl)


def solve_shewhart_width(rules: Sequence[str | RuleParams], target_arl: float) -> float:
    """Width k of the beyond-limits rules (other zones fixed) giving the target in-control ARL.

    >>> round(solve_shewhart_width(["we1"], 370.398), 3)
    3.0
    """
    params = [rule_params(r) for r in rules]
    if not any(isinstance(r, BeyondLimits) for r in params):
        raise ValueError("solving for the limit width needs a beyond-limits rule (we1 or nelson1).")

    def arl(k: float) -> float:
        ps = [replace(r, k=k) if isinstance(r, BeyondLimits) else r for r in params]
        return expected_arl(ps).arl

    return _solve(arl, 1.0, 7.0, target_arl)


# ---------------------------------------------------------------- seeded simulation


def simulate_arl(
    kind: str,
    design,
    shift: float = 0.0,
    *,
    n_rep: int = 4000,
    seed: int = 0,
    chunk: int | None = None,
) -> ArlResult:
    """Seeded simulation of the run length with lotline's own charting kernels, run in chunks.

    `kind` is ``"shewhart"`` (design: a rule list), ``"ewma"`` (EwmaParams; its ``limits`` apply) or
    ``"cusum"`` (CusumParams). Returns the mean run length and its standard error.
    """
    rng = np.random.default_rng(seed)
    n_rep = int(n_rep)
    rl = np.zeros(n_rep)
    alive = np.arange(n_rep)
    offset = 0
    chunk = int(chunk or 256)
    if kind == "shewhart":
        rules = [rule_params(r) for r in design]
        ctx = context_points(rules)
        tail = np.zeros((n_rep, 0))
    else:
        state: pl.DataFrame | None = None
    while alive.size:
        z = rng.standard_normal((alive.size, chunk)) + shift
        if kind == "shewhart":
            full = np.concatenate([tail, z], axis=1)
            hit = _any_rule(full, rules)[:, tail.shape[1] :]
        else:
            hit, state = _chart_hits(kind, design, z, alive, state)
        got = hit.any(axis=1)
        rl[alive[got]] = offset + np.argmax(hit[got], axis=1) + 1
        if kind == "shewhart":
            tail = np.concatenate([tail, z], axis=1)[~got, -ctx:] if ctx else np.zeros((int((~got).sum()), 0))
        else:
            state = state.filter(pl.Series(~got)) if state is not None else None
        alive = alive[~got]
        offset += chunk
        chunk = min(chunk * 2, 8192)
    se = float(rl.std(ddof=1) / math.sqrt(n_rep))
    return ArlResult(float(shift), float(rl.mean()), se, "simulation")


def _layout(z: np.ndarray) -> Layout:
    rows, cols = z.shape
    pos = np.tile(np.arange(cols, dtype=np.int64), rows)
    return Layout(pl.DataFrame(), z.ravel(), z.ravel(), pos == 0, pos, np.repeat(np.arange(rows), cols), rows)


def _any_rule(z: np.ndarray, rules) -> np.ndarray:
    lay = _layout(z)
    hit = np.zeros(z.size, dtype=bool)
    for _, m in rule_masks(lay, rules):
        hit |= m
    return hit.reshape(z.shape)


def _chart_hits(kind, design, z, alive, state):
    rows, cols = z.shape
    series = pl.Series("series", np.repeat(alive, cols))
    frame = pl.DataFrame({"series": series, "seq": np.tile(np.arange(cols), rows)})
    lay = replace(_layout(z), frame=frame)
    last = np.arange(rows) * cols + cols - 1
    ids = pl.DataFrame({"series": pl.Series(alive)})
    if kind == "ewma":
        w, limit, count = ewma_arrays(lay, design, state)
        hit = np.abs(w) > limit
        new = ids.with_columns(pl.Series("ewma_z", w[last]), pl.Series("ewma_count", count[last]))
    elif kind == "cusum":
        s_hi, s_lo, c_hi, c_lo = cusum_arrays(lay, design, state)
        hit = (s_hi > design.h) | (s_lo > design.h)
        new = ids.with_columns(pl.Series("s_hi", c_hi[last]), pl.Series("s_lo", c_lo[last]))
    else:
        raise ValueError(f"unknown chart kind {kind!r}; expected shewhart, ewma or cusum.")
    return hit.reshape(rows, cols), new


__all__ = [
    "ArlResult",
    "CusumParams",
    "EwmaParams",
    "cusum_arl",
    "ewma_arl",
    "expected_arl",
    "shewhart_arl",
    "simulate_arl",
    "solve_cusum_h",
    "solve_ewma_width",
    "solve_shewhart_width",
]
