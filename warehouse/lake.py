"""Export the warehouse's facts (and signals) as a Hive-partitioned Parquet lake.

Layout: ``<lake>/<table>/month=YYYY-MM/layer=<layer>/part_<uuid>.parquet`` (``layer=`` only for tables
that have a layer; ``month=`` from the table's time column). A run never touches files already in the lake:
it writes new files into a staging folder, moves each into its partition under a fresh name, and then
replaces ``<lake>/_manifest.json`` atomically. The manifest lists every file with its table and row count and
keeps a high-water mark per table, so re-running exports only what is new.

What "new" means: fact rows come from source files, and a source file's rows are written once, all
together, so the mark is the largest ``_source_file_id`` exported. A row exported before a corrected
re-export arrived keeps its old ``_superseded_by`` (NULL) in its file; the next run writes its lineage key
(``_source_file_id``, ``_source_line``) and the superseding file id to ``<table>__superseded``, and
:func:`read_lake_current` drops such rows. Readers should list files from the manifest, not by globbing, so
a run that died half-way leaves nothing visible.

Tables that change in place (the plan, chart series, frozen control limits, signals with their
withdrawals) are exported as whole *snapshots*: ``<lake>/<table>/snapshot=<n>/...`` (signals also by
``month=``), written only when the table changed since the last snapshot (a fingerprint in the manifest
says so), so re-running an export with nothing new writes no file at all. Readers take the newest
snapshot of such a table (:func:`lake_files` does). The plan lands as ``plan/snapshot=<n>/plan.json``
(its text, path, version and entries; :func:`read_lake_plan` rebuilds it).

One writer at a time: two exports (or an export and ``lotline evaluate --engine spark``, which appends
``signals_spark``) running at once on the same lake would race on the manifest.
"""

from __future__ import annotations

import json
import os
import shutil
import uuid
from dataclasses import dataclass
from pathlib import Path

from warehouse import schema
from warehouse.store import open_warehouse

MANIFEST = "_manifest.json"
STAGING = "_staging"


@dataclass(frozen=True)
class LakeTable:
    """How one warehouse table lands in the lake."""

    table: str
    time_column: str | None  # month partition from this column; None: no month partition
    by_layer: bool
    mark_column: str  # monotone column for the high-water mark


LAKE_TABLES: tuple[LakeTable, ...] = (
    LakeTable("measurements", "measured_at", True, schema.C_SOURCE_FILE_ID),
    LakeTable("inspections", "inspected_at", True, schema.C_SOURCE_FILE_ID),
    LakeTable("defect_counts", "inspected_at", True, schema.C_SOURCE_FILE_ID),
    LakeTable("defects", "inspected_at", True, schema.C_SOURCE_FILE_ID),
    LakeTable("process_history", "started_at", False, schema.C_SOURCE_FILE_ID),
    LakeTable("tool_events", "event_at", False, schema.C_SOURCE_FILE_ID),
    LakeTable("spec_limits", None, False, schema.C_SOURCE_FILE_ID),
    LakeTable("reference_values", None, False, schema.C_SOURCE_FILE_ID),
    LakeTable("supersessions", "superseded_at", False, "file_id"),
)


@dataclass(frozen=True)
class SnapshotTable:
    """An operational table exported as whole snapshots, when its fingerprint changed."""

    table: str  # warehouse table
    lake_name: str  # folder in the lake
    fingerprint: str  # one-row query that changes whenever the table's content does
    select: str  # what to export (a fixed query)
    month_column: str | None = None


SNAPSHOT_TABLES: tuple[SnapshotTable, ...] = (
    SnapshotTable("plans", "plan", "SELECT coalesce(max(plan_version), 0) FROM plans", ""),
    SnapshotTable(
        "chart_series",
        "chart_series",
        "SELECT count(*), coalesce(max(series_id), 0) FROM chart_series",
        "SELECT * FROM chart_series",
    ),
    SnapshotTable(
        "control_limits",
        "control_limits",
        "SELECT count(*), coalesce(sum(version), 0), max(frozen_at)::VARCHAR FROM control_limits",
        "SELECT * FROM control_limits",
    ),
    SnapshotTable(
        "signals",
        "signals",
        "SELECT count(*), coalesce(max(signal_id), 0), count(withdrawn_at), max(withdrawn_at)::VARCHAR, "
        "count(excursion_id), coalesce(sum(excursion_id), 0), coalesce(sum(point_seq), 0) FROM signals",
        "SELECT s.*, c.chart FROM signals s LEFT JOIN chart_series c USING (series_id)",
        "point_at",
    ),
)


