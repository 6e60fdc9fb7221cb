"""The invented fab "Harrow Creek Devices": products, route, tools, chambers, metrology, layers and specs.

Everything here is invented for the demo. The numbers are plausible orders of magnitude, tagged in
``docs/demo_fab.md`` as common practice or from memory; none comes from a real fab.

The variation model of one measured value (see ``generate.py``)::

    value = target(product) + process-chamber offset + lot + wafer + site
            + radial_nm * (r / 150 mm)^2 + fault terms
            + metrology-tool offset (+ drift) + metrology noise

with lot ~ N(0, sigma_lot_nm), wafer ~ N(0, sigma_wafer_nm), site ~ N(0, sigma_site_nm) nested and
independent, and metrology noise ~ N(0, precision_nm of the CD-SEM).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

FAB_NAME = "Harrow Creek Devices"
LOT_PREFIX = "HC"
WAFERS_PER_LOT = 25
"""Wafers in a lot (a full carrier); the demo samples a few of them for metrology."""

EDGE_EXCLUSION_MM = 3.0
INSPECTED_AREA_CM2 = math.pi * (15.0 - EDGE_EXCLUSION_MM / 10.0) ** 2
"""300 mm wafer with 3 mm edge exclusion: pi * 14.7^2 = 678.87 cm² (common practice; computed)."""

LOCAL_TZ = "Europe/Amsterdam"
"""Time zone of the fab's local-time exports."""


@dataclass(frozen=True)
class Step:
    """One route step: the tools that may run it and their chambers (or bake plates, platens)."""

    name: str
    module: str
    kind: str  # litho, etch, dep, cmp
    tools: tuple[str, ...]
    chambers: tuple[str, ...]


@dataclass(frozen=True)
class MeasuredLayer:
    """A CD metrology step after a litho (``develop``) or etch step, with its nested variance."""

    name: str
    step: str  # the route step whose tool and chamber made the feature
    stage: str  # "develop" or "etch"
    parameters: tuple[str, ...]
    target_nm: dict[str, float]  # cd_mid target per product
    sigma_lot_nm: float
    sigma_wafer_nm: float
    sigma_site_nm: float
    radial_nm: float  # systematic radial signature: + radial_nm * (r/150)^2
    pitch_nm: float = 0.0  # nominal pitch for layers that report it
    taper_nm: float = 1.5  # cd_top = cd_mid - taper, cd_bot = cd_mid + taper
    lwr_median_nm: float = 3.0
    lwr_sigma_log: float = 0.12  # LWR is lognormal: log(lwr) ~ N(log(median), sigma_log)


@dataclass(frozen=True)
class InspectionStep:
    """A defect inspection after a route step."""

    name: str
    after_step: str
    d0_per_cm2: float  # mean density of the mature process (from memory: ~0.1 /cm²)
    alpha: float  # negative-binomial clustering parameter (from memory: 0.5-2)
    recipe: str


@dataclass(frozen=True)
class CdSem:
    """A CD-SEM: its export dialect, its cell (which layers it measures), offset and precision."""

    tool: str
    dialect: str  # cdsem_long_v2 or cdsem_wide_v1 (production exports; monitor runs are always long)
    cell: str  # "litho" (develop layers) or "etch" (etch layers)
    offset_nm: float  # static bias to the fleet
    precision_nm: float  # 1-sigma repeatability


@dataclass(frozen=True)
class InspectionTool:
    """A defect inspection tool and its export dialect."""

    tool: str
    dialect: str  # inspection_jsonl or inspection_parquet
    capture_rate: float  # fraction of the standard wafer's placed defects it finds


PRODUCTS: dict[str, float] = {"AX14": 0.6, "BX22": 0.4}
"""Products and their share of lot starts."""

