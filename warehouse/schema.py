"""The canonical schema of the lotline warehouse, declared once.

Every stage (ingest adapters, the store, evaluation, the dashboard) uses these declarations; nothing else
defines a column name. Canonical units: lengths in nm, coordinates in mm, areas in cm², times as UTC
timestamps (stored without a zone; every ``*_at`` column is UTC).

Lineage columns carry the reserved ``_`` prefix: ``_source_file_id`` and ``_source_line`` point every fact
row back to the raw export line it came from, ``_superseded_by`` names the file whose corrected re-export
replaced the row (NULL while the row is current).

This module imports nothing heavy: no database driver, no dataframe library at import time.
"""

from __future__ import annotations

from dataclasses import dataclass, field

# Logical dtypes used in declarations. The store maps them to DuckDB types, ingest to Polars dtypes.
STRING = "string"
INT64 = "int64"
FLOAT64 = "float64"
TIMESTAMP = "timestamp"  # UTC, microseconds, stored without a zone
BOOL = "bool"

DTYPES = (STRING, INT64, FLOAT64, TIMESTAMP, BOOL)

# Lineage column names (constants so a typo fails loudly).
C_SOURCE_FILE_ID = "_source_file_id"
C_SOURCE_LINE = "_source_line"
C_SUPERSEDED_BY = "_superseded_by"
LINEAGE_COLUMNS = (C_SOURCE_FILE_ID, C_SOURCE_LINE, C_SUPERSEDED_BY)

WAFER_RADIUS_MM = 150.0
"""300 mm wafers: site coordinates are in mm from the wafer centre, |x|, |y| <= 150."""

PARAMETER_UNITS: dict[str, str] = {
    "cd_top": "nm",
    "cd_mid": "nm",
    "cd_bot": "nm",
    "lwr": "nm",
    "ler": "nm",
    "pitch": "nm",
    "height": "nm",
    "swa": "deg",
}
"""Canonical unit of each known measurement parameter; a parameter not listed is a length in nm."""

SLOT_RANGE = (1, 25)
"""Valid carrier slots (a 25-wafer FOUP)."""

SAMPLE_KINDS = ("production", "monitor", "repeat_study", "reference_feature", "standard_defect")
"""What a measured or inspected wafer is: a product lot, a metrology monitor ("golden") wafer, a
precision study, a feature with a reference measurement, or an inspection standard-defect wafer."""


@dataclass(frozen=True)
class Column:
    """One canonical column: name, logical dtype, nullability, unit and a one-line doc."""

    name: str
    dtype: str
    nullable: bool = True
    unit: str | None = None
    doc: str = ""

    def __post_init__(self) -> None:
        if self.dtype not in DTYPES:
            raise ValueError(
                f"column {self.name!r}: unknown dtype {self.dtype!r}; known: {', '.join(DTYPES)}"
            )
        if not self.doc:
            raise ValueError(f"column {self.name!r} needs a doc line")


@dataclass(frozen=True)
class Table:
    """A canonical table.

    ``natural_key`` identifies a row: two rows of one file with the same key are duplicates (rejected), and
    a row whose key is already stored is skipped. ``supersede_key`` groups the rows that a corrected
    re-export replaces as a whole (empty: the table is never superseded).
    """

    name: str
    doc: str
    columns: tuple[Column, ...]
    natural_key: tuple[str, ...] = ()
    supersede_key: tuple[str, ...] = ()
    is_fact: bool = False
    names: tuple[str, ...] = field(init=False)

    def __post_init__(self) -> None:
        names = tuple(c.name for c in self.columns)
        object.__setattr__(self, "names", names)
        if len(set(names)) != len(names):
            raise ValueError(f"table {self.name!r} declares a column twice")
        for key in (*self.natural_key, *self.supersede_key):
            if key not in names:
                raise ValueError(f"table {self.name!r}: key column {key!r} is not declared")

    def column(self, name: str) -> Column:
        """Return the declared column ``name``; the error lists the columns that exist."""
        for c in self.columns:
            if c.name == name:
                return c
        raise KeyError(
            f"column {name!r} is not in table {self.name!r}. Existing columns: {', '.join(self.names)}"
        )

    @property
    def data_columns(self) -> tuple[str, ...]:
        """Columns an export supplies (everything but lineage)."""
        return tuple(n for n in self.names if not n.startswith("_"))

    @property
    def required(self) -> tuple[str, ...]:
        """Non-nullable columns an export must supply."""
        return tuple(c.name for c in self.columns if not c.nullable and not c.name.startswith("_"))


