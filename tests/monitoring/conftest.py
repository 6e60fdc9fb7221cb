"""Fixtures for monitoring tests: a warehouse file with generated CD facts and a small plan."""

from __future__ import annotations

from datetime import datetime, timedelta

import numpy as np
import pytest

from tests.monitoring.facts import insert_facts
from warehouse import schema, store
from warehouse.plan import parse_plan, store_plan

PLAN = """
[plan]
name = "test plan"

[[chart]]
name = "m1-cd"
select = { layer = "M1_DEV", parameter = "cd_mid" }
statistic = "wafer_mean"
split = ["metrology_tool"]
chart = "ewma"
params = { lambda = 0.1, L = 2.7 }
rules = ["we1", "we2"]
baseline = { first = 20 }
severity = "high"
"""


def site_rows(lot: str, wafer: str, values, at: datetime, *, tool="CDS-1", layer="M1_DEV"):
    return [
        dict(
            lot_id=lot,
            wafer_id=wafer,
            site_id=str(i + 1),
            x_mm=float(i),
            y_mm=0.0,
            product="AX14",
            layer=layer,
            stage="develop",
            parameter="cd_mid",
            value=float(v),
            unit="nm",
            measured_at=at + timedelta(seconds=i),
            metrology_tool=tool,
            repeat=1,
            sample_kind="production",
        )
        for i, v in enumerate(values)
    ]


def make_lots(
    n_lots: int,
    *,
    seed: int = 1,
    drift_from: int | None = None,
    drift_per_lot: float = 0.0,
    tool="CDS-1",
    start=datetime(2026, 9, 1),
):
    """Per lot one wafer of 5 sites: 45 nm + lot effect (sd 0.5) + site noise (sd 0.3), optional linear drift."""
    rng = np.random.default_rng(seed)
    out = []
    for i in range(n_lots):
        mu = 45.0 + rng.normal(0, 0.5)
        if drift_from is not None and i >= drift_from:
            mu += drift_per_lot * (i - drift_from + 1)
        vals = mu + rng.normal(0, 0.3, 5)
        lot = f"L{i:04d}"
        out.append(site_rows(lot, f"{lot}-01", vals, start + timedelta(hours=6 * i), tool=tool))
    return out


@pytest.fixture()
def wh(tmp_path):
    path = tmp_path / "wh.duckdb"
    with store.open_warehouse(path, create=True) as con:
        store_plan(con, parse_plan(PLAN, path="plan.toml"), user="tester")
    return path


def load(path, lots_rows, **kw) -> int:
    with store.open_warehouse(path) as con:
        rows = [r for lot in lots_rows for r in lot]
        return insert_facts(con, schema.MEASUREMENTS, rows, **kw)
