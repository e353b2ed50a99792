"""Sensor mappings: incoming OSC values steer source parameters.

The show file's ``mappings`` key is a list of mappings; each one takes argument ``arg`` of
every OSC message whose address matches ``address`` (an OSC 1.0 pattern, e.g.
``/sensor/*/range``), maps it from the ``in`` range to the ``out`` range through a
``curve`` and sets one parameter of one source. Reference: docs/mappings.md; schema
``schemas/mappings.schema.json``.

Per mapping, in this order (docs/mappings.md gives the exact formulas):

1. the argument must be a finite number (not a bool, string, blob or nil); anything else
   is ignored and counted by reason, never raised;
2. dead band: a value closer than ``dead_band`` (input units) to the last accepted one is
   held (ignored);
3. ``u = (v - in[0]) / (in[1] - in[0])``, clamped to [0, 1] when ``clamp`` (default);
4. ``w = curve(u)`` (``linear``, ``slow_start``, ``fast_start``, ``s_curve``; outside
   [0, 1], only without clamping, ``w = u``);
5. ``out[0] + w * (out[1] - out[0])`` (``invert`` swaps the ends of ``out``), then kept
   inside the parameter's range of the control grammar;
6. ``smooth_ms``: a one-pole low-pass on that value with time constant ``smooth_ms``,
   advanced with the real time between events (exact for any tick spacing).

:class:`MappingSet` does the work at run time: ``feed(address, args, now)`` is called by the
OSC transport for each message (True if a mapping took it: such a message is not a
control message), ``tick(now, state)`` returns the :class:`~fieldmix.control.Command`
objects to apply, only for outputs that changed. x, y and z mappings of one source
combine into one ``position`` Command per tick.
"""

from __future__ import annotations

import math
import numbers
from collections import Counter
from dataclasses import dataclass, field
from typing import Any, Optional, Sequence

from fieldmix.control import ADDRESSES, RESERVED_PREFIXES, Command
from fieldmix.errors import ConfigError
from fieldmix.jsonload import did_you_mean, oneline, quote, quoted_list, show_value
from fieldmix.oscwire import OscDecodeError, Pattern, compile_pattern

# --------------------------------------------------------------------------- parameters


@dataclass(frozen=True)
class ParamSpec:
    name: str  # as the mapping file writes it
    command: str  # Command.param
    lo: float
    hi: float
    unit: str
    axis: Optional[int] = None  # x/y/z: which coordinate of the position


def _arg(template: str):
    return ADDRESSES[template].args[0]


def _params() -> dict:
    el, dist, pos = _arg("/source/<id>/elevation"), _arg("/source/<id>/distance"), _arg("/source/<id>/position")
    gain, spread = _arg("/source/<id>/gain"), _arg("/source/<id>/spread")
    specs = [
        # azimuth: the grammar takes any finite angle; a mapping's range is kept to the
        # show file's range for a start azimuth (-360 .. 360), one turn either way.
        ParamSpec("azimuth", "azimuth", -360.0, 360.0, "degrees"),
        ParamSpec("elevation", "elevation", el.lo, el.hi, "degrees"),
        ParamSpec("distance", "distance", dist.lo, dist.hi, "m"),
        ParamSpec("x", "position", pos.lo, pos.hi, "m", axis=0),
        ParamSpec("y", "position", pos.lo, pos.hi, "m", axis=1),
        ParamSpec("z", "position", pos.lo, pos.hi, "m", axis=2),
        ParamSpec("gain_db", "gain", gain.lo, gain.hi, "dB"),
        ParamSpec("spread", "spread", spread.lo, spread.hi, "degrees"),
    ]
    return {p.name: p for p in specs}


PARAMS: dict = _params()

# --------------------------------------------------------------------------- curves

#: ratio of the exponential curves: the output's last step is R times its first
CURVE_RATIO = 100.0
_LN_R = math.log(CURVE_RATIO)


def _c_linear(u: float) -> float:
    return u


def _c_slow_start(u: float) -> float:
    # (R^u - 1) / (R - 1): small steps at the start, large at the end (a knob that feels
    # exponential); midpoint 9/99
    return math.expm1(_LN_R * u) / (CURVE_RATIO - 1.0)


