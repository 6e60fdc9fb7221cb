"""Each page under Streamlit's AppTest on the fixture warehouse: no exception, and the numbers on screen
equal what the warehouse queries (and the spc engine) return for the same arguments."""

from __future__ import annotations

import json
from datetime import timedelta

import polars as pl
import pytest
from streamlit.testing.v1 import AppTest

from tests.dashboard import fixture_warehouse as fx
from tests.dashboard.conftest import APP
from tests.dashboard.helpers import array, plotly_specs, query, run_page, shifted_excursion, table_with
from warehouse import store

# ------------------------------------------------------------------------------------------ overview


def test_overview_page_severity_metrics_equal_open_excursions_query(fixture_db):
    at = run_page()
    assert not at.exception
    assert at.title[0].value == "Line overview"
    sev = query(fixture_db, "open_excursions_by_severity")
    expected = {r["severity"]: r["total"] for r in sev.iter_rows(named=True)}
    shown = {m.label.lower(): int(m.value) for m in at.metric}
    assert {k: v for k, v in shown.items() if v} == expected
    assert expected["high"] >= 1  # the plan entry is 'high' and the shifted lots must be flagged


def test_overview_page_grid_and_newest_signals_equal_queries(fixture_db):
    at = run_page(days="7")
    assert not at.exception
    last = query(fixture_db, "data_time_range")["last_at"][0]
    start = last - timedelta(days=7)
    grid = query(fixture_db, "ooc_by_tool_layer", start=start, end=last + timedelta(seconds=1))
    heat = plotly_specs(at)[0]["data"][0]
    cells = {
        (y, x): t
        for y, row in zip(heat["y"], heat["text"], strict=True)
        for x, t in zip(heat["x"], row, strict=True)
    }
    assert grid.height > 0
    for r in grid.iter_rows(named=True):
        assert cells[(r["tool"], r["layer"])] == str(r["signals"])
    newest = table_with(at, "rule", "lot_id", "severity")
    assert newest.columns[:2] == ["open lot", "open chart"]  # the links in view
    expected = query(fixture_db, "newest_signals", limit=50, since=start)
    assert newest["lot_id"].to_list() == expected["lot_id"].to_list()
    assert newest["rule"].to_list() == expected["rule"].to_list()
    assert set(fx.SHIFTED_LOTS) <= set(newest["lot_id"].to_list())


def test_overview_grid_by_metrology_tool_shows_series_not_split_by_it_in_a_labelled_row(fixture_db):
    # the fixture's chart is split by process tool only: by metrology tool, all its signals are one row,
    # labelled as not split (not "all", which read as a total of the tool rows), with a caption saying so
    at = run_page(days="7", by="metrology_tool")
    assert not at.exception
    heat = plotly_specs(at)[0]["data"][0]
    assert list(heat["y"]) == ["(not split)"]
    assert any("Row (not split)" in c.value and "metrology tool" in c.value for c in at.caption)
    by_tool = run_page(days="7")
    assert not any("Row (not split)" in c.value for c in by_tool.caption)


def test_overview_page_freshness_flags_the_tool_that_stopped(fixture_db):
    at = run_page(stale="24")
    assert not at.exception
    fresh = table_with(at, "tool", "stale")
    assert fresh.filter(pl.col("stale"))["tool"].to_list() == [fx.STALE_TOOL]
    assert any(fx.STALE_TOOL in w.value for w in at.warning)


def test_overview_page_unknown_window_falls_back_to_default(fixture_db):
    at = run_page(days="' OR 1=1 --")
    assert not at.exception
    assert at.selectbox(key="w_days").value == 7


# ------------------------------------------------------------------------------------------ chart


def test_chart_page_points_limits_and_signals_equal_warehouse(fixture_db):
    at = run_page("chart", series="2")
    assert not at.exception
    pts = query(fixture_db, "series_points", series_id=2)
    lim = query(fixture_db, "series_limits", series_id=2).filter(pl.col("current")).row(0, named=True)
    sig = query(fixture_db, "series_signals", series_id=2, include_withdrawn=False)
    fig = plotly_specs(at)[0]
    point_trace = fig["data"][0]
    assert array(point_trace["y"]) == pytest.approx(pts["value"].to_list(), rel=1e-12)
    assert [c[0] for c in point_trace["customdata"]] == pts["lot_id"].to_list()
    ucl = next(t for t in fig["data"] if t.get("name") == "control limits")
    assert array(ucl["y"]) == pytest.approx([lim["ucl"]] * pts.height, rel=1e-12)
    marked = {t["name"]: len(array(t["y"])) for t in fig["data"] if t.get("name", "").startswith("signal ")}
    expected = sig.group_by("rule").len()
    assert marked == {f"signal {r}": n for r, n in expected.iter_rows()}
    zone = [t for t in fig["data"] if t.get("legendgroup") == "zones"]
    assert zone, "we2 uses zones, so zone bands must be drawn"
    metrics = {m.label: m.value for m in at.metric}
    assert metrics["Limit version"] == str(lim["version"])
    assert metrics["UCL"] == f"{lim['ucl']:.4g}"
    spec = fig["data"]
    assert any(t.get("name") == "spec limits" for t in spec)


