"""Wafer signatures checked against the published Zernike definitions and plain numpy least squares."""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest

from spc.signatures import (
    classify_signatures,
    explain_zernike,
    fit_radial,
    fit_zernike,
    noll_to_nm,
    zernike,
    zone_means,
)

R = 150.0


def _noll_table_i(j: int, rho: np.ndarray, theta: np.ndarray) -> np.ndarray:
    """Z1..Z11 written out as printed in Noll (1976), J. Opt. Soc. Am. 66(3), Table I (from memory)."""
    s3, s5, s6, s8 = np.sqrt([3.0, 5.0, 6.0, 8.0])
    return {
        1: np.ones_like(rho),
        2: 2 * rho * np.cos(theta),
        3: 2 * rho * np.sin(theta),
        4: s3 * (2 * rho**2 - 1),
        5: s6 * rho**2 * np.sin(2 * theta),
        6: s6 * rho**2 * np.cos(2 * theta),
        7: s8 * (3 * rho**3 - 2 * rho) * np.sin(theta),
        8: s8 * (3 * rho**3 - 2 * rho) * np.cos(theta),
        9: s8 * rho**3 * np.sin(3 * theta),
        10: s8 * rho**3 * np.cos(3 * theta),
        11: s5 * (6 * rho**4 - 6 * rho**2 + 1),
    }[j]


def test_noll_to_nm_matches_noll_ordering():
    # Noll (1976) Table I: j = 1..15 with (n, m); even j cosine, odd j sine (m < 0 here).
    want = [(0, 0), (1, 1), (1, -1), (2, 0), (2, -2), (2, 2), (3, -1), (3, 1), (3, -3), (3, 3)]
    want += [(4, 0), (4, 2), (4, -2), (4, 4), (4, -4)]
    assert [noll_to_nm(j) for j in range(1, 16)] == want


def test_zernike_matches_noll_table_i_expressions():
    rng = np.random.default_rng(1)
    rho, theta = np.sqrt(rng.uniform(size=500)), rng.uniform(0, 2 * np.pi, 500)
    for j in range(1, 12):
        np.testing.assert_allclose(zernike(j, rho, theta), _noll_table_i(j, rho, theta), atol=1e-12)


def test_zernike_orthonormal_on_unit_disk_by_quadrature():
    # (1/π) ∫0^2π ∫0^1 Z_i Z_j ρ dρ dθ = δ_ij (Noll 1976, eq. 4). Gauss–Legendre in ρ is exact for these
    # polynomials; the rectangle rule in θ is exact for trigonometric polynomials of low degree.
    x, w = np.polynomial.legendre.leggauss(40)
    rho, wr = (x + 1) / 2, w / 2
    theta = np.arange(64) * 2 * np.pi / 64
    P, T = np.meshgrid(rho, theta, indexing="ij")
    W = (wr[:, None] * P) * (2 * np.pi / 64) / np.pi
    Z = np.stack([zernike(j, P, T) for j in range(1, 22)])
    gram = np.einsum("iab,jab,ab->ij", Z, Z, W)
    np.testing.assert_allclose(gram, np.eye(21), atol=1e-10)


def _wafers(seed: int, n_wafers: int = 12):
    rng = np.random.default_rng(seed)
    rows = []
    coefs = {}
    for k in range(n_wafers):
        n_sites = 30 + k  # different layouts per wafer
        r = R * np.sqrt(rng.uniform(0, 0.98, n_sites))
        t = rng.uniform(0, 2 * np.pi, n_sites)
        c = rng.normal(0, 1, 11)
        c[0] = 45
        coefs[f"W{k}"] = c
        rho, theta = r / R, t
        v = sum(c[j - 1] * _noll_table_i(j, rho, theta) for j in range(1, 12)) + rng.normal(0, 0.05, n_sites)
        for i in range(n_sites):
            rows.append(("LOT1", f"W{k}", r[i] * np.cos(t[i]), r[i] * np.sin(t[i]), v[i]))
    return pl.DataFrame(rows, schema=["lot_id", "wafer_id", "x_mm", "y_mm", "value"], orient="row"), coefs


def test_fit_zernike_matches_numpy_lstsq_per_wafer():
    sites, _ = _wafers(4)
    fit = fit_zernike(sites, n_terms=11)
    for wafer, g in sites.group_by("wafer_id"):
        x, y, v = g["x_mm"].to_numpy() / R, g["y_mm"].to_numpy() / R, g["value"].to_numpy()
        rho, theta = np.hypot(x, y), np.arctan2(y, x)
        A = np.column_stack([_noll_table_i(j, rho, theta) for j in range(1, 12)])
        want, res, *_ = np.linalg.lstsq(A, v, rcond=None)
        row = fit.filter(pl.col("wafer_id") == wafer[0])
        got = np.array([row[f"z{j}"].item() for j in range(1, 12)])
        np.testing.assert_allclose(got, want, rtol=1e-7, atol=1e-8)
        ss_tot = ((v - v.mean()) ** 2).sum()
        assert row["r2"].item() == pytest.approx(1 - res[0] / ss_tot, rel=1e-8)
        assert row["n_sites"].item() == len(v) and row["rank"].item() == 11
        assert row["residual_sd"].item() == pytest.approx(np.sqrt(res[0] / (len(v) - 11)), rel=1e-7)


def test_fit_zernike_rejects_sites_outside_the_wafer():
    s = pl.DataFrame({"lot_id": ["L"], "wafer_id": ["W"], "x_mm": [151.0], "y_mm": [0.0], "value": [1.0]})
    with pytest.raises(ValueError, match=r"site at radius 151.0 mm lies outside the wafer"):
        fit_zernike(s)


