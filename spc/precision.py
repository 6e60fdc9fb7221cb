"""Measurement precision: S-chart factors, the three-level precision study, repeat trends, P/T.

The precision study follows the NIST/SEMATECH e-Handbook of Statistical Methods, chapter 2 (§2.4.4):
level 1 is short-term repeatability (SD of repeats within one day), level 2 is day-to-day
reproducibility (SD of daily averages within a run), level 3 is run-to-run (SD of run averages).
Each level's SD is pooled over artifacts (check standards, monitor wafers, sites) with its degrees of
freedom.

Pure functions: no I/O, no clock, no randomness. Work on many series at once via ``by`` keys.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import polars as pl
from scipy import special, stats

__all__ = [
    "P_TO_T_ACCEPTABLE",
    "P_TO_T_GOOD",
    "c4",
    "classify_precision_to_tolerance",
    "estimate_precision_levels",
    "evaluate_repeat_trend",
    "precision_to_tolerance",
    "s_chart_factors",
    "summarise_repeats",
]

# P/T verdict bands (common practice): below 0.1 good, up to 0.3 acceptable, above that not capable.
P_TO_T_GOOD = 0.1
P_TO_T_ACCEPTABLE = 0.3


def c4(n: np.ndarray | int | float) -> np.ndarray:
    """Unbiasing constant c4(n) = E[s]/sigma for n normal observations, from gamma functions.

    c4(n) = sqrt(2/(n-1)) * Gamma(n/2) / Gamma((n-1)/2); NaN for n < 2.

    Example:
        >>> round(float(c4(5)), 4)
        0.94
    """
    n = np.asarray(n, dtype=float)
    with np.errstate(invalid="ignore", divide="ignore"):
        out = np.sqrt(2.0 / (n - 1.0)) * np.exp(special.gammaln(n / 2.0) - special.gammaln((n - 1.0) / 2.0))
    return np.where(n >= 2, out, np.nan)


def s_chart_factors(n: np.ndarray | int | float, width: float = 3.0) -> dict[str, np.ndarray]:
    """S-chart factors c4, B3, B4 (limits from s-bar) and B5, B6 (limits from a known sigma).

    Computed from c4 (gamma functions), not a table, so any subgroup size and any chart width work:
    B3/B4 = 1 -/+ width*sqrt(1-c4^2)/c4 and B5/B6 = c4 -/+ width*sqrt(1-c4^2), lower ones clipped at 0.

    Example:
        >>> f = s_chart_factors(6)
        >>> round(float(f["B3"]), 3), round(float(f["B4"]), 3)
        (0.03, 1.97)
    """
    k = np.asarray(c4(n))
    spread = width * np.sqrt(1.0 - k**2)
    return {
        "c4": k,
        "B3": np.maximum(0.0, 1.0 - spread / k),
        "B4": 1.0 + spread / k,
        "B5": np.maximum(0.0, k - spread),
        "B6": k + spread,
    }


def summarise_repeats(frame: pl.DataFrame, *, by: Sequence[str]) -> pl.DataFrame:
    """Raw repeats -> one row per ``by`` group with ``mean``, ``sd`` (ddof 1) and ``n``.

    Input columns: the ``by`` keys and ``value``. Turns raw repeats into the summary frame that
    :func:`estimate_precision_levels` reads.

    Example:
        >>> f = pl.DataFrame({"day": [1, 1, 1], "value": [1.0, 2.0, 3.0]})
        >>> summarise_repeats(f, by=["day"]).row(0)
        (1, 2.0, 1.0, 3)
    """
    return (
        frame.group_by(list(by), maintain_order=True)
        .agg(
            pl.col("value").mean().alias("mean"),
            pl.col("value").std(ddof=1).alias("sd"),
            pl.len().cast(pl.Int64).alias("n"),
        )
        .sort(list(by))
    )


def _pool(frame: pl.DataFrame, keys: list[str], var: str, df: str) -> pl.DataFrame:
    """Pool variances ``var`` with degrees of freedom ``df`` within ``keys``: sum(df*var)/sum(df)."""
    ok = frame.filter((pl.col(df) > 0) & pl.col(var).is_not_null())
    agg = [
        ((pl.col(var) * pl.col(df)).sum() / pl.col(df).sum()).sqrt().alias("sd"),
        pl.col(df).sum().cast(pl.Int64).alias("df"),
    ]
    if keys:
        return ok.group_by(keys, maintain_order=True).agg(agg)
    return ok.select(agg)


def estimate_precision_levels(summary: pl.DataFrame, *, by: Sequence[str] = ()) -> pl.DataFrame:
    """Three-level precision study (NIST/SEMATECH e-Handbook §2.4.4) from daily repeat summaries.

    Input columns: ``by`` keys (e.g. tool or probe), ``artifact`` (check standard / monitor feature),
    ``run``, ``day``, ``mean``, ``sd`` and ``n``: one row per artifact, run and day holding the mean and
    SD of ``n`` short-term repeats (see :func:`summarise_repeats`).

    ``by`` may hold ``run`` (level 1 and 2 per run; level 3 then has no degrees of freedom and is
    left out). Output: one row per ``by`` group and level with ``level`` (1, 2, 3), ``name``
    (repeatability / day_to_day / run_to_run), ``sd`` (pooled SD of that level), ``df`` and
    ``component_sd``: the SD that level adds on its own, after removing what the level below
    contributes to its averages (level 2: s2^2 - s1^2/n; level 3: s3^2 - s2^2/days), floored at 0.

    - level 1: pooled row SDs, df = sum(n - 1).
    - level 2: SD of the daily means within each artifact and run, pooled, df = sum(days - 1).
    - level 3: SD of the run means (the mean of that run's daily means) within each artifact,
      pooled, df = sum(runs - 1).

    Example:
        >>> s = pl.DataFrame({"artifact": ["w"] * 4, "run": [1, 1, 2, 2], "day": [1, 2, 1, 2],
        ...                   "mean": [10.0, 10.2, 10.4, 10.6], "sd": [0.1] * 4, "n": [6] * 4})
        >>> estimate_precision_levels(s)["sd"].round(4).to_list()
        [0.1, 0.1414, 0.2828]
    """
    keys = list(by)
    rows = summary.with_columns(pl.col("sd").pow(2).alias("_var"), (pl.col("n") - 1).alias("_df"))
    level1 = _pool(rows, keys, "_var", "_df").with_columns(pl.lit(1).alias("level"))
    mean_n = rows.group_by(keys).agg(pl.col("n").mean().alias("_n")) if keys else None

    per_run = rows.group_by(list(dict.fromkeys([*keys, "artifact", "run"]))).agg(
        pl.col("mean").var(ddof=1).alias("_var"),
        (pl.len() - 1).alias("_df"),
        pl.col("mean").mean().alias("_run_mean"),
        pl.len().alias("_days"),
    )
    level2 = _pool(per_run, keys, "_var", "_df").with_columns(pl.lit(2).alias("level"))

    per_artifact = per_run.group_by(list(dict.fromkeys([*keys, "artifact"]))).agg(
        pl.col("_run_mean").var(ddof=1).alias("_var"), (pl.len() - 1).alias("_df")
    )
    level3 = _pool(per_artifact, keys, "_var", "_df").with_columns(pl.lit(3).alias("level"))

    mean_days = per_run.group_by(keys).agg(pl.col("_days").mean().alias("_k")) if keys else None
    out = pl.concat([level1, level2, level3], how="vertical_relaxed")
    if keys:
        out = out.join(mean_n, on=keys, how="left").join(mean_days, on=keys, how="left")
    else:
        out = out.with_columns(
            pl.lit(float(rows["n"].mean())).alias("_n"), pl.lit(float(per_run["_days"].mean())).alias("_k")
        )
    out = out.sort([*keys, "level"])
    below = pl.col("sd").shift(1).over(keys) if keys else pl.col("sd").shift(1)
    divisor = pl.when(pl.col("level") == 2).then(pl.col("_n")).otherwise(pl.col("_k"))
    component_var = pl.col("sd").pow(2) - below.pow(2) / divisor
    return out.select(
        *keys,
        pl.col("level").cast(pl.Int64),
        pl.col("level").replace_strict({1: "repeatability", 2: "day_to_day", 3: "run_to_run"}).alias("name"),
        "sd",
        "df",
        pl.when(pl.col("level") == 1)
        .then(pl.col("sd"))
        .otherwise(pl.max_horizontal(component_var, pl.lit(0.0)).sqrt())
        .alias("component_sd"),
    )


def evaluate_repeat_trend(
    frame: pl.DataFrame,
    *,
    by: Sequence[str] = ("tool",),
    session: Sequence[str] = ("session",),
    alpha: float = 0.01,
) -> pl.DataFrame:
    """Slope test on the repeat index (e-beam shrink on resist) and the detrended repeatability.

    Input columns: ``by`` keys, ``session`` keys (one static-repeat sequence on one feature),
    ``repeat`` (repeat index, numeric, the measurement order) and ``value``.

    Fits a common slope per ``by`` group with a separate intercept for each session (pooled
    within-session regression), tests slope = 0 with a two-sided t test (df = N - sessions - 1) and
    reports both SDs: ``sd_raw`` (pooled within-session SD, inflated by a trend) and
    ``sd_detrended`` (residual SD about the common slope). ``repeatability_sd`` is the detrended
    value when the trend is significant at ``alpha`` and the raw one otherwise. Lines shrinking
    under the beam give a negative slope (common practice: detrend or measure etched features).

    Example:
        >>> f = pl.DataFrame({"tool": ["A"] * 6, "session": [1, 1, 1, 2, 2, 2],
        ...                   "repeat": [1, 2, 3] * 2, "value": [50.0, 49.8, 49.6, 51.0, 50.9, 50.6]})
        >>> round(evaluate_repeat_trend(f)["slope_per_repeat"][0], 3)
        -0.2
    """
    keys = list(by)
    sess = [*keys, *session]
    x = pl.col("repeat").cast(pl.Float64)
    centred = frame.with_columns(
        (x - x.mean().over(sess)).alias("_dx"),
        (pl.col("value") - pl.col("value").mean().over(sess)).alias("_dy"),
    )
    agg = [
        pl.len().cast(pl.Int64).alias("n"),
        pl.struct(session).n_unique().cast(pl.Int64).alias("n_sessions"),
        (pl.col("_dx") * pl.col("_dx")).sum().alias("_sxx"),
        (pl.col("_dx") * pl.col("_dy")).sum().alias("_sxy"),
        (pl.col("_dy") * pl.col("_dy")).sum().alias("_syy"),
    ]
    sums = centred.group_by(keys, maintain_order=True).agg(agg) if keys else centred.select(agg)
    slope = pl.col("_sxy") / pl.col("_sxx")
    df_raw = pl.col("n") - pl.col("n_sessions")
    rss = pl.col("_syy") - pl.col("_sxy").pow(2) / pl.col("_sxx")
    out = sums.with_columns(
        slope.alias("slope_per_repeat"),
        (df_raw - 1).alias("df"),
        (pl.col("_syy") / df_raw).sqrt().alias("sd_raw"),
        (rss / (df_raw - 1)).sqrt().alias("sd_detrended"),
    ).with_columns((pl.col("sd_detrended") / pl.col("_sxx").sqrt()).alias("slope_se"))
    out = out.with_columns((pl.col("slope_per_repeat") / pl.col("slope_se")).alias("t"))
    p = 2.0 * stats.t.sf(np.abs(out["t"].to_numpy()), out["df"].to_numpy())
    out = out.with_columns(pl.Series("p_value", p, dtype=pl.Float64)).with_columns(
        (pl.col("p_value") < alpha).alias("trend_detected")
    )
    return out.select(
        *keys,
        "n",
        "n_sessions",
        "slope_per_repeat",
        "slope_se",
        "t",
        "df",
        "p_value",
        "trend_detected",
        "sd_raw",
        "sd_detrended",
        pl.when(pl.col("trend_detected"))
        .then(pl.col("sd_detrended"))
        .otherwise(pl.col("sd_raw"))
        .alias("repeatability_sd"),
    )


def precision_to_tolerance(sigma_meas, lsl, usl) -> np.ndarray:
    """P/T = 6 * sigma_measurement / (USL - LSL), elementwise (common practice).

    Example:
        >>> float(precision_to_tolerance(0.25, 45.0, 55.0))
        0.15
    """
    sigma = np.asarray(sigma_meas, dtype=float)
    width = np.asarray(usl, dtype=float) - np.asarray(lsl, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(width > 0, 6.0 * sigma / np.where(width > 0, width, 1.0), np.nan)


def classify_precision_to_tolerance(ratio) -> np.ndarray:
    """P/T verdict (common practice): < 0.1 ``good``, <= 0.3 ``acceptable``, else ``not capable``.

    NaN ratios (no two-sided spec) give ``unknown``.

    Example:
        >>> classify_precision_to_tolerance([0.05, 0.1, 0.3, 0.31]).tolist()
        ['good', 'acceptable', 'acceptable', 'not capable']
    """
    r = np.asarray(ratio, dtype=float)
    return np.select(
        [np.isnan(r), r < P_TO_T_GOOD, r <= P_TO_T_ACCEPTABLE],
        ["unknown", "good", "acceptable"],
        default="not capable",
    )
