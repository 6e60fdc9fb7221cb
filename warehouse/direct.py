"""Direct load: a clean plain CSV file parsed, mapped and checked inside DuckDB in one ``INSERT``. All its SQL.

The column program comes from ``ingest.adapters.direct`` (pure); this module turns it into SQL and runs it
inside the file's transaction (``ingest/jobs.py`` owns the transaction and falls back to the Polars path when
:func:`insert_clean_rows` reports that some rows were not clean).

How the line number of each row is found without a window function (``row_number() OVER ()`` costs half of
the load by itself, measured with DuckDB 2.0.1): the ``INSERT`` keeps the file's order
(``preserve_insertion_order``), so the rows of one file get consecutive row ids in file order, and one
``UPDATE`` sets ``_source_line = rowid - first_rowid + first data line``. That holds only when no line was
dropped, which is exactly the condition for keeping the direct load (inserted rows == data lines of the
file); the caller also compares a sample of stored rows with the text of their lines in the file.

Values are bound parameters; header names and canonical column names are quoted identifiers.
"""

from __future__ import annotations

from dataclasses import dataclass

import duckdb
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


def _shaped(raw: str, shape: str, parsed: str) -> list[str]:
    """Clean conditions of a parsed value: the raw text has the plain shape, and it parsed."""
    return [
        f"({raw} IS NULL OR regexp_full_match({raw}, {shape}))",
        f"({raw} IS NULL OR {parsed} IS NOT NULL)",
    ]


def _value_sql(c: DirectColumn, p: _Params, t: schema.Table, typed: dict[str, str]) -> tuple[str, list[str]]:
    """(SQL of the canonical value, SQL conditions for the row to be clean)."""
    raw = _q(c.source) if c.source else "NULL"
    clean: list[str] = []
    if c.kind == "text":
        v = raw
    elif c.kind == "mapped":
        whens = " ".join(f"WHEN {p.add(k)} THEN {p.add(val)}" for k, val in c.mapping)
        v = f"(CASE {raw} {whens} END)"
        clean.append(f"({raw} IS NULL OR {v} IS NOT NULL)")
    elif c.kind == "float":
        clean.append(f"({raw} IS NULL OR regexp_full_match({raw}, {p.add(FLOAT_SHAPE)}))")
        v = f"TRY_CAST({raw} AS DOUBLE)"
        if c.factor != 1.0 and not c.factor_only_for_nm:
            v = f"({v} * {p.add(c.factor)})"
        clean.append(f"({raw} IS NULL OR isfinite({v}))")
    elif c.kind == "int":
        v = f"TRY_CAST({raw} AS BIGINT)"
        clean += _shaped(raw, p.add(INT_SHAPE), v)
    elif c.kind == "bool":
        v = (
            f"(CASE lower({raw}) WHEN 'true' THEN true WHEN '1' THEN true "
            f"WHEN 'false' THEN false WHEN '0' THEN false END)"
        )
        clean.append(f"({raw} IS NULL OR {v} IS NOT NULL)")
    elif c.kind == "iso_utc":
        v = f"TRY_CAST(replace({raw}, 'Z', '') AS TIMESTAMP)"
        clean += _shaped(raw, p.add(ISO_UTC_SHAPE), v)
    elif c.kind == "constant":
        v = "NULL" if c.constant is None else p.add(c.constant)
        v = f"CAST({v} AS {_TYPES[t.column(c.name).dtype]})"
    elif c.kind == "unit":
        param = typed["parameter"]  # declared before unit in both tables that derive it (schema order)
        whens = " ".join(f"WHEN {p.add(k)} THEN {p.add(u)}" for k, u in schema.PARAMETER_UNITS.items())
        v = f"(CASE {param} {whens} ELSE 'nm' END)"
    else:  # pragma: no cover - the program builder only makes the kinds above
        raise AssertionError(c.kind)
    return v, clean


