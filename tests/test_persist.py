"""State autosave and resume (fieldmix.live.persist) with a real LiveCore and real files.

The crash test really kills (SIGKILL) a process that saves in a loop, many times, at
random moments, and checks that the state file always parses. Rate-limit checks count
writes and look at the gaps between them (a lower bound that only a broken limiter can
violate); no wall-clock speed is asserted.
"""

from __future__ import annotations

import asyncio
import json
import logging
import math
import os
import random
import selectors
import signal
import subprocess
import sys
import time

import numpy as np
import pytest

from conftest import REPO, write_files
from fieldmix.live.core import LiveCore
from fieldmix.live.persist import (
    FORMAT,
    StateStore,
    apply_saved,
    default_path,
    default_state_path,
    load,
    remove_stale_temps,
    resume,
    snapshot,
    user_state_dir,
)
from fieldmix.show import load_show

WAIT = 15.0


def pair(name, left, right):
    return {
        "name": name,
        "panner": "vbap",
        "speakers": [
            {"id": "L", "output": 1, "azimuth": left, "distance": 2},
            {"id": "R", "output": 2, "azimuth": right, "distance": 2},
            {"id": "B", "output": 3, "azimuth": 180, "distance": 2},
        ],
    }


@pytest.fixture
def show_dir(tmp_path):
    write_files(
        tmp_path,
        {
            "layouts/tri.json": pair("tri", 30, -30),
            "layouts/wide.json": pair("wide", 70, -70),
            "show.json": {
                "layout": "layouts/tri.json",
                "master_gain_db": -6,
                "sources": [
                    {"id": "vox", "input": 1, "azimuth": 0, "distance": 2},
                    {"id": "gtr", "input": 2, "azimuth": 40, "distance": 2, "gain_db": -3},
                    {"id": "pad", "input": 3, "azimuth": 180, "distance": 2, "spread": 90},
                ],
            },
        },
    )
    return tmp_path


def make_core(show_dir) -> LiveCore:
    return LiveCore(load_show(show_dir / "show.json"))


def moved(core: LiveCore) -> LiveCore:
    for address, args in [
        ("/source/vox/position", [1.25, 2.5, 0.75]),
        ("/source/vox/gain", [-4.5]),
        ("/source/gtr/mute", [1]),
        ("/source/gtr/azimuth", [-100]),
        ("/source/pad/spread", [200]),
        ("/source/pad/distance", [5.5]),
        ("/master/gain", [-9.5]),
        ("/master/mute", [1]),
    ]:
        core.apply_message(address, args, origin="test")
    core.load_layout_file(core.layout_path_for("wide"))
    return core


def live_values(core: LiveCore) -> dict:
    d = core.state.to_dict()
    for s in d["sources"]:
        s.pop("azimuth"), s.pop("elevation"), s.pop("distance")  # same as position
    return d


# ---------------------------------------------------------------------------- round trip


def test_round_trip(show_dir):
    path = show_dir / "state" / "show.state.json"
    a = moved(make_core(show_dir))
    store = StateStore(path, a)
    assert store.save_now() and store.writes == 1
    data = json.loads(path.read_text(encoding="utf-8"))
    assert data["format"] == FORMAT and data["layout"]["file"] == "wide.json"
    assert [s["id"] for s in data["sources"]] == ["vox", "gtr", "pad"]

    b = make_core(show_dir)
    assert live_values(b) != live_values(a)  # the restart really starts elsewhere
    notes = apply_saved(b, load(path))
    assert notes == []
    assert b.state.layout.name == "wide"
    va, vb = live_values(a), live_values(b)
    for sa, sb in zip(va["sources"], vb["sources"]):
        np.testing.assert_allclose(sb["position"], sa["position"], atol=1e-9)
        assert (sb["gain_db"], sb["mute"], sb["spread"]) == (sa["gain_db"], sa["mute"], sa["spread"])
    assert vb["master"] == va["master"] == {"gain_db": -9.5, "mute": True}
    np.testing.assert_allclose(b.state.target_matrix(), a.state.target_matrix(), atol=1e-6)
    store.close()


