"""One harness for every benchmark: ``make bench`` (1M, 10M, 30M) and ``make bench-quick`` (small).

Each stage module in ``bench/`` exposes ``run(size: int) -> list[dict]``; every dict has the keys
``name, size, seconds, baseline_seconds, ratio, target, ok`` (more are welcome, e.g. ``rows_per_s``,
``peak_rss_mb``). The baseline of each stage is measured in the same run on the same data (a bare DuckDB
``read_csv``, a naive per-point loop, a plain vectorised pass, bare DuckDB queries), so the ratios do not
depend on the machine. Results go to ``bench/results.json`` and a Markdown table on stdout, followed by the
growth exponent of each stage's time over the sizes (a least-squares slope of log time on log size).
"""

from __future__ import annotations

import argparse
import importlib
import json
import math
import os
import sys
import time
from pathlib import Path

STAGES = (
    ("ingest", "bench.bench_ingest"),
    ("rules", "bench.bench_rules"),
    ("evaluate", "bench.bench_evaluate"),
    ("dashboard", "bench.bench_dashboard"),
    ("commonality", "bench.bench_commonality"),
)
FULL_SIZES = (1_000_000, 10_000_000, 30_000_000)
QUICK_SIZES = (200_000, 1_000_000)


def growth_exponent(points: list[tuple[int, float]]) -> float | None:
    """Slope of log(seconds) on log(size): 1.0 is linear growth."""
    pts = [(math.log(s), math.log(t)) for s, t in points if t > 0]
    if len(pts) < 2:
        return None
    mx = sum(x for x, _ in pts) / len(pts)
    my = sum(y for _, y in pts) / len(pts)
    sxx = sum((x - mx) ** 2 for x, _ in pts)
    return sum((x - mx) * (y - my) for x, y in pts) / sxx if sxx else None


GROWTH_TARGET = 1.1
GROWTH_CHECKED = {
    "ingest_long_csv": ("seconds", "ingest time"),
    "evaluate: incremental (one day) vs full": ("baseline_seconds", "full evaluation time"),
}
"""Issue 9: the growth exponent of ingest and evaluation between the smallest and largest size is <= 1.1.
Maps a result name to the time field whose growth is checked and what it is."""


def growth_checks(results: list[dict], sizes: tuple[int, ...]) -> list[dict]:
    """One result row per checked growth exponent (ratio = exponent, target = GROWTH_TARGET)."""
    out = []
    for name, (key, what) in GROWTH_CHECKED.items():
        pts = [(r["size"], r[key]) for r in results if r["name"] == name and r.get(key)]
        e = growth_exponent(pts)
        if e is None:
            continue
        out.append(
            {
                "name": f"growth exponent: {what}",
                "stage": "growth",
                "size": max(s for s, _ in pts),
                "seconds": max(t for _, t in pts),
                "baseline_seconds": min(t for _, t in pts),
                "ratio": round(e, 3),
                "target": f"exponent <= {GROWTH_TARGET} over {min(sizes):,}-{max(sizes):,}",
                "ok": e <= GROWTH_TARGET,
            }
        )
    return out


def render_table(results: list[dict]) -> str:
    lines = [
        "| stage | size | seconds | baseline s | ratio | target | ok | rows/s | peak RSS MB |",
        "| --- | ---: | ---: | ---: | ---: | --- | --- | ---: | ---: |",
    ]
    for r in results:
        rps = r.get("rows_per_s")
        rss = r.get("peak_rss_mb")
        lines.append(
            f"| {r['name']} | {r['size']:,} | {r['seconds']:.3f} | "
            f"{'' if r.get('baseline_seconds') is None else format(r['baseline_seconds'], '.3f')} | "
            f"{'' if r.get('ratio') is None else format(r['ratio'], '.3f')} | {r.get('target', '')} | "
            f"{'yes' if r.get('ok') else 'NO'} | {'' if rps is None else format(rps, ',.0f')} | "
            f"{'' if rss is None else format(rss, ',.0f')} |"
        )
    return "\n".join(lines)


