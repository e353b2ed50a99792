"""The one grammar of control messages: control scripts, OSC, recordings.

A control message is an address and a list of arguments, e.g.
``/source/vox/azimuth 45`` or ``/source/2/position 1.5 2.0``. :func:`parse_message`
checks it against :data:`ADDRESSES` and turns it into :class:`Command` objects that the
show state applies. A control script (docs/control-script.md) is a text file of timed
messages, one per line: ``<seconds> <address> <args...>``; :func:`parse_script` reads
it and :func:`format_line` writes a line of it (a recording), so that
``parse_script_text(format_line(t, a, args))`` gives back ``t``, ``a`` and ``args``.

Sources are addressed by id (``/source/vox/...``) or by their 1-based place in the show
(``/source/2/...``); ids may not be digits alone (the show loader refuses such ids), so
the two never clash. OSC 1.0 address patterns (``/source/*/mute``) are not this
module's business: the OSC server passes a ``match(pattern, candidates) -> [indices]``
callable, which is applied to each part of the address between slashes (as OSC 1.0
matches part by part) - to the source part against the show's source ids, and to every
other part against the literal parts of the templates. Without ``match`` only exact ids,
numbers and literal parts are recognised.

Ranges (see ADDRESSES; the engine's safety ceiling still protects whatever passes):
azimuth any finite number (wrapped to (-180, 180]); elevation -90..90 degrees; distance
0..1000 m; each position coordinate -1000..1000 m; source gain -120..+24 dB (room to lift
a quiet feed); master gain -120..+12 dB (the master only trims the whole mix); mute
exactly 0 or 1; spread 0..360 degrees. Booleans are refused as numbers (OSC T/F, JSON
true), as are strings, bytes and None. ``/cue/...`` belongs to the live server's cue list
(fieldmix.live.automation), not to this grammar.
"""

from __future__ import annotations

import difflib
import math
import numbers
import re
from dataclasses import dataclass
from functools import cached_property, lru_cache
from pathlib import Path
from types import MappingProxyType
from typing import Callable, Mapping, Optional, Sequence

from fieldmix.errors import ConfigError, ControlError
from fieldmix.jsonload import decode_utf8, oneline, read_bytes

MatchFn = Callable[[str, Sequence], Sequence[int]]  # candidates: names, or tuples of names (id, index)

RESERVED_PREFIXES = ("/cue",)

#: Addresses the live server's transports handle themselves (beside the grammar): a sensor
#: mapping may not take them.
TRANSPORT_ADDRESSES = (
    "/ping", "/status", "/subscribe", "/unsubscribe", "/layout/load", "/master/panic",
    "/record/start", "/record/stop",
)


@dataclass(frozen=True)
class Command:
    target: str  # "source" | "master" (extensions may add targets)
    source: Optional[int]  # 0-based source index for target "source", else None
    param: str  # source: azimuth|elevation|distance|position|gain|mute|solo|spread ; master: gain|mute
    value: tuple  # floats: position (x, y) or (x, y, z); mute (0.0|1.0,); others one value


@dataclass(frozen=True)
class ArgSpec:
    """One argument of an address: a number within [lo, hi] (None = unbounded)."""

    name: str  # as written in docs and messages: "deg", "m", "dB", "flag"
    lo: Optional[float] = None
    hi: Optional[float] = None
    unit: str = ""


@dataclass(frozen=True)
class AddressSpec:
    """One address of the grammar.

    ``template`` has literal parts and at most one ``<id>`` part (a source id or 1-based
    number). ``kind``: ``"number"`` (each argument within its range), ``"angle"`` (any
    finite number, wrapped to (-180, 180]) or ``"flag"`` (exactly 0 or 1).
    ``min_args`` <= number of arguments <= ``len(args)``.
    """

    template: str
    target: str
    param: str
    args: tuple
    kind: str = "number"
    min_args: Optional[int] = None
    doc: str = ""

    @cached_property
    def parts(self) -> tuple:
        return tuple(self.template[1:].split("/"))

    @property
    def n_min(self) -> int:
        return len(self.args) if self.min_args is None else self.min_args

    @property
    def arg_text(self) -> str:
        """``<x> <y> [<z>]``: the argument list as docs write it."""
        out = []
        for i, a in enumerate(self.args):
            out.append(f"<{a.name}>" if i < self.n_min else f"[<{a.name}>]")
        return " ".join(out)

    @property
    def range_text(self) -> str:
        if self.kind == "flag":
            return "0 or 1"
        if self.kind == "angle":
            return "any finite number, wrapped to (-180, 180]"
        a = self.args[0]
        unit = f" {a.unit}" if a.unit else ""
        return f"{_num(a.lo)} .. {_num(a.hi)}{unit}" + (" each" if len(self.args) > 1 else "")


