"""Direct load: a clean plain CSV file parsed, mapped and checked inside DuckDB in one ``INSERT``. All its SQL.

The column program comes from ``ingest.adapters.direct`` (pure); this module turns it into SQL and runs it
inside the file's transaction (``ingest/jobs.py`` owns the transaction and falls back to the Polars path when
:func:`insert_clean_rows` reports that some rows were not clean).

How the line number of each row is found without a window function (``row_number() OVER ()`` costs half of
the load by itself, measured with DuckDB 2.0.1): the ``INSERT`` keeps the file's order
(``preserve_insertion_order``), so the rows of one file get consecutive row ids in file order, and one
``UPDATE`` sets ``_source_line = rowid - first row id + first data line``. That holds only when no line was
dropped, which is exactly the condition for keeping the direct load (inserted rows == data lines of the
file); the caller also compares a sample of stored rows with the text of their lines in the file.

The load takes two transactions (see :data:`warehouse.store.INTERRUPTED_LOAD_KEY`): :func:`insert_rows`
writes the rows hidden (``_superseded_by`` = the file's own id) and the first commit stores them;
:func:`number_lines` then numbers them and makes them current in the second. Updating rows of the same
transaction made DuckDB rewrite every column of their row groups at commit and again at the checkpoint
(10M rows: 29.7 s against 25.6 s for the whole load, DuckDB 2.0.1); rows already committed get their two
changed columns rewritten alone.

Values are bound parameters; header names and canonical column names are quoted identifiers.
"""

from __future__ import annotations

from dataclasses import dataclass

import duckdb
import numpy as np
import polars as pl

from warehouse import schema

FLOAT_SHAPE = r"-?[0-9]+(\.[0-9]+)?([eE][+-]?[0-9]+)?"
"""Numbers the direct path accepts (both DuckDB and Polars parse these to the same correctly rounded double)."""
ISO_UTC_SHAPE = r"[0-9]{4}-(0[1-9]|1[0-2])-(0[1-9]|[12][0-9]|3[01])T([01][0-9]|2[0-3]):[0-5][0-9]:[0-5][0-9](\.[0-9]{1,6})?Z"
"""Timestamps the direct path accepts: ISO 8601 in UTC with ``Z``, at most microseconds."""


@dataclass(frozen=True)
class DirectColumn:
    """How one canonical column is computed from the raw text of one header field (or a constant).

    ``kind``: ``text`` (the raw text), ``mapped`` (``mapping`` raw -> canonical; unknown raw is not clean),
    ``float`` / ``int`` / ``bool`` (parsed), ``iso_utc`` (timestamp), ``constant`` (``constant``), ``unit``
    (the unit of the canonical parameter, :data:`warehouse.schema.PARAMETER_UNITS`, default nm).
    """

    name: str
    kind: str
    source: str | None = None
    mapping: tuple[tuple[str, str], ...] = ()
    factor: float = 1.0
    factor_only_for_nm: bool = False
    constant: object = None
    required: bool = False
    allowed: tuple[str, ...] = ()
    bounds: tuple[tuple[str, float], ...] = ()
    """Physical range in canonical units, as (operator, bound) pairs: ``(">", 0.0)``, ``("<=", 150.0)``."""


@dataclass(frozen=True)
class DirectProgram:
    """The whole program for one file: its table, text dialect, header fields and canonical columns."""

    table: str
    delimiter: str
    header: tuple[str, ...]
    header_line: int
    columns: tuple[DirectColumn, ...]
    positive_length: bool = False
    """measurements: a value whose unit is nm must be > 0."""
    ends_after_start: bool = False
    """process_history: ended_at must not be before started_at."""

    def column(self, name: str) -> DirectColumn:
        return next(c for c in self.columns if c.name == name)

    def identity_text_columns(self) -> list[DirectColumn]:
        """Required columns stored exactly as exported (used to check the stored line numbers)."""
        return [c for c in self.columns if c.kind == "text" and c.required]


INT_SHAPE = "-?[0-9]+"
"""Integers the direct path accepts (DuckDB would round ``12.5`` to 13 and read ``0x10``; Polars rejects both)."""


def _q(name: str) -> str:
    return '"' + name.replace('"', '""') + '"'


class _Params:
    def __init__(self) -> None:
        self.values: dict[str, object] = {}

    def add(self, value: object) -> str:
        key = f"p{len(self.values)}"
        self.values[key] = value
        return "$" + key


