"""Tool health for the weekly review: named reads out of the warehouse and the weekly scorecards.

Reads (SQL with bound parameters, one polars frame each, columns in the docstring): monitor-wafer runs,
repeat studies, reference pairs, standard-defect inspections, spec limits, chart points and out-of-control
signals per process tool and chamber, excursions, limit changes and closed dispositions.

:func:`weekly_health` computes the scorecards of one ISO week (``2026-W48``; default the latest week with
data) by calling the pure functions of ``spc``:

- per CD-SEM: monitor bias and EWMA drift with the shape of the change (``spc.metrology``, ``spc.shape``),
  repeatability and reproducibility with P/T against each measured layer's spec (``spc.precision``), the
  offset to the fleet with its interval and the matching slope, resist shrink in the repeat study, and
  accuracy against reference measurements (Mandel fit, TMU; ``spc.accuracy``);
- per inspection tool: capture rate on the standard-defect wafer with its interval, size-calibration error,
  count matching against the rest of the fleet, density trend (``spc.inspection``);
- per process tool and chamber: out-of-control rate (signalled points / chart points), repeat offenders,
  Cpk with its interval (``spc.capability``) and open excursions with their age.

Time conventions: facts are selected by their own time (``measured_at``, ``inspected_at``, a signal's
``point_at``, an excursion's ``first_at``); limit freezes and dispositions by when they were made
(``frozen_at``, ``changed_at``). Excursion states are the current ones.

Signals advise; the fab's out-of-control action plan (OCAP) and qualified engineers decide.
"""

from __future__ import annotations

import dataclasses
import re
from dataclasses import dataclass, field
from datetime import UTC, date, datetime, timedelta

import duckdb
import numpy as np
import polars as pl

from spc import accuracy, inspection, metrology, precision, shape
from warehouse import plan as plan_mod
from warehouse import points as pts_mod
from warehouse import store
from warehouse.errors import ConfigError

__all__ = [
    "HealthSettings",
    "WeeklyHealth",
    "Week",
    "chamber_chart_points",
    "chamber_site_values",
    "closed_dispositions",
    "data_weeks",
    "excursions_by_chamber",
    "inspection_densities",
    "latest_week",
    "limit_changes",
    "measured_layers",
    "monitor_runs",
    "new_excursions",
    "parse_week",
    "read_weekly_health",
    "reference_pairs",
    "repeat_studies",
    "series_signal_counts",
    "spec_limits_at",
    "standard_defect_inspections",
    "standard_defect_sizes",
    "week_of",
    "weekly_health",
]

Con = duckdb.DuckDBPyConnection

CAUTIONS = (
    "Signals advise; they do not decide. Holds, releases, tool downs and requalification are decided under the "
    "fab's out-of-control action plan (OCAP) by qualified engineers.",
    "lotline operates no equipment. Work on e-beam tools (high voltage, vacuum, X-rays, robotics) is for trained, "
    "authorised personnel following the tool's and the fab's safety procedures.",
    "A CD excursion can be a metrology offset: check the measuring tool's monitor status and cross-tool readings "
    "before blaming the process. Commonality and OOC rates are association, not proof of cause.",
)


def _frame(con: Con, sql: str, params: list | None = None) -> pl.DataFrame:
    cur = con.cursor()
    try:
        return cur.sql(sql, params=params or []).pl()
    finally:
        cur.close()


# ------------------------------------------------------------------------------------------ weeks

_WEEK_RE = re.compile(r"^(\d{4})-W(\d{2})$")


@dataclass(frozen=True)
class Week:
    """One ISO week: ``label`` like ``2026-W48``, ``start`` its Monday 00:00 UTC, ``end`` the next Monday."""

    label: str
    start: datetime
    end: datetime

    def previous(self) -> Week:
        """The week before this one."""
        return week_of(self.start - timedelta(days=1))


WHOLE_TOOL = "(all)"
"""Chamber column of the process scorecard for series split by process tool but not by chamber (the
tool's charts over all its chambers)."""


def week_of(at: date | datetime) -> Week:
    """The ISO week holding ``at`` (naive datetimes are UTC).

    Example:
        >>> week_of(datetime(2026, 11, 26, 8)).label
        '2026-W48'
    """
    if isinstance(at, datetime) and at.tzinfo:
        at = at.astimezone(UTC).replace(tzinfo=None)
    y, w, _ = at.isocalendar()
    monday = datetime.fromisocalendar(y, w, 1)
    return Week(f"{y}-W{w:02d}", monday, monday + timedelta(days=7))


def parse_week(text: str) -> Week:
    """``YYYY-Www`` -> :class:`Week`; raises :class:`ConfigError` naming the expected form.

    Example:
        >>> parse_week("2026-W48").start
        datetime.datetime(2026, 11, 23, 0, 0)
    """
    m = _WEEK_RE.match(text.strip())
    try:
        if not m:
            raise ValueError
        monday = datetime.fromisocalendar(int(m.group(1)), int(m.group(2)), 1)
    except ValueError:
        raise ConfigError(
            "not an ISO week",
            found=text,
            expected="YYYY-Www, e.g. 2026-W48",
            fix="pass --week as year, '-W' and the two-digit ISO week number (01..53)",
        ) from None
    return week_of(monday)


def data_weeks(con: Con) -> pl.DataFrame:
    """ISO weeks that hold current measurements or inspections, newest first.

    Columns: week_start (timestamp, Monday 00:00), rows.
    """
    sql = """
SELECT date_trunc('week', t) AS week_start, count(*) AS rows FROM (
    SELECT measured_at AS t FROM measurements WHERE _superseded_by IS NULL
    UNION ALL SELECT inspected_at FROM inspections WHERE _superseded_by IS NULL
) GROUP BY 1 ORDER BY 1 DESC
"""
    return _frame(con, sql)


def latest_week(con: Con) -> Week | None:
    """The newest ISO week with data (None for an empty warehouse)."""
    w = data_weeks(con)
    return week_of(w["week_start"][0]) if w.height else None


# ------------------------------------------------------------------------------------------ CD-SEM reads


def monitor_runs(con: Con, *, end: datetime, start: datetime | None = None) -> pl.DataFrame:
    """Monitor-wafer repeats measured in [start, end) (current rows).

    ``target`` is the monitor feature and site (``feature/site``): each site of the monitor is its own
    artifact, so the within-day SD holds repeats only.

    Columns: tool, target, feature, site_id, layer, parameter, measured_at, day (date), repeat, value.
    """
    sql = """
SELECT metrology_tool AS tool, coalesce(feature, '') || '/' || site_id AS target, feature, site_id, layer,
       parameter, measured_at, CAST(measured_at AS DATE) AS day, "repeat", value
FROM measurements
WHERE sample_kind = 'monitor' AND _superseded_by IS NULL AND measured_at < ?
  AND (?::TIMESTAMP IS NULL OR measured_at >= ?::TIMESTAMP)
ORDER BY tool, target, measured_at, "repeat"
"""
    return _frame(con, sql, [end, start, start])


