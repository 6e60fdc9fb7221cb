"""Export profiles: the dialect of a tool's export as data (TOML), and picking one by a file's header.

A profile names the canonical table it fills, the file format, the text dialect (delimiter, decimal mark,
encoding, header line), which source column feeds each canonical column (with accepted aliases and units),
value mappings, constants, timestamp format and zone, long or wide layout, nested records (JSON lines) and
physical range limits. The format is documented in the README ("Export profiles users write"). lotline's native format (canonical
column names and units) needs no file: :func:`native_profiles` builds one profile per fact table.

Pure: parsing and detection take text and return values; only :func:`load_profiles` reads files.
"""

from __future__ import annotations

import re
import tomllib
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from ingest import units
from warehouse import schema
from warehouse.errors import ProfileError

BUILTIN_DIR = Path(__file__).parent / "profiles"
FORMATS = ("csv", "parquet", "jsonl")
ENCODINGS = {
    "utf-8": "utf-8",
    "utf8": "utf-8",
    "utf-8-sig": "utf-8-sig",
    "utf-16": "utf-16",
    "latin-1": "latin-1",
    "latin1": "latin-1",
    "iso-8859-1": "latin-1",
    "cp1252": "cp1252",
    "windows-1252": "cp1252",
}
NATIVE_PREFIX = "native:"


@dataclass(frozen=True)
class Limit:
    """Physical range of a canonical numeric column, in canonical units (None = no bound)."""

    greater_than: float | None = None
    at_least: float | None = None
    less_than: float | None = None
    at_most: float | None = None

    def describe(self) -> str:
        parts = []
        if self.greater_than is not None:
            parts.append(f"> {self.greater_than:g}")
        if self.at_least is not None:
            parts.append(f">= {self.at_least:g}")
        if self.less_than is not None:
            parts.append(f"< {self.less_than:g}")
        if self.at_most is not None:
            parts.append(f"<= {self.at_most:g}")
        return " and ".join(parts)


@dataclass(frozen=True)
class Source:
    """Where one canonical column comes from: accepted source names, unit, and per-column time settings."""

    canonical: str
    names: tuple[str, ...]
    unit: str | None = None
    optional: bool = False
    time_format: str | None = None
    time_zone: str | None = None


@dataclass(frozen=True)
class Nested:
    """A list inside each JSON record that expands into rows of another canonical table."""

    table: str
    field: str
    columns: tuple[Source, ...]
    optional: bool = False


@dataclass(frozen=True)
class Profile:
    """One export dialect. Build with :func:`parse_profile`; see the README ("Profile reference") for the TOML keys."""

    name: str
    kind: str
    format: str
    origin: str
    description: str = ""
    delimiter: str = ","
    decimal: str = "."
    encoding: str = "utf-8"
    header_line: int = 1
    time_format: str = "iso"
    time_zone: str | None = None
    columns: tuple[Source, ...] = ()
    values: dict[str, dict[str, str]] = field(default_factory=dict)
    constants: dict[str, Any] = field(default_factory=dict)
    limits: dict[str, Limit] = field(default_factory=dict)
    wide_name_column: str | None = None
    wide_value_column: str | None = None
    wide_sources: tuple[Source, ...] = ()
    ignore: tuple[str, ...] = ()
    nested: tuple[Nested, ...] = ()

    @property
    def table(self) -> schema.Table:
        return schema.table(self.kind)

    @property
    def is_native(self) -> bool:
        return self.name.startswith(NATIVE_PREFIX)

    @property
    def is_wide(self) -> bool:
        return bool(self.wide_sources)

    def known_names(self) -> set[str]:
        """Every source column name this profile accepts in a header."""
        names = {n for s in self.columns for n in s.names}
        names |= {n for s in self.wide_sources for n in s.names}
        names |= set(self.ignore)
        names |= {n.field for n in self.nested}
        return names

    def required_sources(self) -> list[Source]:
        """Mapped columns a header must contain (one of their names)."""
        return [s for s in (*self.columns, *self.wide_sources) if not s.optional]

    def match(self, header: list[str]) -> tuple[list[str], list[str]]:
        """(missing required source names, unknown header names) for a header."""
        present = set(header)
        missing = [s.names[0] for s in self.required_sources() if not present.intersection(s.names)]
        known = self.known_names()
        unknown = [h for h in header if h not in known]
        return missing, unknown


# ------------------------------------------------------------------------------------------ parsing


