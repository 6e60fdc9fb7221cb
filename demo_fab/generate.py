"""Seeded, deterministic simulation of the demo fab into canonical polars frames.

``simulate(cfg)`` runs lots through the route, measures them, inspects them, runs the metrology
monitors and studies, and applies the faults of ``faults.plan_faults``. Everything is drawn from one
``numpy.random.default_rng(cfg.seed)`` in a fixed order and vectorised over lots, wafers and sites.
The frames carry the canonical column names of ``warehouse.schema`` (without lineage) and hold what the
exports carry once the planned bad rows are set aside: the expected warehouse content.
"""

from __future__ import annotations

import datetime as dt
import math
from dataclasses import dataclass, field

import numpy as np
import polars as pl

from demo_fab import fab as fabmod
from demo_fab.config import DemoConfig
from demo_fab.faults import Fault, plan_faults

DAY_S = 86400.0
HOUR_S = 3600.0

ENG_PRODUCT = "ENG"
"""Product name of engineering wafers (monitor, repeat-study, reference and standard-defect wafers)."""
MONITOR_LOT, REPEAT_LOT, REFERENCE_LOT, STANDARD_LOT = "HCMON-G1", "HCRPT-R1", "HCREF-A1", "HCSTD-01"
STANDARD_LAYER = "STD_CHECK"

MEASUREMENT_COLUMNS = (
    "lot_id",
    "wafer_id",
    "slot",
    "site_id",
    "x_mm",
    "y_mm",
    "product",
    "layer",
    "stage",
    "parameter",
    "feature",
    "value",
    "unit",
    "measured_at",
    "metrology_tool",
    "recipe",
    "repeat",
    "sample_kind",
)


@dataclass
class DemoData:
    """The simulated fab: canonical frames plus what the faults touched."""

    config: DemoConfig
    faults: tuple[Fault, ...]
    lots: pl.DataFrame
    process_history: pl.DataFrame
    measurements: pl.DataFrame
    inspections: pl.DataFrame
    defect_counts: pl.DataFrame
    defects: pl.DataFrame
    tool_events: pl.DataFrame
    spec_limits: pl.DataFrame
    reference_values: pl.DataFrame
    fault_lots: dict[str, list[str]] = field(default_factory=dict)
    fault_times: dict[str, tuple[dt.datetime, dt.datetime]] = field(default_factory=dict)
    reexport: dict[str, object] = field(default_factory=dict)
    defect_inspections: set[tuple[str, str, str, dt.datetime]] = field(default_factory=set)


def _us(cfg: DemoConfig, t_s: np.ndarray) -> pl.Series:
    """Seconds since the window start -> UTC naive datetimes, whole seconds."""
    base = int((cfg.start - dt.datetime(1970, 1, 1)).total_seconds()) * 1_000_000
    return pl.Series(base + np.round(t_s).astype(np.int64) * 1_000_000).cast(pl.Datetime("us"))


def _secs(cfg: DemoConfig, when: dt.datetime) -> float:
    return (when - cfg.start).total_seconds()


def _fault(faults: tuple[Fault, ...], kind: str) -> Fault:
    return next(f for f in faults if f.kind == kind)


def _fall_back_nudge(cfg: DemoConfig, t_s: np.ndarray) -> np.ndarray:
    """Move times out of the ambiguous local hour of the autumn clock change (wide exports drop the offset).

    Europe/Amsterdam goes from CEST to CET on the last Sunday of October at 01:00 UTC; local wall times
    02:00-03:00 then occur twice, which UTC 00:00-02:00 of that day maps to.
    """
    out = t_s.copy()
    for year in range(cfg.start.year, cfg.end.year + 1):
        last = dt.datetime(year, 10, 31)
        sunday = last - dt.timedelta(days=(last.weekday() + 1) % 7)
        lo = _secs(cfg, sunday)
        hit = (out >= lo) & (out < lo + 2 * HOUR_S)
        out[hit] += 2 * HOUR_S
    return out


# ------------------------------------------------------------------------------------------------ lots


@dataclass
class _Lots:
    ids: np.ndarray
    product: np.ndarray
    qual: np.ndarray
    start_s: np.ndarray
    track_in: np.ndarray  # (n, steps)
    track_out: np.ndarray
    tool: np.ndarray  # (n, steps) tool names
    chamber: np.ndarray
    wafers: np.ndarray  # (n, wafers_sampled) wafer numbers 1..25
    slots: np.ndarray


_PROC_H = {"litho": 1.5, "etch": 2.0, "dep": 3.0, "cmp": 1.5}


def _simulate_lots(cfg: DemoConfig, rng: np.random.Generator) -> _Lots:
    lo, hi = cfg.lots_per_day
    n_days = cfg.lead_days + cfg.days
    per_day = rng.integers(lo, hi + 1, size=n_days)
    day = np.repeat(np.arange(-cfg.lead_days, cfg.days), per_day)
    start_s = np.sort((day + rng.random(day.size)) * DAY_S)
    n = start_s.size
    # lot ids: HC + ISO year (2 digits) + ISO week of the start + "-" + sequence within that week
    week_off = np.floor(start_s / (7 * DAY_S)).astype(np.int64)
    uniq = np.unique(week_off)
    labels = {}
    for w in uniq:  # one iteration per week
        y, wk, _ = (cfg.start + dt.timedelta(weeks=int(w))).isocalendar()
        labels[int(w)] = f"{fabmod.LOT_PREFIX}{y % 100:02d}{wk:02d}"
    first = np.searchsorted(week_off, week_off, side="left")
    seq = np.arange(n) - first + 1
    prefix = np.array([labels[int(w)] for w in week_off])
    ids = np.char.add(np.char.add(prefix, "-"), np.char.zfill(seq.astype(str), 3))
    products = np.array(list(cfg.fab.products))
    product = products[rng.choice(len(products), size=n, p=np.array(list(cfg.fab.products.values())))]
    qual = rng.random(n) < cfg.qual_lot_fraction
    route = cfg.fab.route
    steps = len(route)
    proc = np.array([_PROC_H[s.kind] for s in route]) * HOUR_S
    dur = proc[None, :] * rng.uniform(0.8, 1.2, size=(n, steps))
    queue = rng.gamma(2.0, 2.5 * HOUR_S, size=(n, steps))
    track_in = np.empty((n, steps))
    track_out = np.empty((n, steps))
    t = start_s.copy()
    for k in range(steps):  # one iteration per route step
        track_in[:, k] = t + queue[:, k]
        track_out[:, k] = track_in[:, k] + dur[:, k]
        t = track_out[:, k]
    tool = np.empty((n, steps), dtype=object)
    chamber = np.empty((n, steps), dtype=object)
    for k, s in enumerate(route):
        tool[:, k] = np.array(s.tools, dtype=object)[rng.integers(0, len(s.tools), size=n)]
        chamber[:, k] = np.array(s.chambers, dtype=object)[rng.integers(0, len(s.chambers), size=n)]
    wafers = np.sort(
        rng.random((n, fabmod.WAFERS_PER_LOT)).argsort(axis=1)[:, : cfg.wafers_sampled] + 1, axis=1
    )
    shift = np.where(rng.random(n) < cfg.sorter_fraction, rng.integers(1, fabmod.WAFERS_PER_LOT, size=n), 0)
    slots = (wafers - 1 + shift[:, None]) % fabmod.WAFERS_PER_LOT + 1
    return _Lots(ids, product, qual, start_s, track_in, track_out, tool, chamber, wafers, slots)


