"""End to end through a real JACK dummy server and a real PortAudio duplex stream.

The audio child opens the server's ``system`` device under its own JACK client name. A
second process (the ``probe`` client of fieldmix.audio.jackutil, its own client name set
with PaJack_SetClientName) plays a 1 kHz sine into the child's input 1 and records the
child's outputs; the wiring is done with jack_connect / jack_disconnect and checked with
``jack_lsp -c``. The dummy driver on a loaded VM misses deadlines now and then, so levels
are the median over 10 ms windows (a glitch moves a few windows, not the median).
Every wait is bounded; nothing here asserts a speed.
"""

from __future__ import annotations

import math
import os
import signal
import subprocess
import sys
import time

import numpy as np
import pytest
import soundfile as sf

from conftest import REPO, write_files, write_tone
from jack_fixture import jack_server, jack_server_private  # noqa: F401  (fixtures)
from fieldmix.audio.jackutil import Probe
from fieldmix.audio.link import AudioLink
from fieldmix.errors import FieldmixError
from fieldmix.show import load_show
from fieldmix.state import ShowState

AMP = 0.5  # probe sine amplitude
WAIT = 30.0


def _db(x):
    return 20 * math.log10(max(float(x), 1e-12))


@pytest.fixture
def show_state(tmp_path):
    write_files(
        tmp_path,
        {
            "pair.json": {
                "name": "pair",
                "panner": "vbap",
                "speakers": [
                    {"id": "L", "output": 1, "azimuth": 30, "distance": 2},
                    {"id": "R", "output": 2, "azimuth": -30, "distance": 2},
                ],
            },
            "show.json": {"layout": "pair.json", "sources": [{"id": "mic", "input": 1, "file": "tone.wav", "azimuth": 0, "distance": 2}]},
        },
    )
    write_tone(tmp_path / "tone.wav", seconds=0.5)  # not used by the device backend
    return ShowState(load_show(tmp_path / "show.json"))


def _start_link(state, name, **kw):
    kw.setdefault("engine_options", {"fade_in_ms": 50.0})
    lk = AudioLink(state, backend="device", device="system", samplerate=48000, blocksize=128, client_name=name, **kw)
    lk.start()
    return lk


def _client_ports(srv, client):
    """(input ports, output ports) of a PortAudio JACK client, in channel order.

    PortAudio numbers ports with a counter that runs on across the streams of a process
    (after a reopen: in_1, out_2 ...), so ports are found, not guessed."""
    def num(p):
        return int(p.rsplit("_", 1)[1])

    ports = srv.client_ports(client)
    ins = sorted((p for p in ports if ":in_" in p), key=num)
    outs = sorted((p for p in ports if ":out_" in p), key=num)
    return ins, outs


def _wire(srv, client, probe, outs=(0, 1)):
    """probe out -> client input 1; client output channel outs[k] -> probe in k; nothing else on those ports."""
    srv.wait_for_ports(client, 1 + max(outs) + 1)
    c_in, c_out = _client_ports(srv, client)
    p_in, p_out = _client_ports(srv, probe)
    srv.disconnect_all(c_in[0])  # PortAudio wired system:capture_1 there
    srv.disconnect_all(p_out[0])
    srv.connect(p_out[0], c_in[0])
    for k, o in enumerate(outs):
        srv.disconnect_all(p_in[k])
        srv.connect(c_out[o], p_in[k])
    conns = srv.connections()
    assert conns[c_in[0]] == [p_out[0]], conns
    for k, o in enumerate(outs):
        assert conns[p_in[k]] == [c_out[o]], conns


def _wait_frames(lk, pred, frames=4):
    first = {}

    def ok(l):
        m = l.meters()
        if not m["valid"]:
            return False
        if "f" not in first:
            if pred(m):
                first["f"] = m["frame"]
            return False
        return m["frame"] >= first["f"] + frames

    assert lk.wait_for(ok, WAIT, 0.02), lk.status()
    return lk.meters()


def _median_rms_db(x, win=480):
    n = len(x) // win
    w = x[: n * win].reshape(n, win).astype(np.float64)
    return _db(np.median(np.sqrt(np.mean(w**2, axis=1))))


def _check_recorded_levels(probe, path, gains):
    probe.record(0.5, path)
    y, sr = sf.read(str(path), always_2d=True)
    assert sr == 48000 and y.shape == (24000, len(gains))
    ref = _db(AMP / math.sqrt(2))
    for k, g in enumerate(gains):
        measured = _median_rms_db(y[:, k]) - ref
        assert abs(measured - _db(g)) < 0.1, (k, measured, _db(g))


