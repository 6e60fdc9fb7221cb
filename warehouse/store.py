"""The warehouse file: opening it, its DDL and migrations, and the unit-of-work rules.

Concurrency model (DuckDB 2: while one process has the file open read-write no other process can open it at
all): **no connection outlives a unit of work**. Every caller opens with :func:`open_warehouse`, works, and
closes. Opening retries with backoff while another process holds the lock and, when the wait runs out,
raises :class:`WarehouseLockedError` naming the holding process. Inside one process use one cursor per
thread (``con.cursor()``); never share a connection across threads.

A run of many small units (an ingest of a folder of daily files) may share one connection through a
:class:`Batch`: each unit keeps its own transaction, but the connection is closed (and the next unit opens
a new one) once it has been open for ``max_s`` seconds (default 2 s) or served ``max_units`` units (default
50), so a waiting reader (the dashboard) gets the file between batches. Opening and closing cost about
65 ms each (the close after writes runs a checkpoint), which dominated a run of small files.

Only ``warehouse/`` holds SQL text; values are always bound parameters.
"""

from __future__ import annotations

import json
import os
import re
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path

import duckdb

from warehouse import schema
from warehouse.errors import SchemaVersionError, WarehouseError, WarehouseLockedError, WarehouseNotFoundError

DEFAULT_DB = "lotline.duckdb"
"""Warehouse path when neither ``--db`` nor ``LOTLINE_DB`` is given."""
DEFAULT_WAIT_S = 60.0
"""How long opening waits for another process to release the file."""
ENV_DB = "LOTLINE_DB"

_DUCKDB_TYPES = {
    schema.STRING: "VARCHAR",
    schema.INT64: "BIGINT",
    schema.FLOAT64: "DOUBLE",
    schema.TIMESTAMP: "TIMESTAMP",
    schema.BOOL: "BOOLEAN",
}

_LOCK_RE = re.compile(r"Conflicting lock is held in (?P<proc>.*?) \(PID (?P<pid>\d+)\)")


def resolve_db_path(path: str | os.PathLike[str] | None) -> Path:
    """The warehouse path: the explicit one, else ``$LOTLINE_DB``, else ``./lotline.duckdb``."""
    if path:
        return Path(path)
    return Path(os.environ.get(ENV_DB) or DEFAULT_DB)


def create_table_sql(t: schema.Table) -> str:
    """``CREATE TABLE`` text for a declared table (no primary key: see DESIGN, big facts carry no index)."""
    cols = []
    for c in t.columns:
        col = f'"{c.name}" {_DUCKDB_TYPES[c.dtype]}'
        if not c.nullable:
            col += " NOT NULL"
        cols.append(col)
    return f'CREATE TABLE IF NOT EXISTS "{t.name}" (\n  ' + ",\n  ".join(cols) + "\n)"


# ------------------------------------------------------------------------------------------ migrations
# Each migration is (version, note, function). A function receives an open connection inside a
# transaction. Append new migrations at the end of MIGRATIONS; never edit one that has shipped.

Migration = tuple[int, str, Callable[[duckdb.DuckDBPyConnection], None]]


def _m1_core(con: duckdb.DuckDBPyConnection) -> None:
    for t in (*schema.FACT_TABLES, *schema.OPERATION_TABLES):
        con.execute(create_table_sql(t))
    con.execute("CREATE SEQUENCE IF NOT EXISTS file_id_seq START 1")
    con.execute("INSERT INTO meta VALUES ('data_version', '0')")


def _m2_monitoring(con: duckdb.DuckDBPyConnection) -> None:
    for t in schema.MONITORING_TABLES:
        if t is schema.LOT_FIRST_FILES:  # created by migration 3
            continue
        con.execute(create_table_sql(t))
    for seq in ("series_id_seq", "signal_id_seq", "excursion_id_seq", "audit_id_seq", "run_id_seq"):
        con.execute(f"CREATE SEQUENCE IF NOT EXISTS {seq} START 1")


def _m3_lot_first_files(con: duckdb.DuckDBPyConnection) -> None:
    con.execute(create_table_sql(schema.LOT_FIRST_FILES))


def _m4_derived_tables(con: duckdb.DuckDBPyConnection) -> None:
    # chart_points starts empty: evaluation runs full once when the last run did not write it
    # (warehouse.evaluate.CHART_POINTS_RUN); until then charts are computed from the facts.
    # tool_days is one group-by over the facts, cheap enough to fill here (about 1 s at 30M rows).
    from warehouse import tool_days

    for t in schema.DERIVED_TABLES:
        con.execute(create_table_sql(t))
    tool_days.rebuild(con)


