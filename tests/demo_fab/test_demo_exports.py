"""The demo's exports against the dialect contract (demo_fab/DIALECTS.md) and truth.json's structure."""

import csv
import io
import json
import re
from pathlib import Path

import polars as pl
import pytest

DIALECTS = Path(__file__).resolve().parents[2] / "demo_fab" / "DIALECTS.md"


def _section(name: str) -> str:
    text = DIALECTS.read_text(encoding="utf-8")
    m = re.search(rf"^## `?{re.escape(name)}`?\n(.*?)(?=^## |\Z)", text, flags=re.S | re.M)
    assert m, f"DIALECTS.md has no section {name}"
    return m.group(1)


def _header_from_doc(name: str, sep: str = ",") -> str:
    """The first backticked line of a section with at least five fields: the documented header."""
    for chunk in re.findall(r"`([^`\n]+)`", _section(name)):
        if chunk.count(sep) >= 4:
            return chunk
    raise AssertionError(f"no header in section {name}")


def _files(root: Path, pattern: str) -> list[Path]:
    found = sorted(root.glob(pattern))
    assert found, pattern
    return found


def _first_line(path: Path, encoding: str = "utf-8") -> str:
    with path.open("rb") as fh:
        return fh.readline().decode(encoding).rstrip("\r\n")


def test_exports_long_cdsem_files_have_the_documented_header(small_demo):
    want = _header_from_doc("cdsem_long_v2")
    for p in _files(small_demo, "exports/cdsem_long/*/*.csv"):
        assert _first_line(p) == want, p


def test_exports_wide_cdsem_files_have_the_documented_header_and_encoding(small_demo):
    want = _header_from_doc("cdsem_wide_v1", sep=";")
    files = _files(small_demo, "exports/cdsem_wide/*/*.csv")
    for p in files:
        assert _first_line(p, "cp1252") == want, p
    raw = files[0].read_bytes()
    with pytest.raises(UnicodeDecodeError):
        raw.decode("utf-8")  # the recipe carries a cp1252 "µ" (0xB5)
    row = raw.decode("cp1252").splitlines()[1].split(";")
    assert re.fullmatch(r"\d{2}\.\d{2}\.\d{4} \d{2}:\d{2}:\d{2}", row[11])
    assert re.fullmatch(r"0,\d{6}", row[8])  # a CD in µm with a decimal comma


def test_exports_lot_history_reference_and_native_headers(small_demo):
    assert _first_line(_files(small_demo, "exports/lot_history/*.csv")[0]) == _header_from_doc(
        "lot_history_csv"
    )
    assert _first_line(small_demo / "exports/reference/reference_values.csv") == _header_from_doc(
        "reference_csv"
    )
    native = re.findall(r"`([a-z_,]+)`", _section("lotline native"))
    assert _first_line(small_demo / "exports/spec_limits.csv") in native
    assert _first_line(small_demo / "exports/tool_events.csv") in native


def test_exports_parquet_inspections_have_the_documented_columns(small_demo):
    want = re.findall(r"`([A-Z_0-9]+)`", _section("inspection_parquet"))
    truth = json.loads((small_demo / "truth.json").read_text())
    failed = {f["file"] for f in truth["planned_failed_files"]}
    files = [
        p
        for p in _files(small_demo, "exports/inspection_parquet/*.parquet")
        if str(p.relative_to(small_demo)) not in failed
    ]
    frame = pl.read_parquet(files[0])
    assert frame.columns == [w for w in want if w not in ("PROD", "MON", "STD")]
    assert frame.schema["INSPECT_TIME"] == pl.Datetime("us")
    for f in failed:
        with pytest.raises((pl.exceptions.PolarsError, OSError)):
            pl.read_parquet(small_demo / f)


def test_exports_jsonl_inspections_have_the_documented_keys(small_demo):
    doc = _section("inspection_jsonl")
    keys = re.findall(r'"([a-z_0-9]+)":', doc.split("```json")[1].split("```")[0])
    top = [k for k in dict.fromkeys(keys) if k not in ("class", "bin", "n", "id", "x_um", "y_um", "size_nm")]
    seen_defects = False
    for p in _files(small_demo, "exports/inspection_jsonl/*.jsonl"):
        for line in p.read_text(encoding="utf-8").splitlines():
            rec = json.loads(line)
            have = list(rec)
            assert have[: len(top) - 1] == [k for k in top if k != "defects"], have
            assert rec["kind"] in ("PROD", "MON", "STD")
            assert re.fullmatch(r"\d{4}-\d{2}-\d{2}T\d{2}:\d{2}:\d{2}[+-]\d{2}:\d{2}", rec["time"])
            if "defects" in rec:
                seen_defects = True
                assert set(rec["defects"][0]) == {"id", "x_um", "y_um", "size_nm", "class"}
    assert seen_defects