def _process_history(cfg: DemoConfig, lots: _Lots) -> pl.DataFrame:
    n, steps = lots.track_in.shape
    end_s = cfg.days * DAY_S
    li = np.repeat(np.arange(n), steps)
    si = np.tile(np.arange(steps), n)
    keep = lots.track_in.ravel() < end_s
    li, si = li[keep], si[keep]
    names = np.array([s.name for s in cfg.fab.route])
    t_out = lots.track_out[li, si]
    ended = t_out < end_s
    frame = pl.DataFrame(
        {
            "lot_id": lots.ids[li],
            "wafer_id": pl.Series([None] * li.size, dtype=pl.String),
            "product": lots.product[li],
            "step": names[si],
            "step_seq": (si + 1).astype(np.int64),
            "process_tool": lots.tool[li, si].astype(str),
            "chamber": lots.chamber[li, si].astype(str),
        }
    )
    return frame.with_columns(
        recipe=pl.col("step") + "_" + pl.col("product"),
        started_at=_us(cfg, lots.track_in[li, si]),
        ended_at=pl.when(pl.Series(ended)).then(_us(cfg, t_out)).otherwise(None),
    ).sort("started_at", "lot_id", "step_seq")


# ---------------------------------------------------------------------------------------- measurements

_SITE_X = np.array([s.x_mm for s in fabmod.SITES_13])
_SITE_Y = np.array([s.y_mm for s in fabmod.SITES_13])


def _frame(cols: dict[str, object]) -> pl.DataFrame:
    return pl.DataFrame(cols).select(
        pl.col("lot_id").cast(pl.String),
        pl.col("wafer_id").cast(pl.String),
        pl.col("slot").cast(pl.Int64),
        pl.col("site_id").cast(pl.String),
        pl.col("x_mm").cast(pl.Float64),
        pl.col("y_mm").cast(pl.Float64),
        pl.col("product").cast(pl.String),
        pl.col("layer").cast(pl.String),
        pl.col("stage").cast(pl.String),
        pl.col("parameter").cast(pl.String),
        pl.col("feature").cast(pl.String),
        pl.col("value").cast(pl.Float64),
        pl.col("unit").cast(pl.String),
        pl.col("measured_at"),
        pl.col("metrology_tool").cast(pl.String),
        pl.col("recipe").cast(pl.String),
        pl.col("repeat").cast(pl.Int64),
        pl.col("sample_kind").cast(pl.String),
    )


def _sem_index(cfg: DemoConfig, tool: str | None) -> int:
    names = [c.tool for c in cfg.fab.cdsems]
    return names.index(tool) if tool in names else -1


def _metrology_bias(
    cfg: DemoConfig, faults: tuple[Fault, ...], tool_i: np.ndarray, t_s: np.ndarray
) -> np.ndarray:
    """Offset + drift + fault offset of the CD-SEM (index into ``fab.cdsems``) that read each row (CD)."""
    bias = np.array([c.offset_nm for c in cfg.fab.cdsems])[tool_i]
    f4 = _fault(faults, "metrology_offset")
    bias = bias + np.where(
        (tool_i == _sem_index(cfg, f4.metrology_tool)) & (t_s >= _secs(cfg, f4.start)), f4.magnitude, 0.0
    )
    f5 = _fault(faults, "metrology_drift")
    frac = np.clip(t_s / (cfg.days * DAY_S), 0.0, 1.0)
    return bias + np.where(tool_i == _sem_index(cfg, f5.metrology_tool), f5.magnitude * frac, 0.0)


def _precision(cfg: DemoConfig, tool_i: np.ndarray) -> np.ndarray:
    return np.array([c.precision_nm for c in cfg.fab.cdsems])[tool_i]


def _names(cfg: DemoConfig, tool_i: np.ndarray) -> pl.Series:
    return pl.Series([c.tool for c in cfg.fab.cdsems]).gather(tool_i)


