"""Drill-down of one excursion: commonality, wafer signatures, defect clusters, process or metrology.

``explain_excursion(db, excursion_id)`` gathers, for one excursion, everything an engineer asks next and
hands the statistics to ``spc``:

* **Commonality** (``spc.commonality.rank_commonality``): the excursion's affected lots (the lots of its
  standing signals) against the reference lots of the same chart in the same period (the excursion window
  ± ``margin_days``, same layer and parameter, same product when the chart splits by product), with the
  process history each lot had before it reached the measured layer and its charted value.
* **Wafer signatures** (``spc.signatures``): zone means and Zernike terms of the affected wafers' site
  values, labelled against the same chart's wafers in the baseline period.
* **Defect maps** (``spc.spatial``, defect-density charts): a complete-spatial-randomness test and
  density clusters (scratch, edge, blob) on the affected wafers' defect coordinates.
* **Process or metrology** (``spc.attribution``, CD charts): the measuring tool's monitor-wafer readings in
  the window against its baseline (largest |z|, EWMA drift flag; ``spc.metrology``), the same series'
  lots measured on other metrology tools in the window against their baseline, and the measuring tool's
  offset to the fleet on the monitor features, now and in the baseline (``spc.metrology``).

Periods: the *window* is the excursion's first to last signalled point, stretched to at least
``window_min_days``; the *baseline* is the frozen Phase I window of the series' limits in force, stretched
to at least ``baseline_min_days`` but never past the window's start.

Commonality is association, not proof of cause. Signals and verdicts advise; the fab's out-of-control
action plan (OCAP) and a qualified engineer decide holds, releases, rework and tool downs.

Only fixed SQL text lives here; every value is a bound parameter.
"""

from __future__ import annotations

import json
import math
import os
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from datetime import date, datetime, timedelta
from typing import Any

import duckdb
import polars as pl

from spc.attribution import (
    UNDECIDED,
    Attribution,
    AttributionSettings,
    CrossToolReading,
    ExcursionEvidence,
    FleetOffset,
    MonitorEvidence,
    classify_excursion,
)
from spc.commonality import rank_commonality
from spc.metrology import (
    MonitorSettings,
    estimate_fleet_matching,
    evaluate_monitor_health,
    summarise_monitor_days,
)
from spc.signatures import classify_signatures, fit_zernike, zone_means
from spc.spatial import clark_evans_csr, count_unclustered, find_defect_clusters
from warehouse import queries, store
from warehouse.errors import LotlineError
from warehouse.plan import PlanEntry, current_plan

__all__ = [
    "CAUTIONS",
    "REWORK_CAUTIONS",
    "DrilldownSettings",
    "Explanation",
    "ExcursionNotFoundError",
    "explain_excursion",
    "read_excursion_defects",
    "read_monitor_readings",
    "read_population_history",
    "read_population_lots",
    "read_wafer_means",
    "read_wafer_sites",
]

Con = duckdb.DuckDBPyConnection

CAUTIONS = (
    "Commonality is association, not proof of cause: a ranked tool or chamber is a lead to check, and a "
    "candidate that ran most lots is not a finding by itself.",
    "Signals and verdicts advise; they do not decide. The fab's out-of-control action plan (OCAP) and a "
    "qualified engineer decide holds, releases, rework and tool downs, and record who decided what and why.",
)
"""Cautions shown with every explanation (common practice); a rework caution for the stage follows them."""

REWORK_CAUTIONS = {
    "develop": "After-develop (resist) data: rework is possible only before etch, if the fab's OCAP calls for it.",
    "etch": "After-etch data: rework is no longer possible; do not offer it.",
}
REWORK_CAUTION = "Rework is possible only before etch: do not offer it for after-etch data."
"""Rework caution when the stage of the data is not known."""

NOT_APPLICABLE = "not applicable"
"""Verdict of the process-or-metrology question on charts it does not apply to (defect densities)."""


class ExcursionNotFoundError(LotlineError, LookupError):
    """The excursion id is not in the warehouse."""