MIGRATIONS: list[Migration] = [
    (1, "canonical fact and operation tables", _m1_core),
    (
        2,
        "monitoring plan, series, control limits, signals, excursions, audit, evaluation state",
        _m2_monitoring,
    ),
    (3, "lot first-file index for incremental evaluation", _m3_lot_first_files),
    (4, "derived tables: evaluated chart points, rows and last seen per tool and day", _m4_derived_tables),
]


def latest_version() -> int:
    """The schema version this lotline writes."""
    return max(v for v, _, _ in MIGRATIONS)


def _current_version(con: duckdb.DuckDBPyConnection) -> int:
    # A direct read is ~7x faster than asking information_schema, and every open runs it.
    try:
        row = con.execute("SELECT max(version) FROM schema_version").fetchall()[0][0]
    except duckdb.CatalogException:
        return 0
    return int(row or 0)


def migrate(con: duckdb.DuckDBPyConnection, path: Path) -> list[int]:
    """Bring the file to :func:`latest_version`; return the versions applied. Refuses a newer file."""
    current = _current_version(con)
    latest = latest_version()
    if current > latest:
        raise SchemaVersionError(
            "warehouse was written by a newer lotline",
            path=str(path),
            found=f"schema version {current}",
            expected=f"at most {latest}",
            fix="upgrade lotline (pip install -U lotline) or open a copy made by this version",
        )
    applied = []
    for version, note, fn in MIGRATIONS:
        if version <= current:
            continue
        with transaction(con):
            fn(con)
            con.execute(
                "INSERT INTO schema_version VALUES (?, now()::TIMESTAMP, ?)",
                [version, note],
            )
        applied.append(version)
    return applied


# ------------------------------------------------------------------------------------------ opening


@contextmanager
def open_warehouse(
    path: str | os.PathLike[str] | None = None,
    *,
    read_only: bool = False,
    create: bool = False,
    wait_s: float = DEFAULT_WAIT_S,
) -> Iterator[duckdb.DuckDBPyConnection]:
    """Open the warehouse for one unit of work and close it afterwards.

    A read-write open migrates an older file; ``create=True`` also makes a new one. A read-only open never
    creates or migrates. While another process holds the file, retries with backoff for up to ``wait_s``.

    Example:
        >>> with open_warehouse("lotline.duckdb", create=True) as con:  # doctest: +SKIP
        ...     con.sql("SELECT count(*) FROM measurements").fetchall()
    """
    p = resolve_db_path(path)
    if not p.exists() and not create:
        raise WarehouseNotFoundError(
            "warehouse not found",
            path=str(p),
            fix="run `lotline init` or `lotline ingest PATH` first, or pass --db to the right file",
        )
    if create:
        p.parent.mkdir(parents=True, exist_ok=True)
    con = _connect_with_retry(p, read_only=read_only, wait_s=wait_s)
    try:
        if not read_only:
            migrate(con, p)
            discard_interrupted_load(con)
        else:
            _check_readable(con, p)
            if interrupted_load(con) is not None:  # a crashed two-step load: repair it, then read
                con.close()
                _repair_interrupted_load(p, wait_s=wait_s)
                con = _connect_with_retry(p, read_only=True, wait_s=wait_s)
        yield con
    finally:
        con.close()


class Batch:
    """One read-write connection shared by consecutive units of work, reopened between batches.

    ``unit()`` yields the open connection (opening it first when needed, and calling ``on_open(con)`` on a
    fresh one). After a unit ends the connection is closed once it has been open for ``max_s`` seconds or
    has served ``max_units`` units, and always when a unit raised. The caller keeps each unit in its own
    transaction; :meth:`close` ends the last batch.

    Example:
        >>> with Batch("lotline.duckdb", create=True) as batch:  # doctest: +SKIP
        ...     for f in files:
        ...         with batch.unit() as con, transaction(con):
        ...             ...
    """

    MAX_S = 2.0
    MAX_UNITS = 50

    def __init__(
        self,
        path: str | os.PathLike[str] | None = None,
        *,
        create: bool = False,
        wait_s: float = DEFAULT_WAIT_S,
        max_s: float = MAX_S,
        max_units: int = MAX_UNITS,
        on_open: Callable[[duckdb.DuckDBPyConnection], None] | None = None,
    ) -> None:
        self.path, self.create, self.wait_s = path, create, wait_s
        self.max_s, self.max_units, self.on_open = max_s, max_units, on_open
        self._cm = None
        self._con: duckdb.DuckDBPyConnection | None = None
        self._opened = 0.0
        self._units = 0
        self.opens = 0
        """How many connections this batch opened (for tests and timings)."""

    @contextmanager
    def unit(self) -> Iterator[duckdb.DuckDBPyConnection]:
        if self._con is None:
            cm = open_warehouse(self.path, create=self.create, wait_s=self.wait_s)
            con = cm.__enter__()
            self._cm, self._con = cm, con
            self._opened, self._units = time.monotonic(), 0
            self.opens += 1
            try:
                if self.on_open is not None:
                    self.on_open(con)
            except BaseException:
                self.close()
                raise
        try:
            yield self._con
        except BaseException:
            self.close()
            raise
        self._units += 1
        if self._units >= self.max_units or time.monotonic() - self._opened >= self.max_s:
            self.close()

    def close(self) -> None:
        """Close the current connection, if any (the next unit opens a new one)."""
        cm, self._cm, self._con = self._cm, None, None
        if cm is not None:
            cm.__exit__(None, None, None)

    def __enter__(self) -> Batch:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def _check_readable(con: duckdb.DuckDBPyConnection, path: Path) -> None:
    current = _current_version(con)
    if current > latest_version():
        raise SchemaVersionError(
            "warehouse was written by a newer lotline",
            path=str(path),
            found=f"schema version {current}",
            expected=f"at most {latest_version()}",
            fix="upgrade lotline",
        )
    if current < latest_version():
        raise WarehouseError(
            "warehouse needs a migration before it can be read",
            path=str(path),
            found=f"schema version {current}",
            expected=f"{latest_version()}",
            fix="run `lotline init` once (it migrates in place)",
        )


