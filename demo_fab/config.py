"""Settings of one demo run: window, seed, sampling and the simulation constants tests read back."""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field

from demo_fab.fab import FAB, Fab


@dataclass(frozen=True)
class DemoConfig:
    """One demo run. The nested CD sigmas live per layer in ``fab.layers`` (``MeasuredLayer``)."""

    days: int = 60
    """Length of the exported window in days."""
    seed: int = 7
    """Seed of ``numpy.random.default_rng``; the same seed gives the same bytes."""
    start: dt.datetime = dt.datetime(2026, 8, 3)
    """First instant of the window (UTC, naive). A Monday, so lot-history weeks align."""
    lots_per_day: tuple[int, int] = (25, 55)
    """Lot starts per day are drawn uniformly from this closed range (common practice: 25-55 per layer)."""
    lead_days: int = 6
    """Lots start this many days before the window, so every layer sees a full flow from day one."""
    wafers_sampled: int = 3
    """Wafers of each lot measured at each CD layer (common practice: 3)."""
    wafers_inspected: int = 2
    """Wafers of each lot inspected at each inspection step."""
    qual_lot_fraction: float = 0.03
    """Share of lots that are qualification lots, measured on 13 sites instead of 9."""
    sorter_fraction: float = 0.05
    """Share of lots whose wafers were moved by a sorter, so slot differs from the wafer number."""
    cross_check_fraction: float = 0.05
    """Share of etch lot-layers measured again on a second etch-cell CD-SEM (cross-tool check)."""
    defect_sample_fraction: float = 0.05
    """Share of JSON-lines inspections that also export defect coordinates."""
    monitor_sites: int = 5
    """Sites of the monitor ("golden") wafer measured in each daily run."""
    monitor_repeats: int = 5
    """Static repeats per site in each monitor run."""
    monitor_cd_nm: float = 45.0
    """True mid CD of the etched monitor wafer's feature."""
    monitor_day_sigma_nm: float = 0.08
    """Day-to-day reproducibility of a CD-SEM on the monitor (1 sigma)."""
    shrink_amplitude_nm: float = 1.2
    """Beam-induced resist shrink: repeat k reads A * (1 - exp(-(k-1)/tau)) lower (common practice shape)."""
    shrink_tau: float = 3.0
    """Repeats to reach 63 % of the shrink amplitude."""
    repeat_study_repeats: int = 10
    """Repeats per site in the resist repeat study."""
    reference_features: int = 8
    """Features with a TEM (and for half of them also AFM) reference value."""
    reference_slope: float = 0.02
    """CD-SEM reading = true + offset + slope * (true - 50 nm): a small non-unit slope to find."""
    tem_sigma_nm: float = 0.4
    """Standard uncertainty of a TEM reference value (from memory: a few Å)."""
    afm_sigma_nm: float = 0.6
    """Standard uncertainty of an AFM reference value (from memory)."""
    standard_defects_per_bin: int = 80
    """Placed defects per size bin on the standard-defect wafer."""
    standard_capture_by_bin: tuple[float, float, float] = (0.90, 0.96, 0.99)
    """Capture probability of a healthy inspection tool per size bin (<50, 50-100, >100 nm)."""
    lwr_meas_sigma_nm: float = 0.10
    """Metrology noise on LWR (1 sigma)."""
    pitch_sigma_nm: float = 0.05
    """Site-to-site pitch variation (pitch is set by the mask, so it is tight)."""
    pitch_meas_sigma_nm: float = 0.08
    """Metrology noise on pitch."""
    top_bot_sigma_nm: float = 0.3
    """Extra site-level variation of top and bottom CD around mid CD minus/plus taper."""
    fab: Fab = field(default=FAB)
    """The invented fab (route, tools, layers with their nested sigmas)."""

    @property
    def end(self) -> dt.datetime:
        """First instant after the window."""
        return self.start + dt.timedelta(days=self.days)