def repeat_studies(con: Con, *, end: datetime) -> pl.DataFrame:
    """Repeat-study measurements before ``end``; ``session`` is one static-repeat sequence on one site.

    Columns: tool, session, lot_id, wafer_id, site_id, feature, layer, stage, parameter, study_day (date),
    repeat, value, measured_at.
    """
    sql = """
SELECT metrology_tool AS tool,
       lot_id || '|' || wafer_id || '|' || site_id || '|' || coalesce(feature, '') || '|' || parameter || '|'
           || CAST(CAST(measured_at AS DATE) AS VARCHAR) AS session,
       lot_id, wafer_id, site_id, feature, layer, stage, parameter, CAST(measured_at AS DATE) AS study_day,
       "repeat", value, measured_at
FROM measurements
WHERE sample_kind = 'repeat_study' AND _superseded_by IS NULL AND measured_at < ?
ORDER BY tool, session, "repeat"
"""
    return _frame(con, sql, [end])


def reference_pairs(con: Con, *, end: datetime) -> pl.DataFrame:
    """Reference values joined to the CD-SEM measurements of the same feature, layer and parameter.

    The tool's repeats are averaged per feature. Columns: tool, feature, layer, parameter,
    reference_method, reference, reference_uncertainty, measured, measured_sd, n_repeats, measured_at.
    """
    sql = """
WITH m AS (
    SELECT metrology_tool AS tool, feature, layer, parameter, avg(value) AS measured,
           stddev_samp(value) AS measured_sd, count(*) AS n_repeats, min(measured_at) AS measured_at
    FROM measurements
    WHERE sample_kind = 'reference_feature' AND _superseded_by IS NULL AND measured_at < ? AND feature IS NOT NULL
    GROUP BY ALL
)
SELECT m.tool, m.feature, m.layer, m.parameter, r.reference_method, r.reference_value AS reference,
       r.reference_uncertainty, m.measured, m.measured_sd, m.n_repeats, m.measured_at
FROM m JOIN reference_values r
  ON r.feature = m.feature AND r.layer = m.layer AND r.parameter = m.parameter AND r._superseded_by IS NULL
ORDER BY m.tool, r.reference_method, r.reference_value
"""
    return _frame(con, sql, [end])


def spec_limits_at(con: Con, *, at: datetime, parameter: str | None = None) -> pl.DataFrame:
    """Spec limits in force at ``at`` (current rows), optionally of one parameter: per product, layer and
    parameter the newest version begun by then (an open-ended version ends where the next one begins).

    Columns: product, layer, parameter, lsl, target, usl, unit.
    """
    sql = """
SELECT product, layer, parameter, lsl, target, usl, unit FROM spec_limits
WHERE _superseded_by IS NULL AND effective_from <= ? AND (effective_to IS NULL OR effective_to > ?)
  AND (?::VARCHAR IS NULL OR parameter = ?)
QUALIFY row_number() OVER (PARTITION BY product, layer, parameter ORDER BY effective_from DESC) = 1
ORDER BY layer, parameter, product
"""
    return _frame(con, sql, [at, at, parameter, parameter])


def measured_layers(con: Con, *, start: datetime, end: datetime, parameter: str) -> pl.DataFrame:
    """Production layers and products each metrology tool measured in [start, end) for one parameter.

    Columns: tool, layer, product, rows.
    """
    sql = """
SELECT metrology_tool AS tool, layer, product, count(*) AS rows FROM measurements
WHERE sample_kind = 'production' AND _superseded_by IS NULL AND parameter = ?
  AND measured_at >= ? AND measured_at < ?
GROUP BY ALL ORDER BY tool, layer, product
"""
    return _frame(con, sql, [parameter, start, end])


# ------------------------------------------------------------------------------------------ inspection reads


def standard_defect_inspections(con: Con, *, end: datetime, start: datetime | None = None) -> pl.DataFrame:
    """Inspections of standard-defect wafers in [start, end).

    Columns: tool, lot_id, wafer_id, layer, inspected_at, day (date), area_cm2, count.
    """
    sql = """
SELECT inspection_tool AS tool, lot_id, wafer_id, layer, inspected_at, CAST(inspected_at AS DATE) AS day,
       inspected_area_cm2 AS area_cm2, defect_count AS count
FROM inspections
WHERE sample_kind = 'standard_defect' AND _superseded_by IS NULL AND inspected_at < ?
  AND (?::TIMESTAMP IS NULL OR inspected_at >= ?::TIMESTAMP)
ORDER BY tool, inspected_at
"""
    return _frame(con, sql, [end, start, start])


def standard_defect_sizes(con: Con, *, start: datetime, end: datetime) -> pl.DataFrame:
    """Reported sizes of the defects found on standard-defect wafers in [start, end).

    Columns: tool, inspected_at, defect_id, size_nm.
    """
    sql = """
SELECT d.inspection_tool AS tool, d.inspected_at, d.defect_id, d.size_nm
FROM defects d JOIN inspections i
  ON i.lot_id = d.lot_id AND i.wafer_id = d.wafer_id AND i.layer = d.layer
 AND i.inspection_tool = d.inspection_tool AND i.inspected_at = d.inspected_at
WHERE i.sample_kind = 'standard_defect' AND i._superseded_by IS NULL AND d._superseded_by IS NULL
  AND d.size_nm IS NOT NULL AND d.inspected_at >= ? AND d.inspected_at < ?
ORDER BY tool, d.inspected_at, d.defect_id
"""
    return _frame(con, sql, [start, end])


def inspection_densities(con: Con, *, start: datetime, end: datetime, sample_kind: str) -> pl.DataFrame:
    """Inspections of one sample kind in [start, end) with their counts and areas.

    Columns: tool, layer, inspected_at, count, area_cm2.
    """
    sql = """
SELECT inspection_tool AS tool, layer, inspected_at, defect_count AS count, inspected_area_cm2 AS area_cm2
FROM inspections
WHERE sample_kind = ? AND _superseded_by IS NULL AND inspected_area_cm2 > 0
  AND inspected_at >= ? AND inspected_at < ?
ORDER BY tool, layer, inspected_at
"""
    return _frame(con, sql, [sample_kind, start, end])


# ------------------------------------------------------------------------------------------ process-tool reads


def _chamber_entries(con: Con) -> list[plan_mod.PlanEntry]:
    p = plan_mod.current_plan(con)
    if p is None:
        return []
    return [
        e for e in p.entries if not e.is_defect and ("chamber" in e.split or "process_tool" in e.split)
    ] + [e for e in p.entries if e.is_defect and ("chamber" in e.split or "process_tool" in e.split)]