def insert_sql(prog: DirectProgram, *, path: str, file_id: int, max_line_bytes: int) -> tuple[str, dict]:
    """The ``INSERT`` of the rows of the file at ``path``.

    Until :func:`number_lines`, ``_source_line`` holds -1 for a row that is not clean and, for a clean row, a
    non-negative hash of its natural key.
    """
    t = schema.table(prog.table)
    p = _Params()
    typed: dict[str, str] = {}
    exprs: dict[str, str] = {}
    clean: list[str] = []
    for c in prog.columns:
        v, more = _value_sql(c, p, t, typed)
        exprs[c.name] = v
        typed[c.name] = v
        clean.extend(more)
    value = prog.column("value") if prog.positive_length else None
    if value is not None and value.factor_only_for_nm and value.factor != 1.0:
        # a length exported in another unit is converted; an angle (unit deg) keeps its value
        exprs["value"] = (
            f"(CASE WHEN {exprs['unit']} = 'nm' THEN {exprs['value']} * {p.add(value.factor)} "
            f"ELSE {exprs['value']} END)"
        )
    for c in prog.columns:
        v = exprs[c.name]
        if c.required:
            clean.append(f"({v} IS NOT NULL)")
        if c.allowed:
            opts = ", ".join(p.add(a) for a in c.allowed)
            clean.append(f"({v} IS NULL OR {v} IN ({opts}))")
        for op, bound in c.bounds:
            clean.append(f"({v} IS NULL OR {v} {op} {p.add(float(bound))})")
    if prog.positive_length:
        clean.append(f"({exprs['unit']} <> 'nm' OR {exprs['value']} > 0)")
    if prog.ends_after_start:
        clean.append(f"({exprs['ended_at']} IS NULL OR {exprs['ended_at']} >= {exprs['started_at']})")
    cols = {h: "VARCHAR" for h in prog.header}
    src = (
        f"read_csv({p.add(path)}, header = false, skip = {int(prog.header_line)}, delim = {p.add(prog.delimiter)}, "
        f"quote = '', escape = '', columns = {p.add(cols)}, auto_detect = false, strict_mode = true, "
        f"null_padding = false, ignore_errors = true, max_line_size = {int(max_line_bytes)})"
    )
    sel = ", ".join(f"{v} AS {_q(n)}" for n, v in exprs.items())
    ok = " AND ".join(f"coalesce({c}, false)" for c in clean) or "true"
    fid = p.add(int(file_id))
    # the clean flag rides in _source_line (-1: not clean) until number_lines: evaluating the checks in the
    # projection costs ~5 % over a bare read_csv, the same checks as a WHERE filter ~50 % (DuckDB 2.0.1)
    # a clean row's natural-key hash rides there too, so the in-file duplicate check needs no second hashing
    key = [exprs.get(k, "NULL") for k in t.natural_key]
    mark = f"(hash({', '.join(key)}) >> 1)::BIGINT" if key else "0"
    sql = (
        f"INSERT INTO {_q(t.name)} BY NAME SELECT {sel}, {fid} AS {_q(schema.C_SOURCE_FILE_ID)}, "
        f"CASE WHEN {ok} THEN {mark} ELSE -1 END AS {_q(schema.C_SOURCE_LINE)}, "
        f"NULL::BIGINT AS {_q(schema.C_SUPERSEDED_BY)} FROM {src}"
    )
    return sql, p.values


def insert_rows(
    con: duckdb.DuckDBPyConnection, prog: DirectProgram, *, path: str, file_id: int, max_line_bytes: int
) -> tuple[int, int, list[int]] | None:
    """Insert the file's rows in file order; return (rows inserted, rows not clean, row ids of repeated keys).

    Only a file whose rows are all clean may stay (the caller rolls the transaction back otherwise). The
    row ids are those of rows whose natural-key hash repeats within the file (candidates for the exact
    duplicate check). Returns None when DuckDB refused the file, e.g. a required value missing (the
    transaction is then aborted).
    """
    sql, params = insert_sql(prog, path=path, file_id=file_id, max_line_bytes=max_line_bytes)
    L, F, t = _q(schema.C_SOURCE_LINE), _q(schema.C_SOURCE_FILE_ID), _q(prog.table)
    try:
        con.execute("SET preserve_insertion_order = true")
        n = int(con.execute(sql, params).fetchall()[0][0])
        bad, repeated = con.execute(
            f"WITH g AS (SELECT {L} AS k, count(*) AS n FROM {t} WHERE {F} = ? GROUP BY k "
            f"HAVING count(*) > 1 OR k < 0) "
            f"SELECT coalesce(sum(n) FILTER (WHERE k < 0), 0), list(k) FILTER (WHERE k >= 0) FROM g",
            [int(file_id)],
        ).fetchall()[0]
        rowids: list[int] = []
        if repeated and not bad:
            rowids = [
                int(r[0])
                for r in con.execute(
                    f"SELECT rowid FROM {t} WHERE {F} = ? AND {L} IN (SELECT unnest(?)) ORDER BY rowid",
                    [int(file_id), list(repeated)],
                ).fetchall()
            ]
    except duckdb.Error:
        return None
    return n, int(bad), rowids


def number_lines(con: duckdb.DuckDBPyConnection, table: str, *, file_id: int, first_line: int) -> int:
    """Set ``_source_line`` of the file's rows from their row ids (valid only when no line was dropped).

    Returns the row id of the first line (``line = rowid - base + first_line``).
    """
    t = _q(table)
    F, L = _q(schema.C_SOURCE_FILE_ID), _q(schema.C_SOURCE_LINE)
    base = int(con.execute(f"SELECT min(rowid) FROM {t} WHERE {F} = ?", [file_id]).fetchall()[0][0])
    con.execute(f"UPDATE {t} SET {L} = rowid - ? + ? WHERE {F} = ?", [base, int(first_line), file_id])
    return base


def stored_at_lines(
    con: duckdb.DuckDBPyConnection, table: str, *, file_id: int, lines: list[int], columns: list[str]
) -> dict[int, tuple]:
    """``line -> (values of columns)`` of the file's stored rows at those lines."""
    if not lines:
        return {}
    sel = ", ".join(_q(c) for c in columns)
    L, F = _q(schema.C_SOURCE_LINE), _q(schema.C_SOURCE_FILE_ID)
    rows = con.execute(
        f"SELECT {L}, {sel} FROM {_q(table)} WHERE {F} = ? AND {L} IN (SELECT unnest(?))",
        [file_id, [int(x) for x in lines]],
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