def _layer_measurements(
    cfg: DemoConfig,
    rng: np.random.Generator,
    lots: _Lots,
    layer: fabmod.MeasuredLayer,
    faults: tuple[Fault, ...],
    fault_lots: dict[str, set[str]],
) -> tuple[pl.DataFrame, dict[str, np.ndarray]]:
    fab = cfg.fab
    k = fab.step_index(layer.step)
    t_proc = lots.track_out[:, k]
    t_meas = t_proc + rng.uniform(0.3, 3.0, size=t_proc.size) * HOUR_S
    end_s = cfg.days * DAY_S
    sel = np.flatnonzero((t_meas >= 0) & (t_meas < end_s))
    n_ll = sel.size
    cell = "litho" if layer.stage == "develop" else "etch"
    cell_tools = np.array([i for i, s in enumerate(fab.cdsems) if s.cell == cell])  # indices into fab.cdsems
    sem_idx = rng.integers(0, cell_tools.size, size=n_ll)
    ptool, pch = lots.tool[sel, k], lots.chamber[sel, k]
    tp = t_proc[sel]
    nsites = np.where(lots.qual[sel], 13, 9)
    w = cfg.wafers_sampled
    ll_w = np.repeat(np.arange(n_ll), w)
    ns_w = np.repeat(nsites, w)
    n_w = ll_w.size
    w_s = np.repeat(np.arange(n_w), ns_w)
    ll_s = ll_w[w_s]
    site_pos = np.arange(w_s.size) - np.repeat(np.cumsum(ns_w) - ns_w, ns_w)
    x, y = _SITE_X[site_pos], _SITE_Y[site_pos]
    r = np.hypot(x, y)
    targets = np.array([layer.target_nm[p] for p in lots.product[sel]])
    ch_off = np.array([fabmod.CHAMBER_OFFSETS_NM.get((a, b), 0.0) for a, b in zip(ptool, pch, strict=True)])
    lot_eff = rng.normal(0.0, layer.sigma_lot_nm, n_ll)
    waf_eff = rng.normal(0.0, layer.sigma_wafer_nm, n_w)
    site_eff = rng.normal(0.0, layer.sigma_site_nm, w_s.size)
    true = (targets + ch_off + lot_eff)[ll_s] + waf_eff[w_s] + site_eff + layer.radial_nm * (r / 150.0) ** 2

    # process faults on this layer
    for f in faults:
        if f.layer != layer.name or f.process_tool is None:
            continue
        hit_ll = (
            (ptool == f.process_tool)
            & (pch == f.chamber)
            & (tp >= _secs(cfg, f.start))
            & (tp < _secs(cfg, f.end))
        )
        if f.kind == "chamber_shift":
            true = true + np.where(hit_ll[ll_s], f.magnitude, 0.0)
        elif f.kind == "slow_drift":
            ramp = np.clip((tp - _secs(cfg, f.start)) / (_secs(cfg, f.end) - _secs(cfg, f.start)), 0.0, 1.0)
            true = true + np.where(hit_ll, f.magnitude * ramp, 0.0)[ll_s]
        elif f.kind == "bake_plate_edge":
            true = true + np.where(hit_ll[ll_s] & (r >= fabmod.EDGE_RADIUS_MM), f.magnitude, 0.0)
        fault_lots.setdefault(f.id, set()).update(lots.ids[sel[hit_ll]].tolist())

    # site-level truths of the other parameters (shared by every measurement of the site)
    extra = {
        "cd_top": true - layer.taper_nm + rng.normal(0.0, cfg.top_bot_sigma_nm, true.size),
        "cd_bot": true + layer.taper_nm + rng.normal(0.0, cfg.top_bot_sigma_nm, true.size),
        "lwr": layer.lwr_median_nm * np.exp(rng.normal(0.0, layer.lwr_sigma_log, true.size)),
        "pitch": layer.pitch_nm + rng.normal(0.0, cfg.pitch_sigma_nm, true.size),
    }

    # measurement events: the primary CD-SEM, and for a few etch lot-layers a second one (cross-check)
    ev_ll = [np.arange(n_ll)]
    ev_tool = [cell_tools[sem_idx]]
    ev_t = [t_meas[sel]]
    if cell == "etch" and cell_tools.size > 1:
        cross = np.flatnonzero(rng.random(n_ll) < cfg.cross_check_fraction)
        other = (sem_idx[cross] + rng.integers(1, cell_tools.size, size=cross.size)) % cell_tools.size
        ev_ll.append(cross)
        ev_tool.append(cell_tools[other])
        ev_t.append(t_meas[sel][cross] + rng.uniform(2.0, 8.0, size=cross.size) * HOUR_S)
    e_ll = np.concatenate(ev_ll)
    e_tool = np.concatenate(ev_tool)
    e_t = np.concatenate(ev_t)
    keep_ev = e_t < end_s
    e_ll, e_tool, e_t = e_ll[keep_ev], e_tool[keep_ev], e_t[keep_ev]
    if cell == "litho":
        e_t = _fall_back_nudge(cfg, e_t)
    # expand events to site rows: rows of lot-layer i are [off[i], off[i] + 3 * nsites[i])
    rows_ll = w * nsites
    off = np.cumsum(rows_ll) - rows_ll
    cnt = rows_ll[e_ll]
    ev_of_row = np.repeat(np.arange(e_ll.size), cnt)
    srow = np.repeat(off[e_ll], cnt) + (np.arange(cnt.sum()) - np.repeat(np.cumsum(cnt) - cnt, cnt))
    tool_r = e_tool[ev_of_row]
    wafer_in_lot = w_s[srow] - ll_s[srow] * w
    t_r = np.round(e_t[ev_of_row] + wafer_in_lot * 150.0 + site_pos[srow] * 12.0)
    lot_r = sel[ll_s[srow]]
    bias = _metrology_bias(cfg, faults, tool_r, t_r)
    prec = _precision(cfg, tool_r)
    for f in faults:
        if f.kind in ("metrology_offset", "metrology_drift"):
            hit = tool_r == _sem_index(cfg, f.metrology_tool)
            if f.kind == "metrology_offset":
                hit &= t_r >= _secs(cfg, f.start)
            fault_lots.setdefault(f.id, set()).update(np.unique(lots.ids[lot_r[hit]]).tolist())

    is_wide = np.array([c.dialect == "cdsem_wide_v1" for c in fab.cdsems])[tool_r]
    recipe = pl.Series([f"{layer.name}_CD", f"{layer.name}_\u00b5CD"]).gather(is_wide.astype(np.int64))
    wafer_no = pl.Series(lots.wafers[lot_r, wafer_in_lot]).cast(pl.String).str.zfill(2)
    lot_s = pl.Series(lots.ids).gather(lot_r)
    base = {
        "lot_id": lot_s,
        "wafer_id": lot_s + "-" + wafer_no,
        "slot": lots.slots[lot_r, wafer_in_lot],
        "site_id": pl.Series(site_pos[srow] + 1).cast(pl.String),
        "x_mm": x[srow],
        "y_mm": y[srow],
        "product": pl.Series(lots.product).gather(lot_r),
        "layer": layer.name,
        "stage": layer.stage,
        "feature": None,
        "unit": "nm",
        "measured_at": _us(cfg, t_r),
        "metrology_tool": _names(cfg, tool_r),
        "recipe": recipe,
        "repeat": 1,
        "sample_kind": "production",
    }
    base_frame = _frame({**base, "parameter": "", "value": 0.0})
    frames = []
    for p in layer.parameters:
        if p == "cd_mid":
            v = true[srow] + bias + rng.normal(0.0, 1.0, srow.size) * prec
        elif p in ("cd_top", "cd_bot"):
            v = extra[p][srow] + bias + rng.normal(0.0, 1.0, srow.size) * prec
        elif p == "lwr":
            v = extra["lwr"][srow] + rng.normal(0.0, cfg.lwr_meas_sigma_nm, srow.size)
        else:  # pitch
            v = extra["pitch"][srow] + rng.normal(0.0, cfg.pitch_meas_sigma_nm, srow.size)
        frames.append(base_frame.with_columns(parameter=pl.lit(p), value=pl.Series(np.round(v, 3))))
    info = {"lot_r": lot_r, "tool_r": tool_r, "t_r": t_r}
    return pl.concat(frames), info


