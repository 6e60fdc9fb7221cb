"""Wafer signatures: radial and Zernike fits of site values, zone means, and labels against a series' history.

A wafer map of site values (CD, thickness …) usually varies in a few smooth ways: a bowl (centre vs edge), a
tilt across the wafer, a saddle, a one-sided edge. Fitting low-order Zernike polynomials on the unit disk
(ρ = r / wafer radius) names these shapes and measures how much of the wafer's variation each explains;
comparing a wafer's coefficients with the history of the same series turns them into labels such as
"edge high" or "tilt".

Zernike polynomials follow Noll (1976), "Zernike polynomials and atmospheric turbulence", J. Opt. Soc. Am.
66(3), 207–211: index j in Noll order, radial order n, azimuthal frequency m, even j ↔ cos(mθ),
odd j ↔ sin(mθ), normalised so that (1/π)∫∫ Z_i Z_j ρ dρ dθ = δ_ij over the unit disk. With that
normalisation the variance over the disk of a fitted surface is the sum of its squared coefficients
(j ≥ 2), so each term's share of that sum is its share of the fitted variation.

Fits are least squares, vectorised across wafers: per-wafer normal equations are summed with one sorted
reduction and solved as a batch with a pseudo-inverse, so wafers may have different site layouts.
When a layout cannot tell two terms apart (too few sites, sites on one line) the pseudo-inverse returns the
minimum-norm split and ``rank`` says how many terms the layout supports.
"""

from __future__ import annotations

from collections.abc import Sequence
from math import factorial

import numpy as np
import polars as pl

__all__ = [
    "classify_signatures",
    "explain_zernike",
    "fit_radial",
    "fit_zernike",
    "noll_to_nm",
    "zernike",
    "zone_means",
]

WAFER_RADIUS_MM = 150.0
DEFAULT_WAFER_KEY = ("lot_id", "wafer_id")

#: Noll index → (term name, family) for the terms reported by default (up to primary spherical, j = 11).
TERMS = {
    1: ("piston", "piston"),
    2: ("tilt x", "tilt"),
    3: ("tilt y", "tilt"),
    4: ("defocus (bowl)", "bowl"),
    5: ("astigmatism 45°", "astigmatism"),
    6: ("astigmatism 0°", "astigmatism"),
    7: ("coma y", "coma"),
    8: ("coma x", "coma"),
    9: ("trefoil y", "trefoil"),
    10: ("trefoil x", "trefoil"),
    11: ("spherical", "spherical"),
}


