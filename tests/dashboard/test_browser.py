"""The served dashboard in headless Chromium (Debian's /usr/bin/chromium driven by Playwright).

One server per module (`lotline serve`'s start function) over a copy of the fixture warehouse, bound to
127.0.0.1 on a free port. Screenshots of every page go to test-artifacts/screenshots/.
"""

from __future__ import annotations

import json
import shutil
import time
from pathlib import Path

import pytest

from tests.dashboard import fixture_warehouse as fx
from tests.dashboard.conftest import ARTIFACTS
from tests.dashboard.helpers import query, shifted_excursion

pytestmark = [
    pytest.mark.browser,
    pytest.mark.skipif(
        shutil.which("chromium") is None,
        reason="Debian's chromium is not installed (apt-get install chromium)",
    ),
]

FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
         "--disable-component-update", "--disable-sync", "--no-first-run"]  # fmt: skip
TIMEOUT_MS = 90_000


@pytest.fixture(scope="module")
def served(fixture_db_master, tmp_path_factory):
    from dashboard.server import start_server

    db = tmp_path_factory.mktemp("served") / "fixture.duckdb"
    shutil.copyfile(fixture_db_master, db)
    log = tmp_path_factory.mktemp("served_log") / "server.log"
    server = start_server(db, port=None, timeout_s=60, log_path=log)
    try:
        yield server.url, db
    finally:
        server.stop()


@pytest.fixture(scope="module")
def browser():
    from playwright.sync_api import sync_playwright

    with sync_playwright() as p:
        b = p.chromium.launch(executable_path=shutil.which("chromium"), args=FLAGS)
        try:
            yield b
        finally:
            b.close()


@pytest.fixture()
def page(browser):
    context = browser.new_context(viewport={"width": 1400, "height": 900})
    pg = context.new_page()
    pg.set_default_timeout(TIMEOUT_MS)
    try:
        yield pg
    finally:
        context.close()


def settle(page, *, charts: int = 0) -> None:
    """Wait until the script run is over and ``charts`` plotly charts have drawn."""
    page.wait_for_selector('[data-test-script-state="notRunning"]', timeout=TIMEOUT_MS)
    page.wait_for_selector("h1", timeout=TIMEOUT_MS)
    if charts:
        page.wait_for_function(
            f"document.querySelectorAll('.js-plotly-plot .main-svg').length >= {charts}", timeout=TIMEOUT_MS
        )
    time.sleep(0.5)  # let late frames paint before screenshots
    page.wait_for_selector('[data-test-script-state="notRunning"]', timeout=TIMEOUT_MS)


def screenshot(page, name: str) -> Path:
    """Full-height screenshot: Streamlit scrolls inside stMain, so grow the viewport to the content."""
    ARTIFACTS.mkdir(parents=True, exist_ok=True)
    height = page.evaluate(
        "() => { const m = document.querySelector('[data-testid=\"stMain\"]'); return m ? m.scrollHeight : 900; }"
    )
    page.set_viewport_size({"width": 1400, "height": max(900, min(int(height) + 40, 6000))})
    time.sleep(0.4)
    path = ARTIFACTS / f"{name}.png"
    page.screenshot(path=str(path))
    page.set_viewport_size({"width": 1400, "height": 900})
    return path


def no_exception(page) -> None:
    assert page.locator('[data-testid="stException"]').count() == 0, page.locator(
        '[data-testid="stException"]'
    ).first.inner_text()


def selectbox(page, label: str):
    """The combobox input of the Streamlit selectbox labelled ``label`` (its value is the shown option)."""
    return page.get_by_role("combobox", name=label, exact=True)


def select_option(page, label: str, option: str) -> None:
    """Open the selectbox with its chevron (shows every option, unfiltered) and pick ``option``."""
    widget = page.locator('[data-testid="stSelectbox"]').filter(has=selectbox(page, label))
    for attempt in range(3):  # a rerun that lands while the list is open closes it: open it again
        widget.get_by_role("button", name="Open").click()
        choice = page.get_by_role("option", name=option, exact=True)
        try:
            choice.wait_for(timeout=15_000)
            choice.click()
            return
        except Exception:
            if attempt == 2:
                raise
            page.keyboard.press("Escape")
            settle(page)