@dataclass(frozen=True)
class DrilldownSettings:
    """Periods and sizes of one drill-down (defaults are common practice)."""

    margin_days: float = 3.0
    """Reference lots are taken from the excursion window widened by this on both sides."""
    window_min_days: float = 3.0
    """The excursion window used for the evidence is at least this long (a lone point has no trend)."""
    baseline_min_days: float = 5.0
    """The baseline period is stretched to at least this long (never past the window's start)."""
    history_wafers: int = 300
    """At most this many baseline wafers (the newest) form the history the signatures are labelled against."""
    min_fleet_days: int = 3
    """Monitor days in the window needed before the fleet offset counts as evidence."""
    attribution: AttributionSettings = field(default_factory=AttributionSettings)
    """Thresholds of the process-or-metrology vote."""


@dataclass
class Explanation:
    """Everything ``explain_excursion`` found for one excursion (frames, verdict, sentences)."""

    excursion: dict[str, Any]
    """Header: id, state, severity, chart, layer, parameter, split, statistic, chart_type, stage, rules,
    first_at, last_at, lots, n_signals."""
    affected_lots: list[str]
    reference_lots: list[str]
    periods: dict[str, datetime | None]
    """window_from/_to, population_from/_to, baseline_from/_to."""
    commonality: pl.DataFrame | None = None
    """``rank_commonality`` output (None when no history could be compared)."""
    signatures: pl.DataFrame | None = None
    """Per affected wafer: lot_id, wafer_id, label, max_abs_rz and the edge-minus-centre zone delta."""
    zones: pl.DataFrame | None = None
    """Zone means of the affected wafers (``zone_means`` output)."""
    defect_csr: pl.DataFrame | None = None
    """``clark_evans_csr`` per affected wafer inspection (defect-density charts)."""
    defect_clusters: pl.DataFrame | None = None
    """``find_defect_clusters(...).clusters`` of the affected wafer inspections."""
    defect_counts: pl.DataFrame | None = None
    """``count_unclustered`` per affected wafer inspection."""
    evidence: ExcursionEvidence | None = None
    attribution: Attribution | None = None
    verdict: str = NOT_APPLICABLE
    notes: list[str] = field(default_factory=list)
    """What could not be computed, and why."""
    cautions: tuple[str, ...] = CAUTIONS

    def to_dict(self) -> dict[str, Any]:
        """A JSON-serialisable dict (frames as lists of row dicts, times as ISO text, NaN as null)."""
        out: dict[str, Any] = {
            "excursion": _jsonable(self.excursion),
            "affected_lots": list(self.affected_lots),
            "reference_lots": len(self.reference_lots),
            "periods": _jsonable(self.periods),
            "verdict": self.verdict,
            "notes": list(self.notes),
            "cautions": list(self.cautions),
        }
        for name in ("commonality", "signatures", "zones", "defect_csr", "defect_clusters", "defect_counts"):
            frame = getattr(self, name)
            out[name] = None if frame is None else _jsonable(frame.to_dicts())
        ev = self.evidence
        out["evidence"] = None if ev is None else _jsonable({
            "metrology_tool": ev.metrology_tool,
            "shift_nm": ev.shift_nm,
            "monitor": None if ev.monitor is None else vars(ev.monitor),
            "cross_tool": [vars(r) for r in ev.cross_tool],
            "fleet_offset": None if ev.fleet_offset is None else vars(ev.fleet_offset),
        })  # fmt: skip
        a = self.attribution
        out["attribution"] = None if a is None else {
            "verdict": a.verdict, "process_votes": a.process_votes, "metrology_votes": a.metrology_votes,
            "evidence": list(a.evidence), "caution": a.caution,
        }  # fmt: skip
        return out


def _jsonable(value: Any) -> Any:
    if isinstance(value, dict):
        return {str(k): _jsonable(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_jsonable(v) for v in value]
    if isinstance(value, datetime | date):
        return value.isoformat()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, pl.Series):
        return _jsonable(value.to_list())
    return value


# ------------------------------------------------------------------------------------------ reading


def _frame(con: Con, sql: str, params: list | None = None, *, tables: dict[str, pl.DataFrame] | None = None):
    cur = con.cursor()
    try:
        for name, frame in (tables or {}).items():
            cur.register(name, frame)
        return cur.sql(sql, params=params or []).pl()
    finally:
        cur.close()


