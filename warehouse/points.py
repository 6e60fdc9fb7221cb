"""Charted points of a plan entry, aggregated inside DuckDB (one query per entry and purpose).

A *point* is one plotted value of one series: a site value, a wafer's mean / SD / range, a lot's mean, or
one inspection's defect or adder density. Every point carries its series columns (layer, parameter and
the entry's split columns), a ``point_key`` that identifies it within the series, ``point_at`` (time of its
first measurement or its inspection, UTC) and, when specs apply, the spec limits in force at that time.

Which rows count:
    * ``current``: rows not superseded (``_superseded_by IS NULL``), the state of the warehouse now;
    * ``as_of``: rows that were current when file ``watermark`` was the newest one loaded (used to find
      which series a changed lot belonged to before the change).

Only fixed SQL fragments are assembled here (column names from our own constants); every value is a
bound parameter.
"""

from __future__ import annotations

import json
import re
from dataclasses import replace

import polars as pl

from warehouse.plan import PlanEntry

POINT_COLUMNS = (
    "lot_id",
    "wafer_id",
    "point_key",
    "point_at",
    "value",
    "n",
    "vmin",
    "vmax",
    "area_cm2",
    "product_any",
    "lsl",
    "usl",
)
"""Columns of a points frame besides the series columns (layer, parameter and the split columns)."""


class ArrowSource:
    """A Polars frame for ``register``, handed to DuckDB through the Arrow C stream interface.

    DuckDB converts a bare Polars frame through pyarrow, whose import is a fixed cost of tens of ms on the
    first use in a process (every CLI run); the stream interface needs no pyarrow. Each scan takes a new
    stream, so a registered source can be read by several statements.
    """

    __slots__ = ("frame",)

    def __init__(self, frame: pl.DataFrame) -> None:
        self.frame = frame

    def __arrow_c_stream__(self, requested_schema=None):
        return self.frame.__arrow_c_stream__(requested_schema)


def fetch_frame(rel) -> pl.DataFrame:
    """A relation's rows as a Polars frame, through the Arrow C stream interface (same dtypes as ``.pl()``,
    without importing pyarrow)."""
    return pl.DataFrame(rel)


def series_columns(e: PlanEntry) -> list[str]:
    """Columns whose values identify a series of the entry."""
    return ["layer", "parameter", *e.split]


def split_json(e: PlanEntry, row: dict) -> str:
    """Canonical JSON object of a series' split values (keys sorted)."""
    return json.dumps({k: row[k] for k in sorted(e.split)}, sort_keys=True)


def split_text(split: dict | str | None, sep: str = ",") -> str:
    """A series' split values as people read them: ``key=value`` joined by ``sep``, keys sorted; "" when
    the series is not split. ``split`` is the dict or its stored JSON (:func:`split_json`)."""
    if isinstance(split, str):
        try:
            split = json.loads(split or "{}")
        except ValueError:
            split = {}
    return sep.join(f"{k}={v}" for k, v in sorted((split or {}).items()))


def _rows_pred(alias: str, scope: str) -> str:
    if scope == "current":
        return f"{alias}._superseded_by IS NULL"
    return (
        f"{alias}._source_file_id <= $wm AND ({alias}._superseded_by IS NULL OR {alias}._superseded_by > $wm)"
    )


def _history_cte(e: PlanEntry, scope: str, lots: bool = False) -> str:
    lot_filter = "AND ph.lot_id IN (SELECT lot_id FROM dirty_lots)" if lots else ""
    return f"""
h AS (
    SELECT lot_id, wafer_id, process_tool, chamber FROM process_history ph
    WHERE ph.step = $step AND {_rows_pred("ph", scope)} {lot_filter}
    QUALIFY row_number() OVER (PARTITION BY lot_id, wafer_id ORDER BY started_at DESC, _source_file_id DESC) = 1
)"""


def _uses_history(e: PlanEntry) -> bool:
    return any(s in ("process_tool", "chamber") for s in e.split)


