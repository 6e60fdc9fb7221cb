"""The DuckDB reader for big plain CSV files (ingest.direct, warehouse.direct) against the Polars reader.

Every check here is a path-equivalence check: the same file loaded by the DuckDB reader (a file bigger
than ``chunk_bytes``) and by the Polars reader (``chunk_bytes`` above the file size) must store the same
rows with the same line numbers and the same rejects. The Polars reader's own results are checked against
hand-written expectations in test_dialects.py and test_bad_inputs.py.
"""

from __future__ import annotations

import random

import duckdb
import pytest
from ingest_cases import LONG_HEADER, long_row

from ingest.jobs import ingest_paths
from tests.raw_db import raw_rows

SMALL = 2048  # chunk_bytes below the test files' size: the DuckDB reader is tried
HUGE = 1 << 30  # chunk_bytes above it: the Polars reader only

COLUMNS = (
    "lot_id, wafer_id, slot, site_id, x_mm, y_mm, product, layer, stage, parameter, feature, value, unit, "
    "measured_at, metrology_tool, recipe, repeat, sample_kind, _source_line, _superseded_by"
)


def _rows(n: int, seed: int = 7) -> list[str]:
    """Invented clean cdsem_long_v2 lines with varied number shapes and timestamps."""
    rnd = random.Random(seed)
    params = ["CD_MID", "CD_TOP", "CD_BOT", "LWR", "PITCH"]
    out = []
    for i in range(n):
        value = rnd.choice(
            [
                f"{rnd.uniform(20, 90):.6f}",
                f"{rnd.uniform(20, 90):.17g}",
                f"{rnd.uniform(2, 9):.3e}",
                str(rnd.randint(20, 90)),
                f"{rnd.uniform(20, 90):.1f}",
            ]
        )
        frac = rnd.choice(["", ".5", ".123456", ".000001"])
        ts = f"2026-{rnd.randint(1, 12):02d}-{rnd.randint(1, 28):02d}T{rnd.randint(0, 23):02d}:{rnd.randint(0, 59):02d}:{rnd.randint(0, 59):02d}{frac}Z"
        x = rnd.choice([f"{rnd.uniform(-149, 149):.3f}", "0", "-0.0", "150", "-150.0"])
        out.append(
            long_row(
                f"S{i:05d}",
                value=value,
                ts=ts,
                lot=f"HC{i // 50:04d}",
                x=x,
                slot=str(rnd.randint(1, 25)),
                stage=rnd.choice(["DEV", "ETCH"]),
                param=rnd.choice(params),
                tool=rnd.choice(["SEM-A1", "SEM-B2"]),
            )
        )
    return out


def _load(tmp_path, name: str, text: str, chunk_bytes: int):
    path = tmp_path / name / "export.csv"
    path.parent.mkdir(parents=True)
    path.write_bytes(text.encode("utf-8"))
    db = tmp_path / name / "wh.duckdb"
    f = ingest_paths([path], db=db, chunk_bytes=chunk_bytes).files[0]
    con = duckdb.connect(str(db), read_only=True)
    try:
        rows = con.execute(f"SELECT {COLUMNS} FROM measurements ORDER BY _source_line").fetchall()
        rejects = con.execute('SELECT line, "column", value, reason FROM rejects ORDER BY ALL').fetchall()
    finally:
        con.close()
    return f, rows, rejects


def _both(tmp_path, text: str):
    fast = _load(tmp_path, "duckdb", text, SMALL)
    slow = _load(tmp_path, "polars", text, HUGE)
    assert slow[0].reader == "polars"
    return fast, slow


def test_clean_file_is_read_by_duckdb_and_stores_exactly_what_polars_stores(tmp_path):
    text = "\n".join([LONG_HEADER, *_rows(600)]) + "\n"
    (f, rows, rejects), (g, rows2, rejects2) = _both(tmp_path, text)
    assert f.reader == "duckdb"
    assert (f.rows_loaded, f.rows_rejected) == (g.rows_loaded, g.rows_rejected) == (600, 0)
    assert rows == rows2  # every column, value for value, with the same line numbers
    assert [r[-2] for r in rows] == list(range(2, 602))
    assert rejects == rejects2 == []


