"""Writing ingested files into the warehouse: lineage, dedupe, supersession, rejects. All SQL of ingest.

One file is one transaction (the caller wraps :func:`load_chunk` calls and :func:`finish_file` in
``store.transaction``). Rules:

1. **Supersession** (tables with a ``supersede_key``; :func:`supersede_file`, once per file): the file's groups (supersede key, plus the time
   column for sample kinds other than ``production`` so daily monitor runs stay separate) mark every current
   row of those groups from *older* files ``_superseded_by = this file``. The rows stay, queryable. Child
   tables (``defect_counts``, ``defects``) follow their parent inspection instead of grouping themselves.
2. **Natural-key dedupe** (tables without a supersede key): a row whose natural key is already stored and
   current is skipped, with an anti-join (``INSERT … WHERE NOT EXISTS``; no primary-key index, see DESIGN).
3. Insert, stamped with the file id, in series order (``ORDER BY`` the table's series columns) unless the
   caller asks for the export's order (big files loaded in several chunks).

Duplicate natural keys inside one file are found by :func:`reject_in_file_duplicates` after the last chunk:
the first occurrence stays, each later one is deleted again and recorded as a reject that names the line of
the first. Values are bound parameters; frames are handed in by registering them as views.
"""

from __future__ import annotations

from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path

import duckdb
import polars as pl

from warehouse import schema
from warehouse.store import bump_data_version

CHILD_OF = {"defect_counts": "inspections", "defects": "inspections"}
"""Tables whose rows are superseded together with their parent inspection row."""

TIME_COLUMN = {"measurements": "measured_at", "inspections": "inspected_at"}
"""Tables with a sample kind: a non-production row's group also includes this time column."""

SERIES_ORDER: dict[str, tuple[str, ...]] = {
    "measurements": ("layer", "parameter", "metrology_tool", "measured_at"),
    "inspections": ("layer", "inspection_tool", "inspected_at"),
    "defect_counts": ("layer", "inspection_tool", "inspected_at"),
    "defects": ("layer", "inspection_tool", "inspected_at"),
    "process_history": ("step", "process_tool", "started_at"),
    "tool_events": ("tool", "event_at"),
    "spec_limits": ("layer", "parameter", "effective_from"),
    "reference_values": ("layer", "parameter", "feature"),
}
"""Rows of a file are stored in this order, so one chart's series sits together on disk (DESIGN: layout)."""

ROW_GROUP_ROWS = 122_880
"""DuckDB's row group size. The chunks of a multi-chunk file are inserted in whole row groups (the caller
carries the rest over to the next chunk): measured with DuckDB 2.0.1 on 1M rows in one transaction, six
inserts of 166,667 rows cost 4.6 s CPU (1.6 s of it in the checkpoint that merges their partial row groups),
inserts of whole row groups 2.5 s."""


def whole_row_groups(rows: int) -> int:
    """The largest multiple of :data:`ROW_GROUP_ROWS` not above ``rows``."""
    return rows - rows % ROW_GROUP_ROWS


INGEST_MEMORY_LIMIT = "1200MB"
"""DuckDB's share of an ingest's memory (issue 2: peak RSS <= 2 GB for a 10M-row file); it spills beyond.

Peak RSS of a whole ingest measured with it (DuckDB 2.0.1, 2 cores): 0.78 GB for a 10M-row CSV on the
DuckDB reader, 1.38 GB at 30M rows, 1.38 GB for the same 10M rows on the Polars reader. At 512 MB
DuckDB evicted buffers during the direct load: 10M rows 12.5 s against 11.7 s, 30M rows 40 s against 36.6 s."""


@dataclass
class FileCounts:
    """What one file did to the warehouse, accumulated over its chunks."""

    loaded: int = 0
    skipped: int = 0
    superseded: int = 0
    rejected_lines: set[int] = field(default_factory=set)
    supersessions: Counter[tuple[int, str, str]] = field(default_factory=Counter)
    reject_frames: list[pl.DataFrame] = field(default_factory=list)
    chunks: int = 0
    written_keys: dict[str, pl.DataFrame] = field(default_factory=dict)
    """Per table, the distinct (lot_id, layer, parameter) the file wrote, when :func:`supersede_file` found
    them on the way (from its groups, which the supersede key of measurements covers)."""


def _q(name: str) -> str:
    return '"' + name.replace('"', '""') + '"'


