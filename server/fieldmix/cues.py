"""Cue lists: the show file's ``cues`` key, checked, and a runner that plays them.

A cue is a numbered step of a show (``12``, ``12.5``): when the operator presses GO it
fades some sources (and the master) from wherever they are to the values the cue names.
User documentation: docs/cues.md; schema: ``schemas/cues.schema.json``.

This module is pure: no sockets, no asyncio, no clocks of its own. Every method of
:class:`CueRunner` takes the current time ``now`` (seconds, monotonic, float) from the
caller, reads the live values from a :class:`fieldmix.state.ShowState` (it never writes
to it) and hands back :class:`fieldmix.control.Command` objects for the caller to apply.

- :func:`parse_cues` checks a cue list and builds a :class:`CueList` (or raises
  :class:`~fieldmix.errors.ConfigError` naming the place: ``show.json: cues[3].targets.buoy.azimuth``).
- :class:`CueRunner` holds the list, the current and the standby cue, and the running
  fades; :meth:`CueRunner.tick` (called at a control rate such as 100 Hz) returns the
  commands to apply now.
- :func:`record_cue` stores the current state as a cue in a show dict;
  :func:`write_show_atomically` writes a show file so that a crash never leaves half a file.

Rules of a fade (docs/cues.md says the same for users):

- fades move positions, not gains: a spherical target (``azimuth``/``elevation``/
  ``distance``) moves the azimuth along the arc (the shorter one, or the direction
  ``path`` names: ``left`` = azimuth increasing, ``right`` = decreasing) and elevation and
  distance linearly; a cartesian target (``position``) moves in a straight line; gains
  move linearly in dB, spread linearly in degrees; unmuting happens when the fade starts,
  muting when it ends;
- a fade ends exactly on time: at ``t >= start + fade`` the values are the targets
  themselves (not an interpolation that happens to be close);
- a cue takes over only the parameters it names, at the moment its fade starts, from
  where they are at that moment (a fade of an earlier cue still running on that
  parameter is dropped there: no jump). Parameters it does not name keep doing what they
  were doing: an earlier cue's fade on them runs on to its own end ("tracking"). Azimuth,
  elevation and distance are separate parameters; a ``position`` target takes all three.
- motions (``fieldmix.motion``) are not run here: a cue hands them out as
  :class:`MotionRequest` objects (:meth:`CueRunner.take_motion_requests`).
"""

from __future__ import annotations

import copy
import json
import math
import numbers
import struct
from dataclasses import dataclass
from decimal import Decimal
from pathlib import Path
from typing import Any, Callable, Mapping, Optional, Sequence

from fieldmix import geometry
from fieldmix.control import ADDRESSES, Command
from fieldmix.errors import ConfigError, ControlError
from fieldmix.jsonload import check_plain, did_you_mean, format_path, oneline, quote, show_value, write_atomic

# ----------------------------------------------------------------------------- constants


def _smooth(p: float) -> float:
    # cubic Hermite "smoothstep" 3p^2 - 2p^3: symmetric about (0.5, 0.5), slope 0 at both
    # ends (common practice in animation and graphics, no source)
    return p * p * (3.0 - 2.0 * p)


#: Fade shapes: name -> f(p) for progress p in [0, 1], f(0) = 0, f(1) = 1.
SHAPES: Mapping[str, Callable[[float], float]] = {
    "linear": lambda p: p,
    "s_curve": _smooth,  # eased at both ends
    "ease_in": lambda p: p * p,  # starts slowly, arrives at full speed
    "ease_out": lambda p: p * (2.0 - p),  # leaves at full speed, arrives slowly
}
DEFAULT_SHAPE = "linear"

#: Arc of an azimuth move: the shorter way, or always increasing / decreasing azimuth.
PATHS = ("short", "left", "right")
DEFAULT_PATH = "short"

MAX_TIME_S = 86400.0  # longest fade or wait: a day (anything longer is a typo)
MAX_CUE_NUMBER = 1_000_000.0  # cue numbers are 0 <= n < this
DEFAULT_RECORD_FADE = 3.0  # fade of a cue made by record_cue when nothing else says

CUE_KEYS = ("number", "name", "notes", "fade", "shape", "wait", "chain", "targets", "master")
TARGET_KEYS = ("azimuth", "elevation", "distance", "position", "path", "gain_db", "mute", "spread", "motion")
MASTER_KEYS = ("gain_db",)


def _range(template: str, k: int = 0) -> tuple:
    a = ADDRESSES[template].args[k]
    return a.lo, a.hi


# ranges: the very ones of the control grammar (docs/osc.md), so a cue can hold whatever
# a controller can set, and nothing else
ELEVATION_RANGE = _range("/source/<id>/elevation")
DISTANCE_RANGE = _range("/source/<id>/distance")
COORD_RANGE = _range("/source/<id>/position")
GAIN_RANGE = _range("/source/<id>/gain")
SPREAD_RANGE = _range("/source/<id>/spread")
MASTER_GAIN_RANGE = _range("/master/gain")


# ----------------------------------------------------------------------------- the data


@dataclass(frozen=True)
class SourceTarget:
    """What one cue does to one source. ``None`` = not touched by this cue."""

    source: int  # 0-based source index
    id: str
    azimuth: Optional[float] = None  # degrees, wrapped to (-180, 180]
    elevation: Optional[float] = None
    distance: Optional[float] = None
    position: Optional[tuple] = None  # (x, y) or (x, y, z), metres; (x, y) keeps the height
    path: str = DEFAULT_PATH
    gain_db: Optional[float] = None
    mute: Optional[bool] = None
    spread: Optional[float] = None
    has_motion: bool = False  # the cue names "motion" (``motion`` None then means: stop it)
    motion: Any = None  # the fieldmix.motion spec parse_motion made of it

    @property
    def spherical(self) -> bool:
        return self.azimuth is not None or self.elevation is not None or self.distance is not None

    @property
    def moves(self) -> bool:
        return self.spherical or self.position is not None


