"""Running motions of one source: orbit, line, drift. Pure functions of time.

A motion is described by a :class:`MotionSpec` (parsed from a show or cue file with
:func:`parse_motion`) and run by a :class:`Motion`, started with
``Motion.start(spec, t0, current_position)``. ``position_at(t)`` is a pure function of
``t`` (and of what the motion was started with): nothing here sleeps, schedules or keeps
a clock. The live runner evaluates running motions at its control rate (say 100 Hz) and
applies the positions as ``position`` Commands; the engine's per-sample ramps smooth the
steps between two evaluations. Reference: docs/motion.md.

Coordinates as everywhere (geometry.py): listener at the origin, x right, y front, z up,
metres; azimuth 0 = front, + = left (counter-clockwise seen from above).

Kinds (our own definitions, exact formulas in docs/motion.md):

- ``orbit``: a horizontal circle around ``centre`` with ``radius`` and ``period``;
  ``direction`` ``left`` (counter-clockwise seen from above: the azimuth around the centre
  increases) or ``right``. It starts at the phase of the current position and glides its
  radius (and height) onto the circle over ``glide`` seconds.
- ``line``: back and forth between ``from`` and ``to``; ``period`` is one full
  there-and-back; the speed follows a cosine, so it slows to rest at each end (eased
  turns). It starts at the point of the segment nearest the current position, heading for
  ``to``, and glides onto the segment over ``glide`` seconds.
- ``drift``: a smooth random wander inside a box: a uniform cubic B-spline through points
  drawn from ``seed``, one point every ``time_scale`` seconds (or a ``time_scale``
  derived from a root-mean-square ``speed``). The points come from a hash of (seed, point
  number), so the path is a function of (seed, time since start): the same in rehearsal
  and in the show, however often it is evaluated. The first three spline points are the
  start position, so it leaves from where the source is, at rest.

Every position is finite and inside the position range of the control grammar
(``/source/<id>/position``: -1000 .. 1000 m per coordinate): the file checks keep every
path inside it, and ``position_at`` clamps as a last guard.
"""

from __future__ import annotations

import math
import numbers
from dataclasses import dataclass
from typing import Any, Optional, Sequence, Union

from fieldmix.control import ADDRESSES, Command
from fieldmix.errors import ConfigError
from fieldmix.jsonload import did_you_mean, quote, quoted_list, show_value

KINDS = ("orbit", "line", "drift")
DIRECTIONS = ("left", "right")

#: the control grammar's range for one position coordinate (metres)
_POS_ARG = ADDRESSES["/source/<id>/position"].args[0]
COORD_LO: float = float(_POS_ARG.lo)
COORD_HI: float = float(_POS_ARG.hi)

DEFAULT_GLIDE_S = 1.0  # orbit / line: time to glide onto the path
PERIOD_RANGE = (0.2, 86400.0)  # seconds: one orbit or one there-and-back
GLIDE_RANGE = (0.05, 600.0)  # seconds
TIME_SCALE_RANGE = (0.05, 86400.0)  # seconds between two drift points
SPEED_RANGE = (0.0, 100.0)  # m/s, exclusive low end
SEED_MAX = 2**53 - 1  # the largest integer every JSON reader keeps exactly

#: mean over one spline segment of sum_j B_j'(u)^2 for the uniform cubic B-spline basis
#: (integral of the squared derivative basis functions, computed exactly: 2/3)
_BSPLINE_DERIV_ENERGY = 2.0 / 3.0

_M64 = (1 << 64) - 1


# --------------------------------------------------------------------------- specs


@dataclass(frozen=True)
class MotionSpec:
    """A motion as a file describes it. Subclasses: OrbitSpec, LineSpec, DriftSpec."""

    @property
    def kind(self) -> str:  # pragma: no cover - overridden
        raise NotImplementedError

    def to_dict(self) -> dict:  # pragma: no cover - overridden
        raise NotImplementedError


@dataclass(frozen=True)
class OrbitSpec(MotionSpec):
    centre: tuple  # (x, y) m: the source keeps its height; or (x, y, z) m
    radius: float  # m, > 0
    period: float  # s for one turn
    direction: str = "left"  # "left": azimuth around the centre increases
    glide: float = DEFAULT_GLIDE_S  # s to glide radius and height onto the circle

    @property
    def kind(self) -> str:
        return "orbit"

    def to_dict(self) -> dict:
        return {"kind": "orbit", "centre": list(self.centre), "radius": self.radius, "period": self.period,
                "direction": self.direction, "glide": self.glide}


