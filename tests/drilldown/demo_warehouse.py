"""A small demo-fab warehouse for the drill-down end-to-end checks.

The demo fab's canonical frames (``demo_fab.generate.simulate``) are stored as they are (one pseudo source
file per table; parsing the exports is covered by the ingest tests), a monitoring plan with one chart per
injected fault is loaded, and the warehouse is evaluated once.
"""

from __future__ import annotations

from pathlib import Path

import polars as pl

from demo_fab.config import DemoConfig
from demo_fab.generate import DemoData, simulate
from warehouse import evaluate, plan, schema, store

DEMO_DAYS = 25
DEMO_SEED = 7

# One chart per fault the drill-down is checked against (chart names are our own).
PLAN_TEXT = """
[plan]
name = "drill-down check plan"

[defaults]
# The first week of the window is fault-free (the faults start at 25 % of it or later).
baseline = { from = 2026-08-03, to = 2026-08-10 }

[[chart]]
name = "gate_etch_cd_chamber"
select = { layer = "GATE_ETCH", parameter = "cd_mid", product = "*", stage = "etch" }
statistic = "lot_mean"
split = ["process_tool", "chamber", "product"]
step = "GATE_ETCH"
chart = "ewma"
params = { lambda = 0.2, L = 3.0 }
severity = "high"

[[chart]]
name = "m1_etch_cd_chamber"
select = { layer = "M1_ETCH", parameter = "cd_mid", product = "*", stage = "etch" }
statistic = "lot_mean"
split = ["process_tool", "chamber", "product"]
step = "M1_ETCH"
chart = "ewma"
params = { lambda = 0.1, L = 2.7 }
severity = "medium"

[[chart]]
name = "gate_dev_cd_range_plate"
select = { layer = "GATE_DEV", parameter = "cd_mid", product = "*", stage = "develop" }
statistic = "wafer_range"
split = ["process_tool", "chamber"]
step = "GATE_LITHO"
chart = "ewma"
params = { lambda = 0.2, L = 3.0 }
severity = "medium"

[[chart]]
name = "cont_etch_cd_sem"
select = { layer = "CONT_ETCH", parameter = "cd_mid", product = "*", stage = "etch" }
statistic = "lot_mean"
split = ["metrology_tool", "product"]
chart = "ewma"
params = { lambda = 0.2, L = 3.0 }
severity = "high"

[[chart]]
name = "m1_etch_residue_chamber"
select = { layer = "M1_ETCH_INSP", parameter = "residue", product = "*" }
statistic = "defect_density"
split = ["process_tool", "chamber"]
step = "M1_ETCH"
chart = "laney_u"
severity = "high"

[[chart]]
name = "m1_cmp_scratch"
select = { layer = "M1_CMP_INSP", parameter = "scratch", product = "*" }
statistic = "defect_density"
split = ["metrology_tool"]
chart = "laney_u"
severity = "high"
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


def build_demo_warehouse(path: Path, *, days: int = DEMO_DAYS, seed: int = DEMO_SEED) -> DemoData:
    """Simulate the demo fab, store its frames in a new warehouse at ``path``, load the plan, evaluate."""
    data = simulate(DemoConfig(days=days, seed=seed))
    with store.open_warehouse(path, create=True) as con:
        with store.transaction(con):
            for i, name in enumerate(TABLES, start=1):
                insert_frame(con, schema.table(name), getattr(data, name), file_id=i)
            plan.store_plan(con, plan.parse_plan(PLAN_TEXT, path="drilldown_plan.toml"), user="engineer")
        # Evaluation reads through cursors, which see committed rows only: commit the facts first.
        with store.transaction(con):
            evaluate.evaluate_connection(con, full=True, user="lotline-auto")
            store.bump_data_version(con)
    return data
