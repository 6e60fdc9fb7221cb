"""Defect-inspection tool health and e-beam inspection capacity planning.

Tool health on monitor wafers:
- capture rate on a standard-defect wafer (known placed defects): found / placed with an exact
  Clopper-Pearson or a Wilson score interval;
- count stability: c / u chart of monitor counts against a frozen baseline rate
  (Montgomery, Introduction to Statistical Quality Control, c and u charts;
  NIST/SEMATECH e-Handbook §6.3.3.1);
- size calibration: reported vs known defect sizes;
- tool-to-tool count matching on a shared wafer: ratio of defect densities with the exact
  conditional (binomial) interval for a ratio of Poisson rates;
- density trend on monitor inspections: least-squares slope of defect density over time, t test.

Capacity (common practice): for shot-noise-limited e-beam inspection the area rate scales as
beams * current * contrast^2 * pixel^2; at a fixed current density J the current scales with the
spot (pixel) area, so rate = k * beams * J * C^2 * pixel^4. The constant k is calibrated from one
reference operating point of the fab's own tool. Halving the defect (pixel) size makes the
inspection 2^4 = 16 times slower.

Signals advise; the fab's OCAP and qualified engineers decide on tool downs. The software operates
no equipment. Pure functions: no I/O, no clock, no randomness; vectorised across series.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import polars as pl
from scipy import stats

__all__ = [
    "BeamSetup",
    "calibrate_area_rate_constant",
    "compare_tool_counts",
    "defect_size_slowdown",
    "estimate_area_rate",
    "evaluate_capture_rate",
    "evaluate_count_stability",
    "evaluate_density_trend",
    "evaluate_size_calibration",
    "plan_inspection_capacity",
    "proportion_interval",
]


def proportion_interval(successes, trials, *, confidence: float = 0.95, method: str = "clopper-pearson"):
    """Two-sided interval for a binomial proportion, elementwise: (low, high) arrays.

    ``method``: ``"clopper-pearson"`` (exact, from beta quantiles) or ``"wilson"`` (score interval,
    no continuity correction). Zero trials give NaN.

    Example:
        >>> lo, hi = proportion_interval(9, 10)
        >>> round(float(lo), 4), round(float(hi), 4)
        (0.555, 0.9975)
    """
    x = np.asarray(successes, dtype=float)
    n = np.asarray(trials, dtype=float)
    alpha = 1.0 - confidence
    with np.errstate(invalid="ignore", divide="ignore"):
        if method == "clopper-pearson":
            lo = np.where(x > 0, stats.beta.ppf(alpha / 2, x, n - x + 1), 0.0)
            hi = np.where(x < n, stats.beta.ppf(1 - alpha / 2, x + 1, n - x), 1.0)
        elif method == "wilson":
            z = stats.norm.ppf(1 - alpha / 2)
            p = x / n
            centre = (p + z * z / (2 * n)) / (1 + z * z / n)
            half = z * np.sqrt(p * (1 - p) / n + z * z / (4 * n * n)) / (1 + z * z / n)
            lo, hi = centre - half, centre + half
        else:
            raise ValueError(f'unknown interval method "{method}" (expected "clopper-pearson" or "wilson").')
    bad = ~(n > 0)
    return np.where(bad, np.nan, lo), np.where(bad, np.nan, hi)


def _aggregate(frame: pl.DataFrame, keys: list[str], agg: list[pl.Expr]) -> pl.DataFrame:
    return frame.group_by(keys, maintain_order=True).agg(agg).sort(keys) if keys else frame.select(agg)


def evaluate_capture_rate(
    frame: pl.DataFrame,
    *,
    by: Sequence[str] = ("tool",),
    confidence: float = 0.95,
    method: str = "clopper-pearson",
) -> pl.DataFrame:
    """Capture rate on a standard-defect monitor wafer: found / placed with an interval.

    Input columns: ``by`` keys (tool; add the inspection id or day for one row per inspection),
    ``placed`` (known placed defects in the inspected area) and ``found`` (placed defects the tool
    reported). Output per group: ``n_inspections``, ``placed``, ``found``, ``capture_rate``,
    ``capture_lo``, ``capture_hi``.

    Example:
        >>> f = pl.DataFrame({"tool": ["I1", "I1"], "placed": [50, 50], "found": [48, 47]})
        >>> evaluate_capture_rate(f)["capture_rate"].item()
        0.95
    """
    keys = list(by)
    out = _aggregate(
        frame,
        keys,
        [
            pl.len().cast(pl.Int64).alias("n_inspections"),
            pl.col("placed").sum().cast(pl.Int64),
            pl.col("found").sum().cast(pl.Int64),
        ],
    )
    lo, hi = proportion_interval(out["found"], out["placed"], confidence=confidence, method=method)
    return out.with_columns(
        pl.when(pl.col("placed") > 0).then(pl.col("found") / pl.col("placed")).alias("capture_rate"),
        pl.Series("capture_lo", lo, dtype=pl.Float64).fill_nan(None),
        pl.Series("capture_hi", hi, dtype=pl.Float64).fill_nan(None),
    )


def evaluate_count_stability(
    frame: pl.DataFrame,
    *,
    by: Sequence[str] = ("tool",),
    baseline_n: int = 20,
    width: float = 3.0,
) -> pl.DataFrame:
    """c / u chart of monitor-wafer defect counts against each series' frozen baseline rate.

    Input columns: ``by`` keys, ``inspected_at`` (order of inspections), ``count`` and optionally
    ``area_cm2`` (inspected area; without it every inspection counts as one unit, a c chart).
    The first ``baseline_n`` inspections of a series give the rate u0 = sum(count)/sum(area); each
    inspection expects c0 = u0*area with limits c0 +/- width*sqrt(c0), the lower one floored at 0.

    Output per inspection: the input columns plus ``seq`` (1-based), ``in_baseline``,
    ``expected_count``, ``lcl``, ``ucl``, ``signal`` (count beyond a limit) and, per series,
    ``dispersion_index`` (Pearson chi-square / df of the baseline counts about their expectation:
    ~1 for Poisson counts; clustered defects give > 1, which over-alarms a c chart).

    Example:
        >>> f = pl.DataFrame({"tool": "I1", "inspected_at": [1, 2, 3, 4], "count": [16, 16, 16, 40]})
        >>> evaluate_count_stability(f, baseline_n=3)["signal"].to_list()
        [False, False, False, True]
    """
    keys = list(by)
    over = (lambda e: e.over(keys)) if keys else (lambda e: e)
    f = frame.sort([*keys, "inspected_at"]) if keys else frame.sort("inspected_at")
    if "area_cm2" not in f.columns:
        f = f.with_columns(pl.lit(1.0).alias("area_cm2"))
    f = f.with_columns((over(pl.int_range(pl.len())) + 1).cast(pl.Int64).alias("seq"))
    base = pl.col("seq") <= baseline_n
    u0 = over(pl.col("count").filter(base).sum()) / over(pl.col("area_cm2").filter(base).sum())
    f = f.with_columns(base.alias("in_baseline"), (u0 * pl.col("area_cm2")).alias("expected_count"))
    resid = (pl.col("count") - pl.col("expected_count")).pow(2) / pl.col("expected_count")
    f = f.with_columns(
        pl.max_horizontal(
            pl.col("expected_count") - width * pl.col("expected_count").sqrt(), pl.lit(0.0)
        ).alias("lcl"),
        (pl.col("expected_count") + width * pl.col("expected_count").sqrt()).alias("ucl"),
        # Pearson chi-square / df over the baseline: 1 for Poisson counts, > 1 when clustered
        over(resid.filter(base).sum() / (base.sum() - 1)).alias("dispersion_index"),
    )
    return f.with_columns(
        ((pl.col("count") > pl.col("ucl")) | (pl.col("count") < pl.col("lcl"))).alias("signal")
    )


def evaluate_size_calibration(frame: pl.DataFrame, *, by: Sequence[str] = ("tool",)) -> pl.DataFrame:
    """Size-calibration error: reported vs known sizes of standard defects.

    Input columns: ``by`` keys, ``known_size_nm`` and ``reported_size_nm`` (one row per matched
    defect). Output per group: ``n``, ``mean_error_nm`` (reported - known), ``sd_error_nm``,
    ``rms_error_nm``, ``mean_relative_error`` (mean of error/known), and the least-squares line of
    reported on known sizes ``slope``, ``intercept_nm`` (null with a single known size).

    Example:
        >>> f = pl.DataFrame({"tool": "I1", "known_size_nm": [50.0, 100.0], "reported_size_nm": [55.0, 110.0]})
        >>> evaluate_size_calibration(f).select("mean_error_nm", "slope").row(0)
        (7.5, 1.1)
    """
    keys = list(by)
    over = (lambda e: e.over(keys)) if keys else (lambda e: e)
    err = pl.col("reported_size_nm") - pl.col("known_size_nm")
    dx = pl.col("known_size_nm") - over(pl.col("known_size_nm").mean())
    dy = pl.col("reported_size_nm") - over(pl.col("reported_size_nm").mean())
    f = frame.with_columns(dx.alias("_dx"), dy.alias("_dy"))
    out = _aggregate(
        f,
        keys,
        [
            pl.len().cast(pl.Int64).alias("n"),
            err.mean().alias("mean_error_nm"),
            err.std(ddof=1).alias("sd_error_nm"),
            err.pow(2).mean().sqrt().alias("rms_error_nm"),
            (err / pl.col("known_size_nm")).mean().alias("mean_relative_error"),
            (pl.col("_dx") * pl.col("_dy")).sum().alias("_sxy"),
            pl.col("_dx").pow(2).sum().alias("_sxx"),
            pl.col("known_size_nm").mean().alias("_mx"),
            pl.col("reported_size_nm").mean().alias("_my"),
        ],
    )
    slope = pl.when(pl.col("_sxx") > 0).then(pl.col("_sxy") / pl.col("_sxx"))
    return (
        out.with_columns(slope.alias("slope"))
        .with_columns((pl.col("_my") - pl.col("slope") * pl.col("_mx")).alias("intercept_nm"))
        .drop("_sxy", "_sxx", "_mx", "_my")
    )


def compare_tool_counts(
    frame: pl.DataFrame, *, reference_tool: str, confidence: float = 0.95
) -> pl.DataFrame:
    """Tool-to-tool count matching on shared wafers: density ratio to a reference tool, exact interval.

    Input columns: ``wafer``, ``tool``, ``count`` and ``area_cm2`` (inspected area), one row per
    wafer and tool. Given the total N = c + c_ref, c is binomial with p = R a / (R a + a_ref) for
    the density ratio R, so a Clopper-Pearson interval on p maps to an exact interval on R.

    Output per wafer and non-reference tool: ``wafer``, ``tool``, ``count``, ``reference_count``,
    ``density_ratio`` (tool density / reference density), ``ratio_lo``, ``ratio_hi`` and
    ``matched`` (the interval holds 1).

    Example:
        >>> f = pl.DataFrame({"wafer": "W1", "tool": ["I1", "I2"], "count": [100, 120], "area_cm2": 679.0})
        >>> compare_tool_counts(f, reference_tool="I1")["density_ratio"].item()
        1.2
    """
    ref = frame.filter(pl.col("tool") == reference_tool).select(
        "wafer", pl.col("count").alias("reference_count"), pl.col("area_cm2").alias("_aref")
    )
    f = (
        frame.filter(pl.col("tool") != reference_tool)
        .join(ref, on="wafer", how="inner")
        .sort("wafer", "tool")
    )
    total = (f["count"] + f["reference_count"]).to_numpy()
    lo_p, hi_p = proportion_interval(f["count"].to_numpy(), total, confidence=confidence)
    scale = (f["_aref"] / f["area_cm2"]).to_numpy()
    with np.errstate(divide="ignore", invalid="ignore"):
        lo = lo_p / (1.0 - lo_p) * scale
        hi = np.where(hi_p < 1.0, hi_p / (1.0 - hi_p), np.inf) * scale
    ratio = (f["count"] / f["area_cm2"]) / (f["reference_count"] / f["_aref"])
    out = f.select("wafer", "tool", "count", "reference_count").with_columns(
        pl.Series("density_ratio", ratio.to_numpy(), dtype=pl.Float64),
        pl.Series("ratio_lo", lo, dtype=pl.Float64).fill_nan(None),
        pl.Series("ratio_hi", hi, dtype=pl.Float64).fill_nan(None),
    )
    return out.with_columns(((pl.col("ratio_lo") <= 1.0) & (pl.col("ratio_hi") >= 1.0)).alias("matched"))


def evaluate_density_trend(
    frame: pl.DataFrame, *, by: Sequence[str] = ("tool",), alpha: float = 0.05
) -> pl.DataFrame:
    """Trend of defect density (count / area, per cm2) on monitor inspections: slope per day and t test.

    Input columns: ``by`` keys, ``inspected_at`` (Date or Datetime), ``count``, ``area_cm2``.
    Ordinary least squares of density on days since the series' first inspection (common
    practice; counts are Poisson-like, so read the p-value as a screen, not a proof). Output per
    group: ``n``, ``slope_per_day`` (per cm2 per day), ``slope_se``, ``t``, ``df``, ``p_value``,
    ``trend_detected`` (p < alpha), ``mean_density``.

    Example:
        >>> import datetime as dt
        >>> f = pl.DataFrame({"tool": "I1", "inspected_at": [dt.date(2024, 1, d) for d in (1, 2, 3, 4)],
        ...                   "count": [68, 70, 71, 75], "area_cm2": 679.0})
        >>> round(evaluate_density_trend(f)["slope_per_day"].item() * 679.0, 2)
        2.2
    """
    keys = list(by)
    over = (lambda e: e.over(keys)) if keys else (lambda e: e)
    at = pl.col("inspected_at")
    days = (at - over(at.min())).dt.total_seconds(fractional=True) / 86400.0
    f = frame.with_columns(days.alias("_t"), (pl.col("count") / pl.col("area_cm2")).alias("_d"))
    f = f.with_columns(
        (pl.col("_t") - over(pl.col("_t").mean())).alias("_dx"),
        (pl.col("_d") - over(pl.col("_d").mean())).alias("_dy"),
    )
    out = _aggregate(
        f,
        keys,
        [
            pl.len().cast(pl.Int64).alias("n"),
            (pl.col("_dx") * pl.col("_dy")).sum().alias("_sxy"),
            pl.col("_dx").pow(2).sum().alias("_sxx"),
            pl.col("_dy").pow(2).sum().alias("_syy"),
            pl.col("_d").mean().alias("mean_density"),
        ],
    )
    out = out.with_columns(
        pl.when(pl.col("_sxx") > 0).then(pl.col("_sxy") / pl.col("_sxx")).alias("slope_per_day"),
        (pl.col("n") - 2).alias("df"),
    ).with_columns(
        ((pl.col("_syy") - pl.col("slope_per_day") * pl.col("_sxy")) / pl.col("df") / pl.col("_sxx"))
        .sqrt()
        .alias("slope_se")
    )
    out = out.with_columns((pl.col("slope_per_day") / pl.col("slope_se")).alias("t"))
    dof = np.where(out["df"].to_numpy() > 0, out["df"].to_numpy(), np.nan)
    p = 2.0 * stats.t.sf(np.abs(out["t"].fill_null(np.nan).to_numpy()), dof)
    out = out.with_columns(pl.Series("p_value", p, dtype=pl.Float64).fill_nan(None))
    return out.with_columns((pl.col("p_value") < alpha).fill_null(False).alias("trend_detected")).select(
        *keys, "n", "slope_per_day", "slope_se", "t", "df", "p_value", "trend_detected", "mean_density"
    )


# --- capacity -------------------------------------------------------------------------------------


@dataclass(frozen=True)
class BeamSetup:
    """One e-beam inspection operating point."""

    beams: int
    """Number of parallel beams."""
    current_density_a_per_cm2: float
    """Beam current density J at the sample (A/cm2), fixed by the source and optics."""
    contrast: float
    """Defect contrast C (fractional signal difference, 0..1)."""
    pixel_nm: float
    """Pixel size (nm), set by the smallest defect to catch."""


def _rate_factor(beams, current_density, contrast, pixel_nm) -> np.ndarray:
    b, j, c, p = (np.asarray(v, dtype=float) for v in (beams, current_density, contrast, pixel_nm))
    return b * j * c**2 * p**4


def calibrate_area_rate_constant(setup: BeamSetup, area_rate_cm2_per_h: float) -> float:
    """Proportionality constant k of rate = k * beams * J * C^2 * pixel^4, from one measured point.

    Units: (cm2/h) / (A/cm2 * nm^4). Calibrate from the fab's own tool at a known recipe.

    Example:
        >>> k = calibrate_area_rate_constant(BeamSetup(1, 1.0, 0.5, 10.0), 2.5)
        >>> round(k * 1 * 1.0 * 0.5**2 * 10.0**4, 6)
        2.5
    """
    return float(
        area_rate_cm2_per_h
        / _rate_factor(setup.beams, setup.current_density_a_per_cm2, setup.contrast, setup.pixel_nm)
    )


def estimate_area_rate(setup: BeamSetup, rate_constant: float) -> float:
    """Shot-noise-limited area rate (cm2/h) of an operating point: k * beams * J * C^2 * pixel^4.

    Example:
        >>> estimate_area_rate(BeamSetup(2, 1.0, 0.5, 10.0), rate_constant=1e-4)
        0.5
    """
    return float(
        rate_constant
        * _rate_factor(setup.beams, setup.current_density_a_per_cm2, setup.contrast, setup.pixel_nm)
    )


def plan_inspection_capacity(options: pl.DataFrame, *, rate_constant: float) -> pl.DataFrame:
    """Inspection time per wafer and wafers per hour for a table of operating options.

    Input columns: ``beams``, ``current_density_a_per_cm2``, ``contrast``, ``pixel_nm``,
    ``care_area_cm2`` (area inspected per wafer) and optionally ``overhead_s`` (load, align, per
    wafer; 0 when absent). Output: the input plus ``area_rate_cm2_per_h``, ``scan_s_per_wafer``,
    ``total_s_per_wafer`` and ``wafers_per_hour``.

    Example:
        >>> o = pl.DataFrame({"beams": [1], "current_density_a_per_cm2": [1.0], "contrast": [0.5],
        ...                   "pixel_nm": [10.0], "care_area_cm2": [0.125], "overhead_s": [0.0]})
        >>> plan_inspection_capacity(o, rate_constant=1e-4)["wafers_per_hour"].item()
        2.0
    """
    if "overhead_s" not in options.columns:
        options = options.with_columns(pl.lit(0.0).alias("overhead_s"))
    rate = rate_constant * _rate_factor(
        options["beams"], options["current_density_a_per_cm2"], options["contrast"], options["pixel_nm"]
    )
    out = options.with_columns(pl.Series("area_rate_cm2_per_h", rate, dtype=pl.Float64)).with_columns(
        (3600.0 * pl.col("care_area_cm2") / pl.col("area_rate_cm2_per_h")).alias("scan_s_per_wafer")
    )
    out = out.with_columns((pl.col("scan_s_per_wafer") + pl.col("overhead_s")).alias("total_s_per_wafer"))
    return out.with_columns((3600.0 / pl.col("total_s_per_wafer")).alias("wafers_per_hour"))


def defect_size_slowdown(size_ratio) -> np.ndarray:
    """How many times longer an inspection takes when the defect (pixel) size scales by ``size_ratio``.

    At fixed current density the area rate goes as pixel^4 (common practice), so the time goes as
    size_ratio^-4: halving the defect size (0.5) is 16 times slower.

    Example:
        >>> float(defect_size_slowdown(0.5))
        16.0
    """
    return np.asarray(size_ratio, dtype=float) ** -4.0