@dataclass(frozen=True)
class LineSpec(MotionSpec):
    start: tuple  # "from": (x, y) or (x, y, z) m
    end: tuple  # "to": same number of coordinates as start
    period: float  # s for from -> to -> from
    glide: float = DEFAULT_GLIDE_S

    @property
    def kind(self) -> str:
        return "line"

    def to_dict(self) -> dict:
        return {"kind": "line", "from": list(self.start), "to": list(self.end), "period": self.period,
                "glide": self.glide}


@dataclass(frozen=True)
class DriftSpec(MotionSpec):
    lo: tuple  # box corner with the smallest coordinates: (x, y) or (x, y, z) m
    hi: tuple  # the opposite corner
    time_scale: float  # s between two spline points
    seed: int
    speed: Optional[float] = None  # m/s if the file gave a speed (time_scale derived from it)

    @property
    def kind(self) -> str:
        return "drift"

    @property
    def size(self) -> tuple:
        return tuple(h - l for l, h in zip(self.lo, self.hi))

    def to_dict(self) -> dict:
        d: dict = {"kind": "drift", "min": list(self.lo), "max": list(self.hi), "seed": self.seed}
        if self.speed is not None:
            d["speed"] = self.speed
        else:
            d["time_scale"] = self.time_scale
        return d


AnySpec = Union[OrbitSpec, LineSpec, DriftSpec]


def drift_time_scale(size: Sequence[float], speed: float) -> float:
    """The time scale (s) at which a drift in a box of ``size`` has RMS speed ``speed``.

    For a uniform cubic B-spline through independent points uniform in the box, the mean
    square velocity is ``(2/3) * sum(size_a^2 / 12) / T^2``, so
    ``T = |size| / (3 * sqrt(2) * speed)`` (derivation in docs/motion.md).
    """
    var = sum(s * s for s in size) / 12.0
    return math.sqrt(_BSPLINE_DERIV_ENERGY * var) / speed


# --------------------------------------------------------------------------- parsing

_KEYS = {
    "orbit": ("kind", "centre", "radius", "period", "direction", "glide"),
    "line": ("kind", "from", "to", "period", "glide"),
    "drift": ("kind", "min", "max", "centre", "size", "speed", "time_scale", "seed"),
}


def _at(where: str, *parts: Any) -> str:
    out = where
    for p in parts:
        if isinstance(p, int):
            out += f"[{p}]"
        else:
            out = f"{out}.{p}" if out else str(p)
    return out


def _number(data: dict, key: str, where: str, lo: float, hi: float, unit: str,
            lo_open: bool = False, default: Optional[float] = None) -> float:
    place = _at(where, key)
    if key not in data:
        if default is not None:
            return default
        raise ConfigError(where, f'missing "{key}" ({unit})')
    v = data[key]
    f = _finite(v, place)
    if f < lo or f > hi or (lo_open and f == lo):
        low = f"above {_fmt(lo)}" if lo_open else f"from {_fmt(lo)}"
        raise ConfigError(place, f"{show_value(v)} is out of range: must be {low} to {_fmt(hi)} {unit}")
    return f


def _finite(v: Any, place: str) -> float:
    if isinstance(v, bool) or not isinstance(v, numbers.Real):
        extra = " (true/false is not a number)" if isinstance(v, bool) else ""
        raise ConfigError(place, f"expected a number, got {show_value(v)}{extra}")
    try:
        f = float(v)
    except (OverflowError, ValueError):
        raise ConfigError(place, f"{show_value(v)} is far out of range") from None
    if not math.isfinite(f):
        raise ConfigError(place, f"{show_value(v)} is not a finite number")
    return f


def _fmt(x: float) -> str:
    return str(int(x)) if float(x).is_integer() and abs(x) < 1e15 else repr(float(x))


def _point(data: dict, key: str, where: str, required: bool = True) -> Optional[tuple]:
    """[x, y] or [x, y, z] within the position range."""
    place = _at(where, key)
    if key not in data:
        if required:
            raise ConfigError(where, f'missing "{key}": a point [x, y] or [x, y, z] in metres')
        return None
    v = data[key]
    if not isinstance(v, (list, tuple)):
        raise ConfigError(place, f"expected a point [x, y] or [x, y, z] in metres, got {show_value(v)}")
    if len(v) not in (2, 3):
        raise ConfigError(place, f"expected 2 or 3 coordinates ([x, y] or [x, y, z]), got {len(v)}")
    out = []
    for i, c in enumerate(v):
        f = _finite(c, _at(place, i))
        if not COORD_LO <= f <= COORD_HI:
            raise ConfigError(
                _at(place, i),
                f"{show_value(c)} is out of range: must be from {_fmt(COORD_LO)} to {_fmt(COORD_HI)} m",
            )
        out.append(f)
    return tuple(out)


