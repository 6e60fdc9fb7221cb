"""Evaluation: every series of the monitoring plan out of the store, through ``spc``, signals back in.

One run is one unit of work (one transaction). Per plan entry:

1. **Which series changed.** A full run (``full=True``, the first run, or a new plan version) reads every
   point of the entry. An incremental run finds the lots whose rows for the entry changed since the last
   run's watermark (the newest ``source_files.file_id`` it covered): new rows, rows superseded by a
   corrected re-export, new process history at the entry's step. Their points are computed twice, from the
   rows current now and from the rows current at the watermark; the difference names the changed points.
2. **Append or recompute.** A series whose changed points are all new and all later than its last
   evaluated point is *appended*: only the new points are evaluated, starting from the stored EWMA / CUSUM
   state and prepended with the last ``spc.rules.context_points`` points for the run rules. Any other
   change (a late point, a changed or vanished point, a new limit version) *recomputes* the series from
   its first point. Either way the signals equal those of a full run.
3. **Limits.** Frozen versions are only read. A series without one is frozen automatically from the plan
   entry's baseline once complete (user ``lotline-auto``); until then only its out-of-spec check runs.
4. **Signals** are written idempotently: a signal is identified by series, point key, rule, value, chart
   statistic and limit version; one no longer found is *withdrawn* (with the reason), never deleted, and
   its successor (e.g. the same point with an EWMA value changed by a late earlier point) is a new row.
5. **Excursions**: new signals join the newest unclosed excursion of their series when at most
   the plan entry's ``excursion_gap`` (default ``EXCURSION_GAP``) unsignalled points lie between them, else
   open a new one (see warehouse.excursions).

Signals advise; the fab's out-of-control action plan (OCAP) and qualified engineers decide.
"""

from __future__ import annotations

import getpass
import json
import time
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass, field, replace
from datetime import UTC, datetime

import polars as pl

from spc.attributes import negbin_sigma
from spc.cusum import CusumParams, evaluate_cusum
from spc.ewma import EwmaParams, evaluate_ewma
from spc.rules import BeyondLimits, context_points, evaluate_rules, rule_params
from warehouse import limits as lim_mod
from warehouse import points as pts_mod
from warehouse import schema, store
from warehouse.errors import ConfigError
from warehouse.plan import DEFAULT_EXCURSION_GAP, PlanEntry, current_plan, current_plan_version

EXCURSION_GAP = DEFAULT_EXCURSION_GAP
"""Unsignalled points allowed between two signals of one excursion, where the plan entry sets no
``excursion_gap``."""
WITHDRAWN_SUPERSEDED = "point's data superseded or moved (corrected re-export or new process history)"
WITHDRAWN_CHANGED = "point's value changed (corrected re-export)"
WITHDRAWN_CHART_REMOVED = "chart removed from the monitoring plan"
WITHDRAWN_NOT_FOUND = (
    "not found on re-evaluation (limits re-frozen, or earlier points changed the chart statistic)"
)
CHART_POINTS_RUN = "chart_points_run"
"""meta key: the evaluation run whose points ``chart_points`` holds. A warehouse whose last run predates the
table (migration 4) has none, and its next run is a full one, which fills the table."""
CHART_POINT_COLUMNS = (
    "seq",
    "point_key",
    "lot_id",
    "wafer_id",
    "point_at",
    "value",
    "n",
    "center",
    "sigma",
    "lcl",
    "ucl",
    "limit_version",
)
"""Columns of :func:`series_points` (queries.series_points)."""


@dataclass
class RunSummary:
    """What one evaluation did (JSON-friendly via ``as_dict``)."""

    mode: str
    plan_version: int
    watermark_file_id: int
    series: int = 0
    series_appended: int = 0
    series_recomputed: int = 0
    points: int = 0
    signals_new: int = 0
    signals_withdrawn: int = 0
    limits_frozen: int = 0
    waiting_for_baseline: int = 0
    excursions_opened: int = 0
    seconds: float = 0.0
    notices: list[str] = field(default_factory=list)

    def as_dict(self) -> dict:
        """The summary as a plain dict."""
        return dict(self.__dict__)


def _now() -> datetime:
    return datetime.now(UTC).replace(tzinfo=None)


def _user() -> str:
    try:
        return getpass.getuser()
    except Exception:  # noqa: BLE001 - no login name in some containers
        return "unknown"


def evaluate_warehouse(
    path=None, *, full: bool = False, user: str | None = None, wait_s: float = store.DEFAULT_WAIT_S
) -> RunSummary:
    """Evaluate every series of the plan in force; return what was done.

    Example:
        >>> evaluate_warehouse("lotline.duckdb").signals_new  # doctest: +SKIP
        3
    """
    with store.open_warehouse(path, wait_s=wait_s) as con:
        return _evaluate_unit(con, full=full, user=user or _user())


def _evaluate_unit(con, *, full: bool, user: str) -> RunSummary:
    """One evaluation in its own transaction on an open read-write connection (bumps the data version)."""
    with store.transaction(con):
        summary = evaluate_connection(con, full=full, user=user)
        store.bump_data_version(con)
    return summary


