"""Ingest jobs: find export files, read them, pick a profile, run the adapters, hand frames to the warehouse.

Each file is one unit of work: its rows go in one transaction, or, on the DuckDB reader of a big plain CSV
file, in two whose first stores them hidden from every query of current rows (see
``warehouse.store.INTERRUPTED_LOAD_KEY``): either way the file's rows become current all at once or not at
all. The files of one ``ingest_paths`` run share
a connection in batches (``store.Batch``): the warehouse is opened (with lock retry) for the first file of a
batch and closed after the file that ends it, once the batch has been open for about 2 s or has taken 50
files, so a waiting reader gets in between batches and no connection outlives a batch of work. A single
``ingest_file`` call without a batch opens and closes the warehouse for that file alone. A file that cannot be read at all leaves only a ``source_files`` row
with status ``failed`` and the message (written in its own small transaction after the rollback). The same
bytes twice are recorded as ``duplicate`` and load nothing.

Example:
    >>> report = ingest_paths(["demo_run/exports"], db="lotline.duckdb")  # doctest: +SKIP
    >>> report.exit_code
    0
"""

from __future__ import annotations

import contextlib
import functools
import getpass
import gzip
import hashlib
import os
import queue
import sys
import tempfile
import threading
import zlib
from collections.abc import Callable, Iterable, Iterator
from dataclasses import dataclass, field, fields
from pathlib import Path
from typing import BinaryIO, TypeVar

import numpy as np
import polars as pl

from ingest.adapters.mapping import map_records
from ingest.adapters.records import jsonl_keys, parquet_columns, parse_jsonl_chunk, parse_parquet
from ingest.adapters.text import (
    MAX_LINE_BYTES,
    LineChunker,
    bom_encoding,
    decode_head,
    header_fields,
    parse_csv_chunk,
    sniff,
)
from ingest.direct import direct_program
from ingest.profile import Profile, detect_profile, load_profiles
from warehouse import direct, load, schema, store
from warehouse.direct import DirectProgram
from warehouse.errors import IngestError

T = TypeVar("T")

SUFFIXES = {".csv": "csv", ".txt": "csv", ".parquet": "parquet", ".jsonl": "jsonl", ".json": "jsonl"}
"""File name endings ingest reads (each optionally followed by ``.gz``)."""
BLOCK_BYTES = 8 * 1024 * 1024
CHUNK_BYTES = 16 * 1024 * 1024
"""Text is parsed and loaded in chunks of about this many bytes, so memory stays flat for big files. A file
no bigger than one chunk is stored in series order (see ``warehouse.load.SERIES_ORDER``)."""


@dataclass
class FileResult:
    """Outcome of one file."""

    path: str
    status: str  # loaded | failed | duplicate
    profile: str | None = None
    kind: str | None = None
    file_id: int | None = None
    rows_loaded: int = 0
    rows_rejected: int = 0
    rows_superseded: int = 0
    rows_skipped: int = 0
    reader: str | None = None
    """Which reader parsed the file: ``duckdb`` (a big plain CSV loaded directly, see ingest.direct) or
    ``polars`` (every other file, and a plain CSV with any row that needs a reject or a closer look)."""
    message: str | None = None
    affected_keys: dict[str, list[pl.DataFrame]] = field(default_factory=dict, repr=False)
    """Per table, frames of the (lot_id, layer, parameter) the file wrote (repeats allowed)."""

    @functools.cached_property
    def affected(self) -> list[dict[str, str]]:
        """Distinct (table, lot_id, layer, parameter) the file wrote: the hook for re-evaluating series.

        Built on first use: a 10M-row file writes ~370k such keys, and making them Python dicts took ~1 s of
        its ingest when it was done for every file.
        """
        return _affected_list(self.affected_keys)

    def to_dict(self) -> dict[str, object]:
        return {f.name: getattr(self, f.name) for f in fields(self) if f.name != "affected_keys"}


@dataclass
class IngestReport:
    """Outcome of one ``ingest_paths`` call."""

    files: list[FileResult] = field(default_factory=list)

    @property
    def exit_code(self) -> int:
        """0 when every file loaded without rejects (duplicates are fine), else 1."""
        bad = any(f.status == "failed" or f.rows_rejected for f in self.files)
        return 1 if bad else 0

    def affected_lots(self) -> set[str]:
        return {a["lot_id"] for f in self.files for a in f.affected if a.get("lot_id")}

    def affected_series(self) -> set[tuple[str, str, str]]:
        """(table, layer, parameter) touched by this run, for incremental evaluation."""
        return {
            (a["table"], a.get("layer") or "", a.get("parameter") or "")
            for f in self.files
            for a in f.affected
        }

    def to_dict(self) -> dict[str, object]:
        return {"files": [f.to_dict() for f in self.files], "exit_code": self.exit_code}