def points_sql(
    e: PlanEntry, *, scope: str = "current", lots: bool = False, series: bool = False, specs: bool = True
) -> tuple[str, dict]:
    """SQL text and named parameters for the entry's points.

    ``lots=True`` keeps only lots listed in a registered relation ``dirty_lots(lot_id)``; ``series=True``
    keeps only series listed in a registered relation ``wanted_series`` (the series columns).
    ``specs=False`` leaves out the spec join (lsl and usl NULL): only for a warehouse holding no spec row
    of the entry's layers and parameters, where the join matches nothing (:func:`has_spec_rows`).
    """
    params: dict = {"layer": e.layer, "parameter": e.parameter, "product": e.product, "kind": e.sample_kind}
    if scope == "as_of":
        params["wm"] = None  # filled by the caller
    hist = _uses_history(e)
    if hist:
        params["step"] = e.step
    # the first-file bound lets DuckDB skip older row groups by their zone maps (facts are stored in load order)
    lot_filter = (
        "AND f._source_file_id >= $minfid AND f.lot_id IN (SELECT lot_id FROM dirty_lots)" if lots else ""
    )
    if lots:
        params["minfid"] = 0  # filled by the caller
    if e.is_defect:
        inner = _defect_inner(e, scope, lot_filter, params)
    else:
        params["stage"] = e.stage
        inner = _measurement_inner(e, scope, lot_filter)
    split_sel = []
    for s in e.split:
        if s in ("process_tool", "chamber"):
            split_sel.append(f"CASE WHEN hw.lot_id IS NOT NULL THEN hw.{s} ELSE hl.{s} END AS {s}")
        elif s == "metrology_tool":
            split_sel.append("w.metrology_tool")
        elif s == "product":
            split_sel.append("w.product_any AS product")
    joins = ""
    where = ""
    ctes = [f"w AS ({inner})"]
    if hist:
        ctes.insert(0, _history_cte(e, scope, lots).strip())
        joins = (
            "LEFT JOIN h hw ON hw.lot_id = w.lot_id AND hw.wafer_id = w.wafer_id "
            "LEFT JOIN h hl ON hl.lot_id = w.lot_id AND hl.wafer_id IS NULL"
        )
        where = "WHERE coalesce(hw.lot_id, hl.lot_id) IS NOT NULL"
    sel_split = (", " + ", ".join(split_sel)) if split_sel else ""
    joined = f"SELECT w.*{sel_split} FROM w {joins} {where}"
    if e.statistic == "lot_mean":
        keys = ", ".join(
            ["layer", "parameter", "metrology_tool", *[s for s in e.split if s != "metrology_tool"]]
        )
        joined = f"""
SELECT {keys}, lot_id, NULL::VARCHAR AS wafer_id, lot_id || '|' || metrology_tool AS point_key,
       min(point_at) AS point_at, sum(value * n) / sum(n) AS value, sum(n) AS n, min(vmin) AS vmin,
       max(vmax) AS vmax, NULL::DOUBLE AS area_cm2, any_value(product_any) AS product_any
FROM ({joined}) j GROUP BY {keys}, lot_id"""
    ctes.append(f"p AS ({joined})")
    scols = series_columns(e)
    spec = _spec_join(e if specs else replace(e, spec_check=False))
    order = ", ".join([*scols, "point_at", "point_key"])
    series_filter = ""
    if series:
        cond = " AND ".join(f"ws.{c} IS NOT DISTINCT FROM p.{c}" for c in scols)
        series_filter = f"WHERE EXISTS (SELECT 1 FROM wanted_series ws WHERE {cond})"
    sql = f"WITH {', '.join(ctes)}\n{spec['select'].format(cols=', '.join(f'p.{c}' for c in scols))} FROM p {spec['join']} {series_filter}"
    sql = f"SELECT * FROM ({sql}) {spec['qualify']} ORDER BY {order}"
    return sql, params


def _measurement_inner(e: PlanEntry, scope: str, lot_filter: str) -> str:
    pred = _rows_pred("f", scope)
    sel = f"""f.layer GLOB $layer AND f.parameter GLOB $parameter AND f.product GLOB $product
        AND ($stage = '*' OR f.stage = $stage) AND f.sample_kind = $kind AND {pred} {lot_filter}"""
    if e.statistic == "site_value":
        return f"""
SELECT f.layer, f.parameter, f.metrology_tool, f.lot_id, f.wafer_id,
       f.lot_id || '|' || f.wafer_id || '|' || f.site_id || '|' || coalesce(f.feature, '') || '|' ||
           f.repeat || '|' || f.metrology_tool || '|' || strftime(f.measured_at, '%Y-%m-%dT%H:%M:%S.%f') AS point_key,
       f.measured_at AS point_at, f.value, 1::BIGINT AS n, f.value AS vmin, f.value AS vmax,
       NULL::DOUBLE AS area_cm2, f.product AS product_any
FROM measurements f WHERE {sel}"""
    value = {
        "wafer_mean": "avg(f.value)",
        "lot_mean": "avg(f.value)",
        "wafer_sd": "stddev_samp(f.value)",
        "wafer_range": "max(f.value) - min(f.value)",
    }[e.statistic]
    having = "HAVING count(*) >= 2" if e.statistic in ("wafer_sd", "wafer_range") else ""
    return f"""
SELECT f.layer, f.parameter, f.metrology_tool, f.lot_id, f.wafer_id,
       f.lot_id || '|' || f.wafer_id || '|' || f.metrology_tool AS point_key,
       min(f.measured_at) AS point_at, {value} AS value, count(*) AS n, min(f.value) AS vmin,
       max(f.value) AS vmax, NULL::DOUBLE AS area_cm2, any_value(f.product) AS product_any
FROM measurements f WHERE {sel}
GROUP BY f.layer, f.parameter, f.metrology_tool, f.lot_id, f.wafer_id {having}"""