def configure_for_ingest(con: duckdb.DuckDBPyConnection) -> None:
    """Bound the memory one ingest may use (big files are loaded in chunks)."""
    con.execute(f"SET memory_limit = '{INGEST_MEMORY_LIMIT}'")
    con.execute("SET enable_progress_bar = false")
    con.execute("SET preserve_insertion_order = true")


def find_loaded_file(con: duckdb.DuckDBPyConnection, sha256: str) -> int | None:
    """file_id of an already loaded file with these bytes, or None."""
    rows = con.execute(
        "SELECT min(file_id) FROM source_files WHERE sha256 = ? AND status = 'loaded'", [sha256]
    ).fetchall()
    return rows[0][0] if rows and rows[0][0] is not None else None


def loaded_file_of_size(con: duckdb.DuckDBPyConnection, size: int) -> bool:
    """Whether a loaded file has exactly this many bytes (a file of another size cannot hold the same bytes)."""
    rows = con.execute(
        "SELECT 1 FROM source_files WHERE size_bytes = ? AND status = 'loaded' LIMIT 1", [size]
    ).fetchall()
    return bool(rows)


def new_file_id(con: duckdb.DuckDBPyConnection) -> int:
    """A fresh file id (ids only grow: every older file has a smaller id)."""
    return int(con.execute("SELECT nextval('file_id_seq')").fetchall()[0][0])


def load_chunk(
    con: duckdb.DuckDBPyConnection,
    table: str,
    frame: pl.DataFrame,
    *,
    file_id: int,
    counts: FileCounts,
    series_order: bool = True,
    stage_dir: Path | None = None,
) -> None:
    """Dedupe and insert one chunk of canonical rows of ``table`` for file ``file_id``.

    ``series_order`` sorts the chunk into series order on the way in; the caller turns it off for files
    too big for one chunk (a bulk backfill), where the sort would cost more than the load itself (and then
    lets DuckDB insert in parallel without keeping the order). Call :func:`supersede_file` after the last
    chunk.

    ``stage_dir``: hand the chunk over as a Parquet file written there instead of an in-memory Arrow view.
    Measured with DuckDB 2.0.1: inside one open transaction every Arrow-view insert keeps about 170 bytes a
    row alive until COMMIT (1.6 GB for a 10M-row file), a Parquet-sourced insert keeps nothing; staging costs
    about 15 % more CPU, so only files of several chunks use it.
    """
    if frame.height == 0:
        return
    t = schema.table(table)
    cols = [c for c in t.names if c not in (schema.C_SOURCE_FILE_ID, schema.C_SUPERSEDED_BY)]
    staged: Path | None = None
    if stage_dir is not None:
        staged = Path(stage_dir) / f"chunk_{file_id}_{counts.chunks}.parquet"
        counts.chunks += 1
        frame.select(cols).write_parquet(staged, compression="uncompressed", statistics=False)
        source, source_params = "read_parquet(?)", [str(staged)]
    else:
        view = "__lotline_chunk"
        con.register(view, frame.select(cols))
        source, source_params = view, []
    try:
        order = ", ".join(_q(c) for c in SERIES_ORDER.get(table, ()))
        order_sql = f" ORDER BY {order}, {_q(schema.C_SOURCE_LINE)}" if order and series_order else ""
        select = (
            f"SELECT f.*, ? AS {_q(schema.C_SOURCE_FILE_ID)}, NULL::BIGINT AS {_q(schema.C_SUPERSEDED_BY)} "
            f"FROM {source} f"
        )
        params: list[object] = [file_id, *source_params]
        if not t.supersede_key and t.natural_key:
            match = " AND ".join(f"m.{_q(k)} IS NOT DISTINCT FROM f.{_q(k)}" for k in t.natural_key)
            select += (
                f" WHERE NOT EXISTS (SELECT 1 FROM {_q(table)} m WHERE m.{_q(schema.C_SUPERSEDED_BY)} IS NULL"
                f" AND m.{_q(schema.C_SOURCE_FILE_ID)} < ? AND {match})"
            )
            params.append(file_id)
        con.execute(f"SET preserve_insertion_order = {'true' if series_order else 'false'}")
        n = con.execute(f"INSERT INTO {_q(table)} BY NAME {select}{order_sql}", params).fetchall()[0][0]
        counts.loaded += int(n)
        counts.skipped += frame.height - int(n)
    finally:
        if staged is not None:
            staged.unlink(missing_ok=True)
        else:
            con.unregister(view)


