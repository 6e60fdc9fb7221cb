"""Test-only writers: canonical frames straight into a warehouse (ingest has its own tests).

Used by the drill-down and tool-health suites, which need the facts of the demo fab or of a planted fault,
not the parsers: the frames ``demo_fab.generate.simulate`` returns are stored as they are, one pseudo source
file per table, then a plan is loaded and the warehouse evaluated once.
"""

from __future__ import annotations

from pathlib import Path

import polars as pl

from demo_fab.config import DemoConfig
from demo_fab.generate import DemoData, simulate
from warehouse import evaluate, plan, schema, store

FACT_TABLES = (
    "measurements",
    "inspections",
    "defect_counts",
    "defects",
    "process_history",
    "tool_events",
    "spec_limits",
    "reference_values",
)


def insert_frame(con, table: schema.Table, frame: pl.DataFrame, *, file_id: int) -> None:
    """Insert canonical rows with lineage (identifiers from the schema, values as Arrow)."""
    types = schema.polars_schema(table)
    f = frame.with_columns(
        pl.lit(file_id, pl.Int64).alias(schema.C_SOURCE_FILE_ID),
        pl.int_range(1, frame.height + 1, dtype=pl.Int64).alias(schema.C_SOURCE_LINE),
        pl.lit(None, pl.Int64).alias(schema.C_SUPERSEDED_BY),
    )
    for name, dtype in types.items():
        if name not in f.columns:
            f = f.with_columns(pl.lit(None, dtype).alias(name))
    f = f.select(table.names).cast(types)
    cols = ", ".join(f'"{c}"' for c in table.names)
    con.register("_rows", f.to_arrow())
    try:
        con.execute(f'INSERT INTO "{table.name}" ({cols}) SELECT {cols} FROM _rows')
    finally:
        con.unregister("_rows")


def build_simulated_warehouse(
    path: Path, *, plan_text: str, plan_name: str, days: int, seed: int
) -> DemoData:
    """Simulate the demo fab, store its frames in a new warehouse at ``path``, load the plan, evaluate."""
    data = simulate(DemoConfig(days=days, seed=seed))
    with store.open_warehouse(path, create=True) as con:
        with store.transaction(con):
            for i, name in enumerate(FACT_TABLES, start=1):
                insert_frame(con, schema.table(name), getattr(data, name), file_id=i)
            plan.store_plan(con, plan.parse_plan(plan_text, path=plan_name), user="engineer")
        # Evaluation reads through cursors, which see committed rows only: commit the facts first.
        with store.transaction(con):
            evaluate.evaluate_connection(con, full=True, user="lotline-auto")
            store.bump_data_version(con)
    return data
