"""The view in a real headless browser (Debian's chromium driven by Playwright; installed by .ci/run): the demo's
page, live updates, actions refused without credentials, and the offline reports.

The browser is the system's ``/usr/bin/chromium`` with a fresh profile per test run; Playwright never downloads
one.  The demo runs as a subprocess (``edgevib demo``) on a free loopback port.
"""

from __future__ import annotations

import json
import re
import subprocess
import sys
import tempfile
import time
import urllib.parse
import urllib.request
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from servers import free_port

pytestmark = [pytest.mark.network, pytest.mark.slow]

CHROMIUM = "/usr/bin/chromium"
FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
         "--disable-component-update", "--disable-sync", "--no-first-run"]
TOKEN = "ql-shift-lead-0c5e9a7d3b21"


def api(base: str, path: str) -> Any:
    with urllib.request.urlopen(base + path, timeout=10) as r:
        return json.loads(r.read())


class Demo:
    """``edgevib demo`` in a subprocess; ``base`` is the view's URL as it printed it."""

    def __init__(self, extra: list[str] | None = None) -> None:
        self.port = free_port()
        self.proc = subprocess.Popen(
            [sys.executable, "-m", "edgevib.daemon", "demo", "--metrics-listen", f"127.0.0.1:{self.port}",
             "--rate", "1", *(extra or [])], stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True)
        assert self.proc.stdout is not None
        deadline = time.monotonic() + 60
        self.base = ""
        while time.monotonic() < deadline and not self.base:
            line = self.proc.stdout.readline()
            m = re.search(r"view at (http://127\.0\.0\.1:\d+)/", line)
            if m:
                self.base = m.group(1)
            elif not line and self.proc.poll() is not None:
                break
        assert self.base, "the demo did not print the view's URL"
        while time.monotonic() < deadline:  # every point has a frame
            pts = api(self.base, "/api/v1/points")["points"]
            if all(p["frame_end"] for p in pts):
                break
            time.sleep(0.3)

    def close(self) -> None:
        self.proc.terminate()
        try:
            self.proc.wait(20)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait(5)


@pytest.fixture(scope="module")
def browser() -> Iterator[Any]:
    from playwright.sync_api import sync_playwright

    assert Path(CHROMIUM).exists(), "chromium is missing: apt-get install -y chromium (.ci/run does)"
    with sync_playwright() as pw, tempfile.TemporaryDirectory(prefix="edgevib-chromium-") as profile:
        ctx = pw.chromium.launch_persistent_context(profile, executable_path=CHROMIUM, headless=True, args=FLAGS,
                                                   viewport={"width": 1400, "height": 1800})
        try:
            yield ctx
        finally:
            ctx.close()


@pytest.fixture(scope="module")
def demo() -> Iterator[Demo]:
    d = Demo()
    try:
        yield d
    finally:
        d.close()


def wait_until(page: Any, pred: Any, what: str, timeout_s: float = 20.0) -> None:
    """Poll ``pred()`` from Python (the page's Content-Security-Policy forbids evaluating strings in it)."""
    deadline = time.monotonic() + timeout_s
    while not pred():
        if time.monotonic() > deadline:
            pytest.fail(f"timed out waiting for {what}")
        page.wait_for_timeout(100)


class Console:
    def __init__(self, page: Any) -> None:
        self.errors: list[str] = []
        page.on("console", lambda m: self.errors.append(m.text) if m.type == "error" else None)
        page.on("pageerror", lambda e: self.errors.append(str(e)))


def test_page_lists_every_point_without_errors(browser: Any, demo: Demo) -> None:
    page = browser.new_page()
    console = Console(page)
    requests: list[str] = []
    page.on("request", lambda r: requests.append(r.url))
    page.goto(demo.base + "/")
    page.wait_for_selector("body[data-ready]", timeout=20000)
    ids = [p["id"] for p in api(demo.base, "/api/v1/points")["points"]]
    shown = page.eval_on_selector_all("#point-list li", "els => els.map(e => e.dataset.point)")
    assert shown == ids and len(ids) == 6
    # choosing a point in the list shows it and names it in the address
    page.click('#point-list li[data-point="P-102-DE-A"]')
    wait_until(page, lambda: page.inner_text("#point-title") == "P-102-DE-A", "the chosen point")
    page.wait_for_selector("#detail[data-loaded]", timeout=30000)
    assert page.url.endswith("#P-102-DE-A") and page.locator("#sp-chart canvas").count() == 1
    # nothing but our own origin is ever asked for (an edge box has no network)
    assert requests and all(u.startswith(demo.base) for u in requests), requests
    page.close()
    assert console.errors == []


