"""The whole daemon, end to end, over a real JACK dummy server.

``fieldmix serve`` runs as a subprocess on the server's ``system`` device (its JACK client
is named "fieldmix"). A second process, the ``probe`` client of fieldmix.audio.jackutil,
plays a 1 kHz sine into the daemon's input 1 and records the daemon's outputs 1 and 2;
the wiring is done with jack_connect / jack_disconnect and checked with ``jack_lsp -c``.
Control goes over a real UDP socket (OSC), state is read with GET /api/state.

How the recordings are measured: the gain envelope of each output is the output
demodulated at 1 kHz and averaged twice over one period (48 samples at 48 kHz: the first
average cancels the 2 kHz product of a constant gain, the second the ripple a gain ramp
leaves), divided by the tone's amplitude: a gain, sample by sample. Levels are medians of
it; the change is found and timed on the dB ratio of the two envelopes; a click is a jump
of the envelope between neighbouring samples, bounded by the slope of the engine's glide
ramp (and the same measure is shown to fail on a copy of the recording with the glide cut
out).

This VM's dummy driver skips cycles now and then (at 128 frames, with no load at all). A
skipped cycle loses or repeats a block on the way, which moves the tone's phase (a gain
change never does): such stretches are found by phase, must be matched by an xrun that the
daemon or the probe counted, and are left out; a move whose recording lost a block between
the send and the end of the change is tried again (up to 5 times).

Every wait is bounded. The times printed (send-to-change latency, device-loss detection
and recovery, exit time) are figures to read, not speed checks; the only durations
asserted are sample counts of the audio itself (the change takes no more than two blocks
plus the glide time; the exit fade no more than 200 ms), and loose sanity bounds on waits.
"""

from __future__ import annotations

import json
import math
import os
import queue
import signal
import socket
import subprocess
import sys
import threading
import time
import urllib.request

import numpy as np
import pytest
import soundfile as sf

from conftest import REPO, write_files
from jack_fixture import jack_server, jack_server_private  # noqa: F401  (fixtures)
from fieldmix.audio.jackutil import Probe
from fieldmix.oscwire import encode_message

SR = 48000
BLOCK = 128
GLIDE_MS = 30.0
GLIDE = int(round(GLIDE_MS * SR / 1000.0))  # 1440 samples
FREQ = 1000.0
PERIOD = int(SR / FREQ)  # 48 samples: one period of the tone
AMP = 0.5  # probe sine amplitude (the daemon's input level)
BASE_DEG = 30.0  # the pair at +-30 degrees
CLIENT = "fieldmix"  # the daemon's JACK client name (PaJack_SetClientName in the audio child)
START_FADE_IN_S = 1.0  # the engine's default fade-in at first start (fieldmix.engine)
WAIT = 30.0


def _db(x) -> float:
    return 20.0 * math.log10(max(float(x), 1e-12))


def tangent_law_ratio_db(az_deg: float, base_deg: float = BASE_DEG) -> float:
    """Level ratio left/right of a symmetric pair for a source at ``az_deg``.

    Tangent law (Bennett, Barker & Edeko 1985; Pulkki 1997, 2-D VBAP):
    (gL - gR) / (gL + gR) = tan(az) / tan(base), so gL / gR = (1 + t) / (1 - t)."""
    t = math.tan(math.radians(az_deg)) / math.tan(math.radians(base_deg))
    return _db((1.0 + t) / (1.0 - t))


def tangent_law_gains(az_deg: float, base_deg: float = BASE_DEG) -> tuple[float, float]:
    """Power-normalised (gL^2 + gR^2 = 1, as VBAP normalises; Pulkki 1997) tangent-law gains."""
    t = math.tan(math.radians(az_deg)) / math.tan(math.radians(base_deg))
    gl, gr = 1.0 + t, 1.0 - t
    n = math.hypot(gl, gr)
    return gl / n, gr / n


