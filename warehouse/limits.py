"""Control-limit versions: Phase I estimation from a baseline, freezing, and reading the version in force.

Limits are frozen as numbered versions per series (``control_limits``) with who, when and why; evaluation
only ever reads them. A series without frozen limits is frozen automatically from its plan entry's baseline
once the baseline is complete (first N points exist, or a point after the window's end exists and the
window holds at least ``MIN_BASELINE`` points), recorded as user ``lotline-auto``; until then the series'
control rules are skipped (its out-of-spec check still runs) and `lotline evaluate` reports it as waiting.
Automatic freezing uses the points that have arrived: baseline data arriving after the freeze does not
move the limits (an engineer re-freezes with `lotline limits freeze`).

Sigma of the charted statistic (the level that is plotted), all computed by ``spc``:
    * site values, wafer means, lot means: nested variance components of the baseline's site values
      (``spc.variance.nested_components``, lot > wafer > site) and the sigma recommended for the charted
      level (``sigma_for``: σ²_lot + σ²_wafer + σ²_site/n for a wafer mean). Within-wafer sigma alone would
      make the limits far too tight (the nested-variance trap, notes/domain.md). Balanced baselines use
      ANOVA, unbalanced ones (missing sites or wafers) REML with typical (harmonic-mean) group sizes. When
      every lot has one wafer (lot and wafer confounded) or the components cannot be separated, the sample
      SD of the baseline points is used: it estimates the same total variance of one point
      (``sigma_source = baseline_points_sd``).
    * wafer SD / range: individuals chart of the statistic (``spc.shewhart.individuals_limits``:
      mean moving range / d2(2); NIST/SEMATECH e-Handbook §6.3.2.2).
    * u charts: ``spc.attributes.u_points`` (ū = Σ defects / Σ area, sigma sqrt(ū/a_i)); Laney u′:
      ``spc.attributes.laney_u_points`` (sigma times σ_z; Laney 2002, Quality Engineering 14(4)).
    * negbin_u: ū and the clustering 1/α of a negative-binomial count model (``spc.attributes.negbin_fit``,
      kept as the version's ``overdispersion``); each point's limits are the model's count quantiles at
      its inspected area over that area (``negbin_point_limits``), its sigma the model's SD of the density.
"""

from __future__ import annotations

from datetime import datetime

import numpy as np
import polars as pl

from spc.attributes import laney_u_points, negbin_count_limits, negbin_fit, negbin_sigma, u_points
from spc.shewhart import individuals_limits
from spc.variance import nested_components
from warehouse import schema
from warehouse.errors import LotlineError
from warehouse.plan import DEFECT_CHARTS, DEFECT_STATISTICS, MIN_BASELINE, PlanEntry

AUTO_USER = "lotline-auto"


class LimitsError(LotlineError, ValueError):
    """Limits cannot be estimated (too few baseline points, zero spread, unknown chart)."""


def baseline_points(
    e: PlanEntry,
    pts: pl.DataFrame,
    *,
    window: tuple[datetime, datetime] | None = None,
    first: int | None = None,
) -> pl.DataFrame | None:
    """The baseline subset of one series' points (in order), or None while the baseline is incomplete."""
    explicit = window is not None
    if first is None and window is None:
        if "first" in e.baseline:
            first = int(e.baseline["first"])
        else:
            window = (datetime.fromisoformat(e.baseline["from"]), datetime.fromisoformat(e.baseline["to"]))
    if first is not None:
        return pts.head(first) if pts.height >= first else None
    lo, hi = window
    sub = pts.filter((pl.col("point_at") >= lo) & (pl.col("point_at") <= hi))
    complete = explicit or pts.filter(pl.col("point_at") > hi).height > 0
    return sub if complete and sub.height >= MIN_BASELINE else None