def chamber_chart_points(con: Con, *, start: datetime, end: datetime) -> pl.DataFrame:
    """Chart points in [start, end) of every plan series split by process tool or chamber.

    Points come from the plan entry's own statistic (``warehouse.points``), so they are the points the
    evaluation charts. Columns: series_id, chart, layer, parameter, process_tool, chamber, points.
    """
    cols = {
        "series_id": pl.Int64,
        "chart": pl.String,
        "layer": pl.String,
        "parameter": pl.String,
        "process_tool": pl.String,
        "chamber": pl.String,
        "points": pl.Int64,
    }
    out = []
    series = _frame(con, "SELECT series_id, chart, layer, parameter, split_json FROM chart_series")
    for e in _chamber_entries(con):
        pts = pts_mod.read_points(con, e).filter((pl.col("point_at") >= start) & (pl.col("point_at") < end))
        if pts.height == 0:
            continue
        scols = pts_mod.series_columns(e)
        g = pts.group_by(scols).agg(pl.len().cast(pl.Int64).alias("points"))
        g = g.with_columns(
            pl.Series("split_json", [pts_mod.split_json(e, r) for r in g.to_dicts()], dtype=pl.String),
            pl.lit(e.name).alias("chart"),
        )
        for c in ("process_tool", "chamber"):
            if c not in g.columns:
                g = g.with_columns(pl.lit(None, pl.String).alias(c))
        g = g.join(series, on=["chart", "layer", "parameter", "split_json"], how="inner")
        out.append(g.select(list(cols)))
    return pl.concat(out) if out else pl.DataFrame(schema=cols)


def chamber_site_values(con: Con, *, start: datetime, end: datetime) -> pl.DataFrame:
    """Production site values in [start, end) of the layers charted by process tool or chamber, with specs.

    For every measurement entry of the plan split by process tool or chamber, its site values (the entry's
    selector, its step's tool and chamber) with the spec limits in force at each point.
    Columns: chart, layer, parameter, product, process_tool, chamber, value, lsl, usl.
    """
    cols = {
        "chart": pl.String,
        "layer": pl.String,
        "parameter": pl.String,
        "product": pl.String,
        "process_tool": pl.String,
        "chamber": pl.String,
        "value": pl.Float64,
        "lsl": pl.Float64,
        "usl": pl.Float64,
    }
    out = []
    for e in _chamber_entries(con):
        if e.is_defect:
            continue
        site = dataclasses.replace(e, statistic="site_value", spec_check=True)
        pts = pts_mod.read_points(con, site).filter(
            (pl.col("point_at") >= start) & (pl.col("point_at") < end)
        )
        if pts.height == 0:
            continue
        for c in ("process_tool", "chamber"):
            if c not in pts.columns:
                pts = pts.with_columns(pl.lit(None, pl.String).alias(c))
        out.append(
            pts.with_columns(pl.lit(e.name).alias("chart"), pl.col("product_any").alias("product"))
            .select(list(cols))
            .cast(cols)
        )
    return pl.concat(out) if out else pl.DataFrame(schema=cols)


def series_signal_counts(con: Con, *, start: datetime, end: datetime) -> pl.DataFrame:
    """Standing out-of-control signals per series with point time in [start, end) (rule ``oos`` excluded).

    Columns: series_id, signalled_points, signals.
    """
    sql = """
SELECT series_id, count(DISTINCT point_key) AS signalled_points, count(*) AS signals
FROM signals
WHERE withdrawn_at IS NULL AND rule <> 'oos' AND point_at >= ? AND point_at < ?
GROUP BY series_id ORDER BY series_id
"""
    return _frame(con, sql, [start, end])


def excursions_by_chamber(con: Con, *, end: datetime) -> pl.DataFrame:
    """Excursions whose first point is before ``end``, with their series' process tool and chamber.

    Columns: excursion_id, chart, layer, parameter, process_tool, chamber, metrology_tool, state, severity,
    first_at, last_at, n_signals.
    """
    sql = """
SELECT e.excursion_id, e.chart, s.layer, s.parameter, s.process_tool, s.chamber, s.metrology_tool, e.state,
       e.severity, e.first_at, e.last_at, e.n_signals
FROM excursions e JOIN chart_series s USING (series_id)
WHERE e.first_at < ?
ORDER BY e.first_at, e.excursion_id
"""
    return _frame(con, sql, [end])


# ------------------------------------------------------------------------------------------ changes


def limit_changes(con: Con, *, start: datetime, end: datetime) -> pl.DataFrame:
    """Control-limit versions frozen in [start, end), with the version they replaced.

    Columns: series_id, chart, layer, parameter, split_json, version, center, sigma, lcl, ucl,
    previous_center, previous_sigma, frozen_at, frozen_by, reason.
    """
    sql = """
WITH l AS (
    SELECT *, lag(center) OVER w AS previous_center, lag(sigma) OVER w AS previous_sigma
    FROM control_limits WINDOW w AS (PARTITION BY series_id ORDER BY version)
)
SELECT l.series_id, s.chart, s.layer, s.parameter, s.split_json, l.version, l.center, l.sigma, l.lcl, l.ucl,
       l.previous_center, l.previous_sigma, l.frozen_at, l.frozen_by, l.reason
FROM l JOIN chart_series s USING (series_id)
WHERE l.frozen_at >= ? AND l.frozen_at < ?
ORDER BY l.frozen_at, l.series_id
"""
    return _frame(con, sql, [start, end])


def new_excursions(con: Con, *, start: datetime, end: datetime) -> pl.DataFrame:
    """Excursions whose first signalled point lies in [start, end).

    Columns: excursion_id, chart, layer, parameter, process_tool, chamber, metrology_tool, state, severity,
    first_at, n_signals.
    """
    sql = """
SELECT e.excursion_id, e.chart, s.layer, s.parameter, s.process_tool, s.chamber, s.metrology_tool, e.state,
       e.severity, e.first_at, e.n_signals
FROM excursions e JOIN chart_series s USING (series_id)
WHERE e.first_at >= ? AND e.first_at < ?
ORDER BY e.first_at, e.excursion_id
"""
    return _frame(con, sql, [start, end])


def closed_dispositions(con: Con, *, start: datetime, end: datetime) -> pl.DataFrame:
    """Dispositions that closed an excursion in [start, end) (audit rows with to_state 'closed').

    Columns: excursion_id, chart, changed_at, changed_by, classification, cause_category, action, comment.
    """
    sql = """
SELECT a.excursion_id, e.chart, a.changed_at, a.changed_by, a.classification, a.cause_category, a.action,
       a.comment
FROM excursion_audit a JOIN excursions e USING (excursion_id)
WHERE a.to_state = 'closed' AND a.changed_at >= ? AND a.changed_at < ?
ORDER BY a.changed_at, a.audit_id
"""
    return _frame(con, sql, [start, end])


