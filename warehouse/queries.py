"""Named read functions for the dashboard and the reports: SQL stays in ``warehouse/``.

Every function takes an open connection (``store.open_warehouse(path, read_only=True)``) and keyword
arguments only, binds every value as a parameter and returns a polars DataFrame whose columns are listed in
its docstring. An empty result is a normal frame with those columns and no rows.

Example:
    >>> from warehouse import store, queries  # doctest: +SKIP
    >>> with store.open_warehouse("lotline.duckdb", read_only=True) as con:  # doctest: +SKIP
    ...     grid = queries.excursions_by_tool_layer_day(con, start=date(2026, 9, 1))
"""

from __future__ import annotations

from datetime import UTC, date, datetime, timedelta

import duckdb
import polars as pl

__all__ = [
    "chart_point_count",
    "excursion_detail",
    "excursion_history",
    "excursion_point_tools",
    "excursion_signals",
    "excursions_by_tool_layer_day",
    "ingest_log",
    "list_excursions",
    "lot_defect_wafers",
    "lot_first_times",
    "lot_measurements",
    "lot_process_history",
    "newest_signals",
    "open_excursions_by_severity",
    "rejects",
    "series_info",
    "series_limits",
    "series_points",
    "series_signals",
    "standard_defect_runs",
    "superseded_rows",
    "tool_freshness",
    "wafer_defects",
    "wafer_sites",
]

Con = duckdb.DuckDBPyConnection

_SEVERITY_RANK = (
    "CASE {c} WHEN 'critical' THEN 4 WHEN 'high' THEN 3 WHEN 'medium' THEN 2 WHEN 'low' THEN 1 ELSE 0 END"
)


NOT_SPLIT = "(not split)"
"""Tool of the overview grid's row for series not split by the chosen tool column (charts split only by
product, say): a row of its own, not a total of the tool rows."""


def _frame(con: Con, sql: str, params: list | None = None) -> pl.DataFrame:
    cur = con.cursor()  # one cursor per call: safe when the caller shares a connection across threads
    try:
        return cur.sql(sql, params=params or []).pl()
    finally:
        cur.close()


def _ts(value: date | datetime | None) -> datetime | None:
    if value is None:
        return None
    if isinstance(value, datetime):
        return value.astimezone(UTC).replace(tzinfo=None) if value.tzinfo else value
    return datetime(value.year, value.month, value.day)


# ------------------------------------------------------------------------------------------ excursions

_EXCURSION_SELECT = """
SELECT e.excursion_id, e.state, e.severity, e.chart, s.layer, s.parameter, s.split_json,
       s.process_tool, s.chamber, s.metrology_tool, s.product, e.series_id,
       e.rules_json, e.lots_json, e.first_at, e.last_at, e.n_signals, e.opened_at,
       (SELECT max(a.changed_at) FROM excursion_audit a WHERE a.excursion_id = e.excursion_id) AS updated_at
FROM excursions e JOIN chart_series s USING (series_id)
"""


def list_excursions(
    con: Con,
    *,
    open_only: bool = False,
    since: date | datetime | None = None,
    chart: str | None = None,
    limit: int = 10_000,
) -> pl.DataFrame:
    """Excursions, newest last point first.

    ``open_only`` keeps states open and acknowledged; ``since`` keeps excursions whose last point is at or
    after it.

    Columns: excursion_id, state, severity, chart, layer, parameter, split_json, process_tool, chamber,
    metrology_tool, product, series_id, rules_json, lots_json, first_at, last_at, n_signals, opened_at,
    updated_at.
    """
    sql = (
        _EXCURSION_SELECT
        + """
WHERE (NOT ? OR e.state <> 'closed')
  AND (?::TIMESTAMP IS NULL OR e.last_at >= ?::TIMESTAMP)
  AND (?::VARCHAR IS NULL OR e.chart = ?)
ORDER BY e.last_at DESC, e.excursion_id DESC
LIMIT ?
"""
    )
    t = _ts(since)
    return _frame(con, sql, [open_only, t, t, chart, chart, limit])


