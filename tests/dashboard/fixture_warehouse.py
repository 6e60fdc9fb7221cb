"""A small, fully known warehouse for the dashboard tests, written with canonical rows.

Two layers of one product, 20 lots, 3 wafers a lot, 9 sites a wafer; rejects, a
supersession and one wafer with defect coordinates. A monitoring plan charts the wafer mean of cd_mid at
M1_LITHO split by the exposure tool, and the engine evaluates it (limits, signals, excursions), as
`lotline plan load` and `lotline evaluate` would. The three lots in SHIFTED_LOTS came out 3 nm high on
SCAN02, far outside their limits, so they must be flagged; other counts are fixed by construction.
"""

from __future__ import annotations

import math
from datetime import datetime, timedelta
from pathlib import Path

import numpy as np
import polars as pl

from warehouse import evaluate, plan, schema, store

T0 = datetime(2026, 9, 1, 6, 0, 0)
LOTS = [f"L26090{i:02d}" for i in range(1, 21)]
SHIFTED_LOTS = LOTS[14:17]  # ran on SCAN02 and came out +3 nm: the excursion of series 2
SITES = (
    [(0.0, 0.0)]
    + [(70 * math.cos(a), 70 * math.sin(a)) for a in np.arange(4) * math.pi / 2]
    + [(135 * math.cos(a), 135 * math.sin(a)) for a in np.arange(4) * math.pi / 2 + math.pi / 4]
)
DEFECT_LOT, DEFECT_WAFER, N_DEFECTS = LOTS[15], f"{LOTS[15]}.W01", 30
N_REJECTS = 3
PLAN_TEXT = """
[plan]
name = "dashboard test plan"

[[chart]]
name = "m1_litho_cd"
select = { layer = "M1_LITHO", parameter = "cd_mid", product = "*", stage = "develop" }
statistic = "wafer_mean"
split = ["process_tool"]
step = "M1_EXPOSE"
chart = "individuals"
rules = ["we1", "we2"]
baseline = { first = 10 }
severity = "high"
"""
STALE_TOOL = "CDSEM03"  # reported only on the first day


def _scanner(i: int) -> str:
    return "SCAN02" if LOTS[i] in SHIFTED_LOTS or i % 2 else "SCAN01"


