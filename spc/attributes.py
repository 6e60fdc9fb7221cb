"""Defect and proportion charts: c, u (defects per cm² with variable inspected area), p, np, Laney u'.

Each function returns the points frame of the contract (value, center, sigma per row) for one or many
series, so `spc.rules.evaluate_rules` applies the limits. Phase I estimates are per series.

* c: center c-bar, sigma sqrt(c-bar). u: u_i = c_i / a_i, center u-bar = sum c / sum a, sigma sqrt(u-bar/a_i).
* p: p_i = d_i / n_i, p-bar = sum d / sum n, sigma sqrt(p-bar (1-p-bar) / n_i); np: n p-bar, sqrt(n p-bar(1-p-bar)).
* Laney u' (Laney 2002, Quality Engineering 14(4)): z_i = (u_i - u-bar)/sqrt(u-bar/a_i), sigma_z = MR-bar(z)/d2(2),
  sigma_i = sqrt(u-bar/a_i) * sigma_z.
* Overdispersion: Poisson dispersion statistic sum (c_i - a_i u-bar)^2 / (a_i u-bar) against chi-square with
  m-1 df; u' is recommended when its p-value is below alpha (clustered defects over-alarm a plain u chart).
"""

from __future__ import annotations

from dataclasses import dataclass

import polars as pl
from scipy.stats import chi2

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