_TYPES = {
    schema.STRING: "VARCHAR",
    schema.INT64: "BIGINT",
    schema.FLOAT64: "DOUBLE",
    schema.TIMESTAMP: "TIMESTAMP",
    schema.BOOL: "BOOLEAN",
}


def _shape_sql(raw: str, shape: str) -> str:
    return f"({raw} IS NULL OR regexp_full_match({raw}, {shape}))"


def _parse_sql(c: DirectColumn, p: _Params, t: schema.Table) -> tuple[str | None, str | None]:
    """(SQL of the parsed value from the raw text, SQL of "the raw text has the accepted shape") of a column.

    The parsed value is None for a ``unit`` column (derived later from the parameter); the shape is None
    where any text is accepted.
    """
    raw = _q(c.source) if c.source else "NULL"
    if c.kind == "text":
        return raw, None
    if c.kind == "mapped":
        whens = " ".join(f"WHEN {p.add(k)} THEN {p.add(val)}" for k, val in c.mapping)
        return f"(CASE {raw} {whens} END)", None
    if c.kind == "float":
        return f"TRY_CAST({raw} AS DOUBLE)", _shape_sql(raw, p.add(FLOAT_SHAPE))
    if c.kind == "int":
        return f"TRY_CAST({raw} AS BIGINT)", _shape_sql(raw, p.add(INT_SHAPE))
    if c.kind == "bool":
        v = (
            f"(CASE lower({raw}) WHEN 'true' THEN true WHEN '1' THEN true "
            f"WHEN 'false' THEN false WHEN '0' THEN false END)"
        )
        return v, None
    if c.kind == "iso_utc":
        return f"TRY_CAST(replace({raw}, 'Z', '') AS TIMESTAMP)", _shape_sql(raw, p.add(ISO_UTC_SHAPE))
    if c.kind == "constant":
        v = "NULL" if c.constant is None else p.add(c.constant)
        return f"CAST({v} AS {_TYPES[t.column(c.name).dtype]})", None
    if c.kind == "unit":
        return None, None
    raise AssertionError(c.kind)  # pragma: no cover - the program builder only makes the kinds above


