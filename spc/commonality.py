"""Commonality analysis: which step, tool, chamber or recipe do the affected lots share?

For every step of the lots' process history and every candidate at that step (a process tool, a tool's
chamber, a recipe), the lots that ran the step are split two ways: through the candidate or not, and
affected or not. Each 2×2 table gets an exact or asymptotic test of association and an odds ratio with a
confidence interval. When a per-lot charted value is given, the value is also compared across the
candidates of each step (one-way ANOVA, Kruskal–Wallis) and between each candidate and the rest of the
step's lots (Welch's t-test, difference in means with a confidence interval). All p-values are adjusted
together with the Benjamini–Hochberg step-up procedure.

Everything is counted with polars group-bys and tested with closed-form numpy/scipy array formulas, so the
run time grows with the number of history rows, not with the number of candidates times a Python loop.

Commonality is association, not proof of cause: a ranked candidate is a lead for an engineer to check,
and the fab's own out-of-control action plan (OCAP) and qualified engineers decide what to do about it.

Methods (published):
    * Fisher's exact test, two-sided by summing the probabilities of all tables no more probable than the
      observed one (Fisher 1935; the definition scipy.stats.fisher_exact documents).
    * Pearson's χ² with Yates' continuity correction for 2×2 tables (Yates 1934), used when every expected
      count is at least ``min_expected`` (Cochran 1954, "Some methods for strengthening the common χ² tests").
    * Odds ratio with the Woolf (1955) log-scale confidence interval; when a cell is zero, 0.5 is added to
      every cell (Haldane 1956).
    * Welch's t-test with the Welch–Satterthwaite degrees of freedom (Welch 1947); one-way ANOVA F test;
      Kruskal–Wallis H with the tie correction (Kruskal and Wallis 1952).
    * Benjamini and Hochberg (1995), J. R. Statist. Soc. B 57(1), 289–300.
"""

from __future__ import annotations

from collections.abc import Iterable

import numpy as np
import polars as pl
from scipy import special, stats

__all__ = [
    "adjust_benjamini_hochberg",
    "fisher_exact_two_sided",
    "odds_ratio_woolf",
    "rank_commonality",
]

#: History columns a caller must supply; ``chamber`` and ``recipe`` are optional.
HISTORY_REQUIRED = ("lot_id", "step", "process_tool")
#: Candidate kinds, in the order they are reported.
KINDS = ("tool", "chamber", "recipe")


def adjust_benjamini_hochberg(p_values: np.ndarray | Iterable[float]) -> np.ndarray:
    """Benjamini–Hochberg adjusted p-values (q-values); NaN entries are left out and stay NaN.

    The adjusted value of the i-th smallest of m p-values is min over j ≥ i of m·p_(j)/j, capped at 1
    (Benjamini and Hochberg 1995). Rejecting every hypothesis with q ≤ α controls the false discovery rate
    at α for independent or positively dependent tests.

    Args:
        p_values: p-values in any order; NaN marks a test that was not run.

    Returns:
        Adjusted p-values in the input order.

    Example:
        >>> adjust_benjamini_hochberg([0.01, 0.04, 0.03, float("nan")]).round(3).tolist()
        [0.03, 0.04, 0.04, nan]
    """
    p = np.asarray(p_values, dtype=float)
    out = np.full(p.shape, np.nan)
    ok = np.isfinite(p)
    m = int(ok.sum())
    if m == 0:
        return out
    pv = p[ok]
    order = np.argsort(pv, kind="stable")
    ranked = pv[order] * m / np.arange(1, m + 1)
    ranked = np.minimum.accumulate(ranked[::-1])[::-1]
    adj = np.empty(m)
    adj[order] = np.minimum(ranked, 1.0)
    out[ok] = adj
    return out