def iter_export_files(paths: Iterable[str | os.PathLike[str]]) -> Iterator[Path]:
    """Files to ingest: each given file, and every readable export under each given folder (sorted)."""
    for raw in paths:
        p = Path(raw)
        if p.is_dir():
            for f in sorted(p.rglob("*")):
                if f.is_file() and export_format(f) is not None and not f.name.startswith("."):
                    yield f
        else:
            yield p


def export_format(path: Path) -> str | None:
    """csv, parquet or jsonl from the file name (``.gz`` stripped), or None."""
    name = path.name.lower()
    if name.endswith(".gz"):
        name = name[:-3]
    return SUFFIXES.get(Path(name).suffix)


def sha256_of(path: Path) -> tuple[str, int]:
    scan = scan_file(path)
    return scan.sha256, scan.size


@dataclass
class FileScan:
    """What one read of a file's bytes tells: its hash and size, and for plain text the facts that decide
    whether DuckDB may parse it directly (see :mod:`ingest.direct`)."""

    sha256: str
    size: int
    newlines: int = 0
    has_quote: bool = False
    ends_with_newline: bool = True
    samples: list[tuple[int, int]] = field(default_factory=list)
    """(line number, byte offset) of the first line that starts in each block, and of the last line."""

    def data_lines(self, header_line: int) -> int:
        """Lines after the header (a last line without a newline counts)."""
        lines = self.newlines + (0 if self.ends_with_newline or self.size == 0 else 1)
        return max(0, lines - header_line)


def scan_file(path: Path, *, text: bool = False) -> FileScan:
    """Hash the file's bytes; with ``text`` also count lines, look for quotes and keep line samples."""
    h = hashlib.sha256()
    size = newlines = 0
    quote = False
    samples: list[tuple[int, int]] = []
    last = b""
    with open(path, "rb") as f:
        while block := f.read(BLOCK_BYTES):
            h.update(block)
            if text:
                nl = block.find(b"\n")
                if nl >= 0 and nl + 1 < len(block):
                    samples.append((newlines + 2, size + nl + 1))
                quote = quote or b'"' in block
                newlines += int(np.count_nonzero(np.frombuffer(block, np.uint8) == 10))  # 2.5x bytes.count
                last = block[-1:]
            size += len(block)
        scan = FileScan(h.hexdigest(), size)
        if text and size:
            scan.newlines, scan.has_quote, scan.ends_with_newline = newlines, quote, last == b"\n"
            f.seek(max(0, size - 65536))
            tail = f.read()
            cut = tail.rfind(b"\n", 0, len(tail) - 1)
            if cut >= 0:  # the last line starts after the newline before the file's final byte
                samples.append((newlines + (0 if scan.ends_with_newline else 1), size - len(tail) + cut + 1))
            scan.samples = sorted(set(samples))
    return scan


class ScanJob:
    """A file's scan (:func:`scan_file`), run in a background thread while DuckDB loads a big file.

    The DuckDB reader keeps about one core busy while it loads (an INSERT inside a transaction), so hashing
    and counting the lines of a big file beside it costs little wall time (~1.5 s of work per 10M rows). The
    hash is needed early only to recognise a duplicate, and a duplicate has the size of a loaded file:
    ``_ingest_one`` waits for it only then.
    """

    def __init__(self, path: Path, *, text: bool, background_above: int | None = None) -> None:
        """Scan in a background thread when the file is bigger than ``background_above`` bytes."""
        self._result: FileScan | None = None
        self._error: BaseException | None = None
        self._thread: threading.Thread | None = None
        try:
            self.size = path.stat().st_size
        except OSError as exc:  # gone since it was listed: the file fails with a message, the run goes on
            self.size, self._error = 0, _unreadable_file(str(path), exc)
            return
        if background_above is not None and self.size > background_above:
            self._thread = threading.Thread(
                target=self._run, args=(path, text), name="lotline-scan", daemon=True
            )
            self._thread.start()
        else:
            self._run(path, text)

    def _run(self, path: Path, text: bool) -> None:
        try:
            self._result = scan_file(path, text=text)
        except OSError as exc:  # re-raised by result(), as the file's own error
            self._error = _unreadable_file(str(path), exc)
        except BaseException as exc:  # re-raised by result()
            self._error = exc

    @property
    def known_sha256(self) -> str:
        """The hash when the scan succeeded, else "" (a file that could not be read is recorded without one)."""
        try:
            return self.sha256
        except IngestError:
            return ""

    @property
    def done(self) -> bool:
        return self._thread is None or not self._thread.is_alive()

    def result(self) -> FileScan:
        if self._thread is not None:
            self._thread.join()
        if self._error is not None:
            raise self._error
        assert self._result is not None
        return self._result

    @property
    def sha256(self) -> str:
        return self.result().sha256


