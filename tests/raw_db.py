"""Reading a warehouse file with a bare DuckDB connection, past lotline's store.

``warehouse.store.open_warehouse`` repairs an interrupted load even on a read-only open, so tests that must
see the file exactly as a crash or a failed transaction left it read it here.
"""

from __future__ import annotations

import duckdb


def raw_rows(db, sql: str) -> list[tuple]:
    """Rows of ``sql`` on the file ``db``, opened read-only without lotline's open-time checks."""
    con = duckdb.connect(str(db), read_only=True)
    try:
        return con.execute(sql).fetchall()
    finally:
        con.close()
