"""The control page in a real browser: Playwright driving Debian's Chromium, headless.

Every test runs against the real daemon (`python -m fieldmix demo` on the virtual audio
device, or `serve --virtual` on a copy of a show), over real HTTP, websocket and UDP.
Screenshots at tablet and phone size are written to a temporary folder whose path the
test prints (set FIELDMIX_SCREENSHOTS=DIR to choose it).

Needs: `apt-get install chromium` and `pip install playwright` (never `playwright
install`: the browser comes from Debian). Without them these tests skip, except under
CI=true, where that is a failure.
"""

from __future__ import annotations

import contextlib
import http.server
import json
import math
import os
import re
import shutil
import signal
import socket
import subprocess
import sys
import tempfile
import threading
import time
import urllib.error
import urllib.request
from pathlib import Path

import pytest

from conftest import REPO, write_tone
from fieldmix.oscwire import decode_packet, encode_message

IN_CI = os.environ.get("CI", "").lower() in ("1", "true", "yes")
CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
ARGS = ["--no-sandbox", "--disable-gpu", "--disable-background-networking", "--disable-component-update", "--disable-sync"]
WAIT_MS = 15000


def _require_browser():
    problems = []
    if CHROMIUM is None:
        problems.append("chromium not installed (apt package chromium)")
    try:
        import playwright.sync_api  # noqa: F401
    except ImportError:
        problems.append("Python package playwright not installed (pip install playwright)")
    if problems:
        if IN_CI:
            pytest.fail("required under CI=true: " + "; ".join(problems))
        pytest.skip("; ".join(problems))


@pytest.fixture(scope="module")
def browser():
    _require_browser()
    from playwright.sync_api import sync_playwright

    with sync_playwright() as pw:
        b = pw.chromium.launch(executable_path=CHROMIUM, args=ARGS, headless=True)
        try:
            yield b
        finally:
            b.close()


# ----------------------------------------------------------------------------- the daemon
class Daemon:
    """``python -m fieldmix <args>`` as a subprocess; finds the page URL and the OSC port in what it prints."""

    def __init__(self, args: list, tmp: Path, cwd: Path | None = None, python: str = sys.executable, env: dict | None = None):
        env = dict(os.environ if env is None else env)
        env.setdefault("PYTHONUNBUFFERED", "1")
        self.log = open(tmp / f"daemon-{time.monotonic_ns()}.log", "w+")
        self.proc = subprocess.Popen([python, "-m", "fieldmix", *args], env=env, cwd=cwd, stdout=subprocess.PIPE,
                                     stderr=self.log, text=True)  # fmt: skip
        self.lines: list[str] = []
        self.url = self.udp = None
        deadline = time.monotonic() + 90
        while time.monotonic() < deadline and (self.url is None or self.udp is None):
            line = self.proc.stdout.readline()
            if not line:
                break
            self.lines.append(line)
            if m := re.search(r"page\s*: (http://127\.0\.0\.1:\d+/\S*)", line):
                self.url = m.group(1)
            if m := re.search(r"OSC\s*: 127\.0\.0\.1 udp (\d+)", line):
                self.udp = int(m.group(1))
        if self.url is None or self.udp is None:
            self.log.flush()
            self.log.seek(0)
            err = self.log.read()[-3000:]
            self.stop()
            raise AssertionError("daemon did not start:\n" + "".join(self.lines) + err)
        self.port = int(re.search(r":(\d+)/", self.url).group(1))
        self.base = f"http://127.0.0.1:{self.port}"
        self.token = None
        if m := re.search(r"[?&]token=([^&\s]+)", self.url):
            self.token = m.group(1)

    def api(self, path: str, token: str | None = "default"):
        req = urllib.request.Request(self.base + path)
        tok = self.token if token == "default" else token
        if tok:
            req.add_header("Authorization", f"Bearer {tok}")
        with urllib.request.urlopen(req, timeout=10) as r:
            return json.loads(r.read())

    def state(self) -> dict:
        return self.api("/api/state")

    def source(self, sid: str) -> dict:
        return next(s for s in self.state()["sources"] if s["id"] == sid)

    def wait(self, pred, timeout=15.0, what="condition"):
        deadline = time.monotonic() + timeout
        st = None
        while time.monotonic() < deadline:
            st = self.state()
            if pred(st):
                return st
            time.sleep(0.05)
        raise AssertionError(f"{what} not met; last state: {json.dumps(st)[:1500]}")

    def alive(self) -> bool:
        return self.proc.poll() is None

    def stop(self):
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
            try:
                self.proc.wait(15)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(5)
        if self.proc.stdout:
            self.proc.stdout.close()
        self.log.close()
        return self.proc.returncode


def _demo(tmp: Path, *extra: str) -> Daemon:
    return Daemon(["demo", "--still", "--fresh", "--osc-port", "0", "--http-port", "0", "--no-advertise",
                   "--state", str(tmp / "state.json"), *extra], tmp)  # fmt: skip


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("demo")
    d = _demo(tmp)
    try:
        yield d
    finally:
        d.stop()