def test_chart_page_ewma_and_cusum_panels_equal_engine(fixture_db):
    from spc.cusum import CusumParams, evaluate_cusum
    from spc.ewma import EwmaParams, evaluate_ewma

    at = run_page("chart", series="2")
    assert not at.exception
    pts = query(fixture_db, "series_points", series_id=2).with_columns(pl.lit("2").alias("series"))
    ewma = evaluate_ewma(pts, EwmaParams(lam=0.2, L=3.0)).points
    cusum = evaluate_cusum(pts, CusumParams(k=0.5, h=5.0)).points
    specs = plotly_specs(at)
    e_fig = next(s for s in specs if s["data"] and s["data"][0].get("name") == "EWMA")
    c_fig = next(s for s in specs if s["data"] and s["data"][0].get("name") == "upper sum")
    assert array(e_fig["data"][0]["y"]) == pytest.approx(ewma["ewma"].to_list(), rel=1e-12)
    assert array(c_fig["data"][0]["y"]) == pytest.approx(cusum["cusum_hi"].to_list(), rel=1e-12)


def test_chart_page_unknown_series_says_not_found(fixture_db):
    at = run_page("chart", series="999999")
    assert not at.exception
    assert at.info[0].value == "Series not found."


# ------------------------------------------------------------------------------------------ lot


def test_lot_page_shows_measurements_history_maps_and_excursions(fixture_db):
    lot = fx.DEFECT_LOT
    at = run_page("lot", lot=lot, wafer=fx.DEFECT_WAFER, layer="M1_LITHO", parameter="cd_mid")
    assert not at.exception
    meas = query(fixture_db, "lot_measurements", lot_id=lot)
    shown = table_with(at, "layer", "wafer_id", "n_sites", "mean")
    assert shown["mean"].to_list() == pytest.approx(meas["mean"].to_list(), rel=1e-12)
    assert shown["n_sites"].to_list() == meas["n_sites"].to_list() == [9] * 6  # 9 sites x 3 wafers x 2 layers
    assert list(dict.fromkeys(shown["layer"].to_list())) == ["M1_LITHO", "M1_ETCH"]  # route order
    hist = table_with(at, "step", "process_tool", "recipe")
    assert hist["process_tool"].to_list()[0] == "SCAN02"
    specs = plotly_specs(at)
    outline = specs[0]["layout"]["shapes"][0]
    assert (outline["type"], outline["x0"], outline["x1"]) == (
        "circle",
        -150,
        150,
    )  # 300 mm wafer, common practice
    sites = query(
        fixture_db, "wafer_sites", lot_id=lot, wafer_id=fx.DEFECT_WAFER, layer="M1_LITHO", parameter="cd_mid"
    )
    assert array(specs[0]["data"][0]["marker"]["color"]) == pytest.approx(sites["value"].to_list(), rel=1e-12)
    defects = next(s for s in specs if any(t.get("name") in ("particle", "scratch") for t in s["data"]))
    assert sum(len(array(t["x"])) for t in defects["data"]) == fx.N_DEFECTS
    exc = table_with(at, "excursion_id", "state", "severity")
    assert (
        exc["excursion_id"].to_list()
        == query(fixture_db, "lot_excursions", lot_id=lot)["excursion_id"].to_list()
    )
    assert shifted_excursion(fixture_db) in exc["excursion_id"].to_list()
    captions = " ".join(c.value for c in at.caption)
    assert "Commonality is association" in captions
    # develop-stage layer, but the lot was measured after etch 3 h later (M1_ETCH): rework is likely gone
    etch_at = meas.filter(pl.col("layer") == "M1_ETCH")["first_measured_at"].min()
    assert f"after-etch measurements since (M1_ETCH at {etch_at:%Y-%m-%d %H:%M})" in captions
    assert "rework is likely no longer possible" in captions


