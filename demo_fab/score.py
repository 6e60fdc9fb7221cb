"""Score a demo warehouse against the injected faults of its ``truth.json``.

For each fault: was it detected, how late (affected lots that passed before the first signal, and hours
after onset), and was the responsible tool or chamber attributed. Plus false excursions per 1,000 chart
points. A fault that is missed stays in the table as missed.

How a fault is matched, by kind (the kinds of ``demo_fab.faults``):

- excursion faults (chamber shift, slow drift, bake-plate edge, metrology offset, defect burst): an
  excursion matches when one of its standing signals is on an affected lot with its point inside the fault
  window (from an hour before the start to a day after the end), and its parameter is the fault's (for
  defect faults: its layer is). Detection time is the earliest such signal of any matching excursion (an
  excursion already open on the series when the fault began counts from that signal, not from its
  start). Attributed: a matching excursion's series is split by the responsible tool/chamber, or else the
  drill-down's commonality (``warehouse.drilldown``) ranks it first; for a metrology fault, only
  excursions whose signalled points that tool measured match, and attribution means the series' metrology tool is the responsible one or the process-or-metrology check
  says "likely metrology".
- scratch: the defect-cluster finder (``spc.spatial``) finds a scratch on the affected wafer.
- tool stops reporting: the data-freshness query flags the tool as stale at the end of the data.
- corrected re-export: the supersession audit names the lot.
- capture loss: the standard-defect wafer's count on the responsible inspection tool trends down
  (``spc.inspection.evaluate_density_trend``).

An excursion that matches no fault counts as false.
"""

from __future__ import annotations

import json
from datetime import datetime, timedelta
from pathlib import Path

import polars as pl

from spc.inspection import evaluate_density_trend
from spc.spatial import find_defect_clusters
from warehouse import queries, store
from warehouse.drilldown import explain_excursion
from warehouse.errors import LotlineError

EXCURSION_KINDS = (
    "chamber_shift",
    "slow_drift",
    "bake_plate_edge",
    "metrology_offset",
    "metrology_drift",
    "defect_burst",
)
DEFECT_PARAMETERS = ("defect_density", "defect_count", "adder_density")


def _ts(text: str | None) -> datetime | None:
    if not text:
        return None
    return datetime.fromisoformat(text.replace("Z", "+00:00")).replace(tzinfo=None)


def score_demo(out_dir: str | Path) -> dict:
    """Score the warehouse ``out_dir/lotline.duckdb`` against ``out_dir/truth.json``.

    Example:
        >>> score_demo("demo_run")["false_excursions_per_1000_points"]  # doctest: +SKIP
        0.41
    """
    out = Path(out_dir)
    truth = json.loads((out / "truth.json").read_text(encoding="utf-8"))
    db = out / "lotline.duckdb"
    with store.open_warehouse(db, read_only=True) as con:
        exc = queries.list_excursions(con, limit=1_000_000)
        points = queries.chart_point_count(con)
        end = _ts(truth["end"])
        fresh = queries.tool_freshness(con, now=end)
        rows = []
        matched: set[int] = set()
        for f in truth["faults"]:
            row, ids = _score_fault(con, f, exc, fresh, truth)
            rows.append(row)
            matched |= ids
    false_exc = exc.filter(~pl.col("excursion_id").is_in(sorted(matched))).height if exc.height else 0
    return {
        "faults": rows,
        "excursions": exc.height,
        "false_excursions": false_exc,
        "chart_points": points,
        "false_excursions_per_1000_points": round(1000.0 * false_exc / points, 3) if points else None,
    }


def _lots(frame: pl.DataFrame) -> pl.DataFrame:
    return frame.with_columns(pl.col("lots_json").str.json_decode(pl.List(pl.String)).alias("lots"))


