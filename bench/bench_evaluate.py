"""Evaluation benchmark: a full re-evaluation against the incremental evaluation of one day's new data.

    python -m bench.bench_evaluate [--rows N] [--days 60]      # default 10,000,000 measurements

Builds a warehouse under ``bench/out/`` (anew on every run): N invented site measurements
in time order (lots of 3 wafers x 9 sites x 2 parameters x 4 layers, spread over ``--days`` days, one
source file of measurements and one of process history per day), spec limits per product, layer and
parameter, and a monitoring plan of EWMA, CUSUM and individuals charts split by metrology tool, process
tool/chamber and product.

Steps, each evaluation in its own process so that its peak RSS is its own:
1. days 1..D-1 loaded, first evaluation (auto-freezes every series' limits);
2. day D loaded, **incremental** evaluation (timed);
3. ``--full`` evaluation of the same warehouse, every series from its first point (timed, the baseline);
4. informative: the first 40 lots of day D+1 loaded (a typical fab day of one layer), incremental
   evaluation (timed): the per-run floor, what any incremental run costs however little arrived;
5. informative: the **I/O floor** of step 2, on a copy of the warehouse as step 2 found it: only what any
   evaluation of that day must do besides the SPC work (open the file, read what changed, read each plan
   entry's points of the changed lots on two threads as the evaluation does, write them, commit, close).
   No chart, rule, state, signal or excursion is computed; the time is a lower bound for step 2 under
   the design's rule that no connection outlives a unit of work.

Each time is the whole unit of work a user waits for: opening the file, the evaluation, its commit and the
checkpoint on close (``evaluate.evaluate_warehouse``). The time inside the transaction alone (the run
summary's ``seconds``) is kept beside it as ``in_transaction_seconds``.

Target (issue 4): incremental time of one day <= 5 % of the full evaluation's time.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import shutil
import subprocess
import sys
import time
from pathlib import Path

OUT = Path(__file__).parent / "out"
TARGET_RATIO = 0.05
ROWS_PER_LOT = 216  # 4 layers x 2 parameters x 3 wafers x 9 sites
LAYERS = ("L0", "L1", "L2", "L3")  # generated as "L" || layer index

PLAN = """
[plan]
name = "evaluate bench"

[defaults]
baseline = { first = 25 }

[[chart]]
name = "cd-ewma-metrology"
select = { layer = "*", parameter = "cd_mid" }
statistic = "wafer_mean"
split = ["product", "metrology_tool"]
chart = "ewma"
params = { lambda = 0.1, L = 2.7 }
rules = ["we1", "we2"]

[[chart]]
name = "l0-cd-chamber"
select = { layer = "L0", parameter = "cd_mid" }
statistic = "wafer_mean"
split = ["process_tool", "chamber"]
step = "L0_STEP"
chart = "cusum"
params = { cusum_k = 0.5, h = 5.0 }

[[chart]]
name = "l2-cd-tool"
select = { layer = "L2", parameter = "cd_mid" }
statistic = "wafer_mean"
split = ["process_tool"]
step = "L2_STEP"
chart = "individuals"
rules = ["we1", "we4"]

