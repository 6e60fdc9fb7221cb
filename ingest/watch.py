"""Watch mode: poll a drop folder and ingest each new or changed export once.

A file is taken only when its size and modification time are the same on two polls in a row (a file still
being written keeps growing). A file whose bytes were already handled for that path (loaded, failed or
duplicate; looked up by content hash in ``source_files``) is not handed in again, so restarting the watcher
does not re-record old files. Files are only ever read: never moved, renamed or deleted.
"""

from __future__ import annotations

import os
import time
from collections.abc import Callable, Iterable
from pathlib import Path

from ingest import jobs
from ingest.profile import load_profiles
from warehouse import load, store

SETTLE_S = 0.2
"""With ``once``, the pause between the two size checks."""


def watch_folder(
    folder: str | os.PathLike[str],
    *,
    db: str | os.PathLike[str] | None = None,
    profile_dirs: Iterable[str | os.PathLike[str]] = (),
    interval_s: float = 5.0,
    once: bool = False,
    on_file: Callable[[jobs.FileResult], None] | None = None,
    on_poll: Callable[[list[jobs.FileResult]], None] | None = None,
    max_polls: int | None = None,
    wait_s: float = store.DEFAULT_WAIT_S,
) -> list[jobs.FileResult]:
    """Poll ``folder`` every ``interval_s`` and ingest files that are new or changed and stable.

    ``once`` ingests what is ready now (two size checks ``SETTLE_S`` apart) and returns. ``on_file`` is
    called after each ingested file, ``on_poll`` once after each poll that ingested any (with that poll's
    results: the place for work that should run once per batch of files, such as an evaluation). Returns
    the results of the files ingested (all of them when it stops).
    """
    root = Path(folder)
    profiles = load_profiles([Path(d) for d in profile_dirs])
    user = jobs._user()
    handled = _handled(db)
    seen: dict[Path, tuple[int, int]] = {}
    done: dict[Path, tuple[int, int]] = {}
    results: list[jobs.FileResult] = []
    polls = 0
    while True:
        polls += 1
        current = _stat_all(root)
        if once:
            time.sleep(SETTLE_S)
            seen = current
            current = _stat_all(root)
        this_poll: list[jobs.FileResult] = []
        for path, stamp in sorted(current.items()):
            if seen.get(path) != stamp or done.get(path) == stamp:
                continue  # still changing, or already handled in this run
            sha, _ = jobs.sha256_of(path)
            if handled.get(str(path)) == sha:
                done[path] = stamp
                continue
            res = jobs.ingest_file(path, db=db, profiles=profiles, user=user, wait_s=wait_s)
            handled[str(path)] = sha
            done[path] = stamp
            results.append(res)
            this_poll.append(res)
            if on_file:
                on_file(res)
        if on_poll and this_poll:
            on_poll(this_poll)
        seen = current
        if once or (max_polls is not None and polls >= max_polls):
            return results
        time.sleep(interval_s)


def _stat_all(root: Path) -> dict[Path, tuple[int, int]]:
    out = {}
    for f in jobs.iter_export_files([root]):
        try:
            st = f.stat()
        except FileNotFoundError:  # removed between listing and stat
            continue
        out[f] = (st.st_size, st.st_mtime_ns)
    return out


def _handled(db: str | os.PathLike[str] | None) -> dict[str, str]:
    p = store.resolve_db_path(db)
    if not p.exists():
        return {}
    with store.open_warehouse(p, read_only=True) as con:
        return load.file_stamps(con)