def _connect_with_retry(path: Path, *, read_only: bool, wait_s: float) -> duckdb.DuckDBPyConnection:
    deadline = time.monotonic() + wait_s
    delay = 0.02
    while True:
        try:
            return duckdb.connect(str(path), read_only=read_only)
        except duckdb.IOException as exc:
            text = str(exc)
            if "lock" not in text.lower():
                raise WarehouseError(
                    "cannot open warehouse",
                    path=str(path),
                    details=text.splitlines()[0],
                    fix="check that the file is a lotline warehouse (a DuckDB file) and readable",
                ) from exc
            if time.monotonic() + delay > deadline:
                m = _LOCK_RE.search(text)
                holder = f"PID {m.group('pid')} ({m.group('proc')})" if m else "another process"
                raise WarehouseLockedError(
                    f"warehouse is busy: {holder} held it for the whole {wait_s:g} s wait",
                    path=str(path),
                    fix=(
                        "wait for that process to finish (an ingest or evaluate run), or stop it; "
                        "a long wait can be allowed with --wait SECONDS"
                    ),
                ) from exc
            time.sleep(delay)
            delay = min(delay * 2, 0.5)
        except duckdb.Error as exc:
            raise WarehouseError(
                "cannot open warehouse",
                path=str(path),
                details=str(exc).splitlines()[0],
                fix="check that the file is a lotline warehouse (a DuckDB file) made by DuckDB 2",
            ) from exc


# ------------------------------------------------------------------------------------------ two-step loads

INTERRUPTED_LOAD_KEY = "interrupted_direct_load"
"""``meta`` key of a direct load between its two commits: ``{"table": ..., "file_id": ...}``.

A big plain CSV file is loaded in two transactions (``ingest/jobs.py``): the first inserts and checks its
rows, which stay hidden (``_superseded_by`` holds the file's own id, so no query of current rows sees them),
and writes this key; the second numbers the rows' lines, makes them current, supersedes older rows,
records the file and deletes the key. A process that dies between the two leaves the key behind, and the
next open deletes the hidden rows, so the warehouse is as it was before the file.
"""


def mark_interrupted_load(con: duckdb.DuckDBPyConnection, table: str, file_id: int) -> None:
    """Record (inside the first transaction) that ``table`` holds hidden rows of ``file_id``."""
    con.execute("DELETE FROM meta WHERE key = ?", [INTERRUPTED_LOAD_KEY])
    con.execute(
        "INSERT INTO meta VALUES (?, ?)",
        [INTERRUPTED_LOAD_KEY, json.dumps({"table": table, "file_id": int(file_id)})],
    )


def clear_interrupted_load(con: duckdb.DuckDBPyConnection) -> None:
    """The second transaction made the rows current: drop the record (inside that transaction)."""
    con.execute("DELETE FROM meta WHERE key = ?", [INTERRUPTED_LOAD_KEY])


