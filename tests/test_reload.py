"""Layout hot reload (fieldmix.live.reload.LayoutWatcher) against a real LiveCore.

Files are really written to a temporary folder the way editors save them (truncate +
write in place, and write a temporary file + rename over the original) and the watcher
really sees them, through watchfiles (inotify) and through the polling fallback. Every
wait is bounded by a generous safety timeout and waits for a core event, never for wall
clock speed: the save -> event latency is printed here and measured by
benchmarks/reload.py, not asserted.
"""

from __future__ import annotations

import asyncio
import json
import math
import os
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from conftest import IN_CI, write_files, write_tone
from fieldmix.errors import ConfigError
from fieldmix.layout import load_layout
from fieldmix.live.core import LiveCore
from fieldmix.live.reload import LayoutWatcher, watchfiles_available
from fieldmix.show import load_show
from fieldmix.state import ShowState

WAIT = 15.0  # safety bound for every wait on a loaded 2-core machine

BACKENDS = ["poll", "watchfiles"]


@pytest.fixture(autouse=True)
def _need_backend(request):
    """The watchfiles backend needs watchfiles: skipped without it, a failure under CI=true."""
    backend = request.node.callspec.params.get("backend") if hasattr(request.node, "callspec") else None
    if backend == "watchfiles" and not watchfiles_available():
        if IN_CI:
            pytest.fail("watchfiles is required under CI=true but is not installed")
        pytest.skip("watchfiles is not installed (the polling fallback is tested without it)")


def pair(name="pair", left=30.0, right=-30.0, trim_left=0.0):
    return {
        "name": name,
        "panner": "vbap",
        "speakers": [
            {"id": "L", "output": 1, "azimuth": left, "distance": 2, "trim_db": trim_left},
            {"id": "R", "output": 2, "azimuth": right, "distance": 2},
        ],
    }


@pytest.fixture
def show_dir(tmp_path):
    write_files(
        tmp_path,
        {
            "layouts/pair.json": pair(),
            "layouts/wide.json": pair("wide", 60, -60),
            "show.json": {
                "layout": "layouts/pair.json",
                "sources": [{"id": "tone", "input": 1, "file": "tone.wav", "azimuth": 10, "distance": 2}],
            },
        },
    )
    return tmp_path


def make_core(show_dir) -> LiveCore:
    return LiveCore(load_show(show_dir / "show.json"))


def expected_targets(core: LiveCore, path: Path) -> np.ndarray:
    """The targets an independent ShowState computes for the file (the reference)."""
    return ShowState(core.show, layout=load_layout(path)).target_matrix()


def save_in_place(path: Path, data) -> float:
    """Truncate + write, like most editors; returns the time the save started."""
    t = time.monotonic()
    text = data if isinstance(data, str) else json.dumps(data, indent=1)
    with open(path, "w", encoding="utf-8") as f:
        f.write(text)
    return t


def save_by_rename(path: Path, data) -> float:
    """Write a temporary file in the same folder, then rename it over the original."""
    t = time.monotonic()
    tmp = path.with_name(f".{path.name}.swp~")
    tmp.write_text(data if isinstance(data, str) else json.dumps(data, indent=1), encoding="utf-8")
    os.replace(tmp, path)
    return t


class Events:
    """Collects the core's events; ``wait(pred)`` returns the first new one matching."""

    def __init__(self, core: LiveCore):
        self.items: list[tuple[float, dict]] = []
        self.changed = asyncio.Event()
        self.read = 0
        core.add_listener(self._on)

    def _on(self, e: dict) -> None:
        self.items.append((time.monotonic(), e))
        self.changed.set()

    async def wait(self, pred, timeout: float = WAIT) -> tuple[float, dict]:
        deadline = time.monotonic() + timeout
        while True:
            while self.read < len(self.items):
                t, e = self.items[self.read]
                self.read += 1
                if pred(e):
                    return t, e
            left = deadline - time.monotonic()
            if left <= 0:
                raise AssertionError(f"no matching core event within {timeout} s; got {[e for _, e in self.items]}")
            self.changed.clear()
            try:
                await asyncio.wait_for(self.changed.wait(), left)
            except asyncio.TimeoutError:
                pass

    def of(self, kind: str, origin=None) -> list[dict]:
        return [e for _, e in self.items if e.get("type") == kind and (origin is None or e.get("origin") == origin)]