def test_resume_and_fresh(show_dir):
    path = show_dir / "s.state.json"
    a = moved(make_core(show_dir))
    StateStore(path, a).save_now()

    b = make_core(show_dir)
    assert resume(b, path) == []
    assert b.state.master_gain_db == -9.5 and b.state.layout.name == "wide"

    c = make_core(show_dir)
    fresh_values = live_values(c)
    assert resume(c, path, fresh=True) == []
    assert live_values(c) == fresh_values  # --fresh: the show file's start state
    assert not path.exists() and json.loads((show_dir / "s.state.json.previous").read_text())["format"] == FORMAT
    assert resume(make_core(show_dir), path) == []  # nothing saved now: nothing to do


def test_panic_resumes_muted(show_dir):
    path = show_dir / "p.state.json"
    a = make_core(show_dir)
    a.set_panic(True)
    StateStore(path, a).save_now()
    assert json.loads(path.read_text())["master"]["panic"] is True
    b = make_core(show_dir)
    assert b.state.master_mute is False
    apply_saved(b, load(path))
    assert b.state.master_mute is True  # released by /master/mute 0, like a panic


# ---------------------------------------------------------------------------- autosave timing


def test_at_most_one_write_per_interval_under_a_stream(show_dir):
    path = show_dir / "stream.state.json"
    core = make_core(show_dir)
    interval = 1.0

    async def main():
        store = StateStore(path, core, min_interval=interval)
        t0 = time.monotonic()
        k = 0
        while time.monotonic() - t0 < 2.6:  # a 200 Hz stream of moves for 2.6 s
            core.apply_message("/source/vox/azimuth", [k % 360], origin="osc")
            k += 1
            await asyncio.sleep(0.005)
        elapsed = time.monotonic() - t0
        deadline = time.monotonic() + WAIT
        while store.pending and time.monotonic() < deadline:  # the last change gets its write too
            await asyncio.sleep(0.05)
        autosaves = list(store.write_times)
        assert not store.pending
        gaps = np.diff(autosaves)
        print(f"\n{k} changes in {elapsed:.2f} s -> {len(autosaves)} autosaves, gaps {np.round(gaps, 3).tolist()} s")
        assert len(autosaves) >= 2  # it saves while the stream goes on, not only at the end
        assert np.all(gaps >= interval - 1e-6)  # never two writes within the interval
        assert len(autosaves) <= math.floor((time.monotonic() - t0) / interval) + 1
        store.close()
        on_disk = json.loads(path.read_text())
        az = core.state.sources[0].spherical[0]
        x, y, _ = on_disk["sources"][0]["position"]
        assert math.degrees(math.atan2(-x, y)) == pytest.approx(az, abs=1e-6)  # the newest move is saved

    asyncio.run(asyncio.wait_for(main(), 60))


def test_changes_coalesce(show_dir):
    path = show_dir / "c.state.json"
    core = make_core(show_dir)

    async def main():
        store = StateStore(path, core, min_interval=3600.0)
        core.apply_message("/source/vox/gain", [-1], origin="osc")
        deadline = time.monotonic() + WAIT
        while store.writes == 0 and time.monotonic() < deadline:
            await asyncio.sleep(0.01)
        assert store.writes == 1  # the first change after a quiet spell is written at once
        assert json.loads(path.read_text())["sources"][0]["gain_db"] == -1
        for k in range(200):
            core.apply_message("/source/vox/gain", [-(k % 50)], origin="osc")
            core.apply_message("/master/gain", [-(k % 20)], origin="osc")
        await asyncio.sleep(0.5)
        assert store.writes == 1 and store.dirty  # 400 changes: no second write within the hour
        assert store.close() and store.writes == 2  # the exit save writes the newest state
        saved = json.loads(path.read_text())
        assert saved["sources"][0]["gain_db"] == -(199 % 50) and saved["master"]["gain_db"] == -(199 % 20)
        core.apply_message("/source/vox/gain", [-2], origin="osc")  # closed: not listening any more
        await asyncio.sleep(0.05)
        assert store.writes == 2

    asyncio.run(asyncio.wait_for(main(), 60))


def test_non_state_events_do_not_save(show_dir):
    path = show_dir / "n.state.json"
    core = make_core(show_dir)

    async def main():
        store = StateStore(path, core, min_interval=0.0)
        with pytest.raises(Exception):
            core.apply_message("/source/vox/gain", ["loud"], origin="osc")  # an error event only
        await asyncio.sleep(0.2)
        assert store.writes == 0 and not path.exists()
        store.close()

    asyncio.run(main())


