"""Nested variance components (e.g. lot / wafer / site, run / zone / wafer) for a random nested design.

Model: y = mu + a_i + b_ij + ... + e_ijk, one random effect per level (outermost first) and a residual.

Balanced designs (``method="anova"``): mean squares are equated to their expectations (nested ANOVA,
NIST/SEMATECH e-Handbook §3.5.1). With m_j = observations per group of level j, E[MS_j] = sigma_e^2 +
sum_{i>=j} m_i sigma_i^2, so sigma_j^2 = (MS_j - MS_{j+1}) / m_j (negative estimates are reported, and
floored at 0 for sigmas).

Unbalanced designs (``method="reml"``): restricted maximum likelihood. The observations of one top-level
group have a block-structured covariance (compound-symmetric blocks inside compound-symmetric blocks), so
the log-likelihood is accumulated group by group from the inside out with the Sherman–Morrison formula
(V + s^2 11^T)^-1 = V^-1 - s^2 V^-1 1 1^T V^-1 / (1 + s^2 1^T V^-1 1) and the matching determinant lemma;
no n x n matrix is formed. The criterion -1/2 [log|V| + log|X^T V^-1 X| + r^T V^-1 r] (X = intercept) is
maximised over log-variances with L-BFGS-B and an exact gradient. Components are >= 0: a component whose
estimate runs to its boundary is refitted at exactly 0 and reported as 0. For balanced data with positive
ANOVA estimates REML gives the same values (Searle, Casella & McCulloch, Variance Components, 1992, ch. 6;
from memory), which the tests check on the NIST furnace data.

`sizes` holds the observations per group of each level: the common size for balanced data, the harmonic
mean of the group sizes for unbalanced data (the "typical" subgroup, so sigmas below describe a group of
typical size; a group with more observations has a somewhat smaller sigma of its mean).

`recommended_sigma` gives the sigma to chart at each level (a single value, or the mean of a level-j
group): var(mean_j) = sum_{i<=j} sigma_i^2 + sum_{i>j} sigma_i^2 / (m_j / m_i) + sigma_e^2 / m_j.
A level is flagged ``too_tight`` when X-bar limits from within-group sigma (sigma_e-based sigma /
sqrt(m_j)) would be narrower than that by more than `tight_ratio` (the classic trap of nested data).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import polars as pl
from scipy.optimize import minimize

_ZERO = 1e-7  # a component below this fraction of the total variance is tested against its boundary 0


@dataclass(frozen=True)
class VarianceComponents:
    """Components per level (outermost first, residual last) with the nested ANOVA table and chart sigmas."""

    levels: tuple[str, ...]
    df: dict[str, int]
    mean_squares: dict[str, float]  # sequential nested mean squares (descriptive when unbalanced)
    components: dict[str, float]
    grand_mean: float
    sizes: dict[str, float]  # observations per group of each level (harmonic mean when unbalanced)
    sigma_for: dict[str, float]  # level -> sigma of that level's group means; "value" for single values
    naive_sigma_for: dict[str, float]  # X-bar sigma from within-group variation only
    too_tight: dict[str, bool]
    method: str = "anova"  # "anova" (expected mean squares, balanced) or "reml" (unbalanced)


def nested_components(
    frame: pl.DataFrame,
    levels: Sequence[str],
    value: str = "value",
    *,
    residual: str = "within",
    tight_ratio: float = 1.5,
    method: str = "auto",
) -> VarianceComponents:
    """Nested random-effects variance components: ANOVA when balanced, REML when unbalanced.

    ``method``: "auto" (ANOVA for balanced designs, REML otherwise), "anova" (balanced only, raises
    ValueError otherwise) or "reml" (any design). Raises ValueError when a level cannot be separated from
    the next (no group of it has two sub-groups, or no residual degrees of freedom).
    """
    if method not in ("auto", "anova", "reml"):
        raise ValueError(f"method must be 'auto', 'anova' or 'reml' (found {method!r})")
    y, codes = _codes(frame, levels, value)
    counts = [np.bincount(c) for c in codes]
    balanced = all(int(c.min()) == int(c.max()) for c in counts)
    if method == "anova" and not balanced:
        raise ValueError(
            "nested_components(method='anova') needs a balanced design (equal group sizes at "
            "every level); use method='reml' or 'auto' for unbalanced data."
        )
    if method == "auto":
        method = "anova" if balanced else "reml"
    groups = [c.size for c in counts]
    dfs, ms = _anova_table(y, codes, counts)
    if any(d < 1 for d in dfs):
        raise ValueError(
            f"variance components not identifiable: degrees of freedom per level {dfs} "
            "(each level needs a group with two sub-groups, and the residual a repeat)"
        )
    if method == "anova":
        m = [int(c[0]) for c in counts] + [1]
        comp = [(ms[j] - ms[j + 1]) / m[j] for j in range(len(levels))] + [ms[-1]]
    else:
        m = [float(g / np.sum(1.0 / c)) for g, c in zip(groups, counts, strict=True)] + [1]
        comp = [float(x) for x in _reml(y, codes, counts)]
    names = (*levels, residual)
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
        tuple(names),
        dict(zip(names, dfs, strict=True)),
        dict(zip(names, ms, strict=True)),
        dict(zip(names, comp, strict=True)),
        float(y.mean()),
        dict(zip(names, m, strict=True)),
        sigma_for,
        naive,
        tight,
        method,
    )


def _codes(frame: pl.DataFrame, levels: Sequence[str], value: str) -> tuple[np.ndarray, list[np.ndarray]]:
    """Values and, per level, the 0-based group code of each observation (a group = its key path)."""
    keys = [
        pl.concat_str([pl.col(c).cast(pl.String) for c in levels[: j + 1]], separator="\x1f")
        .rank("dense")
        .cast(pl.Int64)
        .alias(f"_k{j}")
        - 1
        for j in range(len(levels))
    ]
    df = frame.select(
        [k.alias(f"_k{j}") for j, k in enumerate(keys)] + [pl.col(value).cast(pl.Float64).alias("y")]
    )
    return df["y"].to_numpy(), [df[f"_k{j}"].to_numpy() for j in range(len(levels))]


def _anova_table(
    y: np.ndarray, codes: list[np.ndarray], counts: list[np.ndarray]
) -> tuple[list[int], list[float]]:
    """Degrees of freedom and sequential mean squares: SS_j = sum_g n_g (mean_g - mean of its parent)^2."""
    n = y.size
    yc = y - y.mean()
    prev_mean, prev_groups = np.zeros(n), 1  # parent mean of every observation
    ss, dfs = [], []
    for c, cnt in zip(codes, counts, strict=True):
        mean = (np.bincount(c, yc) / cnt)[c]
        ss.append(float(np.sum((mean - prev_mean) ** 2)))
        dfs.append(cnt.size - prev_groups)
        prev_mean, prev_groups = mean, cnt.size
    ss.append(float(np.sum((yc - prev_mean) ** 2)))
    dfs.append(n - prev_groups)
    return dfs, [s / d if d > 0 else float("nan") for s, d in zip(ss, dfs, strict=True)]


def _reml(y: np.ndarray, codes: list[np.ndarray], counts: list[np.ndarray]) -> np.ndarray:
    """REML variances (levels outermost first, residual last), boundary components exactly 0."""
    k = len(codes)
    yc = y - y.mean()  # REML depends only on contrasts orthogonal to the intercept
    inner = codes[-1]
    n = counts[-1].astype(float)
    tot = np.bincount(inner, yc)
    ybar = tot / n
    ssw = np.bincount(inner, (yc - ybar[inner]) ** 2)
    parents = []  # parents[j]: level-j code of each level-(j+1) group
    for j in range(k - 1):
        p = np.zeros(counts[j + 1].size, dtype=np.int64)
        p[codes[j + 1]] = codes[j]
        parents.append(p)
    stats = (n, tot, ybar, ssw, parents, [c.size for c in counts])
    scale = float(np.var(yc)) or 1.0
    dfs, ms = _anova_table(y, codes, counts)
    hm = [c.size / np.sum(1.0 / c) for c in counts]
    start = np.array(
        [max((ms[j] - ms[j + 1]) / hm[j], 0.05 * scale) for j in range(k)] + [max(ms[-1], 1e-3 * scale)]
    )
    free = np.ones(k + 1, dtype=bool)
    v, f = _fit(start, free, stats, scale)
    # components that ran towards 0: refit with them fixed at exactly 0 and keep the better criterion
    while True:
        low = free & (v < _ZERO * scale)
        low[-1] = False
        if not low.any():
            return v
        free0 = free & ~low
        v0, f0 = _fit(np.where(low, 0.0, v), free0, stats, scale)
        if f0 > f + 1e-9 * max(1.0, abs(f)):
            return v
        v, f, free = v0, f0, free0


def _fit(start: np.ndarray, free: np.ndarray, stats: tuple, scale: float) -> tuple[np.ndarray, float]:
    """Minimise the REML criterion over the log of the free variances (others fixed at their start)."""
    fixed = start.copy()

    def fun(theta: np.ndarray) -> tuple[float, np.ndarray]:
        v = fixed.copy()
        v[free] = np.exp(theta)
        f, g = _criterion(v, stats)
        return f, g[free] * v[free]

    lo, hi = np.log(scale * 1e-12), np.log(scale * 1e8)
    theta0 = np.clip(np.log(np.maximum(start[free], scale * 1e-6)), lo, hi)
    res = minimize(
        fun,
        theta0,
        jac=True,
        method="L-BFGS-B",
        bounds=[(lo, hi)] * int(free.sum()),
        options={"ftol": 1e-15, "gtol": 1e-10, "maxiter": 1000},
    )
    v = fixed.copy()
    v[free] = np.exp(res.x)
    return v, float(res.fun)


def _criterion(v: np.ndarray, stats: tuple) -> tuple[float, np.ndarray]:
    """-REML log-likelihood (constants dropped) and its gradient in the variances, built group by group.

    Per group g the recursion carries log|V_g|, s = 1'V_g^-1 1, u = 1'V_g^-1 y and q = y'V_g^-1 y with
    their derivatives (one row per variance). Innermost groups (n values, residual e, own variance b):
    log|V| = (n-1) log e + log(e + n b), s = n/(e+nb), u = T/(e+nb), q = SSW/e + n ybar^2/(e+nb).
    A parent with variance a over children sums S, U, Q, LD (D = 1 + a S): log|V| = LD + log D, s = S/D,
    u = U/D, q = Q - a U^2/D. Finally -2 l_R = LD + log S + Q - U^2/S over the top-level groups.
    """
    n, tot, ybar, ssw, parents, sizes = stats
    k = v.size - 1
    e, b = v[-1], v[k - 1]
    d = e + n * b
    ld, s, u, q = (n - 1) * np.log(e) + np.log(d), n / d, tot / d, ssw / e + n * ybar**2 / d
    dld, ds, du, dq = (np.zeros((k + 1, n.size)) for _ in range(4))
    dld[-1], dld[k - 1] = (n - 1) / e + 1 / d, n / d
    ds[-1], ds[k - 1] = -n / d**2, -(n**2) / d**2
    du[-1], du[k - 1] = -tot / d**2, -n * tot / d**2
    dq[-1], dq[k - 1] = -ssw / e**2 - n * ybar**2 / d**2, -((n * ybar / d) ** 2)
    for j in range(k - 2, -1, -1):
        p, g = parents[j], sizes[j]
        LD, S, U, Q = (np.bincount(p, x, minlength=g) for x in (ld, s, u, q))
        dLD, dS, dU, dQ = (np.stack([np.bincount(p, r, minlength=g) for r in x]) for x in (dld, ds, du, dq))
        a = v[j]
        D = 1 + a * S
        dD = a * dS
        dD[j] += S
        ld, dld = LD + np.log(D), dLD + dD / D
        s, ds = S / D, dS / D - S * dD / D**2
        u, du = U / D, dU / D - U * dD / D**2
        q, dq = Q - a * U**2 / D, dQ - 2 * a * U * dU / D + a * U**2 * dD / D**2
        dq[j] -= U**2 / D
    LD, S, U, Q = ld.sum(), s.sum(), u.sum(), q.sum()
    dLD, dS, dU, dQ = dld.sum(axis=1), ds.sum(axis=1), du.sum(axis=1), dq.sum(axis=1)
    f = 0.5 * (LD + np.log(S) + Q - U**2 / S)
    grad = 0.5 * (dLD + dS / S + dQ - 2 * U * dU / S + U**2 * dS / S**2)
    return float(f), grad
