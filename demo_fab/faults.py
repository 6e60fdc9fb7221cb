"""Faults injected into the demo fab, with their ground truth.

Start and end are placed as fractions of the window, so a short test window still holds every fault.
``generate.py`` applies them and records which lots each one touched; ``truth.json`` lists them so a
detection run can be scored for detection, delay and attribution.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass

from demo_fab.config import DemoConfig

KINDS = (
    "chamber_shift",
    "slow_drift",
    "bake_plate_edge",
    "metrology_offset",
    "metrology_drift",
    "defect_burst",
    "scratch",
    "capture_loss",
    "tool_stops_reporting",
    "corrected_reexport",
)
"""Every fault kind the demo injects, in truth.json order."""


@dataclass(frozen=True)
class Fault:
    """One injected fault. ``None`` where a field does not apply."""

    id: str
    kind: str
    layer: str | None
    parameter: str | None
    start: dt.datetime
    end: dt.datetime
    magnitude: float | None
    unit: str | None
    process_tool: str | None
    chamber: str | None
    metrology_tool: str | None
    inspection_tool: str | None
    series_hint: str
    description: str


def _at(cfg: DemoConfig, fraction: float, hour: float = 0.0) -> dt.datetime:
    """The instant ``fraction`` of the way into the window, snapped to a whole day plus ``hour``."""
    day = int(round(cfg.days * fraction))
    return cfg.start + dt.timedelta(days=day, hours=hour)


def wafer_mean_sigma(cfg: DemoConfig, layer: str) -> float:
    """Sigma of a 9-site wafer mean of cd_mid at ``layer`` (lot, wafer, site/9), ignoring metrology noise."""
    m = cfg.fab.layer(layer)
    return (m.sigma_lot_nm**2 + m.sigma_wafer_nm**2 + m.sigma_site_nm**2 / 9.0) ** 0.5


def stale_days(cfg: DemoConfig) -> int:
    """Days before the end of the window after which the stale CD-SEM exports nothing."""
    return max(2, cfg.days // 10)


def plan_faults(cfg: DemoConfig) -> tuple[Fault, ...]:
    """The faults of a run, placed in ``cfg``'s window."""
    end = cfg.end
    drift_nm = round(0.9 * wafer_mean_sigma(cfg, "M1_ETCH"), 3)
    return (
        Fault(
            "F01",
            "chamber_shift",
            "GATE_ETCH",
            "cd_mid",
            _at(cfg, 0.30, 9.5),
            end,
            1.5,
            "nm",
            "ETCH-B",
            "CH2",
            None,
            None,
            "GATE_ETCH cd_mid wafer mean, split by process chamber",
            "Gate etch chamber ETCH-B/CH2 etches 1.5 nm wider after its preventive maintenance "
            "(a tool_events row marks the start).",
        ),
        Fault(
            "F02",
            "slow_drift",
            "M1_ETCH",
            "cd_mid",
            _at(cfg, 0.45),
            end,
            drift_nm,
            "nm",
            "ETCH-C",
            "CH3",
            None,
            None,
            "M1_ETCH cd_mid wafer mean, split by process chamber (EWMA or CUSUM)",
            "Metal-1 etch chamber ETCH-C/CH3 drifts linearly wider, reaching the magnitude (about 0.9 sigma "
            "of the wafer mean) at the end of the window: too slow for a Shewhart chart.",
        ),
        Fault(
            "F03",
            "bake_plate_edge",
            "GATE_DEV",
            "cd_mid",
            _at(cfg, 0.35, 14.0),
            _at(cfg, 0.60, 14.0),
            2.5,
            "nm",
            "TRACK-2",
            "PEB-3",
            None,
            None,
            "GATE_DEV cd_mid edge-zone mean or within-wafer range, split by bake plate",
            "Edge sites (r >= 120 mm) read 2.5 nm high on wafers baked on TRACK-2/PEB-3 (a failing edge heater).",
        ),
        Fault(
            "F04",
            "metrology_offset",
            None,
            "cd_mid",
            _at(cfg, 0.62, 11.0),
            end,
            1.2,
            "nm",
            None,
            None,
            "SEM-02",
            None,
            "cd_mid of every layer measured on SEM-02; the SEM-02 monitor-wafer mean",
            "CD-SEM SEM-02 reads every CD 1.2 nm high after a source exchange. It looks like a process "
            "excursion on the etch layers it measures, but the monitor wafer shows the same step.",
        ),
        Fault(
            "F05",
            "metrology_drift",
            None,
            "cd_mid",
            cfg.start,
            end,
            -round(0.015 * cfg.days, 3),
            "nm",
            None,
            None,
            "SEM-01",
            None,
            "SEM-01 monitor-wafer mean and its offset to the fleet",
            "CD-SEM SEM-01 drifts slowly low (-0.015 nm/day) over the whole window; magnitude is the total.",
        ),
        Fault(
            "F06",
            "defect_burst",
            "M1_ETCH_INSP",
            "defect_density",
            _at(cfg, 0.50),
            _at(cfg, 0.50) + dt.timedelta(days=max(1, round(cfg.days * 0.05))),
            5.0,
            "ratio",
            "ETCH-C",
            "CH1",
            None,
            None,
            "M1_ETCH_INSP defect density (D0), split by etch chamber",
            "Wafers etched in ETCH-C/CH1 carry five times the usual defect density (mostly residue) for a few days.",
        ),
        Fault(
            "F07",
            "scratch",
            "M1_CMP_INSP",
            "defect_count",
            _at(cfg, 0.40),
            _at(cfg, 0.40),
            45.0,
            "defects",
            "CMP-2",
            "P2",
            None,
            "INS-B1",
            "M1_CMP_INSP defect map of one wafer",
            "One wafer polished on CMP-2/P2 carries a single scratch: 45 defects along a 60 mm line.",
        ),
        Fault(
            "F08",
            "capture_loss",
            "STD_CHECK",
            "capture_rate",
            end - dt.timedelta(days=max(3, cfg.days // 3)),
            end,
            -0.2,
            "fraction",
            None,
            None,
            None,
            "INS-B2",
            "standard-defect wafer count on INS-B2",
            "Inspection tool INS-B2 loses sensitivity: its capture rate of the standard wafer's placed defects "
            "falls linearly by 20 % (relative) over the last weeks; production counts on it fall too.",
        ),
        Fault(
            "F09",
            "tool_stops_reporting",
            None,
            None,
            end - dt.timedelta(days=stale_days(cfg)),
            end,
            None,
            None,
            None,
            None,
            "SEM-05",
            None,
            "data health: last export per metrology tool",
            "CD-SEM SEM-05 keeps measuring but its exports stop reaching the share.",
        ),
        Fault(
            "F10",
            "corrected_reexport",
            "STI_ETCH",
            "cd_mid",
            _at(cfg, 0.25),
            _at(cfg, 0.25),
            3.0,
            "nm",
            None,
            None,
            "SEM-01",
            None,
            "STI_ETCH cd_mid of one lot",
            "One lot's STI_ETCH export on SEM-01 carried values 3.0 nm high (wrong recipe calibration); a "
            "corrected re-export of that lot follows two days later and must supersede it.",
        ),
    )
