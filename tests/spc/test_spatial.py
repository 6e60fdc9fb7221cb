"""Defect spatial randomness and cluster finding, checked against simulation and scipy."""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest
from scipy import stats
from scipy.spatial import cKDTree

from spc.spatial import clark_evans_csr, count_unclustered, find_defect_clusters, quadrat_csr

R = 150.0


def _uniform_disk(rng: np.random.Generator, n: int, radius: float = R) -> tuple[np.ndarray, np.ndarray]:
    r = radius * np.sqrt(rng.uniform(size=n))
    t = rng.uniform(0, 2 * np.pi, n)
    return r * np.cos(t), r * np.sin(t)


def _frame(wafer: str, x: np.ndarray, y: np.ndarray) -> pl.DataFrame:
    return pl.DataFrame({"lot_id": "L1", "wafer_id": wafer, "x_mm": x, "y_mm": y})


def _scratch(rng: np.random.Generator, n: int = 40) -> tuple[np.ndarray, np.ndarray]:
    s = np.linspace(0, 60, n)  # a 60 mm straight scratch at 30° through (-20, -10)
    x = -20 + s * np.cos(np.pi / 6) + rng.normal(0, 0.3, n)
    y = -10 + s * np.sin(np.pi / 6) + rng.normal(0, 0.3, n)
    return x, y


def test_clark_evans_expected_distance_agrees_with_simulation_on_the_disk():
    # Donnelly (1978) edge-corrected CSR mean, checked against a direct simulation of uniform points on the
    # 150 mm disk with scipy's k-d tree (2,000 patterns of 100 points).
    rng = np.random.default_rng(1)
    sims = []
    for _ in range(2000):
        x, y = _uniform_disk(rng, 100)
        d, _ = cKDTree(np.column_stack([x, y])).query(np.column_stack([x, y]), k=2)
        sims.append(d[:, 1].mean())
    x, y = _uniform_disk(rng, 100)
    got = clark_evans_csr(_frame("W", x, y)).row(0, named=True)
    assert got["expected_nn_mm"] == pytest.approx(np.mean(sims), rel=0.01)
    assert got["z"] == pytest.approx((got["mean_nn_mm"] - got["expected_nn_mm"]) / np.std(sims), rel=0.1)


def test_clark_evans_uniform_points_give_reasonable_p_values():
    rng = np.random.default_rng(2)
    frames = [_frame(f"W{k}", *_uniform_disk(rng, 150)) for k in range(40)]
    out = clark_evans_csr(pl.concat(frames))
    assert out.height == 40
    assert int((out["p_value"] < 0.05).sum()) <= 6  # about 2 of 40 expected at the 5 % level
    assert 0.9 < out["ratio"].mean() < 1.1


def test_clark_evans_clustered_pattern_has_tiny_p_value_and_mc_agrees():
    rng = np.random.default_rng(3)
    centres = rng.uniform(-80, 80, (6, 2))
    pts = np.concatenate([c + rng.normal(0, 4, (25, 2)) for c in centres])
    out = clark_evans_csr(_frame("W", pts[:, 0], pts[:, 1]), n_sim=99, seed=5).row(0, named=True)
    assert out["ratio"] < 0.5
    assert out["p_clustered"] < 1e-10
    assert out["p_clustered_mc"] == pytest.approx(0.01)  # none of 99 CSR patterns is as clustered


def test_clark_evans_single_defect_wafer_gives_nulls():
    out = clark_evans_csr(_frame("W", np.array([1.0]), np.array([2.0])))
    assert out["n_defects"].item() == 1 and out["ratio"].item() is None


def test_clark_evans_monte_carlo_needs_a_seed():
    with pytest.raises(ValueError, match="needs a seed"):
        clark_evans_csr(_frame("W", np.zeros(3), np.arange(3.0)), n_sim=9)


def test_quadrat_csr_matches_scipy_chisquare_on_equal_area_cells():
    rng = np.random.default_rng(4)
    x, y = _uniform_disk(rng, 400)
    got = quadrat_csr(_frame("W", x, y), rings=3, sectors=8).row(0, named=True)
    # Cells built here independently: equal-area rings at R·sqrt(1/3), R·sqrt(2/3); 45° sectors.
    r = np.hypot(x, y)
    ring = np.digitize(r, [R * np.sqrt(1 / 3), R * np.sqrt(2 / 3)])
    sector = np.floor(np.degrees(np.arctan2(y, x)) % 360 / 45).astype(int)
    counts = np.bincount(ring * 8 + sector, minlength=24)
    want = stats.chisquare(counts)
    assert got["chi2"] == pytest.approx(want.statistic, rel=1e-12)
    assert got["p_value"] == pytest.approx(want.pvalue, rel=1e-9)
    assert got["df"] == 23 and got["min_expected"] == pytest.approx(400 / 24)