def _num(x) -> str:
    if x is None:
        return "any"
    if float(x).is_integer():
        return str(int(x))
    return str(x)


_DEG = ArgSpec("deg", unit="degrees")
_COORD = ("m", -1000.0, 1000.0, "m")


def _addresses() -> dict:
    specs = [
        AddressSpec(
            "/source/<id>/azimuth", "source", "azimuth", (_DEG,), kind="angle",
            doc="Horizontal direction of the source: 0 = front, + = left. Keeps elevation and distance.",
        ),
        AddressSpec(
            "/source/<id>/elevation", "source", "elevation",
            (ArgSpec("deg", -90.0, 90.0, "degrees"),),
            doc="Height angle of the source: + = up. Keeps azimuth and distance.",
        ),
        AddressSpec(
            "/source/<id>/distance", "source", "distance",
            (ArgSpec("m", 0.0, 1000.0, "m"),),
            doc="Distance of the source from the listener. Keeps its direction.",
        ),
        AddressSpec(
            "/source/<id>/position", "source", "position",
            (ArgSpec("x", *_COORD[1:]), ArgSpec("y", *_COORD[1:]), ArgSpec("z", *_COORD[1:])),
            min_args=2,
            doc="Cartesian position: x right, y front, z up; without z the source keeps its height.",
        ),
        AddressSpec(
            "/source/<id>/gain", "source", "gain", (ArgSpec("dB", -120.0, 24.0, "dB"),),
            doc="Gain of the source.",
        ),
        AddressSpec(
            "/source/<id>/mute", "source", "mute", (ArgSpec("flag"),), kind="flag",
            doc="1 mutes the source, 0 unmutes it (the gain ramps, no click).",
        ),
        AddressSpec(
            "/source/<id>/solo", "source", "solo", (ArgSpec("flag"),), kind="flag",
            doc="Solo in place: while any source is soloed, only soloed sources sound, each in its "
                "own position. 0 clears it. A rehearsal tool: solos are not autosaved.",
        ),
        AddressSpec(
            "/source/<id>/spread", "source", "spread",
            (ArgSpec("deg", 0.0, 360.0, "degrees"),),
            doc="Width of the source: 0 = a point, 360 = all around.",
        ),
        AddressSpec(
            "/master/gain", "master", "gain", (ArgSpec("dB", -120.0, 12.0, "dB"),),
            doc="Gain of the whole mix.",
        ),
        AddressSpec(
            "/master/mute", "master", "mute", (ArgSpec("flag"),), kind="flag",
            doc="1 mutes the whole mix, 0 unmutes it.",
        ),
    ]
    return {s.template: s for s in specs}


#: The grammar: template -> AddressSpec. Read-only; an interface that adds addresses
#: passes ``addresses={**ADDRESSES, **its_own}`` to :func:`parse_message`.
ADDRESSES: Mapping[str, AddressSpec] = MappingProxyType(_addresses())


# --------------------------------------------------------------------------- messages