def insert_sql(prog: DirectProgram, *, path: str, file_id: int, max_line_bytes: int) -> tuple[str, dict]:
    """The ``INSERT`` of the rows of the file at ``path``.

    Until :func:`number_lines`, ``_source_line`` holds -1 for a row that is not clean and, for a clean row, a
    non-negative hash of its natural key, and ``_superseded_by`` holds ``file_id`` (hidden from every query
    of current rows).

    The SELECT has three levels so that every value is computed once: ``parsed`` reads the raw text
    (``v<i>`` parsed value, ``n<i>`` raw text missing, ``s<i>`` raw text of the accepted shape), ``final``
    applies units and derives ``unit``, and the top level checks the row and names the canonical columns.
    The checks of one row could reuse a value up to six times; written inline, DuckDB evaluated each copy
    (measured with DuckDB 2.0.1 on 3M rows: the checks then cost 25 % of the load's CPU time).
    """
    t = schema.table(prog.table)
    p = _Params()
    idx = {c.name: i for i, c in enumerate(prog.columns)}
    parsed: list[str] = []
    for i, c in enumerate(prog.columns):
        v, shape = _parse_sql(c, p, t)
        if v is not None:
            parsed.append(f"{v} AS v{i}")
        if c.source and c.kind in ("mapped", "bool", "float", "int", "iso_utc"):
            parsed.append(f"({_q(c.source)} IS NULL) AS n{i}")
        if shape is not None:
            parsed.append(f"{shape} AS s{i}")
    final: list[str] = []
    for i, c in enumerate(prog.columns):
        if c.kind == "unit":
            param = f"v{idx['parameter']}"  # a text or mapped column in both tables that derive unit
            whens = " ".join(f"WHEN {p.add(k)} THEN {p.add(u)}" for k, u in schema.PARAMETER_UNITS.items())
            final.append(f"(CASE {param} {whens} ELSE 'nm' END) AS f{i}")
        elif c.kind == "float" and c.factor != 1.0 and c.factor_only_for_nm:
            pass  # needs the unit: computed one level up
        elif c.kind == "float" and c.factor != 1.0:
            final.append(f"(v{i} * {p.add(c.factor)}) AS f{i}")
        else:
            final.append(f"v{i} AS f{i}")
    ref = {c.name: f"f{i}" for i, c in enumerate(prog.columns)}
    top_final: dict[int, str] = {}
    for i, c in enumerate(prog.columns):
        if c.kind == "float" and c.factor != 1.0 and c.factor_only_for_nm:
            # a length exported in another unit is converted; an angle (unit deg) keeps its value
            top_final[i] = f"(CASE WHEN {ref['unit']} = 'nm' THEN v{i} * {p.add(c.factor)} ELSE v{i} END)"
            ref[c.name] = f"g{i}"
    clean: list[str] = []
    for i, c in enumerate(prog.columns):
        f = ref[c.name]
        if c.kind in ("mapped", "bool"):
            clean.append(f"(n{i} OR {f} IS NOT NULL)")
        elif c.kind == "float":
            clean += [f"s{i}", f"(n{i} OR isfinite({f}))"]
        elif c.kind in ("int", "iso_utc"):
            clean += [f"s{i}", f"(n{i} OR {f} IS NOT NULL)"]
        if c.required:
            clean.append(f"({f} IS NOT NULL)")
        if c.allowed:
            opts = ", ".join(p.add(a) for a in c.allowed)
            clean.append(f"({f} IS NULL OR {f} IN ({opts}))")
        for op, bound in c.bounds:
            clean.append(f"({f} IS NULL OR {f} {op} {p.add(float(bound))})")
    if prog.positive_length:
        clean.append(f"({ref['unit']} <> 'nm' OR {ref['value']} > 0)")
    if prog.ends_after_start:
        clean.append(f"({ref['ended_at']} IS NULL OR {ref['ended_at']} >= {ref['started_at']})")
    cols = {h: "VARCHAR" for h in prog.header}
    src = (
        f"read_csv({p.add(path)}, header = false, skip = {int(prog.header_line)}, delim = {p.add(prog.delimiter)}, "
        f"quote = '', escape = '', columns = {p.add(cols)}, auto_detect = false, strict_mode = true, "
        f"null_padding = false, ignore_errors = true, max_line_size = {int(max_line_bytes)})"
    )
    # a NULL check counts as failed: CASE WHEN takes only TRUE
    ok = " AND ".join(clean) or "true"
    fid = p.add(int(file_id))
    # the clean flag rides in _source_line (-1: not clean) until number_lines: the checks in the projection
    # cost ~20 % CPU over the same parse unchecked, the same checks as a WHERE filter ~50 % (DuckDB 2.0.1)
    # a clean row's natural-key hash rides there too, so the in-file duplicate check needs no second hashing
    key = [ref[k] if k in ref else "NULL" for k in t.natural_key]
    mark = f"(hash({', '.join(key)}) >> 1)::BIGINT" if key else "0"
    extra = "".join(f", {e} AS g{i}" for i, e in top_final.items())
    out = ", ".join(f"{ref[c.name]} AS {_q(c.name)}" for c in prog.columns)
    sql = (
        f"INSERT INTO {_q(t.name)} BY NAME SELECT {out}, {fid} AS {_q(schema.C_SOURCE_FILE_ID)}, "
        f"CASE WHEN {ok} THEN {mark} ELSE -1 END AS {_q(schema.C_SOURCE_LINE)}, "
        f"{fid}::BIGINT AS {_q(schema.C_SUPERSEDED_BY)} "
        f"FROM (SELECT *{extra} FROM (SELECT *, {', '.join(final)} FROM "
        f"(SELECT {', '.join(parsed)} FROM {src})))"
    )
    return sql, p.values