def test_crlf_and_missing_final_newline_keep_the_duckdb_reader_and_the_lines(tmp_path):
    text = "\r\n".join([LONG_HEADER, *_rows(300, seed=3)])  # no newline after the last line
    (f, rows, _), (_, rows2, _) = _both(tmp_path, text)
    assert f.reader == "duckdb"
    assert rows == rows2 and rows[-1][-2] == 301


# Values DuckDB would read differently from Polars (or read at all where Polars rejects): the DuckDB reader
# must hand such a file to the Polars reader, so the result is the Polars one. Found by probing both readers
# (DuckDB 2.0.1, Polars 1.x): TRY_CAST('12.5' AS BIGINT) = 13, ' 12.5' and '1_000' parse as numbers, '24:00:00'
# is the next day, a leading blank is skipped before a timestamp.
ODD = [
    ("value", " 45.1"),
    ("value", "45.1 "),
    ("value", "4_5.1"),
    ("value", "+45.1"),
    ("value", ".5"),
    ("value", "1e400"),
    ("value", "NaN"),
    ("value", "inf"),
    ("value", "-3.0"),
    ("value", "5000"),
    ("value", "12,7"),
    ("value", ""),
    ("slot", "12.5"),
    ("slot", "0x10"),
    ("slot", " 3"),
    ("slot", "26"),
    ("x", "150.001"),
    ("ts", "2026-09-03T24:00:00Z"),
    ("ts", "2026-09-03T07:14:60Z"),
    ("ts", "2026-9-3T7:14:05Z"),
    ("ts", " 2026-09-03T07:14:05Z"),
    ("ts", "2026-09-03T07:14:05.1234567Z"),
    ("ts", "2026-09-03 07:14:05Z"),
    ("ts", "2026-09-03T07:14:05+02:00"),
    ("ts", "2026-09-03T07:14:05"),
    ("ts", "2026-02-30T07:14:05Z"),
    ("stage", "LITHO"),
    ("param", "CD_XYZ"),
    ("lot", ""),
]


@pytest.mark.parametrize(("field", "raw"), ODD, ids=[f"{f}={r!r}" for f, r in ODD])
def test_a_value_needing_a_closer_look_sends_the_file_to_polars(tmp_path, field, raw):
    lines = [LONG_HEADER, *_rows(200, seed=11)]
    lines[101] = long_row("S00100", **{"lot": "HC0002", field: raw})  # line 102
    text = "\n".join(lines) + "\n"
    (f, rows, rejects), (g, rows2, rejects2) = _both(tmp_path, text)
    assert f.reader == "polars"
    assert (f.rows_loaded, f.rows_rejected) == (g.rows_loaded, g.rows_rejected)
    assert rows == rows2
    assert rejects == rejects2


def test_ragged_and_blank_lines_send_the_file_to_polars_with_its_rejects(tmp_path):
    lines = [LONG_HEADER, *_rows(200, seed=5)]
    lines[50] = lines[50] + ",extra"  # line 51: one field too many
    lines[120] = ""  # line 121: blank
    text = "\n".join(lines) + "\n"
    (f, rows, rejects), (_, rows2, rejects2) = _both(tmp_path, text)
    assert f.reader == "polars"
    assert rows == rows2 and rejects == rejects2
    assert [r[0] for r in rejects] == [51]


def test_duplicate_key_in_a_duckdb_read_file_is_rejected_like_polars_does(tmp_path):
    lines = [LONG_HEADER, *_rows(300, seed=9)]
    lines[250] = lines[40]  # line 251 repeats line 41 exactly
    text = "\n".join(lines) + "\n"
    (f, rows, rejects), (g, rows2, rejects2) = _both(tmp_path, text)
    assert f.reader == "duckdb"
    assert rows == rows2 and rejects == rejects2
    assert [(r[0], r[3]) for r in rejects] == [(251, rejects2[0][3])] and "line 41" in rejects[0][3]
    assert (f.rows_loaded, f.rows_rejected) == (g.rows_loaded, g.rows_rejected) == (299, 1)


