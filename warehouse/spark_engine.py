"""Evaluation of the monitoring plan on a Spark session over the Parquet lake (optional extra ``lotline[spark]``).

What runs where:

1. **Facts** are read from the lake's manifest (``warehouse.lake.lake_files``), current rows only: a row
   whose own ``_superseded_by`` is set, or whose lineage key is listed in ``<table>__superseded``, is
   dropped (as ``warehouse.lake.read_lake_current`` does).
2. **Chart points** of every plan entry are computed in Spark SQL with the semantics of
   ``warehouse.points.points_sql`` (scope ``current``): the same selectors, the same aggregates per wafer
   or lot, split keys from the newest ``process_history`` row at the entry's step (the wafer's row, else the
   lot's), the same ``point_key`` and ``point_at``, and the spec limits in force at ``point_at`` (a
   product-specific spec wins over a ``*`` one).
3. The newest **frozen limit version** of each series (the lake's ``control_limits`` snapshot) is joined
   in; series are identified through the lake's ``chart_series`` snapshot. Spark never freezes limits: a
   series without a frozen version gets only its out-of-spec check, and a series the warehouse has not
   seen yet (no ``series_id``) is evaluated with an empty id.
4. **Signals**: ``groupBy(<series>).applyInArrow`` hands each series' points to
   ``warehouse.evaluate.chart_signals`` (after ``warehouse.evaluate.with_limits``), the local engine's own
   pure per-entry computation over ``spc`` — no statistic is re-implemented here. Points are numbered
   (``seq``) in the local engine's order: ``point_at``, then ``point_key``.
5. The signals are written back as a new snapshot of ``<lake>/signals_spark/snapshot=<n>/month=.../``
   (new files only) and registered in the manifest.

This is a full evaluation (every series from its first point); it equals the local engine's standing
signals on the same data when the lake holds the warehouse's limits (export after evaluating locally).
Signals advise; the fab's out-of-control action plan (OCAP) and qualified engineers decide.
"""

from __future__ import annotations

import functools
import os
import sys
import time
import warnings
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

from warehouse import lake as lake_mod
from warehouse import points as pts_mod
from warehouse import schema
from warehouse.errors import ConfigError
from warehouse.plan import PlanEntry

SUPPORTED_STATISTICS = (
    "site_value",
    "wafer_mean",
    "wafer_sd",
    "wafer_range",
    "lot_mean",
    "defect_density",
    "adder_density",
)
"""Plan statistics whose points this engine computes."""
SPLIT_COLUMNS = ("process_tool", "chamber", "metrology_tool", "product")
FACT_TABLES = ("measurements", "inspections", "defect_counts", "process_history", "spec_limits")
OUTPUT_TABLE = "signals_spark"
DEFAULT_MASTER = "local[2]"

SIGNAL_SCHEMA = (
    "series_id long, chart string, point_key string, lot_id string, wafer_id string, point_at timestamp_ntz, "
    "point_seq long, rule string, value double, statistic double, limit_version long, severity string"
)
"""Spark schema of the signals one series yields (and of ``signals_spark``, plus its ``month`` partition)."""

_PANDAS_NOTICE = "PySpark does not yet fully support pandas"
_TS_FORMAT = "yyyy-MM-dd'T'HH:mm:ss.SSSSSS"  # = DuckDB strftime '%Y-%m-%dT%H:%M:%S.%f'


@contextmanager
def _quiet() -> Iterator[None]:
    # pyspark warns about any pandas >= 3 whenever an Arrow UDF is set up; it uses no pandas API here
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=_PANDAS_NOTICE, category=FutureWarning)
        yield


