"""``generate_demo``: simulate the demo fab and write its exports and ground truth."""

from __future__ import annotations

import datetime as dt
import json
import time
from dataclasses import dataclass, field
from pathlib import Path

from demo_fab import fab as fabmod
from demo_fab.config import DemoConfig
from demo_fab.exports import ExportResult, write_exports
from demo_fab.faults import KINDS
from demo_fab.generate import DemoData, simulate

TRUTH_VERSION = 1


@dataclass(frozen=True)
class DemoSummary:
    """What ``generate_demo`` wrote and how long it took."""

    out_dir: Path
    truth_path: Path
    days: int
    seed: int
    files: dict[str, int]
    """Files written per dialect."""
    rows: dict[str, int]
    """Canonical rows simulated per table (before planned rejects and the failed file)."""
    expected_rows: dict[str, int]
    """Rows a correct ingest stores per table (current rows, after supersession)."""
    bytes_written: int
    seconds: float
    faults: tuple[str, ...] = field(default=())


def _iso(t: dt.datetime | None) -> str | None:
    return None if t is None else t.strftime("%Y-%m-%dT%H:%M:%SZ")


def build_truth(data: DemoData, res: ExportResult) -> dict[str, object]:
    """The ground-truth document (``truth.json``); its structure is documented in docs/demo_fab.md."""
    cfg = data.config
    faults = []
    for f in data.faults:
        start, end = data.fault_times.get(f.id, (f.start, f.end))
        rec: dict[str, object] = {
            "id": f.id,
            "kind": f.kind,
            "layer": f.layer,
            "parameter": f.parameter,
            "start": _iso(start),
            "end": _iso(end),
            "magnitude": f.magnitude,
            "unit": f.unit,
            "responsible": {
                "process_tool": f.process_tool,
                "chamber": f.chamber,
                "metrology_tool": f.metrology_tool,
                "inspection_tool": f.inspection_tool,
            },
            "lots": data.fault_lots.get(f.id, []),
            "series_hint": f.series_hint,
            "description": f.description,
        }
        if f.kind == "corrected_reexport":
            rec["reexport"] = res.corrected_reexport
        faults.append(rec)
    studies = {
        "monitor": {
            "lot": "HCMON-G1",
            "wafer": "HCMON-G1-01",
            "layer": "GATE_ETCH",
            "feature": "MON-L45",
            "true_cd_nm": cfg.monitor_cd_nm,
            "sites": cfg.monitor_sites,
            "repeats": cfg.monitor_repeats,
            "day_sigma_nm": cfg.monitor_day_sigma_nm,
        },
        "beam_shrink": {
            "lot": "HCRPT-R1",
            "layer": "GATE_DEV",
            "feature": "RPT-L48",
            "amplitude_nm": cfg.shrink_amplitude_nm,
            "tau_repeats": cfg.shrink_tau,
            "model": "shrink(k) = amplitude * (1 - exp(-(k - 1) / tau))",
        },
        "reference": {
            "lot": "HCREF-A1",
            "slope": 1.0 + cfg.reference_slope,
            "model": "cdsem = true + tool offset + slope_excess * (true - 50 nm) + noise",
            "tem_sigma_nm": cfg.tem_sigma_nm,
            "afm_sigma_nm": cfg.afm_sigma_nm,
        },
        "standard_defect": {
            "lot": "HCSTD-01",
            "layer": "STD_CHECK",
            "placed_per_bin": cfg.standard_defects_per_bin,
            "capture_by_bin": list(cfg.standard_capture_by_bin),
        },
        "cdsems": {
            s.tool: {"offset_nm": s.offset_nm, "precision_nm": s.precision_nm, "dialect": s.dialect}
            for s in cfg.fab.cdsems
        },
    }
    return {
        "version": TRUTH_VERSION,
        "fab": fabmod.FAB_NAME,
        "seed": cfg.seed,
        "days": cfg.days,
        "start": _iso(cfg.start),
        "end": _iso(cfg.end),
        "fault_kinds": list(KINDS),
        "faults": faults,
        "corrected_reexports": [res.corrected_reexport] if res.corrected_reexport else [],
        "planned_rejects": res.planned_rejects,
        "planned_failed_files": res.planned_failed_files,
        "expected_rows": dict(sorted(res.expected_rows.items())),
        "files": {k: len(v) for k, v in sorted(res.files.items())},
        "studies": studies,
    }


def generate_demo(out_dir: Path, *, days: int = 60, seed: int = 7) -> DemoSummary:
    """Simulate ``days`` of the Harrow Creek Devices fab and write ``out_dir/exports/...`` and ``truth.json``.

    The same ``days`` and ``seed`` give the same bytes.

    Example:
        >>> s = generate_demo(Path("demo_run"), days=60, seed=7)  # doctest: +SKIP
        >>> s.truth_path.name  # doctest: +SKIP
        'truth.json'
    """
    t0 = time.perf_counter()
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    data = simulate(DemoConfig(days=days, seed=seed))
    res = write_exports(out_dir, data)
    truth = build_truth(data, res)
    truth_path = out_dir / "truth.json"
    truth_path.write_text(json.dumps(truth, indent=1) + "\n", encoding="utf-8")
    written = sum((out_dir / p).stat().st_size for v in res.files.values() for p in v)
    rows = {
        "measurements": data.measurements.height,
        "inspections": data.inspections.height,
        "defect_counts": data.defect_counts.height,
        "defects": data.defects.height,
        "process_history": data.process_history.height,
        "tool_events": data.tool_events.height,
        "spec_limits": data.spec_limits.height,
        "reference_values": data.reference_values.height,
    }
    return DemoSummary(
        out_dir=out_dir,
        truth_path=truth_path,
        days=days,
        seed=seed,
        files={k: len(v) for k, v in res.files.items()},
        rows=rows,
        expected_rows=dict(res.expected_rows),
        bytes_written=written,
        seconds=time.perf_counter() - t0,
        faults=tuple(f.id for f in data.faults),
    )