def parse_message(
    address: str,
    args: Sequence[object],
    source_ids: Sequence[str],
    match: Optional[MatchFn] = None,
    addresses: Optional[Mapping[str, AddressSpec]] = None,
) -> list:
    """Turn one control message into Commands; raise ControlError if it is bad.

    ``source_ids``: the show's source ids in order. ``match``: optional OSC pattern
    matcher ``match(pattern, candidates) -> indices`` applied per address part.
    When a pattern selects several addresses (``/master/*``), those whose arguments do
    not fit are left out; if none fits, the first error is raised.
    """
    table = ADDRESSES if addresses is None else addresses
    if not isinstance(address, str):
        raise ControlError("unknown_address", f"address must be a string, got {type(address).__name__}")
    if not address.startswith("/"):
        raise ControlError("unknown_address", f'unknown address "{_clip(address)}": addresses start with "/"')
    parts = address[1:].split("/")
    if isinstance(args, (str, bytes, bytearray)) or args is None:
        raise ControlError("bad_type", f"{_clip(address)}: arguments must be a list, got {_show(args)}")
    if not isinstance(args, (list, tuple)):
        args = tuple(args)

    # 1) templates whose literal parts fit
    candidates = _candidates(parts, table, match)
    if not candidates:
        for pre in RESERVED_PREFIXES:
            if address == pre or address.startswith(pre + "/"):
                raise ControlError(
                    "unknown_address",
                    f'unknown address "{_clip(address)}": {pre}/... fires the live server\'s cues '
                    "(over OSC or from the page); a control script holds changes, not cue commands",
                )
        raise ControlError("unknown_address", f'unknown address "{_clip(address)}"{_suggest(parts, table)}')

    # 2) the source part
    resolved: dict = {}
    commands: list = []
    first_error: Optional[ControlError] = None
    for spec, id_pos in candidates:
        if id_pos is None:
            indices = (None,)
        else:
            if id_pos not in resolved:
                resolved[id_pos] = _resolve_sources(parts[id_pos], source_ids, match)
            indices = resolved[id_pos]
        try:
            value = _check_args(spec, address, args)
        except ControlError as exc:
            if len(candidates) == 1:
                raise
            first_error = first_error or exc
            continue
        for idx in indices:
            commands.append(Command(spec.target, idx, spec.param, value))
    if not commands and first_error is not None:
        raise first_error
    return commands


class _Index:
    """Exact lookup of a table (no patterns): the fast path for every plain message."""

    def __init__(self, table: Mapping[str, AddressSpec]):
        self.plain: dict = {}  # parts -> spec, templates without <id>
        self.with_id: dict = {}  # parts with "<id>" in its slot -> (spec, slot)
        self.slots: dict = {}  # number of parts -> slots where an <id> can be
        for spec in table.values():
            parts = spec.parts
            if "<id>" in parts:
                k = parts.index("<id>")
                self.with_id[parts] = (spec, k)
                self.slots.setdefault(len(parts), set()).add(k)
            else:
                self.plain[parts] = spec


_DEFAULT_INDEX = _Index(ADDRESSES)


def _candidates(parts: list, table: Mapping[str, AddressSpec], match: Optional[MatchFn]) -> list:
    if match is None:
        index = _DEFAULT_INDEX if table is ADDRESSES else _Index(table)
        found = []
        key = tuple(parts)
        spec = index.plain.get(key)
        if spec is not None:
            found.append((spec, None))
        for k in index.slots.get(len(parts), ()):
            hit = index.with_id.get(key[:k] + ("<id>",) + key[k + 1 :])
            if hit is not None:
                found.append(hit)
        return found
    found = []
    for spec in table.values():
        tparts = spec.parts
        if len(tparts) != len(parts):
            continue
        id_pos = None
        for k, (tp, p) in enumerate(zip(tparts, parts)):
            if tp == "<id>":
                id_pos = k
            elif not _literal_fits(p, tp, match):
                break
        else:
            found.append((spec, id_pos))
    return found


def _literal_fits(part: str, literal: str, match: Optional[MatchFn]) -> bool:
    if part == literal:
        return True
    if match is None:
        return False
    return bool(list(match(part, [literal])))


def _resolve_sources(part: str, source_ids: Sequence[str], match: Optional[MatchFn]) -> tuple:
    n = len(source_ids)
    if part.isdigit() and part.isascii():
        k = int(part)
        if 1 <= k <= n:
            return (k - 1,)
        raise ControlError(
            "unknown_source", f"no source number {k}: the show has {n} source{'s' if n != 1 else ''} (1..{n})"
        )
    if match is not None:
        # each source answers to its id and to its 1-based index ("/source/[1-4]/spread")
        cands = [(sid, str(i + 1)) for i, sid in enumerate(source_ids)]
        found = sorted(set(int(i) for i in match(part, cands)))
        if found and all(0 <= i < n for i in found):
            return tuple(found)
    else:
        i = _id_index(tuple(source_ids)).get(part)
        if i is not None:
            return (i,)
    hint = ""
    close = difflib.get_close_matches(part, list(source_ids), n=1, cutoff=0.6)
    if close:
        hint = f' (did you mean "{close[0]}"?)'
    raise ControlError("unknown_source", f'unknown source "{_clip(part)}"{hint}')