# ============================================================== the daemon under test
class Served:
    """``python -m fieldmix serve SHOW ...`` in a subprocess; its ports read from the banner."""

    def __init__(self, srv, show, state_file, log_path, timeout: float = 60.0):
        self.log_path = log_path
        env = srv.env()
        env["PYTHONPATH"] = str(REPO / "server") + (os.pathsep + env["PYTHONPATH"] if env.get("PYTHONPATH") else "")
        cmd = [
            sys.executable, "-m", "fieldmix", "serve", str(show), "--device", "system",
            "--samplerate", str(SR), "--blocksize", str(BLOCK), "--osc-port", "0", "--http-port", "0",
            "--state", str(state_file), "--fresh", "--no-advertise",
        ]  # fmt: skip
        self._log = open(log_path, "w", encoding="utf-8")
        self.proc = subprocess.Popen(cmd, env=env, stdin=subprocess.DEVNULL, stdout=subprocess.PIPE, stderr=self._log, text=True, bufsize=1)
        self.pid = self.proc.pid
        self._lines: queue.Queue = queue.Queue()
        threading.Thread(target=self._read_stdout, name="serve-stdout", daemon=True).start()
        self.banner: list[str] = []
        self.http_port = self.udp_port = None
        self.sock = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
        try:
            self._wait_banner(timeout)
        except BaseException:
            self.close()
            raise
        self.started_at = time.monotonic()  # audio runs by now: the banner follows the stream start

    def _wait_banner(self, timeout: float) -> None:
        deadline = time.monotonic() + timeout
        while self.udp_port is None:
            line = self._readline(deadline)
            self.banner.append(line)
            if line.strip().startswith("page") and "http://127.0.0.1:" in line:
                self.http_port = int(line.split("http://127.0.0.1:", 1)[1].split("/", 1)[0])
            elif line.strip().startswith("OSC") and " udp " in line:
                self.udp_port = int(line.split(" udp ", 1)[1].split(",", 1)[0])
        assert self.http_port, self.banner

    def _read_stdout(self) -> None:
        for line in self.proc.stdout:
            self._lines.put(line.rstrip("\n"))
        self._lines.put(None)

    def _readline(self, deadline: float) -> str:
        while True:
            try:
                line = self._lines.get(timeout=max(0.01, min(0.2, deadline - time.monotonic())))
            except queue.Empty:
                if time.monotonic() > deadline:
                    raise AssertionError(f"no banner from fieldmix serve in time: {self.banner}\n{self.log()}") from None
                continue
            if line is None:
                self.proc.wait(5.0)
                raise AssertionError(f"fieldmix serve exited with {self.proc.returncode} at start: {self.banner}\n{self.log()}")
            return line

    def log(self) -> str:
        try:
            self._log.flush()
            return self.log_path.read_text(encoding="utf-8")[-4000:]
        except OSError:
            return ""

    # ------------------------------------------------------------ control and state
    def send(self, address: str, *args) -> float:
        """One OSC message over UDP; returns the monotonic time just before the send."""
        data = encode_message(address, list(args))
        t = time.monotonic()
        self.sock.sendto(data, ("127.0.0.1", self.udp_port))
        return t

    def state(self, timeout: float = 3.0) -> dict:
        with urllib.request.urlopen(f"http://127.0.0.1:{self.http_port}/api/state", timeout=timeout) as r:
            assert r.status == 200
            return json.loads(r.read().decode("utf-8"))

    def wait_state(self, pred, timeout: float = WAIT, interval: float = 0.05) -> dict:
        """Poll GET /api/state until ``pred(state)``; every poll must be answered."""
        deadline = time.monotonic() + timeout
        st = None
        while True:
            st = self.state()
            if pred(st):
                return st
            if time.monotonic() > deadline:
                raise AssertionError(f"state not reached in {timeout:g} s: {json.dumps(st)[:3000]}\n{self.log()}")
            assert self.proc.poll() is None, f"the daemon exited ({self.proc.returncode})\n{self.log()}"
            time.sleep(interval)

    def assert_clean_log(self) -> None:
        text = self.log_path.read_text(encoding="utf-8")
        assert "Traceback" not in text and " ERROR " not in text, text[-4000:]

    def azimuth(self, st: dict, index: int = 0) -> float:
        return float(st["sources"][index]["azimuth"])

    # ------------------------------------------------------------ ending
    def terminate(self, timeout: float = 5.0) -> tuple[int, float]:
        t = time.monotonic()
        self.proc.send_signal(signal.SIGTERM)
        rc = self.proc.wait(timeout)
        return rc, time.monotonic() - t

    def close(self) -> None:
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
            try:
                self.proc.wait(5.0)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(5.0)
        for f in (self.sock, self._log):
            try:
                f.close()
            except Exception:
                pass


