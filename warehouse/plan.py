"""The monitoring plan: a TOML file of chart entries, validated with exact ``file:line:col`` errors.

Format (our own; every key is documented in ``ENTRY_KEYS`` and ``CHART_PARAMS``)::

    [plan]
    name = "Line monitoring"                 # free text

    [defaults]                               # optional; applies to every [[chart]] that omits the key
    severity = "medium"
    rules = ["we1"]
    baseline = { first = 25 }

    [[chart]]
    name = "m1-cd-wafer"                     # unique id of the entry
    select = { layer = "M1_*", parameter = "cd_mid", product = "*", stage = "develop" }
    statistic = "wafer_mean"                 # see STATISTICS
    split = ["process_tool", "chamber"]      # any of SPLIT_KEYS
    step = "M1_LITHO"                        # route step whose tool/chamber made the layer
    chart = "ewma"                           # see CHART_TYPES
    params = { lambda = 0.1, L = 2.7 }       # see CHART_PARAMS
    rules = ["we1", "we2"]                   # run rules on the points (rule 1 only unless opted in)
    baseline = { first = 25 }                # or { from = 2026-09-01, to = 2026-09-15 }
    severity = "high"                        # low, medium, high, critical
    excursion_gap = 2                        # unsignalled points allowed inside one excursion

Wildcards in selectors: ``*`` (any run of characters) and ``?`` (one character). One entry expands to one
series per concrete layer, parameter and combination of split values found in the data, so new tools and
chambers get series automatically.
"""

from __future__ import annotations

import difflib
import fnmatch
import functools
import hashlib
import json
import tomllib
from dataclasses import dataclass, field
from datetime import date, datetime
from pathlib import Path
from typing import Any

from warehouse.errors import ConfigError
from warehouse.plan_locator import Locator

MEASUREMENT_STATISTICS = ("site_value", "wafer_mean", "wafer_sd", "wafer_range", "lot_mean")
DEFECT_STATISTICS = ("defect_density", "adder_density")
STATISTICS = MEASUREMENT_STATISTICS + DEFECT_STATISTICS
"""site_value: every site; wafer_mean/_sd/_range: over a wafer's sites; lot_mean: over a lot's sites;
defect_density: defects per cm² of inspected area (``parameter`` = a defect class or ``total``);
adder_density: adders per cm²."""

SPLIT_KEYS = ("process_tool", "chamber", "metrology_tool", "product")
"""process_tool/chamber come from the lot's process history at the entry's ``step``; metrology_tool is the
measuring (or inspecting) tool."""

CHART_TYPES = ("individuals", "xbar_s", "xbar_r", "ewma", "cusum", "u", "laney_u", "negbin_u")
DEFECT_CHARTS = ("u", "laney_u", "negbin_u")
"""Charts of defect densities (points sized by inspected area). ``negbin_u`` draws negative-binomial
probability limits (``spc.attributes.negbin_count_limits``) and runs rule 1 alone."""

CHART_PARAMS: dict[str, dict[str, Any]] = {
    "individuals": {"k": 3.0},
    "xbar_s": {"k": 3.0},
    "xbar_r": {"k": 3.0},
    "ewma": {"k": 3.0, "lambda": 0.2, "L": 3.0, "limits": "exact"},
    "cusum": {"k": 3.0, "cusum_k": 0.5, "h": 5.0, "headstart": 0.0},
    "u": {"k": 3.0},
    "laney_u": {"k": 3.0},
    "negbin_u": {"k": 3.0},
}
"""Parameters per chart type with their defaults. ``k``: Shewhart limit width in sigmas (rule we1 uses 3);
``lambda``/``L``: EWMA weight and limit width (NIST/SEMATECH e-Handbook §6.3.2.4); ``limits``: 'exact'
(time-varying) or 'asymptotic'; ``cusum_k``/``h``/``headstart``: CUSUM reference value, decision interval and
fast-initial-response start, in sigmas (e-Handbook §6.3.2.3). On ``negbin_u`` ``k`` sets the tail
probability of each limit, that of a k-sigma normal limit (0.135 % at 3)."""