@dataclass(frozen=True)
class Cue:
    number: float
    label: str  # the number as people read it: "12.5", "10"
    name: str = ""
    fade: float = 0.0  # seconds
    shape: str = DEFAULT_SHAPE
    wait: float = 0.0  # seconds between GO and the start of the fade
    chain: bool = False  # when the fade ends, GO the standby cue automatically
    sources: tuple = ()  # SourceTarget, in source order
    master_gain_db: Optional[float] = None
    notes: str = ""
    place: int = 0  # 0-based place in the file's list (for messages)

    def summary(self) -> dict:
        return {
            "number": self.number,
            "label": self.label,
            "name": self.name,
            "fade": self.fade,
            "wait": self.wait,
            "shape": self.shape,
            "chain": self.chain,
        }


@dataclass(frozen=True)
class CueList:
    """Cues in numeric order, and the source ids they were checked against."""

    cues: tuple = ()
    source_ids: tuple = ()

    def __len__(self) -> int:
        return len(self.cues)

    def __iter__(self):
        return iter(self.cues)

    def __getitem__(self, i: int) -> Cue:
        return self.cues[i]

    @property
    def numbers(self) -> tuple:
        return tuple(c.number for c in self.cues)

    def index_of(self, number) -> int:
        """Index of cue ``number`` (int, float, or text such as ``"12.5"``).

        A float that went through OSC as float32 (12.3 arrives as 12.300000190734863)
        still finds cue 12.3. Raises ControlError if there is no such cue.
        """
        x = control_number(number)
        for i, c in enumerate(self.cues):
            if c.number == x:
                return i
        f32 = _f32(x)
        hits = [i for i, c in enumerate(self.cues) if _f32(c.number) == f32]
        if len(hits) == 1:
            return hits[0]
        if len(hits) > 1:
            raise ControlError(
                "out_of_range",
                f"cue {number_label(x)} is ambiguous at single precision: "
                + ", ".join(self.cues[i].label for i in hits),
            )
        raise ControlError("out_of_range", f"no cue {number_label(x)} in the cue list{self._range_text()}")

    def _range_text(self) -> str:
        if not self.cues:
            return " (the list is empty)"
        return f" (cues {self.cues[0].label} .. {self.cues[-1].label})"


@dataclass(frozen=True)
class MotionRequest:
    """A cue asks the motion module to start (``motion`` not None) or stop a motion.

    Returned by :meth:`CueRunner.take_motion_requests`, apart from the Commands (which
    :meth:`fieldmix.state.ShowState.apply` takes), for the caller to route to the motion
    module. ``motion`` is the spec :func:`fieldmix.motion.parse_motion` returned for the
    cue's ``motion`` object (start it with ``Motion.start(spec, request.time, position)``);
    ``None`` means: stop this source's motion.
    """

    source: int  # 0-based source index
    source_id: str
    motion: Any  # None = stop
    cue: str  # label of the cue that asked ("back to 3" for a back)
    time: float  # when the cue's fade started (the caller's clock)


# ----------------------------------------------------------------------------- numbers


def number_label(x: float) -> str:
    """A cue number as people write it: ``12.5``, ``10``, ``0.25``."""
    d = Decimal(repr(float(x))).normalize()
    text = format(d, "f")
    return text


def _f32(x: float) -> float:
    try:
        return struct.unpack("<f", struct.pack("<f", x))[0]
    except OverflowError:
        return x


def _number_from_text(s: str) -> Optional[float]:
    t = s.strip()
    if not t or len(t) > 32:
        return None
    digits = t.replace(".", "", 1)
    if not digits.isdigit() or not digits.isascii() or t.startswith(".") or t.endswith("."):
        return None
    return float(t)


def control_number(number) -> float:
    """A cue number given by a controller (int, float or text): ControlError if unusable."""
    if isinstance(number, bool) or number is None:
        raise ControlError("bad_type", f"expected a cue number, got {show_value(number)}")
    if isinstance(number, str):
        x = _number_from_text(number)
        if x is None:
            raise ControlError("bad_type", f"expected a cue number such as 12 or 12.5, got {quote(number, 30)}")
    elif isinstance(number, (numbers.Real, Decimal)):
        try:
            x = float(number)
        except (OverflowError, ValueError):
            raise ControlError("out_of_range", f"cue number {show_value(number)} is far out of range") from None
        if not math.isfinite(x):
            raise ControlError("not_finite", f"cue number {show_value(number)} is not a finite number")
    else:
        raise ControlError("bad_type", f"expected a cue number, got {type(number).__name__}")
    if not (0.0 <= x < MAX_CUE_NUMBER):
        raise ControlError("out_of_range", f"cue number {number_label(x)} is out of range (0 .. below 1000000)")
    return x


# ----------------------------------------------------------------------------- parsing


class _Places:
    """Error places below the list's own name: ``show.json: cues`` + ``[3].fade``."""

    def __init__(self, where: str):
        self.where = where

    def __call__(self, *parts) -> str:
        return self.text(format_path(parts))

    def text(self, path: str) -> str:
        if not self.where:
            return path
        if path.startswith("["):
            return self.where + path
        return f"{self.where}.{path}" if path else self.where


def _is_number(v) -> bool:
    return isinstance(v, numbers.Real) and not isinstance(v, bool)


def _finite(v, place: str, what: str = "a number") -> float:
    if not _is_number(v):
        extra = " (true/false is not a number)" if isinstance(v, bool) else ""
        raise ConfigError(place, f"expected {what}, got {show_value(v)}{extra}")
    try:
        f = float(v)
    except (OverflowError, ValueError):
        raise ConfigError(place, f"{show_value(v)} is far out of range") from None
    if not math.isfinite(f):
        raise ConfigError(place, f"{show_value(v)} is not allowed: numbers must be finite")
    return f


def _ranged(v, place: str, lo, hi, unit: str) -> float:
    f = _finite(v, place)
    if (lo is not None and f < lo) or (hi is not None and f > hi):
        raise ConfigError(place, f"{show_value(v)} is out of range: must be from {_n(lo)} to {_n(hi)} {unit}")
    return f


def _n(x) -> str:
    return number_label(x) if x >= 0 else "-" + number_label(-x)


def _seconds(v, place: str) -> float:
    f = _finite(v, place, "a time in seconds")
    if f < 0:
        raise ConfigError(place, f"{show_value(v)} is negative: times are 0 or more seconds")
    if f > MAX_TIME_S:
        raise ConfigError(place, f"{show_value(v)} is too long: at most {_n(MAX_TIME_S)} seconds (a day)")
    return f