def test_exports_long_times_are_utc_and_codes_are_documented(small_demo):
    doc = _section("cdsem_long_v2")
    params = set(re.findall(r"`([A-Z_]+)`", doc.split("`Parameter`:")[1].split("\n-")[0]))
    kinds = {"PROD", "MON", "REPEAT", "REF"}
    p = _files(small_demo, "exports/cdsem_long/SEM-01/*.csv")[0]
    rows = list(csv.DictReader(io.StringIO(p.read_text(encoding="utf-8"))))
    assert {r["Parameter"] for r in rows} <= params
    assert {r["SampleType"] for r in rows} <= kinds
    assert {r["Stage"] for r in rows} <= {"DEV", "ETCH"}
    assert all(re.fullmatch(r"\d{4}-\d{2}-\d{2}T\d{2}:\d{2}:\d{2}Z", r["MeasTime"]) for r in rows)


# --------------------------------------------------------------------------------------- truth

FAULT_KEYS = {
    "id",
    "kind",
    "layer",
    "parameter",
    "start",
    "end",
    "magnitude",
    "unit",
    "responsible",
    "lots",
    "series_hint",
    "description",
}
RESPONSIBLE_KEYS = {"process_tool", "chamber", "metrology_tool", "inspection_tool"}
REQUIRED_KINDS = {
    "chamber_shift",
    "slow_drift",
    "bake_plate_edge",
    "metrology_offset",
    "defect_burst",
    "scratch",
    "tool_stops_reporting",
    "corrected_reexport",
}
ISO_Z = r"\d{4}-\d{2}-\d{2}T\d{2}:\d{2}:\d{2}Z"


def test_truth_json_has_the_documented_structure(small_demo):
    truth = json.loads((small_demo / "truth.json").read_text())
    assert {
        "faults",
        "planned_rejects",
        "planned_failed_files",
        "corrected_reexports",
        "expected_rows",
    } <= set(truth)
    kinds = set()
    for f in truth["faults"]:
        assert FAULT_KEYS <= set(f), f["id"]
        assert set(f["responsible"]) == RESPONSIBLE_KEYS
        assert re.fullmatch(ISO_Z, f["start"]) and re.fullmatch(ISO_Z, f["end"])
        assert f["start"] <= f["end"]
        assert any(f["responsible"].values()), f["id"]
        kinds.add(f["kind"])
    assert REQUIRED_KINDS <= kinds
    assert len({f["id"] for f in truth["faults"]}) == len(truth["faults"])
    for r in truth["planned_rejects"]:
        assert set(r) == {"file", "line", "column", "value", "reason_contains", "kind"}
        assert (small_demo / r["file"]).is_file()
        assert r["line"] >= 2
    for f in truth["planned_failed_files"]:
        assert (small_demo / f["file"]).is_file()
    rx = truth["corrected_reexports"][0]
    assert (small_demo / rx["original_file"]).is_file() and (small_demo / rx["corrected_file"]).is_file()


def test_truth_planned_rejects_point_at_the_bad_lines(small_demo):
    truth = json.loads((small_demo / "truth.json").read_text())
    kinds = set()
    for r in truth["planned_rejects"]:
        lines = (small_demo / r["file"]).read_text(encoding="utf-8").splitlines()
        bad = next(csv.DictReader([lines[0], lines[r["line"] - 1]]))
        kinds.add(r["kind"])
        if r["kind"] == "negative_value":
            assert float(bad["Value_nm"]) < 0 and bad["Value_nm"] == r["value"]
        elif r["kind"] == "missing_lot":
            assert bad["LotID"] == ""
        elif r["kind"] == "duplicate_row":
            assert lines[r["line"] - 1] == lines[r["line"] - 2]
        else:
            assert bad["Value_nm"] == r["value"] and "," in r["value"]
    assert kinds == {"negative_value", "missing_lot", "duplicate_row", "decimal_comma"}


def test_corrected_reexport_differs_from_the_original_by_the_planned_offset(small_demo):
    truth = json.loads((small_demo / "truth.json").read_text())
    rx = truth["corrected_reexports"][0]
    key = ["LotID", "WaferID", "Layer", "Parameter", "Site", "MeasTime"]
    orig = pl.read_csv(small_demo / rx["original_file"], infer_schema=False).filter(
        pl.col("LotID") == rx["lot"]
    )
    corr = pl.read_csv(small_demo / rx["corrected_file"], infer_schema=False)
    assert corr.height == rx["rows"] == orig.filter(pl.col("Layer") == rx["layer"]).height
    both = orig.join(corr, on=key, suffix="_c")
    diff = both["Value_nm"].cast(pl.Float64) - both["Value_nm_c"].cast(pl.Float64)
    assert diff.round(6).unique().to_list() == [rx["wrong_offset_nm"]]