def _same_dims(a: tuple, b: tuple, key_a: str, key_b: str, where: str) -> None:
    if len(a) != len(b):
        raise ConfigError(
            _at(where, key_b),
            f'has {len(b)} coordinates but "{key_a}" has {len(a)}: give both as [x, y] or both as [x, y, z]',
        )


def parse_motion(data: Any, where: str = "motion") -> AnySpec:
    """Check a motion object from a file and build its spec.

    ``where`` names the object (``"show.json: cues[2].targets.buoy.motion"``); errors are
    :class:`ConfigError` at the exact key (``....motion.radius``).
    """
    if not isinstance(data, dict):
        raise ConfigError(where, f'expected a motion object ({{"kind": "orbit", ...}}), got {show_value(data)}')
    if "kind" not in data:
        raise ConfigError(where, f'missing "kind": one of {quoted_list(KINDS)}')
    kind = data["kind"]
    if not isinstance(kind, str) or kind not in KINDS:
        hint = did_you_mean(kind, KINDS) if isinstance(kind, str) else ""
        raise ConfigError(_at(where, "kind"), f"unknown motion kind {show_value(kind)}{hint}: use {quoted_list(KINDS)}")
    allowed = _KEYS[kind]
    for key in data:
        if key not in allowed:
            why = ""
            if key == "glide" and kind == "drift":
                why = ": a drift leaves from the current position at its own pace, it needs no glide"
            else:
                why = f"{did_you_mean(key, allowed)}; a {kind} takes {', '.join(allowed)}"
            raise ConfigError(_at(where, key), f"unknown key {quote(key)}{why}")
    if kind == "orbit":
        return _parse_orbit(data, where)
    if kind == "line":
        return _parse_line(data, where)
    return _parse_drift(data, where)


def _glide(data: dict, where: str) -> float:
    return _number(data, "glide", where, *GLIDE_RANGE, "s", default=DEFAULT_GLIDE_S)


def _period(data: dict, where: str, what: str) -> float:
    if "period" not in data:
        raise ConfigError(where, f'missing "period": seconds for {what}')
    return _number(data, "period", where, *PERIOD_RANGE, "s")


def _parse_orbit(data: dict, where: str) -> OrbitSpec:
    centre = _point(data, "centre", where, required=False) or (0.0, 0.0)
    if "radius" not in data:
        raise ConfigError(where, 'missing "radius": the orbit\'s radius in metres')
    radius = _number(data, "radius", where, 0.0, (COORD_HI - COORD_LO) / 2.0, "m", lo_open=True)
    period = _period(data, where, "one turn")
    direction = data.get("direction", "left")
    if direction not in DIRECTIONS:
        hint = did_you_mean(direction, DIRECTIONS) if isinstance(direction, str) else ""
        raise ConfigError(
            _at(where, "direction"),
            f'unknown direction {show_value(direction)}{hint}: use "left" (counter-clockwise seen from above) '
            f'or "right" (clockwise)',
        )
    for axis, c in zip("xy", centre[:2]):
        for edge in (c - radius, c + radius):
            if not COORD_LO <= edge <= COORD_HI:
                raise ConfigError(
                    _at(where, "radius"),
                    f"the orbit reaches {axis} = {_fmt(edge)} m, outside the position range "
                    f"{_fmt(COORD_LO)} .. {_fmt(COORD_HI)} m",
                )
    return OrbitSpec(centre=centre, radius=radius, period=period, direction=direction, glide=_glide(data, where))


def _parse_line(data: dict, where: str) -> LineSpec:
    a = _point(data, "from", where)
    b = _point(data, "to", where)
    _same_dims(a, b, "from", "to", where)
    if a == b:
        raise ConfigError(_at(where, "to"), '"to" is the same point as "from": a line needs two different points')
    period = _period(data, where, "from -> to -> from")
    return LineSpec(start=a, end=b, period=period, glide=_glide(data, where))