def _check_keys(obj: dict, allowed: Sequence[str], place: Callable, parts: tuple) -> None:
    for k in obj:
        if k not in allowed:
            raise ConfigError(
                place(*parts, k),
                f"unknown key {quote(k)}{did_you_mean(k, allowed)}; allowed keys: {', '.join(allowed)}",
            )


def _cue_number(v, place: str) -> float:
    if isinstance(v, str):
        x = _number_from_text(v)
        if x is None:
            raise ConfigError(
                place, f"{show_value(v)} is not a cue number: write digits with at most one point, such as 12 or \"12.5\""
            )
    else:
        x = _finite(v, place, 'a cue number (such as 12, 12.5 or "12.5")')
    if x < 0:
        raise ConfigError(place, f"{show_value(v)} is negative: cue numbers are 0 or more")
    if x >= MAX_CUE_NUMBER:
        raise ConfigError(place, f"{show_value(v)} is too large: cue numbers are below 1000000")
    return x


def _resolve_source(key: str, source_ids: Sequence[str], place: str) -> int:
    n = len(source_ids)
    if key.isdigit() and key.isascii():
        k = int(key)
        if 1 <= k <= n:
            return k - 1
        raise ConfigError(place, f"no source number {k}: the show has {n} source{'s' if n != 1 else ''} (1..{n})")
    for i, sid in enumerate(source_ids):
        if sid == key:
            return i
    raise ConfigError(place, f"unknown source {quote(key)}{did_you_mean(key, source_ids)}")


def _parse_motion(data, place: str):
    """``null`` (stop the motion), or what ``fieldmix.motion.parse_motion`` makes of the object."""
    if data is None:
        return None
    if not isinstance(data, dict):
        raise ConfigError(place, f"expected an object describing the motion (or null to stop it), got {show_value(data)}")
    from fieldmix.motion import parse_motion  # lazily: only cue lists with motions need it

    return parse_motion(data, place)


def _parse_target(key: str, tgt, idx: int, sid: str, place: Callable, parts: tuple) -> SourceTarget:
    if not isinstance(tgt, dict):
        raise ConfigError(place(*parts), f"expected an object of source values, got {show_value(tgt)}")
    _check_keys(tgt, TARGET_KEYS, place, parts)
    if not tgt:
        raise ConfigError(place(*parts), f"names no value: give any of {', '.join(TARGET_KEYS)}")
    sph = [k for k in ("azimuth", "elevation", "distance") if k in tgt]
    if "position" in tgt and sph:
        raise ConfigError(
            place(*parts),
            f'both position forms given ("position" and "{sph[0]}"): '
            "use either azimuth/elevation/distance or position, not both",
        )
    if "motion" in tgt and (sph or "position" in tgt):
        first = sph[0] if sph else "position"
        raise ConfigError(
            place(*parts, "motion"),
            f'"motion" and "{first}" in one target: a motion moves the source itself; '
            "give the start point in the motion, or move the source in an earlier cue",
        )
    vals: dict = {}
    if "azimuth" in tgt:
        a = _finite(tgt["azimuth"], place(*parts, "azimuth"), "an angle in degrees")
        vals["azimuth"] = float(geometry.wrap_deg(a))
    if "elevation" in tgt:
        vals["elevation"] = _ranged(tgt["elevation"], place(*parts, "elevation"), *ELEVATION_RANGE, "degrees")
    if "distance" in tgt:
        vals["distance"] = _ranged(tgt["distance"], place(*parts, "distance"), *DISTANCE_RANGE, "m")
    if "position" in tgt:
        p = tgt["position"]
        if not isinstance(p, (list, tuple)):
            raise ConfigError(place(*parts, "position"), f"expected a list [x, y] or [x, y, z] in metres, got {show_value(p)}")
        if not 2 <= len(p) <= 3:
            raise ConfigError(place(*parts, "position"), f"expected 2 or 3 coordinates ([x, y] or [x, y, z]), got {len(p)}")
        vals["position"] = tuple(
            _ranged(c, place(*parts, "position", k), *COORD_RANGE, "m") for k, c in enumerate(p)
        )
    if "path" in tgt:
        pv = tgt["path"]
        if "azimuth" not in tgt:
            raise ConfigError(
                place(*parts, "path"), '"path" chooses the way an azimuth moves: it needs "azimuth" in the same target'
            )
        if not isinstance(pv, str) or pv not in PATHS:
            hint = did_you_mean(pv, PATHS) if isinstance(pv, str) else ""
            raise ConfigError(
                place(*parts, "path"), f'{show_value(pv)} is not one of "short", "left" or "right"{hint}'
            )
        vals["path"] = pv
    if "gain_db" in tgt:
        vals["gain_db"] = _ranged(tgt["gain_db"], place(*parts, "gain_db"), *GAIN_RANGE, "dB")
    if "mute" in tgt:
        m = tgt["mute"]
        if not isinstance(m, bool):
            raise ConfigError(place(*parts, "mute"), f"expected true or false, got {show_value(m)}")
        vals["mute"] = m
    if "spread" in tgt:
        vals["spread"] = _ranged(tgt["spread"], place(*parts, "spread"), *SPREAD_RANGE, "degrees")
    if "motion" in tgt:
        vals["has_motion"] = True
        vals["motion"] = _parse_motion(tgt["motion"], place(*parts, "motion"))
    return SourceTarget(source=idx, id=sid, **vals)