[[chart]]
name = "lwr-lot"
select = { layer = "*", parameter = "lwr" }
statistic = "lot_mean"
split = ["product"]
chart = "individuals"
"""

# Box-Muller normal from two hash-derived uniforms (deterministic, no random()).
_U = "((hash({x}) % 1000000007)::DOUBLE + 0.5) / 1000000007.0"
_N = f"(sqrt(-2 * ln({_U.format(x='{a}')})) * cos(2 * pi() * {_U.format(x='{b}')}))"


def _normal(a: str, b: str) -> str:
    return _N.format(a=a, b=b)


def build(path: Path, rows: int, days: int) -> dict:
    """Create the warehouse with days 1..D-1 loaded; return sizes (day D is loaded by ``load_day``)."""
    from warehouse import store
    from warehouse.plan import parse_plan, store_plan

    n_lots = max(rows // ROWS_PER_LOT, days * 4)
    if path.exists():
        path.unlink()
    with store.open_warehouse(path, create=True) as con:
        con.execute("SET preserve_insertion_order = true")
        with store.transaction(con):
            store_plan(con, parse_plan(PLAN, path="bench_plan.toml"), user="bench")
            _insert_specs(con)
            _insert_days(con, n_lots, days, range(days - 1))
            store.bump_data_version(con)
        con.execute("CHECKPOINT")
        n = con.execute("SELECT count(*) FROM measurements").fetchall()[0][0]
    return {"lots": n_lots, "rows_before_last_day": int(n)}


def load_day(path: Path, rows: int, days: int, day: int, *, max_lots: int | None = None) -> int:
    """Append day ``day`` (0-based; its measurement and history files), at most ``max_lots`` of its lots;
    return the rows added."""
    from warehouse import store

    n_lots = max(rows // ROWS_PER_LOT, days * 4)
    with store.open_warehouse(path) as con:
        before = con.execute("SELECT count(*) FROM measurements").fetchall()[0][0]
        with store.transaction(con):
            _insert_days(con, n_lots, days, [day], max_lots=max_lots)
            store.bump_data_version(con)
        after = con.execute("SELECT count(*) FROM measurements").fetchall()[0][0]
    return int(after - before)


def _insert_specs(con) -> None:
    """Spec limits per product, layer and parameter, as a fab keeps them (file 1): CD target +- 10 %, LWR an
    upper limit only. Every point's spec check then runs the spec join, as in production."""
    con.execute(
        "INSERT INTO source_files VALUES (1, 'specs.csv', 'bench-1', 0, 'spec_limits', 'bench', 'loaded', "
        "16, 0, 0, 0, TIMESTAMP '2026-01-01', 'bench', NULL)"
    )
    con.execute(
        """
INSERT INTO spec_limits
SELECT p.product, 'L' || li::VARCHAR, prm,
       CASE WHEN prm = 'cd_mid' THEN (45 + 5 * li) * 0.9 END, CASE WHEN prm = 'cd_mid' THEN 45 + 5 * li END,
       CASE WHEN prm = 'cd_mid' THEN (45 + 5 * li) * 1.1 ELSE 4.2 END, 'nm', TIMESTAMP '2025-06-01', NULL, 1,
       row_number() OVER (ORDER BY li, p.product, prm) + 1, NULL
FROM range(4) r(li), (VALUES ('AX14'), ('BX22')) p(product), (VALUES ('cd_mid'), ('lwr')) q(prm)"""
    )


LOT_SPAN_S = 360
"""Seconds one tool is busy with one lot of this sampling (3 wafers, the last measured 4-5 minutes in)."""


def tool_counts(n_lots: int, days: int) -> tuple[int, int]:
    """(metrology tools, process tools): at least 4 and 3, and enough that no tool holds two lots at once.

    The bench's fab grows with the size (more lots a day over the same days); a real fab running lots
    faster than one tool can take them has more tools. Without this, at 30M measurements one CD-SEM would
    measure four lots at the same time, and each new day's first lots would fall before the previous day's
    last points of the same series, which (correctly) recomputes those series instead of appending.
    """
    gap = 86400.0 * days / n_lots  # seconds between lot starts
    need = math.ceil(LOT_SPAN_S / gap)
    n_proc = max(3, need)
    while math.gcd(7, n_proc) != 1:  # lots go to process tool (7 * lot + layer) mod n: keep it a permutation
        n_proc += 1
    return max(4, need), n_proc


SMALL_ARRIVAL_LOTS = 40
"""Lots of the small arrival measured after the full run: a typical day of one layer (25-55 lots, the
domain notes), far less than the bench's day. Its time is the per-run floor of an incremental evaluation."""