def _c_fast_start(u: float) -> float:
    # the inverse of slow_start: log(1 + (R - 1) u) / log(R); large steps at the start
    return math.log1p((CURVE_RATIO - 1.0) * u) / _LN_R


def _c_s_curve(u: float) -> float:
    # 3u^2 - 2u^3: flat at both ends, steepest in the middle
    return u * u * (3.0 - 2.0 * u)


CURVES = {
    "linear": _c_linear,
    "slow_start": _c_slow_start,
    "fast_start": _c_fast_start,
    "s_curve": _c_s_curve,
}

KEYS = ("address", "arg", "source", "param", "in", "out", "curve", "clamp", "dead_band", "smooth_ms",
        "invert", "description")
REQUIRED = ("address", "source", "param", "in", "out")
MAX_ARG = 1023
MAX_SMOOTH_MS = 60000.0
MAX_MAPPINGS = 1024


# --------------------------------------------------------------------------- mapping


@dataclass(frozen=True)
class Mapping:
    index: int  # 0-based place in the mappings list
    address: str  # OSC 1.0 pattern
    source: int  # 0-based source index
    source_id: str
    param: str  # a key of PARAMS
    in_range: tuple  # (lo, hi), lo != hi (hi < lo reverses the input)
    out_range: tuple  # (lo, hi) within the parameter's range
    arg: int = 0
    curve: str = "linear"
    clamp: bool = True
    dead_band: float = 0.0
    smooth_ms: float = 0.0
    invert: bool = False
    pattern: Optional[Pattern] = field(default=None, compare=False, repr=False)

    @property
    def spec(self) -> ParamSpec:
        return PARAMS[self.param]

    def output_for(self, value: float) -> float:
        """The parameter value for input ``value`` (before smoothing), always finite."""
        lo, hi = self.in_range
        u = (value - lo) / (hi - lo)
        if self.clamp:
            u = 0.0 if u < 0.0 else 1.0 if u > 1.0 else u
        w = CURVES[self.curve](u) if 0.0 < u < 1.0 else u  # the ends exactly, whatever the rounding
        a, b = self.out_range
        if self.invert:
            a, b = b, a
        out = a + w * (b - a)
        p = PARAMS[self.param]
        if math.isnan(out):  # only reachable with absurd unclamped inputs; stay put at the nearest end
            out = a
        return min(max(out, p.lo), p.hi)


def _at(where: str, *parts: Any) -> str:
    out = where
    for p in parts:
        if isinstance(p, int):
            out += f"[{p}]"
        else:
            out = f"{out}.{p}" if out else str(p)
    return out


def _number(v: Any, place: str, what: str = "a number") -> float:
    if isinstance(v, bool) or not isinstance(v, numbers.Real):
        extra = " (true/false is not a number)" if isinstance(v, bool) else ""
        raise ConfigError(place, f"expected {what}, got {show_value(v)}{extra}")
    try:
        f = float(v)
    except (OverflowError, ValueError):
        raise ConfigError(place, f"{show_value(v)} is far out of range") from None
    if not math.isfinite(f):
        raise ConfigError(place, f"{show_value(v)} is not a finite number")
    return f


def _fmt(x: float) -> str:
    return str(int(x)) if float(x).is_integer() and abs(x) < 1e15 else repr(float(x))


def _range(m: dict, key: str, where: str, what: str) -> tuple:
    place = _at(where, key)
    v = m[key]
    if not isinstance(v, (list, tuple)) or len(v) != 2:
        got = f"{len(v)} numbers" if isinstance(v, (list, tuple)) else show_value(v)
        raise ConfigError(place, f"expected a range [lo, hi] ({what}), got {got}")
    lo = _number(v[0], _at(place, 0))
    hi = _number(v[1], _at(place, 1))
    if lo == hi:
        raise ConfigError(place, f"lo and hi are both {_fmt(lo)}: a range needs two different ends")
    if not math.isfinite(hi - lo):
        raise ConfigError(place, "the range is too wide to compute with")
    return lo, hi