@pytest.fixture
def show_file(tmp_path):
    folder = tmp_path / "show"  # the layout's folder is watched: logs and recordings go elsewhere
    write_files(
        folder,
        {
            "pair.json": {
                "name": "pair",
                "panner": "vbap",
                "speakers": [
                    {"id": "L", "output": 1, "azimuth": BASE_DEG, "distance": 2},
                    {"id": "R", "output": 2, "azimuth": -BASE_DEG, "distance": 2},
                ],
            },
            "show.json": {
                "name": "live-e2e",
                "layout": "pair.json",
                "glide_ms": GLIDE_MS,
                "sources": [{"id": "tone", "input": 1, "azimuth": 0, "distance": 2}],
            },
        },
    )
    return folder / "show.json"


@pytest.fixture
def serve(tmp_path, show_file):
    """Start daemons (``serve(srv)``); every one is stopped at the end of the test."""
    started = []

    def start(srv, state_file=None):
        assert not srv.client_ports(CLIENT), f"a {CLIENT!r} JACK client is already there: {srv.ports()}"
        d = Served(srv, show_file, state_file or tmp_path / "state.json", tmp_path / f"serve-{len(started)}.log")
        started.append(d)
        return d

    yield start
    for d in started:
        d.close()


@pytest.fixture
def probes():
    made = []

    def start(srv, name):
        p = Probe(srv, name, freq=FREQ, amp=AMP, inputs=2)
        made.append(p)
        return p

    yield start
    for p in made:
        p.close()


def wire(srv, probe_name: str) -> None:
    """probe out_1 -> daemon input 1 (and nothing else there); daemon outputs 1, 2 -> probe inputs 1, 2."""
    srv.wait_for_ports(CLIENT, 3)  # in_1, out_1, out_2
    srv.wait_for_ports(probe_name, 3)
    d_in, d_out = srv.io_ports(CLIENT)
    p_in, p_out = srv.io_ports(probe_name)
    assert len(d_in) == 1 and len(d_out) == 2, srv.client_ports(CLIENT)
    srv.disconnect_all(d_in[0])  # PortAudio connected system:capture_1 there
    srv.connect(p_out[0], d_in[0])
    for k in range(2):
        srv.disconnect_all(p_in[k])  # and system:capture_N to the probe's inputs
        srv.connect(d_out[k], p_in[k])
    conns = srv.connections()
    assert conns[d_in[0]] == [p_out[0]], conns
    for k in range(2):
        assert conns[p_in[k]] == [d_out[k]], conns


# ============================================================== analysis
def _boxcar(z: np.ndarray) -> np.ndarray:
    c = np.concatenate([[0.0], np.cumsum(z)])
    return (c[PERIOD:] - c[:-PERIOD]) / PERIOD


def complex_envelope(y: np.ndarray) -> np.ndarray:
    """Complex gain envelope of a recorded channel carrying the AMP-amplitude 1 kHz tone.

    Demodulation at 1 kHz, then two one-period (48-sample) moving averages: the first
    cancels the 2 kHz product of a constant gain, the second the 2 kHz ripple a linear
    gain ramp leaves after the first. e[k] covers samples k .. k+94 (length len(y) - 94). A constant gain g
    reads exactly g, a linear ramp keeps its slope exactly, a step becomes an S of 95
    samples whose steepest slope is the step / 48. The angle is the tone's phase at the
    output, constant while the audio runs on without a gap (a gain change does not move it)."""
    y = np.asarray(y, dtype=np.float64)
    n = np.arange(len(y))
    return 2.0 * _boxcar(_boxcar(y * np.exp(-2j * np.pi * FREQ * n / SR))) / AMP


def envelope(y: np.ndarray) -> np.ndarray:
    return np.abs(complex_envelope(y))


