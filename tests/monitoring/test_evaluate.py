"""Evaluation: drift caught with frozen limits, idempotency, supersession withdrawals, splits, specs, defects."""

from __future__ import annotations

from datetime import datetime, timedelta

import numpy as np
import polars as pl
import pytest
from scipy import stats

from tests.monitoring.conftest import PLAN, load, make_lots, site_rows
from tests.monitoring.facts import insert_facts
from warehouse import evaluate, health, queries, schema, store
from warehouse.plan import parse_plan, store_plan


def _limits(path):
    with store.open_warehouse(path, read_only=True) as con:
        return queries.series_limits(con)


def _signals(path, **kw):
    with store.open_warehouse(path, read_only=True) as con:
        return queries.newest_signals(con, limit=100_000, **kw)


def test_evaluate_slow_drift_caught_by_ewma_with_frozen_limits_unmoved(wh):
    lots = make_lots(80, drift_from=30, drift_per_lot=0.03)
    load(wh, lots[:30])
    first = evaluate.evaluate_warehouse(wh, user="t")
    assert first.limits_frozen == 1
    before = _limits(wh)
    # Phase I centre = mean of the first 20 wafer means, sigma = their sample SD (numpy as the oracle)
    means = np.array([np.mean([r["value"] for r in lot]) for lot in lots[:20]])
    assert before["center"][0] == pytest.approx(means.mean(), rel=1e-12)
    assert before["sigma"][0] == pytest.approx(means.std(ddof=1), rel=1e-12)
    assert before["frozen_by"][0] == "lotline-auto"
    load(wh, lots[30:])
    evaluate.evaluate_warehouse(wh, user="t")
    after = _limits(wh)
    assert after.height == 1  # no new version: evaluation never re-estimates frozen limits
    assert (
        after.select("version", "center", "sigma", "lcl", "ucl").rows()
        == before.select("version", "center", "sigma", "lcl", "ucl").rows()
    )
    sig = _signals(wh)
    ewma = sig.filter(sig["rule"] == "ewma")
    assert ewma.height > 0
    first_ewma = ewma["lot_id"].min()
    assert first_ewma >= "L0030"  # nothing before the drift starts
    we1 = sig.filter(sig["rule"] == "we1")
    assert we1.height == 0 or first_ewma < we1["lot_id"].min()  # EWMA sees the drift before rule 1


def test_evaluate_twice_adds_nothing_and_full_rerun_changes_nothing(wh):
    load(wh, make_lots(60, drift_from=25, drift_per_lot=0.05))
    s1 = evaluate.evaluate_warehouse(wh, user="t")
    n1 = _signals(wh).height
    assert s1.signals_new == n1 > 0
    s2 = evaluate.evaluate_warehouse(wh, user="t")
    assert (s2.signals_new, s2.signals_withdrawn, s2.series) == (0, 0, 0)
    s3 = evaluate.evaluate_warehouse(wh, full=True, user="t")
    assert (s3.signals_new, s3.signals_withdrawn) == (0, 0)
    assert _signals(wh).height == n1


def test_evaluate_superseding_export_withdraws_signals_on_superseded_rows(wh):
    lots = make_lots(40)
    lots.append(site_rows("L9999", "L9999-01", [49.0] * 5, datetime(2026, 9, 15)))  # a far outlier lot
    load(wh, lots)
    evaluate.evaluate_warehouse(wh, user="t")
    sig = _signals(wh)
    bad = sig.filter(sig["lot_id"] == "L9999")
    assert "we1" in bad["rule"].to_list()
    # corrected re-export of that lot: the old rows are superseded, the new values are in control
    with store.open_warehouse(wh) as con:
        insert_facts(
            con,
            schema.MEASUREMENTS,
            site_rows("L9999", "L9999-01", [45.1] * 5, datetime(2026, 9, 15)),
            path="corrected.csv",
            supersede=True,
        )
    s = evaluate.evaluate_warehouse(wh, user="t")
    assert s.series_recomputed == 1 and s.signals_withdrawn == bad.height
    with store.open_warehouse(wh, read_only=True) as con:
        all_rows = queries.series_signals(con, series_id=1)
    old = all_rows.filter(all_rows["lot_id"] == "L9999")
    assert old.height == bad.height  # kept, not deleted
    assert old["withdrawn_at"].null_count() == 0
    assert set(old["withdrawn_reason"]) == {evaluate.WITHDRAWN_CHANGED}
    assert _signals(wh).filter(_signals(wh)["lot_id"] == "L9999").height == 0