def _open(browser, url: str, **ctx):
    # Playwright evaluates its own string predicates with eval, which the page's CSP forbids
    # (script-src 'self'): the test context lets Playwright's probes through; the header
    # itself is checked in test_web_api.py and below
    context = browser.new_context(bypass_csp=True, **ctx)
    page = context.new_page()
    errors: list[str] = []
    page.on("pageerror", lambda e: errors.append(str(e)))
    page.goto(url)
    page.wait_for_function("window.fieldmixPage && window.fieldmixPage.state !== null", timeout=WAIT_MS)
    page.errors = errors  # JS exceptions: every test checks there were none
    return page


def _close(page):
    errs = list(page.errors)
    page.context.close()
    assert not errs, errs


def _page_metres(page, selector: str) -> dict:
    """Screen centre of each element -> plan metres (x right, y front), through the SVG's own
    screen transform (getScreenCTM: viewBox, scaling and letterboxing included)."""
    return page.evaluate(
        """(sel) => {
        const svg = document.getElementById('plan');
        const inv = svg.getScreenCTM().inverse(), vb = svg.viewBox.baseVal;
        const out = {};
        for (const g of svg.querySelectorAll(sel)) {
          const shape = g.querySelector('rect, polygon, circle');
          const r = shape.getBoundingClientRect();
          const pt = new DOMPoint((r.left + r.right) / 2, (r.top + r.bottom) / 2).matrixTransform(inv);
          out[g.dataset.id] = [pt.x, -pt.y, vb.width];
        }
        return out;
    }""",
        selector,
    )


def _screen_of(page, x: float, y: float) -> tuple[float, float]:
    return tuple(page.evaluate(
        """([x, y]) => {
        const pt = new DOMPoint(x, -y).matrixTransform(document.getElementById('plan').getScreenCTM());
        return [pt.x, pt.y];
    }""",
        [x, y],
    ))  # fmt: skip


# ----------------------------------------------------------------------------- OSC subscriber
class Subscriber:
    def __init__(self, port: int):
        self.sock = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
        self.sock.bind(("127.0.0.1", 0))
        self.sock.settimeout(0.2)
        self.port = port
        self.msgs: list = []
        self.sock.sendto(encode_message("/subscribe", []), ("127.0.0.1", port))

    def pump(self, seconds: float):
        deadline = time.monotonic() + seconds
        while time.monotonic() < deadline:
            try:
                data, _ = self.sock.recvfrom(65536)
            except socket.timeout:
                continue
            self.msgs += [(m.address, list(m.args)) for _, m in decode_packet(data)]

    def wait_for(self, pred, timeout=10.0):
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            hit = [m for m in self.msgs if pred(m)]
            if hit:
                return hit
            self.pump(0.2)
        raise AssertionError(f"no matching OSC message; got {self.msgs[-20:]}")

    def close(self):
        self.sock.sendto(encode_message("/unsubscribe", []), ("127.0.0.1", self.port))
        self.sock.close()


def _osc(port: int, address: str, *args):
    s = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    s.sendto(encode_message(address, list(args)), ("127.0.0.1", port))
    s.close()


# ============================================================================== tests
def test_plan_draws_every_speaker_and_source_in_place(browser, demo):
    st = demo.state()
    page = _open(browser, demo.url, viewport={"width": 1280, "height": 900})
    try:
        spk = st["layout"]["speakers"]
        page.wait_for_function(f"document.querySelectorAll('#plan g.spk').length === {len(spk)}", timeout=WAIT_MS)
        drawn = _page_metres(page, "g.spk")
        assert sorted(drawn) == sorted(s["id"] for s in spk)
        width = next(iter(drawn.values()))[2]
        for s in spk:  # every speaker where the layout puts it (within 1 % of the plan's width)
            x, y, _ = drawn[s["id"]]
            assert math.hypot(x - s["position"][0], y - s["position"][1]) < 0.01 * width, (s, drawn[s["id"]])
        # front at the top: the speaker at azimuth 0 is the highest on screen among the ring
        front = min((s for s in spk if not s["sub"]), key=lambda s: abs(s["azimuth"]))
        tops = page.evaluate("""() => Object.fromEntries([...document.querySelectorAll('#plan g.spk')].map(
            g => [g.dataset.id, g.getBoundingClientRect().top]))""")
        assert tops[front["id"]] == min(tops.values())
        # labels carry the speaker's id and output channel
        label = page.locator(f"#plan g.spk[data-id='{front['id']}'] text").all_text_contents()
        assert front["id"] in label and f"out {front['output']}" in " ".join(label)
        srcs = _page_metres(page, "g.src")
        assert sorted(srcs) == sorted(s["id"] for s in st["sources"])
        for s in st["sources"]:
            x, y, _ = srcs[s["id"]]
            assert math.hypot(x - s["position"][0], y - s["position"][1]) < 0.01 * width, (s, srcs[s["id"]])
        # a scale in metres and one strip, one output meter per speaker
        assert re.fullmatch(r"[\d.]+ m", page.locator("#plan g.scale text").text_content())
        assert page.locator(".strip").count() == len(st["sources"])
        assert page.locator("#outputs .out").count() == len(spk)
    finally:
        _close(page)


