"""Dashboard benchmark: each page's query set through ``warehouse.queries`` against the same SQL run bare.

    python -m bench.bench_dashboard [--rows N] [--repeat 20]    # default 30,000,000 measurements

Builds (or reuses, by row count) a warehouse under ``bench/out/``: N invented site measurements in time order
(lots of 3 wafers x 9 sites x 5 parameters, 4 layers, 2 process steps per layer), their process history, one
inspected wafer with defects per 50 lots, spec limits, and a monitoring plan evaluated by ``lotline
evaluate``'s engine, so signals and excursions are real.

For each page the same calls ``dashboard/data.py`` makes are run ``--repeat`` times on one read-only
connection (the page's unit of work; the file open is reported on its own row). The baseline replays, bare on
the same connection (``sql(text, params=...).to_arrow_table()``), exactly the statements those calls sent to DuckDB:
they are recorded by a connection proxy, so the two sides run the same SQL text with the same parameters.

Target (issue 7): p95 through the queries <= 1.5 x the bare p95, and < 1 s.
"""

from __future__ import annotations

import argparse
import json
import statistics
import sys
import time
from datetime import timedelta
from pathlib import Path

OUT = Path(__file__).parent / "out"
TARGET_RATIO = 1.5
TARGET_S = 1.0
ROWS_PER_LOT = 135  # 3 wafers x 9 sites x 5 parameters
LAYERS = ("M1", "V1", "M2", "PO")
PARAMS = ("cd_mid", "cd_top", "cd_bot", "lwr", "pitch")

PLAN = """
[plan]
name = "bench plan"

[defaults]
severity = "medium"
rules = ["we1", "we2"]
baseline = { first = 25 }

{cd_charts}
[[chart]]
name = "lwr-wafer"
select = { layer = "*", parameter = "lwr", product = "*", stage = "*" }
statistic = "wafer_mean"
split = ["metrology_tool"]
chart = "ewma"
"""
CD_CHART = """
[[chart]]
name = "cd-mid-{layer}"
select = {{ layer = "{layer}", parameter = "cd_mid", product = "*", stage = "*" }}
statistic = "wafer_mean"
split = ["process_tool"]
step = "{layer}_EXPOSE"
chart = "individuals"
severity = "high"
"""


def plan_text() -> str:
    return PLAN.replace("{cd_charts}", "".join(CD_CHART.format(layer=layer) for layer in LAYERS))


# ------------------------------------------------------------------------------------------ warehouse