def _lineage() -> tuple[Column, ...]:
    return (
        Column(
            C_SOURCE_FILE_ID,
            INT64,
            nullable=False,
            doc="Id of the raw export (source_files.file_id) this row came from",
        ),
        Column(C_SOURCE_LINE, INT64, nullable=False, doc="1-based line (or record) in that export"),
        Column(
            C_SUPERSEDED_BY,
            INT64,
            doc="file_id of the corrected re-export that replaced this row; NULL while current",
        ),
    )


# ---------------------------------------------------------------------------------------------- facts

MEASUREMENTS = Table(
    "measurements",
    "Site measurements from CD-SEM (and other) metrology: one row per site, feature, parameter and repeat.",
    (
        Column("lot_id", STRING, nullable=False, doc="Lot id exactly as exported"),
        Column(
            "wafer_id",
            STRING,
            nullable=False,
            doc="Wafer id (scribe); the identity of a wafer, unlike its slot",
        ),
        Column(
            "slot", INT64, doc="Slot of the wafer in its carrier at measurement (1..25); informational only"
        ),
        Column("site_id", STRING, nullable=False, doc="Measurement site name or number within the wafer"),
        Column("x_mm", FLOAT64, unit="mm", doc="Site x from the wafer centre"),
        Column("y_mm", FLOAT64, unit="mm", doc="Site y from the wafer centre"),
        Column("product", STRING, nullable=False, doc="Product (device) name"),
        Column("layer", STRING, nullable=False, doc="Layer or metrology step the measurement belongs to"),
        Column("stage", STRING, doc="Process stage of the measured feature: 'develop' (resist) or 'etch'"),
        Column(
            "parameter",
            STRING,
            nullable=False,
            doc="Measured quantity, e.g. cd_mid, cd_top, lwr, ler, pitch, swa",
        ),
        Column("feature", STRING, doc="Measurement target (structure) name at the site; NULL when only one"),
        Column("value", FLOAT64, nullable=False, doc="Measured value in the canonical unit of the parameter"),
        Column(
            "unit", STRING, nullable=False, doc="Canonical unit of value: 'nm' for lengths, 'deg' for angles"
        ),
        Column("measured_at", TIMESTAMP, nullable=False, doc="When the site was measured (UTC)"),
        Column("metrology_tool", STRING, nullable=False, doc="Metrology tool that measured it"),
        Column("recipe", STRING, doc="Metrology recipe"),
        Column(
            "repeat", INT64, nullable=False, doc="Repeat index of a repeated measurement (1 for a single one)"
        ),
        Column(
            "sample_kind", STRING, nullable=False, doc="production, monitor, repeat_study, reference_feature"
        ),
        *_lineage(),
    ),
    natural_key=(
        "lot_id",
        "wafer_id",
        "layer",
        "parameter",
        "site_id",
        "feature",
        "repeat",
        "metrology_tool",
        "measured_at",
    ),
    supersede_key=("lot_id", "wafer_id", "layer", "parameter", "metrology_tool"),
    is_fact=True,
)

INSPECTIONS = Table(
    "inspections",
    "Wafer inspections: one row per inspected wafer and inspection, with the inspected area and totals.",
    (
        Column("lot_id", STRING, nullable=False, doc="Lot id exactly as exported"),
        Column("wafer_id", STRING, nullable=False, doc="Wafer id (scribe)"),
        Column("product", STRING, nullable=False, doc="Product (device) name"),
        Column("layer", STRING, nullable=False, doc="Layer / inspection step"),
        Column("inspection_tool", STRING, nullable=False, doc="Inspection tool"),
        Column("recipe", STRING, doc="Inspection recipe"),
        Column("inspected_at", TIMESTAMP, nullable=False, doc="When the wafer was inspected (UTC)"),
        Column("inspected_area_cm2", FLOAT64, nullable=False, unit="cm2", doc="Area actually inspected"),
        Column("defect_count", INT64, nullable=False, doc="Defects found in the inspected area"),
        Column(
            "adder_count",
            INT64,
            doc="Defects new since the previous inspection of this wafer; NULL if unknown",
        ),
        Column("sample_kind", STRING, nullable=False, doc="production, monitor, standard_defect"),
        *_lineage(),
    ),
    natural_key=("lot_id", "wafer_id", "layer", "inspection_tool", "inspected_at"),
    supersede_key=("lot_id", "wafer_id", "layer", "inspection_tool"),
    is_fact=True,
)