def spark_session(master: str = DEFAULT_MASTER, *, shuffle_partitions: int | None = None):
    """A SparkSession for lake evaluation (bound to 127.0.0.1 and without UI for local masters).

    ``shuffle_partitions``: default one per core of a ``local[N]`` master (the data of one machine is small
    per query; Spark's default of 200 tasks per shuffle costs more than it spreads), Spark's own otherwise.

    The Python workers run this interpreter (``sys.executable``, not resolved: a venv's symlink is what
    makes the venv's packages visible) unless ``PYSPARK_PYTHON`` is already set.
    """
    try:
        from pyspark.sql import SparkSession
    except ImportError as exc:
        raise ConfigError(
            "the spark extra is not installed", found="no module pyspark", fix="pip install 'lotline[spark]'"
        ) from exc
    os.environ.setdefault("PYSPARK_PYTHON", sys.executable)
    os.environ.setdefault("PYSPARK_DRIVER_PYTHON", sys.executable)
    builder = SparkSession.builder.master(master).appName("lotline-evaluate")
    if master.startswith("local"):
        os.environ.setdefault("SPARK_LOCAL_IP", "127.0.0.1")
        builder = builder.config("spark.driver.bindAddress", "127.0.0.1").config(
            "spark.driver.host", "127.0.0.1"
        )
    builder = (
        builder.config("spark.ui.enabled", "false")
        .config("spark.ui.showConsoleProgress", "false")
        .config("spark.sql.session.timeZone", "UTC")
        .config("spark.sql.sources.partitionColumnTypeInference.enabled", "false")
    )
    if shuffle_partitions is None and master.startswith("local[") and master[6:-1].isdigit():
        shuffle_partitions = int(master[6:-1])
    if shuffle_partitions is not None:
        builder = builder.config("spark.sql.shuffle.partitions", str(shuffle_partitions))
    with _quiet():
        spark = builder.getOrCreate()
    spark.sparkContext.setLogLevel("ERROR")
    return spark


# ------------------------------------------------------------------------------------------ reading


def _spark_type(dtype: str) -> str:
    return {
        schema.STRING: "string",
        schema.INT64: "bigint",
        schema.FLOAT64: "double",
        schema.TIMESTAMP: "timestamp_ntz",
        schema.BOOL: "boolean",
    }[dtype]


def read_current(spark, lake: str | os.PathLike[str], table: str):
    """A Spark DataFrame of one fact table's current rows in the lake (an empty one when it has none)."""
    from pyspark.sql import functions as F

    files = lake_mod.lake_files(lake, table)
    decl = schema.table(table)
    if not files:
        ddl = ", ".join(f"`{c.name}` {_spark_type(c.dtype)}" for c in decl.columns)
        return spark.createDataFrame([], ddl)
    df = spark.read.option("basePath", str(Path(lake) / table)).parquet(*files)
    if schema.C_SUPERSEDED_BY in df.columns:
        df = df.where(F.col(schema.C_SUPERSEDED_BY).isNull())
    dropped = lake_mod.lake_files(lake, table + "__superseded")
    if dropped:
        keys = [schema.C_SOURCE_FILE_ID, schema.C_SOURCE_LINE]
        df = df.join(spark.read.parquet(*dropped).select(*keys), on=keys, how="left_anti")
    # the declared columns in declared order (partition columns such as ``layer`` come back from the path)
    return df.select(*[F.col(c.name).cast(_spark_type(c.dtype)).alias(c.name) for c in decl.columns])


def _read_snapshot(spark, lake, table: str):
    files = lake_mod.lake_files(lake, table)
    if not files:
        return None
    return spark.read.parquet(*files)


# ------------------------------------------------------------------------------------------ points


def check_entries(entries) -> None:
    """Refuse plan entries whose statistic this engine cannot compute (names them all)."""
    bad = [f"{e.name} ({e.statistic})" for e in entries if e.statistic not in SUPPORTED_STATISTICS]
    if bad:
        raise ConfigError(
            "the spark engine cannot evaluate these charts",
            found=", ".join(bad),
            expected=", ".join(SUPPORTED_STATISTICS),
            fix="evaluate them with the local engine (`lotline evaluate`)",
        )


def _uses_history(e: PlanEntry) -> bool:
    return any(s in ("process_tool", "chamber") for s in e.split)