def discontinuities(y: np.ndarray, tol_deg: float = 1.0) -> np.ndarray:
    """Envelope indices where the tone's phase left its usual value: a block lost or
    repeated on the way (a JACK cycle skipped by the dummy driver), which no gain change
    can produce. Only where the tone is there (gain above 0.05)."""
    bad = np.zeros(len(y) - 2 * PERIOD + 2, dtype=bool)
    for ch in range(y.shape[1]):
        z = complex_envelope(y[:, ch])
        live = np.abs(z) > 0.05
        if not live.any():
            continue
        ref = np.angle(np.median(z[live] / np.abs(z[live])))  # the usual phase
        dev = np.degrees(np.abs(np.angle(z * np.exp(-1j * ref))))
        bad |= live & (dev > tol_deg)
    return np.flatnonzero(bad)


def clean_mask(y: np.ndarray) -> np.ndarray:
    """True where the envelope is free of :func:`discontinuities` (2 periods of margin)."""
    ok = np.ones(len(y) - 2 * PERIOD + 2, dtype=bool)
    for g in discontinuities(y):
        ok[max(0, g - 2 * PERIOD) : g + 2 * PERIOD] = False
    return ok


def max_step(e: np.ndarray, ok=None) -> float:
    """The largest sample-to-sample change of a gain envelope (over the ``ok`` part)."""
    d = np.abs(np.diff(e))
    if ok is not None:
        d = d[ok[1:] & ok[:-1]]
    return float(d.max())


def ratio_db(eL: np.ndarray, eR: np.ndarray) -> np.ndarray:
    return 20.0 * np.log10(np.maximum(eL, 1e-9) / np.maximum(eR, 1e-9))


def find_change(r: np.ndarray, ok: np.ndarray, pre: slice, post: slice, tol_db: float = 0.05):
    """(first index off the level before, first index from which it stays at the level
    after, level before, level after), over the clean (``ok``) part of the ratio ``r``."""
    r0, r1 = float(np.median(r[pre][ok[pre]])), float(np.median(r[post][ok[post]]))
    off = np.flatnonzero(ok & (np.abs(r - r0) > tol_db))
    assert off.size, f"the ratio never left {r0:.3f} dB"
    away = np.flatnonzero(ok & (np.abs(r - r1) > tol_db))
    return int(off[0]), int(away[-1]) + 1, r0, r1


def stepped_copy(y: np.ndarray, start: int, end: int) -> np.ndarray:
    """The recording with the glide cut out: the samples before the change joined to those
    after it (a whole number of tone periods later, so the phase runs on): an instant step."""
    shift = int(math.ceil((end + 2 * PERIOD - start) / PERIOD)) * PERIOD
    return np.concatenate([y[:start], y[start + shift :]])


def record(probe, path, seconds: float) -> tuple[np.ndarray, dict]:
    probe.start_record(seconds, path)
    info = probe.finish_record(timeout=10.0)
    y, sr = sf.read(str(path), always_2d=True)
    assert sr == SR and y.shape == (int(round(seconds * SR)), 2)
    return y, info


def levels(y: np.ndarray) -> tuple[float, float]:
    """Median gains of outputs 1 and 2, in dB re the input tone."""
    return _db(np.median(envelope(y[:, 0]))), _db(np.median(envelope(y[:, 1])))


def saved_azimuth(state_file) -> float:
    """The source's azimuth in a state file (fieldmix-state/1 keeps positions as x, y, z)."""
    saved = json.loads(state_file.read_text(encoding="utf-8"))
    assert saved.get("format") == "fieldmix-state/1", saved
    src = {s["id"]: s for s in saved["sources"]}["tone"]
    x, y, z = src["position"]
    assert abs(z) < 1e-9, src
    return math.degrees(math.atan2(-x, y))  # x right, y front, azimuth + = left (docs/osc.md)


def wait_past_fade_in(d: Served) -> None:
    left = d.started_at + START_FADE_IN_S + 0.3 - time.monotonic()
    if left > 0:
        time.sleep(left)


