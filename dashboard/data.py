"""The dashboard's only door to the warehouse, and the only module with Streamlit caching.

Every page asks for one *batch* of named read functions of :mod:`warehouse.queries`. A batch is cached with
``st.cache_data`` under the warehouse file's change stamp (:func:`warehouse.store.file_stamp`: mtime and
size, read without opening the file), so the file is reopened only after a write. On a cache miss the batch
opens the warehouse read-only once, runs its queries and closes it: no connection outlives a unit of work,
so an ingest or evaluation run in another process can take the file between two page views.

Inside this process the dashboard serves many sessions from threads. DuckDB refuses a read-write open of a
file that the same process holds read-only, so reads and the rare disposition write take a small
readers-writer lock here.

Configuration read here (and only here): the warehouse path (``--db`` after ``--`` on the ``streamlit run``
command line, else ``$LOTLINE_DB``, else ``./lotline.duckdb``) and the trusted proxy header name
(``$LOTLINE__DASHBOARD__USER_HEADER``).
"""

from __future__ import annotations

import getpass
import inspect
import os
import sys
import threading
from collections.abc import Iterator, Mapping
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import polars as pl
import streamlit as st

from dashboard.identity import Author, resolve_author
from warehouse import queries, store
from warehouse.errors import LotlineError

__all__ = [
    "LotlineError",
    "current_author",
    "db_path",
    "load",
    "load_one",
    "record_disposition",
    "series_drift",
    "wafer_signature",
    "excursion_commonality",
    "excursion_attribution",
    "excursion_explanation",
]

ENV_USER_HEADER = "LOTLINE__DASHBOARD__USER_HEADER"
READ_WAIT_S = 15.0
"""How long a page waits for another process (an ingest) to release the warehouse before it says so."""
WRITE_WAIT_S = 30.0

Request = tuple[str, Mapping[str, Any]]
"""One query of a batch: the name of a function in warehouse.queries and its keyword arguments."""


# ------------------------------------------------------------------------------------------ config


def db_path() -> Path:
    """The warehouse file: ``--db PATH`` given to the app, else ``$LOTLINE_DB``, else ``./lotline.duckdb``."""
    argv = sys.argv[1:]
    for i, arg in enumerate(argv):
        if arg == "--db" and i + 1 < len(argv):
            return Path(argv[i + 1])
        if arg.startswith("--db="):
            return Path(arg.split("=", 1)[1])
    return store.resolve_db_path(None)


def current_author() -> Author:
    """The disposition author: the OIDC login, else the operator's trusted proxy header, else the OS user."""
    user: dict[str, Any] = {}
    try:
        user = {k: st.user.get(k) for k in ("is_logged_in", "email", "name", "sub")}
    except Exception:  # st.user is unavailable outside a running app
        user = {}
    header_name = os.environ.get(ENV_USER_HEADER) or None
    headers: Mapping[str, str] = {}
    if header_name:
        try:
            headers = dict(st.context.headers)
        except Exception:
            headers = {}
    try:
        os_user = getpass.getuser()
    except Exception:
        os_user = "unknown"
    return resolve_author(user, headers, header_name, os_user)


# ------------------------------------------------------------------------------------------ locking


class _ReadWriteLock:
    """Many readers or one writer, inside this process (threads of the Streamlit server)."""

    def __init__(self) -> None:
        self._cond = threading.Condition()
        self._readers = 0
        self._writing = False

    @contextmanager
    def reading(self) -> Iterator[None]:
        with self._cond:
            while self._writing:
                self._cond.wait()
            self._readers += 1
        try:
            yield
        finally:
            with self._cond:
                self._readers -= 1
                self._cond.notify_all()

    @contextmanager
    def writing(self) -> Iterator[None]:
        with self._cond:
            while self._writing or self._readers:
                self._cond.wait()
            self._writing = True
        try:
            yield
        finally:
            with self._cond:
                self._writing = False
                self._cond.notify_all()


_LOCK = _ReadWriteLock()


# ------------------------------------------------------------------------------------------ reading


def _freeze(value: Any) -> Any:
    if isinstance(value, Mapping):
        return tuple(sorted((k, _freeze(v)) for k, v in value.items()))
    if isinstance(value, list | tuple | set | frozenset):
        return tuple(_freeze(v) for v in value)
    return value


def _thaw(value: Any) -> Any:
    return list(value) if isinstance(value, tuple) else value