def _parse_cue(c, i: int, source_ids: Sequence[str], place: Callable) -> Cue:
    here = (i,)
    if not isinstance(c, dict):
        raise ConfigError(place(*here), f"expected a cue (an object with a \"number\"), got {show_value(c)}")
    _check_keys(c, CUE_KEYS, place, here)
    if "number" not in c:
        raise ConfigError(place(*here), 'missing required key "number" (the cue number, such as 12 or 12.5)')
    number = _cue_number(c["number"], place(*here, "number"))
    name = c.get("name", "")
    if not isinstance(name, str):
        raise ConfigError(place(*here, "name"), f"expected a string, got {show_value(name)}")
    if len(name) > 200:
        raise ConfigError(place(*here, "name"), "is too long: at most 200 characters")
    notes = c.get("notes", "")
    if not isinstance(notes, str):
        raise ConfigError(place(*here, "notes"), f"expected a string, got {show_value(notes)}")
    fade = _seconds(c["fade"], place(*here, "fade")) if "fade" in c else 0.0
    wait = _seconds(c["wait"], place(*here, "wait")) if "wait" in c else 0.0
    shape = c.get("shape", DEFAULT_SHAPE)
    if not isinstance(shape, str) or shape not in SHAPES:
        hint = did_you_mean(shape, SHAPES) if isinstance(shape, str) else ""
        raise ConfigError(
            place(*here, "shape"),
            f"{show_value(shape)} is not a fade shape: use " + ", ".join(f'"{s}"' for s in SHAPES) + hint,
        )
    chain = c.get("chain", False)
    if not isinstance(chain, bool):
        raise ConfigError(place(*here, "chain"), f"expected true or false, got {show_value(chain)}")

    targets = c.get("targets", {})
    if not isinstance(targets, dict):
        raise ConfigError(
            place(*here, "targets"), f"expected an object {{source id or number: values}}, got {show_value(targets)}"
        )
    by_source: dict = {}
    for key, tgt in targets.items():
        parts = here + ("targets", key)
        idx = _resolve_source(key, source_ids, place(*parts))
        if idx in by_source:
            other = by_source[idx][0]
            raise ConfigError(
                place(*parts), f"source {quote(source_ids[idx])} is given twice in this cue (also as {quote(other)})"
            )
        by_source[idx] = (key, _parse_target(key, tgt, idx, source_ids[idx], place, parts))

    master_gain = None
    if "master" in c:
        m = c["master"]
        if not isinstance(m, dict):
            raise ConfigError(place(*here, "master"), f'expected an object such as {{"gain_db": -6}}, got {show_value(m)}')
        _check_keys(m, MASTER_KEYS, place, here + ("master",))
        if "gain_db" in m:
            master_gain = _ranged(m["gain_db"], place(*here, "master", "gain_db"), *MASTER_GAIN_RANGE, "dB")
    return Cue(
        number=number,
        label=number_label(number),
        name=name,
        fade=fade,
        shape=shape,
        wait=wait,
        chain=chain,
        sources=tuple(by_source[k][1] for k in sorted(by_source)),
        master_gain_db=master_gain,
        notes=notes,
        place=i,
    )


def parse_cues(data: Any, where: str, source_ids: Sequence[str]) -> CueList:
    """Check a cue list (the value of a show's ``cues`` key) and build a :class:`CueList`.

    ``where`` names the list itself, as places are written below it: with
    ``where="show.json: cues"`` a bad azimuth is reported at
    ``show.json: cues[3].targets.buoy.azimuth``. ``source_ids``: the show's source ids in
    order (targets name a source by id or by 1-based number). ``None`` (no ``cues`` key)
    is an empty list. The cues may be written in any order; they are sorted by number.
    Raises :class:`ConfigError` for the first problem found.
    """
    place = _Places(where)
    if data is None:
        return CueList((), tuple(source_ids))
    try:
        check_plain(data, "")  # NaN, duplicate keys, odd types: placed below the list's name
    except ConfigError as exc:
        raise ConfigError(place.text(exc.where), exc.message) from None
    if not isinstance(data, list):
        raise ConfigError(place(), f"expected a list of cues, got {show_value(data)}")
    cues = []
    seen: dict = {}
    for i, c in enumerate(data):
        cue = _parse_cue(c, i, source_ids, place)
        if cue.number in seen:
            raise ConfigError(
                place(i, "number"), f"duplicate cue number {cue.label}: also {place(seen[cue.number], 'number')}"
            )
        seen[cue.number] = i
        cues.append(cue)
    cues.sort(key=lambda q: q.number)
    return CueList(tuple(cues), tuple(source_ids))


# ----------------------------------------------------------------------------- fades


@dataclass
class _Run:
    """One started fade of a cue (or of a back, or a stop's hold): what status() shows."""

    label: str
    name: str
    t0: float
    dur: float
    shape: str
    kind: str = "cue"  # "cue" | "back" | "hold"

    @property
    def end(self) -> float:
        return self.t0 + self.dur

    def progress(self, t: float) -> float:
        if t >= self.end:
            return 1.0
        if self.dur <= 0.0 or t <= self.t0:
            return 0.0
        return min(1.0, max(0.0, (t - self.t0) / self.dur))


class _Fade:
    """One parameter moving from ``a`` to ``b`` over its run.

    kinds: ``num`` (gain dB, spread, elevation, distance: floats), ``arc`` (azimuth:
    ``a`` the start, ``b`` the wrapped target, ``delta`` the signed travel in degrees),
    ``mute`` (bools: unmute at the start, mute at the end), ``cart`` ((x, y, z) tuples,
    a straight line). ``value(t)`` is exactly ``b`` once ``t >= start + fade``.
    """

    __slots__ = ("run", "kind", "a", "b", "delta", "f")

    def __init__(self, run: _Run, kind: str, a, b, delta: float = 0.0):
        self.run = run
        self.kind = kind
        self.a = a
        self.b = b
        self.delta = delta
        self.f = SHAPES[run.shape]

    def value(self, t: float):
        run = self.run
        done = t >= run.end
        k = self.kind
        if k == "mute":
            if not self.b:  # unmute: at the start
                return False
            return True if done else self.a
        if done:
            return self.b
        p = self.f(run.progress(t))
        if k == "cart":
            return tuple(x0 + (x1 - x0) * p for x0, x1 in zip(self.a, self.b))
        if k == "arc":
            return self.a + self.delta * p
        return self.a + (self.b - self.a) * p


def arc_delta(start_az: float, target_az: float, path: str = DEFAULT_PATH) -> float:
    """Signed azimuth travel (degrees) from ``start_az`` to ``target_az``.

    ``short``: the shorter arc, in (-180, 180] (a half turn goes left, +180);
    ``left``: azimuth increasing, in [0, 360); ``right``: decreasing, in (-360, 0].
    Equal angles give 0 whatever the path (a cue never adds a full turn).
    """
    if path == "left":
        return (target_az - start_az) % 360.0
    if path == "right":
        return -((start_az - target_az) % 360.0)
    if path != "short":
        raise ValueError(f"unknown path {path!r}")
    return float(geometry.wrap_deg(target_az - start_az))


# Lanes, the unit of ownership: ("az"|"el"|"dist", i) spherical parts of a position,
# ("xyz", i) a cartesian move, ("gain"|"spread"|"mute", i), ("master", None).
_SPH = ("az", "el", "dist")
_POS = _SPH + ("xyz",)