def _integral(v: Any) -> Optional[int]:
    """``v`` as an int if it is a whole number (2 or 2.0, as JSON Schema's "integer"), else None."""
    if isinstance(v, bool):
        return None
    if isinstance(v, numbers.Integral):
        return int(v)
    if isinstance(v, float) and v.is_integer():
        return int(v)
    return None


def _bool(m: dict, key: str, where: str, default: bool) -> bool:
    if key not in m:
        return default
    v = m[key]
    if not isinstance(v, bool):
        raise ConfigError(_at(where, key), f"expected true or false, got {show_value(v)}")
    return v


def _takes_control(pattern: Pattern, source_ids: Sequence[str], reserved: Sequence[str]) -> Optional[str]:
    """A control address (grammar, cue or ``reserved``) the pattern matches, or None."""
    parts = pattern.parts
    for spec in ADDRESSES.values():
        tparts = spec.parts
        if len(tparts) != len(parts):
            continue
        example = []
        for tp, sp in zip(tparts, parts):
            if tp == "<id>":
                hit = next(
                    (name for i, sid in enumerate(source_ids) for name in (sid, str(i + 1)) if sp.match(name)),
                    None,
                )
            else:
                hit = tp if sp.match(tp) else None
            if hit is None:
                break
            example.append(hit)
        else:
            return "/" + "/".join(example)
    for pre in RESERVED_PREFIXES:
        if parts[0].match(pre[1:]):
            return pre + "/..."
    for addr in reserved:
        if pattern.match(addr):
            return addr
    return None


def parse_mappings(
    data: Any,
    where: str = "mappings",
    source_ids: Sequence[str] = (),
    reserved: Sequence[str] = (),
) -> list:
    """Check the show file's ``mappings`` list and build :class:`Mapping` objects.

    ``where`` names the list (``"show.json: mappings"``); errors are ConfigError at the
    exact place (``show.json: mappings[1].in``). ``source_ids``: the show's source ids in
    order. ``reserved``: concrete addresses of the transport's own (``/ping``, ...) that
    a mapping may not take; the control grammar's addresses and ``/cue/...`` are always
    refused.
    """
    if not isinstance(data, (list, tuple)):
        raise ConfigError(where, f"expected a list of mappings, got {show_value(data)}")
    if len(data) > MAX_MAPPINGS:
        raise ConfigError(where, f"too many mappings ({len(data)}; at most {MAX_MAPPINGS})")
    ids = list(source_ids)
    out = []
    for i, m in enumerate(data):
        out.append(_parse_one(m, _at(where, i), i, ids, reserved))
    return out