def estimate_limits(e: PlanEntry, base: pl.DataFrame, sites: pl.DataFrame | None = None) -> dict:
    """Phase I centre, sigma and limits of one series from its baseline points (see module doc).

    ``sites``: the site values (lot_id, wafer_id, value) of the baseline points, for variance components.
    """
    k = float(e.params.get("k", 3.0))
    v = base["value"].cast(pl.Float64).to_numpy()
    if v.size < 2:
        raise LimitsError(
            "baseline has fewer than 2 points", found=int(v.size), expected=f">= {MIN_BASELINE}"
        )
    out = {
        "k_sigma": k,
        "n_ref": None,
        "overdispersion": None,
        "baseline_n": int(v.size),
        "baseline_from": base["point_at"].min(),
        "baseline_to": base["point_at"].max(),
    }
    if e.chart == "negbin_u" and e.statistic in DEFECT_STATISTICS:
        area = base["area_cm2"].cast(pl.Float64).to_numpy()
        fit = negbin_fit(base["n"].cast(pl.Float64).to_numpy(), area)
        n_ref = float(area.mean())
        lo, hi = negbin_count_limits(fit.ubar, fit.inv_alpha, [n_ref], k=k)
        out.update(
            center=fit.ubar,
            sigma=float(negbin_sigma(fit.ubar, fit.inv_alpha, [n_ref])[0]),
            sigma_level="count",
            n_ref=n_ref,
            sigma_source="negative_binomial" if fit.inv_alpha > 0 else "poisson",
            overdispersion=fit.inv_alpha,
        )
    elif e.chart in ("u", "laney_u") and e.statistic in DEFECT_STATISTICS:
        frame = base.select(pl.lit("s").alias("series"), pl.col("n").alias("count"), "area_cm2")
        pts = laney_u_points(frame) if e.chart == "laney_u" else u_points(frame)
        ubar = float(pts["center"][0])
        n_ref = float(base["area_cm2"].cast(pl.Float64).mean())
        sz = float(pts["sigma_z"][0]) if e.chart == "laney_u" else 1.0
        sigma_ref = float(np.sqrt(ubar / n_ref) * sz) if ubar > 0 else 0.0
        out.update(
            center=ubar,
            sigma=sigma_ref,
            sigma_level="count",
            n_ref=n_ref,
            sigma_source="laney_u_prime" if e.chart == "laney_u" else "poisson",
            overdispersion=sz if e.chart == "laney_u" else None,
        )
    elif e.statistic in ("wafer_sd", "wafer_range"):
        lim = individuals_limits(pl.DataFrame({"series": "s", "seq": np.arange(v.size), "value": v}), k=k)
        out.update(
            center=float(lim["center"][0]),
            sigma=float(lim["sigma"][0]),
            sigma_level="wafer",
            sigma_source="moving_range",
        )
    else:
        level = {"site_value": "site", "wafer_mean": "wafer", "lot_mean": "lot"}.get(e.statistic, "wafer")
        out.update(center=float(v.mean()), sigma_level=level, **_nested_sigma(e, v, sites))
    if not (out["sigma"] > 0 and np.isfinite(out["sigma"])):
        raise LimitsError(
            "baseline points have no spread (sigma 0)",
            found=out["sigma"],
            expected="> 0",
            fix="choose a baseline with real process variation",
        )
    if e.chart == "negbin_u":  # the limits at the mean inspected area
        out.update(lcl=float(lo[0]) / n_ref, ucl=float(hi[0]) / n_ref)
        return out
    lcl = out["center"] - k * out["sigma"]
    if e.statistic in DEFECT_STATISTICS:
        lcl = max(lcl, 0.0)
    out.update(lcl=lcl, ucl=out["center"] + k * out["sigma"])
    return out


def _nested_sigma(e: PlanEntry, v: np.ndarray, sites: pl.DataFrame | None) -> dict:
    """Variance-components sigma of the charted level, or the SD of the points when ANOVA cannot apply."""
    fallback = {"sigma": float(v.std(ddof=1)), "sigma_source": "baseline_points_sd"}
    if sites is None or sites.height == 0:
        return fallback
    wafers_per_lot = sites.group_by("lot_id").agg(pl.col("wafer_id").n_unique())["wafer_id"]
    if wafers_per_lot.max() < 2:
        return fallback  # one wafer per lot: lot and wafer components are confounded
    try:
        vc = nested_components(sites, ["lot_id", "wafer_id"], "value", residual="site")
    except (ValueError, ZeroDivisionError):
        return fallback  # components not identifiable (e.g. one site per wafer everywhere)
    key = {"site_value": "value", "wafer_mean": "wafer_id", "lot_mean": "lot_id"}[e.statistic]
    return {"sigma": float(vc.sigma_for[key]), "sigma_source": "variance_components"}


def point_sigma(e: PlanEntry, lim: dict, pts: pl.DataFrame) -> np.ndarray:
    """Sigma of each point under a limit version (varies with inspected area on u charts)."""
    if lim["n_ref"] is not None and e.chart == "negbin_u":
        area = pts["area_cm2"].cast(pl.Float64).to_numpy()
        return negbin_sigma(lim["center"], lim["overdispersion"] or 0.0, area)
    if lim["n_ref"] is not None and e.chart in DEFECT_CHARTS:
        sz = lim["overdispersion"] or 1.0
        area = pts["area_cm2"].cast(pl.Float64).to_numpy()
        return np.sqrt(lim["center"] / area) * sz
    return np.full(pts.height, lim["sigma"])