# ============================================================== the tests
def test_tone_levels_and_osc_move_follow_the_tangent_law(jack_server, serve, probes, tmp_path):
    srv = jack_server
    d = serve(srv)
    st = d.state()
    audio = st["status"]["audio"]
    assert audio["state"] == "running" and audio["samplerate"] == SR and audio["blocksize"] == BLOCK, audio
    assert d.azimuth(st) == 0.0
    pname = f"fmprobe-live-{os.getpid()}"
    probe = probes(srv, pname)
    wire(srv, pname)
    wait_past_fade_in(d)

    # --- azimuth 0: both outputs at -3.01 dB re the input (VBAP, Pulkki 1997: gL = gR = 1/sqrt 2)
    y0, _ = record(probe, tmp_path / "az0.wav", 0.4)
    l0, r0 = levels(y0)
    expect0 = _db(1 / math.sqrt(2))  # -3.0103 dB
    assert abs(l0 - expect0) < 0.1 and abs(r0 - expect0) < 0.1, (l0, r0)
    assert abs(l0 - r0) < 0.1, (l0, r0)

    # --- /source/1/azimuth 15 over UDP during a recording
    want_ratio = tangent_law_ratio_db(15.0)  # 8.730 dB
    gl1, gr1 = tangent_law_gains(15.0)
    g0 = 1 / math.sqrt(2)
    bound_l, bound_r = (1.5 * abs(g - g0) / max(GLIDE, BLOCK) for g in (gl1, gr1))
    attempts = []
    for attempt in range(5):
        if attempt:  # back to the start position, let it settle, try again
            d.send("/source/1/azimuth", 0.0)
            d.wait_state(lambda s: d.azimuth(s) == 0.0, timeout=5.0)
            time.sleep(0.15)
        x0 = d.state()["status"]["audio"]["xruns"]
        path = tmp_path / f"move-{attempt}.wav"
        probe.start_record(0.6, path)
        time.sleep(0.15)
        t_send = d.send("/source/1/azimuth", 15)  # an int: numbers are accepted as int or float
        info = probe.finish_record(timeout=10.0)
        x1 = d.state()["status"]["audio"]["xruns"]
        y, _ = sf.read(str(path), always_2d=True)
        ok = clean_mask(y)
        counted = x1 - x0 + info["flagged"] + (info["late_ms"] > BLOCK / SR * 1000.0)
        attempt_log = dict(lost=int((~ok).sum()), xruns=x1 - x0, flagged=info["flagged"], late_ms=info["late_ms"])
        attempts.append(attempt_log)
        # a block lost or repeated on the way (a cycle the dummy driver skipped) is left out;
        # the daemon or the probe must have counted it, else the daemon broke the audio itself
        assert ok.all() or counted, f"a discontinuity in the daemon's output with no xrun counted: {attempts}"
        eL, eR = envelope(y[:, 0]), envelope(y[:, 1])
        r = ratio_db(eL, eR)
        send_idx = int((t_send - info["t0"]) * SR)
        pre = slice(0, max(4 * PERIOD, send_idx - 2 * BLOCK))
        post = slice(len(r) - int(0.1 * SR), len(r))
        if ok[pre].sum() < 2 * PERIOD or ok[post].sum() < 0.05 * SR:
            continue
        start, end, ratio0, ratio1 = find_change(r, ok, pre, post)
        span = slice(max(0, min(start, send_idx) - 2 * BLOCK), end + 2 * BLOCK)
        if ok[span].all():  # nothing lost from the send to well past the change: measure it
            break
        attempt_log["in_change"] = True
    else:
        pytest.fail(f"every recording lost blocks across the change (dummy driver xruns): {attempts}")
    assert d.azimuth(d.state()) == 15.0

    # levels before and after (tangent law within 0.1 dB)
    assert abs(ratio0) < 0.1, ratio0
    assert abs(ratio1 - want_ratio) < 0.1, (ratio1, want_ratio)
    assert abs(_db(np.median(eL[post])) - _db(gl1)) < 0.1 and abs(_db(np.median(eR[post])) - _db(gr1)) < 0.1
    # the change completes within two blocks plus the glide time after it starts (audio samples)
    settle = end - start
    assert 0 < settle <= 2 * BLOCK + GLIDE, (start, end, settle)
    # and it starts after the send, promptly (a loose sanity bound; the figure is printed)
    latency_ms = ((start + PERIOD) / SR + info["t0"] - t_send) * 1000.0
    # (a block the probe lost before the change moves its timeline by a block: late_ms)
    assert -BLOCK / SR * 1000.0 - info["late_ms"] < latency_ms < 300.0, latency_ms
    # no click: the gain envelope moves no faster than the glide ramp would (1.5x margin)
    stepL, stepR = max_step(eL[span]), max_step(eR[span])
    assert stepL <= bound_l and stepR <= bound_r, (stepL, bound_l, stepR, bound_r)
    # nor anywhere else in the recording (lost blocks left out)
    assert max_step(eL, ok) <= bound_l and max_step(eR, ok) <= bound_r, (max_step(eL, ok), max_step(eR, ok))
    # the same measure catches a click: the recording with the glide cut out (an instant step)
    ys = stepped_copy(y, start, end)
    cut = slice(max(0, start - 2 * PERIOD), start + 3 * PERIOD)
    sL, sR = max_step(envelope(ys[:, 0])[cut]), max_step(envelope(ys[:, 1])[cut])
    assert sL > 3 * bound_l and sR > 3 * bound_r, (sL, bound_l, sR, bound_r)
    d.assert_clean_log()
    print(
        f"\nlive JACK p{BLOCK}: az 0 levels {l0 - expect0:+.4f} / {r0 - expect0:+.4f} dB off -3.01 dB; "
        f"az 15 ratio {ratio1:.4f} dB (tangent law {want_ratio:.4f}, error {ratio1 - want_ratio:+.4f} dB); "
        f"change {settle} samples = {settle / SR * 1000:.2f} ms (bound {(2 * BLOCK + GLIDE) / SR * 1000:.2f} ms); "
        f"send to first changed sample {latency_ms:.1f} ms (probe timeline late by {info['late_ms']:.1f} ms); envelope max step L {stepL:.2e} R {stepR:.2e} "
        f"(bound {bound_l:.2e} / {bound_r:.2e}; stepped copy {sL:.2e} / {sR:.2e}); attempts {attempts}"
    )