DEFECT_COUNTS = Table(
    "defect_counts",
    "Per-class and per-size-bin defect counts of one wafer inspection.",
    (
        Column("lot_id", STRING, nullable=False, doc="Lot id"),
        Column("wafer_id", STRING, nullable=False, doc="Wafer id"),
        Column("layer", STRING, nullable=False, doc="Layer / inspection step"),
        Column("inspection_tool", STRING, nullable=False, doc="Inspection tool"),
        Column("inspected_at", TIMESTAMP, nullable=False, doc="When the wafer was inspected (UTC)"),
        Column("defect_class", STRING, nullable=False, doc="Defect class (e.g. particle, scratch, residue)"),
        Column("size_bin", STRING, nullable=False, doc="Size bin label, e.g. '<50nm', '50-100nm', '>100nm'"),
        Column("count", INT64, nullable=False, doc="Defects of that class and size"),
        *_lineage(),
    ),
    natural_key=(
        "lot_id",
        "wafer_id",
        "layer",
        "inspection_tool",
        "inspected_at",
        "defect_class",
        "size_bin",
    ),
    supersede_key=("lot_id", "wafer_id", "layer", "inspection_tool"),
    is_fact=True,
)

DEFECTS = Table(
    "defects",
    "Individual defects with coordinates, when the inspection exports them.",
    (
        Column("lot_id", STRING, nullable=False, doc="Lot id"),
        Column("wafer_id", STRING, nullable=False, doc="Wafer id"),
        Column("layer", STRING, nullable=False, doc="Layer / inspection step"),
        Column("inspection_tool", STRING, nullable=False, doc="Inspection tool"),
        Column("inspected_at", TIMESTAMP, nullable=False, doc="When the wafer was inspected (UTC)"),
        Column("defect_id", INT64, nullable=False, doc="Defect number within the inspection"),
        Column("x_mm", FLOAT64, nullable=False, unit="mm", doc="Defect x from the wafer centre"),
        Column("y_mm", FLOAT64, nullable=False, unit="mm", doc="Defect y from the wafer centre"),
        Column("size_nm", FLOAT64, unit="nm", doc="Reported defect size"),
        Column("defect_class", STRING, doc="Defect class"),
        *_lineage(),
    ),
    natural_key=("lot_id", "wafer_id", "layer", "inspection_tool", "inspected_at", "defect_id"),
    supersede_key=("lot_id", "wafer_id", "layer", "inspection_tool"),
    is_fact=True,
)

PROCESS_HISTORY = Table(
    "process_history",
    "Lot process history: which process tool, chamber and recipe each lot (or wafer) ran at each step.",
    (
        Column("lot_id", STRING, nullable=False, doc="Lot id"),
        Column("wafer_id", STRING, doc="Wafer id when the step is tracked per wafer; NULL for the whole lot"),
        Column("product", STRING, doc="Product (device) name"),
        Column("step", STRING, nullable=False, doc="Route step name"),
        Column("step_seq", INT64, doc="Position of the step in the route (1-based)"),
        Column("process_tool", STRING, nullable=False, doc="Process tool that ran the step"),
        Column("chamber", STRING, doc="Chamber (or module) of the tool; NULL for single-chamber tools"),
        Column("recipe", STRING, doc="Process recipe"),
        Column("started_at", TIMESTAMP, nullable=False, doc="Step start (UTC)"),
        Column("ended_at", TIMESTAMP, doc="Step end (UTC)"),
        *_lineage(),
    ),
    natural_key=("lot_id", "wafer_id", "step", "started_at"),
    supersede_key=("lot_id", "step"),
    is_fact=True,
)

TOOL_EVENTS = Table(
    "tool_events",
    "Maintenance and other events on process or metrology tools (markers on charts, commonality context).",
    (
        Column("tool", STRING, nullable=False, doc="Tool id"),
        Column("chamber", STRING, doc="Chamber; NULL for the whole tool"),
        Column("event_at", TIMESTAMP, nullable=False, doc="When the event happened (UTC)"),
        Column("event_kind", STRING, nullable=False, doc="e.g. preventive_maintenance, repair, calibration"),
        Column("note", STRING, doc="Free text"),
        *_lineage(),
    ),
    natural_key=("tool", "chamber", "event_at", "event_kind"),
    is_fact=True,
)

SPEC_LIMITS = Table(
    "spec_limits",
    "Specification limits per product, layer and parameter, effective-dated.",
    (
        Column("product", STRING, nullable=False, doc="Product, or '*' for every product"),
        Column("layer", STRING, nullable=False, doc="Layer"),
        Column("parameter", STRING, nullable=False, doc="Parameter"),
        Column("lsl", FLOAT64, doc="Lower specification limit (canonical unit); NULL if one-sided"),
        Column("target", FLOAT64, doc="Target (canonical unit)"),
        Column("usl", FLOAT64, doc="Upper specification limit (canonical unit); NULL if one-sided"),
        Column("unit", STRING, nullable=False, doc="Canonical unit of the limits"),
        Column("effective_from", TIMESTAMP, nullable=False, doc="First instant the limits apply (UTC)"),
        Column(
            "effective_to", TIMESTAMP, doc="First instant they no longer apply (UTC); NULL: still in force"
        ),
        *_lineage(),
    ),
    natural_key=("product", "layer", "parameter", "effective_from"),
    is_fact=True,
)

