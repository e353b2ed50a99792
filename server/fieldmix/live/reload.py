"""Layout hot reload: :class:`LayoutWatcher` watches the active layout file.

On every change of the file it waits until the file has settled (size, mtime and inode
unchanged for ``settle`` seconds, so a save in progress is not read half-written), reads
it, and - if the content really changed - validates it with
:func:`fieldmix.layout.load_layout`:

- valid: ``core.load_layout(layout, origin="reload")``; the audio side crossfades to the
  new gains and delays, and a ``layout`` event goes to every listener;
- invalid (bad JSON, schema, a layout the show's panners cannot serve, the file deleted):
  ``core.report_layout_error(message)`` with the loader's exact one-line message; the old
  layout keeps playing, and the error stays in ``/status`` until the file is fixed;
- fixed again (or re-created): loaded like any valid change, which clears the error.

Both ways editors save work: truncate + write in place, and write a temporary file +
rename over the original (a new inode). The watcher follows the *active* layout: when the
core switches layouts (``/layout/load``), the core's ``layout`` event makes the watcher
watch the new file (no call from the core is needed; it reads ``core.state.layout.path``).

Change detection, two backends with one checking path:

- ``watchfiles`` (inotify / FSEvents / ReadDirectoryChanges through the watchfiles
  library, if installed): the folder of the file is watched and any event naming the file
  triggers a check; a slow safety poll (every ``safety_interval`` s) catches anything the
  OS did not report;
- ``poll`` (the fallback, used when watchfiles is missing or fails): ``os.stat`` every
  ``interval`` s (inode, size, mtime in ns), and the content hash once a second, for a
  same-size edit inside one mtime tick.

The file is read and validated in a worker thread (the event loop keeps serving OSC);
the result is applied in the event loop thread, as the core requires. Nothing here ever
raises out of the watcher's task: any failure is reported as a layout error and the
watcher carries on.
"""

from __future__ import annotations

import asyncio
import hashlib
import importlib
import logging
import os
import time
from collections import deque
from pathlib import Path
from typing import Optional

from ..errors import FieldmixError
from ..jsonload import oneline
from ..layout import load_layout

log = logging.getLogger("fieldmix.reload")

BACKENDS = ("auto", "watchfiles", "poll")
MAX_SETTLE_S = 1.0  # a file that keeps changing longer than this is read anyway
HASH_EVERY_S = 1.0  # poll backend: content hash at least this often, even with an unchanged stat
STABLE_READ_TRIES = 3  # the file changed while it was being validated: try again this often


def watchfiles_available() -> bool:
    """True if the watchfiles library can be imported."""
    try:
        importlib.import_module("watchfiles")
    except ImportError:
        return False
    return True


def _norm(path) -> Optional[Path]:
    """Absolute and normalised (``a/../b`` -> ``b``), symlinks kept: the path as the show names it."""
    if path is None:
        return None
    return Path(os.path.normpath(Path(path).absolute()))


def _digest(raw: bytes) -> str:
    return hashlib.blake2b(raw, digest_size=16).hexdigest()


def _signature(path: Path) -> Optional[tuple]:
    """(inode, size, mtime ns) of the file, or None if it is missing / unreadable."""
    try:
        st = os.stat(path)
    except (FileNotFoundError, NotADirectoryError):
        return None
    except OSError:
        return None
    return (st.st_ino, st.st_size, st.st_mtime_ns, st.st_dev)


def _read(path: Path) -> Optional[bytes]:
    try:
        return path.read_bytes()
    except OSError:
        return None


class _Checked:
    """What one validation in the worker thread found."""

    __slots__ = ("layout", "error", "digest", "mtime", "sig", "unstable")

    def __init__(self, layout=None, error=None, digest=None, mtime=None, sig=None, unstable=False):
        self.layout = layout
        self.error = error
        self.digest = digest
        self.mtime = mtime
        self.sig = sig
        self.unstable = unstable


def _validate(path: Path) -> _Checked:
    """Read + validate ``path`` (runs in a worker thread). Read before and after, so the
    validated bytes are the hashed bytes: a file that changed meanwhile is ``unstable``."""
    sig = _signature(path)
    before = _read(path)
    try:
        mtime = os.stat(path).st_mtime
    except OSError:
        mtime = None
    try:
        layout = load_layout(path)
        error = None
    except FieldmixError as exc:
        layout, error = None, str(exc)
    except Exception as exc:  # a loader bug must not kill the watcher
        log.exception("layout loader failed on %s", oneline(path))
        layout, error = None, f"{oneline(path.name)}: could not be read ({type(exc).__name__}: {oneline(exc)})"
    after = _read(path)
    if before != after or _signature(path) != sig:
        return _Checked(unstable=True)
    return _Checked(layout, error, None if after is None else _digest(after), mtime, sig)