def _wrap_deg(a: float) -> float:
    """Scalar twin of geometry.wrap_deg (numpy is slow for one number): (-180, 180]."""
    w = (a + 180.0) % 360.0 - 180.0
    return w + 360.0 if w <= -180.0 else w


@lru_cache(maxsize=16)
def _id_index(source_ids: tuple) -> dict:
    index: dict = {}
    for i, sid in enumerate(source_ids):
        index.setdefault(sid, i)
    return index


def _check_args(spec: AddressSpec, address: str, args: Sequence[object]) -> tuple:
    n = len(args)
    lo_n, hi_n = spec.n_min, len(spec.args)
    if not (lo_n <= n <= hi_n):
        want = f"{lo_n}" if lo_n == hi_n else f"{lo_n} or {hi_n}" if hi_n - lo_n == 1 else f"{lo_n}..{hi_n}"
        noun = "argument" if hi_n == 1 else "arguments"
        raise ControlError(
            "bad_arg_count",
            f"{_clip(address)} takes {want} {noun} ({spec.arg_text}), got {n}",
        )
    out = []
    for a, v in zip(spec.args, args):
        f = _finite_number(v, address, a)
        if spec.kind == "flag":
            if f not in (0.0, 1.0):
                raise ControlError("out_of_range", f"{_clip(address)}: {_show(v)} is not 0 or 1")
        elif spec.kind == "angle":
            f = _wrap_deg(f)
        else:
            if (a.lo is not None and f < a.lo) or (a.hi is not None and f > a.hi):
                unit = f" {a.unit}" if a.unit else ""
                raise ControlError(
                    "out_of_range",
                    f"{_clip(address)}: {_show(v)} is out of range ({_num(a.lo)} .. {_num(a.hi)}{unit})",
                )
        out.append(f)
    return tuple(out)


def _finite_number(v: object, address: str, a: ArgSpec) -> float:
    if isinstance(v, bool) or not isinstance(v, numbers.Real):
        what = "true/false" if isinstance(v, bool) else _show(v)
        raise ControlError(
            "bad_type", f"{_clip(address)}: expected a number for <{a.name}>, got {what}"
        )
    try:
        f = float(v)
    except (OverflowError, ValueError):
        raise ControlError("out_of_range", f"{_clip(address)}: {_show(v)} is far out of range") from None
    if not math.isfinite(f):
        raise ControlError("not_finite", f"{_clip(address)}: {_show(v)} is not a finite number")
    return f


def _suggest(parts: Sequence[str], table: Mapping[str, AddressSpec]) -> str:
    forms = []
    for spec in table.values():
        tparts = spec.parts
        if len(tparts) == len(parts):
            forms.append("/" + "/".join(p if t == "<id>" else t for t, p in zip(tparts, parts)))
    forms = list(dict.fromkeys(forms))
    close = difflib.get_close_matches("/" + "/".join(parts), forms, n=1, cutoff=0.75)
    return f' (did you mean "{close[0]}"?)' if close else ""


def _show(v: object) -> str:
    if isinstance(v, str):
        return '"' + _clip(v, 30) + '"'
    if isinstance(v, (bytes, bytearray)):
        return "bytes"
    if v is None:
        return "nothing (None)"
    if isinstance(v, float):
        return repr(v)
    if isinstance(v, numbers.Real):
        return _clip(str(v), 30)
    return type(v).__name__


def _clip(s: str, n: int = 80) -> str:
    s = oneline(s)
    return s if len(s) <= n else s[: n - 3] + "..."


def command_to_message(cmd: Command, source_ids: Sequence[str]) -> tuple:
    """The inverse of :func:`parse_message` for one Command: ``(address, args)``.

    The source is written by id. Used to record changes that did not arrive as a message
    (for instance from the web page) into a control script.
    """
    for spec in ADDRESSES.values():
        if spec.target == cmd.target and spec.param == cmd.param:
            if "<id>" in spec.template:
                if cmd.source is None or not (0 <= cmd.source < len(source_ids)):
                    raise ValueError(f"command has no valid source: {cmd}")
                address = spec.template.replace("<id>", source_ids[cmd.source])
            else:
                address = spec.template
            args = tuple(int(v) if spec.kind == "flag" else float(v) for v in cmd.value)
            return address, args
    raise ValueError(f"no address for command {cmd}")


# --------------------------------------------------------------------------- scripts


@dataclass(frozen=True)
class ScriptEvent:
    time: float  # seconds from the start
    line: int  # 1-based line in the script
    address: str
    args: tuple  # tokens as parsed: int, float or str
    commands: tuple  # Commands (parse_message of address + args)


