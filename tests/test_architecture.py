"""The package boundaries of DESIGN.md, made executable by reading the imports of every module."""

from __future__ import annotations

import ast
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
PACKAGES = ("ingest", "warehouse", "spc", "dashboard", "demo_fab")

# Allowed edges of "ours" imports: lotline.py -> ingest, dashboard, demo_fab -> warehouse -> spc.
ALLOWED = {
    "spc": {"spc"},
    "warehouse": {"warehouse", "spc"},
    "ingest": {"ingest", "warehouse"},
    "dashboard": {"dashboard", "warehouse", "spc"},
    "demo_fab": {"demo_fab", "warehouse", "spc", "ingest"},
}


def _modules(package: str):
    yield from sorted((ROOT / package).rglob("*.py"))


def _imported_roots(path: Path) -> set[str]:
    tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
    roots = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            roots.update(a.name.split(".")[0] for a in node.names)
        elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
            roots.add(node.module.split(".")[0])
    return roots


@pytest.mark.parametrize("package", PACKAGES)
def test_package_imports_follow_the_design_direction(package):
    bad = []
    for path in _modules(package):
        ours = _imported_roots(path) & (set(PACKAGES) | {"lotline"})
        for root in ours - ALLOWED[package]:
            bad.append(f"{path.relative_to(ROOT)} imports {root}")
    assert not bad, "imports against DESIGN.md's direction:\n" + "\n".join(bad)


def test_ingest_adapters_import_only_the_schema():
    bad = []
    for path in sorted((ROOT / "ingest" / "adapters").rglob("*.py")):
        tree = ast.parse(path.read_text(encoding="utf-8"))
        for node in ast.walk(tree):
            if isinstance(node, ast.ImportFrom) and node.module and node.module.startswith("warehouse"):
                if node.module == "warehouse":
                    names = {f"warehouse.{a.name}" for a in node.names}
                else:
                    names = {node.module}
                for name in names - {"warehouse.schema", "warehouse.errors"}:
                    bad.append(f"{path.relative_to(ROOT)} imports {name}")
            if isinstance(node, ast.Import):
                for a in node.names:
                    if a.name.startswith("warehouse") and a.name not in (
                        "warehouse.schema",
                        "warehouse.errors",
                    ):
                        bad.append(f"{path.relative_to(ROOT)} imports {a.name}")
    assert not bad, "\n".join(bad)


def test_spc_imports_no_io():
    forbidden = {
        "warehouse",
        "ingest",
        "dashboard",
        "demo_fab",
        "streamlit",
        "duckdb",
        "os",
        "pathlib",
        "io",
        "socket",
        "subprocess",
        "shutil",
        "tempfile",
        "glob",
        "requests",
        "time",
    }
    bad = []
    for path in _modules("spc"):
        text = path.read_text(encoding="utf-8")
        for root in _imported_roots(path) & forbidden:
            bad.append(f"{path.relative_to(ROOT)} imports {root}")
        tree = ast.parse(text)
        for node in ast.walk(tree):
            if (
                isinstance(node, ast.Attribute)
                and node.attr in ("now", "utcnow", "today")
                and isinstance(node.value, (ast.Name, ast.Attribute))
            ):
                bad.append(f"{path.relative_to(ROOT)}:{node.lineno} reads the clock")
            if isinstance(node, ast.Call) and isinstance(node.func, ast.Name) and node.func.id == "open":
                bad.append(f"{path.relative_to(ROOT)}:{node.lineno} opens a file")
    assert not bad, "\n".join(bad)


def test_only_warehouse_holds_a_database_connection():
    bad = []
    for package in ("ingest", "spc", "dashboard", "demo_fab"):
        for path in _modules(package):
            if "duckdb" in _imported_roots(path):
                bad.append(str(path.relative_to(ROOT)))
    assert not bad, "duckdb imported outside warehouse/: " + ", ".join(bad)


def test_nothing_imports_the_command_line_module():
    bad = [
        str(p.relative_to(ROOT)) for pkg in PACKAGES for p in _modules(pkg) if "lotline" in _imported_roots(p)
    ]
    assert not bad, bad


def test_schema_import_is_light():
    code = (
        "import sys, warehouse.schema\n"
        "heavy = [m for m in ('duckdb', 'polars', 'pyarrow', 'streamlit') if m in sys.modules]\n"
        "print(','.join(heavy))"
    )
    out = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True, check=True)
    assert out.stdout.strip() == ""


def test_cli_help_is_fast_and_lists_commands():
    out = subprocess.run([sys.executable, "lotline.py", "--help"], cwd=ROOT, capture_output=True, text=True)
    assert out.returncode == 0, out.stderr
    assert "Usage:" in out.stdout
    code = "import sys, runpy; sys.argv=['lotline','--help']\ntry:\n runpy.run_path('lotline.py', run_name='__main__')\nexcept SystemExit: pass\nprint([m for m in ('duckdb','polars','streamlit') if m in sys.modules])"
    out = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True)
    assert out.stdout.strip().splitlines()[-1] == "[]", "heavy modules imported by --help"