def _parse_one(m: Any, here: str, index: int, ids: list, reserved: Sequence[str]) -> Mapping:
    if not isinstance(m, dict):
        raise ConfigError(here, f"expected a mapping object, got {show_value(m)}")
    for key in m:
        if key not in KEYS:
            raise ConfigError(
                _at(here, key) if isinstance(key, str) and key.isidentifier() else here,
                f"unknown key {quote(key)}{did_you_mean(str(key), KEYS)}; a mapping takes {', '.join(KEYS)}",
            )
    for key in REQUIRED:
        if key not in m:
            raise ConfigError(here, f'missing "{key}"{_REQUIRED_HINT[key]}')

    # address
    addr = m["address"]
    place = _at(here, "address")
    if not isinstance(addr, str):
        raise ConfigError(place, f"expected an OSC address pattern (a string), got {show_value(addr)}")
    if not addr.startswith("/"):
        raise ConfigError(place, f'{quote(addr)} is not an OSC address: addresses start with "/"')
    try:
        pattern = compile_pattern(addr)
    except OscDecodeError as exc:
        raise ConfigError(place, f"bad OSC address pattern: {oneline(exc.message)}") from None
    taken = _takes_control(pattern, ids, reserved)
    if taken is not None:
        raise ConfigError(
            place,
            f"{quote(addr)} would take control messages such as {quote(taken)}: "
            "a mapping listens to its own addresses (e.g. /sensor/...), not to the control grammar's",
        )

    # arg
    arg = _integral(m.get("arg", 0))
    if arg is None:
        raise ConfigError(
            _at(here, "arg"), f"expected an argument index (0, 1, ...), got {show_value(m.get('arg'))}"
        )
    if not 0 <= arg <= MAX_ARG:
        raise ConfigError(_at(here, "arg"), f"{arg} is out of range: must be from 0 (the first argument) to {MAX_ARG}")

    # source
    src = m["source"]
    place = _at(here, "source")
    n = len(ids)
    if isinstance(src, str):
        if src not in ids:
            raise ConfigError(
                place, f"unknown source {quote(src)}{did_you_mean(src, ids)}: the show has {quoted_list(ids, conj='and')}"
            )
        source = ids.index(src)
    elif _integral(src) is not None:
        src = _integral(src)
        if not 1 <= src <= n:
            raise ConfigError(place, f"no source number {src}: the show has {n} source{'s' if n != 1 else ''} (1..{n})")
        source = int(src) - 1
    else:
        raise ConfigError(place, f"expected a source id or its 1-based number, got {show_value(src)}")

    # param
    param = m["param"]
    if not isinstance(param, str) or param not in PARAMS:
        hint = did_you_mean(param, PARAMS) if isinstance(param, str) else ""
        raise ConfigError(_at(here, "param"), f"unknown parameter {show_value(param)}{hint}: use {quoted_list(list(PARAMS))}")
    pspec = PARAMS[param]

    in_range = _range(m, "in", here, "input units")
    out_range = _range(m, "out", here, f"{pspec.name} in {pspec.unit}")
    for k, v in enumerate(out_range):
        if not pspec.lo <= v <= pspec.hi:
            raise ConfigError(
                _at(here, "out", k),
                f"{_fmt(v)} is outside the range of {param}: {_fmt(pspec.lo)} .. {_fmt(pspec.hi)} {pspec.unit}",
            )

    curve = m.get("curve", "linear")
    if not isinstance(curve, str) or curve not in CURVES:
        hint = did_you_mean(curve, CURVES) if isinstance(curve, str) else ""
        raise ConfigError(_at(here, "curve"), f"unknown curve {show_value(curve)}{hint}: use {quoted_list(list(CURVES))}")

    clamp = _bool(m, "clamp", here, True)
    invert = _bool(m, "invert", here, False)

    dead_band = 0.0
    if "dead_band" in m:
        dead_band = _number(m["dead_band"], _at(here, "dead_band"))
        if dead_band < 0:
            raise ConfigError(_at(here, "dead_band"), f"{_fmt(dead_band)} is negative: a dead band is at least 0 (input units)")
    smooth_ms = 0.0
    if "smooth_ms" in m:
        smooth_ms = _number(m["smooth_ms"], _at(here, "smooth_ms"))
        if not 0 <= smooth_ms <= MAX_SMOOTH_MS:
            raise ConfigError(
                _at(here, "smooth_ms"), f"{_fmt(smooth_ms)} is out of range: must be from 0 to {_fmt(MAX_SMOOTH_MS)} ms"
            )
    if "description" in m and not isinstance(m["description"], str):
        raise ConfigError(_at(here, "description"), f"expected text, got {show_value(m['description'])}")

    return Mapping(
        index=index, address=addr, source=source, source_id=ids[source], param=param,
        in_range=in_range, out_range=out_range, arg=int(arg), curve=curve, clamp=clamp,
        dead_band=dead_band, smooth_ms=smooth_ms, invert=invert, pattern=pattern,
    )


_REQUIRED_HINT = {
    "address": ": the OSC address (pattern) to listen to, e.g. \"/sensor/*/range\"",
    "source": ": the source id or its 1-based number",
    "param": f": one of {', '.join(PARAMS)}",
    "in": ": the input range [lo, hi] the sensor reports",
    "out": ": the output range [lo, hi] in the parameter's units",
}


# --------------------------------------------------------------------------- run time

IGNORE_REASONS = ("bad_type", "not_finite", "missing_arg")
_CACHE_MAX = 4096  # addresses remembered (matched or not); cleared when full


