"""A frame of raw source columns + an export profile -> a canonical frame + reject rows. Pure, vectorised.

Every check runs as one Polars expression over the whole chunk. A record with any problem is rejected as a
whole (each problem becomes one reject row: line, source column, raw value, reason); the other records load.

Checks (issue 2, item 5): required values present; numbers numeric and finite; value mappings known;
timestamps parse (see :mod:`ingest.timestamps`); physical ranges in canonical units: the defaults below
plus the profile's ``[limits]``.
"""

from __future__ import annotations

from dataclasses import dataclass

import polars as pl

from ingest import units
from ingest.adapters.text import LINE, REJECT_SCHEMA, empty_rejects
from ingest.profile import Limit, Profile, Source
from ingest.timestamps import parse_timestamps
from warehouse import schema

R = schema.WAFER_RADIUS_MM
# Physical ranges that hold for every export (canonical units). common practice: 300 mm wafer, 25-slot carrier.
DEFAULT_LIMITS: dict[str, dict[str, Limit]] = {
    "measurements": {
        "x_mm": Limit(at_least=-R, at_most=R),
        "y_mm": Limit(at_least=-R, at_most=R),
        "slot": Limit(at_least=schema.SLOT_RANGE[0], at_most=schema.SLOT_RANGE[1]),
        "repeat": Limit(at_least=1),
    },
    "inspections": {
        "inspected_area_cm2": Limit(greater_than=0),
        "defect_count": Limit(at_least=0),
        "adder_count": Limit(at_least=0),
    },
    "defect_counts": {"count": Limit(at_least=0)},
    "defects": {
        "x_mm": Limit(at_least=-R, at_most=R),
        "y_mm": Limit(at_least=-R, at_most=R),
        "size_nm": Limit(greater_than=0),
    },
    "process_history": {"step_seq": Limit(at_least=1)},
    "reference_values": {
        "reference_value": Limit(greater_than=0),
        "reference_uncertainty": Limit(at_least=0),
    },
    "spec_limits": {},
    "tool_events": {},
}
ALLOWED = {
    "sample_kind": schema.SAMPLE_KINDS,
    "stage": ("develop", "etch"),
}


@dataclass
class _Check:
    mask: pl.Expr
    column: str | pl.Expr | None
    raw: pl.Expr
    reason: str | pl.Expr


def raw_name(canon: str) -> str:
    return f"__raw__{canon}"