def _monitor_runs(cfg: DemoConfig, rng: np.random.Generator, faults: tuple[Fault, ...]) -> pl.DataFrame:
    tools = np.arange(len(cfg.fab.cdsems))
    ns, nr = cfg.monitor_sites, cfg.monitor_repeats
    day = np.repeat(np.arange(cfg.days), tools.size)
    tool = np.tile(tools, cfg.days)
    t_run = day * DAY_S + 5.5 * HOUR_S + np.tile(np.arange(tools.size), cfg.days) * 0.4 * HOUR_S
    repro = rng.normal(0.0, cfg.monitor_day_sigma_nm, t_run.size)
    pattern = np.array([0.0, 0.2, -0.1, 0.15, -0.2, 0.1, -0.05, 0.05, 0.0])[:ns]
    run = np.repeat(np.arange(t_run.size), ns * nr)
    site = np.tile(np.repeat(np.arange(ns), nr), t_run.size)
    rep = np.tile(np.arange(nr), t_run.size * ns)
    t = t_run[run] + site * 20.0 + rep * 4.0
    tr = tool[run]
    v = cfg.monitor_cd_nm + pattern[site] + repro[run] + _metrology_bias(cfg, faults, tr, t)
    v = v + rng.normal(0.0, 1.0, t.size) * _precision(cfg, tr)
    return _frame(
        {
            "lot_id": MONITOR_LOT,
            "wafer_id": f"{MONITOR_LOT}-01",
            "slot": 1,
            "site_id": (site + 1).astype(str),
            "x_mm": _SITE_X[site],
            "y_mm": _SITE_Y[site],
            "product": ENG_PRODUCT,
            "layer": "GATE_ETCH",
            "stage": "etch",
            "parameter": "cd_mid",
            "feature": "MON-L45",
            "value": np.round(v, 3),
            "unit": "nm",
            "measured_at": _us(cfg, t),
            "metrology_tool": _names(cfg, tr),
            "recipe": "MON_GATE_CD",
            "repeat": rep + 1,
            "sample_kind": "monitor",
        }
    )


def _repeat_study(cfg: DemoConfig, rng: np.random.Generator, faults: tuple[Fault, ...]) -> pl.DataFrame:
    """Resist lines measured many times at the same sites: each measurement shrinks the line."""
    tools = np.arange(len(cfg.fab.cdsems))
    ns, nr = 5, cfg.repeat_study_repeats
    t_run = max(1, round(cfg.days * 0.1)) * DAY_S + 13.0 * HOUR_S + np.arange(tools.size) * HOUR_S
    run = np.repeat(np.arange(tools.size), ns * nr)
    site = np.tile(np.repeat(np.arange(ns), nr), tools.size)
    rep = np.tile(np.arange(nr), tools.size * ns)
    t = t_run[run] + site * 60.0 + rep * 5.0
    tr = tools[run]
    shrink = cfg.shrink_amplitude_nm * (1.0 - np.exp(-rep / cfg.shrink_tau))
    true = 48.0 + np.array([0.0, 0.3, -0.2, 0.25, -0.3])[site]
    v = (
        true
        - shrink
        + _metrology_bias(cfg, faults, tr, t)
        + rng.normal(0.0, 1.0, t.size) * _precision(cfg, tr)
    )
    return _frame(
        {
            "lot_id": REPEAT_LOT,
            "wafer_id": f"{REPEAT_LOT}-01",
            "slot": 1,
            "site_id": (site + 1).astype(str),
            "x_mm": _SITE_X[site],
            "y_mm": _SITE_Y[site],
            "product": ENG_PRODUCT,
            "layer": "GATE_DEV",
            "stage": "develop",
            "parameter": "cd_mid",
            "feature": "RPT-L48",
            "value": np.round(v, 3),
            "unit": "nm",
            "measured_at": _us(cfg, t),
            "metrology_tool": _names(cfg, tr),
            "recipe": "RPT_GATE_CD",
            "repeat": rep + 1,
            "sample_kind": "repeat_study",
        }
    )


def _reference(
    cfg: DemoConfig, rng: np.random.Generator, faults: tuple[Fault, ...]
) -> tuple[pl.DataFrame, pl.DataFrame]:
    """Features with TEM / AFM reference values, each measured 3 times on every CD-SEM."""
    nf = cfg.reference_features
    true = np.linspace(32.0, 88.0, nf)
    layers = np.array(["GATE_ETCH" if i % 2 == 0 else "M1_ETCH" for i in range(nf)])
    feats = np.array([f"REF-F{i + 1:02d}" for i in range(nf)])
    tem = np.round((true + rng.normal(0.0, cfg.tem_sigma_nm, nf)) * 10.0, 1) / 10.0
    afm_i = np.arange(1, nf, 2)
    afm = np.round((true[afm_i] + rng.normal(0.0, cfg.afm_sigma_nm, afm_i.size)) * 10.0, 1) / 10.0
    when = _us(cfg, np.array([-10.0 * DAY_S, -9.0 * DAY_S]))
    ref = pl.DataFrame(
        {
            "feature": np.concatenate([feats, feats[afm_i]]),
            "layer": np.concatenate([layers, layers[afm_i]]),
            "parameter": "cd_mid",
            "reference_value": np.concatenate([tem, afm]),
            "reference_uncertainty": np.concatenate(
                [np.full(nf, cfg.tem_sigma_nm), np.full(afm_i.size, cfg.afm_sigma_nm)]
            ),
            "unit": "nm",
            "reference_method": np.concatenate([np.full(nf, "xsem_tem"), np.full(afm_i.size, "afm")]),
            "measured_at": pl.concat([pl.Series([when[0]] * nf), pl.Series([when[1]] * afm_i.size)]),
        }
    )
    tools = np.arange(len(cfg.fab.cdsems))
    nr = 3
    t_run = max(1, round(cfg.days * 0.15)) * DAY_S + 15.0 * HOUR_S + np.arange(tools.size) * HOUR_S
    run = np.repeat(np.arange(tools.size), nf * nr)
    fi = np.tile(np.repeat(np.arange(nf), nr), tools.size)
    rep = np.tile(np.arange(nr), tools.size * nf)
    t = t_run[run] + fi * 90.0 + rep * 6.0
    tr = tools[run]
    v = true[fi] + cfg.reference_slope * (true[fi] - 50.0) + _metrology_bias(cfg, faults, tr, t)
    v = v + rng.normal(0.0, 1.0, t.size) * _precision(cfg, tr)
    gx = -60.0 + 40.0 * (fi % 4)
    gy = np.where(fi < 4, -20.0, 20.0)
    meas = _frame(
        {
            "lot_id": REFERENCE_LOT,
            "wafer_id": f"{REFERENCE_LOT}-01",
            "slot": 1,
            "site_id": (fi + 1).astype(str),
            "x_mm": gx,
            "y_mm": gy,
            "product": ENG_PRODUCT,
            "layer": layers[fi],
            "stage": "etch",
            "parameter": "cd_mid",
            "feature": feats[fi],
            "value": np.round(v, 3),
            "unit": "nm",
            "measured_at": _us(cfg, t),
            "metrology_tool": _names(cfg, tr),
            "recipe": "REF_CD",
            "repeat": rep + 1,
            "sample_kind": "reference_feature",
        }
    )
    return ref, meas


