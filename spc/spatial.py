"""Defect maps: is a wafer's defect pattern random, and which defects belong to a scratch or a cluster?

Random (Poisson) defects are what a defect-density chart is built for; a scratch, an edge cluster or a
blob adds many defects from one event and inflates the count. This module tests each wafer's defect
coordinates for complete spatial randomness (CSR) on the wafer disk, and finds density clusters so that a
density chart can count the random defects only.

Methods (published):
    * Clark and Evans (1954), "Distance to nearest neighbor as a measure of spatial relationships in
      populations", Ecology 35(4), 445–453: ratio R of the observed mean nearest-neighbour distance to its
      CSR expectation 0.5·sqrt(A/n); R < 1 means clustering, R > 1 regularity.
    * Donnelly (1978), in Hodder (ed.), "Simulation studies in archaeology", Cambridge University Press:
      edge-corrected CSR mean 0.5·sqrt(A/n) + (0.0514 + 0.041/sqrt(n))·P/n and variance
      0.0703·A/n² + 0.037·P·sqrt(A/n⁵) for a region of area A and perimeter P (derived for rectangles and
      commonly applied to other convex regions; here the disk). A seeded Monte Carlo p-value on the disk
      itself is available with ``n_sim``.
    * Quadrat count χ² test over equal-area cells (e.g. Diggle, "Statistical Analysis of Spatial Point
      Patterns", 2nd ed., 2003, §2.4).
    * DBSCAN density clustering (Ester, Kriegel, Sander and Xu 1996, KDD-96), with border points given to
      the nearest core point so the result does not depend on the order of the rows.
    * Cluster shape from the principal components of the points' coordinates (PCA).

All wafers are handled at once: each wafer is shifted to its own place on a plane, far enough from the
others that no neighbour search crosses wafers, and one k-d tree (scipy.spatial.cKDTree) serves them all.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import NamedTuple

import numpy as np
import polars as pl
from scipy import sparse, stats
from scipy.sparse import csgraph
from scipy.spatial import cKDTree

__all__ = [
    "DefectClusters",
    "clark_evans_csr",
    "count_unclustered",
    "find_defect_clusters",
    "quadrat_csr",
]

WAFER_RADIUS_MM = 150.0
DEFAULT_WAFER_KEY = ("lot_id", "wafer_id")


class DefectClusters(NamedTuple):
    """Result of :func:`find_defect_clusters`: per-defect labels and one row per cluster."""

    labels: pl.DataFrame
    clusters: pl.DataFrame


def _check(frame: pl.DataFrame, required: Sequence[str], what: str) -> None:
    missing = [c for c in required if c not in frame.columns]
    if missing:
        raise ValueError(
            f"{what}: missing column(s) {', '.join(missing)} (found {', '.join(frame.columns)}, "
            f"expected {', '.join(required)}). Fix: rename or add the column(s) before calling."
        )


def _index_wafers(defects: pl.DataFrame, key: list[str], what: str) -> tuple[pl.DataFrame, pl.DataFrame]:
    _check(defects, [*key, "x_mm", "y_mm"], what)
    d = defects.with_row_index("_row").filter(pl.col("x_mm").is_not_null() & pl.col("y_mm").is_not_null())
    wafers = d.select(key).unique(maintain_order=True).with_row_index("_w")
    return d.join(wafers, on=key, maintain_order="left"), wafers


def _placed(x: np.ndarray, y: np.ndarray, w: np.ndarray, radius_mm: float) -> np.ndarray:
    """Shift wafer w to its own cell of a square grid, 5 radii apart, so neighbours never cross wafers."""
    side = max(int(np.ceil(np.sqrt(w.max() + 1))), 1) if w.size else 1
    step = 5.0 * radius_mm
    return np.column_stack([x + (w % side) * step, y + (w // side) * step])


def _mean_nn(points: np.ndarray, w: np.ndarray, n_w: int) -> tuple[np.ndarray, np.ndarray]:
    """Mean nearest-neighbour distance and point count per wafer (NaN for wafers with < 2 points)."""
    count = np.bincount(w, minlength=n_w)
    if points.shape[0] < 2:
        return np.full(n_w, np.nan), count
    dist, _ = cKDTree(points).query(points, k=2)
    nn = dist[:, 1]
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.bincount(w, weights=nn, minlength=n_w) / count
    return np.where(count >= 2, mean, np.nan), count


def clark_evans_csr(
    defects: pl.DataFrame,
    *,
    wafer_key: Sequence[str] = DEFAULT_WAFER_KEY,
    radius_mm: float = WAFER_RADIUS_MM,
    n_sim: int = 0,
    seed: int | None = None,
) -> pl.DataFrame:
    """Clark–Evans nearest-neighbour test of complete spatial randomness per wafer, edge-corrected for the disk.

    Frame contract:
        ``defects``: one row per defect — the ``wafer_key`` columns, ``x_mm``, ``y_mm`` (from the wafer
        centre, inside ``radius_mm``, the inspected radius).

    Args:
        defects: defect coordinates (see contract).
        wafer_key: columns naming a wafer inspection.
        radius_mm: radius of the inspected disk (150 mm wafer; less with an edge exclusion).
        n_sim: if > 0, also a Monte Carlo p-value from that many CSR patterns of the same size on the disk.
        seed: seed of the Monte Carlo patterns (required when ``n_sim`` > 0).

    Returns:
        One row per wafer: key columns, ``n_defects``, ``mean_nn_mm``, ``expected_nn_mm`` (Donnelly),
        ``ratio`` (Clark–Evans R with the corrected expectation), ``z``, ``p_value`` (two-sided normal),
        ``p_clustered`` (one-sided, small when defects cluster); with ``n_sim`` also ``p_clustered_mc``.
        Wafers with fewer than 2 defects get nulls.

    Example:
        >>> rng = np.random.default_rng(0)
        >>> r, t = 150 * np.sqrt(rng.uniform(size=200)), rng.uniform(0, 2 * np.pi, 200)
        >>> d = pl.DataFrame({"wafer_id": "W1", "x_mm": r * np.cos(t), "y_mm": r * np.sin(t)})
        >>> out = clark_evans_csr(d, wafer_key=["wafer_id"])
        >>> bool(0.8 < out["ratio"][0] < 1.2), bool(out["p_value"][0] > 0.01)
        (True, True)
    """
    key = list(wafer_key)
    d, wafers = _index_wafers(defects, key, "clark_evans_csr defects")
    w = d["_w"].to_numpy()
    n_w = wafers.height
    pts = _placed(d["x_mm"].to_numpy(), d["y_mm"].to_numpy(), w, radius_mm)
    mean, count = _mean_nn(pts, w, n_w)
    area, perim = np.pi * radius_mm**2, 2 * np.pi * radius_mm
    n = np.where(count >= 2, count, np.nan).astype(float)
    expected = 0.5 * np.sqrt(area / n) + (0.0514 + 0.041 / np.sqrt(n)) * perim / n
    var = 0.0703 * area / n**2 + 0.037 * perim * np.sqrt(area / n**5)
    z = (mean - expected) / np.sqrt(var)
    out = wafers.drop("_w").with_columns(
        pl.Series("n_defects", count.astype(np.int64)),
        pl.Series("mean_nn_mm", mean),
        pl.Series("expected_nn_mm", expected),
        pl.Series("ratio", mean / expected),
        pl.Series("z", z),
        pl.Series("p_value", 2 * stats.norm.sf(np.abs(z))),
        pl.Series("p_clustered", stats.norm.cdf(z)),
    )
    if n_sim > 0:
        if seed is None:
            raise ValueError(
                "clark_evans_csr: n_sim > 0 needs a seed (found seed=None, expected an int). "
                "Fix: pass seed=… so the Monte Carlo p-value is reproducible."
            )
        rng = np.random.default_rng(seed)
        sim_count = np.repeat(np.where(count >= 2, count, 0), n_sim)
        sw = np.repeat(np.arange(sim_count.size), sim_count)
        r = radius_mm * np.sqrt(rng.uniform(size=sw.size))
        t = rng.uniform(0, 2 * np.pi, sw.size)
        sim_mean, _ = _mean_nn(_placed(r * np.cos(t), r * np.sin(t), sw, radius_mm), sw, sim_count.size)
        sim_mean = sim_mean.reshape(n_w, n_sim)
        # One-sided (clustered) Monte Carlo p-value with the observed pattern counted (Besag and Diggle 1977).
        p_mc = (1 + (sim_mean <= mean[:, None]).sum(axis=1)) / (n_sim + 1)
        out = out.with_columns(pl.Series("p_clustered_mc", np.where(count >= 2, p_mc, np.nan)))
    return out.with_columns(pl.col(pl.Float64).fill_nan(None))


def quadrat_csr(
    defects: pl.DataFrame,
    *,
    wafer_key: Sequence[str] = DEFAULT_WAFER_KEY,
    radius_mm: float = WAFER_RADIUS_MM,
    rings: int = 3,
    sectors: int = 8,
) -> pl.DataFrame:
    """Quadrat χ² test of complete spatial randomness over equal-area cells of the wafer disk.

    Cells are ``rings`` annuli of equal area (outer radii R·sqrt(i / rings)) times ``sectors`` equal angles,
    so under CSR every cell expects n / (rings·sectors) defects. The χ² approximation wants about 5 or more
    expected per cell (``min_expected`` reports it).

    Frame contract:
        ``defects``: the ``wafer_key`` columns, ``x_mm``, ``y_mm``.

    Returns:
        One row per wafer: key columns, ``n_defects``, ``n_cells``, ``min_expected``, ``chi2``, ``df``,
        ``p_value`` (upper tail; small when defects crowd into some cells).

    Example:
        >>> d = pl.DataFrame({"wafer_id": "W1", "x_mm": [10.0] * 40, "y_mm": [5.0] * 40})
        >>> float(quadrat_csr(d, wafer_key=["wafer_id"])["p_value"][0]) < 1e-6
        True
    """
    key = list(wafer_key)
    d, wafers = _index_wafers(defects, key, "quadrat_csr defects")
    x, y, w = d["x_mm"].to_numpy(), d["y_mm"].to_numpy(), d["_w"].to_numpy()
    ring = np.minimum((rings * (x**2 + y**2) / radius_mm**2).astype(np.int64), rings - 1)
    sector = np.minimum(
        (np.mod(np.arctan2(y, x), 2 * np.pi) / (2 * np.pi) * sectors).astype(np.int64), sectors - 1
    )
    k = rings * sectors
    cell = w * k + ring * sectors + sector
    counts = np.bincount(cell, minlength=wafers.height * k).reshape(wafers.height, k).astype(float)
    n = counts.sum(axis=1)
    e = n / k
    with np.errstate(invalid="ignore", divide="ignore"):
        chi2 = ((counts - e[:, None]) ** 2).sum(axis=1) / e
    return (
        wafers.drop("_w")
        .with_columns(
            pl.Series("n_defects", n.astype(np.int64)),
            pl.lit(k, pl.Int64).alias("n_cells"),
            pl.Series("min_expected", e),
            pl.Series("chi2", np.where(n > 0, chi2, np.nan)),
            pl.lit(k - 1, pl.Int64).alias("df"),
            pl.Series("p_value", np.where(n > 0, stats.chi2.sf(chi2, k - 1), np.nan)),
        )
        .with_columns(pl.col(pl.Float64).fill_nan(None))
    )


def find_defect_clusters(
    defects: pl.DataFrame,
    *,
    wafer_key: Sequence[str] = DEFAULT_WAFER_KEY,
    eps_mm: float = 5.0,
    min_samples: int = 4,
    min_cluster_size: int = 8,
    radius_mm: float = WAFER_RADIUS_MM,
    edge_band_mm: float = 10.0,
    edge_fraction: float = 0.7,
    scratch_linearity: float = 0.95,
    scratch_min_length_mm: float = 10.0,
) -> DefectClusters:
    """Find dense defect clusters per wafer (DBSCAN) and name each one scratch, edge or blob.

    A defect is a core point when at least ``min_samples`` defects (itself included) lie within ``eps_mm``;
    core points within ``eps_mm`` of each other form one cluster; a non-core defect within ``eps_mm`` of a
    core point joins the cluster of its nearest core point; clusters of fewer than ``min_cluster_size``
    defects are dissolved; the rest are random (cluster -1). The defaults suit inline densities (a few hundred
    defects per wafer: under CSR with 300 defects a defect has ~0.3 neighbours within 5 mm, so a chance
    core point is rare and a chance cluster of 8 rarer still); for much denser maps lower ``eps_mm``.

    A cluster is "edge" when at least ``edge_fraction`` of its defects lie within ``edge_band_mm`` of the
    wafer edge; else "scratch" when its linearity 1 − λ2/λ1 (eigenvalues of the coordinates' covariance) is at
    least ``scratch_linearity`` and it is at least ``scratch_min_length_mm`` long; else "blob". A strongly
    curved scratch (an arc) can come out as "blob"; the length is measured along the principal axis.

    Frame contract:
        ``defects``: one row per defect — the ``wafer_key`` columns, ``x_mm``, ``y_mm``; other columns are
        carried through.

    Returns:
        ``DefectClusters(labels, clusters)``: ``labels`` is ``defects`` in its row order plus ``cluster_id``
        (Int64, -1 for random defects; 0, 1, … per wafer by decreasing size) and ``cluster_kind`` (null for
        random defects); ``clusters`` has one row per cluster: key columns, ``cluster_id``, ``n_defects``,
        ``kind``, ``length_mm``, ``width_mm``, ``linearity``, ``centroid_x_mm``, ``centroid_y_mm``,
        ``centroid_r_mm``, ``edge_share``.

    Example:
        >>> line = pl.DataFrame({"wafer_id": "W1", "x_mm": np.linspace(-30, 30, 41), "y_mm": 0.0})
        >>> found = find_defect_clusters(line, wafer_key=["wafer_id"])
        >>> found.clusters.select("kind", "n_defects", "length_mm").row(0)
        ('scratch', 41, 60.0)
    """
    key = list(wafer_key)
    d, wafers = _index_wafers(defects, key, "find_defect_clusters defects")
    x, y, w = d["x_mm"].to_numpy(), d["y_mm"].to_numpy(), d["_w"].to_numpy()
    n = x.size
    label = np.full(n, -1, dtype=np.int64)
    if n:
        pts = _placed(x, y, w, radius_mm)
        pairs = cKDTree(pts).query_pairs(eps_mm, output_type="ndarray")
        i, j = pairs[:, 0], pairs[:, 1]
        degree = np.bincount(np.concatenate([i, j]), minlength=n) + 1  # the point itself counts
        core = degree >= min_samples
        cc = core[i] & core[j]
        graph = sparse.coo_matrix((np.ones(cc.sum()), (i[cc], j[cc])), shape=(n, n))
        _, comp = csgraph.connected_components(graph, directed=False)
        label[core] = comp[core]
        # Border points: the nearest core neighbour decides (ties: the lower row), independent of row order.
        bi = np.concatenate([i[core[j] & ~core[i]], j[core[i] & ~core[j]]])
        ci = np.concatenate([j[core[j] & ~core[i]], i[core[i] & ~core[j]]])
        if bi.size:
            dist = np.hypot(*(pts[bi] - pts[ci]).T)
            order = np.lexsort((ci, dist, bi))
            bi, ci = bi[order], ci[order]
            first = np.ones(bi.size, dtype=bool)
            first[1:] = bi[1:] != bi[:-1]
            label[bi[first]] = comp[ci[first]]
        size = np.bincount(label[label >= 0], minlength=n)
        label[(label >= 0) & (size[np.maximum(label, 0)] < min_cluster_size)] = -1
    d = d.with_columns(pl.Series("_c", label))
    clustered = d.filter(pl.col("_c") >= 0)
    r = (pl.col("x_mm") ** 2 + pl.col("y_mm") ** 2).sqrt()
    stats_ = clustered.group_by("_c").agg(
        pl.col("_w").first(),
        pl.len().alias("n_defects"),
        pl.col("_row").min().alias("_first"),
        pl.col("x_mm").mean().alias("centroid_x_mm"),
        pl.col("y_mm").mean().alias("centroid_y_mm"),
        pl.col("x_mm").var(ddof=0).alias("_sxx"),
        pl.col("y_mm").var(ddof=0).alias("_syy"),
        ((pl.col("x_mm") - pl.col("x_mm").mean()) * (pl.col("y_mm") - pl.col("y_mm").mean()))
        .mean()
        .alias("_sxy"),
        (r >= radius_mm - edge_band_mm).mean().alias("edge_share"),
    )
    half_tr = (pl.col("_sxx") + pl.col("_syy")) / 2
    disc = (((pl.col("_sxx") - pl.col("_syy")) / 2) ** 2 + pl.col("_sxy") ** 2).sqrt()
    stats_ = stats_.with_columns(
        (half_tr + disc).alias("_l1"),
        (half_tr - disc).clip(lower_bound=0.0).alias("_l2"),
        (0.5 * pl.arctan2(2 * pl.col("_sxy"), pl.col("_sxx") - pl.col("_syy"))).alias("_phi"),
    )
    proj = clustered.join(stats_.select("_c", "centroid_x_mm", "centroid_y_mm", "_phi"), on="_c").with_columns(
        ((pl.col("x_mm") - pl.col("centroid_x_mm")) * pl.col("_phi").cos()
         + (pl.col("y_mm") - pl.col("centroid_y_mm")) * pl.col("_phi").sin()).alias("_u"),
        (-(pl.col("x_mm") - pl.col("centroid_x_mm")) * pl.col("_phi").sin()
         + (pl.col("y_mm") - pl.col("centroid_y_mm")) * pl.col("_phi").cos()).alias("_v"),
    )  # fmt: skip
    extent = proj.group_by("_c").agg(
        (pl.col("_u").max() - pl.col("_u").min()).alias("length_mm"),
        (pl.col("_v").max() - pl.col("_v").min()).alias("width_mm"),
    )
    linearity = pl.when(pl.col("_l1") > 0).then(1 - pl.col("_l2") / pl.col("_l1")).otherwise(0.0)
    summary = (
        stats_.join(extent, on="_c")
        .with_columns(
            linearity.alias("linearity"),
            (pl.col("centroid_x_mm") ** 2 + pl.col("centroid_y_mm") ** 2).sqrt().alias("centroid_r_mm"),
        )
        .with_columns(
            pl.when(pl.col("edge_share") >= edge_fraction)
            .then(pl.lit("edge"))
            .when((pl.col("linearity") >= scratch_linearity) & (pl.col("length_mm") >= scratch_min_length_mm))
            .then(pl.lit("scratch"))
            .otherwise(pl.lit("blob"))
            .alias("kind")
        )
        .sort(["_w", "n_defects", "_first"], descending=[False, True, False])
        .with_columns(pl.int_range(pl.len()).over("_w").cast(pl.Int64).alias("cluster_id"))
    )
    clusters = summary.join(wafers, on="_w").select(
        *key,
        "cluster_id",
        "n_defects",
        "kind",
        "length_mm",
        "width_mm",
        "linearity",
        "centroid_x_mm",
        "centroid_y_mm",
        "centroid_r_mm",
        "edge_share",
    )
    ids = summary.select("_c", "cluster_id", pl.col("kind").alias("cluster_kind"))
    labelled = (
        d.join(ids, on="_c", how="left")
        .select("_row", "cluster_id", "cluster_kind")
        .with_columns(pl.col("cluster_id").fill_null(-1))
    )
    out = (
        defects.with_row_index("_row")
        .join(labelled, on="_row", how="left", maintain_order="left")
        .drop("_row")
        .with_columns(pl.col("cluster_id").fill_null(-1))
    )
    return DefectClusters(out, clusters)


def count_unclustered(labels: pl.DataFrame, *, wafer_key: Sequence[str] = DEFAULT_WAFER_KEY) -> pl.DataFrame:
    """Per wafer, how many defects are random and how many sit in each kind of cluster.

    Frame contract:
        ``labels``: the ``labels`` frame of :func:`find_defect_clusters` (``wafer_key`` columns,
        ``cluster_id``, ``cluster_kind``).

    Returns:
        One row per wafer: key columns, ``n_defects``, ``n_random`` (cluster -1: what a density chart
        should count), ``n_scratch``, ``n_edge``, ``n_blob``.

    Example:
        >>> lab = pl.DataFrame({"wafer_id": ["W1"] * 3, "cluster_id": [-1, 0, 0],
        ...                     "cluster_kind": [None, "scratch", "scratch"]})
        >>> count_unclustered(lab, wafer_key=["wafer_id"]).row(0)
        ('W1', 3, 1, 2, 0, 0)
    """
    key = list(wafer_key)
    _check(labels, [*key, "cluster_id", "cluster_kind"], "count_unclustered labels")
    return labels.group_by(key, maintain_order=True).agg(
        pl.len().alias("n_defects"),
        (pl.col("cluster_id") < 0).sum().alias("n_random"),
        *[(pl.col("cluster_kind") == k).sum().alias(f"n_{k}") for k in ("scratch", "edge", "blob")],
    )