def map_records(
    raw: pl.DataFrame,
    profile: Profile,
    *,
    table: str | None = None,
    sources: tuple[Source, ...] | None = None,
    carried: tuple[str, ...] = (),
) -> tuple[pl.DataFrame, pl.DataFrame]:
    """Map and validate ``raw`` (source columns + ``_line``) into canonical rows of ``table``.

    ``sources`` defaults to the profile's columns; ``carried`` names canonical columns already present in
    ``raw`` (inherited by nested records). Returns (canonical frame with ``_source_line``, rejects).
    """
    t = schema.table(table or profile.kind)
    srcs = profile.columns if sources is None else sources
    zone_default = profile.time_zone
    present = set(raw.columns)
    # 1. raw column per canonical column (or a null literal when the export omits an optional one)
    sel: list[pl.Expr] = [pl.col(LINE)]
    chosen: dict[str, str] = {}
    for s in srcs:
        name = next((n for n in s.names if n in present), None)
        if name is None:
            sel.append(pl.lit(None, dtype=pl.String).alias(raw_name(s.canonical)))
        else:
            chosen[s.canonical] = name
            sel.append(pl.col(name).alias(raw_name(s.canonical)))
    wide = profile.is_wide and (table is None or table == profile.kind)
    if wide:
        for s in profile.wide_sources:
            name = next(n for n in s.names if n in present)
            chosen["__wide__" + s.canonical] = name
            sel.append(pl.col(name).alias(raw_name("__wide__" + s.canonical)))
    sel.extend(pl.col(c) for c in carried)
    df = raw.select(sel)

    checks: list[_Check] = []
    typed: list[pl.Expr] = []
    ts_cols: dict[str, tuple[pl.Series, pl.Series]] = {}
    by_canon = {s.canonical: s for s in srcs}
    for s in srcs:
        col = t.column(s.canonical)
        r = pl.col(raw_name(s.canonical))
        src_name = chosen.get(s.canonical, s.names[0])
        if col.dtype == schema.TIMESTAMP:
            v, why = parse_timestamps(
                df[raw_name(s.canonical)],
                fmt=s.time_format or profile.time_format,
                zone=s.time_zone or zone_default,
            )
            ts_cols[s.canonical] = (v, why)
            typed.append(pl.lit(v).alias(s.canonical))
            checks.append(
                _Check(pl.col(f"__why__{s.canonical}").is_not_null(), src_name, r, "__ts__" + s.canonical)
            )
            continue
        expr, more = _typed(col, r, s, profile, src_name, df.schema[raw_name(s.canonical)], s.canonical)
        typed.append(expr.alias(s.canonical))
        checks.extend(more)
    if wide:
        for s in profile.wide_sources:
            key = "__wide__" + s.canonical
            r = pl.col(raw_name(key))
            vcol = t.column(profile.wide_value_column or "value")
            expr, more = _typed(vcol, r, s, profile, chosen[key], df.schema[raw_name(key)], key)
            typed.append(expr.alias(key))
            checks.extend(more)
    for c, v in profile.constants.items():
        if c not in by_canon:
            typed.append(pl.lit(v, dtype=_pl_dtype(t.column(c).dtype)).alias(c))
    df = df.with_columns(typed)
    if ts_cols:
        # timestamp reasons vary per row: attach them as columns
        df = df.with_columns([why.alias(f"__why__{c}") for c, (_, why) in ts_cols.items()])
    pre_bad: pl.DataFrame | None = None
    parts: list[pl.DataFrame] = []
    if wide:
        # parse problems of the wide columns are found before unpivoting; a wide record is rejected whole
        bad, found = _evaluate(df, checks)
        parts.extend(found)
        pre_bad = df.filter(bad).select(LINE)
        checks = []
        df = _unpivot_wide(df, profile, chosen)

    # 2. derived columns
    if t.name in ("measurements", "reference_values") and "unit" not in by_canon:
        df = df.with_columns(
            pl.col("parameter")
            .replace_strict(schema.PARAMETER_UNITS, default="nm", return_dtype=pl.String)
            .alias("unit")
        )
    if t.name == "measurements" and not wide:
        vsrc = by_canon.get("value")
        factor = units.length_factor(vsrc.unit, "nm") if vsrc is not None and vsrc.unit else 1.0
        if factor != 1.0:  # lengths only: an angle (deg) keeps its value
            df = df.with_columns(
                pl.when(pl.col("unit") == "nm")
                .then(pl.col("value") * factor)
                .otherwise(pl.col("value"))
                .alias("value")
            )

    # 3. required, allowed values and ranges (on canonical values)
    for c in t.columns:
        name = c.name
        if name.startswith("_") or name not in df.columns:
            continue
        src = by_canon.get(name)
        rawc = pl.col(raw_name(name)) if src is not None and raw_name(name) in df.columns else pl.lit(None)
        src_name = chosen.get(name, src.names[0] if src else name)
        if wide and name == profile.wide_value_column:
            rawc, src_name = pl.col("__wide_raw"), pl.col("__wide_src")
        if not c.nullable:
            checks.append(
                _Check(pl.col(name).is_null() & rawc.is_null(), src_name, rawc, "missing required value")
            )
        if name in ALLOWED and (src is not None or name in profile.constants):
            allowed = ALLOWED[name]
            checks.append(
                _Check(
                    pl.col(name).is_not_null() & ~pl.col(name).is_in(list(allowed)),
                    src_name,
                    rawc,
                    "unknown value (expected one of " + ", ".join(allowed) + ")",
                )
            )
        lim = merge_limits(DEFAULT_LIMITS.get(t.name, {}).get(name), profile.limits.get(name))
        if lim is not None:
            checks.extend(_range_checks(pl.col(name), lim, src_name, rawc))
    if t.name == "measurements":
        vname = pl.col("__wide_src") if wide else chosen.get("value", "value")
        checks.append(
            _Check(
                pl.col("value").is_finite() & (pl.col("unit") == "nm") & (pl.col("value") <= 0),
                vname,
                _vraw(df, wide),
                "a length must be > 0",
            )
        )
    if t.name == "process_history" and "ended_at" in df.columns:
        checks.append(
            _Check(
                pl.col("ended_at") < pl.col("started_at"),
                chosen.get("ended_at", "ended_at"),
                pl.col(raw_name("ended_at")),
                "step ends before it starts",
            )
        )

    # 4. evaluate every check at once; rejects are one row per (record, problem)
    bad, found = _evaluate(df, checks)
    parts.extend(found)
    good = df.filter(~bad) if bad.any() else df
    bad_lines = df.filter(bad).select(LINE)
    if pre_bad is not None:
        bad_lines = pl.concat([bad_lines, pre_bad])
    if wide and bad_lines.height:
        good = good.join(bad_lines.unique(), on=LINE, how="anti")
    rejects = pl.concat(parts).cast(REJECT_SCHEMA) if parts else empty_rejects()  # type: ignore[arg-type]
    out = _canonical(good, t)
    return out, rejects.unique(maintain_order=True).sort("line", maintain_order=True)