def test_a_3d_layout_draws_upper_speakers_distinctly(browser, demo):
    page = _open(browser, demo.url)
    try:
        page.select_option("#layout-select", "dome-4-5-0")
        page.click("#layout-load")
        st = demo.wait(lambda s: s["layout"]["file"].startswith("dome-4-5-0"), what="dome loaded")
        spk = st["layout"]["speakers"]
        up = [s for s in spk if not s["sub"] and s["elevation"] > 10]
        ear = [s for s in spk if not s["sub"] and -10 <= s["elevation"] <= 10]
        assert up and ear
        page.wait_for_function(f"document.querySelectorAll('#plan g.spk.up').length === {len(up)}", timeout=WAIT_MS)
        assert page.locator("#plan g.spk").count() == len(spk)
        assert page.locator("#plan g.spk.up polygon").count() == len(up)
        assert page.locator("#plan g.spk.ear rect").count() == len(ear)
        fill = page.evaluate("getComputedStyle(document.querySelector('#plan g.spk.up polygon')).fill")
        assert fill == "none"  # upper speakers are outlines; ear level is filled
        drawn = _page_metres(page, "g.spk")
        width = next(iter(drawn.values()))[2]
        for s in up:  # drawn at their horizontal projection
            x, y, _ = drawn[s["id"]]
            assert math.hypot(x - s["position"][0], y - s["position"][1]) < 0.01 * width
        assert page.locator("#outputs .out").count() == len(spk)
    finally:
        page.select_option("#layout-select", "ring8")
        page.click("#layout-load")
        demo.wait(lambda s: s["layout"]["file"].startswith("ring8"), what="ring8 back")
        _close(page)


def test_dragging_a_source_reaches_the_server_osc_and_a_second_page(browser, demo):
    sub = Subscriber(demo.udp)
    sub.wait_for(lambda m: m[0] == "/subscribed")
    page = _open(browser, demo.url, viewport={"width": 1280, "height": 900})
    other = _open(browser, demo.url, viewport={"width": 820, "height": 1180})
    try:
        before = demo.state()
        applied0 = before["status"]["messages"]["applied"].get("web", 0)
        buoy = demo.source("buoy")
        x0, y0 = _screen_of(page, buoy["position"][0], buoy["position"][1])
        target = (2.0, -1.0)
        x1, y1 = _screen_of(page, *target)
        page.mouse.move(x0, y0)
        page.mouse.down()
        steps = 30
        t0 = time.monotonic()
        for k in range(1, steps + 1):
            page.mouse.move(x0 + (x1 - x0) * k / steps, y0 + (y1 - y0) * k / steps)
            page.wait_for_timeout(15)
            if k == steps // 2:  # the sound follows while dragging, not only on release
                demo.wait(lambda s: math.hypot(*(a - b for a, b in zip(next(q for q in s["sources"] if q["id"] == "buoy")["position"][:2], buoy["position"][:2]))) > 0.3,  # noqa: E501
                          what="moved during the drag")  # fmt: skip
        page.mouse.up()
        took = time.monotonic() - t0
        st = demo.wait(lambda s: math.hypot(next(q for q in s["sources"] if q["id"] == "buoy")["position"][0] - target[0],
                                            next(q for q in s["sources"] if q["id"] == "buoy")["position"][1] - target[1]) < 0.1,
                       what="final position")  # fmt: skip
        b = next(q for q in st["sources"] if q["id"] == "buoy")
        assert b["position"][2] == pytest.approx(buoy["position"][2], abs=1e-6)  # a drag keeps the height
        # coalesced: at most one move per 40 ms (+ the final one), far fewer than pointer events
        moves = st["status"]["messages"]["applied"].get("web", 0) - applied0
        assert 2 <= moves <= took / 0.040 + 3, (moves, took)
        # an OSC subscriber hears the move
        hits = sub.wait_for(lambda m: m[0] == "/source/buoy/position" and abs(m[1][0] - b["position"][0]) < 1e-3)
        assert abs(hits[-1][1][1] - b["position"][1]) < 1e-3
        # the second page shows it, in its own plan
        other.wait_for_function(
            """([x, y]) => { const s = window.fieldmixPage.state.sources.find(s => s.id === 'buoy');
                 return Math.abs(s.position[0] - x) < 1e-3 && Math.abs(s.position[1] - y) < 1e-3; }""",
            arg=b["position"][:2], timeout=WAIT_MS)  # fmt: skip
        drawn = _page_metres(other, "g.src")
        assert math.hypot(drawn["buoy"][0] - b["position"][0], drawn["buoy"][1] - b["position"][1]) < 0.01 * drawn["buoy"][2]
    finally:
        sub.close()
        _close(page)
        _close(other)