def read_manifest(lake: str | os.PathLike[str]) -> dict:
    """The lake's manifest (an empty one for a new lake)."""
    p = Path(lake) / MANIFEST
    if not p.exists():
        return {"format": 1, "marks": {}, "files": [], "snapshots": {}, "snapshot_seq": 0}
    return json.loads(p.read_text(encoding="utf-8"))


def _write_manifest(lake: Path, manifest: dict) -> None:
    tmp = lake / (MANIFEST + ".tmp")
    tmp.write_text(json.dumps(manifest, indent=1, sort_keys=True), encoding="utf-8")
    os.replace(tmp, lake / MANIFEST)


def export_lake(db: str | os.PathLike[str] | None, lake: str | os.PathLike[str]) -> dict:
    """Append everything new in the warehouse to the lake; return per-table rows and files written.

    Example:
        >>> export_lake("lotline.duckdb", "lake/")  # doctest: +SKIP
        {'measurements': {'rows': 1200, 'files': 6}, ...}
    """
    lake = Path(lake)
    lake.mkdir(parents=True, exist_ok=True)
    manifest = read_manifest(lake)
    staging = lake / STAGING / uuid.uuid4().hex
    staging.mkdir(parents=True)
    summary: dict[str, dict[str, int]] = {}
    new_files: list[dict] = []
    try:
        with open_warehouse(db, read_only=True) as con:
            con.execute("SET enable_progress_bar = false")
            existing = {
                r[0] for r in con.execute("SELECT table_name FROM information_schema.tables").fetchall()
            }
            for lt in LAKE_TABLES:
                if lt.table not in existing:
                    continue
                mark = int(manifest["marks"].get(lt.table, 0))
                new_mark = con.execute(
                    f'SELECT max("{lt.mark_column}") FROM "{lt.table}" WHERE "{lt.mark_column}" > ?', [mark]
                ).fetchall()[0][0]
                if new_mark is None:
                    summary[lt.table] = {"rows": 0, "files": 0}
                    continue
                parts = []
                select = f'SELECT * FROM "{lt.table}" WHERE "{lt.mark_column}" > {int(mark)} AND "{lt.mark_column}" <= {int(new_mark)}'
                if lt.time_column:
                    select = f"SELECT *, strftime(\"{lt.time_column}\", '%Y-%m') AS month FROM ({select})"
                    parts.append("month")
                if lt.by_layer:
                    parts.append("layer")
                rows, written = _copy(con, select, staging, lt.table, parts)
                if schema.C_SUPERSEDED_BY in _columns(con, lt.table) and mark:
                    withdrawn = (
                        f'SELECT "{schema.C_SOURCE_FILE_ID}", "{schema.C_SOURCE_LINE}", "{schema.C_SUPERSEDED_BY}" '
                        f'FROM "{lt.table}" WHERE "{schema.C_SOURCE_FILE_ID}" <= {int(mark)} '
                        f'AND "{schema.C_SUPERSEDED_BY}" > {int(mark)}'
                    )
                    n_withdrawn, more = _copy(con, withdrawn, staging, lt.table + "__superseded", [])
                    written += more
                    summary[lt.table + "__superseded"] = {"rows": n_withdrawn, "files": len(more)}
                summary[lt.table] = {"rows": rows, "files": sum(1 for name, _ in written if name == lt.table)}
                for table_name, f in written:
                    rel_in_stage = Path(f).relative_to(staging)
                    new_files.append(
                        {
                            "table": table_name,
                            "path": str(rel_in_stage),
                            "staged": f,
                            "final": str(lake / rel_in_stage),
                        }
                    )
                manifest["marks"][lt.table] = int(new_mark)
            new_files += _export_snapshots(con, existing, manifest, staging, lake, summary)
        for nf in new_files:
            final = Path(nf["final"])
            final.parent.mkdir(parents=True, exist_ok=True)
            if final.exists():  # never overwrite a lake file (uuid names make this practically impossible)
                final = final.with_name(f"part_{uuid.uuid4()}.parquet")
                nf["path"] = str(final.relative_to(lake))
            os.replace(nf["staged"], final)
        with_counts = _count_rows(lake, new_files)
        manifest["files"].extend(with_counts)
        _write_manifest(lake, manifest)
    finally:
        shutil.rmtree(staging, ignore_errors=True)
        try:
            (lake / STAGING).rmdir()
        except OSError:
            pass
    return summary