def read_population_lots(
    con: Con,
    *,
    layer: str,
    parameter: str,
    product: str,
    stage: str,
    sample_kind: str,
    start: datetime,
    end: datetime,
    defect: bool,
) -> pl.DataFrame:
    """Lots with facts of one chart in [start, end]: measurements (or inspections for defect charts).

    ``product`` and ``stage`` are the plan's selectors ('*' for any; product may be a GLOB pattern).

    Columns: lot_id, first_at (first measurement or inspection of the lot at the layer in the period).
    """
    if defect:
        sql = """
SELECT lot_id, min(inspected_at) AS first_at FROM inspections
WHERE layer = ? AND product GLOB ? AND sample_kind = ? AND _superseded_by IS NULL
  AND inspected_at >= ? AND inspected_at <= ?
GROUP BY lot_id ORDER BY first_at, lot_id
"""
        return _frame(con, sql, [layer, product, sample_kind, start, end])
    sql = """
SELECT lot_id, min(measured_at) AS first_at FROM measurements
WHERE layer = ? AND parameter = ? AND product GLOB ? AND (? = '*' OR stage = ?) AND sample_kind = ?
  AND _superseded_by IS NULL AND measured_at >= ? AND measured_at <= ?
GROUP BY lot_id ORDER BY first_at, lot_id
"""
    return _frame(con, sql, [layer, parameter, product, stage, stage, sample_kind, start, end])


def read_population_history(con: Con, *, lots: pl.DataFrame) -> pl.DataFrame:
    """Process history of the lots before they reached the measured layer: the steps that had ended (or, with
    no end recorded, started) by the lot's ``first_at``. A step still running at the measurement is a later one.

    ``lots``: lot_id, first_at (as :func:`read_population_lots`).

    Columns: lot_id, wafer_id, step, step_seq, process_tool, chamber, recipe, started_at.
    """
    sql = """
SELECT h.lot_id, h.wafer_id, h.step, h.step_seq, h.process_tool, h.chamber, h.recipe, h.started_at
FROM process_history h JOIN pop ON pop.lot_id = h.lot_id
WHERE h._superseded_by IS NULL AND coalesce(h.ended_at, h.started_at) <= pop.first_at
ORDER BY h.lot_id, h.started_at, h.step
"""
    return _frame(con, sql, tables={"pop": lots.select("lot_id", "first_at")})


def read_wafer_means(
    con: Con,
    *,
    layer: str,
    parameter: str,
    product: str,
    stage: str,
    sample_kind: str,
    start: datetime,
    end: datetime,
    step: str | None,
) -> pl.DataFrame:
    """Wafer means of one layer and parameter per metrology tool in [start, end], with the process tool and
    chamber each wafer had at ``step`` (wafer-level history first, else the lot's; NULL without a step).

    Columns: lot_id, wafer_id, metrology_tool, product, measured_at (first site), value (mean of sites, nm),
    n (sites), process_tool, chamber.
    """
    sql = """
WITH w AS (
    SELECT lot_id, wafer_id, metrology_tool, any_value(product) AS product, min(measured_at) AS measured_at,
           avg(value) AS value, count(*) AS n
    FROM measurements
    WHERE layer = ? AND parameter = ? AND product GLOB ? AND (? = '*' OR stage = ?) AND sample_kind = ?
      AND _superseded_by IS NULL AND measured_at >= ? AND measured_at <= ?
    GROUP BY lot_id, wafer_id, metrology_tool
), h AS (
    SELECT lot_id, wafer_id, process_tool, chamber FROM process_history
    WHERE step = ?::VARCHAR AND _superseded_by IS NULL
    QUALIFY row_number() OVER (PARTITION BY lot_id, wafer_id ORDER BY started_at DESC, _source_file_id DESC) = 1
)
SELECT w.lot_id, w.wafer_id, w.metrology_tool, w.product, w.measured_at, w.value, w.n,
       CASE WHEN hw.lot_id IS NOT NULL THEN hw.process_tool ELSE hl.process_tool END AS process_tool,
       CASE WHEN hw.lot_id IS NOT NULL THEN hw.chamber ELSE hl.chamber END AS chamber
FROM w
LEFT JOIN h hw ON hw.lot_id = w.lot_id AND hw.wafer_id = w.wafer_id
LEFT JOIN h hl ON hl.lot_id = w.lot_id AND hl.wafer_id IS NULL
ORDER BY w.measured_at, w.lot_id, w.wafer_id, w.metrology_tool
"""
    return _frame(con, sql, [layer, parameter, product, stage, stage, sample_kind, start, end, step])