def points_sql(e: PlanEntry, i: int) -> tuple[str, dict]:
    """Spark SQL text and named arguments for one entry's points (views: the FACT_TABLES' current rows).

    Mirrors ``warehouse.points.points_sql`` (scope ``current``); ``i`` makes the argument names unique.
    """
    a = {
        f"layer{i}": pts_mod.glob_regex(e.layer),
        f"product{i}": pts_mod.glob_regex(e.product),
        f"kind{i}": e.sample_kind,
    }
    p = f"{i}"
    if e.is_defect:
        inner = _defect_inner(e, p, a)
    else:
        a[f"parameter{i}"] = pts_mod.glob_regex(e.parameter)
        a[f"stage{i}"] = e.stage
        inner = _measurement_inner(e, p)
    ctes = [f"w AS ({inner})"]
    split_sel, joins, where = [], "", ""
    for s in e.split:
        if s in ("process_tool", "chamber"):
            split_sel.append(f"CASE WHEN hw.lot_id IS NOT NULL THEN hw.{s} ELSE hl.{s} END AS {s}")
        elif s == "product":
            split_sel.append("w.product_any AS product")
        # metrology_tool is a column of w already
    if _uses_history(e):
        a[f"step{i}"] = e.step
        ctes.insert(
            0,
            f"""h AS (
    SELECT lot_id, wafer_id, process_tool, chamber FROM (
        SELECT ph.lot_id, ph.wafer_id, ph.process_tool, ph.chamber, row_number() OVER (
            PARTITION BY ph.lot_id, ph.wafer_id ORDER BY ph.started_at DESC, ph._source_file_id DESC) AS _rn
        FROM process_history ph WHERE ph.step = :step{p}) WHERE _rn = 1)""",
        )
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
SELECT {keys}, lot_id, CAST(NULL AS STRING) AS wafer_id, concat(lot_id, '|', metrology_tool) AS point_key,
       min(point_at) AS point_at, sum(value * n) / sum(n) AS value, sum(n) AS n, min(vmin) AS vmin,
       max(vmax) AS vmax, CAST(NULL AS DOUBLE) AS area_cm2, any_value(product_any) AS product_any
FROM ({joined}) j GROUP BY {keys}, lot_id"""
    ctes.append(f"p AS ({joined})")
    splits = ", ".join(f"p.{s}" if s in e.split else f"CAST(NULL AS STRING) AS {s}" for s in SPLIT_COLUMNS)
    base = (
        f"SELECT '{_chart_literal(e.name)}' AS chart, p.layer, p.parameter, {splits}, p.lot_id, p.wafer_id, "
        "p.point_key, p.point_at, p.value, CAST(p.n AS BIGINT) AS n, p.vmin, p.vmax, p.area_cm2, p.product_any"
    )
    if e.is_defect or e.statistic not in ("site_value", "wafer_mean", "lot_mean") or not e.spec_check:
        body = f"{base}, CAST(NULL AS DOUBLE) AS lsl, CAST(NULL AS DOUBLE) AS usl FROM p"
    else:
        body = f"""SELECT * FROM (
    SELECT q.*, row_number() OVER (PARTITION BY q.layer, q.parameter, q.point_key
                                   ORDER BY q._generic ASC NULLS LAST, q._spec_from DESC NULLS LAST) AS _rn FROM (
        {base}, s.lsl, s.usl, (s.product = '*') AS _generic, s.effective_from AS _spec_from FROM p
        LEFT JOIN spec_limits s ON s.layer = p.layer AND s.parameter = p.parameter
             AND (s.product = p.product_any OR s.product = '*') AND p.point_at >= s.effective_from
             AND (s.effective_to IS NULL OR p.point_at < s.effective_to)) q) WHERE _rn = 1"""
    cols = (
        "chart, layer, parameter, " + ", ".join(SPLIT_COLUMNS) + ", lot_id, wafer_id, point_key, point_at, "
        "value, n, vmin, vmax, area_cm2, product_any, lsl, usl"
    )
    return f"WITH {', '.join(ctes)}\nSELECT {cols} FROM ({body}) b", a


def _chart_literal(name: str) -> str:
    # plan entry names are validated identifiers; refuse anything that could leave the literal
    if "'" in name or "\\" in name:
        raise ConfigError(
            "chart name not usable by the spark engine",
            found=name,
            expected="no quotes or backslashes",
            fix="rename the chart in the plan",
        )
    return name


def _measurement_inner(e: PlanEntry, p: str) -> str:
    sel = (
        f"f.layer RLIKE :layer{p} AND f.parameter RLIKE :parameter{p} AND f.product RLIKE :product{p} "
        f"AND (:stage{p} = '*' OR f.stage = :stage{p}) AND f.sample_kind = :kind{p}"
    )
    if e.statistic == "site_value":
        return f"""
