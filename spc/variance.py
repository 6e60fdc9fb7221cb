"""Nested variance components (e.g. lot / wafer / site, run / zone / wafer) for a balanced random design.

Mean squares are equated to their expectations (nested ANOVA, NIST/SEMATECH e-Handbook §3.5.1): with
levels 1..k outermost first and r replicates at the bottom, b_j = groups of level j per group of level
j-1, and m_j = observations per group of level j, E[MS_j] = sigma_e^2 + sum_{i>=j} m_i sigma_i^2, so
sigma_j^2 = (MS_j - MS_{j+1}) / m_j (negative estimates are reported, and floored at 0 for sigmas).

`recommended_sigma` gives the sigma to chart at each level (a single value, or the mean of a level-j
group): var(mean_j) = sum_{i<=j} sigma_i^2 + sum_{i>j} sigma_i^2 / (m_j / m_i) + sigma_e^2 / m_j.
A level is flagged ``too_tight`` when X-bar limits from within-group sigma (sigma_e-based sigma /
sqrt(m_j)) would be narrower than that by more than `tight_ratio` (the classic trap of nested data).
The unbalanced case (REML) is not implemented yet; unbalanced input raises ValueError.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import polars as pl


@dataclass(frozen=True)
class VarianceComponents:
    """Components per level (outermost first, residual last) with the ANOVA table and chart sigmas."""

    levels: tuple[str, ...]
    df: dict[str, int]
    mean_squares: dict[str, float]
    components: dict[str, float]
    grand_mean: float
    sizes: dict[str, int]  # observations per group of each level
    sigma_for: dict[str, float]  # level -> sigma of that level's group means; "value" for single values
    naive_sigma_for: dict[str, float]  # X-bar sigma from within-group variation only
    too_tight: dict[str, bool]
    method: str = "anova"


def nested_components(
    frame: pl.DataFrame, levels: Sequence[str], value: str = "value", *, residual: str = "within",
    tight_ratio: float = 1.5,
) -> VarianceComponents:
    """Balanced nested random-effects variance components by expected mean squares."""
    keys = [pl.concat_str([pl.col(c).cast(pl.String) for c in levels[: j + 1]], separator="\x1f")
            for j in range(len(levels))]
    df = frame.select([k.alias(f"_k{j}") for j, k in enumerate(keys)] + [pl.col(value).cast(pl.Float64).alias("y")])
    n = df.height
    counts = [df.group_by(f"_k{j}").len()["len"] for j in range(len(levels))]
    if any(c.n_unique() != 1 for c in counts):
        raise ValueError("nested_components needs a balanced design (equal group sizes at every level); "
                         "REML for unbalanced data is not implemented.")
    m = [int(c[0]) for c in counts] + [1]  # observations per group at each level, residual = 1
    g = [n // mj for mj in m[:-1]]  # number of groups at each level
    ybar = float(df["y"].mean())
    means = [df.group_by(f"_k{j}").agg(pl.col("y").mean())["y"].to_numpy() for j in range(len(levels))]
    ss, dfs = [], []
    prev_means, prev_groups = np.array([ybar]), 1
    for j in range(len(levels)):
        # SS of level j: m_j * sum (mean_j - parent mean)^2 = m_j sum mean_j^2 - m_{j-1} sum parent^2
        parent_m = n if j == 0 else m[j - 1]
        ss.append(m[j] * float(np.sum(means[j] ** 2)) - parent_m * float(np.sum(prev_means**2)))
        dfs.append(g[j] - prev_groups)
        prev_means, prev_groups = means[j], g[j]
    y = df["y"].to_numpy()
    ss.append(float(np.sum(y**2)) - m[-2] * float(np.sum(prev_means**2)))
    dfs.append(n - prev_groups)
    names = (*levels, residual)
    ms = [s / d for s, d in zip(ss, dfs, strict=True)]
    comp = [(ms[j] - ms[j + 1]) / m[j] for j in range(len(levels))] + [ms[-1]]
    pos = [max(0.0, c) for c in comp]
    sigma_for = {"value": float(np.sqrt(sum(pos)))}
    naive, tight = {}, {}
    for j, name in enumerate(levels):
        v = sum(pos[: j + 1]) + sum(pos[i] * m[i] / m[j] for i in range(j + 1, len(levels))) + pos[-1] / m[j]
        sigma_for[name] = float(np.sqrt(v))
        within = pos[-1] + sum(pos[i] for i in range(j + 1, len(levels)))  # spread of values inside a group
        naive[name] = float(np.sqrt(within / m[j]))
        tight[name] = bool(naive[name] > 0 and sigma_for[name] / naive[name] > tight_ratio)
    return VarianceComponents(
        tuple(names), dict(zip(names, dfs, strict=True)), dict(zip(names, ms, strict=True)),
        dict(zip(names, comp, strict=True)), ybar, dict(zip(names, m, strict=True)), sigma_for, naive, tight)