def test_evaluate_reexport_on_another_tool_moves_the_point_and_withdraws_the_old_signal(wh):
    lots = make_lots(30)
    lots.append(site_rows("L9999", "L9999-01", [49.0] * 5, datetime(2026, 9, 15)))
    load(wh, lots)
    evaluate.evaluate_warehouse(wh, user="t")
    with store.open_warehouse(wh) as con:
        # the supersede key includes the metrology tool, so mark the old rows by hand like a lot-level correction
        fid = insert_facts(
            con,
            schema.MEASUREMENTS,
            site_rows("L9999", "L9999-01", [45.0] * 5, datetime(2026, 9, 15), tool="CDS-2"),
        )
        con.execute(
            "UPDATE measurements SET _superseded_by = ? WHERE lot_id = 'L9999' AND metrology_tool = 'CDS-1'",
            [fid],
        )
    evaluate.evaluate_warehouse(wh, user="t")
    with store.open_warehouse(wh, read_only=True) as con:
        old = queries.series_signals(con, series_id=1)
    moved = old.filter(old["lot_id"] == "L9999")
    assert set(moved["withdrawn_reason"]) == {evaluate.WITHDRAWN_SUPERSEDED}


def test_evaluate_late_point_recomputes_the_series(wh):
    lots = make_lots(40)
    load(wh, lots[:25] + lots[26:])
    evaluate.evaluate_warehouse(wh, user="t")
    load(wh, [lots[25]])  # arrives late, in the middle of the series
    s = evaluate.evaluate_warehouse(wh, user="t")
    assert (s.series_recomputed, s.series_appended) == (1, 0)
    with store.open_warehouse(wh, read_only=True) as con:
        info = queries.series_info(con)
    assert info["n_points"][0] == 40


def test_evaluate_waits_for_baseline_then_auto_freezes(wh):
    load(wh, make_lots(10))
    s = evaluate.evaluate_warehouse(wh, user="t")
    assert (s.waiting_for_baseline, s.limits_frozen, s.signals_new) == (1, 0, 0)
    load(wh, make_lots(30, seed=5, start=datetime(2026, 10, 1)))
    s = evaluate.evaluate_warehouse(wh, user="t")
    assert s.limits_frozen == 1


def test_freeze_limits_new_version_is_used_and_history_kept(wh):
    load(wh, make_lots(40))
    evaluate.evaluate_warehouse(wh, user="t")
    rows = evaluate.freeze_limits(wh, chart="m1-cd", first=30, reason="longer baseline", user="a.engineer")
    assert rows[0]["version"] == 2 and rows[0]["baseline_n"] == 30
    s = evaluate.evaluate_warehouse(wh, user="t")
    assert s.series_recomputed == 1
    hist = _limits(wh)
    assert hist["version"].to_list() == [1, 2]
    assert hist["frozen_by"].to_list() == ["lotline-auto", "a.engineer"]
    assert hist["current"].to_list() == [False, True]
    with store.open_warehouse(wh, read_only=True) as con:
        pts = queries.series_points(con, series_id=1)
    assert set(pts["limit_version"]) == {2}


SPLIT_PLAN = """
[[chart]]
name = "m1-tool"
select = { layer = "M1_DEV", parameter = "cd_mid" }
statistic = "wafer_mean"
split = ["process_tool", "chamber"]
step = "M1_LITHO"
chart = "individuals"
baseline = { first = 5 }
"""


def _history(lot, tool, chamber, at):
    return dict(lot_id=lot, step="M1_LITHO", step_seq=10, process_tool=tool, chamber=chamber, started_at=at)


