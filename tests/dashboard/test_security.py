"""Every filter and query parameter is bound: injection strings in the URL show "not found" (or fall back
to a default), raise no SQL error and change nothing; no SQL text lives in dashboard/, and warehouse/queries.py
never formats a value into SQL."""

from __future__ import annotations

import ast
import re
from pathlib import Path

import pytest

from tests.dashboard.helpers import run_page
from warehouse import store

ROOT = Path(__file__).resolve().parents[2]
INJECTIONS = [
    "' OR 1=1 --",
    "1; DROP TABLE signals; --",
    "1 OR 1=1",
    '" OR ""="',
    "%' UNION SELECT * FROM rejects --",
]


def _counts(db):
    with store.open_warehouse(db, read_only=True) as con:
        return store.table_counts(con)


@pytest.mark.parametrize("value", INJECTIONS)
def test_lot_page_injection_in_lot_shows_not_found(fixture_db, value):
    before = _counts(fixture_db)
    at = run_page("lot", lot=value, wafer=value, layer=value, excursion=value)
    assert not at.exception
    assert at.info[0].value == "Lot not found."
    assert not at.dataframe  # nothing of any lot is shown
    assert _counts(fixture_db) == before


@pytest.mark.parametrize("value", INJECTIONS[:3])
def test_chart_page_injection_in_series_shows_not_found(fixture_db, value):
    at = run_page("chart", series=value, chart=value, days=value, color=value)
    assert not at.exception
    assert at.info[0].value == "Series not found."


@pytest.mark.parametrize("value", INJECTIONS[:3])
def test_excursions_page_injection_in_filters_and_id_shows_not_found(fixture_db, value):
    before = _counts(fixture_db)
    at = run_page("excursions", excursion=value, state=value, severity=value, layer=value, chart=value)
    assert not at.exception
    assert at.selectbox(key="w_state").value == "open"  # unknown filter values fall back to the default
    assert any(i.value == "Excursion not found." for i in at.info)
    assert _counts(fixture_db) == before


@pytest.mark.parametrize("value", INJECTIONS[:3])
def test_overview_and_health_pages_ignore_injected_filters(fixture_db, value):
    at = run_page(days=value, by=value, stale=value)
    assert not at.exception
    assert at.selectbox(key="w_by").value == "process_tool"
    at = run_page("health", status=value, file=value)
    assert not at.exception
    assert at.selectbox(key="w_status").value == "all"


# ------------------------------------------------------------------------------------------ source checks

SQL_PATTERNS = [
    re.compile(r"\bSELECT\b[\s\S]{0,200}?\bFROM\b", re.IGNORECASE),
    re.compile(r"\bINSERT\s+INTO\b", re.IGNORECASE),
    re.compile(r"\bUPDATE\b\s+\w+\s+\bSET\b", re.IGNORECASE),
    re.compile(r"\bDELETE\s+FROM\b", re.IGNORECASE),
    re.compile(r"\b(CREATE|DROP|ALTER)\s+(TABLE|VIEW|INDEX|SEQUENCE)\b", re.IGNORECASE),
]


def _string_constants(path: Path) -> list[tuple[int, str]]:
    tree = ast.parse(path.read_text(encoding="utf-8"))
    return [
        (n.lineno, n.value)
        for n in ast.walk(tree)
        if isinstance(n, ast.Constant) and isinstance(n.value, str)
    ]


def test_dashboard_source_holds_no_sql_text_and_no_connection():
    bad = []
    for path in sorted((ROOT / "dashboard").rglob("*.py")):
        for line, text in _string_constants(path):
            if any(p.search(text) for p in SQL_PATTERNS):
                bad.append(f"{path.relative_to(ROOT)}:{line}: {text[:60]!r}")
        tree = ast.parse(path.read_text(encoding="utf-8"))
        for node in ast.walk(tree):
            if isinstance(node, ast.Attribute) and node.attr in ("execute", "executemany", "sql", "cursor"):
                bad.append(f"{path.relative_to(ROOT)}:{node.lineno}: calls .{node.attr}()")
    assert not bad, "SQL or connection use in dashboard/:\n" + "\n".join(bad)