def excursions_by_tool_layer_day(
    con: Con,
    *,
    start: date | datetime | None = None,
    end: date | datetime | None = None,
    tool_key: str = "process_tool",
) -> pl.DataFrame:
    """Excursion counts on the overview grid: one row per tool, layer and day of the excursion's first point.

    ``tool_key`` picks the series' split column used as "tool": process_tool (default), chamber or
    metrology_tool; series not split by it count under tool :data:`NOT_SPLIT` (a row of its own, not a
    total of the tools). ``end`` is exclusive.

    Columns: day (date), tool, layer, excursions, open (not closed), signals, max_severity.
    """
    if tool_key not in ("process_tool", "chamber", "metrology_tool", "product"):
        raise ValueError(
            f"tool_key {tool_key!r} is not a split column; use process_tool, chamber or metrology_tool"
        )
    rank = _SEVERITY_RANK.format(c="e.severity")
    sql = f"""
SELECT CAST(date_trunc('day', e.first_at) AS DATE) AS day,
       coalesce(s.{tool_key}, ?) AS tool, s.layer,
       count(*) AS excursions,
       count(*) FILTER (WHERE e.state <> 'closed') AS open,
       sum(e.n_signals) AS signals,
       CASE max({rank}) WHEN 4 THEN 'critical' WHEN 3 THEN 'high' WHEN 2 THEN 'medium' ELSE 'low' END
           AS max_severity
FROM excursions e JOIN chart_series s USING (series_id)
WHERE (?::TIMESTAMP IS NULL OR e.first_at >= ?::TIMESTAMP)
  AND (?::TIMESTAMP IS NULL OR e.first_at < ?::TIMESTAMP)
GROUP BY ALL
ORDER BY day, tool, s.layer
"""
    a, b = _ts(start), _ts(end)
    return _frame(con, sql, [NOT_SPLIT, a, a, b, b])


def open_excursions_by_severity(con: Con) -> pl.DataFrame:
    """Open and acknowledged excursions per severity, most severe first.

    Columns: severity, open, acknowledged, total, oldest_first_at.
    """
    rank = _SEVERITY_RANK.format(c="severity")
    sql = f"""
SELECT severity,
       count(*) FILTER (WHERE state = 'open') AS open,
       count(*) FILTER (WHERE state = 'acknowledged') AS acknowledged,
       count(*) AS total,
       min(first_at) AS oldest_first_at
FROM excursions WHERE state <> 'closed'
GROUP BY severity ORDER BY max({rank}) DESC
"""
    return _frame(con, sql)


def excursion_detail(con: Con, *, excursion_id: int) -> pl.DataFrame:
    """One excursion with its series (zero rows when the id is unknown).

    Columns: as :func:`list_excursions`.
    """
    return _frame(con, _EXCURSION_SELECT + "WHERE e.excursion_id = ?", [excursion_id])


def excursion_history(con: Con, *, excursion_id: int) -> pl.DataFrame:
    """The append-only audit trail of one excursion, oldest first.

    Columns: audit_id, excursion_id, changed_at, changed_by, from_state, to_state, classification,
    cause_category, action, lots_affected_json, comment.
    """
    sql = "SELECT * FROM excursion_audit WHERE excursion_id = ? ORDER BY audit_id"
    return _frame(con, sql, [excursion_id])


def excursion_signals(con: Con, *, excursion_id: int) -> pl.DataFrame:
    """Signals of one excursion (withdrawn ones included, flagged), in point order.

    Columns: signal_id, series_id, point_key, lot_id, wafer_id, point_at, rule, value, statistic,
    limit_version, severity, first_detected_at, withdrawn_at, withdrawn_reason, excursion_id.
    """
    sql = "SELECT * FROM signals WHERE excursion_id = ? ORDER BY point_at, point_key, rule"
    return _frame(con, sql, [excursion_id])