SEVERITIES = ("low", "medium", "high", "critical")
DEFAULT_RULES = ("we1",)
DEFAULT_BASELINE = {"first": 25}
"""Phase I baselines of 20-25 subgroups are common practice."""
MIN_BASELINE = 5

ENTRY_KEYS = (
    "name",
    "description",
    "select",
    "statistic",
    "split",
    "step",
    "chart",
    "params",
    "rules",
    "baseline",
    "severity",
    "spec_check",
    "excursion_gap",
)
SELECT_KEYS = ("layer", "parameter", "product", "stage", "sample_kind")
TOP_KEYS = ("plan", "defaults", "chart")
PLAN_KEYS = ("name", "description")
DEFAULT_KEYS = ("severity", "rules", "baseline", "sample_kind", "spec_check", "excursion_gap")
DEFAULT_EXCURSION_GAP = 2
"""Unsignalled points allowed between two signals of one excursion, unless the plan says otherwise."""
MAX_EXCURSION_GAP = 1000
BASELINE_KEYS = ("first", "from", "to")
STAGES = ("develop", "etch", "*")


@dataclass(frozen=True)
class PlanEntry:
    """One validated [[chart]] entry of the plan."""

    name: str
    layer: str
    parameter: str
    product: str
    stage: str
    sample_kind: str
    statistic: str
    split: tuple[str, ...]
    step: str | None
    chart: str
    params: dict[str, Any]
    rules: tuple[str, ...]
    baseline: dict[str, Any]
    severity: str
    spec_check: bool
    line: int
    description: str = ""
    excursion_gap: int = DEFAULT_EXCURSION_GAP
    """Unsignalled points allowed between two signals of one excursion (warehouse.excursions)."""

    @property
    def is_defect(self) -> bool:
        """True for inspection-based statistics (defect and adder densities)."""
        return self.statistic in DEFECT_STATISTICS

    def matches(self, *, layer: str, parameter: str) -> bool:
        """Whether a concrete layer and parameter fall under this entry's selector."""
        return fnmatch.fnmatchcase(layer, self.layer) and fnmatch.fnmatchcase(parameter, self.parameter)


@dataclass(frozen=True)
class Plan:
    """A validated monitoring plan."""

    path: str
    text: str
    name: str
    entries: tuple[PlanEntry, ...]
    sha256: str = field(default="")

    def entry(self, name: str) -> PlanEntry:
        """The entry called ``name``; the error lists the entries that exist."""
        for e in self.entries:
            if e.name == name:
                return e
        known = ", ".join(e.name for e in self.entries)
        raise ConfigError(
            f'the monitoring plan has no chart "{name}"',
            path=self.path,
            fix=_did_you_mean(name, [e.name for e in self.entries]) + f"Known charts: {known}",
        )


# ------------------------------------------------------------------------------------------ parsing


def _did_you_mean(word: str, choices) -> str:
    close = difflib.get_close_matches(str(word), list(choices), n=1, cutoff=0.6)
    return f'did you mean "{close[0]}"? ' if close else ""


class _Checker:
    def __init__(self, path: str, text: str) -> None:
        self.path = path
        self.loc = Locator(text)
        self.errors: list[ConfigError] = []

    def err(self, where: tuple, what: str, *, key: bool = False, **kw) -> None:
        line, col = self.loc.key(where) if key else self.loc.value(where)
        self.errors.append(ConfigError(what, path=self.path, line=line, column=col, **kw))

    def unknown_keys(self, table: dict, known, where: tuple, label: str) -> None:
        for k in table:
            if k not in known:
                self.err(
                    (*where, k),
                    f'{label} has no key "{k}"',
                    key=True,
                    fix=_did_you_mean(k, known) + f"Known keys: {', '.join(known)}",
                )

    def string(self, value, where: tuple, label: str, *, choices=None) -> str | None:
        if not isinstance(value, str):
            self.err(where, f"{label} must be a string", found=value, expected="a quoted string")
            return None
        if choices is not None and value not in choices:
            self.err(
                where,
                f'{label} "{value}" is not known',
                expected=f"one of {', '.join(choices)}",
                fix=_did_you_mean(value, choices) + "Use one of the listed values",
            )
            return None
        return value