def evaluate_connection(con, *, full: bool = False, user: str = "unknown") -> RunSummary:
    """Evaluate inside an open connection (the caller owns the transaction)."""
    t0 = time.perf_counter()
    plan = current_plan(con)
    if plan is None:
        raise ConfigError("no monitoring plan is loaded", fix="run `lotline plan load PLAN.toml` first")
    version = current_plan_version(con)
    last = con.execute(
        "SELECT watermark_file_id, plan_version FROM evaluation_runs ORDER BY run_id DESC LIMIT 1"
    ).fetchall()
    wm_new = int(con.execute("SELECT coalesce(max(file_id), 0) FROM source_files").fetchall()[0][0])
    full = full or not last or int(last[0][1]) != version or not _chart_points_written(con)
    wm_old = 0 if not last else int(last[0][0])
    started = _now()
    s = RunSummary("full" if full else "incremental", version, wm_new)
    # An incremental run's reads (what changed, then each entry's points of the changed lots) run on
    # cursors in background threads, overlapping the lot index update, the per-entry computation and the
    # writes on ``con`` (the only connection that writes). Cursors see the committed warehouse; evaluation
    # writes no fact, so they read what ``con`` would. Full reads stay sequential, to hold one entry's
    # points in memory at a time.
    with ThreadPoolExecutor(max_workers=READ_THREADS, thread_name_prefix="lotline-read") as pool:
        changes = (
            None if full else pool.submit(_on_cursor, con.cursor(), pts_mod.read_changes, watermark=wm_old)
        )
        pts_mod.update_lot_index(con)
        ctx = _Context(con, started, user, s)
        ctx.changes = {} if changes is None else changes.result()
        reads = [_start_reads(ctx, pool, e, full=full, watermark=wm_old) for e in plan.entries]
        for e, r in zip(plan.entries, reads, strict=True):
            _evaluate_entry(ctx, e, r, watermark=wm_old)
    if full:
        _withdraw_removed_charts(ctx, [e.name for e in plan.entries])
    _flush(ctx)
    from warehouse import excursions

    gaps = {e.name: e.excursion_gap for e in plan.entries}
    s.excursions_opened = excursions.group_signals(
        con,
        series_ids=sorted(ctx.touched),
        now=started,
        gap=EXCURSION_GAP,
        gaps={sid: gaps[chart] for (chart, *_), sid in ctx.series.items() if chart in gaps},
        any_withdrawn=s.signals_withdrawn > 0,
    )
    s.series = len(ctx.touched)
    run_id = con.execute("SELECT nextval('run_id_seq')").fetchall()[0][0]
    con.execute(
        "INSERT INTO evaluation_runs VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
        [
            run_id,
            started,
            _now(),
            s.mode,
            version,
            wm_new,
            s.series,
            s.points,
            s.signals_new,
            s.signals_withdrawn,
            user,
        ],
    )
    con.execute("DELETE FROM meta WHERE key = ?", [CHART_POINTS_RUN])
    con.execute("INSERT INTO meta VALUES (?, ?)", [CHART_POINTS_RUN, str(run_id)])
    s.seconds = round(time.perf_counter() - t0, 3)
    return s


READ_THREADS = 2
"""Background threads for an incremental run's reads (each on its own cursor)."""


def _on_cursor(cur, fn, *args, **kw):
    """``fn(cur, ...)`` in a background thread; closes the cursor afterwards."""
    try:
        return fn(cur, *args, **kw)
    finally:
        cur.close()


@dataclass
class _EntryReads:
    """An entry's reads of an incremental run, decided (and started) before the entries are evaluated."""

    full: bool
    lots: pl.DataFrame | None = None  # changed lots (lot_id, first_file_id); None when full
    min_file_id: int = 0
    needs_old: bool = False  # some changed lot was evaluated before: read its points as of the watermark
    new: Future | None = None
    old: Future | None = None


def _start_reads(ctx: _Context, pool: ThreadPoolExecutor, e: PlanEntry, *, full: bool, watermark: int):
    """Which of the entry's points to read; starts the reads of changed lots in ``pool``."""
    if full:
        return _EntryReads(full=True)
    lots, spec_changed = pts_mod.changed_lots(e, ctx.changes)
    if spec_changed:
        return _EntryReads(full=True)
    first = lots.filter(pl.col("first_file_id").is_not_null())
    r = _EntryReads(
        full=False,
        lots=lots,
        min_file_id=int(first["first_file_id"].min()) if first.height else watermark + 1,
        # when every changed lot is new since the last run, nothing of it was evaluated before
        needs_old=first.filter(pl.col("first_file_id") <= watermark).height > 0,
    )
    if lots.height:  # no changed lot: nothing to read (limits re-frozen alone read what they recompute)
        dirty = lots.select("lot_id")
        kw = {"dirty_lots": dirty, "min_file_id": r.min_file_id}
        r.new = pool.submit(_on_cursor, ctx.con.cursor(), pts_mod.read_points, e, **kw)
        if r.needs_old:
            r.old = pool.submit(
                _on_cursor, ctx.con.cursor(), pts_mod.read_points, e, scope="as_of", watermark=watermark, **kw
            )
    return r


def _chart_points_written(con) -> bool:
    return bool(con.execute("SELECT 1 FROM meta WHERE key = ?", [CHART_POINTS_RUN]).fetchall())


class _Context:
    def __init__(self, con, now: datetime, user: str, summary: RunSummary) -> None:
        self.con, self.now, self.user, self.s = con, now, user, summary
        self.touched: set[int] = set()
        self.changes: dict[str, pl.DataFrame] = {}
        self.pending_state: list[pl.DataFrame] = []
        self.pending_signals: list[pl.DataFrame] = []
        self.pending_points: list[pl.DataFrame] = []  # chart_points rows, written by _flush
        self.replaced_points: set[int] = set()  # series whose stored points _flush deletes first
        self.limits = lim_mod.current_limits(con)
        rows = con.execute(
            "SELECT series_id, chart, layer, parameter, split_json FROM chart_series"
        ).fetchall()
        self.series = {(r[1], r[2], r[3], r[4]): r[0] for r in rows}
        st = pts_mod.fetch_frame(con.sql("SELECT * FROM series_state"))
        self.state = {r["series_id"]: r for r in st.to_dicts()}


def _withdraw_removed_charts(ctx: _Context, names: list[str]) -> None:
    """Withdraw standing signals of series whose chart is no longer in the plan (kept, with the reason)."""
    gone = sorted(sid for (chart, *_), sid in ctx.series.items() if chart not in names)
    if not gone:
        return
    frame = pl.DataFrame({"series_id": gone}, schema={"series_id": pl.Int64})
    ctx.con.register("gone", pts_mod.ArrowSource(frame))
    try:
        n = ctx.con.execute(
            "UPDATE signals SET withdrawn_at = ?, withdrawn_reason = ? WHERE withdrawn_at IS NULL "
            "AND series_id IN (SELECT series_id FROM gone)",
            [ctx.now, WITHDRAWN_CHART_REMOVED],
        ).fetchall()
    finally:
        ctx.con.unregister("gone")
    withdrawn = int(n[0][0]) if n else 0
    ctx.replaced_points.update(gone)
    if withdrawn:
        ctx.s.signals_withdrawn += withdrawn
        ctx.touched.update(gone)


# ------------------------------------------------------------------------------------------ per entry