# ------------------------------------------------------------------------------------------ signals


def newest_signals(
    con: Con,
    *,
    limit: int = 100,
    since: date | datetime | None = None,
    include_withdrawn: bool = False,
) -> pl.DataFrame:
    """Newest signals first (by detection time, then point time).

    Columns: signal_id, first_detected_at, point_at, lot_id, wafer_id, chart, layer, parameter,
    process_tool, chamber, metrology_tool, product, rule, value, statistic, severity, excursion_id,
    series_id, withdrawn_at.
    """
    sql = """
SELECT g.signal_id, g.first_detected_at, g.point_at, g.lot_id, g.wafer_id, s.chart, s.layer, s.parameter,
       s.process_tool, s.chamber, s.metrology_tool, s.product, g.rule, g.value, g.statistic, g.severity,
       g.excursion_id, g.series_id, g.withdrawn_at
FROM signals g JOIN chart_series s USING (series_id)
WHERE (? OR g.withdrawn_at IS NULL)
  AND (?::TIMESTAMP IS NULL OR g.first_detected_at >= ?::TIMESTAMP)
ORDER BY g.first_detected_at DESC, g.point_at DESC, g.signal_id DESC
LIMIT ?
"""
    t = _ts(since)
    return _frame(con, sql, [include_withdrawn, t, t, limit])


# ------------------------------------------------------------------------------------------ one series


def series_info(con: Con, *, series_id: int | None = None, chart: str | None = None) -> pl.DataFrame:
    """Series with their plan entry and the limits in force (NULL limits: not frozen yet).

    Columns: series_id, chart, layer, parameter, split_json, process_tool, chamber, metrology_tool, product,
    statistic, chart_type, severity, limit_version, center, sigma, lcl, ucl, n_points, last_point_at.
    """
    sql = """
WITH cur AS (
    SELECT * FROM control_limits QUALIFY row_number() OVER (PARTITION BY series_id ORDER BY version DESC) = 1
), plan AS (
    SELECT * FROM chart_plan WHERE plan_version = (SELECT max(plan_version) FROM plans)
)
SELECT s.series_id, s.chart, s.layer, s.parameter, s.split_json, s.process_tool, s.chamber,
       s.metrology_tool, s.product, p.statistic, p.chart_type, p.severity,
       cur.version AS limit_version, cur.center, cur.sigma, cur.lcl, cur.ucl,
       st.n_points, st.last_point_at
FROM chart_series s
LEFT JOIN plan p ON p.chart = s.chart
LEFT JOIN cur USING (series_id)
LEFT JOIN series_state st USING (series_id)
WHERE (?::BIGINT IS NULL OR s.series_id = ?) AND (?::VARCHAR IS NULL OR s.chart = ?)
ORDER BY s.chart, s.layer, s.parameter, s.split_json
"""
    return _frame(con, sql, [series_id, series_id, chart, chart])


def series_limits(con: Con, *, series_id: int | None = None, chart: str | None = None) -> pl.DataFrame:
    """Every frozen limit version (history), newest version last per series.

    Columns: series_id, chart, layer, parameter, split_json, version, center, sigma, sigma_level,
    sigma_source, k_sigma, lcl, ucl, n_ref, overdispersion, baseline_from, baseline_to, baseline_n,
    frozen_at, frozen_by, reason, current (bool).
    """
    sql = """
SELECT l.series_id, s.chart, s.layer, s.parameter, s.split_json, l.version, l.center, l.sigma,
       l.sigma_level, l.sigma_source, l.k_sigma, l.lcl, l.ucl, l.n_ref, l.overdispersion,
       l.baseline_from, l.baseline_to, l.baseline_n, l.frozen_at, l.frozen_by, l.reason,
       l.version = max(l.version) OVER (PARTITION BY l.series_id) AS current
FROM control_limits l JOIN chart_series s USING (series_id)
WHERE (?::BIGINT IS NULL OR l.series_id = ?) AND (?::VARCHAR IS NULL OR s.chart = ?)
ORDER BY s.chart, s.layer, s.parameter, s.split_json, l.version
"""
    return _frame(con, sql, [series_id, series_id, chart, chart])