def point_limits(e: PlanEntry, k: float | pl.Expr) -> tuple[pl.Expr, pl.Expr]:
    """(lcl, ucl) of each point of a frame with ``center`` and ``sigma``: center -/+ k * sigma.

    On a defect-density chart a negative lower limit is drawn at 0, as the frozen version's own ``lcl``
    is: a density cannot fall below it (common practice for c and u charts; Montgomery, Introduction to
    Statistical Quality Control, ch. 7, from memory). The rules test z-scores, so no signal changes.
    """
    k = k if isinstance(k, pl.Expr) else pl.lit(float(k))
    lcl = defect_floor(e, pl.col("center") - k * pl.col("sigma"))
    return lcl.alias("lcl"), (pl.col("center") + k * pl.col("sigma")).alias("ucl")


def negbin_point_limits(center, inv_alpha, area, k) -> tuple[np.ndarray, np.ndarray]:
    """(lcl, ucl) densities of negbin_u points: the count limits at each point's inspected area over that
    area (``spc.attributes.negbin_count_limits``). A point signals when its density lies above ``ucl`` or
    below ``lcl``: its count is then beyond the count limit, because both share the division by the area.
    Arguments are one value per point (arrays) or one for all."""
    area = np.asarray(area, dtype=float)
    center = np.broadcast_to(np.asarray(center, dtype=float), area.shape)
    inv_alpha = np.broadcast_to(np.nan_to_num(np.asarray(inv_alpha, dtype=float)), area.shape)
    k = np.broadcast_to(np.asarray(k, dtype=float), area.shape)
    lcl, ucl = np.full(area.shape, np.nan), np.full(area.shape, np.nan)
    ok = np.isfinite(center) & np.isfinite(area) & (area > 0)
    # one quantile call per distinct limit width (k is one value per limit version)
    for kk in np.unique(k[ok]):
        m = ok & (k == kk)
        lo, hi = negbin_count_limits(center[m], inv_alpha[m], area[m], k=float(kk))
        lcl[m], ucl[m] = lo / area[m], hi / area[m]
    return lcl, ucl


def defect_floor(e: PlanEntry, lcl: pl.Expr) -> pl.Expr:
    """``lcl``, raised to 0 where it is negative on a defect-density chart (see :func:`point_limits`)."""
    if e.statistic not in DEFECT_STATISTICS:
        return lcl
    return pl.when(lcl < 0).then(0.0).otherwise(lcl)


def insert_version(con, series_id: int, lim: dict, *, user: str, reason: str) -> int:
    """Append the next limit version of a series; return its number."""
    version = int(
        con.execute(
            "SELECT coalesce(max(version), 0) + 1 FROM control_limits WHERE series_id = ?", [series_id]
        ).fetchall()[0][0]
    )
    con.execute(
        "INSERT INTO control_limits VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, now()::TIMESTAMP, ?, ?)",
        [
            series_id,
            version,
            lim["center"],
            lim["sigma"],
            lim["sigma_level"],
            lim["sigma_source"],
            lim["k_sigma"],
            lim["lcl"],
            lim["ucl"],
            lim["n_ref"],
            lim["overdispersion"],
            lim["baseline_from"],
            lim["baseline_to"],
            lim["baseline_n"],
            user,
            reason,
        ],
    )
    return version


def insert_first_versions(
    con, items: list[tuple[int, dict]], *, user: str, reason: str, now: datetime
) -> None:
    """Insert version 1 for many series without limits at once (automatic freezes)."""
    if not items:
        return
    recs = [
        {
            "series_id": sid,
            "version": 1,
            **{k: lim[k] for k in _LIMIT_KEYS},
            "frozen_at": now,
            "frozen_by": user,
            "reason": reason,
        }
        for sid, lim in items
    ]
    frame = pl.DataFrame(recs, schema=schema.polars_schema(schema.CONTROL_LIMITS))
    con.register("new_limits", frame)
    try:
        con.execute("INSERT INTO control_limits BY NAME SELECT * FROM new_limits")
    finally:
        con.unregister("new_limits")


_LIMIT_KEYS = (
    "center",
    "sigma",
    "sigma_level",
    "sigma_source",
    "k_sigma",
    "lcl",
    "ucl",
    "n_ref",
    "overdispersion",
    "baseline_from",
    "baseline_to",
    "baseline_n",
)


def current_limits(con) -> dict[int, dict]:
    """The limit version in force per series id."""
    rows = con.execute(
        "SELECT series_id, version, center, sigma, k_sigma, lcl, ucl, n_ref, overdispersion FROM control_limits "
        "QUALIFY row_number() OVER (PARTITION BY series_id ORDER BY version DESC) = 1"
    ).fetchall()
    keys = ("version", "center", "sigma", "k_sigma", "lcl", "ucl", "n_ref", "overdispersion")
    return {r[0]: dict(zip(keys, r[1:], strict=True)) for r in rows}