def test_a_finger_drags_a_source_too(browser, demo):
    """Touch input (a tablet): Chromium's touch events, sent through the DevTools protocol,
    drive the same pointer handlers; the page must not scroll or zoom instead."""
    page = _open(browser, demo.url, viewport={"width": 820, "height": 1180}, has_touch=True, is_mobile=True)
    try:
        gulls = demo.source("gulls")
        x0, y0 = _screen_of(page, gulls["position"][0], gulls["position"][1])
        target = (-1.5, -2.0)
        x1, y1 = _screen_of(page, *target)
        cdp = page.context.new_cdp_session(page)
        cdp.send("Input.dispatchTouchEvent", {"type": "touchStart", "touchPoints": [{"x": x0, "y": y0}]})
        for k in range(1, 21):
            cdp.send("Input.dispatchTouchEvent", {"type": "touchMove", "touchPoints": [{"x": x0 + (x1 - x0) * k / 20, "y": y0 + (y1 - y0) * k / 20}]})
            page.wait_for_timeout(15)
        cdp.send("Input.dispatchTouchEvent", {"type": "touchEnd", "touchPoints": []})
        st = demo.wait(lambda s: math.hypot(next(q for q in s["sources"] if q["id"] == "gulls")["position"][0] - target[0],
                                            next(q for q in s["sources"] if q["id"] == "gulls")["position"][1] - target[1]) < 0.15,
                       what="touch drag")  # fmt: skip
        assert page.evaluate("window.scrollY") == 0  # the plan took the gesture, the page did not scroll
        assert next(q for q in st["sources"] if q["id"] == "gulls")["mute"] is False
    finally:
        _close(page)


def test_osc_changes_appear_on_the_page(browser, demo):
    page = _open(browser, demo.url)
    try:
        _osc(demo.udp, "/source/gulls/azimuth", 90.0)
        _osc(demo.udp, "/source/gulls/gain", -9.5)
        page.wait_for_function("""() => { const s = window.fieldmixPage.state.sources.find(s => s.id === 'gulls');
            return Math.abs(s.azimuth - 90) < 1e-6 && s.gain_db === -9.5; }""", timeout=WAIT_MS)
        strip = page.locator(".strip[data-id='gulls']")
        page.wait_for_function("document.querySelector(\".strip[data-id='gulls'] input.gain-num\").value === '-9.5'", timeout=WAIT_MS)
        label = page.locator("#plan g.src[data-id='gulls']").get_attribute("aria-label")
        assert "azimuth 90.0 degrees" in label
        assert strip.locator("input.gain-num").input_value() == "-9.5"
    finally:
        _close(page)


def test_selected_source_controls_and_exact_entry(browser, demo):
    page = _open(browser, demo.url)
    try:
        page.locator(".strip[data-id='waves'] button.name").click()
        assert "Surf" in page.locator("#sel-title").text_content()
        page.fill("#in-azimuth", "-120")
        page.press("#in-azimuth", "Enter")
        demo.wait(lambda s: abs(next(q for q in s["sources"] if q["id"] == "waves")["azimuth"] + 120) < 1e-6, what="azimuth")
        page.fill("#in-elevation", "20")
        page.press("#in-elevation", "Enter")
        page.fill("#in-distance", "4.5")
        page.press("#in-distance", "Enter")
        w = demo.wait(lambda s: abs(next(q for q in s["sources"] if q["id"] == "waves")["distance"] - 4.5) < 1e-6
                      and abs(next(q for q in s["sources"] if q["id"] == "waves")["elevation"] - 20) < 1e-6, what="el/dist")  # fmt: skip
        w = next(q for q in w["sources"] if q["id"] == "waves")
        assert w["azimuth"] == pytest.approx(-120, abs=1e-6)
        page.fill("#in-x", "1.25")
        page.press("#in-x", "Enter")
        demo.wait(lambda s: abs(next(q for q in s["sources"] if q["id"] == "waves")["position"][0] - 1.25) < 1e-6, what="x")
        # the spread slider streams as it moves; the keyboard drives it too
        page.focus("#sl-spread")
        page.keyboard.press("End")
        demo.wait(lambda s: next(q for q in s["sources"] if q["id"] == "waves")["spread"] == 360, what="spread")
        # a value the grammar refuses: an error shows, nothing changes
        before = demo.source("waves")
        page.fill("#in-elevation", "120")
        page.press("#in-elevation", "Enter")
        page.wait_for_selector("#toast.error", state="visible", timeout=WAIT_MS)
        assert "range" in page.locator("#toast").text_content()
        assert demo.source("waves") == before
        # arrow keys move a focused source
        page.focus("#plan g.src[data-id='waves']")
        page.keyboard.press("ArrowRight")
        demo.wait(lambda s: abs(next(q for q in s["sources"] if q["id"] == "waves")["position"][0] - 1.35) < 1e-6, what="arrow key")
    finally:
        _close(page)