def insert_rows(
    con: duckdb.DuckDBPyConnection, prog: DirectProgram, *, path: str, file_id: int, max_line_bytes: int
) -> tuple[int, int, list[int]] | None:
    """Insert the file's rows in file order, hidden; return (rows inserted, rows not clean, repeated offsets).

    Only a file whose rows are all clean may stay (the caller rolls the transaction back otherwise). The
    offsets (row index in the file's data lines, from 0) are those of rows whose natural-key hash repeats
    within the file (candidates for the exact duplicate check). Returns None when DuckDB refused the file,
    e.g. a required value missing (the transaction is then aborted).

    The repeats are found by sorting the hashes in NumPy and comparing neighbours: on 10M rows 0.2 s to
    fetch them and 0.2 s to sort, against 1.5-1.7 s for a ``GROUP BY`` of the same column and 2.5-2.7 s for
    the same sort as a window in DuckDB (DuckDB 2.0.1, NumPy 2, 2 cores).
    """
    sql, params = insert_sql(prog, path=path, file_id=file_id, max_line_bytes=max_line_bytes)
    L, F, t = _q(schema.C_SOURCE_LINE), _q(schema.C_SOURCE_FILE_ID), _q(prog.table)
    try:
        con.execute("SET preserve_insertion_order = true")
        n = int(con.execute(sql, params).fetchall()[0][0])
        marks = con.execute(f"SELECT {L} FROM {t} WHERE {F} = ?", [int(file_id)]).fetchnumpy()
        k = np.asarray(marks[schema.C_SOURCE_LINE], dtype=np.int64)
        k.sort()
        bad = int(np.searchsorted(k, 0))  # the -1 marks of rows not clean sort first
        good = k[bad:]
        repeated = np.unique(good[1:][good[1:] == good[:-1]]).tolist()
        del marks, k, good
        offsets: list[int] = []
        if repeated and not bad:
            offsets = [
                int(r[0])
                for r in con.execute(
                    f"SELECT rowid - (SELECT min(rowid) FROM {t} WHERE {F} = $f) FROM {t} "
                    f"WHERE {F} = $f AND {L} IN (SELECT unnest($k)) ORDER BY rowid",
                    {"f": int(file_id), "k": list(repeated)},
                ).fetchall()
            ]
    except duckdb.Error:
        return None
    return n, int(bad), offsets


class LinesNotConsecutive(Exception):
    """The file's rows no longer have consecutive row ids, so they cannot be numbered from them."""


def number_lines(
    con: duckdb.DuckDBPyConnection, table: str, *, file_id: int, first_line: int, rows: int
) -> None:
    """Set ``_source_line`` of the file's hidden rows from their row ids and make them current.

    Runs in the load's second transaction. Raises :class:`LinesNotConsecutive` unless the file's ``rows``
    rows still have consecutive row ids (a checkpoint between the two commits may renumber a table's rows;
    it keeps their order).
    """
    t = _q(table)
    F, L, S = _q(schema.C_SOURCE_FILE_ID), _q(schema.C_SOURCE_LINE), _q(schema.C_SUPERSEDED_BY)
    lo, hi, n = con.execute(
        f"SELECT min(rowid), max(rowid), count(*) FROM {t} WHERE {F} = ? AND {S} = ?", [file_id, file_id]
    ).fetchall()[0]
    if n != rows or lo is None or hi - lo + 1 != rows:
        raise LinesNotConsecutive(f"{n} hidden rows of file {file_id} at row ids {lo}..{hi}, expected {rows}")
    con.execute(
        f"UPDATE {t} SET {L} = rowid - ? + ?, {S} = NULL WHERE {F} = ?", [int(lo), int(first_line), file_id]
    )


def stored_at_offsets(
    con: duckdb.DuckDBPyConnection, table: str, *, file_id: int, offsets: list[int], columns: list[str]
) -> dict[int, tuple]:
    """``offset -> (values of columns)`` of the file's rows at those offsets (row index from 0, file order)."""
    if not offsets:
        return {}
    sel = ", ".join(_q(c) for c in columns)
    F, t = _q(schema.C_SOURCE_FILE_ID), _q(table)
    r0 = int(con.execute(f"SELECT min(rowid) FROM {t} WHERE {F} = ?", [file_id]).fetchall()[0][0])
    rows = con.execute(
        f"SELECT rowid - $r0, {sel} FROM {t} WHERE {F} = $f AND rowid IN (SELECT unnest($ids))",
        {"r0": r0, "f": file_id, "ids": [r0 + int(x) for x in offsets]},
    ).fetchall()
    return {int(r[0]): tuple(r[1:]) for r in rows}


def written_keys(con: duckdb.DuckDBPyConnection, table: str, *, file_id: int):
    """Distinct (lot_id, layer, parameter) of the file's rows, as a Polars frame (for re-evaluation)."""
    t = schema.table(table)
    cols = [c for c in ("lot_id", "layer", "parameter") if c in t.names]
    if not cols:
        return None
    sel = ", ".join(_q(c) for c in cols)
    return pl.DataFrame(
        con.sql(
            f"SELECT DISTINCT {sel} FROM {_q(table)} WHERE {_q(schema.C_SOURCE_FILE_ID)} = $fid",
            params={"fid": file_id},
        )
    )