def parse_plan(text: str, *, path: str = "plan.toml") -> Plan:
    """Parse and validate a plan's text; raise ConfigError (first problem, the others in ``details``).

    Example:
        >>> p = parse_plan('[[chart]]\\nname = "a"\\nselect = { layer = "M1", parameter = "cd_mid" }\\n'
        ...                'statistic = "wafer_mean"\\nchart = "individuals"\\n')
        >>> p.entries[0].rules, p.entries[0].baseline
        (('we1',), {'first': 25})
    """
    errors = check_plan(text, path=path)
    if errors:
        first = errors[0]
        if len(errors) > 1:
            more = "\n  ".join(str(e).splitlines()[0] for e in errors[1:21])
            rest = f"\n  ... and {len(errors) - 21} more" if len(errors) > 21 else ""
            first = ConfigError(
                first.what,
                path=first.path,
                line=first.line,
                column=first.column,
                found=first.found,
                expected=first.expected,
                fix=first.fix,
                details=f"{len(errors) - 1} more problem(s):\n  {more}{rest}",
            )
        raise first
    return _build(text, path)


def read_plan(path: str | Path) -> Plan:
    """Read a plan file (UTF-8) and validate it."""
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except FileNotFoundError as exc:
        raise ConfigError("monitoring plan not found", path=str(p), fix="check the path") from exc
    except UnicodeDecodeError as exc:
        raise ConfigError(
            "monitoring plan is not UTF-8 text", path=str(p), fix="save the file as UTF-8"
        ) from exc
    return parse_plan(text, path=str(p))


def check_plan(text: str, *, path: str = "plan.toml") -> list[ConfigError]:
    """Every problem of a plan's text, in file order (empty when the plan is valid)."""
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        msg = str(exc)
        line = col = None
        if "(at line " in msg:
            where = msg[msg.rindex("(at line ") + 9 : -1]
            ln, _, cl = where.partition(", column ")
            line, col = int(ln), int(cl)
            msg = msg[: msg.rindex(" (at line ")]
        elif "(at end of document)" in msg:
            line = text.count("\n") + (0 if text.endswith("\n") else 1)
            msg = msg.replace(" (at end of document)", " at the end of the file")
        return [
            ConfigError(
                f"TOML syntax error: {msg}",
                path=path,
                line=line,
                column=col,
                fix="correct the TOML syntax (https://toml.io)",
            )
        ]
    c = _Checker(path, text)
    c.unknown_keys(doc, TOP_KEYS, (), "the plan")
    if "plan" in doc:
        if isinstance(doc["plan"], dict):
            c.unknown_keys(doc["plan"], PLAN_KEYS, ("plan",), "[plan]")
        else:
            c.err(("plan",), "plan must be a table", expected="[plan]")
    defaults = doc.get("defaults", {})
    if not isinstance(defaults, dict):
        c.err(("defaults",), "defaults must be a table", expected="[defaults]")
        defaults = {}
    c.unknown_keys(defaults, DEFAULT_KEYS, ("defaults",), "[defaults]")
    _check_common(c, defaults, ("defaults",))
    charts = doc.get("chart", [])
    if not isinstance(charts, list):
        c.err(("chart",), "chart must be an array of tables", expected="[[chart]] entries")
        charts = []
    if not charts:
        c.errors.append(
            ConfigError(
                "the plan has no [[chart]] entries",
                path=path,
                line=1,
                column=1,
                fix="add at least one [[chart]] table",
            )
        )
    seen: dict[str, int] = {}
    for i, entry in enumerate(charts):
        _check_entry(c, entry, i, defaults, seen)
    c.errors.sort(key=lambda e: (e.line or 0, e.column or 0))
    return c.errors


