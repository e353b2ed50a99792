"""AudioLink with the virtual backend: a real spawned audio child running the real engine
in real time on a source file, fed through real shared memory.

Every wait below is bounded (a generous safety timeout) and waits for an event or a meter
frame, never for wall-clock speed: how fast things happen is measured by the benchmark
script, not asserted here.
"""

from __future__ import annotations

import math
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf

from conftest import REPO, write_files, write_tone
from fieldmix.audio.devices import format_table, match_device
from fieldmix.audio.link import AudioLink, plain_layout
from fieldmix.errors import FieldmixError
from fieldmix.show import load_show
from fieldmix.state import ShowState

TONE_AMP = 0.25
TONE_RMS = TONE_AMP / math.sqrt(2)  # plain RMS of the sine
WAIT = 30.0  # safety bound for every wait (a loaded 2-core machine)


def _db(x):
    return 20 * math.log10(max(float(x), 1e-12))


def _pair(outputs=(1, 2)):
    return {
        "name": "pair",
        "panner": "vbap",
        "speakers": [
            {"id": "L", "output": outputs[0], "azimuth": 30, "distance": 2},
            {"id": "R", "output": outputs[1], "azimuth": -30, "distance": 2},
        ],
    }


@pytest.fixture
def show_state(tmp_path):
    write_files(
        tmp_path,
        {
            "pair.json": _pair(),
            "show.json": {"layout": "pair.json", "sources": [{"id": "tone", "input": 1, "file": "tone.wav", "azimuth": 0, "distance": 2}]},
        },
    )
    write_tone(tmp_path / "tone.wav", freq=750.0, seconds=2.0, amp=TONE_AMP)  # 64-sample period
    return ShowState(load_show(tmp_path / "show.json"))


def _link(state, **kw):
    kw.setdefault("engine_options", {"fade_in_ms": 50.0})
    kw.setdefault("blocksize", 128)
    return AudioLink(state, backend="virtual", **kw)


@pytest.fixture
def link(show_state):
    lk = _link(show_state)
    lk.start()
    yield lk
    lk.fade_out_and_stop()


def _frames_after(lk, pred=lambda m: True, frames=3, timeout=WAIT):
    """The meter frame that is ``frames`` frames newer than the first one satisfying ``pred``."""
    first = {}

    def ok(l):
        m = l.meters()
        if not m["valid"]:
            return False
        if "f" not in first:
            if pred(m):
                first["f"] = m["frame"]
            return False
        if m["frame"] >= first["f"] + frames:
            first["m"] = m
            return True
        return False

    assert lk.wait_for(ok, timeout, interval=0.02), f"no meter frame after the condition (state {lk.status()})"
    return first["m"]


def _levels_match(m, G, tol_db=0.1):
    for j, g in enumerate(G[0]):
        measured = _db(m["out_rms"][j]) - _db(m["in_rms"][0])
        assert abs(measured - _db(g)) < tol_db, (j, measured, _db(g), m)


# ------------------------------------------------------------------ meters follow targets
def test_output_rms_follows_pushed_gains(link):
    m0 = _frames_after(link)
    assert abs(_db(m0["in_rms"][0]) - _db(TONE_RMS)) < 0.05  # the source file is playing
    for G in (np.array([[0.5, 0.25]], np.float32), np.array([[0.1, 0.8]], np.float32)):
        v = link.push_targets(G)
        m = _frames_after(link, lambda m: m["targets_applied"] >= v, frames=4)  # 4 frames > glide
        _levels_match(m, G)
    st = link.status()
    assert st["state"] == "running" and st["callbacks_seen"] > 0 and st["restarts"] == 0
    assert st["callbacks_expected"] >= st["callbacks_seen"] - 1
    assert 0.0 < st["dsp_load_mean"] <= st["dsp_load_max"]


def test_panic_silences_within_one_block_and_releases(link):
    G = np.array([[0.5, 0.5]], np.float32)
    link.push_targets(G)
    _frames_after(link, lambda m: m["out_rms"][0] > 0.05)
    link.panic(True)
    m = _frames_after(link, lambda m: m["panic"], frames=0)
    panic_block = m["panic_block"]
    m = _frames_after(link, lambda m: m["first_block"] > panic_block, frames=0)
    assert m["first_block"] > panic_block
    assert max(m["out_peak"]) == 0.0  # every block after the one that took the flag is silent
    assert m["in_rms"][0] > 0.1  # the input still plays: it is the outputs that are muted
    link.panic(False)
    m = _frames_after(link, lambda m: not m["panic"], frames=8)
    _levels_match(m, G)


