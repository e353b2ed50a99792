"""LiveCore: the one object every live controller talks to.

It owns the :class:`~fieldmix.state.ShowState` and (when audio runs) the
:class:`~fieldmix.audio.link.AudioLink`. Transports (OSC over UDP/TCP, the
websocket, the layout watcher, script playback) call it from the asyncio event
loop thread only, so it needs no locks.

- ``apply_message(address, args, origin)`` parses with the one control grammar
  (:mod:`fieldmix.control`, OSC 1.0 wildcards through :mod:`fieldmix.oscwire`),
  applies, counts, and notifies listeners; a bad message raises ControlError and
  changes nothing.
- Target gains are pushed to the audio child at most every ``flush_interval``
  seconds (coalescing a burst of moves into one recompute of the moved rows).
- Listeners (OSC subscribers, websocket clients, the autosave) get plain dict
  events; see docs/web-api.md for their shapes.
"""

from __future__ import annotations

import asyncio
import logging
import re
import time
from collections import Counter
from pathlib import Path
from typing import Callable, Optional, Sequence

from ..control import Command, parse_message
from ..errors import ConfigError, ControlError, FieldmixError
from ..layout import load_layout
from ..model import Layout, Show
from ..oscwire import OscDecodeError, match_segment
from ..state import ShowState

log = logging.getLogger("fieldmix.live")

Listener = Callable[[dict], None]

_PATTERN_CHARS = re.compile(r"[?*\[\]{}]")  # OSC 1.0 address pattern characters


def osc_match(pattern: str, candidates: Sequence) -> list[int]:
    """The control grammar's wildcard hook: OSC 1.0 patterns over ids / 1-based indices."""
    try:
        return match_segment(pattern, candidates)
    except OscDecodeError as exc:
        raise ControlError("unknown_address", f"bad address pattern: {exc}") from None


class RateLimitedLog:
    """Log at most ``per_second`` lines a second; count the rest and say so."""

    def __init__(self, logger: logging.Logger, per_second: float = 5.0):
        self.logger = logger
        self.interval = 1.0 / per_second
        self.next_ok = 0.0
        self.suppressed = 0

    def warning(self, msg: str) -> None:
        now = time.monotonic()
        if now >= self.next_ok:
            if self.suppressed:
                msg = f"{msg} ({self.suppressed} similar messages suppressed)"
                self.suppressed = 0
            self.logger.warning(msg)
            self.next_ok = now + self.interval
        else:
            self.suppressed += 1


def layout_summary(layout: Layout) -> dict:
    return {
        "name": layout.name,
        "file": layout.path.name if layout.path else None,
        "panner": layout.panner,
        "channels": layout.n_channels,
        "speakers": [
            {
                "id": s.id,
                "output": s.output,
                "azimuth": round(s.azimuth, 4),
                "elevation": round(s.elevation, 4),
                "distance": round(s.distance, 4),
                "position": [round(v, 4) for v in s.position],
                "sub": s.sub,
                "trim_db": round(s.trim_db, 3),
                "delay_ms": round(s.delay_ms, 3),
            }
            for s in layout.speakers
        ],
    }