def read_wafer_sites(
    con: Con, *, wafers: pl.DataFrame, layer: str, parameter: str, sample_kind: str
) -> pl.DataFrame:
    """Site values of the given wafers at one layer and parameter (repeats, features and tools averaged).

    ``wafers``: lot_id, wafer_id.

    Columns: lot_id, wafer_id, site_id, x_mm, y_mm, value.
    """
    sql = """
SELECT m.lot_id, m.wafer_id, m.site_id, avg(m.x_mm) AS x_mm, avg(m.y_mm) AS y_mm, avg(m.value) AS value
FROM measurements m JOIN wl ON wl.lot_id = m.lot_id AND wl.wafer_id = m.wafer_id
WHERE m.layer = ? AND m.parameter = ? AND m.sample_kind = ? AND m._superseded_by IS NULL
  AND m.x_mm IS NOT NULL AND m.y_mm IS NOT NULL
GROUP BY m.lot_id, m.wafer_id, m.site_id
ORDER BY m.lot_id, m.wafer_id, m.site_id
"""
    wl = wafers.select(pl.col("lot_id").cast(pl.String), pl.col("wafer_id").cast(pl.String)).unique()
    return _frame(con, sql, [layer, parameter, sample_kind], tables={"wl": wl})


def read_monitor_readings(con: Con, *, parameter: str, start: datetime, end: datetime) -> pl.DataFrame:
    """Monitor-wafer readings (sample_kind 'monitor') of one parameter on every metrology tool in [start, end].

    Columns: tool, target (feature, else the monitor layer), measured_at, repeat, value.
    """
    sql = """
SELECT metrology_tool AS tool, coalesce(feature, layer) AS target, measured_at, "repeat", value
FROM measurements
WHERE sample_kind = 'monitor' AND parameter = ? AND _superseded_by IS NULL
  AND measured_at >= ? AND measured_at <= ?
ORDER BY tool, target, measured_at
"""
    return _frame(con, sql, [parameter, start, end])


def read_excursion_defects(
    con: Con, *, wafers: pl.DataFrame, layer: str, start: datetime, end: datetime
) -> pl.DataFrame:
    """Defect coordinates of the given wafers' inspections at one layer in [start, end].

    ``wafers``: lot_id, wafer_id.

    Columns: lot_id, wafer_id, inspection_tool, inspected_at, defect_id, x_mm, y_mm, size_nm, defect_class.
    """
    sql = """
SELECT d.lot_id, d.wafer_id, d.inspection_tool, d.inspected_at, d.defect_id, d.x_mm, d.y_mm, d.size_nm,
       d.defect_class
FROM defects d JOIN wl ON wl.lot_id = d.lot_id AND wl.wafer_id = d.wafer_id
WHERE d.layer = ? AND d._superseded_by IS NULL AND d.inspected_at >= ? AND d.inspected_at <= ?
ORDER BY d.lot_id, d.wafer_id, d.inspected_at, d.defect_id
"""
    wl = wafers.select(pl.col("lot_id").cast(pl.String), pl.col("wafer_id").cast(pl.String)).unique()
    return _frame(con, sql, [layer, start, end], tables={"wl": wl})


def _max_excursion_id(con: Con) -> int | None:
    rows = con.execute("SELECT max(excursion_id) FROM excursions").fetchall()
    return rows[0][0] if rows else None


# ------------------------------------------------------------------------------------------ the drill-down


@contextmanager
def _connection(db: Any) -> Iterator[Con]:
    if isinstance(db, duckdb.DuckDBPyConnection):
        yield db
        return
    path = store.resolve_db_path(db if isinstance(db, str | os.PathLike) or db is None else str(db))
    with store.open_warehouse(path, read_only=True) as con:
        yield con


def explain_excursion(
    db: Any, excursion_id: int, *, settings: DrilldownSettings | None = None
) -> Explanation:
    """Explain one excursion: commonality, wafer signatures, defect clusters and process-or-metrology evidence.

    Args:
        db: an open warehouse connection, or the warehouse path (opened read-only for this call).
        excursion_id: the excursion (``lotline excursions list`` shows the ids).
        settings: periods and sizes (see :class:`DrilldownSettings`).

    Returns:
        An :class:`Explanation` (``to_dict()`` for JSON).

    Raises:
        ExcursionNotFoundError: the id is unknown.

    Example:
        >>> ex = explain_excursion("lotline.duckdb", 12)  # doctest: +SKIP
        >>> ex.commonality.row(0, named=True)["candidate"], ex.verdict  # doctest: +SKIP
        ('ETCH-B/CH2', 'likely process')
    """
    s = settings or DrilldownSettings()
    with _connection(db) as con:
        return _explain(con, int(excursion_id), s, db)