REFERENCE_VALUES = Table(
    "reference_values",
    "Reference measurements of features (cross-section TEM, AFM) for accuracy studies.",
    (
        Column("feature", STRING, nullable=False, doc="Feature id; CD-SEM rows of the same feature share it"),
        Column("layer", STRING, nullable=False, doc="Layer"),
        Column("parameter", STRING, nullable=False, doc="Parameter"),
        Column("reference_value", FLOAT64, nullable=False, doc="Reference value (canonical unit)"),
        Column(
            "reference_uncertainty",
            FLOAT64,
            doc="Standard uncertainty (1 sigma) of the reference (canonical unit)",
        ),
        Column("unit", STRING, nullable=False, doc="Canonical unit"),
        Column("reference_method", STRING, nullable=False, doc="e.g. xsem_tem, afm"),
        Column("measured_at", TIMESTAMP, doc="When the reference was measured (UTC)"),
        *_lineage(),
    ),
    natural_key=("feature", "layer", "parameter", "reference_method"),
    is_fact=True,
)

FACT_TABLES: tuple[Table, ...] = (
    MEASUREMENTS,
    INSPECTIONS,
    DEFECT_COUNTS,
    DEFECTS,
    PROCESS_HISTORY,
    TOOL_EVENTS,
    SPEC_LIMITS,
    REFERENCE_VALUES,
)

# ----------------------------------------------------------------------------------------- operations

SOURCE_FILES = Table(
    "source_files",
    "Every export file lotline was asked to load, with its content hash and outcome.",
    (
        Column("file_id", INT64, nullable=False, doc="Warehouse-assigned id"),
        Column("path", STRING, nullable=False, doc="Path as given to ingest"),
        Column(
            "sha256", STRING, nullable=False, doc="SHA-256 of the file's bytes (the same bytes load once)"
        ),
        Column("size_bytes", INT64, nullable=False, doc="File size"),
        Column("kind", STRING, doc="Data kind the file held (table name of its main facts)"),
        Column("profile", STRING, doc="Export profile used to read it"),
        Column("status", STRING, nullable=False, doc="loaded, failed or duplicate"),
        Column("rows_loaded", INT64, nullable=False, doc="Fact rows stored from the file"),
        Column("rows_rejected", INT64, nullable=False, doc="Rows sent to the rejects table"),
        Column("rows_skipped", INT64, nullable=False, doc="Rows already stored under the same natural key"),
        Column(
            "rows_superseded",
            INT64,
            nullable=False,
            doc="Older rows this file's corrected re-export replaced",
        ),
        Column("loaded_at", TIMESTAMP, nullable=False, doc="When the load finished (UTC)"),
        Column("loaded_by", STRING, nullable=False, doc="User name that ran the load"),
        Column("message", STRING, doc="Error message of a failed file"),
    ),
)

REJECTS = Table(
    "rejects",
    "Rows that failed validation, with where they were and why.",
    (
        Column("file_id", INT64, nullable=False, doc="Export file (source_files.file_id)"),
        Column("line", INT64, nullable=False, doc="1-based line (record) in the file"),
        Column("column", STRING, doc="Column of the raw export that was wrong; NULL for a row-level problem"),
        Column("value", STRING, doc="Raw value found"),
        Column("reason", STRING, nullable=False, doc="What was wrong and how to fix it"),
    ),
)

SUPERSESSIONS = Table(
    "supersessions",
    "Audit of corrected re-exports: which file replaced which rows, when and by whom.",
    (
        Column("file_id", INT64, nullable=False, doc="The corrected re-export"),
        Column("superseded_file_id", INT64, nullable=False, doc="The file whose rows it replaced"),
        Column("table_name", STRING, nullable=False, doc="Fact table the rows are in"),
        Column("lot_id", STRING, nullable=False, doc="Lot the rows belong to"),
        Column("rows", INT64, nullable=False, doc="Rows marked superseded"),
        Column("superseded_at", TIMESTAMP, nullable=False, doc="When (UTC)"),
        Column("superseded_by_user", STRING, nullable=False, doc="User name that ran the load"),
    ),
)