SELECT f.layer, f.parameter, f.metrology_tool, f.lot_id, f.wafer_id,
       concat(f.lot_id, '|', f.wafer_id, '|', f.site_id, '|', coalesce(f.feature, ''), '|',
              CAST(f.`repeat` AS STRING), '|', f.metrology_tool, '|', date_format(f.measured_at, "{_TS_FORMAT}"))
           AS point_key,
       f.measured_at AS point_at, f.value, CAST(1 AS BIGINT) AS n, f.value AS vmin, f.value AS vmax,
       CAST(NULL AS DOUBLE) AS area_cm2, f.product AS product_any
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
       concat(f.lot_id, '|', f.wafer_id, '|', f.metrology_tool) AS point_key,
       min(f.measured_at) AS point_at, {value} AS value, count(*) AS n, min(f.value) AS vmin,
       max(f.value) AS vmax, CAST(NULL AS DOUBLE) AS area_cm2, any_value(f.product) AS product_any
FROM measurements f WHERE {sel}
GROUP BY f.layer, f.parameter, f.metrology_tool, f.lot_id, f.wafer_id {having}"""


def _defect_inner(e: PlanEntry, p: str, args: dict) -> str:
    sel = f"f.layer RLIKE :layer{p} AND f.product RLIKE :product{p} AND f.sample_kind = :kind{p}"
    key = (
        f"concat(f.lot_id, '|', f.wafer_id, '|', f.inspection_tool, '|', "
        f'date_format(f.inspected_at, "{_TS_FORMAT}"))'
    )
    if e.statistic == "adder_density":
        return f"""
SELECT f.layer, 'adders' AS parameter, f.inspection_tool AS metrology_tool, f.lot_id, f.wafer_id, {key} AS point_key,
       f.inspected_at AS point_at, f.adder_count / f.inspected_area_cm2 AS value, f.adder_count AS n,
       CAST(NULL AS DOUBLE) AS vmin, CAST(NULL AS DOUBLE) AS vmax, f.inspected_area_cm2 AS area_cm2,
       f.product AS product_any
FROM inspections f WHERE {sel} AND f.adder_count IS NOT NULL AND f.inspected_area_cm2 > 0"""
    if e.parameter == "total":
        return f"""
SELECT f.layer, 'total' AS parameter, f.inspection_tool AS metrology_tool, f.lot_id, f.wafer_id, {key} AS point_key,
       f.inspected_at AS point_at, f.defect_count / f.inspected_area_cm2 AS value, f.defect_count AS n,
       CAST(NULL AS DOUBLE) AS vmin, CAST(NULL AS DOUBLE) AS vmax, f.inspected_area_cm2 AS area_cm2,
       f.product AS product_any
FROM inspections f WHERE {sel} AND f.inspected_area_cm2 > 0"""
    args[f"parameter{p}"] = pts_mod.glob_regex(e.parameter)
    return f"""
SELECT f.layer, c.defect_class AS parameter, f.inspection_tool AS metrology_tool, f.lot_id, f.wafer_id,
       {key} AS point_key, f.inspected_at AS point_at, sum(c.`count`) / any_value(f.inspected_area_cm2) AS value,
       sum(c.`count`) AS n, CAST(NULL AS DOUBLE) AS vmin, CAST(NULL AS DOUBLE) AS vmax,
       any_value(f.inspected_area_cm2) AS area_cm2, any_value(f.product) AS product_any
FROM inspections f JOIN defect_counts c ON c.lot_id = f.lot_id AND c.wafer_id = f.wafer_id AND c.layer = f.layer
     AND c.inspection_tool = f.inspection_tool AND c.inspected_at = f.inspected_at