def is_reload(e):
    return e.get("type") == "layout" and e.get("origin") == "reload"


def is_layout_error(e):
    return e.get("type") == "error" and e["error"].get("kind") == "layout"


def run(coro):
    return asyncio.run(asyncio.wait_for(coro, 120))


# ---------------------------------------------------------------------------- edit, break, fix


@pytest.mark.parametrize("backend", BACKENDS)
def test_edit_break_fix(show_dir, backend, capsys):
    core = make_core(show_dir)
    path = show_dir / "layouts" / "pair.json"
    before = core.state.target_matrix()

    async def main():
        ev = Events(core)
        async with LayoutWatcher(core, interval=0.1, backend=backend) as w:
            assert w.backend == backend and w.path == path.absolute()
            # 1) edit during the show: speakers wider apart -> other gains
            t0 = save_in_place(path, pair(left=60, right=-60))
            t1, e = await ev.wait(is_reload)
            assert e["layout"]["speakers"][0]["azimuth"] == pytest.approx(60)
            got = core.state.target_matrix()
            np.testing.assert_allclose(got, expected_targets(core, path), atol=1e-6)
            assert not np.allclose(got, before, atol=1e-3)  # the edit really moved the gains
            latency_edit = (t1 - t0) * 1000
            edited = got.copy()

            # 2) break it: the old layout keeps playing, the exact loader error is reported
            t0 = save_in_place(path, '{"speakers": [{"id": "L", "output": 1, "azimuth": "left"}]')
            _, e = await ev.wait(is_layout_error)
            with pytest.raises(ConfigError) as exc:
                load_layout(path)
            assert e["error"]["message"] == str(exc.value)
            assert core.layout_error == str(exc.value)
            assert core.status()["layout_error"] == str(exc.value)
            assert w.error == str(exc.value)
            np.testing.assert_array_equal(core.state.target_matrix(), edited)
            assert core.state.layout.speakers[0].azimuth == pytest.approx(60)

            # a second kind of breakage (schema, not syntax): reported with its own message
            save_in_place(path, pair(left=60, right=-60) | {"panner": "wobble"})
            _, e = await ev.wait(is_layout_error)
            with pytest.raises(ConfigError) as exc2:
                load_layout(path)
            assert e["error"]["message"] == str(exc2.value) != str(exc.value)
            np.testing.assert_array_equal(core.state.target_matrix(), edited)

            # 3) fix it: recovers with the fixed file's gains, the error is cleared
            t0 = save_in_place(path, pair(left=45, right=-45, trim_left=-6))
            t1, e = await ev.wait(is_reload)
            latency_fix = (t1 - t0) * 1000
            assert core.layout_error is None and w.error is None
            assert core.status()["layout_error"] is None
            np.testing.assert_allclose(core.state.target_matrix(), expected_targets(core, path), atol=1e-6)
            assert w.reloads == 2 and w.errors == 2
        print(f"\n[{backend}] save -> layout event: edit {latency_edit:.0f} ms, fix {latency_fix:.0f} ms "
              f"(watcher: file mtime -> applied {list(map(round, w.latencies_ms))} ms)")

    run(main())
    with capsys.disabled():
        print(capsys.readouterr().out, end="")


@pytest.mark.parametrize("backend", BACKENDS)
def test_rename_save(show_dir, backend):
    core = make_core(show_dir)
    path = show_dir / "layouts" / "pair.json"

    async def main():
        ev = Events(core)
        async with LayoutWatcher(core, backend=backend) as w:
            ino = path.stat().st_ino
            save_by_rename(path, pair(left=90, right=-90))
            await ev.wait(is_reload)
            assert path.stat().st_ino != ino  # it really was a new file
            assert core.state.layout.speakers[0].azimuth == pytest.approx(90)
            # and a second rename-save after the first one (the watch survives the new inode)
            save_by_rename(path, pair(left=70, right=-70))
            await ev.wait(is_reload)
            assert core.state.layout.speakers[0].azimuth == pytest.approx(70)
            np.testing.assert_allclose(core.state.target_matrix(), expected_targets(core, path), atol=1e-6)
            assert w.reloads == 2

    run(main())