def _looks_like_sql(text: str) -> bool:
    return any(p.search(text) for p in SQL_PATTERNS) or bool(
        re.search(r"\b(WHERE|GROUP BY|ORDER BY|CASE)\b", text)
    )


def _module_constants(tree: ast.Module) -> set[str]:
    out = set()
    for node in tree.body:
        if isinstance(node, ast.Assign) and isinstance(node.value, ast.Constant):
            out.update(t.id for t in node.targets if isinstance(t, ast.Name))
    return out


def _validated_names(func: ast.FunctionDef) -> set[str]:
    """Parameters checked against a literal tuple before use: ``if x not in ("a", "b"): raise ...``."""
    out = set()
    for node in ast.walk(func):
        if (isinstance(node, ast.If) and isinstance(node.test, ast.Compare) and isinstance(node.test.left, ast.Name)
                and isinstance(node.test.ops[0], ast.NotIn) and isinstance(node.test.comparators[0], ast.Tuple | ast.Set)
                and all(isinstance(e, ast.Constant) for e in node.test.comparators[0].elts)
                and any(isinstance(b, ast.Raise) for b in node.body)):  # fmt: skip
            out.add(node.test.left.id)
    return out


def _constant_expr(expr: ast.AST, constants: set[str]) -> bool:
    """An expression built only from literals and module constants (e.g. ``_RANK.format(c="e.severity")``)."""
    for n in ast.walk(expr):
        if isinstance(n, ast.Name) and n.id not in constants:
            return False
    return True


def test_queries_never_format_values_into_sql():
    path = ROOT / "warehouse" / "queries.py"
    tree = ast.parse(path.read_text(encoding="utf-8"))
    constants = _module_constants(tree)
    bad = []
    for func in [n for n in tree.body if isinstance(n, ast.FunctionDef)]:
        params = {a.arg for a in func.args.args + func.args.kwonlyargs}
        safe = set(constants) | _validated_names(func)
        for node in ast.walk(func):
            if (
                isinstance(node, ast.Assign)
                and len(node.targets) == 1
                and isinstance(node.targets[0], ast.Name)
            ):
                if node.targets[0].id not in params and _constant_expr(node.value, constants):
                    safe.add(node.targets[0].id)
        for node in ast.walk(func):
            if isinstance(node, ast.JoinedStr):
                text = "".join(v.value for v in node.values if isinstance(v, ast.Constant))
                if not _looks_like_sql(text):
                    continue
                for v in node.values:
                    if isinstance(v, ast.FormattedValue) and not _constant_expr(v.value, safe):
                        bad.append(
                            f"queries.py:{v.lineno} {func.name}: f-string SQL interpolates {ast.unparse(v.value)}"
                        )
            elif (
                isinstance(node, ast.Call)
                and isinstance(node.func, ast.Attribute)
                and node.func.attr == "format"
            ):
                args = [*node.args, *(k.value for k in node.keywords)]
                if not all(_constant_expr(a, safe) for a in args):
                    bad.append(f"queries.py:{node.lineno} {func.name}: .format() with a value")
            elif (
                isinstance(node, ast.BinOp)
                and isinstance(node.op, ast.Mod)
                and isinstance(node.left, ast.Constant)
            ):
                if isinstance(node.left.value, str) and _looks_like_sql(node.left.value):
                    bad.append(f"queries.py:{node.lineno} {func.name}: %-formatted SQL")
    assert not bad, "values formatted into SQL:\n" + "\n".join(bad)


def test_queries_source_check_catches_a_formatted_value(tmp_path):
    # The checker itself must fail on the pattern it is meant to catch.
    code = "def f(con, *, lot):\n    return con.sql(f\"SELECT * FROM m WHERE lot_id = '{lot}'\")\n"
    tree = ast.parse(code)
    func = tree.body[0]
    fstr = next(n for n in ast.walk(func) if isinstance(n, ast.JoinedStr))
    value = next(v for v in fstr.values if isinstance(v, ast.FormattedValue))
    assert _looks_like_sql("SELECT * FROM m WHERE lot_id = ")
    assert not _constant_expr(value.value, _module_constants(tree) | _validated_names(func))