ROUTE: tuple[Step, ...] = (
    Step("STI_DEP", "STI", "dep", ("DEP-1", "DEP-2"), ("CH1", "CH2", "CH3")),
    Step(
        "STI_LITHO", "STI", "litho", ("TRACK-1", "TRACK-2", "TRACK-3"), ("PEB-1", "PEB-2", "PEB-3", "PEB-4")
    ),
    Step("STI_ETCH", "STI", "etch", ("ETCH-A", "ETCH-B"), ("CH1", "CH2", "CH3", "CH4")),
    Step("STI_CMP", "STI", "cmp", ("CMP-1", "CMP-2"), ("P1", "P2", "P3")),
    Step("GATE_DEP", "GATE", "dep", ("DEP-1", "DEP-2"), ("CH1", "CH2", "CH3")),
    Step(
        "GATE_LITHO", "GATE", "litho", ("TRACK-1", "TRACK-2", "TRACK-3"), ("PEB-1", "PEB-2", "PEB-3", "PEB-4")
    ),
    Step("GATE_ETCH", "GATE", "etch", ("ETCH-A", "ETCH-B"), ("CH1", "CH2", "CH3", "CH4")),
    Step("CONT_DEP", "CONT", "dep", ("DEP-3",), ("CH1", "CH2")),
    Step(
        "CONT_LITHO", "CONT", "litho", ("TRACK-1", "TRACK-2", "TRACK-3"), ("PEB-1", "PEB-2", "PEB-3", "PEB-4")
    ),
    Step("CONT_ETCH", "CONT", "etch", ("ETCH-C", "ETCH-D"), ("CH1", "CH2", "CH3", "CH4")),
    Step("M1_DEP", "M1", "dep", ("DEP-3",), ("CH1", "CH2")),
    Step("M1_LITHO", "M1", "litho", ("TRACK-1", "TRACK-2", "TRACK-3"), ("PEB-1", "PEB-2", "PEB-3", "PEB-4")),
    Step("M1_ETCH", "M1", "etch", ("ETCH-C", "ETCH-D"), ("CH1", "CH2", "CH3", "CH4")),
    Step("M1_CMP", "M1", "cmp", ("CMP-1", "CMP-2"), ("P1", "P2", "P3")),
    Step("V1_LITHO", "V1", "litho", ("TRACK-1", "TRACK-2", "TRACK-3"), ("PEB-1", "PEB-2", "PEB-3", "PEB-4")),
    Step("V1_ETCH", "V1", "etch", ("ETCH-C", "ETCH-D"), ("CH1", "CH2", "CH3", "CH4")),
)

CHAMBER_OFFSETS_NM: dict[tuple[str, str], float] = {
    # etch chambers: CD offset of everything they etch (configured, so tests can read it)
    ("ETCH-A", "CH1"): 0.0,
    ("ETCH-A", "CH2"): 0.3,
    ("ETCH-A", "CH3"): -0.2,
    ("ETCH-A", "CH4"): 0.1,
    ("ETCH-B", "CH1"): -0.3,
    ("ETCH-B", "CH2"): 0.2,
    ("ETCH-B", "CH3"): 0.0,
    ("ETCH-B", "CH4"): -0.1,
    ("ETCH-C", "CH1"): 0.2,
    ("ETCH-C", "CH2"): -0.2,
    ("ETCH-C", "CH3"): 0.0,
    ("ETCH-C", "CH4"): 0.3,
    ("ETCH-D", "CH1"): -0.1,
    ("ETCH-D", "CH2"): 0.1,
    ("ETCH-D", "CH3"): -0.3,
    ("ETCH-D", "CH4"): 0.2,
    # track bake plates: CD offset of the resist they bake
    ("TRACK-1", "PEB-1"): 0.0,
    ("TRACK-1", "PEB-2"): 0.2,
    ("TRACK-1", "PEB-3"): -0.1,
    ("TRACK-1", "PEB-4"): 0.1,
    ("TRACK-2", "PEB-1"): -0.2,
    ("TRACK-2", "PEB-2"): 0.1,
    ("TRACK-2", "PEB-3"): 0.0,
    ("TRACK-2", "PEB-4"): 0.2,
    ("TRACK-3", "PEB-1"): 0.1,
    ("TRACK-3", "PEB-2"): -0.1,
    ("TRACK-3", "PEB-3"): 0.2,
    ("TRACK-3", "PEB-4"): 0.0,
}
"""Configured CD offset of each process chamber (nm); tools not listed add nothing to CD."""