class LayoutWatcher:
    """Watch the active layout file of ``core`` and hot-reload it.

    ``path``: the file to watch (default: the core's active layout file).
    ``interval``: poll period of the polling backend, seconds.
    ``settle``: how long size/mtime must stay unchanged before the file is read.
    ``backend``: ``"auto"`` (watchfiles if installed, else polling), ``"watchfiles"`` or
    ``"poll"``. ``safety_interval``: the watchfiles backend's slow safety poll.
    """

    def __init__(
        self,
        core,
        path=None,
        interval: float = 0.1,
        settle: float = 0.04,
        backend: str = "auto",
        safety_interval: float = 2.0,
    ):
        if backend not in BACKENDS:
            raise ValueError(f"backend must be one of {', '.join(BACKENDS)}, got {backend!r}")
        self.core = core
        if path is None:
            path = core.state.layout.path
        self._path: Optional[Path] = _norm(path)
        self.interval = float(interval)
        self.settle = float(settle)
        self.safety_interval = float(safety_interval)
        self.requested_backend = backend
        self.backend: Optional[str] = None  # the one in use, after start()
        self.reloads = 0
        self.errors = 0
        self.error: Optional[str] = None  # the watcher's current layout error, None when fine
        self.latencies_ms: deque = deque(maxlen=100)  # file mtime -> layout applied, per reload
        self._seen_sig: Optional[tuple] = None
        self._seen_digest: Optional[str] = None
        self._loaded_digest: Optional[str] = None
        self._last_hash_check = 0.0
        self._task: Optional[asyncio.Task] = None
        self._wf_task: Optional[asyncio.Task] = None
        self._wf_stop: Optional[asyncio.Event] = None
        self._wf_dir: Optional[Path] = None
        self._kick: Optional[asyncio.Event] = None
        self._running = False
        self._missing_reported = False

    # ------------------------------------------------------------------ public
    @property
    def path(self) -> Optional[Path]:
        """The file being watched (follows the core's active layout)."""
        return self._path

    async def start(self) -> None:
        if self._running:
            return
        self._running = True
        self._kick = asyncio.Event()
        self._baseline()
        backend = self.requested_backend
        if backend == "auto":
            backend = "watchfiles" if watchfiles_available() else "poll"
            if backend == "poll":
                log.info("watchfiles is not installed: polling the layout file every %g s", self.interval)
        elif backend == "watchfiles" and not watchfiles_available():
            raise FieldmixError('layout watcher: backend "watchfiles" requested but watchfiles is not installed')
        self.backend = backend
        self.core.add_listener(self._on_core_event)
        if backend == "watchfiles":
            self._start_wf()
            for _ in range(2):  # let the watch task set up its OS watch before start() returns
                await asyncio.sleep(0)
        self._task = asyncio.get_running_loop().create_task(self._run(), name="fieldmix-layout-watcher")
        log.info("watching layout %s (%s)", oneline(self._path) if self._path else "(none)", backend)

    async def stop(self) -> None:
        if not self._running:
            return
        self._running = False
        self.core.remove_listener(self._on_core_event)
        await self._stop_wf()
        if self._task is not None:
            self._task.cancel()
            try:
                await self._task
            except asyncio.CancelledError:
                pass
            self._task = None

    async def __aenter__(self) -> "LayoutWatcher":
        await self.start()
        return self

    async def __aexit__(self, *exc) -> None:
        await self.stop()

    def status(self) -> dict:
        lat = sorted(self.latencies_ms)
        return {
            "path": str(self._path) if self._path else None,
            "backend": self.backend,
            "reloads": self.reloads,
            "errors": self.errors,
            "error": self.error,
            "last_latency_ms": round(self.latencies_ms[-1], 1) if self.latencies_ms else None,
            "median_latency_ms": round(lat[len(lat) // 2], 1) if lat else None,
        }

    def watch(self, path) -> None:
        """Watch another file from now on (the core's layout switch does this by itself)."""
        new = _norm(path)
        if new == self._path:
            return
        self._path = new
        self.error = None
        self._baseline()
        log.info("layout watcher now follows %s", oneline(new) if new else "(no file)")
        if self._running and self.backend == "watchfiles":
            self._start_wf()
        if self._kick is not None:
            self._kick.set()

    # ---------------------------------------------------------------- internals
    def _baseline(self) -> None:
        """Take the file as it is now as the loaded content (the core loaded it)."""
        self._seen_sig = self._loaded_digest = self._seen_digest = None
        self._missing_reported = False
        if self._path is None:
            return
        self._seen_sig = _signature(self._path)
        raw = _read(self._path)
        if raw is not None:
            self._seen_digest = self._loaded_digest = _digest(raw)
        self._last_hash_check = time.monotonic()

    def _on_core_event(self, event: dict) -> None:
        if event.get("type") != "layout":
            return
        active = _norm(self.core.state.layout.path)
        if active != self._path:
            self.watch(active)

    async def _run(self) -> None:
        first = True
        while self._running:
            try:
                if first:  # a save between start() and the OS watch being in place
                    first = False
                    await self._check(hash_anyway=True)
                elif self.backend == "watchfiles":
                    try:
                        await asyncio.wait_for(self._kick.wait(), self.safety_interval)
                    except asyncio.TimeoutError:
                        pass
                    self._kick.clear()
                    await self._check(hash_anyway=True)
                else:
                    await asyncio.sleep(self.interval)
                    now = time.monotonic()
                    await self._check(hash_anyway=now - self._last_hash_check >= HASH_EVERY_S)
            except asyncio.CancelledError:
                raise
            except Exception:  # never let the watcher die
                log.exception("layout watcher: unexpected failure (it keeps watching)")
                await asyncio.sleep(max(self.interval, 0.2))

    async def _check(self, hash_anyway: bool = False) -> None:
        path = self._path
        if path is None:
            return
        sig = _signature(path)
        if sig == self._seen_sig:
            if sig is None:
                if self._missing_reported:
                    return
            elif not hash_anyway:
                return
            else:
                self._last_hash_check = time.monotonic()
                raw = _read(path)
                if raw is None or _digest(raw) == self._seen_digest:
                    return
        # something changed: wait until the file holds still, then look at it
        deadline = time.monotonic() + MAX_SETTLE_S
        while True:
            await asyncio.sleep(self.settle)
            if path != self._path:
                return  # retargeted meanwhile
            again = _signature(path)
            if again == sig or time.monotonic() > deadline:
                sig = again
                break
            sig = again
        for _ in range(STABLE_READ_TRIES):
            checked = await asyncio.to_thread(_validate, path)
            if path != self._path or not self._running:
                return
            if not checked.unstable:
                break
            await asyncio.sleep(self.settle)
        else:
            return  # still being written: the next change check picks it up
        self._last_hash_check = time.monotonic()
        self._seen_sig = checked.sig  # as validated: a change after it is seen next time
        if checked.digest is None:  # missing (deleted, or moved away)
            self._seen_digest = None
            if not self._missing_reported:
                self._missing_reported = True
                self._fail(checked.error or f"{oneline(path.name)}: file not found: {oneline(path)}")
            return
        self._missing_reported = False
        if checked.digest == self._seen_digest:
            return  # touched, same bytes
        self._seen_digest = checked.digest
        if checked.error is not None:
            self._fail(checked.error)
            return
        if checked.digest == self._loaded_digest and self.error is None:
            return  # back to what is playing
        self._apply(checked)

    def _apply(self, checked: _Checked) -> None:
        try:
            self.core.load_layout(checked.layout, origin="reload")
        except FieldmixError as exc:  # e.g. a panner of the show cannot serve it
            self._fail(str(exc))
            return
        except Exception as exc:
            log.exception("layout reload could not be applied")
            self._fail(f"{checked.layout.name}: could not be applied ({type(exc).__name__}: {oneline(exc)})")
            return
        self._loaded_digest = checked.digest
        self.error = None
        self.reloads += 1
        if checked.mtime is not None:
            self.latencies_ms.append(max(0.0, (time.time() - checked.mtime) * 1000.0))
        log.info("layout %s reloaded from %s", checked.layout.name, oneline(self._path))

    def _fail(self, message: str) -> None:
        self.error = message
        self.errors += 1
        self.core.report_layout_error(message)

    # ------------------------------------------------------------ watchfiles
    def _start_wf(self) -> None:
        folder = self._path.parent if self._path is not None else None
        if folder == self._wf_dir and self._wf_task is not None and not self._wf_task.done():
            return
        if self._wf_stop is not None:
            self._wf_stop.set()  # the old folder's watcher ends by itself
        self._wf_dir = folder
        if folder is None:
            self._wf_task = None
            return
        self._wf_stop = asyncio.Event()
        self._wf_task = asyncio.get_running_loop().create_task(
            self._watch_folder(folder, self._wf_stop), name="fieldmix-layout-watchfiles"
        )

    async def _stop_wf(self) -> None:
        if self._wf_stop is not None:
            self._wf_stop.set()
        task, self._wf_task = self._wf_task, None
        if task is not None:
            try:
                await asyncio.wait_for(task, 2.0)
            except (asyncio.TimeoutError, asyncio.CancelledError):
                task.cancel()
            except Exception:
                pass

    async def _watch_folder(self, folder: Path, stop: asyncio.Event) -> None:
        from watchfiles import awatch

        try:
            async for changes in awatch(
                folder,
                # only the watched file: other files in the folder (a log written there, say)
                # must not wake us, let alone make watchfiles log every change
                watch_filter=lambda _change, p: self._path is not None and Path(p).name == self._path.name,
                debounce=200,
                step=10,
                stop_event=stop,
                recursive=False,
                rust_timeout=1000,
            ):
                target = self._path.name if self._path is not None else None
                if any(Path(p).name == target for _, p in changes):
                    self._kick.set()
        except asyncio.CancelledError:
            raise
        except Exception as exc:
            if stop.is_set() or not self._running:
                return
            log.warning(
                "file watcher failed on %s (%s): polling the layout file every %g s instead",
                oneline(folder), oneline(exc), self.interval,
            )
            self.backend = "poll"
            self._kick.set()


__all__ = ["LayoutWatcher", "watchfiles_available", "BACKENDS"]
