"""Helpers shared by the dashboard tests: run a page under AppTest, read its tables and plotly specs."""

from __future__ import annotations

import base64
import json

import numpy as np
import polars as pl
from streamlit.testing.v1 import AppTest

from tests.dashboard.conftest import APP
from tests.dashboard.fixture_warehouse import SHIFTED_LOTS
from warehouse import queries, store


def run_page(page: str | None = None, **params: str) -> AppTest:
    at = AppTest.from_file(str(APP), default_timeout=60)
    if page:
        at.switch_page(f"views/{page}.py")
    for k, v in params.items():
        at.query_params[k] = v
    return at.run()


def query(db, name: str, **kwargs):
    with store.open_warehouse(db, read_only=True) as con:
        return getattr(queries, name)(con, **kwargs)


def table_with(at: AppTest, *cols: str) -> pl.DataFrame:
    """The first table on the page that has all of ``cols``."""
    for el in [*at.dataframe, *at.table]:
        if all(c in el.value.columns for c in cols):
            return pl.from_pandas(el.value)
    raise AssertionError(f"no table with columns {cols}")


def plotly_specs(at: AppTest) -> list[dict]:
    return [json.loads(el.proto.spec) for el in at.get("plotly_chart")]


def array(value) -> list:
    """A plotly JSON array: plain list, or the base64 typed array of plotly >= 6."""
    if isinstance(value, dict) and "bdata" in value:
        return np.frombuffer(base64.b64decode(value["bdata"]), dtype=np.dtype(value["dtype"])).tolist()
    return list(value)


def shifted_excursion(db) -> int:
    """Id of the excursion holding the fixture's shifted lots (found by the engine)."""
    exc = query(db, "list_excursions")
    for row in exc.iter_rows(named=True):
        if SHIFTED_LOTS[0] in json.loads(row["lots_json"]):
            return int(row["excursion_id"])
    raise AssertionError("the engine did not flag the shifted lots")