def ingest_paths(
    paths: Iterable[str | os.PathLike[str]],
    *,
    db: str | os.PathLike[str] | None = None,
    profile_dirs: Iterable[str | os.PathLike[str]] = (),
    profile: str | None = None,
    wait_s: float = store.DEFAULT_WAIT_S,
    progress: bool = False,
    user: str | None = None,
    chunk_bytes: int = CHUNK_BYTES,
    on_file: Callable[[FileResult], None] | None = None,
    duckdb_reader: bool = True,
) -> IngestReport:
    """Ingest files and folders into the warehouse ``db``; return one :class:`FileResult` per file.

    ``profile`` forces a profile by name instead of detecting it from the header. ``duckdb_reader=False``
    reads every file with the Polars reader (see :mod:`ingest.direct` for when DuckDB reads one). Raises
    :class:`IngestError` only for problems with the arguments (a path that does not exist, a bad profile);
    problems with a file's content are reported in its result.
    """
    profiles = load_profiles([Path(d) for d in profile_dirs])
    files = list(iter_export_files(paths))
    for f in files:
        if not f.exists():
            raise IngestError("no such file or folder", path=str(f), fix="check the path")
    who = user or _user()
    report = IngestReport()
    total = sum(f.stat().st_size for f in files)
    bar = _progress(total, progress)
    batch = store.Batch(db, create=True, wait_s=wait_s, on_open=load.configure_for_ingest)
    try:
        for f in files:
            res = ingest_file(
                f,
                db=db,
                profiles=profiles,
                forced=profile,
                wait_s=wait_s,
                user=who,
                chunk_bytes=chunk_bytes,
                on_bytes=bar.update if bar else None,
                batch=batch,
                duckdb_reader=duckdb_reader,
            )
            report.files.append(res)
            if on_file:
                on_file(res)
    finally:
        batch.close()
        if bar:
            bar.close()
    return report


def _progress(total: int, enabled: bool):  # tqdm on stderr, shown only for runs longer than a second
    if not enabled:
        return None
    from tqdm import tqdm

    return tqdm(
        total=total, unit="B", unit_scale=True, file=sys.stderr, delay=1.0, desc="ingest", leave=False
    )


def _user() -> str:
    try:
        return getpass.getuser()
    except Exception:  # no user name in the environment (some containers)
        return f"uid {os.getuid()}"


def ingest_file(
    path: Path,
    *,
    db: str | os.PathLike[str] | None,
    profiles: list[Profile],
    forced: str | None = None,
    wait_s: float = store.DEFAULT_WAIT_S,
    user: str,
    chunk_bytes: int = CHUNK_BYTES,
    on_bytes: Callable[[int], object] | None = None,
    batch: store.Batch | None = None,
    duckdb_reader: bool = True,
) -> FileResult:
    """Ingest one file in one transaction (see the module doc).

    ``batch`` lends the connection of a batch of files (``ingest_paths``); without one the warehouse is
    opened for this file and closed afterwards.
    """
    fmt = export_format(path) or "csv"
    text = duckdb_reader and fmt == "csv" and not path.name.lower().endswith(".gz")
    scan = ScanJob(path, text=text, background_above=chunk_bytes if text else None)
    with contextlib.ExitStack() as stack:
        if batch is None:  # a file on its own: open the warehouse for it alone
            batch = stack.enter_context(
                store.Batch(db, create=True, wait_s=wait_s, max_units=1, on_open=load.configure_for_ingest)
            )
        con = stack.enter_context(batch.unit())
        return _ingest_one(
            con,
            path,
            profiles=profiles,
            forced=forced,
            user=user,
            chunk_bytes=chunk_bytes,
            on_bytes=on_bytes,
            scan=scan,
        )