def fisher_exact_two_sided(a, b, c, d, *, chunk: int = 4096) -> np.ndarray:
    """Two-sided Fisher exact p-values for many 2×2 tables [[a, b], [c, d]] at once.

    The p-value sums the hypergeometric probabilities of every table with the observed margins that is no
    more probable than the observed table (relative tolerance 1e-7), as scipy.stats.fisher_exact defines
    it. The support of each table is laid out on a padded grid, so there is no Python loop over tables.

    Args:
        a, b, c, d: non-negative integer arrays of equal length (cells of each table).
        chunk: tables per block, to bound the memory of the padded grid.

    Returns:
        p-values, one per table.

    Example:
        >>> round(float(fisher_exact_two_sided([8], [2], [1], [5])[0]), 4)
        0.035
    """
    a, b, c, d = (np.asarray(x, dtype=np.int64).ravel() for x in (a, b, c, d))
    out = np.empty(a.shape[0])
    for start in range(0, a.shape[0], chunk):
        sl = slice(start, start + chunk)
        out[sl] = _fisher_block(a[sl], b[sl], c[sl], d[sl])
    return out


def _fisher_block(a: np.ndarray, b: np.ndarray, c: np.ndarray, d: np.ndarray) -> np.ndarray:
    if a.size == 0:
        return np.empty(0)
    row1 = a + b
    col1 = a + c
    n = a + b + c + d
    lo = np.maximum(0, row1 + col1 - n)
    hi = np.minimum(row1, col1)
    width = int((hi - lo).max()) + 1
    k = lo[:, None] + np.arange(width)[None, :]
    valid = k <= hi[:, None]
    kk = np.where(valid, k, lo[:, None])

    def log_pmf(x):
        # log C(col1, x) + log C(n - col1, row1 - x) - log C(n, row1)
        col1_, row1_, n_ = col1[:, None], row1[:, None], n[:, None]
        return _log_comb(col1_, x) + _log_comb(n_ - col1_, row1_ - x) - _log_comb(n_, row1_)

    grid = log_pmf(kk)
    observed = log_pmf(a[:, None])
    keep = valid & (grid <= observed + np.log1p(1e-7))
    p = np.where(keep, np.exp(grid), 0.0).sum(axis=1)
    return np.minimum(p, 1.0)


def _log_comb(n, k):
    return special.gammaln(n + 1) - special.gammaln(k + 1) - special.gammaln(n - k + 1)


