"""Defect and proportion charts: c, u (defects per cm² with variable inspected area), p, np, Laney u'.

Each function returns the points frame of the contract (value, center, sigma per row) for one or many
series, so `spc.rules.evaluate_rules` applies the limits. Phase I estimates are per series.

* c: center c-bar, sigma sqrt(c-bar). u: u_i = c_i / a_i, center u-bar = sum c / sum a, sigma sqrt(u-bar/a_i).
* p: p_i = d_i / n_i, p-bar = sum d / sum n, sigma sqrt(p-bar (1-p-bar) / n_i); np: n p-bar, sqrt(n p-bar(1-p-bar)).
* Laney u' (Laney 2002, Quality Engineering 14(4)): z_i = (u_i - u-bar)/sqrt(u-bar/a_i), sigma_z = MR-bar(z)/d2(2),
  sigma_i = sqrt(u-bar/a_i) * sigma_z.
* Negative-binomial probability limits (clustered defects; Stapper's gamma-Poisson model of defect
  clustering): counts c_i ~ NB with mean u-bar a_i and variance mu_i + mu_i^2 / alpha. Limits are the
  NB quantiles at the tails of a k-sigma normal chart (Phi(-k) each side), so the false-alarm rate of
  rule 1 stays near nominal however skewed the counts; Laney u' corrects the spread of the z-scores but
  not their skew. 1/alpha by the moment estimator sum((c_i - mu_i)^2 - c_i) / sum(mu_i^2) (its
  expectation is 1/alpha); 0 (Poisson) when the counts show no extra variation.
* Overdispersion: Poisson dispersion statistic sum (c_i - a_i u-bar)^2 / (a_i u-bar) against chi-square with
  m-1 df; u' is recommended when its p-value is below alpha (clustered defects over-alarm a plain u chart).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import polars as pl
from scipy.stats import chi2, nbinom, norm, poisson

from spc.factors import d2
from spc.frames import CENTER, SERIES, SIGMA, VALUE

_over = SERIES


def c_points(frame: pl.DataFrame, count: str = "count") -> pl.DataFrame:
    """c chart: value = count, center = mean count, sigma = sqrt(center) per series."""
    c = pl.col(count).cast(pl.Float64)
    return frame.with_columns(c.alias(VALUE), c.mean().over(_over).alias(CENTER)).with_columns(
        pl.col(CENTER).sqrt().alias(SIGMA)
    )


def u_points(frame: pl.DataFrame, count: str = "count", area: str = "area_cm2") -> pl.DataFrame:
    """u chart: value = defects per unit area, sigma = sqrt(u-bar / area) per row."""
    c, a = pl.col(count).cast(pl.Float64), pl.col(area).cast(pl.Float64)
    return frame.with_columns(
        (c / a).alias(VALUE), (c.sum() / a.sum()).over(_over).alias(CENTER)
    ).with_columns((pl.col(CENTER) / a).sqrt().alias(SIGMA))


def p_points(frame: pl.DataFrame, defective: str = "defective", n: str = "n") -> pl.DataFrame:
    """p chart: value = fraction defective, sigma = sqrt(p-bar (1 - p-bar) / n_i)."""
    d, m = pl.col(defective).cast(pl.Float64), pl.col(n).cast(pl.Float64)
    return frame.with_columns(
        (d / m).alias(VALUE), (d.sum() / m.sum()).over(_over).alias(CENTER)
    ).with_columns((pl.col(CENTER) * (1 - pl.col(CENTER)) / m).sqrt().alias(SIGMA))


def np_points(frame: pl.DataFrame, defective: str = "defective", n: str = "n") -> pl.DataFrame:
    """np chart (constant n): value = number defective, center n p-bar, sigma sqrt(n p-bar (1-p-bar))."""
    p = p_points(frame, defective, n)
    m = pl.col(n).cast(pl.Float64)
    return p.with_columns(
        pl.col(defective).cast(pl.Float64).alias(VALUE),
        (m * pl.col(CENTER)).alias(CENTER),
        (pl.col(SIGMA) * m).alias(SIGMA),
    )


def laney_u_points(frame: pl.DataFrame, count: str = "count", area: str = "area_cm2") -> pl.DataFrame:
    """Laney u' chart: u chart sigma inflated by sigma_z, the moving-range SD of the z-scores (in row order)."""
    u = u_points(frame, count, area)
    z = (pl.col(VALUE) - pl.col(CENTER)) / pl.col(SIGMA)
    sz = ((z - z.shift(1)).abs().mean() / d2(2)).over(_over)
    return u.with_columns(sz.alias("sigma_z")).with_columns((pl.col(SIGMA) * pl.col("sigma_z")).alias(SIGMA))