def _command(lane: tuple, value) -> Command:
    kind, i = lane
    if kind == "master":
        return Command("master", None, "gain", (float(value),))
    if kind == "pos":
        return Command("source", i, "position", tuple(float(v) for v in value))
    if kind == "mute":
        return Command("source", i, "mute", (1.0 if value else 0.0,))
    return Command("source", i, kind, (float(value),))


@dataclass
class _Pending:
    time: float
    order: int  # ties: in the order they were scheduled
    what: str  # "start" | "chain"
    cue: Optional[Cue] = None
    seq: int = 0  # the firing that scheduled it


@dataclass
class _Look:
    """Tracked values of one source in a cue's look (see CueRunner.back)."""

    position: tuple
    gain_db: float
    mute: bool
    spread: float
    motion: Any = None


@dataclass
class _Rest:
    """Where a source's spherical position parts rest while some of them fade.

    ``sph`` holds the parts no lane owns (and each lane's final value once it ends);
    ``xyz`` is the position that ``sph`` was read from, given back unchanged while the
    parts still equal ``sph`` (an angle round trip would emit a spurious tiny move).
    """

    sph: list
    xyz: tuple
    sph0: tuple


class CueRunner:
    """Plays a :class:`CueList` against a live :class:`~fieldmix.state.ShowState`.

    The runner keeps the *current* cue (the last one fired) and the *next* one (standby:
    what GO fires; after a GO, the cue after the one fired). It never writes to the state:
    :meth:`tick` returns the Commands to apply (in order), and
    :meth:`take_motion_requests` the :class:`MotionRequest` objects for the motion
    module. Every method takes ``now``, the caller's monotonic clock in seconds.

    - :meth:`go`: fire the standby cue (or a cue by number). Its fade starts after its
      ``wait``, from where things are at that moment; a cue with ``chain`` fires the
      standby cue when its fade ends (at the scheduled time, so chains do not drift),
      unless the operator has pressed GO, back or stop since.
    - :meth:`back`: undo the current cue: every parameter it targets fades back to the
      value it has in the previous cue's look, with the current cue's fade time and shape;
      the previous cue becomes current and the undone cue is on standby again.
    - :meth:`stop`: freeze every running fade where it is now, and cancel every wait and
      chain still pending.
    - :meth:`standby`: choose the next cue.

    A cue owns a parameter from the start of its fade to its end; azimuth, elevation and
    distance are separate parameters (a cue naming only ``distance`` lets another cue's
    azimuth move run on), a cartesian ``position`` takes all three. Commands are emitted
    only when a value changed since it was last emitted; a position is always one
    ``position`` command (x, y, z), whatever the form of the targets.
    """

    def __init__(self, cues: CueList):
        self.cues = cues
        self._ids = tuple(cues.source_ids)
        self._current: Optional[int] = None
        self._next: Optional[int] = 0 if len(cues) else None
        self._lanes: dict = {}  # lane -> _Fade
        self._rest: dict = {}  # source index -> _Rest
        self._sent: dict = {}  # ("pos", i) / lane -> last value emitted (or read from the state)
        self._pending: list = []
        self._order = 0
        self._seq = 0  # bumped by every go / back / stop: stale chains are dropped
        self._motion: list = []
        self._now: Optional[float] = None

    # ------------------------------------------------------------------ queries
    @property
    def current(self) -> Optional[Cue]:
        return None if self._current is None else self.cues[self._current]

    @property
    def next(self) -> Optional[Cue]:
        return None if self._next is None else self.cues[self._next]

    @property
    def busy(self) -> bool:
        """True while a fade runs or a wait/chain is pending."""
        return bool(self._lanes or self._pending)

    # ------------------------------------------------------------------ controls
    def go(self, now: float, state, number=None) -> Optional[Cue]:
        """Fire the standby cue, or cue ``number``; return it (None at the end of the list).

        Raises ControlError if there is no cue ``number``. Going to a cue by number
        fires that cue alone (its targets, its fade); the cues between are not replayed.
        """
        now = _time(now)
        if number is None:
            if self._next is None:
                return None
            k = self._next
        else:
            k = self.cues.index_of(number)
        self._advance(now, state)
        self._seq += 1
        self._fire(k, now)
        self._advance(now, state)
        return self.cues[k]

    def back(self, now: float, state) -> Optional[Cue]:
        """Step back one cue: undo the current cue (see the class doc).

        Returns the cue that is current afterwards (None if that is "before the first
        cue"); without a current cue nothing happens and None is returned. Pending waits
        and chains are cancelled. Parameters the current cue does not target are left as
        they are (whatever a controller did to them stays). The previous cue's look is
        the show file's start values with the targets of every cue before the current one
        in list order laid over them.
        """
        now = _time(now)
        if self._current is None:
            return None
        self._advance(now, state)
        self._check_state(state)
        self._seq += 1
        self._pending.clear()
        k = self._current
        cur = self.cues[k]
        look_src, look_master = self._look(state, k)
        prev = self.cues[k - 1] if k > 0 else None
        run = _Run(
            label=f"back to {prev.label}" if prev else "back to the start",
            name=prev.name if prev else "",
            t0=now,
            dur=cur.fade,
            shape=cur.shape,
            kind="back",
        )
        for tg in cur.sources:
            i = tg.source
            look = look_src[i]
            if tg.moves or tg.has_motion:
                if look.motion is not None:
                    self._drop_position(i, now, state)
                    self._motion.append(MotionRequest(i, tg.id, look.motion, run.label, now))
                else:
                    if tg.has_motion and tg.motion is not None:
                        self._motion.append(MotionRequest(i, tg.id, None, run.label, now))
                    if tg.spherical:
                        az, el, d = geometry.xyz_to_sph(*look.position)
                        self._start_sph(
                            run, i, state,
                            az if tg.azimuth is not None else None,
                            el if tg.elevation is not None else None,
                            d if tg.distance is not None else None,
                            DEFAULT_PATH, now,
                        )
                    else:
                        self._start_cart(run, i, state, tuple(look.position), now)
            if tg.gain_db is not None:
                self._start_lane(run, ("gain", tg.source), "num", state, look.gain_db, now)
            if tg.spread is not None:
                self._start_lane(run, ("spread", tg.source), "num", state, look.spread, now)
            if tg.mute is not None:
                self._start_lane(run, ("mute", tg.source), "mute", state, look.mute, now)
        if cur.master_gain_db is not None:
            self._start_lane(run, ("master", None), "num", state, look_master, now)
        self._current = k - 1 if k > 0 else None
        self._next = k
        return self.current

    def stop(self, now: float) -> list:
        """Freeze every running fade at its value at ``now``; cancel pending waits and chains.

        The frozen values come out of the next :meth:`tick` (a cue fired before that tick
        starts from them). Returns the labels of the fades and waits that were stopped.
        Motions (the motion module's business) go on.
        """
        now = _time(now)
        self._seq += 1
        labels = []
        for fade in self._lanes.values():
            if fade.run.kind != "hold" and fade.run.label not in labels:
                labels.append(fade.run.label)
        for p in self._pending:
            if p.what == "start" and p.cue is not None and p.cue.label not in labels:
                labels.append(p.cue.label)
        hold = _Run("stop", "", now, 0.0, DEFAULT_SHAPE, kind="hold")
        moving = sorted({i for (kind, i) in self._lanes if kind in _POS})
        frozen = {i: self._pos_value(i, now) for i in moving}
        for lane, fade in list(self._lanes.items()):
            if lane[0] in _POS:
                del self._lanes[lane]
            else:
                v = fade.value(min(now, fade.run.end))
                kind = "mute" if lane[0] == "mute" else "num"
                self._lanes[lane] = _Fade(hold, kind, v, v)  # no length: held, emitted next tick
        for i, xyz in frozen.items():
            self._rest.pop(i, None)
            self._lanes[("xyz", i)] = _Fade(hold, "cart", xyz, xyz)
        self._pending.clear()
        self._touch(now)
        return labels

    def standby(self, number) -> Cue:
        """Make cue ``number`` the next one GO fires. Raises ControlError if there is none."""
        k = self.cues.index_of(number)
        self._next = k
        return self.cues[k]

    def tick(self, now: float, state) -> list:
        """The Commands to apply now (waits, chains and fades advanced to ``now``)."""
        now = _time(now)
        self._advance(now, state)
        out: list = []
        moving: list = []
        for lane, fade in self._lanes.items():
            kind, i = lane
            if kind in _POS:
                if i not in moving:
                    moving.append(i)
            else:
                self._emit(lane, fade.value(now), out)
        for i in moving:
            self._emit(("pos", i), self._pos_value(i, now), out)
        for lane, fade in list(self._lanes.items()):
            if now >= fade.run.end:
                self._release(lane, fade)
        return out

    def take_motion_requests(self) -> list:
        """The MotionRequests since the last call (oldest first); the list is emptied."""
        out = self._motion
        self._motion = []
        return out

    def status(self, now: Optional[float] = None) -> dict:
        """A JSON-able picture for the control page and OSC.

        ``running``: started fades with ``progress`` 0..1 and ``remaining`` seconds, then
        fired cues still in their wait (``state`` "waiting", ``starts_in`` seconds).
        ``chain_in``: seconds until a pending chain fires its GO, or None. ``now``
        defaults to the latest time the runner was given.
        """
        t = self._now if now is None else _time(now)
        if t is None:
            t = 0.0
        runs: list = []
        seen = set()
        for fade in self._lanes.values():
            r = fade.run
            if r.kind == "hold" or id(r) in seen:
                continue
            seen.add(id(r))
            runs.append(r)
        running = [
            {
                "cue": r.label,
                "name": r.name,
                "kind": r.kind,
                "state": "fading",
                "progress": r.progress(t),
                "remaining": max(0.0, r.end - t),
                "fade": r.dur,
                "shape": r.shape,
            }
            for r in sorted(runs, key=lambda r: r.t0)
        ]
        for p in sorted(self._pending, key=lambda p: (p.time, p.order)):
            if p.what == "start" and p.cue is not None:
                running.append(
                    {
                        "cue": p.cue.label,
                        "name": p.cue.name,
                        "kind": "cue",
                        "state": "waiting",
                        "progress": 0.0,
                        "starts_in": max(0.0, p.time - t),
                        "fade": p.cue.fade,
                        "shape": p.cue.shape,
                    }
                )
        chains = [p for p in self._pending if p.what == "chain" and p.seq == self._seq]
        return {
            "current": None if self.current is None else self.current.summary(),
            "next": None if self.next is None else self.next.summary(),
            "running": running,
            "chain_in": max(0.0, min(p.time for p in chains) - t) if chains else None,
            "cues": [c.summary() for c in self.cues],
        }

    # ------------------------------------------------------------------ inside
    def _touch(self, now: float) -> None:
        self._now = now if self._now is None else max(self._now, now)

    def _fire(self, k: int, t: float) -> None:
        """GO on cue index ``k`` at time ``t``."""
        cue = self.cues[k]
        self._current = k
        self._next = k + 1 if k + 1 < len(self.cues) else None
        self._order += 1
        self._pending.append(_Pending(t + cue.wait, self._order, "start", cue, self._seq))

    def _advance(self, now: float, state) -> None:
        """Run every pending start and chain due by ``now``, in time order."""
        self._touch(now)
        while self._pending:
            p = min(self._pending, key=lambda p: (p.time, p.order))
            if p.time > now:
                break
            self._pending.remove(p)
            if p.what == "start":
                self._start(p.cue, p.time, state)
                if p.cue.chain:
                    self._order += 1
                    self._pending.append(_Pending(p.time + p.cue.fade, self._order, "chain", p.cue, p.seq))
            elif p.seq == self._seq and self._next is not None:
                self._fire(self._next, p.time)  # a chain: an automatic GO (the seq stays)

    def _check_state(self, state) -> None:
        ids = state.source_ids
        if ids is not self._ids and tuple(ids) != self._ids:
            raise ValueError("the show state's sources are not the ones the cue list was checked against")

    def _start(self, cue: Cue, t0: float, state) -> None:
        """The fade of ``cue`` starts at ``t0``: take over the parameters it names."""
        self._check_state(state)
        run = _Run(cue.label, cue.name, t0, cue.fade, cue.shape)
        for tg in cue.sources:
            i = tg.source
            if tg.has_motion:
                self._drop_position(i, t0, state)  # the motion moves the source from now on
                self._motion.append(MotionRequest(i, tg.id, tg.motion, cue.label, t0))
            elif tg.moves:
                self._motion.append(MotionRequest(i, tg.id, None, cue.label, t0))  # off any motion
                if tg.position is not None:
                    p = tg.position
                    z = p[2] if len(p) > 2 else self._pos_at(i, t0, state)[2]
                    self._start_cart(run, i, state, (p[0], p[1], z), t0)
                else:
                    self._start_sph(run, i, state, tg.azimuth, tg.elevation, tg.distance, tg.path, t0)
            if tg.gain_db is not None:
                self._start_lane(run, ("gain", i), "num", state, tg.gain_db, t0)
            if tg.spread is not None:
                self._start_lane(run, ("spread", i), "num", state, tg.spread, t0)
            if tg.mute is not None:
                self._start_lane(run, ("mute", i), "mute", state, tg.mute, t0)
        if cue.master_gain_db is not None:
            self._start_lane(run, ("master", None), "num", state, cue.master_gain_db, t0)

    # positions ----------------------------------------------------------------
    def _pos_at(self, i: int, t: float, state) -> tuple:
        """Source ``i``'s position at ``t``: from its running lanes, else the state's."""
        if any((k, i) in self._lanes for k in _POS):
            return self._pos_value(i, t)
        p = state.sources[i].position
        xyz = (float(p[0]), float(p[1]), float(p[2]))
        self._sent[("pos", i)] = xyz  # no lane owns it: what the state holds is what counts
        return xyz

    def _pos_value(self, i: int, t: float) -> tuple:
        cart = self._lanes.get(("xyz", i))
        if cart is not None:
            return cart.value(t)
        rest = self._rest[i]
        sph = list(rest.sph)
        for k, name in enumerate(_SPH):
            fade = self._lanes.get((name, i))
            if fade is not None:
                sph[k] = fade.value(t)
        if tuple(sph) == rest.sph0:
            return rest.xyz
        return geometry.sph_to_xyz(sph[0], sph[1], sph[2])

    def _sph_at(self, i: int, t: float, state) -> list:
        """Source ``i``'s (azimuth, elevation, distance) at ``t``, and make its rest record."""
        if (("xyz", i) not in self._lanes) and i in self._rest and any((k, i) in self._lanes for k in _SPH):
            rest = self._rest[i]
            sph = list(rest.sph)
            for k, name in enumerate(_SPH):
                fade = self._lanes.get((name, i))
                if fade is not None:
                    sph[k] = fade.value(t)
            sph[0] = float(geometry.wrap_deg(sph[0]))
            xyz = self._pos_value(i, t)
        else:
            xyz = self._pos_at(i, t, state)
            sph = list(geometry.xyz_to_sph(*xyz))
            self._lanes.pop(("xyz", i), None)  # a cartesian move stops where it is
        self._rest[i] = _Rest(list(sph), xyz, tuple(sph))
        return sph

    def _start_cart(self, run: _Run, i: int, state, target: tuple, t0: float) -> None:
        start = self._pos_at(i, t0, state)
        for name in _SPH:
            self._lanes.pop((name, i), None)
        self._rest.pop(i, None)
        self._lanes[("xyz", i)] = _Fade(run, "cart", start, tuple(float(v) for v in target))

    def _start_sph(self, run: _Run, i: int, state, az, el, d, path: str, t0: float) -> None:
        sph = self._sph_at(i, t0, state)
        if az is not None:
            a0 = sph[0]
            a1 = float(geometry.wrap_deg(az))
            self._lanes[("az", i)] = _Fade(run, "arc", a0, a1, arc_delta(a0, a1, path))
        if el is not None:
            self._lanes[("el", i)] = _Fade(run, "num", sph[1], float(el))
        if d is not None:
            self._lanes[("dist", i)] = _Fade(run, "num", sph[2], float(d))

    def _drop_position(self, i: int, t: float, state) -> None:
        for name in _POS:
            self._lanes.pop((name, i), None)
        self._rest.pop(i, None)

    def _release(self, lane: tuple, fade: _Fade) -> None:
        """A lane's fade has ended: the value stays where the fade put it."""
        del self._lanes[lane]
        kind, i = lane
        if kind in _SPH:
            rest = self._rest.get(i)
            if rest is not None:
                k = _SPH.index(kind)
                rest.sph[k] = fade.b
                if not any((n, i) in self._lanes for n in _SPH):
                    del self._rest[i]

    # other lanes -------------------------------------------------------------
    def _start_lane(self, run: _Run, lane: tuple, kind: str, state, target, t0: float) -> None:
        fade = self._lanes.get(lane)
        if fade is not None:
            start = fade.value(t0)
        else:
            start = _read(state, lane)
            self._sent[lane] = start
        self._lanes[lane] = _Fade(run, kind, start, target)

    def _emit(self, lane: tuple, value, out: list) -> None:
        if self._sent.get(lane) != value:
            self._sent[lane] = value
            out.append(_command(lane, value))

    def _look(self, state, k: int) -> tuple:
        """The look before cue index ``k``: the show's start values, then cues 0..k-1 in order."""
        show = state.show
        look = [
            _Look(tuple(float(v) for v in s.position), float(s.gain_db), bool(s.mute), float(s.spread))
            for s in show.sources
        ]
        master = float(show.master_gain_db)
        for cue in self.cues.cues[:k]:
            for tg in cue.sources:
                lk = look[tg.source]
                if tg.has_motion:
                    lk.motion = tg.motion
                elif tg.position is not None:
                    p = tg.position
                    lk.position = (p[0], p[1], p[2] if len(p) > 2 else lk.position[2])
                    lk.motion = None
                elif tg.spherical:
                    a0, e0, d0 = geometry.xyz_to_sph(*lk.position)
                    lk.position = geometry.sph_to_xyz(
                        a0 if tg.azimuth is None else tg.azimuth,
                        e0 if tg.elevation is None else tg.elevation,
                        d0 if tg.distance is None else tg.distance,
                    )
                    lk.motion = None
                if tg.gain_db is not None:
                    lk.gain_db = tg.gain_db
                if tg.mute is not None:
                    lk.mute = tg.mute
                if tg.spread is not None:
                    lk.spread = tg.spread
            if cue.master_gain_db is not None:
                master = cue.master_gain_db
        return look, master