def test_fit_zernike_five_site_layout_reports_rank():
    # The five-site pattern of NIST/SEMATECH e-Handbook §6.6.1 (top, left, centre, right, bottom) cannot
    # separate more than five terms; with Z5 = √6 ρ² sin 2θ zero on both axes, only four of Z1..Z5.
    s = pl.DataFrame(
        {
            "lot_id": ["L"] * 5,
            "wafer_id": ["W"] * 5,
            "x_mm": [0.0, -100.0, 0.0, 100.0, 0.0],
            "y_mm": [100.0, 0.0, 0.0, 0.0, -100.0],
            "value": [2.1, 2.0, 1.9, 2.2, 2.0],
        }
    )
    assert fit_zernike(s, n_terms=5)["rank"].item() == 4


def test_explain_zernike_shares_are_squared_coefficient_fractions():
    sites, _ = _wafers(8, n_wafers=3)
    fit = fit_zernike(sites)
    out = explain_zernike(fit)
    for wafer in ("W0", "W1", "W2"):
        row = fit.filter(pl.col("wafer_id") == wafer)
        c = np.array([row[f"z{j}"].item() for j in range(2, 12)])
        tilt = (c[0] ** 2 + c[1] ** 2) / (c**2).sum()  # Noll normalisation: disk variance = Σ c_j², j ≥ 2
        got = out.filter((pl.col("wafer_id") == wafer) & (pl.col("family") == "tilt"))
        assert got["share_of_fit"].item() == pytest.approx(tilt, rel=1e-12)
        assert got["terms"].to_list() == [[2, 3]]
        total = out.filter(pl.col("wafer_id") == wafer)["share_of_fit"].sum()
        assert total == pytest.approx(1.0)


def test_fit_radial_matches_numpy_polyfit_in_r_squared():
    rng = np.random.default_rng(2)
    r = R * np.sqrt(rng.uniform(0, 1, 60))
    t = rng.uniform(0, 2 * np.pi, 60)
    v = 30 + 1.5 * (r / R) ** 2 + rng.normal(0, 0.1, 60)
    s = pl.DataFrame(
        {"lot_id": "L", "wafer_id": "W", "x_mm": r * np.cos(t), "y_mm": r * np.sin(t), "value": v}
    )
    got = fit_radial(s).row(0, named=True)
    b, a = np.polyfit((r / R) ** 2, v, 1)  # numpy reference fit of value on (r/R)²
    assert (got["a0"], got["a2"]) == pytest.approx((a, b), rel=1e-9)
    assert got["centre_to_edge"] == pytest.approx(b, rel=1e-9)


def test_zone_means_uses_configured_radii():
    s = pl.DataFrame(
        {
            "lot_id": "L",
            "wafer_id": "W",
            "x_mm": [0.0, 49.9, 50.0, 109.9, 110.0, 145.0],
            "y_mm": [0.0] * 6,
            "value": [1.0, 3.0, 10.0, 20.0, 100.0, 200.0],
        }
    )
    out = zone_means(s)
    assert out.select("zone", "n_sites", "mean").rows() == [
        ("centre", 2, 2.0),
        ("mid", 2, 15.0),
        ("edge", 2, 150.0),
    ]
    inner = zone_means(s, edges_mm=(100.0,), names=("inner", "outer"))
    assert inner["zone"].to_list() == ["inner", "outer"] and inner["n_sites"].to_list() == [3, 3]


def _series_history(seed: int, n: int = 40):
    rng = np.random.default_rng(seed)
    data = {"layer": ["M1"] * n, "lot_id": [f"H{i}" for i in range(n)], "wafer_id": ["W"] * n}
    data |= {f"z{j}": rng.normal(0, 0.1, n) + (45 if j == 1 else 0) for j in range(1, 12)}
    return pl.DataFrame(data)


def test_classify_signatures_labels_edge_high_centre_high_and_tilt():
    hist = _series_history(5)
    base = {f"z{j}": [0.0] * 4 for j in range(1, 12)}
    base["z1"] = [45.0] * 4
    cur = pl.DataFrame({"layer": ["M1"] * 4, "lot_id": ["C"] * 4, "wafer_id": ["A", "B", "C", "D"], **base})
    cur = cur.with_columns(
        pl.when(pl.col("wafer_id") == "A")
        .then(2.0)
        .when(pl.col("wafer_id") == "B")
        .then(-2.0)
        .otherwise(0.0)
        .alias("z4"),
        pl.when(pl.col("wafer_id") == "C").then(1.5).otherwise(0.0).alias("z3"),
    )
    out = classify_signatures(cur, hist, series_key=["layer"]).sort("wafer_id")
    assert out["label"].to_list()[:3] == ["edge high", "centre high", "tilt (high side toward 90°)"]
    assert out["label"][3] == "typical"
    # robust z of wafer A's Z4: (2 − median) / (1.4826 · MAD) of the history, computed here with numpy
    h = hist["z4"].to_numpy()
    med = np.median(h)
    want = (2.0 - med) / (1.4826 * np.median(np.abs(h - med)))
    assert out["rz4"][0] == pytest.approx(want, rel=1e-12)


def test_classify_signatures_series_without_history_says_so():
    hist = _series_history(6)
    cur = pl.DataFrame(
        {"layer": ["M2"], "lot_id": ["C"], "wafer_id": ["A"], **{f"z{j}": [0.0] for j in range(1, 12)}}
    )
    out = classify_signatures(cur, hist, series_key=["layer"])
    assert out["label"].to_list() == ["no history to compare"] and out["labels"].to_list() == [[]]