def test_jack_server_stop_and_restart_during_playback(jack_server_private, serve, probes, tmp_path):
    srv = jack_server_private
    d = serve(srv)
    d.send("/source/tone/azimuth", 15.0)
    d.wait_state(lambda s: d.azimuth(s) == 15.0, timeout=5.0)
    gl, gr = tangent_law_gains(15.0)
    p1 = probes(srv, f"fmprobe-loss-{os.getpid()}")
    wire(srv, p1.client)
    wait_past_fade_in(d)
    lb, rb = levels(record(p1, tmp_path / "before.wav", 0.3)[0])
    assert abs(lb - _db(gl)) < 0.1 and abs(rb - _db(gr)) < 0.1, (lb, rb)
    p1.close()  # its server is about to go

    audio_pid = d.state()["status"]["audio"]["pid"]
    t_stop = time.monotonic()
    srv.stop()  # SIGTERM to jackd, waits for it to exit
    stop_s = time.monotonic() - t_stop
    st = d.wait_state(lambda s: s["status"]["audio"]["state"] == "device_lost", timeout=15.0)
    lost_s = time.monotonic() - t_stop
    assert d.proc.poll() is None
    assert st["status"]["audio"]["device_losses"] == 1
    time.sleep(1.0)  # the daemon retries against no server for a while
    st = d.state()  # still answering, still lost, state intact
    assert st["status"]["audio"]["state"] == "device_lost" and d.azimuth(st) == 15.0

    srv.start(timeout=20.0)
    t_start = time.monotonic()
    st = d.wait_state(lambda s: s["status"]["audio"]["state"] == "running", timeout=WAIT)
    back_s = time.monotonic() - t_start
    assert d.proc.poll() is None and d.proc.pid == d.pid  # the same daemon
    audio = st["status"]["audio"]
    assert audio["pid"] != audio_pid and audio["restarts"] == 0 and audio["device_losses"] == 1, audio
    assert d.azimuth(st) == 15.0

    p2 = probes(srv, f"fmprobe-back-{os.getpid()}")
    wire(srv, p2.client)  # the fresh audio child is a new JACK client, wired by PortAudio again
    time.sleep(0.3)  # past the restart fade-in (250 ms, fieldmix.audio.link)
    la, ra = levels(record(p2, tmp_path / "after.wav", 0.3)[0])
    assert abs(la - _db(gl)) < 0.1 and abs(ra - _db(gr)) < 0.1, (la, ra)
    d.assert_clean_log()
    print(
        f"\ndevice loss: device_lost in /api/state {lost_s:.2f} s after the stop began (jackd took {stop_s:.2f} s to exit); running {back_s:.2f} s "
        f"after it was back; levels after {la - _db(gl):+.4f} / {ra - _db(gr):+.4f} dB off the tangent law; "
        f"recovery {audio.get('recovery_seconds')} s"
    )


