"""Process capability: Cp, Cpk (within sigma) and Pp, Ppk (overall SD) with confidence intervals.

Cp = (USL-LSL)/(6 sigma_w), Cpk = min(USL-mean, mean-LSL)/(3 sigma_w); Pp, Ppk likewise with the overall
sample SD. CIs (Montgomery, Introduction to Statistical Quality Control, §8.3): Cp and Pp by the chi-square
interval Cp sqrt(chi2_{a/2, n-1}/(n-1)) .. Cp sqrt(chi2_{1-a/2, n-1}/(n-1)); Cpk and Ppk by Bissell (1990)
Cpk (1 -/+ z_{a/2} sqrt(1/(9 n Cpk^2) + 1/(2(n-1)))). sigma_w defaults to MR-bar/d2(2) of the data in order.
Refuses fewer than `min_points` values, warns below `warn_points`, and reports a Shapiro-Wilk p-value
(warning when below 0.05, since the indices assume normal data).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import stats

from spc.factors import d2


@dataclass(frozen=True)
class Capability:
    """Capability indices with (lower, upper) confidence intervals and any warnings."""

    n: int
    mean: float
    sigma_within: float
    sigma_overall: float
    cp: float | None
    cp_ci: tuple[float, float] | None
    cpk: float
    cpk_ci: tuple[float, float]
    pp: float | None
    pp_ci: tuple[float, float] | None
    ppk: float
    ppk_ci: tuple[float, float]
    normality_p: float | None
    warnings: tuple[str, ...]


def evaluate_capability(
    values,
    *,
    lsl: float | None = None,
    usl: float | None = None,
    sigma_within: float | None = None,
    confidence: float = 0.95,
    min_points: int = 10,
    warn_points: int = 30,
) -> Capability:
    """Cp, Cpk, Pp, Ppk of values against one- or two-sided specs.

    >>> c = evaluate_capability([9.8, 10.1, 10.0, 9.9, 10.2, 10.0, 9.9, 10.1, 10.0, 10.0], lsl=9.0, usl=11.0,
    ...                         sigma_within=0.1)
    >>> round(c.cp, 3), round(c.cpk, 3)
    (3.333, 3.333)
    """
    x = np.asarray(values, dtype=float)
    n = x.size
    if lsl is None and usl is None:
        raise ValueError("capability needs at least one spec limit (lsl or usl).")
    if n < min_points:
        raise ValueError(f"capability needs at least {min_points} values, found {n}.")
    warnings = []
    if n < warn_points:
        warnings.append(f"only {n} values; capability estimates are unreliable below {warn_points}.")
    mean = float(x.mean())
    s_all = float(x.std(ddof=1))
    s_w = float(sigma_within) if sigma_within is not None else float(np.abs(np.diff(x)).mean() / d2(2))
    normal_p = float(stats.shapiro(x).pvalue) if 3 <= n <= 5000 else None
    if normal_p is not None and normal_p < 0.05:
        warnings.append(f"data look non-normal (Shapiro-Wilk p = {normal_p:.3g}); indices assume normality.")
    a = 1 - confidence
    z = stats.norm.ppf(1 - a / 2)

    def two_sided(s):
        if lsl is None or usl is None:
            return None, None
        c = (usl - lsl) / (6 * s)
        lo = c * math.sqrt(stats.chi2.ppf(a / 2, n - 1) / (n - 1))
        hi = c * math.sqrt(stats.chi2.ppf(1 - a / 2, n - 1) / (n - 1))
        return c, (lo, hi)

    def k_index(s):
        sides = [
            v
            for v in ((usl - mean) if usl is not None else None, (mean - lsl) if lsl is not None else None)
            if v is not None
        ]
        c = min(sides) / (3 * s)
        half = z * math.sqrt(1 / (9 * n) + c * c / (2 * (n - 1)))
        return c, (c - half, c + half)

    cp, cp_ci = two_sided(s_w)
    pp, pp_ci = two_sided(s_all)
    cpk, cpk_ci = k_index(s_w)
    ppk, ppk_ci = k_index(s_all)
    return Capability(
        n, mean, s_w, s_all, cp, cp_ci, cpk, cpk_ci, pp, pp_ci, ppk, ppk_ci, normal_p, tuple(warnings)
    )
