"""Incremental evaluation equals a full one, whatever the ingest order and batch splits (property test)."""

from __future__ import annotations

import tempfile
from datetime import datetime, timedelta
from pathlib import Path

import numpy as np
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from tests.monitoring.conftest import site_rows
from tests.monitoring.facts import insert_facts
from warehouse import evaluate, schema, store
from warehouse.plan import parse_plan, store_plan

PLAN = """
[[chart]]
name = "wafer-ewma"
select = { layer = "M1_DEV", parameter = "cd_mid" }
statistic = "wafer_mean"
split = ["metrology_tool"]
chart = "ewma"
params = { lambda = 0.2, L = 2.6 }
rules = ["we1", "we2", "we4"]
baseline = { first = 5 }

[[chart]]
name = "site-cusum"
select = { layer = "M1_DEV", parameter = "cd_mid" }
statistic = "site_value"
chart = "cusum"
params = { cusum_k = 0.5, h = 4.0 }
rules = ["we1", "nelson3"]
baseline = { first = 40 }
"""

N_BASE = 15
N_LOTS = 30


def _lots():
    """15 in-control baseline lots (baselines: 5 wafers per tool, 40 sites), then lots with a step, a spike and a drift, on two metrology tools."""
    rng = np.random.default_rng(11)
    out = []
    for i in range(N_LOTS):
        mu = 45.0 + rng.normal(0, 0.4) + (0.9 if 16 <= i < 23 else 0.0) + (2.5 if i == 24 else 0.0)
        tool = "CDS-1" if i % 3 else "CDS-2"
        lot = f"L{i:03d}"
        out.append(
            site_rows(
                lot,
                f"{lot}-01",
                mu + rng.normal(0, 0.3, 5),
                datetime(2026, 9, 1) + timedelta(hours=4 * i),
                tool=tool,
            )
        )
    return out


LOTS = _lots()


def _new_db(d: Path, name: str) -> Path:
    path = d / name
    with store.open_warehouse(path, create=True) as con:
        store_plan(con, parse_plan(PLAN, path="p.toml"), user="t")
    return path


def _standing(path: Path) -> set[tuple]:
    with store.open_warehouse(path, read_only=True) as con:
        rows = con.execute(
            """SELECT c.chart, c.layer, c.parameter, c.split_json, s.point_key, s.rule, round(s.value, 9),
                      round(s.statistic, 6), s.limit_version
               FROM signals s JOIN chart_series c USING (series_id) WHERE s.withdrawn_at IS NULL"""
        ).fetchall()
    return set(rows)


def _state(path: Path) -> set[tuple]:
    with store.open_warehouse(path, read_only=True) as con:
        return set(
            con.execute(
                """SELECT c.chart, c.split_json, t.n_points, t.last_point_key, round(t.ewma, 9), round(t.cusum_hi, 9),
                      round(t.cusum_lo, 9)
               FROM series_state t JOIN chart_series c USING (series_id)"""
            ).fetchall()
        )


@st.composite
def ingest_plans(draw):
    """A random order of the post-baseline lots, each possibly split over two files, cut into batches.

    Returned as (lot index, first site, end site) triples so that failures print small. The baselines of
    both charts lie inside the first N_BASE lots, which every order loads first: automatic freezing uses
    what has arrived, so a baseline completed out of order would (by design) freeze other limits.
    """
    order = draw(st.permutations(list(range(N_BASE, N_LOTS))))
    pieces = []
    for i in order:
        n = len(LOTS[i])
        if draw(st.booleans()):
            k = draw(st.integers(1, n - 1))
            pieces += [(i, 0, k), (i, k, n)]
        else:
            pieces.append((i, 0, n))
    cuts = sorted(draw(st.sets(st.integers(1, len(pieces) - 1), max_size=4)))
    bounds = [0, *cuts, len(pieces)]
    return [pieces[a:b] for a, b in zip(bounds, bounds[1:], strict=False)]


@settings(max_examples=4, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(batches=ingest_plans())
def test_incremental_evaluation_equals_full_over_random_ingest_orders(batches):
    with tempfile.TemporaryDirectory() as d:
        d = Path(d)
        inc = _new_db(d, "inc.duckdb")
        with store.open_warehouse(inc) as con:
            insert_facts(con, schema.MEASUREMENTS, [r for lot in LOTS[:N_BASE] for r in lot])
        evaluate.evaluate_warehouse(inc, user="t")
        for batch in batches:
            with store.open_warehouse(inc) as con:
                for i, a, b in batch:
                    insert_facts(con, schema.MEASUREMENTS, LOTS[i][a:b])
            evaluate.evaluate_warehouse(inc, user="t")
        full = _new_db(d, "full.duckdb")
        with store.open_warehouse(full) as con:
            insert_facts(con, schema.MEASUREMENTS, [r for lot in LOTS for r in lot])
        evaluate.evaluate_warehouse(full, user="t")
        a, b = _standing(inc), _standing(full)
        assert a == b
        assert len(a) > 0
        assert _state(inc) == _state(full)
        # and a --full rerun of the incremental warehouse changes nothing
        s = evaluate.evaluate_warehouse(inc, full=True, user="t")
        assert (s.signals_new, s.signals_withdrawn) == (0, 0)


def test_incremental_after_refreeze_without_new_data_equals_full(tmp_path):
    # no changed lot, but one chart's limits frozen again: the incremental run recomputes that chart's
    # series alone (reading their points itself, no changed-lot read) and must agree with a full run
    inc = _new_db(tmp_path, "inc.duckdb")
    with store.open_warehouse(inc) as con:
        insert_facts(con, schema.MEASUREMENTS, [r for lot in LOTS for r in lot])
    evaluate.evaluate_warehouse(inc, user="t")
    before = _standing(inc)
    evaluate.freeze_limits(inc, chart="wafer-ewma", first=8, reason="longer baseline", user="a.engineer")
    s = evaluate.evaluate_warehouse(inc, user="t")
    assert s.mode == "incremental"
    assert s.series_recomputed > 0 and s.series_appended == 0
    after = _standing(inc)
    assert {r[8] for r in after if r[0] == "wafer-ewma" and r[5] != "oos"} == {2}
    assert {r for r in after if r[0] == "site-cusum"} == {r for r in before if r[0] == "site-cusum"}
    full = tmp_path / "full.duckdb"
    full.write_bytes(inc.read_bytes())
    f = evaluate.evaluate_warehouse(full, full=True, user="t")
    assert (f.signals_new, f.signals_withdrawn) == (0, 0)
    assert _standing(full) == after
    assert _state(full) == _state(inc)
