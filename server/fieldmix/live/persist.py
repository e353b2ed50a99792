"""State autosave: what the show is doing now survives a crash or a restart.

:class:`StateStore` listens to the core's events and writes the live state - every
source's position, gain, mute and spread, the master gain and mute, the panic flag and
the active layout - to a JSON file of our own format (``"format": "fieldmix-state/1"``,
documented in docs/operations.md):

- atomically: a temporary file in the same folder, flushed and fsync'ed, then
  ``os.replace`` over the state file (and the folder fsync'ed), so a crash or ``kill -9``
  at any moment leaves either the previous complete file or the new complete one;
- at most once every ``min_interval`` seconds after a change (a stream of moves
  coalesces into one write a second; the first change after a quiet spell is written at
  once), in a worker thread so the event loop never waits for the disk;
- at exit: :meth:`StateStore.save_now` (synchronous; the daemon calls it after the fade
  out, and :meth:`StateStore.close` does it too).

Restoring: :func:`load` reads a state file (``None`` if there is none; a corrupt one -
not UTF-8, not JSON, not an object of our format - is moved aside to
``<name>.corrupt-<UTC timestamp>`` with a clear log line, and ``None`` is returned so the
show starts from the show file). :func:`apply_saved` applies it to a core: sources are
matched by id (unknown ids are ignored with a note), every value goes through the same
control grammar (:func:`fieldmix.control.parse_message`) and its ranges as an OSC message
would, so NaN, infinities, strings or out-of-range numbers in a hand-edited file are
refused value by value and never reach the audio. :func:`resume` is the one call the
daemon makes at start (``fresh=True`` for ``--fresh``).

Default location (:func:`default_state_path`): the per-user state folder
(``$XDG_STATE_HOME/fieldmix``, i.e. ``~/.local/state/fieldmix`` on Linux; see the function),
file ``<show stem>-<8 hex of the show's absolute path>.state.json``: a show folder may
be read-only, shared, or under version control, and a show copied to another machine
should not drag the last rehearsal's positions along.
"""

from __future__ import annotations

import asyncio
import datetime as _dt
import hashlib
import json
import logging
import math
import os
import re
import sys
import threading
import time
from pathlib import Path
from typing import Any, Optional

from ..control import parse_message
from ..errors import ControlError, FieldmixError
from ..jsonload import oneline, quote, write_atomic
from ..layout import load_layout

log = logging.getLogger("fieldmix.state")

FORMAT = "fieldmix-state/1"
MAX_STATE_BYTES = 8 * 1024 * 1024  # thousands of sources fit in a few hundred kB
SAVE_EVENTS = ("source", "master", "layout")
_SOURCE_KEYS = ("id", "position", "gain_db", "mute", "spread")
_TMP_RE = re.compile(r"^\.(?P<name>.+)\.(?P<pid>\d+)-[0-9a-f]{8}\.tmp$")


# --------------------------------------------------------------------------- where


def user_state_dir() -> Path:
    """The per-user folder for fieldmix's state files.

    Linux and other POSIX: ``$XDG_STATE_HOME/fieldmix`` (default ``~/.local/state/fieldmix``,
    the XDG Base Directory place for "state that should persist between restarts");
    macOS: ``~/Library/Application Support/fieldmix/state``; Windows:
    ``%LOCALAPPDATA%\\fieldmix\\state``. ``FIELDMIX_STATE_DIR`` overrides all of them.
    """
    env = os.environ.get("FIELDMIX_STATE_DIR")
    if env:
        return Path(env).expanduser()
    if sys.platform == "win32":
        base = os.environ.get("LOCALAPPDATA") or str(Path.home() / "AppData" / "Local")
        return Path(base) / "fieldmix" / "state"
    if sys.platform == "darwin":
        return Path.home() / "Library" / "Application Support" / "fieldmix" / "state"
    base = os.environ.get("XDG_STATE_HOME") or ""
    if not base or not os.path.isabs(base):  # the XDG spec: relative values are ignored
        base = str(Path.home() / ".local" / "state")
    return Path(base) / "fieldmix"