def _group_exprs(t: schema.Table, alias: str) -> list[str]:
    exprs = [f"{alias}.{_q(k)}" for k in t.supersede_key]
    tcol = TIME_COLUMN.get(t.name)
    if tcol and "sample_kind" in t.names:
        exprs.append(f"CASE WHEN {alias}.sample_kind = 'production' THEN NULL ELSE {alias}.{_q(tcol)} END")
    return exprs


def supersede_file(
    con: duckdb.DuckDBPyConnection, tables: list[str], *, file_id: int, counts: FileCounts
) -> None:
    """After a file's last chunk: mark the older current rows of the groups it covers as superseded by it.

    One pass per table for the whole file (the new rows carry ``file_id`` and are excluded by
    ``_source_file_id < file_id``). Child tables follow their parent, so parents go first.
    """
    ordered = [t for t in tables if t not in CHILD_OF] + [t for t in tables if t in CHILD_OF]
    for table in ordered:
        t = schema.table(table)
        if table in CHILD_OF:
            _cascade(con, table, CHILD_OF[table], file_id=file_id, counts=counts)
        elif t.supersede_key:
            _supersede(con, t, file_id=file_id, counts=counts)


def _supersede(con: duckdb.DuckDBPyConnection, t: schema.Table, *, file_id: int, counts: FileCounts) -> None:
    """Older current rows of the file's groups -> superseded by ``file_id``.

    The file's distinct groups are collected first (its rows sit at the end of the table, so the scan on
    ``_source_file_id = file_id`` skips the older row groups by their zone maps) and hash-joined with the
    table: only rows whose group matches are touched, and DuckDB pushes the groups' min/max into the scan.
    Measured on the 12-day demo (310k rows): 0.6-0.9 s a file with a correlated EXISTS, ~0.05 s this way.
    """
    if "lot_id" in t.supersede_key and not _older_lots_in_range(con, t, file_id):
        return  # no older current row shares a lot with this file, so no group can match
    g_new = _group_exprs(t, "f")
    g_old = _group_exprs(t, "m")
    names = [f"g{i}" for i in range(len(g_new))]
    con.execute(
        f"CREATE OR REPLACE TEMP TABLE __lotline_groups AS SELECT DISTINCT "
        f"{', '.join(f'{e} AS {n}' for e, n in zip(g_new, names, strict=True))} "
        f"FROM {_q(t.name)} f WHERE f.{_q(schema.C_SOURCE_FILE_ID)} = ?",
        [file_id],
    )
    try:
        keys = [c for c in ("lot_id", "layer", "parameter") if c in t.names]
        if keys and all(k in t.supersede_key for k in keys):
            sel = ", ".join(f"g{t.supersede_key.index(k)} AS {_q(k)}" for k in keys)
            # pl.DataFrame(relation) reads through the Arrow C stream: no pyarrow import (tens of ms)
            counts.written_keys[t.name] = pl.DataFrame(
                con.sql(f"SELECT DISTINCT {sel} FROM __lotline_groups")
            )
        match = " AND ".join(f"g.{n} IS NOT DISTINCT FROM {e}" for n, e in zip(names, g_old, strict=True))
        cond = f"m.{_q(schema.C_SUPERSEDED_BY)} IS NULL AND m.{_q(schema.C_SOURCE_FILE_ID)} < ?"
        hits = con.execute(
            f"SELECT m.{_q(schema.C_SOURCE_FILE_ID)}, m.lot_id, count(*) FROM {_q(t.name)} m "
            f"JOIN __lotline_groups g ON {match} WHERE {cond} GROUP BY ALL",
            [file_id],
        ).fetchall()
        if not hits:
            return
        con.execute(
            f"UPDATE {_q(t.name)} m SET {_q(schema.C_SUPERSEDED_BY)} = ? FROM __lotline_groups g "
            f"WHERE {match} AND {cond}",
            [file_id, file_id],
        )
    finally:
        con.execute("DROP TABLE IF EXISTS __lotline_groups")
    for old_id, lot, n in hits:
        counts.supersessions[(int(old_id), t.name, str(lot))] += int(n)
        counts.superseded += int(n)