def _read(state, lane: tuple):
    kind, i = lane
    if kind == "master":
        return float(state.master_gain_db)
    s = state.sources[i]
    if kind == "gain":
        return float(s.gain_db)
    if kind == "spread":
        return float(s.spread)
    return bool(s.mute)


def _time(now) -> float:
    if isinstance(now, bool) or not isinstance(now, numbers.Real) or not math.isfinite(float(now)):
        raise ValueError(f"now must be a finite number of seconds, got {now!r}")
    return float(now)


# ----------------------------------------------------------------------------- recording


def _num_out(x: float):
    """A number for JSON: an int when it is whole, so files read 12 rather than 12.0."""
    return int(x) if float(x).is_integer() else float(x)


def _r6(x: float) -> float:
    v = round(float(x), 6)
    return 0.0 if v == 0 else v  # no "-0.0" in files


def record_cue(
    show_data: dict,
    number,
    name: Optional[str],
    state,
    fade: Optional[float] = None,
    shape: Optional[str] = None,
    wait: Optional[float] = None,
    chain: Optional[bool] = None,
) -> dict:
    """A copy of ``show_data`` with a cue ``number`` that stores the state as it is now.

    The cue targets every source (position, ``gain_db``, ``mute``, ``spread``) and the
    master gain. Positions are written as azimuth/elevation/distance (so replaying the cue
    moves along arcs), or as ``position`` [x, y, z] for a source farther than the
    distance range allows; values are rounded to 6 decimals. The cue goes into the list
    in numeric order; a cue of the same number is replaced, and then keeps its name (when
    ``name`` is None), ``notes``, ``fade``, ``shape``, ``wait`` and ``chain`` unless given
    here. A new cue's fade defaults to :data:`DEFAULT_RECORD_FADE` seconds.

    Arguments that cannot be used raise ControlError (they come from a controller:
    ``/cue/record <number> [name]``); a broken cue list already in ``show_data`` raises
    ConfigError at its place (``cues[2].fade``), as nothing broken is ever written.
    """
    x = control_number(number)
    if name is not None and (not isinstance(name, str) or len(name) > 200):
        raise ControlError("bad_type", f"a cue name is a text of at most 200 characters, got {show_value(name)}")
    if not isinstance(show_data, dict):
        raise ConfigError("show", f"expected the show as an object, got {show_value(show_data)}")
    ids = tuple(state.source_ids)
    old = show_data.get("cues")
    if old is None:
        old = []
    parse_cues(old, "cues", ids)  # the list as it is must be sound
    old = copy.deepcopy(old)

    replaced = None
    keep = []
    for c in old:
        if _cue_number(c["number"], "") == x and replaced is None:
            replaced = c
            keep.append(None)  # its place
        else:
            keep.append(c)

    cue: dict = {"number": _num_out(x)}
    if name is not None:
        cue["name"] = name
    elif replaced is not None and "name" in replaced:
        cue["name"] = replaced["name"]
    if replaced is not None and "notes" in replaced:
        cue["notes"] = replaced["notes"]

    def pick(key, given, default):
        if given is not None:
            return given
        if replaced is not None and key in replaced:
            return replaced[key]
        return default

    cue["fade"] = pick("fade", fade, DEFAULT_RECORD_FADE)
    sh = pick("shape", shape, None)
    if sh is not None:
        cue["shape"] = sh
    w = pick("wait", wait, None)
    if w is not None and w != 0:
        cue["wait"] = w
    ch = pick("chain", chain, None)
    if ch:
        cue["chain"] = True
    for key in ("fade", "wait"):
        if key in cue:
            try:
                _seconds(cue[key], key)
            except ConfigError as exc:
                raise ControlError("out_of_range", f"{key}: {exc.message}") from None
    if "shape" in cue and (not isinstance(cue["shape"], str) or cue["shape"] not in SHAPES):
        raise ControlError("out_of_range", f"shape {show_value(cue['shape'])} is not one of {', '.join(SHAPES)}")

    targets: dict = {}
    d_hi = DISTANCE_RANGE[1]
    for s in state.sources:
        p = s.position
        az, el, d = geometry.xyz_to_sph(float(p[0]), float(p[1]), float(p[2]))
        t: dict = {}
        if _r6(d) <= d_hi:
            t["azimuth"] = _r6(geometry.wrap_deg(_r6(az)))
            t["elevation"] = max(-90.0, min(90.0, _r6(el)))
            t["distance"] = _r6(d)
        else:
            t["position"] = [_r6(v) for v in p]
        t["gain_db"] = _r6(s.gain_db)
        t["mute"] = bool(s.mute)
        t["spread"] = _r6(s.spread)
        targets[s.spec.id] = t
    cue["targets"] = targets
    cue["master"] = {"gain_db": _r6(state.master_gain_db)}

    if replaced is not None:
        new_list = [cue if c is None else c for c in keep]
    else:
        new_list = list(keep)
        at = len(new_list)
        for j, c in enumerate(new_list):
            if _cue_number(c["number"], "") > x:
                at = j
                break
        new_list.insert(at, cue)

    out = copy.deepcopy(show_data)
    out["cues"] = new_list
    parse_cues(new_list, "cues", ids)  # what we write must load
    return out