def test_sigterm_fades_out_saves_the_state_and_exits_0(jack_server, serve, probes, tmp_path):
    srv = jack_server
    state_file = tmp_path / "state.json"
    d = serve(srv, state_file)
    probe = probes(srv, f"fmprobe-term-{os.getpid()}")
    wire(srv, probe.client)
    # the first move after a quiet spell is saved at once; the second is held by the
    # once-a-second autosave limit, so at SIGTERM only the exit save can write it
    wait_past_fade_in(d)
    d.send("/source/1/azimuth", -20.0)
    deadline = time.monotonic() + 5.0
    while not (state_file.exists() and abs(saved_azimuth(state_file) + 20.0) < 1e-6):
        assert time.monotonic() < deadline, "the first move was not autosaved"
        time.sleep(0.02)
    d.send("/source/1/azimuth", 25.0)
    d.wait_state(lambda s: d.azimuth(s) == 25.0, timeout=5.0)
    time.sleep(0.1)  # past the glide to the new position
    before = saved_azimuth(state_file)  # -20 unless the held autosave came first
    x0 = d.state()["status"]["audio"]["xruns"]
    path = tmp_path / "exit.wav"
    probe.start_record(0.8, path)
    time.sleep(0.2)
    rc, took = d.terminate(timeout=5.0)  # a bound on the wait; the time is printed
    info = probe.finish_record(timeout=10.0)
    assert rc == 0, d.log()
    assert abs(saved_azimuth(state_file) - 25.0) < 1e-6

    # the fade out: the output goes to silence as a ramp, not a step, and before the client goes
    y, _ = sf.read(str(path), always_2d=True)
    e = envelope(y[:, 0])
    ok = clean_mask(y)  # blocks the dummy driver lost: left out of the checks below
    gl = tangent_law_gains(25.0)[0]
    head = float(np.median(e[: int(0.1 * SR)]))
    assert abs(_db(head) - _db(gl)) < 0.1, (head, gl)
    quiet = np.flatnonzero(e < gl * 1e-3)  # 60 dB down
    assert quiet.size, "the output never went silent"
    falling = np.flatnonzero(ok & (e < head * 0.99))
    fade = (int(quiet[0]) - int(falling[0])) / SR
    assert e[int(quiet[0]) :].max() < gl * 1e-3  # and stays silent
    assert fade <= 0.2 + 2 * BLOCK / SR, fade  # the issue: fade out within 200 ms
    # no click: no faster than a 10 ms linear fade (common practice, no source: fades of
    # 10 ms and longer do not click); an abrupt stop (the stream closed mid-fade) falls
    # by the whole level in 48 samples, 10x faster
    bound = 1.5 * gl / (0.010 * SR)
    step = max_step(e, ok)
    assert step <= bound, (step, bound)
    d.assert_clean_log()
    print(
        f"\nSIGTERM: exit 0 after {took:.2f} s; fade {fade * 1000:.0f} ms, envelope max step {step:.2e} "
        f"(bound {bound:.2e}); azimuth 25 in the state file (before the signal it held {before:.1f}); "
        f"{int((~ok).sum())} samples left out for lost blocks (daemon xruns so far {x0}, probe flagged {info['flagged']})"
    )
