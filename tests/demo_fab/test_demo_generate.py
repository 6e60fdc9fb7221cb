"""The demo generator: determinism, and the simulated statistics against the configured ones.

Expected values come from the configuration (``DemoConfig``, ``demo_fab.fab``) and from independent
estimators written here with numpy, never from running the generator's own code for the answer.
"""

import hashlib
import math
from pathlib import Path

import numpy as np
import polars as pl
import pytest

from demo_fab import fab as fabmod
from demo_fab import generate_demo
from demo_fab.config import DemoConfig


def _digest(root: Path) -> dict[str, str]:
    return {
        str(p.relative_to(root)): hashlib.sha256(p.read_bytes()).hexdigest()
        for p in sorted(root.rglob("*"))
        if p.is_file()
    }


def test_generate_demo_same_seed_gives_same_bytes(tmp_path):
    a = generate_demo(tmp_path / "a", days=8, seed=11)
    b = generate_demo(tmp_path / "b", days=8, seed=11)
    da, db = _digest(tmp_path / "a"), _digest(tmp_path / "b")
    assert len(da) > 50
    assert da == db
    assert a.rows == b.rows


def test_generate_demo_different_seed_changes_the_data(tmp_path):
    generate_demo(tmp_path / "a", days=8, seed=11)
    generate_demo(tmp_path / "b", days=8, seed=12)
    da, db = _digest(tmp_path / "a"), _digest(tmp_path / "b")
    shared = set(da) & set(db)
    changed = [k for k in shared if da[k] != db[k] and "cdsem" in k]
    assert len(changed) > 0.9 * len([k for k in shared if "cdsem" in k])


# ---------------------------------------------------------------------------- nested variance


def _nested_anova(y: np.ndarray, group: np.ndarray) -> dict[str, float]:
    """Method-of-moments variance components of a balanced three-stage nested random design.

    ``y`` has shape (lots, wafers, sites); ``group`` gives each lot's fixed group (product, process
    chamber, CD-SEM), whose means are removed at the lot level. Expected mean squares, Montgomery,
    Design and Analysis of Experiments, ch. 14 (nested designs; the m-stage nested design, EMS table):
        E[MS_sites]  = s_e^2
        E[MS_wafers] = s_e^2 + n s_w^2
        E[MS_lots]   = s_e^2 + n s_w^2 + b n s_L^2
    """
    a, b, n = y.shape
    wafer_mean = y.mean(axis=2)
    lot_mean = wafer_mean.mean(axis=1)
    _, gi = np.unique(group, return_inverse=True)
    g = gi.max() + 1
    gmean = np.bincount(gi, weights=lot_mean) / np.bincount(gi)
    ss_e = ((y - wafer_mean[:, :, None]) ** 2).sum()
    ss_w = n * ((wafer_mean - lot_mean[:, None]) ** 2).sum()
    ss_l = b * n * ((lot_mean - gmean[gi]) ** 2).sum()
    df_e, df_w, df_l = a * b * (n - 1), a * (b - 1), a - g
    ms_e, ms_w, ms_l = ss_e / df_e, ss_w / df_w, ss_l / df_l
    return {
        "site": ms_e,
        "wafer": (ms_w - ms_e) / n,
        "lot": (ms_l - ms_w) / (b * n),
        "df_e": df_e,
        "df_w": df_w,
        "df_l": df_l,
        "b": b,
        "n": n,
    }


def _se(est: dict[str, float], s_e2: float, s_w2: float, s_l2: float) -> dict[str, float]:
    """Normal-theory standard errors: Var(MS) = 2 E[MS]^2 / df (Montgomery ch. 14, from memory)."""
    b, n = est["b"], est["n"]
    e_e, e_w, e_l = s_e2, s_e2 + n * s_w2, s_e2 + n * s_w2 + b * n * s_l2
    v_e = 2 * e_e**2 / est["df_e"]
    v_w = 2 * e_w**2 / est["df_w"]
    v_l = 2 * e_l**2 / est["df_l"]
    return {"site": math.sqrt(v_e), "wafer": math.sqrt(v_w + v_e) / n, "lot": math.sqrt(v_l + v_w) / (b * n)}


