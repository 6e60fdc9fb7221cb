"""Each export kind and dialect feature loads into the canonical tables with the right values and units."""

from __future__ import annotations

import codecs
import gzip
from datetime import datetime

import polars as pl
import pytest
from ingest_cases import LONG_HEADER, long_row, query

from ingest.jobs import ingest_paths


def _one(report):
    assert len(report.files) == 1
    return report.files[0]


def test_ingest_cdsem_long_v2_maps_values_and_lineage(db, case):
    f = _one(ingest_paths([case("measurements/cdsem_long_v2.csv")], db=db))
    assert (f.status, f.profile, f.rows_loaded, f.rows_rejected) == ("loaded", "cdsem_long_v2", 5, 0)
    rows = query(
        db,
        "SELECT site_id, parameter, stage, feature, value, unit, measured_at, sample_kind, _source_line "
        "FROM measurements ORDER BY _source_line",
    )
    assert rows[0] == (
        "S01",
        "cd_mid",
        "develop",
        None,
        45.12,
        "nm",
        datetime(2026, 9, 3, 7, 14, 5),
        "production",
        2,
    )
    assert rows[3][1:4] == ("lwr", "develop", "L2")
    assert rows[4][2] == "etch" and rows[4][7] == "monitor"


def test_ingest_cdsem_wide_v1_unpivots_converts_um_and_localises_amsterdam(db, case):
    f = _one(ingest_paths([case("measurements/cdsem_wide_v1.csv")], db=db))
    assert (f.status, f.profile, f.rows_loaded, f.rows_rejected) == ("loaded", "cdsem_wide_v1", 6, 0)
    rows = query(
        db,
        "SELECT site_id, parameter, value, x_mm, y_mm, measured_at, metrology_tool, stage, repeat "
        "FROM measurements WHERE site_id = '2' ORDER BY parameter",
    )
    # 0,04487 µm = 44.87 nm; -120500,5 µm = -120.5005 mm (NIST SP 811 prefixes); 09:14:19 CEST = 07:14:19 UTC
    assert [r[1] for r in rows] == ["cd_mid", "cd_top", "lwr"]
    assert rows[0][2] == pytest.approx(44.87, abs=1e-9)
    assert rows[2][2] == pytest.approx(3.55, abs=1e-9)
    assert rows[0][3] == pytest.approx(-120.5005, abs=1e-9) and rows[0][4] == pytest.approx(88.25, abs=1e-9)
    assert rows[0][5] == datetime(2026, 9, 3, 7, 14, 19)
    assert rows[0][6] == "SEM-W\u00e43"  # Windows-1252 byte 0xE4 is "ä"
    assert rows[0][7:] == ("develop", 1)


def test_ingest_native_measurements_loads_without_profile_and_keeps_angles(db, case):
    f = _one(ingest_paths([case("measurements/native.csv")], db=db))
    assert (f.status, f.profile) == ("loaded", "native:measurements")
    assert query(db, "SELECT parameter, value, unit FROM measurements ORDER BY parameter") == [
        ("cd_mid", 32.5, "nm"),
        ("swa", 88.2, "deg"),
    ]


def test_ingest_inspection_jsonl_expands_classes_and_defects(db, case):
    f = _one(ingest_paths([case("inspections/inspection.jsonl")], db=db))
    assert (f.status, f.profile, f.rows_loaded, f.rows_rejected) == ("loaded", "inspection_jsonl", 7, 0)
    ins = query(
        db,
        "SELECT wafer_id, inspected_area_cm2, defect_count, adder_count, inspected_at "
        "FROM inspections ORDER BY wafer_id",
    )
    # 67886 mm² = 678.86 cm² (NIST SP 811: 1 mm² = 0.01 cm²); 10:02:11+02:00 = 08:02:11 UTC
    assert ins[0][1] == pytest.approx(678.86, abs=1e-9)
    assert ins[0][2:] == (3, 1, datetime(2026, 9, 3, 8, 2, 11))
    assert ins[1][3] is None
    assert query(db, "SELECT defect_class, size_bin, count FROM defect_counts ORDER BY count") == [
        ("scratch", ">100nm", 1),
        ("particle", "<50nm", 2),
    ]
    d = query(db, "SELECT defect_id, x_mm, y_mm, size_nm FROM defects ORDER BY defect_id")
    assert d[0][1] == pytest.approx(-10.2345, abs=1e-9) and d[0][2] == pytest.approx(
        88.012, abs=1e-9
    )  # µm -> mm


