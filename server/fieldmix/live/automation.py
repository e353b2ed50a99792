"""Cues, running motions and sensor mappings of a live show, evaluated at a control rate.

The pure parts live in :mod:`fieldmix.cues`, :mod:`fieldmix.motion` and
:mod:`fieldmix.mappings`; this module runs them against the live core:

* a ticker on the event loop (``rate_hz``, default 100 Hz) asks the cue runner, every
  running motion and the mapping set for their commands and applies them through
  :meth:`LiveCore.apply_commands` with the origins ``"cue"``, ``"motion"`` and
  ``"mapping"`` (so the page, OSC subscribers, the autosave and a control recording see
  them like any other change);
* cue fades and motions are evaluated **one glide time ahead** (``lookahead``): the engine
  ramps every new target linearly over the show's glide time, so a target for time
  ``t + glide`` pushed at ``t`` is reached at ``t + glide``; for a fade this puts the
  audio on the fade's own timeline (no lag of one glide), and the fade's final value is
  reached at its scripted end. The ticker also wakes at the exact moment a fade's last
  target is due, not only on its 10 ms grid;
* control addresses of its own (docs/cues.md, docs/motion.md): ``/cue/go [n]``,
  ``/cue/back``, ``/cue/stop``, ``/cue/standby <n>``, ``/cue/record <n> [name]``,
  ``/source/<id>/motion/orbit|line|drift ...`` and ``/source/<id>/motion/stop``;
* sensor mappings take OSC messages whose address matches one of them
  (:meth:`feed`), before the control grammar sees them.

Bad arguments raise :class:`ControlError` (counted and reported by the core, like any
refused message); nothing here ever raises out of the ticker.
"""

from __future__ import annotations

import asyncio
import logging
import math
import time
from typing import Optional, Sequence

from ..control import Command
from ..cues import CueList, CueRunner, control_number
from ..errors import ConfigError, ControlError
from ..mappings import MappingSet
from ..motion import Motion, parse_motion

__all__ = ["Automation", "AUTOMATION_PREFIXES"]

log = logging.getLogger("fieldmix.automation")

#: Address beginnings this module takes (the rest of the grammar goes to the state).
AUTOMATION_PREFIXES = ("/cue/", "/record/")

_MOTION_KINDS = ("orbit", "line", "drift", "stop")


def _num(v, what: str, address: str) -> float:
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        raise ControlError("bad_type", f"{address}: expected a number for <{what}>, got {type(v).__name__}")
    x = float(v)
    if not math.isfinite(x):
        raise ControlError("not_finite", f"{address}: <{what}> must be finite, got {x}")
    return x


def _count(address: str, args: Sequence, lo: int, hi: int) -> None:
    if not lo <= len(args) <= hi:
        want = str(lo) if lo == hi else f"{lo} to {hi}"
        raise ControlError("bad_arg_count", f"{address}: expected {want} arguments, got {len(args)}")