def test_quadrat_csr_clustered_pattern_is_rejected():
    rng = np.random.default_rng(6)
    x, y = _uniform_disk(rng, 100)
    cx, cy = rng.normal(60, 3, 100), rng.normal(20, 3, 100)
    out = quadrat_csr(_frame("W", np.concatenate([x, cx]), np.concatenate([y, cy])))
    assert out["p_value"].item() < 1e-10


def test_find_defect_clusters_planted_scratch_is_a_scratch_and_random_defects_stay_random():
    rng = np.random.default_rng(7)
    rx, ry = _uniform_disk(rng, 300)
    sx, sy = _scratch(rng)
    d = _frame("W1", np.concatenate([rx, sx]), np.concatenate([ry, sy])).with_columns(
        pl.Series("truth", ["random"] * 300 + ["scratch"] * 40)
    )
    found = find_defect_clusters(d)
    lab = found.labels
    assert lab["truth"].to_list() == d["truth"].to_list()  # input order and columns carried through
    scratch_rows = lab.filter(pl.col("truth") == "scratch")
    assert (scratch_rows["cluster_kind"] == "scratch").mean() >= 0.95
    random_rows = lab.filter(pl.col("truth") == "random")
    assert (random_rows["cluster_id"] == -1).mean() >= 0.95
    top = found.clusters.row(0, named=True)
    assert top["kind"] == "scratch" and top["cluster_id"] == 0
    assert top["length_mm"] == pytest.approx(60, abs=3)
    assert top["linearity"] > 0.99
    counts = count_unclustered(lab).row(0, named=True)
    assert counts["n_defects"] == 340 and counts["n_scratch"] >= 38 and counts["n_random"] >= 285


def test_find_defect_clusters_edge_cluster_and_blob_are_told_apart():
    rng = np.random.default_rng(8)
    t = rng.uniform(0.3, 0.5, 40)
    r = rng.uniform(142, 149.5, 40)
    ex, ey = r * np.cos(t), r * np.sin(t)  # an arc of defects at the wafer edge
    bx, by = rng.normal(-40, 2, 40), rng.normal(-50, 2, 40)  # a round blob
    found = find_defect_clusters(_frame("W2", np.concatenate([ex, bx]), np.concatenate([ey, by])))
    kinds = sorted(found.clusters["kind"].to_list())
    assert kinds == ["blob", "edge"]


def test_find_defect_clusters_does_not_depend_on_row_order_or_mix_wafers():
    rng = np.random.default_rng(9)
    a = _frame("A", *_scratch(rng))
    b = _frame("B", *_scratch(rng))  # same place on another wafer: must stay separate clusters
    both = pl.concat([a, b])
    found = find_defect_clusters(both)
    assert found.clusters.height == 2
    assert found.clusters["n_defects"].to_list() == [40, 40]
    perm = rng.permutation(both.height)
    shuffled = find_defect_clusters(both[perm])
    key = ["wafer_id", "x_mm", "y_mm"]
    assert found.labels.sort(key).equals(shuffled.labels.sort(key))


def test_find_defect_clusters_matches_a_plain_dbscan_written_here():
    # Reference: textbook DBSCAN (Ester et al. 1996) by breadth-first expansion over core points.
    rng = np.random.default_rng(10)
    x, y = _uniform_disk(rng, 120, radius=40.0)
    pts = np.column_stack([x, y])
    eps, m = 6.0, 4
    nb = [np.nonzero(np.hypot(*(pts - p).T) <= eps)[0] for p in pts]
    core = np.array([len(v) >= m for v in nb])
    comp = -np.ones(len(pts), dtype=int)
    c = 0
    for i in np.nonzero(core)[0]:
        if comp[i] >= 0:
            continue
        queue = [i]
        comp[i] = c
        while queue:
            k = queue.pop()
            for q in nb[k]:
                if core[q] and comp[q] < 0:
                    comp[q] = c
                    queue.append(q)
        c += 1
    got = (
        find_defect_clusters(_frame("W", x, y), eps_mm=eps, min_samples=m, min_cluster_size=1)
        .labels["cluster_id"]
        .to_numpy()
    )
    assert np.array_equal(got[core] >= 0, np.ones(core.sum(), dtype=bool))
    # Same partition of the core points (labels may be numbered differently).
    pairs = {(a, b) for a, b in zip(comp[core], got[core], strict=True)}
    assert len(pairs) == len(set(comp[core])) == len(set(got[core]))
    border = ~core & np.array([core[v].any() for v in nb])
    assert (got[border] >= 0).all() and (got[~core & ~border] == -1).all()


def test_find_defect_clusters_empty_frame_returns_empty_results():
    empty = pl.DataFrame(
        schema={"lot_id": pl.String, "wafer_id": pl.String, "x_mm": pl.Float64, "y_mm": pl.Float64}
    )
    found = find_defect_clusters(empty)
    assert found.labels.height == 0 and found.clusters.height == 0