def test_strip_gain_mute_solo_and_master(browser, demo):
    page = _open(browser, demo.url)
    try:
        strip = page.locator(".strip[data-id='engine']")
        strip.locator("input.gain-num").fill("-4.5")
        strip.locator("input.gain-num").press("Enter")
        demo.wait(lambda s: next(q for q in s["sources"] if q["id"] == "engine")["gain_db"] == -4.5, what="gain")
        strip.locator("button.mute").click()
        demo.wait(lambda s: next(q for q in s["sources"] if q["id"] == "engine")["mute"] is True, what="mute")
        page.wait_for_function("document.querySelector(\".strip[data-id='engine'] button.mute\").getAttribute('aria-pressed') === 'true'")
        strip.locator("button.mute").click()
        demo.wait(lambda s: next(q for q in s["sources"] if q["id"] == "engine")["mute"] is False, what="unmute")
        # solo: the banner names it and the other strips show as silenced
        page.locator(".strip[data-id='gulls'] button.solo").click()
        demo.wait(lambda s: next(q for q in s["sources"] if q["id"] == "gulls")["solo"] is True, what="solo")
        page.wait_for_selector("#banner-solo", state="visible", timeout=WAIT_MS)
        assert "Gulls" in page.locator("#solo-text").text_content()
        page.wait_for_function("document.querySelectorAll('.strip.silenced').length === 3", timeout=WAIT_MS)
        page.click("#solo-clear")
        demo.wait(lambda s: not any(q["solo"] for q in s["sources"]), what="solos cleared")
        page.wait_for_selector("#banner-solo", state="hidden", timeout=WAIT_MS)
        page.fill("#master-gain-num", "-10")
        page.press("#master-gain-num", "Enter")
        demo.wait(lambda s: s["master"]["gain_db"] == -10, what="master gain")
        page.click("#master-mute")
        demo.wait(lambda s: s["master"]["mute"] is True, what="master mute")
        page.click("#master-mute")
        demo.wait(lambda s: s["master"]["mute"] is False, what="master unmute")
    finally:
        _close(page)


def test_meters_move_and_panic_silences_until_a_deliberate_release(browser, demo):
    page = _open(browser, demo.url)
    try:
        hello = page.evaluate("window.fieldmixPage.state !== null")
        assert hello
        # meters move while the demo plays on the virtual device
        page.wait_for_function("""() => [...document.querySelectorAll('#outputs .meter')].some(m => Number(m.dataset.peak) > -60)""",
                               timeout=WAIT_MS)  # fmt: skip
        f0 = int(page.evaluate("document.body.dataset.meterFrame"))
        page.wait_for_function(f"Number(document.body.dataset.meterFrame) >= {f0 + 10}", timeout=WAIT_MS)
        assert page.locator(".meter-conv").first.text_content().count("dB FS") >= 2  # the convention is labelled
        # panic: one press
        page.click("#panic")
        page.wait_for_selector("#banner-panic", state="visible", timeout=WAIT_MS)
        assert demo.state()["master"]["panic"] is True
        # the engine's meters: every frame that starts after the panic block is silent
        frames = page.evaluate("""() => new Promise(resolve => {
            const S = window.fieldmixPage, got = [];
            const t = setInterval(() => {
              const m = S.meters;
              if (m && m.panic && (!got.length || got[got.length - 1].frame !== m.frame)) got.push(m);
              if (got.filter(m => m.first_block > m.panic_block).length >= 3) { clearInterval(t); resolve(got); }
            }, 10);
            setTimeout(() => { clearInterval(t); resolve(got); }, 10000);
          })""")
        after = [m for m in frames if m["first_block"] > m["panic_block"]]
        assert after and all(v <= -120.0 for m in after for v in m["out_peak"]), after[:2]
        assert after[0]["panic_block"] > 0
        # coming back needs two deliberate actions: "Release..." alone changes nothing
        page.click("#release-arm")
        page.wait_for_selector("#release-confirm", state="visible")
        page.wait_for_timeout(300)
        assert demo.state()["master"]["panic"] is True
        page.click("#release-confirm")
        demo.wait(lambda s: s["master"]["panic"] is False, what="released")
        page.wait_for_selector("#banner-panic", state="hidden", timeout=WAIT_MS)
        page.wait_for_function("""() => [...document.querySelectorAll('#outputs .meter')].some(m => Number(m.dataset.peak) > -60)""",
                               timeout=WAIT_MS)  # fmt: skip
        # an armed release that is not confirmed disarms itself
        page.click("#panic")
        demo.wait(lambda s: s["master"]["panic"] is True, what="panic again")
        page.click("#release-arm")
        page.wait_for_selector("#release-confirm", state="hidden", timeout=8000)
        assert demo.state()["master"]["panic"] is True
        page.click("#release-arm")
        page.click("#release-confirm")
        demo.wait(lambda s: s["master"]["panic"] is False, what="released again")
    finally:
        _close(page)


