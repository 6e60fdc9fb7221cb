"""Bad input: each case names the exact location and reason, and nothing already stored is lost.

Whole-file failures leave only a ``source_files`` row (status failed, the message); row problems become
rejects while the file's good rows load.
"""

from __future__ import annotations

import gzip
import shutil

import polars as pl
import pytest
from ingest_cases import DATA, LONG_HEADER, WIDE_HEADER, long_row, query, snapshot, wide_row

from ingest.jobs import ingest_paths


def _long(*rows: str) -> str:
    return "\n".join([LONG_HEADER, *rows]) + "\n"


def _wide(*rows: str) -> bytes:
    return ("\r\n".join([WIDE_HEADER, *rows]) + "\r\n").encode("cp1252")


@pytest.fixture(scope="module")
def _template(tmp_path_factory):
    """One warehouse with one good file loaded, built once and copied into each test (keeps the suite fast)."""
    d = tmp_path_factory.mktemp("template")
    src = d / "cdsem_long_v2.csv"
    shutil.copy(DATA / "measurements" / "cdsem_long_v2.csv", src)
    ingest_paths([src], db=d / "wh.duckdb")
    return d / "wh.duckdb"


@pytest.fixture
def loaded(db, _template):
    """A warehouse holding one good file, and its contents before the bad file."""
    shutil.copy(_template, db)
    return snapshot(db)


def _ingest_failing(db, path, loaded, **kw):
    f = ingest_paths([path], db=db, **kw).files[0]
    assert f.status == "failed"
    assert snapshot(db) == loaded  # nothing else lost, nothing of the bad file stored
    assert query(
        db, "SELECT status, message, rows_loaded FROM source_files ORDER BY file_id DESC LIMIT 1"
    ) == [("failed", f.message, 0)]
    return f.message


FILE_FAILURES = [
    (
        "empty",
        "e.csv",
        b"",
        '{p}:1:1: file is empty (found "0 bytes", expected a csv header line).\n'
        "  Fix: re-export the file; nothing was loaded.",
    ),
    (
        "header only",
        "h.csv",
        (LONG_HEADER + "\n").encode(),
        '{p}:2:1: file has a header but no data rows (found "end of file", expected at least one data row).\n'
        "  Fix: re-export the file; nothing was loaded.",
    ),
    (
        "header only, blank lines",
        "h2.csv",
        (LONG_HEADER + "\n\n\r\n").encode(),
        '{p}:2:1: file has a header but no data rows (found "end of file", expected at least one data row).\n'
        "  Fix: re-export the file; nothing was loaded.",
    ),
    (
        "parquet bytes named .csv",
        "renamed.csv",
        b"PAR1\x15\x04\x15\x10\x15\x14L\x15\x02\x15\x00\x12\x00\x00",
        '{p}:1:1: file holds Parquet bytes but its name says text (found "PAR1", expected csv).\n'
        "  Fix: rename it to .parquet.",
    ),
    (
        "gzip bytes without .gz",
        "zipped.csv",
        gzip.compress(b"a,b\n1,2\n"),
        '{p}:1:1: file holds gzip bytes but its name lacks .gz (found "1f 8b", expected csv).\n'
        "  Fix: rename it to end in .gz.",
    ),
    (
        "binary garbage",
        "img.csv",
        b"\x89PNG\r\n\x1a\n\x00\x00\x00\rIHDR\x00\x00\x01\x00",
        '{p}:3:1: file is binary, not a text export (found "byte 0x00", expected csv text).\n'
        "  Fix: check that the right file was exported (a text file without NUL bytes).",
    ),
    (
        "unknown header",
        "u.csv",
        b"when,where,what\n1,2,3\n",
        "{p}:1: header matches no export profile.\n  Found: when,where,what\n"
        "  Closest csv profiles: native:tool_events (lacks tool, event_at, event_kind; unknown when, where, what); "
        "native:process_history (lacks lot_id, step, process_tool, started_at; unknown when, where, what); "
        "native:spec_limits (lacks product, layer, parameter, unit, effective_from; unknown when, where, what)\n"
        "  Fix: write a profile for this export and pass its folder with --profiles DIR, or export in lotline's "
        'native format (README: "lotline\'s native format").',
    ),
    (
        "missing required column",
        "m.csv",
        (LONG_HEADER.replace(",Tool", "") + "\n").encode() + b"x\n",
        '{p}:1: header lacks required column "Tool" of profile cdsem_long_v2.\n  Found: '
        + LONG_HEADER.replace(",Tool", "")
        + "\n  Fix: export the column, or mark it optional in {profiles}/cdsem_long_v2.toml.",
    ),
    (
        "jsonl first record not JSON",
        "i.jsonl",
        b"{lot: 1}\n",
        '{p}:1:2: first record is not valid JSON (found "{{lot: 1}}", expected one JSON object per line).\n'
        "  Fix: export JSON lines (one object per line).",
    ),
    (
        "corrupt parquet",
        "c.parquet",
        b"PAR1 this is not really parquet PAR1",
        "{p}:1:1: file is not readable Parquet (expected a Parquet file).\n  {details}\n  Fix: re-export the file, or rename it if it is not Parquet.",
    ),
    (
        "text named .parquet",
        "t.parquet",
        b"lot,wafer\n1,2\n",
        "{p}:1:1: file is not Parquet (found \"b'lot,'\", expected bytes starting with PAR1).\n"
        "  Fix: rename the file to its real format.",
    ),
]