def parse_profile(text: str, *, origin: str) -> Profile:
    """Parse one profile's TOML text; ``origin`` (its path) names it in error messages."""
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        m = re.search(r"at line (\d+), column (\d+)", str(exc))  # Python 3.11 puts the position in the text
        line = int(m.group(1)) if m else getattr(exc, "lineno", None)
        col = int(m.group(2)) if m else getattr(exc, "colno", None)
        raise ProfileError(
            "profile is not valid TOML",
            path=origin,
            line=line,
            column=col,
            details=str(exc).split(" (at")[0],
            fix="correct the TOML syntax",
        ) from None
    return _build(doc, origin)


def _err(origin: str, what: str, *, found: Any = None, expected: Any = None, fix: str) -> ProfileError:
    return ProfileError(what, path=origin, found=found, expected=expected, fix=fix)


_TOP_KEYS = {
    "name",
    "kind",
    "format",
    "description",
    "csv",
    "time",
    "columns",
    "values",
    "constants",
    "limits",
    "wide",
    "ignore",
    "nested",
}


def _build(doc: dict[str, Any], origin: str) -> Profile:
    unknown = sorted(set(doc) - _TOP_KEYS)
    if unknown:
        raise _err(
            origin,
            f'unknown profile key "{unknown[0]}"',
            found=unknown[0],
            expected=", ".join(sorted(_TOP_KEYS)),
            fix="remove or rename it",
        )
    for key in ("name", "kind", "format"):
        if not isinstance(doc.get(key), str):
            raise _err(
                origin,
                f'profile lacks "{key}"',
                expected="a string",
                fix=f'add {key} = "..." at the top of the profile',
            )
    name, kind, fmt = doc["name"], doc["kind"], doc["format"]
    fact_names = [t.name for t in schema.FACT_TABLES]
    if kind not in fact_names:
        raise _err(
            origin,
            "unknown data kind",
            found=kind,
            expected="one of " + ", ".join(fact_names),
            fix="set kind to the canonical table the export fills",
        )
    if fmt not in FORMATS:
        raise _err(origin, "unknown format", found=fmt, expected=", ".join(FORMATS), fix="set format")
    table = schema.table(kind)
    csv = doc.get("csv", {})
    encoding = str(csv.get("encoding", "utf-8")).lower()
    if encoding not in ENCODINGS:
        raise _err(
            origin,
            "unknown encoding",
            found=encoding,
            expected=", ".join(sorted(set(ENCODINGS))),
            fix="use one of the listed encodings",
        )
    delimiter = csv.get("delimiter", ",")
    decimal = csv.get("decimal", ".")
    if not (isinstance(delimiter, str) and len(delimiter) == 1) or decimal not in (".", ","):
        raise _err(
            origin,
            "bad delimiter or decimal mark",
            found=f"{delimiter!r} / {decimal!r}",
            expected='one character / "." or ","',
            fix="fix [csv] delimiter and decimal",
        )
    if delimiter == decimal:
        raise _err(
            origin,
            "delimiter and decimal mark are the same",
            found=delimiter,
            expected="different characters",
            fix='a decimal-comma export uses delimiter = ";"',
        )
    time = doc.get("time", {})
    zone = time.get("zone")
    if zone is not None:
        _check_zone(zone, origin)
    columns = tuple(_source(table, canon, spec, origin) for canon, spec in doc.get("columns", {}).items())
    wide = doc.get("wide", {})
    wide_sources: tuple[Source, ...] = ()
    wide_name = wide_value = None
    if wide:
        wide_name, wide_value = wide.get("name_column"), wide.get("value_column")
        for c in (wide_name, wide_value):
            if c not in table.names:
                raise _err(
                    origin,
                    "[wide] names a column the table lacks",
                    found=c,
                    expected=", ".join(table.data_columns),
                    fix="set name_column and value_column",
                )
        wide_sources = tuple(
            _source(table, wide_value, spec, origin, label=label)
            for label, spec in wide.get("sources", {}).items()
        )
        if not wide_sources:
            raise _err(origin, "[wide] has no sources", fix="list one [wide.sources] entry per value column")
    values = {k: {str(a): str(b) for a, b in v.items()} for k, v in doc.get("values", {}).items()}
    for k in values:
        if k not in table.names:
            raise _err(
                origin,
                "[values] names an unknown column",
                found=k,
                expected=", ".join(table.data_columns),
                fix="use canonical column names",
            )
    constants = dict(doc.get("constants", {}))
    for k in constants:
        if k not in table.names:
            raise _err(
                origin,
                "[constants] names an unknown column",
                found=k,
                expected=", ".join(table.data_columns),
                fix="use canonical column names",
            )
    limits = {k: _limit(k, v, origin, table) for k, v in doc.get("limits", {}).items()}
    nested = tuple(_nested(k, v, origin) for k, v in doc.get("nested", {}).items())
    prof = Profile(
        name=name,
        kind=kind,
        format=fmt,
        origin=origin,
        description=str(doc.get("description", "")),
        delimiter=delimiter,
        decimal=decimal,
        encoding=ENCODINGS[encoding],
        header_line=int(csv.get("header_line", 1)),
        time_format=str(time.get("format", "iso")),
        time_zone=zone,
        columns=columns,
        values=values,
        constants=constants,
        limits=limits,
        wide_name_column=wide_name,
        wide_value_column=wide_value,
        wide_sources=wide_sources,
        ignore=tuple(doc.get("ignore", ())),
        nested=nested,
    )
    _check_complete(prof, table, origin)
    return prof


