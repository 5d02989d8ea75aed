"""The browser view in a real browser: Debian's headless chromium driven by selenium.

Skipped, with the reason in one line, where chromium, its driver or selenium is missing
(``.ci/run`` installs the first two). Waits only catch a hang.
"""

from __future__ import annotations

import pytest
from browser_rig import chart_ink, element_box, find_browser, headless_chromium
from protocol_helpers import ANY_PORT, until
from test_lookout_data import _status

from brimline.daemon.net.publisher import StatusPublisher
from brimline.daemon.views.lookout import Lookout

FOUND = find_browser()
if isinstance(FOUND, str):
    pytest.skip(FOUND, allow_module_level=True)

HANG_S = 60.0
CHARTS = ("band-chart", "waterfall-chart", "rate-chart", "margin-chart")


def _page(chrome, what: str):
    return chrome.execute_script(f"return {what};")


def test_the_page_shows_the_tones_updates_and_draws_its_charts(ctx):
    with StatusPublisher(endpoint=ANY_PORT, context=ctx) as pub, \
            Lookout(pub.endpoint, port=0) as view, headless_chromium(*FOUND) as chrome:
        chrome.get(view.url)
        first = _status(time_s=1.0)
        assert until(lambda: _page(chrome, "document.body.dataset.mapSeq") == "12", HANG_S,
                     step=lambda: pub.publish(first)), view.status_counts()
        summary = chrome.find_element("id", "band-summary").text
        assert "tones -50 \u2026 50" in summary and "100 data tones" in summary
        figures = chrome.find_element("id", "figures").text
        assert "Mbit/s" in figures and "not in status" in figures  # goodput: no closed loop
        assert "EMERGENCY \u00d71, last raised at 1.0 s" in chrome.find_element("id", "alarms").text

        # a new status arrives: the page follows without a reload
        radio = {"name": "radio", "state": "running", "counters": {},
                 "clock_offset_ppm": -12.34}  # the radio's sample clock offset, measured
        for i, t in enumerate((1.5, 2.0, 2.5, 3.0)):
            pub.publish(_status(time_s=t, seq=12 + (i == 3), kind="reload" if i == 3
                                else "emergency", **({"driver": radio} if i == 3 else {})))
        assert until(lambda: _page(chrome, "document.body.dataset.mapSeq") == "13", HANG_S)
        assert until(lambda: "radio running, sample clock -12.3 ppm" in
                     chrome.find_element("id", "source").text, HANG_S)
        rows = chrome.find_elements("css selector", "#changes tbody tr")
        assert rows[0].text.split()[:3] == ["7.50", "13", "reload"]
        alarms = chrome.find_element("id", "alarms").text  # the emergency stays, cleared
        assert "no alarms now" in alarms and "EMERGENCY" in alarms and "cleared" in alarms
        assert int(_page(chrome, "document.body.dataset.updates")) >= 2

        assert until(lambda: _page(chrome, "document.getElementById('time').textContent")
                     == "3.0 s", HANG_S)
        png = chrome.get_screenshot_as_png()
        for chart in CHARTS:
            ink = chart_ink(png, element_box(chrome, chart))
            assert ink["inked"] > 0.05 and ink["colours"] > 20, (chart, ink)
        errors = [e for e in chrome.get_log("browser") if e["level"] == "SEVERE"]
        assert not errors, errors


def test_a_page_without_status_shows_marked_empty_places(ctx):
    with StatusPublisher(endpoint=ANY_PORT, context=ctx) as pub, \
            Lookout(pub.endpoint, port=0) as view, headless_chromium(*FOUND) as chrome:
        chrome.get(view.url)
        assert until(lambda: "waiting for status" in
                     chrome.find_element("id", "connection").text, HANG_S)
        png = chrome.get_screenshot_as_png()
        # the hatched empty places are drawn, not left blank
        assert chart_ink(png, element_box(chrome, "band-chart"))["inked"] > 0.01
        assert not [e for e in chrome.get_log("browser") if e["level"] == "SEVERE"]