def _explain(con: Con, excursion_id: int, s: DrilldownSettings, db: Any) -> Explanation:
    detail = queries.excursion_detail(con, excursion_id=excursion_id)
    if detail.height == 0:
        top = _max_excursion_id(con)
        raise ExcursionNotFoundError(
            f"excursion {excursion_id} is not in the warehouse",
            path=None if isinstance(db, duckdb.DuckDBPyConnection) else str(store.resolve_db_path(db)),
            found=excursion_id,
            expected=f"an id from 1 to {top}" if top else "an existing excursion (there are none yet)",
            fix="run `lotline excursions list` to see the excursion ids"
            + ("" if top else ", after `lotline evaluate`"),
        )
    x = detail.row(0, named=True)
    plan = current_plan(con)
    entry = None
    if plan is not None:
        try:
            entry = plan.entry(x["chart"])
        except LotlineError:
            entry = None
        except KeyError:
            entry = None
    split = json.loads(x["split_json"])
    signals = queries.excursion_signals(con, excursion_id=excursion_id)
    standing = signals.filter(pl.col("withdrawn_at").is_null())
    if standing.height == 0:
        standing = signals
    affected = sorted(standing["lot_id"].unique().to_list())
    header = {
        "excursion_id": x["excursion_id"], "state": x["state"], "severity": x["severity"], "chart": x["chart"],
        "layer": x["layer"], "parameter": x["parameter"], "split": split,
        "statistic": entry.statistic if entry else None, "chart_type": entry.chart if entry else None,
        "stage": entry.stage if entry else None, "rules": json.loads(x["rules_json"]),
        "first_at": x["first_at"], "last_at": x["last_at"], "lots": json.loads(x["lots_json"]),
        "n_signals": x["n_signals"],
    }  # fmt: skip
    periods = _periods(con, x, s)
    rework = REWORK_CAUTIONS.get(entry.stage if entry else "", REWORK_CAUTION)
    ex = Explanation(
        excursion=header,
        affected_lots=affected,
        reference_lots=[],
        periods=periods,
        cautions=(*CAUTIONS, rework),
    )
    if entry is None:
        ex.notes.append(f"chart {x['chart']!r} is not in the plan in force: nothing to compare against.")
        return ex
    product = split.get("product", entry.product)
    _commonality(con, ex, entry, x, product)
    if entry.is_defect:
        _defects(con, ex, entry, x, standing)
        ex.notes.append(
            "Process or metrology: not asked for defect-density charts (an inspection, not a CD-SEM)."
        )
        return ex
    _signatures(con, ex, entry, x, standing, product, s)
    _attribution(con, ex, entry, x, standing, split, product, s)
    return ex


def _periods(con: Con, x: dict, s: DrilldownSettings) -> dict[str, datetime | None]:
    first, last = x["first_at"], x["last_at"]
    margin = timedelta(days=s.margin_days)
    w_to = max(last, first + timedelta(days=s.window_min_days))
    lim = queries.series_limits(con, series_id=x["series_id"]).filter(pl.col("current"))
    b_from = b_to = None
    if lim.height:
        b_from, b_to = lim["baseline_from"][0], lim["baseline_to"][0]
    if b_from is None or b_to is None or b_from >= first:
        b_to, b_from = first, first - timedelta(days=s.baseline_min_days)
    else:
        b_to = min(max(b_to, b_from + timedelta(days=s.baseline_min_days)), first)
    return {
        "window_from": first, "window_to": w_to,
        "population_from": first - margin, "population_to": last + margin,
        "baseline_from": b_from, "baseline_to": b_to,
    }  # fmt: skip


def _lot_values(con: Con, entry: PlanEntry, x: dict, lots: pl.DataFrame, product: str) -> pl.DataFrame:
    """Per-lot charted value: the mean of the lot's points of the chart (its statistic), any split value."""
    from warehouse import points

    pts = points.read_points(con, entry, dirty_lots=lots.select("lot_id"))
    pts = pts.filter((pl.col("layer") == x["layer"]) & (pl.col("parameter") == x["parameter"]))
    if "product" in pts.columns and product != entry.product:
        pts = pts.filter(pl.col("product") == product)
    return pts.group_by("lot_id").agg(pl.col("value").mean())