SCHEMA_VERSION = Table(
    "schema_version",
    "Migrations applied to this warehouse file.",
    (
        Column("version", INT64, nullable=False, doc="Schema version number"),
        Column("applied_at", TIMESTAMP, nullable=False, doc="When the migration ran (UTC)"),
        Column("note", STRING, nullable=False, doc="What the migration did"),
    ),
)

META = Table(
    "meta",
    "Small key/value facts about the warehouse (e.g. data_version, bumped by every write).",
    (
        Column("key", STRING, nullable=False, doc="Name"),
        Column("value", STRING, nullable=False, doc="Value as text"),
    ),
)

OPERATION_TABLES: tuple[Table, ...] = (SOURCE_FILES, REJECTS, SUPERSESSIONS, SCHEMA_VERSION, META)

# ----------------------------------------------------------------------------------------- monitoring
# The monitoring plan, the series it expands to, frozen control-limit versions, signals, excursions and
# their append-only audit trail, and per-series evaluation state (created by migration 2).

SEVERITIES = ("low", "medium", "high", "critical")
"""Severity levels a plan entry may carry, lowest first."""

EXCURSION_STATES = ("open", "acknowledged", "closed")
"""States of an excursion; changes are appended to excursion_audit."""

CLASSIFICATIONS = ("real", "measurement", "false_alarm")
"""Disposition classification of an excursion."""

PLANS = Table(
    "plans",
    "Every monitoring plan loaded with `lotline plan load`; the highest plan_version is in force.",
    (
        Column("plan_version", INT64, nullable=False, doc="1, 2, ... in load order"),
        Column("path", STRING, nullable=False, doc="Plan file as given to `plan load`"),
        Column("sha256", STRING, nullable=False, doc="SHA-256 of the plan file's bytes"),
        Column("text", STRING, nullable=False, doc="The plan file's text as loaded (for audits)"),
        Column("loaded_at", TIMESTAMP, nullable=False, doc="When it was loaded (UTC)"),
        Column("loaded_by", STRING, nullable=False, doc="User name that loaded it"),
    ),
)

CHART_PLAN = Table(
    "chart_plan",
    "Entries of the monitoring plans: one row per [[chart]] entry and plan version.",
    (
        Column(
            "plan_version",
            INT64,
            nullable=False,
            doc="Plan version (plans.plan_version) the entry belongs to",
        ),
        Column("chart", STRING, nullable=False, doc="Entry name, unique within a plan (the chart's id)"),
        Column("layer", STRING, nullable=False, doc="Layer selector; '*' and '?' wildcards allowed"),
        Column(
            "parameter",
            STRING,
            nullable=False,
            doc="Parameter selector (or defect class for densities); wildcards allowed",
        ),
        Column("product", STRING, nullable=False, doc="Product selector; '*' for every product"),
        Column("stage", STRING, nullable=False, doc="Stage selector (develop / etch); '*' for any"),
        Column("sample_kind", STRING, nullable=False, doc="Sample kind selected (production, monitor, ...)"),
        Column(
            "statistic",
            STRING,
            nullable=False,
            doc="Charted statistic: site_value, wafer_mean, wafer_sd, ...",
        ),
        Column(
            "split_json", STRING, nullable=False, doc="JSON list of split keys (process_tool, chamber, ...)"
        ),
        Column("step", STRING, doc="Route step whose process tool/chamber made the layer (for tool splits)"),
        Column(
            "chart_type",
            STRING,
            nullable=False,
            doc="individuals, xbar_s, xbar_r, ewma, cusum, u, laney_u, negbin_u",
        ),
        Column(
            "params_json",
            STRING,
            nullable=False,
            doc="JSON object of chart parameters (lambda, L, k, h, ...)",
        ),
        Column("rules_json", STRING, nullable=False, doc="JSON list of run-rule ids (default ['we1'])"),
        Column(
            "baseline_json", STRING, nullable=False, doc="JSON object: {'first': N} or {'from': ts, 'to': ts}"
        ),
        Column("severity", STRING, nullable=False, doc="low, medium, high or critical"),
        Column("spec_check", BOOL, nullable=False, doc="Whether out-of-spec points raise an `oos` signal"),
        Column("line", INT64, nullable=False, doc="Line of the entry's [[chart]] header in the plan file"),
    ),
)

CHART_SERIES = Table(
    "chart_series",
    "Series a plan entry expands to: one per concrete layer, parameter and combination of split keys.",
    (
        Column("series_id", INT64, nullable=False, doc="Warehouse-assigned id"),
        Column("chart", STRING, nullable=False, doc="Plan entry name (chart_plan.chart)"),
        Column("layer", STRING, nullable=False, doc="Concrete layer of the series"),
        Column("parameter", STRING, nullable=False, doc="Concrete parameter (or defect class / 'total')"),
        Column("split_json", STRING, nullable=False, doc="JSON object of split key -> value, keys sorted"),
        Column("process_tool", STRING, doc="Process tool of the series when split by it"),
        Column("chamber", STRING, doc="Chamber of the series when split by it"),
        Column("metrology_tool", STRING, doc="Metrology or inspection tool when split by it"),
        Column("product", STRING, doc="Product of the series when split by it"),
        Column(
            "created_at",
            TIMESTAMP,
            nullable=False,
            doc="When the series first appeared in an evaluation (UTC)",
        ),
    ),
)