def default_state_path(show_path, state_dir=None) -> Path:
    """``<state dir>/<show stem>-<hash>.state.json`` for the show file ``show_path``.

    The hash (8 hex digits of SHA-256 of the show's absolute path) keeps two shows of the
    same name in different folders apart.
    """
    show = Path(show_path).expanduser().absolute()
    tag = hashlib.sha256(str(show).encode("utf-8", "surrogatepass")).hexdigest()[:8]
    stem = re.sub(r"[^A-Za-z0-9._-]+", "_", show.stem)[:64] or "show"
    return Path(state_dir if state_dir is not None else user_state_dir()) / f"{stem}-{tag}.state.json"


def default_path(show, state_dir=None) -> Path:
    """:func:`default_state_path` for a :class:`fieldmix.model.Show` (or a show file path)."""
    path = getattr(show, "path", show)
    if path is None:  # a show built in memory: keyed by its name
        name = (getattr(show, "raw", None) or {}).get("name") or "show"
        path = Path.cwd() / f"{name}.json"
    return default_state_path(path, state_dir)


# --------------------------------------------------------------------------- what


def snapshot(core) -> dict:
    """The state file's content for ``core`` now (plain JSON data)."""
    st = core.state
    lay = st.layout
    sources = []
    for s in st.sources:
        sources.append(
            {
                "id": s.spec.id,
                "position": [float(v) for v in s.position],
                "gain_db": float(s.gain_db),
                "mute": bool(s.mute),
                "spread": float(s.spread),
            }
        )
    show = core.show
    return {
        "format": FORMAT,
        "saved_at": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="milliseconds").replace("+00:00", "Z"),
        "show": show.path.name if show.path else None,
        "layout": {"name": lay.name, "file": lay.path.name if lay.path else None},
        "master": {"gain_db": float(st.master_gain_db), "mute": bool(st.master_mute), "panic": bool(core.panicked)},
        "sources": sources,
    }


_JSON = json.JSONEncoder(ensure_ascii=False, allow_nan=False)


def _encode(data: dict) -> bytes:
    """JSON text, one line per key and one line per source (readable, and fast: every piece
    goes through json's C encoder, which ``indent=`` would switch off).

    ``allow_nan=False``: a non-finite value in the live state is a bug; refuse to write it.
    """

    enc = _JSON.encode
    lines = ["{"]
    for key, value in data.items():
        if key != "sources":
            lines.append(f" {enc(key)}: {enc(value)},")
    sources = data.get("sources", [])
    body = ",\n".join(f"  {enc(s)}" for s in sources)
    lines.append(' "sources": [\n' + body + "\n ]" if sources else ' "sources": []')
    lines.append("}\n")
    return "\n".join(lines).encode("utf-8")


def remove_stale_temps(path: Path) -> list[Path]:
    """Delete temp files of ``path`` left by a writer that no longer runs (a kill -9)."""
    path = Path(path)
    removed = []
    try:
        entries = list(path.parent.iterdir())
    except OSError:
        return removed
    for p in entries:
        m = _TMP_RE.match(p.name)
        if not m or m.group("name") != path.name:
            continue
        pid = int(m.group("pid"))
        if pid != os.getpid() and _pid_alive(pid):
            continue
        if pid == os.getpid() and StateStore._active_paths.get(str(path.absolute()), 0):
            continue
        try:
            p.unlink()
            removed.append(p)
        except OSError:
            pass
    return removed


def _pid_alive(pid: int) -> bool:
    if pid <= 0:
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except (PermissionError, OSError):
        return True
    return True


# --------------------------------------------------------------------------- the store