# ------------------------------------------------------------------------------------------ scorecards


@dataclass(frozen=True)
class HealthSettings:
    """Settings of the weekly tool-health scorecards."""

    monitor: metrology.MonitorSettings = field(default_factory=metrology.MonitorSettings)
    """Monitor-wafer charts (Phase I baseline days, EWMA design, S-chart width)."""
    precision_parameter: str = "cd_mid"
    """Parameter whose spec limits the P/T of each measured layer uses."""
    shape_days: int = 56
    """Trailing days of monitor means fitted for the shape of a change (step or ramp)."""
    matching_limit_nm: float = 0.5
    """Offset to the fleet beyond which a CD-SEM is flagged when its interval also excludes 0."""
    standard_placed: int = 240
    """Defects placed on the standard-defect wafer inside its inspected area (all size bins)."""
    standard_sizes_nm: tuple[float, ...] = (45.0, 80.0, 150.0)
    """Known sizes of the placed standard defects; a found defect is matched to the nearest one."""
    capture_baseline_days: int = 20
    """First days of each tool's standard-wafer inspections that set its baseline capture rate."""
    density_days: int = 28
    """Trailing days of production inspections in the density-trend test."""
    repeat_offender_days: int = 28
    """Trailing days in which a chamber with at least ``repeat_offender_min`` excursions is a repeat offender."""
    repeat_offender_min: int = 2
    confidence: float = 0.95
    """Two-sided confidence of every interval."""


@dataclass
class WeeklyHealth:
    """The weekly tool-health review: scorecards, chart data and what changed. Frames, JSON-friendly."""

    week: Week
    previous: Week
    cdsem: pl.DataFrame
    cdsem_pt: pl.DataFrame
    monitor_daily: pl.DataFrame
    fleet_offsets: pl.DataFrame
    repeat_study: pl.DataFrame
    repeat_means: pl.DataFrame
    accuracy_fit: pl.DataFrame
    accuracy_pairs: pl.DataFrame
    inspection: pl.DataFrame
    capture_trend: pl.DataFrame
    density_trend: pl.DataFrame
    process: pl.DataFrame
    process_layers: pl.DataFrame
    limit_changes: pl.DataFrame
    new_excursions: pl.DataFrame
    closed_dispositions: pl.DataFrame
    attention: list[str] = field(default_factory=list)
    cautions: tuple[str, ...] = CAUTIONS
    notes: list[str] = field(default_factory=list)

    def frames(self) -> dict[str, pl.DataFrame]:
        """Every frame by name."""
        return {
            f.name: getattr(self, f.name)
            for f in dataclasses.fields(self)
            if isinstance(getattr(self, f.name), pl.DataFrame)
        }

    def to_dict(self) -> dict[str, object]:
        """JSON-friendly summary: week, scorecards (rows as dicts), changes, attention list, cautions."""
        return {
            "week": self.week.label,
            "start": self.week.start.isoformat(),
            "end": self.week.end.isoformat(),
            "cdsem": self.cdsem.to_dicts(),
            "cdsem_pt": self.cdsem_pt.to_dicts(),
            "inspection": self.inspection.to_dicts(),
            "process": self.process.to_dicts(),
            "limit_changes": self.limit_changes.to_dicts(),
            "new_excursions": self.new_excursions.to_dicts(),
            "closed_dispositions": self.closed_dispositions.to_dicts(),
            "attention": self.attention,
            "cautions": list(self.cautions),
            "notes": self.notes,
        }


def read_weekly_health(
    path=None,
    *,
    week: str | Week | None = None,
    settings: HealthSettings | None = None,
    wait_s: float = store.DEFAULT_WAIT_S,
) -> WeeklyHealth:
    """Open the warehouse read-only, compute :func:`weekly_health`, close it."""
    with store.open_warehouse(path, read_only=True, wait_s=wait_s) as con:
        return weekly_health(con, week=week, settings=settings)


def weekly_health(
    con: Con, *, week: str | Week | None = None, settings: HealthSettings | None = None
) -> WeeklyHealth:
    """The weekly tool-health scorecards of ``week`` (``2026-W48``; default: the latest week with data).

    Example:
        >>> with store.open_warehouse("lotline.duckdb", read_only=True) as con:  # doctest: +SKIP
        ...     h = weekly_health(con, week="2026-W48")
    """
    s = settings or HealthSettings()
    if week is None:
        wk = latest_week(con)
        if wk is None:
            raise ConfigError(
                "the warehouse holds no measurements or inspections", fix="run `lotline ingest PATH` first"
            )
    else:
        wk = week if isinstance(week, Week) else parse_week(week)
    notes: list[str] = []
    cd = _cdsem_scorecard(con, wk, s, notes)
    ins = _inspection_scorecard(con, wk, s, notes)
    proc = _process_scorecard(con, wk, s, notes)
    h = WeeklyHealth(
        week=wk,
        previous=wk.previous(),
        **cd,
        **ins,
        **proc,
        limit_changes=limit_changes(con, start=wk.start, end=wk.end),
        new_excursions=new_excursions(con, start=wk.start, end=wk.end),
        closed_dispositions=closed_dispositions(con, start=wk.start, end=wk.end),
        notes=notes,
    )
    h.attention = _attention(h, s)
    return h


# --- CD-SEMs