def test_a_click_survives_the_list_refreshing_under_it(browser: Any, demo: Demo) -> None:
    """The point list follows the frames about once a second; a press made before such a refresh and released after
    it is still a click on that point (common practice for live lists: the items are updated in place)."""
    page = browser.new_page()
    console = Console(page)
    page.goto(demo.base + "/")
    page.wait_for_selector("body[data-ready]", timeout=20000)
    card = '#point-list li[data-point="F-201-NDE-V"]'
    box = page.locator(card).bounding_box()
    page.mouse.move(box["x"] + box["width"] / 2, box["y"] + box["height"] / 2)
    page.mouse.down()
    before = page.get_attribute(card, "data-frame-end")  # read after the press: the redraw below comes after it
    # the press is held until the list has been redrawn with a newer frame of that point
    wait_until(page, lambda: page.get_attribute(card, "data-frame-end") != before, "the list to refresh", 60)
    page.mouse.up()
    wait_until(page, lambda: page.inner_text("#point-title") == "F-201-NDE-V", "the pressed point to be chosen")
    assert page.url.endswith("#F-201-NDE-V")
    page.close()
    assert console.errors == []


class Answers:
    """The API's answers the page received on one endpoint (the documents it drew), kept to be read afterwards."""

    def __init__(self, page: Any, suffix: str) -> None:
        self.responses: list[Any] = []
        page.on("response", lambda r: self.responses.append(r)
                if urllib.parse.urlsplit(r.url).path.endswith(suffix) and r.status == 200 else None)

    def for_frame(self, frame_end: str) -> dict[str, Any]:
        for r in reversed(self.responses):
            doc: dict[str, Any] = r.json()
            if doc.get("frame_end") == frame_end:
                return doc
        pytest.fail(f"the page drew frame {frame_end} without an answer for it")


def test_spectrum_marks_the_1x_peak_of_the_imbalanced_pump(browser: Any, demo: Demo) -> None:
    page = browser.new_page()
    console = Console(page)
    answers = Answers(page, "/api/v1/points/P-101-DE-H/spectrum")
    page.goto(demo.base + "/#P-101-DE-H")
    page.wait_for_selector('#sp-markers tr[data-marker="1x"]', timeout=20000)
    assert page.locator("#sp-chart canvas").count() == 1  # the chart is drawn
    # the frame the page shows and its 1× value, read in one go (the page redraws as frames arrive) …
    frame, value, text = page.eval_on_selector("#panel-spectrum", """p => {
        const cell = document.querySelector('#sp-markers tr[data-marker="1x"] td.vel');
        return [p.dataset.frameEnd, Number(cell.dataset.value), cell.textContent]; }""")
    # … are the API's answer for that frame
    one = next(m for m in answers.for_frame(frame)["markers"] if m["key"] == "1x")
    assert value == pytest.approx(one["velocity_mm_s"], rel=1e-9)
    assert text == f"{float(format(one['velocity_mm_s'], '.4g')):g} mm/s"
    # the imbalanced pump: 1× dominates (ISO zone D; simulator: 6 mm/s imbalance)
    assert value > 4.5
    # the trend shows the alarm layer's set points and every ISO 20816-3 zone boundary of the pump
    wait_until(page, lambda: "zone C/D" in (page.get_attribute("#panel-trend", "data-lines") or ""),
               "the trend's limit lines")
    assert page.get_attribute("#panel-trend", "data-lines") == "alert|danger|zone A/B|zone B/C|zone C/D"
    # linear/log and acceleration/velocity switches redraw without errors; the cursor reads frequency and order
    page.select_option("#sp-scale", "log")
    page.select_option("#sp-qty", "acceleration_g")
    box = page.locator("#sp-chart .u-over").bounding_box()
    page.mouse.move(box["x"] + box["width"] * 0.3, box["y"] + box["height"] / 2)
    readout = page.inner_text("#sp-read")
    assert re.search(r"Hz = [\d.]+× +[\d.e-]+ g", readout), readout
    page.close()
    assert console.errors == []