def test_lot_page_develop_layer_without_later_etch_data_says_rework_only_until_etched(fixture_db):
    lot = fx.DEFECT_LOT
    with store.open_warehouse(fixture_db) as con:
        con.execute("DELETE FROM measurements WHERE lot_id = ? AND stage = 'etch'", [lot])
    at = run_page("lot", lot=lot, layer="M1_LITHO")
    assert not at.exception
    captions = " ".join(c.value for c in at.caption)
    assert "rework is possible only until this layer is etched" in captions
    assert "after-etch measurements since" not in captions


def test_lot_page_zone_means_and_commonality_equal_engine(fixture_db):
    from spc.commonality import rank_commonality
    from spc.signatures import zone_means

    lot, wafer = fx.DEFECT_LOT, fx.DEFECT_WAFER
    xid = shifted_excursion(fixture_db)
    at = run_page("lot", lot=lot, wafer=wafer, layer="M1_LITHO", parameter="cd_mid", excursion=str(xid))
    assert not at.exception
    sites = query(fixture_db, "wafer_sites", lot_id=lot, wafer_id=wafer, layer="M1_LITHO", parameter="cd_mid")
    zones = zone_means(sites.with_columns(pl.lit(wafer).alias("wafer_id")), wafer_key=["wafer_id"])
    bar = next(s for s in plotly_specs(at) if s["data"] and s["data"][0].get("name") == "zone mean")["data"][
        0
    ]
    assert bar["x"] == zones["zone"].to_list() == ["centre", "mid", "edge"]  # sites at r = 0, 70, 135 mm
    assert array(bar["y"]) == pytest.approx(zones["mean"].to_list(), rel=1e-12)
    hist = query(fixture_db, "excursion_population_history", excursion_id=xid)
    ranked = rank_commonality(
        hist.drop("affected"), hist.filter(pl.col("affected"))["lot_id"].unique().to_list()
    )
    shown = table_with(at, "rank", "candidate", "n_affected")
    assert shown["candidate"].to_list() == ranked.head(15)["candidate"].to_list()
    scan02 = shown.filter(pl.col("candidate") == "SCAN02").row(0, named=True)
    n_affected = hist.filter(pl.col("affected"))["lot_id"].n_unique()
    assert (
        scan02["n_affected"] == n_affected
    )  # every flagged lot of this SCAN02 series ran SCAN02 at M1_EXPOSE


def test_lot_page_after_etch_layer_says_rework_is_not_possible(fixture_db):
    at = run_page("lot", lot=fx.DEFECT_LOT, layer="M1_ETCH")
    assert not at.exception
    assert any("rework is no longer possible" in c.value for c in at.caption)


def test_lot_page_unknown_lot_says_not_found(fixture_db):
    at = run_page("lot", lot="NO_SUCH_LOT")
    assert not at.exception
    assert at.info[0].value == "Lot not found."


# ------------------------------------------------------------------------------------------ excursions


def test_excursions_page_list_detail_and_history_equal_queries(fixture_db):
    xid = shifted_excursion(fixture_db)
    at = run_page("excursions", state="all", excursion=str(xid))
    assert not at.exception
    listing = table_with(at, "excursion_id", "state", "n_signals")
    assert listing.columns[:2] == ["open", "excursion_id"]  # the link is in view, not past the last column
    expected = query(fixture_db, "list_excursions")
    assert listing["excursion_id"].to_list() == expected["excursion_id"].to_list()
    assert listing["n_signals"].to_list() == expected["n_signals"].to_list()
    history = table_with(at, "audit_id", "changed_by", "to_state")
    assert (
        history["audit_id"].to_list()
        == query(fixture_db, "excursion_history", excursion_id=xid)["audit_id"].to_list()
    )
    signals = table_with(at, "rule", "lot_id", "withdrawn_at")
    assert set(fx.SHIFTED_LOTS) <= set(signals["lot_id"].to_list())
    assert any(t.value.startswith("Author: ") for t in at.text)
    # the header names the series and its rules as text, not as stored JSON
    detail = query(fixture_db, "excursion_detail", excursion_id=xid).row(0, named=True)
    split = ", ".join(f"{k}={v}" for k, v in sorted(json.loads(detail["split_json"]).items()))
    rules = ", ".join(json.loads(detail["rules_json"]))
    header = next(c.value for c in at.caption if " standing signals" in c.value)
    assert header.startswith(f"{detail['layer']} · {detail['parameter']} · {split} · rules {rules} · ")
    assert "{" not in header and "[" not in header


