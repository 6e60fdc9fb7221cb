"""Nested variance components against the NIST furnace ANOVA table; the nested-limits trap."""

from __future__ import annotations

import json
from pathlib import Path

import polars as pl
import pytest

from spc.variance import nested_components

REF = Path(__file__).resolve().parents[1] / "data/reference"
EXAMPLES = json.loads((REF / "worked_examples/examples.json").read_text())


def test_nested_components_match_nist_furnace_table_to_every_printed_digit():
    pub = EXAMPLES["furnace_nested_anova_nist_3_5_1"]["published"]  # NIST/SEMATECH e-Handbook §3.5.1
    furnace = pl.read_csv(REF / "nist/furnace_oxide_thickness.csv")
    vc = nested_components(furnace, ["run", "zone"], "thickness_angstrom")
    assert vc.df == {"run": 20, "zone": 63, "within": 84} == {"run": pub["df"]["run"],
        "zone": pub["df"]["zone_in_run"], "within": pub["df"]["within"]}
    assert round(vc.mean_squares["run"], 2) == pub["mean_squares"]["run"]
    assert round(vc.mean_squares["zone"], 3) == pub["mean_squares"]["zone_in_run"]
    assert round(vc.mean_squares["within"], 3) == pub["mean_squares"]["within"]
    assert round(vc.components["run"], 5) == pub["variance_components"]["run"]
    assert round(vc.components["zone"], 5) == pub["variance_components"]["zone_in_run"]
    assert round(vc.components["within"], 5) == pub["variance_components"]["within"]


def test_nested_components_lithography_flags_within_wafer_limits_as_too_tight():
    # Domain notes (NIST e-Handbook §6.6.1 data): most variance lies between cassettes, so X-bar limits
    # from within-wafer sigma are far too tight for wafer and cassette means.
    litho = pl.read_csv(REF / "nist/lithography_linewidth.csv")
    vc = nested_components(litho, ["cassette", "wafer"], "linewidth", residual="site")
    assert vc.too_tight == {"cassette": True, "wafer": True}
    assert vc.sigma_for["wafer"] > 1.5 * vc.naive_sigma_for["wafer"]


def test_nested_components_unbalanced_design_is_refused():
    df = pl.DataFrame({"lot": ["a", "a", "b"], "v": [1.0, 2.0, 3.0]})
    with pytest.raises(ValueError, match="balanced design"):
        nested_components(df, ["lot"], "v")