def _attach_series(ctx: _Context, e: PlanEntry, pts: pl.DataFrame, *, create: bool) -> pl.DataFrame:
    """Add a ``series_id`` column (creating chart_series rows for new series when ``create``)."""
    scols = pts_mod.series_columns(e)
    if pts.height == 0:
        return pts.with_columns(pl.lit(None, pl.Int64).alias("series_id"))
    keys = pts.select(scols).unique(maintain_order=True)
    rows = keys.to_dicts()
    wanted = [(e.name, r["layer"], r["parameter"], pts_mod.split_json(e, r)) for r in rows]
    missing = [i for i, k in enumerate(wanted) if k not in ctx.series]
    if missing and create:
        new_ids = [
            r[0]
            for r in ctx.con.execute(
                "SELECT nextval('series_id_seq') FROM range(?) ORDER BY range", [len(missing)]
            ).fetchall()
        ]
        recs = []
        for i, sid in zip(missing, new_ids, strict=True):
            r, k = rows[i], wanted[i]
            ctx.series[k] = sid
            recs.append(
                {
                    "series_id": sid,
                    "chart": e.name,
                    "layer": r["layer"],
                    "parameter": r["parameter"],
                    "split_json": k[3],
                    "process_tool": r.get("process_tool"),
                    "chamber": r.get("chamber"),
                    "metrology_tool": r.get("metrology_tool") if "metrology_tool" in e.split else None,
                    "product": r.get("product") if "product" in e.split else None,
                    "created_at": ctx.now,
                }
            )
        frame = pl.DataFrame(recs, schema=schema.polars_schema(schema.CHART_SERIES))
        ctx.con.register("new_series", pts_mod.ArrowSource(frame))
        ctx.con.execute("INSERT INTO chart_series BY NAME SELECT * FROM new_series")
        ctx.con.unregister("new_series")
    ids = [ctx.series.get(k) for k in wanted]
    keys = keys.with_columns(pl.Series("series_id", ids, dtype=pl.Int64))
    return pts.join(keys, on=scols, how="left", nulls_equal=True, maintain_order="left")


def _evaluate_entry(ctx: _Context, e: PlanEntry, reads: _EntryReads, *, watermark: int) -> None:
    con = ctx.con
    # series whose limits were re-frozen since their last evaluation are recomputed even without new data
    refrozen = {
        sid
        for (chart, *_), sid in ctx.series.items()
        if chart == e.name
        and sid in ctx.limits
        and (ctx.state.get(sid) or {}).get("limit_version") != ctx.limits[sid]["version"]
    }
    if reads.full:
        pts = _attach_series(ctx, e, pts_mod.read_points(con, e), create=True)
        known = {sid for (chart, *_), sid in ctx.series.items() if chart == e.name}
        recompute = sorted(set(pts["series_id"].unique().to_list()) | known)
        _recompute(ctx, e, pts, recompute)
        return
    lots = reads.lots
    if lots.height == 0 and not refrozen:
        return
    kw = {"dirty_lots": lots.select("lot_id"), "min_file_id": reads.min_file_id}
    new = reads.new.result() if reads.new is not None else pts_mod.read_points(con, e, **kw)
    new = _attach_series(ctx, e, new, create=True)
    if reads.needs_old:
        old = (
            reads.old.result()
            if reads.old is not None
            else pts_mod.read_points(con, e, scope="as_of", watermark=watermark, **kw)
        )
        old = _attach_series(ctx, e, old, create=False).filter(pl.col("series_id").is_not_null())
        key = ["series_id", "point_key"]
        cmp = ["series_id", "point_key", "value", "lsl", "usl", "vmin", "vmax"]
        added = new.join(old.select(cmp), on=cmp, how="anti", nulls_equal=True)
        removed = old.join(new.select(cmp), on=cmp, how="anti", nulls_equal=True)
        must = set(removed["series_id"].to_list()) | set(
            added.join(old.select(key), on=key, how="semi")["series_id"].to_list()
        )
    else:  # no changed lot was evaluated before: every point is new, none changed or vanished
        added, must = new, set()
    append, recompute = [], set(must) | refrozen
    firsts = added.group_by("series_id").agg(
        pl.col("point_at").min().alias("t"),
        pl.col("point_key").sort_by("point_at", "point_key").first().alias("k"),
    )
    for sid, t, k in firsts.iter_rows():
        if sid in must:
            continue
        st, lim = ctx.state.get(sid), ctx.limits.get(sid)
        if (
            st is None
            or lim is None
            or st["limit_version"] != lim["version"]
            or st["last_point_at"] is None
            or (t, k) <= (st["last_point_at"], st["last_point_key"])
        ):
            recompute.add(sid)
        else:
            append.append(sid)
    if recompute:
        known = _series_keys(ctx, e, sorted(recompute))
        wanted = known.unique().drop("series_id")
        pts = _attach_series(ctx, e, pts_mod.read_points(con, e, wanted=wanted), create=True)
        _recompute(ctx, e, pts, sorted(recompute))
    if append:
        _append(ctx, e, added.filter(pl.col("series_id").is_in(append)), append)


def with_limits(limits: dict[int, dict], e: PlanEntry, pts: pl.DataFrame) -> pl.DataFrame:
    """Add center, sigma and limit_version from the version in force (nulls where none is frozen).

    ``limits`` maps series_id to its limit version in force (``limits.current_limits``: version, center,
    sigma, n_ref, overdispersion); ``pts`` is a points frame with a ``series_id`` column.
    """
    sids = pts["series_id"].unique().to_list()
    rows = [
        (
            sid,
            limits[sid]["version"],
            limits[sid]["center"],
            limits[sid]["sigma"],
            limits[sid]["n_ref"],
            limits[sid]["overdispersion"],
        )
        for sid in sids
        if sid in limits
    ]
    lim = pl.DataFrame(
        rows,
        schema={
            "series_id": pl.Int64,
            "limit_version": pl.Int64,
            "center": pl.Float64,
            "_sigma": pl.Float64,
            "_n_ref": pl.Float64,
            "_sz": pl.Float64,
        },
        orient="row",
    )
    out = pts.join(lim, on="series_id", how="left", maintain_order="left")
    if e.chart == "negbin_u":
        # the model's SD of the density at the point's area, and its probability limits (chart_signals)
        k = float(e.params.get("k", 3.0))
        ucl, lcl, sd = _negbin_columns(out, center="center", inv_alpha="_sz", area="area_cm2", k=k)
        out = out.with_columns(lcl, ucl)
        sigma = pl.when(pl.col("_n_ref").is_not_null()).then(sd).otherwise(pl.col("_sigma"))
    elif e.chart in ("u", "laney_u"):
        # sigma of one point varies with its inspected area (lim_mod.point_sigma, row-wise)
        sigma = (
            pl.when(pl.col("_n_ref").is_not_null())
            .then((pl.col("center") / pl.col("area_cm2")).sqrt() * pl.col("_sz").fill_null(1.0))
            .otherwise(pl.col("_sigma"))
        )
    else:
        sigma = pl.col("_sigma")
    return out.with_columns(sigma.alias("sigma")).drop("_sigma", "_n_ref", "_sz")