def _ingest_one(
    con,
    path: Path,
    *,
    profiles: list[Profile],
    forced: str | None,
    user: str,
    chunk_bytes: int,
    on_bytes: Callable[[int], object] | None,
    scan: ScanJob,
) -> FileResult:
    shown = str(path)
    fmt = export_format(path) or "csv"
    size = scan.size
    maybe_duplicate = scan.done or load.loaded_file_of_size(con, size)
    try:
        first = load.find_loaded_file(con, scan.sha256) if maybe_duplicate else None
    except IngestError as exc:  # the file could not be read to hash it
        return _failed(con, exc, shown=shown, scan=scan, size=size, prof=None, user=user)
    if first is not None:
        sha = scan.sha256
        with store.transaction(con):
            fid = load.record_file(
                con,
                status="duplicate",
                path=shown,
                sha256=sha,
                size=size,
                kind=None,
                profile=None,
                user=user,
                message=f"same bytes as file {first}; nothing loaded",
            )
        if on_bytes:
            on_bytes(size)
        return FileResult(
            path=shown, status="duplicate", file_id=fid, message=f"same bytes as file {first}; nothing loaded"
        )
    state: dict[str, object] = {}
    try:
        try:
            fid, counts, result, rejects = _load_in_transaction(
                con, path, fmt, scan, profiles, forced, user, chunk_bytes, on_bytes, state, True
            )
        except _DirectDeclined:  # rolled back: read the file again on the Polars path
            state.clear()
            fid, counts, result, rejects = _load_in_transaction(
                con, path, fmt, scan, profiles, forced, user, chunk_bytes, on_bytes, state, False
            )
        prof: Profile = state["profile"]  # type: ignore[assignment]
    except IngestError as exc:
        return _failed(con, exc, shown=shown, scan=scan, size=size, prof=state.get("profile"), user=user)
    except OSError as exc:  # the export vanished or became unreadable while it was being read
        err = _unreadable_file(shown, exc)
        return _failed(con, err, shown=shown, scan=scan, size=size, prof=state.get("profile"), user=user)
    rejected = rejects.select(pl.col("line").n_unique()).item() if rejects.height else 0
    return FileResult(
        path=shown,
        status="loaded",
        profile=prof.name,
        kind=prof.kind,
        file_id=fid,
        rows_loaded=counts.loaded,
        rows_rejected=rejected,
        rows_superseded=counts.superseded,
        rows_skipped=counts.skipped,
        reader=str(state.get("reader", "polars")),
        affected_keys=result,
    )


class _DirectDeclined(Exception):
    """The direct DuckDB load of a file was abandoned (a row not clean, or DuckDB refused); retry in Polars."""


def _load_in_transaction(con, path, fmt, scan, profiles, forced, user, chunk_bytes, on_bytes, state, duck):
    """One attempt at the file in its own transaction (two on the DuckDB reader); returns (file_id, counts,
    affected, rejects).

    ``duck``: whether the DuckDB reader may take the file (False after it declined it once). When the
    attempt fails after the DuckDB reader's first commit, the hidden rows it stored are deleted here (and,
    should this process die first, by the next open of the warehouse).
    """
    try:
        return _attempt(con, path, fmt, scan, profiles, forced, user, chunk_bytes, on_bytes, state, duck)
    except BaseException:
        if state.get("hidden_rows"):
            with contextlib.suppress(Exception):  # left for the next open when even this fails
                store.discard_interrupted_load(con)
        raise
    finally:
        state.pop("hidden_rows", None)


def _attempt(con, path, fmt, scan, profiles, forced, user, chunk_bytes, on_bytes, state, duck):
    shown = str(path)
    with store.transaction(con):
        fid = load.new_file_id(con)
        counts = load.FileCounts()
        result = _load_content(
            con,
            path,
            fmt,
            profiles=profiles,
            forced=forced,
            file_id=fid,
            counts=counts,
            chunk_bytes=chunk_bytes,
            on_bytes=on_bytes,
            state=state,
            scan=scan if duck else None,
        )
        rejects = pl.concat(counts.reject_frames) if counts.reject_frames else None
        if rejects is None:
            from ingest.adapters.text import empty_rejects

            rejects = empty_rejects()
        prof: Profile = state["profile"]  # type: ignore[assignment]
        load.finish_file(
            con,
            file_id=fid,
            path=shown,
            sha256=scan.sha256,
            size=scan.size,
            kind=prof.kind,
            profile=prof.name,
            user=user,
            counts=counts,
            rejects=rejects,
        )
    return fid, counts, result, rejects


def _unreadable_file(path: str, exc: OSError) -> IngestError:
    """The error of an export that could not be read (gone, or no permission) while it was ingested."""
    found = exc.strerror or type(exc).__name__
    if exc.filename is not None and str(exc.filename) != path:  # e.g. the temporary folder of a big file
        found = f"{found}: {exc.filename}"
    return IngestError(
        "file could not be read",
        path=path,
        found=found,
        fix="check that the file is still there and readable, then ingest it again; nothing of it was loaded",
    )


