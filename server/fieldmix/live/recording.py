"""Recording of control: every applied change, as a control script with times.

``/record/start [name]`` opens a recording, ``/record/stop`` closes it. Every change the
live core applies from then on — from OSC, the page, HTTP, cues, motions, mappings, a
played script — is written as a control-script line (docs/control-script.md):
``<seconds since the start> <address> <args...>``. The recording begins with the whole
state at time 0 (every source's position, gain, mute, solo and spread, and the master), so
``fieldmix render SHOW --script RECORDING`` reproduces the rehearsal offline from the
moment the recording started, and ``fieldmix serve SHOW --play RECORDING`` replays it live.

Files go into the ``recordings`` folder next to the show file (made when needed), or into
the per-user state folder when the show's folder is read-only. A name from a controller is
a plain file name (letters, digits, ``.``, ``_``, ``-``; no folders: a packet from the
network must not choose where we write); without one the name is the date and time.
Times are **audio time** when the live server has audio: the audio process reports the
frame position at which each pushed target version started to sound (a small ring in
shared memory), and a change is written with the time of the version that carried it, in
samples since the version that carried the start snapshot. So the recording's time 0 is
a known audio frame (``# audio frame at start: N``: where the recording begins in a WAV
written with ``--record``), and a change lands offline on the same block it landed on
live, whatever the scheduling jitter of the control process. Without audio (or when the
ring was overrun) a change is timed by the wall clock instead. Lines are flushed to disk
at least every half second and at the stop, so a crash loses at most that much.
"""

from __future__ import annotations

import logging
import os
import re
import time
from collections import deque
from pathlib import Path
from typing import Optional

from ..control import Command, command_to_message, format_line
from ..errors import ControlError

__all__ = ["ControlRecorder", "NAME_RE"]

log = logging.getLogger("fieldmix.recording")

NAME_RE = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]{0,99}")
FLUSH_S = 0.5