@dataclass(frozen=True)
class NegBinFit:
    """Phase I estimate of a negative-binomial defect-count model with exposure (inspected area)."""

    ubar: float  # defects per unit area: sum c / sum a
    inv_alpha: float  # clustering 1/alpha (0: Poisson, no extra variation)
    n: int  # inspections in the baseline


def negbin_fit(counts, areas) -> NegBinFit:
    """u-bar and the moment estimate of 1/alpha (module doc) from baseline counts and inspected areas.

    >>> negbin_fit([10, 10, 10], [1.0, 1.0, 1.0]).inv_alpha   # less spread than Poisson: no clustering
    0.0
    """
    c = np.asarray(counts, dtype=float)
    a = np.asarray(areas, dtype=float)
    if c.size < 2 or c.size != a.size:
        raise ValueError("the negative-binomial fit needs at least 2 inspections, each with its area.")
    if np.any(a <= 0) or np.any(c < 0):
        raise ValueError("inspected areas must be > 0 and counts >= 0.")
    ubar = float(c.sum() / a.sum())
    mu = ubar * a
    denom = float(np.sum(mu**2))
    inv_alpha = float(np.sum((c - mu) ** 2 - c) / denom) if denom > 0 else 0.0
    return NegBinFit(ubar, max(inv_alpha, 0.0), int(c.size))


def negbin_count_limits(ubar, inv_alpha, areas, *, k: float = 3.0) -> tuple[np.ndarray, np.ndarray]:
    """(lower, upper) count limits per inspection: a count above ``upper`` or below ``lower`` signals.

    ``upper`` is the smallest count U with P(C <= U) >= 1 - Phi(-k), so P(C > U) <= Phi(-k); ``lower`` is
    the smallest count L with P(C <= L) >= Phi(-k), so P(C < L) < Phi(-k) (0 when no count is that rare).
    ``ubar`` and ``inv_alpha`` (0: Poisson) are numbers or one per area.
    """
    a = np.asarray(areas, dtype=float)
    mu = np.asarray(ubar, dtype=float) * a
    ia = np.broadcast_to(np.asarray(inv_alpha, dtype=float), a.shape)
    tail = float(norm.sf(k))
    lo, hi = np.empty_like(mu), np.empty_like(mu)
    pois = ia <= 0
    if pois.any():
        lo[pois] = poisson.ppf(tail, mu[pois])
        hi[pois] = poisson.ppf(1.0 - tail, mu[pois])
    nb = ~pois
    if nb.any():
        alpha = 1.0 / ia[nb]
        p = alpha / (alpha + mu[nb])
        lo[nb] = nbinom.ppf(tail, alpha, p)
        hi[nb] = nbinom.ppf(1.0 - tail, alpha, p)
    return lo, hi


def negbin_sigma(ubar, inv_alpha, areas) -> np.ndarray:
    """Standard deviation of the density c / a under the model: sqrt(u-bar / a + u-bar^2 / alpha) (arguments
    are numbers or one per area)."""
    a = np.asarray(areas, dtype=float)
    u = np.asarray(ubar, dtype=float)
    return np.sqrt(u / a + u**2 * np.asarray(inv_alpha, dtype=float))


@dataclass(frozen=True)
class DispersionTest:
    """Poisson dispersion test of one series of defect counts."""

    statistic: float
    df: int
    p_value: float
    ratio: float  # statistic / df; about 1 for Poisson counts
    recommend_laney: bool


def test_overdispersion(counts, areas, *, alpha: float = 0.05) -> DispersionTest:
    """Chi-square dispersion test of counts against a Poisson model with a common rate per unit area.

    >>> test_overdispersion([16, 14, 28, 16, 12], [1, 1, 1, 1, 1]).recommend_laney
    False
    """
    counts, areas = [float(c) for c in counts], [float(a) for a in areas]
    if len(counts) < 2:
        raise ValueError("the dispersion test needs at least 2 inspections.")
    rate = sum(counts) / sum(areas)
    if rate == 0:
        return DispersionTest(0.0, len(counts) - 1, 1.0, 0.0, False)
    stat = sum((c - a * rate) ** 2 / (a * rate) for c, a in zip(counts, areas, strict=True))
    df = len(counts) - 1
    p = float(chi2.sf(stat, df))
    return DispersionTest(stat, df, p, stat / df, p < alpha)


test_overdispersion.__test__ = False  # a library function, not a pytest test