def _failed(con, exc: IngestError, *, shown: str, scan: ScanJob, size: int, prof, user: str) -> FileResult:
    """Record a file that failed whole (its own transaction; the load's was rolled back) and its result."""
    if exc.path is None:
        exc = _with_path(exc, shown)
    with store.transaction(con):
        fid = load.record_file(
            con,
            status="failed",
            path=shown,
            sha256=scan.known_sha256,
            size=size,
            kind=getattr(prof, "kind", None),
            profile=getattr(prof, "name", None),
            user=user,
            message=str(exc),
        )
    return FileResult(
        path=shown,
        status="failed",
        file_id=fid,
        profile=getattr(prof, "name", None),
        kind=getattr(prof, "kind", None),
        message=str(exc),
    )


def _with_path(exc: IngestError, path: str) -> IngestError:
    fields = exc._fields()
    fields["path"] = path
    what = fields.pop("what")
    return type(exc)(what, **fields)


class _Reader:
    """Blocks of a file's (decompressed) bytes; a truncated or corrupt gzip stream is an IngestError."""

    def __init__(self, path: Path, on_bytes: Callable[[int], object] | None) -> None:
        self.path = path
        self.gz = path.name.lower().endswith(".gz")
        self._raw: BinaryIO = open(path, "rb")  # noqa: SIM115 (closed in close())
        self._f: BinaryIO = gzip.GzipFile(fileobj=self._raw) if self.gz else self._raw  # type: ignore[assignment]
        self.on_bytes = on_bytes
        self._pos = 0
        self.lines_seen = 0

    def read(self, n: int = BLOCK_BYTES) -> bytes:
        try:
            block = self._f.read(n)
        except (EOFError, gzip.BadGzipFile, zlib.error) as exc:
            raise IngestError(
                "gzip stream is truncated or corrupt",
                path=str(self.path),
                found=f"{type(exc).__name__} after {self.lines_seen} complete lines",
                expected="a complete gzip file",
                fix="copy or re-export the file again (it was cut off); nothing was loaded",
            ) from None
        if self.on_bytes:
            pos = self._raw.tell()
            self.on_bytes(pos - getattr(self, "_rawpos", 0))
            self._rawpos = pos
        self._pos += len(block)
        self.lines_seen += block.count(b"\n")
        return block

    def read_all(self) -> bytes:
        parts = []
        while block := self.read():
            parts.append(block)
        return b"".join(parts)

    def close(self) -> None:
        self._f.close()
        self._raw.close()


