"""Export profiles: the shipped ones parse and cover DIALECTS.md; bad profiles fail with the file named."""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from ingest.profile import BUILTIN_DIR, detect_profile, load_profiles, parse_profile
from warehouse.errors import ProfileError

DIALECTS = Path(__file__).resolve().parents[2] / "demo_fab" / "DIALECTS.md"


def test_profiles_shipped_for_every_dialect_in_dialects_md():
    named = set(re.findall(r"^\| `(\w+)` \|", DIALECTS.read_text(), flags=re.M))
    shipped = {p.name for p in load_profiles() if not p.is_native}
    assert named == shipped


@pytest.mark.parametrize(
    "name,header",
    [
        (
            "cdsem_long_v2",
            "LotID,WaferID,Slot,Site,X_mm,Y_mm,Product,Layer,Stage,Parameter,Feature,Value_nm,MeasTime,"
            "Tool,Recipe,Repeat,SampleType",
        ),
        ("lot_history_csv", "lot,wafer,product,step,seq,tool,chamber,recipe,track_in,track_out"),
        ("reference_csv", "feature_id,layer,parameter,ref_value_A,ref_sigma_A,method,measured"),
        ("native:spec_limits", "product,layer,parameter,lsl,target,usl,unit,effective_from,effective_to"),
        ("native:tool_events", "tool,chamber,event_at,event_kind,note"),
    ],
)
def test_detect_profile_picks_the_dialect_from_the_header_in_dialects_md(name, header):
    # headers copied from demo_fab/DIALECTS.md (the contract with the demo's writer)
    assert header in DIALECTS.read_text()
    assert detect_profile(header.split(","), load_profiles(), fmt="csv", path="x.csv").name == name


def test_detect_profile_wide_header_uses_its_own_delimiter():
    header = "Lot;Wafer;Slot;SiteNo;PosX_um;PosY_um;Device;Level;CD_MID_um;CD_TOP_um;LWR_um;MeasDate;Equipment;Recipe"
    assert header in DIALECTS.read_text()
    profiles = load_profiles()
    p = detect_profile(lambda p: header.split(p.delimiter), profiles, fmt="csv", path="w.csv", shown=header)
    assert p.name == "cdsem_wide_v1"


def test_detect_profile_optional_native_columns_may_be_missing():
    assert detect_profile(
        ["tool", "event_at", "event_kind"], load_profiles(), fmt="csv", path="e.csv"
    ).name == ("native:tool_events")


def test_parse_profile_bad_toml_names_line():
    with pytest.raises(ProfileError) as e:
        parse_profile('name = "x"\nkind = \n', origin="p.toml")
    assert str(e.value).startswith("p.toml:2:8: profile is not valid TOML.")


@pytest.mark.parametrize(
    "text,message",
    [
        (
            'name = "x"\nkind = "wafers"\nformat = "csv"\n',
            'p.toml: unknown data kind (found "wafers", expected one of measurements, inspections, defect_counts, defects, '
            "process_history, tool_events, spec_limits, reference_values).\n  Fix: set kind to the canonical table the "
            "export fills.",
        ),
        (
            'name = "x"\nkind = "tool_events"\nformat = "csv"\n[columns]\ntool = "T"\n',
            'p.toml: profile does not supply required column "event_at" of tool_events (found "tool", expected tool, '
            "event_at, event_kind).\n  Fix: map it under [columns] or set it under [constants].",
        ),
        (
            'name = "x"\nkind = "measurements"\nformat = "csv"\n[columns]\nvalue = { source = "V", unit = "furlong" }\n',
            'p.toml: column "value" cannot take unit "furlong" (found "furlong", expected a length (nm, um, A, mm) or an '
            "area (cm2, mm2)).\n  Fix: fix the unit.",
        ),
        (
            'name = "x"\nkind = "tool_events"\nformat = "csv"\n[time]\nzone = "Mars/Olympus"\n',
            'p.toml: unknown time zone (found "Mars/Olympus", expected an IANA zone name such as Europe/Amsterdam).\n'
            "  Fix: use a name from the IANA time zone database.",
        ),
    ],
)
def test_parse_profile_mistakes_are_reported_with_the_fix(text, message):
    with pytest.raises(ProfileError) as e:
        parse_profile(text, origin="p.toml")
    assert str(e.value) == message


def test_builtin_profile_files_are_all_loaded():
    assert sorted(p.stem for p in BUILTIN_DIR.glob("*.toml")) == sorted(
        p.name for p in load_profiles() if not p.is_native
    )