# ---------------------------------------------------------------------------- atomicity

# The saver imports everything once, then forks one writer per round: the writer saves in a
# tight loop through the real StateStore until the test kills it with SIGKILL.
_SAVER = r"""
import os, sys
from fieldmix.live.core import LiveCore
from fieldmix.live.persist import StateStore
from fieldmix.show import load_show
core = LiveCore(load_show(sys.argv[1]))
store = StateStore(sys.argv[2], core, min_interval=0)
n = len(core.state.sources)
print("loaded", flush=True)
for line in sys.stdin:
    pid = os.fork()
    if pid == 0:
        k = 0
        while True:
            s = core.state.sources[k % n]
            s.gain_db = -((k * 7919) % 12000) / 100.0   # the text length varies
            s.spread = float((k * 31) % 360)
            store.save_now()
            k += 1
            if k == 1:
                os.write(1, b"ready %d\n" % os.getpid())
    _, status = os.waitpid(pid, 0)
    print("dead", status, flush=True)
"""


def _readline(proc, timeout=60.0) -> str:
    sel = selectors.DefaultSelector()
    sel.register(proc.stdout, selectors.EVENT_READ)
    if not sel.select(timeout=timeout):
        proc.kill()
        raise AssertionError(f"saver said nothing within {timeout} s: {proc.stderr.read1(4000)!r}")
    return proc.stdout.readline().decode().strip()


@pytest.mark.skipif(not hasattr(os, "fork"), reason="the saver forks its writers (POSIX)")
def test_kill_9_never_leaves_a_truncated_file(show_dir):
    n_sources = 400  # a ~100 kB state file: a write takes long enough to be hit
    write_files(show_dir, {"big.json": {
        "layout": "layouts/tri.json",
        "sources": [{"id": f"s{i}", "input": i + 1, "azimuth": (i * 7) % 360 - 180} for i in range(n_sources)],
    }})  # fmt: skip
    path = show_dir / "big.state.json"
    script = show_dir / "saver.py"
    script.write_text(_SAVER)
    env = dict(os.environ, OPENBLAS_NUM_THREADS="1", OMP_NUM_THREADS="1",
               PYTHONPATH=str(REPO / "server") + os.pathsep + os.environ.get("PYTHONPATH", ""))  # fmt: skip
    proc = subprocess.Popen([sys.executable, str(script), str(show_dir / "big.json"), str(path)],
                            stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=env)  # fmt: skip
    rng = random.Random(3)
    kills, mid_write, sizes = 60, 0, set()
    try:
        assert _readline(proc) == "loaded"
        for i in range(kills):
            proc.stdin.write(b"go\n")
            proc.stdin.flush()
            word, pid = _readline(proc).split()
            assert word == "ready"
            time.sleep(rng.uniform(0.0, 0.03))
            os.kill(int(pid), signal.SIGKILL)
            word, status = _readline(proc).split()
            assert word == "dead" and os.WIFSIGNALED(int(status)) and os.WTERMSIG(int(status)) == signal.SIGKILL
            raw = path.read_bytes()
            sizes.add(len(raw))
            data = json.loads(raw)  # never truncated or half-written
            assert data["format"] == FORMAT and len(data["sources"]) == n_sources
            assert all(math.isfinite(s["gain_db"]) for s in data["sources"])
            temps = [p for p in show_dir.iterdir() if p.name.startswith(".big.state.json.") and pid in p.name]
            mid_write += bool(temps)
    finally:
        proc.kill()
        proc.wait(10)
    # the kills did hit writes in progress (p ~ 0.2 each; 0 of 60 would be ~1e-6)
    assert mid_write >= 1, "no kill landed during a write: the test did not exercise the window"
    core = LiveCore(load_show(show_dir / "big.json"))
    assert apply_saved(core, load(path)) == []  # the last file resumes cleanly
    print(f"\n{kills} kills: the file always parsed; {len(sizes)} different file sizes seen; "
          f"{mid_write} kills landed mid-write (left a temp file)")
    StateStore(path, core)  # a restart clears the temp files of the killed writers
    assert not [p for p in show_dir.iterdir() if p.name.startswith(".big.state.json.")]