# ----------------------------------------------------------------------------------------- inspections


def _split_counts(rng: np.random.Generator, total: np.ndarray, class_p: np.ndarray) -> np.ndarray:
    """Split counts into (n, classes, bins) by multinomial draws."""
    bins_p = np.array(list(fabmod.SIZE_BINS.values()))
    by_class = rng.multinomial(total, class_p)  # (n, classes)
    out = np.empty((total.size, class_p.size, bins_p.size), dtype=np.int64)
    for c in range(class_p.size):  # one iteration per defect class
        out[:, c, :] = rng.multinomial(by_class[:, c], bins_p)
    return out


def _inspections(
    cfg: DemoConfig,
    rng: np.random.Generator,
    lots: _Lots,
    faults: tuple[Fault, ...],
    fault_lots: dict[str, set[str]],
    fault_times: dict[str, tuple[dt.datetime, dt.datetime]],
) -> tuple[pl.DataFrame, np.ndarray, np.ndarray, np.ndarray, dict[int, np.ndarray]]:
    """Production and standard-wafer inspections: the rows, class x bin counts, and scratch defects."""
    fab = cfg.fab
    classes = list(fabmod.DEFECT_CLASSES)
    class_p = np.array(list(fabmod.DEFECT_CLASSES.values()))
    residue = classes.index("residue")
    scratch_c = classes.index("scratch")
    ins_tools = np.array([t.tool for t in fab.inspection_tools])
    end_s = cfg.days * DAY_S
    burst, scratch, loss = (
        _fault(faults, "defect_burst"),
        _fault(faults, "scratch"),
        _fault(faults, "capture_loss"),
    )
    rows: list[dict[str, np.ndarray]] = []
    tables: list[np.ndarray] = []
    scratch_row = None
    for j, step in enumerate(fab.inspections):  # one iteration per inspection step
        k = fab.step_index(step.after_step)
        t_proc = lots.track_out[:, k]
        t_ins = t_proc + rng.uniform(0.5, 3.0, size=t_proc.size) * HOUR_S
        sel = np.flatnonzero((t_ins >= 0) & (t_ins < end_s))
        nw = cfg.wafers_inspected
        li = np.repeat(sel, nw)
        wk = np.tile(np.arange(nw), sel.size)
        tool = ins_tools[rng.integers(0, ins_tools.size, size=sel.size)][np.repeat(np.arange(sel.size), nw)]
        t = np.round(t_ins[li] + wk * 180.0)
        mu = step.d0_per_cm2 * fabmod.INSPECTED_AREA_CM2
        total = rng.negative_binomial(step.alpha, step.alpha / (step.alpha + mu), size=li.size)
        tab = _split_counts(rng, total, class_p)
        if burst.layer == step.name:
            hit = (
                (lots.tool[li, k] == burst.process_tool)
                & (lots.chamber[li, k] == burst.chamber)
                & (t_proc[li] >= _secs(cfg, burst.start))
                & (t_proc[li] < _secs(cfg, burst.end))
            )
            extra = rng.negative_binomial(
                step.alpha, step.alpha / (step.alpha + (burst.magnitude - 1.0) * mu), size=li.size
            )
            tab[:, residue, :] += np.where(
                hit[:, None], rng.multinomial(extra, list(fabmod.SIZE_BINS.values())), 0
            )
            fault_lots.setdefault(burst.id, set()).update(np.unique(lots.ids[li[hit]]).tolist())
        if scratch.layer == step.name:
            cand = np.flatnonzero(
                (lots.tool[li, k] == scratch.process_tool)
                & (lots.chamber[li, k] == scratch.chamber)
                & (t_proc[li] >= _secs(cfg, scratch.start))
            )
            if cand.size:
                s = cand[0]
                tool[s] = scratch.inspection_tool
                n_sc = int(scratch.magnitude)
                tab[s, scratch_c, :] += np.array([0, n_sc * 2 // 3, n_sc - n_sc * 2 // 3])
                scratch_row = (j, s)
                fault_lots.setdefault(scratch.id, set()).add(str(lots.ids[li[s]]))
                when = cfg.start + dt.timedelta(seconds=float(t[s]))
                fault_times[scratch.id] = (when, when)
        adders = np.full(li.size, -1, dtype=np.int64) if j == 0 else None
        rows.append({"li": li, "wk": wk, "tool": tool, "t": t, "step": np.full(li.size, j), "adders": adders})
        tables.append(tab)
    tab = np.concatenate(tables)
    li = np.concatenate([r["li"] for r in rows])
    wk = np.concatenate([r["wk"] for r in rows])
    tool = np.concatenate([r["tool"] for r in rows])
    t = np.concatenate([r["t"] for r in rows])
    stepi = np.concatenate([r["step"] for r in rows])
    offsets = np.cumsum([0] + [r["li"].size for r in rows])
    scratch_index = None if scratch_row is None else int(offsets[scratch_row[0]] + scratch_row[1])
    # capture loss thins what the degraded tool sees
    ls, le = _secs(cfg, loss.start), _secs(cfg, loss.end)
    factor = np.where(
        tool == loss.inspection_tool, 1.0 + loss.magnitude * np.clip((t - ls) / (le - ls), 0.0, 1.0), 1.0
    )
    tab = rng.binomial(tab, factor[:, None, None])
    total = tab.sum(axis=(1, 2))
    adders = np.where(stepi == 0, -1, rng.binomial(total, 0.7))
    wafer_no = lots.wafers[li, wk]
    steps = np.array([s.name for s in fab.inspections])
    recipes = np.array([s.recipe for s in fab.inspections])
    prod = pl.DataFrame(
        {
            "lot_id": lots.ids[li],
            "wafer_id": np.char.add(np.char.add(lots.ids[li], "-"), np.char.zfill(wafer_no.astype(str), 2)),
            "product": lots.product[li],
            "layer": steps[stepi],
            "inspection_tool": tool,
            "recipe": recipes[stepi],
            "t": t,
            "inspected_area_cm2": round(fabmod.INSPECTED_AREA_CM2, 2),
            "defect_count": total,
            "adder_count": adders,
            "sample_kind": "production",
        }
    )
    # standard-defect wafer: known placed defects, inspected daily on every tool
    nb = cfg.standard_defects_per_bin
    day = np.repeat(np.arange(cfg.days), ins_tools.size)
    stool = np.tile(ins_tools, cfg.days)
    st = day * DAY_S + 4.0 * HOUR_S + np.tile(np.arange(ins_tools.size), cfg.days) * 0.5 * HOUR_S
    sf = np.where(
        stool == loss.inspection_tool, 1.0 + loss.magnitude * np.clip((st - ls) / (le - ls), 0.0, 1.0), 1.0
    )
    p_bin = np.array(cfg.standard_capture_by_bin)[None, :] * sf[:, None]
    captured_mask = rng.random((st.size, 3, nb)) < p_bin[:, :, None]  # which placed defects were found
    stab = np.zeros((st.size, len(classes), 3), dtype=np.int64)
    stab[:, classes.index("particle"), :] = captured_mask.sum(axis=2)
    stab[:, classes.index("particle"), 0] += rng.poisson(1.5, st.size)
    std = pl.DataFrame(
        {
            "lot_id": STANDARD_LOT,
            "wafer_id": f"{STANDARD_LOT}-01",
            "product": ENG_PRODUCT,
            "layer": STANDARD_LAYER,
            "inspection_tool": stool,
            "recipe": "STD_CHECK",
            "t": st,
            "inspected_area_cm2": round(fabmod.INSPECTED_AREA_CM2, 2),
            "defect_count": stab.sum(axis=(1, 2)),
            "adder_count": np.full(st.size, -1, dtype=np.int64),
            "sample_kind": "standard_defect",
        }
    )
    frame = (
        pl.concat([prod, std])
        .with_columns(
            inspected_at=_us(cfg, np.concatenate([t, st])),
            adder_count=pl.when(pl.col("adder_count") >= 0).then(pl.col("adder_count")).otherwise(None),
        )
        .drop("t")
    )
    return (
        frame,
        np.concatenate([tab, stab]),
        captured_mask,
        np.array([scratch_index if scratch_index is not None else -1]),
        {},
    )


def _defect_rows(
    cfg: DemoConfig,
    rng: np.random.Generator,
    insp: pl.DataFrame,
    tab: np.ndarray,
    captured: np.ndarray,
    scratch_index: int,
) -> tuple[pl.DataFrame, np.ndarray]:
    """Coordinates for a sample of JSON-lines inspections, the scratch wafer and every standard wafer run."""
    classes = np.array(list(fabmod.DEFECT_CLASSES))
    bins = list(fabmod.SIZE_BINS)
    jsonl_tools = [t.tool for t in cfg.fab.inspection_tools if t.dialect == "inspection_jsonl"]
    kind = insp["sample_kind"].to_numpy()
    on_jsonl = np.isin(insp["inspection_tool"].to_numpy(), jsonl_tools)
    pick = on_jsonl & (kind == "production") & (rng.random(insp.height) < cfg.defect_sample_fraction)
    if scratch_index >= 0:
        pick[scratch_index] = True
    n_std = captured.shape[0]
    std_rows = np.arange(insp.height - n_std, insp.height)
    pick_std = on_jsonl[std_rows]
    chosen = np.flatnonzero(pick & (kind == "production"))
    # production defects: uniform over the inspected disc
    cnt = tab[chosen].reshape(chosen.size, -1)  # (m, classes*bins)
    nper = cnt.sum(axis=1)
    ins_of = np.repeat(chosen, nper)
    cb = (
        np.concatenate([np.repeat(np.arange(cnt.shape[1]), row) for row in cnt])
        if chosen.size
        else np.zeros(0, int)
    )
    ci, bi = cb // len(bins), cb % len(bins)
    rad = (150.0 - fabmod.EDGE_EXCLUSION_MM) * np.sqrt(rng.random(cb.size))
    ang = rng.uniform(0.0, 2 * math.pi, cb.size)
    x, y = rad * np.cos(ang), rad * np.sin(ang)
    lo = np.array([fabmod.SIZE_BIN_RANGES_NM[b][0] for b in bins])
    hi = np.array([fabmod.SIZE_BIN_RANGES_NM[b][1] for b in bins])
    size = rng.uniform(lo[bi], hi[bi])
    if scratch_index >= 0:
        # the scratch: its defects lie along one straight 60 mm line
        sc_mask = (ins_of == scratch_index) & (classes[ci] == "scratch")
        m = int(sc_mask.sum())
        along = np.sort(rng.uniform(0.0, 60.0, m))
        x0, y0, th = -40.0, -25.0, math.radians(32.0)
        x[sc_mask] = x0 + along * math.cos(th) + rng.normal(0.0, 0.3, m)
        y[sc_mask] = y0 + along * math.sin(th) + rng.normal(0.0, 0.3, m)
    # standard wafer: placed defects on a fixed grid, found ones exported; extra particles uniform
    sr = std_rows[pick_std]
    grid = np.arange(captured.shape[1] * captured.shape[2])
    gx = -100.0 + 10.0 * (grid % 21)
    gy = -60.0 + 10.0 * (grid // 21)
    found = captured[pick_std].reshape(sr.size, -1)
    s_ins, s_g = np.nonzero(found)
    s_bin = s_g // captured.shape[2]
    extra = tab[sr, list(fabmod.DEFECT_CLASSES).index("particle"), 0] - captured[pick_std][:, 0, :].sum(
        axis=1
    )
    e_ins = np.repeat(np.arange(sr.size), extra)
    e_rad = 140.0 * np.sqrt(rng.random(e_ins.size))
    e_ang = rng.uniform(0.0, 2 * math.pi, e_ins.size)
    std_x = np.concatenate([gx[s_g], e_rad * np.cos(e_ang)])
    std_y = np.concatenate([gy[s_g], e_rad * np.sin(e_ang)])
    std_bin = np.concatenate([s_bin, np.zeros(e_ins.size, dtype=np.int64)])
    std_of = np.concatenate([sr[s_ins], sr[e_ins]])
    std_size = np.where(std_bin == 0, 45.0, np.where(std_bin == 1, 80.0, 150.0))
    std_size[s_g.size :] = rng.uniform(30.0, 50.0, e_ins.size)
    all_of = np.concatenate([ins_of, std_of])
    order = np.argsort(all_of, kind="stable")
    all_of = all_of[order]
    cls = np.concatenate([classes[ci], np.full(std_of.size, "particle")])[order]
    xs = np.round(np.concatenate([x, std_x])[order], 3)
    ys = np.round(np.concatenate([y, std_y])[order], 3)
    sz = np.round(np.concatenate([size, std_size])[order], 1)
    first = np.searchsorted(all_of, all_of, side="left")
    keys = insp.select("lot_id", "wafer_id", "layer", "inspection_tool", "inspected_at")[all_of]
    defects = keys.with_columns(
        defect_id=pl.Series(np.arange(all_of.size) - first + 1, dtype=pl.Int64),
        x_mm=pl.Series(xs),
        y_mm=pl.Series(ys),
        size_nm=pl.Series(sz),
        defect_class=pl.Series(cls),
    )
    return defects, np.unique(all_of)


def _defect_counts(insp: pl.DataFrame, tab: np.ndarray) -> pl.DataFrame:
    classes = list(fabmod.DEFECT_CLASSES)
    bins = list(fabmod.SIZE_BINS)
    n, nc, nb = tab.shape
    ii, cc, bb = np.nonzero(tab)
    keys = insp.select("lot_id", "wafer_id", "layer", "inspection_tool", "inspected_at")[ii]
    return keys.with_columns(
        defect_class=pl.Series(np.array(classes)[cc]),
        size_bin=pl.Series(np.array(bins)[bb]),
        count=pl.Series(tab[ii, cc, bb].astype(np.int64)),
    )


# --------------------------------------------------------------------------------- events and specs


def _tool_events(cfg: DemoConfig, rng: np.random.Generator, faults: tuple[Fault, ...]) -> pl.DataFrame:
    fab = cfg.fab
    span = cfg.days * DAY_S
    shift, offset = _fault(faults, "chamber_shift"), _fault(faults, "metrology_offset")
    recs: list[tuple[str, str | None, float, str, str]] = []

    def periodic(tool: str, chamber: str | None, period_d: float, kind: str, note: str) -> None:
        phase = rng.uniform(0.0, period_d) * DAY_S
        t = phase + np.arange(0, int(cfg.days / period_d) + 2) * period_d * DAY_S
        t = t + rng.normal(0.0, 0.1 * period_d * DAY_S, t.size) + 8.0 * HOUR_S
        if tool == shift.process_tool and chamber == shift.chamber:
            t = t[np.abs(t - _secs(cfg, shift.start)) > 3 * DAY_S]
        for v in t[(t >= 0) & (t < span)]:
            recs.append((tool, chamber, float(np.round(v)), kind, note))

    for step in fab.route:
        if step.kind == "etch":
            for tool in step.tools:
                for ch in step.chambers:
                    periodic(tool, ch, 14.0, "preventive_maintenance", "wet clean")
        if step.kind == "cmp":
            for tool in step.tools:
                for ch in step.chambers:
                    periodic(tool, ch, 7.0, "pad_change", "polish pad replaced")
    seen: set[tuple[str, str]] = set()
    for step in fab.route:  # tracks and deposition tools, once per tool
        for tool in step.tools:
            if (tool, step.kind) in seen or step.kind not in ("litho", "dep"):
                continue
            seen.add((tool, step.kind))
            periodic(tool, None, 21.0, "preventive_maintenance", "scheduled PM")
    for s in fab.cdsems:
        periodic(s.tool, None, 7.0, "calibration", "magnification and pitch check")
    for it in fab.inspection_tools:
        periodic(it.tool, None, 14.0, "preventive_maintenance", "optics clean")
    recs.append(
        (
            shift.process_tool or "",
            shift.chamber,
            _secs(cfg, shift.start) - 3 * HOUR_S,
            "preventive_maintenance",
            "wet clean; upper electrode and focus ring replaced",
        )
    )
    recs.append(
        (
            offset.metrology_tool or "",
            None,
            _secs(cfg, offset.start) - 2 * HOUR_S,
            "repair",
            "electron source exchanged",
        )
    )
    frame = pl.DataFrame(
        {
            "tool": [r[0] for r in recs],
            "chamber": pl.Series([r[1] for r in recs], dtype=pl.String),
            "t": [r[2] for r in recs],
            "event_kind": [r[3] for r in recs],
            "note": [r[4] for r in recs],
        }
    )
    return (
        frame.with_columns(event_at=_us(cfg, frame["t"].to_numpy()))
        .select("tool", "chamber", "event_at", "event_kind", "note")
        .unique(subset=["tool", "chamber", "event_at", "event_kind"], keep="first", maintain_order=True)
        .sort("event_at", "tool", "chamber", nulls_last=False)
    )


def _spec_limits(cfg: DemoConfig) -> pl.DataFrame:
    recs = []
    t0 = cfg.start - dt.timedelta(days=90)
    rev = cfg.start + dt.timedelta(days=int(round(cfg.days * 0.5)))
    for layer in cfg.fab.layers:
        for product, cd in layer.target_nm.items():
            for p in layer.parameters:
                rule = fabmod.SPEC_RULES[p]
                target = {
                    "cd_mid": cd,
                    "cd_top": cd - layer.taper_nm,
                    "cd_bot": cd + layer.taper_nm,
                    "pitch": layer.pitch_nm,
                    "lwr": layer.lwr_median_nm,
                }[p]
                lsl = None if rule.lower_fraction is None else round(target * (1 - rule.lower_fraction), 3)
                usl = round(target * (1 + rule.upper_fraction), 3)
                tgt = None if p == "lwr" else target
                if layer.name == "GATE_ETCH" and p == "cd_mid" and product == "AX14":
                    # a tightened spec from mid-window: effective dating matters
                    recs.append((product, layer.name, p, lsl, tgt, usl, t0, rev))
                    recs.append(
                        (
                            product,
                            layer.name,
                            p,
                            round(target * 0.92, 3),
                            tgt,
                            round(target * 1.08, 3),
                            rev,
                            None,
                        )
                    )
                else:
                    recs.append((product, layer.name, p, lsl, tgt, usl, t0, None))
    return (
        pl.DataFrame(
            recs,
            orient="row",
            schema={
                "product": pl.String,
                "layer": pl.String,
                "parameter": pl.String,
                "lsl": pl.Float64,
                "target": pl.Float64,
                "usl": pl.Float64,
                "effective_from": pl.Datetime("us"),
                "effective_to": pl.Datetime("us"),
            },
        )
        .with_columns(unit=pl.lit("nm"))
        .select(
            "product", "layer", "parameter", "lsl", "target", "usl", "unit", "effective_from", "effective_to"
        )
    )


# ----------------------------------------------------------------------------------------------- driver


def simulate(cfg: DemoConfig | None = None) -> DemoData:
    """Simulate the demo fab for ``cfg`` (default: 60 days, seed 7) into canonical frames.

    Example:
        >>> data = simulate(DemoConfig(days=8, seed=1))  # doctest: +SKIP
        >>> data.measurements.columns[:3]  # doctest: +SKIP
        ['lot_id', 'wafer_id', 'slot']
    """
    cfg = cfg or DemoConfig()
    rng = np.random.default_rng(cfg.seed)
    faults = plan_faults(cfg)
    fault_lots: dict[str, set[str]] = {}
    fault_times: dict[str, tuple[dt.datetime, dt.datetime]] = {}
    lots = _simulate_lots(cfg, rng)
    history = _process_history(cfg, lots)
    frames = []
    for layer in cfg.fab.layers:  # one iteration per measured layer
        fr, _ = _layer_measurements(cfg, rng, lots, layer, faults, fault_lots)
        frames.append(fr)
    frames.append(_monitor_runs(cfg, rng, faults))
    frames.append(_repeat_study(cfg, rng, faults))
    ref_values, ref_meas = _reference(cfg, rng, faults)
    frames.append(ref_meas)
    meas = pl.concat(frames)

    # the stale CD-SEM: nothing it measured after the stop reaches the exports
    stale = _fault(faults, "tool_stops_reporting")
    gone = (pl.col("metrology_tool") == stale.metrology_tool) & (pl.col("measured_at") >= stale.start)
    fault_lots[stale.id] = set(
        meas.filter(gone & (pl.col("sample_kind") == "production"))["lot_id"].unique().to_list()
    )
    meas = meas.filter(~gone).sort("measured_at", "metrology_tool", maintain_order=True)

    # the lot whose first export was wrong (corrected re-export)
    reexp = _fault(faults, "corrected_reexport")
    cand = (
        meas.filter(
            (pl.col("layer") == reexp.layer)
            & (pl.col("metrology_tool") == reexp.metrology_tool)
            & (pl.col("sample_kind") == "production")
            & (pl.col("measured_at") >= reexp.start)
        )
        .group_by("lot_id")
        .agg(pl.col("measured_at").min().alias("t0"), pl.len().alias("n"))
        .sort("t0", "lot_id")
    )
    reexport: dict[str, object] = {}
    if cand.height:
        row = cand.row(0, named=True)
        reexport = {
            "lot_id": row["lot_id"],
            "layer": reexp.layer,
            "metrology_tool": reexp.metrology_tool,
            "offset_nm": reexp.magnitude,
            "measured_at": row["t0"],
        }
        fault_lots[reexp.id] = {row["lot_id"]}
        fault_times[reexp.id] = (row["t0"], row["t0"] + dt.timedelta(days=2))

    insp, tab, captured, scratch_idx, _ = _inspections(cfg, rng, lots, faults, fault_lots, fault_times)
    order = insp.with_row_index("_i").sort("inspected_at", "inspection_tool", "lot_id", "wafer_id")
    idx = order["_i"].to_numpy()
    insp = order.drop("_i")
    tab = tab[idx]
    n_std = captured.shape[0]
    # keep the standard-wafer rows last for _defect_rows: remember their new positions
    inv = np.empty_like(idx)
    inv[idx] = np.arange(idx.size)
    sc = int(scratch_idx[0])
    sc_new = int(inv[sc]) if sc >= 0 else -1
    defects, with_coords = _defect_rows_reordered(cfg, rng, insp, tab, captured, sc_new, inv[-n_std:])
    counts = _defect_counts(insp, tab)
    events = _tool_events(cfg, rng, faults)
    specs = _spec_limits(cfg)
    lot_frame = pl.DataFrame(
        {"lot_id": lots.ids, "product": lots.product, "qual": lots.qual, "started_at": _us(cfg, lots.start_s)}
    )
    keys = insp.select("lot_id", "wafer_id", "layer", "inspection_tool", "inspected_at")[with_coords]
    return DemoData(
        config=cfg,
        faults=faults,
        lots=lot_frame,
        process_history=history,
        measurements=meas,
        inspections=insp,
        defect_counts=counts,
        defects=defects,
        tool_events=events,
        spec_limits=specs,
        reference_values=ref_values,
        fault_lots={k: sorted(v) for k, v in fault_lots.items()},
        fault_times=fault_times,
        reexport=reexport,
        defect_inspections={tuple(r) for r in keys.iter_rows()},
    )


def _defect_rows_reordered(
    cfg: DemoConfig,
    rng: np.random.Generator,
    insp: pl.DataFrame,
    tab: np.ndarray,
    captured: np.ndarray,
    scratch_index: int,
    std_positions: np.ndarray,
) -> tuple[pl.DataFrame, np.ndarray]:
    """``_defect_rows`` on a time-sorted frame: move the standard-wafer rows to the end, then map back."""
    n = insp.height
    is_std = np.zeros(n, dtype=bool)
    is_std[std_positions] = True
    perm = np.concatenate([np.flatnonzero(~is_std), std_positions])  # std rows last, in their original order
    back = np.empty_like(perm)
    back[perm] = np.arange(n)
    sc = int(back[scratch_index]) if scratch_index >= 0 else -1
    defects, chosen = _defect_rows(cfg, rng, insp[perm], tab[perm], captured, sc)
    orig = perm[chosen]
    return defects.sort("inspected_at", "inspection_tool", "lot_id", "wafer_id", "defect_id"), np.sort(orig)