CONTROL_LIMITS = Table(
    "control_limits",
    "Frozen control-limit versions per series; evaluation never re-estimates them.",
    (
        Column("series_id", INT64, nullable=False, doc="Series (chart_series.series_id)"),
        Column("version", INT64, nullable=False, doc="1, 2, ... per series; the highest is in force"),
        Column("center", FLOAT64, nullable=False, doc="Centre line of the charted statistic"),
        Column("sigma", FLOAT64, nullable=False, doc="Sigma of the charted statistic (one point)"),
        Column(
            "sigma_level", STRING, nullable=False, doc="Level the sigma belongs to: site, wafer, lot, count"
        ),
        Column(
            "sigma_source",
            STRING,
            nullable=False,
            doc="How sigma was chosen, e.g. variance_components, moving_range",
        ),
        Column(
            "k_sigma",
            FLOAT64,
            nullable=False,
            doc="Width of the Shewhart limits in sigmas (3 unless the plan says)",
        ),
        Column("lcl", FLOAT64, doc="Lower control limit of the statistic (NULL when one-sided)"),
        Column("ucl", FLOAT64, doc="Upper control limit of the statistic"),
        Column(
            "n_ref", FLOAT64, doc="Reference subgroup size / area the sigma is given for (attribute charts)"
        ),
        Column("overdispersion", FLOAT64, doc="Laney sigma_z (u' charts); NULL otherwise"),
        Column("baseline_from", TIMESTAMP, doc="First point time of the baseline (UTC)"),
        Column("baseline_to", TIMESTAMP, doc="Last point time of the baseline (UTC)"),
        Column("baseline_n", INT64, nullable=False, doc="Points (subgroups) in the baseline"),
        Column("frozen_at", TIMESTAMP, nullable=False, doc="When the version was frozen (UTC)"),
        Column(
            "frozen_by",
            STRING,
            nullable=False,
            doc="User that froze it; 'lotline-auto' for automatic freezes",
        ),
        Column("reason", STRING, nullable=False, doc="Why the limits were (re)frozen"),
    ),
)

SIGNALS = Table(
    "signals",
    "Out-of-control and out-of-spec signals, one per series, point and rule; withdrawn, never deleted.",
    (
        Column("signal_id", INT64, nullable=False, doc="Warehouse-assigned id"),
        Column("series_id", INT64, nullable=False, doc="Series (chart_series.series_id)"),
        Column(
            "point_key",
            STRING,
            nullable=False,
            doc="Identity of the point within the series (lot|wafer|site...)",
        ),
        Column("lot_id", STRING, nullable=False, doc="Lot of the point"),
        Column("wafer_id", STRING, doc="Wafer of the point; NULL for lot-level points"),
        Column(
            "point_at",
            TIMESTAMP,
            nullable=False,
            doc="Time of the point (first measurement or inspection, UTC)",
        ),
        Column(
            "point_seq",
            INT64,
            nullable=False,
            doc="1-based position of the point in its series at evaluation",
        ),
        Column(
            "rule", STRING, nullable=False, doc="Rule id: we1..we4, n1..n8, ewma, cusum_hi, cusum_lo, oos"
        ),
        Column("value", FLOAT64, nullable=False, doc="Charted value of the point"),
        Column(
            "statistic",
            FLOAT64,
            doc="Chart statistic that crossed (EWMA z, CUSUM sum); NULL for rules on values",
        ),
        Column("limit_version", INT64, doc="control_limits.version in force; NULL for oos signals"),
        Column("severity", STRING, nullable=False, doc="Severity of the plan entry"),
        Column(
            "first_detected_at", TIMESTAMP, nullable=False, doc="Evaluation time that first found it (UTC)"
        ),
        Column("withdrawn_at", TIMESTAMP, doc="When it was withdrawn (UTC); NULL while standing"),
        Column("withdrawn_reason", STRING, doc="Why: superseded data, re-evaluation no longer finds it, ..."),
        Column("excursion_id", INT64, doc="Excursion the signal belongs to"),
    ),
)