def test_evaluate_split_by_history_new_tool_gets_its_series_automatically(tmp_path):
    path = tmp_path / "wh.duckdb"
    lots = make_lots(20)
    with store.open_warehouse(path, create=True) as con:
        store_plan(con, parse_plan(SPLIT_PLAN, path="p.toml"), user="t")
        insert_facts(con, schema.MEASUREMENTS, [r for lot in lots for r in lot])
        insert_facts(
            con,
            schema.PROCESS_HISTORY,
            [
                _history(f"L{i:04d}", "TRACK-1", "PEB-1", datetime(2026, 9, 1) + timedelta(hours=6 * i - 1))
                for i in range(12)
            ],
        )
    evaluate.evaluate_warehouse(path, user="t")
    with store.open_warehouse(path) as con:
        insert_facts(
            con,
            schema.PROCESS_HISTORY,
            [
                _history(f"L{i:04d}", "TRACK-2", "PEB-3", datetime(2026, 9, 1) + timedelta(hours=6 * i - 1))
                for i in range(12, 20)
            ],
        )
    evaluate.evaluate_warehouse(path, user="t")
    with store.open_warehouse(path, read_only=True) as con:
        info = queries.series_info(con).sort("series_id")
    assert info.select("process_tool", "chamber", "n_points").rows() == [
        ("TRACK-1", "PEB-1", 12),
        ("TRACK-2", "PEB-3", 8),
    ]
    assert info["split_json"][1] == '{"chamber": "PEB-3", "process_tool": "TRACK-2"}'


def _generic_spec(layer: str) -> dict:
    """A spec row for every product of ``layer`` (cd_mid 40.5-49.5 nm, in force since 2026-01-01)."""
    return dict(
        product="*",
        layer=layer,
        parameter="cd_mid",
        lsl=40.5,
        target=45.0,
        usl=49.5,
        unit="nm",
        effective_from=datetime(2026, 1, 1),
    )


def test_evaluate_out_of_spec_is_its_own_signal_without_limit_version(wh):
    lots = make_lots(30)
    lots.append(site_rows("L9000", "L9000-01", [45.0, 45.0, 45.0, 45.0, 50.5], datetime(2026, 9, 20)))
    load(wh, lots)
    with store.open_warehouse(wh) as con:
        insert_facts(
            con,
            schema.SPEC_LIMITS,
            [_generic_spec("M1_DEV")],
        )
    evaluate.evaluate_warehouse(wh, user="t")
    sig = _signals(wh)
    oos = sig.filter(sig["rule"] == "oos")
    assert oos["lot_id"].to_list() == ["L9000"]
    assert oos["statistic"][0] == 50.5  # the offending site value
    with store.open_warehouse(wh, read_only=True) as con:
        raw = queries.series_signals(con, series_id=1)
    assert raw.filter(raw["rule"] == "oos")["limit_version"].null_count() == 1


def test_out_of_spec_uses_the_newest_spec_version_in_force(wh):
    """Two open-ended versions of the same spec: from its effective_from on, the newer one applies (as the
    dashboard's series_spec and the health report read it), whichever order the rows were stored in."""
    lots = make_lots(30)  # 2026-09-01 .. 09-08, all near 45 nm
    lots.append(site_rows("L9001", "L9001-01", [45.0, 45.0, 45.0, 45.0, 47.0], datetime(2026, 9, 20)))
    lots.append(site_rows("L9002", "L9002-01", [45.0, 45.0, 45.0, 45.0, 40.0], datetime(2026, 9, 21)))
    load(wh, lots)
    newer = {**_generic_spec("M1_DEV"), "lsl": 39.5, "usl": 46.5, "effective_from": datetime(2026, 9, 15)}
    with store.open_warehouse(wh) as con:
        insert_facts(con, schema.SPEC_LIMITS, [newer, _generic_spec("M1_DEV")])
    evaluate.evaluate_warehouse(wh, user="t")
    oos = _signals(wh).filter(pl.col("rule") == "oos")
    # L9001 (47.0 nm) is above the newer USL 46.5 only; L9002 (40.0 nm) is below the older LSL 40.5 only
    assert oos["lot_id"].to_list() == ["L9001"]
    with store.open_warehouse(wh, read_only=True) as con:
        in_force = health.spec_limits_at(con, at=datetime(2026, 9, 20))
        before = health.spec_limits_at(con, at=datetime(2026, 9, 10))
    assert in_force.select("lsl", "usl").rows() == [(39.5, 46.5)]
    assert before.select("lsl", "usl").rows() == [(40.5, 49.5)]


