"""Spark evaluation over the lake gives the local engine's signals on the demo fab.

The reference is the local engine's own run on the same warehouse (the local engine's statistics are checked
against published references in tests/monitoring and tests/spc); what is tested here is that running the
plan on Spark over the lake changes nothing: same signals (chart, series, point, rule), same values.
"""

from __future__ import annotations

import polars as pl
import pytest

pytest.importorskip("pyspark", reason="the spark extra is not installed: pip install lotline[spark]")

from warehouse import queries, store  # noqa: E402
from warehouse.lake import export_lake, lake_files, read_lake_current, read_manifest  # noqa: E402
from warehouse.spark_engine import evaluate_lake, read_spark_signals, spark_session  # noqa: E402

pytestmark = [
    pytest.mark.slow,
    pytest.mark.filterwarnings("ignore:PySpark does not yet fully support pandas:FutureWarning"),
]

KEY = ["chart", "series_id", "point_key", "rule"]


@pytest.fixture(scope="session")
def spark():
    session = spark_session("local[2]")
    yield session
    session.stop()


@pytest.fixture(scope="session")
def spark_run(spark, demo_lake):
    return evaluate_lake(demo_lake.lake, spark=spark)


def _local_signals(demo_lake) -> pl.DataFrame:
    sig = read_lake_current(demo_lake.lake, "signals").filter(pl.col("withdrawn_at").is_null())
    # the lake's snapshot is the warehouse's table: same standing signals as the warehouse reports
    with store.open_warehouse(demo_lake.db, read_only=True) as con:
        standing = queries.newest_signals(con, limit=1_000_000)
    assert standing.height == sig.height
    return sig


def test_spark_engine_demo_fab_same_signals_as_local_engine(demo_lake, spark_run):
    local = _local_signals(demo_lake)
    spark_sig = read_spark_signals(demo_lake.lake)
    assert spark_run["signals"] == spark_sig.height
    # the comparison is worth something only if control rules, EWMA/CUSUM and spec checks all fired
    assert {"we1", "oos"} <= set(local["rule"].unique().to_list())
    assert set(local["rule"].unique().to_list()) & {"ewma", "cusum_hi", "cusum_lo"}

    assert sorted(spark_sig.select(KEY).rows()) == sorted(local.select(KEY).rows())
    both = local.join(spark_sig, on=KEY, how="inner", suffix="_spark")
    assert both.height == local.height
    for col in ("value", "statistic"):
        diff = both.select((pl.col(col) - pl.col(f"{col}_spark")).abs().max()).item()
        assert diff is None or diff <= 1e-9, col
        assert both.filter(pl.col(col).is_null() != pl.col(f"{col}_spark").is_null()).height == 0
    for col in ("point_seq", "limit_version", "point_at", "lot_id", "wafer_id", "severity"):
        mismatch = both.filter(pl.col(col).ne_missing(pl.col(f"{col}_spark")))
        assert mismatch.height == 0, (col, mismatch.head(3))


def test_spark_engine_demo_fab_points_and_series_match_local_run(demo_lake, spark_run):
    with store.open_warehouse(demo_lake.db, read_only=True) as con:
        points = queries.chart_point_count(con)
    assert spark_run["points"] == points
    assert spark_run["series"] == read_lake_current(demo_lake.lake, "chart_series").height


def test_spark_engine_writes_a_new_snapshot_and_export_rerun_writes_no_files(demo_lake, spark_run):
    manifest = read_manifest(demo_lake.lake)
    assert manifest["snapshots"]["signals_spark"]["id"] == spark_run["snapshot"]
    assert all(f"snapshot={spark_run['snapshot']}" in p for p in lake_files(demo_lake.lake, "signals_spark"))
    before = sorted(p for p in demo_lake.lake.rglob("*.parquet"))

    again = export_lake(demo_lake.db, demo_lake.lake)

    assert all(v["files"] == 0 for v in again.values())
    assert sorted(p for p in demo_lake.lake.rglob("*.parquet")) == before


def test_spark_engine_uses_the_newest_spec_version_in_force(spark, tmp_path):
    """Two open-ended versions of one spec: points after the newer one's effective_from are checked
    against it, on Spark as in the local engine (tests/monitoring/test_evaluate.py has the same case)."""
    from datetime import datetime

    from tests.monitoring.conftest import PLAN, load, make_lots, site_rows
    from tests.monitoring.facts import insert_facts
    from warehouse import evaluate, schema
    from warehouse.plan import parse_plan, store_plan

    db, lake = tmp_path / "wh.duckdb", tmp_path / "lake"
    with store.open_warehouse(db, create=True) as con:
        store_plan(con, parse_plan(PLAN, path="plan.toml"), user="t")
    lots = make_lots(30)
    lots.append(site_rows("L9001", "L9001-01", [45.0, 45.0, 45.0, 45.0, 47.0], datetime(2026, 9, 20)))
    lots.append(site_rows("L9002", "L9002-01", [45.0, 45.0, 45.0, 45.0, 40.0], datetime(2026, 9, 21)))
    load(db, lots)
    spec = dict(product="*", layer="M1_DEV", parameter="cd_mid", target=45.0, unit="nm")
    older = {**spec, "lsl": 40.5, "usl": 49.5, "effective_from": datetime(2026, 1, 1)}
    newer = {**spec, "lsl": 39.5, "usl": 46.5, "effective_from": datetime(2026, 9, 15)}
    with store.open_warehouse(db) as con:
        insert_facts(con, schema.SPEC_LIMITS, [newer, older])
    evaluate.evaluate_warehouse(db, user="t")
    export_lake(db, lake)
    evaluate_lake(lake, spark=spark)
    oos = read_spark_signals(lake).filter(pl.col("rule") == "oos")
    # L9001 (47.0 nm) is above the newer USL 46.5 only; L9002 (40.0 nm) below the older LSL 40.5 only
    assert oos["lot_id"].to_list() == ["L9001"]