def test_ingest_inspection_parquet_loads_typed_columns(db, tmp_path):
    p = tmp_path / "insp.parquet"
    pl.DataFrame(
        {
            "LOT": ["HC2609-030"],
            "WAFER": ["HC2609-030-01"],
            "PRODUCT": ["AX14"],
            "LAYER": ["M1_ETCH_INSP"],
            "TOOL": ["INS-B2"],
            "RECIPE": ["M1E_STD"],
            "INSPECT_TIME": [datetime(2026, 9, 3, 11, 0)],
            "AREA_CM2": [679.0],
            "COUNT": [12],
            "ADDERS": pl.Series([None], dtype=pl.Int64),
            "KIND": ["MON"],
        }
    ).write_parquet(p)
    f = _one(ingest_paths([p], db=db))
    assert (f.status, f.profile, f.rows_loaded) == ("loaded", "inspection_parquet", 1)
    assert query(
        db, "SELECT inspected_at, inspected_area_cm2, defect_count, adder_count, sample_kind FROM inspections"
    ) == [(datetime(2026, 9, 3, 11, 0), 679.0, 12, None, "monitor")]


def test_ingest_lot_history_converts_offsets_and_keeps_lot_level_steps(db, case):
    f = _one(ingest_paths([case("process_history/lot_history.csv")], db=db))
    assert (f.status, f.rows_loaded) == ("loaded", 2)
    assert query(
        db, "SELECT wafer_id, chamber, started_at, ended_at FROM process_history ORDER BY step_seq"
    ) == [
        (None, None, datetime(2026, 9, 2, 19, 10), datetime(2026, 9, 2, 20, 5)),
        ("HC2609-014-07", "PM2", datetime(2026, 9, 3, 1, 12), datetime(2026, 9, 3, 1, 19, 30)),
    ]


def test_ingest_reference_csv_converts_angstrom_to_nm(db, case):
    _one(ingest_paths([case("reference_values/reference.csv")], db=db))
    # NIST SP 811 Table 9: 1 Å = 0.1 nm -> 452.0 Å = 45.2 nm, 3.5 Å = 0.35 nm
    rows = query(
        db,
        "SELECT feature, reference_value, reference_uncertainty, unit, reference_method, measured_at "
        "FROM reference_values ORDER BY feature",
    )
    assert rows[0][1] == pytest.approx(45.2, abs=1e-12) and rows[0][2] == pytest.approx(0.35, abs=1e-12)
    assert rows[0][3:] == ("nm", "xsem_tem", datetime(2026, 8, 20, 12))
    assert rows[1][4:] == ("afm", datetime(2026, 8, 21, 12))  # naive, profile zone UTC


def test_ingest_native_spec_limits_and_tool_events(db, case):
    r = ingest_paths([case("spec_limits/native.csv"), case("tool_events/native.csv")], db=db)
    assert [(f.profile, f.rows_loaded) for f in r.files] == [
        ("native:spec_limits", 2),
        ("native:tool_events", 2),
    ]
    assert query(db, "SELECT product, lsl, usl FROM spec_limits ORDER BY product") == [
        ("*", None, 4.5),
        ("AX14", 40.5, 49.5),
    ]
    assert query(db, "SELECT tool, chamber FROM tool_events ORDER BY tool") == [
        ("ETX-02", "PM2"),
        ("SEM-A1", None),
    ]