def _load_content(
    con,
    path: Path,
    fmt: str,
    *,
    profiles: list[Profile],
    forced: str | None,
    file_id: int,
    counts: load.FileCounts,
    chunk_bytes: int,
    on_bytes,
    state: dict[str, object],
    scan: ScanJob | None = None,
) -> dict[str, list[pl.DataFrame]]:
    shown = str(path)
    reader = _Reader(path, on_bytes)
    small_file = path.stat().st_size <= chunk_bytes
    stage = None if small_file else tempfile.TemporaryDirectory(prefix="lotline-load-")
    stage_dir = Path(stage.name) if stage else None
    affected: dict[
        str, list[pl.DataFrame]
    ] = {}  # per table: distinct (lot_id, layer, parameter) of each chunk
    hashes: dict[str, list[pl.DataFrame]] = {}

    tables_seen: dict[str, None] = {}

    def prepare(frames: dict[str, pl.DataFrame], rejects: pl.DataFrame) -> tuple:
        """Work that needs no warehouse (runs in the parse thread): key hashes and affected series."""
        extra = {}
        for table, frame in frames.items():
            t = schema.table(table)
            h = None
            if t.natural_key and frame.height:
                h = frame.select(
                    pl.struct(list(t.natural_key)).hash().alias("h"),
                    pl.col(schema.C_SOURCE_LINE).cast(pl.UInt32).alias("line"),
                )  # 12 bytes a row
            keys = [c for c in ("lot_id", "layer", "parameter") if c in frame.columns]
            extra[table] = (h, frame.select(keys).unique() if frame.height else None)
        return frames, rejects, extra

    pending: dict[str, list[pl.DataFrame]] = {}  # rows held back until they fill whole row groups

    def store_rows(table: str, frame: pl.DataFrame, *, final: bool = False) -> None:
        """Insert a chunk; chunks of a row group or more go in as whole row groups (see load.ROW_GROUP_ROWS)."""
        held = pending.pop(table, [])
        if not held and not final and frame.height < load.ROW_GROUP_ROWS:
            load.load_chunk(
                con,
                table,
                frame,
                file_id=file_id,
                counts=counts,
                series_order=small_file,
                stage_dir=stage_dir,
            )
            return
        rows = pl.concat([*held, frame], rechunk=False) if held else frame
        n = rows.height if final else load.whole_row_groups(rows.height)
        if n:
            load.load_chunk(
                con,
                table,
                rows.slice(0, n),
                file_id=file_id,
                counts=counts,
                series_order=small_file,
                stage_dir=stage_dir,
            )
        if n < rows.height:
            pending[table] = [rows.slice(n)]

    def take(frames: dict[str, pl.DataFrame], rejects: pl.DataFrame, extra: dict | None = None) -> None:
        if extra is None:
            frames, rejects, extra = prepare(frames, rejects)
        if rejects.height:
            counts.reject_frames.append(rejects)
        for table, frame in frames.items():
            if frame.height == 0:
                continue
            tables_seen[table] = None
            store_rows(table, frame)
            h, keys_frame = extra[table]
            if h is not None:
                hashes.setdefault(table, []).append(h)
            if keys_frame is not None:
                affected.setdefault(table, []).append(keys_frame)

    try:
        head = reader.read()
        if fmt == "parquet":
            data = head + reader.read_all()
            if not data:
                sniff(data, path=shown, expected="parquet")
            if not data.startswith(b"PAR1"):
                raise IngestError(
                    "file is not Parquet",
                    path=shown,
                    line=1,
                    column=1,
                    found=repr(data[:4]),
                    expected="bytes starting with PAR1",
                    fix="rename the file to its real format",
                )
            cols = parquet_columns(data, path=shown)
            prof = detect_profile(cols, profiles, fmt="parquet", path=shown, line=1, forced=forced)
            state["profile"] = prof
            frames, rejects = parse_parquet(data, prof, path=shown)
            take(frames, rejects)
        elif fmt == "jsonl":
            sniff(head, path=shown, expected="jsonl")
            if b"\n" not in head and len(head) >= BLOCK_BYTES:
                LineChunker(
                    path=shown,
                    encoding="utf-8",
                    skip_lines=0,
                    chunk_bytes=chunk_bytes,
                    max_line_bytes=BLOCK_BYTES - 1,
                )._check_long(head)
            keys, line = jsonl_keys(head, path=shown)
            prof = detect_profile(keys, profiles, fmt="jsonl", path=shown, line=line, forced=forced)
            state["profile"] = prof
            chunker = LineChunker(path=shown, encoding="utf-8", skip_lines=0, chunk_bytes=chunk_bytes)
            n = 0
            for first, data in _pipelined(_chunks(reader, head, chunker)):
                n += 1
                take(*parse_jsonl_chunk(data, prof, first_line=first))
            if n == 0:
                raise IngestError(
                    "file has no records", path=shown, line=1, column=1, fix="re-export the file"
                )
        else:
            sniff(head, path=shown, expected="csv")
            pool = [p for p in profiles if p.format == "csv"]
            bom = bom_encoding(head)

            texts: dict[str, str] = {}
            views: dict[tuple[str, str, int], list[str]] = {}

            def view(
                p: Profile,
            ) -> list[str]:  # the header as each profile reads it (decoded once per dialect)
                k = (p.encoding, p.delimiter, p.header_line)
                if k not in views:
                    if p.encoding not in texts:
                        texts[p.encoding] = decode_head(head[: 1 << 20], p.encoding)
                    views[k] = header_fields(
                        texts[p.encoding], delimiter=p.delimiter, header_line=p.header_line
                    )
                return list(views[k])

            first_line = decode_head(head[: 1 << 16], bom or "utf-8").splitlines()[:1]
            shown_header = first_line[0][:300] if first_line else ""
            if not shown_header.strip():
                raise IngestError(
                    "file has no header line",
                    path=shown,
                    line=1,
                    column=1,
                    found="a blank line",
                    expected="a header",
                    fix="remove the blank lines before the header",
                )
            prof = detect_profile(
                view, pool, fmt="csv", path=shown, line=1, shown=shown_header, forced=forced
            )
            state["profile"] = prof
            header = view(prof)
            prog = _direct_candidate(scan, head, prof, header, bom, chunk_bytes)
            if prog is not None:
                reader.close()
                state["reader"] = "duckdb"
                return _load_direct(
                    con, path, prog, scan, file_id=file_id, counts=counts, on_bytes=on_bytes, state=state
                )
            enc = bom or prof.encoding
            chunker = LineChunker(
                path=shown, encoding=enc, skip_lines=prof.header_line, chunk_bytes=chunk_bytes
            )

            def parsed() -> Iterator[tuple[pl.DataFrame, pl.DataFrame]]:
                for first, data in _chunks(reader, head, chunker):
                    raw, ragged = parse_csv_chunk(
                        data, header=header, delimiter=prof.delimiter, first_line=first, source=shown
                    )
                    frame, rejects = map_records(raw, prof)
                    yield prepare(
                        {prof.kind: frame}, pl.concat([ragged, rejects]) if ragged.height else rejects
                    )

            n = 0
            # parse the next chunk in a thread while the warehouse stores this one (both release the GIL)
            for frames, rejects, extra in _pipelined(parsed()):
                n += 1
                take(frames, rejects, extra)
            if n == 0:
                raise IngestError(
                    "file has a header but no data rows",
                    path=shown,
                    line=prof.header_line + 1,
                    column=1,
                    found="end of file",
                    expected="at least one data row",
                    fix="re-export the file; nothing was loaded",
                )
        for table in list(pending):
            store_rows(table, pl.DataFrame(schema=pending[table][0].schema), final=True)
    finally:
        reader.close()
        if stage is not None:
            stage.cleanup()
    load.supersede_file(con, list(tables_seen), file_id=file_id, counts=counts)
    # duplicate natural keys inside the file: exact check of the lines whose key hash repeats
    for table, parts in hashes.items():
        allh = pl.concat(parts, rechunk=False)
        parts.clear()
        cand = allh.filter(~pl.col("h").is_first_distinct())["line"].cast(pl.Int64).to_list()
        del allh
        if cand:
            dup = load.reject_in_file_duplicates(con, table, cand, file_id=file_id, counts=counts)
            if dup.height:
                counts.reject_frames.append(dup)
    return affected