def _check_zone(zone: str, origin: str) -> None:
    from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

    try:
        ZoneInfo(zone)
    except (ZoneInfoNotFoundError, ValueError):
        raise _err(
            origin,
            "unknown time zone",
            found=zone,
            expected="an IANA zone name such as Europe/Amsterdam",
            fix="use a name from the IANA time zone database",
        ) from None


def _source(table: schema.Table, canon: str, spec: Any, origin: str, *, label: str | None = None) -> Source:
    if canon not in table.names or canon.startswith("_"):
        raise _err(
            origin,
            f'[columns] maps unknown canonical column "{canon}"',
            found=canon,
            expected=", ".join(table.data_columns),
            fix="use the canonical names of table " + table.name,
        )
    unit = optional = fmt = zone = None
    if isinstance(spec, dict):
        names = spec.get("source")
        unit, optional = spec.get("unit"), bool(spec.get("optional", False))
        fmt, zone = spec.get("format"), spec.get("zone")
        if zone is not None:
            _check_zone(zone, origin)
    else:
        names = spec
    if isinstance(names, str):
        names = [names]
    if not names or not all(isinstance(n, str) for n in names):
        raise _err(
            origin,
            f'column "{label or canon}" has no source name',
            found=spec,
            expected="a name, a list of names, or { source = ..., unit = ... }",
            fix="name the source column",
        )
    col = table.column(canon)
    if unit is not None:
        if col.unit == "cm2":
            ok = units.is_area_unit(unit)
        else:
            ok = col.dtype == schema.FLOAT64 and units.is_length_unit(unit)
        if not ok:
            raise _err(
                origin,
                f'column "{canon}" cannot take unit "{unit}"',
                found=unit,
                expected="a length (nm, um, A, mm) or an area (cm2, mm2)",
                fix="fix the unit",
            )
    return Source(
        canonical=label or canon,
        names=tuple(names),
        unit=unit,
        optional=optional,
        time_format=fmt,
        time_zone=zone,
    )


def _limit(name: str, spec: Any, origin: str, table: schema.Table) -> Limit:
    if name not in table.names or not isinstance(spec, dict):
        raise _err(
            origin,
            "bad [limits] entry",
            found=name,
            expected="a numeric canonical column with a table",
            fix="write [limits.value] with greater_than / at_least / less_than / at_most",
        )
    allowed = {"greater_than", "at_least", "less_than", "at_most"}
    bad = set(spec) - allowed
    if bad:
        raise _err(
            origin,
            f'unknown limit key "{sorted(bad)[0]}"',
            expected=", ".join(sorted(allowed)),
            fix="use the listed keys",
        )
    return Limit(**{k: float(v) for k, v in spec.items()})


def _nested(key: str, spec: dict[str, Any], origin: str) -> Nested:
    if key not in [t.name for t in schema.FACT_TABLES]:
        raise _err(
            origin,
            "[nested] names an unknown table",
            found=key,
            expected="a canonical fact table",
            fix="use e.g. [nested.defect_counts]",
        )
    t = schema.table(key)
    cols = tuple(_source(t, c, s, origin) for c, s in spec.get("columns", {}).items())
    return Nested(
        table=key, field=str(spec.get("field", key)), columns=cols, optional=bool(spec.get("optional"))
    )


_DERIVED = {"measurements": {"unit"}, "reference_values": {"unit"}, "spec_limits": set()}


def _check_complete(prof: Profile, table: schema.Table, origin: str) -> None:
    supplied = {s.canonical for s in prof.columns} | set(prof.constants)
    if prof.is_wide:
        supplied |= {prof.wide_name_column or "", prof.wide_value_column or ""}
    supplied |= _DERIVED.get(table.name, set())
    missing = [c for c in table.required if c not in supplied]
    if missing:
        raise _err(
            origin,
            f'profile does not supply required column "{missing[0]}" of {table.name}',
            found=", ".join(sorted(supplied)),
            expected=", ".join(table.required),
            fix="map it under [columns] or set it under [constants]",
        )