def _defect_inner(e: PlanEntry, scope: str, lot_filter: str, params: dict) -> str:
    pred = _rows_pred("f", scope)
    sel = f"f.layer GLOB $layer AND f.product GLOB $product AND f.sample_kind = $kind AND {pred} {lot_filter}"
    key = (
        "f.lot_id || '|' || f.wafer_id || '|' || f.inspection_tool || '|' || "
        "strftime(f.inspected_at, '%Y-%m-%dT%H:%M:%S.%f')"
    )
    if e.statistic == "adder_density":
        params.pop("parameter")
        return f"""
SELECT f.layer, 'adders' AS parameter, f.inspection_tool AS metrology_tool, f.lot_id, f.wafer_id, {key} AS point_key,
       f.inspected_at AS point_at, f.adder_count / f.inspected_area_cm2 AS value, f.adder_count AS n,
       NULL::DOUBLE AS vmin, NULL::DOUBLE AS vmax, f.inspected_area_cm2 AS area_cm2, f.product AS product_any
FROM inspections f WHERE {sel} AND f.adder_count IS NOT NULL AND f.inspected_area_cm2 > 0"""
    if e.parameter == "total":
        params.pop("parameter")
        return f"""
SELECT f.layer, 'total' AS parameter, f.inspection_tool AS metrology_tool, f.lot_id, f.wafer_id, {key} AS point_key,
       f.inspected_at AS point_at, f.defect_count / f.inspected_area_cm2 AS value, f.defect_count AS n,
       NULL::DOUBLE AS vmin, NULL::DOUBLE AS vmax, f.inspected_area_cm2 AS area_cm2, f.product AS product_any
FROM inspections f WHERE {sel} AND f.inspected_area_cm2 > 0"""
    cpred = _rows_pred("c", scope)
    return f"""
SELECT f.layer, c.defect_class AS parameter, f.inspection_tool AS metrology_tool, f.lot_id, f.wafer_id,
       {key} AS point_key, f.inspected_at AS point_at, sum(c.count) / any_value(f.inspected_area_cm2) AS value,
       sum(c.count) AS n, NULL::DOUBLE AS vmin, NULL::DOUBLE AS vmax, any_value(f.inspected_area_cm2) AS area_cm2,
       any_value(f.product) AS product_any
FROM inspections f JOIN defect_counts c ON c.lot_id = f.lot_id AND c.wafer_id = f.wafer_id AND c.layer = f.layer
     AND c.inspection_tool = f.inspection_tool AND c.inspected_at = f.inspected_at
WHERE {sel} AND {cpred} AND c.defect_class GLOB $parameter AND f.inspected_area_cm2 > 0
GROUP BY f.layer, c.defect_class, f.inspection_tool, f.lot_id, f.wafer_id, f.inspected_at"""


def _checks_specs(e: PlanEntry) -> bool:
    """Whether the entry's points carry spec limits (measurement statistics with ``spec_check``)."""
    return not e.is_defect and e.statistic in ("site_value", "wafer_mean", "lot_mean") and e.spec_check


SPEC_RANK_COLUMNS = ("_generic", "_spec_from")
"""Columns the spec join adds to rank the spec rows matching a point (dropped by :func:`read_points`)."""