MEASURED_LAYERS: tuple[MeasuredLayer, ...] = (
    MeasuredLayer(
        "STI_DEV",
        "STI_LITHO",
        "develop",
        ("cd_mid", "cd_top", "lwr"),
        {"AX14": 60.0, "BX22": 60.0},
        0.7,
        0.35,
        0.6,
        0.8,
        lwr_median_nm=3.4,
    ),
    MeasuredLayer(
        "STI_ETCH", "STI_ETCH", "etch", ("cd_mid",), {"AX14": 52.0, "BX22": 52.0}, 0.8, 0.4, 0.7, -1.2
    ),
    MeasuredLayer(
        "GATE_DEV",
        "GATE_LITHO",
        "develop",
        ("cd_mid", "cd_top", "lwr"),
        {"AX14": 48.0, "BX22": 50.0},
        0.6,
        0.3,
        0.5,
        0.6,
        lwr_median_nm=3.0,
    ),
    MeasuredLayer(
        "GATE_ETCH",
        "GATE_ETCH",
        "etch",
        ("cd_mid", "lwr"),
        {"AX14": 45.0, "BX22": 47.0},
        0.6,
        0.3,
        0.5,
        -0.9,
        lwr_median_nm=2.6,
    ),
    MeasuredLayer(
        "CONT_DEV",
        "CONT_LITHO",
        "develop",
        ("cd_mid", "cd_top", "lwr"),
        {"AX14": 70.0, "BX22": 70.0},
        0.9,
        0.4,
        0.8,
        1.0,
        lwr_median_nm=3.8,
    ),
    MeasuredLayer(
        "CONT_ETCH",
        "CONT_ETCH",
        "etch",
        ("cd_mid", "cd_bot"),
        {"AX14": 62.0, "BX22": 62.0},
        0.9,
        0.45,
        0.8,
        -1.4,
        taper_nm=4.0,
    ),
    MeasuredLayer(
        "M1_DEV",
        "M1_LITHO",
        "develop",
        ("cd_mid", "cd_top", "lwr"),
        {"AX14": 60.0, "BX22": 66.0},
        0.8,
        0.4,
        0.7,
        0.7,
        lwr_median_nm=3.5,
    ),
    MeasuredLayer(
        "M1_ETCH",
        "M1_ETCH",
        "etch",
        ("cd_mid", "pitch"),
        {"AX14": 56.0, "BX22": 62.0},
        0.8,
        0.4,
        0.7,
        -1.0,
        pitch_nm=112.0,
    ),
    MeasuredLayer(
        "V1_DEV",
        "V1_LITHO",
        "develop",
        ("cd_mid", "cd_top", "lwr"),
        {"AX14": 64.0, "BX22": 64.0},
        0.9,
        0.45,
        0.8,
        0.9,
        lwr_median_nm=3.9,
    ),
    MeasuredLayer(
        "V1_ETCH", "V1_ETCH", "etch", ("cd_mid",), {"AX14": 58.0, "BX22": 58.0}, 0.9, 0.45, 0.8, -1.1
    ),
)

INSPECTION_STEPS: tuple[InspectionStep, ...] = (
    InspectionStep("STI_CMP_INSP", "STI_CMP", 0.10, 1.0, "SC_STD"),
    InspectionStep("GATE_ETCH_INSP", "GATE_ETCH", 0.08, 1.2, "GE_STD"),
    InspectionStep("M1_ETCH_INSP", "M1_ETCH", 0.12, 0.8, "M1E_STD"),
    InspectionStep("M1_CMP_INSP", "M1_CMP", 0.10, 1.0, "M1C_STD"),
)

DEFECT_CLASSES: dict[str, float] = {
    "particle": 0.55,
    "residue": 0.2,
    "pit": 0.1,
    "bridge": 0.08,
    "scratch": 0.07,
}
"""Defect classes and their share of the baseline population (invented)."""

SIZE_BINS: dict[str, float] = {"<50nm": 0.5, "50-100nm": 0.35, ">100nm": 0.15}
"""Size bins and their share; sizes inside a bin are drawn uniformly (invented)."""

SIZE_BIN_RANGES_NM: dict[str, tuple[float, float]] = {
    "<50nm": (30.0, 50.0),
    "50-100nm": (50.0, 100.0),
    ">100nm": (100.0, 300.0),
}