def _columns(con, table: str) -> set[str]:
    rows = con.execute(
        "SELECT column_name FROM information_schema.columns WHERE table_name = ?", [table]
    ).fetchall()
    return {r[0] for r in rows}


def _copy(con, select: str, staging: Path, name: str, parts: list[str]) -> tuple[int, list[tuple[str, str]]]:
    """COPY one query into the staging folder; return its row count and (table, file) per file written."""
    target = staging / name
    options = "FORMAT parquet, RETURN_FILES true, FILENAME_PATTERN 'part_{uuid}'"
    if parts:
        options += f", PARTITION_BY ({', '.join(parts)})"
        out = str(target)
    else:
        target.mkdir(parents=True, exist_ok=True)
        out = str(target / f"part_{uuid.uuid4()}.parquet")
    # The query holds only integer bounds read from the warehouse itself, never user input; COPY takes no
    # bound parameters inside its query.
    rows, files = con.execute(f"COPY ({select}) TO '{out}' ({options})").fetchall()[0]
    if not rows:
        for f in files:
            Path(f).unlink(missing_ok=True)
        return 0, []
    return int(rows), [(name, f) for f in files]


def _export_snapshots(
    con, existing: set[str], manifest: dict, staging: Path, lake: Path, summary: dict
) -> list[dict]:
    """Stage a new snapshot of every snapshot table whose fingerprint changed; update the manifest's
    ``snapshots`` (the caller moves the files and writes the manifest)."""
    snaps = manifest.setdefault("snapshots", {})
    seq = int(manifest.get("snapshot_seq", 0)) + 1
    out: list[dict] = []
    wrote = False
    for st in SNAPSHOT_TABLES:
        if st.table not in existing:
            continue
        fp = json.dumps(list(con.execute(st.fingerprint).fetchall()[0]), default=str)
        prev = snaps.get(st.lake_name)
        if prev is not None and prev.get("fingerprint") == fp:
            summary[st.lake_name] = {"rows": 0, "files": 0}
            continue
        name = f"{st.lake_name}/snapshot={seq}"
        if st.table == "plans":
            written = _stage_plan(con, staging, name)
            rows = len(written)
        else:
            select, parts = st.select, []
            if st.month_column:
                select = f"SELECT *, strftime(\"{st.month_column}\", '%Y-%m') AS month FROM ({select})"
                parts = ["month"]
            (staging / name).parent.mkdir(parents=True, exist_ok=True)
            rows, written = _copy(con, select, staging, name, parts)
        for _, f in written:
            rel = Path(f).relative_to(staging)
            out.append(
                {
                    "table": st.lake_name,
                    "path": str(rel),
                    "staged": f,
                    "final": str(lake / rel),
                    "snapshot": seq,
                }
            )
        snaps[st.lake_name] = {"id": seq, "fingerprint": fp, "rows": rows}
        summary[st.lake_name] = {"rows": rows, "files": len(written)}
        wrote = True
    if wrote:
        manifest["snapshot_seq"] = seq
    return out


def _stage_plan(con, staging: Path, name: str) -> list[tuple[str, str]]:
    """The plan in force as one JSON file (text, path, version, entries); [] when no plan is loaded."""
    from dataclasses import asdict

    from warehouse.plan import current_plan, current_plan_version

    plan = current_plan(con)
    if plan is None:
        return []
    doc = {
        "plan_version": current_plan_version(con),
        "path": plan.path,
        "name": plan.name,
        "sha256": plan.sha256,
        "text": plan.text,
        "entries": [asdict(e) for e in plan.entries],
    }
    target = staging / name
    target.mkdir(parents=True, exist_ok=True)
    f = target / f"plan_{uuid.uuid4()}.json"
    f.write_text(json.dumps(doc, indent=1, sort_keys=True, default=str), encoding="utf-8")
    return [("plan", str(f))]


