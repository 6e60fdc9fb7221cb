"""Opening, migrating and locking the warehouse file (a real DuckDB file in a temp dir)."""

import multiprocessing as mp
import pickle
import time

import duckdb
import pytest

from warehouse import store
from warehouse.errors import SchemaVersionError, WarehouseLockedError, WarehouseNotFoundError


def test_init_creates_then_reopens_at_latest_version(tmp_path):
    db = tmp_path / "w.duckdb"
    first = store.init_warehouse(db)
    again = store.init_warehouse(db)
    assert first["created"] is True and again["created"] is False
    assert first["version"] == store.latest_version() == again["version"]


def test_open_read_only_missing_file_names_the_fix(tmp_path):
    with pytest.raises(WarehouseNotFoundError) as err:
        with store.open_warehouse(tmp_path / "nope.duckdb", read_only=True):
            pass
    assert str(err.value) == (
        f"{tmp_path / 'nope.duckdb'}: warehouse not found.\n"
        "  Fix: run `lotline init` or `lotline ingest PATH` first, or pass --db to the right file."
    )


def test_open_newer_warehouse_is_refused(tmp_path):
    db = tmp_path / "w.duckdb"
    store.init_warehouse(db)
    con = duckdb.connect(str(db))
    con.execute("INSERT INTO schema_version VALUES (999, now()::TIMESTAMP, 'from the future')")
    con.close()
    with pytest.raises(SchemaVersionError, match="schema version 999"):
        with store.open_warehouse(db):
            pass


def test_older_warehouse_is_migrated_on_open(tmp_path):
    db = tmp_path / "w.duckdb"
    con = duckdb.connect(str(db))
    # Build a version-1 file by hand: only the first migration.
    version, note, fn = store.MIGRATIONS[0]
    fn(con)
    con.execute("INSERT INTO schema_version VALUES (?, now()::TIMESTAMP, ?)", [version, note])
    con.close()
    with store.open_warehouse(db) as con:
        versions = [r[0] for r in con.execute("SELECT version FROM schema_version ORDER BY 1").fetchall()]
    assert versions == [v for v, _, _ in store.MIGRATIONS]


def test_transaction_rolls_back_everything_on_error(tmp_path):
    db = tmp_path / "w.duckdb"
    store.init_warehouse(db)
    with store.open_warehouse(db) as con:
        with pytest.raises(duckdb.Error):
            with store.transaction(con):
                con.execute("INSERT INTO meta VALUES ('a', '1')")
                con.execute("INSERT INTO meta VALUES (NULL, '1')")  # NOT NULL violation
        keys = [r[0] for r in con.execute("SELECT key FROM meta ORDER BY key").fetchall()]
    assert keys == ["data_version"]


def test_data_version_bumps_inside_a_write(tmp_path):
    db = tmp_path / "w.duckdb"
    store.init_warehouse(db)
    with store.open_warehouse(db) as con:
        with store.transaction(con):
            assert store.bump_data_version(con) == 1
    with store.open_warehouse(db, read_only=True) as con:
        assert store.read_data_version(con) == 1


def _hold(path, seconds, ready):
    con = duckdb.connect(str(path))
    ready.set()
    time.sleep(seconds)
    con.close()


def test_open_waits_for_a_lock_then_succeeds(tmp_path):
    db = tmp_path / "w.duckdb"
    store.init_warehouse(db)
    ctx = mp.get_context("spawn")
    ready = ctx.Event()
    p = ctx.Process(target=_hold, args=(db, 1.5, ready))
    p.start()
    assert ready.wait(30)
    t0 = time.monotonic()
    with store.open_warehouse(db, read_only=True, wait_s=30) as con:
        assert con.execute("SELECT 1").fetchall() == [(1,)]
    assert time.monotonic() - t0 > 0.3  # it really waited for the holder
    p.join()


def test_open_lock_timeout_names_the_holding_process(tmp_path):
    db = tmp_path / "w.duckdb"
    store.init_warehouse(db)
    ctx = mp.get_context("spawn")
    ready = ctx.Event()
    p = ctx.Process(target=_hold, args=(db, 4, ready))
    p.start()
    assert ready.wait(30)
    try:
        with pytest.raises(WarehouseLockedError) as err:
            with store.open_warehouse(db, wait_s=0.5):
                pass
        assert f"PID {p.pid}" in str(err.value)
        assert "Fix: wait for that process to finish" in str(err.value)
        assert isinstance(pickle.loads(pickle.dumps(err.value)), WarehouseLockedError)
    finally:
        p.join()


def test_resolve_db_path_prefers_flag_then_env(monkeypatch, tmp_path):
    monkeypatch.setenv("LOTLINE_DB", str(tmp_path / "env.duckdb"))
    assert store.resolve_db_path(tmp_path / "flag.duckdb") == tmp_path / "flag.duckdb"
    assert store.resolve_db_path(None) == tmp_path / "env.duckdb"
    monkeypatch.delenv("LOTLINE_DB")
    assert str(store.resolve_db_path(None)) == "lotline.duckdb"