def series_signals(con: Con, *, series_id: int, include_withdrawn: bool = True) -> pl.DataFrame:
    """Signals of one series in point order.

    Columns: as :func:`excursion_signals`.
    """
    sql = """
SELECT * FROM signals WHERE series_id = ? AND (? OR withdrawn_at IS NULL)
ORDER BY point_at, point_key, rule
"""
    return _frame(con, sql, [series_id, include_withdrawn])


def series_points(con: Con, *, series_id: int) -> pl.DataFrame:
    """The charted points of one series (current rows only), in chart order, with the limits in force.

    Columns: seq, point_key, lot_id, wafer_id, point_at, value, n, center, sigma, lcl, ucl, limit_version.
    Computed from the facts with the plan entry's statistic (one query), so it always matches evaluation.
    """
    from warehouse import points

    return points.read_series_points(con, series_id=series_id)


# ------------------------------------------------------------------------------------------ lots, wafers


def lot_measurements(con: Con, *, lot_id: str) -> pl.DataFrame:
    """One lot across layers: per layer, parameter and wafer, its site statistics, in route order.

    Route order is the order of the first measurement of each layer (metrology follows the route).

    Columns: layer, stage, parameter, wafer_id, metrology_tool, first_measured_at, n_sites, mean, sd,
    min, max, unit.
    """
    sql = """
SELECT layer, any_value(stage) AS stage, parameter, wafer_id, any_value(metrology_tool) AS metrology_tool,
       min(measured_at) AS first_measured_at, count(*) AS n_sites, avg(value) AS mean,
       stddev_samp(value) AS sd, min(value) AS min, max(value) AS max, any_value(unit) AS unit
FROM measurements
WHERE lot_id = ? AND _superseded_by IS NULL
GROUP BY layer, parameter, wafer_id
ORDER BY min(min(measured_at)) OVER (PARTITION BY layer), layer, parameter, wafer_id
"""
    return _frame(con, sql, [lot_id])


def lot_process_history(con: Con, *, lot_id: str) -> pl.DataFrame:
    """The lot's process history along its route (current rows only).

    Columns: step_seq, step, wafer_id, process_tool, chamber, recipe, started_at, ended_at, product.
    """
    sql = """
SELECT step_seq, step, wafer_id, process_tool, chamber, recipe, started_at, ended_at, product
FROM process_history
WHERE lot_id = ? AND _superseded_by IS NULL
ORDER BY started_at, step_seq NULLS LAST, wafer_id NULLS FIRST
"""
    return _frame(con, sql, [lot_id])


def wafer_sites(
    con: Con,
    *,
    lot_id: str,
    wafer_id: str,
    layer: str | None = None,
    parameter: str | None = None,
) -> pl.DataFrame:
    """Site values of one wafer for a wafer map (repeats averaged per site and feature).

    Columns: layer, parameter, site_id, feature, x_mm, y_mm, r_mm, value, n_repeats, measured_at,
    metrology_tool, unit.
    """
    sql = """
SELECT layer, parameter, site_id, feature, any_value(x_mm) AS x_mm, any_value(y_mm) AS y_mm,
       sqrt(any_value(x_mm) ^ 2 + any_value(y_mm) ^ 2) AS r_mm, avg(value) AS value, count(*) AS n_repeats,
       min(measured_at) AS measured_at, any_value(metrology_tool) AS metrology_tool, any_value(unit) AS unit
FROM measurements
WHERE lot_id = ? AND wafer_id = ? AND _superseded_by IS NULL
  AND (?::VARCHAR IS NULL OR layer = ?) AND (?::VARCHAR IS NULL OR parameter = ?)
GROUP BY layer, parameter, site_id, feature
ORDER BY layer, parameter, site_id, feature
"""
    return _frame(con, sql, [lot_id, wafer_id, layer, layer, parameter, parameter])