class StateStore:
    """Autosave ``core``'s live state to ``path`` (see the module docstring).

    Attaches itself to the core's listeners at once. ``min_interval``: seconds between
    two autosaves at most once (``save_now`` is not limited). Counters: ``writes``,
    ``failures``; ``write_times`` (monotonic, completed autosaves and saves);
    ``last_error`` (the last write failure, None after a good write).
    """

    _active_paths: dict = {}

    def __init__(self, path, core, min_interval: float = 1.0):
        if not (isinstance(min_interval, (int, float)) and math.isfinite(min_interval) and min_interval >= 0):
            raise ValueError(f"min_interval must be a finite number of seconds >= 0, got {min_interval!r}")
        self.path = Path(path)
        self.core = core
        self.min_interval = float(min_interval)
        self.writes = 0
        self.failures = 0
        self.write_times: list[float] = []
        self.last_error: Optional[str] = None
        self._dirty = False
        self._gen = 0  # payload generation
        self._written_gen = 0
        self._last_done = -math.inf  # monotonic time the last write finished
        self._handle: Optional[asyncio.TimerHandle] = None
        self._inflight = False
        self._lock = threading.Lock()
        self._closed = False
        key = str(self.path.absolute())
        StateStore._active_paths[key] = StateStore._active_paths.get(key, 0) + 1
        stale = remove_stale_temps(self.path)
        if stale:
            log.info("removed %d temporary state file(s) left by an earlier crash next to %s", len(stale), oneline(self.path))
        core.add_listener(self._on_event)

    # ------------------------------------------------------------------ public
    @property
    def dirty(self) -> bool:
        return self._dirty

    @property
    def pending(self) -> bool:
        """A change is not on disk yet: dirty, or a write of it still in flight."""
        return self._dirty or self._inflight

    def save_now(self) -> bool:
        """Write the current state now (synchronously). True if it was written."""
        if self._handle is not None:
            self._handle.cancel()
            self._handle = None
        try:
            gen, payload = self._payload()
        except Exception as exc:
            self._failed(exc)
            return False
        return self._write(gen, payload)

    def close(self) -> bool:
        """Stop listening and save a last time (if anything changed since the last write)."""
        if self._closed:
            return True
        self._closed = True
        self.core.remove_listener(self._on_event)
        if self._handle is not None:
            self._handle.cancel()
            self._handle = None
        key = str(self.path.absolute())
        StateStore._active_paths[key] = max(0, StateStore._active_paths.get(key, 1) - 1)
        # an autosave may still be in flight in the executor: write synchronously so that the
        # newest state is on disk when close() returns
        ok = self.save_now() if (self.pending or self.writes == 0) else True
        return ok

    def status(self) -> dict:
        return {
            "path": str(self.path),
            "writes": self.writes,
            "failures": self.failures,
            "dirty": self._dirty,
            "last_error": self.last_error,
        }

    # ---------------------------------------------------------------- internals
    def _on_event(self, event: dict) -> None:
        if self._closed or event.get("type") not in SAVE_EVENTS:
            return
        self._dirty = True
        self._schedule()

    def _schedule(self) -> None:
        if self._handle is not None or self._inflight or self._closed:
            return  # a write is already due; it will take the newest state
        try:
            loop = asyncio.get_running_loop()
        except RuntimeError:
            return  # no event loop (offline use): the change is written by save_now()
        delay = max(0.0, self._last_done + self.min_interval - time.monotonic())
        self._handle = loop.call_later(delay, self._autosave, loop)

    def _autosave(self, loop) -> None:
        self._handle = None
        if not self._dirty or self._closed:
            return
        try:
            gen, payload = self._payload()
        except Exception as exc:
            self._failed(exc)
            return
        self._inflight = True
        fut = loop.run_in_executor(None, self._write, gen, payload)
        fut.add_done_callback(self._autosave_done)

    def _autosave_done(self, fut) -> None:
        self._inflight = False
        if fut.cancelled():
            return
        if self._dirty and not self._closed:
            self._schedule()

    def _payload(self) -> tuple[int, bytes]:
        self._gen += 1
        gen = self._gen
        payload = _encode(snapshot(self.core))
        self._dirty = False  # changes from now on make it dirty again
        return gen, payload

    def _write(self, gen: int, payload: bytes) -> bool:
        with self._lock:
            if gen <= self._written_gen:
                return True  # a newer state is already on disk
            try:
                write_atomic(self.path, payload)
            except Exception as exc:
                self._dirty = True  # try again at the next change / exit
                self._failed(exc)
                return False
            finally:
                self._last_done = time.monotonic()
            self._written_gen = gen
            self.writes += 1
            self.write_times.append(self._last_done)
            self.last_error = None
            return True

    def _failed(self, exc: Exception) -> None:
        self.failures += 1
        msg = f"could not save the show state to {oneline(self.path)}: {oneline(getattr(exc, 'strerror', None) or exc)}"
        if msg != self.last_error:
            log.warning(msg)
        self.last_error = msg


# --------------------------------------------------------------------------- restoring


class CorruptState(FieldmixError):
    """The state file cannot be used at all (it is moved aside)."""