def test_levels_through_jack_follow_pushed_gains(jack_server, show_state, tmp_path):
    srv = jack_server
    client, pname = f"fmx-{os.getpid()}", f"fmprobe-{os.getpid()}"
    lk = _start_link(show_state, client)
    probe = None
    try:
        assert lk.status()["device"] == "system"
        probe = Probe(srv, pname, freq=1000.0, amp=AMP, inputs=2)
        _wire(srv, client, pname)  # our own client name: the ports exist under it
        for gains in ((0.5, 0.25), (0.2, 0.7)):
            v = lk.push_targets(np.array([gains], np.float32))
            m = _wait_frames(lk, lambda m: m["targets_applied"] >= v and m["in_rms"][0] > 0.3)
            assert abs(_db(m["in_rms"][0]) - _db(AMP / math.sqrt(2))) < 0.1  # the tone arrives at input 1
            _check_recorded_levels(probe, tmp_path / f"rec-{gains[0]}.wav", gains)
        st = lk.status()
        assert st["state"] == "running" and st["callbacks_seen"] > 100
        assert st["callbacks_expected"] >= st["callbacks_seen"]
        print(f"\nJACK p128: callbacks {st['callbacks_seen']}/{st['callbacks_expected']}, flagged {st['xruns_flagged']}, "
              f"DSP load mean {st['dsp_load_mean']:.3f} max {st['dsp_load_max']:.3f}")
    finally:
        if probe:
            probe.close()
        assert lk.fade_out_and_stop()


def test_more_outputs_reopen_the_stream(jack_server, show_state, tmp_path):
    srv = jack_server
    client, pname = f"fmx-{os.getpid()}-r", f"fmprobe-{os.getpid()}-r"
    lk = _start_link(show_state, client)
    probe = None
    try:
        assert lk.status()["device_outputs"] == 2
        cfg = {"n_outputs": 4, "sub_outputs": (), "sub_trims_db": (), "crossover_hz": 80.0, "delays": [0] * 4, "outputs": (1, 2, 3, 4)}
        gains = (0.3, 0.6)
        gen = lk.send_layout(cfg, np.array([[0.0, 0.0, *gains]], np.float32))
        assert lk.wait_for(lambda l: any(e["event"] == "stream_reopened" for e in l.events), WAIT), lk.events
        assert lk.wait_for(lambda l: l.status()["device_outputs"] == 4 and l.status()["layout_applied"] >= gen, WAIT)
        assert len(_client_ports(srv, client)[1]) == 4
        probe = Probe(srv, pname, freq=1000.0, amp=AMP, inputs=2)
        _wire(srv, client, pname, outs=(2, 3))
        _wait_frames(lk, lambda m: m["layout_generation"] >= gen and m["in_rms"][0] > 0.3, frames=6)
        _check_recorded_levels(probe, tmp_path / "rec4.wav", gains)
        assert lk.status()["restarts"] == 0  # reopened inside the same child
    finally:
        if probe:
            probe.close()
        assert lk.fade_out_and_stop()


def test_device_output_with_the_show_files_as_inputs(jack_server, show_state, tmp_path):
    """The demo through a real interface: the sources' files feed the engine, the device only plays."""
    srv = jack_server
    client, pname = f"fmx-{os.getpid()}-f", f"fmprobe-{os.getpid()}-f"
    lk = _start_link(show_state, client, inputs="files")
    probe = None
    try:
        st = lk.status()
        assert st["inputs"] == "files" and st["device_inputs"] == 0
        assert not [p for p in srv.client_ports(client) if ":in_" in p]  # an output-only stream
        gains = (0.6, 0.3)
        v = lk.push_targets(np.array([gains], np.float32))
        probe = Probe(srv, pname, inputs=2)
        _, c_out = _client_ports(srv, client)
        p_in, _ = _client_ports(srv, pname)
        for k in range(2):
            srv.disconnect_all(p_in[k])
            srv.connect(c_out[k], p_in[k])
        _wait_frames(lk, lambda m: m["targets_applied"] >= v, frames=6)
        probe.record(0.5, tmp_path / "files.wav")
        y, _ = sf.read(str(tmp_path / "files.wav"), always_2d=True)
        ref = _db(0.25 / math.sqrt(2))  # the show's tone file (conftest.write_tone)
        for k, g in enumerate(gains):
            assert abs(_median_rms_db(y[:, k]) - ref - _db(g)) < 0.1
    finally:
        if probe:
            probe.close()
        assert lk.fade_out_and_stop()


def test_skipped_callbacks_are_counted(jack_server, show_state):
    """Freeze the audio child for 0.2 s: JACK runs on without it, and the child counts the
    callbacks it should have seen (no status flag need say so)."""
    lk = _start_link(show_state, f"fmx-{os.getpid()}-x")
    try:
        _wait_frames(lk, lambda m: True, frames=4)
        before = lk.status()
        os.kill(lk.pid, signal.SIGSTOP)
        time.sleep(0.2)
        os.kill(lk.pid, signal.SIGCONT)
        _wait_frames(lk, lambda m: True, frames=4)
        after = lk.status()
        if after["restarts"] == 0 and after["device_losses"] == 0:
            assert after["callbacks_missed"] - before["callbacks_missed"] >= 30  # 0.2 s = 75 blocks of 128
        assert after["xruns"] > before["xruns"]
    finally:
        lk.fade_out_and_stop()