def _check_common(c: _Checker, table: dict, where: tuple) -> None:
    if "severity" in table:
        c.string(table["severity"], (*where, "severity"), "severity", choices=SEVERITIES)
    if "rules" in table:
        _check_rules(c, table["rules"], (*where, "rules"))
    if "baseline" in table:
        _check_baseline(c, table["baseline"], (*where, "baseline"))
    if "spec_check" in table and not isinstance(table["spec_check"], bool):
        c.err(
            (*where, "spec_check"),
            "spec_check must be true or false",
            found=table["spec_check"],
            expected="true or false",
        )
    if "sample_kind" in table:
        c.string(table["sample_kind"], (*where, "sample_kind"), "sample_kind")
    if "excursion_gap" in table:
        gap = table["excursion_gap"]
        if isinstance(gap, bool) or not isinstance(gap, int) or not 0 <= gap <= MAX_EXCURSION_GAP:
            c.err(
                (*where, "excursion_gap"),
                "excursion_gap must be a whole number of points",
                found=gap,
                expected=f"an integer from 0 to {MAX_EXCURSION_GAP}",
                fix="give the unsignalled points allowed inside one excursion, e.g. excursion_gap = 10",
            )


def _known_rules() -> tuple[str, ...]:
    from spc.rules import RULES

    return tuple(RULES)


def _check_rules(c: _Checker, rules, where: tuple) -> None:
    if not isinstance(rules, list) or not rules:
        c.err(
            where, "rules must be a non-empty list of rule ids", found=rules, expected='e.g. ["we1", "we2"]'
        )
        return
    known = _known_rules()
    for j, r in enumerate(rules):
        c.string(r, (*where, j), "rule", choices=known)
    dup = {r for r in rules if isinstance(r, str) and rules.count(r) > 1}
    for j, r in enumerate(rules):
        if r in dup and rules.index(r) != j:
            c.err((*where, j), f'rule "{r}" is listed twice', fix="list each rule once")


def _check_baseline(c: _Checker, b, where: tuple) -> None:
    if not isinstance(b, dict):
        c.err(
            where, "baseline must be a table", found=b, expected="{ first = N } or { from = DATE, to = DATE }"
        )
        return
    c.unknown_keys(b, BASELINE_KEYS, where, "baseline")
    if "first" in b:
        if "from" in b or "to" in b:
            c.err(
                (*where, "from" if "from" in b else "to"),
                "baseline takes either first or from/to, not both",
                fix="remove one of them",
            )
        n = b["first"]
        if not isinstance(n, int) or isinstance(n, bool) or n < MIN_BASELINE:
            c.err(
                (*where, "first"),
                "baseline first must be a whole number of subgroups",
                found=n,
                expected=f"an integer >= {MIN_BASELINE}",
            )
    elif "from" in b or "to" in b:
        for k in ("from", "to"):
            if k not in b:
                c.err(
                    where,
                    f"baseline window lacks {k}",
                    expected="both from and to",
                    fix=f"add {k} = YYYY-MM-DD",
                )
            elif not isinstance(b[k], date):
                c.err(
                    (*where, k),
                    f"baseline {k} must be a TOML date or date-time",
                    found=b[k],
                    expected="an unquoted date such as 2026-09-01",
                )
        if (
            isinstance(b.get("from"), date)
            and isinstance(b.get("to"), date)
            and _ts(b["from"]) >= _ts(b["to"])
        ):
            c.err(
                (*where, "to"),
                "baseline window ends before it starts",
                found=str(b["to"]),
                expected=f"a date after {b['from']}",
            )
    elif "first" not in b:
        c.err(where, "baseline is empty", expected="{ first = N } or { from = DATE, to = DATE }")


