"""An export profile -> the column program (``warehouse.direct.DirectProgram``) DuckDB runs on a clean CSV file. Pure.

Big plain CSV exports (UTF-8, no quotes, one header line, long layout) are the bulk of a fab's history
backfills. Parsing them in DuckDB directly (``warehouse.direct``) avoids handing every value through Polars and
Arrow, and is what lets ingest keep pace with a bare ``read_csv`` (issue 2's target).

The program mirrors :func:`ingest.adapters.mapping.map_records` but is deliberately **stricter**: a row is
*clean* only if every value has the plain shape both engines parse identically (decimal numbers without
blanks or digit separators, integers written canonically, ISO 8601 UTC timestamps ending in ``Z``) and passes
every check of the mapping (required values, value mappings, allowed values, physical ranges). When any row of
a file is not clean the direct load is abandoned and the file is read again by the Polars path, which
reports each problem with its exact reason. So the direct path never decides what a reject says; it only
has to agree with the Polars path on clean rows, which ``tests/ingest/test_direct.py`` checks value by value.

:func:`direct_program` returns None for a profile or header the program cannot express (wide layout, decimal
comma, a custom timestamp format, a time zone for naive times, duplicate header fields, nested records).
"""

from __future__ import annotations

from ingest import units
from ingest.adapters.mapping import ALLOWED, DEFAULT_LIMITS, merge_limits
from ingest.profile import Limit, Profile
from ingest.timestamps import ISO
from warehouse import schema
from warehouse.direct import DirectColumn, DirectProgram


def direct_program(profile: Profile, header: list[str]) -> DirectProgram | None:
    """The column program of ``profile`` for a file with this ``header``, or None when it cannot be expressed."""
    if (
        profile.format != "csv"
        or profile.is_wide
        or profile.nested
        or profile.decimal != "."
        or profile.encoding not in ("utf-8", "utf-8-sig")
        or profile.header_line != 1
        or len(profile.delimiter) != 1
        or len(set(header)) != len(header)
        or not header
    ):
        return None
    t = schema.table(profile.kind)
    present = set(header)
    by_canon = {s.canonical: s for s in profile.columns}
    cols: list[DirectColumn] = []
    for c in t.columns:
        if c.name.startswith("_"):
            continue
        s = by_canon.get(c.name)
        lim = merge_limits(DEFAULT_LIMITS.get(t.name, {}).get(c.name), profile.limits.get(c.name))
        allowed = ALLOWED.get(c.name, ()) if (s is not None or c.name in profile.constants) else ()
        required = not c.nullable
        if s is None:
            if c.name == "unit" and t.name in ("measurements", "reference_values"):
                cols.append(DirectColumn(c.name, "unit", required=required))
            elif c.name in profile.constants:
                cols.append(
                    DirectColumn(
                        c.name,
                        "constant",
                        constant=profile.constants[c.name],
                        required=required,
                        allowed=allowed,
                        bounds=_bounds(lim),
                    )
                )
            elif required:
                return None  # the Polars path reports the missing required column row by row
            continue
        name = next((n for n in s.names if n in present), None)
        if name is None:
            if required:
                return None
            cols.append(DirectColumn(c.name, "constant", constant=None, allowed=allowed, bounds=_bounds(lim)))
            continue
        if c.dtype == schema.TIMESTAMP:
            if (s.time_format or profile.time_format) != ISO:
                return None
            cols.append(DirectColumn(c.name, "iso_utc", source=name, required=required))
        elif c.dtype == schema.STRING:
            mapping = profile.values.get(c.name)
            if mapping:
                cols.append(
                    DirectColumn(
                        c.name,
                        "mapped",
                        source=name,
                        mapping=tuple(mapping.items()),
                        required=required,
                        allowed=allowed,
                    )
                )
            else:
                cols.append(DirectColumn(c.name, "text", source=name, required=required, allowed=allowed))
        elif c.dtype == schema.FLOAT64:
            only_nm = c.name == "value" and t.name == "measurements"
            factor = 1.0
            if s.unit:
                if only_nm:
                    factor = units.length_factor(s.unit, "nm")
                elif c.unit == "cm2":
                    factor = units.area_factor(s.unit)
                elif c.unit == "mm":
                    factor = units.length_factor(s.unit, "mm")
                else:
                    factor = units.length_factor(s.unit, "nm")
            cols.append(
                DirectColumn(
                    c.name,
                    "float",
                    source=name,
                    factor=factor,
                    factor_only_for_nm=only_nm,
                    required=required,
                    bounds=_bounds(lim),
                )
            )
        elif c.dtype == schema.INT64:
            cols.append(DirectColumn(c.name, "int", source=name, required=required, bounds=_bounds(lim)))
        elif c.dtype == schema.BOOL:
            cols.append(DirectColumn(c.name, "bool", source=name, required=required))
        else:
            return None
    names = {c.name for c in cols}
    return DirectProgram(
        table=t.name,
        delimiter=profile.delimiter,
        header=tuple(header),
        header_line=profile.header_line,
        columns=tuple(cols),
        positive_length=t.name == "measurements" and "value" in names,
        ends_after_start=t.name == "process_history" and {"started_at", "ended_at"} <= names,
    )


def _bounds(lim: Limit | None) -> tuple[tuple[str, float], ...]:
    """A limit as the (operator, bound) pairs a row must satisfy."""
    if lim is None:
        return ()
    pairs = ((">", lim.greater_than), (">=", lim.at_least), ("<", lim.less_than), ("<=", lim.at_most))
    return tuple((op, float(b)) for op, b in pairs if b is not None)