def _commonality(con: Con, ex: Explanation, entry: PlanEntry, x: dict, product: str) -> None:
    p = ex.periods
    lots = read_population_lots(
        con, layer=x["layer"], parameter=x["parameter"], product=product, stage=entry.stage,
        sample_kind=entry.sample_kind, start=p["population_from"], end=p["population_to"], defect=entry.is_defect,
    )  # fmt: skip
    affected = set(ex.affected_lots)
    ex.reference_lots = sorted(set(lots["lot_id"].to_list()) - affected)
    missing = affected - set(lots["lot_id"].to_list())
    if missing:  # a signalled lot always belongs to the population; keep its first point time
        extra = read_population_lots(
            con, layer=x["layer"], parameter=x["parameter"], product=entry.product, stage=entry.stage,
            sample_kind=entry.sample_kind, start=datetime(1900, 1, 1), end=datetime(9999, 1, 1),
            defect=entry.is_defect,
        ).filter(pl.col("lot_id").is_in(sorted(missing)))  # fmt: skip
        lots = pl.concat([lots, extra])
    hist = read_population_history(con, lots=lots)
    if hist.height == 0 or not affected & set(hist["lot_id"].to_list()):
        ex.notes.append("Commonality: no process history stored for the affected lots.")
        return
    if not ex.reference_lots:
        ex.notes.append("Commonality: no reference lots of this chart in the period to compare with.")
        return
    values = _lot_values(con, entry, x, lots, product)
    ex.commonality = rank_commonality(
        hist, ex.affected_lots, values=values if values.height else None, reference_lots=ex.reference_lots
    )


def _affected_wafers(con: Con, ex: Explanation, x: dict, standing: pl.DataFrame, entry: PlanEntry,
                     product: str) -> pl.DataFrame:  # fmt: skip
    """Wafers of the signalled points; for lot-level points every wafer of the lot measured in the window."""
    w = standing.filter(pl.col("wafer_id").is_not_null()).select("lot_id", "wafer_id").unique()
    lot_level = standing.filter(pl.col("wafer_id").is_null())["lot_id"].unique()
    if lot_level.len():
        p = ex.periods
        means = read_wafer_means(
            con, layer=x["layer"], parameter=x["parameter"], product=product, stage=entry.stage,
            sample_kind=entry.sample_kind, start=p["population_from"], end=p["population_to"], step=None,
        )  # fmt: skip
        more = means.filter(pl.col("lot_id").is_in(lot_level.implode())).select("lot_id", "wafer_id").unique()
        w = pl.concat([w, more]).unique()
    return w.sort("lot_id", "wafer_id")


def _signatures(
    con: Con,
    ex: Explanation,
    entry: PlanEntry,
    x: dict,
    standing: pl.DataFrame,
    product: str,
    s: DrilldownSettings,
) -> None:
    wafers = _affected_wafers(con, ex, x, standing, entry, product)
    p = ex.periods
    base = read_wafer_means(
        con, layer=x["layer"], parameter=x["parameter"], product=product, stage=entry.stage,
        sample_kind=entry.sample_kind, start=p["baseline_from"], end=p["baseline_to"], step=None,
    )  # fmt: skip
    base = (
        base.filter(~pl.col("lot_id").is_in(ex.affected_lots))
        .sort("measured_at", descending=True)
        .select("lot_id", "wafer_id")
        .unique(maintain_order=True)
        .head(s.history_wafers)
    )
    key = ["lot_id", "wafer_id"]
    cur_sites = read_wafer_sites(con, wafers=wafers, layer=x["layer"], parameter=x["parameter"],
                                 sample_kind=entry.sample_kind)  # fmt: skip
    if cur_sites.height == 0:
        ex.notes.append("Wafer signatures: no site coordinates stored for the affected wafers.")
        return
    n_terms = int(min(11, cur_sites.group_by(key).len()["len"].min()))
    ex.zones = zone_means(cur_sites, wafer_key=key)
    cur = fit_zernike(cur_sites, wafer_key=key, n_terms=n_terms).with_columns(
        pl.lit(x["layer"]).alias("layer"), pl.lit(x["parameter"]).alias("parameter")
    )
    hist_sites = read_wafer_sites(con, wafers=base, layer=x["layer"], parameter=x["parameter"],
                                  sample_kind=entry.sample_kind)  # fmt: skip
    if hist_sites.height:
        hist = fit_zernike(hist_sites, wafer_key=key, n_terms=n_terms).with_columns(
            pl.lit(x["layer"]).alias("layer"), pl.lit(x["parameter"]).alias("parameter")
        )
    else:
        ex.notes.append("Wafer signatures: no baseline wafers to compare with.")
        hist = cur.clear()
    labels = classify_signatures(cur, hist, series_key=["layer", "parameter"], wafer_key=key)
    edge = ex.zones.pivot(on="zone", index=key, values="mean")
    if {"edge", "centre"} <= set(edge.columns):
        edge = edge.select(*key, (pl.col("edge") - pl.col("centre")).alias("edge_minus_centre"))
    else:
        edge = edge.select(*key, pl.lit(None, pl.Float64).alias("edge_minus_centre"))
    ex.signatures = labels.select(*key, "label", "max_abs_rz").join(edge, on=key, how="left").sort(key)