def _count_rows(lake: Path, files: list[dict]) -> list[dict]:
    import pyarrow.parquet as pq

    out = []
    for f in files:
        path = lake / f["path"]
        if path.suffix == ".json":
            rows = len(json.loads(path.read_text(encoding="utf-8")).get("entries", []))
        else:
            rows = pq.read_metadata(path).num_rows
        rec = {"table": f["table"], "path": f["path"], "rows": rows}
        if "snapshot" in f:
            rec["snapshot"] = f["snapshot"]
        out.append(rec)
    return out


def lake_files(lake: str | os.PathLike[str], table: str) -> list[str]:
    """Absolute paths of the manifest's files of one table (what a lake reader should read).

    For a snapshot table (plan, chart_series, control_limits, signals, signals_spark) only the files of
    its newest snapshot.
    """
    lake = Path(lake)
    manifest = read_manifest(lake)
    snap = (manifest.get("snapshots") or {}).get(table)
    files = [f for f in manifest["files"] if f["table"] == table]
    if snap is not None:
        files = [f for f in files if f.get("snapshot") == snap["id"]]
    return [str(lake / f["path"]) for f in files]


def read_lake_plan(lake: str | os.PathLike[str]):
    """The plan of the lake's newest plan snapshot (a validated ``warehouse.plan.Plan``), or None."""
    from warehouse.plan import parse_plan

    files = lake_files(lake, "plan")
    if not files:
        return None
    doc = json.loads(Path(files[0]).read_text(encoding="utf-8"))
    return parse_plan(doc["text"], path=doc["path"])


def register_snapshot(lake: str | os.PathLike[str], table: str, paths: list[str], rows: int, seq: int) -> int:
    """Add files already written under ``<lake>/<table>/snapshot=<seq>/`` (seq from :func:`next_snapshot_id`)
    to the manifest as the table's newest snapshot; return seq."""
    import pyarrow.parquet as pq

    lake = Path(lake)
    manifest = read_manifest(lake)
    if seq < next_snapshot_id(lake):
        raise ValueError(f"snapshot {seq} of {table} was taken by another writer of {lake}")
    for p in paths:
        rel = str(Path(p).resolve().relative_to(lake.resolve()))
        manifest["files"].append(
            {"table": table, "path": rel, "rows": pq.read_metadata(p).num_rows, "snapshot": seq}
        )
    manifest.setdefault("snapshots", {})[table] = {"id": seq, "fingerprint": None, "rows": rows}
    manifest["snapshot_seq"] = seq
    _write_manifest(lake, manifest)
    return seq


def next_snapshot_id(lake: str | os.PathLike[str]) -> int:
    """The snapshot id the next snapshot written to the lake gets."""
    return int(read_manifest(lake).get("snapshot_seq", 0)) + 1


def read_lake_current(lake: str | os.PathLike[str], table: str):
    """The current rows of one fact table in the lake (superseded rows dropped), as a Polars frame.

    Example:
        >>> read_lake_current("lake/", "measurements").height  # doctest: +SKIP
        1200
    """
    import duckdb

    files = lake_files(lake, table)
    if not files:
        return None
    dropped = lake_files(lake, table + "__superseded")
    con = duckdb.connect()
    try:
        rel = "SELECT * FROM read_parquet(?, hive_partitioning = true, union_by_name = true)"
        if schema.C_SUPERSEDED_BY in _declared_columns(table):
            # rows superseded before their first export carry the superseding file id in their own file
            rel = f'SELECT * FROM ({rel}) WHERE "{schema.C_SUPERSEDED_BY}" IS NULL'
        if not dropped:
            return con.sql(rel, params=[files]).pl()
        q = (
            f"SELECT f.* FROM ({rel}) f ANTI JOIN read_parquet(?) d "
            f'ON f."{schema.C_SOURCE_FILE_ID}" = d."{schema.C_SOURCE_FILE_ID}" '
            f'AND f."{schema.C_SOURCE_LINE}" = d."{schema.C_SOURCE_LINE}"'
        )
        return con.sql(q, params=[files, dropped]).pl()
    finally:
        con.close()


def _declared_columns(table: str) -> set[str]:
    try:
        return set(schema.table(table).names)
    except KeyError:  # a lake-only table (e.g. signals_spark) has no declaration
        return set()