CDSEMS: tuple[CdSem, ...] = (
    CdSem("SEM-01", "cdsem_long_v2", "etch", 0.00, 0.25),
    CdSem("SEM-02", "cdsem_long_v2", "etch", 0.15, 0.30),
    CdSem("SEM-03", "cdsem_wide_v1", "litho", -0.10, 0.28),
    CdSem("SEM-04", "cdsem_wide_v1", "litho", 0.05, 0.32),
    CdSem("SEM-05", "cdsem_long_v2", "etch", -0.05, 0.27),
)

INSPECTION_TOOLS: tuple[InspectionTool, ...] = (
    InspectionTool("INS-B1", "inspection_jsonl", 0.95),
    InspectionTool("INS-B2", "inspection_parquet", 0.95),
)


@dataclass(frozen=True)
class Site:
    """A measurement site: number and position (mm from the wafer centre)."""

    site_id: int
    x_mm: float
    y_mm: float


def _ring(first: int, radius: float, angles_deg: tuple[float, ...]) -> tuple[Site, ...]:
    return tuple(
        Site(
            first + i,
            round(radius * math.cos(math.radians(a)), 1),
            round(radius * math.sin(math.radians(a)), 1),
        )
        for i, a in enumerate(angles_deg)
    )


SITES_9: tuple[Site, ...] = (
    Site(1, 0.0, 0.0),
    *_ring(2, 75.0, (0.0, 90.0, 180.0, 270.0)),
    *_ring(6, 135.0, (45.0, 135.0, 225.0, 315.0)),
)
"""Production sampling plan: centre, a mid ring at 75 mm and an edge ring at 135 mm (common practice shape)."""

SITES_13: tuple[Site, ...] = SITES_9 + _ring(10, 110.0, (0.0, 90.0, 180.0, 270.0))
"""Qualification-lot plan: the 9 production sites plus 4 at 110 mm."""

EDGE_RADIUS_MM = 120.0
"""Sites at or beyond this radius count as edge sites (bake-plate edge signature)."""


@dataclass(frozen=True)
class SpecRule:
    """How spec limits follow from the target: +-fraction (CD, pitch) or an upper limit only (LWR)."""

    parameter: str
    lower_fraction: float | None
    upper_fraction: float


SPEC_RULES: dict[str, SpecRule] = {
    "cd_mid": SpecRule("cd_mid", 0.10, 0.10),  # target +- 10 % (common practice)
    "cd_top": SpecRule("cd_top", 0.10, 0.10),
    "cd_bot": SpecRule("cd_bot", 0.10, 0.10),
    "pitch": SpecRule("pitch", 0.03, 0.03),
    # Upper limit only, 60 % above the median: about 3.9 sigma of log(LWR) for the fab's sigma_log of 0.12,
    # so an in-control site almost never exceeds it (invented; a tighter limit made every fifth wafer OOS).
    "lwr": SpecRule("lwr", None, 0.60),
}


@dataclass(frozen=True)
class Fab:
    """The whole invented fab, as one value (tests and docs read it)."""

    name: str = FAB_NAME
    products: dict[str, float] = field(default_factory=lambda: dict(PRODUCTS))
    route: tuple[Step, ...] = ROUTE
    layers: tuple[MeasuredLayer, ...] = MEASURED_LAYERS
    inspections: tuple[InspectionStep, ...] = INSPECTION_STEPS
    cdsems: tuple[CdSem, ...] = CDSEMS
    inspection_tools: tuple[InspectionTool, ...] = INSPECTION_TOOLS

    def step(self, name: str) -> Step:
        """Return the route step ``name``."""
        for s in self.route:
            if s.name == name:
                return s
        raise KeyError(f"step {name!r} is not in the route. Steps: {', '.join(s.name for s in self.route)}")

    def layer(self, name: str) -> MeasuredLayer:
        """Return the measured layer ``name``."""
        for m in self.layers:
            if m.name == name:
                return m
        raise KeyError(f"layer {name!r} is not measured. Layers: {', '.join(m.name for m in self.layers)}")

    def cdsem(self, tool: str) -> CdSem:
        """Return the CD-SEM ``tool``."""
        for s in self.cdsems:
            if s.tool == tool:
                return s
        raise KeyError(f"CD-SEM {tool!r} is unknown. CD-SEMs: {', '.join(s.tool for s in self.cdsems)}")

    def step_index(self, name: str) -> int:
        """0-based position of a step in the route."""
        return [s.name for s in self.route].index(name)


FAB = Fab()
