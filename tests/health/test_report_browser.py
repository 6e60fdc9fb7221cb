"""The weekly report renders its plotly charts in headless Chromium with the network cut off (file://)."""

from __future__ import annotations

import shutil

import pytest

FLAGS = [
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--no-first-run",
]


@pytest.mark.browser
def test_weekly_report_charts_render_offline_in_chromium(demo_report):
    exe = shutil.which("chromium") or "/usr/bin/chromium"
    playwright = pytest.importorskip("playwright.sync_api")
    requests = []
    with playwright.sync_playwright() as p:
        browser = p.chromium.launch(executable_path=exe, args=FLAGS)
        try:
            context = browser.new_context(offline=True)
            page = context.new_page()
            page.on("request", lambda r: requests.append(r.url))
            page.goto(demo_report.as_uri())
            page.wait_for_selector(".js-plotly-plot .main-svg", timeout=30000)
            n = page.locator(".js-plotly-plot").count()
            svgs = page.locator(".js-plotly-plot .main-svg").count()
            page.wait_for_timeout(500)  # after the load event
            # each chart fits its grid cell: a chart drawn wider than its cell is cut off at the right
            # (the first chart of a grid was drawn before the second cell existed, over the full width)
            widths = page.evaluate(
                """() => [...document.querySelectorAll('.js-plotly-plot')].map(el => [
                    el.querySelector('.main-svg').getBoundingClientRect().width,
                    el.parentElement.getBoundingClientRect().width])"""
            )
        finally:
            browser.close()
    assert n == 7 and svgs >= 7
    assert all(svg <= cell + 1 for svg, cell in widths), widths
    assert all(u.startswith(("file:", "data:", "blob:", "about:")) for u in requests)