def _parse_drift(data: dict, where: str) -> DriftSpec:
    box_keys = [k for k in ("min", "max") if k in data]
    cs_keys = [k for k in ("centre", "size") if k in data]
    if box_keys and cs_keys:
        raise ConfigError(
            _at(where, cs_keys[0]),
            f'the region is given twice ("{box_keys[0]}" and "{cs_keys[0]}"): use min/max or centre/size',
        )
    if cs_keys:
        centre = _point(data, "centre", where)
        size_place = _at(where, "size")
        if "size" not in data:
            raise ConfigError(where, 'missing "size": the box\'s size [x, y] or [x, y, z] in metres')
        raw = data["size"]
        if not isinstance(raw, (list, tuple)) or len(raw) not in (2, 3):
            raise ConfigError(size_place, f"expected a size [x, y] or [x, y, z] in metres, got {show_value(raw)}")
        size = []
        for i, c in enumerate(raw):
            f = _finite(c, _at(size_place, i))
            if f < 0:
                raise ConfigError(_at(size_place, i), f"{show_value(c)} is negative: a size is at least 0 m")
            size.append(f)
        _same_dims(centre, tuple(size), "centre", "size", where)
        lo = tuple(c - s / 2.0 for c, s in zip(centre, size))
        hi = tuple(c + s / 2.0 for c, s in zip(centre, size))
        for i, (l, h) in enumerate(zip(lo, hi)):
            if l < COORD_LO or h > COORD_HI:
                raise ConfigError(
                    _at(size_place, i),
                    f"the box reaches {'xyz'[i]} = {_fmt(l if l < COORD_LO else h)} m, outside the position "
                    f"range {_fmt(COORD_LO)} .. {_fmt(COORD_HI)} m",
                )
        size_key = "size"
    else:
        if not box_keys:
            raise ConfigError(where, 'missing the region: give "min" and "max" corners, or "centre" and "size"')
        lo = _point(data, "min", where)
        hi = _point(data, "max", where)
        _same_dims(lo, hi, "min", "max", where)
        for i, (l, h) in enumerate(zip(lo, hi)):
            if h < l:
                raise ConfigError(
                    _at(where, "max", i),
                    f"{_fmt(h)} is below min {_fmt(l)}: max must be the corner with the larger coordinates",
                )
        size_key = "max"
    size = tuple(h - l for l, h in zip(lo, hi))
    if all(s == 0 for s in size[:2]) and (len(size) == 2 or size[2] == 0):
        raise ConfigError(_at(where, size_key), "the region is a single point: give it a size in x, y or z")

    has_speed, has_ts = "speed" in data, "time_scale" in data
    if has_speed and has_ts:
        raise ConfigError(_at(where, "time_scale"), 'give "speed" or "time_scale", not both')
    speed: Optional[float] = None
    if has_speed:
        speed = _number(data, "speed", where, *SPEED_RANGE, "m/s", lo_open=True)
        time_scale = drift_time_scale(size, speed)
        if time_scale < TIME_SCALE_RANGE[0]:
            raise ConfigError(
                _at(where, "speed"),
                f"{_fmt(speed)} m/s is too fast for this region (a point every {time_scale:.3g} s; "
                f"at most one every {_fmt(TIME_SCALE_RANGE[0])} s)",
            )
        time_scale = min(time_scale, TIME_SCALE_RANGE[1])
    elif has_ts:
        time_scale = _number(data, "time_scale", where, *TIME_SCALE_RANGE, "s")
    else:
        raise ConfigError(where, 'missing "speed" (m/s) or "time_scale" (s): how fast the drift wanders')

    if "seed" not in data:
        raise ConfigError(where, 'missing "seed": an integer that fixes the path (same seed, same path)')
    seed = data["seed"]
    if isinstance(seed, bool) or not isinstance(seed, numbers.Integral):
        if isinstance(seed, float) and seed.is_integer() and 0 <= seed <= SEED_MAX:
            seed = int(seed)
        else:
            raise ConfigError(_at(where, "seed"), f"expected an integer, got {show_value(seed)}")
    if not 0 <= seed <= SEED_MAX:
        raise ConfigError(_at(where, "seed"), f"{show_value(seed)} is out of range: must be from 0 to {SEED_MAX}")
    return DriftSpec(lo=lo, hi=hi, time_scale=time_scale, seed=int(seed), speed=speed)


# --------------------------------------------------------------------------- running


def smoothstep(u: float) -> float:
    """3u^2 - 2u^3 on [0, 1] (0 below, 1 above): starts and ends at rest."""
    if u <= 0.0:
        return 0.0
    if u >= 1.0:
        return 1.0
    return u * u * (3.0 - 2.0 * u)