def _generate_sql(rows: int) -> list[tuple[str, list]]:
    """Statements that fill a fresh warehouse with ``rows`` measurements and their context (no Python loop)."""
    n_lots = max(1, rows // ROWS_PER_LOT)
    layer_list = "[" + ", ".join(f"'{v}'" for v in LAYERS) + "]"
    param_list = "[" + ", ".join(f"'{v}'" for v in PARAMS) + "]"
    t0 = "TIMESTAMP '2026-01-01 00:00:00'"
    return [
        (
            "INSERT INTO source_files VALUES (1, 'bench/generated.csv', repeat('0', 64), 0, 'measurements', 'cdsem_long_v2', "
            "'loaded', ?, 0, 0, 0, now()::TIMESTAMP, 'bench', NULL)",
            [rows],
        ),  # fmt: skip
        (
            f"""
INSERT INTO measurements
SELECT 'B' || lpad(CAST(i // 135 AS VARCHAR), 7, '0') AS lot_id,
       'B' || lpad(CAST(i // 135 AS VARCHAR), 7, '0') || '.W' || CAST((i // 45) % 3 + 1 AS VARCHAR) AS wafer_id,
       (i // 45) % 3 + 1 AS slot, CAST((i // 5) % 9 + 1 AS VARCHAR) AS site_id,
       round(((i // 5) % 3 - 1) * 100.0, 1) AS x_mm, round((((i // 5) % 9) // 3 - 1) * 100.0, 1) AS y_mm,
       'P' || CAST((i // 135) % 3 AS VARCHAR) AS product,
       {layer_list}[((i // 135) % 4) + 1] AS layer, CASE WHEN (i // 540) % 2 = 0 THEN 'develop' ELSE 'etch' END AS stage,
       {param_list}[(i % 5) + 1] AS parameter, NULL AS feature,
       CASE i % 5 WHEN 0 THEN 45 WHEN 1 THEN 43 WHEN 2 THEN 47 WHEN 3 THEN 3 ELSE 90 END
           + (hash(i) % 1000) / 1000.0 - 0.5
           + CASE WHEN (i // 135) % 997 BETWEEN 500 AND 503 THEN 2.0 ELSE 0 END AS value,
       'nm' AS unit, {t0} + to_seconds(CAST(i // 135 AS BIGINT) * 600 + (i % 135)) AS measured_at,
       'SEM' || CAST((i // 135) % 6 + 1 AS VARCHAR) AS metrology_tool, 'R1' AS recipe, 1 AS repeat,
       'production' AS sample_kind, 1 AS _source_file_id, i + 1 AS _source_line, NULL::BIGINT AS _superseded_by
FROM range(?) t(i)""",
            [rows],
        ),  # fmt: skip
        (
            f"""
INSERT INTO process_history
SELECT 'B' || lpad(CAST(l AS VARCHAR), 7, '0'), NULL, 'P' || CAST(l % 3 AS VARCHAR),
       {layer_list}[(l % 4) + 1] || '_' || s.step, s.seq,
       CASE s.step WHEN 'EXPOSE' THEN 'SCAN0' || CAST(l % 4 + 1 AS VARCHAR) ELSE 'ETCH0' || CAST(l % 3 + 1 AS VARCHAR) END,
       CASE s.step WHEN 'EXPOSE' THEN NULL ELSE ['A', 'B'][(l % 2) + 1] END, 'RCP_' || s.step,
       {t0} + to_seconds(l * 600 - 3600 + s.seq * 600), {t0} + to_seconds(l * 600 - 3000 + s.seq * 600),
       1, l + 1, NULL
FROM range(?) t(l), (VALUES ('EXPOSE', 1), ('ETCH', 2)) s(step, seq)""",
            [n_lots],
        ),  # fmt: skip
        (
            f"""
INSERT INTO inspections
SELECT 'B' || lpad(CAST(l AS VARCHAR), 7, '0'), 'B' || lpad(CAST(l AS VARCHAR), 7, '0') || '.W1', 'P0', 'M1',
       'INSP1', 'I1', {t0} + to_seconds(l * 600 + 300), 679.0, 40, NULL, 'production', 1, l + 1, NULL
FROM range(0, ?, 50) t(l)""",
            [n_lots],
        ),  # fmt: skip
        (
            f"""
INSERT INTO defects
SELECT 'B' || lpad(CAST(l AS VARCHAR), 7, '0'), 'B' || lpad(CAST(l AS VARCHAR), 7, '0') || '.W1', 'M1', 'INSP1',
       {t0} + to_seconds(l * 600 + 300), d, 140 * cos(d * 0.7), 140 * sin(d * 1.3) * 0.9, 60 + d,
       ['particle', 'scratch', 'residue'][(d % 3) + 1], 1, l * 40 + d, NULL
FROM range(0, ?, 50) t(l), range(40) u(d)""",
            [n_lots],
        ),  # fmt: skip
        (
            """
INSERT INTO spec_limits
SELECT '*', l.layer, p.parameter, p.target - greatest(0.1 * p.target, 1.0), p.target,
       p.target + greatest(0.1 * p.target, 1.0), 'nm', TIMESTAMP '2025-01-01', NULL, 1, 1, NULL
FROM (VALUES ('M1'), ('V1'), ('M2'), ('PO')) l(layer),
     (VALUES ('cd_mid', 45.0), ('cd_top', 43.0), ('cd_bot', 47.0), ('lwr', 3.0), ('pitch', 90.0)) p(parameter, target)""",
            [],
        ),  # fmt: skip
        (
            "INSERT INTO rejects SELECT 1, 1000000 + r, 'Value_nm', 'n/a', 'expected a number' FROM range(200) t(r)",
            [],
        ),
    ]


def build_warehouse(rows: int, *, out: Path = OUT) -> Path:
    """The benchmark warehouse of ``rows`` measurements (built once, then reused by its file name)."""
    from warehouse import evaluate, plan, store, tool_days

    path = out / f"dashboard_{rows}.duckdb"
    if path.exists():
        store.init_warehouse(path)  # a file built by an older lotline is migrated in place
        # incremental, so a no-op, except on a file evaluated before chart_points existed: then a full run fills it
        evaluate.evaluate_warehouse(path, user="bench")
        return path
    out.mkdir(parents=True, exist_ok=True)
    tmp = path.with_suffix(".tmp.duckdb")
    tmp.unlink(missing_ok=True)
    t0 = time.perf_counter()
    with store.open_warehouse(tmp, create=True) as con:
        with store.transaction(con):
            for sql, params in _generate_sql(rows):
                con.execute(sql, params)
            tool_days.rebuild(con)  # the facts are generated in place, not ingested: build what ingest keeps
            plan.store_plan(con, plan.parse_plan(plan_text(), path="bench_plan.toml"), user="bench")
            store.bump_data_version(con)
    t1 = time.perf_counter()
    summary = evaluate.evaluate_warehouse(tmp, full=True, user="bench")
    print(f"[bench] built {rows:,} measurements in {t1 - t0:.1f} s, evaluated in {time.perf_counter() - t1:.1f} s "
          f"({summary.series} series, {summary.signals_new} signals, {summary.excursions_opened} excursions)",
          file=sys.stderr)  # fmt: skip
    tmp.rename(path)
    return path


# ------------------------------------------------------------------------------------------ recording


class _Recorder:
    """A connection (or cursor) proxy that records every statement and its parameters, then delegates."""

    def __init__(self, target, log: list):
        self._target, self._log = target, log

    def cursor(self):
        return _Recorder(self._target.cursor(), self._log)

    def execute(self, sql, parameters=None, *a, **k):
        self._log.append(("execute", sql, _params(parameters)))
        return (
            self._target.execute(sql, parameters, *a, **k)
            if parameters is not None
            else self._target.execute(sql)
        )

    def sql(self, sql, *a, params=None, **k):
        self._log.append(("execute", sql, _params(params)))
        return self._target.sql(sql, *a, params=params, **k)

    def register(self, name, obj):
        self._log.append(("register", name, obj))
        return self._target.register(name, obj)

    def unregister(self, name):
        self._log.append(("unregister", name, None))
        return self._target.unregister(name)

    def __getattr__(self, name):
        return getattr(self._target, name)


def _params(p):
    if p is None:
        return None
    return dict(p) if isinstance(p, dict) else list(p)


def _bare(con, statements: list) -> None:
    cur = con.cursor()  # one cursor: relations registered by a query stay visible to its next statements
    try:
        for kind, a, b in statements:
            if kind == "register":
                cur.register(a, b)
            elif kind == "unregister":
                cur.unregister(a)
            else:  # the cheapest full fetch: the result as one Arrow table, no Python objects per row
                (cur.sql(a, params=b) if b is not None else cur.sql(a)).to_arrow_table()
    finally:
        cur.close()


# ------------------------------------------------------------------------------------------ page query sets


def page_calls(con) -> dict[str, list[tuple[str, dict]]]:
    """The calls each page makes (as in dashboard/views/*.py), with arguments taken from the warehouse."""
    from warehouse import queries

    last = queries.data_time_range(con)["last_at"][0]
    start = last - timedelta(days=7)
    series = queries.series_info(con)
    sid = int(series.sort("n_points", descending=True, nulls_last=True)["series_id"][0])
    info = series.filter(series["series_id"] == sid).row(0, named=True)
    exc = queries.list_excursions(con)
    xid = int(exc["excursion_id"][0]) if exc.height else -1
    lot = json.loads(exc["lots_json"][0])[0] if exc.height else "B0000500"
    wafer = f"{lot}.W1"
    return {
        "overview": [
            ("data_time_range", {}),
            ("open_excursions_by_severity", {}),
            (
                "ooc_by_tool_layer",
                {"start": start, "end": last + timedelta(seconds=1), "tool_key": "process_tool"},
            ),
            ("newest_signals", {"limit": 50, "since": start}),
            ("tool_freshness", {"now": last, "stale_after_h": 24.0}),
        ],
        "chart": [
            ("series_info", {}),
            ("series_points", {"series_id": sid}),
            ("series_signals", {"series_id": sid, "include_withdrawn": False}),
            ("series_limits", {"series_id": sid}),
            ("series_plan", {"series_id": sid}),
            ("series_spec", {"series_id": sid, "at": info["last_point_at"]}),
        ],
        "lot": [
            ("lot_measurements", {"lot_id": lot}),
            ("lot_process_history", {"lot_id": lot}),
            ("lot_excursions", {"lot_id": lot}),
            ("wafer_sites", {"lot_id": lot, "wafer_id": wafer, "layer": None, "parameter": None}),
            ("wafer_defects", {"lot_id": lot, "wafer_id": wafer}),
            ("excursion_population_history", {"excursion_id": xid, "days_before": 14}),
        ],
        "excursions": [
            ("list_excursions", {}),
            ("excursion_detail", {"excursion_id": xid}),
            ("excursion_signals", {"excursion_id": xid}),
            ("excursion_history", {"excursion_id": xid}),
        ],
        "health": [
            ("data_time_range", {}),
            ("ingest_log", {"status": None}),
            ("rejects", {"file_id": None, "limit": 100_000}),
            ("superseded_rows", {}),
            ("tool_freshness", {"now": last}),
        ],
    }


def _pct(values: list[float], q: float) -> float:
    if len(values) == 1:
        return values[0]
    return statistics.quantiles(values, n=100, method="inclusive")[int(q) - 1]


def run(size: int, *, repeat: int = 20) -> list[dict]:
    """p50/p95 of every page's query set through warehouse.queries and bare, on ``size`` measurements."""
    from warehouse import queries, store

    path = build_warehouse(size)
    out = []
    opens = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        with store.open_warehouse(path, read_only=True):
            pass
        opens.append(time.perf_counter() - t0)
    with store.open_warehouse(path, read_only=True) as con:
        calls = page_calls(con)
        for page, batch in calls.items():
            log: list = []
            rec = _Recorder(con, log)
            for name, kwargs in batch:  # record the statements (and warm both paths)
                getattr(queries, name)(rec, **kwargs)
            _bare(con, log)
            ours, bare = [], []
            for _ in range(repeat):
                t0 = time.perf_counter()
                for name, kwargs in batch:
                    getattr(queries, name)(con, **kwargs)
                ours.append(time.perf_counter() - t0)
                t0 = time.perf_counter()
                _bare(con, log)
                bare.append(time.perf_counter() - t0)
            p95, b95 = _pct(ours, 95), _pct(bare, 95)
            out.append({
                "name": f"dashboard page: {page}", "size": size, "seconds": p95, "baseline_seconds": b95,
                "ratio": p95 / b95 if b95 else None, "target": f"p95 <= {TARGET_RATIO:g}x bare and < {TARGET_S:g} s",
                "ok": p95 <= TARGET_RATIO * b95 and p95 < TARGET_S, "p50_seconds": _pct(ours, 50),
                "baseline_p50_seconds": _pct(bare, 50), "queries": len(batch), "statements": sum(1 for e in log if e[0] == "execute"),
                "repeat": repeat,
            })  # fmt: skip
    out.append({
        "name": "dashboard: open + close read-only", "size": size, "seconds": _pct(opens, 95), "baseline_seconds": None,
        "ratio": None, "target": "informative (once per page batch on a cache miss)", "ok": _pct(opens, 95) < TARGET_S,
        "p50_seconds": _pct(opens, 50), "repeat": repeat,
    })  # fmt: skip
    return out


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=30_000_000, help="measurements in the warehouse")
    ap.add_argument("--repeat", type=int, default=20, help="runs of each page's query set")
    args = ap.parse_args(argv)
    results = run(args.rows, repeat=args.repeat)
    print("| page | rows | p50 s | p95 s | bare p50 s | bare p95 s | ratio (p95) | ok |")
    print("| --- | ---: | ---: | ---: | ---: | ---: | ---: | --- |")
    for r in results:
        b50, b95 = r.get("baseline_p50_seconds"), r.get("baseline_seconds")
        print(f"| {r['name']} | {r['size']:,} | {r['p50_seconds']:.4f} | {r['seconds']:.4f} | "
              f"{'' if b50 is None else format(b50, '.4f')} | {'' if b95 is None else format(b95, '.4f')} | "
              f"{'' if r['ratio'] is None else format(r['ratio'], '.2f')} | {'yes' if r['ok'] else 'NO'} |")  # fmt: skip
    return 0 if all(r["ok"] for r in results) else 1


if __name__ == "__main__":
    sys.exit(main())