def test_the_cue_panel_fires_cues_and_shows_their_progress(browser, tmp_path):
    """The demo show's cue list on the page: GO fires the standby cue (the server's cue
    state and the source move), a fade shows its progress, a row puts its cue on standby,
    a cue with a motion starts it, Stop freezes."""
    d = _demo(tmp_path)
    page = None
    try:
        page = _open(browser, d.url)
        page.wait_for_selector("#cue-panel", state="visible", timeout=WAIT_MS)
        assert page.locator("#cue-list li").count() == 4
        assert page.locator("#cue-go").text_content().strip() == "GO 1"
        page.click("#cue-go")
        st = d.wait(lambda s: s["cues"]["current"] is not None and s["cues"]["current"]["label"] == "1", what="cue 1 fired")
        page.wait_for_selector("#cue-running .bar", timeout=WAIT_MS)  # its 4 s fade, with a progress bar
        page.wait_for_function("document.getElementById('cue-current').textContent.startsWith('1 Evening')", timeout=WAIT_MS)
        d.wait(lambda s: next(q for q in s["sources"] if q["id"] == "waves")["gain_db"] == pytest.approx(-6, abs=1e-6)
               and not s["cues"]["running"], what="cue 1 done", timeout=20)  # fmt: skip
        page.wait_for_function("document.querySelectorAll('#cue-running .bar').length === 0", timeout=WAIT_MS)
        # choose cue 2.5 on the list: it goes on standby; GO starts the gulls' orbit
        page.locator("#cue-list li[data-number='2.5']").click()
        d.wait(lambda s: s["cues"]["next"]["label"] == "2.5", what="standby 2.5")
        page.wait_for_function("document.getElementById('cue-go').textContent.trim() === 'GO 2.5'", timeout=WAIT_MS)
        page.click("#cue-go")
        d.wait(lambda s: s["cues"]["motions"].get("gulls") == "orbit", what="orbit running")
        a0 = d.source("gulls")["azimuth"]
        d.wait(lambda s: abs(next(q for q in s["sources"] if q["id"] == "gulls")["azimuth"] - a0) > 5, what="gulls moving")
        # GO 3 (a 6 s fade), then Stop freezes it part-way
        page.click("#cue-go")
        d.wait(lambda s: s["cues"]["running"], what="cue 3 fading")
        page.wait_for_timeout(1500)
        page.click("#cue-stop")
        st = d.wait(lambda s: not s["cues"]["running"], what="stopped")
        g = st["master"]["gain_db"]
        assert -12 < g < -6, g  # frozen part-way between -6 and -12
        time.sleep(0.5)
        assert d.state()["master"]["gain_db"] == pytest.approx(g, abs=1e-9)
    finally:
        if page is not None:
            _close(page)
        d.stop()


def test_status_line_shows_audio_and_traffic(browser, demo):
    page = _open(browser, demo.url)
    try:
        page.wait_for_function("document.getElementById('status-line').textContent.includes('48000 Hz')", timeout=WAIT_MS)
        text = page.locator("#status-line").text_content()
        for part in ("audio running", "virtual", "48000 Hz", "128 frames", "xruns", "DSP", "OSC", "client"):
            assert part in text, text
    finally:
        _close(page)


def _broken_layout_show(tmp: Path) -> Path:
    layouts = tmp / "layouts"
    shutil.copytree(REPO / "configs" / "layouts", layouts)
    write_tone(tmp / "tone.wav", seconds=1.0)
    show = {"name": "reload check", "layout": "layouts/stereo.json", "sources": [
        {"id": "a", "input": 1, "file": "tone.wav", "azimuth": 10},
        {"id": "b", "input": 2, "file": "tone.wav", "azimuth": -10}]}  # fmt: skip
    (tmp / "show.json").write_text(json.dumps(show))
    return tmp / "show.json"


def test_a_hot_reload_error_shows_and_stays_until_fixed(browser, tmp_path):
    show = _broken_layout_show(tmp_path)
    d = Daemon(["serve", str(show), "--virtual", "--fresh", "--osc-port", "0", "--http-port", "0", "--no-advertise",
                "--state", str(tmp_path / "state.json")], tmp_path)  # fmt: skip
    page = None
    try:
        page = _open(browser, d.url)
        lay = tmp_path / "layouts" / "stereo.json"
        good = lay.read_text()
        lay.write_text(good.replace('"azimuth": 30', '"azimuth": "thirty"'))
        page.wait_for_selector("#banner-layout", state="visible", timeout=WAIT_MS)
        assert "stereo.json" in page.locator("#layout-error-text").text_content()
        page.wait_for_timeout(1500)  # status frames come and go: the error stays
        assert page.locator("#banner-layout").is_visible()
        page.reload()  # a page opened later sees it too
        page.wait_for_selector("#banner-layout", state="visible", timeout=WAIT_MS)
        lay.write_text(good.replace('"azimuth": 30', '"azimuth": 35'))
        page.wait_for_selector("#banner-layout", state="hidden", timeout=WAIT_MS)
        assert any(abs(s["azimuth"] - 35) < 1e-6 for s in d.state()["layout"]["speakers"])
    finally:
        if page is not None:
            _close(page)
        d.stop()