def write_show_atomically(path, data: dict) -> None:
    """Write ``data`` as JSON to ``path``: temp file in the same folder, fsync, os.replace.

    A crash at any moment leaves either the old file or the new one, never a mix; the
    folder is fsync'ed too (where the OS allows) so the rename itself survives a power
    cut. Raises ConfigError if ``data`` holds what JSON cannot (NaN, sets, ...), and
    ConfigError for an OS problem (folder missing, no permission, disk full).
    """
    path = Path(path)
    where = oneline(path.name)
    check_plain(data, where)
    payload = (json.dumps(data, indent=2, ensure_ascii=False, allow_nan=False) + "\n").encode("utf-8")
    if not path.parent.is_dir():
        raise ConfigError(where, f"cannot write the show file: folder {oneline(str(path.parent))} does not exist")
    try:
        write_atomic(path, payload)
    except OSError as exc:
        raise ConfigError(where, f"cannot write the show file: {oneline(exc.strerror or exc)}") from None


__all__ = [
    "SHAPES",
    "PATHS",
    "Cue",
    "CueList",
    "CueRunner",
    "MotionRequest",
    "SourceTarget",
    "arc_delta",
    "control_number",
    "number_label",
    "parse_cues",
    "record_cue",
    "write_show_atomically",
]
