"""Phase I limits for Shewhart charts: individuals/moving range, X-bar-R and X-bar-S, per series.

Limits are estimated from a baseline frame, vectorised across series, optionally excluding out-of-control
baseline points and re-estimating until none remain (at most `max_iter` rounds). Factors come from
`spc.factors` (computed, not typed in). Outputs use the frame contract: ``center`` and ``sigma`` (sigma of
the plotted statistic, or of single values as ``sigma_within`` for subgroup charts).

* Individuals: sigma = MR-bar / d2(2), moving ranges of consecutive kept points; MR chart UCL = D4(2) MR-bar
  (NIST/SEMATECH e-Handbook §6.3.2.2).
* X-bar-R: sigma_within = mean of R_i / d2(n_i) (equal to R-bar/d2 for constant n).
* X-bar-S: sigma_within = s_pooled / c4(d + 1), d = sum(n_i - 1) (unbiased for normal data; S-bar/c4 idea
  extended to variable n).
The sigma of a subgroup mean is sigma_within / sqrt(n_i) (`xbar_points`).
"""

from __future__ import annotations

import numpy as np
import polars as pl

from spc.factors import c4, d2, factors
from spc.frames import CENTER, SEQ, SERIES, SIGMA, VALUE, N, check_columns


def individuals_limits(
    points: pl.DataFrame, *, k: float = 3.0, exclude_ooc: bool = False, max_iter: int = 10
) -> pl.DataFrame:
    """Individuals-chart limits per series from columns series, seq, value.

    >>> pts = pl.DataFrame({"series": "A", "seq": [1, 2, 3], "value": [1.0, 2.0, 4.0]})
    >>> individuals_limits(pts).select("center", "mr_bar", "n_used").rows()
    [(2.3333333333333335, 1.5, 3)]
    """
    check_columns(points, [SERIES, SEQ, VALUE])
    df = points.select(SERIES, SEQ, pl.col(VALUE).cast(pl.Float64)).sort(SERIES, SEQ, maintain_order=True)
    df = df.with_columns(pl.lit(True).alias("_keep"))
    d2_2, d4_2 = d2(2), factors(2)["D4"]
    for _ in range(max_iter if exclude_ooc else 1):
        kept = df.filter("_keep")
        mr = (pl.col(VALUE) - pl.col(VALUE).shift(1)).abs().over(SERIES)
        lim = (
            kept.with_columns(mr.alias("_mr"))
            .group_by(SERIES, maintain_order=True)
            .agg(
                pl.col(VALUE).mean().alias(CENTER),
                pl.col("_mr").mean().alias("mr_bar"),
                pl.len().alias("n_used"),
            )
        )
        lim = lim.with_columns((pl.col("mr_bar") / d2_2).alias(SIGMA))
        flagged = df.join(lim, on=SERIES, how="left").with_columns(
            ((pl.col(VALUE) - pl.col(CENTER)).abs() <= k * pl.col(SIGMA)).alias("_in")
        )
        new_keep = flagged["_keep"] & flagged["_in"].fill_null(True)
        if not exclude_ooc or new_keep.equals(df["_keep"]):
            break
        df = df.with_columns(new_keep.alias("_keep"))
    excluded = df.group_by(SERIES, maintain_order=True).agg((~pl.col("_keep")).sum().alias("n_excluded"))
    return (
        lim.join(excluded, on=SERIES, how="left")
        .with_columns(
            (pl.col(CENTER) + k * pl.col(SIGMA)).alias("ucl"),
            (pl.col(CENTER) - k * pl.col(SIGMA)).alias("lcl"),
            (d4_2 * pl.col("mr_bar")).alias("mr_ucl"),
        )
        .select(SERIES, CENTER, SIGMA, "ucl", "lcl", "mr_bar", "mr_ucl", "n_used", "n_excluded")
    )