def _insert_days(con, n_lots: int, days: int, day_list, *, max_lots: int | None = None) -> None:
    per_day = n_lots / days
    n_sem, n_proc = tool_counts(n_lots, days)
    for d in day_list:
        lo, hi = int(round(d * per_day)), int(round((d + 1) * per_day))
        if max_lots is not None:
            hi = min(hi, lo + max_lots)
        fid_m, fid_h = 2 * d + 2, 2 * d + 3  # file 1 holds the spec limits
        for fid, kind in ((fid_h, "process_history"), (fid_m, "measurements")):
            con.execute(
                "INSERT INTO source_files VALUES (?, ?, ?, 0, ?, 'bench', 'loaded', 0, 0, 0, 0, "
                "TIMESTAMP '2026-01-01' + to_days(?::INTEGER), 'bench', NULL)",
                [fid, f"day{d:03d}_{kind}.csv", f"bench-{fid}", kind, d],
            )
        # process history: one lot-level row per lot and layer step
        con.execute(
            f"""
INSERT INTO process_history
SELECT 'LOT' || lpad(lot::VARCHAR, 7, '0'), NULL, CASE WHEN lot % 5 < 3 THEN 'AX14' ELSE 'BX22' END,
       layer || '_STEP', li + 1, 'TOOL-' || ((lot * 7 + li) % {n_proc})::VARCHAR, 'CH' || ((lot * 3 + li) % 4)::VARCHAR, 'R1',
       TIMESTAMP '2026-01-01' + to_seconds((lot * ?::DOUBLE + li * 3600 - 600)::BIGINT), NULL, ?, lot * 4 + li + 1, NULL
FROM range(?, ?) t(lot), (SELECT 'L' || li::VARCHAR AS layer, li FROM range(4) r(li))
ORDER BY lot, li""",
            [86400.0 * days / n_lots, fid_h, lo, hi],
        )
        lot_eff = _normal("lot * 31 + li", "lot * 17 + li + 7")
        wafer_eff = _normal("lot * 101 + li * 7 + w", "lot * 13 + li * 3 + w + 5")
        site_eff = _normal("i", "i + 1000000000")
        con.execute(
            f"""
INSERT INTO measurements
SELECT 'LOT' || lpad(lot::VARCHAR, 7, '0'), 'LOT' || lpad(lot::VARCHAR, 7, '0') || '-' || (w + 1)::VARCHAR, w + 1,
       (s + 1)::VARCHAR, (s - 4) * 30.0, (s % 3 - 1) * 30.0, CASE WHEN lot % 5 < 3 THEN 'AX14' ELSE 'BX22' END,
       layer, 'develop', param, NULL,
       CASE WHEN param = 'cd_mid' THEN 45 + 5 * li + 0.6 * {lot_eff} + 0.3 * {wafer_eff} + 0.5 * {site_eff}
            ELSE 3 + 0.1 * {lot_eff} + 0.2 * abs({site_eff}) END,
       'nm', TIMESTAMP '2026-01-01' + to_seconds((lot * ?::DOUBLE + li * 3600 + w * 120 + s * 5)::BIGINT),
       'SEM-' || ((lot + li) % {n_sem})::VARCHAR, 'R1', 1, 'production', ?, (i % 1000000) + 2, NULL
FROM (SELECT i, i // {ROWS_PER_LOT} AS lot, (i % {ROWS_PER_LOT}) // 54 AS li,
             ((i % {ROWS_PER_LOT}) // 27) % 2 AS pi, ((i % {ROWS_PER_LOT}) // 9) % 3 AS w, i % 9 AS s
      FROM range(? * {ROWS_PER_LOT}, ? * {ROWS_PER_LOT}) t(i)) g,
     LATERAL (SELECT 'L' || li::VARCHAR AS layer, CASE WHEN pi = 0 THEN 'cd_mid' ELSE 'lwr' END AS param)
ORDER BY i""",
            [86400.0 * days / n_lots, fid_m, lo, hi],
        )