# ------------------------------------------------------------------ supervision
def test_killed_child_is_restarted_with_its_state(link):
    G = np.array([[0.3, 0.6]], np.float32)
    v = link.push_targets(G)
    _frames_after(link, lambda m: m["targets_applied"] >= v)
    old_pid = link.pid
    t_kill = time.monotonic()
    os.kill(old_pid, signal.SIGKILL)
    assert link.wait_for(lambda l: l.state == "running" and l.pid not in (None, old_pid), WAIT)
    m = _frames_after(link, lambda m: True, frames=8)  # past the restart fade-in
    restarted_in = time.monotonic() - t_kill
    _levels_match(m, G)  # targets intact
    st = link.status()
    assert st["restarts"] == 1
    assert len(st["recovery_seconds"]) == 1
    assert any(e["event"] == "child_exited" and e["code"] == -signal.SIGKILL for e in link.events)
    print(f"\nrestart after kill -9: audio with the old targets back after {restarted_in:.2f} s")


def test_stalled_child_is_killed_and_replaced(show_state):
    lk = _link(show_state, stall_timeout=1.0)
    lk.start()
    try:
        lk.panic(True)
        _frames_after(lk, lambda m: m["panic"], frames=1)
        pid = lk.pid
        os.kill(pid, signal.SIGSTOP)  # alive but silent: only the heartbeat can tell
        assert lk.wait_for(lambda l: l.pid not in (None, pid) and l.state == "running", WAIT)
        assert any(e["event"] == "child_stalled" for e in lk.events)
        m = _frames_after(lk, lambda m: True, frames=2)
        assert m["panic"] and max(m["out_peak"]) == 0.0  # the panic state survived the restart
    finally:
        try:
            os.kill(pid, signal.SIGKILL)
        except ProcessLookupError:
            pass
        lk.fade_out_and_stop()


def test_fade_out_and_stop_fades_then_frees_everything(show_state, tmp_path):
    rec = tmp_path / "rec.wav"
    lk = _link(show_state, record=str(rec))
    lk.start()
    G = np.array([[0.5, 0.25]], np.float32)
    v = lk.push_targets(G)
    _frames_after(lk, lambda m: m["targets_applied"] >= v, frames=12)
    seg_name = lk._shm.name
    proc = lk._proc
    assert lk.fade_out_and_stop() is True
    assert proc.exitcode == 0
    assert lk.state == "stopped"
    assert not Path("/dev/shm", seg_name).exists()
    y, sr = sf.read(str(rec), always_2d=True)
    assert y.shape[1] == 2 and sr == 48000
    tail = y[-int(0.002 * sr) :]
    assert np.abs(tail).max() == 0.0  # it ends in silence ...
    nz = np.flatnonzero(np.abs(y[:, 0]) > 0)[-1]  # the last sound
    body = y[nz - int(0.35 * sr) : nz - int(0.15 * sr)]  # before the fade (120 ms)
    for j, g in enumerate(G[0]):  # ... after the levels the targets asked for
        assert abs(_db(np.sqrt(np.mean(body[:, j] ** 2))) - _db(g * TONE_RMS)) < 0.1
    # and the end is a fade, not a cut: the last 100 ms before silence fall steadily
    env = [np.abs(y[nz - k * 480 - 480 : nz - k * 480, 0]).max() for k in range(8)][::-1]
    assert env[0] > 4 * env[-1]
    assert lk.fade_out_and_stop() is True  # idempotent


def test_child_never_leaks_segments_after_kill_and_stop(show_state):
    prefix = f"fmx_{os.getpid()}_"
    lk = _link(show_state)
    lk.start()
    os.kill(lk.pid, signal.SIGKILL)
    lk.wait_for(lambda l: l.state == "running" and l.pid is not None, WAIT)
    lk.fade_out_and_stop()
    assert not [p for p in os.listdir("/dev/shm") if p.startswith(prefix)]