def _cdsem_scorecard(con: Con, wk: Week, s: HealthSettings, notes: list[str]) -> dict[str, pl.DataFrame]:
    raw = monitor_runs(con, end=wk.end)
    tools_cols = {"tool": pl.String}
    empty = pl.DataFrame(schema=tools_cols)
    out: dict[str, pl.DataFrame] = {
        "cdsem": empty,
        "cdsem_pt": empty,
        "monitor_daily": empty,
        "fleet_offsets": empty,
    }
    if raw.height:
        mon = metrology.evaluate_monitor_health(
            raw.select("tool", "target", "day", "repeat", "value"), settings=s.monitor
        )
        in_week = (pl.col("day") >= wk.start.date()) & (pl.col("day") < wk.end.date())
        week_rows = mon.filter(in_week)
        # per tool and day, averaged over the monitor's targets (for the charts and the shape fit)
        daily = (
            mon.group_by("tool", "day")
            .agg(
                pl.col("mean_nm").mean(),
                (pl.col("mean_nm") - pl.col("baseline_mean_nm")).mean().alias("deviation_nm"),
                (pl.col("ewma_nm") - pl.col("baseline_mean_nm")).mean().alias("ewma_deviation_nm"),
                (pl.col("ewma_ucl") - pl.col("baseline_mean_nm")).mean().alias("ewma_limit_nm"),
                pl.col("ewma_signal").any(),
                pl.col("sd_nm").mean(),
                pl.col("s_ucl").mean(),
                pl.col("s_signal").any(),
                pl.col("fleet_offset_nm").mean(),
            )
            .sort("tool", "day")
        )
        out["monitor_daily"] = daily
        recent = daily.filter(pl.col("day") >= (wk.end - timedelta(days=s.shape_days)).date()).with_columns(
            (pl.col("day") - pl.lit(wk.start.date())).dt.total_days().alias("day_no")
        )
        shapes = shape.compare_step_and_ramp(
            recent, by=["tool"], order="day_no", value="mean_nm"
        ).with_columns((pl.lit(wk.start.date()) + pl.duration(days=pl.col("step_after"))).alias("step_day"))
        per_tool = week_rows.group_by("tool").agg(
            pl.col("day").n_unique().cast(pl.Int64).alias("monitor_days"),
            pl.col("bias_nm").mean(),
            pl.col("reference_source").first(),
            pl.col("day").filter(pl.col("ewma_signal")).n_unique().cast(pl.Int64).alias("ewma_signal_days"),
            pl.col("day").filter(pl.col("s_signal")).n_unique().cast(pl.Int64).alias("s_signal_days"),
        )
        last = (
            week_rows.sort("day")
            .group_by("tool")
            .agg(
                (pl.col("ewma_nm") - pl.col("baseline_mean_nm"))
                .filter(pl.col("day") == pl.col("day").max())
                .mean()
                .alias("drift_nm")
            )
        )
        day_frame = week_rows.select("tool", "target", "day", "n", "mean_nm", "sd_nm")
        match = (
            metrology.estimate_fleet_matching(day_frame, confidence=s.confidence)
            if day_frame.height
            else None
        )
        levels = precision.estimate_precision_levels(
            day_frame.rename({"target": "artifact", "mean_nm": "mean", "sd_nm": "sd"}).with_columns(
                pl.lit(wk.label).alias("run")
            ),
            by=["tool"],
        )
        prec = (
            levels.group_by("tool")
            .agg(
                pl.col("sd").filter(pl.col("level") == 1).first().alias("repeatability_nm"),
                pl.col("component_sd").filter(pl.col("level") == 2).first().alias("day_to_day_nm"),
            )
            .with_columns(
                (pl.col("repeatability_nm").pow(2) + pl.col("day_to_day_nm").fill_null(0.0).pow(2))
                .sqrt()
                .alias("reproducibility_nm")
            )
        )
        card = per_tool.join(last, on="tool", how="left").join(prec, on="tool", how="left")
        card = card.join(
            shapes.select(
                "tool",
                pl.col("shape").alias("change_shape"),
                pl.col("changed").alias("change_clear"),
                pl.col("slope").alias("drift_rate_nm_per_day"),
                "step_day",
                pl.col("step_size").alias("step_nm"),
            ),
            on="tool",
            how="left",
        )
        if match is not None:
            card = card.join(
                match.select(
                    "tool",
                    pl.col("offset_nm").alias("fleet_offset_nm"),
                    pl.col("offset_lo").alias("fleet_offset_lo"),
                    pl.col("offset_hi").alias("fleet_offset_hi"),
                    pl.col("slope").alias("matching_slope"),
                    pl.col("slope_lo").alias("matching_slope_lo"),
                    pl.col("slope_hi").alias("matching_slope_hi"),
                ),
                on="tool",
                how="left",
            )
            out["fleet_offsets"] = match
        # P/T per tool and measured layer, against that layer's spec
        layers = measured_layers(con, start=wk.start, end=wk.end, parameter=s.precision_parameter)
        specs = spec_limits_at(con, at=wk.end - timedelta(microseconds=1), parameter=s.precision_parameter)
        pt = _precision_to_tolerance(layers, specs, card.select("tool", "reproducibility_nm"))
        out["cdsem_pt"] = pt
        worst = pt.group_by("tool").agg(pl.col("p_to_t").max().alias("worst_p_to_t"))
        card = card.join(worst, on="tool", how="left")
        verdict = precision.classify_precision_to_tolerance(card["worst_p_to_t"].fill_null(np.nan).to_numpy())
        card = card.with_columns(pl.Series("pt_verdict", verdict, dtype=pl.String))
        out["cdsem"] = card
    else:
        notes.append(
            "No monitor-wafer measurements before the end of the week: CD-SEM monitor charts are empty."
        )
    rep, rep_means = _repeat_scorecard(con, wk)
    acc_fit, acc_pairs = _accuracy_scorecard(con, wk, s)
    card = out["cdsem"]
    for extra in (rep, acc_fit):
        if extra.height:
            card = extra if card.height == 0 else card.join(extra, on="tool", how="full", coalesce=True)
    out["cdsem"] = _flag_cdsems(card.sort("tool"), s) if card.height else card
    out.update(repeat_study=rep, repeat_means=rep_means, accuracy_fit=acc_fit, accuracy_pairs=acc_pairs)
    return out


def _precision_to_tolerance(layers: pl.DataFrame, specs: pl.DataFrame, sigma: pl.DataFrame) -> pl.DataFrame:
    cols = ["tool", "layer", "product", "lsl", "usl", "reproducibility_nm", "p_to_t", "verdict"]
    if layers.height == 0 or specs.height == 0:
        return pl.DataFrame(
            schema={
                c: (pl.String if c in ("tool", "layer", "product", "verdict") else pl.Float64) for c in cols
            }
        )
    own = layers.join(specs.filter(pl.col("product") != "*"), on=["layer", "product"], how="left")
    generic = specs.filter(pl.col("product") == "*").select(
        "layer", pl.col("lsl").alias("_glsl"), pl.col("usl").alias("_gusl")
    )
    f = (
        own.join(generic, on="layer", how="left")
        .with_columns(pl.coalesce("lsl", "_glsl").alias("lsl"), pl.coalesce("usl", "_gusl").alias("usl"))
        .filter(pl.col("lsl").is_not_null() & pl.col("usl").is_not_null())
    )
    f = f.join(sigma, on="tool", how="inner")
    ratio = precision.precision_to_tolerance(
        f["reproducibility_nm"].to_numpy(), f["lsl"].to_numpy(), f["usl"].to_numpy()
    )
    return (
        f.with_columns(
            pl.Series("p_to_t", ratio, dtype=pl.Float64),
            pl.Series("verdict", precision.classify_precision_to_tolerance(ratio), dtype=pl.String),
        )
        .select(cols)
        .sort("tool", "layer", "product")
    )