def _older_lots_in_range(con: duckdb.DuckDBPyConnection, t: schema.Table, file_id: int) -> bool:
    """Whether an older current row has a lot_id between the file's smallest and largest one.

    An exact pre-check (a file of new lots, the usual daily file, supersedes nothing): two narrow scans that
    the zone maps on lot_id and _source_file_id keep short, instead of collecting the file's groups (about
    1 s per 10M rows).
    """
    lo, hi = con.execute(
        f"SELECT min(lot_id), max(lot_id) FROM {_q(t.name)} WHERE {_q(schema.C_SOURCE_FILE_ID)} = ?",
        [file_id],
    ).fetchall()[0]
    if lo is None:
        return False
    hit = con.execute(
        f"SELECT 1 FROM {_q(t.name)} WHERE {_q(schema.C_SOURCE_FILE_ID)} < ? AND {_q(schema.C_SUPERSEDED_BY)} "
        f"IS NULL AND lot_id BETWEEN ? AND ? LIMIT 1",
        [file_id, lo, hi],
    ).fetchall()
    return bool(hit)


def _cascade(
    con: duckdb.DuckDBPyConnection, table: str, parent: str, *, file_id: int, counts: FileCounts
) -> None:
    if not any(t == parent for _, t, _ in counts.supersessions):
        return  # this file superseded no parent row, so no child row follows
    keys = [k for k in schema.table(table).names if k in schema.table(parent).natural_key]
    match = " AND ".join(f"p.{_q(k)} = m.{_q(k)}" for k in keys)
    cond = (
        f"m.{_q(schema.C_SUPERSEDED_BY)} IS NULL AND m.{_q(schema.C_SOURCE_FILE_ID)} < ? AND EXISTS ("
        f"SELECT 1 FROM {_q(parent)} p WHERE p.{_q(schema.C_SUPERSEDED_BY)} = ? "
        f"AND p.{_q(schema.C_SOURCE_FILE_ID)} = m.{_q(schema.C_SOURCE_FILE_ID)} AND {match})"
    )
    hits = con.execute(
        f"SELECT m.{_q(schema.C_SOURCE_FILE_ID)}, m.lot_id, count(*) FROM {_q(table)} m WHERE {cond} GROUP BY ALL",
        [file_id, file_id],
    ).fetchall()
    if not hits:
        return
    con.execute(
        f"UPDATE {_q(table)} m SET {_q(schema.C_SUPERSEDED_BY)} = ? WHERE {cond}", [file_id, file_id, file_id]
    )
    for old_id, lot, n in hits:
        counts.supersessions[(int(old_id), table, str(lot))] += int(n)
        counts.superseded += int(n)


def reject_in_file_duplicates(
    con: duckdb.DuckDBPyConnection,
    table: str,
    candidate_lines: list[int],
    *,
    file_id: int,
    counts: FileCounts,
) -> pl.DataFrame:
    """Delete rows of this file whose natural key repeats an earlier line of the same file.

    ``candidate_lines`` are lines whose key hash repeats (found cheaply by the caller); the exact key is
    compared here. Returns and records rejects naming the first line.
    """
    t = schema.table(table)
    if not candidate_lines or not t.natural_key:
        return pl.DataFrame(
            schema={"line": pl.Int64, "column": pl.String, "value": pl.String, "reason": pl.String}
        )
    cand = pl.DataFrame({"line": candidate_lines}, schema={"line": pl.Int64})
    con.register("__lotline_dups", cand)
    try:
        match = " AND ".join(f"a.{_q(k)} IS NOT DISTINCT FROM b.{_q(k)}" for k in t.natural_key)
        L, F = _q(schema.C_SOURCE_LINE), _q(schema.C_SOURCE_FILE_ID)
        pairs = con.sql(
            f"SELECT b.{L} AS line, min(a.{L}) AS first_line FROM {_q(table)} a JOIN {_q(table)} b ON {match} "
            f"WHERE a.{F} = $fid AND b.{F} = $fid AND a.{L} < b.{L} "
            f"AND b.{L} IN (SELECT line FROM __lotline_dups) GROUP BY ALL ORDER BY 1",
            params={"fid": file_id},
        ).pl()
        if pairs.height:
            con.register("__lotline_duprows", pairs)
            n = con.execute(
                f"DELETE FROM {_q(table)} WHERE {F} = ? AND {L} IN (SELECT line FROM __lotline_duprows)",
                [file_id],
            ).fetchall()[0][0]
            con.unregister("__lotline_duprows")
            counts.loaded -= int(n)
    finally:
        con.unregister("__lotline_dups")
    key = ", ".join(t.natural_key)
    rejects = pairs.select(
        pl.col("line"),
        pl.lit(None, dtype=pl.String).alias("column"),
        pl.lit(None, dtype=pl.String).alias("value"),
        pl.format(
            "duplicate natural key ({}) of line {} in the same file; the first one was kept",
            pl.lit(key),
            pl.col("first_line"),
        ).alias("reason"),
    ).unique(subset="line", keep="first", maintain_order=True)
    return rejects