def test_chart_spec_of_a_series_mixing_products_is_the_generic_row(wh):
    """The plan's series split by metrology tool only, so they mix products: the chart shows the '*' spec,
    not one product's (which applies to that product's points only)."""
    load(wh, make_lots(25))
    own = {**_generic_spec("M1_DEV"), "product": "AX14", "lsl": 42.0, "usl": 48.0}
    with store.open_warehouse(wh) as con:
        insert_facts(con, schema.SPEC_LIMITS, [own, _generic_spec("M1_DEV")])
    evaluate.evaluate_warehouse(wh, user="t")
    with store.open_warehouse(wh, read_only=True) as con:
        spec = queries.series_spec(con, series_id=1, at=datetime(2026, 9, 5))
    assert spec.select("product", "lsl", "usl").rows() == [("*", 40.5, 49.5)]


DEFECT_PLAN = """
[[chart]]
name = "m1-d0"
select = { layer = "M1_ETCH_INSP" }
statistic = "defect_density"
split = ["metrology_tool"]
chart = "laney_u"
baseline = { first = 20 }
"""


def _inspection(i: int, area: float, count: int) -> dict:
    """One wafer inspection of lot D<i> on INS-1, hourly from 2026-09-01."""
    return dict(
        lot_id=f"D{i:03d}",
        wafer_id=f"D{i:03d}-01",
        product="AX14",
        layer="M1_ETCH_INSP",
        inspection_tool="INS-1",
        inspected_at=datetime(2026, 9, 1) + timedelta(hours=i),
        inspected_area_cm2=area,
        defect_count=count,
        sample_kind="production",
    )


def test_evaluate_laney_u_centre_is_total_defects_over_total_area(tmp_path):
    path = tmp_path / "wh.duckdb"
    rng = np.random.default_rng(3)
    rows = []
    for i in range(30):
        area = float(rng.uniform(600, 679))
        count = int(rng.negative_binomial(1.0, 1.0 / (1.0 + 0.1 * area)))
        if i == 25:
            count = 900
        rows.append(_inspection(i, area, count))
    with store.open_warehouse(path, create=True) as con:
        store_plan(con, parse_plan(DEFECT_PLAN, path="p.toml"), user="t")
        insert_facts(con, schema.INSPECTIONS, rows)
    evaluate.evaluate_warehouse(path, user="t")
    lim = _limits(path)
    base = rows[:20]
    # u-bar = sum(c) / sum(a) (NIST/SEMATECH e-Handbook §6.3.3.2, u charts)
    assert lim["center"][0] == pytest.approx(
        sum(r["defect_count"] for r in base) / sum(r["inspected_area_cm2"] for r in base)
    )
    assert lim["sigma_source"][0] == "laney_u_prime"
    sig = _signals(path)
    assert "D025" in sig["lot_id"].to_list()


def test_defect_density_chart_points_draw_a_negative_lower_limit_at_zero(tmp_path):
    # common practice for c and u charts: a lower limit below 0 is drawn at 0 (Montgomery, Introduction
    # to Statistical Quality Control, ch. 7, from memory); the frozen version's lcl already was
    path = tmp_path / "wh.duckdb"
    rng = np.random.default_rng(5)
    rows = [
        _inspection(i, area, int(rng.poisson(0.1 * area)))  # 5 to 30 expected defects: limits straddle 0
        for i, area in enumerate(np.linspace(50.0, 300.0, 30)[rng.permutation(30)].tolist())
    ]
    with store.open_warehouse(path, create=True) as con:
        store_plan(con, parse_plan(DEFECT_PLAN, path="p.toml"), user="t")
        insert_facts(con, schema.INSPECTIONS, rows)
    evaluate.evaluate_warehouse(path, user="t")
    with store.open_warehouse(path, read_only=True) as con:
        shown = queries.series_points(con, series_id=1)
        facts = evaluate.series_points_from_facts(con, series_id=1)
        frozen_lcl = con.execute("SELECT lcl FROM control_limits WHERE series_id = 1").fetchall()[0][0]
    raw = (shown["center"] - 3.0 * shown["sigma"]).to_list()
    assert min(raw) < 0 < max(raw)  # small areas: center - 3 sigma below 0; large ones: above
    assert shown["lcl"].to_list() == pytest.approx([max(r, 0.0) for r in raw])
    assert facts["lcl"].to_list() == shown["lcl"].to_list()
    assert frozen_lcl >= 0.0
    assert shown["ucl"].to_list() == pytest.approx((shown["center"] + 3.0 * shown["sigma"]).to_list())
    # chart points written before the change hold center - 3 sigma: they are read as written now
    with store.open_warehouse(path) as con:
        con.execute("UPDATE chart_points SET lcl = center - 3.0 * sigma")
    with store.open_warehouse(path, read_only=True) as con:
        assert queries.series_points(con, series_id=1)["lcl"].to_list() == shown["lcl"].to_list()