def test_jack_server_stop_and_restart_resumes_audio(jack_server_private, show_state, tmp_path):
    srv = jack_server_private
    client, pname = f"fmx-{os.getpid()}-l", f"fmprobe-{os.getpid()}-l"
    lk = _start_link(show_state, client)
    try:
        gains = (0.4, 0.1)
        v = lk.push_targets(np.array([gains], np.float32))
        _wait_frames(lk, lambda m: m["targets_applied"] >= v)
        pid = lk.pid
        srv.stop()
        t_stop = time.monotonic()
        assert lk.wait_for(lambda l: l.state == "device_lost", WAIT), lk.status()
        lost_after = time.monotonic() - t_stop
        assert "system" in (lk.status()["last_error"] or "")
        time.sleep(1.2)  # a retry or two finds no server
        srv.start(timeout=20.0)
        t_start = time.monotonic()
        assert lk.wait_for(lambda l: l.state == "running", WAIT), lk.status()
        back_after = time.monotonic() - t_start
        assert lk.pid != pid  # a fresh child found the device again
        f1 = _wait_frames(lk, lambda m: True, frames=1)["frame"]
        f2 = _wait_frames(lk, lambda m: m["frame"] > f1, frames=2)["frame"]
        assert f2 > f1  # meters moving
        st = lk.status()
        assert st["device_losses"] == 1 and st["restarts"] == 0
        # state intact: the gains pushed before the loss still shape the output
        probe = Probe(srv, pname, freq=1000.0, amp=AMP, inputs=2)
        try:
            _wire(srv, client, pname)
            _wait_frames(lk, lambda m: m["in_rms"][0] > 0.3, frames=4)
            _check_recorded_levels(probe, tmp_path / "after.wav", gains)
        finally:
            probe.close()
        print(f"\ndevice loss: reported {lost_after:.2f} s after jackd stopped; running {back_after:.2f} s after it restarted")
    finally:
        assert lk.fade_out_and_stop()


def test_parent_never_imports_sounddevice(jack_server, show_state):
    """A separate interpreter (this one may have imported anything) runs the device backend
    and the device listing, and reports whether sounddevice reached its own sys.modules."""
    code = f"""
import sys
sys.path.insert(0, {str(REPO / 'server')!r})
import numpy as np
from fieldmix.show import load_show
from fieldmix.state import ShowState
from fieldmix.audio.link import AudioLink
from fieldmix.audio.devices import list_devices, find_device, format_table, query
if __name__ == "__main__":
    st = ShowState(load_show({str(show_state.show.path)!r}))
    lk = AudioLink(st, backend="device", device="system", blocksize=128, client_name="fmx-sdcheck-{os.getpid()}").start()
    lk.push_targets(np.array([[0.5, 0.5]], np.float32))
    print("STATE", lk.status()["state"])
    d = find_device("system")
    print("SYSTEM", d["max_input_channels"], d["max_output_channels"], int(d["default_samplerate"]))
    print(format_table(query()))
    print("STOPPED", lk.fade_out_and_stop())
    print("IMPORTED", "sounddevice" in sys.modules)
"""
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120, env=jack_server.env())
    out = r.stdout
    assert r.returncode == 0, (out, r.stderr[-3000:])
    assert "STATE running" in out
    assert "SYSTEM 16 16 48000" in out
    assert "JACK Audio Connection Kit" in out
    assert "STOPPED True" in out
    assert "IMPORTED False" in out


def test_unknown_device_lists_the_candidates(jack_server, show_state):
    lk = AudioLink(show_state, backend="device", device="no-such-card", blocksize=128, client_name=f"fmx-{os.getpid()}-u")
    with pytest.raises(FieldmixError) as e:
        lk.start()
    assert "no-such-card" in str(e.value) and "system" in str(e.value)
    assert lk.state == "stopped"


def test_the_stream_follows_the_jack_period(jack_server, show_state):
    """Asked for 64 frames on a 128-frame JACK server: the stream runs at the server's
    period (no PortAudio buffering in between, so no extra period of latency), the status
    says 128 and a warning names both sizes."""
    lk = AudioLink(show_state, backend="device", device="system", samplerate=48000, blocksize=64,
                   client_name=f"fmx-{os.getpid()}-p", engine_options={"fade_in_ms": 50.0}).start()  # fmt: skip
    try:
        _wait_frames(lk, lambda m: True, frames=4)
        assert lk.wait_for(lambda l: any(e["event"] == "warning" for e in l.events), WAIT, 0.02), lk.events
        st = lk.status()
        assert st["blocksize"] == 128, st
        warn = [e["message"] for e in lk.events if e["event"] == "warning"]
        assert any("128 frames" in w and "64" in w for w in warn), warn
        # callbacks are expected at the server's period, not the one asked for
        assert st["callbacks_expected"] < 1.5 * st["callbacks_seen"] + 20, st
    finally:
        lk.fade_out_and_stop()


def test_the_stream_at_the_jack_period_warns_of_nothing(jack_server, show_state):
    lk = _start_link(show_state, f"fmx-{os.getpid()}-q")
    try:
        _wait_frames(lk, lambda m: True, frames=8)
        assert lk.status()["blocksize"] == 128
        assert not [e for e in lk.events if e["event"] == "warning"], lk.events
    finally:
        lk.fade_out_and_stop()
