"""JSON lines inspection records and Parquet tables -> raw frames for :func:`mapping.map_records`. Pure.

A JSON lines record is one inspected wafer; its nested lists (``[nested.<table>]`` in the profile) expand
into rows of other canonical tables (per-class counts, individual defects) that inherit the record's keys.
A record with any problem, in itself or in one of its nested rows, is rejected whole.
"""

from __future__ import annotations

import io
import json
from typing import Any

import polars as pl

from ingest.adapters.mapping import map_records
from ingest.adapters.text import LINE, REJECT_SCHEMA, empty_rejects
from ingest.profile import Profile
from warehouse import schema
from warehouse.errors import IngestError


def _text(v: Any) -> str | None:
    """A JSON value as the text the mapping parses: strings as they are, anything else as JSON text."""
    if v is None:
        return None
    tv = type(v)
    if tv is str:
        return v
    if tv is int:  # same text as json.dumps, several times cheaper
        return str(v)
    if tv is float and v - v == 0:  # finite (json.dumps writes NaN/Infinity itself)
        return repr(v)
    return json.dumps(v)


def jsonl_keys(data: bytes, *, path: str, scan: int = 100) -> tuple[list[str], int]:
    """Keys of the first JSON object among the first ``scan`` records (to pick a profile), and its line.

    A bad line before it is left for the record parser to reject; only a file with no readable record in
    that range fails here.
    """
    first_bad: IngestError | None = None
    seen = 0
    for i, line in enumerate(data.split(b"\n"), start=1):
        if not line.strip():
            continue
        seen += 1
        if seen > scan:
            break
        try:
            rec = json.loads(line)
        except ValueError as exc:
            first_bad = first_bad or IngestError(
                "first record is not valid JSON",
                path=path,
                line=i,
                column=getattr(exc, "colno", 1),
                found=line[:60].decode("utf-8", "replace"),
                expected="one JSON object per line",
                fix="export JSON lines (one object per line)",
            )
            continue
        if not isinstance(rec, dict):
            first_bad = first_bad or IngestError(
                "first record is not a JSON object",
                path=path,
                line=i,
                column=1,
                found=type(rec).__name__,
                expected="an object",
                fix="export one object per line",
            )
            continue
        return list(rec), i
    if first_bad is not None:
        raise first_bad
    raise IngestError(
        "file has no records",
        path=path,
        line=1,
        column=1,
        found="only blank lines",
        expected="one JSON object per line",
        fix="re-export the file",
    )