def _frames() -> dict[str, pl.DataFrame]:
    rng = np.random.default_rng(20260901)
    meas, hist = [], []
    for i, lot in enumerate(LOTS):
        t = T0 + timedelta(hours=6 * i)
        shift = (3.0 if lot in SHIFTED_LOTS else 0.0) + rng.normal(0, 0.25)  # lot effect
        hist += [
            dict(lot_id=lot, wafer_id=None, product="PRD_A", step="M1_EXPOSE", step_seq=1, process_tool=_scanner(i),
                 chamber=None, recipe="EXP_M1", started_at=t - timedelta(hours=2), ended_at=t - timedelta(hours=1)),
            dict(lot_id=lot, wafer_id=None, product="PRD_A", step="M1_ETCH", step_seq=2,
                 process_tool="ETCH01" if i % 3 else "ETCH02", chamber="A" if i % 2 else "B", recipe="ETCH_M1",
                 started_at=t + timedelta(hours=1), ended_at=t + timedelta(hours=2)),
        ]  # fmt: skip
        for layer, stage, dt, base in (("M1_LITHO", "develop", 0, 45.0), ("M1_ETCH", "etch", 3, 38.0)):
            tool = STALE_TOOL if (layer == "M1_ETCH" and i < 2) else ("CDSEM01" if i % 2 == 0 else "CDSEM02")
            for w in range(1, 4):
                for s, (x, y) in enumerate(SITES, start=1):
                    value = (
                        base
                        + (shift if layer == "M1_LITHO" else 0.0)
                        + 0.004 * (x * x + y * y) / 150
                        + rng.normal(0, 0.3)
                    )
                    meas.append(dict(
                        lot_id=lot, wafer_id=f"{lot}.W{w:02d}", slot=w, site_id=str(s), x_mm=round(x, 3),
                        y_mm=round(y, 3), product="PRD_A", layer=layer, stage=stage, parameter="cd_mid", feature=None,
                        value=round(float(value), 4), unit="nm", measured_at=t + timedelta(hours=dt, minutes=w * 3 + s),
                        metrology_tool=tool, recipe="CD_M1", repeat=1, sample_kind="production",
                    ))  # fmt: skip
    lineage = {schema.C_SOURCE_FILE_ID: 1, schema.C_SOURCE_LINE: 0, schema.C_SUPERSEDED_BY: None}

    def facts(rows: list[dict], table: schema.Table, file_id: int = 1) -> pl.DataFrame:
        df = pl.DataFrame(rows, schema={k: v for k, v in schema.polars_schema(table).items() if k in rows[0]})
        df = df.with_columns(
            pl.lit(file_id, pl.Int64).alias(schema.C_SOURCE_FILE_ID),
            pl.int_range(1, df.height + 1, dtype=pl.Int64).alias(schema.C_SOURCE_LINE),
            pl.lit(lineage[schema.C_SUPERSEDED_BY], pl.Int64).alias(schema.C_SUPERSEDED_BY),
        )
        return df.select(table.names)

    t_insp = T0 + timedelta(hours=6 * 15 + 5)
    defects = [dict(lot_id=DEFECT_LOT, wafer_id=DEFECT_WAFER, layer="M1_ETCH", inspection_tool="INSP01",
                    inspected_at=t_insp, defect_id=d, x_mm=round(float(100 * math.cos(d)), 2),
                    y_mm=round(float(100 * math.sin(d)), 2), size_nm=80.0 + d,
                    defect_class="particle" if d % 3 else "scratch") for d in range(1, N_DEFECTS + 1)]  # fmt: skip
    insp = [dict(lot_id=DEFECT_LOT, wafer_id=DEFECT_WAFER, product="PRD_A", layer="M1_ETCH", inspection_tool="INSP01",
                 recipe="INSP_M1", inspected_at=t_insp, inspected_area_cm2=679.0, defect_count=N_DEFECTS,
                 adder_count=None, sample_kind="production")]  # fmt: skip
    spec = [dict(product="*", layer="M1_LITHO", parameter="cd_mid", lsl=40.5, target=45.0, usl=49.5, unit="nm",
                 effective_from=datetime(2026, 1, 1), effective_to=None)]  # fmt: skip
    t_load = T0 + timedelta(days=6)
    files = pl.DataFrame([
        dict(file_id=1, path="exports/cdsem_2026-09.csv", sha256="a" * 64, size_bytes=123456, kind="measurements",
             profile="cdsem_long_v2", status="loaded", rows_loaded=len(meas), rows_rejected=N_REJECTS, rows_skipped=0,
             rows_superseded=0, loaded_at=t_load, loaded_by="ingest", message=None),
        dict(file_id=2, path="exports/cdsem_2026-09_fix.csv", sha256="b" * 64, size_bytes=2345, kind="measurements",
             profile="cdsem_long_v2", status="loaded", rows_loaded=0, rows_rejected=0, rows_skipped=0,
             rows_superseded=27, loaded_at=t_load + timedelta(hours=1), loaded_by="ingest", message=None),
        dict(file_id=3, path="exports/broken.csv", sha256="c" * 64, size_bytes=99, kind=None, profile=None,
             status="failed", rows_loaded=0, rows_rejected=0, rows_skipped=0, rows_superseded=0,
             loaded_at=t_load + timedelta(hours=2), loaded_by="ingest", message="no profile matches the header"),
    ], schema=schema.polars_schema(schema.SOURCE_FILES))  # fmt: skip
    rejects = pl.DataFrame([
        dict(file_id=1, line=17, column="Value_nm", value="4,51", reason="expected a number with '.' decimals"),
        dict(file_id=1, line=18, column="MeasTime", value="yesterday", reason="expected an ISO 8601 UTC time"),
        dict(file_id=1, line=19, column=None, value=None, reason="row has 12 fields, expected 17"),
    ], schema=schema.polars_schema(schema.REJECTS))  # fmt: skip
    sup = pl.DataFrame([dict(file_id=2, superseded_file_id=1, table_name="measurements", lot_id=LOTS[0], rows=27,
                             superseded_at=t_load + timedelta(hours=1), superseded_by_user="ingest")],
                       schema=schema.polars_schema(schema.SUPERSESSIONS))  # fmt: skip

    return {
        "measurements": facts(meas, schema.MEASUREMENTS),
        "process_history": facts(hist, schema.PROCESS_HISTORY, 4),
        "inspections": facts(insp, schema.INSPECTIONS, 5),
        "defects": facts(defects, schema.DEFECTS, 5),
        "spec_limits": facts(spec, schema.SPEC_LIMITS, 6),
        "source_files": files,
        "rejects": rejects,
        "supersessions": sup,
    }


def build_fixture_warehouse(path: Path) -> Path:
    """Write the fixture warehouse to ``path`` (a new file) and return the path."""
    frames = _frames()
    with store.open_warehouse(path, create=True) as con:
        with store.transaction(con):
            for name, frame in frames.items():
                _insert(con, name, frame)
            plan.store_plan(con, plan.parse_plan(PLAN_TEXT, path="fixture_plan.toml"), user="engineer")
            store.bump_data_version(con)
    evaluate.evaluate_warehouse(path, full=True, user="lotline-auto")
    return path


def _insert(con, name: str, frame: pl.DataFrame) -> None:
    # Test-only writer: identifiers come from the canonical schema, values travel as an Arrow frame.
    cols = ", ".join(f'"{c}"' for c in schema.table(name).names)
    con.register("_fixture_rows", frame.to_arrow())
    try:
        con.execute(f'INSERT INTO "{name}" ({cols}) SELECT {cols} FROM _fixture_rows')
    finally:
        con.unregister("_fixture_rows")