def _negbin_columns(frame: pl.DataFrame, *, center: str, inv_alpha: str, area: str, k):
    """(ucl, lcl, sigma) of negbin_u points as Polars series (``limits.negbin_point_limits``)."""
    c = frame[center].cast(pl.Float64).to_numpy()
    ia = frame[inv_alpha].cast(pl.Float64).fill_null(0.0).to_numpy()
    a = frame[area].cast(pl.Float64).to_numpy()
    lcl, ucl = lim_mod.negbin_point_limits(c, ia, a, k)
    return pl.Series("ucl", ucl), pl.Series("lcl", lcl), pl.Series("sigma", negbin_sigma(c, ia, a))


def _freeze_missing(ctx: _Context, e: PlanEntry, pts: pl.DataFrame, series: list[int]) -> None:
    bases = {}
    for sid in series:
        if sid in ctx.limits:
            continue
        base = lim_mod.baseline_points(e, pts.filter(pl.col("series_id") == sid))
        if base is None:
            ctx.s.waiting_for_baseline += 1
            continue
        bases[sid] = base
    sites = _baseline_sites(ctx, e, bases)
    frozen: list[tuple[int, dict]] = []
    for sid, base in bases.items():
        try:
            est = lim_mod.estimate_limits(e, base, sites.get(sid))
        except lim_mod.LimitsError as exc:
            ctx.s.notices.append(f"chart {e.name} series {sid}: limits not frozen: {exc.what}")
            continue
        frozen.append((sid, est))
        ctx.limits[sid] = {**est, "version": 1}
        ctx.s.limits_frozen += 1
    lim_mod.insert_first_versions(
        ctx.con,
        frozen,
        user=lim_mod.AUTO_USER,
        now=ctx.now,
        reason=f"automatic Phase I freeze from the plan baseline {json.dumps(e.baseline)}",
    )


def _baseline_sites(ctx: _Context, e: PlanEntry, bases: dict[int, pl.DataFrame]) -> dict[int, pl.DataFrame]:
    """Site values (lot_id, wafer_id, value) of each series' baseline points, for variance components."""
    if not bases or e.is_defect or e.statistic not in ("site_value", "wafer_mean", "lot_mean"):
        return {}
    if e.statistic == "site_value":
        return {sid: b.select("lot_id", "wafer_id", "value") for sid, b in bases.items()}
    site_entry = replace(e, statistic="site_value", spec_check=False)
    lots = pl.concat([b.select("lot_id") for b in bases.values()]).unique()
    wanted = _series_keys(ctx, e, sorted(bases)).drop("series_id")
    rows = _attach_series(
        ctx, e, pts_mod.read_points(ctx.con, site_entry, dirty_lots=lots, wanted=wanted), create=False
    )
    parts = pl.col("point_key").str.split("|")
    if e.statistic == "wafer_mean":
        key = pl.concat_str([parts.list.get(0), parts.list.get(1), parts.list.get(5)], separator="|")
    else:
        key = pl.concat_str([parts.list.get(0), parts.list.get(5)], separator="|")
    rows = rows.with_columns(key.alias("_pk"))
    out = {}
    for sid, b in bases.items():
        keep = b.select(pl.col("point_key").alias("_pk"))
        out[sid] = (
            rows.filter(pl.col("series_id") == sid)
            .join(keep, on="_pk", how="semi")
            .select("lot_id", "wafer_id", "value")
        )
    return out


def _rules(e: PlanEntry) -> list:
    k = float(e.params.get("k", 3.0))
    return [
        rule_params(r, k=k) if isinstance(rule_params(r), BeyondLimits) else rule_params(r) for r in e.rules
    ]


def chart_signals(
    e: PlanEntry, pts: pl.DataFrame, *, state: pl.DataFrame | None, context: pl.DataFrame | None
):
    """Signals of one plan entry's points and the final EWMA / CUSUM state per series.

    ``pts`` holds numbered points (``seq``) with their limits (:func:`with_limits`); the control rules run
    on points with a limit version, the out-of-spec check on all. ``state`` (series, ewma_z, ewma_count,
    s_hi, s_lo) continues EWMA / CUSUM from earlier points and ``context`` (series, seq, value, center,
    sigma) prepends earlier points for the run rules; both None for a series evaluated from its first
    point. Returns ``(signals, ewma_state, cusum_state)``; a state is None when the chart has none.
    """
    pass_cols = ["point_key", "lot_id", "wafer_id", "point_at", "point_value", "limit_version"]
    out = []
    limited = pts.filter(pl.col("limit_version").is_not_null()).with_columns(
        pl.col("value").alias("point_value")
    )
    ew = cu = None
    if limited.height:
        frame = limited.rename({"series_id": "series"})
        if e.chart == "negbin_u":  # rule 1 on probability limits (plan validation allows no other rule)
            beyond = frame.filter((pl.col("value") > pl.col("ucl")) | (pl.col("value") < pl.col("lcl")))
            rule1 = beyond.select("series", "seq", pl.lit("we1").alias("rule"), "value", *pass_cols)
            out.append(rule1.with_columns(pl.lit(None, pl.Float64).alias("statistic")))
        else:
            ew, cu = _rules_and_charts(e, frame, out, pass_cols, state=state, context=context)
    oos = pts.filter(
        (pl.col("lsl").is_not_null() & (pl.col("vmin") < pl.col("lsl")))
        | (pl.col("usl").is_not_null() & (pl.col("vmax") > pl.col("usl")))
    )
    if oos.height:
        out.append(
            oos.select(
                pl.col("series_id").alias("series"),
                "seq",
                pl.lit("oos").alias("rule"),
                "value",
                "point_key",
                "lot_id",
                "wafer_id",
                "point_at",
                pl.col("value").alias("point_value"),
                pl.lit(None, pl.Int64).alias("limit_version"),
                pl.when(pl.col("lsl").is_not_null() & (pl.col("vmin") < pl.col("lsl")))
                .then(pl.col("vmin"))
                .otherwise(pl.col("vmax"))
                .alias("statistic"),
            )
        )
    cols = [
        "series",
        "seq",
        "rule",
        "value",
        "statistic",
        "point_key",
        "lot_id",
        "wafer_id",
        "point_at",
        "limit_version",
    ]
    sig = (
        pl.concat([o.select(cols) for o in out], how="vertical_relaxed")
        if out
        else pl.DataFrame(schema={c: pl.Int64 for c in cols})
    )
    return sig, ew, cu


