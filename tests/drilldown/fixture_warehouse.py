"""A small invented line with two planted faults, built as canonical frames, stored, planned and evaluated.

* Process fault: from day 6 to day 10, lots etched in ETCH-X/CH2 at step S2_ETCH read ``PROCESS_SHIFT_NM``
  wider at layer L1_ETCH, whatever CD-SEM measures them (SEM-A, SEM-B, SEM-C at random).
* Metrology fault: from day 13, CD-SEM SEM-B reads every CD ``METROLOGY_OFFSET_NM`` high: production lots
  of every layer and its daily monitor-wafer runs alike.

Nested variation (lot, wafer, site), metrology noise and a day-to-day monitor reproducibility are drawn
from a seeded generator; the first six days are fault-free and form the plan's baseline.
"""

from __future__ import annotations

import datetime as dt
import json
from pathlib import Path

import numpy as np
import polars as pl

from tests.canonical_rows import insert_frame
from warehouse import evaluate, plan, schema, store

START = dt.datetime(2026, 3, 2)
DAYS = 18
LOTS_PER_DAY = 14
PROCESS_TOOL, PROCESS_CHAMBER = "ETCH-X", "CH2"
PROCESS_DAYS = (6.0, 10.0)
PROCESS_SHIFT_NM = 2.5
METROLOGY_TOOL = "SEM-B"
METROLOGY_FROM_DAY = 13.0
METROLOGY_OFFSET_NM = 1.5
SEMS = ("SEM-A", "SEM-B", "SEM-C")
STEPS = (
    ("S1_DEP", ("DEP-1", "DEP-2"), ("CH1", "CH2")),
    ("S2_ETCH", ("ETCH-X", "ETCH-Y"), ("CH1", "CH2", "CH3")),
    ("S3_LITHO", ("TRK-1", "TRK-2"), ("P1", "P2")),
    ("S4_ETCH", ("ETCH-Z", "ETCH-W"), ("CH1", "CH2")),
)
LAYERS = {"L1_ETCH": ("S2_ETCH", 45.0), "L2_ETCH": ("S4_ETCH", 60.0)}  # layer -> (step that made it, target)
SITES = ((0.0, 0.0), (75.0, 0.0), (0.0, 75.0), (-75.0, 0.0), (0.0, -75.0), (100.0, 100.0), (-100.0, -100.0))

PLAN_TEXT = """
[plan]
name = "drill-down fixture plan"

[defaults]
baseline = { from = 2026-03-02, to = 2026-03-08 }

[[chart]]
name = "l1_cd_by_chamber"
select = { layer = "L1_ETCH", parameter = "cd_mid", product = "*", stage = "etch" }
statistic = "lot_mean"
split = ["process_tool", "chamber"]
step = "S2_ETCH"
chart = "ewma"
params = { lambda = 0.2, L = 3.0 }
severity = "high"

[[chart]]
name = "l2_cd_by_sem"
select = { layer = "L2_ETCH", parameter = "cd_mid", product = "*", stage = "etch" }
statistic = "lot_mean"
split = ["metrology_tool"]
chart = "ewma"
params = { lambda = 0.2, L = 3.0 }
severity = "high"
"""


def _ts(days: np.ndarray) -> pl.Series:
    base = int((START - dt.datetime(1970, 1, 1)).total_seconds() * 1e6)
    return pl.Series(base + np.round(days * 86400e6).astype(np.int64)).cast(pl.Datetime("us"))