@pytest.mark.parametrize(
    "bom,encoding",
    [(codecs.BOM_UTF8, "utf-8"), (codecs.BOM_UTF16_LE, "utf-16-le"), (codecs.BOM_UTF16_BE, "utf-16-be")],
)
def test_ingest_bom_files_load_in_the_announced_encoding(db, write, bom, encoding):
    text = "\r\n".join([LONG_HEADER, long_row("S01", tool="SEM-\u00e91"), long_row("S02")]) + "\r\n"
    f = _one(ingest_paths([write("bom.csv", bom + text.encode(encoding))], db=db))
    assert (f.status, f.rows_loaded, f.rows_rejected) == ("loaded", 2, 0)
    assert query(db, "SELECT metrology_tool FROM measurements ORDER BY site_id") == [
        ("SEM-\u00e91",),
        ("SEM-A1",),
    ]


def test_ingest_gzip_csv_and_folder_recursion(db, tmp_path, write):
    text = "\n".join([LONG_HEADER, long_row("S01"), long_row("S02")]) + "\n"
    write("a/b/x.csv.gz", gzip.compress(text.encode()))
    write("a/notes.md", "not an export")
    r = ingest_paths([tmp_path / "drop"], db=db)
    assert [(f.path.endswith("x.csv.gz"), f.rows_loaded) for f in r.files] == [(True, 2)]


def test_ingest_quoted_fields_and_crlf_and_blank_lines(db, write):
    rows = [LONG_HEADER, long_row("S01").replace("M1_CD", '"M1,CD"'), "", long_row("S02")]
    f = _one(ingest_paths([write("q.csv", "\r\n".join(rows) + "\r\n")], db=db))
    assert (f.rows_loaded, f.rows_rejected) == (2, 0)
    assert query(db, "SELECT recipe, _source_line FROM measurements ORDER BY site_id") == [
        ("M1,CD", 2),
        ("M1_CD", 4),
    ]


def test_ingest_same_bytes_twice_records_duplicate_and_loads_once(db, case):
    p = case("measurements/cdsem_long_v2.csv")
    first = _one(ingest_paths([p], db=db))
    again = _one(ingest_paths([p], db=db))
    assert again.status == "duplicate" and again.rows_loaded == 0
    assert again.message == f"same bytes as file {first.file_id}; nothing loaded"
    assert query(db, "SELECT count(*) FROM measurements") == [(5,)]
    assert query(db, "SELECT status FROM source_files ORDER BY file_id") == [("loaded",), ("duplicate",)]


def test_ingest_chunked_file_keeps_line_numbers_across_chunks(db, write):
    lines = [LONG_HEADER] + [long_row(f"S{i:04d}") for i in range(400)]
    lines[301] = long_row("S0300", value="-1")  # line 302
    f = _one(ingest_paths([write("big.csv", "\n".join(lines) + "\n")], db=db, chunk_bytes=4096))
    assert (f.rows_loaded, f.rows_rejected) == (399, 1)
    assert query(db, "SELECT line, value FROM rejects") == [(302, "-1")]
    assert query(db, "SELECT min(_source_line), max(_source_line) FROM measurements") == [(2, 401)]


def test_ingest_user_profile_with_preamble_aliases_ignored_columns_and_limits(db, write, tmp_path):
    prof = tmp_path / "profiles"
    prof.mkdir()
    (prof / "site_b.toml").write_text("""
name = "site_b_events"
kind = "tool_events"
format = "csv"
ignore = ["Operator"]

[csv]
delimiter = "|"
header_line = 3

[time]
format = "%Y/%m/%d %H:%M"
zone = "America/Chicago"

[columns]
tool = ["Tool", "EquipmentId"]
event_at = "When"
event_kind = "Kind"

[values.event_kind]
PM = "preventive_maintenance"
""")
    text = "Export of site B\nGenerated by the line log\nEquipmentId|When|Kind|Operator\nETX-09|2026/09/03 07:00|PM|op7\n"
    f = ingest_paths([write("events.txt", text)], db=db, profile_dirs=[prof]).files[0]
    assert (f.profile, f.rows_loaded, f.rows_rejected) == ("site_b_events", 1, 0)
    # IANA America/Chicago in September is CDT = UTC-5 -> 12:00 UTC
    assert query(db, "SELECT tool, event_at, event_kind, _source_line FROM tool_events") == [
        ("ETX-09", datetime(2026, 9, 3, 12, 0), "preventive_maintenance", 4)
    ]