def x_range(page: Any, panel: str) -> tuple[float, float]:
    lo, hi = page.get_attribute(panel, "data-x-min"), page.get_attribute(panel, "data-x-max")
    assert lo is not None and hi is not None, f"{panel} shows no x range"
    return float(lo), float(hi)


def drag_zoom(page: Any, panel: str, f0: float, f1: float) -> tuple[float, float]:
    """Drag across the panel's plot from fraction ``f0`` to ``f1`` of its shown x range; the range it then shows."""
    lo, hi = x_range(page, panel)
    box = page.locator(f"{panel} .u-over").bounding_box()
    y = box["y"] + box["height"] / 2
    page.mouse.move(box["x"] + box["width"] * f0, y)
    page.mouse.down()
    page.mouse.move(box["x"] + box["width"] * (f0 + f1) / 2, y)
    page.mouse.move(box["x"] + box["width"] * f1, y)
    page.mouse.up()
    wait_until(page, lambda: page.get_attribute(panel, "data-zoomed") == "true", f"the zoom of {panel}")
    zlo, zhi = x_range(page, panel)
    # the x scale is linear in frequency or time: the dragged fractions of the range, within a few pixels
    span = hi - lo
    assert zlo == pytest.approx(lo + f0 * span, abs=0.01 * span)
    assert zhi == pytest.approx(lo + f1 * span, abs=0.01 * span)
    return zlo, zhi


def test_zoom_survives_live_updates_until_double_click(browser: Any, demo: Demo) -> None:
    page = browser.new_page()
    console = Console(page)
    page.goto(demo.base + "/#P-101-DE-H")
    page.wait_for_selector('#sp-markers tr[data-marker="1x"]', timeout=20000)
    for sel in ("#sp-chart", "#en-chart", "#wf-chart", "#tr-chart"):
        page.wait_for_selector(f"{sel} canvas", timeout=20000)
    opening = x_range(page, "#panel-spectrum")
    assert opening[0] == 0.0 and opening[1] > 105.0
    # spectrum 5–105 Hz (the velocity view opens on 0 … the velocity band's upper edge)
    zoomed = {"#panel-spectrum": drag_zoom(page, "#panel-spectrum", 5 / opening[1], 105 / opening[1])}
    assert zoomed["#panel-spectrum"] == pytest.approx((5, 105), abs=2)
    for panel in ("#panel-envelope", "#panel-waveform", "#panel-trend"):
        zoomed[panel] = drag_zoom(page, panel, 0.2, 0.6)
    # log scale and another quantity: the zoom stays
    page.select_option("#sp-scale", "log")
    assert x_range(page, "#panel-spectrum") == zoomed["#panel-spectrum"]
    # live updates: a newer frame is drawn in every panel and the whole page reloaded twice …
    panels = ("#panel-spectrum", "#panel-envelope", "#panel-waveform")
    frames = {p: page.get_attribute(p, "data-frame-end") for p in panels}
    for p, f in frames.items():
        wait_until(page, lambda p=p, f=f: page.get_attribute(p, "data-frame-end") != f, f"a live update of {p}", 60)
    for _ in range(2):
        loaded = page.get_attribute("#detail", "data-loaded")
        wait_until(page, lambda loaded=loaded: page.get_attribute("#detail", "data-loaded") != loaded, "a refresh", 60)
    # … and each panel still shows the user's range, with the user's scale choice
    for panel, rng in zoomed.items():
        assert page.get_attribute(panel, "data-zoomed") == "true", panel
        assert x_range(page, panel) == pytest.approx(rng, rel=1e-9), panel
    assert page.input_value("#sp-scale") == "log"
    # a double-click resets the spectrum to its opening range, and that stays too
    page.dblclick("#panel-spectrum .u-over")
    wait_until(page, lambda: page.get_attribute("#panel-spectrum", "data-zoomed") == "false", "the reset")
    assert x_range(page, "#panel-spectrum") == pytest.approx(opening)
    loaded = page.get_attribute("#detail", "data-loaded")
    wait_until(page, lambda: page.get_attribute("#detail", "data-loaded") != loaded, "a refresh", 60)
    assert x_range(page, "#panel-spectrum") == pytest.approx(opening)
    assert page.get_attribute("#panel-envelope", "data-zoomed") == "true"  # the other panels keep theirs
    page.close()
    assert console.errors == []