# ------------------------------------------------------------------ layout changes
def test_layout_changes_crossfade_swap_and_grow(show_state, tmp_path):
    rec = tmp_path / "rec.wav"
    lk = _link(show_state, record=str(rec), shm_min_cols=2)
    lk.start()
    try:
        G = np.array([[0.5, 0.25]], np.float32)
        lk.push_targets(G)
        base = show_state.engine_layout(48000)
        # 1. same speakers, new delays: the running engine crossfades
        cfg = dict(base, delays=np.array([0, 48]))
        gen = lk.send_layout(cfg)
        assert lk.wait_for(lambda l: l.status()["layout_applied"] >= gen, WAIT)
        assert [e["mode"] for e in lk.events if e["event"] == "layout_applied"][-1] == "crossfade"
        m = _frames_after(lk, lambda m: m["layout_generation"] >= gen, frames=4)
        _levels_match(m, G)
        # 2. the speakers trade outputs: a new engine, crossfaded against the old one
        cfg = dict(base, outputs=(2, 1))
        gen = lk.send_layout(cfg)
        assert lk.wait_for(lambda l: l.status()["layout_applied"] >= gen, WAIT)
        assert [e["mode"] for e in lk.events if e["event"] == "layout_applied"][-1] == "engine_swap"
        _frames_after(lk, lambda m: m["layout_generation"] >= gen, frames=6)
        # 3. three speakers: more columns than the segment holds (a new segment) and more
        #    outputs than the virtual device had ("reopen")
        old_seg = lk._shm.name
        cfg3 = {"n_outputs": 3, "sub_outputs": (), "sub_trims_db": (), "crossover_hz": 80.0, "delays": [0, 0, 0], "outputs": (1, 2, 3)}
        G3 = np.array([[0.2, 0.4, 0.6]], np.float32)
        gen = lk.send_layout(cfg3, G3)
        assert lk._shm.name != old_seg
        assert lk.wait_for(lambda l: l.status()["layout_applied"] >= gen, WAIT)
        assert [e["mode"] for e in lk.events if e["event"] == "layout_applied"][-1] == "reopen"
        m = _frames_after(lk, lambda m: m["layout_generation"] >= gen and len(m["out_rms"]) == 3, frames=6)
        _levels_match(m, G3)
        assert lk.wait_for(lambda l: not Path("/dev/shm", old_seg).exists(), WAIT)  # freed after the child switched
        G3b = np.array([[0.7, 0.1, 0.3]], np.float32)
        v = lk.push_targets(G3b)  # targets now go through the new segment
        m = _frames_after(lk, lambda m: m["targets_applied"] >= v, frames=10)
        _levels_match(m, G3b)
        with pytest.raises(ValueError):
            lk.push_targets(G)  # the old shape is refused
        assert lk.status()["restarts"] == 0, [e for e in lk.events if e["event"] in ("error", "warning", "child_exited")]
    finally:
        proc = lk._proc
        clean = lk.fade_out_and_stop()
        assert clean, (proc.exitcode, lk.events[-6:])
    # the recording: 2 channels (the device it started with); at the end, after the swap,
    # speaker L (0.7) is on output 1 again and output 2 carries 0.1
    y, sr = sf.read(str(rec), always_2d=True)
    assert y.shape[1] == 2
    nz = np.flatnonzero(np.abs(y[:, 0]) > 0)[-1]
    body = y[nz - int(0.35 * sr) : nz - int(0.15 * sr)]  # before the stop's fade
    assert abs(_db(np.sqrt(np.mean(body[:, 0] ** 2))) - _db(0.7 * TONE_RMS)) < 0.1
    assert abs(_db(np.sqrt(np.mean(body[:, 1] ** 2))) - _db(0.1 * TONE_RMS)) < 0.1


def test_swapped_outputs_reach_the_right_channels_in_the_recording(tmp_path):
    write_files(
        tmp_path,
        {
            "pair.json": _pair(outputs=(3, 1)),
            "show.json": {"layout": "pair.json", "sources": [{"id": "tone", "input": 1, "file": "tone.wav"}]},
        },
    )
    write_tone(tmp_path / "tone.wav", freq=750.0, seconds=1.0, amp=TONE_AMP)
    st = ShowState(load_show(tmp_path / "show.json"))
    rec = tmp_path / "rec.wav"
    lk = _link(st, record=str(rec))
    lk.start()
    G = np.array([[0.6, 0.15]], np.float32)  # speaker L -> output 3, speaker R -> output 1
    v = lk.push_targets(G)
    _frames_after(lk, lambda m: m["targets_applied"] >= v, frames=10)
    assert lk.fade_out_and_stop()
    y, sr = sf.read(str(rec), always_2d=True)
    assert y.shape[1] == 3  # up to the highest output
    nz = np.flatnonzero(np.abs(y[:, 2]) > 0)[-1]
    body = y[nz - int(0.35 * sr) : nz - int(0.15 * sr)]
    rms = np.sqrt(np.mean(body**2, axis=0))
    assert abs(_db(rms[2]) - _db(0.6 * TONE_RMS)) < 0.1
    assert abs(_db(rms[0]) - _db(0.15 * TONE_RMS)) < 0.1
    assert rms[1] == 0.0  # output 2 carries no speaker