def _evaluate(df: pl.DataFrame, checks: list[_Check]) -> tuple[pl.Series, list[pl.DataFrame]]:
    """(row has a problem, reject rows) for a list of checks, computed in one pass."""
    if not checks:
        return pl.Series([False] * df.height, dtype=pl.Boolean), []
    names = [f"__bad{i}" for i in range(len(checks))]
    masks = df.select(LINE, *[ch.mask.fill_null(False).alias(n) for ch, n in zip(checks, names, strict=True)])
    any_bad = masks.select(pl.any_horizontal(names)).to_series()
    parts: list[pl.DataFrame] = []
    if not any_bad.any():
        return any_bad, parts
    flagged = df.with_columns(masks.select(names)).filter(any_bad)
    for ch, n in zip(checks, names, strict=True):
        hit = flagged.filter(pl.col(n))
        if hit.height == 0:
            continue
        if isinstance(ch.reason, pl.Expr):
            reason = ch.reason
        elif ch.reason.startswith("__ts__"):
            reason = pl.col(f"__why__{ch.reason[6:]}")
        else:
            reason = pl.lit(ch.reason)
        column = ch.column if isinstance(ch.column, pl.Expr) else pl.lit(ch.column, dtype=pl.String)
        parts.append(
            hit.select(
                pl.col(LINE).alias("line"),
                column.cast(pl.String).alias("column"),
                ch.raw.cast(pl.String).alias("value"),
                reason.cast(pl.String).alias("reason"),
            )
        )
    return any_bad, parts


def _vsrc(profile: Profile, chosen: dict[str, str]) -> str | None:
    return None if profile.is_wide else chosen.get("value", "value")


def _vraw(df: pl.DataFrame, wide: bool) -> pl.Expr:
    if wide:
        return pl.col("__wide_raw")
    return pl.col(raw_name("value")) if raw_name("value") in df.columns else pl.lit(None)


def _canonical(df: pl.DataFrame, t: schema.Table) -> pl.DataFrame:
    pl_schema = schema.polars_schema(t)
    cols = []
    for c in t.columns:
        if c.name == schema.C_SOURCE_LINE:
            cols.append(pl.col(LINE).alias(c.name))
        elif c.name in (schema.C_SOURCE_FILE_ID, schema.C_SUPERSEDED_BY):
            continue  # stamped by the warehouse
        elif c.name in df.columns:
            cols.append(pl.col(c.name).cast(pl_schema[c.name]))  # type: ignore[arg-type]
        else:
            cols.append(pl.lit(None, dtype=pl_schema[c.name]).alias(c.name))  # type: ignore[arg-type]
    return df.select(cols)


def _pl_dtype(dtype: str) -> pl.DataType:
    return schema.polars_schema(schema.Table("x", "x", (schema.Column("c", dtype, doc="x"),)))["c"]  # type: ignore[return-value]


def merge_limits(a: Limit | None, b: Limit | None) -> Limit | None:
    if a is None or b is None:
        return a or b

    def pick(x: float | None, y: float | None, fn) -> float | None:
        return y if x is None else x if y is None else fn(x, y)

    return Limit(
        greater_than=pick(a.greater_than, b.greater_than, max),
        at_least=pick(a.at_least, b.at_least, max),
        less_than=pick(a.less_than, b.less_than, min),
        at_most=pick(a.at_most, b.at_most, min),
    )


