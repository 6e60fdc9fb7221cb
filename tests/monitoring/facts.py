"""Test helper: insert canonical fact frames straight into a warehouse file (no ingest involved).

Each call registers one fake source file (a row in source_files) and stamps its id on the rows, the way an
ingest of one export would, so evaluation sees a realistic watermark.
"""

from __future__ import annotations

from datetime import datetime

import polars as pl

from warehouse import schema, store


def insert_facts(
    con, table: schema.Table, rows: list[dict], *, path: str = "test.csv", supersede: bool = False
) -> int:
    """Insert ``rows`` (dicts of canonical columns) as one new source file; return its file_id.

    With ``supersede=True`` the current rows with the same supersede key are marked superseded by it first.
    """
    fid = con.execute("SELECT nextval('file_id_seq')").fetchall()[0][0]
    con.execute(
        "INSERT INTO source_files VALUES (?, ?, ?, 0, ?, 'test', 'loaded', ?, 0, 0, 0, ?, 'tester', NULL)",
        [fid, path, f"sha-{fid}", table.name, len(rows), datetime(2026, 1, 1)],
    )
    full = [
        {**{c: None for c in table.names}, **r, schema.C_SOURCE_FILE_ID: fid, schema.C_SOURCE_LINE: i + 2}
        for i, r in enumerate(rows)
    ]
    frame = pl.DataFrame(full, schema=schema.polars_schema(table))  # noqa: F841 - read by DuckDB by name
    if supersede and table.supersede_key:
        keys = ", ".join(f'"{k}"' for k in table.supersede_key)
        con.execute(
            f'UPDATE "{table.name}" SET _superseded_by = ? WHERE _superseded_by IS NULL '
            f"AND ({keys}) IN (SELECT ({keys}) FROM frame)",
            [fid],
        )
    con.execute(f'INSERT INTO "{table.name}" BY NAME SELECT * FROM frame')
    store.bump_data_version(con)
    return int(fid)