def _repeat_scorecard(con: Con, wk: Week) -> tuple[pl.DataFrame, pl.DataFrame]:
    rs = repeat_studies(con, end=wk.end)
    if rs.height == 0:
        return pl.DataFrame(schema={"tool": pl.String}), pl.DataFrame(schema={"tool": pl.String})
    latest = rs.filter(pl.col("study_day") == pl.col("study_day").max().over("tool"))
    trend = precision.evaluate_repeat_trend(latest, by=["tool"], session=["session"])
    days = latest.group_by("tool").agg(
        pl.col("study_day").first(), pl.col("stage").first().alias("study_stage")
    )
    card = trend.select(
        "tool",
        pl.col("slope_per_repeat").alias("shrink_nm_per_repeat"),
        pl.col("p_value").alias("shrink_p_value"),
        pl.col("trend_detected").alias("shrink_detected"),
        pl.col("sd_raw").alias("repeat_sd_raw_nm"),
        pl.col("sd_detrended").alias("repeat_sd_detrended_nm"),
    ).join(days, on="tool", how="left")
    # mean deviation of each repeat from its session's mean: the shrink curve
    means = (
        latest.with_columns((pl.col("value") - pl.col("value").mean().over("tool", "session")).alias("_d"))
        .group_by("tool", "repeat")
        .agg(pl.col("_d").mean().alias("deviation_nm"))
        .sort("tool", "repeat")
    )
    return card, means


def _accuracy_scorecard(con: Con, wk: Week, s: HealthSettings) -> tuple[pl.DataFrame, pl.DataFrame]:
    pairs = reference_pairs(con, end=wk.end)
    if pairs.height < 3:
        return pl.DataFrame(schema={"tool": pl.String}), pairs
    fits = []
    for method in sorted(pairs["reference_method"].unique().to_list()):
        p = pairs.filter(pl.col("reference_method") == method)
        u_ref = float(p["reference_uncertainty"].fill_null(0.0).mean())
        # lambda = var(tool error of a feature mean) / var(reference error) (Mandel); pooled over the fleet
        tool_var = float((p["measured_sd"].fill_null(0.0).pow(2) / p["n_repeats"]).mean())
        lam = tool_var / u_ref**2 if u_ref > 0 else 1.0
        f = accuracy.fit_errors_in_variables(
            p.select("tool", "reference", "measured"),
            by=["tool"],
            error_variance_ratio=max(lam, 1e-6),
            reference_sd=u_ref,
            confidence=s.confidence,
        )
        fits.append(
            f.with_columns(
                pl.lit(method).alias("reference_method"), pl.lit(lam).alias("error_variance_ratio")
            )
        )
    fit = pl.concat(fits).sort("tool", "reference_method")
    # one column set per tool: the method with the most features (ties: first by name)
    best = (
        fit.sort(["tool", "n", "reference_method"], descending=[False, True, False])
        .group_by("tool", maintain_order=True)
        .first()
    )
    card = best.select(
        "tool",
        pl.col("reference_method").alias("accuracy_reference"),
        pl.col("n").alias("accuracy_features"),
        pl.col("slope").alias("accuracy_slope"),
        pl.col("slope_lo").alias("accuracy_slope_lo"),
        pl.col("slope_hi").alias("accuracy_slope_hi"),
        pl.col("offset").alias("accuracy_offset_nm"),
        pl.col("mean_offset").alias("accuracy_mean_offset_nm"),
        pl.col("tmu").alias("tmu_nm"),
    )
    return card, pairs.join(
        fit.select(
            "tool",
            "reference_method",
            pl.col("slope").alias("fit_slope"),
            pl.col("offset").alias("fit_offset_nm"),
        ),
        on=["tool", "reference_method"],
        how="left",
    )


def _flag_cdsems(card: pl.DataFrame, s: HealthSettings) -> pl.DataFrame:
    for c, dt in (
        ("ewma_signal_days", pl.Int64),
        ("monitor_days", pl.Int64),
        ("change_shape", pl.String),
        ("change_clear", pl.Boolean),
        ("fleet_offset_nm", pl.Float64),
        ("fleet_offset_lo", pl.Float64),
        ("fleet_offset_hi", pl.Float64),
        ("drift_nm", pl.Float64),
    ):
        if c not in card.columns:
            card = card.with_columns(pl.lit(None, dt).alias(c))
    signalled = pl.col("ewma_signal_days").fill_null(0) > 0
    # a drift or a step only where that shape fits the recent days better than a constant level (BIC);
    # an EWMA signal over noise about a level is reported as a signal of no clear shape
    clear = pl.col("change_clear").fill_null(False)
    drift = (
        pl.when(pl.col("monitor_days").fill_null(0) == 0)
        .then(pl.lit("no data"))  # no monitor run in the week: nothing to call ok
        .when(signalled & clear & (pl.col("change_shape") == "ramp"))
        .then(pl.lit("drift"))
        .when(signalled & clear & (pl.col("change_shape") == "step"))
        .then(pl.lit("step"))
        .when(signalled)
        .then(pl.lit("signal"))
        .otherwise(pl.lit("ok"))
    )
    off = (
        (pl.col("fleet_offset_nm").abs() > s.matching_limit_nm)
        & ((pl.col("fleet_offset_lo") > 0) | (pl.col("fleet_offset_hi") < 0))
    ).fill_null(False)
    return card.with_columns(drift.alias("monitor_status"), off.alias("offset_flag"))


# --- inspection tools