def test_glide_change_is_taken(link):
    link.set_glide_ms(400.0)  # a slow glide: a frame in the middle of it is between old and new
    G0 = np.array([[0.5, 0.5]], np.float32)
    v = link.push_targets(G0)
    _frames_after(link, lambda m: m["targets_applied"] >= v, frames=12)
    v = link.push_targets(np.array([[0.05, 0.5]], np.float32))
    m = _frames_after(link, lambda m: m["targets_applied"] >= v, frames=2)
    assert 0.06 < m["out_rms"][0] / m["in_rms"][0] < 0.45  # still ramping
    with pytest.raises(FieldmixError):
        link.set_glide_ms(float("nan"))


# ------------------------------------------------------------------ errors
def test_bad_inputs_are_refused_clearly(show_state, tmp_path):
    lk = _link(show_state)
    with pytest.raises(ValueError):
        lk.push_targets(np.zeros((1, 3), np.float32))
    with pytest.raises(ValueError):
        lk.push_targets(np.array([[np.nan, 0.0]], np.float32))
    with pytest.raises(ValueError):
        lk.push_targets(np.array([[1e9, 0.0]], np.float32))
    with pytest.raises(FieldmixError, match="blocksize"):
        AudioLink(show_state, blocksize=7)
    with pytest.raises(FieldmixError, match="samplerate"):
        AudioLink(show_state, samplerate=44100.5)
    with pytest.raises(FieldmixError, match="backend"):
        AudioLink(show_state, backend="cassette")
    with pytest.raises(FieldmixError, match="outputs"):
        plain_layout({"n_outputs": 2, "outputs": [1], "delays": [0, 0]})
    with pytest.raises(FieldmixError, match="1-based"):
        plain_layout({"n_outputs": 1, "outputs": [0], "delays": [0]})


def test_unreadable_source_file_fails_start_with_its_name(show_state, tmp_path):
    bad = tmp_path / "junk.wav"
    bad.write_bytes(b"this is not audio")
    lk = _link(show_state, source_files=[str(bad)])
    with pytest.raises(FieldmixError, match=r"sources\[0\]\.file"):
        lk.start()
    assert lk.state == "stopped"


def test_device_matching_rules():
    devs = [
        {"index": 0, "name": "system", "hostapi": "JACK", "max_input_channels": 16, "max_output_channels": 16, "default_samplerate": 48000.0},
        {"index": 1, "name": "PortAudio-01", "hostapi": "JACK", "max_input_channels": 2, "max_output_channels": 2, "default_samplerate": 48000.0},
        {"index": 2, "name": "USB Audio: system out", "hostapi": "ALSA", "max_input_channels": 0, "max_output_channels": 8, "default_samplerate": 44100.0},
    ]
    assert match_device(devs, "system")["index"] == 0  # an exact name beats a partial one
    assert match_device(devs, "SYSTEM")["index"] == 0
    assert match_device(devs, "usb")["index"] == 2
    assert match_device(devs, 1)["index"] == 1
    assert match_device(devs, "2")["index"] == 2
    assert match_device(devs, "sys", need_input=1)["index"] == 0  # the USB one has no inputs
    with pytest.raises(FieldmixError, match="ambiguous") as e:
        match_device(devs, "sys")
    assert "system" in str(e.value) and "USB Audio" in str(e.value)
    with pytest.raises(FieldmixError, match="no device name contains") as e:
        match_device(devs, "motu")
    assert "PortAudio-01" in str(e.value)
    with pytest.raises(FieldmixError, match="no device with that index"):
        match_device(devs, 9)
    with pytest.raises(FieldmixError, match="output channels needed"):
        match_device(devs, 1, need_output=4)
    table = format_table({"hostapis": [{"index": 0, "name": "JACK", "devices": [0, 1]}], "devices": devs})
    assert "system" in table and "USB Audio" in table and "44100" in table