EXCURSIONS = Table(
    "excursions",
    "Signals grouped per series into excursions (consecutive or overlapping points).",
    (
        Column("excursion_id", INT64, nullable=False, doc="Warehouse-assigned id"),
        Column("series_id", INT64, nullable=False, doc="Series (chart_series.series_id)"),
        Column("chart", STRING, nullable=False, doc="Plan entry name"),
        Column("state", STRING, nullable=False, doc="open, acknowledged or closed (latest audit row)"),
        Column("severity", STRING, nullable=False, doc="Highest severity of its signals"),
        Column("first_at", TIMESTAMP, nullable=False, doc="Time of its first signalled point (UTC)"),
        Column("last_at", TIMESTAMP, nullable=False, doc="Time of its last signalled point (UTC)"),
        Column("rules_json", STRING, nullable=False, doc="JSON list of the rules that fired, sorted"),
        Column(
            "lots_json", STRING, nullable=False, doc="JSON list of the lots of its signalled points, sorted"
        ),
        Column("n_signals", INT64, nullable=False, doc="Standing (not withdrawn) signals in it"),
        Column("opened_at", TIMESTAMP, nullable=False, doc="When the excursion was opened (UTC)"),
    ),
)

EXCURSION_AUDIT = Table(
    "excursion_audit",
    "Append-only history of every excursion change and disposition: who, when, what and why.",
    (
        Column("audit_id", INT64, nullable=False, doc="Warehouse-assigned id, increasing"),
        Column("excursion_id", INT64, nullable=False, doc="Excursion (excursions.excursion_id)"),
        Column("changed_at", TIMESTAMP, nullable=False, doc="When (UTC)"),
        Column(
            "changed_by", STRING, nullable=False, doc="User; 'lotline-auto' for changes made by evaluation"
        ),
        Column("from_state", STRING, doc="State before (NULL when the excursion was opened)"),
        Column("to_state", STRING, nullable=False, doc="State after"),
        Column("classification", STRING, doc="real, measurement or false_alarm"),
        Column("cause_category", STRING, doc="Cause category, e.g. process_tool, metrology, material"),
        Column("action", STRING, doc="Action taken (as decided under the fab's OCAP)"),
        Column("lots_affected_json", STRING, doc="JSON list of lots the disposition covers"),
        Column("comment", STRING, doc="Free text"),
    ),
)

SERIES_STATE = Table(
    "series_state",
    "Per-series evaluation state, so an incremental run reads only newer points.",
    (
        Column("series_id", INT64, nullable=False, doc="Series (chart_series.series_id)"),
        Column("limit_version", INT64, doc="Limit version the state was computed with"),
        Column("last_point_at", TIMESTAMP, doc="Time of the last evaluated point (UTC)"),
        Column("last_point_key", STRING, doc="Key of the last evaluated point"),
        Column("n_points", INT64, nullable=False, doc="Points evaluated so far"),
        Column("ewma", FLOAT64, doc="EWMA statistic after the last point"),
        Column("cusum_hi", FLOAT64, doc="Upper CUSUM after the last point"),
        Column("cusum_lo", FLOAT64, doc="Lower CUSUM after the last point"),
        Column("context_json", STRING, doc="JSON of the last points run rules need (value, center, sigma)"),
        Column("evaluated_at", TIMESTAMP, nullable=False, doc="When the state was written (UTC)"),
    ),
)

EVALUATION_RUNS = Table(
    "evaluation_runs",
    "Log of `lotline evaluate` runs with the data watermark they covered.",
    (
        Column("run_id", INT64, nullable=False, doc="Warehouse-assigned id"),
        Column("started_at", TIMESTAMP, nullable=False, doc="Start (UTC)"),
        Column("finished_at", TIMESTAMP, nullable=False, doc="End (UTC)"),
        Column("mode", STRING, nullable=False, doc="full or incremental"),
        Column("plan_version", INT64, nullable=False, doc="Plan version evaluated"),
        Column(
            "watermark_file_id", INT64, nullable=False, doc="Highest source_files.file_id the run covered"
        ),
        Column("series", INT64, nullable=False, doc="Series evaluated"),
        Column("points", INT64, nullable=False, doc="Points read"),
        Column("signals_new", INT64, nullable=False, doc="Signals added"),
        Column("signals_withdrawn", INT64, nullable=False, doc="Signals withdrawn"),
        Column("run_by", STRING, nullable=False, doc="User name"),
    ),
)

LOT_FIRST_FILES = Table(
    "lot_first_files",
    "Per fact table and lot, the first source file holding rows of the lot (lets incremental evaluation skip "
    "older files).",
    (
        Column(
            "table_name",
            STRING,
            nullable=False,
            doc="Fact table (measurements, inspections, defect_counts, process_history)",
        ),
        Column("lot_id", STRING, nullable=False, doc="Lot id"),
        Column(
            "first_file_id", INT64, nullable=False, doc="Smallest source_files.file_id with rows of the lot"
        ),
    ),
)