def _defects(con: Con, ex: Explanation, entry: PlanEntry, x: dict, standing: pl.DataFrame) -> None:
    wafers = standing.filter(pl.col("wafer_id").is_not_null()).select("lot_id", "wafer_id").unique()
    p = ex.periods
    d = read_excursion_defects(con, wafers=wafers, layer=x["layer"], start=p["population_from"],
                               end=p["population_to"])  # fmt: skip
    if d.height == 0:
        ex.notes.append("Defect maps: no defect coordinates exported for the affected wafers.")
        return
    key = ["lot_id", "wafer_id", "inspected_at"]
    ex.defect_csr = clark_evans_csr(d, wafer_key=key)
    found = find_defect_clusters(d, wafer_key=key)
    ex.defect_clusters = found.clusters
    ex.defect_counts = count_unclustered(found.labels, wafer_key=key)


# ------------------------------------------------------------------------------------------ process or metrology


def _split_filter(frame: pl.DataFrame, split: dict) -> pl.DataFrame:
    """Rows of the series' population: its split values, except the metrology tool."""
    for k in ("process_tool", "chamber", "product"):
        if k in split:
            frame = frame.filter(pl.col(k) == split[k])
    return frame


def _tool_shift(rows: pl.DataFrame, tool: str, p: dict) -> tuple[float, float, int] | None:
    """Window mean minus baseline mean of the tool's lot means (lots are the units), its SE, window lots."""
    t = rows.filter(pl.col("metrology_tool") == tool)
    win = t.filter((pl.col("measured_at") >= p["window_from"]) & (pl.col("measured_at") <= p["window_to"]))
    base = t.filter(
        (pl.col("measured_at") >= p["baseline_from"]) & (pl.col("measured_at") < p["baseline_to"])
    )
    lw = win.group_by("lot_id").agg(pl.col("value").mean())["value"]
    lb = base.group_by("lot_id").agg(pl.col("value").mean())["value"]
    if lw.len() < 2 or lb.len() < 2:
        return None
    se = math.sqrt(lw.var() / lw.len() + lb.var() / lb.len())
    return float(lw.mean() - lb.mean()), se, lw.len()


def _attribution(con: Con, ex: Explanation, entry: PlanEntry, x: dict, standing: pl.DataFrame, split: dict,
                 product: str, s: DrilldownSettings) -> None:  # fmt: skip
    ex.verdict = UNDECIDED  # until the evidence is in
    p = ex.periods
    rows = read_wafer_means(
        con, layer=x["layer"], parameter=x["parameter"], product=product, stage=entry.stage,
        sample_kind=entry.sample_kind, start=p["baseline_from"], end=max(p["window_to"], p["population_to"]),
        step=entry.step,
    )  # fmt: skip
    if "product" in split:
        rows = rows.filter(pl.col("product") == split["product"])
    pop = _split_filter(rows, split)
    tool = split.get("metrology_tool")
    if tool is None:  # the tool that measured most of the signalled wafers
        hit = pop.join(standing.select("lot_id", "wafer_id").unique(), on=["lot_id", "wafer_id"], how="semi")
        if hit.height == 0:
            hit = pop.filter(pl.col("lot_id").is_in(ex.affected_lots))
        if hit.height == 0:
            ex.notes.append("Process or metrology: the signalled wafers' measurements were not found.")
            return
        tool = (
            hit.group_by("metrology_tool")
            .len()
            .sort(["len", "metrology_tool"], descending=[True, False])["metrology_tool"][0]
        )
    own = _tool_shift(pop, tool, p)
    if own is None:
        ex.notes.append(
            f"Process or metrology: too few lots on {tool} in the window or the baseline to size the shift."
        )
        return
    cross = []
    for other in sorted(set(pop["metrology_tool"].to_list()) - {tool}):
        r = _tool_shift(pop, other, p)
        if r is not None:
            cross.append(CrossToolReading(other, n_lots=r[2], shift_nm=r[0], shift_se_nm=r[1]))
    monitor, fleet = _monitor_evidence(con, ex, tool, x["parameter"], s)
    ex.evidence = ExcursionEvidence(
        metrology_tool=tool, shift_nm=own[0], monitor=monitor, cross_tool=tuple(cross), fleet_offset=fleet
    )
    ex.attribution = classify_excursion(ex.evidence, s.attribution)
    ex.verdict = ex.attribution.verdict