def wafer_defects(con: Con, *, lot_id: str, wafer_id: str, layer: str | None = None) -> pl.DataFrame:
    """Defect coordinates of one wafer (every inspection of it, or one layer's).

    Columns: layer, inspection_tool, inspected_at, defect_id, x_mm, y_mm, size_nm, defect_class.
    """
    sql = """
SELECT layer, inspection_tool, inspected_at, defect_id, x_mm, y_mm, size_nm, defect_class
FROM defects
WHERE lot_id = ? AND wafer_id = ? AND _superseded_by IS NULL AND (?::VARCHAR IS NULL OR layer = ?)
ORDER BY inspected_at, layer, defect_id
"""
    return _frame(con, sql, [lot_id, wafer_id, layer, layer])


# ------------------------------------------------------------------------------------------ data health


def tool_freshness(con: Con, *, now: datetime | None = None, stale_after_h: float = 24.0) -> pl.DataFrame:
    """Data freshness per tool: when each metrology, inspection or process tool last produced data.

    ``now`` defaults to the current UTC time; a tool is stale when its newest row is older than
    ``stale_after_h`` hours.

    Columns: tool, tool_kind (metrology / inspection / process), last_seen, rows_last_day, hours_since,
    stale (bool).
    """
    at = _ts(now) or datetime.now(UTC).replace(tzinfo=None)
    day_ago = at - timedelta(days=1)
    from warehouse import tool_days

    if tool_days.is_current(con):  # the per-tool-day table, kept by ingest (no scan of every fact row)
        return con.sql(
            tool_days.freshness_sql(),
            params=tool_days.freshness_params(at=at, day_ago=day_ago, stale_after_h=stale_after_h),
        ).pl()
    sql = """
WITH seen AS (
    SELECT metrology_tool AS tool, 'metrology' AS tool_kind, max(measured_at) AS last_seen,
           count(*) FILTER (WHERE measured_at >= ?) AS rows_last_day
    FROM measurements WHERE _superseded_by IS NULL GROUP BY 1
    UNION ALL
    SELECT inspection_tool, 'inspection', max(inspected_at), count(*) FILTER (WHERE inspected_at >= ?)
    FROM inspections WHERE _superseded_by IS NULL GROUP BY 1
    UNION ALL
    SELECT process_tool, 'process', max(coalesce(ended_at, started_at)),
           count(*) FILTER (WHERE started_at >= ?)
    FROM process_history WHERE _superseded_by IS NULL GROUP BY 1
)
SELECT tool, tool_kind, last_seen, rows_last_day,
       date_diff('second', last_seen, ?::TIMESTAMP) / 3600.0 AS hours_since,
       date_diff('second', last_seen, ?::TIMESTAMP) / 3600.0 > ? AS stale
FROM seen ORDER BY tool_kind, tool
"""
    return _frame(con, sql, [day_ago, day_ago, day_ago, at, at, stale_after_h])


def ingest_log(con: Con, *, limit: int = 500, status: str | None = None) -> pl.DataFrame:
    """The ingest log (source_files), newest first.

    Columns: file_id, path, sha256, size_bytes, kind, profile, status, rows_loaded, rows_rejected,
    rows_skipped, rows_superseded, loaded_at, loaded_by, message.
    """
    sql = """
SELECT * FROM source_files WHERE (?::VARCHAR IS NULL OR status = ?)
ORDER BY loaded_at DESC, file_id DESC LIMIT ?
"""
    return _frame(con, sql, [status, status, limit])


def rejects(con: Con, *, file_id: int | None = None, limit: int = 1000) -> pl.DataFrame:
    """Rejected rows with the file they came from.

    Columns: file_id, path, line, column, value, reason.
    """
    sql = """
SELECT r.file_id, f.path, r.line, r."column", r.value, r.reason
FROM rejects r LEFT JOIN source_files f USING (file_id)
WHERE (?::BIGINT IS NULL OR r.file_id = ?)
ORDER BY r.file_id, r.line LIMIT ?
"""
    return _frame(con, sql, [file_id, file_id, limit])


