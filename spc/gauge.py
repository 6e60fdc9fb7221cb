"""Gauge repeatability and reproducibility by two-way crossed ANOVA (parts x appraisers x repeats).

An appraiser is whatever reproduces the measurement: an operator, a tool of the fleet, a recipe.
The random-effects model y = mu + part + appraiser + part:appraiser + error is fitted by equating
mean squares to their expectations (Montgomery, Introduction to Statistical Quality Control, gauge
R&R by ANOVA; Montgomery, Design and Analysis of Experiments, two-factor random model). When the
interaction is not significant at ``interaction_alpha`` (0.25 by common practice) it is pooled into
the error term and the reduced model's components are reported. Negative estimates are set to 0.

Pure functions over polars frames; many studies at once through ``by`` keys.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import polars as pl
from scipy import stats

__all__ = ["GaugeStudySettings", "analyse_gauge_rr"]


@dataclass(frozen=True)
class GaugeStudySettings:
    """Settings of a gauge R&R study."""

    interaction_alpha: float = 0.25
    """Pool the part x appraiser interaction when its F-test p-value exceeds this (common practice)."""
    study_multiplier: float = 6.0
    """Spread multiplier for %tolerance: 6 sigma (as in P/T); some plans use 5.15."""
    ndc_factor: float = 1.41
    """ndc = floor(ndc_factor * PV / GRR); 1.41 ~ sqrt(2) (AIAG MSA manual, common practice)."""


def analyse_gauge_rr(
    frame: pl.DataFrame,
    *,
    by: Sequence[str] = (),
    tolerance: float | None = None,
    settings: GaugeStudySettings = GaugeStudySettings(),
) -> pl.DataFrame:
    """Crossed gauge R&R by ANOVA: variance components, %GRR and number of distinct categories.

    Input columns: ``by`` keys (one study each), ``part``, ``appraiser`` (operator or tool) and
    ``value``; every part x appraiser cell must hold the same number of repeats (>= 2).

    Output, one row per study: ``n_parts``, ``n_appraisers``, ``n_repeats``; the ANOVA table
    (``df_*``, ``ms_*`` for part, appraiser, interaction, error; ``p_interaction``);
    ``interaction_pooled``; variances ``var_repeatability`` (EV^2), ``var_appraiser``,
    ``var_interaction``, ``var_reproducibility`` (AV^2 = appraiser + interaction),
    ``var_grr``, ``var_part`` (PV^2), ``var_total``; the SDs ``sd_*`` of each; ``pct_grr_total``
    (100 GRR/TV, SD ratio), ``pct_grr_tolerance`` (100 multiplier GRR/tolerance, null without a
    tolerance) and ``ndc``.

    Example:
        >>> f = pl.DataFrame({"part": [1, 1, 1, 1, 2, 2, 2, 2], "appraiser": ["a", "a", "b", "b"] * 2,
        ...                   "value": [10.0, 10.2, 10.1, 10.3, 12.0, 12.2, 12.1, 12.3]})
        >>> round(analyse_gauge_rr(f)["var_repeatability"].item(), 4)
        0.016
    """
    keys = list(by)
    cell = [*keys, "part", "appraiser"]
    y = pl.col("value")
    g = frame.with_columns(
        y.mean().over(keys).alias("_g") if keys else y.mean().alias("_g"),
        y.mean().over([*keys, "part"]).alias("_pm"),
        y.mean().over([*keys, "appraiser"]).alias("_om"),
        y.mean().over(cell).alias("_cm"),
        pl.len().over(cell).alias("_r"),
    )
    agg = [
        pl.col("part").n_unique().alias("n_parts"),
        pl.col("appraiser").n_unique().alias("n_appraisers"),
        pl.col("_r").min().alias("n_repeats"),
        pl.col("_r").max().alias("_rmax"),
        pl.struct("part", "appraiser").n_unique().alias("_cells"),
        pl.len().alias("_n"),
        (pl.col("_pm") - pl.col("_g")).pow(2).sum().alias("ss_part"),
        (pl.col("_om") - pl.col("_g")).pow(2).sum().alias("ss_appraiser"),
        (pl.col("_cm") - pl.col("_g")).pow(2).sum().alias("_ss_cells"),
        (y - pl.col("_cm")).pow(2).sum().alias("ss_error"),
    ]
    # Sums over all rows: each row carries its part/appraiser/cell mean, so sum((pm - g)^2) over
    # rows is already o*r*sum over parts -- the balanced-design multipliers are built in.
    t = g.group_by(keys, maintain_order=True).agg(agg) if keys else g.select(agg)
    bad = t.filter(
        (pl.col("n_repeats") != pl.col("_rmax"))
        | (pl.col("n_repeats") < 2)
        | (pl.col("_cells") != pl.col("n_parts") * pl.col("n_appraisers"))
    )
    if bad.height:
        raise ValueError(
            "gauge study is not a balanced crossed design "
            f"(found {bad.select(*keys, 'n_parts', 'n_appraisers', 'n_repeats', '_rmax', '_cells').row(0)}, "
            "expected every part x appraiser cell with the same number >= 2 of repeats). "
            "Fix: drop incomplete parts or appraisers before the study."
        )
    p, o, r = pl.col("n_parts"), pl.col("n_appraisers"), pl.col("n_repeats")
    t = t.with_columns(
        (pl.col("_ss_cells") - pl.col("ss_part") - pl.col("ss_appraiser")).alias("ss_interaction"),
        (p - 1).alias("df_part"),
        (o - 1).alias("df_appraiser"),
        ((p - 1) * (o - 1)).alias("df_interaction"),
        (p * o * (r - 1)).alias("df_error"),
    ).with_columns(
        *(
            (pl.col(f"ss_{k}") / pl.col(f"df_{k}")).alias(f"ms_{k}")
            for k in ("part", "appraiser", "interaction", "error")
        )
    )
    f_int = (t["ms_interaction"] / t["ms_error"]).to_numpy()
    p_int = stats.f.sf(f_int, t["df_interaction"].to_numpy(), t["df_error"].to_numpy())
    t = t.with_columns(pl.Series("p_interaction", p_int, dtype=pl.Float64)).with_columns(
        (pl.col("p_interaction") > settings.interaction_alpha).alias("interaction_pooled")
    )
    ms_pooled = (pl.col("ss_interaction") + pl.col("ss_error")) / (
        pl.col("df_interaction") + pl.col("df_error")
    )
    pooled = pl.col("interaction_pooled")
    zero = pl.lit(0.0)
    t = t.with_columns(
        pl.when(pooled).then(ms_pooled).otherwise(pl.col("ms_error")).alias("var_repeatability"),
        pl.when(pooled)
        .then(zero)
        .otherwise((pl.col("ms_interaction") - pl.col("ms_error")) / r)
        .alias("var_interaction"),
        pl.when(pooled)
        .then((pl.col("ms_appraiser") - ms_pooled) / (p * r))
        .otherwise((pl.col("ms_appraiser") - pl.col("ms_interaction")) / (p * r))
        .alias("var_appraiser"),
        pl.when(pooled)
        .then((pl.col("ms_part") - ms_pooled) / (o * r))
        .otherwise((pl.col("ms_part") - pl.col("ms_interaction")) / (o * r))
        .alias("var_part"),
    ).with_columns(
        pl.max_horizontal(pl.col(c), zero).alias(c) for c in ("var_interaction", "var_appraiser", "var_part")
    )
    t = (
        t.with_columns(
            (pl.col("var_appraiser") + pl.col("var_interaction")).alias("var_reproducibility"),
        )
        .with_columns(
            (pl.col("var_repeatability") + pl.col("var_reproducibility")).alias("var_grr"),
        )
        .with_columns((pl.col("var_grr") + pl.col("var_part")).alias("var_total"))
    )
    names = ("repeatability", "appraiser", "interaction", "reproducibility", "grr", "part", "total")
    t = t.with_columns(pl.col(f"var_{k}").sqrt().alias(f"sd_{k}") for k in names)
    spread = settings.study_multiplier * pl.col("sd_grr")
    ndc = (settings.ndc_factor * pl.col("sd_part") / pl.col("sd_grr")).floor()
    t = t.with_columns(
        (100.0 * pl.col("sd_grr") / pl.col("sd_total")).alias("pct_grr_total"),
        (100.0 * spread / tolerance if tolerance else pl.lit(None, dtype=pl.Float64)).alias(
            "pct_grr_tolerance"
        ),
        pl.when(pl.col("sd_grr") > 0).then(ndc).otherwise(None).cast(pl.Int64).alias("ndc"),
    )
    table = [f"{s}_{k}" for s in ("df", "ms") for k in ("part", "appraiser", "interaction", "error")]
    return t.select(
        *keys,
        *(pl.col(c).cast(pl.Int64) for c in ("n_parts", "n_appraisers", "n_repeats")),
        *(pl.col(c).cast(pl.Int64) if c.startswith("df") else pl.col(c) for c in table),
        "p_interaction",
        "interaction_pooled",
        *(f"var_{k}" for k in names),
        *(f"sd_{k}" for k in names),
        "pct_grr_total",
        "pct_grr_tolerance",
        "ndc",
    )