def _check_shape(data: Any, where: str) -> dict:
    if not isinstance(data, dict):
        raise CorruptState(f"{where}: expected a JSON object, got {type(data).__name__}")
    fmt = data.get("format")
    if fmt != FORMAT:
        raise CorruptState(f'{where}: not a fieldmix state file of this version (format {quote(fmt) if isinstance(fmt, str) else fmt!r}, expected "{FORMAT}")')
    if not isinstance(data.get("sources", []), list):
        raise CorruptState(f'{where}: "sources" must be a list')
    for key in ("master", "layout"):
        if key in data and data[key] is not None and not isinstance(data[key], dict):
            raise CorruptState(f'{where}: "{key}" must be an object')
    return data


def move_aside(path: Path) -> Path:
    """Rename ``path`` to ``<name>.corrupt-<UTC timestamp>`` (never overwriting one)."""
    stamp = _dt.datetime.now(_dt.timezone.utc).strftime("%Y%m%dT%H%M%SZ")
    target = path.with_name(f"{path.name}.corrupt-{stamp}")
    k = 1
    while target.exists():
        k += 1
        target = path.with_name(f"{path.name}.corrupt-{stamp}-{k}")
    os.replace(path, target)
    return target


def load(path) -> Optional[dict]:
    """Read a state file: its data, or None (no file; unreadable; corrupt and moved aside)."""
    path = Path(path)
    where = oneline(path.name)
    try:
        size = path.stat().st_size
        if size > MAX_STATE_BYTES:
            raise CorruptState(f"{where}: too large for a state file ({size} bytes; at most {MAX_STATE_BYTES})")
        raw = path.read_bytes()
    except FileNotFoundError:
        return None
    except CorruptState as exc:
        return _corrupt(path, exc)
    except OSError as exc:
        log.error("cannot read the state file %s (%s): starting from the show file", oneline(path), oneline(exc.strerror or exc))
        return None
    try:
        if raw.startswith(b"\xef\xbb\xbf"):
            raw = raw[3:]
        try:
            text = raw.decode("utf-8")
        except UnicodeDecodeError as exc:
            raise CorruptState(f"{where}: not UTF-8 text (bad byte at offset {exc.start})") from None
        try:
            data = json.loads(text)  # NaN/Infinity are let through here and refused value by value
        except json.JSONDecodeError as exc:
            raise CorruptState(f"{where} line {exc.lineno} column {exc.colno}: not valid JSON: {exc.msg}") from None
        except (RecursionError, ValueError) as exc:
            raise CorruptState(f"{where}: not usable JSON ({type(exc).__name__})") from None
        return _check_shape(data, where)
    except CorruptState as exc:
        return _corrupt(path, exc)


def _corrupt(path: Path, exc: Exception) -> None:
    try:
        aside = move_aside(path)
    except OSError as err:
        log.error("state file %s is corrupt (%s) and could not be moved aside (%s): starting from the show file; "
                  "it will be overwritten at the next save", oneline(path), exc, oneline(err.strerror or err))
        return None
    log.error("state file is corrupt: %s; moved it aside to %s and starting from the show file", exc, oneline(aside))
    return None