def test_evaluate_wafer_mean_limits_use_variance_components_of_the_charted_level(wh):
    rng = np.random.default_rng(21)
    a, b, n = 25, 3, 5
    y = np.empty((a, b, n))
    rows = []
    for i in range(a):
        lot_eff = rng.normal(0, 0.6)
        for j in range(b):
            y[i, j] = 45.0 + lot_eff + rng.normal(0, 0.3) + rng.normal(0, 0.3, n)
            rows.append(
                site_rows(
                    f"L{i:04d}",
                    f"L{i:04d}-{j + 1:02d}",
                    y[i, j],
                    datetime(2026, 9, 1) + timedelta(hours=6 * i, minutes=10 * j),
                )
            )
    rows.append(site_rows("L9000", "L9000-01", [45.0] * n, datetime(2026, 10, 1)))
    load(wh, rows)
    with store.open_warehouse(wh) as con:  # plan version 2: baseline = the first 75 wafers (all 25 lots)
        store_plan(con, parse_plan(PLAN.replace("first = 20", "first = 75"), path="plan.toml"), user="t")
    evaluate.evaluate_warehouse(wh, user="t")
    lim = _limits(wh)
    # nested ANOVA by expected mean squares, written out here as the oracle (NIST/SEMATECH e-Handbook §3.5.1;
    # Montgomery, Design and Analysis of Experiments, nested designs)
    grand = y.mean()
    lot_m, waf_m = y.mean(axis=(1, 2)), y.mean(axis=2)
    ms_lot = b * n * np.sum((lot_m - grand) ** 2) / (a - 1)
    ms_waf = n * np.sum((waf_m - lot_m[:, None]) ** 2) / (a * (b - 1))
    ms_site = np.sum((y - waf_m[:, :, None]) ** 2) / (a * b * (n - 1))
    s2_site, s2_waf, s2_lot = ms_site, (ms_waf - ms_site) / n, (ms_lot - ms_waf) / (b * n)
    expected = np.sqrt(s2_lot + s2_waf + s2_site / n)
    assert lim["sigma_source"][0] == "variance_components"
    assert lim["sigma"][0] == pytest.approx(expected, rel=1e-9)
    assert lim["center"][0] == pytest.approx(grand, rel=1e-12)
    assert lim["sigma"][0] > 1.5 * np.sqrt(s2_site / n)  # far wider than within-wafer sigma / sqrt(n)


def test_evaluate_new_plan_without_a_chart_withdraws_its_signals(wh):
    lots = make_lots(30)
    lots.append(site_rows("L9999", "L9999-01", [49.0] * 5, datetime(2026, 9, 15)))
    load(wh, lots)
    evaluate.evaluate_warehouse(wh, user="t")
    assert _signals(wh).height > 0
    other = PLAN.replace('name = "m1-cd"', 'name = "m1-cd-v2"')
    with store.open_warehouse(wh) as con:
        store_plan(con, parse_plan(other, path="plan.toml"), user="t")
    s = evaluate.evaluate_warehouse(wh, user="t")
    assert s.mode == "full"
    with store.open_warehouse(wh, read_only=True) as con:
        old = queries.series_signals(con, series_id=1)
        exc = queries.list_excursions(con, chart="m1-cd")
    assert set(old["withdrawn_reason"]) == {evaluate.WITHDRAWN_CHART_REMOVED}
    assert set(exc["state"]) == {"closed"}