def _rules_and_charts(e: PlanEntry, frame: pl.DataFrame, out: list, pass_cols: list[str], *, state, context):
    """Run rules, EWMA and CUSUM of limited points (``frame``, column ``series``); append their signals to
    ``out``; return the final (ewma_state, cusum_state)."""
    ew = cu = None
    rules = _rules(e)
    rin = (
        frame
        if context is None or context.height == 0
        else pl.concat([context, frame], how="diagonal_relaxed")
    )
    rs = evaluate_rules(
        rin.select(["series", "seq", "value", "center", "sigma", *pass_cols]),
        rules,
        passthrough=pass_cols,
    )
    if context is not None and context.height:
        rs = rs.join(frame.select("series", "seq"), on=["series", "seq"], how="semi")
    out.append(rs.with_columns(pl.lit(None, pl.Float64).alias("statistic")))
    base = frame.select(["series", "seq", "value", "center", "sigma", *pass_cols])
    if e.chart == "ewma":
        p = EwmaParams(lam=float(e.params["lambda"]), L=float(e.params["L"]), limits=str(e.params["limits"]))
        r = evaluate_ewma(base, p, state=state, passthrough=pass_cols)
        out.append(_statistic_signals(r.signals))
        ew = r.state
    if e.chart == "cusum":
        p = CusumParams(
            k=float(e.params["cusum_k"]), h=float(e.params["h"]), headstart=float(e.params["headstart"])
        )
        r = evaluate_cusum(base, p, state=state, passthrough=pass_cols)
        out.append(_statistic_signals(r.signals))
        cu = r.state
    return ew, cu


def _statistic_signals(signals: pl.DataFrame) -> pl.DataFrame:
    """EWMA / CUSUM signals in the run's signal columns: the chart statistic as ``statistic``, the point's
    own value as ``value``."""
    return (
        signals.rename({"value": "statistic"})
        .rename({"point_value": "value"})
        .with_columns(pl.col("value").alias("point_value"))
    )


def _recompute(ctx: _Context, e: PlanEntry, pts: pl.DataFrame, series: list[int]) -> None:
    pts = pts.filter(pl.col("series_id").is_in(series))
    pts = pts.with_columns((pl.int_range(pl.len()).over("series_id") + 1).cast(pl.Int64).alias("seq"))
    _freeze_missing(ctx, e, pts, series)
    pts = with_limits(ctx.limits, e, pts)
    sig, ew, cu = chart_signals(e, pts, state=None, context=None)
    _write_state(ctx, e, pts, series, ew, cu, base_state=None)
    ctx.replaced_points.update(series)
    ctx.pending_points.append(_chart_point_rows(ctx, e, pts))
    _reconcile(ctx, e, sig, pts, series, recompute=True)
    ctx.s.series_recomputed += len(series)
    ctx.s.points += pts.height
    ctx.touched.update(series)


def _append(ctx: _Context, e: PlanEntry, pts: pl.DataFrame, series: list[int]) -> None:
    start = pl.DataFrame(
        {"series_id": series, "n0": [ctx.state[s]["n_points"] for s in series]},
        schema={"series_id": pl.Int64, "n0": pl.Int64},
    )
    pts = pts.sort(["series_id", "point_at", "point_key"]).join(start, on="series_id", how="left")
    pts = pts.with_columns((pl.int_range(pl.len()).over("series_id") + 1 + pl.col("n0")).alias("seq")).drop(
        "n0"
    )
    pts = with_limits(ctx.limits, e, pts)
    state = pl.DataFrame(
        {
            "series": series,
            "ewma_z": [ctx.state[s]["ewma"] for s in series],
            "ewma_count": [ctx.state[s]["n_points"] for s in series],
            "s_hi": [ctx.state[s]["cusum_hi"] for s in series],
            "s_lo": [ctx.state[s]["cusum_lo"] for s in series],
        },
        schema={
            "series": pl.Int64,
            "ewma_z": pl.Float64,
            "ewma_count": pl.Int64,
            "s_hi": pl.Float64,
            "s_lo": pl.Float64,
        },
    )
    ctx_rows = []
    for s in series:
        for c in json.loads(ctx.state[s]["context_json"] or "[]"):
            ctx_rows.append({"series": s, **c})
    context = (
        pl.DataFrame(
            ctx_rows,
            schema={
                "series": pl.Int64,
                "seq": pl.Int64,
                "value": pl.Float64,
                "center": pl.Float64,
                "sigma": pl.Float64,
            },
        )
        if ctx_rows
        else None
    )
    sig, ew, cu = chart_signals(e, pts, state=state, context=context)
    _write_state(ctx, e, pts, series, ew, cu, base_state=ctx.state, context=context)
    ctx.pending_points.append(_chart_point_rows(ctx, e, pts))
    _reconcile(ctx, e, sig, pts, series, recompute=False)
    ctx.s.series_appended += len(series)
    ctx.s.points += pts.height
    ctx.touched.update(series)