class _Live:
    """Run-time state of one mapping."""

    __slots__ = ("last_input", "target", "y", "t_last", "t_first", "emitted", "accepted", "held", "ignored", "eps")

    def __init__(self, m: Mapping):
        self.last_input: Optional[float] = None  # last accepted raw input
        self.target: Optional[float] = None  # output for it
        self.y: Optional[float] = None  # smoothed output (None until the first tick after input)
        self.t_last = 0.0  # time the filter was last advanced to
        self.t_first = 0.0  # time of the first accepted input
        self.emitted: Optional[float] = None  # output last handed out in a Command
        self.accepted = 0
        self.held = 0
        self.ignored = 0
        self.eps = 1e-6 * abs(m.out_range[1] - m.out_range[0])  # snap distance of the filter

    def advance(self, m: Mapping, now: float) -> None:
        dt = now - self.t_last
        if dt > 0.0 and self.y is not None and self.target is not None:
            a = -math.expm1(-dt / (m.smooth_ms * 1e-3))  # 1 - exp(-dt / tau)
            self.y += a * (self.target - self.y)
            if abs(self.target - self.y) <= self.eps:
                self.y = self.target
        if now > self.t_last:
            self.t_last = now


def _wrap_deg(a: float) -> float:
    w = (a + 180.0) % 360.0 - 180.0
    return w + 360.0 if w <= -180.0 else w