def test_points_query_without_a_matching_spec_row_leaves_out_the_spec_join_and_reads_the_same(wh):
    # read_points drops the spec join when no spec row can match the entry; the points must be the same
    # as the joined query's (which then matches nothing), and a spec row of another layer keeps it off
    from warehouse import points

    load(wh, make_lots(12))
    with store.open_warehouse(wh) as con:
        insert_facts(
            con,
            schema.SPEC_LIMITS,
            [_generic_spec("OTHER_LAYER")],
        )
    plan = parse_plan(PLAN, path="plan.toml")
    with store.open_warehouse(wh, read_only=True) as con:
        for e in plan.entries:
            joined_sql, params = points.points_sql(e, specs=True)
            assert "spec_limits" in joined_sql and "spec_limits" not in points.points_sql(e, specs=False)[0]
            joined = points.fetch_frame(con.sql(joined_sql, params=params))
            joined = joined.drop(points.SPEC_RANK_COLUMNS, strict=False)
            assert joined.height > 0
            assert not points.has_spec_rows(con, e)
            assert points.read_points(con, e).equals(joined)


def test_evaluate_negbin_u_freezes_the_count_model_and_signals_beyond_its_probability_limits(tmp_path):
    path = tmp_path / "wh.duckdb"
    rng = np.random.default_rng(8)
    rows = []
    for i in range(60):
        area = float(rng.uniform(600, 679))
        count = int(rng.negative_binomial(1.0, 1.0 / (1.0 + 0.1 * area)))  # clustered: alpha = 1
        rows.append(_inspection(i, area, 2500 if i == 40 else count))
    with store.open_warehouse(path, create=True) as con:
        store_plan(con, parse_plan(DEFECT_PLAN.replace("laney_u", "negbin_u"), path="p.toml"), user="t")
        insert_facts(con, schema.INSPECTIONS, rows[:50])
    evaluate.evaluate_warehouse(path, user="t")
    with store.open_warehouse(path) as con:
        insert_facts(con, schema.INSPECTIONS, rows[50:])
    evaluate.evaluate_warehouse(path, user="t")  # incremental: appends the last 10 points
    lim = _limits(path)
    c = np.array([r["defect_count"] for r in rows[:20]], dtype=float)
    a = np.array([r["inspected_area_cm2"] for r in rows[:20]])
    ubar = c.sum() / a.sum()  # NIST/SEMATECH e-Handbook §6.3.3.2 (u charts)
    mu = ubar * a
    inv_alpha = max(0.0, float(np.sum((c - mu) ** 2 - c) / np.sum(mu**2)))  # moment estimator of 1/alpha
    assert lim["center"][0] == pytest.approx(ubar)
    assert lim["overdispersion"][0] == pytest.approx(inv_alpha)
    assert lim["sigma_source"][0] == "negative_binomial"
    with store.open_warehouse(path, read_only=True) as con:
        shown = queries.series_points(con, series_id=1)
        facts = evaluate.series_points_from_facts(con, series_id=1)
    areas = np.array([r["inspected_area_cm2"] for r in rows])
    # each point's limits: negative-binomial quantiles at the 3-sigma normal tails (0.135 % each side, NIST/
    # SEMATECH e-Handbook §1.3.6.7.1) of its own area, as densities (scipy.stats: n = alpha, p = alpha / (alpha + mu))
    tail, alpha = stats.norm.sf(3.0), 1.0 / inv_alpha
    p = alpha / (alpha + ubar * areas)
    assert shown["ucl"].to_list() == pytest.approx((stats.nbinom.ppf(1 - tail, alpha, p) / areas).tolist())
    assert shown["lcl"].to_list() == pytest.approx((stats.nbinom.ppf(tail, alpha, p) / areas).tolist())
    assert facts.select("lcl", "ucl", "sigma").equals(shown.select("lcl", "ucl", "sigma"))
    sig = _signals(path)
    beyond = shown.filter((pl.col("value") > pl.col("ucl")) | (pl.col("value") < pl.col("lcl")))
    assert sorted(sig["lot_id"].to_list()) == sorted(beyond["lot_id"].to_list())  # one wafer per lot
    assert "D040" in sig["lot_id"].to_list() and set(sig["rule"].to_list()) == {"we1"}
    before = sig.select("lot_id", "rule", "value").sort("lot_id")
    evaluate.evaluate_warehouse(path, full=True, user="t")  # incremental == full
    assert _signals(path).select("lot_id", "rule", "value").sort("lot_id").equals(before)