def test_with_a_token_the_page_asks_once_and_the_websocket_refuses_without_it(browser, tmp_path):
    d = _demo(tmp_path, "--token", "backstage-7731")
    page = None
    try:
        base = d.base + "/"
        page = browser.new_context(bypass_csp=True).new_page()
        page.goto(base)
        page.wait_for_selector("#token-dialog[open]", timeout=WAIT_MS)
        # the websocket itself refuses a connection without the token (before any upgrade)
        refused = page.evaluate(f"""() => new Promise(r => {{ const ws = new WebSocket('ws://127.0.0.1:{d.port}/ws');
            ws.onopen = () => r('open'); ws.onerror = () => r('refused'); }})""")
        assert refused == "refused"
        with pytest.raises(urllib.error.HTTPError) as e:
            d.api("/api/state", token=None)
        assert e.value.code == 401
        page.fill("#token-input", "backstage-7731")
        page.click("#token-form button[type=submit]")
        page.wait_for_function("window.fieldmixPage.state !== null", timeout=WAIT_MS)
        page.locator(".strip[data-id='buoy'] button.mute").click()
        st = d.api("/api/state", token="backstage-7731")
        deadline = time.monotonic() + 10
        while not next(s for s in st["sources"] if s["id"] == "buoy")["mute"] and time.monotonic() < deadline:
            time.sleep(0.05)
            st = d.api("/api/state", token="backstage-7731")
        assert next(s for s in st["sources"] if s["id"] == "buoy")["mute"] is True
        page.context.close()
        # the token from the URL: taken once, then out of the address bar
        page = browser.new_context(bypass_csp=True).new_page()
        page.goto(base + "?token=backstage-7731")
        page.wait_for_function("window.fieldmixPage && window.fieldmixPage.state !== null", timeout=WAIT_MS)
        assert "token" not in page.url
        assert page.locator("#token-dialog[open]").count() == 0
        # another site's page cannot open the websocket, even with the token (Origin check)
        with _other_site() as other_url:
            page.goto(other_url)
            js = f"""() => new Promise(r => {{ const ws = new WebSocket('ws://127.0.0.1:{d.port}/ws?token=backstage-7731');
                ws.onopen = () => r('open'); ws.onerror = () => r('refused'); }})"""
            assert page.evaluate(js) == "refused"
    finally:
        if page is not None:
            page.context.close()
        d.stop()


@contextlib.contextmanager
def _other_site():
    """A page of another origin (another port on loopback), as a foreign site would be."""
    class H(http.server.BaseHTTPRequestHandler):
        def do_GET(self):
            body = b"<!doctype html><title>elsewhere</title><p>another site"
            self.send_response(200)
            self.send_header("Content-Type", "text/html")
            self.send_header("Content-Length", str(len(body)))
            self.end_headers()
            self.wfile.write(body)

        def log_message(self, *a):
            pass

    srv = http.server.ThreadingHTTPServer(("127.0.0.1", 0), H)
    t = threading.Thread(target=srv.serve_forever, daemon=True)
    t.start()
    try:
        yield f"http://127.0.0.1:{srv.server_address[1]}/"
    finally:
        srv.shutdown()
        srv.server_close()


def test_bad_websocket_input_from_the_browser_changes_nothing(browser, demo):
    page = _open(browser, demo.url)
    try:
        before = demo.state()
        replies = page.evaluate("""() => new Promise(resolve => {
            const ws = new WebSocket(location.origin.replace('http', 'ws') + '/ws' + (sessionStorage.getItem('fieldmix-token') ? '?token=' + sessionStorage.getItem('fieldmix-token') : ''));
            const errors = [];
            const sent = [
              '{not json', '[1, 2, 3]', '"a string"', 'NaN',
              JSON.stringify({type: 'control', id: 1, address: '/source/buoy/azimuth', args: ['NaN']}),
              JSON.stringify({type: 'control', id: 2, address: '/source/buoy/azimuth', args: 'thirty'}),
              JSON.stringify({type: 'move', id: 3, source: 'buoy', position: ['NaN', 1]}),
              JSON.stringify({type: 'move', id: 4, source: 'nobody', azimuth: 10}),
              JSON.stringify({type: 'move', id: 5, source: 'buoy', position: [1e400, 0]}).replace('null', '1e400'),
              JSON.stringify({type: 'control', id: 6, address: '/master/gain', args: [true]}),
              JSON.stringify({type: 'teleport', id: 7}),
              JSON.stringify({type: 'control', id: 8, address: '/source/buoy/gain', args: [6], extra: 1}),
              JSON.stringify({type: 'control', id: 9, address: '/source/buoy/gain', args: [-6], pad: 'x'.repeat(1024 * 1024)}),
            ];
            ws.onmessage = ev => {
              const m = JSON.parse(ev.data);
              const all = m.type === 'batch' ? m.messages : [m];
              for (const x of all) if (x.type === 'error') errors.push(x);
              if (errors.length >= sent.length) { ws.close(); resolve(errors); }
            };
            ws.onopen = () => sent.forEach(s => ws.send(s));
            setTimeout(() => resolve(errors), 10000);
          })""")
        reasons = [r["reason"] for r in replies]
        assert len(replies) == 13, reasons
        assert reasons.count("bad_json") == 3 and "too_large" in reasons and "unknown_type" in reasons, reasons
        assert "unknown_source" in reasons and "bad_message" in reasons and "bad_type" in reasons, reasons
        # a flood: refused beyond the rate limit, with replies, and the server stays up
        flood = page.evaluate("""() => new Promise(resolve => {
            const ws = new WebSocket(location.origin.replace('http', 'ws') + '/ws');
            let limited = 0, acks = 0;
            ws.onmessage = ev => { const m = JSON.parse(ev.data); for (const x of (m.type === 'batch' ? m.messages : [m])) {
                if (x.type === 'error' && x.reason === 'rate_limited') limited++; if (x.type === 'pong') acks++; } };
            ws.onopen = () => { for (let i = 0; i < 1500; i++) ws.send(JSON.stringify({type: 'ping', id: i})); };
            setTimeout(() => { ws.close(); resolve({limited, acks}); }, 3000);
          })""")
        assert flood["limited"] >= 1 and 0 < flood["acks"] < 1500, flood
        after = demo.state()
        assert after["sources"] == before["sources"] and after["master"] == before["master"]
        assert demo.alive()
    finally:
        _close(page)