def finish_file(
    con: duckdb.DuckDBPyConnection,
    *,
    file_id: int,
    path: str,
    sha256: str,
    size: int,
    kind: str | None,
    profile: str | None,
    user: str,
    counts: FileCounts,
    rejects: pl.DataFrame,
) -> int:
    """Write the file's source_files row, its rejects and supersession audit, and bump the data version."""
    rejected = rejects.select(pl.col("line").n_unique()).item() if rejects.height else 0
    con.execute(
        "INSERT INTO source_files VALUES (?, ?, ?, ?, ?, ?, 'loaded', ?, ?, ?, ?, (get_current_timestamp() AT TIME ZONE 'UTC'), ?, NULL)",
        [
            file_id,
            path,
            sha256,
            size,
            kind,
            profile,
            counts.loaded,
            rejected,
            counts.skipped,
            counts.superseded,
            user,
        ],
    )
    if rejects.height:
        frame = rejects.select(
            pl.lit(file_id, dtype=pl.Int64).alias("file_id"), "line", "column", "value", "reason"
        )
        con.register("__lotline_rejects", frame)
        con.execute("INSERT INTO rejects BY NAME SELECT * FROM __lotline_rejects ORDER BY line")
        con.unregister("__lotline_rejects")
    for (old_id, table, lot), n in sorted(counts.supersessions.items()):
        con.execute(
            "INSERT INTO supersessions VALUES (?, ?, ?, ?, ?, (get_current_timestamp() AT TIME ZONE 'UTC'), ?)",
            [file_id, old_id, table, lot, n, user],
        )
    # --- derived table tool_days (data freshness): the tool-days this file wrote or superseded, recomputed
    from warehouse import tool_days

    tool_days.refresh_for_file(
        con, file_id=file_id, superseded_files=sorted({o for o, _, _ in counts.supersessions})
    )
    # --- end tool_days
    return bump_data_version(con)


def record_file(
    con: duckdb.DuckDBPyConnection,
    *,
    status: str,
    path: str,
    sha256: str,
    size: int,
    kind: str | None,
    profile: str | None,
    user: str,
    message: str | None,
) -> int:
    """A source_files row for a failed or duplicate file (call in its own small transaction)."""
    file_id = new_file_id(con)
    con.execute(
        "INSERT INTO source_files VALUES (?, ?, ?, ?, ?, ?, ?, 0, 0, 0, 0, (get_current_timestamp() AT TIME ZONE 'UTC'), ?, ?)",
        [file_id, path, sha256, size, kind, profile, status, user, message],
    )
    bump_data_version(con)
    return file_id


def affected_keys(con: duckdb.DuckDBPyConnection, table: str, file_id: int) -> pl.DataFrame:
    """Distinct (lot_id, layer[, parameter]) a file wrote or superseded: the hook for re-evaluation."""
    t = schema.table(table)
    cols = [c for c in ("lot_id", "layer", "parameter") if c in t.names]
    if not cols:
        return pl.DataFrame()
    sel = ", ".join(_q(c) for c in cols)
    return con.sql(
        f"SELECT DISTINCT {sel} FROM {_q(table)} WHERE {_q(schema.C_SOURCE_FILE_ID)} = $fid "
        f"OR {_q(schema.C_SUPERSEDED_BY)} = $fid ORDER BY ALL",
        params={"fid": file_id},
    ).pl()


def list_rejects(
    con: duckdb.DuckDBPyConnection, *, path: str | None = None, limit: int = 100
) -> pl.DataFrame:
    """Stored rejects with the path of their file, newest file first."""
    return con.sql(
        'SELECT s.path, r.line, r."column", r.value, r.reason FROM rejects r JOIN source_files s USING (file_id) '
        "WHERE $path IS NULL OR s.path = $path ORDER BY r.file_id DESC, r.line LIMIT $lim",
        params={"path": path, "lim": limit},
    ).pl()


def list_files(con: duckdb.DuckDBPyConnection) -> pl.DataFrame:
    """The ingest log (source_files), oldest first."""
    return con.sql("SELECT * FROM source_files ORDER BY file_id").pl()


def file_stamps(con: duckdb.DuckDBPyConnection) -> dict[str, str]:
    """path -> sha256 of the latest recorded attempt of each path (watch mode skips unchanged files)."""
    rows = con.execute("SELECT path, arg_max(sha256, file_id) FROM source_files GROUP BY path").fetchall()
    return {p: h for p, h in rows}
