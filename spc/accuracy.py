"""Accuracy of a measuring tool against a reference measurement system (cross-section TEM, AFM, standards).

- :func:`fit_errors_in_variables`: Mandel's straight-line fit when both variables carry error
  (Mandel, J. Quality Technology 16, 1984; also called Deming regression). ``error_variance_ratio``
  lambda = var(error of the measured tool) / var(error of the reference); lambda = 1 is orthogonal
  regression, lambda -> infinity is ordinary least squares of measured on reference. Slope and
  offset intervals come from the jackknife (Linnet's approach for this fit, from memory), with
  Student t on n - 2 degrees of freedom.
- Total measurement uncertainty (TMU) after Banke and Archie (SPIE 3677, 1999; details from memory):
  the residual variance about the fitted line holds the tool's own error plus the reference's error
  seen through the slope, var(residual) ~ sigma_tool^2 + slope^2 * u_ref^2. Removing the reference
  part leaves the tool's total uncertainty: precision plus sample-to-sample bias and nonlinearity.
  Reported as ``tmu_sd`` (1 sigma) and ``tmu`` (times ``coverage``, 3 by default).
- :func:`evaluate_reference_bias`: per-standard bias (measured - reference) with its SD and a t
  interval, the check-standard calibration check of the NIST/SEMATECH e-Handbook §2.3.7.

Pure functions over polars frames, vectorised across ``by`` groups.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import polars as pl
from scipy import stats

__all__ = [
    "error_variance_ratio_from_precision",
    "evaluate_reference_bias",
    "fit_errors_in_variables",
]


def error_variance_ratio_from_precision(measured_sd, reference_sd) -> np.ndarray:
    """lambda = (measured tool's precision SD / reference system's precision SD)^2.

    Example:
        >>> float(error_variance_ratio_from_precision(0.5, 1.0))
        0.25
    """
    return (np.asarray(measured_sd, dtype=float) / np.asarray(reference_sd, dtype=float)) ** 2


def _deming_slope(sxx: pl.Expr, syy: pl.Expr, sxy: pl.Expr, lam: float) -> pl.Expr:
    d = syy - lam * sxx
    return pl.when(sxy != 0).then((d + (d.pow(2) + 4.0 * lam * sxy.pow(2)).sqrt()) / (2.0 * sxy))


def fit_errors_in_variables(
    frame: pl.DataFrame,
    *,
    by: Sequence[str] = (),
    error_variance_ratio: float = 1.0,
    reference_sd: float = 0.0,
    confidence: float = 0.95,
    coverage: float = 3.0,
) -> pl.DataFrame:
    """Mandel errors-in-variables line of ``measured`` on ``reference`` with intervals and TMU.

    Input columns: ``by`` keys, ``reference`` (reference system value, nm) and ``measured`` (tool
    value, nm), one row per feature measured by both. ``reference_sd`` is the reference system's
    own standard uncertainty (nm, 1 sigma) removed from the residual variance.

    Output, one row per group: ``n``, ``slope``, ``slope_se``, ``slope_lo``, ``slope_hi``,
    ``offset`` (intercept at reference = 0), ``offset_se``, ``offset_lo``, ``offset_hi``,
    ``mean_offset`` (mean measured - mean reference), ``residual_sd`` (SD of measured about the line,
    df n - 2), ``tmu_sd`` and ``tmu`` (coverage x tmu_sd).

    Example:
        >>> f = pl.DataFrame({"reference": [10.0, 20.0, 30.0, 40.0], "measured": [11.0, 21.2, 30.8, 41.0]})
        >>> round(fit_errors_in_variables(f)["slope"].item(), 3)
        0.996
    """
    keys = list(by)
    lam = float(error_variance_ratio)
    over = (lambda e: e.over(keys)) if keys else (lambda e: e)
    x, y = pl.col("reference").cast(pl.Float64), pl.col("measured").cast(pl.Float64)
    n = over(pl.len()).cast(pl.Float64)
    mx, my = over(x.mean()), over(y.mean())
    dx, dy = x - mx, y - my
    f = frame.with_columns(
        n.alias("_n"),
        mx.alias("_mx"),
        my.alias("_my"),
        over((dx * dx).sum()).alias("_sxx"),
        over((dy * dy).sum()).alias("_syy"),
        over((dx * dy).sum()).alias("_sxy"),
        dx.alias("_dx"),
        dy.alias("_dy"),
    )
    # Leave-one-out sums in closed form: removing point i changes S_uv by n/(n-1) * du_i * dv_i.
    k = pl.col("_n") / (pl.col("_n") - 1.0)
    sxx_i = pl.col("_sxx") - k * pl.col("_dx").pow(2)
    syy_i = pl.col("_syy") - k * pl.col("_dy").pow(2)
    sxy_i = pl.col("_sxy") - k * pl.col("_dx") * pl.col("_dy")
    mx_i = (pl.col("_n") * pl.col("_mx") - x) / (pl.col("_n") - 1.0)
    my_i = (pl.col("_n") * pl.col("_my") - y) / (pl.col("_n") - 1.0)
    slope = _deming_slope(pl.col("_sxx"), pl.col("_syy"), pl.col("_sxy"), lam)
    f = f.with_columns(
        slope.alias("slope"),
        _deming_slope(sxx_i, syy_i, sxy_i, lam).alias("_b_i"),
    ).with_columns(
        (pl.col("_my") - pl.col("slope") * pl.col("_mx")).alias("offset"),
        (my_i - pl.col("_b_i") * mx_i).alias("_a_i"),
    )
    f = f.with_columns((y - pl.col("offset") - pl.col("slope") * x).alias("_e"))

    def jack(c: str) -> pl.Expr:
        """Jackknife SE: sqrt((n-1)/n * sum((theta_i - mean theta_i)^2))."""
        spread = (pl.col(c) - pl.col(c).mean()).pow(2).sum()
        return ((pl.col("_n").first() - 1.0) / pl.col("_n").first() * spread).sqrt()

    agg = [
        pl.len().cast(pl.Int64).alias("n"),
        pl.col("slope").first(),
        jack("_b_i").alias("slope_se"),
        pl.col("offset").first(),
        jack("_a_i").alias("offset_se"),
        (pl.col("_my") - pl.col("_mx")).first().alias("mean_offset"),
        (pl.col("_e").pow(2).sum() / (pl.len().cast(pl.Float64) - 2.0)).sqrt().alias("residual_sd"),
    ]
    out = f.group_by(keys, maintain_order=True).agg(agg) if keys else f.select(agg)
    tq = stats.t.ppf(0.5 + confidence / 2.0, np.maximum(out["n"].to_numpy() - 2, 1))
    tq = np.where(out["n"].to_numpy() > 2, tq, np.nan)
    t = pl.Series("_t", tq, dtype=pl.Float64)
    tmu_var = pl.col("residual_sd").pow(2) - pl.col("slope").pow(2) * reference_sd**2
    out = (
        out.with_columns(t)
        .with_columns(
            (pl.col("slope") - pl.col("_t") * pl.col("slope_se")).alias("slope_lo"),
            (pl.col("slope") + pl.col("_t") * pl.col("slope_se")).alias("slope_hi"),
            (pl.col("offset") - pl.col("_t") * pl.col("offset_se")).alias("offset_lo"),
            (pl.col("offset") + pl.col("_t") * pl.col("offset_se")).alias("offset_hi"),
            pl.max_horizontal(tmu_var, pl.lit(0.0)).sqrt().alias("tmu_sd"),
        )
        .with_columns((coverage * pl.col("tmu_sd")).alias("tmu"))
    )
    return out.select(
        *keys,
        "n",
        "slope",
        "slope_se",
        "slope_lo",
        "slope_hi",
        "offset",
        "offset_se",
        "offset_lo",
        "offset_hi",
        "mean_offset",
        "residual_sd",
        "tmu_sd",
        "tmu",
    )


def evaluate_reference_bias(
    frame: pl.DataFrame, *, by: Sequence[str] = ("standard",), confidence: float = 0.95
) -> pl.DataFrame:
    """Bias of a tool on reference standards: mean(measured - reference), its SD and a t interval.

    Input columns: ``by`` keys (the standard, e.g. low / mid / high), ``reference`` (certified
    value) and ``measured``; one row per measurement (e.g. per day). Output per group: ``n``,
    ``reference`` (mean certified value), ``mean_measured``, ``bias``, ``bias_sd``, ``bias_se``,
    ``df``, ``t``, ``p_value`` (two-sided, bias = 0), ``bias_lo``, ``bias_hi``.

    Example:
        >>> f = pl.DataFrame({"standard": ["L"] * 3, "reference": [1.0] * 3, "measured": [1.1, 1.2, 1.3]})
        >>> round(evaluate_reference_bias(f)["bias"].item(), 3)
        0.2
    """
    keys = list(by)
    d = pl.col("measured") - pl.col("reference")
    agg = [
        pl.len().cast(pl.Int64).alias("n"),
        pl.col("reference").mean(),
        pl.col("measured").mean().alias("mean_measured"),
        d.mean().alias("bias"),
        d.std(ddof=1).alias("bias_sd"),
    ]
    out = frame.group_by(keys, maintain_order=True).agg(agg) if keys else frame.select(agg)
    out = out.with_columns(
        (pl.col("bias_sd") / pl.col("n").cast(pl.Float64).sqrt()).alias("bias_se"),
        (pl.col("n") - 1).alias("df"),
    ).with_columns((pl.col("bias") / pl.col("bias_se")).alias("t"))
    dof = out["df"].to_numpy().astype(float)
    dof = np.where(dof > 0, dof, np.nan)
    p = 2.0 * stats.t.sf(np.abs(out["t"].to_numpy()), dof)
    tq = stats.t.ppf(0.5 + confidence / 2.0, dof)
    out = out.with_columns(pl.Series("p_value", p, dtype=pl.Float64), pl.Series("_t", tq, dtype=pl.Float64))
    return out.with_columns(
        (pl.col("bias") - pl.col("_t") * pl.col("bias_se")).alias("bias_lo"),
        (pl.col("bias") + pl.col("_t") * pl.col("bias_se")).alias("bias_hi"),
    ).drop("_t")