def superseded_rows(con: Con, *, lot_id: str | None = None, limit: int = 1000) -> pl.DataFrame:
    """Audit of corrected re-exports: which file replaced which rows.

    Columns: superseded_at, superseded_by_user, table_name, lot_id, rows, file_id, path,
    superseded_file_id, superseded_path.
    """
    sql = """
SELECT x.superseded_at, x.superseded_by_user, x.table_name, x.lot_id, x.rows, x.file_id, f.path,
       x.superseded_file_id, g.path AS superseded_path
FROM supersessions x
LEFT JOIN source_files f ON f.file_id = x.file_id
LEFT JOIN source_files g ON g.file_id = x.superseded_file_id
WHERE (?::VARCHAR IS NULL OR x.lot_id = ?)
ORDER BY x.superseded_at DESC, x.file_id DESC LIMIT ?
"""
    return _frame(con, sql, [lot_id, lot_id, limit])


# ================================================================================ dashboard additions
# Read functions the dashboard pages need beyond the ones above (same rules: bound parameters only,
# documented columns, empty frame when nothing matches).


def data_time_range(con: Con) -> pl.DataFrame:
    """The time span of the current facts, so views can anchor their windows on the newest data.

    Columns: first_at, last_at (NULL when the warehouse holds no facts).
    """
    sql = """
SELECT min(t0) AS first_at, max(t1) AS last_at FROM (
    SELECT min(measured_at) AS t0, max(measured_at) AS t1 FROM measurements WHERE _superseded_by IS NULL
    UNION ALL
    SELECT min(inspected_at), max(inspected_at) FROM inspections WHERE _superseded_by IS NULL
)
"""
    return _frame(con, sql)


def ooc_by_tool_layer(
    con: Con,
    *,
    start: date | datetime | None = None,
    end: date | datetime | None = None,
    tool_key: str = "process_tool",
) -> pl.DataFrame:
    """Out-of-control counts on the overview grid: standing signals per tool and layer in a window.

    Counts signals whose point time is in [start, end); ``tool_key`` as in
    :func:`excursions_by_tool_layer_day` (series not split by it count under :data:`NOT_SPLIT`).

    Columns: tool, layer, signals, points (distinct signalled points), lots, excursions.
    """
    if tool_key not in ("process_tool", "chamber", "metrology_tool", "product"):
        raise ValueError(
            f"tool_key {tool_key!r} is not a split column; use process_tool, chamber or metrology_tool"
        )
    sql = f"""
SELECT coalesce(s.{tool_key}, ?) AS tool, s.layer,
       count(*) AS signals, count(DISTINCT g.series_id || '|' || g.point_key) AS points,
       count(DISTINCT g.lot_id) AS lots, count(DISTINCT g.excursion_id) AS excursions
FROM signals g JOIN chart_series s USING (series_id)
WHERE g.withdrawn_at IS NULL
  AND (?::TIMESTAMP IS NULL OR g.point_at >= ?::TIMESTAMP)
  AND (?::TIMESTAMP IS NULL OR g.point_at < ?::TIMESTAMP)
GROUP BY ALL
ORDER BY tool, s.layer
"""
    a, b = _ts(start), _ts(end)
    return _frame(con, sql, [NOT_SPLIT, a, a, b, b])


def stored_chart_names(con: Con) -> list[str]:
    """Names of the charts (plan entries) that have stored series, charts since removed from the plan
    included (their limit history stays), sorted."""
    return [r[0] for r in con.execute("SELECT DISTINCT chart FROM chart_series ORDER BY chart").fetchall()]


