"""The demo fab's canonical frames written straight into a warehouse, with a plan, then evaluated.

Ingesting the exports takes minutes; the tool-health tests need the facts, not the parsers, so the frames that
``demo_fab.generate.simulate`` returns are inserted as they are (lineage: one pseudo file per table).
"""

from __future__ import annotations

from pathlib import Path

from demo_fab.generate import DemoData
from tests.canonical_rows import build_simulated_warehouse, insert_frame  # noqa: F401 - re-exported

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


def build_demo_warehouse(path: Path, *, days: int = DEMO_DAYS, seed: int = 7) -> DemoData:
    """Simulate the demo fab, store its frames in a new warehouse at ``path``, load the plan, evaluate."""
    return build_simulated_warehouse(
        path, plan_text=PLAN_TEXT, plan_name="tool_health_plan.toml", days=days, seed=seed
    )
