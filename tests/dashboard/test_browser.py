"""End to end in headless Chromium (dash.testing): every page loads with no console errors;
choosing a pair and a range produces the window study; the report downloads.

Set COMOVE_SCREENSHOTS=DIR to keep a PNG of every page (for looking at them by eye)."""

from __future__ import annotations

import os
import time
from pathlib import Path

import pytest
from selenium.webdriver.common.action_chains import ActionChains

from callbacks.app import create_app
from layouts import ids
from layouts.pages import PAGES
from monitor.data.store import Store

pytestmark = pytest.mark.e2e


@pytest.fixture
def served(dash_duo, dash_store, browser_available):
    store = Store(dash_store.url, create=False)
    dash_duo.start_server(create_app(dash_store.cfg, store=store))
    yield dash_duo
    store.close()


def _shot(duo, name: str) -> None:
    folder = os.environ.get("COMOVE_SCREENSHOTS")
    if folder:
        Path(folder).mkdir(parents=True, exist_ok=True)
        duo.driver.save_screenshot(str(Path(folder) / f"{name}.png"))


def _wait_plots(duo, minimum: int, timeout: float = 30) -> None:
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        if len(duo.driver.find_elements("css selector", ".js-plotly-plot .main-svg")) >= minimum:
            return
        time.sleep(0.2)
    raise AssertionError(f"fewer than {minimum} rendered figures after {timeout} s")


# Per table on the page: (scrollWidth, clientWidth, rows, filter rows).
_TABLE_WIDTHS = """return [...document.querySelectorAll('.dash-spreadsheet-container')].map(
    e => [e.scrollWidth, e.clientWidth, e.querySelectorAll('tr td.dash-cell').length,
          e.querySelectorAll('.dash-filter').length]);"""


def test_every_page_loads_without_console_errors(served):
    plots = {"/": 3, "/timeline": 1, "/drilldown": 0, "/episodes": 1, "/inputs": 2}
    served.driver.set_window_size(1600, 1000)
    for page in PAGES:
        served.driver.get(served.server_url + page.path)
        served.wait_for_element(f"#{ids.PAGE} section", timeout=20)
        _wait_plots(served, plots[page.path])
        text = served.find_element("body").text
        assert "not investment advice" in text and "window 120 days" in text, page.path
        _shot(served, page.module)
        # At 1600 pixels the tables' shown columns fit without a horizontal scroll bar, and
        # a table with fewer than 20 rows has no filter row.
        for scroll, client, cells, filters in served.driver.execute_script(_TABLE_WIDTHS):
            assert scroll <= client + 1, (page.path, scroll, client)
            if 0 < cells < 20:
                assert filters == 0, page.path
    assert served.get_logs() == []


def test_a_pair_and_range_give_the_window_study_and_the_report(served, dash_store):
    a, b = dash_store.assets[:2]
    # The Timeline's link to the drill-down carries the pair and the chosen range.
    served.driver.get(f"{served.server_url}/timeline?pair={a}/{b}")
    link = served.wait_for_element(f"#{ids.TIMELINE_OPEN_STUDY}", timeout=20)
    _wait_plots(served, 1)
    _shot(served, "timeline-pair")
    # Drag across the top panel (plotly's zoom): the range control and the link follow.
    drag = served.driver.find_elements("css selector", ".js-plotly-plot .nsewdrag")[0]
    width = drag.size["width"]
    ActionChains(served.driver).move_to_element(drag).move_by_offset(-width // 4, 0) \
        .click_and_hold().move_by_offset(width // 3, 0).release().perform()
    end = time.monotonic() + 10
    while "&start=" not in (link.get_attribute("href") or "") and time.monotonic() < end:
        time.sleep(0.2)
    href = link.get_attribute("href")
    assert f"/drilldown?pair={a}/{b}&start=" in href and "&end=" in href
    served.driver.get(href)
    served.wait_for_element("[id*='candidates']", timeout=90)
    _wait_plots(served, 3)
    _shot(served, "drilldown-study")
    text = served.find_element(f"#{ids.STUDY_RESULT}").text
    assert "gaussian" in text and "clayton" in text and "AIC" in text
    served.find_element(f"#{ids.STUDY_REPORT}").click()
    end, files = time.monotonic() + 30, []
    while time.monotonic() < end and not files:
        files = [p for p in Path(served.download_path).glob("*.html")]
        time.sleep(0.2)
    assert len(files) == 1, "the report did not download"
    report = files[0].read_text(encoding="utf-8")
    assert report.lstrip().lower().startswith("<!doctype html") and f"{a}" in report
    assert "not investment advice" in report
    assert served.get_logs() == []


_SUMMARY = f"""const g = document.querySelector('#{ids.BOARD_SUMMARY} .js-plotly-plot');
return g && g.data ? [g.data.length, g.data[0].x.length,
                      (g.layout.shapes || []).map(s => s.x0)] : null;"""


def _until(duo, script: str, check, timeout: float = 30):
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        got = duo.driver.execute_script(script)
        if got is not None and check(got):
            return got
        time.sleep(0.2)
    raise AssertionError(f"not reached in {timeout} s; last: {got!r}")


def test_the_universe_summary_loads_once_and_a_new_date_moves_its_marker(served, view):
    # The summary over time comes with the page; picking another date sends only a patch of
    # its date marker (callbacks/board.py), which the browser applies to the drawn figure.
    from monitor.stats.signals import universe_key

    stored = view.store.read_universe(universe_key(view.signals_key))
    latest, earlier = (f"{d:%Y-%m-%d}" for d in (stored.index[-1], stored.index[-30]))
    served.driver.get(served.server_url + "/")
    traces, points, marks = _until(served, _SUMMARY, lambda g: g[0] > 0)
    assert (traces, points) == (11, len(stored)) and marks == [latest] * 3
    served.driver.execute_script(
        f"window.dash_clientside.set_props('{ids.BOARD_DATE}', {{date: '{earlier}'}});")
    traces, points, marks = _until(served, _SUMMARY, lambda g: g[2] == [earlier] * 3)
    assert (traces, points) == (11, len(stored))
    assert served.get_logs() == []