@st.cache_data(max_entries=512, show_spinner=False)
def _run_batch(db: str, stamp: tuple[int, int], batch: tuple[tuple[str, str, tuple], ...]) -> dict[str, Any]:
    """Run one batch of named queries in one read-only unit of work (cached on the file stamp)."""
    del stamp  # part of the cache key only
    out: dict[str, Any] = {}
    with _LOCK.reading(), store.open_warehouse(db, read_only=True, wait_s=READ_WAIT_S) as con:
        for label, name, kwargs in batch:
            fn = getattr(queries, name)
            out[label] = fn(con, **{k: _thaw(v) for k, v in kwargs})
    return out


def load(requests: Mapping[str, Request]) -> dict[str, Any]:
    """Run a batch of named read functions of :mod:`warehouse.queries`; return their results by label.

    Example:
        >>> frames = load({"sev": ("open_excursions_by_severity", {})})  # doctest: +SKIP
    """
    for name, _ in requests.values():
        fn = getattr(queries, name, None)
        if name.startswith("_") or not inspect.isfunction(fn) or fn.__module__ != queries.__name__:
            raise AttributeError(f"warehouse.queries has no read function {name!r}")
    db = db_path()
    batch = tuple((label, name, _freeze(dict(kwargs))) for label, (name, kwargs) in requests.items())
    return _run_batch(str(db), store.file_stamp(db), batch)


def load_one(name: str, **kwargs: Any) -> Any:
    """One named read function as a batch of one."""
    return load({name: (name, kwargs)})[name]


def empty(frame: pl.DataFrame | None) -> bool:
    """True for a missing or empty result (the normal 'nothing to show' path)."""
    return frame is None or frame.height == 0


# ------------------------------------------------------------------------------------------ engine views


@st.cache_data(max_entries=128, show_spinner=False)
def _drift(points: pl.DataFrame, series_id: int, lam: float, L: float, limits: str, k: float, h: float,
           headstart: float):  # fmt: skip
    from spc.cusum import CusumParams, evaluate_cusum
    from spc.ewma import EwmaParams, evaluate_ewma

    pts = points.filter(
        pl.col("center").is_not_null() & pl.col("sigma").is_not_null() & (pl.col("sigma") > 0)
    )
    if pts.height == 0:
        return pts, pts
    frame = pts.with_columns(pl.lit(str(series_id)).alias("series"))
    keep = ["point_at", "lot_id", "wafer_id", "point_key"]
    ewma = evaluate_ewma(frame, EwmaParams(lam=lam, L=L, limits=limits), passthrough=keep).points
    cusum = evaluate_cusum(frame, CusumParams(k=k, h=h, headstart=headstart), passthrough=keep).points
    return ewma, cusum


def series_drift(
    points: pl.DataFrame,
    series_id: int,
    *,
    lam: float,
    L: float,
    limits: str = "exact",
    k: float,
    h: float,
    headstart: float = 0.0,
) -> tuple[pl.DataFrame, pl.DataFrame]:
    """EWMA and CUSUM paths (spc.ewma / spc.cusum) over a series' points as ``series_points`` returned them.

    Takes the points the page already loaded, so the series is read once; cached on the frame's content.
    """  # fmt: skip
    return _drift(
        points, int(series_id), float(lam), float(L), str(limits), float(k), float(h), float(headstart)
    )


@st.cache_data(max_entries=64, show_spinner=False)
def _commonality(db: str, stamp: tuple[int, int], excursion_id: int, days_before: int) -> pl.DataFrame | None:
    from spc.commonality import rank_commonality

    hist = _run_batch(
        db,
        stamp,
        (
            (
                "h",
                "excursion_population_history",
                (("days_before", days_before), ("excursion_id", excursion_id)),
            ),
        ),
    )["h"]
    affected = hist.filter(pl.col("affected"))["lot_id"].unique().to_list()
    if not affected or hist.height == 0:
        return None
    return rank_commonality(hist.drop("affected"), affected)


def excursion_commonality(excursion_id: int, *, days_before: int = 14) -> pl.DataFrame | None:
    """Commonality ranking (spc.commonality) of one excursion's lots against the lots around it."""
    db = db_path()
    return _commonality(str(db), store.file_stamp(db), int(excursion_id), int(days_before))