def _balanced_layer(data, layer: fabmod.MeasuredLayer, tools: list[str]):
    cfg = data.config
    m = data.measurements.filter(
        (pl.col("layer") == layer.name)
        & (pl.col("parameter") == "cd_mid")
        & (pl.col("sample_kind") == "production")
        & pl.col("metrology_tool").is_in(tools)
    )
    # a lot measured on two CD-SEMs would count its lot effect twice: keep lots seen by one tool only
    one_tool = (
        m.group_by("lot_id").agg(pl.col("metrology_tool").n_unique().alias("k")).filter(pl.col("k") == 1)
    )
    m = m.join(one_tool.select("lot_id"), on="lot_id")
    complete = (
        m.group_by("lot_id")
        .agg(pl.len().alias("n"), pl.col("wafer_id").n_unique().alias("w"))
        .filter((pl.col("n") == 27) & (pl.col("w") == 3))
    )
    m = m.join(complete.select("lot_id"), on="lot_id")
    hist = data.process_history.filter(pl.col("step") == layer.step).select(
        "lot_id", "process_tool", "chamber"
    )
    m = m.join(hist, on="lot_id").sort("lot_id", "wafer_id", "site_id")
    # remove the configured radial signature, computed here from the site coordinates
    r = np.hypot(m["x_mm"].to_numpy(), m["y_mm"].to_numpy())
    y = m["value"].to_numpy() - layer.radial_nm * (r / 150.0) ** 2
    lots = m["lot_id"].unique(maintain_order=True).len()
    y = y.reshape(lots, 3, 9)
    first = m.gather_every(27)
    group = (
        first["product"]
        + "|"
        + first["process_tool"]
        + "|"
        + first["chamber"]
        + "|"
        + first["metrology_tool"]
    ).to_numpy()
    prec = {s.tool: s.precision_nm for s in cfg.fab.cdsems}
    meas_var = float(np.mean([prec[t] ** 2 for t in m["metrology_tool"].to_list()]))
    return y, group, meas_var


def _fault_free_layers(data):
    touched = {f.layer for f in data.faults if f.process_tool is not None}
    return [m for m in data.config.fab.layers if m.name not in touched]


def _clean_tools(data, cell: str) -> list[str]:
    faulty = {f.metrology_tool for f in data.faults if f.kind in ("metrology_offset", "metrology_drift")}
    return [s.tool for s in data.config.fab.cdsems if s.cell == cell and s.tool not in faulty]


def test_simulate_nested_variance_components_match_configured(small_data):
    layers = _fault_free_layers(small_data)
    assert len(layers) >= 6
    checked = 0
    for layer in layers:
        tools = _clean_tools(small_data, "litho" if layer.stage == "develop" else "etch")
        y, group, meas_var = _balanced_layer(small_data, layer, tools)
        est = _nested_anova(y, group)
        want = {
            "site": layer.sigma_site_nm**2 + meas_var,
            "wafer": layer.sigma_wafer_nm**2,
            "lot": layer.sigma_lot_nm**2,
        }
        se = _se(est, want["site"], want["wafer"], want["lot"])
        for level in ("site", "wafer", "lot"):
            assert abs(est[level] - want[level]) < 4 * se[level], (
                layer.name,
                level,
                est[level],
                want[level],
                se[level],
            )
            checked += 1
    assert checked == 3 * len(layers)


def test_nested_anova_estimator_detects_a_wrong_configuration(small_data):
    # the check above can fail: against a lot sigma 1.5x the configured one it does
    layer = next(m for m in _fault_free_layers(small_data) if m.stage == "develop")
    y, group, meas_var = _balanced_layer(small_data, layer, _clean_tools(small_data, "litho"))
    est = _nested_anova(y, group)
    wrong = (1.5 * layer.sigma_lot_nm) ** 2
    se = _se(est, layer.sigma_site_nm**2 + meas_var, layer.sigma_wafer_nm**2, wrong)
    assert abs(est["lot"] - wrong) > 4 * se["lot"]


# ------------------------------------------------------------------------------------- defects


def test_inspected_area_is_the_300mm_wafer_with_3mm_edge_exclusion():
    # common practice; computed: pi * (150 mm - 3 mm)^2 = 678.87 cm^2
    assert fabmod.INSPECTED_AREA_CM2 == pytest.approx(math.pi * 14.7**2)
    assert round(fabmod.INSPECTED_AREA_CM2, 2) == 678.87


def test_simulate_defect_density_matches_configured_d0(small_data):
    cfg = small_data.config
    insp = small_data.inspections.filter(pl.col("sample_kind") == "production")
    degraded = {f.inspection_tool for f in small_data.faults if f.kind == "capture_loss"}
    for step in cfg.fab.inspections:
        if step.name in {f.layer for f in small_data.faults}:
            continue
        rows = insp.filter((pl.col("layer") == step.name) & ~pl.col("inspection_tool").is_in(list(degraded)))
        counts = rows["defect_count"].to_numpy()
        mu = step.d0_per_cm2 * fabmod.INSPECTED_AREA_CM2
        # negative binomial: variance mu + mu^2 / alpha
        se = math.sqrt((mu + mu**2 / step.alpha) / counts.size)
        assert abs(counts.mean() - mu) < 4 * se, (step.name, counts.mean(), mu)
        assert counts.var(ddof=1) > 2 * mu  # overdispersed, unlike Poisson


def test_simulate_scratch_defects_lie_on_one_line(small_data):
    f = next(f for f in small_data.faults if f.kind == "scratch")
    lot = small_data.fault_lots[f.id][0]
    d = small_data.defects.filter(
        (pl.col("lot_id") == lot) & (pl.col("layer") == f.layer) & (pl.col("defect_class") == "scratch")
    )
    assert d.height >= f.magnitude
    x, y = d["x_mm"].to_numpy(), d["y_mm"].to_numpy()
    # principal axis of the points: the spread across the line is tiny next to the spread along it
    ev = np.linalg.eigvalsh(np.cov(np.vstack([x, y])))
    assert ev[0] < 0.01 * ev[1]


