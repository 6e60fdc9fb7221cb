"""Writers of the demo fab's exports, one per dialect of ``DIALECTS.md``, and the planned bad rows.

Each writer takes canonical frames and writes files under ``exports/``; they return what they wrote so
``truth.json`` can list the files, the planned rejects and the expected warehouse row counts. Output is
byte-for-byte deterministic for a given simulation (no clock, no random names, sorted rows).
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field
from pathlib import Path

import polars as pl

from demo_fab import fab as fabmod
from demo_fab.generate import DemoData

LONG_HEADER = (
    "LotID,WaferID,Slot,Site,X_mm,Y_mm,Product,Layer,Stage,Parameter,Feature,Value_nm,MeasTime,Tool,"
    "Recipe,Repeat,SampleType"
)
WIDE_HEADER = (
    "Lot;Wafer;Slot;SiteNo;PosX_um;PosY_um;Device;Level;CD_MID_um;CD_TOP_um;LWR_um;MeasDate;Equipment;Recipe"
)
HISTORY_HEADER = "lot,wafer,product,step,seq,tool,chamber,recipe,track_in,track_out"
REFERENCE_HEADER = "feature_id,layer,parameter,ref_value_A,ref_sigma_A,method,measured"
SPEC_HEADER = "product,layer,parameter,lsl,target,usl,unit,effective_from,effective_to"
EVENTS_HEADER = "tool,chamber,event_at,event_kind,note"
PARQUET_COLUMNS = (
    "LOT",
    "WAFER",
    "PRODUCT",
    "LAYER",
    "TOOL",
    "RECIPE",
    "INSPECT_TIME",
    "AREA_CM2",
    "COUNT",
    "ADDERS",
    "KIND",
)

STAGE_CODE = {"develop": "DEV", "etch": "ETCH"}
KIND_CODE = {
    "production": "PROD",
    "monitor": "MON",
    "repeat_study": "REPEAT",
    "reference_feature": "REF",
    "standard_defect": "STD",
}
METHOD_CODE = {"xsem_tem": "TEM", "afm": "AFM"}
ISO_Z = "%Y-%m-%dT%H:%M:%SZ"
ISO_OFFSET = "%Y-%m-%dT%H:%M:%S%:z"


@dataclass
class ExportResult:
    """What the writers produced: files per dialect, planned rejects and failures, expected rows."""

    files: dict[str, list[str]] = field(default_factory=dict)
    planned_rejects: list[dict[str, object]] = field(default_factory=list)
    planned_failed_files: list[dict[str, object]] = field(default_factory=list)
    expected_rows: dict[str, int] = field(default_factory=dict)
    corrected_reexport: dict[str, object] = field(default_factory=dict)

    def add(self, dialect: str, rel: str) -> None:
        self.files.setdefault(dialect, []).append(rel)


def _write(root: Path, rel: str, data: bytes) -> None:
    path = root / rel
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_bytes(data)


def _local(col: str, fmt: str) -> pl.Expr:
    return pl.col(col).dt.replace_time_zone("UTC").dt.convert_time_zone(fabmod.LOCAL_TZ).dt.strftime(fmt)


# ------------------------------------------------------------------------------------------- CD-SEM


def _long_frame(m: pl.DataFrame) -> pl.DataFrame:
    return m.select(
        LotID=pl.col("lot_id"),
        WaferID=pl.col("wafer_id"),
        Slot=pl.col("slot"),
        Site=pl.col("site_id"),
        X_mm=pl.col("x_mm").round(1),
        Y_mm=pl.col("y_mm").round(1),
        Product=pl.col("product"),
        Layer=pl.col("layer"),
        Stage=pl.col("stage").replace_strict(STAGE_CODE),
        Parameter=pl.col("parameter").str.to_uppercase(),
        Feature=pl.col("feature"),
        Value_nm=pl.col("value").round(3).cast(pl.String),
        MeasTime=pl.col("measured_at").dt.strftime(ISO_Z),
        Tool=pl.col("metrology_tool"),
        Recipe=pl.col("recipe"),
        Repeat=pl.col("repeat"),
        SampleType=pl.col("sample_kind").replace_strict(KIND_CODE),
    )


def _long_bytes(frame: pl.DataFrame) -> bytes:
    text = frame.write_csv(float_precision=1, null_value="")
    assert text.startswith(LONG_HEADER + "\n")
    return text.encode("utf-8")


def write_cdsem(root: Path, data: DemoData, res: ExportResult) -> None:
    """CD-SEM exports: long files per tool and UTC day, wide files per wide tool and local day."""
    cfg = data.config
    m = data.measurements
    wide_tools = [s.tool for s in cfg.fab.cdsems if s.dialect == "cdsem_wide_v1"]
    is_wide = pl.col("metrology_tool").is_in(wide_tools) & (pl.col("sample_kind") == "production")
    # a production lot-layer measurement goes into the file of the day it started, whole: a lot split over two
    # daily files would look like a corrected re-export of its first part
    event = ["lot_id", "layer", "metrology_tool", "sample_kind"]
    started = (
        pl.when(pl.col("sample_kind") == "production")
        .then(pl.col("measured_at").min().over(event))
        .otherwise(pl.col("measured_at"))
    )
    long_m = m.filter(~is_wide).with_columns(_day=started.dt.strftime("%Y%m%d"))
    wide_m = m.filter(is_wide).with_columns(_start=pl.col("measured_at").min().over(event))

    rx = data.reexport
    rx_mask = (
        (pl.col("lot_id") == rx.get("lot_id", ""))
        & (pl.col("layer") == rx.get("layer", ""))
        & (pl.col("metrology_tool") == rx.get("metrology_tool", ""))
        & (pl.col("sample_kind") == "production")
    )
    # planned bad rows: (tool, day fraction) -> list of (production row index, kind)
    days = cfg.days
    plan = {
        ("SEM-05", int(days * 0.2)): [(10, "negative"), (30, "missing_lot")],
        ("SEM-02", int(days * 0.3) + 1): [(15, "decimal_comma"), (40, "duplicate")],
    }
    day_names = {k: (cfg.start + dt.timedelta(days=k[1])).strftime("%Y%m%d") for k in plan}
    corrupted = 0
    shifted = long_m.with_columns(
        value=pl.when(rx_mask).then(pl.col("value") + rx.get("offset_nm", 0.0)).otherwise(pl.col("value"))
    )
    long_all = _long_frame(shifted).with_columns(_tool=shifted["metrology_tool"], _day=shifted["_day"])
    parts = long_all.partition_by(["_tool", "_day"], maintain_order=True, include_key=False, as_dict=True)
    for (tool, day), frame in parts.items():
        rel = f"exports/cdsem_long/{tool}/{tool}_{day}.csv"
        if rx and tool == rx["metrology_tool"] and day == rx["measured_at"].strftime("%Y%m%d"):
            fixed = _long_frame(long_m.filter(rx_mask))
            when = rx["measured_at"] + dt.timedelta(days=2)
            crel = f"exports/cdsem_long/{tool}/{tool}_{when:%Y%m%d}_{rx['lot_id']}_corrected.csv"
            _write(root, crel, _long_bytes(fixed))
            res.add("cdsem_long_v2", crel)
            res.corrected_reexport = {
                "lot": rx["lot_id"],
                "layer": rx["layer"],
                "metrology_tool": tool,
                "original_file": rel,
                "corrected_file": crel,
                "rows": fixed.height,
                "wrong_offset_nm": rx["offset_nm"],
            }
        key = next((k for k in plan if k[0] == tool and day_names[k] == day), None)
        if key is not None:
            frame, rejects = _plant_bad_rows(frame, plan[key], rel)
            res.planned_rejects.extend(rejects)
            corrupted += sum(1 for r in rejects if r["kind"] != "duplicate_row")
        _write(root, rel, _long_bytes(frame))
        res.add("cdsem_long_v2", rel)
    missing = [
        k
        for k in plan
        if not any(r["file"].endswith(f"{k[0]}_{day_names[k]}.csv") for r in res.planned_rejects)
    ]
    if missing:
        raise RuntimeError(f"planned bad rows found no file for {missing}; lengthen the window")

    wide = (
        wide_m.pivot(
            on="parameter",
            index=[
                "lot_id",
                "wafer_id",
                "slot",
                "site_id",
                "x_mm",
                "y_mm",
                "product",
                "layer",
                "measured_at",
                "metrology_tool",
                "recipe",
                "_start",
            ],
            values="value",
        )
        .sort("measured_at", "metrology_tool", "lot_id", "wafer_id", "site_id")
        .with_columns(_day=_local("_start", "%Y%m%d"))
    )
    wide_all = wide.select(
        Lot=pl.col("lot_id"),
        Wafer=pl.col("wafer_id"),
        Slot=pl.col("slot"),
        SiteNo=pl.col("site_id").cast(pl.Int64),
        PosX_um=(pl.col("x_mm") * 1000).round(0).cast(pl.Int64),
        PosY_um=(pl.col("y_mm") * 1000).round(0).cast(pl.Int64),
        Device=pl.col("product"),
        Level=pl.col("layer"),
        CD_MID_um=pl.col("cd_mid") / 1000,
        CD_TOP_um=pl.col("cd_top") / 1000,
        LWR_um=pl.col("lwr") / 1000,
        MeasDate=_local("measured_at", "%d.%m.%Y %H:%M:%S"),
        Equipment=pl.col("metrology_tool"),
        Recipe=pl.col("recipe"),
        _day=pl.col("_day"),
    )
    wparts = wide_all.partition_by(["Equipment", "_day"], maintain_order=True, include_key=True, as_dict=True)
    for (tool, day), frame in wparts.items():
        rel = f"exports/cdsem_wide/{tool}/{tool}_{day}.csv"
        frame = frame.drop("_day")
        text = frame.write_csv(separator=";", decimal_comma=True, float_precision=6, line_terminator="\r\n")
        assert text.startswith(WIDE_HEADER + "\r\n")
        _write(root, rel, text.encode("cp1252"))
        res.add("cdsem_wide_v1", rel)
    res.expected_rows["measurements"] = m.height - corrupted


def _plant_bad_rows(frame: pl.DataFrame, plan: list[tuple[int, str]], rel: str) -> tuple[pl.DataFrame, list]:
    """Corrupt production rows of one long file as planned; return the frame and the planned rejects.

    Lines are 1-based and count the header as line 1.
    """
    prod = [i for i, k in enumerate(frame["SampleType"].to_list()) if k == "PROD"]
    rows = frame.to_dicts()
    rejects = []
    dup_after: list[int] = []
    for pos, kind in plan:
        i = prod[pos]
        if kind == "negative":
            rows[i]["Value_nm"] = "-" + rows[i]["Value_nm"]
            rejects.append((i, "Value_nm", "must be > 0", rows[i]["Value_nm"], "negative_value"))
        elif kind == "missing_lot":
            rows[i]["LotID"] = None
            rejects.append((i, "LotID", "missing", None, "missing_lot"))
        elif kind == "decimal_comma":
            rows[i]["Value_nm"] = rows[i]["Value_nm"].replace(".", ",")
            rejects.append((i, "Value_nm", "decimal mark", rows[i]["Value_nm"], "decimal_comma"))
        elif kind == "duplicate":
            dup_after.append(i)
    out = []
    line_of = {}
    for i, r in enumerate(rows):
        out.append(r)
        line_of[i] = len(out) + 1
        if i in dup_after:
            out.append(dict(r))
            rejects.append((i, None, "duplicate", None, "duplicate_row"))
    planned = []
    for i, col, reason, value, kind in rejects:
        line = line_of[i] + (1 if kind == "duplicate_row" else 0)
        planned.append(
            {
                "file": rel,
                "line": line,
                "column": col,
                "value": value,
                "reason_contains": reason,
                "kind": kind,
            }
        )
    planned.sort(key=lambda r: r["line"])
    return pl.DataFrame(out, schema=frame.schema, orient="row"), planned


# -------------------------------------------------------------------------------------- inspections


def write_inspections(root: Path, data: DemoData, res: ExportResult) -> None:
    """JSON-lines files per day for JSON-lines tools, Parquet files per day for the Parquet tool."""
    cfg = data.config
    insp = data.inspections.with_columns(_day=pl.col("inspected_at").dt.strftime("%Y%m%d"))
    keys = ["lot_id", "wafer_id", "layer", "inspection_tool", "inspected_at"]
    jsonl_tools = [t.tool for t in cfg.fab.inspection_tools if t.dialect == "inspection_jsonl"]
    pq_tools = [t.tool for t in cfg.fab.inspection_tools if t.dialect == "inspection_parquet"]
    classes = (
        data.defect_counts.filter(pl.col("inspection_tool").is_in(jsonl_tools))
        .group_by(keys, maintain_order=True)
        .agg(
            classes=pl.struct(
                pl.col("defect_class").alias("class"),
                pl.col("size_bin").alias("bin"),
                pl.col("count").alias("n"),
            )
        )
    )
    defects = data.defects.group_by(keys, maintain_order=True).agg(
        defects=pl.struct(
            pl.col("defect_id").alias("id"),
            (pl.col("x_mm") * 1000).round(1).alias("x_um"),
            (pl.col("y_mm") * 1000).round(1).alias("y_um"),
            pl.col("size_nm"),
            pl.col("defect_class").alias("class"),
        )
    )
    j = (
        insp.filter(pl.col("inspection_tool").is_in(jsonl_tools))
        .join(classes, on=keys, how="left", maintain_order="left")
        .join(defects, on=keys, how="left", maintain_order="left")
    )
    common = [
        pl.col("lot_id").alias("lot"),
        pl.col("wafer_id").alias("wafer"),
        pl.col("product"),
        pl.col("layer").alias("step"),
        pl.col("inspection_tool").alias("tool"),
        pl.col("recipe"),
        _local("inspected_at", ISO_OFFSET).alias("time"),
        (pl.col("inspected_area_cm2") * 100).round(1).alias("area_mm2"),
        pl.col("defect_count").alias("total"),
        pl.col("adder_count").alias("adders"),
        pl.col("sample_kind").replace_strict(KIND_CODE).alias("kind"),
        pl.col("classes").fill_null(pl.lit([], dtype=classes.schema["classes"])),
    ]
    j = j.with_columns(
        _line=pl.when(pl.col("defects").is_not_null())
        .then(pl.struct(*common, pl.col("defects")).struct.json_encode())
        .otherwise(pl.struct(*common).struct.json_encode())
    )
    n_def = 0
    for (tool, day), part in j.group_by(["inspection_tool", "_day"], maintain_order=True):
        rel = f"exports/inspection_jsonl/{tool}_{day}.jsonl"
        _write(root, rel, ("\n".join(part["_line"].to_list()) + "\n").encode("utf-8"))
        res.add("inspection_jsonl", rel)
        n_def += part["defects"].list.len().fill_null(0).sum()
    n_counts = int(classes["classes"].list.len().sum())
    res.expected_rows["defect_counts"] = n_counts
    res.expected_rows["defects"] = int(n_def)

    pq = insp.filter(pl.col("inspection_tool").is_in(pq_tools))
    bad_day = (cfg.start + dt.timedelta(days=int(cfg.days * 0.2) + 2)).strftime("%Y%m%d")
    lost = 0
    for (tool, day), part in pq.group_by(["inspection_tool", "_day"], maintain_order=True):
        rel = f"exports/inspection_parquet/{tool}_{day}.parquet"
        frame = part.select(
            LOT=pl.col("lot_id"),
            WAFER=pl.col("wafer_id"),
            PRODUCT=pl.col("product"),
            LAYER=pl.col("layer"),
            TOOL=pl.col("inspection_tool"),
            RECIPE=pl.col("recipe"),
            INSPECT_TIME=pl.col("inspected_at"),
            AREA_CM2=pl.col("inspected_area_cm2"),
            COUNT=pl.col("defect_count"),
            ADDERS=pl.col("adder_count"),
            KIND=pl.col("sample_kind").replace_strict(KIND_CODE),
        )
        path = root / rel
        path.parent.mkdir(parents=True, exist_ok=True)
        frame.write_parquet(path, statistics=False)
        if day == bad_day:
            # a transfer cut this file short: a bad file the ingest must fail as a whole
            raw = path.read_bytes()
            path.write_bytes(raw[: len(raw) // 2])
            res.planned_failed_files.append(
                {"file": rel, "reason_contains": "parquet", "rows_lost": frame.height}
            )
            lost += frame.height
        res.add("inspection_parquet", rel)
    if not res.planned_failed_files:
        raise RuntimeError("the truncated Parquet file found no day; lengthen the window")
    res.expected_rows["inspections"] = data.inspections.height - lost


# ---------------------------------------------------------------------- history, specs, events, refs


def write_lot_history(root: Path, data: DemoData, res: ExportResult) -> None:
    """Lot process history, one file per ISO week of the step start."""
    h = data.process_history.with_columns(_week=pl.col("started_at").dt.strftime("%G-W%V"))
    for (week,), part in h.group_by(["_week"], maintain_order=True):
        rel = f"exports/lot_history/lot_history_{week}.csv"
        frame = part.select(
            lot=pl.col("lot_id"),
            wafer=pl.col("wafer_id"),
            product=pl.col("product"),
            step=pl.col("step"),
            seq=pl.col("step_seq"),
            tool=pl.col("process_tool"),
            chamber=pl.col("chamber"),
            recipe=pl.col("recipe"),
            track_in=_local("started_at", ISO_OFFSET),
            track_out=_local("ended_at", ISO_OFFSET),
        )
        text = frame.write_csv(null_value="")
        assert text.startswith(HISTORY_HEADER + "\n")
        _write(root, rel, text.encode("utf-8"))
        res.add("lot_history_csv", rel)
    res.expected_rows["process_history"] = data.process_history.height


def write_native(root: Path, data: DemoData, res: ExportResult) -> None:
    """lotline-native CSV files: spec limits and tool events (canonical names, units, UTC)."""
    spec = data.spec_limits.with_columns(
        effective_from=pl.col("effective_from").dt.strftime(ISO_Z),
        effective_to=pl.col("effective_to").dt.strftime(ISO_Z),
    )
    text = spec.write_csv(null_value="")
    assert text.startswith(SPEC_HEADER + "\n")
    _write(root, "exports/spec_limits.csv", text.encode("utf-8"))
    res.add("native", "exports/spec_limits.csv")
    ev = data.tool_events.with_columns(event_at=pl.col("event_at").dt.strftime(ISO_Z))
    text = ev.write_csv(null_value="")
    assert text.startswith(EVENTS_HEADER + "\n")
    _write(root, "exports/tool_events.csv", text.encode("utf-8"))
    res.add("native", "exports/tool_events.csv")
    res.expected_rows["spec_limits"] = spec.height
    res.expected_rows["tool_events"] = ev.height


def write_reference(root: Path, data: DemoData, res: ExportResult) -> None:
    """Reference (TEM / AFM) values in ångström."""
    ref = data.reference_values.select(
        feature_id=pl.col("feature"),
        layer=pl.col("layer"),
        parameter=pl.col("parameter"),
        ref_value_A=(pl.col("reference_value") * 10).round(1),
        ref_sigma_A=(pl.col("reference_uncertainty") * 10).round(1),
        method=pl.col("reference_method").replace_strict(METHOD_CODE),
        measured=pl.col("measured_at").dt.strftime(ISO_Z),
    )
    text = ref.write_csv(float_precision=1)
    assert text.startswith(REFERENCE_HEADER + "\n")
    _write(root, "exports/reference/reference_values.csv", text.encode("utf-8"))
    res.add("reference_csv", "exports/reference/reference_values.csv")
    res.expected_rows["reference_values"] = ref.height


def write_exports(root: Path, data: DemoData) -> ExportResult:
    """Write every export of ``data`` under ``root / 'exports'``."""
    res = ExportResult()
    write_cdsem(root, data, res)
    write_inspections(root, data, res)
    write_lot_history(root, data, res)
    write_native(root, data, res)
    write_reference(root, data, res)
    for v in res.files.values():
        v.sort()
    return res