def test_a_drag_zoom_survives_a_new_frame_arriving_under_it(browser: Any, demo: Demo) -> None:
    """A drag over the spectrum that spans the arrival of a newer frame still zooms to the dragged range: the chart is
    not rebuilt under the operator's pointer (common practice for live charts: a gesture is not cut by a redraw)."""
    page = browser.new_page()
    console = Console(page)
    page.goto(demo.base + "/#P-101-DE-H")
    page.wait_for_selector("#sp-chart canvas", timeout=20000)
    lo, hi = x_range(page, "#panel-spectrum")
    box = page.locator("#panel-spectrum .u-over").bounding_box()
    y = box["y"] + box["height"] / 2
    page.mouse.move(box["x"] + box["width"] * 0.2, y)
    page.mouse.down()
    frame = page.get_attribute("#panel-spectrum", "data-frame-end")  # read after the press
    wait_until(page, lambda: page.get_attribute("#panel-spectrum", "data-frame-end") != frame, "a newer frame", 60)
    page.mouse.move(box["x"] + box["width"] * 0.4, y)
    page.mouse.move(box["x"] + box["width"] * 0.6, y)
    page.mouse.up()
    wait_until(page, lambda: page.get_attribute("#panel-spectrum", "data-zoomed") == "true", "the zoom")
    zlo, zhi = x_range(page, "#panel-spectrum")
    span = hi - lo  # the dragged fractions of the shown (linear) range, within a few pixels
    assert zlo == pytest.approx(lo + 0.2 * span, abs=0.01 * span)
    assert zhi == pytest.approx(lo + 0.6 * span, abs=0.01 * span)
    # the redraw held back during the drag follows, with the user's range kept
    frame = page.get_attribute("#panel-spectrum", "data-frame-end")
    wait_until(page, lambda: page.get_attribute("#panel-spectrum", "data-frame-end") != frame, "the next frame", 60)
    page.wait_for_timeout(1500)
    assert x_range(page, "#panel-spectrum") == pytest.approx((zlo, zhi), rel=1e-9)
    page.close()
    assert console.errors == []


def drawn_labels(page: Any, panel: str) -> list[dict[str, Any]]:
    labels: list[dict[str, Any]] = json.loads(page.get_attribute(panel, "data-labels") or "null")
    # no two labels drawn in one row overlap
    for i, a in enumerate(labels):
        for b in labels[i + 1:]:
            assert a["row"] != b["row"] or a["x1"] <= b["x0"] or b["x1"] <= a["x0"], (a, b)
    return labels


def test_marker_labels_do_not_overlap_and_zooming_in_shows_them(browser: Any, demo: Demo) -> None:
    page = browser.new_page()
    console = Console(page)
    page.goto(demo.base + "/#P-101-DE-H")
    page.wait_for_selector('#sp-markers tr[data-marker="1x"]', timeout=20000)
    page.select_option("#sp-qty", "acceleration_g")  # the whole range: the orders crowd at the left
    wait_until(page, lambda: float(page.get_attribute("#panel-spectrum", "data-x-max") or 0) > 1000, "the full span")
    wait_until(page, lambda: page.get_attribute("#panel-spectrum", "data-labels") is not None, "the labels")
    wide = drawn_labels(page, "#panel-spectrum")
    assert int(page.get_attribute("#panel-spectrum", "data-labels-hidden") or 0) > 0  # crowded: some left out
    lo, hi = x_range(page, "#panel-spectrum")
    drag_zoom(page, "#panel-spectrum", (5 - lo) / (hi - lo), (105 - lo) / (hi - lo))
    wait_until(page, lambda: {"0.5×", "1×", "2×", "3×"} <= {x["label"] for x in drawn_labels(page, "#panel-spectrum")},
               "the order labels of 5–105 Hz")
    assert len(drawn_labels(page, "#panel-spectrum")) >= 4 and all(x["label"] for x in wide)
    page.close()
    assert console.errors == []