def _check_entry(c: _Checker, entry, i: int, defaults: dict, seen: dict[str, int]) -> None:
    where = ("chart", i)
    if not isinstance(entry, dict):
        c.err(where, "chart entry must be a table", expected="a [[chart]] table")
        return
    name = entry.get("name")
    label = f'chart "{name}"' if isinstance(name, str) else f"[[chart]] #{i + 1}"
    c.unknown_keys(entry, ENTRY_KEYS, where, label)
    for req in ("name", "select", "statistic", "chart"):
        if req not in entry:
            c.err(
                where,
                f'{label} lacks required key "{req}"',
                key=True,
                fix=f'add the key "{req}" to this [[chart]] table',
            )
    if "name" in entry and c.string(name, (*where, "name"), "chart name") is not None:
        if name in seen:
            c.err(
                (*where, "name"),
                f'chart name "{name}" is used twice',
                fix=f"rename one (the first is on line {seen[name]})",
            )
        else:
            seen[name] = c.loc.value((*where, "name"))[0]
    stat = None
    if "statistic" in entry:
        stat = c.string(entry["statistic"], (*where, "statistic"), "statistic", choices=STATISTICS)
    if "select" in entry:
        sel = entry["select"]
        if not isinstance(sel, dict):
            c.err(
                (*where, "select"), "select must be a table", expected='{ layer = "...", parameter = "..." }'
            )
        else:
            c.unknown_keys(sel, SELECT_KEYS, (*where, "select"), "select")
            if "layer" not in sel:
                c.err((*where, "select"), "select lacks layer", expected='layer = "NAME" (wildcards allowed)')
            if "parameter" not in sel and stat not in DEFECT_STATISTICS:
                c.err(
                    (*where, "select"),
                    "select lacks parameter",
                    expected='parameter = "cd_mid" (wildcards allowed)',
                )
            for k in ("layer", "parameter", "product", "sample_kind"):
                if k in sel:
                    c.string(sel[k], (*where, "select", k), f"select {k}")
            if "stage" in sel:
                c.string(sel["stage"], (*where, "select", "stage"), "select stage", choices=STAGES)
    split = entry.get("split", [])
    if not isinstance(split, list):
        c.err((*where, "split"), "split must be a list", found=split, expected='e.g. ["process_tool"]')
        split = []
    for j, s in enumerate(split):
        c.string(s, (*where, "split", j), "split key", choices=SPLIT_KEYS)
    if any(s in ("process_tool", "chamber") for s in split):
        if "step" not in entry:
            c.err(
                (*where, "split"),
                "splitting by process_tool or chamber needs the route step that made the layer",
                fix='add step = "<route step>"',
            )
    if "step" in entry and c.string(entry["step"], (*where, "step"), "step") is not None:
        sel = entry.get("select")
        layer = sel.get("layer") if isinstance(sel, dict) else None
        if isinstance(layer, str) and any(ch in layer for ch in "*?["):
            c.err(
                (*where, "step"),
                "a route step belongs to one layer, but the selected layer has wildcards",
                found=layer,
                expected="a concrete layer name",
                fix="write one [[chart]] per layer",
            )
    chart = None
    if "chart" in entry:
        chart = c.string(entry["chart"], (*where, "chart"), "chart", choices=CHART_TYPES)
    if chart and stat:
        if chart in DEFECT_CHARTS and stat not in DEFECT_STATISTICS:
            c.err(
                (*where, "chart"),
                f'chart "{chart}" needs a defect statistic',
                found=stat,
                expected=" or ".join(DEFECT_STATISTICS),
            )
        rules = entry.get("rules", defaults.get("rules", list(DEFAULT_RULES)))
        if chart == "negbin_u" and isinstance(rules, list) and any(r != "we1" for r in rules):
            c.err(
                (*where, "rules") if "rules" in entry else (*where, "chart"),
                'chart "negbin_u" runs rule 1 alone (its probability limits are not symmetric, so run rules do '
                "not apply)",
                found=", ".join(map(str, rules)),
                expected='rules = ["we1"]',
                fix='set rules = ["we1"] on this chart, or chart it as "laney_u" to use run rules',
            )
        if chart in ("xbar_s", "xbar_r") and stat not in ("wafer_mean", "lot_mean"):
            c.err(
                (*where, "chart"),
                f'chart "{chart}" charts subgroup means',
                found=stat,
                expected="wafer_mean or lot_mean",
            )
    if "params" in entry:
        params = entry["params"]
        if not isinstance(params, dict):
            c.err((*where, "params"), "params must be a table", expected="{ name = value, ... }")
        elif chart:
            known = tuple(CHART_PARAMS[chart])
            c.unknown_keys(params, known, (*where, "params"), f'chart type "{chart}"')
            _check_params(c, params, (*where, "params"))
    _check_common(c, entry, where)