def _write_state(ctx, e, pts, series, ew, cu, *, base_state, context=None) -> None:
    need = context_points(_rules(e))
    limited = pts.filter(pl.col("limit_version").is_not_null())
    frames = [limited.select(pl.col("series_id").alias("series"), "seq", "value", "center", "sigma")]
    if context is not None and context.height:
        frames.insert(0, context.select("series", "seq", "value", "center", "sigma"))
    allp = pl.concat(frames, how="vertical_relaxed")
    tail = (
        allp.sort("series", "seq").group_by("series", maintain_order=True).tail(need)
        if need
        else allp.clear()
    )
    groups: dict[int, list[dict]] = {}
    for sid, seq, value, center, sigma in tail.select(
        "series", "seq", "value", "center", "sigma"
    ).iter_rows():
        groups.setdefault(sid, []).append({"seq": seq, "value": value, "center": center, "sigma": sigma})
    ctx_json = {sid: json.dumps(rows) for sid, rows in groups.items()}
    last = (
        pts.sort("series_id", "point_at", "point_key")
        .group_by("series_id", maintain_order=True)
        .agg(
            pl.col("point_at").last(),
            pl.col("point_key").last(),
            pl.col("seq").max(),
            pl.col("limit_version").last(),
        )
    )
    lastd = {r["series_id"]: r for r in last.to_dicts()}
    ewd = {r["series"]: r for r in ew.to_dicts()} if ew is not None else {}
    cud = {r["series"]: r for r in cu.to_dicts()} if cu is not None else {}
    rows = []
    for sid in series:
        prev = (base_state or {}).get(sid) or {}
        lr = lastd.get(sid)
        lim = ctx.limits.get(sid)
        rows.append(
            {
                "series_id": sid,
                "limit_version": lim["version"] if lim else None,
                "last_point_at": lr["point_at"] if lr else prev.get("last_point_at"),
                "last_point_key": lr["point_key"] if lr else prev.get("last_point_key"),
                "n_points": int(lr["seq"]) if lr else int(prev.get("n_points") or 0),
                "ewma": ewd[sid]["ewma_z"] if sid in ewd else prev.get("ewma"),
                "cusum_hi": cud[sid]["s_hi"] if sid in cud else prev.get("cusum_hi"),
                "cusum_lo": cud[sid]["s_lo"] if sid in cud else prev.get("cusum_lo"),
                "context_json": ctx_json.get(sid, prev.get("context_json") if base_state else None),
                "evaluated_at": ctx.now,
            }
        )
    frame = pl.DataFrame(
        rows,
        schema={
            "series_id": pl.Int64,
            "limit_version": pl.Int64,
            "last_point_at": pl.Datetime("us"),
            "last_point_key": pl.String,
            "n_points": pl.Int64,
            "ewma": pl.Float64,
            "cusum_hi": pl.Float64,
            "cusum_lo": pl.Float64,
            "context_json": pl.String,
            "evaluated_at": pl.Datetime("us"),
        },
    )
    ctx.pending_state.append(frame)  # written once per run by _flush
    for r in frame.to_dicts():
        ctx.state[r["series_id"]] = r


def _chart_point_rows(ctx: _Context, e: PlanEntry, pts: pl.DataFrame) -> pl.DataFrame:
    """chart_points rows of evaluated points: limits per point exactly as :func:`series_points` computes them
    (``limits.point_sigma``: on u charts sigma varies with the inspected area), vectorised over series."""
    sids = pts["series_id"].unique().to_list()
    lim = pl.DataFrame(
        [
            (
                sid,
                ctx.limits[sid]["version"],
                ctx.limits[sid]["center"],
                ctx.limits[sid]["sigma"],
                ctx.limits[sid]["k_sigma"],
                ctx.limits[sid]["n_ref"],
                ctx.limits[sid]["overdispersion"],
            )
            for sid in sids
            if sid in ctx.limits
        ],
        schema={
            "series_id": pl.Int64,
            "limit_version": pl.Int64,
            "center": pl.Float64,
            "_sigma": pl.Float64,
            "_k": pl.Float64,
            "_n_ref": pl.Float64,
            "_sz": pl.Float64,
        },
        orient="row",
    )
    out = pts.select(
        "series_id", "seq", "point_key", "lot_id", "wafer_id", "point_at", "value", "n", "area_cm2"
    )
    out = out.join(lim, on="series_id", how="left", maintain_order="left")
    sigma = pl.col("_sigma")
    if e.chart in ("u", "laney_u"):
        sz = pl.when(pl.col("_sz").is_null() | (pl.col("_sz") == 0)).then(1.0).otherwise(pl.col("_sz"))
        area = pl.col("area_cm2").cast(pl.Float64)
        sigma = (
            pl.when(pl.col("_n_ref").is_not_null())
            .then((pl.col("center") / area).sqrt() * sz)
            .otherwise(sigma)
        )
    if e.chart == "negbin_u":
        ucl, lcl, sd = _negbin_columns(out, center="center", inv_alpha="_sz", area="area_cm2", k=out["_k"])
        out = out.with_columns(
            pl.when(pl.col("_n_ref").is_not_null()).then(sd).otherwise(sigma).alias("sigma")
        )
        out = out.with_columns(lcl, ucl)
    else:
        out = out.with_columns(sigma.alias("sigma")).with_columns(*lim_mod.point_limits(e, pl.col("_k")))
    types = schema.polars_schema(schema.CHART_POINTS)
    return out.select(pl.col(c).cast(t) for c, t in types.items())


def _flush(ctx: _Context) -> None:
    """Write the run's series states, appended signals and chart points in one statement each."""
    con = ctx.con
    if ctx.replaced_points:
        gone = pl.DataFrame({"series_id": sorted(ctx.replaced_points)}, schema={"series_id": pl.Int64})
        con.register("replaced_series", pts_mod.ArrowSource(gone))
        try:
            con.execute("DELETE FROM chart_points WHERE series_id IN (SELECT series_id FROM replaced_series)")
        finally:
            con.unregister("replaced_series")
    if ctx.pending_points:
        con.register("new_points", pts_mod.ArrowSource(pl.concat(ctx.pending_points)))
        try:  # in series order, so that one chart's read is a range scan over few row groups
            con.execute("INSERT INTO chart_points BY NAME SELECT * FROM new_points ORDER BY series_id, seq")
        finally:
            con.unregister("new_points")
    if ctx.pending_state:
        con.register("new_state", pts_mod.ArrowSource(pl.concat(ctx.pending_state)))
        try:
            con.execute("DELETE FROM series_state WHERE series_id IN (SELECT series_id FROM new_state)")
            con.execute("INSERT INTO series_state BY NAME SELECT * FROM new_state")
        finally:
            con.unregister("new_state")
    if ctx.pending_signals:
        con.register("cand", pts_mod.ArrowSource(pl.concat(ctx.pending_signals)))
        try:
            n = con.execute(
                """INSERT INTO signals
SELECT nextval('signal_id_seq'), c.series_id, c.point_key, c.lot_id, c.wafer_id, c.point_at, c.point_seq, c.rule,
       c.value, c.statistic, c.limit_version, c.severity, ?, NULL, NULL, NULL
FROM cand c ORDER BY c.series_id, c.point_seq, c.rule""",
                [ctx.now],
            ).fetchall()
            ctx.s.signals_new += int(n[0][0]) if n else 0
        finally:
            con.unregister("cand")
    ctx.pending_state, ctx.pending_signals = [], []
    ctx.pending_points, ctx.replaced_points = [], set()