@pytest.mark.parametrize("backend", BACKENDS)
def test_deleted_then_recreated(show_dir, backend):
    core = make_core(show_dir)
    path = show_dir / "layouts" / "pair.json"
    original = path.read_text()
    before = core.state.target_matrix()

    async def main():
        ev = Events(core)
        async with LayoutWatcher(core, backend=backend) as w:
            path.unlink()
            _, e = await ev.wait(is_layout_error)
            msg = e["error"]["message"]
            assert msg.startswith("pair.json: ") and "not found" in msg and str(path) in msg
            assert core.layout_error == msg
            np.testing.assert_array_equal(core.state.target_matrix(), before)  # old layout kept
            # re-created with the very content that is playing: the error still clears
            path.write_text(original)
            await ev.wait(is_reload)
            assert core.layout_error is None and w.error is None
            np.testing.assert_array_equal(core.state.target_matrix(), before)
            assert len(ev.of("error")) == 1  # the missing file was reported once, not per poll

    run(main())


def test_layout_the_show_cannot_use_is_refused(show_dir):
    """Valid as a layout, but a source of the show sends "direct" to a speaker it lacks."""
    write_files(
        show_dir,
        {
            "show.json": {
                "layout": "layouts/pair.json",
                "sources": [
                    {"id": "tone", "input": 1, "azimuth": 10},
                    {"id": "click", "input": 2, "panner": "direct", "direct": {"L": 0}},
                ],
            }
        },
    )
    core = make_core(show_dir)
    path = show_dir / "layouts" / "pair.json"
    before = core.state.target_matrix()
    renamed = pair()
    renamed["speakers"][0]["id"] = "Left"

    async def main():
        ev = Events(core)
        async with LayoutWatcher(core, backend="poll"):
            save_in_place(path, renamed)
            _, e = await ev.wait(is_layout_error)
            assert 'unknown speaker "L"' in e["error"]["message"]
            with pytest.raises(ConfigError) as exc:
                ShowState(core.show, layout=load_layout(path))
            assert e["error"]["message"] == str(exc.value)
            np.testing.assert_array_equal(core.state.target_matrix(), before)
            assert core.state.layout.speakers[0].id == "L"

    run(main())


# ---------------------------------------------------------------------------- following


@pytest.mark.parametrize("backend", BACKENDS)
def test_follows_the_active_layout(show_dir, backend):
    core = make_core(show_dir)
    pair_path = show_dir / "layouts" / "pair.json"
    wide_path = show_dir / "layouts" / "wide.json"

    async def main():
        ev = Events(core)
        async with LayoutWatcher(core, backend=backend) as w:
            core.load_layout_file(core.layout_path_for("wide"), origin="osc")  # /layout/load wide
            assert w.path == wide_path.absolute()
            save_in_place(pair_path, pair(left=80, right=-80))  # no longer active: ignored
            await asyncio.sleep(0.5)
            save_in_place(wide_path, pair("wide", 50, -50))
            _, e = await ev.wait(is_reload)
            assert e["layout"]["name"] == "wide" and e["layout"]["file"] == "wide.json"
            assert core.state.layout.path == wide_path
            assert core.state.layout.speakers[0].azimuth == pytest.approx(50)
            assert len(ev.of("layout", "reload")) == 1  # the old file's edit was not loaded
            assert w.reloads == 1

    run(main())


def test_touch_without_change_does_not_reload(show_dir):
    core = make_core(show_dir)
    path = show_dir / "layouts" / "pair.json"

    async def main():
        ev = Events(core)
        async with LayoutWatcher(core, backend="poll") as w:
            os.utime(path, ns=(time.time_ns(), time.time_ns() + 5_000_000_000))  # mtime moves, bytes don't
            await asyncio.sleep(0.6)
            save_in_place(path, pair(left=40, right=-40))
            await ev.wait(is_reload)
            assert len(ev.of("layout", "reload")) == 1 and w.reloads == 1

    run(main())


