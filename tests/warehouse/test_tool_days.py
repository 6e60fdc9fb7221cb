"""tool_days (kept by ingest) gives the same data freshness as a direct computation over the rows written here.

Files go through the warehouse's ingest writes (load_chunk, supersede_file, finish_file), one transaction
each. The oracle is computed in Python from the rows this test wrote (group by tool, max of the time,
count in the last 24 h), with superseded rows removed by hand.
"""

from __future__ import annotations

from datetime import datetime, timedelta

import polars as pl
import pytest

from tests.monitoring.facts import insert_facts
from warehouse import load, queries, schema, store, tool_days

T0 = datetime(2026, 9, 1)
NO_REJECTS = pl.DataFrame(
    schema={"line": pl.Int64, "column": pl.String, "value": pl.String, "reason": pl.String}
)


def _meas(lot: str, tool: str, at: datetime, n: int, value: float = 45.0) -> list[dict]:
    return [
        dict(
            lot_id=lot,
            wafer_id=f"{lot}-01",
            site_id=str(i + 1),
            x_mm=float(i),
            y_mm=0.0,
            product="AX14",
            layer="M1",
            stage="develop",
            parameter="cd_mid",
            value=value + i,
            unit="nm",
            measured_at=at + timedelta(minutes=i),
            metrology_tool=tool,
            repeat=1,
            sample_kind="production",
        )
        for i in range(n)
    ]


def _hist(lot: str, tool: str, start: datetime, end: datetime | None) -> dict:
    return dict(lot_id=lot, step="M1_LITHO", step_seq=5, process_tool=tool, started_at=start, ended_at=end)


def _ingest(db, table: schema.Table, rows: list[dict], path: str) -> int:
    """One file through the ingest writes, in one transaction; returns its file id."""
    frame = pl.DataFrame(
        [{**{c: None for c in table.names}, **r, schema.C_SOURCE_LINE: i + 2} for i, r in enumerate(rows)],
        schema=schema.polars_schema(table),
    ).drop(schema.C_SOURCE_FILE_ID, schema.C_SUPERSEDED_BY)
    with store.open_warehouse(db, create=True) as con, store.transaction(con):
        fid = load.new_file_id(con)
        counts = load.FileCounts()
        load.load_chunk(con, table.name, frame, file_id=fid, counts=counts)
        load.supersede_file(con, [table.name], file_id=fid, counts=counts)
        load.finish_file(
            con,
            file_id=fid,
            path=path,
            sha256=f"sha-{path}",
            size=0,
            kind=table.name,
            profile="test",
            user="t",
            counts=counts,
            rejects=NO_REJECTS,
        )
    return fid


def _expected(meas: list[dict], hist: list[dict], now: datetime) -> dict[tuple[str, str], tuple]:
    """(tool, kind) -> (last_seen, rows in the 24 h before now), straight from the rows (the old query's meaning)."""
    day_ago = now - timedelta(days=1)
    out: dict[tuple[str, str], tuple] = {}
    for kind, rows, tool, seen, counted in (
        ("metrology", meas, "metrology_tool", lambda r: r["measured_at"], lambda r: r["measured_at"]),
        (
            "process",
            hist,
            "process_tool",
            lambda r: r["ended_at"] or r["started_at"],
            lambda r: r["started_at"],
        ),
    ):
        for t in sorted({r[tool] for r in rows}):
            mine = [r for r in rows if r[tool] == t]
            out[(t, kind)] = (max(seen(r) for r in mine), sum(1 for r in mine if counted(r) >= day_ago))
    return out


def _freshness(db, now: datetime) -> dict[tuple[str, str], tuple]:
    with store.open_warehouse(db, read_only=True) as con:
        assert tool_days.is_current(con)  # the derived table is read, not the facts
        df = queries.tool_freshness(con, now=now, stale_after_h=24)
    return {(r["tool"], r["tool_kind"]): (r["last_seen"], r["rows_last_day"]) for r in df.to_dicts()}


