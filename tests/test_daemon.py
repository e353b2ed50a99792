"""The live daemon end to end on the virtual audio device: real processes, sockets, files.

`fieldmix serve --virtual` runs as a subprocess; it is driven over a real UDP socket and
read back over real HTTP. Covers: OSC changes reach the state, /ping, hot reload (edit,
break, fix), autosave + kill -9 + restart resumes the positions, SIGTERM exits cleanly
having saved the state.
"""

from __future__ import annotations

import json
import os
import signal
import time
from pathlib import Path

import pytest

from conftest import ServeDaemon, write_files, write_tone


def _layout(az_left=30.0, az_right=-30.0):
    return {
        "panner": "vbap",
        "speakers": [
            {"id": "L", "output": 1, "azimuth": az_left, "distance": 2},
            {"id": "R", "output": 2, "azimuth": az_right, "distance": 2},
        ],
    }


@pytest.fixture
def show_dir(tmp_path):
    write_files(
        tmp_path,
        {
            "pair.json": _layout(),
            "show.json": {
                "layout": "pair.json",
                "glide_ms": 30,
                "sources": [
                    {"id": "tone", "input": 1, "file": "tone.wav", "azimuth": 0, "distance": 2},
                    {"id": "hum", "input": 2, "file": "tone.wav", "azimuth": 20, "distance": 2},
                ],
            },
        },
    )
    write_tone(tmp_path / "tone.wav", seconds=2.0)
    return tmp_path


def Daemon(show_dir: Path, *extra: str) -> ServeDaemon:
    return ServeDaemon(show_dir / "show.json", *extra)


def test_osc_moves_reach_the_state_and_sigterm_saves(show_dir):
    d = Daemon(show_dir, "--fresh")
    try:
        d.send("/source/1/azimuth", 45)
        d.send("/source/{tone,hum}/gain", -6.0)
        d.send("/source/tone/elevation", "high")  # wrong type: refused, counted
        d.ping()
        st = d.state()
        assert st["sources"][0]["azimuth"] == pytest.approx(45.0)
        assert [s["gain_db"] for s in st["sources"]] == [-6.0, -6.0]
        assert st["status"]["messages"]["rejected"].get("bad_type", 0) >= 1
        assert st["status"]["audio"]["state"] == "running"
        t0 = time.monotonic()
        rc = d.stop(signal.SIGTERM)
        took = time.monotonic() - t0
    finally:
        if d.proc.poll() is None:
            d.stop(signal.SIGKILL)
    assert rc == 0
    print(f"SIGTERM to exit: {took * 1000:.0f} ms")
    saved = json.loads(d.state_file.read_text())
    assert _saved_azimuth(saved, 0) == pytest.approx(45.0, abs=1e-6)
    assert saved["sources"][0]["gain_db"] == pytest.approx(-6.0)


def _saved_azimuth(saved, i):
    """Azimuth of source i in a saved state (positions are saved as [x, y, z])."""
    import math

    x, y, z = saved["sources"][i]["position"]
    return math.degrees(math.atan2(-x, y))


def test_kill_9_and_restart_resumes_positions(show_dir):
    d = Daemon(show_dir, "--fresh")
    try:
        d.send("/source/hum/azimuth", -70)
        d.ping()
        d.wait(lambda st: abs(st["sources"][1]["azimuth"] + 70) < 1e-6)
        deadline = time.monotonic() + 5  # the autosave writes within about a second of a change
        while time.monotonic() < deadline:
            if d.state_file.exists() and abs(_saved_azimuth(json.loads(d.state_file.read_text()), 1) + 70) < 1e-6:
                break
            time.sleep(0.1)
    finally:
        d.stop(signal.SIGKILL)
    d2 = Daemon(show_dir)  # no --fresh: resume
    try:
        st = d2.state()
        assert st["sources"][1]["azimuth"] == pytest.approx(-70.0, abs=1e-6)
        assert st["sources"][0]["azimuth"] == pytest.approx(0.0, abs=1e-6)
    finally:
        assert d2.stop() == 0
    d3 = Daemon(show_dir, "--fresh")  # --fresh: from the show file
    try:
        assert d3.state()["sources"][1]["azimuth"] == pytest.approx(20.0, abs=1e-6)
    finally:
        d3.stop()


def test_hot_reload_edit_break_fix(show_dir):
    d = Daemon(show_dir, "--fresh")
    lay = show_dir / "pair.json"
    try:
        assert [s["azimuth"] for s in d.state()["layout"]["speakers"]] == [30.0, -30.0]
        lay.write_text(json.dumps(_layout(45.0, -45.0)))
        d.wait(lambda st: [s["azimuth"] for s in st["layout"]["speakers"]] == [45.0, -45.0])
        broken = _layout(45.0, -45.0)
        broken["speakers"][1]["azimuth"] = "left"
        lay.write_text(json.dumps(broken))
        st = d.wait(lambda st: st["status"]["layout_error"])
        assert "speakers[1].azimuth" in st["status"]["layout_error"]
        assert [s["azimuth"] for s in st["layout"]["speakers"]] == [45.0, -45.0]  # the old one plays on
        assert st["status"]["audio"]["state"] == "running"
        lay.write_text(json.dumps(_layout(60.0, -60.0)))
        st = d.wait(lambda st: not st["status"]["layout_error"] and st["layout"]["speakers"][0]["azimuth"] == 60.0)
    finally:
        assert d.stop() == 0


def _nice(pid: int, tid: int) -> int:
    fields = Path(f"/proc/{pid}/task/{tid}/stat").read_text().rsplit(")", 1)[1].split()
    return int(fields[16])  # field 19 of proc(5): nice


@pytest.mark.skipif(not Path("/proc/self/task").is_dir(), reason="needs Linux /proc")
def test_the_control_process_yields_to_the_audio_and_a_restarted_child_does_not(show_dir):
    """Under CPU contention the audio comes first: the daemon's event-loop thread runs at
    nice 10, the audio child at the normal priority, also after a restart."""
    d = Daemon(show_dir)
    try:
        st = d.state()
        child = st["status"]["audio"]["pid"]
        assert _nice(d.proc.pid, d.proc.pid) == 10
        assert _nice(child, child) == 0
        os.kill(child, signal.SIGKILL)
        st = d.wait(lambda s: s["status"]["audio"].get("pid") not in (None, child) and s["status"]["audio"]["state"] == "running",
                    timeout=20)  # fmt: skip
        new = st["status"]["audio"]["pid"]
        assert _nice(new, new) == 0
    finally:
        assert d.stop() == 0