class Automation:
    """The show's cue list, running motions and sensor mappings, for one LiveCore."""

    def __init__(self, core, rate_hz: float = 100.0, clock=time.monotonic):
        self.core = core
        self.clock = clock
        show = core.show
        ids = tuple(core.state.source_ids)
        self.cues = CueRunner(show.cues if show.cues is not None else CueList((), ids))
        self.motions: dict[int, Motion] = {}
        self.mappings = MappingSet(show.mappings)
        self.period = 1.0 / float(rate_hz)
        self.lookahead = max(0.0, float(show.glide_ms) * 1e-3)
        self._task: Optional[asyncio.Task] = None
        self._wake: Optional[asyncio.Event] = None
        self._last_pos: dict[int, tuple] = {}
        self._status_sent = 0.0
        self._last_status: Optional[dict] = None
        self.ticks = 0
        self.tick_seconds = 0.0  # CPU-ish wall time spent in ticks (perf_counter), for /status
        self.tick_max = 0.0
        self.errors = 0

    # ------------------------------------------------------------------ lifecycle
    @property
    def active(self) -> bool:
        """Is there anything to tick (a fade, a wait, a motion, a mapping smoothing)?"""
        return bool(self.cues.busy or self.motions or len(self.mappings))

    async def start(self) -> None:
        if self._task is None:
            self._wake = asyncio.Event()
            self._task = asyncio.get_running_loop().create_task(self._run(), name="fieldmix-automation")

    async def stop(self) -> None:
        t, self._task = self._task, None
        if t is not None:
            t.cancel()
            try:
                await t
            except (asyncio.CancelledError, Exception):
                pass

    def poke(self) -> None:
        """Something started (a GO, a motion, a sensor value): tick now, not at the next period."""
        if self._wake is not None:
            self._wake.set()

    async def _run(self) -> None:
        loop = asyncio.get_running_loop()
        while True:
            if not self.active:  # nothing to do: sleep until poked (no 100 Hz idle wake-ups)
                self._maybe_status(self.clock(), force=True)  # the last picture: nothing runs
                self._wake.clear()
                await self._wake.wait()
            self._wake.clear()
            self.tick()
            delay = self._next_delay()  # from the clock after the tick
            try:
                await asyncio.wait_for(self._wake.wait(), delay)
            except asyncio.TimeoutError:
                pass

    def _next_delay(self) -> float:
        """The control period, or less when a fade's final target (or a wait, or a chain) is
        due sooner; already due: at once (the tick before it ran a little early)."""
        d = self.period
        st = self.cues.status(self.clock())
        for r in st.get("running", ()):
            rem = r.get("remaining")
            if isinstance(rem, (int, float)) and rem > 0:
                d = min(d, rem - self.lookahead)  # the final target is pushed one glide before the end
            starts = r.get("starts_in")
            if isinstance(starts, (int, float)):
                d = min(d, starts - self.lookahead)
        chain = st.get("chain_in")
        if isinstance(chain, (int, float)):
            d = min(d, chain - self.lookahead)
        return max(0.0005, d)

    # ------------------------------------------------------------------ the tick
    def tick(self, now: Optional[float] = None) -> None:
        """Advance everything to ``now`` and apply the commands. Never raises."""
        t0 = time.perf_counter()
        now = self.clock() if now is None else now
        ahead = now + self.lookahead
        core = self.core
        try:
            cmds = self.cues.tick(ahead, core.state)
            self._route_motion_requests()
            if cmds:
                core.apply_commands(cmds, origin="cue")
            mc = self._motion_commands(ahead)
            if mc:
                core.apply_commands(mc, origin="motion")
            mp = self.mappings.tick(now, core.state) if len(self.mappings) else []
            if mp:
                core.apply_commands(mp, origin="mapping")
            if cmds or mc or mp:
                core.flush_now()  # ticks are paced already: no extra coalescing delay
            self._maybe_status(now)
        except Exception:  # a bug here must not stop the show: count, log (bounded), go on
            self.errors += 1
            if self.errors <= 3 or self.errors % 1000 == 0:
                log.exception("automation tick failed (%d so far); the show keeps running", self.errors)
        dt = time.perf_counter() - t0
        self.ticks += 1
        self.tick_seconds += dt
        self.tick_max = max(self.tick_max, dt)

    def _motion_commands(self, t: float) -> list:
        out = []
        for i, m in list(self.motions.items()):
            p = m.position_at(t)
            last = self._last_pos.get(i)
            if last is not None and max(abs(a - b) for a, b in zip(p, last)) < 1e-6:
                continue
            self._last_pos[i] = p
            out.append(Command("source", i, "position", tuple(float(v) for v in p)))
        return out

    def _route_motion_requests(self) -> None:
        for req in self.cues.take_motion_requests():
            if req.motion is None:
                self.stop_motion(req.source)
            else:
                self.start_motion(req.source, req.motion, t0=req.time)

    def start_motion(self, i: int, spec, t0: Optional[float] = None) -> None:
        pos = self.core.state.sources[i].position
        self.motions[i] = Motion.start(spec, self.clock() if t0 is None else t0, tuple(float(v) for v in pos))
        self._last_pos.pop(i, None)
        self._status_changed()
        self.poke()

    def stop_motion(self, i: int) -> None:
        if self.motions.pop(i, None) is not None:
            self._last_pos.pop(i, None)
            self._status_changed()

    # ------------------------------------------------------------------ status
    def status(self) -> dict:
        st = self.cues.status(self.clock())
        ids = self.core.state.source_ids
        st["motions"] = {ids[i]: m.spec.kind for i, m in sorted(self.motions.items())}
        st["mappings"] = self.mappings.stats() if len(self.mappings) else None
        return st

    def _status_changed(self) -> None:
        self._status_sent = 0.0

    def _maybe_status(self, now: float, force: bool = False) -> None:
        """A ``cues`` event at most 10 times a second while something runs (fade progress)."""
        if not force and now - self._status_sent < 0.1:
            return
        st = self.status()
        if st == self._last_status:
            return
        self._status_sent = now
        self._last_status = st
        self.core.emit({"type": "cues", "cues": st})

    # ------------------------------------------------------------------ control addresses
    def handles(self, address: str) -> bool:
        return isinstance(address, str) and (
            address.startswith(AUTOMATION_PREFIXES) or address == "/cue" or "/motion/" in address
        )

    def apply(self, address: str, args: Sequence, origin: str = "osc") -> int:
        """One automation message; returns the number of things it did. ControlError if refused."""
        args = list(args)
        now = self.clock()
        if address.startswith("/cue/"):
            n = self._cue(address, args, now, origin)
        elif address.startswith("/record/"):
            n = self._record(address, args, origin)
        elif "/motion/" in address:
            n = self._motion(address, args)
        else:
            raise ControlError("unknown_address", f'unknown address "{address[:80]}"')
        self.poke()
        self._status_changed()
        self._maybe_status(now)
        return n

    def _cue(self, address: str, args: list, now: float, origin: str) -> int:
        op = address[len("/cue/"):]
        state = self.core.state
        if op == "go":
            _count(address, args, 0, 1)
            number = control_number(args[0]) if args else None
            cue = self.cues.go(now, state, number)
            if cue is None:
                raise ControlError("out_of_range", "/cue/go: no cue on standby (the end of the cue list)")
            log.info("cue %s %s (%s)", cue.label, cue.name, origin)
            return 1
        if op == "back":
            _count(address, args, 0, 0)
            self.cues.back(now, state)
            return 1
        if op == "stop":
            _count(address, args, 0, 0)
            self.cues.stop(now + self.lookahead)  # freeze where the audio is heading, not behind it
            return 1
        if op == "standby":
            _count(address, args, 1, 1)
            self.cues.standby(control_number(args[0]))
            return 1
        if op == "record":
            _count(address, args, 1, 2)
            name = args[1] if len(args) > 1 else None
            if name is not None and not isinstance(name, str):
                raise ControlError("bad_type", "/cue/record: the name must be a string")
            self.record_cue(args[0], name)
            return 1
        raise ControlError("unknown_address", f'unknown address "{address[:80]}" (cues: go, back, stop, standby, record)')

    def record_cue(self, number, name: Optional[str]) -> None:
        """Store the current state as cue ``number`` in the show file (atomically), and use it."""
        import json

        from ..cues import parse_cues, record_cue, write_show_atomically

        if self.cues.busy:
            raise ControlError("busy", "/cue/record: a fade is running; record when the cues are at rest")
        path = self.core.show.path
        if path is None:
            raise ControlError("out_of_range", "/cue/record: this show has no file to write to")
        try:  # the file as it is on disk now (it may have been edited since the show started)
            data = json.loads(path.read_text(encoding="utf-8"))
        except (OSError, ValueError) as exc:
            raise ControlError("out_of_range", f"/cue/record: cannot read {path.name}: {exc}") from None
        try:
            new = record_cue(data, number, name, self.core.state)
            cues = parse_cues(new.get("cues"), f"{path.name}: cues", self.core.state.source_ids)
            write_show_atomically(path, new)
        except ConfigError as exc:
            raise ControlError("out_of_range", f"/cue/record: {exc}") from None
        except OSError as exc:
            raise ControlError("out_of_range", f"/cue/record: cannot write {path.name}: {exc.strerror or exc}") from None
        nxt = self.cues.next.number if self.cues.next is not None else None
        cur = self.cues.current.number if self.cues.current is not None else None
        self.cues = CueRunner(cues)
        x = control_number(number)
        # the recorded cue is now the current one; standby stays where it was (or the one after)
        try:
            later = [c.number for c in cues if c.number > x]
            target = nxt if nxt is not None and nxt != x else (later[0] if later else None)
            if target is not None:
                self.cues.standby(target)
        except ControlError:
            pass
        log.info("recorded cue %s in %s (was current %s)", x, path.name, cur)

    def _record(self, address: str, args: list, origin: str) -> int:
        rec = getattr(self.core, "recorder", None)
        if rec is None:
            raise ControlError("unknown_address", f"{address}: recording is not available here")
        if address == "/record/start":
            _count(address, args, 0, 1)
            name = args[0] if args else None
            if name is not None and not isinstance(name, str):
                raise ControlError("bad_type", "/record/start: the file name must be a string")
            rec.start(name)
            return 1
        if address == "/record/stop":
            _count(address, args, 0, 0)
            rec.stop()
            return 1
        raise ControlError("unknown_address", f'unknown address "{address[:80]}" (record: start, stop)')

    def _motion(self, address: str, args: list) -> int:
        # /source/<id>/motion/<kind> ...
        parts = address.split("/")
        if len(parts) != 5 or parts[1] != "source" or parts[3] != "motion" or parts[4] not in _MOTION_KINDS:
            raise ControlError("unknown_address", f'unknown address "{address[:80]}" '
                               "(motions: /source/<id>/motion/orbit|line|drift|stop)")  # fmt: skip
        indices = self.core.resolve_sources(parts[2])
        kind = parts[4]
        if kind == "stop":
            _count(address, args, 0, 0)
            for i in indices:
                self.stop_motion(i)
            return len(indices)
        try:
            spec = parse_motion(self._motion_dict(kind, address, args), where=address)
        except ConfigError as exc:
            raise ControlError("out_of_range", str(exc)) from None
        for i in indices:
            self.start_motion(i, spec)
        return len(indices)

    @staticmethod
    def _motion_dict(kind: str, address: str, args: list) -> dict:
        v = [_num(a, f"argument {k + 1}", address) for k, a in enumerate(args)]
        if kind == "orbit":  # <radius> <period> [<direction: 1 left, -1 right>] [<cx> <cy>]
            _count(address, args, 2, 5)
            if len(v) == 4:
                raise ControlError("bad_arg_count", f"{address}: the centre needs both <cx> and <cy>")
            d = {"kind": "orbit", "radius": v[0], "period": v[1], "centre": [0.0, 0.0]}
            if len(v) >= 3:
                if v[2] not in (1.0, -1.0):
                    raise ControlError("out_of_range", f"{address}: <direction> is 1 (left) or -1 (right), got {v[2]:g}")
                d["direction"] = "left" if v[2] > 0 else "right"
            if len(v) == 5:
                d["centre"] = [v[3], v[4]]
            return d
        if kind == "line":  # <x1> <y1> <x2> <y2> <period>
            _count(address, args, 5, 5)
            return {"kind": "line", "from": [v[0], v[1]], "to": [v[2], v[3]], "period": v[4]}
        # drift: <xmin> <ymin> <xmax> <ymax> <speed m/s> <seed>
        _count(address, args, 6, 6)
        if v[5] != int(v[5]) or v[5] < 0:
            raise ControlError("out_of_range", f"{address}: <seed> is a whole number >= 0, got {v[5]:g}")
        return {"kind": "drift", "min": [v[0], v[1]], "max": [v[2], v[3]], "speed": v[4], "seed": int(v[5])}

    # ------------------------------------------------------------------ mappings
    def feed(self, address: str, args: Sequence) -> bool:
        """A sensor message: True if a mapping took it (bad values are counted there, not raised)."""
        if not len(self.mappings):
            return False
        took = self.mappings.feed(address, args, self.clock())
        if took:
            self.poke()
        return took
