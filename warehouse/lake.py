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


def read_manifest(lake: str | os.PathLike[str]) -> dict:
    """The lake's manifest (an empty one for a new lake)."""
    p = Path(lake) / MANIFEST
    if not p.exists():
        return {"format": 1, "marks": {}, "files": []}
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
            existing = {r[0] for r in con.execute("SELECT table_name FROM information_schema.tables").fetchall()}
            for lt in (*LAKE_TABLES, *_extra_tables()):
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
                    new_files.append({"table": table_name, "path": str(rel_in_stage), "staged": f,
                                      "final": str(lake / rel_in_stage)})
                manifest["marks"][lt.table] = int(new_mark)
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
    rows = con.execute("SELECT column_name FROM information_schema.columns WHERE table_name = ?", [table]).fetchall()
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


def _extra_tables() -> tuple[LakeTable, ...]:
    # Signals are exported when the monitoring tables exist.
    names = {t.name for t in schema.TABLES}
    out = []
    if "signals" in names:
        cols = schema.table("signals").names
        mark = "signal_id" if "signal_id" in cols else None
        time_col = next((c for c in ("point_at", "first_detected_at") if c in cols), None)
        if mark:
            out.append(LakeTable("signals", time_col, "layer" in cols, mark))
    return tuple(out)


def _count_rows(lake: Path, files: list[dict]) -> list[dict]:
    import pyarrow.parquet as pq

    out = []
    for f in files:
        meta = pq.read_metadata(lake / f["path"])
        out.append({"table": f["table"], "path": f["path"], "rows": meta.num_rows})
    return out


def lake_files(lake: str | os.PathLike[str], table: str) -> list[str]:
    """Absolute paths of the manifest's files of one table (what a lake reader should read)."""
    lake = Path(lake)
    return [str(lake / f["path"]) for f in read_manifest(lake)["files"] if f["table"] == table]


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