def test_simulate_standard_wafer_capture_falls_on_degraded_tool_only(small_data):
    f = next(f for f in small_data.faults if f.kind == "capture_loss")
    std = small_data.inspections.filter(pl.col("sample_kind") == "standard_defect")
    late = pl.col("inspected_at") >= f.end - (f.end - f.start) / 3
    early = pl.col("inspected_at") < f.start
    by = (
        std.group_by("inspection_tool", late.alias("late"))
        .agg(pl.col("defect_count").mean())
        .sort("inspection_tool")
    )
    early_b2 = std.filter(early & (pl.col("inspection_tool") == f.inspection_tool))["defect_count"].mean()
    late_b2 = std.filter(late & (pl.col("inspection_tool") == f.inspection_tool))["defect_count"].mean()
    assert late_b2 < 0.9 * early_b2, by
    other = std.filter(pl.col("inspection_tool") != f.inspection_tool)
    assert abs(other.filter(late)["defect_count"].mean() - other.filter(~late)["defect_count"].mean()) < 10


# ------------------------------------------------------------------------------------ metrology


def test_simulate_monitor_wafer_shows_the_metrology_offset(small_data):
    f = next(f for f in small_data.faults if f.kind == "metrology_offset")
    mon = small_data.measurements.filter(
        (pl.col("sample_kind") == "monitor") & (pl.col("metrology_tool") == f.metrology_tool)
    )
    before = mon.filter(pl.col("measured_at") < f.start)["value"].mean()
    after = mon.filter(pl.col("measured_at") >= f.start)["value"].mean()
    assert after - before == pytest.approx(f.magnitude, abs=0.25)


def test_simulate_resist_repeats_shrink_under_the_beam(small_data):
    cfg = small_data.config
    rep = (
        small_data.measurements.filter(pl.col("sample_kind") == "repeat_study")
        .group_by("repeat")
        .agg(pl.col("value").mean())
        .sort("repeat")
    )
    v = rep["value"].to_numpy()
    want = cfg.shrink_amplitude_nm * (1 - math.exp(-(cfg.repeat_study_repeats - 1) / cfg.shrink_tau))
    assert v[0] - v[-1] == pytest.approx(want, abs=0.2)
    assert np.all(np.diff(v[:4]) < 0)


def test_simulate_stale_cdsem_exports_nothing_after_its_stop(small_data):
    f = next(f for f in small_data.faults if f.kind == "tool_stops_reporting")
    m = small_data.measurements.filter(pl.col("metrology_tool") == f.metrology_tool)
    assert m.height > 0
    assert m["measured_at"].max() < f.start


def test_simulate_chamber_shift_follows_a_maintenance_event(small_data):
    f = next(f for f in small_data.faults if f.kind == "chamber_shift")
    ev = small_data.tool_events.filter(
        (pl.col("tool") == f.process_tool)
        & (pl.col("chamber") == f.chamber)
        & (pl.col("event_kind") == "preventive_maintenance")
    )
    gaps = [(f.start - t).total_seconds() / 3600 for t in ev["event_at"].to_list()]
    assert any(0 < g <= 6 for g in gaps)


def test_simulate_lot_and_wafer_ids_follow_the_fab_pattern(small_data):
    m = small_data.measurements.filter(pl.col("sample_kind") == "production")
    assert m["lot_id"].str.contains(r"^HC\d{4}-\d{3}$").all()
    assert (m["wafer_id"].str.slice(0, 10) == m["lot_id"]).all()
    assert m["wafer_id"].str.contains(r"^HC\d{4}-\d{3}-(0[1-9]|1\d|2[0-5])$").all()
    sites = m.group_by("lot_id", "wafer_id", "layer", "metrology_tool").agg(
        pl.col("site_id").n_unique().alias("n")
    )
    assert set(sites["n"].unique().to_list()) <= {9, 13}
    per_day = (
        m.filter(pl.col("layer") == "GATE_DEV")
        .group_by(pl.col("measured_at").dt.date())
        .agg(pl.col("lot_id").n_unique().alias("lots"))
    )
    assert 20 <= per_day["lots"].median() <= 60


def test_config_defaults_match_the_documented_sampling():
    cfg = DemoConfig()
    assert (cfg.days, cfg.seed, cfg.lots_per_day, cfg.wafers_sampled) == (60, 7, (25, 55), 3)
    assert len(cfg.fab.layers) >= 10
    assert len(cfg.fab.route) >= 8
    assert len(cfg.fab.cdsems) >= 4 and len(cfg.fab.inspection_tools) >= 2
    assert len(fabmod.SITES_9) == 9 and len(fabmod.SITES_13) == 13