@pytest.mark.parametrize("name,filename,content,expected", FILE_FAILURES, ids=[c[0] for c in FILE_FAILURES])
def test_ingest_unreadable_file_fails_whole_with_location(
    db, write, loaded, name, filename, content, expected
):
    from ingest.profile import BUILTIN_DIR

    p = write(filename, content)
    msg = _ingest_failing(db, p, loaded)
    details = msg.split("\n")[1].strip() if "{details}" in expected else ""
    assert msg == expected.format(p=p, profiles=BUILTIN_DIR, details=details)


def test_ingest_truncated_gzip_fails_whole(db, write, loaded):
    whole = gzip.compress(_long(long_row("S01"), long_row("S02")).encode())
    p = write("cut.csv.gz", whole[: len(whole) // 2])
    msg = _ingest_failing(db, p, loaded)
    assert msg == (
        f'{p}: gzip stream is truncated or corrupt (found "EOFError after 0 complete lines", '
        "expected a complete gzip file).\n  Fix: copy or re-export the file again (it was cut off); "
        "nothing was loaded."
    )


def test_ingest_latin1_file_read_as_utf8_names_line_and_column(db, write, loaded):
    text = _long(long_row("S01"), long_row("S02", tool="SEM-\u00e91"))
    p = write("latin.csv", text.encode("latin-1"))
    col = text.split("\n")[2].index("\u00e9") + 1
    msg = _ingest_failing(db, p, loaded)
    assert msg == (
        f'{p}:3:{col}: bytes invalid in encoding utf-8 (found "byte 0xe9", '
        'expected utf-8).\n  Fix: the file is probably Latin-1 or Windows-1252: set encoding = "cp1252" '
        '(or "latin-1") under [csv] in its profile.'
    )


def test_ingest_byte_undefined_in_cp1252_names_line_and_column(db, write, loaded):
    data = _wide(wide_row("1"), wide_row("2")).replace(b"SEM-W1", b"SEM-W\x81", 1)
    p = write("w.csv", data)
    msg = _ingest_failing(db, p, loaded)
    col = data.split(b"\r\n")[1].index(b"\x81") + 1
    assert msg == (
        f'{p}:2:{col}: bytes invalid in encoding cp1252 (found "byte 0x81", expected cp1252).\n'
        "  Fix: set the right [csv] encoding in the profile (utf-8, utf-8-sig, utf-16, latin-1, cp1252)."
    )


def test_ingest_line_of_tens_of_megabytes_fails_without_reading_it_whole(db, write, loaded):
    p = write("long.csv", (LONG_HEADER + "\n").encode() + b"x" * (20 * 1024 * 1024))
    msg = _ingest_failing(db, p, loaded)
    assert msg == (
        f'{p}:2:1: line is longer than 8388608 bytes (found "no newline within 8388608 bytes", '
        "expected one record per line).\n  Fix: check that the file is a line-oriented export "
        "(not a binary or a single-line dump)."
    )


def test_ingest_ambiguous_header_lists_both_profiles(db, write, tmp_path, loaded):
    from ingest.profile import BUILTIN_DIR

    extra = tmp_path / "profiles"
    extra.mkdir()
    (extra / "copy.toml").write_text(
        (BUILTIN_DIR / "cdsem_long_v2.toml")
        .read_text()
        .replace('name = "cdsem_long_v2"', 'name = "cdsem_long_site_b"')
    )
    p = write("a.csv", _long(long_row("S01")))
    msg = _ingest_failing(db, p, loaded, profile_dirs=[extra])
    assert msg == (
        f"{p}:1: header matches 2 export profiles.\n  Found: {LONG_HEADER}\n"
        f"  Candidates: cdsem_long_v2 ({BUILTIN_DIR}/cdsem_long_v2.toml), cdsem_long_site_b "
        f"({extra}/copy.toml)\n  Fix: make the profiles' columns differ (remove the stale one from "
        "--profiles) so one header fits one."
    )


# ------------------------------------------------------------------------------- row-level rejects

ROW_REJECTS = [
    (
        "ragged row",
        _long(long_row("S01"), "HC2609-020,HC2609-020-01,1,S02,0.0", long_row("S03")),
        [(3, None, "HC2609-020,HC2609-020-01,1,S02,0.0", "row has 5 fields, the header has 17 (ragged row)")],
    ),
    (
        "decimal comma in a comma-separated file",
        _long(long_row("S01"), long_row("S02", value="12,7")),
        [(3, None, long_row("S02", value="12,7"), "row has 18 fields, the header has 17 (ragged row)")],
    ),
    (
        "quoted decimal comma in a dot-decimal file",
        _long(long_row("S01"), long_row("S02", value='"12,7"')),
        [(3, "Value_nm", "12,7", 'not a number (the profile\'s decimal mark is "."; found ",")')],
    ),
    (
        "NaN",
        _long(long_row("S01", value="NaN"), long_row("S02")),
        [(2, "Value_nm", "NaN", "not a finite number")],
    ),
    (
        "inf",
        _long(long_row("S01"), long_row("S02", value="-inf")),
        [(3, "Value_nm", "-inf", "not a finite number")],
    ),
    (
        "not a number",
        _long(long_row("S01", value="n/a"), long_row("S02")),
        [(2, "Value_nm", "n/a", "not a number")],
    ),
    (
        "negative CD",
        _long(long_row("S01", value="-45.1"), long_row("S02")),
        [(2, "Value_nm", "-45.1", "a length must be > 0")],
    ),
    (
        "µm value in an nm column",
        _long(long_row("S01", value="45100"), long_row("S02")),
        [(2, "Value_nm", "45100", "out of range (must be <= 1000; a unit mix-up such as µm read as nm?)")],
    ),
    (
        "x beyond the wafer radius",
        _long(long_row("S01", x="151.0"), long_row("S02")),
        [(2, "X_mm", "151.0", "out of range (must be <= 150; a unit mix-up such as µm read as nm?)")],
    ),
    (
        "slot out of range",
        _long(long_row("S01", slot="26"), long_row("S02")),
        [(2, "Slot", "26", "out of range (must be <= 25; a unit mix-up such as µm read as nm?)")],
    ),
    (
        "slot not an integer",
        _long(long_row("S01", slot="2.5"), long_row("S02")),
        [(2, "Slot", "2.5", "not an integer")],
    ),
    (
        "unknown mapped value",
        _long(long_row("S01", stage="STRIP"), long_row("S02")),
        [(2, "Stage", "STRIP", "unknown value (expected one of DEV, ETCH)")],
    ),
    (
        "missing required value",
        _long(long_row("S01", lot=""), long_row("S02")),
        [(2, "LotID", None, "missing required value")],
    ),
    (
        "timestamp without zone and no profile zone",
        _long(long_row("S01", ts="2026-09-03T07:14:05"), long_row("S02")),
        [
            (
                2,
                "MeasTime",
                "2026-09-03T07:14:05",
                "timestamp has no UTC offset and the profile sets no time zone",
            )
        ],
    ),
    (
        "unparsable timestamp",
        _long(long_row("S01", ts="03/09/2026"), long_row("S02")),
        [(2, "MeasTime", "03/09/2026", "not an ISO 8601 timestamp")],
    ),
    (
        "duplicate key in the file",
        _long(long_row("S01"), long_row("S02"), long_row("S01", value="46.0")),
        [
            (
                4,
                None,
                None,
                "duplicate natural key (lot_id, wafer_id, layer, parameter, site_id, feature, repeat, "
                "metrology_tool, measured_at) of line 2 in the same file; the first one was kept",
            )
        ],
    ),
]


@pytest.mark.parametrize("name,text,expected", ROW_REJECTS, ids=[c[0] for c in ROW_REJECTS])
def test_ingest_bad_rows_are_rejected_and_good_rows_load(db, write, loaded, name, text, expected):
    p = write("rows.csv", text)
    f = ingest_paths([p], db=db).files[0]
    assert (f.status, f.rows_rejected) == ("loaded", len({e[0] for e in expected}))
    assert (
        query(
            db,
            'SELECT line, "column", value, reason FROM rejects WHERE file_id = ? ORDER BY line, reason',
            [f.file_id],
        )
        == expected
    )
    good_lines = sorted({i + 2 for i in range(text.count("\n") - 1)} - {e[0] for e in expected})
    assert query(
        db, "SELECT _source_line FROM measurements WHERE _source_file_id = ? ORDER BY 1", [f.file_id]
    ) == [(n,) for n in good_lines]
    after = snapshot(db)
    old = {r for r in after["measurements"] if r[-3] != f.file_id}
    assert old == set(loaded["measurements"])  # the earlier file's rows are untouched


def test_ingest_decimal_comma_in_a_dot_decimal_semicolon_file_is_rejected(db, write, tmp_path, loaded):
    from ingest.profile import BUILTIN_DIR

    extra = tmp_path / "profiles"
    extra.mkdir()
    (extra / "semi.toml").write_text(
        (BUILTIN_DIR / "cdsem_long_v2.toml")
        .read_text()
        .replace('name = "cdsem_long_v2"', 'name = "cdsem_long_semicolon"')
        .replace('delimiter = ","', 'delimiter = ";"')
    )
    text = (
        "\n".join([LONG_HEADER, long_row("S01"), long_row("S02", value="12,7")])
        .replace(",", ";")
        .replace("12;7", "12,7")
    )
    f = ingest_paths([write("semi.csv", text + "\n")], db=db, profile_dirs=[extra]).files[0]
    assert (f.profile, f.rows_loaded, f.rows_rejected) == ("cdsem_long_semicolon", 1, 1)
    assert query(db, 'SELECT line, "column", value, reason FROM rejects') == [
        (3, "Value_nm", "12,7", 'not a number (the profile\'s decimal mark is "."; found ",")')
    ]


WIDE_REJECTS = [
    (
        "dot in a decimal-comma file",
        _wide(wide_row("1", mid="0.0451"), wide_row("2")),
        [(2, "CD_MID_um", "0.0451", 'not a number (the profile\'s decimal mark is ","; found ".")')],
    ),
    (
        "nm value in a µm column",
        _wide(wide_row("1", top="45"), wide_row("2")),
        [(2, "CD_TOP_um", "45", "out of range (must be <= 1000; a unit mix-up such as µm read as nm?)")],
    ),
    (
        "DST ambiguous local time",
        _wide(wide_row("1", ts="25.10.2026 02:30:00"), wide_row("2")),
        [
            (
                2,
                "MeasDate",
                "25.10.2026 02:30:00",
                "ambiguous local time in Europe/Amsterdam (occurs twice at the DST change); export with a UTC offset",
            )
        ],
    ),
    (
        "DST nonexistent local time",
        _wide(wide_row("1"), wide_row("2", ts="29.03.2026 02:30:00")),
        [
            (
                3,
                "MeasDate",
                "29.03.2026 02:30:00",
                "nonexistent local time in Europe/Amsterdam (skipped at the DST change); export with a UTC offset",
            )
        ],
    ),
]


@pytest.mark.parametrize("name,data,expected", WIDE_REJECTS, ids=[c[0] for c in WIDE_REJECTS])
def test_ingest_wide_bad_values_reject_the_whole_record(db, write, loaded, name, data, expected):
    f = ingest_paths([write("wide.csv", data)], db=db).files[0]
    assert (f.profile, f.rows_loaded, f.rows_rejected) == ("cdsem_wide_v1", 3, 1)
    assert query(db, 'SELECT line, "column", value, reason FROM rejects') == expected


def test_ingest_jsonl_bad_record_is_rejected_whole_and_others_load(db, write, case, loaded):
    good = case("inspections/inspection.jsonl").read_text().splitlines()
    bad_json = "{not json"
    bad_count = good[0].replace('"n": 2', '"n": -2').replace("HC2609-014-07", "HC2609-014-09")
    f = ingest_paths([write("i.jsonl", "\n".join([bad_json, good[1], bad_count]) + "\n")], db=db).files[0]
    assert (f.rows_loaded, f.rows_rejected) == (1, 2)
    assert query(db, 'SELECT line, "column", value, reason FROM rejects ORDER BY line') == [
        (1, None, "{not json", "not valid JSON (Expecting property name enclosed in double quotes)"),
        (3, "n", "-2", "out of range (must be >= 0)"),
    ]
    assert query(db, "SELECT wafer_id FROM inspections") == [("HC2609-014-08",)]
    assert query(db, "SELECT count(*) FROM defect_counts") == [(0,)]


def test_ingest_parquet_zero_area_is_rejected(db, tmp_path, loaded):
    from datetime import datetime

    p = tmp_path / "z.parquet"
    pl.DataFrame(
        {
            "LOT": ["L1", "L2"],
            "WAFER": ["W1", "W2"],
            "PRODUCT": ["AX14"] * 2,
            "LAYER": ["M1"] * 2,
            "TOOL": ["I1"] * 2,
            "RECIPE": ["R"] * 2,
            "INSPECT_TIME": [datetime(2026, 9, 3)] * 2,
            "AREA_CM2": [0.0, 679.0],
            "COUNT": [1, 2],
            "ADDERS": [0, 0],
            "KIND": ["PROD", "PROD"],
        }
    ).write_parquet(p)
    f = ingest_paths([p], db=db).files[0]
    assert (f.rows_loaded, f.rows_rejected) == (1, 1)
    assert query(db, 'SELECT line, "column", value, reason FROM rejects') == [
        (1, "AREA_CM2", "0.0", "out of range (must be > 0)")
    ]


VANISHED = (
    '{p}: file could not be read (found "No such file or directory").\n'
    "  Fix: check that the file is still there and readable, then ingest it again; nothing of it was loaded."
)


@pytest.mark.parametrize("when", ["while it is hashed", "after it is hashed", "before it is opened"])
@pytest.mark.parametrize("chunk_bytes", [2048, 1 << 30], ids=["duckdb-reader", "polars-reader"])
def test_ingest_file_that_vanishes_fails_with_a_message_and_the_next_file_loads(
    db, write, loaded, monkeypatch, when, chunk_bytes
):
    # an export removed by its tool while lotline reads it: the real OS error (the file is deleted for
    # real), reported as that file's failure; the other file of the run still loads (common practice:
    # drop folders are written to while they are watched)
    from ingest import jobs

    gone = write("gone.csv", _long(*[long_row(f"S{i:03d}", lot="HC2609-030") for i in range(200)]))
    other = write("other.csv", _long(long_row("S01", lot="HC2609-031")))
    real_scan, real_stat = jobs.scan_file, jobs.ScanJob.__init__

    def scan(path, **kw):
        if path == gone and when == "while it is hashed":
            gone.unlink()
        out = real_scan(path, **kw)
        if path == gone and when == "after it is hashed":
            gone.unlink()
        return out

    def init(self, path, **kw):
        if path == gone and when == "before it is opened":
            gone.unlink()
        real_stat(self, path, **kw)

    monkeypatch.setattr(jobs, "scan_file", scan)
    monkeypatch.setattr(jobs.ScanJob, "__init__", init)
    files = ingest_paths([gone, other], db=db, chunk_bytes=chunk_bytes).files
    assert [f.status for f in files] == ["failed", "loaded"]
    assert files[0].message == VANISHED.format(p=gone)
    assert query(db, "SELECT status, message, rows_loaded FROM source_files WHERE path = ?", [str(gone)]) == [
        ("failed", files[0].message, 0)
    ]
    assert query(db, "SELECT count(*) FROM measurements WHERE lot_id = 'HC2609-030'") == [(0,)]
    assert query(db, "SELECT count(*) FROM measurements WHERE lot_id = 'HC2609-031'") == [(1,)]
    now = snapshot(db)
    assert all(set(rows) <= set(now[t]) for t, rows in loaded.items())  # nothing stored before was lost
