"""Plain per-point reference loops: the oracles the vectorised spc kernels must agree with.

Written directly from the published rule texts (Western Electric handbook 1956, Nelson 1984) and the
textbook recursions (NIST/SEMATECH e-Handbook §6.3.2.3, §6.3.2.4), one point at a time.
"""

from __future__ import annotations

import math

import polars as pl

from spc.rules import (
    Alternation,
    BeyondLimits,
    InnerRun,
    OuterRun,
    SameSideRun,
    Trend,
    ZoneCount,
    rule_params,
)


def rule_hits_loop(zs: list[float], xs: list[float], rule) -> list[bool]:
    r = rule_params(rule)
    out = []
    for i in range(len(zs)):
        z = zs[i]
        if isinstance(r, BeyondLimits):
            hit = abs(z) > r.k
        elif isinstance(r, ZoneCount):
            win = zs[max(0, i - r.window + 1) : i + 1]
            up = z > r.k and sum(1 for v in win if v > r.k) >= r.m
            dn = z < -r.k and sum(1 for v in win if v < -r.k) >= r.m
            hit = up or dn
        elif isinstance(r, SameSideRun):
            win = zs[i - r.length + 1 : i + 1] if i - r.length + 1 >= 0 else None
            hit = bool(win) and (all(v > 0 for v in win) or all(v < 0 for v in win))
        elif isinstance(r, Trend):
            j = i - r.length + 1
            if j < 0:
                hit = False
            else:
                seg = xs[j : i + 1]
                inc = all(seg[t + 1] > seg[t] for t in range(len(seg) - 1))
                dec = all(seg[t + 1] < seg[t] for t in range(len(seg) - 1))
                hit = inc or dec
        elif isinstance(r, Alternation):
            j = i - r.length + 1
            if j < 0:
                hit = False
            else:
                seg = xs[j : i + 1]
                d = [seg[t + 1] - seg[t] for t in range(len(seg) - 1)]
                hit = all(d[t] * d[t + 1] < 0 for t in range(len(d) - 1))
        elif isinstance(r, InnerRun):
            j = i - r.length + 1
            hit = j >= 0 and all(abs(v) < r.k for v in zs[j : i + 1])
        elif isinstance(r, OuterRun):
            j = i - r.length + 1
            win = zs[j : i + 1] if j >= 0 else []
            hit = j >= 0 and all(abs(v) > r.k for v in win)
            if hit and r.require_both_sides:
                hit = any(v > r.k for v in win) and any(v < -r.k for v in win)
        else:
            raise TypeError(r)
        out.append(hit)
    return out


def signals_loop(points: pl.DataFrame, rules) -> list[tuple]:
    """(series, seq, rule) of every signal, ordered by series, seq, then rule order."""
    out = []
    for key, g in points.sort(["series", "seq"]).group_by("series", maintain_order=True):
        xs = g["value"].to_list()
        zs = [(x - c) / s for x, c, s in zip(xs, g["center"], g["sigma"], strict=True)]
        per_rule = [(rule_params(r).id, rule_hits_loop(zs, xs, r)) for r in rules]
        for i, seq in enumerate(g["seq"]):
            for rid, hits in per_rule:
                if hits[i]:
                    out.append((key[0], seq, rid))
    return out


def ewma_loop(xs, center, sigma, lam, L, exact=True):
    """Textbook EWMA, z0 = target: (z_t, lcl_t, ucl_t, signal_t) per point."""
    z, out = center, []
    for t, x in enumerate(xs, start=1):
        z = lam * x + (1 - lam) * z
        f = lam / (2 - lam) * ((1 - (1 - lam) ** (2 * t)) if exact else 1.0)
        half = L * sigma * math.sqrt(f)
        out.append((z, center - half, center + half, abs(z - center) > half))
    return out


def cusum_loop(us, k, h, headstart=0.0, reset=True):
    """Tabular CUSUM on standardised points: (s_hi, s_lo, signalled) per point."""
    hi = lo = headstart
    out = []
    for u in us:
        hi = max(0.0, hi + u - k)
        lo = max(0.0, lo - u - k)
        sig = hi > h or lo > h
        out.append((hi, lo, sig))
        if sig and reset:
            hi = lo = headstart
    return out