# ------------------------------------------------------------------------------------------ native


def native_profiles() -> list[Profile]:
    """One profile per fact table for lotline's own format: canonical names and units, UTC timestamps."""
    out = []
    for t in schema.FACT_TABLES:
        cols = tuple(
            Source(canonical=c.name, names=(c.name,), optional=c.nullable)
            for c in t.columns
            if not c.name.startswith("_")
        )
        for fmt in ("csv", "parquet"):
            out.append(
                Profile(
                    name=f"{NATIVE_PREFIX}{t.name}",
                    kind=t.name,
                    format=fmt,
                    origin="(built in)",
                    description=f"lotline native {t.name}",
                    time_format="iso",
                    time_zone="UTC",
                    columns=cols,
                )
            )
    return out


# ------------------------------------------------------------------------------------------ loading


def load_profiles(dirs: list[Path] | tuple[Path, ...] = ()) -> list[Profile]:
    """The shipped profiles, then each extra folder's ``*.toml`` (a later one with the same name replaces)."""
    by_name: dict[str, Profile] = {}
    for d in (BUILTIN_DIR, *dirs):
        d = Path(d)
        if not d.is_dir():
            raise ProfileError(
                "profile folder not found", path=str(d), fix="pass an existing folder to --profiles"
            )
        for f in sorted(d.glob("*.toml")):
            p = parse_profile(f.read_text(encoding="utf-8"), origin=str(f))
            by_name[p.name] = p
    return [*by_name.values(), *native_profiles()]


def detect_profile(
    header: list[str] | Callable[[Profile], list[str]],
    profiles: list[Profile],
    *,
    fmt: str,
    path: str,
    line: int = 1,
    shown: str | None = None,
    forced: str | None = None,
) -> Profile:
    """Pick the one profile of format ``fmt`` whose columns fit the header exactly (all required present,
    nothing unknown). No match or several is an error that lists the candidates and the header found.

    ``header`` is the list of fields, or a function giving the fields as each profile reads them (its own
    delimiter, encoding and header line). ``shown`` is the header text for messages.
    """
    pool = [p for p in profiles if p.format == fmt]
    view = header if callable(header) else (lambda p, h=header: h)
    if shown is None:
        shown = ", ".join(header) if not callable(header) else ""
    if forced is not None:
        named = [p for p in pool if p.name == forced]
        if not named:
            raise ProfileError(
                f'no {fmt} profile named "{forced}"',
                path=path,
                found=forced,
                expected=", ".join(sorted({p.name for p in pool})),
                fix="check the profile name",
            )
        p = named[0]
        missing, unknown = p.match(view(p))
        if missing:
            raise _lacks(p, missing, shown, path, line)
        return p
    scored = [(p, *p.match(view(p))) for p in pool]
    fits = [p for p, missing, unknown in scored if not missing and not unknown]
    if len(fits) == 1:
        return fits[0]
    if len(fits) > 1:
        raise ProfileError(
            f"header matches {len(fits)} export profiles",
            path=path,
            line=line,
            details=f"Found: {shown}\n  Candidates: " + ", ".join(f"{p.name} ({p.origin})" for p in fits),
            fix="make the profiles' columns differ (remove the stale one from --profiles) so one header fits one",
        )
    subset = [(p, missing) for p, missing, unknown in scored if not unknown and len(view(p)) > 1]
    if len(subset) == 1:
        p, missing = subset[0]
        raise _lacks(p, missing, shown, path, line)
    ranked = sorted(scored, key=lambda s: (len(s[1]) + len(s[2]), s[0].name))[:3]
    cands = "; ".join(
        f"{p.name} (lacks {', '.join(m) or '-'}; unknown {', '.join(u[:5]) or '-'})" for p, m, u in ranked
    )
    raise ProfileError(
        "header matches no export profile",
        path=path,
        line=line,
        details=f"Found: {shown}\n  Closest {fmt} profiles: {cands}",
        fix="write a profile for this export and pass its folder with --profiles DIR, "
        "or export in lotline's native format (README: \"lotline's native format\")",
    )


def _lacks(p: Profile, missing: list[str], shown: str, path: str, line: int) -> ProfileError:
    names = ", ".join(f'"{m}"' for m in missing)
    return ProfileError(
        f"header lacks required column{'s' if len(missing) > 1 else ''} {names} of profile {p.name}",
        path=path,
        line=line,
        details=f"Found: {shown}",
        fix=f"export the column, or mark it optional in {p.origin}",
    )