def test_device_backend_without_that_device_fails_start_clearly(show_state):
    """PortAudio is initialised only in the child; a server name nobody runs means no JACK devices."""
    code = f"""
import os, sys
os.environ["JACK_DEFAULT_SERVER"] = "fmtest-nobody-{os.getpid()}"
os.environ["JACK_NO_START_SERVER"] = "1"
sys.path.insert(0, {str(REPO / 'server')!r})
from fieldmix.show import load_show
from fieldmix.state import ShowState
from fieldmix.audio.link import AudioLink
from fieldmix.errors import FieldmixError
if __name__ == "__main__":
    st = ShowState(load_show({str(show_state.show.path)!r}))
    try:
        AudioLink(st, backend="device", device="no-such-interface").start()
        print("STARTED")
    except FieldmixError as e:
        print("ERROR", e)
    print("IMPORTED", "sounddevice" in sys.modules)
"""
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    out = r.stdout
    assert "ERROR" in out, (out, r.stderr[-2000:])
    assert any(t in out for t in ("no-such-interface", "PortAudio is not installed", "sounddevice is not installed"))
    assert "IMPORTED False" in out


# ------------------------------------------------------------------ the child's block path, in process
def _child_in_process(tmp_path, n_in=8, blocksize=256, backend="virtual"):
    """An AudioChild built here (no spawn) on a real segment, to look at its block path."""
    import multiprocessing as mp

    from fieldmix.audio.child import AudioChild
    from fieldmix.audio.shm import AudioShm

    files = []
    for i in range(n_in):
        files.append(str(write_tone(tmp_path / f"t{i}.wav", freq=375.0 * (i + 1), seconds=0.5, amp=0.1)))
    seg = AudioShm.create(n_in, 64)
    G = np.full((n_in, 4), 0.1, np.float32)
    seg.write_targets(G)
    a, b = mp.Pipe()
    cfg = {
        "backend": backend, "shm_name": seg.name, "child_gen": 1, "n_inputs": n_in,
        "input_channels": list(range(n_in, 0, -1)), "source_files": files, "samplerate": 48000,
        "blocksize": blocksize, "glide_ms": 30.0, "meter_ms": 20.0, "engine_options": {"fade_in_ms": 10.0},
        "layout": {"n_outputs": 4, "sub_outputs": [], "sub_trims_db": None, "crossover_hz": 80.0,
                   "delays": [0, 10, 20, 0], "outputs": [4, 2, 3, 1]},
    }  # fmt: skip
    child = AudioChild(cfg, b)
    return child, seg, (a, b)


def _close_child(child, seg, conns):
    child._messenger_stop = True
    child._messenger.join(2)
    for c in conns:
        c.close()
    child.shm.close()
    seg.close()
    seg.unlink()
    assert not Path("/dev/shm", seg.name).exists()