def test_stale_temps_only_of_dead_writers_are_removed(show_dir):
    path = show_dir / "t.state.json"
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()
    stale = show_dir / f".t.state.json.{dead.pid}-0123abcd.tmp"
    alive = show_dir / f".t.state.json.{os.getppid()}-89abcdef.tmp"  # our parent runs
    other = show_dir / f".other.json.{dead.pid}-0123abcd.tmp"
    for p in (stale, alive, other):
        p.write_text("{")
    assert remove_stale_temps(path) == [stale]
    assert alive.exists() and other.exists() and not stale.exists()


def test_write_failure_is_reported_not_raised(show_dir, caplog):
    (show_dir / "blocker").write_text("a file where the state folder should be")
    core = make_core(show_dir)
    store = StateStore(show_dir / "blocker" / "x.state.json", core)
    with caplog.at_level(logging.WARNING, logger="fieldmix.state"):
        assert store.save_now() is False
    assert store.failures == 1 and "could not save the show state" in store.last_error
    assert "could not save the show state" in caplog.text

    async def main():  # the autosave path: a failure inside the listener never escapes
        core.apply_message("/source/vox/gain", [-2], origin="osc")
        deadline = time.monotonic() + WAIT
        while store.failures < 2 and time.monotonic() < deadline:
            await asyncio.sleep(0.02)
        assert store.failures == 2 and store.dirty  # kept dirty: tried again later

    asyncio.run(main())


# ---------------------------------------------------------------------------- corrupt files


@pytest.mark.parametrize(
    "content, reason",
    [
        (b'{"format": "fieldmix-state/1", "sources": [', "not valid JSON"),
        (b"", "not valid JSON"),
        (b"\xff\xfe{}", "not UTF-8"),
        (b"[1, 2, 3]", "expected a JSON object"),
        (b'{"format": "something-else/9", "sources": []}', "not a fieldmix state file"),
        (b'{"sources": []}', "not a fieldmix state file"),
        (b'{"format": "fieldmix-state/1", "sources": {"vox": {}}}', '"sources" must be a list'),
        (b'{"format": "fieldmix-state/1", "sources": [], "master": 3}', '"master" must be an object'),
        (b"[" * 100000 + b"]" * 100000, "not usable JSON"),
    ],
    ids=["truncated", "empty", "binary", "list", "other-format", "no-format", "sources-object", "master-number", "deep"],
)
def test_corrupt_file_is_moved_aside(show_dir, caplog, content, reason):
    path = show_dir / "show.state.json"
    path.write_bytes(content)
    core = make_core(show_dir)
    start = live_values(core)
    with caplog.at_level(logging.ERROR, logger="fieldmix.state"):
        assert resume(core, path) == []
    assert live_values(core) == start  # the show starts from the show file
    assert not path.exists()
    aside = list(show_dir.glob("show.state.json.corrupt-*"))
    assert len(aside) == 1 and aside[0].read_bytes() == content  # kept, byte for byte
    assert reason in caplog.text and "corrupt" in caplog.text and aside[0].name in caplog.text
    assert "starting from the show file" in caplog.text
    # the next save writes a fresh file; a second corrupt file gets its own name
    StateStore(path, core).save_now()
    assert load(path)["format"] == FORMAT
    path.write_bytes(content)
    assert load(path) is None
    assert len(list(show_dir.glob("show.state.json.corrupt-*"))) == 2


# ---------------------------------------------------------------------------- junk values