NOWS = [T0 + timedelta(days=2, hours=10), T0 + timedelta(days=3, hours=0, minutes=30), T0 + timedelta(days=9)]


@pytest.fixture()
def loaded(tmp_path):
    db = tmp_path / "wh.duckdb"
    meas = (
        _meas("L1", "CDS-1", T0 + timedelta(hours=8), 9)
        + _meas("L2", "CDS-2", T0 + timedelta(days=1, hours=9), 5)
        + _meas("L3", "CDS-1", T0 + timedelta(days=2, hours=3), 4)
        + _meas("L4", "CDS-2", T0 + timedelta(days=2, hours=23, minutes=55), 9)
    )  # crosses midnight
    hist = [
        _hist("L1", "SCN-1", T0 + timedelta(hours=6), T0 + timedelta(hours=7)),
        _hist("L2", "SCN-2", T0 + timedelta(days=1, hours=20), None),
    ]
    _ingest(db, schema.MEASUREMENTS, meas[:14], "a.csv")
    _ingest(db, schema.MEASUREMENTS, meas[14:], "b.csv")
    _ingest(db, schema.PROCESS_HISTORY, hist, "h.csv")
    return db, meas, hist


@pytest.mark.parametrize("now", NOWS)
def test_tool_freshness_from_tool_days_equals_the_rows_written(loaded, now):
    db, meas, hist = loaded
    assert _freshness(db, now) == _expected(meas, hist, now)


@pytest.mark.parametrize("now", NOWS)
def test_tool_freshness_after_a_superseding_reexport_equals_the_current_rows(loaded, now):
    db, meas, hist = loaded
    # corrected re-export of L2 (same key): 2 sites, measured two days later; L4 re-export moves it a day back
    fixed = _meas("L2", "CDS-2", T0 + timedelta(days=3, hours=1), 2, value=46.0)
    _ingest(db, schema.MEASUREMENTS, fixed, "a_fixed.csv")
    fixed4 = _meas("L4", "CDS-2", T0 + timedelta(days=1, hours=2), 3)
    _ingest(db, schema.MEASUREMENTS, fixed4, "b_fixed.csv")
    current = [r for r in meas if r["lot_id"] not in ("L2", "L4")] + fixed + fixed4
    assert _freshness(db, now) == _expected(current, hist, now)


def test_tool_days_rows_written_by_another_path_are_rebuilt_on_the_next_file(loaded):
    db, meas, hist = loaded
    extra = _meas("L9", "CDS-3", T0 + timedelta(days=2, hours=12), 3)
    with store.open_warehouse(db) as con:
        insert_facts(con, schema.MEASUREMENTS, extra)  # straight into the facts, no ingest
        assert not tool_days.is_current(con)
        df = queries.tool_freshness(con, now=NOWS[0], stale_after_h=24)  # computed from the facts meanwhile
    got = {(r["tool"], r["tool_kind"]): (r["last_seen"], r["rows_last_day"]) for r in df.to_dicts()}
    assert got == _expected(meas + extra, hist, NOWS[0])
    more = _meas("L10", "CDS-1", T0 + timedelta(days=2, hours=13), 2)
    _ingest(db, schema.MEASUREMENTS, more, "c.csv")
    assert _freshness(db, NOWS[0]) == _expected(meas + extra + more, hist, NOWS[0])


@pytest.mark.parametrize("now", NOWS)
def test_files_that_add_to_the_same_tool_day_sum_their_rows_and_keep_the_latest_time(loaded, now):
    db, meas, hist = loaded
    # two more files for CDS-1 on day 2, neither supersedes anything: the later one carries earlier times
    late = _meas("L5", "CDS-1", T0 + timedelta(days=2, hours=20), 3)
    early = _meas("L6", "CDS-1", T0 + timedelta(days=2, hours=1), 4)
    _ingest(db, schema.MEASUREMENTS, late, "d.csv")
    _ingest(db, schema.MEASUREMENTS, early, "e.csv")
    assert _freshness(db, now) == _expected(meas + late + early, hist, now)