DIRECT_SAMPLES = 64
"""At most this many stored rows of a direct load are compared with the text of their line in the file."""


def _direct_candidate(
    scan: ScanJob | None, head: bytes, prof: Profile, header: list[str], bom: str | None, chunk_bytes: int
) -> DirectProgram | None:
    """The direct program for a big plain CSV file, or None when the Polars path must read it.

    Decided from the first block while the scan may still run; ``_load_direct`` checks the whole file's
    facts (quotes, line count) once the scan is done.
    """
    if scan is None or scan.size <= chunk_bytes or b'"' in head or bom not in (None, "utf-8-sig"):
        return None
    if scan.done and not _scan_allows_direct(scan.result(), prof.header_line):
        return None
    return direct_program(prof, header)


def _scan_allows_direct(scan: FileScan, header_line: int) -> bool:
    return bool(scan.samples) and not scan.has_quote and scan.data_lines(header_line) > 0


def _load_direct(
    con,
    path: Path,
    prog: DirectProgram,
    job: ScanJob,
    *,
    file_id: int,
    counts: load.FileCounts,
    on_bytes,
    state: dict,
) -> dict[str, list[pl.DataFrame]]:
    """Load a plain CSV file inside DuckDB (see :mod:`warehouse.direct`); raise _DirectDeclined to fall back.

    Kept only when every data line became a row (no line was dropped or unclean), so that row ids number
    the lines, and when a sample of stored rows matches the text of their lines. Every check runs in the
    first transaction, on the hidden rows; after its commit (``state["hidden_rows"]`` set: a failure from
    here on must discard them, :func:`_load_in_transaction`) the second numbers the lines, makes the rows
    current and supersedes older rows, and the caller's commit ends it.
    """
    table = prog.table
    done = direct.insert_rows(con, prog, path=str(path), file_id=file_id, max_line_bytes=MAX_LINE_BYTES)
    if done is None:
        raise _DirectDeclined("DuckDB could not read the file")
    scan = job.result()  # hashed and counted beside the INSERT
    if not _scan_allows_direct(scan, prog.header_line):
        raise _DirectDeclined("a quote character or no data line in the file")
    expected = scan.data_lines(prog.header_line)
    n, unclean, repeated = done
    if n != expected or unclean:
        raise _DirectDeclined(f"{expected - n} of {expected} lines dropped, {unclean} rows not clean")
    first = prog.header_line + 1
    _check_direct_lines(con, path, prog, scan, file_id=file_id)
    store.mark_interrupted_load(con, table, file_id)
    state["hidden_rows"] = True
    store.commit_and_begin(con)
    try:
        direct.number_lines(con, table, file_id=file_id, first_line=first, rows=n)
    except direct.LinesNotConsecutive as exc:
        raise _DirectDeclined(str(exc)) from exc
    store.clear_interrupted_load(con)
    if on_bytes:
        on_bytes(scan.size)
    counts.loaded += n
    load.supersede_file(con, [table], file_id=file_id, counts=counts)
    cand = [off + first for off in repeated]
    if cand:
        dup = load.reject_in_file_duplicates(con, table, cand, file_id=file_id, counts=counts)
        if dup.height:
            counts.reject_frames.append(dup)
    keys = counts.written_keys.get(table)
    if keys is None:
        keys = direct.written_keys(con, table, file_id=file_id)
    return {table: [keys]} if keys is not None else {}