@st.cache_data(max_entries=128, show_spinner=False)
def _signature(db: str, stamp: tuple[int, int], lot_id: str, wafer_id: str, layer: str, parameter: str):
    from spc.signatures import explain_zernike, fit_radial, fit_zernike, zone_means

    kwargs = (("layer", layer), ("lot_id", lot_id), ("parameter", parameter), ("wafer_id", wafer_id))
    sites = _run_batch(db, stamp, (("s", "wafer_sites", kwargs),))["s"]
    sites = sites.filter(pl.col("x_mm").is_not_null() & pl.col("y_mm").is_not_null()).with_columns(
        pl.lit(wafer_id).alias("wafer_id")
    )
    if sites.height == 0:
        return None
    key = ["wafer_id"]
    zones = zone_means(sites, wafer_key=key)
    radial = fit_radial(sites, wafer_key=key) if sites.height >= 3 else None
    families = explain_zernike(
        fit_zernike(sites, wafer_key=key, n_terms=min(11, sites.height)), wafer_key=key
    )
    return {"zones": zones, "radial": radial, "families": families}


def wafer_signature(lot_id: str, wafer_id: str, layer: str, parameter: str) -> dict[str, pl.DataFrame] | None:
    """Zone means, radial fit and Zernike families (spc.signatures) of one wafer's site values."""
    db = db_path()
    return _signature(str(db), store.file_stamp(db), lot_id, wafer_id, layer, parameter)


@st.cache_data(max_entries=64, show_spinner=False)
def _explanation(db: str, stamp: tuple[int, int], excursion_id: int):
    from warehouse import drilldown

    del stamp  # part of the cache key only
    with _LOCK.reading(), store.open_warehouse(db, read_only=True, wait_s=READ_WAIT_S) as con:
        try:
            return drilldown.explain_excursion(con, excursion_id)
        except drilldown.ExcursionNotFoundError:
            return None


def excursion_explanation(excursion_id: int):
    """The drill-down of one excursion (warehouse.drilldown.explain_excursion), or None for an unknown id."""
    db = db_path()
    return _explanation(str(db), store.file_stamp(db), int(excursion_id))


def excursion_attribution(excursion_id: int) -> pl.DataFrame | None:
    """Process-or-metrology verdict of one excursion (spc.attribution via warehouse.drilldown): one row per line
    of evidence with the verdict and the votes; None when the question does not apply (defect charts)."""
    ex = excursion_explanation(excursion_id)
    if ex is None or ex.attribution is None:
        return None
    a = ex.attribution
    return pl.DataFrame({
        "verdict": a.verdict, "measuring_tool": ex.evidence.metrology_tool,
        "shift_nm": round(ex.evidence.shift_nm, 3), "votes": f"process {a.process_votes}, metrology {a.metrology_votes}",
        "evidence": list(a.evidence),
    })  # fmt: skip


# ------------------------------------------------------------------------------------------ writing


def record_disposition(
    *,
    excursion_id: int,
    to_state: str,
    classification: str | None,
    cause_category: str | None,
    action: str | None,
    comment: str | None,
    lots_affected: list[str] | None,
    author: Author,
) -> dict[str, Any]:
    """Write one disposition through :func:`warehouse.excursions.record_disposition` (its locking rules).

    The write opens the warehouse read-write for its own unit of work (retrying while another process holds
    the file); inside this process it waits until no page is reading. The caches see the change because the
    file's stamp changes.
    """
    from warehouse import excursions

    with _LOCK.writing():
        return excursions.record_disposition(
            str(db_path()), int(excursion_id), user=author.name, state=to_state, classification=classification,
            cause=cause_category, action=action, lots=lots_affected, comment=comment,
        )  # fmt: skip


# ------------------------------------------------------------------------------------------ tool health


@st.cache_data(max_entries=16, show_spinner=False)
def _weekly_health(db: str, stamp: tuple[int, int], week: str | None):
    from warehouse import health

    del stamp  # part of the cache key only
    with _LOCK.reading(), store.open_warehouse(db, read_only=True, wait_s=READ_WAIT_S) as con:
        weeks = health.data_weeks(con)
        report = health.weekly_health(con, week=week) if weeks.height else None
    labels = [health.week_of(w).label for w in weeks["week_start"]]
    return labels, report


def weekly_health(week: str | None = None):
    """The weeks with data (newest first) and the tool-health review of ``week`` (default: the newest)."""
    db = db_path()
    return _weekly_health(str(db), store.file_stamp(db), week)