def test_junk_values_are_refused_one_by_one(show_dir):
    path = show_dir / "junk.state.json"
    path.write_text(
        """{
 "format": "fieldmix-state/1",
 "layout": {"name": "x", "file": "../../etc/passwd"},
 "master": {"gain_db": NaN, "mute": 7},
 "sources": [
  {"id": "vox", "position": [1.0, Infinity, 0.0], "gain_db": -7.5, "mute": true, "spread": -5},
  {"id": "gtr", "position": [0.5, 1.5], "gain_db": "loud", "mute": false, "spread": 45, "colour": "red"},
  {"id": "pad", "position": "left", "gain_db": 1e9, "mute": 0.5, "spread": 1e999},
  {"id": "ghost", "gain_db": -3},
  {"id": "vox", "gain_db": -1},
  17,
  {"id": ["vox"]}
 ]
}""",
        encoding="utf-8",
    )
    core = make_core(show_dir)
    show_start = live_values(core)
    data = load(path)
    assert data is not None and path.exists()  # junk values do not make the file corrupt
    notes = apply_saved(core, data)
    text = "\n".join(notes)
    print("\n" + text)
    st = core.state
    vox, gtr, pad = st.sources
    # accepted values
    assert vox.gain_db == -7.5 and vox.mute is True
    np.testing.assert_allclose(gtr.position, [0.5, 1.5, 0.0], atol=1e-12)  # z kept from the show
    assert gtr.mute is False and gtr.spread == 45
    # refused values keep the show's values
    np.testing.assert_allclose(vox.position, show_start["sources"][0]["position"], atol=1e-6)
    assert vox.spread == show_start["sources"][0]["spread"]
    assert gtr.gain_db == show_start["sources"][1]["gain_db"]
    assert pad.gain_db == show_start["sources"][2]["gain_db"] and pad.mute is False and pad.spread == 90
    np.testing.assert_allclose(pad.position, show_start["sources"][2]["position"], atol=1e-6)
    assert st.master_gain_db == -6 and st.master_mute is False
    assert st.layout.name == "tri"
    assert np.all(np.isfinite(st.target_matrix()))
    # each refusal is named
    for expected in [
        'sources[0] "vox" position: inf is not a finite number',
        'sources[0] "vox" spread: -5 is out of range',
        'sources[1] "gtr" gain_db: expected a number for <dB>, got "loud"',
        'sources[1] "gtr": unknown key(s) "colour" ignored',
        'sources[2] "pad" position: expected [x, y, z], got "left"',
        'sources[2] "pad" gain_db: 1000000000.0 is out of range',
        'sources[2] "pad" mute: 0.5 is not 0 or 1',
        'sources[2] "pad" spread: inf is not a finite number',
        'sources[3]: unknown source id "ghost" (not in this show); ignored',
        'sources[4] "vox": the same source a second time; ignored',
        "sources[5]: expected an object, got 17; ignored",
        "sources[6]: unknown source id a list",
        "master gain_db: nan is not a finite number",
        "master mute: 7 is not 0 or 1",
        'layout "../../etc/passwd": not a layout name',
    ]:
        assert expected in text, expected
    assert len(notes) == 15


def test_snapshot_never_writes_a_non_finite_value(show_dir):
    core = make_core(show_dir)
    core.state.sources[0].gain_db = float("nan")  # a bug elsewhere: the file must not carry it
    store = StateStore(show_dir / "nan.state.json", core)
    assert store.save_now() is False and "nan" in store.last_error.lower()
    assert not (show_dir / "nan.state.json").exists()
    assert snapshot(make_core(show_dir))["sources"][0]["gain_db"] == 0.0


# ---------------------------------------------------------------------------- location


def test_default_location(tmp_path, monkeypatch):
    monkeypatch.delenv("FIELDMIX_STATE_DIR", raising=False)
    monkeypatch.setenv("XDG_STATE_HOME", str(tmp_path / "xdg"))
    if sys.platform.startswith("linux"):
        assert user_state_dir() == tmp_path / "xdg" / "fieldmix"
    a = default_state_path(tmp_path / "one" / "show.json")
    b = default_state_path(tmp_path / "two" / "show.json")
    assert a.parent == b.parent == user_state_dir()
    assert a != b and a.name.startswith("show-") and a.name.endswith(".state.json")
    assert default_state_path(tmp_path / "one" / "show.json") == a  # stable
    monkeypatch.setenv("FIELDMIX_STATE_DIR", str(tmp_path / "mine"))
    assert default_state_path(tmp_path / "one" / "show.json").parent == tmp_path / "mine"
    assert default_state_path("x.json", state_dir=tmp_path / "d").parent == tmp_path / "d"


def test_default_path_of_a_show(show_dir, monkeypatch):
    monkeypatch.setenv("FIELDMIX_STATE_DIR", str(show_dir / "states"))
    show = load_show(show_dir / "show.json")
    assert default_path(show) == default_state_path(show_dir / "show.json")
    assert default_path(show).parent == show_dir / "states"