def _check_direct_lines(con, path: Path, prog: DirectProgram, scan: FileScan, *, file_id: int) -> None:
    """Compare sampled stored rows with the raw text of their lines (guards the row-id line numbering)."""
    cols = prog.identity_text_columns()
    if not cols:
        return
    first = prog.header_line + 1
    picks = [(ln, off) for ln, off in scan.samples if ln >= first]
    if len(picks) > DIRECT_SAMPLES:
        step = len(picks) / DIRECT_SAMPLES
        picks = [picks[int(i * step)] for i in range(DIRECT_SAMPLES)] + [picks[-1]]
    if not picks:
        return
    index = {h: i for i, h in enumerate(prog.header)}
    stored = direct.stored_at_offsets(
        con,
        prog.table,
        file_id=file_id,
        offsets=[ln - first for ln, _ in picks],
        columns=[c.name for c in cols],
    )
    with open(path, "rb") as f:
        for ln, off in picks:
            f.seek(off)
            text = f.readline().decode("utf-8", errors="replace").rstrip("\r\n")
            fields = text.split(prog.delimiter)
            want = tuple(fields[index[c.source]] if c.source in index else None for c in cols)
            got = stored.get(ln - first)
            if got != want:
                raise _DirectDeclined(f"line {ln}: stored {got!r}, file has {want!r}")


def _affected_list(affected: dict[str, list[pl.DataFrame]]) -> list[dict[str, str]]:
    """Distinct (table, lot_id, layer, parameter) as dicts without the absent keys, sorted (None as "")."""
    out: list[dict[str, str]] = []
    for table in sorted(affected):
        keys = pl.concat(affected[table], how="vertical_relaxed").unique()
        cols = keys.columns
        keys = keys.sort([pl.col(c).fill_null("") for c in cols])
        nullable = [c for c in cols if keys[c].null_count()]
        rows = keys.select(pl.lit(table).alias("table"), *cols).to_dicts()
        if nullable:
            for d in rows:
                for c in nullable:
                    if d[c] is None:
                        del d[c]
        out.extend(rows)
    return out


def _chunks(reader: _Reader, head: bytes, chunker: LineChunker) -> Iterator[tuple[int, bytes]]:
    """The file's non-blank chunks of whole lines, as ``(first_line, utf8_bytes)``."""
    block = head
    while True:
        nxt = reader.read(max(BLOCK_BYTES, chunker.chunk_bytes)) if block else b""
        final = not nxt
        for first, data in chunker.feed(block, final=final):
            if data.strip():
                yield first, data
        if final:
            return
        block = nxt


def _pipelined(items: Iterator[T], depth: int = 1) -> Iterator[T]:
    """Run a generator one step ahead in a background thread; its exceptions re-raise here."""
    q: queue.Queue[tuple[str, object]] = queue.Queue(maxsize=depth)
    stop = threading.Event()

    def work() -> None:
        try:
            for item in items:
                while not stop.is_set():
                    try:
                        q.put(("item", item), timeout=0.1)
                        break
                    except queue.Full:
                        continue
                if stop.is_set():
                    return
            q.put(("done", None))
        except BaseException as exc:  # handed to the consumer
            q.put(("error", exc))

    th = threading.Thread(target=work, name="lotline-parse", daemon=True)
    th.start()
    try:
        while True:
            kind, val = q.get()
            if kind == "done":
                return
            if kind == "error":
                raise val  # type: ignore[misc]
            yield val  # type: ignore[misc]
    finally:
        stop.set()
        while th.is_alive():
            try:
                q.get_nowait()
            except queue.Empty:
                th.join(0.05)


__all__ = ["FileResult", "IngestReport", "export_format", "ingest_file", "ingest_paths", "iter_export_files"]