def test_stale_points_are_greyed_with_their_age_and_the_badge_is_not_live(browser: Any, demo: Demo) -> None:
    page = browser.new_page()
    console = Console(page)
    # the API's answer for P-101 as it reads once its source is down (stale, 18 s old; the API side is
    # test_web_api.py::test_a_point_without_recent_frames_is_stale_with_its_age); the other points as served
    def down(route: Any) -> None:
        resp = route.fetch()
        doc = resp.json()
        for p in doc["points"]:
            if p["id"] == "P-101-DE-H":
                p.update(stale=True, age_s=18.0, source_state="down")
        route.fulfill(response=resp, json=doc)
    page.route(re.compile(r".*/api/v1/points$"), down)
    page.goto(demo.base + "/#P-102-DE-A")
    page.wait_for_selector("body[data-ready]", timeout=20000)
    wait_until(page, lambda: page.inner_text("#live") == "live", "the event stream", 30)
    assert page.get_attribute("#detail", "data-stale") == "false" and page.is_hidden("#stale-note")
    card = '#point-list li[data-point="P-101-DE-H"]'
    assert page.get_attribute(card, "data-stale") == "true" and "stale" in (page.get_attribute(card, "class") or "")
    assert re.search(r"last data \d+ s ago · source down", page.inner_text(card)), page.inner_text(card)
    assert page.get_attribute(f"{card} .zone", "data-dim") == "true"
    assert page.get_attribute('#point-list li[data-point="P-102-DE-A"]', "data-stale") == "false"
    # choosing the stale point: its panels are greyed, the age is stated and the badge does not say "live"
    page.click(card)
    wait_until(page, lambda: page.get_attribute("#detail", "data-stale") == "true", "the stale point's view")
    assert "stale" in (page.get_attribute("#detail", "class") or "")
    note = page.inner_text("#stale-note")
    assert re.search(r"Not current: last data \d+ s ago \(frame of .+Z\); its source is down", note), note
    assert page.inner_text("#live").startswith("stale: last data")
    assert "on" not in (page.get_attribute("#live", "class") or "").split()
    page.close()
    assert console.errors == []


def test_a_stale_event_greys_a_point_before_the_next_list_read(browser: Any, demo: Demo) -> None:
    page = browser.new_page()
    console = Console(page)
    frame_end = api(demo.base, "/api/v1/points/P-102-DE-A")["frame_end"]
    # the event stream as the view sends it when P-101 and the chosen P-102 stop getting frames (the server side
    # is test_web_api.py::test_the_event_stream_says_when_a_point_goes_stale_and_fresh_again); /points as served,
    # where both are still current
    stale = "".join(f'event: stale\ndata: {{"point":"{pid}","stale":true,"age_s":25.0,"frame_end":"{frame_end}"}}\n\n'
                    for pid in ("P-101-DE-H", "P-102-DE-A"))
    body = 'retry: 60000\nevent: hello\ndata: {"api":"v1"}\n\n' + stale
    page.route(re.compile(r".*/api/v1/events$"),
               lambda route: route.fulfill(status=200, headers={"Content-Type": "text/event-stream"}, body=body))
    page.goto(demo.base + "/#P-102-DE-A")
    page.wait_for_selector("body[data-ready]", timeout=20000)
    card = '#point-list li[data-point="P-101-DE-H"]'
    wait_until(page, lambda: page.get_attribute(card, "data-stale") == "true", "the stale event on the list", 4)
    assert re.search(r"last data \d+ s ago", page.inner_text(card)), page.inner_text(card)
    assert page.get_attribute("#detail", "data-stale") == "true"
    assert re.search(r"Not current: last data \d+ s ago", page.inner_text("#stale-note"))
    page.close()
    assert console.errors == []


