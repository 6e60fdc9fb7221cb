"""The demo fab's canonical frames written straight into a warehouse, with a plan, then evaluated.

Ingesting the exports takes minutes; the tool-health tests need the facts, not the parsers, so the frames that
``demo_fab.generate.simulate`` returns are inserted as they are (lineage: one pseudo file per table).
"""

from __future__ import annotations

from pathlib import Path

import polars as pl

from demo_fab.config import DemoConfig
from demo_fab.generate import DemoData, simulate
from warehouse import evaluate, plan, schema, store

DEMO_DAYS = 27
PLAN_TEXT = """
[plan]
name = "tool-health test plan"

[[chart]]
name = "gate_etch_cd"
select = { layer = "GATE_ETCH", parameter = "cd_mid", product = "*", stage = "etch" }
statistic = "wafer_mean"
split = ["process_tool", "chamber", "product"]
step = "GATE_ETCH"
chart = "individuals"
rules = ["we1"]
baseline = { first = 20 }
severity = "high"

[[chart]]
name = "m1_etch_cd"
select = { layer = "M1_ETCH", parameter = "cd_mid", product = "*", stage = "etch" }
statistic = "wafer_mean"
split = ["process_tool", "chamber", "product"]
step = "M1_ETCH"
chart = "ewma"
baseline = { first = 20 }
severity = "medium"

[[chart]]
name = "gate_dev_cd"
select = { layer = "GATE_DEV", parameter = "cd_mid", product = "*", stage = "develop" }
statistic = "wafer_mean"
split = ["process_tool", "chamber", "product"]
step = "GATE_LITHO"
chart = "individuals"
rules = ["we1"]
baseline = { first = 20 }
severity = "medium"
"""

TABLES = ("measurements", "inspections", "defect_counts", "defects", "process_history", "tool_events",
          "spec_limits", "reference_values")


def insert_frame(con, table: schema.Table, frame: pl.DataFrame, *, file_id: int) -> None:
    """Insert canonical rows with lineage (test-only writer; identifiers from the schema, values as Arrow)."""
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


def build_demo_warehouse(path: Path, *, days: int = DEMO_DAYS, seed: int = 7) -> DemoData:
    """Simulate the demo fab, store its frames in a new warehouse at ``path``, load the plan, evaluate."""
    data = simulate(DemoConfig(days=days, seed=seed))
    with store.open_warehouse(path, create=True) as con:
        with store.transaction(con):
            for i, name in enumerate(TABLES, start=1):
                insert_frame(con, schema.table(name), getattr(data, name), file_id=i)
            plan.store_plan(con, plan.parse_plan(PLAN_TEXT, path="tool_health_plan.toml"), user="engineer")
        with store.transaction(con):
            evaluate.evaluate_connection(con, full=True, user="lotline-auto")
            store.bump_data_version(con)
    return data
