"""Monitor-wafer health of a metrology fleet (CD-SEMs): bias, drift, short-term precision, fleet offset.

Each tool measures the same etched monitor ("golden") wafer on a fixed recipe every day: a few
targets (monitor features), each measured with a few static repeats. Per tool, target and day this
module charts, following the check-standard approach of the NIST/SEMATECH e-Handbook chapter 2:

- the daily mean: its bias to the monitor's reference value (or the tool's baseline mean) and its
  drift, by the shared EWMA of ``spc.ewma`` started at the baseline mean (z0 = mu0) with exact
  time-varying limits (NIST/SEMATECH e-Handbook §6.3.2.4);
- the SD of the repeats (short-term precision) on an S chart, c4/B5/B6 computed from gamma functions;
- the offset of the tool's daily mean to the fleet mean of that target and day, with a Welch
  interval from the repeats.

Limits come from a Phase I baseline: each series' first ``baseline_days`` days. The EWMA sigma is
the SD of the baseline daily means, not sigma_repeat/sqrt(n): day-to-day variation is real and a
within-day sigma would give limits far too tight (the nested-variance trap).

Signals advise; the fab's out-of-control action plan (OCAP) and qualified engineers decide whether
a tool goes down. Pure functions: no I/O, no clock; vectorised across all series.

Frame contract of the raw input: ``tool``, ``target`` (monitor feature id), ``day`` (Date) or
``measured_at`` (UTC Datetime; its date is the day), ``repeat`` (repeat index) and ``value`` (nm).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import polars as pl
from scipy import stats

from spc.ewma import EwmaParams, evaluate_ewma
from spc.precision import s_chart_factors

__all__ = [
    "MonitorSettings",
    "estimate_fleet_matching",
    "estimate_fleet_offsets",
    "evaluate_monitor_health",
    "summarise_monitor_days",
]

SERIES = ["tool", "target"]


@dataclass(frozen=True)
class MonitorSettings:
    """Settings of the monitor-wafer charts."""

    baseline_days: int = 20
    """Phase I: the first this-many days of each tool/target series freeze its limits."""
    ewma_lambda: float = 0.2
    """EWMA weight of the newest daily mean."""
    ewma_width: float = 3.0
    """EWMA limit width L in sigmas of the EWMA statistic."""
    s_chart_width: float = 3.0
    """S-chart limit width in sigmas of s."""
    confidence: float = 0.95
    """Two-sided confidence level of fleet-offset intervals."""


def summarise_monitor_days(frame: pl.DataFrame) -> pl.DataFrame:
    """Raw monitor repeats -> one row per tool, target and day: ``n``, ``mean_nm``, ``sd_nm``.

    Input columns: ``tool``, ``target``, ``day`` or ``measured_at``, ``repeat``, ``value`` (nm).

    Example:
        >>> import datetime as dt
        >>> f = pl.DataFrame({"tool": "SEM1", "target": "T1", "day": dt.date(2024, 1, 1),
        ...                   "repeat": [1, 2, 3], "value": [40.0, 40.2, 40.4]})
        >>> summarise_monitor_days(f).select("n", pl.col("mean_nm").round(3)).row(0)
        (3, 40.2)
    """
    if "day" not in frame.columns:
        frame = frame.with_columns(pl.col("measured_at").dt.date().alias("day"))
    return (
        frame.group_by([*SERIES, "day"])
        .agg(
            pl.len().cast(pl.Int64).alias("n"),
            pl.col("value").mean().alias("mean_nm"),
            pl.col("value").std(ddof=1).alias("sd_nm"),
        )
        .sort([*SERIES, "day"])
    )


def estimate_fleet_offsets(daily: pl.DataFrame, *, confidence: float = 0.95) -> pl.DataFrame:
    """Offset of each tool's daily mean to the fleet mean of the same target and day, with interval.

    Input columns: ``tool``, ``target``, ``day``, ``n``, ``mean_nm``, ``sd_nm`` (see
    :func:`summarise_monitor_days`). The fleet mean is the plain mean of the T tools' daily means.
    offset_i = m_i - mean(m) = (1 - 1/T) m_i - (1/T) sum_{j != i} m_j, so with v_j = sd_j^2/n_j
    var(offset_i) = (1 - 2/T) v_i + sum(v)/T^2, with Welch-Satterthwaite degrees of freedom. This
    interval holds the repeat noise of that day only.

    Output: the input columns plus ``n_tools``, ``fleet_mean_nm``, ``fleet_offset_nm``,
    ``fleet_offset_se``, ``fleet_offset_df``, ``fleet_offset_lo``, ``fleet_offset_hi`` (null when
    only one tool measured that day).

    Example:
        >>> d = pl.DataFrame({"tool": ["A", "B"], "target": "T1", "day": 1, "n": 5,
        ...                   "mean_nm": [40.0, 41.0], "sd_nm": [0.2, 0.2]})
        >>> estimate_fleet_offsets(d)["fleet_offset_nm"].to_list()
        [-0.5, 0.5]
    """
    key = ["target", "day"]
    v = pl.col("sd_nm").pow(2) / pl.col("n")
    f = daily.with_columns(v.alias("_v")).with_columns(
        pl.len().over(key).cast(pl.Float64).alias("_t"),
        pl.col("mean_nm").mean().over(key).alias("fleet_mean_nm"),
        pl.col("_v").sum().over(key).alias("_s1"),
        (pl.col("_v").pow(2) / (pl.col("n") - 1)).sum().over(key).alias("_s2"),
    )
    t = pl.col("_t")
    var = (1.0 - 2.0 / t) * pl.col("_v") + pl.col("_s1") / t.pow(2)
    den = pl.col("_s2") / t.pow(4) + ((1.0 - 1.0 / t).pow(4) - t.pow(-4)) * pl.col("_v").pow(2) / (
        pl.col("n") - 1
    )
    f = f.with_columns(
        (pl.col("mean_nm") - pl.col("fleet_mean_nm")).alias("fleet_offset_nm"),
        pl.when(t > 1).then(var.sqrt()).alias("fleet_offset_se"),
        pl.when(t > 1).then(var.pow(2) / den).alias("fleet_offset_df"),
    )
    q = stats.t.ppf(0.5 + confidence / 2.0, f["fleet_offset_df"].fill_null(np.nan).to_numpy())
    f = f.with_columns(pl.Series("_q", q, dtype=pl.Float64).fill_nan(None))
    return f.with_columns(
        pl.col("_t").cast(pl.Int64).alias("n_tools"),
        (pl.col("fleet_offset_nm") - pl.col("_q") * pl.col("fleet_offset_se")).alias("fleet_offset_lo"),
        (pl.col("fleet_offset_nm") + pl.col("_q") * pl.col("fleet_offset_se")).alias("fleet_offset_hi"),
    ).select(
        *daily.columns,
        "n_tools",
        "fleet_mean_nm",
        "fleet_offset_nm",
        "fleet_offset_se",
        "fleet_offset_df",
        "fleet_offset_lo",
        "fleet_offset_hi",
    )


def evaluate_monitor_health(
    frame: pl.DataFrame,
    *,
    reference: pl.DataFrame | None = None,
    settings: MonitorSettings = MonitorSettings(),
) -> pl.DataFrame:
    """Monitor-wafer charts per tool, target and day: bias, EWMA drift, S chart and fleet offset.

    Input: raw repeats with ``tool``, ``target``, ``day`` or ``measured_at``, ``repeat``, ``value``
    (nm). ``reference`` (optional): ``target``, ``reference_nm``, the monitor's certified or
    agreed value per target; targets without one are compared with the series' baseline mean.

    Output, one row per tool, target and day (sorted): ``n``, ``mean_nm``, ``sd_nm``,
    ``day_index`` (1-based), ``in_baseline``; ``reference_nm``, ``reference_source``
    ("reference" / "baseline"), ``bias_nm``; ``baseline_mean_nm``, ``sigma_day_nm`` (SD of the
    baseline daily means), ``ewma_nm``, ``ewma_lcl``, ``ewma_ucl``, ``ewma_signal``;
    ``sigma_repeat_nm`` (baseline mean of sd/c4(n)), ``s_center``, ``s_lcl``, ``s_ucl``, ``s_signal``;
    and the fleet-offset columns of :func:`estimate_fleet_offsets`.

    Example:
        >>> f = pl.DataFrame({"tool": "SEM1", "target": "T1", "day": [1, 1, 2, 2, 3, 3],
        ...                   "repeat": [1, 2] * 3, "value": [40.0, 40.2, 40.1, 40.3, 40.0, 40.4]})
        >>> evaluate_monitor_health(f, settings=MonitorSettings(baseline_days=2))["ewma_signal"].to_list()
        [False, False, False]
    """
    daily = summarise_monitor_days(frame)
    daily = daily.with_columns(
        (pl.int_range(pl.len()).over(SERIES) + 1).cast(pl.Int64).alias("day_index"),
        pl.struct(SERIES).rle_id().alias("_g"),
    ).with_columns((pl.col("day_index") <= settings.baseline_days).alias("in_baseline"))
    factors = s_chart_factors(daily["n"].to_numpy(), width=settings.s_chart_width)
    daily = daily.with_columns(
        pl.Series("_c4", factors["c4"]), pl.Series("_b5", factors["B5"]), pl.Series("_b6", factors["B6"])
    )
    base = pl.col("in_baseline")
    daily = daily.with_columns(
        pl.col("mean_nm").filter(base).mean().over(SERIES).alias("baseline_mean_nm"),
        pl.col("mean_nm").filter(base).std(ddof=1).over(SERIES).alias("sigma_day_nm"),
        (pl.col("sd_nm") / pl.col("_c4")).filter(base).mean().over(SERIES).alias("sigma_repeat_nm"),
    )
    if reference is not None:
        daily = daily.join(reference.select("target", "reference_nm"), on="target", how="left")
    else:
        daily = daily.with_columns(pl.lit(None, dtype=pl.Float64).alias("reference_nm"))
    daily = daily.with_columns(
        pl.when(pl.col("reference_nm").is_null())
        .then(pl.lit("baseline"))
        .otherwise(pl.lit("reference"))
        .alias("reference_source"),
        pl.coalesce("reference_nm", "baseline_mean_nm").alias("reference_nm"),
    ).with_columns((pl.col("mean_nm") - pl.col("reference_nm")).alias("bias_nm"))

    # The shared EWMA kernel (spc.ewma, z0 at the centre, exact time-varying limits) on each series'
    # daily means, centred at the baseline mean with the baseline day-to-day sigma. Series without
    # a usable sigma (fewer than 2 baseline days, or all equal) get no EWMA.
    usable = pl.col("sigma_day_nm").is_not_null() & (pl.col("sigma_day_nm") > 0)
    points = daily.filter(usable).select(
        pl.col("_g").alias("series"),
        pl.col("day_index").alias("seq"),
        pl.col("mean_nm").alias("value"),
        pl.col("baseline_mean_nm").alias("center"),
        pl.col("sigma_day_nm").alias("sigma"),
    )
    ewma = evaluate_ewma(points, EwmaParams(lam=settings.ewma_lambda, L=settings.ewma_width)).points
    daily = daily.join(
        ewma.select(
            pl.col("series").alias("_g"),
            pl.col("seq").alias("day_index"),
            pl.col("ewma").alias("ewma_nm"),
            "ewma_lcl",
            "ewma_ucl",
            "ewma_signal",
        ),
        on=["_g", "day_index"],
        how="left",
    ).with_columns(pl.col("ewma_signal").fill_null(False))
    sig = pl.col("sigma_repeat_nm")
    daily = daily.with_columns(
        (pl.col("_c4") * sig).alias("s_center"),
        (pl.col("_b5") * sig).alias("s_lcl"),
        (pl.col("_b6") * sig).alias("s_ucl"),
    ).with_columns(
        ((pl.col("sd_nm") > pl.col("s_ucl")) | ((pl.col("s_lcl") > 0) & (pl.col("sd_nm") < pl.col("s_lcl"))))
        .fill_null(False)
        .alias("s_signal")
    )
    out = daily.select(
        *SERIES,
        "day",
        "n",
        "mean_nm",
        "sd_nm",
        "day_index",
        "in_baseline",
        "reference_nm",
        "reference_source",
        "bias_nm",
        "baseline_mean_nm",
        "sigma_day_nm",
        "ewma_nm",
        "ewma_lcl",
        "ewma_ucl",
        "ewma_signal",
        "sigma_repeat_nm",
        "s_center",
        "s_lcl",
        "s_ucl",
        "s_signal",
    )
    offsets = estimate_fleet_offsets(
        out.select(*SERIES, "day", "n", "mean_nm", "sd_nm"), confidence=settings.confidence
    )
    return out.join(offsets.drop("n", "mean_nm", "sd_nm"), on=[*SERIES, "day"], how="left").sort(
        [*SERIES, "day"]
    )


def estimate_fleet_matching(daily: pl.DataFrame, *, confidence: float = 0.95) -> pl.DataFrame:
    """Each tool's offset and slope to the fleet mean on the shared monitor features.

    Input columns: ``tool``, ``target``, ``day``, ``n``, ``mean_nm``, ``sd_nm`` (see
    :func:`summarise_monitor_days`). Only targets that every tool measured count as shared.

    - offset: the tool's mean offset to the fleet (averaged over shared targets per day), with a
      t interval from its day-to-day scatter (df = days - 1), so it holds reproducibility too.
    - slope and intercept: least squares of the tool's per-target mean on the fleet's per-target
      mean (over the days the tool measured). The fleet mean is taken as error-free here, since the
      spread of feature sizes dwarfs the averaged noise; for a stricter fit use
      ``spc.accuracy.fit_errors_in_variables`` with the fleet mean as reference. Slope intervals
      need at least 3 shared targets (df = targets - 2).

    Output, one row per tool: ``n_days``, ``n_targets``, ``offset_nm``, ``offset_sd_nm``,
    ``offset_lo``, ``offset_hi``, ``slope``, ``slope_se``, ``slope_lo``, ``slope_hi``, ``intercept_nm``.

    Example:
        >>> d = pl.DataFrame({"tool": ["A", "B"] * 4, "target": ["T1"] * 4 + ["T2"] * 4,
        ...                   "day": [1, 1, 2, 2] * 2, "n": 5, "sd_nm": 0.2,
        ...                   "mean_nm": [40.0, 41.0, 40.2, 41.0, 80.0, 81.0, 80.2, 81.0]})
        >>> estimate_fleet_matching(d)["offset_nm"].round(3).to_list()
        [-0.45, 0.45]
    """
    n_tools = daily["tool"].n_unique()
    shared = (
        daily.group_by("target").agg(pl.col("tool").n_unique().alias("_k")).filter(pl.col("_k") == n_tools)
    )
    f = estimate_fleet_offsets(
        daily.join(shared.select("target"), on="target", how="semi"), confidence=confidence
    )
    per_day = f.group_by("tool", "day").agg(pl.col("fleet_offset_nm").mean().alias("_d"))
    offs = per_day.group_by("tool").agg(
        pl.len().cast(pl.Int64).alias("n_days"),
        pl.col("_d").mean().alias("offset_nm"),
        pl.col("_d").std(ddof=1).alias("offset_sd_nm"),
    )
    per_target = f.group_by("tool", "target").agg(
        pl.col("fleet_mean_nm").mean().alias("_x"), pl.col("mean_nm").mean().alias("_y")
    )
    dx = pl.col("_x") - pl.col("_x").mean().over("tool")
    dy = pl.col("_y") - pl.col("_y").mean().over("tool")
    line = (
        per_target.with_columns(dx.alias("_dx"), dy.alias("_dy"))
        .group_by("tool")
        .agg(
            pl.len().cast(pl.Int64).alias("n_targets"),
            pl.col("_x").mean().alias("_mx"),
            pl.col("_y").mean().alias("_my"),
            (pl.col("_dx") ** 2).sum().alias("_sxx"),
            (pl.col("_dx") * pl.col("_dy")).sum().alias("_sxy"),
            (pl.col("_dy") ** 2).sum().alias("_syy"),
        )
        .with_columns(pl.when(pl.col("_sxx") > 0).then(pl.col("_sxy") / pl.col("_sxx")).alias("slope"))
        .with_columns(
            (pl.col("_my") - pl.col("slope") * pl.col("_mx")).alias("intercept_nm"),
            pl.when(pl.col("n_targets") > 2)
            .then(
                (
                    (pl.col("_syy") - pl.col("slope") * pl.col("_sxy"))
                    / (pl.col("n_targets") - 2)
                    / pl.col("_sxx")
                ).sqrt()
            )
            .alias("slope_se"),
        )
    )
    out = offs.join(line, on="tool", how="left").sort("tool")

    def tq(dof: np.ndarray) -> np.ndarray:
        return stats.t.ppf(0.5 + confidence / 2.0, np.where(dof > 0, dof, np.nan))

    q_off = tq(out["n_days"].to_numpy().astype(float) - 1.0)
    q_slope = tq(out["n_targets"].fill_null(0).to_numpy().astype(float) - 2.0)
    out = out.with_columns(
        pl.Series("_qo", q_off, dtype=pl.Float64).fill_nan(None),
        pl.Series("_qs", q_slope, dtype=pl.Float64).fill_nan(None),
    )
    half_off = pl.col("_qo") * pl.col("offset_sd_nm") / pl.col("n_days").cast(pl.Float64).sqrt()
    return out.select(
        "tool",
        "n_days",
        "n_targets",
        "offset_nm",
        "offset_sd_nm",
        (pl.col("offset_nm") - half_off).alias("offset_lo"),
        (pl.col("offset_nm") + half_off).alias("offset_hi"),
        "slope",
        "slope_se",
        (pl.col("slope") - pl.col("_qs") * pl.col("slope_se")).alias("slope_lo"),
        (pl.col("slope") + pl.col("_qs") * pl.col("slope_se")).alias("slope_hi"),
        "intercept_nm",
    )