def test_envelope_marks_bpfo_on_the_failing_bearing_and_updates_live(browser: Any, demo: Demo) -> None:
    page = browser.new_page()
    console = Console(page)
    answers = Answers(page, "/api/v1/points/B-301-DE-H/envelope")
    page.goto(demo.base + "/#P-101-DE-H")
    page.wait_for_selector('#en-families tr[data-family="bpfo"]', timeout=20000)
    # the address chooses the point: the pump's panels give way to the blower's, nothing of the pump stays
    page.goto(demo.base + "/#B-301-DE-H")
    wait_until(page, lambda: page.inner_text("#point-title") == "B-301-DE-H", "the blower to be chosen")
    page.wait_for_selector('#en-families tr[data-family="bpfo"]', timeout=20000)
    assert page.get_attribute('#point-list li[aria-current="true"]', "data-point") == "B-301-DE-H"
    # the BPFO family is marked, with the verdict the API gave for the frame the page shows
    def shown() -> tuple[str, str, str]:
        return tuple(page.eval_on_selector("#panel-envelope", """p => {
            const tr = document.querySelector('#en-families tr[data-family="bpfo"]');
            return [p.dataset.frameEnd, tr.dataset.verdict, tr.textContent]; }"""))

    frame, verdict, row = shown()
    fam = next(f for f in answers.for_frame(frame)["families"] if f["key"] == "bpfo")
    assert verdict == fam["verdict"] and "BPFO" in row
    # the failing bearing's outer-race defect is detected (the numerical core's verdict): in nearly every frame, not
    # in every one (59 of 60 consecutive simulated frames of this point in a check of the pipeline; a verdict at a
    # false-alarm probability of 1e-3 has a detection probability below 1), so the test waits for a detected frame
    wait_until(page, lambda: shown()[1] == "detected", "a frame with BPFO detected", 60)
    frame, verdict, row = shown()
    doc = answers.for_frame(frame)
    fam = next(f for f in doc["families"] if f["key"] == "bpfo")
    assert verdict == fam["verdict"] == "detected" and doc["detected"] == ["bpfo"]
    assert row.endswith("detected")
    assert page.get_attribute('#en-families tr[data-family="bpfi"]', "data-verdict") == "not detected"
    page.wait_for_selector("#en-chart canvas", timeout=20000)  # the panels load independently
    page.wait_for_selector("#wf-chart canvas", timeout=20000)
    # live: the panels reload on their own as frames arrive (Server-Sent Events), without a page reload
    first = page.get_attribute("#panel-envelope", "data-frame-end")
    wait_until(page, lambda: page.get_attribute("#panel-envelope", "data-frame-end") != first, "a live update", 60)
    wait_until(page, lambda: page.inner_text("#live") == "live", "the event stream", 30)
    # … and so does the point list (another point's latest frame time moves on)
    before = page.get_attribute('#point-list li[data-point="P-101-DE-H"]', "data-frame-end")
    wait_until(page, lambda: page.get_attribute('#point-list li[data-point="P-101-DE-H"]', "data-frame-end") != before,
               "the point list to follow the frames", 60)
    # the trend fills with recent values and shows the limits of the alarm layer
    page.wait_for_selector("#tr-chart canvas", timeout=20000)
    page.close()
    assert console.errors == []