def parse_jsonl_chunk(
    data: bytes, profile: Profile, *, first_line: int
) -> tuple[dict[str, pl.DataFrame], pl.DataFrame]:
    """JSON lines (UTF-8) -> canonical frames per table + rejects."""
    top_fields = {n for s in profile.columns for n in s.names}
    cols: dict[str, list[str | None]] = {f: [] for f in top_fields}
    lines: list[int] = []
    nested_rows: dict[str, dict[str, list[Any]]] = {
        n.table: {**{f: [] for s in n.columns for f in s.names}, LINE: []} for n in profile.nested
    }
    rej: list[tuple[int, str | None, str | None, str]] = []
    for i, raw in enumerate(data.split(b"\n")):
        line = first_line + i
        if not raw.strip():
            continue
        try:
            rec = json.loads(raw)
        except ValueError as exc:
            rej.append(
                (
                    line,
                    None,
                    raw[:200].decode("utf-8", "replace"),
                    f"not valid JSON ({exc.args[0].split(':')[0]})",
                )
            )
            continue
        if not isinstance(rec, dict):
            rej.append((line, None, raw[:200].decode("utf-8", "replace"), "record is not a JSON object"))
            continue
        bad = False
        for n in profile.nested:
            items = rec.get(n.field)
            if items is None and n.optional:
                continue
            if not isinstance(items, list) or not all(isinstance(x, dict) for x in items):
                rej.append((line, n.field, _text(items), "missing or not a list of objects"))
                bad = True
        if bad:
            continue
        for f in top_fields:
            cols[f].append(_text(rec.get(f)))
        lines.append(line)
        for n in profile.nested:
            store = nested_rows[n.table]
            for item in rec.get(n.field) or ():
                for s in n.columns:
                    for f in s.names:
                        store[f].append(_text(item.get(f)))
                store[LINE].append(line)
    raw_df = pl.DataFrame({f: pl.Series(f, v, dtype=pl.String) for f, v in cols.items()}).with_columns(
        pl.Series(LINE, lines, dtype=pl.Int64)
    )
    parent, rejects = map_records(raw_df, profile)
    frames = {profile.kind: parent}
    parts = [rejects, pl.DataFrame(rej, schema=REJECT_SCHEMA, orient="row")]
    carried_keys = [c for c in schema.table(profile.kind).names if c in _shared_keys(profile)]
    for n in profile.nested:
        store = nested_rows[n.table]
        nraw = pl.DataFrame(
            {k: pl.Series(k, v, dtype=pl.Int64 if k == LINE else pl.String) for k, v in store.items()}
        )
        keys = parent.select(pl.col(schema.C_SOURCE_LINE).alias(LINE), *carried_keys)
        nraw = nraw.join(keys, on=LINE, how="inner")
        child, crej = map_records(
            nraw, profile, table=n.table, sources=n.columns, carried=tuple(carried_keys)
        )
        frames[n.table] = child
        parts.append(crej)
    rejects = pl.concat(parts).sort("line", maintain_order=True)
    if rejects.height:
        bad_lines = rejects.select(pl.col("line").alias(schema.C_SOURCE_LINE)).unique()
        frames = {k: f.join(bad_lines, on=schema.C_SOURCE_LINE, how="anti") for k, f in frames.items()}
    return frames, rejects


def _shared_keys(profile: Profile) -> set[str]:
    shared: set[str] = set()
    parent = set(schema.table(profile.kind).names)
    for n in profile.nested:
        shared |= (set(schema.table(n.table).names) & parent) - set(schema.LINEAGE_COLUMNS)
        shared -= {s.canonical for s in n.columns}
    return shared


def parquet_columns(data: bytes, *, path: str) -> list[str]:
    """Column names of a Parquet file (to pick a profile)."""
    try:
        return list(pl.read_parquet_schema(io.BytesIO(data)))
    except Exception as exc:  # polars raises several types for corrupt files
        raise _unreadable_parquet(
            exc, path, "re-export the file, or rename it if it is not Parquet"
        ) from None


def _unreadable_parquet(exc: Exception, path: str, fix: str) -> IngestError:
    return IngestError(
        "file is not readable Parquet",
        path=path,
        line=1,
        column=1,
        details=str(exc).splitlines()[0][:200],
        expected="a Parquet file",
        fix=fix,
    )


def parse_parquet(
    data: bytes, profile: Profile, *, path: str
) -> tuple[dict[str, pl.DataFrame], pl.DataFrame]:
    """Parquet bytes -> canonical frames + rejects; the record number (1-based row) stands for the line."""
    try:
        df = pl.read_parquet(io.BytesIO(data))
    except Exception as exc:
        raise _unreadable_parquet(exc, path, "re-export the file") from None
    if df.height == 0:
        raise IngestError(
            "file has a header but no data rows",
            path=path,
            line=1,
            column=1,
            found="0 rows",
            expected="at least one row",
            fix="re-export the file; nothing was loaded",
        )
    df = df.with_columns(pl.int_range(1, df.height + 1, dtype=pl.Int64).alias(LINE))
    frame, rejects = map_records(df, profile)
    return {profile.kind: frame}, rejects


__all__ = ["empty_rejects", "jsonl_keys", "parquet_columns", "parse_jsonl_chunk", "parse_parquet"]