@pytest.mark.parametrize("backend", ["virtual", "device"])
def test_block_path_allocates_no_arrays(tmp_path, backend):
    """The child's own per-block work allocates no arrays: over 600 blocks (target pushes,
    a panic and its release, torn reads, meter frames) the peak of traced memory per block
    stays far below the size of the smallest array the block handles. What happens inside
    ``Engine.process`` is the engine's own business (its tests); it is taken out here by
    resetting the peak right after the call."""
    import tracemalloc

    from fieldmix.audio import shm as S

    F, n_in = 1024, 8
    child, seg, conns = _child_in_process(tmp_path, n_in=n_in, blocksize=F, backend=backend)
    try:
        out = np.zeros((F, 4), np.float32)  # 16 KB: the smallest array of a block
        indata = np.random.default_rng(2).uniform(-0.1, 0.1, (F, n_in)).astype(np.float32)
        indata *= np.arange(1, n_in + 1, dtype=np.float32)  # a different level on every input
        if backend == "virtual":
            child._load_virtual_inputs()
            child.dev_out = 4
            child._vout = out
            blk = lambda: child._block(None, out)  # noqa: E731
        else:
            child._set_input_map(child.cfg["input_channels"])  # 8..1: the reordering path
            blk = lambda: child._block(indata, out)  # noqa: E731
        eng = child.slot.engine
        real = eng.process
        seen = {}

        def process(x):
            seen["pre"] = tracemalloc.get_traced_memory()[1]
            y = real(x)
            tracemalloc.reset_peak()
            return y

        eng.process = process
        G = [np.full((n_in, 4), g, np.float32) for g in (0.2, 0.05)]
        for _ in range(60):  # warm up: first frames, first ramp, views for this block size
            blk()
        child._messenger_stop = True  # only the block path runs while memory is traced
        child._messenger.join(2)
        worst = 0
        tracemalloc.start()
        try:
            for k in range(600):
                if k % 50 == 10:
                    seg.write_targets(G[(k // 50) % 2], check=False)
                if k == 300:
                    seg.write_panic(True)
                if k == 400:
                    seg.write_panic(False)
                if k == 450:
                    seg.ctl[S.C_SEQ] += 1  # a writer caught half way: torn reads for 5 blocks
                if k == 455:
                    seg.ctl[S.C_SEQ] += 1
                tracemalloc.reset_peak()
                c0 = tracemalloc.get_traced_memory()[0]
                seen["pre"] = 0
                blk()
                worst = max(worst, max(seen["pre"], tracemalloc.get_traced_memory()[1]) - c0)
        finally:
            tracemalloc.stop()
        assert child.blocks >= 660 and child._frame > 100  # it really ran, and published meters
        assert child.slot.reader.torn >= 5
        assert child.slot.reader.version == int(seg.ctl[S.C_VERSION])  # every push was taken
        # 8 KB: small Python objects only (seen up to 4.3 KB in a fresh venv); one block-sized
        # array (16 KB) would fail this
        assert worst < out.nbytes / 2, worst
        assert np.abs(out).max() > 0  # and it made sound (after the panic was released)
        if backend == "device":  # source i listens to device input 8 - i (input_channels 8..1)
            want = np.sqrt(np.mean(indata[:, ::-1].astype(np.float64) ** 2, axis=0))
            np.testing.assert_allclose(child.slot.engine.in_rms, want, rtol=1e-4)
    finally:
        _close_child(child, seg, conns)


def test_recorder_overflow_is_counted_not_waited_for(tmp_path):
    from fieldmix.audio.child import Recorder

    rec = Recorder(str(tmp_path / "r.wav"), 48000, 2, 128, seconds=0.01)  # the smallest ring: 8 slots
    block = np.ones((128, 3), np.float32) * 0.5  # one more channel than the file: dropped
    t0 = time.perf_counter()
    for _ in range(200):
        rec.push(block)
    pushed_in = time.perf_counter() - t0
    rec.close()
    y, _ = sf.read(str(tmp_path / "r.wav"), always_2d=True)
    assert rec.overflow > 0
    assert y.shape[0] + rec.overflow * 128 == 200 * 128  # every block is either written or counted
    assert y.shape[1] == 2 and np.all(y == 0.5)
    print(f"\n200 pushes took {pushed_in * 1e3:.2f} ms, {rec.overflow} counted as overflow")


def test_recorder_takes_a_device_period_longer_than_its_slots(tmp_path):
    """On JACK the stream follows the server's period, which may exceed the block size the
    recorder's ring was built for: such a block spans slots, in order, nothing lost."""
    from fieldmix.audio.child import Recorder

    rec = Recorder(str(tmp_path / "r.wav"), 48000, 1, 64)
    ramp = np.arange(5 * 300, dtype=np.float32).reshape(5, 300, 1) / 2000.0  # 300 = 4 slots and a bit
    for b in ramp:
        rec.push(b)
    rec.close()
    y, _ = sf.read(str(tmp_path / "r.wav"), always_2d=True, dtype="float32")
    assert rec.overflow == 0
    np.testing.assert_array_equal(y[:, 0], ramp.reshape(-1))


def test_child_stops_and_segment_goes_when_the_control_process_dies(tmp_path, show_state):
    code = f"""
import sys, time
sys.path.insert(0, {str(REPO / 'server')!r})
from fieldmix.show import load_show
from fieldmix.state import ShowState
from fieldmix.audio.link import AudioLink
if __name__ == "__main__":
    lk = AudioLink(ShowState(load_show({str(show_state.show.path)!r})), backend="virtual").start()
    print(lk.pid, lk._shm.name, flush=True)
    time.sleep(120)
"""
    p = subprocess.Popen([sys.executable, "-c", code], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        line = p.stdout.readline().split()
        assert len(line) == 2, p.stderr.read() if p.poll() is not None else line
        child_pid, seg_name = int(line[0]), line[1]
        assert Path("/dev/shm", seg_name).exists()
        p.kill()
        p.wait(10)

        def gone(pid):
            try:
                with open(f"/proc/{pid}/stat") as f:
                    return f.read().split(")")[-1].split()[0] == "Z"  # a zombie has exited
            except FileNotFoundError:
                return True

        deadline = time.monotonic() + WAIT
        while time.monotonic() < deadline and not (gone(child_pid) and not Path("/dev/shm", seg_name).exists()):
            time.sleep(0.05)
        assert gone(child_pid), "the audio child outlived its control process"
        assert not Path("/dev/shm", seg_name).exists(), "the segment outlived its owner"
    finally:
        if p.poll() is None:
            p.kill()
        p.stdout.close()
        p.stderr.close()


def test_engine_swap_is_a_seamless_crossfade(tmp_path):
    """3 speakers -> 2 speakers on the same outputs with the same gains: a new engine is
    built and crossfaded against the old one. Recorded, the level of output 1 must not dip
    or bump across the change (per-period peaks of the 750 Hz tone within 0.2 dB)."""
    spk = [{"id": f"S{i}", "output": i + 1, "azimuth": a, "distance": 2} for i, a in enumerate((30, -30, 180))]
    write_files(
        tmp_path,
        {
            "three.json": {"name": "three", "panner": "vbap", "speakers": spk},
            "show.json": {"layout": "three.json", "sources": [{"id": "tone", "input": 1, "file": "tone.wav"}]},
        },
    )
    write_tone(tmp_path / "tone.wav", freq=750.0, seconds=1.0, amp=TONE_AMP)
    st = ShowState(load_show(tmp_path / "show.json"))
    rec = tmp_path / "rec.wav"
    lk = _link(st, record=str(rec))
    lk.start()
    try:
        v = lk.push_targets(np.array([[0.5, 0.3, 0.0]], np.float32))
        _frames_after(lk, lambda m: m["targets_applied"] >= v, frames=6)
        cfg2 = {"n_outputs": 2, "sub_outputs": (), "sub_trims_db": (), "crossover_hz": 80.0, "delays": [0, 0], "outputs": (1, 2)}
        gen = lk.send_layout(cfg2, np.array([[0.5, 0.3]], np.float32))
        assert lk.wait_for(lambda l: l.status()["layout_applied"] >= gen, WAIT)
        assert [e["mode"] for e in lk.events if e["event"] == "layout_applied"][-1] == "engine_swap"
        m = _frames_after(lk, lambda m: m["layout_generation"] >= gen, frames=8)
        _levels_match(m, np.array([[0.5, 0.3]]))
        assert lk.status()["restarts"] == 0
    finally:
        assert lk.fade_out_and_stop()
    y, sr = sf.read(str(rec), always_2d=True)
    x = y[:, 0]
    nz = np.flatnonzero(np.abs(x) > 0)
    body = x[nz[0] + int(0.15 * sr) : nz[-1] - int(0.15 * sr)]  # after the fade-in, before the fade-out
    assert len(body) > int(0.4 * sr)
    n = len(body) // 64
    peaks = np.abs(body[: n * 64].reshape(n, 64)).max(axis=1)
    dev_db = 20 * np.log10(peaks / np.median(peaks))
    assert np.abs(dev_db).max() < 0.2, (dev_db.min(), dev_db.max())


def test_raise_priority_changes_only_the_calling_thread():
    """FIELDMIX_AUDIO_PRIORITY=auto: the audio thread asks for SCHED_FIFO (else nice -10);
    the default, "normal", changes nothing. Other threads keep their scheduling."""
    import threading

    from fieldmix.audio.child import raise_priority

    got = {}

    def worker(mode):
        got[mode] = (raise_priority(mode), os.sched_getscheduler(0), os.getpriority(os.PRIO_PROCESS, threading.get_native_id()))

    for mode in ("normal", "auto"):
        t = threading.Thread(target=worker, args=(mode,))
        t.start()
        t.join()
    assert got["normal"][0] == "normal" and got["normal"][1] == os.SCHED_OTHER
    what, policy, nice = got["auto"]
    assert what in ("fifo 70", "nice -10", "normal"), what
    if what.startswith("fifo"):
        assert policy == os.SCHED_FIFO
    elif what == "nice -10":
        assert policy == os.SCHED_OTHER and nice == -10
    assert os.sched_getscheduler(0) == os.SCHED_OTHER  # this (the calling test's) thread is untouched