def test_actions_are_refused_without_credentials(browser: Any, tmp_path: Path) -> None:
    token_file = tmp_path / "view-token"
    token_file.write_text(f"shift-lead:{TOKEN}\n")
    d = Demo(["--view-token-file", str(token_file)])
    try:
        page = browser.new_page()
        console = Console(page)
        page.goto(d.base + "/#P-101-DE-H")
        page.wait_for_selector("#actions:not([hidden])", timeout=20000)
        assert page.is_disabled("#act-ack")  # not signed in
        status = page.evaluate("""async () => (await fetch('/api/v1/points/P-101-DE-H/ack', {method: 'POST',
            headers: {'Content-Type': 'application/json'}, body: '{}'})).status""")
        assert status == 401
        page.fill("#token", "wrong-token-wrong-token")
        page.click("#signin button")
        wait_until(page, lambda: "refused" in page.inner_text("#act-msg"), "the sign-in refusal")
        page.fill("#token", TOKEN)
        page.click("#signin button")
        page.wait_for_selector("#act-ack:not([disabled])", timeout=10000)
        # the alarm history panel (the alarm layer's durable history) shows the pump's danger being raised, with
        # the value that crossed the limit …
        page.wait_for_selector('#history tr[data-transition="raised"][data-state="danger"]', timeout=60000)
        assert "limit 4.5 mm/s" in page.inner_text("#history")  # ISO 20816-3 C/D boundary, group 2 rigid
        page.click("#act-ack")
        wait_until(page, lambda: "done by token:shift-lead" in page.inner_text("#act-msg"), "the acknowledgement")
        # … and then who acknowledged it, and when
        page.wait_for_selector('#history tr[data-transition="acknowledged"]', timeout=30000)
        ack_row = page.inner_text('#history tr[data-transition="acknowledged"]')
        assert re.search(r"token:shift-lead at \d{4}-\d\d-\d\dT[\d:.]+Z", ack_row), ack_row
        page.close()
        expected = {"Failed to load resource: the server responded with a status of 401 (Unauthorized)"}
        assert set(console.errors) <= expected  # the refusals themselves, nothing else
    finally:
        d.close()


def test_analyze_report_opens_in_the_browser(browser: Any, tmp_path: Path) -> None:
    from edgevib.simulator.engine import Simulation, load_scenario

    # a recording of the demo's failing blower bearing (simulated), analysed offline
    sim = Simulation(load_scenario("demo"), seed=1)
    x = sim.record("B-301-DE-H", 8)
    rec = tmp_path / "b301.npy"
    np.save(rec, x)
    out = tmp_path / "b301-report.html"
    res = subprocess.run([sys.executable, "-m", "edgevib.daemon", "analyze", str(rec), "--fs", "12800", "--rpm", "2960",
                          "--bearing", "8,17.5,72,0", "--band", "2200:4200", "--report", str(out)],
                         capture_output=True, text=True, timeout=120)
    assert res.returncode == 0, res.stderr
    text = out.read_text()
    assert "<script src=" not in text and "http://" not in text.replace("http://www.w3.org", "")  # self-contained
    page = browser.new_page()
    console = Console(page)
    requests: list[str] = []
    page.on("request", lambda r: requests.append(r.url))
    page.goto(out.as_uri())
    page.wait_for_selector("body[data-rendered]", timeout=20000)
    assert page.locator('#en-families tr[data-family="bpfo"]').count() == 1  # the BPFO family is marked
    assert page.locator("#sp-chart canvas").count() == 1 and page.locator("#wf-chart canvas").count() == 1
    assert page.is_hidden("#panel-trend")  # analyze has no trend
    assert page.locator('tr[data-indicator="velocity_rms_mm_s"]').count() == 1
    assert all(u.startswith("file://") or u.startswith("data:") for u in requests), requests
    page.close()
    assert console.errors == []