README_START = "<!-- bench-table:start (written by `make bench`; edits between these lines are replaced) -->"
README_END = "<!-- bench-table:end -->"


def render_report(results: list[dict]) -> str:
    """The results table, then the growth exponent of every measurement over the sizes."""
    exps: dict[str, float | None] = {}
    for r in results:
        if r.get("stage") != "growth":
            exps.setdefault(r["name"], r.get("growth_exponent"))
    lines = [render_table(results), "", "| measurement | growth exponent over sizes |", "| --- | ---: |"]
    lines += [f"| {n} | {'' if e is None else format(e, '.2f')} |" for n, e in exps.items()]
    return "\n".join(lines)


def write_readme(path: Path, results: list[dict], note: str) -> None:
    """Replace the block between README_START and README_END in ``path`` (atomically)."""
    text = path.read_text()
    a, b = text.find(README_START), text.find(README_END)
    if a < 0 or b < a:
        raise SystemExit(f"{path}: no benchmark block ({README_START} ... {README_END}) to replace")
    block = f"{README_START}\n{note}\n\n{render_report(results)}\n{README_END}"
    tmp = path.with_suffix(path.suffix + ".tmp")
    tmp.write_text(text[:a] + block + text[b + len(README_END) :])
    tmp.replace(path)


def run_note(sizes: tuple[int, ...]) -> str:
    load = os.getloadavg()
    return (
        f"Last run: {time.strftime('%Y-%m-%d', time.gmtime())}, sizes {', '.join(f'{s:,}' for s in sizes)}, "
        f"{os.cpu_count()} cores, load average {load[0]:.1f} at the end of the run."
    )


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="small sizes only")
    ap.add_argument("--sizes", type=lambda s: tuple(int(x) for x in s.split(",")), default=None)
    ap.add_argument("--only", default=None, help="comma-separated stage names")
    ap.add_argument("--out", default=str(Path(__file__).with_name("results.json")))
    ap.add_argument("--readme", default=None, help="also rewrite the benchmark block of this README")
    ap.add_argument(
        "--render", default=None, help="render this results.json instead of running (with --readme)"
    )
    args = ap.parse_args(argv)
    sizes = args.sizes or (QUICK_SIZES if args.quick else FULL_SIZES)
    only = set(args.only.split(",")) if args.only else None
    if args.render:
        results = json.loads(Path(args.render).read_text())
        sizes = tuple(sorted({r["size"] for r in results if r.get("stage") == "ingest"})) or sizes
        print(render_report(results))
        if args.readme:
            write_readme(
                Path(args.readme),
                results,
                f"Rendered from `{args.render}` (see its run for the machine's load).",
            )
        return 0

    results: list[dict] = []
    growth: dict[str, list[tuple[int, float]]] = {}
    for stage, module_name in STAGES:
        if only and stage not in only:
            continue
        try:
            module = importlib.import_module(module_name)
        except ModuleNotFoundError as exc:
            print(f"[bench] {stage}: not available ({exc})", file=sys.stderr)
            continue
        # a stage may run at sizes of its own (the drill-down analyses: their target's window, and a cap)
        for size in getattr(module, "bench_sizes", lambda s: s)(sizes):
            t0 = time.perf_counter()
            rows = module.run(size)
            print(f"[bench] {stage} at {size:,}: {time.perf_counter() - t0:.1f} s", file=sys.stderr)
            for r in rows:
                r.setdefault("stage", stage)
                results.append(r)
                growth.setdefault(r["name"], []).append((r["size"], r["seconds"]))

    exponents = {name: growth_exponent(pts) for name, pts in growth.items()}
    for r in results:
        r["growth_exponent"] = exponents.get(r["name"])
    results.extend(growth_checks(results, sizes))
    Path(args.out).write_text(json.dumps(results, indent=2))
    print(render_report(results))
    if args.readme:
        write_readme(Path(args.readme), results, run_note(sizes))
    return 0 if all(r.get("ok") for r in results) else 1


if __name__ == "__main__":
    sys.exit(main())