_CHILD = """
import json, sys, time
from warehouse import evaluate
t = time.perf_counter()
s = evaluate.evaluate_warehouse(sys.argv[1], full=sys.argv[2] == "full", user="bench")
sec = time.perf_counter() - t
# VmHWM (peak resident set of this process image); ru_maxrss would carry the parent's peak across fork/exec
rss = next(int(l.split()[1]) for l in open("/proc/self/status") if l.startswith("VmHWM")) / 1024
# "seconds" is the whole unit of work (open, evaluate, commit, close with its checkpoint): what a user waits
# for; the summary's own "seconds" (inside the transaction) is kept as "in_transaction_seconds"
d = s.as_dict()
d["in_transaction_seconds"] = d.pop("seconds")
print(json.dumps({**d, "seconds": sec, "peak_rss_mb": rss}))
"""


_FLOOR_CHILD = """
import json, sys, time
from bench.bench_evaluate import io_floor
from warehouse import evaluate  # imports what io_floor uses, as the evaluation child does before its clock
t = time.perf_counter()
steps = io_floor(sys.argv[1])
print(json.dumps({"seconds": time.perf_counter() - t, "steps": steps}))
"""


def io_floor(path) -> dict:
    """Do what an incremental run of the warehouse at ``path`` must do besides the SPC work; return the
    milliseconds of each step (see the module docstring, step 5). Writes a table ``bench_floor_points``."""
    from concurrent.futures import ThreadPoolExecutor

    import polars as pl

    from warehouse import points as pts_mod
    from warehouse import store
    from warehouse.plan import current_plan

    ms: dict[str, float] = {}
    t = time.perf_counter()

    def lap(name: str) -> None:
        nonlocal t
        now = time.perf_counter()
        ms[name] = round(1e3 * (now - t), 1)
        t = now

    with store.open_warehouse(path) as con:
        lap("open")
        with store.transaction(con):
            plan = current_plan(con)
            wm = con.execute("SELECT max(watermark_file_id) FROM evaluation_runs").fetchall()[0][0]
            changes = pts_mod.read_changes(con, watermark=wm)
            pts_mod.update_lot_index(con)
            lap("changes")

            def read(e):
                lots, _ = pts_mod.changed_lots(e, changes)
                first = lots["first_file_id"].drop_nulls()
                cur = con.cursor()
                try:
                    kw = {"dirty_lots": lots.select("lot_id"), "min_file_id": int(first.min() or wm + 1)}
                    pts = pts_mod.read_points(cur, e, **kw)
                finally:
                    cur.close()
                return pts.select(
                    "point_key", "lot_id", "wafer_id", "point_at", "value", pl.col("n").cast(pl.Int64)
                )

            with ThreadPoolExecutor(max_workers=2) as pool:
                frames = list(pool.map(read, plan.entries))
            lap("points reads")
            con.register("floor_points", pts_mod.ArrowSource(pl.concat(frames)))
            con.execute("CREATE TABLE bench_floor_points AS SELECT * FROM floor_points")
            con.unregister("floor_points")
            lap("points write")
        lap("commit")
    lap("close")
    return ms


def _evaluate_child(path: Path, mode: str) -> dict:
    root = Path(__file__).resolve().parents[1]
    out = subprocess.run(
        [sys.executable, "-c", _CHILD, str(path), mode], cwd=root, capture_output=True, text=True
    )
    if out.returncode:
        raise RuntimeError(out.stderr)
    return json.loads(out.stdout.strip().splitlines()[-1])


def _floor_child(path: Path) -> dict:
    root = Path(__file__).resolve().parents[1]
    out = subprocess.run(
        [sys.executable, "-c", _FLOOR_CHILD, str(path)], cwd=root, capture_output=True, text=True
    )
    if out.returncode:
        raise RuntimeError(out.stderr)
    return json.loads(out.stdout.strip().splitlines()[-1])