def _check_params(c: _Checker, params: dict, where: tuple) -> None:
    def num(key, lo, hi, *, lo_open=True, text):
        if key not in params:
            return
        v = params[key]
        ok = isinstance(v, int | float) and not isinstance(v, bool)
        if ok:
            ok = (v > lo if lo_open else v >= lo) and v <= hi
        if not ok:
            c.err((*where, key), f"parameter {key} is out of range", found=v, expected=text)

    num("k", 0, 10, text="a number in (0, 10]")
    num("lambda", 0, 1, text="a number in (0, 1]")
    num("L", 0, 10, text="a number in (0, 10]")
    num("cusum_k", 0, 5, lo_open=False, text="a number in [0, 5]")
    num("h", 0, 50, text="a number in (0, 50]")
    num("headstart", 0, 50, lo_open=False, text="a number in [0, 50]")
    if "limits" in params:
        c.string(params["limits"], (*where, "limits"), "parameter limits", choices=("exact", "asymptotic"))


def _ts(d: date) -> datetime:
    if isinstance(d, datetime):
        return d.replace(tzinfo=None) if d.tzinfo is None else d.astimezone(tz=None).replace(tzinfo=None)
    return datetime(d.year, d.month, d.day)


def _build(text: str, path: str) -> Plan:
    doc = tomllib.loads(text)
    defaults = doc.get("defaults", {})
    loc = Locator(text)
    entries = []
    for i, e in enumerate(doc.get("chart", [])):
        sel = e["select"]
        stat = e["statistic"]
        chart = e["chart"]
        params = {**CHART_PARAMS[chart], **e.get("params", {})}
        baseline = dict(e.get("baseline", defaults.get("baseline", DEFAULT_BASELINE)))
        for k in ("from", "to"):
            if k in baseline:
                baseline[k] = _ts(baseline[k]).isoformat()
        entries.append(
            PlanEntry(
                name=e["name"],
                layer=sel["layer"],
                parameter=sel.get("parameter", "total" if stat in DEFECT_STATISTICS else "*"),
                product=sel.get("product", "*"),
                stage=sel.get("stage", "*"),
                sample_kind=sel.get("sample_kind", defaults.get("sample_kind", "production")),
                statistic=stat,
                split=tuple(e.get("split", [])),
                step=e.get("step"),
                chart=chart,
                params=params,
                rules=tuple(e.get("rules", defaults.get("rules", list(DEFAULT_RULES)))),
                baseline=baseline,
                severity=e.get("severity", defaults.get("severity", "medium")),
                spec_check=bool(
                    e.get("spec_check", defaults.get("spec_check", stat in MEASUREMENT_STATISTICS))
                ),
                line=loc.key(("chart", i))[0],
                description=e.get("description", ""),
                excursion_gap=int(
                    e.get("excursion_gap", defaults.get("excursion_gap", DEFAULT_EXCURSION_GAP))
                ),
            )
        )
    name = doc.get("plan", {}).get("name", Path(path).stem)
    sha = hashlib.sha256(text.encode("utf-8")).hexdigest()
    return Plan(path=path, text=text, name=name, entries=tuple(entries), sha256=sha)


