"""Nested variance components against the NIST furnace ANOVA table; the nested-limits trap."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import polars as pl
import pytest
from scipy.optimize import minimize

from spc.variance import nested_components

REF = Path(__file__).resolve().parents[1] / "data/reference"
EXAMPLES = json.loads((REF / "worked_examples/examples.json").read_text())


def test_nested_components_match_nist_furnace_table_to_every_printed_digit():
    pub = EXAMPLES["furnace_nested_anova_nist_3_5_1"]["published"]  # NIST/SEMATECH e-Handbook §3.5.1
    furnace = pl.read_csv(REF / "nist/furnace_oxide_thickness.csv")
    vc = nested_components(furnace, ["run", "zone"], "thickness_angstrom")
    assert (
        vc.df
        == {"run": 20, "zone": 63, "within": 84}
        == {"run": pub["df"]["run"], "zone": pub["df"]["zone_in_run"], "within": pub["df"]["within"]}
    )
    assert round(vc.mean_squares["run"], 2) == pub["mean_squares"]["run"]
    assert round(vc.mean_squares["zone"], 3) == pub["mean_squares"]["zone_in_run"]
    assert round(vc.mean_squares["within"], 3) == pub["mean_squares"]["within"]
    assert round(vc.components["run"], 5) == pub["variance_components"]["run"]
    assert round(vc.components["zone"], 5) == pub["variance_components"]["zone_in_run"]
    assert round(vc.components["within"], 5) == pub["variance_components"]["within"]


def test_nested_components_lithography_flags_within_wafer_limits_as_too_tight():
    # Domain notes (NIST e-Handbook §6.6.1 data): most variance lies between cassettes, so X-bar limits
    # from within-wafer sigma are far too tight for wafer and cassette means.
    litho = pl.read_csv(REF / "nist/lithography_linewidth.csv")
    vc = nested_components(litho, ["cassette", "wafer"], "linewidth", residual="site")
    assert vc.too_tight == {"cassette": True, "wafer": True}
    assert vc.sigma_for["wafer"] > 1.5 * vc.naive_sigma_for["wafer"]


def test_nested_components_anova_on_unbalanced_design_is_refused():
    df = pl.DataFrame({"lot": ["a", "a", "b"], "v": [1.0, 2.0, 3.0]})
    with pytest.raises(ValueError, match="balanced design"):
        nested_components(df, ["lot"], "v", method="anova")


def test_nested_components_reml_on_balanced_furnace_equals_nist_anova_components():
    # REML = ANOVA estimators for balanced data when those are non-negative (Searle, Casella & McCulloch,
    # Variance Components, 1992, ch. 6; from memory). Published components: NIST/SEMATECH e-Handbook §3.5.1.
    pub = EXAMPLES["furnace_nested_anova_nist_3_5_1"]["published"]["variance_components"]
    furnace = pl.read_csv(REF / "nist/furnace_oxide_thickness.csv")
    vc = nested_components(furnace, ["run", "zone"], "thickness_angstrom", method="reml")
    assert vc.method == "reml"
    assert nested_components(furnace, ["run", "zone"], "thickness_angstrom").method == "anova"
    assert vc.components["run"] == pytest.approx(pub["run"], rel=1e-7)
    assert vc.components["zone"] == pytest.approx(pub["zone_in_run"], rel=1e-7)
    assert vc.components["within"] == pytest.approx(pub["within"], rel=1e-7)
    assert vc.sizes == {"run": 8, "zone": 2, "within": 1}


def _unbalanced_furnace() -> pl.DataFrame:
    # NIST furnace data (e-Handbook §3.5.1), runs 1-12 (82 wafers, small enough for full-matrix REML), with
    # zone 4 dropped from runs 3, 6, 9, 12 and the second wafer dropped from zones 1-2 of runs 1, 5, 9:
    # runs of 4-8 wafers, zones of 1-2 wafers.
    furnace = pl.read_csv(REF / "nist/furnace_oxide_thickness.csv")
    drop = ((pl.col("run") % 3 == 0) & (pl.col("zone") == 4)) | (
        (pl.col("run") % 4 == 1) & (pl.col("wafer") == 2) & (pl.col("zone") < 3)
    )
    return furnace.filter(~drop & (pl.col("run") <= 12))


def _brute_force_reml(frame: pl.DataFrame, levels: list[str], value: str) -> np.ndarray:
    """REML by the textbook formula on the full covariance matrix, maximised by Nelder-Mead.

    -2 l_R = log|V| + log|X'V^-1 X| + r'V^-1 r, r = y - X b_GLS, V = sum_j s_j^2 Z_j Z_j' + s_e^2 I
    (Searle, Casella & McCulloch 1992, ch. 6; Harville 1977, JASA 72).
    """
    y = frame[value].cast(pl.Float64).to_numpy()
    n = y.size
    zz = []
    for j in range(len(levels)):
        key = frame.select(pl.concat_str([pl.col(c).cast(pl.String) for c in levels[: j + 1]], separator="/"))
        key = key.to_series().to_numpy()
        zz.append((key[:, None] == key[None, :]).astype(float))  # Z_j Z_j'
    x = np.ones((n, 1))

    def neg2l(theta: np.ndarray) -> float:
        var = np.exp(theta)
        v = var[-1] * np.eye(n) + sum(s * z for s, z in zip(var[:-1], zz, strict=True))
        vinv = np.linalg.inv(v)
        xtvx = x.T @ vinv @ x
        beta = np.linalg.solve(xtvx, x.T @ vinv @ y)
        r = y - x @ beta
        return float(np.linalg.slogdet(v)[1] + np.linalg.slogdet(xtvx)[1] + r @ vinv @ r)

    theta0 = np.full(len(levels) + 1, np.log(np.var(y) / (len(levels) + 1)))
    res = minimize(
        neg2l,
        theta0,
        method="Nelder-Mead",
        options={"xatol": 1e-10, "fatol": 1e-13, "maxiter": 20000, "maxfev": 20000},
    )
    assert res.success
    return np.exp(res.x)


@pytest.mark.parametrize("levels", [["run"], ["run", "zone"]])
def test_nested_components_unbalanced_reml_matches_brute_force_full_matrix_reml(levels):
    data = _unbalanced_furnace()
    vc = nested_components(data, levels, "thickness_angstrom")
    assert vc.method == "reml"
    expected = _brute_force_reml(data, levels, "thickness_angstrom")
    got = np.array([vc.components[k] for k in (*levels, "within")])
    assert got == pytest.approx(expected, rel=1e-5)


def test_nested_components_unbalanced_sigmas_use_harmonic_group_sizes():
    data = _unbalanced_furnace()
    vc = nested_components(data, ["run", "zone"], "thickness_angstrom")
    per_run = data.group_by("run").len()["len"].to_numpy()
    per_zone = data.group_by("run", "zone").len()["len"].to_numpy()
    h_run, h_zone = per_run.size / np.sum(1 / per_run), per_zone.size / np.sum(1 / per_zone)
    c = vc.components
    assert vc.sizes["run"] == pytest.approx(h_run) and vc.sizes["zone"] == pytest.approx(h_zone)
    # var of a zone mean of h_zone wafers; of a run mean of h_run wafers in h_run / h_zone zones
    assert vc.sigma_for["zone"] ** 2 == pytest.approx(c["run"] + c["zone"] + c["within"] / h_zone)
    assert vc.sigma_for["run"] ** 2 == pytest.approx(
        c["run"] + c["zone"] * h_zone / h_run + c["within"] / h_run
    )


def test_nested_components_unbalanced_component_on_boundary_is_reported_zero():
    # Every wafer of a lot has the same mean (site deviations sum to 0), so the wafer mean square is 0:
    # the REML wafer component lies on its boundary (Searle, Casella & McCulloch 1992, ch. 6).
    offsets = {2: [-1.0, 1.0], 3: [-1.0, 0.0, 1.0], 4: [-1.5, -0.5, 0.5, 1.5]}
    lots = {"L1": (10.0, [2, 3, 4]), "L2": (14.0, [3, 3]), "L3": (9.0, [4, 2, 2, 3]), "L4": (12.0, [2, 4])}
    rows = [
        (lot, f"{lot}w{w}", mu + d)
        for lot, (mu, sizes) in lots.items()
        for w, size in enumerate(sizes)
        for d in offsets[size]
    ]
    frame = pl.DataFrame(rows, schema=["lot", "wafer", "v"], orient="row")
    vc = nested_components(frame, ["lot", "wafer"], "v", residual="site")
    assert vc.method == "reml"
    assert vc.components["wafer"] == 0.0
    # with the wafer component fixed at 0 the model is one-way: compare against the brute-force REML
    lot_within = _brute_force_reml(frame, ["lot"], "v")
    assert [vc.components["lot"], vc.components["site"]] == pytest.approx(lot_within, rel=1e-5)


def test_nested_components_seeded_unbalanced_simulation_recovers_known_components():
    # Simulated lot / wafer / site data with known components; 4-6 wafers per lot, 3-9 sites per wafer.
    rng = np.random.default_rng(20240611)
    true = {"lot": 4.0, "wafer": 1.0, "site": 0.5}
    n_lots = 300
    wafers = rng.integers(4, 7, n_lots)
    lot_of_wafer = np.repeat(np.arange(n_lots), wafers)
    sites = rng.integers(3, 10, lot_of_wafer.size)
    wafer_of_site = np.repeat(np.arange(lot_of_wafer.size), sites)
    y = (
        50.0
        + rng.normal(0, np.sqrt(true["lot"]), n_lots)[lot_of_wafer[wafer_of_site]]
        + rng.normal(0, np.sqrt(true["wafer"]), lot_of_wafer.size)[wafer_of_site]
        + rng.normal(0, np.sqrt(true["site"]), wafer_of_site.size)
    )
    frame = pl.DataFrame({"lot": lot_of_wafer[wafer_of_site], "wafer": wafer_of_site, "cd": y})
    vc = nested_components(frame, ["lot", "wafer"], "cd", residual="site")
    assert vc.method == "reml"
    # large-sample standard errors var(s^2) ~ 2 (E[MS])^2 / (df m^2) per level (common practice)
    m_site, m_lot = 6.0, 6.0 * 5
    se = {
        "lot": np.sqrt(2 / (n_lots - 1)) * (true["lot"] + true["wafer"] / 5 + true["site"] / m_lot),
        "wafer": np.sqrt(2 / (lot_of_wafer.size - n_lots)) * (true["wafer"] + true["site"] / m_site),
        "site": np.sqrt(2 / (y.size - lot_of_wafer.size)) * true["site"],
    }
    for k, t in true.items():
        assert abs(vc.components[k] - t) < 3 * se[k], (k, vc.components[k], t, se[k])