def run(size: int, *, days: int = 60) -> list[dict]:
    """Benchmark on ``size`` measurements; rows for the bench harness (see bench/run.py)."""
    OUT.mkdir(parents=True, exist_ok=True)
    path = OUT / f"evaluate_{size}.duckdb"
    t0 = time.perf_counter()
    info = build(path, size, days)
    build_s = time.perf_counter() - t0
    first = _evaluate_child(path, "incremental")
    added = load_day(path, size, days, days - 1)
    floor_path = OUT / f"evaluate_{size}_floor.duckdb"
    shutil.copy(path, floor_path)  # the warehouse as the incremental run finds it (closed: no WAL)
    # on disk now, or the floor's closing checkpoint would wait for the copy's pages to be written
    with open(floor_path, "rb+") as f:
        os.fsync(f.fileno())
    inc = _evaluate_child(path, "incremental")
    floor = _floor_child(floor_path)
    floor_path.unlink()
    full = _evaluate_child(path, "full")
    small_rows = load_day(path, size, days, days, max_lots=SMALL_ARRIVAL_LOTS)  # the first lots of day D+1
    small = _evaluate_child(path, "incremental")
    ratio = inc["seconds"] / full["seconds"] if full["seconds"] else None
    common = {
        "size": size,
        "lots": info["lots"],
        "target": f"<= {TARGET_RATIO:.0%} of full",
        "build_seconds": round(build_s, 1),
        "day_rows": added,
        "series": full["series"],
        "points": full["points"],
    }
    rows = [
        {
            "name": "evaluate: incremental (one day) vs full",
            "seconds": round(inc["seconds"], 3),
            "baseline_seconds": round(full["seconds"], 3),
            "ratio": None if ratio is None else round(ratio, 4),
            "ok": ratio is not None and ratio <= TARGET_RATIO,
            "peak_rss_mb": round(inc["peak_rss_mb"]),
            "baseline_peak_rss_mb": round(full["peak_rss_mb"]),
            "in_transaction_seconds": round(inc["in_transaction_seconds"], 3),
            "baseline_in_transaction_seconds": round(full["in_transaction_seconds"], 3),
            "incremental_points": inc["points"],
            "incremental_series": inc["series"],
            **common,
        },
        {
            # informative: what any incremental run costs on this warehouse, however little arrived
            **common,
            "name": f"evaluate: incremental ({SMALL_ARRIVAL_LOTS} new lots) vs full",
            "seconds": round(small["seconds"], 3),
            "baseline_seconds": round(full["seconds"], 3),
            "ratio": round(small["seconds"] / full["seconds"], 4),
            "target": "informative (the per-run floor)",
            "ok": True,
            "peak_rss_mb": round(small["peak_rss_mb"]),
            "in_transaction_seconds": round(small["in_transaction_seconds"], 3),
            "incremental_points": small["points"],
            "arrival_rows": small_rows,
        },
        {
            # informative: the part of the one-day run that no SPC change can remove (step 5)
            **common,
            "name": "evaluate: I/O floor of the one-day run (no SPC) vs full",
            "seconds": round(floor["seconds"], 3),
            "baseline_seconds": round(full["seconds"], 3),
            "ratio": round(floor["seconds"] / full["seconds"], 4),
            "target": "informative (open, changes, points reads and write, commit, close)",
            "ok": True,
            "steps_ms": floor["steps"],
            "share_of_incremental": round(floor["seconds"] / inc["seconds"], 3),
        },
        {
            "name": "evaluate: first evaluation (auto-freeze, all signals)",
            "seconds": round(first["seconds"], 3),
            "baseline_seconds": round(full["seconds"], 3),
            "ratio": round(first["seconds"] / full["seconds"], 3),
            "ok": True,
            "peak_rss_mb": round(first["peak_rss_mb"]),
            "signals": first["signals_new"],
            **common,
            "target": "informative",
        },
    ]
    shutil.rmtree(path.with_suffix(".duckdb.wal"), ignore_errors=True)
    return rows


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=10_000_000, help="measurements in the warehouse")
    ap.add_argument("--days", type=int, default=60, help="days the measurements span (one is the new day)")
    args = ap.parse_args(argv)
    for r in run(args.rows, days=args.days):
        print(json.dumps(r))
    return 0


if __name__ == "__main__":
    sys.exit(main())