_INT_RE = re.compile(r"^[+-]?[0-9]+$")
_FLOAT_RE = re.compile(
    r"^[+-]?(?:[0-9]+\.?[0-9]*(?:[eE][+-]?[0-9]+)?|\.[0-9]+(?:[eE][+-]?[0-9]+)?|inf|infinity|nan)$",
    re.IGNORECASE,
)
_BAD_TOKEN_CHARS = re.compile(r"[\s#]")


def parse_token(tok: str):
    """A script token: int if it looks like one, float (incl. inf/nan), else the string."""
    if _INT_RE.match(tok):
        try:
            return int(tok)
        except ValueError:  # more digits than Python converts: read it as a (huge) float
            return float(tok)
    if _FLOAT_RE.match(tok):
        return float(tok)
    return tok


def parse_script(path, source_ids: Sequence[str], match: Optional[MatchFn] = None) -> list:
    """Read a control script file. Errors: ConfigError(f"{name} line {n}", message)."""
    path = Path(path)
    name = oneline(path.name)
    raw = read_bytes(path, name, what="control script")
    text = decode_utf8(raw, name, lines_in_where=True)
    return parse_script_text(text, name, source_ids, match=match)


def parse_script_text(
    text: str, name: str, source_ids: Sequence[str], match: Optional[MatchFn] = None
) -> list:
    """Parse control script text; ``name`` is used in error places (``name line 12``)."""
    events = []
    last_t = 0.0
    last_line = 0
    # split on "\n" only (as editors number lines), not on every Unicode line break
    for n, line in enumerate(text.split("\n"), start=1):
        body = line.split("#", 1)[0]
        tokens = body.split()
        if not tokens:
            continue
        where = f"{name} line {n}"
        t_tok = tokens[0]
        t = parse_token(t_tok)
        if isinstance(t, str):
            raise ConfigError(where, f'expected a time in seconds first, got "{_clip(t_tok, 30)}"')
        t = float(t)
        if not math.isfinite(t):
            raise ConfigError(where, f"time {_clip(t_tok, 30)} is not a finite number")
        if t < 0:
            raise ConfigError(where, f"time {_clip(t_tok, 30)} is negative: times start at 0")
        if t < last_t:
            raise ConfigError(
                where,
                f"time goes backwards: {_fmt_time(t)} s comes after {_fmt_time(last_t)} s "
                f"(line {last_line}); keep lines in time order",
            )
        if len(tokens) < 2:
            raise ConfigError(where, f"expected an address after the time {_clip(t_tok, 30)}")
        address = tokens[1]
        args = tuple(parse_token(tok) for tok in tokens[2:])
        try:
            cmds = parse_message(address, args, source_ids, match=match)
        except ControlError as exc:
            raise ConfigError(where, exc.message) from None
        events.append(ScriptEvent(t, n, address, args, tuple(cmds)))
        last_t, last_line = t, n
    return events


def _fmt_time(t: float) -> str:
    return f"{t:.10g}"


def _format_number(v) -> str:
    if isinstance(v, bool) or not isinstance(v, numbers.Real):
        raise ValueError(f"not a number: {v!r}")
    if isinstance(v, numbers.Integral):
        return str(int(v))
    return repr(float(v))


def format_line(time: float, address: str, args: Sequence) -> str:
    """One control script line: ``<time> <address> <args...>`` (no newline).

    Numbers are written so they read back exactly (ints as ints, floats by repr); a
    string argument must be one token that does not read as a number. Raises ValueError
    for what a script line cannot hold.
    """
    t = _format_number(time)
    try:
        tf = float(time)
    except OverflowError:
        tf = math.inf
    if not math.isfinite(tf) or tf < 0:
        raise ValueError(f"time must be finite and >= 0, got {time!r}")
    if not isinstance(address, str) or not address.startswith("/") or _BAD_TOKEN_CHARS.search(address):
        raise ValueError(f"not a script address: {address!r}")
    out = [t, address]
    for a in args:
        if isinstance(a, str):
            if not a or _BAD_TOKEN_CHARS.search(a) or not isinstance(parse_token(a), str):
                raise ValueError(f"string argument {a!r} cannot be written as one token")
            out.append(a)
        else:
            out.append(_format_number(a))
    return " ".join(out)