def test_browser_each_page_loads_and_renders_its_charts(served, page):
    url, db = served
    xid = shifted_excursion(db)
    views = [
        ("overview", "", "Line overview", 1),
        ("chart", "chart?series=2", "Chart", 3),
        ("lot", f"lot?lot={fx.DEFECT_LOT}&wafer={fx.DEFECT_WAFER}&layer=M1_LITHO&parameter=cd_mid", "Lot", 4),
        ("excursions", f"excursions?state=all&excursion={xid}", "Excursions", 0),
        ("health", "health", "Data health", 0),
    ]
    for name, path, title, charts in views:
        page.goto(f"{url}/{path}")
        settle(page, charts=charts)
        no_exception(page)
        assert page.locator("h1").first.inner_text().strip() == title
        drawn = page.locator(".js-plotly-plot").count()
        assert drawn >= charts, f"{name}: {drawn} charts drawn, expected {charts}"
        if name == "chart":
            assert page.locator(".js-plotly-plot .scatterlayer .point").count() > 0
        if name == "lot":  # wafer outline circle drawn as a layout shape
            assert page.locator(".js-plotly-plot .shapelayer path").count() > 0
        if name == "health":
            assert page.get_by_role("button", name="Download rejects (CSV)").count() == 1
        screenshot(page, name)


def test_browser_click_on_flagged_point_opens_that_lot(served, page):
    url, _ = served
    page.goto(f"{url}/chart?series=2")
    settle(page, charts=3)
    # the first signal trace of the control chart: its points carry (lot, wafer, key) in customdata
    found = page.evaluate(
        """() => { const gd = document.querySelector('.js-plotly-plot');
                   const i = gd.data.findIndex(t => (t.name || '').startsWith('signal '));
                   return [i, gd.data[i].customdata[0]]; }"""
    )
    index, (lot, wafer, _key) = found
    point = (
        page.locator(".js-plotly-plot")
        .first.locator(".scatterlayer .trace")
        .nth(index)
        .locator(".point")
        .first
    )
    box = point.bounding_box()
    x, y = box["x"] + box["width"] / 2, box["y"] + box["height"] / 2
    page.mouse.move(x, y)
    page.mouse.click(x, y)
    page.wait_for_function("location.pathname.endsWith('/lot')", timeout=TIMEOUT_MS)
    settle(page, charts=2)
    no_exception(page)
    assert page.locator("h1").first.inner_text().strip() == "Lot"
    assert f"lot={lot}" in page.url  # markers of one lot's wafers overlap: the lot, not the wafer, is certain
    assert page.locator('[data-testid="stTextInput"] input').first.input_value() == lot
    screenshot(page, "lot_from_chart_click")


def test_browser_disposition_is_stored_and_shown_in_audit_history(served, page):
    url, db = served
    xid = shifted_excursion(db)
    page.goto(f"{url}/excursions?state=all&excursion={xid}")
    settle(page)
    comment = "checked SCAN02 dose log; lots held per OCAP"
    select_option(page, "New state", "acknowledged")
    select_option(page, "Classification", "real")
    page.get_by_label("Comment").fill(comment)
    page.get_by_role("button", name="Record disposition").click()
    page.get_by_text(f"Recorded for excursion {xid} by ").wait_for(timeout=TIMEOUT_MS)
    settle(page)
    no_exception(page)
    hist = query(db, "excursion_history", excursion_id=xid)
    last = hist.row(-1, named=True)
    assert (last["to_state"], last["classification"], last["comment"]) == ("acknowledged", "real", comment)
    table = page.locator('[data-testid="stTable"]').filter(has_text=comment)
    assert table.count() == 1
    assert json.loads(last["lots_affected_json"])  # the lots of the excursion were kept selected
    screenshot(page, "excursion_after_disposition")


def test_browser_deep_link_reopens_the_same_view(served, browser, page):
    url, _ = served
    page.goto(f"{url}/?by=metrology_tool")
    settle(page, charts=1)
    select_option(page, "Window (days)", "14")
    page.wait_for_function("location.search.includes('days=14')", timeout=TIMEOUT_MS)
    settle(page, charts=1)
    link = page.url
    window = page.get_by_text("Window: ").first.inner_text()
    assert "by=metrology_tool" in link  # every input of the view is in the address
    other = browser.new_context(viewport={"width": 1400, "height": 900}).new_page()
    try:
        other.goto(link)
        settle(other, charts=1)
        for label, value in (("Window (days)", "14"), ("Grid rows", "metrology tool")):
            assert selectbox(other, label).input_value() == value
        assert other.get_by_text("Window: ").first.inner_text() == window
        assert "metrology tool" in other.locator("h3").filter(has_text="Out-of-control").first.inner_text()
    finally:
        other.context.close()