def build_frames(seed: int = 11) -> dict[str, pl.DataFrame]:
    """Canonical frames (process_history, measurements) of the fixture line."""
    rng = np.random.default_rng(seed)
    n = DAYS * LOTS_PER_DAY
    start = np.sort(rng.uniform(0.0, DAYS, n))
    lots = np.array([f"FX{i:04d}" for i in range(n)])
    hist, meas = [], []
    t = start.copy()
    choice = {}
    for k, (step, tools, chambers) in enumerate(STEPS):
        t_in = t + rng.uniform(0.02, 0.08, n)
        t_out = t_in + 0.05
        tool = np.array(tools)[rng.integers(0, len(tools), n)]
        chamber = np.array(chambers)[rng.integers(0, len(chambers), n)]
        choice[step] = (tool, chamber, t_out)
        hist.append(pl.DataFrame({
            "lot_id": lots, "wafer_id": pl.Series([None] * n, dtype=pl.String), "product": "PX1", "step": step,
            "step_seq": k + 1, "process_tool": tool, "chamber": chamber, "recipe": f"{step}_STD",
            "started_at": _ts(t_in), "ended_at": _ts(t_out),
        }))  # fmt: skip
        t = t_out
    for layer, (step, target) in LAYERS.items():
        tool, chamber, t_out = choice[step]
        t_meas = t_out + 0.02
        sem = np.array(SEMS)[rng.integers(0, len(SEMS), n)]
        lot_eff = rng.normal(0.0, 0.5, n)
        shift = np.zeros(n)
        if layer == "L1_ETCH":
            hit = (tool == PROCESS_TOOL) & (chamber == PROCESS_CHAMBER)
            hit &= (t_out >= PROCESS_DAYS[0]) & (t_out < PROCESS_DAYS[1])
            shift = np.where(hit, PROCESS_SHIFT_NM, 0.0)
        li = np.repeat(np.arange(n), 3 * len(SITES))
        wi = np.tile(np.repeat(np.arange(3), len(SITES)), n)
        si = np.tile(np.arange(len(SITES)), 3 * n)
        wafer_eff = rng.normal(0.0, 0.2, 3 * n)[li * 3 + wi]
        x = np.array([s[0] for s in SITES])[si]
        y = np.array([s[1] for s in SITES])[si]
        when = t_meas[li] + wi * 0.002 + si * 0.0002
        bias = np.where((sem[li] == METROLOGY_TOOL) & (when >= METROLOGY_FROM_DAY), METROLOGY_OFFSET_NM, 0.0)
        value = target + lot_eff[li] + shift[li] + wafer_eff + rng.normal(0.0, 0.3, li.size) + bias
        value = value + rng.normal(0.0, 0.2, li.size)
        meas.append(_measurements(lots[li], wi, si, x, y, layer, value, when, sem[li], "production"))
    # daily monitor runs: one golden wafer, 5 sites x 3 repeats on every CD-SEM
    day = np.repeat(np.arange(DAYS), len(SEMS) * 15)
    tool_i = np.tile(np.repeat(np.arange(len(SEMS)), 15), DAYS)
    site = np.tile(np.repeat(np.arange(5), 3), DAYS * len(SEMS))
    rep = np.tile(np.arange(3), DAYS * len(SEMS) * 5)
    when = day + 0.2 + tool_i * 0.01 + site * 0.001 + rep * 0.0001
    repro = rng.normal(0.0, 0.08, DAYS * len(SEMS))[day * len(SEMS) + tool_i]
    sem = np.array(SEMS)[tool_i]
    bias = np.where((sem == METROLOGY_TOOL) & (when >= METROLOGY_FROM_DAY), METROLOGY_OFFSET_NM, 0.0)
    value = (
        45.0 + np.array([0.0, 0.1, -0.1, 0.05, -0.05])[site] + repro + bias + rng.normal(0.0, 0.2, when.size)
    )
    mon = _measurements(np.full(when.size, "GOLD-1"), np.zeros(when.size, int), site,
                        np.array([s[0] for s in SITES])[site], np.array([s[1] for s in SITES])[site], "L1_ETCH",
                        value, when, sem, "monitor", repeat=rep + 1, feature="MON-45")  # fmt: skip
    meas.append(mon)
    return {"process_history": pl.concat(hist), "measurements": pl.concat(meas)}


def _measurements(lot, wafer_i, site_i, x, y, layer, value, when, tool, kind, *, repeat=None, feature=None):
    lot_s = pl.Series(lot)
    return pl.DataFrame({
        "lot_id": lot_s, "wafer_id": lot_s + "-" + pl.Series(wafer_i + 1).cast(pl.String).str.zfill(2),
        "slot": pl.Series(wafer_i + 1, dtype=pl.Int64), "site_id": pl.Series(site_i + 1).cast(pl.String),
        "x_mm": x, "y_mm": y, "product": "PX1", "layer": layer, "stage": "etch", "parameter": "cd_mid",
        "feature": pl.Series([feature] * len(lot), dtype=pl.String), "value": np.round(value, 3), "unit": "nm",
        "measured_at": _ts(when), "metrology_tool": tool, "recipe": f"{layer}_CD",
        "repeat": pl.Series(np.ones(len(lot), dtype=np.int64) if repeat is None else repeat, dtype=pl.Int64),
        "sample_kind": kind,
    })  # fmt: skip


def build_fixture_warehouse(path: Path, *, seed: int = 11) -> None:
    """Store the frames in a new warehouse at ``path``, load the plan and evaluate once."""
    frames = build_frames(seed)
    with store.open_warehouse(path, create=True) as con:
        with store.transaction(con):
            insert_frame(con, schema.PROCESS_HISTORY, frames["process_history"], file_id=1)
            insert_frame(con, schema.MEASUREMENTS, frames["measurements"], file_id=2)
            plan.store_plan(con, plan.parse_plan(PLAN_TEXT, path="fixture_plan.toml"), user="engineer")
        # evaluation reads through cursors, which see committed rows only
        with store.transaction(con):
            evaluate.evaluate_connection(con, full=True, user="lotline-auto")
            store.bump_data_version(con)


def largest_excursion(con, *, chart: str, **split: str) -> int:
    """Id of the excursion with the most lots on the chart's series with these split values."""
    rows = con.execute(
        "SELECT e.excursion_id, s.split_json, e.lots_json FROM excursions e JOIN chart_series s USING (series_id) "
        "WHERE e.chart = ?",
        [chart],
    ).fetchall()
    mine = [(len(json.loads(lots)), -eid, eid) for eid, sj, lots in rows if json.loads(sj) == split]
    if not mine:
        raise AssertionError(f"no excursion on {chart} {split}; found {[json.loads(r[1]) for r in rows]}")
    return max(mine)[2]
