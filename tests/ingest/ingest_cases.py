"""Helpers for ingest tests: invented export lines and a snapshot of a warehouse's contents."""

from __future__ import annotations

from pathlib import Path

from warehouse import schema
from warehouse.store import open_warehouse

DATA = Path(__file__).resolve().parent.parent / "data"

LONG_HEADER = (
    "LotID,WaferID,Slot,Site,X_mm,Y_mm,Product,Layer,Stage,Parameter,Feature,Value_nm,MeasTime,Tool,"
    "Recipe,Repeat,SampleType"
)
WIDE_HEADER = (
    "Lot;Wafer;Slot;SiteNo;PosX_um;PosY_um;Device;Level;CD_MID_um;CD_TOP_um;LWR_um;MeasDate;Equipment;Recipe"
)


def long_row(
    site: str = "S01",
    *,
    value: str = "45.1",
    ts: str = "2026-09-03T07:14:05Z",
    lot: str = "HC2609-020",
    x: str = "0.0",
    slot: str = "1",
    stage: str = "DEV",
    param: str = "CD_MID",
    tool: str = "SEM-A1",
) -> str:
    """One cdsem_long_v2 data line (invented values)."""
    return f"{lot},{lot}-01,{slot},{site},{x},0.0,AX14,M1,{stage},{param},,{value},{ts},{tool},M1_CD,1,PROD"


def wide_row(
    site: str = "1",
    *,
    mid: str = "0,0451",
    top: str = "0,0412",
    ts: str = "03.09.2026 09:14:05",
    lot: str = "HC2609-021",
) -> str:
    """One cdsem_wide_v1 data line (invented values)."""
    return f"{lot};{lot}-02;2;{site};1000;-2000;AX14;M1;{mid};{top};0,0034;{ts};SEM-W1;M1_CD"


def snapshot(db: Path) -> dict[str, list[tuple]]:
    """Every fact row and reject, sorted: what 'nothing else lost' compares."""
    out = {}
    with open_warehouse(db, read_only=True) as con:
        for t in (*schema.FACT_TABLES, schema.REJECTS):
            out[t.name] = sorted(con.execute(f'SELECT * FROM "{t.name}"').fetchall(), key=repr)
    return out


def query(db: Path, sql: str, params: list | None = None) -> list[tuple]:
    with open_warehouse(db, read_only=True) as con:
        return con.execute(sql, params or []).fetchall()