def _spec_join(e: PlanEntry) -> dict[str, str]:
    base = "SELECT {cols}, p.lot_id, p.wafer_id, p.point_key, p.point_at, p.value, p.n, p.vmin, p.vmax, p.area_cm2, p.product_any"
    if not _checks_specs(e):
        return {"select": base + ", NULL::DOUBLE AS lsl, NULL::DOUBLE AS usl", "join": "", "qualify": ""}
    # a product's own row wins over a '*' row, then the newest version in force (a version stays in force
    # until its effective_to or the next version of the same product, layer and parameter begins)
    return {
        "select": base + ", s.lsl, s.usl, (s.product = '*') AS _generic, s.effective_from AS _spec_from",
        "join": (
            "LEFT JOIN spec_limits s ON s._superseded_by IS NULL AND s.layer = p.layer AND s.parameter = p.parameter "
            "AND (s.product = p.product_any OR s.product = '*') AND p.point_at >= s.effective_from "
            "AND (s.effective_to IS NULL OR p.point_at < s.effective_to)"
        ),
        "qualify": (
            "QUALIFY row_number() OVER (PARTITION BY layer, parameter, point_key "
            "ORDER BY _generic NULLS LAST, _spec_from DESC NULLS LAST) = 1"
        ),
    }


def has_spec_rows(con, e: PlanEntry) -> bool:
    """Whether any spec row (current or not) could match a point of the entry (its layer and parameter).

    Without one the points query leaves out its spec join, whose per-point ranking cost a third of an
    incremental read (10M-row bench, one day: 10-20 ms of 31-38 ms, DuckDB 2.0.1).
    """
    rows = con.execute(
        "SELECT 1 FROM spec_limits WHERE layer GLOB ? AND parameter GLOB ? LIMIT 1", [e.layer, e.parameter]
    ).fetchall()
    return bool(rows)


def read_points(
    con,
    e: PlanEntry,
    *,
    scope: str = "current",
    watermark: int | None = None,
    dirty_lots: pl.DataFrame | None = None,
    wanted: pl.DataFrame | None = None,
    min_file_id: int = 0,
) -> pl.DataFrame:
    """Run the entry's points query; returns the series columns plus POINT_COLUMNS, in series order.

    With ``dirty_lots``, ``min_file_id`` must not exceed the first source file of any of those lots
    (``lot_first_files``); rows of older files are skipped.
    """
    cur = con.cursor()
    try:
        specs = _checks_specs(e) and has_spec_rows(cur, e)
        sql, params = points_sql(
            e, scope=scope, lots=dirty_lots is not None, series=wanted is not None, specs=specs
        )
        if scope == "as_of":
            params["wm"] = watermark
        if dirty_lots is not None:
            params["minfid"] = min_file_id
        if dirty_lots is not None:
            cur.register("dirty_lots", ArrowSource(dirty_lots))
        if wanted is not None:
            cur.register("wanted_series", ArrowSource(wanted))
        out = fetch_frame(cur.sql(sql, params=params))
    finally:
        cur.close()
    return out.drop(SPEC_RANK_COLUMNS, strict=False)


def read_series_points(con, *, series_id: int) -> pl.DataFrame:
    """Points of one stored series with the limits in force (see queries.series_points)."""
    from warehouse import evaluate

    return evaluate.series_points(con, series_id=series_id)


INDEXED_TABLES = ("measurements", "inspections", "defect_counts", "process_history")


def update_lot_index(con) -> None:
    """Add lots first seen since the index's watermark to ``lot_first_files`` (idempotent)."""
    rows = con.execute("SELECT value FROM meta WHERE key = 'lot_index_file_id'").fetchall()
    wm = int(rows[0][0]) if rows else 0
    top = int(con.execute("SELECT coalesce(max(file_id), 0) FROM source_files").fetchall()[0][0])
    if top <= wm:
        return
    # one statement for the four tables (table names are our own constants, values are bound)
    arms = " UNION ALL ".join(
        f"""(SELECT '{t}', f.lot_id, min(f._source_file_id) FROM "{t}" f WHERE f._source_file_id > $wm
            GROUP BY f.lot_id
            HAVING f.lot_id NOT IN (SELECT lot_id FROM lot_first_files WHERE table_name = '{t}'))"""
        for t in INDEXED_TABLES
    )
    con.execute(f"INSERT INTO lot_first_files {arms}", {"wm": wm})
    if rows:
        con.execute("UPDATE meta SET value = ? WHERE key = 'lot_index_file_id'", [str(top)])
    else:
        con.execute("INSERT INTO meta VALUES ('lot_index_file_id', ?)", [str(top)])