def _reconcile(
    ctx: _Context, e: PlanEntry, sig: pl.DataFrame, pts: pl.DataFrame, series: list[int], *, recompute: bool
) -> None:
    """Write new signals, withdraw standing ones no longer found (recompute only; appends are deferred)."""
    con = ctx.con
    cand = sig.select(
        pl.col("series").cast(pl.Int64).alias("series_id"),
        pl.col("point_key").cast(pl.String),
        pl.col("lot_id").cast(pl.String),
        pl.col("wafer_id").cast(pl.String),
        pl.col("point_at").cast(pl.Datetime("us")),
        pl.col("seq").cast(pl.Int64).alias("point_seq"),
        pl.col("rule").cast(pl.String),
        pl.col("value").cast(pl.Float64),
        pl.col("statistic").cast(pl.Float64),
        pl.col("limit_version").cast(pl.Int64),
    )
    if not recompute:
        # appended points are later than every evaluated point of their series, and a run is one
        # transaction, so they cannot have signals yet: insert them all at once with the run's others
        ctx.pending_signals.append(cand.with_columns(pl.lit(e.severity).alias("severity")))
        return
    rs = pl.DataFrame({"series_id": series}, schema={"series_id": pl.Int64})
    pk = pts.select(pl.col("series_id").cast(pl.Int64), "point_key", pl.col("value").alias("pv"))
    match = (
        "s.series_id = c.series_id AND s.point_key = c.point_key AND s.rule = c.rule "
        "AND s.limit_version IS NOT DISTINCT FROM c.limit_version "
        "AND abs(s.value - c.value) <= 1e-9 * greatest(1.0, abs(c.value)) "
        "AND ((s.statistic IS NULL AND c.statistic IS NULL) "
        "     OR abs(s.statistic - c.statistic) <= 1e-9 * greatest(1.0, abs(c.statistic)))"
    )
    con.register("cand", pts_mod.ArrowSource(cand))
    con.register("rs", pts_mod.ArrowSource(rs))
    con.register("pk", pts_mod.ArrowSource(pk))
    try:
        if recompute:
            n = con.execute(
                f"""
UPDATE signals s SET withdrawn_at = ?, withdrawn_reason = CASE
        WHEN NOT EXISTS (SELECT 1 FROM pk WHERE pk.series_id = s.series_id AND pk.point_key = s.point_key) THEN ?
        WHEN NOT EXISTS (SELECT 1 FROM pk WHERE pk.series_id = s.series_id AND pk.point_key = s.point_key
                         AND abs(pk.pv - s.value) <= 1e-9 * greatest(1.0, abs(s.value))) THEN ?
        ELSE ? END
WHERE s.withdrawn_at IS NULL AND s.series_id IN (SELECT series_id FROM rs)
  AND NOT EXISTS (SELECT 1 FROM cand c WHERE {match})""",
                [ctx.now, WITHDRAWN_SUPERSEDED, WITHDRAWN_CHANGED, WITHDRAWN_NOT_FOUND],
            ).fetchall()
            ctx.s.signals_withdrawn += int(n[0][0]) if n else 0
            con.execute(
                f"""UPDATE signals s SET point_seq = c.point_seq FROM cand c
WHERE s.withdrawn_at IS NULL AND {match} AND s.point_seq <> c.point_seq"""
            )
        n = con.execute(
            f"""
INSERT INTO signals
SELECT nextval('signal_id_seq'), c.series_id, c.point_key, c.lot_id, c.wafer_id, c.point_at, c.point_seq, c.rule,
       c.value, c.statistic, c.limit_version, ?, ?, NULL, NULL, NULL
FROM cand c
WHERE NOT EXISTS (SELECT 1 FROM signals s WHERE s.withdrawn_at IS NULL AND {match})
ORDER BY c.series_id, c.point_seq, c.rule""",
            [e.severity, ctx.now],
        ).fetchall()
        ctx.s.signals_new += int(n[0][0]) if n else 0
    finally:
        for name in ("cand", "rs", "pk"):
            con.unregister(name)


# ------------------------------------------------------------------------------------------ reading


def series_points(con, *, series_id: int) -> pl.DataFrame:
    """Points of one series with the limits in force (for queries.series_points).

    Read from ``chart_points`` when it holds the state of the warehouse now (the last evaluation wrote it,
    covered every loaded file and the plan in force, and the series' limit version is still the one in
    force); otherwise computed from the facts (:func:`series_points_from_facts`), with the same result.
    """
    row = con.execute(
        "SELECT chart, layer, parameter, split_json FROM chart_series WHERE series_id = ?", [series_id]
    ).fetchall()
    plan = current_plan(con)
    if not row or plan is None:
        return pl.DataFrame(schema={c: pl.Float64 for c in CHART_POINT_COLUMNS})
    e = plan.entry(row[0][0])
    stored = _stored_points(con, e, series_id=series_id)
    return stored if stored is not None else series_points_from_facts(con, series_id=series_id)


def _stored_points(con, e: PlanEntry, *, series_id: int) -> pl.DataFrame | None:
    """The series' chart_points rows, or None when the table may be behind the warehouse."""
    run = con.execute(
        """SELECT r.plan_version,
       r.watermark_file_id >= (SELECT coalesce(max(file_id), 0) FROM source_files WHERE status = 'loaded'),
       (SELECT value FROM meta WHERE key = ?) = r.run_id::VARCHAR
FROM evaluation_runs r ORDER BY r.run_id DESC LIMIT 1""",
        [CHART_POINTS_RUN],
    ).fetchall()
    if not run or run[0][0] != current_plan_version(con) or not run[0][1] or not run[0][2]:
        return None
    cur = con.cursor()
    try:
        pts = cur.sql(
            f"SELECT {', '.join(CHART_POINT_COLUMNS)} FROM chart_points WHERE series_id = $sid ORDER BY seq",
            params={"sid": series_id},
        ).pl()
        version = cur.execute(
            "SELECT max(version) FROM control_limits WHERE series_id = ?", [series_id]
        ).fetchall()
    finally:
        cur.close()
    if pts.height and set(pts["limit_version"].unique().to_list()) != {version[0][0]}:
        return None  # limits frozen again since the last evaluation
    if e.statistic == "lot_mean" or (e.statistic == "defect_density" and e.parameter != "total"):
        pts = pts.with_columns(pl.col("n").cast(pl.Int128))  # the facts query sums counts (HUGEINT)
    if e.is_defect:  # rows written before 2026-12-02 hold a negative lcl: read it as written now
        pts = pts.with_columns(lim_mod.defect_floor(e, pl.col("lcl")).alias("lcl"))
    return pts


