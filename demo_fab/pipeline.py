"""The whole job on the demo fab in one call: generate, ingest, load the plan, evaluate, summarise.

``lotline demo`` is a thin shell over :func:`run_demo` (and ``lotline demo --score`` over
``demo_fab.score.score_demo``). The pipeline uses only the public entry points every user has: the ingest
job, the plan loader, the evaluator and the named warehouse queries, so the demo exercises the same paths
as a fab's own deployment.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

from demo_fab.demo import generate_demo
from ingest.jobs import ingest_paths
from warehouse import evaluate, queries, store
from warehouse.plan import read_plan, store_plan

PLAN_PATH = Path(__file__).with_name("plan.toml")
"""The demo fab's monitoring plan (what a fab keeps under version control)."""

DEMO_USER = "demo"


@dataclass
class DemoRun:
    """What :func:`run_demo` did, for the summary the CLI prints."""

    out_dir: Path
    db: Path
    truth: Path
    days: int
    seed: int
    files: dict[str, int] = field(default_factory=dict)
    rows_loaded: int = 0
    rows_rejected: int = 0
    rows_superseded: int = 0
    failed_files: list[str] = field(default_factory=list)
    series: int = 0
    points: int = 0
    limits_frozen: int = 0
    signals: int = 0
    open_by_severity: dict[str, int] = field(default_factory=dict)
    top: list[dict] = field(default_factory=list)
    seconds: dict[str, float] = field(default_factory=dict)

    def to_dict(self) -> dict:
        d = dict(self.__dict__)
        for k in ("out_dir", "db", "truth"):
            d[k] = str(d[k])
        return d


def run_demo(
    out_dir: str | Path,
    *,
    days: int = 60,
    seed: int = 7,
    plan_path: str | Path = PLAN_PATH,
    progress: Callable[[str], None] | None = None,
) -> DemoRun:
    """Build the demo warehouse under ``out_dir`` from scratch and return a summary.

    Writes ``out_dir/exports/``, ``out_dir/truth.json`` and ``out_dir/lotline.duckdb`` (an existing
    warehouse there is replaced, since the demo regenerates everything it holds).

    Example:
        >>> run_demo("demo_run", days=20).open_by_severity  # doctest: +SKIP
        {'high': 4, 'medium': 7}
    """
    say = progress or (lambda _msg: None)
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    db = out / "lotline.duckdb"
    for stale in (db, db.with_name(db.name + ".wal")):
        stale.unlink(missing_ok=True)
    run = DemoRun(out_dir=out, db=db, truth=out / "truth.json", days=days, seed=seed)

    t0 = time.perf_counter()
    say(f"generating {days} days of the demo fab (seed {seed}) ...")
    summary = generate_demo(out, days=days, seed=seed)
    run.files = dict(summary.files)
    run.seconds["generate"] = time.perf_counter() - t0

    t0 = time.perf_counter()
    say(f"ingesting {sum(run.files.values())} export files ...")
    store.init_warehouse(db)
    report = ingest_paths([out / "exports"], db=db, user=DEMO_USER)
    run.rows_loaded = sum(f.rows_loaded for f in report.files)
    run.rows_rejected = sum(f.rows_rejected for f in report.files)
    run.rows_superseded = sum(f.rows_superseded for f in report.files)
    run.failed_files = [f.path for f in report.files if f.status == "failed"]
    run.seconds["ingest"] = time.perf_counter() - t0

    t0 = time.perf_counter()
    say("loading the monitoring plan and evaluating every chart ...")
    plan = read_plan(plan_path)
    with store.open_warehouse(db) as con, store.transaction(con):
        store_plan(con, plan, user=DEMO_USER)
        store.bump_data_version(con)
    ev = evaluate.evaluate_warehouse(db, user=DEMO_USER)
    run.series = ev.series
    run.points = ev.points
    run.limits_frozen = ev.limits_frozen
    run.signals = ev.signals_new
    run.seconds["evaluate"] = time.perf_counter() - t0

    with store.open_warehouse(db, read_only=True) as con:
        sev = queries.open_excursions_by_severity(con)
        run.open_by_severity = {r["severity"]: int(r["total"]) for r in sev.iter_rows(named=True)}
        top = queries.list_excursions(con, open_only=True, limit=10_000)
    run.top = _top_excursions(top, 3)
    return run


_SEVERITY_ORDER = {"critical": 0, "high": 1, "medium": 2, "low": 3}


def _tool_of(r: dict) -> str:
    return (
        r.get("chamber")
        and f"{r.get('process_tool')}/{r.get('chamber')}"
        or r.get("process_tool")
        or r.get("metrology_tool")
        or "(all tools)"
    )


def _top_excursions(frame, n: int) -> list[dict]:
    """The n open excursions an engineer should look at first: by severity, then by signal count, one per
    chart and tool (the same series' other open excursions are counted on its line, not listed again)."""
    rows = list(frame.iter_rows(named=True))
    rows.sort(
        key=lambda r: (_SEVERITY_ORDER.get(r["severity"], 9), -(r["n_signals"] or 0), str(r["first_at"]))
    )
    firsts: dict[tuple, dict] = {}
    for r in rows:
        key = (r["chart"], r["layer"], r["parameter"], _tool_of(r))
        if key in firsts:
            firsts[key]["more"] += 1
        elif len(firsts) < n:
            firsts[key] = {
                "excursion_id": r["excursion_id"],
                "severity": r["severity"],
                "chart": r["chart"],
                "layer": r["layer"],
                "parameter": r["parameter"],
                "tool": key[3],
                "signals": r["n_signals"],
                "first_at": str(r["first_at"]),
                "more": 0,
            }
    return list(firsts.values())


def render_summary(run: DemoRun) -> str:
    """The short text summary ``lotline demo`` prints."""
    lines = [
        f"demo fab written to {run.out_dir} ({run.days} days, seed {run.seed})",
        f"  files        {sum(run.files.values())} exports in {len(run.files)} dialects"
        f" ({', '.join(f'{k} {v}' for k, v in sorted(run.files.items()))})",
        f"  rows         {run.rows_loaded:,} loaded, {run.rows_rejected:,} rejected, "
        f"{run.rows_superseded:,} superseded by a corrected re-export",
        f"  failed files {len(run.failed_files)}"
        + (f" ({', '.join(Path(p).name for p in run.failed_files)})" if run.failed_files else ""),
        f"  charts       {run.series:,} series, {run.points:,} points, {run.limits_frozen:,} limit versions frozen",
        f"  signals      {run.signals:,}",
        "  open excursions by severity: "
        + (
            ", ".join(
                f"{k} {v}"
                for k, v in sorted(run.open_by_severity.items(), key=lambda kv: _SEVERITY_ORDER.get(kv[0], 9))
            )
            or "none"
        ),
    ]
    if run.top:
        lines.append("  look first at:")
        for t in run.top:
            lines.append(
                f"    #{t['excursion_id']:<5} {t['severity']:<8} {t['layer']} {t['parameter']} on {t['tool']}"
                f" ({t['signals']} signals from {t['first_at'][:16]}; chart {t['chart']}"
                + (f"; {t['more']} more open on the same chart and tool" if t.get("more") else "")
                + ")"
            )
    lines.append("  timings      " + ", ".join(f"{k} {v:.1f} s" for k, v in run.seconds.items()))
    lines.append("Signals advise; the fab's out-of-control action plan and a qualified engineer decide.")
    return "\n".join(lines)