# ------------------------------------------------------------------------------------------ storing


IDENTITY_FIELDS = ("layer", "parameter", "product", "stage", "sample_kind", "statistic", "step", "chart")
"""Fields that define what a chart's series and frozen limits mean; changing one needs a new chart name
(the chart type only between families: variables charts, u / u' charts and negbin_u charts keep limits differently)."""


def _chart_family(chart: str) -> str:
    if chart == "negbin_u":
        return "negative-binomial"  # its limit versions keep 1/alpha where u' keeps sigma_z
    return "attribute" if chart in ("u", "laney_u") else "variables"


def store_plan(con, plan: Plan, *, user: str) -> int:
    """Store a validated plan as the next plan version (inside the caller's transaction); return it.

    Refuses an entry that keeps its name but changes what it charts (``IDENTITY_FIELDS``, or its split):
    its series and frozen limits belong to the old definition.
    """
    row = con.execute("SELECT coalesce(max(plan_version), 0) FROM plans").fetchall()[0][0]
    version = int(row) + 1
    old = {
        r[0]: r[1:]
        for r in con.execute(
            f"SELECT chart, {', '.join('chart_type' if f == 'chart' else f for f in IDENTITY_FIELDS)}, split_json "
            "FROM chart_plan WHERE plan_version = ?",
            [version - 1],
        ).fetchall()
    }
    for e in plan.entries:
        if e.name not in old:
            continue
        before = dict(zip((*IDENTITY_FIELDS, "split"), old[e.name], strict=True))
        before["split"] = tuple(json.loads(before["split"]))
        now = {f: getattr(e, f) for f in (*IDENTITY_FIELDS, "split")}
        if _chart_family(now["chart"]) == _chart_family(before["chart"]):
            now["chart"] = before["chart"]  # e.g. individuals -> ewma: the same limits apply
        diff = [f for f in now if now[f] != before[f]]
        if diff:
            f = diff[0]
            raise ConfigError(
                f'chart "{e.name}" changes its {f}, but its series and frozen limits belong to the loaded definition',
                path=plan.path,
                line=e.line,
                column=1,
                found=_show_value(now[f]),
                expected=f"{_show_value(before[f])} as in plan version {version - 1}",
                fix="give the changed chart a new name (the old one's history stays), or keep the old definition",
            )
    con.execute(
        "INSERT INTO plans VALUES (?, ?, ?, ?, now()::TIMESTAMP, ?)",
        [version, plan.path, plan.sha256, plan.text, user],
    )
    for e in plan.entries:
        con.execute(
            "INSERT INTO chart_plan VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
            [
                version,
                e.name,
                e.layer,
                e.parameter,
                e.product,
                e.stage,
                e.sample_kind,
                e.statistic,
                json.dumps(list(e.split)),
                e.step,
                e.chart,
                json.dumps(e.params, sort_keys=True),
                json.dumps(list(e.rules)),
                json.dumps(e.baseline, sort_keys=True),
                e.severity,
                e.spec_check,
                e.line,
            ],
        )
    return version


def _show_value(v) -> str:
    return ", ".join(v) if isinstance(v, tuple) else str(v)


def current_plan(con) -> Plan | None:
    """The plan in force (highest plan_version), rebuilt from its stored text; None when none was loaded."""
    rows = con.execute(
        "SELECT path, text, plan_version FROM plans ORDER BY plan_version DESC LIMIT 1"
    ).fetchall()
    if not rows:
        return None
    path, text, _ = rows[0]
    return _build(text, path)


def current_plan_version(con) -> int:
    """The highest plan_version (0 when no plan was loaded)."""
    return int(con.execute("SELECT coalesce(max(plan_version), 0) FROM plans").fetchall()[0][0])