def series_points_from_facts(con, *, series_id: int) -> pl.DataFrame:
    """Points of one series with the limits in force, computed from the facts (one points query)."""
    row = con.execute(
        "SELECT chart, layer, parameter, split_json FROM chart_series WHERE series_id = ?", [series_id]
    ).fetchall()
    cols = list(CHART_POINT_COLUMNS)
    plan = current_plan(con)
    if not row or plan is None:
        return pl.DataFrame(schema={c: pl.Float64 for c in cols})
    chart, layer, parameter, sj = row[0]
    e = plan.entry(chart)
    wanted = pl.DataFrame([{"layer": layer, "parameter": parameter, **json.loads(sj)}])
    wanted = wanted.select(pts_mod.series_columns(e)).cast(pl.String)
    pts = pts_mod.read_points(con, e, wanted=wanted).with_columns(
        pl.lit(series_id, pl.Int64).alias("series_id")
    )
    pts = pts.with_columns((pl.int_range(pl.len()) + 1).cast(pl.Int64).alias("seq"))
    ctx_limits = lim_mod.current_limits(con)
    lim = ctx_limits.get(series_id)
    if lim is None:
        pts = pts.with_columns(pl.lit(None, pl.Float64).alias(c) for c in ("center", "sigma", "lcl", "ucl"))
        pts = pts.with_columns(pl.lit(None, pl.Int64).alias("limit_version"))
    else:
        sigma = lim_mod.point_sigma(e, lim, pts)
        k = lim["k_sigma"]
        pts = pts.with_columns(
            pl.lit(lim["center"]).alias("center"),
            pl.Series("sigma", sigma),
            pl.lit(lim["version"], pl.Int64).alias("limit_version"),
        )
        if e.chart == "negbin_u" and lim["n_ref"] is not None:
            lcl, ucl = lim_mod.negbin_point_limits(
                lim["center"], lim["overdispersion"] or 0.0, pts["area_cm2"].cast(pl.Float64).to_numpy(), k
            )
            pts = pts.with_columns(pl.Series("lcl", lcl), pl.Series("ucl", ucl))
        else:
            pts = pts.with_columns(*lim_mod.point_limits(e, k))
    return pts.select(cols)


def _series_keys(ctx: _Context, e: PlanEntry, series: list[int]) -> pl.DataFrame:
    """Series columns of stored series ids (for the ``wanted_series`` filter)."""
    rows = []
    for (chart, layer, parameter, sj), sid in ctx.series.items():
        if chart == e.name and sid in series:
            rows.append({"series_id": sid, "layer": layer, "parameter": parameter, **json.loads(sj)})
    cols = pts_mod.series_columns(e)
    return pl.DataFrame(rows, schema={"series_id": pl.Int64, **{c: pl.String for c in cols}})


def freeze_limits(
    path=None,
    *,
    chart: str,
    reason: str,
    user: str,
    first: int | None = None,
    window: tuple[datetime, datetime] | None = None,
    series_id: int | None = None,
) -> list[dict]:
    """Freeze a new limit version for every series of a chart (or one series) from a chosen baseline.

    The baseline is the chart's plan baseline unless ``first`` (first N points) or ``window`` (from, to
    inclusive) is given. Returns one dict per series frozen (series_id, version, center, sigma, lcl, ucl,
    baseline_n) and, for series whose baseline is incomplete, ``skipped`` with the reason.
    """
    if not reason or not reason.strip():
        raise ConfigError("freezing limits needs a reason", fix="pass --reason TEXT")
    out = []
    with store.open_warehouse(path) as con, store.transaction(con):
        plan = current_plan(con)
        if plan is None:
            raise ConfigError("no monitoring plan is loaded", fix="run `lotline plan load PLAN.toml` first")
        e = plan.entry(chart)
        s = RunSummary("freeze", current_plan_version(con), 0)
        ctx = _Context(con, _now(), user, s)
        pts = _attach_series(ctx, e, pts_mod.read_points(con, e), create=True)
        ids = sorted(pts["series_id"].unique().to_list()) if series_id is None else [series_id]
        for sid in ids:
            sp = pts.filter(pl.col("series_id") == sid)
            base = lim_mod.baseline_points(e, sp, first=first, window=window)
            if base is None or base.height < 2:
                out.append({"series_id": sid, "skipped": "baseline incomplete (too few points)"})
                continue
            try:
                est = lim_mod.estimate_limits(e, base, _baseline_sites(ctx, e, {sid: base}).get(sid))
            except lim_mod.LimitsError as exc:
                out.append({"series_id": sid, "skipped": exc.what})
                continue
            v = lim_mod.insert_version(con, sid, est, user=user, reason=reason)
            out.append(
                {
                    "series_id": sid,
                    "version": v,
                    "center": est["center"],
                    "sigma": est["sigma"],
                    "lcl": est["lcl"],
                    "ucl": est["ucl"],
                    "baseline_n": est["baseline_n"],
                }
            )
        store.bump_data_version(con)
    return out


def evaluate_after_ingest(
    path=None, *, user: str | None = None, wait_s: float = store.DEFAULT_WAIT_S
) -> RunSummary | None:
    """Incremental evaluation for the ingest commands; None (nothing done) when no plan is loaded.

    The plan check and the evaluation share one open of the file (an open and a close cost tens of ms on
    a warehouse of millions of rows).
    """
    with store.open_warehouse(path, wait_s=wait_s) as con:
        if current_plan_version(con) == 0:
            return None
        return _evaluate_unit(con, full=False, user=user or _user())