def series_plan(con: Con, *, series_id: int) -> pl.DataFrame:
    """The plan entry (in the plan in force) a series belongs to: what is charted and which rules apply.

    Columns: series_id, chart, plan_version, statistic, chart_type, params_json, rules_json, baseline_json,
    severity, spec_check, step, stage, sample_kind.
    """
    sql = """
SELECT s.series_id, p.chart, p.plan_version, p.statistic, p.chart_type, p.params_json, p.rules_json,
       p.baseline_json, p.severity, p.spec_check, p.step, p.stage, p.sample_kind
FROM chart_series s
JOIN chart_plan p ON p.chart = s.chart AND p.plan_version = (SELECT max(plan_version) FROM plans)
WHERE s.series_id = ?
"""
    return _frame(con, sql, [series_id])


def series_spec(con: Con, *, series_id: int, at: date | datetime | None = None) -> pl.DataFrame:
    """Spec limits in force at ``at`` (default: now) for a series' layer, parameter and product.

    A row for the series' own product wins over a '*' row; a series that mixes products (not split by
    product) shows the '*' row when there is one, else one product's row (named in ``product``; each point
    is checked against its own product's spec). Then the newest version wins. Columns: lsl, target, usl,
    unit, product, effective_from, effective_to (zero rows when no spec is stored).
    """
    t = _ts(at) or datetime.now(UTC).replace(tzinfo=None)
    sql = """
SELECT l.lsl, l.target, l.usl, l.unit, l.product, l.effective_from, l.effective_to
FROM spec_limits l JOIN chart_series s ON l.layer = s.layer AND l.parameter = s.parameter
WHERE s.series_id = ? AND l._superseded_by IS NULL
  AND (l.product = '*' OR l.product = s.product OR s.product IS NULL)
  AND l.effective_from <= ? AND (l.effective_to IS NULL OR l.effective_to > ?)
ORDER BY CASE WHEN s.product IS NULL THEN l.product <> '*' ELSE l.product = '*' END, l.effective_from DESC,
         l.product
LIMIT 1
"""
    return _frame(con, sql, [series_id, t, t])


def lot_excursions(con: Con, *, lot_id: str) -> pl.DataFrame:
    """Excursions with a standing or withdrawn signal on a point of this lot, newest first.

    Columns: as :func:`list_excursions`.
    """
    sql = (
        _EXCURSION_SELECT
        + """
WHERE e.excursion_id IN (SELECT excursion_id FROM signals WHERE lot_id = ? AND excursion_id IS NOT NULL)
ORDER BY e.last_at DESC, e.excursion_id DESC
"""
    )
    return _frame(con, sql, [lot_id])


def excursion_population_history(con: Con, *, excursion_id: int, days_before: int = 14) -> pl.DataFrame:
    """Process history of the lots around one excursion: the input of a commonality analysis.

    The population is every lot measured on the excursion's layer and parameter from ``days_before`` days
    before its first signalled point to one day after its last; ``affected`` marks the lots with a standing
    signal in the excursion.

    Columns: lot_id, affected (bool), step, step_seq, process_tool, chamber, recipe, started_at.
    """
    sql = """
WITH x AS (
    SELECT e.first_at, e.last_at, s.layer, s.parameter
    FROM excursions e JOIN chart_series s USING (series_id) WHERE e.excursion_id = ?
), hit AS (
    SELECT DISTINCT lot_id FROM signals WHERE excursion_id = ? AND withdrawn_at IS NULL
), pop AS (
    SELECT DISTINCT m.lot_id FROM measurements m, x
    WHERE m.layer = x.layer AND m.parameter = x.parameter AND m._superseded_by IS NULL
      AND m.measured_at >= x.first_at - to_days(CAST(? AS INTEGER))
      AND m.measured_at <= x.last_at + INTERVAL 1 DAY
    UNION SELECT lot_id FROM hit
)
SELECT h.lot_id, h.lot_id IN (SELECT lot_id FROM hit) AS affected, h.step, h.step_seq, h.process_tool,
       h.chamber, h.recipe, h.started_at
FROM process_history h JOIN pop USING (lot_id)
WHERE h._superseded_by IS NULL
ORDER BY h.lot_id, h.started_at, h.step
"""
    return _frame(con, sql, [excursion_id, excursion_id, days_before])