def apply_saved(core, data: dict, origin: str = "restore") -> list[str]:
    """Apply saved state ``data`` (from :func:`load`) to ``core``; returns the notes.

    Each note is one line naming the place (``sources[2] "vox" gain_db: ...``) for a value
    that was refused or an entry that was ignored; every note is also logged. Accepted
    values are applied with ``origin`` (listeners see ordinary source/master events).
    Raises :class:`CorruptState` if ``data`` is not of the state file's shape at all.
    """
    notes: list[str] = []

    def note(msg: str) -> None:
        notes.append(msg)
        log.warning("state file: %s", msg)

    data = _check_shape(data, "state")
    _restore_layout(core, data.get("layout"), note)

    ids = core.state.source_ids
    index = {sid: i for i, sid in enumerate(ids)}
    cmds = []
    seen: set[int] = set()

    def take(address: str, args: list, where: str, key: str) -> None:
        try:
            cmds.extend(parse_message(address, args, ids))
        except ControlError as exc:
            msg = exc.message.split(": ", 1)[-1] if exc.message.startswith(address) else exc.message
            note(f"{where} {key}: {msg}; keeping the show's value")

    for k, entry in enumerate(data.get("sources", [])):
        where = f"sources[{k}]"
        if not isinstance(entry, dict):
            note(f"{where}: expected an object, got {_kind(entry)}; ignored")
            continue
        sid = entry.get("id")
        if not isinstance(sid, str) or sid not in index:
            note(f"{where}: unknown source id {quote(sid) if isinstance(sid, str) else _kind(sid)} (not in this show); ignored")
            continue
        i = index[sid]
        where = f'{where} "{oneline(sid)}"'
        if i in seen:
            note(f"{where}: the same source a second time; ignored")
            continue
        seen.add(i)
        extra = sorted(str(k) for k in entry if k not in _SOURCE_KEYS)
        if extra:
            note(f"{where}: unknown key(s) {', '.join(quote(x, 30) for x in extra[:5])} ignored")
        base = f"/source/{i + 1}"
        if "position" in entry:
            pos = entry["position"]
            if isinstance(pos, list) and len(pos) in (2, 3):
                take(f"{base}/position", list(pos), where, "position")
            else:
                note(f"{where} position: expected [x, y, z], got {_kind(pos)}; keeping the show's value")
        for key, param in (("gain_db", "gain"), ("spread", "spread")):
            if key in entry:
                take(f"{base}/{param}", [entry[key]], where, key)
        if "mute" in entry:
            take(f"{base}/mute", [_flag(entry["mute"])], where, "mute")

    master = data.get("master") or {}
    if "gain_db" in master:
        take("/master/gain", [master["gain_db"]], "master", "gain_db")
    if "mute" in master:
        take("/master/mute", [_flag(master["mute"])], "master", "mute")
    if master.get("panic") is True:
        take("/master/mute", [1.0], "master", "panic")
        log.warning("state file: the show was in panic when it was saved: resuming with the master muted "
                    "(/master/mute 0 to unmute)")
    if cmds:
        core.apply_commands(cmds, origin)
    n = len(seen)
    log.info("resumed the saved state: %d of %d source(s)%s", n, len(ids), f", {len(notes)} note(s)" if notes else "")
    return notes


def _restore_layout(core, saved, note) -> None:
    if not isinstance(saved, dict):
        return
    file = saved.get("file")
    if file is None:
        return
    if not isinstance(file, str):
        note(f"layout file: expected a file name, got {_kind(file)}; keeping the show's layout")
        return
    current = core.state.layout.path
    try:
        path = core.layout_path_for(file)  # only a layout of the layouts folder, by name
    except ControlError as exc:
        if current is not None and current.name == file:
            return  # the active layout (outside the layouts folder): nothing to do
        note(f"layout {quote(file)}: {exc.message}; keeping the show's layout")
        return
    if current is not None and path.resolve() == Path(current).resolve():
        return
    try:
        core.load_layout(load_layout(path), origin="restore")
    except FieldmixError as exc:
        note(f"layout {quote(file)} not restored ({exc}); keeping the show's layout")


def _flag(v):
    """JSON true/false -> 1/0 for the grammar (which refuses booleans as numbers)."""
    if v is True:
        return 1.0
    if v is False:
        return 0.0
    return v


def _kind(v) -> str:
    if v is None:
        return "null"
    if isinstance(v, bool):
        return "true/false"
    if isinstance(v, (int, float)):
        return repr(v)
    if isinstance(v, str):
        return quote(v, 30)
    if isinstance(v, list):
        return "a list"
    if isinstance(v, dict):
        return "an object"
    return type(v).__name__


def resume(core, path, fresh: bool = False) -> list[str]:
    """What the daemon does at start: apply the saved state unless ``fresh`` (``--fresh``).

    With ``fresh`` an existing state file is kept as ``<name>.previous`` (it would be
    overwritten at the first change otherwise). Returns the notes of :func:`apply_saved`.
    """
    path = Path(path)
    if fresh:
        if path.exists():
            prev = path.with_name(path.name + ".previous")
            try:
                os.replace(path, prev)
                log.info("--fresh: starting from the show file; the saved state was kept as %s", oneline(prev))
            except OSError as exc:
                log.warning("--fresh: could not keep the saved state aside (%s)", oneline(exc.strerror or exc))
        return []
    data = load(path)
    if data is None:
        return []
    return apply_saved(core, data)


__all__ = [
    "FORMAT",
    "StateStore",
    "snapshot",
    "load",
    "apply_saved",
    "resume",
    "default_state_path",
    "default_path",
    "user_state_dir",
    "write_atomic",
    "move_aside",
    "remove_stale_temps",
    "CorruptState",
]