def glob_regex(pattern: str) -> str:
    """An anchored regular expression for a plan wildcard (``*`` any run, ``?`` one character).

    >>> glob_regex("M1_*"), glob_regex("a.b?")
    ('^M1_.*$', '^a\\\\.b.$')
    """
    out = []
    for ch in pattern:
        out.append(".*" if ch == "*" else "." if ch == "?" else re.escape(ch))
    return "^" + "".join(out) + "$"


def read_changes(con, *, watermark: int) -> dict[str, pl.DataFrame]:
    """Everything that changed after ``watermark``, read once per run (new or superseded rows).

    Keys: measurements (lot_id, layer, parameter, product, first_file_id), inspections (lot_id, layer,
    product, first_file_id), defect_counts (lot_id, layer), process_history (lot_id, step,
    first_measurements, first_inspections), spec_limits (layer, parameter). Each fact query has two halves joined by UNION (not OR) so that both can skip row
    groups by their zone maps.
    """

    def both(cols: str, table: str) -> str:
        return (
            f'SELECT DISTINCT {cols} FROM "{table}" f WHERE f._source_file_id > $wm UNION '
            f'SELECT DISTINCT {cols} FROM "{table}" f WHERE f._superseded_by > $wm'
        )

    def first(sql: str, table: str) -> str:
        return (
            f"SELECT c.*, i.first_file_id FROM ({sql}) c LEFT JOIN lot_first_files i "
            f"ON i.table_name = '{table}' AND i.lot_id = c.lot_id"
        )

    queries = {
        "measurements": first(both("lot_id, layer, parameter, product", "measurements"), "measurements"),
        "inspections": first(both("lot_id, layer, product", "inspections"), "inspections"),
        "defect_counts": both("lot_id, layer", "defect_counts"),
        "process_history": (
            f"SELECT c.*, m.first_file_id AS first_measurements, i.first_file_id AS first_inspections "
            f"FROM ({both('lot_id, step', 'process_history')}) c "
            "LEFT JOIN lot_first_files m ON m.table_name = 'measurements' AND m.lot_id = c.lot_id "
            "LEFT JOIN lot_first_files i ON i.table_name = 'inspections' AND i.lot_id = c.lot_id"
        ),
        "spec_limits": both("layer, parameter", "spec_limits"),
    }
    cur = con.cursor()
    try:
        return {k: fetch_frame(cur.sql(q, params={"wm": watermark})) for k, q in queries.items()}
    finally:
        cur.close()


def glob_match(column: str, pattern: str) -> pl.Expr:
    """A Polars predicate for a plan wildcard: true for ``*``, equality without wildcards, else a regex.

    (A regex is compiled on every call; most plan selectors are ``*`` or an exact name.)
    """
    if pattern == "*":
        return pl.col(column).is_not_null()
    if "*" not in pattern and "?" not in pattern:
        return pl.col(column) == pattern
    return pl.col(column).str.contains(glob_regex(pattern))


def changed_lots(e: PlanEntry, changes: dict[str, pl.DataFrame]) -> tuple[pl.DataFrame, bool]:
    """The entry's changed lots (lot_id, first_file_id) and whether its spec limits changed."""
    layer = glob_match("layer", e.layer)
    product = glob_match("product", e.product)
    if e.is_defect:
        parts = [changes["inspections"].filter(layer & product).select("lot_id")]
        if e.statistic == "defect_density" and e.parameter != "total":
            parts.append(changes["defect_counts"].filter(layer).select("lot_id"))
        facts = changes["inspections"]
    else:
        param = glob_match("parameter", e.parameter)
        parts = [changes["measurements"].filter(layer & param & product).select("lot_id")]
        facts = changes["measurements"]
    firsts = [facts.select("lot_id", "first_file_id")]
    if _uses_history(e):
        hist = changes["process_history"].filter(pl.col("step") == e.step)
        parts.append(hist.select("lot_id"))
        col = "first_inspections" if e.is_defect else "first_measurements"
        firsts.append(hist.select("lot_id", pl.col(col).alias("first_file_id")))
    lots = pl.concat(parts).unique()
    firsts = pl.concat(firsts).filter(pl.col("first_file_id").is_not_null()).unique("lot_id")
    lots = lots.join(firsts, on="lot_id", how="left").sort("lot_id")
    spec_changed = False
    if not e.is_defect and e.spec_check:
        spec = changes["spec_limits"]
        spec_changed = (
            spec.filter(glob_match("layer", e.layer) & glob_match("parameter", e.parameter)).height > 0
        )
    return lots, spec_changed