CHART_POINTS = Table(
    "chart_points",
    "The evaluated points of every series with the limits they were evaluated under, written by evaluation in "
    "the same transaction as its signals and stored in series order (one chart's read is a range scan).",
    (
        Column("series_id", INT64, nullable=False, doc="Series (chart_series.series_id)"),
        Column("seq", INT64, nullable=False, doc="1-based position of the point in its series (chart order)"),
        Column("point_key", STRING, nullable=False, doc="Key of the point within its series"),
        Column("lot_id", STRING, doc="Lot of the point"),
        Column("wafer_id", STRING, doc="Wafer of the point (NULL for a lot-mean point)"),
        Column("point_at", TIMESTAMP, doc="Time of the point's first measurement or its inspection (UTC)"),
        Column("value", FLOAT64, doc="Charted value (unit of the parameter, or defects per cm²)"),
        Column("n", INT64, doc="Rows, sites or defects behind the point"),
        Column("center", FLOAT64, doc="Centre line of the limit version in force (NULL before a freeze)"),
        Column("sigma", FLOAT64, doc="Sigma of this point under that version (varies with area on u charts)"),
        Column("lcl", FLOAT64, doc="Lower control limit of this point (center - k sigma)"),
        Column("ucl", FLOAT64, doc="Upper control limit of this point (center + k sigma)"),
        Column(
            "limit_version", INT64, doc="Limit version the point was evaluated with (NULL before a freeze)"
        ),
    ),
)

TOOL_DAYS = Table(
    "tool_days",
    "Per tool and UTC day, the current fact rows and the newest time seen; refreshed inside each file's "
    "ingest transaction for the tool-days it wrote or superseded (data freshness reads it).",
    (
        Column("tool", STRING, nullable=False, doc="Metrology, inspection or process tool"),
        Column("tool_kind", STRING, nullable=False, doc="metrology, inspection or process"),
        Column(
            "day",
            TIMESTAMP,
            nullable=False,
            doc="UTC day (midnight) of measured_at, inspected_at or started_at",
        ),
        Column("n_rows", INT64, nullable=False, doc="Current (not superseded) rows of the tool on that day"),
        Column(
            "last_seen",
            TIMESTAMP,
            nullable=False,
            doc="Newest measured_at, inspected_at or coalesce(ended_at, started_at) of those rows (UTC)",
        ),
    ),
)

DERIVED_TABLES: tuple[Table, ...] = (CHART_POINTS, TOOL_DAYS)
"""Tables derived from the others and kept up to date by evaluation and ingest (created by migration 4)."""

MONITORING_TABLES: tuple[Table, ...] = (
    PLANS,
    CHART_PLAN,
    CHART_SERIES,
    CONTROL_LIMITS,
    SIGNALS,
    EXCURSIONS,
    EXCURSION_AUDIT,
    SERIES_STATE,
    EVALUATION_RUNS,
    LOT_FIRST_FILES,
)

TABLES: tuple[Table, ...] = FACT_TABLES + OPERATION_TABLES + MONITORING_TABLES + DERIVED_TABLES
"""Every table of the warehouse, in creation order."""


def table(name: str) -> Table:
    """Return the declared table ``name``; the error lists the tables that exist."""
    for t in TABLES:
        if t.name == name:
            return t
    raise KeyError(f"table {name!r} is not declared. Known tables: {', '.join(t.name for t in TABLES)}")


def polars_schema(t: Table) -> dict[str, object]:
    """Polars dtypes of a table's columns (imports polars lazily, so this module stays light)."""
    import polars as pl

    mapping = {
        STRING: pl.String,
        INT64: pl.Int64,
        FLOAT64: pl.Float64,
        TIMESTAMP: pl.Datetime("us"),
        BOOL: pl.Boolean,
    }
    return {c.name: mapping[c.dtype] for c in t.columns}


def data_dictionary_markdown() -> str:
    """The data dictionary (every table and column with unit and doc) as Markdown, generated from here."""
    lines: list[str] = []
    for t in TABLES:
        lines.append(f"### `{t.name}`\n\n{t.doc}\n")
        lines.append("| column | type | unit | required | description |")
        lines.append("| --- | --- | --- | --- | --- |")
        for c in t.columns:
            lines.append(
                f"| `{c.name}` | {c.dtype} | {c.unit or ''} | {'yes' if not c.nullable else ''} | {c.doc} |"
            )
        lines.append("")
    return "\n".join(lines)