def test_same_size_edit_within_one_mtime_is_seen(show_dir):
    """The poll backend hashes the content, so an edit that leaves inode, size and mtime
    alike (restored by hand here) is still found."""
    core = make_core(show_dir)
    path = show_dir / "layouts" / "pair.json"

    async def main():
        ev = Events(core)
        async with LayoutWatcher(core, backend="poll"):
            st = path.stat()
            text = path.read_text()
            assert '"azimuth": 30' in text
            with open(path, "r+", encoding="utf-8") as f:  # same inode, same size
                f.write(text.replace('"azimuth": 30.0', '"azimuth": 35.0'))
            os.utime(path, ns=(st.st_atime_ns, st.st_mtime_ns))
            assert path.stat().st_size == st.st_size and path.stat().st_mtime_ns == st.st_mtime_ns
            await ev.wait(is_reload)
            assert core.state.layout.speakers[0].azimuth == pytest.approx(35)

    run(main())


def test_polling_fallback_when_watchfiles_is_missing(show_dir, monkeypatch):
    monkeypatch.setitem(sys.modules, "watchfiles", None)  # import watchfiles -> ImportError
    assert not watchfiles_available()
    core = make_core(show_dir)
    path = show_dir / "layouts" / "pair.json"

    async def main():
        ev = Events(core)
        async with LayoutWatcher(core) as w:
            assert w.backend == "poll"
            save_in_place(path, pair(left=20, right=-40))
            await ev.wait(is_reload)
            assert core.state.layout.speakers[1].azimuth == pytest.approx(-40)

    run(main())


def test_bad_backend_name():
    with pytest.raises(ValueError):
        LayoutWatcher(object(), path="x.json", backend="inotify")


# ---------------------------------------------------------------------------- real audio


def test_reload_changes_the_audio(show_dir):
    """With a real audio child (virtual backend, the real engine in real time on a tone):
    a trim edit in the layout file changes the output level by that many dB; a broken
    save leaves the audio as it was; the fix is heard."""
    from fieldmix.audio.link import AudioLink

    write_tone(show_dir / "tone.wav", freq=750.0, seconds=2.0, amp=0.25)
    write_files(show_dir, {"show.json": {
        "layout": "layouts/pair.json",
        "sources": [{"id": "tone", "input": 1, "file": "tone.wav", "azimuth": 0, "distance": 2}],
    }})  # fmt: skip
    core = make_core(show_dir)
    path = show_dir / "layouts" / "pair.json"
    link = AudioLink(core.state, backend="virtual", blocksize=128, engine_options={"fade_in_ms": 20.0})
    link.start()
    core.link = link

    def db(x):
        return 20 * math.log10(max(x, 1e-9))

    async def settled_levels(gen: int) -> tuple[float, float]:
        """Output RMS (dB) once the child runs layout ``gen`` and the glide is long over."""
        deadline = time.monotonic() + WAIT
        first = None
        while time.monotonic() < deadline:
            link.poll()
            m = link.meters()
            if m["valid"] and m["layout_generation"] >= gen:
                first = first or m["frame"]
                if m["frame"] >= first + 4:  # 4 meter frames (~200 ms) after the switch
                    return db(m["out_rms"][0]), db(m["out_rms"][1])
            await asyncio.sleep(0.02)
        raise AssertionError(f"audio child did not report layout generation {gen} within {WAIT} s")

    async def main():
        ev = Events(core)
        async with LayoutWatcher(core, backend="poll"):
            l0, r0 = await settled_levels(0)
            assert abs(l0 - r0) < 0.1  # centred source, equal levels
            save_in_place(path, pair(trim_left=-12.0))
            await ev.wait(is_reload)
            l1, r1 = await settled_levels(link.status()["layout_generation"])
            assert l1 - l0 == pytest.approx(-12.0, abs=0.2) and r1 == pytest.approx(r0, abs=0.2)
            gen = link.status()["layout_generation"]
            save_in_place(path, "{ not json")
            await ev.wait(is_layout_error)
            assert link.status()["layout_generation"] == gen  # nothing was sent to the audio
            l2, r2 = await settled_levels(gen)
            assert l2 == pytest.approx(l1, abs=0.2) and r2 == pytest.approx(r1, abs=0.2)
            save_in_place(path, pair(trim_left=-3.0))
            await ev.wait(is_reload)
            l3, r3 = await settled_levels(link.status()["layout_generation"])
            assert l3 - l0 == pytest.approx(-3.0, abs=0.2) and r3 == pytest.approx(r0, abs=0.2)

    try:
        run(main())
    finally:
        link.fade_out_and_stop()