def test_excursions_page_disposition_is_stored_and_shown_in_history(fixture_db):
    xid = shifted_excursion(fixture_db)
    at = run_page("excursions", state="all", excursion=str(xid))
    at.selectbox(key="f_state").select("acknowledged")
    at.selectbox(key="f_classification").select("real")
    at.selectbox(key="f_cause").select("process_tool")
    at.text_input(key="f_action").input("hold lots per OCAP")
    at.text_area(key="f_comment").input("SCAN02 dose check")
    at.button(key="f_submit").click().run()
    assert not at.exception
    assert not at.error, [e.value for e in at.error]
    assert at.success[0].value.startswith(f"Recorded for excursion {xid} by ")
    hist = query(fixture_db, "excursion_history", excursion_id=xid)
    last = hist.row(-1, named=True)
    assert (last["to_state"], last["classification"], last["cause_category"], last["action"], last["comment"]) == (
        "acknowledged", "real", "process_tool", "hold lots per OCAP", "SCAN02 dose check")  # fmt: skip
    assert last["changed_by"]  # the server account under AppTest (no login, no proxy header)
    assert json.loads(last["lots_affected_json"]) == sorted(json.loads(
        query(fixture_db, "excursion_detail", excursion_id=xid)["lots_json"][0]))  # fmt: skip
    at.run()
    shown = table_with(at, "audit_id", "to_state")
    assert shown["audit_id"].to_list() == hist["audit_id"].to_list()
    assert shown["comment"].to_list()[-1] == "SCAN02 dose check"
    # the lots the disposition covers read as a list of lots, not as the stored JSON
    assert shown["lots affected"].to_list()[-1] == ", ".join(json.loads(last["lots_affected_json"]))
    assert "lots_affected_json" not in shown.columns


def test_excursions_page_logged_in_user_is_the_author(fixture_db):
    xid = shifted_excursion(fixture_db)
    at = AppTest.from_file(str(APP), default_timeout=60)
    at.switch_page("views/excursions.py")
    at.query_params["excursion"] = str(xid)
    at.query_params["state"] = "all"
    at.user = {"is_logged_in": True, "email": "a.engineer@example.org"}
    at.run()
    assert not at.exception
    assert "Author: a.engineer@example.org (login)" in [t.value for t in at.text]
    at.selectbox(key="f_state").select("acknowledged")
    at.button(key="f_submit").click().run()
    assert (
        query(fixture_db, "excursion_history", excursion_id=xid)["changed_by"][-1] == "a.engineer@example.org"
    )


def test_excursions_page_state_filter_keeps_open_only(fixture_db):
    at = run_page("excursions", state="open")
    assert not at.exception
    listing = table_with(at, "excursion_id", "state")
    expected = query(fixture_db, "list_excursions").filter(pl.col("state") == "open")
    assert listing["excursion_id"].to_list() == expected["excursion_id"].to_list()


# ------------------------------------------------------------------------------------------ data health


def test_health_page_rejects_log_and_superseded_equal_queries(fixture_db):
    at = run_page("health")
    assert not at.exception
    log = table_with(at, "file_id", "status", "rows_loaded")
    assert log["file_id"].to_list() == query(fixture_db, "ingest_log")["file_id"].to_list() == [3, 2, 1]
    assert log.columns[2:4] == ["status", "message"]  # a failed file's reason in view, beside its status
    rej = table_with(at, "line", "reason")
    assert rej.height == fx.N_REJECTS
    assert rej["reason"].to_list() == query(fixture_db, "rejects")["reason"].to_list()
    sup = table_with(at, "superseded_file_id", "rows")
    assert sup["rows"].to_list() == [27]
    assert at.get("download_button")


def test_health_page_file_filter_shows_that_files_rejects(fixture_db):
    at = run_page("health", file="1")
    assert not at.exception
    assert at.selectbox(key="w_file").value == "1"
    rej = table_with(at, "line", "reason")
    assert (
        rej["file_id"].to_list() == query(fixture_db, "rejects", file_id=1)["file_id"].to_list() == [1, 1, 1]
    )


def test_health_page_status_filter_shows_failed_files_only(fixture_db):
    at = run_page("health", status="failed")
    assert not at.exception
    log = table_with(at, "file_id", "status")
    assert log["status"].to_list() == ["failed"]


def test_defect_chart_limits_note_names_the_count_model_and_survives_a_poisson_version():
    from dashboard.widgets import defect_limits_note

    base = {"n_ref": 678.87, "overdispersion": 0.903, "sigma_source": "negative_binomial"}
    assert "clustering 1/α = 0.903" in defect_limits_note(base)
    assert "678.9 cm²" in defect_limits_note(base)
    assert "σ_z = 5.76" in defect_limits_note({**base, "sigma_source": "laney_u_prime", "overdispersion": 5.76})
    # a plain u chart (or a negbin_u baseline without extra variation) keeps no overdispersion
    assert "Poisson count model" in defect_limits_note({**base, "sigma_source": "poisson", "overdispersion": None})
