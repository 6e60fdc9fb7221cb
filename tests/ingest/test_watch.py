"""Watch mode: a file still being written is left alone until its size is stable, then ingested once."""

from __future__ import annotations

import threading
import time

from ingest_cases import LONG_HEADER, long_row, query

from ingest.watch import watch_folder


def test_watch_waits_for_a_growing_file_then_ingests_it_whole(db, tmp_path):
    drop = tmp_path / "drop"
    drop.mkdir()
    target = drop / "growing.csv"
    target.write_text(LONG_HEADER + "\n")
    done = threading.Event()

    def writer():
        with open(target, "a") as f:
            for i in range(12):
                f.write(long_row(f"S{i:02d}") + "\n")
                f.flush()
                time.sleep(0.05)
        done.set()

    th = threading.Thread(target=writer)
    th.start()
    time.sleep(0.05)
    during = watch_folder(drop, db=db, once=True)  # sizes differ between its two looks
    th.join()
    assert done.is_set()
    assert during == []
    after = watch_folder(drop, db=db, once=True)
    assert [(r.status, r.rows_loaded) for r in after] == [("loaded", 12)]
    assert watch_folder(drop, db=db, once=True) == []  # restarting does not re-record it
    assert query(db, "SELECT count(*) FROM source_files") == [(1,)]
    assert target.exists()


def test_watch_changed_file_is_ingested_again(db, tmp_path):
    drop = tmp_path / "drop"
    drop.mkdir()
    f = drop / "a.csv"
    f.write_text("\n".join([LONG_HEADER, long_row("S01")]) + "\n")
    assert [r.rows_loaded for r in watch_folder(drop, db=db, once=True)] == [1]
    f.write_text("\n".join([LONG_HEADER, long_row("S01", value="45.9"), long_row("S02")]) + "\n")
    res = watch_folder(drop, db=db, once=True)
    assert [(r.rows_loaded, r.rows_superseded) for r in res] == [(2, 1)]