def _chi2_yates(a, b, c, d) -> tuple[np.ndarray, np.ndarray]:
    """Yates-corrected Pearson χ² and its p-value (1 df) for many 2×2 tables (as chi2_contingency)."""
    a, b, c, d = (np.asarray(x, dtype=float) for x in (a, b, c, d))
    n = a + b + c + d
    r1, r2, c1, c2 = a + b, c + d, a + c, b + d
    e = np.stack([r1 * c1, r1 * c2, r2 * c1, r2 * c2]) / n
    # In a 2×2 table every cell deviates from its expectation by the same amount.
    dev = np.maximum(np.abs(a - e[0]) - 0.5, 0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        chi2 = dev**2 * (1.0 / e).sum(axis=0)
    return chi2, stats.chi2.sf(chi2, 1)


def odds_ratio_woolf(a, b, c, d, *, confidence: float = 0.95):
    """Sample odds ratio ad/bc with the Woolf log-scale confidence interval, for many tables at once.

    When any cell of a table is zero, 0.5 is added to all four cells of that table (Haldane 1956), so the
    estimate and its interval stay finite. Otherwise this is the "sample" odds ratio and interval that
    scipy.stats.contingency.odds_ratio reports.

    Args:
        a, b, c, d: cells of each table [[a, b], [c, d]].
        confidence: two-sided confidence level.

    Returns:
        Tuple ``(odds_ratio, ci_low, ci_high)`` of float arrays.

    Example:
        >>> [round(float(x[0]), 2) for x in odds_ratio_woolf([10], [5], [3], [12])]
        [8.0, 1.52, 42.04]
    """
    a, b, c, d = (np.asarray(x, dtype=float) for x in (a, b, c, d))
    zero = (a == 0) | (b == 0) | (c == 0) | (d == 0)
    h = np.where(zero, 0.5, 0.0)
    a, b, c, d = a + h, b + h, c + h, d + h
    log_or = np.log(a) + np.log(d) - np.log(b) - np.log(c)
    se = np.sqrt(1 / a + 1 / b + 1 / c + 1 / d)
    z = stats.norm.ppf(0.5 + confidence / 2)
    return np.exp(log_or), np.exp(log_or - z * se), np.exp(log_or + z * se)


def _as_lot_series(lots, name: str) -> pl.Series:
    if isinstance(lots, pl.Series):
        return lots.cast(pl.String).rename(name).unique()
    return pl.Series(name, [str(x) for x in lots], dtype=pl.String).unique()


def _check_columns(frame: pl.DataFrame, required: Iterable[str], what: str) -> None:
    missing = [c for c in required if c not in frame.columns]
    if missing:
        raise ValueError(
            f"{what}: missing column(s) {', '.join(missing)} (found {', '.join(frame.columns)}, "
            f"expected {', '.join(required)}). Fix: rename or add the column(s) before calling."
        )


def _memberships(history: pl.DataFrame, population: pl.DataFrame) -> tuple[pl.DataFrame, pl.DataFrame, bool]:
    """Integer-coded lot×candidate memberships and the candidates' labels.

    Returns ``memb`` (``cid`` candidate id, ``gid`` step×kind id, ``sid`` step id, ``li`` lot index,
    ``affected``), one row per lot and candidate, and ``labels`` (``cid``, ``gid``, ``sid``, ``step``,
    ``kind``, ``candidate``, ``process_tool``, ``chamber``, ``recipe``). Strings are hashed once into
    categorical codes, so the de-duplication and group-bys run on integers. The flag says whether a lot has
    at most one history row per step (lot-level tracking); only then are the later de-duplications skipped.
    """
    cols = history.columns
    chamber = pl.col("chamber").cast(pl.String) if "chamber" in cols else pl.lit(None, pl.String)
    recipe = pl.col("recipe").cast(pl.String) if "recipe" in cols else pl.lit(None, pl.String)
    base = history.select(
        pl.col("lot_id").cast(pl.String),
        pl.col("step").cast(pl.String),
        pl.col("process_tool").cast(pl.String),
        chamber.alias("chamber"),
        recipe.alias("recipe"),
    ).join(population, on="lot_id", how="inner")

    def code(expr: pl.Expr) -> pl.Expr:
        return expr.cast(pl.Categorical).to_physical().cast(pl.Int64)

    sep = "\x1f"
    base = base.with_columns(
        code(pl.col("step")).alias("sid"),
        code(pl.concat_str(["step", "process_tool"], separator=sep)).alias("c0"),
        code(pl.concat_str(["step", "process_tool", "chamber"], separator=sep)).alias("c1"),
        code(pl.concat_str(["step", "recipe"], separator=sep)).alias("c2"),
    )
    null = pl.lit(None, pl.String)
    label_exprs = {
        "tool": (pl.col("process_tool"), pl.col("process_tool"), null, null),
        "chamber": (
            pl.concat_str(["process_tool", "chamber"], separator="/"),
            pl.col("process_tool"),
            pl.col("chamber"),
            null,
        ),
        "recipe": (pl.col("recipe"), null, null, pl.col("recipe")),
    }
    membs, labels = [], []
    for k, kind in enumerate(KINDS):  # three kinds, not a loop over data
        cid = (pl.col(f"c{k}") + k * 2**32).alias("cid")
        gid = (pl.col("sid") * len(KINDS) + k).alias("gid")
        part = base.filter(pl.col(f"c{k}").is_not_null())
        membs.append(part.select(cid, gid, "sid", "li", "affected"))
        cand_e, tool_e, ch_e, rec_e = label_exprs[kind]
        labels.append(
            part.unique(f"c{k}", keep="any").select(
                cid,
                gid,
                "sid",
                "step",
                pl.lit(kind).alias("kind"),
                cand_e.alias("candidate"),
                tool_e.alias("process_tool"),
                ch_e.alias("chamber"),
                rec_e.alias("recipe"),
            )
        )
    n_lots = population.height
    one_row_per_step = base.height == base.select((pl.col("sid") * n_lots + pl.col("li")).n_unique()).item()
    memb = pl.concat(membs)
    if not one_row_per_step:  # wafer-level history: a lot can repeat a candidate at one step
        memb = memb.unique(["cid", "li"])
    return memb, pl.concat(labels), one_row_per_step


def _value_tests(
    memb: pl.DataFrame, confidence: float, one_row_per_step: bool
) -> tuple[pl.DataFrame, pl.DataFrame]:
    """Welch per candidate (``cid``) and ANOVA/Kruskal–Wallis per step×kind (``gid``).

    ``memb`` holds one row per lot and candidate with the lot's ``value``.
    """
    per_c = memb.group_by("cid").agg(
        pl.col("gid").first(),
        pl.len().alias("nv"),
        pl.col("value").sum().alias("s1"),
        (pl.col("value") ** 2).sum().alias("s2"),
    )
    # Step totals count each lot once, so the rest is exactly the step's lots not through the candidate,
    # even for a split lot whose wafers ran in two chambers.
    per_s = (
        (memb if one_row_per_step else memb.unique(["gid", "li"]))
        .group_by("gid")
        .agg(
            pl.len().alias("Nv"), pl.col("value").sum().alias("S1"), (pl.col("value") ** 2).sum().alias("S2")
        )
    )
    w = per_c.join(per_s, on="gid")
    n1 = w["nv"].to_numpy().astype(float)
    s1 = w["s1"].to_numpy()
    q1 = w["s2"].to_numpy()
    n2 = w["Nv"].to_numpy() - n1
    t1 = w["S1"].to_numpy() - s1
    t2 = w["S2"].to_numpy() - q1
    with np.errstate(divide="ignore", invalid="ignore"):
        m1 = s1 / n1
        m2 = t1 / n2
        v1 = np.maximum(q1 - n1 * m1**2, 0.0) / (n1 - 1)
        v2 = np.maximum(t2 - n2 * m2**2, 0.0) / (n2 - 1)
        se2 = v1 / n1 + v2 / n2
        se = np.sqrt(se2)
        df = se2**2 / ((v1 / n1) ** 2 / (n1 - 1) + (v2 / n2) ** 2 / (n2 - 1))
        tstat = (m1 - m2) / se
    ok = (n1 >= 2) & (n2 >= 2) & (se > 0)
    df_ok = np.where(ok, df, 1.0)
    p = np.where(ok, 2 * stats.t.sf(np.abs(np.where(ok, tstat, 0.0)), df_ok), np.nan)
    tq = np.where(ok, stats.t.ppf(0.5 + confidence / 2, df_ok), np.nan)
    diff = np.where((n1 >= 1) & (n2 >= 1), m1 - m2, np.nan)
    welch = w.select("cid").with_columns(
        pl.Series("n_with_value", n1.astype(np.int64)),
        pl.Series("mean_candidate", np.where(n1 >= 1, m1, np.nan)),
        pl.Series("mean_rest", np.where(n2 >= 1, m2, np.nan)),
        pl.Series("mean_diff", diff),
        pl.Series("mean_diff_ci_low", np.where(ok, diff - tq * se, np.nan)),
        pl.Series("mean_diff_ci_high", np.where(ok, diff + tq * se, np.nan)),
        pl.Series("p_welch", p),
    )

    # One-way ANOVA over the candidates of each step×kind; a split lot counts once in each of its groups.
    a = per_c.group_by("gid").agg(
        pl.len().alias("k"),
        pl.col("nv").sum().alias("N"),
        pl.col("s1").sum().alias("T1"),
        pl.col("s2").sum().alias("T2"),
        (pl.col("s1") ** 2 / pl.col("nv")).sum().alias("B"),
    )
    k = a["k"].to_numpy().astype(float)
    N = a["N"].to_numpy().astype(float)
    T1, T2, B = a["T1"].to_numpy(), a["T2"].to_numpy(), a["B"].to_numpy()
    ssb = B - T1**2 / N
    ssw = T2 - B
    ok_a = (k >= 2) & (N > k) & (ssw > 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        f = np.where(ok_a, (ssb / (k - 1)) / (ssw / (N - k)), np.nan)
    p_anova = np.where(
        ok_a, stats.f.sf(np.where(ok_a, f, 0.0), np.maximum(k - 1, 1), np.maximum(N - k, 1)), np.nan
    )

    # Kruskal–Wallis: mid-ranks within each step×kind and the tie term Σ(t³ − t), from one sort.
    srt = memb.select("gid", "cid", "value").sort(["gid", "value"])
    g, x = srt["gid"].to_numpy(), srt["value"].to_numpy()
    n = g.size
    gnew = np.r_[True, g[1:] != g[:-1]]
    new = gnew | np.r_[True, x[1:] != x[:-1]]
    run_start = np.flatnonzero(new)
    run_len = np.diff(np.r_[run_start, n])
    gstart = np.flatnonzero(gnew)
    gidx = np.cumsum(gnew) - 1
    pos = np.arange(n) - gstart[gidx]
    ranks = np.repeat(pos[run_start] + 1 + (run_len - 1) / 2, run_len)
    tt = np.bincount(gidx[run_start], weights=run_len.astype(float) ** 3 - run_len, minlength=gstart.size)
    rs = (
        srt.with_columns(pl.Series("r", ranks))
        .group_by("cid")
        .agg(pl.col("gid").first(), pl.len().alias("n"), pl.col("r").sum().alias("R"))
    )
    h = rs.group_by("gid").agg(
        pl.len().alias("k"), pl.col("n").sum().alias("N"), (pl.col("R") ** 2 / pl.col("n")).sum().alias("RR")
    )
    ties = pl.DataFrame({"gid": g[gstart], "tt": tt})
    h = h.join(ties, on="gid", how="left")
    kk = h["k"].to_numpy().astype(float)
    NN = h["N"].to_numpy().astype(float)
    with np.errstate(divide="ignore", invalid="ignore"):
        H = 12.0 / (NN * (NN + 1)) * h["RR"].to_numpy() - 3 * (NN + 1)
        H = H / (1 - h["tt"].to_numpy() / (NN**3 - NN))
    ok_h = (kk >= 2) & np.isfinite(H)
    p_kw = np.where(ok_h, stats.chi2.sf(np.where(ok_h, H, 0.0), np.maximum(kk - 1, 1)), np.nan)
    step_tests = (
        a.select("gid")
        .with_columns(pl.Series("p_anova", p_anova))
        .join(h.select("gid").with_columns(pl.Series("p_kruskal", p_kw)), on="gid", how="full", coalesce=True)
    )
    return welch, step_tests


def _aliases(
    memb: pl.DataFrame, cand: pl.DataFrame, n_lots: int, threshold: float, limit: int
) -> pl.DataFrame:
    """For the first ``limit`` candidates in ``cand`` order, the others whose lot sets have Jaccard ≥ threshold."""
    idx = cand.select("cid").with_row_index("ci")
    m = memb.join(idx, on="cid")
    n_c = idx.height
    inc = np.zeros((n_c, n_lots), dtype=np.float32)
    inc[m["ci"].to_numpy(), m["li"].to_numpy()] = 1.0
    size = inc.sum(axis=1)
    top = min(limit, n_c)
    inter = inc[:top] @ inc.T  # exact in float32: counts stay far below 2**24
    union = size[:top, None] + size[None, :] - inter
    with np.errstate(divide="ignore", invalid="ignore"):
        jac = np.where(union > 0, inter / union, 0.0)
    jac[np.arange(top), np.arange(top)] = 0.0
    i, j = np.nonzero(jac >= threshold)
    label = cand.select(pl.format("{} {} at step {}", "kind", "candidate", "step")).to_series().to_numpy()
    pairs = pl.DataFrame(
        {"ci": i.astype(np.uint32), "alias": label[j], "jac": jac[i, j].astype(np.float64)},
        schema={"ci": pl.UInt32, "alias": pl.String, "jac": pl.Float64},
    )
    out = (
        pairs.sort(["ci", "jac", "alias"], descending=[False, True, False])
        .group_by("ci", maintain_order=True)
        .agg(pl.col("alias").alias("aliases"), pl.col("jac").max().alias("alias_jaccard"))
    )
    return idx.join(out, on="ci", how="left").drop("ci")


def rank_commonality(
    history: pl.DataFrame,
    affected_lots,
    *,
    values: pl.DataFrame | None = None,
    reference_lots=None,
    min_expected: float = 5.0,
    confidence: float = 0.95,
    alias_jaccard: float = 0.95,
    most_lots_share: float = 0.80,
    max_alias_candidates: int = 2000,
) -> pl.DataFrame:
    """Rank steps, tools, chambers and recipes by how strongly they separate affected from reference lots.

    Frame contract:
        ``history``: one row per lot (or wafer) and step — ``lot_id``, ``step``, ``process_tool`` (required),
        ``chamber`` and ``recipe`` (optional, may be null). Rows of lots outside the population are ignored.
        ``values`` (optional): one row per lot — ``lot_id``, ``value`` (the charted statistic, e.g. lot mean CD).

    The population is the affected lots plus the reference lots (default: every other lot in ``history``).
    At each step the universe is the population lots that ran that step; a candidate's 2×2 table is
    [[affected through it, reference through it], [affected not through it, reference not through it]].
    Fisher's exact test is used when an expected count is below ``min_expected``, else Yates-corrected χ².
    With ``values``, each candidate's lots are compared to the rest of the step's lots (Welch), and the
    candidates of each step and kind to each other (ANOVA, Kruskal–Wallis). The Benjamini–Hochberg
    adjustment runs over every p-value computed (all candidates, all tests) at once.

    Rows are ranked by the smallest adjusted p-value of the candidate's own tests (association, Welch), then by
    the size of the log odds ratio, then by lots through the candidate.

    Args:
        history: lot process history (see contract).
        affected_lots: lot ids flagged by the excursion.
        values: optional per-lot charted value.
        reference_lots: lot ids to compare against; default every other lot in ``history``.
        min_expected: smallest expected cell count for the χ² test (Cochran's rule of thumb).
        confidence: level of the odds-ratio and mean-difference intervals.
        alias_jaccard: Jaccard similarity of lot sets at or above which two candidates are flagged as aliases.
        most_lots_share: share of the step's lots at or above which a candidate is flagged "ran most lots".
        max_alias_candidates: how many of the top-ranked candidates get the alias check (memory bound).

    Returns:
        One row per candidate: ``rank``, ``step``, ``kind`` (tool/chamber/recipe), ``candidate``,
        ``process_tool``, ``chamber``, ``recipe``, ``n_lots``, ``n_affected``, ``n_reference``,
        ``n_step_lots``, ``n_step_affected``, ``share_of_step``, ``affected_rate`` (share of the candidate's lots that are affected),
        ``affected_rate_rest`` (the same among the step's other lots),
        ``odds_ratio``, ``odds_ratio_ci_low``, ``odds_ratio_ci_high``, ``test`` ("fisher"/"chi2"),
        ``p_assoc``, ``q_assoc``; with values also ``n_with_value``, ``mean_candidate``, ``mean_rest``,
        ``mean_diff``, ``mean_diff_ci_low``, ``mean_diff_ci_high``, ``p_welch``, ``q_welch``,
        ``p_anova``, ``q_anova``, ``p_kruskal``, ``q_kruskal``; then ``q_best``, ``ran_most_lots``,
        ``aliases`` (list of candidate labels), ``alias_jaccard``, ``reason``.

    Raises:
        ValueError: on missing columns, an empty affected set, affected lots without history, or lots both
            affected and reference.

    Example:
        >>> h = pl.DataFrame({
        ...     "lot_id": [f"L{i}" for i in range(20)],
        ...     "step": ["etch"] * 20,
        ...     "process_tool": ["E1"] * 10 + ["E2"] * 10,
        ... })
        >>> out = rank_commonality(h, [f"L{i}" for i in range(8)])
        >>> out.select("rank", "candidate", "n_affected", "n_lots").row(0)
        (1, 'E1', 8, 10)
    """
    _check_columns(history, HISTORY_REQUIRED, "rank_commonality history")
    affected = _as_lot_series(affected_lots, "lot_id")
    if affected.len() == 0:
        raise ValueError(
            "rank_commonality: no affected lots (found 0, expected at least 1). Fix: pass the flagged lot ids."
        )
    all_lots = history.get_column("lot_id").cast(pl.String).unique()
    if reference_lots is None:
        reference = all_lots.filter(~all_lots.is_in(affected.implode()))
    else:
        reference = _as_lot_series(reference_lots, "lot_id")
        both = affected.filter(affected.is_in(reference.implode()))
        if both.len():
            raise ValueError(
                f"rank_commonality: {both.len()} lot(s) are both affected and reference (found e.g. "
                f"{both[0]!r}, expected disjoint sets). Fix: remove them from reference_lots."
            )
    population = pl.concat(
        [
            pl.DataFrame({"lot_id": affected, "affected": True}),
            pl.DataFrame(
                {"lot_id": reference, "affected": False}, schema={"lot_id": pl.String, "affected": pl.Boolean}
            ),
        ]
    ).with_row_index("li")
    memb, labels, one_row_per_step = _memberships(history, population)
    if not memb.get_column("affected").any():
        raise ValueError(
            f"rank_commonality: none of the {affected.len()} affected lots has process history (found e.g. "
            f"{affected[0]!r}, expected lot ids present in history.lot_id). Fix: load the lots' history first."
        )

    cand = memb.group_by("cid").agg(pl.len().alias("n_lots"), pl.col("affected").sum().alias("n_affected"))
    tool_rows = memb.filter(pl.col("gid") % len(KINDS) == 0)  # every history row names a tool
    steps = (
        (tool_rows if one_row_per_step else tool_rows.unique(["sid", "li"]))
        .group_by("sid")
        .agg(pl.len().alias("n_step_lots"), pl.col("affected").sum().alias("n_step_affected"))
    )
    cand = (
        labels.join(cand, on="cid")
        .join(steps, on="sid")
        .with_columns((pl.col("n_lots") - pl.col("n_affected")).alias("n_reference"))
        .sort(["step", "kind", "candidate"])
    )

    a = cand["n_affected"].to_numpy().astype(np.int64)
    b = cand["n_reference"].to_numpy().astype(np.int64)
    c = cand["n_step_affected"].to_numpy().astype(np.int64) - a
    d = (cand["n_step_lots"].to_numpy() - cand["n_step_affected"].to_numpy()).astype(np.int64) - b
    n = a + b + c + d
    degenerate = ((a + b) == 0) | ((c + d) == 0) | ((a + c) == 0) | ((b + d) == 0)
    exp_min = np.minimum(a + b, c + d) * np.minimum(a + c, b + d) / n
    use_fisher = exp_min < min_expected
    p = np.full(a.shape, np.nan)
    chi_rows = np.nonzero(~use_fisher & ~degenerate)[0]
    if chi_rows.size:
        p[chi_rows] = _chi2_yates(a[chi_rows], b[chi_rows], c[chi_rows], d[chi_rows])[1]
    fi = np.nonzero(use_fisher & ~degenerate)[0]
    if fi.size:
        p[fi] = fisher_exact_two_sided(a[fi], b[fi], c[fi], d[fi])
    # A candidate that ran every lot of its step (or a step with no affected lot) is not testable: p stays NaN.
    orr, lo, hi = odds_ratio_woolf(a, b, c, d, confidence=confidence)
    cand = cand.with_columns(
        (pl.col("n_lots") / pl.col("n_step_lots")).alias("share_of_step"),
        (pl.col("n_affected") / pl.col("n_lots")).alias("affected_rate"),
        pl.Series("affected_rate_rest", np.where((c + d) > 0, c / np.maximum(c + d, 1), np.nan)),
        pl.Series("odds_ratio", np.where(degenerate, np.nan, orr)),
        pl.Series("odds_ratio_ci_low", np.where(degenerate, np.nan, lo)),
        pl.Series("odds_ratio_ci_high", np.where(degenerate, np.nan, hi)),
        # zip_with, not np.where(..., None, ...): an all-degenerate object array has no string dtype
        pl.Series("test", np.where(use_fisher, "fisher", "chi2"), dtype=pl.String).zip_with(
            pl.Series(~degenerate), pl.repeat(None, a.shape[0], dtype=pl.String, eager=True)
        ),
        pl.Series("p_assoc", p),
    )

    p_cols = ["p_assoc"]
    if values is not None:
        _check_columns(values, ("lot_id", "value"), "rank_commonality values")
        vals = values.select(pl.col("lot_id").cast(pl.String), pl.col("value").cast(pl.Float64)).drop_nulls()
        vals = vals.filter(pl.col("value").is_finite())
        dup = vals.filter(pl.col("lot_id").is_duplicated())
        if dup.height:
            raise ValueError(
                f"rank_commonality values: lot {dup['lot_id'][0]!r} has {dup.height} rows (found duplicates, "
                "expected one value per lot). Fix: aggregate to one charted value per lot first."
            )
        vals = vals.join(population.select("lot_id", "li"), on="lot_id").select("li", "value")
        welch, step_tests = _value_tests(memb.join(vals, on="li", how="inner"), confidence, one_row_per_step)
        cand = cand.join(welch, on="cid", how="left").join(step_tests, on="gid", how="left")
        p_cols += ["p_welch", "p_anova", "p_kruskal"]

    # One BH over every test: per-candidate tests once per row, per-step tests once per step×kind.
    per_step = ("p_anova", "p_kruskal")
    pools = [
        cand.unique("gid").select("gid", pl.col(col).alias("p"))
        if col in per_step
        else cand.select("cid", pl.col(col).alias("p"))
        for col in p_cols
    ]
    q = adjust_benjamini_hochberg(np.concatenate([x["p"].fill_null(np.nan).to_numpy() for x in pools]))
    pos = 0
    for col, pool in zip(p_cols, pools, strict=True):
        qs = pool.with_columns(pl.Series("q_" + col[2:], q[pos : pos + pool.height])).drop("p")
        pos += pool.height
        cand = cand.join(qs, on="gid" if col in per_step else "cid", how="left")

    own_q = [c for c in ("q_assoc", "q_welch") if c in cand.columns]
    cand = cand.with_columns(
        pl.min_horizontal([pl.col(c).fill_nan(None) for c in own_q]).alias("q_best"),
        (pl.col("share_of_step") >= most_lots_share).alias("ran_most_lots"),
        pl.col("odds_ratio").log().abs().fill_nan(None).alias("_abs_log_or"),
    ).sort(
        ["q_best", "_abs_log_or", "n_lots", "step", "kind", "candidate"],
        descending=[False, True, True, False, False, False],
        nulls_last=True,
    )
    aliases = _aliases(memb, cand, population.height, alias_jaccard, max_alias_candidates)
    cand = (
        cand.join(aliases, on="cid", how="left", maintain_order="left")
        .drop("_abs_log_or", "cid", "gid", "sid")
        .with_row_index("rank", offset=1)
        .with_columns(pl.col("rank").cast(pl.Int64))
    )
    return cand.with_columns(_reason(cand).alias("reason"))


def _fmt(x: float | None, digits: int = 3) -> str:
    if x is None or not np.isfinite(x):
        return "n/a"
    if x != 0 and (abs(x) < 10 ** -(digits - 1) or abs(x) >= 10**4):
        return f"{x:.{digits - 1}e}"
    return f"{x:.{digits}g}"


def _reason(cand: pl.DataFrame) -> pl.Series:
    """One sentence per row saying what the candidate's numbers mean."""
    rows = cand.to_dicts()
    out = []
    for r in rows:  # text formatting only; the statistics above are vectorised
        parts = [
            f"{r['kind']} {r['candidate']} at step {r['step']}: {r['n_affected']} of {r['n_step_affected']} "
            f"affected lots and {r['n_reference']} of {r['n_step_lots'] - r['n_step_affected']} reference lots "
            f"ran it"
        ]
        if r["p_assoc"] is not None and np.isfinite(r["p_assoc"]):
            parts.append(
                f"odds ratio {_fmt(r['odds_ratio'])} ({_fmt(r['odds_ratio_ci_low'])}–{_fmt(r['odds_ratio_ci_high'])}), "
                f"{'Fisher' if r['test'] == 'fisher' else 'χ²'} p={_fmt(r['p_assoc'], 2)}, q={_fmt(r['q_assoc'], 2)}"
            )
        else:
            parts.append("no association test (every lot of the step, or no affected lot, ran it)")
        if r.get("p_welch") is not None and np.isfinite(r["p_welch"]):
            parts.append(
                f"mean value {_fmt(r['mean_diff'])} vs the step's other lots "
                f"({_fmt(r['mean_diff_ci_low'])} to {_fmt(r['mean_diff_ci_high'])}), Welch q={_fmt(r['q_welch'], 2)}"
            )
        if r["ran_most_lots"]:
            parts.append(
                f"ran most lots ({100 * r['share_of_step']:.0f} % of the step); not a finding by itself"
            )
        if r["aliases"]:
            extra = f" and {len(r['aliases']) - 1} more" if len(r["aliases"]) > 1 else ""
            parts.append(
                f"same lots as {r['aliases'][0]}{extra} (Jaccard {r['alias_jaccard']:.2f}); cannot be told apart"
            )
        out.append("; ".join(parts) + ".")
    return pl.Series("reason", out, dtype=pl.String)