def _range_checks(v: pl.Expr, lim: Limit, column: str | pl.Expr | None, raw: pl.Expr) -> list[_Check]:
    out = []
    v = pl.when(v.cast(pl.Float64).is_nan()).then(None).otherwise(v)  # NaN is reported as not finite
    if lim.greater_than is not None:
        out.append(
            _Check(v <= lim.greater_than, column, raw, f"out of range (must be > {lim.greater_than:g})")
        )
    if lim.at_least is not None:
        out.append(_Check(v < lim.at_least, column, raw, f"out of range (must be >= {lim.at_least:g})"))
    if lim.less_than is not None:
        out.append(_Check(v >= lim.less_than, column, raw, f"out of range (must be < {lim.less_than:g})"))
    if lim.at_most is not None:
        out.append(
            _Check(
                v > lim.at_most,
                column,
                raw,
                f"out of range (must be <= {lim.at_most:g}; a unit mix-up such as µm read as nm?)",
            )
        )
    return out


def _typed(
    col: schema.Column,
    r: pl.Expr,
    s: Source,
    profile: Profile,
    src_name: str,
    raw_dtype: pl.DataType,
    alias: str,
) -> tuple[pl.Expr, list[_Check]]:
    """Typed canonical value of one raw column plus its parse checks (values are kept exactly as exported)."""
    checks: list[_Check] = []
    is_text = raw_dtype == pl.String or raw_dtype == pl.Null
    if col.dtype == schema.STRING:
        e = r if is_text else r.cast(pl.String)
        mapping = profile.values.get(col.name)
        if mapping:
            mapped = e.replace_strict(mapping, default=None, return_dtype=pl.String)
            checks.append(
                _Check(
                    e.is_not_null() & pl.col(alias).is_null(),
                    src_name,
                    r,
                    "unknown value (expected one of " + ", ".join(mapping) + ")",
                )
            )
            e = mapped
        return e, checks
    if col.dtype in (schema.FLOAT64, schema.INT64):
        target = pl.Float64 if col.dtype == schema.FLOAT64 else pl.Int64
        what = "not a number" if target == pl.Float64 else "not an integer"
        if is_text and profile.decimal == ",":
            checks.append(
                _Check(
                    r.str.contains(".", literal=True),
                    src_name,
                    r,
                    'not a number (the profile\'s decimal mark is ","; found ".")',
                )
            )
            num = r.str.replace(",", ".", literal=True).cast(target, strict=False)
            reason: str | pl.Expr = what
        else:
            num = r.cast(target, strict=False)
            reason = (
                pl.when(r.cast(pl.String).str.contains(",", literal=True))
                .then(pl.lit(what + ' (the profile\'s decimal mark is "."; found ",")'))
                .otherwise(pl.lit(what))
            )
        checks.append(_Check(r.is_not_null() & pl.col(alias).is_null(), src_name, r, reason))
        if col.dtype == schema.FLOAT64:
            checks.append(
                _Check(
                    pl.col(alias).is_not_null() & ~pl.col(alias).is_finite(),
                    src_name,
                    r,
                    "not a finite number",
                )
            )
            factor = _factor(col, s.unit) if col.name != "value" or profile.is_wide else 1.0
            if factor != 1.0:
                num = num * factor
        return num, checks
    if col.dtype == schema.BOOL:
        e = (
            r.cast(pl.String)
            .str.to_lowercase()
            .replace_strict(
                {"true": True, "false": False, "1": True, "0": False}, default=None, return_dtype=pl.Boolean
            )
        )
        checks.append(_Check(r.is_not_null() & e.is_null(), src_name, r, "not true/false"))
        return e, checks
    raise AssertionError(col.dtype)


def _factor(col: schema.Column, unit: str | None) -> float:
    if unit is None:
        return 1.0
    if col.unit == "cm2":
        return units.area_factor(unit)
    if col.unit == "mm":
        return units.length_factor(unit, "mm")
    return units.length_factor(unit, "nm")


def _unpivot_wide(df: pl.DataFrame, profile: Profile, chosen: dict[str, str]) -> pl.DataFrame:
    keys = [s.canonical for s in profile.wide_sources]
    vcol, ncol = profile.wide_value_column or "value", profile.wide_name_column or "parameter"
    others = [
        c for c in df.columns if not c.startswith("__wide__") and not c.startswith(raw_name("__wide__"))
    ]
    parts = []
    for k in keys:
        parts.append(
            df.select(
                *others,
                pl.lit(k).alias(ncol),
                pl.col("__wide__" + k).alias(vcol),
                pl.col(raw_name("__wide__" + k)).cast(pl.String).alias("__wide_raw"),
                pl.lit(chosen["__wide__" + k], dtype=pl.String).alias("__wide_src"),
            )
        )
    return pl.concat(parts).sort(LINE, maintain_order=True)