def _monitor_evidence(con: Con, ex: Explanation, tool: str, parameter: str,
                      s: DrilldownSettings) -> tuple[MonitorEvidence | None, FleetOffset | None]:  # fmt: skip
    p = ex.periods
    raw = read_monitor_readings(con, parameter=parameter, start=p["baseline_from"], end=p["window_to"])
    if raw.height == 0 or tool not in set(raw["tool"].to_list()):
        ex.notes.append(
            f"No monitor-wafer readings of {parameter} on {tool} between the baseline and the window."
        )
        return None, None
    raw = raw.with_columns(pl.col("measured_at").dt.date().alias("day"))
    in_base = (pl.col("measured_at") >= p["baseline_from"]) & (pl.col("measured_at") < p["baseline_to"])
    in_win = (pl.col("measured_at") >= p["window_from"]) & (pl.col("measured_at") <= p["window_to"])
    base_days = raw.filter(in_base & (pl.col("tool") == tool))["day"].n_unique()
    if base_days < 2:
        ex.notes.append(f"Fewer than 2 monitor days on {tool} in the baseline: no monitor or fleet evidence.")
        return None, None
    win_days = set(raw.filter(in_win)["day"].unique().to_list())
    health = evaluate_monitor_health(
        raw.filter(in_base | in_win).drop("measured_at"), settings=MonitorSettings(baseline_days=base_days)
    )
    mine = health.filter((pl.col("tool") == tool) & pl.col("day").is_in(sorted(win_days)))
    z = (pl.col("mean_nm") - pl.col("baseline_mean_nm")).abs() / pl.col("sigma_day_nm")
    zs = mine.select(z.alias("z"))["z"].drop_nulls().drop_nans()
    shifts = (
        mine.select((pl.col("mean_nm") - pl.col("baseline_mean_nm")).alias("d"))["d"].drop_nulls().drop_nans()
    )
    monitor = MonitorEvidence(
        n_points=mine.height,
        max_abs_z=float(zs.max()) if zs.len() else None,
        drift_flagged=bool(mine["ewma_signal"].any()),
        shift_nm=float(shifts.mean()) if shifts.len() else None,
    )
    daily = summarise_monitor_days(raw.drop("measured_at"))
    win = daily.filter(pl.col("day").is_in(sorted(win_days)))
    base_set = set(raw.filter(in_base)["day"].unique().to_list())
    base = daily.filter(pl.col("day").is_in(sorted(base_set)))
    fleet = None
    if win.filter(pl.col("tool") == tool).height >= s.min_fleet_days and win["tool"].n_unique() >= 2:
        now = estimate_fleet_matching(win).filter(pl.col("tool") == tool)
        then = estimate_fleet_matching(base).filter(pl.col("tool") == tool)
        if now.height and now["offset_lo"][0] is not None and then.height:
            fleet = FleetOffset(
                offset_nm=float(now["offset_nm"][0]), ci_low_nm=float(now["offset_lo"][0]),
                ci_high_nm=float(now["offset_hi"][0]), baseline_offset_nm=float(then["offset_nm"][0]),
            )  # fmt: skip
    else:
        ex.notes.append(
            f"Fewer than {s.min_fleet_days} monitor days of {tool} in the window: no fleet offset."
        )
    return monitor, fleet
