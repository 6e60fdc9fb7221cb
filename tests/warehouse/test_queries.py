"""warehouse.queries: the named read functions return their documented columns on a real warehouse file."""

from __future__ import annotations

from datetime import datetime

import pytest

from tests.monitoring.facts import insert_facts
from warehouse import queries, schema, store


def _meas(lot, wafer, site, value, at, layer="M1", tool="CDS-1"):
    return dict(
        lot_id=lot,
        wafer_id=wafer,
        site_id=str(site),
        x_mm=10.0 * site,
        y_mm=0.0,
        product="AX14",
        layer=layer,
        stage="develop",
        parameter="cd_mid",
        value=value,
        unit="nm",
        measured_at=at,
        metrology_tool=tool,
        repeat=1,
        sample_kind="production",
    )


@pytest.fixture()
def db(tmp_path):
    path = tmp_path / "wh.duckdb"
    with store.open_warehouse(path, create=True) as con:
        insert_facts(
            con,
            schema.MEASUREMENTS,
            [
                _meas("L1", "L1-01", 1, 45.0, datetime(2026, 9, 1, 8)),
                _meas("L1", "L1-01", 2, 47.0, datetime(2026, 9, 1, 8)),
                _meas("L1", "L1-01", 1, 30.0, datetime(2026, 9, 2, 8), layer="V1"),
            ],
        )
        insert_facts(
            con,
            schema.PROCESS_HISTORY,
            [
                dict(
                    lot_id="L1",
                    step="M1_LITHO",
                    step_seq=5,
                    process_tool="SCN-1",
                    started_at=datetime(2026, 9, 1, 6),
                ),
            ],
        )
    return path


def test_migration_two_creates_every_monitoring_table(db):
    with store.open_warehouse(db, read_only=True) as con:
        counts = store.table_counts(con)
    for t in schema.MONITORING_TABLES:
        assert counts[t.name] == 0


def test_lot_measurements_lists_layers_in_route_order(db):
    with store.open_warehouse(db, read_only=True) as con:
        df = queries.lot_measurements(con, lot_id="L1")
    assert df["layer"].to_list() == ["M1", "V1"]
    # mean of 45 and 47 (arithmetic); the sample SD of two values a, b is |a-b|/sqrt(2)
    assert df["mean"].to_list()[0] == pytest.approx(46.0)
    assert df["sd"].to_list()[0] == pytest.approx(2 / 2**0.5)


def test_wafer_sites_returns_radius_from_coordinates(db):
    with store.open_warehouse(db, read_only=True) as con:
        df = queries.wafer_sites(con, lot_id="L1", wafer_id="L1-01", layer="M1")
    assert df.columns == [
        "layer",
        "parameter",
        "site_id",
        "feature",
        "x_mm",
        "y_mm",
        "r_mm",
        "value",
        "n_repeats",
        "measured_at",
        "metrology_tool",
        "unit",
    ]
    assert df["r_mm"].to_list() == [10.0, 20.0]


def test_tool_freshness_flags_tools_older_than_the_threshold(db):
    with store.open_warehouse(db, read_only=True) as con:
        df = queries.tool_freshness(con, now=datetime(2026, 9, 2, 20), stale_after_h=24)
    rows = {(r["tool"], r["tool_kind"]): r for r in df.to_dicts()}
    assert rows[("CDS-1", "metrology")]["stale"] is False  # last seen 12 h before
    assert rows[("SCN-1", "process")]["stale"] is True  # 38 h before
    assert rows[("SCN-1", "process")]["hours_since"] == pytest.approx(38.0)


def test_process_history_and_ingest_log_read_back(db):
    with store.open_warehouse(db, read_only=True) as con:
        hist = queries.lot_process_history(con, lot_id="L1")
        log = queries.ingest_log(con)
        rej = queries.rejects(con)
        sup = queries.superseded_rows(con)
    assert hist["process_tool"].to_list() == ["SCN-1"]
    assert log.height == 2
    assert rej.height == 0 and sup.height == 0


def test_excursion_queries_on_an_empty_warehouse_return_documented_columns(db):
    with store.open_warehouse(db, read_only=True) as con:
        grid = queries.excursions_by_tool_layer_day(con)
        sev = queries.open_excursions_by_severity(con)
        newest = queries.newest_signals(con)
    assert grid.columns == ["day", "tool", "layer", "excursions", "open", "signals", "max_severity"]
    assert sev.columns == ["severity", "open", "acknowledged", "total", "oldest_first_at"]
    assert newest.height == 0