def noll_to_nm(j: int) -> tuple[int, int]:
    """Radial order n and signed azimuthal frequency m of Noll index j (m < 0 is the sine term).

    Example:
        >>> [noll_to_nm(j) for j in (1, 2, 3, 4, 5, 6, 11)]
        [(0, 0), (1, 1), (1, -1), (2, 0), (2, -2), (2, 2), (4, 0)]
    """
    if j < 1:
        raise ValueError(f"Noll index must be ≥ 1 (found {j}, expected 1, 2, 3 …). Fix: count terms from 1.")
    n = 0
    while (n + 1) * (n + 2) // 2 < j:
        n += 1
    k = j - n * (n + 1) // 2 - 1  # position within radial order n
    m = 2 * ((k + 1) // 2) if n % 2 == 0 else 2 * (k // 2) + 1
    return n, (m if j % 2 == 0 or m == 0 else -m)


def zernike(j: int, rho: np.ndarray, theta: np.ndarray) -> np.ndarray:
    """Noll-normalised Zernike polynomial Z_j at polar coordinates on the unit disk.

    Example:
        >>> float(zernike(4, np.array([1.0]), np.array([0.0]))[0]) == 3 ** 0.5  # √3 (2ρ² − 1) at the rim
        True
    """
    n, m = noll_to_nm(j)
    am = abs(m)
    rho = np.asarray(rho, dtype=float)
    radial = np.zeros_like(rho)
    for s in range((n - am) // 2 + 1):  # polynomial terms, not data
        coef = (
            (-1) ** s
            * factorial(n - s)
            / (factorial(s) * factorial((n + am) // 2 - s) * factorial((n - am) // 2 - s))
        )
        radial = radial + coef * rho ** (n - 2 * s)
    if m == 0:
        return np.sqrt(n + 1) * radial
    trig = np.cos(am * np.asarray(theta)) if m > 0 else np.sin(am * np.asarray(theta))
    return np.sqrt(2 * (n + 1)) * radial * trig


def _check(frame: pl.DataFrame, required: Sequence[str], what: str) -> None:
    missing = [c for c in required if c not in frame.columns]
    if missing:
        raise ValueError(
            f"{what}: missing column(s) {', '.join(missing)} (found {', '.join(frame.columns)}, "
            f"expected {', '.join(required)}). Fix: rename or add the column(s) before calling."
        )


def _prepare(
    sites: pl.DataFrame, wafer_key: Sequence[str], value: str, radius_mm: float, what: str
) -> tuple[pl.DataFrame, pl.DataFrame]:
    key = list(wafer_key)
    _check(sites, [*key, "x_mm", "y_mm", value], what)
    s = sites.select(*key, "x_mm", "y_mm", pl.col(value).cast(pl.Float64).alias("_v")).filter(
        pl.col("_v").is_finite() & pl.col("x_mm").is_not_null() & pl.col("y_mm").is_not_null()
    )
    r_max = s.select((pl.col("x_mm") ** 2 + pl.col("y_mm") ** 2).sqrt().max()).item()
    if r_max is not None and r_max > radius_mm * (1 + 1e-9):
        raise ValueError(
            f"{what}: site at radius {r_max:.1f} mm lies outside the wafer (found {r_max:.1f} mm, expected "
            f"≤ {radius_mm:g} mm). Fix: check the site coordinates' unit (mm from the wafer centre) or radius_mm."
        )
    wafers = s.select(key).unique(maintain_order=True).with_row_index("_w")
    return s.join(wafers, on=key, maintain_order="left"), wafers


def _batched_lstsq(design: np.ndarray, v: np.ndarray, w: np.ndarray, n_w: int, rcond: float = 1e-10):
    """Least squares per group of rows: coefficients (n_w × J), rank, residual and total sums of squares.

    Rows are sorted by group once; every per-group sum is then one ``np.add.reduceat`` over contiguous
    column blocks (the normal equations' J(J+1)/2 products, the right-hand sides, the residuals).
    """
    order = np.argsort(w, kind="stable")
    w, v = w[order], v[order]
    dt = np.ascontiguousarray(design[order].T)  # J × n: row-wise products are contiguous
    starts = np.r_[0, np.flatnonzero(np.diff(w)) + 1]
    J = dt.shape[0]
    iu, ju = np.triu_indices(J)
    ata_u = np.add.reduceat(dt[iu] * dt[ju], starts, axis=1).T
    ata = np.zeros((n_w, J, J))
    ata[:, iu, ju] = ata_u
    ata[:, ju, iu] = ata_u
    atb = np.add.reduceat(dt * v, starts, axis=1).T
    coef = np.einsum("wij,wj->wi", np.linalg.pinv(ata, rcond=rcond, hermitian=True), atb)
    eig = np.linalg.eigvalsh(ata)
    rank = (eig > rcond * eig.max(axis=1, keepdims=True)).sum(axis=1)
    resid = v - np.einsum("jn,nj->n", dt, coef[w])
    count = np.diff(np.r_[starts, w.size])
    mean = np.add.reduceat(v, starts) / count
    ss_res = np.add.reduceat(resid**2, starts)
    ss_tot = np.add.reduceat((v - mean[w]) ** 2, starts)
    return coef, rank, ss_res, ss_tot, count


def fit_zernike(
    sites: pl.DataFrame,
    *,
    wafer_key: Sequence[str] = DEFAULT_WAFER_KEY,
    value: str = "value",
    radius_mm: float = WAFER_RADIUS_MM,
    n_terms: int = 11,
) -> pl.DataFrame:
    """Fit Noll-ordered Zernike terms Z1..Z_n_terms to each wafer's site values by least squares.

    Frame contract:
        ``sites``: one row per site measurement — the ``wafer_key`` columns, ``x_mm``, ``y_mm`` (from the
        wafer centre) and the ``value`` column. Rows with a null or non-finite value are ignored.

    Returns:
        One row per wafer: the key columns, ``n_sites``, ``z1`` … ``z{n_terms}`` (coefficients in the value's
        unit; ``z1`` is the piston, close to the wafer mean), ``rank`` (terms the layout can separate),
        ``r2`` (share of the wafer's site variance the fit explains) and ``residual_sd``.

    Example:
        >>> s = pl.DataFrame({"wafer_id": ["W1"] * 5, "x_mm": [0.0, 100, -100, 0, 0],
        ...                   "y_mm": [0.0, 0, 0, 100, -100], "value": [50.0, 51, 49, 50, 50]})
        >>> f = fit_zernike(s, wafer_key=["wafer_id"], n_terms=3)
        >>> round(f["z2"][0] * 2 * 100 / 150, 6)  # slope 0.01 per mm times 100 mm, back from Z2 = 2ρcosθ
        1.0
    """
    key = list(wafer_key)
    s, wafers = _prepare(sites, key, value, radius_mm, "fit_zernike sites")
    x = s["x_mm"].to_numpy() / radius_mm
    y = s["y_mm"].to_numpy() / radius_mm
    rho, theta = np.hypot(x, y), np.arctan2(y, x)
    design = np.column_stack([zernike(j, rho, theta) for j in range(1, n_terms + 1)])
    coef, rank, ss_res, ss_tot, count = _batched_lstsq(
        design, s["_v"].to_numpy(), s["_w"].to_numpy(), wafers.height
    )
    dof = count - rank
    with np.errstate(divide="ignore", invalid="ignore"):
        r2 = np.where(ss_tot > 0, 1 - ss_res / ss_tot, np.nan)
        rsd = np.where(dof > 0, np.sqrt(ss_res / np.maximum(dof, 1)), np.nan)
    cols = {f"z{j}": coef[:, j - 1] for j in range(1, n_terms + 1)}
    return wafers.drop("_w").with_columns(
        pl.Series("n_sites", count.astype(np.int64)),
        *[pl.Series(k, v) for k, v in cols.items()],
        pl.Series("rank", rank.astype(np.int64)),
        pl.Series("r2", r2),
        pl.Series("residual_sd", rsd),
    )


def explain_zernike(fit: pl.DataFrame, *, wafer_key: Sequence[str] = DEFAULT_WAFER_KEY) -> pl.DataFrame:
    """Split each wafer's fitted variation into term families (tilt, bowl, astigmatism, coma, …).

    Frame contract:
        ``fit``: the output of :func:`fit_zernike` (key columns and ``z1`` … ``zJ``).

    Returns:
        One row per wafer and family present: key columns, ``family``, ``terms`` (Noll indices),
        ``rms`` (root of the family's summed squared coefficients = its RMS over the wafer disk, in the
        value's unit) and ``share_of_fit`` (its part of the fitted variation without piston, 0–1; shares of
        a wafer sum to 1), sorted by share within each wafer.

    Example:
        >>> f = pl.DataFrame({"wafer_id": ["W1"], "z1": [50.0], "z2": [0.3], "z3": [0.4], "z4": [1.2]})
        >>> explain_zernike(f, wafer_key=["wafer_id"]).select("family", pl.col("share_of_fit").round(4)).rows()
        [('bowl', 0.8521), ('tilt', 0.1479)]
    """
    key = list(wafer_key)
    zcols = sorted(
        (c for c in fit.columns if c.startswith("z") and c[1:].isdigit()), key=lambda c: int(c[1:])
    )
    long = fit.select(*key, *zcols).unpivot(index=key, on=zcols, variable_name="term", value_name="c")
    fam = pl.DataFrame(
        {
            "term": zcols,
            "j": [int(c[1:]) for c in zcols],
            "family": [TERMS.get(int(c[1:]), (None, "higher order"))[1] for c in zcols],
        }
    )
    long = long.join(fam, on="term").filter(pl.col("j") >= 2)
    out = (
        long.group_by(*key, "family")
        .agg(pl.col("j").sort().alias("terms"), (pl.col("c") ** 2).sum().alias("_ss"))
        .with_columns(
            pl.col("_ss").sqrt().alias("rms"),
            (pl.col("_ss") / pl.col("_ss").sum().over(key)).alias("share_of_fit"),
        )
        .drop("_ss")
        .sort([*key, "share_of_fit"], descending=[False] * len(key) + [True])
    )
    return out


def fit_radial(
    sites: pl.DataFrame,
    *,
    wafer_key: Sequence[str] = DEFAULT_WAFER_KEY,
    value: str = "value",
    radius_mm: float = WAFER_RADIUS_MM,
    powers: Sequence[int] = (0, 2),
) -> pl.DataFrame:
    """Fit value = Σ_k a_k (r / R)^k over the given powers of radius (default a + b·(r/R)², a bowl).

    Frame contract:
        ``sites``: the ``wafer_key`` columns, ``x_mm``, ``y_mm`` and the ``value`` column.

    Returns:
        One row per wafer: key columns, ``n_sites``, ``a{k}`` per power (value units; ``a0`` is the centre
        value), ``centre_to_edge`` (fitted value at r = R minus at r = 0), ``r2`` and ``residual_sd``.

    Example:
        >>> s = pl.DataFrame({"wafer_id": ["W1"] * 3, "x_mm": [0.0, 75.0, 150.0], "y_mm": [0.0, 0, 0],
        ...                   "value": [10.0, 10.5, 12.0]})
        >>> fit_radial(s, wafer_key=["wafer_id"]).select("a0", "a2", "centre_to_edge").row(0)
        (10.0, 2.0, 2.0)
    """
    key = list(wafer_key)
    s, wafers = _prepare(sites, key, value, radius_mm, "fit_radial sites")
    rr = np.hypot(s["x_mm"].to_numpy(), s["y_mm"].to_numpy()) / radius_mm
    design = np.column_stack([rr**k for k in powers])
    coef, rank, ss_res, ss_tot, count = _batched_lstsq(
        design, s["_v"].to_numpy(), s["_w"].to_numpy(), wafers.height
    )
    dof = count - rank
    with np.errstate(divide="ignore", invalid="ignore"):
        r2 = np.where(ss_tot > 0, 1 - ss_res / ss_tot, np.nan)
        rsd = np.where(dof > 0, np.sqrt(ss_res / np.maximum(dof, 1)), np.nan)
    edge = coef.sum(axis=1) - sum(coef[:, i] for i, k in enumerate(powers) if k == 0)
    return wafers.drop("_w").with_columns(
        pl.Series("n_sites", count.astype(np.int64)),
        *[pl.Series(f"a{k}", np.round(coef[:, i], 12)) for i, k in enumerate(powers)],
        pl.Series("centre_to_edge", np.round(edge, 12)),
        pl.Series("r2", r2),
        pl.Series("residual_sd", rsd),
    )


def zone_means(
    sites: pl.DataFrame,
    *,
    wafer_key: Sequence[str] = DEFAULT_WAFER_KEY,
    value: str = "value",
    edges_mm: Sequence[float] = (50.0, 110.0),
    names: Sequence[str] = ("centre", "mid", "edge"),
) -> pl.DataFrame:
    """Mean, SD and site count of each radial zone per wafer (zone i holds edges[i-1] ≤ r < edges[i]).

    Frame contract:
        ``sites``: the ``wafer_key`` columns, ``x_mm``, ``y_mm`` and the ``value`` column.

    Returns:
        One row per wafer and zone with sites: key columns, ``zone``, ``n_sites``, ``mean``, ``sd`` and
        ``delta_to_wafer`` (zone mean minus the wafer's site mean).

    Example:
        >>> s = pl.DataFrame({"wafer_id": ["W1"] * 3, "x_mm": [0.0, 80.0, 140.0], "y_mm": [0.0, 0, 0],
        ...                   "value": [1.0, 2.0, 6.0]})
        >>> zone_means(s, wafer_key=["wafer_id"]).select("zone", "mean", "delta_to_wafer").rows()
        [('centre', 1.0, -2.0), ('mid', 2.0, -1.0), ('edge', 6.0, 3.0)]
    """
    if len(names) != len(edges_mm) + 1:
        raise ValueError(
            f"zone_means: {len(names)} zone names for {len(edges_mm)} edges (found {len(names)}, expected "
            f"{len(edges_mm) + 1}). Fix: give one more name than edges."
        )
    key = list(wafer_key)
    _check(sites, [*key, "x_mm", "y_mm", value], "zone_means sites")
    r = (pl.col("x_mm") ** 2 + pl.col("y_mm") ** 2).sqrt()
    zone = pl.lit(names[-1])
    for edge, name in reversed(list(zip(edges_mm, names[:-1], strict=True))):
        zone = pl.when(r < edge).then(pl.lit(name)).otherwise(zone)
    order = pl.DataFrame({"zone": list(names), "_o": list(range(len(names)))})
    s = sites.select(*key, "x_mm", "y_mm", pl.col(value).cast(pl.Float64).alias("_v")).filter(
        pl.col("_v").is_finite()
    )
    s = s.with_columns(zone.alias("zone"), pl.col("_v").mean().over(key).alias("_m"))
    return (
        s.group_by(*key, "zone")
        .agg(
            pl.len().alias("n_sites"),
            pl.col("_v").mean().alias("mean"),
            pl.col("_v").std().alias("sd"),
            (pl.col("_v").mean() - pl.col("_m").first()).alias("delta_to_wafer"),
        )
        .join(order, on="zone")
        .sort([*key, "_o"])
        .drop("_o")
    )


#: (Noll index, label when the robust z is high, label when it is low); pairs are labelled together.
_LABELS = (
    ((1,), "mean high", "mean low"),
    ((4,), "edge high", "centre high"),
    ((2, 3), "tilt", "tilt"),
    ((5, 6), "saddle (astigmatism)", "saddle (astigmatism)"),
    ((7, 8), "one-sided edge (coma)", "one-sided edge (coma)"),
    ((9, 10), "three-fold (trefoil)", "three-fold (trefoil)"),
    ((11,), "mid-radius ring low", "mid-radius ring high"),
)


def classify_signatures(
    current: pl.DataFrame,
    history: pl.DataFrame,
    *,
    series_key: Sequence[str],
    wafer_key: Sequence[str] = DEFAULT_WAFER_KEY,
    z_threshold: float = 3.5,
) -> pl.DataFrame:
    """Label each wafer's signature by robust z-scores of its Zernike coefficients against its series' history.

    For each series (e.g. layer, parameter, process tool) and coefficient, the history gives a median and a
    MAD scaled by 1.4826 (a consistent estimator of σ for normal data; Hampel 1974). A coefficient whose
    robust z is beyond ``z_threshold`` (3.5 following Iglewicz and Hoaglin 1993) yields a label: Z1 "mean
    high/low", Z4 "edge high" (positive: the rim is above the centre) or "centre high", Z2/Z3 "tilt" with the
    direction of the high side, Z5/Z6 saddle, Z7/Z8 one-sided edge, Z9/Z10 three-fold, Z11 ring. A MAD of 0
    (a history without spread) gives no z and no label.

    Frame contract:
        ``current`` and ``history``: :func:`fit_zernike` output (``z1`` … ``zJ``) with the ``series_key``
        columns added; ``current`` also carries the ``wafer_key`` columns.

    Returns:
        ``current``'s key columns plus ``rz1`` … ``rzJ`` (robust z), ``max_abs_rz``, ``labels``
        (list of strings, strongest first) and ``label`` (joined with ", "; "typical" when nothing stands out;
        "no history to compare" when the series has no history or no spread).

    Example:
        >>> hist = pl.DataFrame({"layer": ["M1"] * 5, "z1": [50.0, 50.1, 49.9, 50.0, 50.2],
        ...                      "z4": [0.0, 0.1, -0.1, 0.05, -0.05]})
        >>> cur = pl.DataFrame({"wafer_id": ["W9"], "layer": ["M1"], "z1": [50.0], "z4": [1.5]})
        >>> classify_signatures(cur, hist, series_key=["layer"], wafer_key=["wafer_id"])["label"][0]
        'edge high'
    """
    skey, wkey = list(series_key), list(wafer_key)
    zcols = sorted(
        (c for c in current.columns if c.startswith("z") and c[1:].isdigit() and c in history.columns),
        key=lambda c: int(c[1:]),
    )
    _check(history, [*skey, *zcols], "classify_signatures history")
    _check(current, [*wkey, *skey], "classify_signatures current")
    base = history.group_by(skey).agg(
        *[pl.col(c).median().alias(f"_med_{c}") for c in zcols],
        *[((pl.col(c) - pl.col(c).median()).abs().median() * 1.4826).alias(f"_mad_{c}") for c in zcols],
    )
    cur = current.select(*wkey, *[c for c in skey if c not in wkey], *zcols).join(
        base, on=skey, how="left", maintain_order="left"
    )
    rz = [
        pl.when(pl.col(f"_mad_{c}") > 0)
        .then((pl.col(c) - pl.col(f"_med_{c}")) / pl.col(f"_mad_{c}"))
        .otherwise(None)
        .alias(f"r{c}")
        for c in zcols
    ]
    cur = cur.with_columns(rz)
    present = {int(c[1:]) for c in zcols}
    parts = []  # one (score, label) struct per rule; seven rules, not a loop over wafers
    for terms, high, low in _LABELS:
        terms = tuple(t for t in terms if t in present)
        if not terms:
            continue
        zs = [pl.col(f"rz{t}") for t in terms]
        if len(terms) == 1:
            score = zs[0].abs()
            text = pl.when(zs[0] > 0).then(pl.lit(high)).otherwise(pl.lit(low))
        else:
            score = pl.max_horizontal([z.abs() for z in zs])
            text = pl.lit(high)
            if terms == (2, 3):
                deg = pl.arctan2(pl.col("z3"), pl.col("z2")).degrees().round(0).cast(pl.Int64) % 360
                text = pl.format("tilt (high side toward {}°)", deg)
        parts.append(pl.struct(score.alias("s"), pl.when(score >= z_threshold).then(text).alias("t")))
    labelled = cur.with_columns(pl.concat_list(parts).alias("_p") if parts else pl.lit([]).alias("_p"))
    labelled = labelled.with_columns(
        pl.col("_p")
        .list.eval(
            pl.element()
            .sort_by(pl.element().struct.field("s"), descending=True)
            .struct.field("t")
            .drop_nulls()
        )
        .alias("labels"),
        pl.max_horizontal([pl.col(f"r{c}").abs() for c in zcols]).alias("max_abs_rz"),
    ).with_columns(
        pl.when(pl.col("labels").list.len() > 0)
        .then(pl.col("labels").list.join(", "))
        .when(pl.col("max_abs_rz").is_null())
        .then(pl.lit("no history to compare"))
        .otherwise(pl.lit("typical"))
        .alias("label")
    )
    return labelled.select(
        *wkey, *[c for c in skey if c not in wkey], *[f"r{c}" for c in zcols], "max_abs_rz", "labels", "label"
    )