def _subgroup_limits(
    sub: pl.DataFrame, kind: str, k: float, exclude_ooc: bool, max_iter: int
) -> pl.DataFrame:
    stat = "range" if kind == "r" else "sd"
    check_columns(sub, [SERIES, "mean", stat, N])
    ns = sorted(set(sub[N].to_list()))
    d2_map = {n: d2(n) for n in ns if n >= 2}
    c4_cache: dict[int, float] = {}
    df = sub.with_columns(pl.lit(True).alias("_keep"), pl.col(N).cast(pl.Int64))
    for _ in range(max_iter if exclude_ooc else 1):
        kept = df.filter(pl.col("_keep") & (pl.col(N) >= 2))
        if kind == "r":
            kept = kept.with_columns(
                (pl.col("range") / pl.col(N).replace_strict(d2_map, return_dtype=pl.Float64)).alias("_s")
            )
            lim = kept.group_by(SERIES, maintain_order=True).agg(
                (pl.col("mean") * pl.col(N)).sum().alias("_sum"),
                pl.col(N).sum().alias("_n"),
                pl.col("_s").mean().alias("sigma_within"),
                pl.len().alias("n_used"),
            )
        else:
            lim = kept.group_by(SERIES, maintain_order=True).agg(
                (pl.col("mean") * pl.col(N)).sum().alias("_sum"),
                pl.col(N).sum().alias("_n"),
                ((pl.col(N) - 1) * pl.col("sd") ** 2).sum().alias("_ss"),
                (pl.col(N) - 1).sum().alias("_df"),
                pl.len().alias("n_used"),
            )
            dfs = lim["_df"].to_list()
            for d in dfs:
                c4_cache.setdefault(d, c4(d + 1))
            lim = lim.with_columns(
                ((pl.col("_ss") / pl.col("_df")).sqrt() / pl.Series([c4_cache[d] for d in dfs])).alias(
                    "sigma_within"
                )
            )
        lim = lim.with_columns((pl.col("_sum") / pl.col("_n")).alias(CENTER))
        chk = df.join(lim.select(SERIES, CENTER, "sigma_within"), on=SERIES, how="left").with_columns(
            ((pl.col("mean") - pl.col(CENTER)).abs() <= k * pl.col("sigma_within") / pl.col(N).sqrt()).alias(
                "_in"
            )
        )
        new_keep = chk["_keep"] & chk["_in"].fill_null(True)
        if not exclude_ooc or new_keep.equals(df["_keep"]):
            break
        df = df.with_columns(new_keep.alias("_keep"))
    excluded = df.group_by(SERIES, maintain_order=True).agg((~pl.col("_keep")).sum().alias("n_excluded"))
    return lim.join(excluded, on=SERIES, how="left").select(
        SERIES, CENTER, "sigma_within", "n_used", "n_excluded"
    )


def xbar_r_limits(subgroups: pl.DataFrame, *, k: float = 3.0, exclude_ooc: bool = False, max_iter: int = 10):
    """X-bar-R Phase I: centre (grand mean) and sigma_within per series from series, mean, range, n."""
    return _subgroup_limits(subgroups, "r", k, exclude_ooc, max_iter)


def xbar_s_limits(subgroups: pl.DataFrame, *, k: float = 3.0, exclude_ooc: bool = False, max_iter: int = 10):
    """X-bar-S Phase I: centre and sigma_within (pooled SD / c4) per series from series, mean, sd, n."""
    return _subgroup_limits(subgroups, "s", k, exclude_ooc, max_iter)


def xbar_points(subgroups: pl.DataFrame, limits: pl.DataFrame) -> pl.DataFrame:
    """Points frame of subgroup means: value = mean, sigma = sigma_within / sqrt(n) per row."""
    return subgroups.join(limits.select(SERIES, CENTER, "sigma_within"), on=SERIES, how="left").with_columns(
        pl.col("mean").alias(VALUE), (pl.col("sigma_within") / pl.col(N).cast(pl.Float64).sqrt()).alias(SIGMA)
    )


def range_chart_limits(sigma_within: float, n: int, k: float = 3.0) -> tuple[float, float, float]:
    """(LCL, centre, UCL) of the R chart: d2 sigma -/+ k d3 sigma, LCL floored at 0."""
    c, s = d2(n) * sigma_within, factors(n)["d3"] * sigma_within
    return max(0.0, c - k * s), c, c + k * s


def sd_chart_limits(sigma_within: float, n: int, k: float = 3.0) -> tuple[float, float, float]:
    """(LCL, centre, UCL) of the S chart: c4 sigma -/+ k sqrt(1-c4^2) sigma, LCL floored at 0."""
    c = c4(n)
    s = float(np.sqrt(1 - c * c))
    return max(0.0, (c - k * s) * sigma_within), c * sigma_within, (c + k * s) * sigma_within