class LiveCore:
    def __init__(
        self,
        show: Show,
        layouts_dir: Optional[Path] = None,
        flush_interval: float = 0.005,
    ):
        self.show = show
        self.state = ShowState(show)
        self.layouts_dir = Path(layouts_dir) if layouts_dir else (Path(show.layout.path).parent if show.layout.path else None)
        self.link = None  # an AudioLink, attached by the daemon
        self.flush_interval = flush_interval
        self.panicked = False
        self.listeners: list[Listener] = []
        self.applied = Counter()  # by origin
        self.rejected = Counter()  # by reason
        self.last_error: Optional[dict] = None
        self.layout_error: Optional[str] = None  # a hot-reload error that stays until fixed
        self._flush_handle: Optional[asyncio.Handle] = None
        self._last_flush = 0.0
        self._pushed_version = -1
        self._ratelog = RateLimitedLog(log)
        self.started = time.time()
        self.recorder = None  # a live.recording.ControlRecorder, attached by the daemon
        from .automation import Automation  # (imports the cue, motion and mapping modules)

        self.automation = Automation(self)

    # ------------------------------------------------------------ listeners
    def add_listener(self, fn: Listener) -> None:
        self.listeners.append(fn)

    def remove_listener(self, fn: Listener) -> None:
        try:
            self.listeners.remove(fn)
        except ValueError:
            pass

    def emit(self, event: dict) -> None:
        for fn in list(self.listeners):
            try:
                fn(event)
            except Exception:  # a broken listener must never stop the show
                log.exception("listener failed; removing it")
                self.remove_listener(fn)

    # ------------------------------------------------------------- control
    def apply_message(self, address: str, args: Sequence, origin: str = "osc") -> list[Command]:
        """Parse and apply one control message; ControlError (counted, reported) if it is refused."""
        # a literal address takes the grammar's exact lookup (same result, about 4x faster)
        match = osc_match if isinstance(address, str) and _PATTERN_CHARS.search(address) else None
        if self.automation.handles(address):  # cues, motions, recording
            try:
                n = self.automation.apply(address, args, origin)
            except ControlError as exc:
                self.reject(exc, origin, address)
                raise
            self.applied[origin] += n
            return []
        try:
            cmds = parse_message(address, list(args), self.state.source_ids, match=match)
        except ControlError as exc:
            self.reject(exc, origin, address)
            raise
        self.apply_commands(cmds, origin)
        return cmds

    def reject(self, exc: ControlError, origin: str, address: str = "") -> None:
        self.rejected[exc.reason] += 1
        self.last_error = {"reason": exc.reason, "message": exc.message, "origin": origin, "address": address}
        self._ratelog.warning(f"{origin}: ignored {address!s}: {exc.message}")
        self.emit({"type": "error", "error": dict(self.last_error, kind="control")})

    def apply_commands(self, cmds: Sequence[Command], origin: str = "osc") -> None:
        touched_sources: list[int] = []
        master = False
        release = False
        for c in cmds:
            self.state.apply(c)
            if c.target == "source":
                if c.source not in touched_sources:
                    touched_sources.append(c.source)
            else:
                master = True
                if c.param == "mute" and not c.value[0]:
                    release = True
        self.applied[origin] += len(cmds)
        if self.recorder is not None and self.recorder.active:
            self.recorder.add(cmds)  # written with the time of the push that takes them to the audio
        if release and self.panicked:  # "/master/mute 0" releases panic, from every controller
            self.panicked = False
            if self.link is not None:
                self.link.panic(False)
        for i in touched_sources:
            self.emit({"type": "source", "source": self.state.sources[i].to_dict(), "origin": origin})
        if master:
            self.emit({"type": "master", "master": self.master_dict(), "origin": origin})
        self.schedule_flush()

    def resolve_sources(self, part: str) -> tuple:
        """Source indices for one address part: an id, a 1-based number or an OSC pattern."""
        from ..control import _resolve_sources

        match = osc_match if _PATTERN_CHARS.search(part) else None
        return _resolve_sources(part, self.state.source_ids, match)

    def master_dict(self) -> dict:
        return {"gain_db": self.state.master_gain_db, "mute": self.state.master_mute, "panic": self.panicked}

    def set_panic(self, on: bool, origin: str = "osc") -> None:
        """Panic: every output silent within one block, until released (``/master/mute 0``)."""
        self.panicked = bool(on)
        if self.link is not None:
            self.link.panic(self.panicked)
        self.emit({"type": "master", "master": self.master_dict(), "origin": origin})

    # ------------------------------------------------------------- targets
    def schedule_flush(self) -> None:
        if self._flush_handle is not None:
            return
        try:
            loop = asyncio.get_running_loop()
        except RuntimeError:  # no loop (tests, offline use): push now
            self.flush()
            return
        delay = max(0.0, self._last_flush + self.flush_interval - time.monotonic())
        self._flush_handle = loop.call_later(delay, self.flush)

    def flush(self) -> None:
        self._flush_handle = None
        self._last_flush = time.monotonic()
        v = None
        if self.state.version != self._pushed_version:
            G = self.state.target_matrix()
            self._pushed_version = self.state.version
            if self.link is not None:
                v = self.link.push_targets(G)
        if self.recorder is not None:
            self.recorder.commit(v)

    def flush_now(self) -> None:
        """Push changed targets at once, not after the coalescing interval (the automation
        ticker calls this: its ticks are already paced, and a fade's last value must not wait)."""
        if self._flush_handle is not None:
            self._flush_handle.cancel()
        self.flush()

    def push_now(self) -> Optional[int]:
        """Push the current targets at once, changed or not; their version (None without audio)."""
        if self.link is None:
            return None
        G = self.state.target_matrix()
        self._pushed_version = self.state.version
        return self.link.push_targets(G)

    # -------------------------------------------------------------- layouts
    def available_layouts(self) -> list[str]:
        if not self.layouts_dir or not self.layouts_dir.is_dir():
            return []
        return sorted(p.stem for p in self.layouts_dir.glob("*.json"))

    def layout_path_for(self, name: str) -> Path:
        """A layout in the layouts folder by stem or file name; nothing outside it."""
        if not isinstance(name, str) or not name or "/" in name or "\\" in name or name.startswith("."):
            raise ControlError("out_of_range", f"not a layout name: {name!r}")
        stem = name[:-5] if name.endswith(".json") else name
        if stem not in self.available_layouts():
            raise ControlError("out_of_range", f'no layout "{stem}" in {self.layouts_dir}')
        return self.layouts_dir / f"{stem}.json"

    def load_layout(self, layout: Layout, origin: str = "osc") -> None:
        """Switch to ``layout``; ConfigError (old layout kept) if it cannot serve the show."""
        self.state.set_layout(layout)
        self.layout_error = None
        if self.link is not None:
            sr = self.link.status().get("samplerate") or self.show.samplerate
            self.link.send_layout(self.state.engine_layout(int(sr)), self.state.target_matrix())
            self._pushed_version = self.state.version
        else:
            self.schedule_flush()
        log.info("layout %s active (%d speakers, panner %s)", layout.name, len(layout.speakers), layout.panner)
        self.emit({"type": "layout", "layout": layout_summary(layout), "origin": origin})

    def load_layout_file(self, path: Path, origin: str = "osc") -> None:
        try:
            layout = load_layout(Path(path))
            self.load_layout(layout, origin)
        except ConfigError as exc:
            self.report_layout_error(str(exc))
            raise

    def report_layout_error(self, message: str) -> None:
        self.layout_error = message
        log.error("layout not loaded, the previous one keeps playing: %s", message)
        self.emit({"type": "error", "error": {"kind": "layout", "message": message}})

    # ------------------------------------------------------------- reports
    def status(self) -> dict:
        audio = self.link.status() if self.link is not None else {"state": "offline"}
        return {
            "audio": audio,
            "layout": self.state.layout.name,
            "layout_error": self.layout_error,
            "panic": self.panicked,
            "messages": {"applied": dict(self.applied), "rejected": dict(self.rejected)},
            "last_error": self.last_error,
            "uptime_s": round(time.time() - self.started, 3),
            "automation": self._automation_status(),
            "recording": self.recorder.info() if self.recorder is not None else None,
        }

    def _automation_status(self) -> dict:
        a = self.automation
        return {
            "ticks": a.ticks,
            "tick_ms_mean": round(1e3 * a.tick_seconds / a.ticks, 4) if a.ticks else None,
            "tick_ms_max": round(1e3 * a.tick_max, 4),
            "motions": len(a.motions),
            "mappings": len(a.mappings),
            "errors": a.errors,
        }

    def snapshot(self) -> dict:
        """The whole state, as GET /api/state returns it."""
        return {
            "show": self.show.raw.get("name") or (self.show.path.stem if self.show.path else "show"),
            "layout": layout_summary(self.state.layout),
            "layouts": self.available_layouts(),
            "master": self.master_dict(),
            "sources": [s.to_dict() for s in self.state.sources],
            "cues": self.automation.status(),
            "status": self.status(),
        }


__all__ = ["LiveCore", "layout_summary", "osc_match", "RateLimitedLog", "FieldmixError"]