def _score_fault(con, f: dict, exc: pl.DataFrame, fresh: pl.DataFrame, truth: dict) -> tuple[dict, set[int]]:
    resp = f.get("responsible") or {}
    row = {
        "id": f["id"],
        "kind": f["kind"],
        "layer": f.get("layer"),
        "detected": False,
        "delay_lots": None,
        "delay_hours": None,
        "attributed": None,
        "how": "",
    }
    start, stop = _ts(f.get("start")), _ts(f.get("end"))
    kind = f["kind"]
    if kind in EXCURSION_KINDS:
        return _score_excursion_fault(con, f, row, exc, start, stop, resp)
    if kind == "scratch":
        lot = f["lots"][0]
        wafer = f.get("wafer") or _first_wafer_with_defects(con, lot, f["layer"])
        defects = (
            queries.wafer_defects(con, lot_id=lot, wafer_id=wafer, layer=f["layer"])
            if wafer
            else pl.DataFrame()
        )
        if defects.height:
            found = find_defect_clusters(
                defects.with_columns(pl.lit(wafer).alias("wafer_id"), pl.lit(lot).alias("lot_id"))
            )
            scratches = found.clusters.filter(pl.col("kind") == "scratch")
            row["detected"] = scratches.height > 0
            row["how"] = f"{scratches.height} scratch cluster(s) on {wafer}"
            row["delay_lots"] = 0 if row["detected"] else None
            row["delay_hours"] = 0.0 if row["detected"] else None
            row["attributed"] = None
        return row, set()
    if kind == "tool_stops_reporting":
        tool = resp.get("metrology_tool") or resp.get("inspection_tool") or resp.get("process_tool")
        hit = fresh.filter((pl.col("tool") == tool) & pl.col("stale"))
        row["detected"] = hit.height > 0
        row["attributed"] = row["detected"]
        if hit.height:
            last_seen = hit["last_seen"][0]
            row["delay_hours"] = round((last_seen + timedelta(hours=24) - start).total_seconds() / 3600.0, 1)
            row["how"] = f"{tool} stale: last data {last_seen:%Y-%m-%d %H:%M}"
        return row, set()
    if kind == "corrected_reexport":
        sup = queries.superseded_rows(con, lot_id=f["lots"][0])
        row["detected"] = sup.height > 0
        row["attributed"] = None
        row["how"] = f"superseded rows of the lot kept, with their audit record ({sup.height} group(s))"
        row["delay_lots"], row["delay_hours"] = (0, 0.0) if sup.height else (None, None)
        return row, set()
    if kind == "capture_loss":
        return _score_capture_loss(con, f, row, start, resp), set()
    row["how"] = "no scorer for this kind"
    return row, set()


def _score_excursion_fault(con, f, row, exc, start, stop, resp) -> tuple[dict, set[int]]:
    if not exc.height:
        row["how"] = "no excursions in the warehouse"
        return row, set()
    fault_lots = set(f.get("lots") or [])
    # an excursion matches from its first signal on an affected lot inside the window: one that was already
    # open on the series when the fault began (a wide excursion_gap) counts from that signal, not its start
    hits = queries.first_signal_on_lots(
        con, lot_ids=sorted(fault_lots), start=start - timedelta(hours=1), end=stop + timedelta(days=1)
    )
    cand = _lots(exc).join(hits, on="excursion_id", how="inner")
    param = f.get("parameter")
    if param in DEFECT_PARAMETERS:
        cand = cand.filter(pl.col("layer") == f["layer"])
    elif param:
        cand = cand.filter(pl.col("parameter") == param)
        if f.get("layer"):
            cand = cand.filter(pl.col("layer") == f["layer"])
    mtool = resp.get("metrology_tool")
    if mtool and not resp.get("process_tool"):
        # A metrology fault shows only in what that tool measured: keep excursions whose signalled points
        # that tool measured (on any chart: an offset also trips the process charts it feeds).
        tools = queries.excursion_point_tools(con).filter(pl.col("metrology_tool") == mtool)
        cand = cand.filter(pl.col("excursion_id").is_in(tools["excursion_id"].to_list()))
    if not cand.height:
        row["how"] = "no excursion on the fault's lots in its window"
        return row, set()
    ids = set(cand["excursion_id"].to_list())
    first = cand.sort("first_hit_at", "excursion_id").row(0, named=True)
    row["detected"] = True
    row["delay_hours"] = round((first["first_hit_at"] - start).total_seconds() / 3600.0, 1)
    row["delay_lots"] = _lots_before(con, f, first["first_hit_at"], start)
    attributed, how = _attribution(con, cand, resp)
    row["attributed"] = attributed
    row["how"] = f"excursion #{first['excursion_id']} on {first['chart']}; {how}"
    return row, ids