def test_report_with_trend_and_projection_opens_in_the_browser(browser: Any, tmp_path: Path) -> None:
    from edgevib.daemon.web.report import build_report, write_report
    from edgevib.pipelines.panels import waveform_panel

    t = np.arange(0, 3600.0 * 24, 600.0)
    v = 1.0 + 0.02 * np.exp(t / 30000.0)
    trend = {"indicator": "velocity_rms_mm_s", "unit": "mm/s", "t_s": (1.8e9 + t).tolist(), "values": v,
             "limits": {"alert": 2.8, "danger": 4.5}, "source": "replay",
             "projection": {"t_s": (1.8e9 + t[-1] + np.arange(1, 20) * 600.0).tolist(),
                            # a curve that runs on past the danger line (an exponential beyond its crossing)
                            "values": np.r_[1.0 + 0.02 * np.exp((t[-1] + np.arange(1, 17) * 600.0) / 30000.0),
                                            4.8, 60.0, 1000.0],
                            "now_s": 1.8e9 + t[-1],
                            "limits": [{"label": "danger", "value": 4.5, "status": "rising", "eta_s": 9000.0,
                                        "eta_low_s": 8000.0, "eta_high_s": 10500.0,
                                        "date": "2027-01-15T10:30:00.000Z", "date_low": "2027-01-15T10:13:20.000Z",
                                        "date_high": "2027-01-15T10:55:00.000Z"}],
                            # an upper interval edge that runs away near the horizon (an exponential fit's band)
                            "low": np.full(19, 1.0), "high": np.geomspace(2.0, 15000.0, 19), "coverage": 0.8}}
    text = build_report(title="replay", meta={"points": 1}, indicators=[("velocity_rms_mm_s", 1.2, "mm/s")],
                        spectrum=None, envelope=None, waveform=waveform_panel(np.sin(np.arange(4096) / 9), 1000.0),
                        trend=trend)
    out = write_report(tmp_path / "replay.html", text)
    page = browser.new_page()
    console = Console(page)
    page.goto(out.as_uri())
    page.wait_for_selector("body[data-rendered]", timeout=20000)
    assert page.is_visible("#panel-trend") and page.locator("#tr-chart canvas").count() == 1
    legend = page.inner_text("#tr-chart")
    assert "alert" in legend and "danger" in legend and "projection" in legend
    assert page.get_attribute("#panel-trend", "data-count") == str(t.size)
    # the y range holds the values, the danger line (4.5) and the curve, not the band's 15 000: the history stays
    # readable and the band is clipped
    y_lo, y_hi = (float(x) for x in (page.get_attribute("#panel-trend", "data-y-range") or "").split())
    assert y_lo < float(v.min()) and 4.5 < y_hi < 6.0
    # a crossing hours away: its dates with the time of day
    assert page.inner_text('#tr-cross tr[data-limit="danger"]').split("\t")[3:] == [
        "2027-01-15 10:30 UTC", "2027-01-15 10:13 UTC … 2027-01-15 10:55 UTC"]
    page.close()
    assert console.errors == []


def test_replay_report_with_trend_and_projection_opens_in_the_browser(browser: Any, tmp_path: Path) -> None:
    from edgevib.daemon.cli import main
    from edgevib.simulator.engine import load_scenario
    from edgevib.simulator.longrun import LongRun

    # months of snapshots of an exponential progression up to 70 % of its way to ISO zone D (4.5 mm/s, group 2
    # rigid), replayed into a report: the trend, the zone D line and the projection towards it are drawn
    law = LongRun(load_scenario("trend-exponential"), seed=2).laws["P-302-DE-H"]
    t70 = law.crossing_s(law.v0 + 0.7 * (4.5 - law.v0))
    assert t70 is not None
    snaps = tmp_path / "snaps"
    assert main(["simulate", "--scenario", "trend-exponential", "--seed", "2", "--snapshots", str(snaps),
                 "--duration", str(t70)]) == 0
    out = tmp_path / "replay.html"
    assert main(["replay", str(snaps / "P-302-DE-H"), "--fs", "5120", "--rpm", "2960", "--group", "2", "--support",
                 "rigid", "--min-span", "86400", "--report", str(out), "--json"]) == 0
    page = browser.new_page()
    console = Console(page)
    page.goto(out.as_uri())
    page.wait_for_selector("body[data-rendered]", timeout=20000)
    assert page.is_visible("#panel-trend") and page.locator("#tr-chart canvas").count() == 1
    legend = page.inner_text("#tr-chart")
    # every ISO 20816-3 zone boundary (group 2 rigid) and the fitted growth with its confidence band
    assert "zone C/D" in legend and "projection" in legend and "interval" in legend
    assert page.get_attribute("#panel-trend", "data-lines") == "zone A/B|zone B/C|zone C/D"
    assert page.get_attribute("#panel-trend", "data-projection") == "band"
    assert page.is_visible("#tr-cross")  # the projected crossings with their intervals
    assert int(page.get_attribute("#panel-trend", "data-count") or 0) > 12
    assert page.locator("#sp-chart canvas").count() == 1 and page.locator("#wf-chart canvas").count() == 1
    page.close()
    assert console.errors == []
