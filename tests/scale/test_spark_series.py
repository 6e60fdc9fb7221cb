"""The per-series function the Spark engine maps over groups, run directly on an Arrow table (no Spark)."""

from __future__ import annotations

from dataclasses import replace
from datetime import datetime, timedelta

import polars as pl
import pytest

from warehouse.errors import ConfigError
from warehouse.plan import parse_plan
from warehouse.spark_engine import _arrow_schema, check_entries, evaluate_series

PLAN = """
[[chart]]
name = "cd"
select = { layer = "M1_DEV", parameter = "cd_mid" }
statistic = "wafer_mean"
chart = "individuals"
rules = ["we1"]
"""


def _points(values, *, limit_version=1, shuffle=True):
    t0 = datetime(2026, 9, 1)
    n = len(values)
    frame = pl.DataFrame(
        {
            "chart": ["cd"] * n,
            "series_id": [7] * n,
            "layer": ["M1_DEV"] * n,
            "parameter": ["cd_mid"] * n,
            "process_tool": [None] * n,
            "chamber": [None] * n,
            "metrology_tool": [None] * n,
            "product": [None] * n,
            "lot_id": [f"L{i:02d}" for i in range(n)],
            "wafer_id": ["W1"] * n,
            "point_key": [f"L{i:02d}|W1|SEM1" for i in range(n)],
            "point_at": [t0 + timedelta(hours=i) for i in range(n)],
            "value": values,
            "n": [9] * n,
            "vmin": values,
            "vmax": values,
            "area_cm2": [None] * n,
            "product_any": ["P1"] * n,
            "lsl": [None] * n,
            "usl": [None] * n,
            "limit_version": [limit_version] * n,
            "center": [50.0] * n,
            "lim_sigma": [1.0] * n,
            "n_ref": [None] * n,
            "overdispersion": [None] * n,
        },
        schema_overrides={c: pl.String for c in ("process_tool", "chamber", "metrology_tool", "product")}
        | {c: pl.Float64 for c in ("area_cm2", "lsl", "usl", "n_ref", "overdispersion")},
    )
    return (frame.reverse() if shuffle else frame).to_arrow()


def test_evaluate_series_point_beyond_three_sigma_signals_we1_at_its_position():
    # Western Electric (1956) rule 1: one point beyond 3 sigma; centre 50, sigma 1 -> 53.5 signals, 52.9 not
    entries = {e.name: e for e in parse_plan(PLAN).entries}
    out = pl.from_arrow(evaluate_series(entries, _points([50.0, 52.9, 53.5, 49.0])))
    assert out.select("rule", "point_seq", "point_key", "value", "limit_version", "series_id").rows() == [
        ("we1", 3, "L02|W1|SEM1", 53.5, 1, 7)
    ]


def test_evaluate_series_without_frozen_limits_runs_no_control_rule():
    # common practice: no Phase I limits yet, no control-rule signal (the out-of-spec check would still run)
    entries = {e.name: e for e in parse_plan(PLAN).entries}
    out = evaluate_series(entries, _points([50.0, 60.0], limit_version=None))
    assert out.num_rows == 0
    assert out.schema == _arrow_schema()


def test_check_entries_unknown_statistic_is_refused_with_its_name():
    e = replace(parse_plan(PLAN).entries[0], statistic="wafer_median")
    with pytest.raises(ConfigError, match=r"cd \(wafer_median\)"):
        check_entries([e])