class ControlRecorder:
    """Writes the changes a :class:`~fieldmix.live.core.LiveCore` applies (see the module doc)."""

    def __init__(self, core, folder: Optional[Path] = None, fallback: Optional[Path] = None, clock=time.monotonic):
        self.core = core
        show_dir = Path(core.show.path).parent if core.show.path else Path.cwd()
        self.folder = Path(folder) if folder else show_dir / "recordings"
        self.fallback = Path(fallback) if fallback else None
        self.clock = clock
        self._f = None
        self.path: Optional[Path] = None
        self._t0 = 0.0
        self._last_flush = 0.0
        self.lines = 0
        self.last_path: Optional[Path] = None
        self._held: list = []
        self._pending: deque = deque()  # (version, commands, wall time) waiting for their audio frame
        self._applied: deque = deque(maxlen=512)  # (version, frame) reported by the audio process
        self._v0: Optional[int] = None  # the version that carries the start snapshot
        self._frame0: Optional[int] = None  # ... and the frame at which it sounded
        self._sr = 48000
        self._last = (0.0, 0.0)  # (script time, wall time) of the last line written

    @property
    def active(self) -> bool:
        return self._f is not None

    # ------------------------------------------------------------------ start / stop
    def _name(self, name: Optional[str]) -> str:
        if name is None or name == "":
            return time.strftime("rehearsal-%Y%m%d-%H%M%S.txt")
        if not isinstance(name, str) or not NAME_RE.fullmatch(name) or ".." in name:
            raise ControlError(
                "out_of_range",
                f"/record/start: {str(name)[:60]!r} is not a plain file name (letters, digits, '.', '_', '-'; no folders)",
            )
        return name if "." in name else name + ".txt"

    def start(self, name: Optional[str] = None) -> Path:
        if self.active:
            raise ControlError("busy", f"/record/start: already recording to {self.path.name} (/record/stop first)")
        fname = self._name(name)
        f = None
        errors = []
        for folder in [self.folder] + ([self.fallback] if self.fallback else []):
            try:
                folder.mkdir(parents=True, exist_ok=True)
                path = folder / fname
                f = open(path, "x", encoding="utf-8")  # never overwrite an earlier recording
                break
            except FileExistsError:
                raise ControlError("out_of_range", f"/record/start: {fname} exists already in {folder}") from None
            except OSError as exc:
                errors.append(f"{folder}: {exc.strerror or exc}")
        if f is None:
            raise ControlError("out_of_range", "/record/start: cannot write a recording (" + "; ".join(errors) + ")")
        self._f, self.path = f, path
        self._t0 = self.clock()
        self._last_flush = self._t0
        self.lines = 0
        core = self.core
        show = core.show
        self._held, self._pending = [], deque()
        self._applied.clear()
        self._last = (0.0, self._t0)
        self._v0 = self._frame0 = None
        link = getattr(core, "link", None)
        if link is not None and hasattr(link, "applied_targets"):
            link.applied_targets()  # forget what was reported before this recording
            self._sr = int(getattr(link, "samplerate", 48000) or 48000)
            self._v0 = core.push_now()  # the start snapshot's version: its frame is time 0
        f.write("# fieldmix control recording (docs/control-script.md)\n")
        f.write(f"# show: {show.path.name if show.path else 'show'}\n")
        f.write(f"# started: {time.strftime('%Y-%m-%d %H:%M:%S %z')}\n")
        f.write("# the state at the start:\n")
        ids = core.state.source_ids
        st = core.state
        for i, s in enumerate(st.sources):
            for c in (
                Command("source", i, "position", tuple(float(v) for v in s.position)),
                Command("source", i, "gain", (float(s.gain_db),)),
                Command("source", i, "mute", (1.0 if s.mute else 0.0,)),
                Command("source", i, "solo", (1.0 if s.solo else 0.0,)),
                Command("source", i, "spread", (float(s.spread),)),
            ):
                self._line(0.0, c, ids)
        self._line(0.0, Command("master", None, "gain", (float(st.master_gain_db),)), ids)
        self._line(0.0, Command("master", None, "mute", (1.0 if st.master_mute else 0.0,)), ids)
        f.write("# changes:\n")
        f.flush()
        log.info("recording control to %s", path)
        core.emit({"type": "recording", "recording": self.info()})
        return path

    def stop(self) -> Optional[Path]:
        if not self.active:
            raise ControlError("out_of_range", "/record/stop: not recording")
        self.commit(self.core.push_now() if self._held and self._v0 is not None else None)
        self.poll(final=True)
        f, self._f = self._f, None
        try:
            f.flush()
            os.fsync(f.fileno())
        except OSError:
            pass
        f.close()
        self.last_path = self.path
        log.info("recording stopped: %s (%d lines)", self.path, self.lines)
        self.core.emit({"type": "recording", "recording": self.info()})
        return self.path

    def close(self) -> None:
        """At exit: stop a running recording (its file stays complete)."""
        if self.active:
            self.stop()

    def info(self) -> dict:
        p = self.path if self.active else self.last_path
        return {"active": self.active, "file": str(p) if p else None, "lines": self.lines}

    # ------------------------------------------------------------------ lines
    def _line(self, t: float, c: Command, ids) -> None:
        address, args = command_to_message(c, ids)
        self._f.write(format_line(round(t, 6), address, args) + "\n")
        self.lines += 1

    def add(self, cmds) -> None:
        """Applied commands, held until the core pushes them to the audio (:meth:`commit`)."""
        if self._f is not None:
            self._held.extend(cmds)

    def commit(self, version: Optional[int] = None) -> None:
        """The core pushed the held commands to the audio as target ``version`` (None: no
        audio): they are written with the audio time at which that version sounds."""
        if self._f is None:
            return
        if self._held:
            cmds, self._held = self._held, []
            if self._v0 is None or version is None:
                self.write(cmds)
            else:
                self._pending.append((version, cmds, self.clock()))
        self.poll()

    def poll(self, final: bool = False) -> None:
        """Write the held changes whose audio frame is known (the core and the daemon call
        this often); ``final``: write everything, estimating what is still unknown."""
        if self._f is None or self._v0 is None:
            return
        link = self.core.link
        if link is not None:
            self._applied.extend(link.applied_targets())
        now = self.clock()
        if self._frame0 is None:
            f0 = self._frame_of(self._v0)
            if f0 is None and not final and now - self._t0 < 1.0:
                return  # the start has not sounded yet: hold everything
            if f0 is None:  # never reported (no audio running?): wall-clock times from here on
                log.warning("recording: the audio did not report the start; times are wall-clock estimates")
                self._v0 = None
                for _, cmds, wall in self._pending:
                    self._write_at(max(0.0, wall - self._t0), cmds, wall)
                self._pending.clear()
                return
            self._frame0 = f0
            self._f.write(f"# audio frame at start: {f0} ({self._sr} Hz)\n")
        while self._pending:
            v, cmds, wall = self._pending[0]
            fr = self._frame_of(v)
            if fr is not None:
                t = (fr - self._frame0) / self._sr
            elif final or now - wall > 0.5:  # lost from the ring, or no audio: estimate from the wall clock
                t = self._last[0] + (wall - self._last[1])
            else:
                break
            self._pending.popleft()
            self._write_at(t, cmds, wall)

    def _frame_of(self, version: int) -> Optional[int]:
        for v, fr in self._applied:  # the first version at or after ``version`` carried it
            if v >= version:
                return fr
        return None

    def _write_at(self, t: float, cmds, wall: float) -> None:
        t = max(t, self._last[0])  # a script never goes back in time
        self._last = (t, wall)
        ids = self.core.state.source_ids
        try:
            for c in cmds:
                self._line(t, c, ids)
            if wall - self._last_flush >= FLUSH_S:
                self._f.flush()
                self._last_flush = wall
        except (OSError, ValueError) as exc:
            self._fail(exc)

    def write(self, cmds) -> None:
        """Commands with the time now; never raises into the caller."""
        if self._f is None:
            return
        now = self.clock()
        self._write_at(max(0.0, now - self._t0), cmds, now)

    def _fail(self, exc) -> None:
        """Disk full, ...: stop recording, keep the show running."""
        if self._f is not None:
            log.error("recording stopped: %s", exc)
            try:
                self._f.close()
            except OSError:
                pass
            self._f = None
            self.last_path = self.path
            self.core.emit({"type": "recording", "recording": dict(self.info(), error=str(exc))})