def test_a_row_differing_from_another_only_in_lot_layer_and_tool_is_kept(tmp_path):
    """Same wafer id, site, parameter, feature, repeat and time as an earlier row, but another lot, layer
    and tool: not a duplicate of it (natural key), on either reader; a true duplicate beside it is."""
    lines = [LONG_HEADER, *_rows(300, seed=9)]
    f = lines[40].split(",")
    f[0], f[7], f[13] = "HC7777", "V1", "SEM-Z9"  # lot, layer, tool; the wafer id stays
    lines[250] = ",".join(f)
    lines[260] = lines[41]  # and one true duplicate: line 261 repeats line 42
    text = "\n".join(lines) + "\n"
    (f, rows, rejects), (g, rows2, rejects2) = _both(tmp_path, text)
    assert f.reader == "duckdb"
    assert rows == rows2 and rejects == rejects2
    assert [r[0] for r in rejects] == [261] and "line 42" in rejects[0][3]
    assert (f.rows_loaded, f.rows_rejected) == (g.rows_loaded, g.rows_rejected) == (299, 1)
    assert [r[0] for r in rows if r[-2] == 251] == ["HC7777"]


def test_quoted_file_is_read_by_polars(tmp_path):
    lines = [LONG_HEADER, *_rows(200, seed=2)]
    lines[7] = lines[7].replace("SEM-", '"SEM-', 1).replace(",", '",', 14)  # one quoted field
    text = "\n".join(lines) + "\n"
    (f, rows, rejects), (_, rows2, rejects2) = _both(tmp_path, text)
    assert f.reader == "polars"
    assert rows == rows2 and rejects == rejects2


def test_reexport_through_duckdb_supersedes_like_polars(tmp_path):
    first = "\n".join([LONG_HEADER, *_rows(200, seed=4)]) + "\n"
    again = "\n".join([LONG_HEADER, *_rows(200, seed=4)[:150]]) + "\n"  # other bytes, same keys
    results = []
    for name, chunk in (("duckdb", SMALL), ("polars", HUGE)):
        d = tmp_path / name
        d.mkdir()
        (d / "a.csv").write_text(first)
        (d / "b.csv").write_text(again)
        rep = ingest_paths([d / "a.csv", d / "b.csv"], db=d / "wh.duckdb", chunk_bytes=chunk)
        con = duckdb.connect(str(d / "wh.duckdb"), read_only=True)
        results.append(
            (
                [(r.rows_loaded, r.rows_superseded) for r in rep.files],
                con.execute(f"SELECT {COLUMNS}, _source_file_id FROM measurements ORDER BY ALL").fetchall(),
                con.execute("SELECT * EXCLUDE (superseded_at) FROM supersessions ORDER BY ALL").fetchall(),
            )
        )
        con.close()
    assert results[0] == results[1]
    assert results[0][0][1][1] > 0  # the re-export superseded rows


def test_utf8_bom_file_keeps_the_duckdb_reader_and_the_same_rows(tmp_path):
    text = "\ufeff" + "\n".join([LONG_HEADER, *_rows(300, seed=13)]) + "\n"
    (f, rows, rejects), (_, rows2, rejects2) = _both(tmp_path, text)
    assert f.reader == "duckdb"
    assert rows == rows2 and rejects == rejects2 == []
    assert rows[0][0].startswith("HC")  # the mark is not part of the first value


UM_PROFILE = """
name = "sem_um_long"
kind = "measurements"
format = "csv"

[csv]
delimiter = ";"

[columns]
lot_id = "Lot"
wafer_id = "Wafer"
site_id = "Site"
x_mm = { source = "X_um", unit = "um" }
y_mm = { source = "Y_um", unit = "um" }
product = "Device"
layer = "Level"
parameter = "Item"
value = { source = "Value_um", unit = "um" }
measured_at = "Time"
metrology_tool = "Tool"
repeat = "Rep"
sample_kind = "Kind"

[values.parameter]
CD = "cd_mid"
SWA = "swa"

[values.sample_kind]
P = "production"

[limits.value]
at_most = 1000
"""