def _inspection_scorecard(con: Con, wk: Week, s: HealthSettings, notes: list[str]) -> dict[str, pl.DataFrame]:
    std = standard_defect_inspections(con, end=wk.end)
    empty = pl.DataFrame(schema={"tool": pl.String})
    card = empty
    trend = empty
    if std.height:
        placed = s.standard_placed
        std = std.with_columns(
            pl.lit(placed, pl.Int64).alias("placed"),
            pl.min_horizontal(pl.col("count"), pl.lit(placed)).cast(pl.Int64).alias("found"),
        )
        trend = inspection.evaluate_capture_rate(std, by=["tool", "inspected_at"], confidence=s.confidence)
        week_std = std.filter(pl.col("inspected_at") >= wk.start)
        first = std.group_by("tool").agg(pl.col("day").min().alias("_d0"))
        base = std.join(first, on="tool").filter(
            (pl.col("day") - pl.col("_d0")).dt.total_days() < s.capture_baseline_days
        )
        base_rate = inspection.evaluate_capture_rate(base, by=["tool"], confidence=s.confidence).select(
            "tool",
            pl.col("capture_rate").alias("baseline_capture"),
            pl.col("capture_lo").alias("baseline_capture_lo"),
        )
        if week_std.height:
            cr = inspection.evaluate_capture_rate(week_std, by=["tool"], confidence=s.confidence)
            card = (
                cr.select(
                    "tool",
                    pl.col("n_inspections").alias("std_inspections"),
                    "capture_rate",
                    "capture_lo",
                    "capture_hi",
                )
                .join(base_rate, on="tool", how="left")
                .with_columns(
                    (pl.col("capture_hi") < pl.col("baseline_capture")).fill_null(False).alias("capture_fell")
                )
            )
            # count matching: each tool against the rest of the fleet, pooled over the week's standard wafers
            tot = week_std.group_by("tool").agg(pl.col("count").sum(), pl.col("area_cm2").sum())
            if tot.height >= 2:
                all_c, all_a = int(tot["count"].sum()), float(tot["area_cm2"].sum())
                rows = pl.concat(
                    [
                        tot.select(pl.col("tool").alias("wafer"), "tool", "count", "area_cm2"),
                        tot.select(
                            pl.col("tool").alias("wafer"),
                            pl.lit("(rest of fleet)").alias("tool"),
                            (all_c - pl.col("count")).alias("count"),
                            (all_a - pl.col("area_cm2")).alias("area_cm2"),
                        ),
                    ]
                ).select("wafer", "tool", "count", "area_cm2")
                m = inspection.compare_tool_counts(
                    rows, reference_tool="(rest of fleet)", confidence=s.confidence
                )
                card = card.join(
                    m.select(
                        "tool",
                        pl.col("density_ratio").alias("count_ratio_to_fleet"),
                        pl.col("ratio_lo").alias("count_ratio_lo"),
                        pl.col("ratio_hi").alias("count_ratio_hi"),
                        pl.col("matched").alias("count_matched"),
                    ),
                    on="tool",
                    how="left",
                )
            sizes = standard_defect_sizes(con, start=wk.start, end=wk.end)
            if sizes.height:
                known = np.asarray(s.standard_sizes_nm, dtype=float)
                rep = sizes["size_nm"].to_numpy()
                nearest = known[np.abs(rep[:, None] - known[None, :]).argmin(axis=1)]
                cal = inspection.evaluate_size_calibration(
                    sizes.with_columns(
                        pl.Series("known_size_nm", nearest), pl.col("size_nm").alias("reported_size_nm")
                    ),
                    by=["tool"],
                )
                card = card.join(
                    cal.select(
                        "tool",
                        pl.col("mean_error_nm").alias("size_error_nm"),
                        pl.col("rms_error_nm").alias("size_rms_error_nm"),
                    ),
                    on="tool",
                    how="left",
                )
        else:
            notes.append("No standard-defect inspections in the week.")
    dens = inspection_densities(
        con, start=wk.end - timedelta(days=s.density_days), end=wk.end, sample_kind="monitor"
    )
    kind = "monitor"
    if dens.height == 0:
        dens = inspection_densities(
            con, start=wk.end - timedelta(days=s.density_days), end=wk.end, sample_kind="production"
        )
        kind = "production"
    density = pl.DataFrame(schema={"tool": pl.String})
    if dens.height:
        density = inspection.evaluate_density_trend(dens, by=["tool", "layer"]).with_columns(
            pl.lit(kind).alias("sample_kind")
        )
        week_d = (
            dens.filter(pl.col("inspected_at") >= wk.start)
            .group_by("tool")
            .agg(
                (pl.col("count").sum() / pl.col("area_cm2").sum()).alias("density_per_cm2"),
                pl.len().cast(pl.Int64).alias("inspections"),
            )
        )
        flagged = (
            density.filter(pl.col("trend_detected"))
            .group_by("tool")
            .agg(
                pl.concat_str(
                    pl.col("layer"),
                    pl.when(pl.col("slope_per_day") > 0).then(pl.lit(" up")).otherwise(pl.lit(" down")),
                )
                .sort()
                .str.join(", ")
                .alias("density_trends")
            )
        )
        d_card = week_d.join(flagged, on="tool", how="left")
        card = d_card if card.height == 0 else card.join(d_card, on="tool", how="full", coalesce=True)
    return {
        "inspection": card.sort("tool") if card.height else card,
        "capture_trend": trend,
        "density_trend": density,
    }


# --- process tools and chambers


def _process_scorecard(con: Con, wk: Week, s: HealthSettings, notes: list[str]) -> dict[str, pl.DataFrame]:
    keys = ["process_tool", "chamber"]
    pts = chamber_chart_points(con, start=wk.start, end=wk.end)
    if pts.height == 0:
        notes.append(
            "No plan series split by process tool or chamber has points in the week "
            "(load a monitoring plan and run `lotline evaluate`)."
        )
    sig = series_signal_counts(con, start=wk.start, end=wk.end)
    per = (
        pts.join(sig, on="series_id", how="left")
        .with_columns(pl.col("signalled_points").fill_null(0), pl.col("signals").fill_null(0))
        .with_columns(pl.col("chamber").fill_null(WHOLE_TOOL))
    )
    layers = (
        per.group_by([*keys, "layer", "parameter"])
        .agg(pl.col("points").sum(), pl.col("signalled_points").sum())
        .with_columns((pl.col("signalled_points") / pl.col("points")).alias("ooc_rate"))
    )
    card = (
        per.group_by(keys)
        .agg(
            pl.col("points").sum().alias("chart_points"),
            pl.col("signalled_points").sum(),
            pl.col("layer").unique().sort().str.join(", ").alias("layers"),
        )
        .with_columns((pl.col("signalled_points") / pl.col("chart_points")).alias("ooc_rate"))
    )
    # Cpk per layer run (layer, parameter, product, tool, chamber) from the week's site values
    sites = chamber_site_values(con, start=wk.start, end=wk.end).with_columns(
        pl.col("chamber").fill_null(WHOLE_TOOL)
    )
    cpk = _capability(sites, [*keys, "layer", "parameter", "product"], s, notes)
    if cpk.height:
        layers = layers.join(
            cpk.group_by([*keys, "layer", "parameter"]).agg(
                pl.col("cpk").min(), pl.col("cpk_lo").min(), pl.col("cpk_hi").min()
            ),
            on=[*keys, "layer", "parameter"],
            how="left",
        )
        worst = (
            cpk.sort("cpk")
            .group_by(keys, maintain_order=True)
            .agg(
                pl.col("cpk").first().alias("worst_cpk"),
                pl.col("cpk_lo").first().alias("worst_cpk_lo"),
                pl.col("cpk_hi").first().alias("worst_cpk_hi"),
                pl.concat_str(pl.col("layer"), pl.lit(" "), pl.col("product")).first().alias("worst_cpk_run"),
            )
        )
        card = card.join(worst, on=keys, how="left")
    exc = excursions_by_chamber(con, end=wk.end).with_columns(pl.col("chamber").fill_null(WHOLE_TOOL))
    exc = exc.filter(pl.col("process_tool").is_not_null())
    since = wk.end - timedelta(days=s.repeat_offender_days)
    ex_card = (
        exc.group_by(keys)
        .agg(
            (pl.col("state") != "closed").sum().cast(pl.Int64).alias("open_excursions"),
            (
                (
                    pl.lit(wk.end) - pl.col("first_at").filter(pl.col("state") != "closed").min()
                ).dt.total_hours()
                / 24.0
            ).alias("oldest_open_age_days"),
            (pl.col("first_at") >= since).sum().cast(pl.Int64).alias("recent_excursions"),
        )
        .with_columns((pl.col("recent_excursions") >= s.repeat_offender_min).alias("repeat_offender"))
    )
    card = card.join(ex_card, on=keys, how="full", coalesce=True) if card.height else ex_card
    if card.height:
        for c in ("chart_points", "signalled_points", "open_excursions", "recent_excursions"):
            if c in card.columns:
                card = card.with_columns(pl.col(c).fill_null(0))
        card = card.with_columns(pl.col("repeat_offender").fill_null(False)).sort(
            ["ooc_rate", "process_tool", "chamber"], descending=[True, False, False], nulls_last=True
        )
    return {"process": card, "process_layers": layers.sort(["ooc_rate"], descending=True, nulls_last=True)}


