"""Shape of a change in a series: a sudden step or a gradual ramp (drift)?

A metrology tool that reads high after a source exchange shows a *step*; one whose column ages shows a
*ramp*. Both light up an EWMA chart, but they call for different actions, so each series is fitted with both models
and the one with the smaller Bayesian information criterion names the shape,
BIC = n ln(RSS/n) + p ln(n) (Schwarz, Annals of Statistics 6, 1978), with p = 2 for the ramp and p = 3 for the
step (its change point counts as a parameter, common practice), so noise alone does not pass for a step:

- ramp: the least-squares straight line ``value = a + b * order``;
- step: the least-squares single change point in the mean (two segment means, the split chosen to minimise
  the pooled within-segment sum of squares; Hinkley, Biometrika 57, 1970, from memory), each segment at
  least ``min_segment`` points long.

Pure, vectorised across series (cumulative sums per group); no I/O, no clock, no randomness.
"""

from __future__ import annotations

from collections.abc import Sequence

import polars as pl

__all__ = ["compare_step_and_ramp"]


def compare_step_and_ramp(
    frame: pl.DataFrame,
    *,
    by: Sequence[str] = ("tool",),
    order: str = "seq",
    value: str = "value",
    min_segment: int = 3,
) -> pl.DataFrame:
    """Fit a straight line and a single step to each series; say which fits better.

    Input columns: ``by`` keys, ``order`` (numeric position or days, increasing within a series) and
    ``value``. Output, one row per series: ``n``, ``slope`` (per unit of ``order``), ``rss_ramp``,
    ``step_before`` (last ``order`` before the step), ``step_after`` (first ``order`` after it),
    ``step_size`` (mean after - mean before), ``rss_step``, ``bic_ramp``, ``bic_step``, ``shape`` ("step"
    or "ramp"; null when the series is shorter than ``2 * min_segment``), and ``rss_flat`` / ``bic_flat`` of
    the constant model (the mean alone): ``changed`` is True when the chosen shape's BIC is below it, i.e.
    the data show a step or ramp at all rather than noise about a constant level.

    Example:
        >>> f = pl.DataFrame({"tool": "A", "seq": list(range(8)), "value": [0.0] * 4 + [1.0] * 4})
        >>> compare_step_and_ramp(f).select("step_after", "step_size", "shape").row(0)
        (4, 1.0, 'step')
    """
    keys = list(by)
    if not keys:  # one series: give it a constant key so the group-wise code below needs no branch
        out = compare_step_and_ramp(
            frame.with_columns(pl.lit(0).alias("_one")),
            by=["_one"],
            order=order,
            value=value,
            min_segment=min_segment,
        )
        return out.drop("_one")
    x = pl.col(order).cast(pl.Float64)
    y = pl.col(value).cast(pl.Float64)
    f = frame.sort([*keys, order]).with_columns(
        (pl.int_range(pl.len()).over(keys) + 1).alias("_k"),
        pl.len().over(keys).alias("_n"),
        y.cum_sum().over(keys).alias("_s"),
        (y * y).cum_sum().over(keys).alias("_q"),
        y.sum().over(keys).alias("_sn"),
        (y * y).sum().over(keys).alias("_qn"),
        pl.col(order).shift(-1).over(keys).alias("_next"),
    )
    # ramp: closed-form least squares per series
    dx = x - x.mean().over(keys)
    dy = y - y.mean().over(keys)
    ramp = (
        f.with_columns(dx.alias("_dx"), dy.alias("_dy"))
        .group_by(keys, maintain_order=True)
        .agg(
            pl.len().cast(pl.Int64).alias("n"),
            (pl.col("_dx") * pl.col("_dy")).sum().alias("_sxy"),
            pl.col("_dx").pow(2).sum().alias("_sxx"),
            pl.col("_dy").pow(2).sum().alias("_syy"),
        )
        .with_columns(pl.when(pl.col("_sxx") > 0).then(pl.col("_sxy") / pl.col("_sxx")).alias("slope"))
        .with_columns(
            (pl.col("_syy") - pl.col("slope") * pl.col("_sxy")).alias("rss_ramp"),
            pl.col("_syy").alias("rss_flat"),
        )
        .drop("_sxy", "_sxx", "_syy")
    )
    # step: split after position k, k in [min_segment, n - min_segment]
    k = pl.col("_k").cast(pl.Float64)
    rest = pl.col("_n").cast(pl.Float64) - k
    left = pl.col("_q") - pl.col("_s").pow(2) / k
    right = (pl.col("_qn") - pl.col("_q")) - (pl.col("_sn") - pl.col("_s")).pow(2) / rest
    step = (
        f.filter((pl.col("_k") >= min_segment) & (pl.col("_n") - pl.col("_k") >= min_segment))
        .with_columns(
            (left + right).alias("rss_step"),
            ((pl.col("_sn") - pl.col("_s")) / rest - pl.col("_s") / k).alias("step_size"),
        )
        .sort([*keys, "rss_step", "_k"])
        .group_by(keys, maintain_order=True)
        .agg(
            pl.col(order).first().alias("step_before"),
            pl.col("_next").first().alias("step_after"),
            pl.col("step_size").first(),
            pl.col("rss_step").first(),
        )
    )
    out = ramp.join(step, on=keys, how="left", nulls_equal=True)
    n = pl.col("n").cast(pl.Float64)
    tiny = 1e-300  # a perfect fit has RSS 0; keep the logarithm finite

    def bic(rss: str, p: int) -> pl.Expr:
        return n * (pl.max_horizontal(pl.col(rss), pl.lit(tiny)) / n).log() + p * n.log()

    out = out.with_columns(
        bic("rss_ramp", 2).alias("bic_ramp"),
        bic("rss_step", 3).alias("bic_step"),
        bic("rss_flat", 1).alias("bic_flat"),
    )
    shape = (
        pl.when(pl.col("rss_step").is_null())
        .then(pl.lit(None, pl.String))
        .when(pl.col("bic_step") < pl.col("bic_ramp"))
        .then(pl.lit("step"))
        .otherwise(pl.lit("ramp"))
    )
    changed = (
        pl.when(pl.col("shape").is_null())
        .then(pl.lit(None, pl.Boolean))
        .otherwise(pl.min_horizontal("bic_step", "bic_ramp") < pl.col("bic_flat"))
    )
    return (
        out.with_columns(shape.alias("shape"))
        .with_columns(changed.alias("changed"))
        .select(
            *keys,
            "n",
            "slope",
            "rss_ramp",
            "step_before",
            "step_after",
            "step_size",
            "rss_step",
            "bic_ramp",
            "bic_step",
            "shape",
            "rss_flat",
            "bic_flat",
            "changed",
        )
    )