def test_screenshots_at_tablet_and_phone_size(browser, demo):
    out = Path(os.environ.get("FIELDMIX_SCREENSHOTS") or tempfile.mkdtemp(prefix="fieldmix-screens-"))
    out.mkdir(parents=True, exist_ok=True)
    sizes = {"tablet": (820, 1180), "tablet-landscape": (1180, 820), "phone": (390, 844)}
    for name, (w, h) in sizes.items():
        page = _open(browser, demo.url, viewport={"width": w, "height": h}, device_scale_factor=2,
                     has_touch=name != "tablet-landscape", is_mobile=name == "phone")  # fmt: skip
        try:
            page.wait_for_function("""() => [...document.querySelectorAll('#outputs .meter')].some(m => Number(m.dataset.peak) > -60)""",
                                   timeout=WAIT_MS)  # fmt: skip
            # readable on a phone: nothing wider than the screen, the plan and panic on the first screen
            assert page.evaluate("document.documentElement.scrollWidth") <= w + 1
            panic = page.locator("#panic").bounding_box()
            assert panic["y"] + panic["height"] <= h and panic["width"] >= 44 and panic["height"] >= 44
            path = out / f"fieldmix-{name}.png"
            page.screenshot(path=str(path), full_page=True)
            assert path.stat().st_size > 20000 and path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
        finally:
            _close(page)
    print(f"\nscreenshots in {out}")


def test_every_control_has_an_accessible_name(browser, demo):
    page = _open(browser, demo.url)
    try:
        unnamed = page.evaluate("""() => [...document.querySelectorAll('button, input, select')].filter(e => {
            if (e.closest('[hidden]') || e.type === 'hidden') return false;
            const label = e.getAttribute('aria-label') || (e.labels && e.labels.length && e.labels[0].textContent.trim()) || e.textContent.trim();
            return !label; }).map(e => e.outerHTML.slice(0, 80))""")
        assert unnamed == []
    finally:
        _close(page)


def test_the_wheel_carries_the_page(tmp_path):
    """Build the wheel, install it into a fresh venv, start the server from there: GET / is the page."""
    _require_browser()  # (same CI group: needs nothing more, but shares the browser tests' set-up)
    import site
    import sysconfig

    wheels = tmp_path / "wheels"
    # an isolated build, as any user's: pip takes setuptools and wheel from the package index
    subprocess.run([sys.executable, "-m", "pip", "wheel", "--no-deps", "-q", "-w", str(wheels), str(REPO)],
                   check=True, timeout=600)  # fmt: skip
    whl = next(wheels.glob("fieldmix-*.whl"))
    venv = tmp_path / "venv"
    subprocess.run([sys.executable, "-m", "venv", "--without-pip", str(venv)], check=True, timeout=300)
    py = str(venv / "bin" / "python")
    # the dependencies (numpy, aiohttp, ...) come from this interpreter's site-packages, appended
    # after the venv's own, so the fieldmix that imports is the wheel's (checked below)
    purelib = subprocess.run([py, "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"],
                             capture_output=True, text=True, check=True).stdout.strip()  # fmt: skip
    deps = [p for p in dict.fromkeys(site.getsitepackages() + [sysconfig.get_paths()["purelib"]]) if Path(p).is_dir()]
    Path(purelib, "fieldmix-test-deps.pth").write_text("\n".join(deps) + "\n")
    subprocess.run([sys.executable, "-m", "pip", "install", "-q", "--no-deps", "--target", purelib, str(whl)], check=True, timeout=300)
    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH",)}
    where = subprocess.run([py, "-c", "import fieldmix, pathlib; print(pathlib.Path(fieldmix.__file__).resolve())"],
                           capture_output=True, text=True, cwd=tmp_path, env=env, check=True).stdout.strip()  # fmt: skip
    assert where.startswith(str(venv.resolve())), where  # the installed copy, not the repo
    d = Daemon(["demo", "--still", "--fresh", "--osc-port", "0", "--http-port", "0", "--no-advertise",
                "--state", str(tmp_path / "state.json")], tmp_path, cwd=tmp_path, python=py, env=env)  # fmt: skip
    try:
        with urllib.request.urlopen(d.base + "/", timeout=10) as r:
            html = r.read().decode()
            csp = r.headers.get("Content-Security-Policy", "")
        assert "<title>fieldmix</title>" in html and "/static/app.js" in html
        assert "default-src 'self'" in csp
        st = d.state()  # the example show travels in the wheel too, with its layouts
        assert st["show"] == "Harbour at dusk" and len(st["sources"]) == 4 and "ring8" in st["layouts"]
        for asset in ("app.js", "style.css"):
            with urllib.request.urlopen(f"{d.base}/static/{asset}", timeout=10) as r:
                assert r.status == 200 and len(r.read()) > 1000
    finally:
        d.stop()