def test_user_profile_in_micrometres_with_an_angle_parameter_matches_polars(tmp_path):
    # lengths in µm become nm (x 1000, NIST SP 811: 1 µm = 1e-6 m, 1 nm = 1e-9 m); an angle keeps its degrees
    prof = tmp_path / "profiles"
    prof.mkdir()
    (prof / "sem_um_long.toml").write_text(UM_PROFILE)
    rnd = random.Random(21)
    lines = ["Lot;Wafer;Site;X_um;Y_um;Device;Level;Item;Value_um;Time;Tool;Rep;Kind"]
    for i in range(400):
        item = "SWA" if i % 4 == 3 else "CD"
        value = f"{rnd.uniform(86, 89):.2f}" if item == "SWA" else f"{rnd.uniform(0.02, 0.09):.5f}"
        lines.append(
            f"L{i // 20:03d};L{i // 20:03d}-{i % 5 + 1:02d};S{i % 9};{rnd.uniform(-140000, 140000):.1f};"
            f"{rnd.uniform(-140000, 140000):.1f};DV1;M1;{item};{value};2026-09-03T07:{i % 60:02d}:05Z;"
            f"SEM-{i % 2};{i // 200 + 1};P"
        )
    text = "\n".join(lines) + "\n"
    out = {}
    for name, chunk in (("duckdb", SMALL), ("polars", HUGE)):
        d = tmp_path / name
        d.mkdir()
        (d / "um.csv").write_text(text)
        f = ingest_paths([d / "um.csv"], db=d / "wh.duckdb", chunk_bytes=chunk, profile_dirs=[prof]).files[0]
        con = duckdb.connect(str(d / "wh.duckdb"), read_only=True)
        out[name] = (
            f.reader,
            f.rows_loaded,
            con.execute(f"SELECT {COLUMNS} FROM measurements ORDER BY _source_line").fetchall(),
        )
        con.close()
    assert out["duckdb"][0] == "duckdb" and out["polars"][0] == "polars"
    assert out["duckdb"][1:] == out["polars"][1:] and out["duckdb"][1] == 400
    by_param = {r[9]: r for r in out["duckdb"][2]}
    assert by_param["swa"][12] == "deg" and 86 <= by_param["swa"][11] <= 89
    assert by_param["cd_mid"][12] == "nm" and 20 <= by_param["cd_mid"][11] <= 90


def test_same_big_file_twice_is_a_duplicate_while_hashed_beside_the_load(tmp_path):
    text = "\n".join([LONG_HEADER, *_rows(300, seed=17)]) + "\n"
    path = tmp_path / "a.csv"
    path.write_text(text)
    copy = tmp_path / "b.csv"
    copy.write_text(text)
    rep = ingest_paths([path, copy], db=tmp_path / "wh.duckdb", chunk_bytes=SMALL)
    assert [(f.status, f.reader) for f in rep.files] == [("loaded", "duckdb"), ("duplicate", None)]
    assert rep.files[1].message == f"same bytes as file {rep.files[0].file_id}; nothing loaded"


def test_a_quote_after_the_first_block_is_found_by_the_scan_and_sends_the_file_to_polars(tmp_path):
    # the first 8 MiB block decides to try DuckDB; the scan beside the load finds the quote further on
    lines = [LONG_HEADER, *_rows(90_000, seed=19)]
    assert len("\n".join(lines[:-10])) > 8 * 1024 * 1024
    lines[-3] = lines[-3].replace("SEM-", '"SEM-', 1).replace(",", '",', 14)
    text = "\n".join(lines) + "\n"
    (f, rows, rejects), (_, rows2, rejects2) = _both(tmp_path, text)
    assert f.reader == "polars"
    assert rows == rows2 and rejects == rejects2