WHERE {sel} AND c.defect_class RLIKE :parameter{p} AND f.inspected_area_cm2 > 0
GROUP BY f.layer, c.defect_class, f.inspection_tool, f.lot_id, f.wafer_id, f.inspected_at"""


def plan_points(spark, lake, entries):
    """One Spark DataFrame of every entry's points with series ids and the frozen limits in force, and the
    cached fact frames it reads (unpersist them when done)."""
    from pyspark.sql import Window
    from pyspark.sql import functions as F

    cached = []
    for t in FACT_TABLES:
        # read once, used by every entry's query (else each query re-reads and re-filters the files)
        df = read_current(spark, lake, t).cache()
        df.createOrReplaceTempView(t)
        cached.append(df)
    parts = []
    for i, e in enumerate(entries):
        sql, args = points_sql(e, i)
        parts.append(spark.sql(sql, args=args))
    pts = functools.reduce(lambda x, y: x.unionByName(y), parts)
    series = _read_snapshot(spark, lake, "chart_series")
    if series is not None:
        cs = series.select("series_id", "chart", "layer", "parameter", *SPLIT_COLUMNS)
        cond = [pts.chart == cs.chart, pts.layer == cs.layer, pts.parameter == cs.parameter]
        cond += [pts[c].eqNullSafe(cs[c]) for c in SPLIT_COLUMNS]
        pts = pts.join(cs, on=cond, how="left").select(pts["*"], cs["series_id"])
    else:
        pts = pts.withColumn("series_id", F.lit(None).cast("bigint"))
    limits = _read_snapshot(spark, lake, "control_limits")
    if limits is not None:
        newest = Window.partitionBy("series_id").orderBy(F.col("version").desc())
        lim = (
            limits.withColumn("_rn", F.row_number().over(newest))
            .where("_rn = 1")
            .select(
                "series_id",
                F.col("version").alias("limit_version"),
                "center",
                F.col("sigma").alias("lim_sigma"),
                "n_ref",
                "overdispersion",
            )
        )
        pts = pts.join(lim, on="series_id", how="left")
    else:
        pts = pts.select(
            "*",
            *[
                F.lit(None).cast(t).alias(c)
                for c, t in (
                    ("limit_version", "bigint"),
                    ("center", "double"),
                    ("lim_sigma", "double"),
                    ("n_ref", "double"),
                    ("overdispersion", "double"),
                )
            ],
        )
    return pts, cached


# ------------------------------------------------------------------------------------------ per series

GROUP_COLUMNS = ("chart", "series_id", "layer", "parameter", *SPLIT_COLUMNS)
"""Columns that identify one series in the points frame (``series_id`` is NULL for a series not yet seen)."""


def _arrow_schema():
    import pyarrow as pa

    return pa.schema(
        [
            ("series_id", pa.int64()),
            ("chart", pa.string()),
            ("point_key", pa.string()),
            ("lot_id", pa.string()),
            ("wafer_id", pa.string()),
            ("point_at", pa.timestamp("us")),
            ("point_seq", pa.int64()),
            ("rule", pa.string()),
            ("value", pa.float64()),
            ("statistic", pa.float64()),
            ("limit_version", pa.int64()),
            ("severity", pa.string()),
        ]
    )


def evaluate_series(entries: dict[str, PlanEntry], table):
    """Signals of one series' points (an Arrow table with the plan_points columns) as an Arrow table.

    Runs inside the Spark Python workers; everything statistical is ``warehouse.evaluate.chart_signals``.
    """
    import polars as pl

    from warehouse import evaluate

    target = _arrow_schema()
    df = pl.from_arrow(table)
    if df.height == 0:
        return target.empty_table()
    e = entries[df["chart"][0]]
    sid = df["series_id"][0]
    key = -1 if sid is None else int(sid)
    pts = df.sort("point_at", "point_key").with_columns(
        pl.lit(key, pl.Int64).alias("series_id"), (pl.int_range(pl.len()) + 1).cast(pl.Int64).alias("seq")
    )
    lv = pts["limit_version"][0]
    limits = (
        {}
        if lv is None
        else {
            key: {
                "version": int(lv),
                "center": pts["center"][0],
                "sigma": pts["lim_sigma"][0],
                "n_ref": pts["n_ref"][0],
                "overdispersion": pts["overdispersion"][0],
            }
        }
    )
    pts = pts.drop("limit_version", "center", "lim_sigma", "n_ref", "overdispersion")
    pts = evaluate.with_limits(limits, e, pts)
    sig, _, _ = evaluate.chart_signals(e, pts, state=None, context=None)
    out = sig.select(
        pl.lit(sid, pl.Int64).alias("series_id"),
        pl.lit(e.name).alias("chart"),
        pl.col("point_key").cast(pl.String),
        pl.col("lot_id").cast(pl.String),
        pl.col("wafer_id").cast(pl.String),
        pl.col("point_at").cast(pl.Datetime("us")),
        pl.col("seq").cast(pl.Int64).alias("point_seq"),
        pl.col("rule").cast(pl.String),
        pl.col("value").cast(pl.Float64),
        pl.col("statistic").cast(pl.Float64),
        pl.col("limit_version").cast(pl.Int64),
        pl.lit(e.severity).alias("severity"),
    )
    return out.to_arrow().cast(target)


# ------------------------------------------------------------------------------------------ driver


def evaluate_lake(lake: str | os.PathLike[str], *, master: str = DEFAULT_MASTER, spark=None) -> dict:
    """Evaluate the lake's plan on Spark and write ``signals_spark``; return a summary.

    ``spark``: an existing session to use (not stopped); otherwise one is started for ``master`` and
    stopped afterwards.

    Example:
        >>> evaluate_lake("lake/")["signals"]  # doctest: +SKIP
        887
    """
    lake = Path(lake)
    plan = lake_mod.read_lake_plan(lake) if (lake / lake_mod.MANIFEST).exists() else None
    if plan is None:
        raise ConfigError(
            "the lake holds no monitoring plan",
            path=str(lake),
            fix="load a plan, then run `lotline lake export DIR` to export it with the facts",
        )
    check_entries(plan.entries)
    own = spark is None
    t0 = time.perf_counter()
    if own:
        spark = spark_session(master)
    session_s = time.perf_counter() - t0
    try:
        t1 = time.perf_counter()
        summary = _run(spark, lake, plan)
        summary["seconds"] = round(time.perf_counter() - t1, 3)
    finally:
        if own:
            spark.stop()
    summary["session_seconds"] = round(session_s, 3)
    return summary


def _run(spark, lake: Path, plan) -> dict:
    from pyspark.sql import functions as F

    entries = {e.name: e for e in plan.entries}
    pts, cached = plan_points(spark, lake, plan.entries)
    pts = pts.persist()
    try:
        counts = pts.agg(
            F.count(F.lit(1)).alias("points"),
            F.count_distinct(
                *[F.coalesce(F.col(c).cast("string"), F.lit("\x00")) for c in GROUP_COLUMNS]
            ).alias("series"),
        ).collect()[0]
        fn = functools.partial(evaluate_series, entries)
        with _quiet():
            sig = pts.groupBy(*GROUP_COLUMNS).applyInArrow(fn, schema=SIGNAL_SCHEMA)
        seq = lake_mod.next_snapshot_id(lake)
        out_dir = lake / OUTPUT_TABLE / f"snapshot={seq}"
        (
            sig.withColumn("month", F.date_format("point_at", "yyyy-MM"))
            .write.mode("errorifexists")
            .partitionBy("month")
            .parquet(str(out_dir))
        )
    finally:
        pts.unpersist()
        for df in cached:
            df.unpersist()
    files = sorted(str(f) for f in out_dir.rglob("*.parquet"))
    rows = _rows(files)
    lake_mod.register_snapshot(lake, OUTPUT_TABLE, files, rows, seq)
    return {
        "table": OUTPUT_TABLE,
        "snapshot": seq,
        "series": int(counts["series"]),
        "points": int(counts["points"]),
        "signals": rows,
        "files": len(files),
        "notices": [],
    }


def _rows(files: list[str]) -> int:
    import pyarrow.parquet as pq

    return sum(pq.read_metadata(f).num_rows for f in files)


def read_spark_signals(lake: str | os.PathLike[str]):
    """The newest ``signals_spark`` snapshot as a Polars frame (None before the first Spark evaluation)."""
    import duckdb

    files = lake_mod.lake_files(lake, OUTPUT_TABLE)
    if not files:
        return None
    con = duckdb.connect()
    try:
        return con.sql("SELECT * FROM read_parquet(?, hive_partitioning = true)", params=[files]).pl()
    finally:
        con.close()