def interrupted_load(con: duckdb.DuckDBPyConnection) -> tuple[str, int] | None:
    """(table, file id) of a load stopped between its two commits, or None."""
    rows = con.execute("SELECT value FROM meta WHERE key = ?", [INTERRUPTED_LOAD_KEY]).fetchall()
    if not rows:
        return None
    try:
        rec = json.loads(rows[0][0])
        table, file_id = str(rec["table"]), int(rec["file_id"])
        if table not in {t.name for t in schema.FACT_TABLES}:  # the name goes into the SQL text
            raise ValueError(table)
    except (ValueError, KeyError, TypeError) as exc:
        raise WarehouseError(
            "the record of an interrupted load is unreadable",
            found=f"meta {INTERRUPTED_LOAD_KEY} = {rows[0][0]!r}",
            fix=(
                "delete the rows whose _superseded_by equals their own _source_file_id (hidden rows of that "
                f"load), then the meta row: DELETE FROM meta WHERE key = '{INTERRUPTED_LOAD_KEY}'"
            ),
        ) from exc
    return table, file_id


def discard_interrupted_load(con: duckdb.DuckDBPyConnection) -> int | None:
    """Delete the hidden rows of a load stopped between its two commits (own transaction); its file id."""
    found = interrupted_load(con)
    if found is None:
        return None
    table, file_id = found
    with transaction(con):
        con.execute(
            f'DELETE FROM "{table}" WHERE "{schema.C_SOURCE_FILE_ID}" = ? AND "{schema.C_SUPERSEDED_BY}" = ?',
            [file_id, file_id],
        )
        clear_interrupted_load(con)
    return file_id


def _repair_interrupted_load(path: Path, *, wait_s: float) -> None:
    """A read-only open found a crashed load: open read-write once to discard it (skipped when the file
    cannot be written, e.g. a read-only copy; its hidden rows are then still not current rows)."""
    try:
        con = _connect_with_retry(path, read_only=False, wait_s=wait_s)
    except WarehouseLockedError:
        raise
    except WarehouseError:
        return
    try:
        discard_interrupted_load(con)
    finally:
        con.close()


# ------------------------------------------------------------------------------------------ writing


@contextmanager
def transaction(con: duckdb.DuckDBPyConnection) -> Iterator[duckdb.DuckDBPyConnection]:
    """One explicit transaction. On any error it rolls back and re-raises.

    DuckDB 2 silently rolls back a ``COMMIT`` issued after a failed statement, so we never rely on COMMIT
    to report an error: the exception path always issues ROLLBACK itself.
    """
    con.execute("BEGIN TRANSACTION")
    try:
        yield con
    except BaseException:
        try:
            con.execute("ROLLBACK")
        except duckdb.Error:
            pass
        raise
    con.execute("COMMIT")


def commit_and_begin(con: duckdb.DuckDBPyConnection) -> None:
    """Commit the open transaction and begin the next one (inside a :func:`transaction` block, whose own
    commit or rollback then ends the second)."""
    con.execute("COMMIT")
    con.execute("BEGIN TRANSACTION")


def bump_data_version(con: duckdb.DuckDBPyConnection) -> int:
    """Increase the warehouse's data version (call inside the write's transaction); return the new one."""
    con.execute(
        "UPDATE meta SET value = CAST(CAST(value AS BIGINT) + 1 AS VARCHAR) WHERE key = 'data_version'"
    )
    return int(con.execute("SELECT value FROM meta WHERE key = 'data_version'").fetchall()[0][0])


def read_data_version(con: duckdb.DuckDBPyConnection) -> int:
    """The data version stored in the warehouse."""
    rows = con.execute("SELECT value FROM meta WHERE key = 'data_version'").fetchall()
    return int(rows[0][0]) if rows else 0


def file_stamp(path: str | os.PathLike[str] | None = None) -> tuple[int, int]:
    """A cheap change stamp of the warehouse file (mtime in ns, size) read without opening it.

    The dashboard keys its caches on this, so it reopens the file only after a write.
    """
    p = resolve_db_path(path)
    stamps = []
    for candidate in (p, p.with_name(p.name + ".wal")):
        try:
            st = candidate.stat()
            stamps.append((st.st_mtime_ns, st.st_size))
        except FileNotFoundError:
            stamps.append((0, 0))
    return (max(s[0] for s in stamps), sum(s[1] for s in stamps))


def init_warehouse(path: str | os.PathLike[str] | None = None) -> dict[str, object]:
    """Create or migrate the warehouse file; return its path, version and the migrations applied."""
    p = resolve_db_path(path)
    existed = p.exists()
    with open_warehouse(p, create=True) as con:
        version = _current_version(con)
        rows = con.execute("SELECT version FROM schema_version ORDER BY version").fetchall()
    return {"path": str(p), "created": not existed, "version": version, "versions": [r[0] for r in rows]}


def table_counts(con: duckdb.DuckDBPyConnection) -> dict[str, int]:
    """Row counts of every declared table (for summaries and tests)."""
    out = {}
    for t in schema.TABLES:
        out[t.name] = int(con.execute(f'SELECT count(*) FROM "{t.name}"').fetchall()[0][0])
    return out