def describe_plan(plan: Plan) -> list[dict[str, Any]]:
    """One JSON-friendly dict per entry, with the expected in-control ARL of its run-rule set."""
    out = []
    for e in plan.entries:
        out.append(
            {
                "chart": e.name,
                "select": {
                    "layer": e.layer,
                    "parameter": e.parameter,
                    "product": e.product,
                    "stage": e.stage,
                    "sample_kind": e.sample_kind,
                },
                "statistic": e.statistic,
                "split": list(e.split),
                "step": e.step,
                "chart_type": e.chart,
                "params": e.params,
                "rules": list(e.rules),
                "baseline": e.baseline,
                "severity": e.severity,
                "spec_check": e.spec_check,
                "excursion_gap": e.excursion_gap,
                "in_control_arl": in_control_arl(e),
                "advice": plan_advice(e),
            }
        )
    return out


WAFER_LEVEL_STATISTICS = ("site_value", "wafer_mean", "wafer_sd", "wafer_range")
"""Statistics with several points per lot, which share the lot's effect."""


def plan_advice(e: PlanEntry) -> list[str]:
    """Notes on an entry that is valid but likely to mislead (shown by `plan load` and `plan show`).

    Run rules beyond rule 1, EWMA and CUSUM assume independent points. Points of one lot share its lot
    effect (nested data, notes/domain.md), so on wafer- or site-level points they alarm more often than
    the in-control ARL shown (on the demo fab, consecutive wafer means of one lot correlate at about 0.7,
    and rule we2 alarmed on 1.9 % of such points against 0.2 % on independent ones, its in-control ARL
    being 511).
    """
    if e.statistic not in WAFER_LEVEL_STATISTICS:
        return []
    uses = [r for r in e.rules if r != "we1"]
    if e.chart in ("ewma", "cusum"):
        uses.insert(0, e.chart.upper())
    if not uses:
        return []
    return [
        f"{', '.join(uses)} on {e.statistic} points: the points of one lot share its lot effect, so they are "
        f"not independent and alarm more often than the in-control ARL shown; chart lot_mean for them, or "
        f"keep rule we1 alone on {e.statistic}"
    ]


def in_control_arl(e: PlanEntry) -> dict[str, float | str | None]:
    """Expected in-control ARL (points between false alarms) of the entry's run rules and chart signal.

    ``rules``: the Shewhart rule set (Markov chain of Champ & Woodall 1987, via spc.arl); ``chart``: the EWMA
    (Lucas & Saccucci 1990, asymptotic limits) or CUSUM (Brook & Evans 1972) signal; ``combined``:
    ``1 / (1/rules + 1/chart)``, an approximation that treats the two as independent.
    """
    rules_arl = _rules_arl(e.rules, float(e.params.get("k", 3.0)))
    chart_arl = None
    if e.chart == "ewma":
        chart_arl = _ewma_arl(float(e.params["lambda"]), float(e.params["L"]))
    elif e.chart == "cusum":
        chart_arl = _cusum_arl(float(e.params["cusum_k"]), float(e.params["h"]), float(e.params["headstart"]))
    combined = rules_arl if chart_arl is None else 1.0 / (1.0 / rules_arl + 1.0 / chart_arl)
    return {
        "rules": round(rules_arl, 1),
        "chart": None if chart_arl is None else round(chart_arl, 1),
        "combined": round(combined, 1),
    }


@functools.lru_cache(maxsize=256)
def _rules_arl(rules: tuple[str, ...], k: float) -> float:
    from spc import arl
    from spc.rules import BeyondLimits, rule_params

    params = [
        rule_params(r, k=k) if isinstance(rule_params(r), BeyondLimits) else rule_params(r) for r in rules
    ]
    return float(arl.expected_arl(params).arl)


@functools.lru_cache(maxsize=256)
def _ewma_arl(lam: float, L: float) -> float:
    from spc import arl

    return float(arl.ewma_arl(lam, L)[0].arl)


@functools.lru_cache(maxsize=256)
def _cusum_arl(k: float, h: float, headstart: float) -> float:
    from spc import arl

    return float(arl.cusum_arl(k, h, headstart=headstart)[0].arl)