def _capability(sites: pl.DataFrame, by: list[str], s: HealthSettings, notes: list[str]) -> pl.DataFrame:
    """Cpk with its interval per group through ``spc.capability`` (one call per layer run)."""
    cols = {
        **{k: pl.String for k in by},
        "n": pl.Int64,
        "cpk": pl.Float64,
        "cpk_lo": pl.Float64,
        "cpk_hi": pl.Float64,
        "ppk": pl.Float64,
        "capability_warnings": pl.String,
    }
    try:
        from spc import capability
    except ImportError:
        notes.append("Cpk is not shown: spc.capability is not available in this installation.")
        return pl.DataFrame(schema=cols)
    data = sites.filter(pl.col("lsl").is_not_null() | pl.col("usl").is_not_null())
    rows = []
    # one capability study per layer run and spec (values in measurement order, as the MR sigma needs)
    for key, g in data.group_by([*by, "lsl", "usl"], maintain_order=True):
        lsl, usl = key[-2], key[-1]
        try:
            c = capability.evaluate_capability(
                g["value"].to_numpy(), lsl=lsl, usl=usl, confidence=s.confidence
            )
        except ValueError:
            continue  # too few values for a capability study
        rows.append(
            {
                **dict(zip(by, key[:-2], strict=True)),
                "n": c.n,
                "cpk": c.cpk,
                "cpk_lo": c.cpk_ci[0],
                "cpk_hi": c.cpk_ci[1],
                "ppk": c.ppk,
                "capability_warnings": " ".join(c.warnings) or None,
            }
        )
    return pl.DataFrame(rows, schema=cols, orient="row") if rows else pl.DataFrame(schema=cols)


# --- attention list


def _fmt(v, nd: int = 2, signed: bool = True) -> str:
    if v is None or (isinstance(v, float) and not np.isfinite(v)):
        return "n/a"
    return f"{v:+.{nd}f}" if signed else f"{v:.{nd}f}"


def _chamber_name(tool: str, chamber: str) -> str:
    if chamber == WHOLE_TOOL:
        return f"Process tool {tool} (charts not split by chamber)"
    return f"Process chamber {tool}/{chamber}"


def _attention(h: WeeklyHealth, s: HealthSettings) -> list[str]:
    """Short sentences naming the tools that need a look, most important first (advice, not decisions)."""
    out: list[str] = []
    c = h.cdsem
    if c.height and "monitor_status" in c.columns:
        for r in c.filter(pl.col("monitor_status") == "drift").iter_rows(named=True):
            out.append(
                f"CD-SEM {r['tool']}: monitor drifting ({_fmt(r.get('drift_rate_nm_per_day'), 3)} nm/day, EWMA "
                f"{_fmt(r.get('drift_nm'))} nm from baseline, signal on {r['ewma_signal_days']} day(s))."
            )
        for r in c.filter(pl.col("monitor_status") == "step").iter_rows(named=True):
            out.append(
                f"CD-SEM {r['tool']}: monitor stepped {_fmt(r.get('step_nm'))} nm on {r.get('step_day')} "
                f"(EWMA signal on {r['ewma_signal_days']} day(s))."
            )
        for r in c.filter(pl.col("monitor_status") == "no data").iter_rows(named=True):
            out.append(f"CD-SEM {r['tool']}: no monitor-wafer run in the week.")
        for r in c.filter(pl.col("monitor_status") == "signal").iter_rows(named=True):
            out.append(
                f"CD-SEM {r['tool']}: monitor EWMA signal on {r['ewma_signal_days']} day(s), no clear step "
                f"or drift in the last {s.shape_days} days (EWMA {_fmt(r.get('drift_nm'))} nm from baseline)."
            )
        for r in c.filter(pl.col("offset_flag")).iter_rows(named=True):
            out.append(
                f"CD-SEM {r['tool']}: offset to fleet {_fmt(r['fleet_offset_nm'])} nm "
                f"[{_fmt(r['fleet_offset_lo'])}, {_fmt(r['fleet_offset_hi'])}]."
            )
        if "pt_verdict" in c.columns:
            for r in c.filter(pl.col("pt_verdict") == "not capable").iter_rows(named=True):
                out.append(
                    f"CD-SEM {r['tool']}: P/T {_fmt(r['worst_p_to_t'], 2, False)} on its tightest layer."
                )
    i = h.inspection
    if i.height and "capture_fell" in i.columns:
        for r in i.filter(pl.col("capture_fell")).iter_rows(named=True):
            out.append(
                f"Inspection tool {r['tool']}: capture rate fell to {r['capture_rate']:.1%} "
                f"[{r['capture_lo']:.1%}, {r['capture_hi']:.1%}] from {r['baseline_capture']:.1%}."
            )
    p = h.process
    if p.height and "ooc_rate" in p.columns:
        top = p.filter(pl.col("ooc_rate").is_not_null() & (pl.col("signalled_points") > 0)).head(1)
        for r in top.iter_rows(named=True):
            out.append(
                f"{_chamber_name(r['process_tool'], r['chamber'])}: highest OOC rate {r['ooc_rate']:.1%} "
                f"({r['signalled_points']} of {r['chart_points']} points)."
            )
        if "repeat_offender" in p.columns:
            offenders = p.filter(pl.col("repeat_offender")).sort("recent_excursions", descending=True)
            for r in offenders.head(3).iter_rows(named=True):
                out.append(
                    f"{_chamber_name(r['process_tool'], r['chamber'])}: repeat offender "
                    f"({r['recent_excursions']} excursions in {s.repeat_offender_days} days)."
                )
            if offenders.height > 3:
                out.append(
                    f"{offenders.height - 3} more repeat-offender chambers are listed in the scorecard."
                )
    return out