# ------------------------------------------------------------------------------------------ demo scoring


def chart_point_count(con: Con) -> int:
    """Chart points evaluated so far, over every series (the denominator of false-alarm rates)."""
    return int(_frame(con, "SELECT coalesce(sum(n_points), 0) AS n FROM series_state")["n"][0])


def lot_first_times(con: Con, *, lot_ids: list[str], layer: str | None = None) -> pl.DataFrame:
    """First current measurement time of each given lot (on one layer, or on any).

    Columns: lot_id, first_at.
    """
    sql = """
SELECT lot_id, min(measured_at) AS first_at FROM measurements
WHERE list_contains(?::VARCHAR[], lot_id) AND (?::VARCHAR IS NULL OR layer = ?) AND _superseded_by IS NULL
GROUP BY lot_id ORDER BY first_at
"""
    return _frame(con, sql, [lot_ids, layer, layer])


def lot_defect_wafers(con: Con, *, lot_id: str, layer: str | None = None) -> pl.DataFrame:
    """Wafers of a lot that have defect coordinates, most defects first.

    Columns: wafer_id, layer, defects.
    """
    sql = """
SELECT wafer_id, layer, count(*) AS defects FROM defects
WHERE lot_id = ? AND (?::VARCHAR IS NULL OR layer = ?) AND _superseded_by IS NULL
GROUP BY ALL ORDER BY defects DESC, wafer_id
"""
    return _frame(con, sql, [lot_id, layer, layer])


def standard_defect_runs(con: Con, *, inspection_tool: str | None = None) -> pl.DataFrame:
    """Inspections of standard-defect wafers, oldest first.

    Columns: inspection_tool, lot_id, wafer_id, layer, inspected_at, inspected_area_cm2, defect_count.
    """
    sql = """
SELECT inspection_tool, lot_id, wafer_id, layer, inspected_at, inspected_area_cm2, defect_count
FROM inspections
WHERE sample_kind = 'standard_defect' AND (?::VARCHAR IS NULL OR inspection_tool = ?) AND _superseded_by IS NULL
ORDER BY inspection_tool, inspected_at
"""
    return _frame(con, sql, [inspection_tool, inspection_tool])


def first_signal_on_lots(con: Con, *, lot_ids: list[str], start: datetime, end: datetime) -> pl.DataFrame:
    """Per excursion, its first standing signal on one of ``lot_ids`` with a point time in [start, end).

    An excursion that began before ``start`` counts from its first signal inside the window (a later
    shift can join an excursion already open on its series).

    Columns: excursion_id, first_hit_at.
    """
    sql = """
SELECT g.excursion_id, min(g.point_at) AS first_hit_at
FROM signals g
WHERE g.excursion_id IS NOT NULL AND g.withdrawn_at IS NULL AND g.point_at >= ? AND g.point_at < ?
  AND g.lot_id IN (SELECT unnest(?::VARCHAR[]))
GROUP BY g.excursion_id ORDER BY g.excursion_id
"""
    return _frame(con, sql, [start, end, list(lot_ids)])


def excursion_point_tools(con: Con) -> pl.DataFrame:
    """The metrology tools that measured the signalled points of every excursion on a measurement chart.

    Columns: excursion_id, metrology_tool.
    """
    sql = """
SELECT DISTINCT g.excursion_id, m.metrology_tool
FROM signals g JOIN chart_series s USING (series_id)
JOIN measurements m ON m.lot_id = g.lot_id AND (g.wafer_id IS NULL OR m.wafer_id = g.wafer_id)
    AND m.layer = s.layer AND m.parameter = s.parameter AND m._superseded_by IS NULL
WHERE g.excursion_id IS NOT NULL AND g.withdrawn_at IS NULL
ORDER BY 1, 2
"""
    return _frame(con, sql)