def test_both_readers_report_the_lot_layer_parameter_keys_the_file_wrote(tmp_path):
    # the expected keys come from the generated lines themselves (lot HC<i // 50>, layer M1 from
    # ingest_cases.long_row, the profile maps CD_MID -> cd_mid and so on)
    lines = _rows(400, seed=5)
    text = "\n".join([LONG_HEADER, *lines]) + "\n"
    (f, _, _), (g, _, _) = _both(tmp_path, text)
    assert f.reader == "duckdb"
    header = LONG_HEADER.split(",")
    li, pi, yi = header.index("LotID"), header.index("Parameter"), header.index("Layer")
    want = sorted(
        {("measurements", ln.split(",")[li], ln.split(",")[yi], ln.split(",")[pi].lower()) for ln in lines}
    )
    for res in (f, g):
        got = [(a["table"], a["lot_id"], a["layer"], a["parameter"]) for a in res.affected]
        assert got == want
        assert "affected_keys" not in res.to_dict() and "affected" not in res.to_dict()


# --------------------------------------------------------------------------- the two commits of the load
# The DuckDB reader commits the file's rows hidden (``_superseded_by`` = the file's id), then numbers them
# and makes them current in a second transaction (warehouse.store.INTERRUPTED_LOAD_KEY). A failure in the
# second must leave the warehouse as it was; the crash cases are in tests/warehouse/test_load.py.

HIDDEN = "SELECT count(*) FROM measurements WHERE _superseded_by = _source_file_id"
MARKER = "SELECT count(*) FROM meta WHERE key = 'interrupted_direct_load'"


def test_a_failure_in_the_second_transaction_deletes_the_hidden_rows_and_keeps_the_earlier_file(
    tmp_path, monkeypatch
):
    from warehouse import load
    from warehouse.errors import IngestError

    d = tmp_path / "w"
    d.mkdir()
    (d / "a.csv").write_text("\n".join([LONG_HEADER, *_rows(200, seed=4)]) + "\n")
    (d / "b.csv").write_text("\n".join([LONG_HEADER, *_rows(300, seed=8)]) + "\n")
    db = d / "wh.duckdb"
    a = ingest_paths([d / "a.csv"], db=db, chunk_bytes=SMALL).files[0]
    assert (a.reader, a.rows_loaded) == ("duckdb", 200)
    before = raw_rows(db, f"SELECT {COLUMNS} FROM measurements ORDER BY ALL")

    def fail(*args, **kwargs):
        raise IngestError("supersession failed for the test")

    monkeypatch.setattr(load, "supersede_file", fail)  # runs after the first commit
    b = ingest_paths([d / "b.csv"], db=db, chunk_bytes=SMALL).files[0]
    assert b.status == "failed" and "supersession failed for the test" in b.message
    assert raw_rows(db, f"SELECT {COLUMNS} FROM measurements ORDER BY ALL") == before
    assert raw_rows(db, HIDDEN) == [(0,)] and raw_rows(db, MARKER) == [(0,)]


def test_rows_whose_row_ids_are_not_consecutive_after_the_first_commit_are_read_again_by_polars(
    tmp_path, monkeypatch
):
    from warehouse import direct

    def renumbered(*args, **kwargs):
        raise direct.LinesNotConsecutive("row ids 5..900 for 300 rows (made up for the test)")

    monkeypatch.setattr(direct, "number_lines", renumbered)
    text = "\n".join([LONG_HEADER, *_rows(300, seed=6)]) + "\n"
    f, rows, rejects = _load(tmp_path, "duckdb", text, SMALL)
    g, rows2, rejects2 = _load(tmp_path, "polars", text, HUGE)
    assert (f.reader, f.status, f.rows_loaded) == ("polars", "loaded", 300)
    assert rows == rows2 and rejects == rejects2
    db = tmp_path / "duckdb" / "wh.duckdb"
    assert raw_rows(db, HIDDEN) == [(0,)] and raw_rows(db, MARKER) == [(0,)]
    assert raw_rows(db, "SELECT count(*) FROM measurements") == [(300,)]
