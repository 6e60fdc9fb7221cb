"""Lake export: Hive-partitioned Parquet, append-safe, incremental, supersession-aware."""

from datetime import datetime, timedelta

import duckdb
import polars as pl
import pyarrow.parquet as pq

from warehouse import lake, schema, store


def _insert_measurements(db, file_id, lots, *, layer="M1_DEV", start=datetime(2026, 9, 28), value=45.0):
    rows = []
    for i, lot in enumerate(lots):
        for site in range(3):
            rows.append(
                {
                    "lot_id": lot,
                    "wafer_id": f"{lot}-01",
                    "slot": 1,
                    "site_id": str(site + 1),
                    "x_mm": 10.0 * site,
                    "y_mm": 0.0,
                    "product": "AX14",
                    "layer": layer,
                    "stage": "develop",
                    "parameter": "cd_mid",
                    "feature": None,
                    "value": value + site,
                    "unit": "nm",
                    "measured_at": start + timedelta(days=3 * i),
                    "metrology_tool": "SEM-01",
                    "recipe": "R",
                    "repeat": 1,
                    "sample_kind": "production",
                    "_source_file_id": file_id,
                    "_source_line": len(rows) + 2,
                    "_superseded_by": None,
                }
            )
    frame = pl.DataFrame(rows, schema=schema.polars_schema(schema.MEASUREMENTS))
    con = duckdb.connect(str(db))
    con.execute("INSERT INTO measurements BY NAME SELECT * FROM frame")
    con.close()
    return frame


def _mark_superseded(db, old_file, new_file, lot):
    con = duckdb.connect(str(db))
    con.execute(
        "UPDATE measurements SET _superseded_by = ? WHERE _source_file_id = ? AND lot_id = ?",
        [new_file, old_file, lot],
    )
    con.close()


def test_export_lake_partitions_by_table_month_and_layer(tmp_path):
    db = tmp_path / "w.duckdb"
    store.init_warehouse(db)
    _insert_measurements(db, 1, ["L1", "L2"])  # 2026-09-28 and 2026-10-01
    summary = lake.export_lake(db, tmp_path / "lake")
    assert summary["measurements"] == {"rows": 6, "files": 2}
    dirs = sorted(
        str(p.parent.relative_to(tmp_path / "lake")) for p in (tmp_path / "lake").rglob("*.parquet")
    )
    assert dirs == ["measurements/month=2026-09/layer=M1_DEV", "measurements/month=2026-10/layer=M1_DEV"]
    manifest = lake.read_manifest(tmp_path / "lake")
    assert sum(f["rows"] for f in manifest["files"]) == 6
    assert manifest["marks"]["measurements"] == 1


def test_export_lake_rerun_exports_only_new_and_never_rewrites_files(tmp_path):
    db = tmp_path / "w.duckdb"
    store.init_warehouse(db)
    _insert_measurements(db, 1, ["L1"])
    lake.export_lake(db, tmp_path / "lake")
    before = {p: p.stat().st_mtime_ns for p in (tmp_path / "lake").rglob("*.parquet")}
    assert lake.export_lake(db, tmp_path / "lake")["measurements"] == {"rows": 0, "files": 0}
    _insert_measurements(db, 2, ["L3"])
    assert lake.export_lake(db, tmp_path / "lake")["measurements"]["rows"] == 3
    after = {p: p.stat().st_mtime_ns for p in (tmp_path / "lake").rglob("*.parquet")}
    assert all(after[p] == t for p, t in before.items())  # old files untouched
    assert len(after) == len(before) + 1
    total = sum(pq.read_metadata(p).num_rows for p in after)
    assert total == 6


def test_read_lake_current_drops_rows_superseded_after_export(tmp_path):
    db = tmp_path / "w.duckdb"
    store.init_warehouse(db)
    _insert_measurements(db, 1, ["L1", "L2"])
    lake.export_lake(db, tmp_path / "lake")
    _insert_measurements(db, 2, ["L1"], value=50.0)  # corrected re-export of lot L1
    _mark_superseded(db, 1, 2, "L1")
    summary = lake.export_lake(db, tmp_path / "lake")
    assert summary["measurements__superseded"]["rows"] == 3
    current = lake.read_lake_current(tmp_path / "lake", "measurements")
    assert current.height == 6
    l1 = current.filter(pl.col("lot_id") == "L1")
    assert sorted(l1["value"].to_list()) == [50.0, 51.0, 52.0]
    assert l1["_source_file_id"].unique().to_list() == [2]