class MappingSet:
    """All mappings of a show at run time. Not thread-safe: call from one thread (the loop)."""

    def __init__(self, mappings: Sequence[Mapping]):
        self.mappings: tuple = tuple(mappings)
        for m in self.mappings:
            if m.pattern is None:
                raise ValueError(f"mapping {m.index} has no compiled pattern: build mappings with parse_mappings")
        self._live = [_Live(m) for m in self.mappings]
        self._literal: dict = {}  # address -> mapping indices, for patterns without wildcards
        self._wild: dict = {}  # number of parts -> [mapping index]
        for i, m in enumerate(self.mappings):
            if m.pattern.literal:
                self._literal.setdefault(m.address, []).append(i)
            else:
                self._wild.setdefault(len(m.pattern.parts), []).append(i)
        self._cache: dict = {}
        self.ignored: Counter = Counter()  # reason -> messages' values ignored
        self.messages = 0  # messages taken (their address matched a mapping)
        self.accepted = 0
        self.held = 0  # values inside the dead band
        self.commands = 0  # Commands returned by tick

    @classmethod
    def from_show(cls, show, reserved: Sequence[str] = ()) -> "MappingSet":
        """The mappings of a loaded :class:`~fieldmix.model.Show` (none if it has no ``mappings``)."""
        raw = show.raw if isinstance(show.raw, dict) else {}
        if "mappings" not in raw:
            return cls(())
        name = oneline(show.path.name) if show.path is not None else "show"
        return cls(parse_mappings(raw["mappings"], f"{name}: mappings", show.source_ids, reserved))

    def __len__(self) -> int:
        return len(self.mappings)

    # ---------------------------------------------------------------- routing
    def matching(self, address: str) -> tuple:
        """Indices of the mappings whose pattern matches ``address``."""
        hit = self._cache.get(address)
        if hit is not None:
            return hit
        found = list(self._literal.get(address, ()))
        if self._wild and isinstance(address, str) and address.startswith("/"):
            parts = address[1:].split("/")
            for i in self._wild.get(len(parts), ()):
                if self.mappings[i].pattern.match_parts(parts):
                    found.append(i)
        hit = tuple(sorted(found))
        if len(self._cache) >= _CACHE_MAX:
            self._cache.clear()
        self._cache[address] = hit
        return hit

    def feed(self, address: str, args: Sequence[Any], now: float) -> bool:
        """Offer one OSC message; True if its address matches a mapping (then it is taken,
        even when its value is ignored). Never raises for bad arguments."""
        if not self.mappings or not isinstance(address, str):
            return False
        hits = self.matching(address)
        if not hits:
            return False
        now = _clock(now)
        self.messages += 1
        ok_args = isinstance(args, (list, tuple))
        for i in hits:
            m = self.mappings[i]
            live = self._live[i]
            if not ok_args:
                reason, v = "bad_type", None
            else:
                reason, v = _value(args, m.arg)
            if reason is not None:
                self.ignored[reason] += 1
                live.ignored += 1
                continue
            if live.last_input is not None and abs(v - live.last_input) < m.dead_band:
                self.held += 1
                live.held += 1
                continue
            self.accepted += 1
            live.accepted += 1
            live.last_input = v
            out = m.output_for(v)
            if m.smooth_ms > 0.0:
                if live.y is not None:
                    live.advance(m, now)  # the old target held until now
                elif live.target is None:
                    live.t_first = now
            live.target = out
        return True

    # ---------------------------------------------------------------- output
    def tick(self, now: float, state) -> list:
        """Commands to apply now (only outputs that changed since they were last handed out).

        ``state``: the :class:`~fieldmix.state.ShowState`, read for the coordinates a
        position mapping does not set and for where a smoothed output starts from.
        """
        now = _clock(now)
        out: list = []
        positions: dict = {}  # source -> [x, y, z] being built (its Command is in `out`)
        for i, m in enumerate(self.mappings):
            live = self._live[i]
            if live.target is None:
                continue
            if m.smooth_ms > 0.0:
                if live.y is None:
                    live.y = self._start_value(m, live.target, state)
                    live.t_last = live.t_first
                live.advance(m, now)
                value = live.y
            else:
                value = live.target
            if live.emitted is not None and value == live.emitted:
                continue
            live.emitted = value
            p = PARAMS[m.param]
            if p.axis is not None:
                pos = positions.get(m.source)
                if pos is None:
                    pos = [float(c) for c in state.sources[m.source].position]
                    positions[m.source] = pos
                    out.append(("position", m.source))
                pos[p.axis] = value
            elif m.param == "azimuth":
                out.append(Command("source", m.source, "azimuth", (_wrap_deg(value),)))
            else:
                out.append(Command("source", m.source, p.command, (value,)))
        cmds = [
            Command("source", c[1], "position", tuple(positions[c[1]])) if isinstance(c, tuple) else c for c in out
        ]
        self.commands += len(cmds)
        return cmds

    @staticmethod
    def _start_value(m: Mapping, target: float, state) -> float:
        src = state.sources[m.source]
        p = PARAMS[m.param]
        if p.axis is not None:
            return float(src.position[p.axis])
        if m.param in ("azimuth", "elevation", "distance"):
            az, el, d = src.spherical
            if m.param == "azimuth":
                return target + _wrap_deg(az - target)  # the nearer way round
            return el if m.param == "elevation" else d
        if m.param == "gain_db":
            return float(src.gain_db)
        return float(src.spread)

    def stats(self) -> dict:
        """Counters for status pages (JSON-able)."""
        return {
            "mappings": len(self.mappings),
            "messages": self.messages,
            "accepted": self.accepted,
            "held": self.held,
            "ignored": {r: self.ignored.get(r, 0) for r in IGNORE_REASONS},
            "commands": self.commands,
            "per_mapping": [
                {
                    "address": m.address,
                    "source": m.source_id,
                    "param": m.param,
                    "accepted": live.accepted,
                    "held": live.held,
                    "ignored": live.ignored,
                    "input": live.last_input,
                    "output": live.emitted,
                }
                for m, live in zip(self.mappings, self._live)
            ],
        }


def _clock(now: Any) -> float:
    t = float(now)
    if not math.isfinite(t):  # a clock reading, not a message: a caller's bug
        raise ValueError(f"time must be finite, got {now!r}")
    return t


def _value(args: Sequence[Any], k: int):
    """(reason, None) if argument ``k`` is unusable, else (None, float)."""
    if k >= len(args):
        return "missing_arg", None
    v = args[k]
    if isinstance(v, bool) or not isinstance(v, numbers.Real):
        return "bad_type", None
    try:
        f = float(v)
    except (OverflowError, ValueError):
        return "not_finite", None
    if not math.isfinite(f):
        return "not_finite", None
    return None, f


__all__ = [
    "PARAMS", "CURVES", "CURVE_RATIO", "IGNORE_REASONS", "ParamSpec", "Mapping", "MappingSet", "parse_mappings",
]