def _mix64(z: int) -> int:
    """SplitMix64 output function (Steele, Lea & Flood 2014, "Fast splittable
    pseudorandom number generators"): a 64-bit integer hash."""
    z = (z + 0x9E3779B97F4A7C15) & _M64
    z = ((z ^ (z >> 30)) * 0xBF58476D1CE4E5B9) & _M64
    z = ((z ^ (z >> 27)) * 0x94D049BB133111EB) & _M64
    return z ^ (z >> 31)


def hash_unit(seed: int, k: int, axis: int) -> float:
    """A number in [0, 1) that depends only on (seed, k, axis)."""
    h = _mix64(_mix64(seed & _M64) ^ ((3 * k + axis) & _M64))
    return (h >> 11) * (1.0 / 9007199254740992.0)  # 53 bits / 2^53


class Motion:
    """A running motion. Build with :meth:`Motion.start`; ask :meth:`position_at`."""

    def __init__(self, spec: AnySpec, t0: float, origin: tuple):
        self.spec = spec
        self.t0 = t0
        self.origin = origin  # where the source was at t0
        self._stopped: Optional[tuple] = None

    # ---------------------------------------------------------------- public
    @classmethod
    def start(cls, spec: AnySpec, t0: float, current_position: Sequence[float]) -> "Motion":
        """Start ``spec`` at time ``t0`` (s, the caller's clock) from ``current_position``.

        ``position_at(t0)`` is ``current_position`` (clamped into the position range).
        """
        t0 = float(t0)
        if not math.isfinite(t0):
            raise ValueError(f"start time must be finite, got {t0!r}")
        p = [float(v) for v in current_position]
        if len(p) == 2:
            p.append(0.0)
        if len(p) != 3 or not all(math.isfinite(v) for v in p):
            raise ValueError(f"current position must be 2 or 3 finite numbers, got {current_position!r}")
        origin = tuple(min(max(v, COORD_LO), COORD_HI) for v in p)
        if isinstance(spec, OrbitSpec):
            return _Orbit(spec, t0, origin)
        if isinstance(spec, LineSpec):
            return _Line(spec, t0, origin)
        if isinstance(spec, DriftSpec):
            return _Drift(spec, t0, origin)
        raise TypeError(f"not a motion spec: {spec!r}")

    @property
    def running(self) -> bool:
        return self._stopped is None

    def position_at(self, t: float) -> tuple:
        """(x, y, z) in metres at time ``t``; before ``t0`` the start position."""
        if self._stopped is not None:
            return self._stopped
        t = float(t)
        if not math.isfinite(t):
            raise ValueError(f"time must be finite, got {t!r}")
        tau = t - self.t0
        if tau <= 0.0:
            return self.origin
        x, y, z = self._path(tau)
        out = []
        for v, o in zip((x, y, z), self.origin):
            if not math.isfinite(v):  # cannot happen with checked specs; never hand out NaN
                v = o
            out.append(min(max(v, COORD_LO), COORD_HI))
        return (out[0], out[1], out[2])

    def stop(self, t: float) -> tuple:
        """Stop at time ``t``: the source stays where the motion had it then."""
        if self._stopped is None:
            self._stopped = self.position_at(t)
        return self._stopped

    def command_at(self, t: float, source: int) -> Command:
        """The ``position`` Command that puts source ``source`` (0-based) where it is at ``t``."""
        return Command("source", source, "position", self.position_at(t))

    def _path(self, tau: float) -> tuple:  # pragma: no cover - overridden
        raise NotImplementedError


class _Orbit(Motion):
    """c + rho(tau) * (-sin theta, cos theta), theta = theta0 + dir * 2 pi tau / period.

    theta is the azimuth around the centre (0 = front of it, + = left), as geometry.py
    measures azimuth; rho and the height glide from the start's to the circle's.
    """

    def __init__(self, spec: OrbitSpec, t0: float, origin: tuple):
        super().__init__(spec, t0, origin)
        cx, cy = spec.centre[0], spec.centre[1]
        dx, dy = origin[0] - cx, origin[1] - cy
        self._r0 = math.hypot(dx, dy)
        self._theta0 = math.atan2(-dx, dy) if self._r0 > 1e-12 else 0.0
        self._z0 = origin[2]
        self._z1 = spec.centre[2] if len(spec.centre) > 2 else origin[2]
        self._dir = 1.0 if spec.direction == "left" else -1.0

    def _path(self, tau: float) -> tuple:
        s: OrbitSpec = self.spec  # type: ignore[assignment]
        phase = math.fmod(tau / s.period, 1.0)
        theta = self._theta0 + self._dir * 2.0 * math.pi * phase
        w = smoothstep(tau / s.glide)
        rho = self._r0 + (s.radius - self._r0) * w
        z = self._z0 + (self._z1 - self._z0) * w
        return (s.centre[0] - rho * math.sin(theta), s.centre[1] + rho * math.cos(theta), z)


