"""A small demo-fab warehouse for the drill-down end-to-end checks.

The demo fab's canonical frames (``demo_fab.generate.simulate``) are stored as they are (one pseudo source
file per table; parsing the exports is covered by the ingest tests), a monitoring plan with one chart per
injected fault is loaded, and the warehouse is evaluated once.
"""

from __future__ import annotations

from pathlib import Path

from demo_fab.generate import DemoData
from tests.canonical_rows import build_simulated_warehouse, insert_frame  # noqa: F401 - re-exported

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


def build_demo_warehouse(path: Path, *, days: int = DEMO_DAYS, seed: int = DEMO_SEED) -> DemoData:
    """Simulate the demo fab, store its frames in a new warehouse at ``path``, load the plan, evaluate."""
    return build_simulated_warehouse(
        path, plan_text=PLAN_TEXT, plan_name="drilldown_plan.toml", days=days, seed=seed
    )