def _lots_before(con, f: dict, detected_at: datetime, start: datetime) -> int:
    """Affected lots whose first measurement on the fault's layer came before the first signal."""
    times = queries.lot_first_times(con, lot_ids=sorted(set(f.get("lots") or [])), layer=f.get("layer"))
    if not times.height:
        return 0
    return times.filter((pl.col("first_at") >= start) & (pl.col("first_at") < detected_at)).height


def _attribution(con, cand: pl.DataFrame, resp: dict) -> tuple[bool, str]:
    tool, chamber, mtool = resp.get("process_tool"), resp.get("chamber"), resp.get("metrology_tool")
    for r in cand.sort("first_hit_at", "excursion_id").iter_rows(named=True):
        if mtool and r.get("metrology_tool") == mtool:
            return True, f"series split by metrology tool {mtool}"
        if (
            tool
            and r.get("process_tool") == tool
            and (chamber is None or r.get("chamber") in (None, chamber))
        ):
            if chamber is None or r.get("chamber") == chamber:
                return True, f"series split by {tool}/{chamber}" if chamber else f"series split by {tool}"
    first = cand.sort("first_hit_at", "excursion_id").row(0, named=True)
    try:
        ex = explain_excursion(con, int(first["excursion_id"]))
    except LotlineError as exc:
        return False, f"drill-down failed: {exc}"
    if mtool:
        return ex.verdict == "likely metrology", f"process-or-metrology verdict: {ex.verdict}"
    com = ex.commonality
    if com is None or not com.height:
        return False, "commonality found no candidate"
    top = com.row(0, named=True)
    ok = top.get("process_tool") == tool and (chamber is None or top.get("chamber") == chamber)
    return ok, f"commonality ranks {top.get('candidate')} first"


def _first_wafer_with_defects(con, lot: str, layer: str) -> str | None:
    wafers = queries.lot_defect_wafers(con, lot_id=lot, layer=layer)
    return wafers["wafer_id"][0] if wafers.height else None


def _score_capture_loss(con, f, row, start, resp) -> dict:
    """Standard-defect wafer counts on the tool trend down (the placed defects are fixed, so a falling count
    is a falling capture rate)."""
    tool = resp.get("inspection_tool")
    std = queries.standard_defect_runs(con, inspection_tool=tool)
    if std.height < 3:
        row["how"] = "too few standard-defect inspections stored"
        return row
    trend = evaluate_density_trend(
        std.rename({"defect_count": "count", "inspected_area_cm2": "area_cm2"}), by=["inspection_tool"]
    )
    t = trend.row(0, named=True)
    row["detected"] = bool(t["trend_detected"] and t["slope_per_day"] < 0)
    row["attributed"] = row["detected"]
    row["how"] = (
        f"standard-wafer density slope {t['slope_per_day']:.2e}/cm2/day, p = {t['p_value']:.2g} ({tool})"
    )
    return row


def render_score(score: dict) -> str:
    """The score as a fixed-width table."""
    head = f"{'fault':<5} {'kind':<22} {'layer':<14} {'detected':<9} {'delay lots':>10} {'delay h':>8} {'attributed':<10} how"
    lines = [head, "-" * len(head)]
    for r in score["faults"]:
        att = "n/a" if r["attributed"] is None else ("yes" if r["attributed"] else "no")
        lines.append(
            f"{r['id']:<5} {r['kind']:<22} {str(r['layer'] or '-'):<14} {'yes' if r['detected'] else 'MISSED':<9} "
            f"{'' if r['delay_lots'] is None else r['delay_lots']:>10} "
            f"{'' if r['delay_hours'] is None else r['delay_hours']:>8} {att:<10} {r['how']}"
        )
    lines.append("")
    lines.append(
        f"excursions {score['excursions']}, false {score['false_excursions']}, chart points {score['chart_points']:,}: "
        f"{score['false_excursions_per_1000_points']} false excursions per 1,000 points"
    )
    return "\n".join(lines)