class _Line(Motion):
    """A + (B - A) * (1 - cos(2 pi u)) / 2, u = u0 + tau / period (mod 1)."""

    def __init__(self, spec: LineSpec, t0: float, origin: tuple):
        super().__init__(spec, t0, origin)
        z = origin[2]
        a = spec.start if len(spec.start) == 3 else (spec.start[0], spec.start[1], z)
        b = spec.end if len(spec.end) == 3 else (spec.end[0], spec.end[1], z)
        self._a, self._b = a, b
        ab = [bb - aa for aa, bb in zip(a, b)]
        n2 = sum(c * c for c in ab)
        lam = sum((o - aa) * c for o, aa, c in zip(origin, a, ab)) / n2
        lam = min(max(lam, 0.0), 1.0)
        self._ab = ab
        self._u0 = math.acos(1.0 - 2.0 * lam) / (2.0 * math.pi)  # in [0, 1/2]: heading for "to"

    def _path(self, tau: float) -> tuple:
        s: LineSpec = self.spec  # type: ignore[assignment]
        u = math.fmod(self._u0 + tau / s.period, 1.0)
        f = 0.5 * (1.0 - math.cos(2.0 * math.pi * u))
        w = smoothstep(tau / s.glide)
        return tuple(
            (1.0 - w) * o + w * (aa + c * f) for o, aa, c in zip(self.origin, self._a, self._ab)
        )  # type: ignore[return-value]


class _Drift(Motion):
    """Uniform cubic B-spline through P_0 = P_1 = P_2 = start, P_k (k >= 3) = hash(seed, k)."""

    def __init__(self, spec: DriftSpec, t0: float, origin: tuple):
        super().__init__(spec, t0, origin)
        self._dims = len(spec.lo)
        self._cache: dict = {}

    def _point(self, k: int) -> tuple:
        if k < 3:
            return self.origin
        p = self._cache.get(k)
        if p is None:
            s: DriftSpec = self.spec  # type: ignore[assignment]
            coords = []
            for axis in range(3):
                if axis < self._dims:
                    lo, hi = s.lo[axis], s.hi[axis]
                    coords.append(lo + (hi - lo) * hash_unit(s.seed, k, axis))
                else:
                    coords.append(self.origin[2])  # a 2-D region keeps the source's height
            p = tuple(coords)
            if len(self._cache) > 64:  # only the current segment's 4 points are needed
                self._cache.clear()
            self._cache[k] = p
        return p

    def _path(self, tau: float) -> tuple:
        s: DriftSpec = self.spec  # type: ignore[assignment]
        x = tau / s.time_scale
        i = math.floor(x)
        u = x - i
        u2 = u * u
        u3 = u2 * u
        b0 = (1.0 - u) ** 3 / 6.0
        b1 = (3.0 * u3 - 6.0 * u2 + 4.0) / 6.0
        b2 = (-3.0 * u3 + 3.0 * u2 + 3.0 * u + 1.0) / 6.0
        b3 = u3 / 6.0
        p0, p1, p2, p3 = self._point(i), self._point(i + 1), self._point(i + 2), self._point(i + 3)
        x, y, z = (b0 * a + b1 * b + b2 * c + b3 * d for a, b, c, d in zip(p0, p1, p2, p3))
        if self._dims == 2:
            z = self.origin[2]  # exactly: the basis weights sum to 1 only up to rounding
        return (x, y, z)


def start_motion(spec: AnySpec, t0: float, current_position: Sequence[float]) -> Motion:
    """Same as :meth:`Motion.start`."""
    return Motion.start(spec, t0, current_position)


__all__ = [
    "KINDS", "DIRECTIONS", "MotionSpec", "OrbitSpec", "LineSpec", "DriftSpec", "parse_motion",
    "Motion", "start_motion", "drift_time_scale", "smoothstep", "hash_unit", "COORD_LO", "COORD_HI",
]
