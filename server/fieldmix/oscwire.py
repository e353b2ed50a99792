"""OSC 1.0 / 1.1 wire codec that treats every packet as hostile.

This is the byte layer under the live server's OSC interface: it turns
datagrams (or SLIP frames from a TCP stream) into ``(due_time, OscMessage)``
pairs and builds packets for replies and tests. It does no I/O and keeps no
state except in :class:`SlipDecoder`.

Rules the decoder keeps (see docs/osc-wire.md for the reasons):

* :func:`decode_packet` raises :class:`OscDecodeError` and nothing else for
  any ``bytes`` input; ``err.reason`` is one of ``OscDecodeError.REASONS``.
* No recursion: nested bundles are walked with an explicit stack whose depth
  is capped by ``Limits.max_depth``. Every size field is checked against the
  bytes that remain in its enclosing element before it is used, and every
  step moves strictly forward, so the work per packet is linear in its size.
* Time tags are NTP era 0 (1900-01-01 .. 2036-02-07). A nested bundle
  inherits the later of its own and its parent's time; times at or before
  ``now`` come back as ``None`` (due immediately); times more than
  ``Limits.max_future`` seconds ahead are rejected (``far_future``).
* Float arguments come back as Python floats and may be NaN or infinite: the
  control layer rejects non-finite values (``ControlError('not_finite')``).

Address patterns (OSC 1.0 ``? * [abc] [a-z] [!a] {foo,bar}``) are matched one
part at a time by a position-set simulation, never by a backtracking regex:
matching a part of ``n`` characters costs at most ``(n + 1) * cost`` checks,
where ``cost`` is the number of the part's tokens plus its brace alternatives
(see :meth:`SegmentPattern.match_steps`).
"""

from __future__ import annotations

import math
import numbers
import re
import struct
import time
from dataclasses import dataclass
from functools import lru_cache
from typing import Iterable, NamedTuple, Optional, Sequence, Union

__all__ = [
    "IMMEDIATE",
    "NTP_IMMEDIATE",
    "IMPULSE",
    "Impulse",
    "TimeTag",
    "OscMessage",
    "OscBundle",
    "OscDecodeError",
    "OscEncodeError",
    "Limits",
    "decode_packet",
    "encode_message",
    "encode_bundle",
    "encode_packet",
    "ntp_to_unix",
    "unix_to_ntp",
    "SegmentPattern",
    "Pattern",
    "compile_pattern",
    "match_address",
    "match_segment",
    "slip_encode",
    "SlipDecoder",
]

# --------------------------------------------------------------------------
# constants and small types
# --------------------------------------------------------------------------

#: Passed as a bundle's time to :func:`encode_bundle`, and returned by
#: :func:`decode_packet` as the due time of a message to apply at once.
IMMEDIATE = None
#: The raw NTP time tag that means "immediately" (63 zero bits and a one).
NTP_IMMEDIATE = 1

NTP_UNIX_OFFSET = 2208988800  # seconds from 1900-01-01 to 1970-01-01 (RFC 868 / NTP epoch)
_NTP_MAX = (1 << 64) - 1
_FRAC = float(1 << 32)

_BUNDLE_TAG = b"#bundle\x00"
_I32 = struct.Struct(">i")
_U64 = struct.Struct(">Q")
_I64 = struct.Struct(">q")
_F32 = struct.Struct(">f")
_F64 = struct.Struct(">d")


class Impulse:
    """The OSC 1.1 ``I`` argument (OSC 1.0 "Infinitum"): a trigger with no data."""

    _instance: "Optional[Impulse]" = None

    def __new__(cls) -> "Impulse":
        if cls._instance is None:
            cls._instance = super().__new__(cls)
        return cls._instance

    def __repr__(self) -> str:
        return "IMPULSE"

    def __reduce__(self):
        return (Impulse, ())


IMPULSE = Impulse()


class TimeTag(NamedTuple):
    """A raw 64-bit NTP time tag: a ``t`` argument, or an odd bundle time for tests."""

    ntp: int

    @property
    def unix(self) -> Optional[float]:
        """Unix seconds, or ``None`` for the "immediately" tag."""
        return None if self.ntp == NTP_IMMEDIATE else ntp_to_unix(self.ntp)


def ntp_to_unix(ntp: int) -> float:
    """NTP 64-bit fixed point (era 0: seconds since 1900 . 2^-32 fraction) -> unix seconds."""
    return (ntp >> 32) - NTP_UNIX_OFFSET + (ntp & 0xFFFFFFFF) / _FRAC


def unix_to_ntp(unix: float) -> int:
    """Unix seconds -> NTP 64-bit time tag (era 0). Raises ValueError outside 1900..2036."""
    if not isinstance(unix, numbers.Real) or isinstance(unix, bool) or not math.isfinite(unix):
        raise ValueError(f"time must be a finite number of unix seconds, got {unix!r}")
    unix = float(unix)
    secs = math.floor(unix)
    frac = int(round((unix - secs) * _FRAC))
    if frac >= 1 << 32:  # rounding carried into the seconds
        secs, frac = secs + 1, 0
    ntp_secs = int(secs) + NTP_UNIX_OFFSET
    if not 0 <= ntp_secs <= 0xFFFFFFFF:
        raise ValueError(f"time {unix!r} lies outside NTP era 0 (1900-01-01 .. 2036-02-07)")
    return (ntp_secs << 32) | frac


@dataclass(frozen=True)
class OscMessage:
    """One OSC message: the address (pattern) and its arguments.

    Argument types: ``int`` (i, h), ``float`` (f, d; may be NaN/inf), ``str``
    (s, S, c), ``bytes`` (b), ``bool`` (T, F), ``None`` (N), :data:`IMPULSE` (I),
    :class:`TimeTag` (t). ``bool`` is a subclass of ``int`` in Python: the
    control layer must test for it first.
    """

    address: str
    args: tuple = ()


@dataclass(frozen=True)
class OscBundle:
    """A bundle to encode: ``timetag`` is unix seconds, ``None`` (immediately) or a
    :class:`TimeTag`; ``elements`` are :class:`OscMessage`, :class:`OscBundle` or
    already-encoded packets (``bytes``)."""

    timetag: Union[float, None, TimeTag]
    elements: tuple = ()


class OscDecodeError(Exception):
    """A packet (or address pattern) that cannot be decoded. ``reason`` is a short code."""

    REASONS = (
        "bad_packet",  # neither a message ('/') nor a bundle ('#bundle'); or length not a multiple of 4
        "truncated",  # the data ends inside a fixed-size field or before a required part
        "bad_size",  # a size field that lies: negative, not a multiple of 4, zero, past the end
        "bad_string",  # no NUL terminator, non-zero padding, or not UTF-8
        "bad_address",  # address does not start with '/' or holds control characters
        "bad_typetag",  # the type tag string does not start with ','
        "unsupported_type",  # a type tag this codec does not decode (r, m, [, ], unknown)
        "bad_value",  # a value outside its domain: a 'c' that is no character, non-zero blob padding
        "bad_bundle",  # a bundle element that is neither a message nor a bundle; short header
        "trailing",  # bytes left over after a message's last argument
        "too_deep",  # bundles nested deeper than Limits.max_depth
        "too_many",  # more elements than Limits.max_elements or args than Limits.max_args
        "too_big",  # packet, string or blob over its limit
        "far_future",  # a time tag more than Limits.max_future seconds ahead
        "bad_pattern",  # an address pattern that cannot be compiled
    )

    def __init__(self, reason: str, message: str = ""):
        if reason not in self.REASONS:
            raise ValueError(f"unknown OscDecodeError reason {reason!r}")
        self.reason = reason
        self.message = message or reason
        super().__init__(f"{reason}: {message}" if message else reason)


class OscEncodeError(ValueError):
    """Our own code asked to encode something OSC cannot carry (a programming error)."""


@dataclass(frozen=True)
class Limits:
    """Bounds on the work and memory one packet may cost.

    ``max_depth`` counts bundles: a message in a top-level bundle is at depth 1.
    ``max_elements`` counts every bundle element visited (messages and bundles).
    ``max_future`` is the horizon in seconds beyond which a time tag is rejected.
    """

    max_packet: int = 65536
    max_depth: int = 8
    max_elements: int = 1024
    max_args: int = 64
    max_string: int = 4096
    max_blob: int = 65536
    max_future: float = 3600.0

    def __post_init__(self):
        for name in ("max_packet", "max_depth", "max_elements", "max_args", "max_string", "max_blob"):
            v = getattr(self, name)
            if not isinstance(v, int) or isinstance(v, bool) or v < 1:
                raise ValueError(f"Limits.{name} must be a positive integer, got {v!r}")
        mf = self.max_future
        if not isinstance(mf, (int, float)) or isinstance(mf, bool) or not (mf >= 0 and math.isfinite(mf)):
            raise ValueError(f"Limits.max_future must be a finite number >= 0, got {mf!r}")


_DEFAULT_LIMITS = Limits()

# --------------------------------------------------------------------------
# decoding
# --------------------------------------------------------------------------

# bytes of data each supported type tag takes (-1: variable: string or blob)
_TAG_SIZE = {
    "i": 4, "f": 4, "c": 4, "h": 8, "d": 8, "t": 8,
    "s": -1, "S": -1, "b": -1,
    "T": 0, "F": 0, "N": 0, "I": 0,
}
_MIN_SIZE = {tag: (4 if size < 0 else size) for tag, size in _TAG_SIZE.items()}
_ADDRESS_BAD = re.compile(r"[\x00-\x20\x7f]")  # C0 controls, space, DEL


def _read_string(
    data: bytes, pos: int, end: int, max_len: int, what: str, over: str = "too_big"
) -> tuple[str, int]:
    """An OSC-string at ``pos`` (inside ``[pos, end)``) -> (text, position after padding).

    Looks at no more than ``max_len + 1`` bytes; a longer string raises ``over``.
    """
    if pos >= end:
        raise OscDecodeError("truncated", f"{what} missing at byte {pos}")
    window = min(end, pos + max_len + 1)
    nul = data.find(b"\x00", pos, window)
    if nul < 0:
        if window < end:
            raise OscDecodeError(over, f"{what} at byte {pos} longer than {max_len} bytes")
        raise OscDecodeError("bad_string", f"{what} at byte {pos} has no NUL terminator")
    nxt = (nul + 4) & ~3  # NUL included, padded to a multiple of 4 (pos is 4-aligned)
    if nxt > end:
        raise OscDecodeError("truncated", f"{what} at byte {pos}: padding runs past the end")
    if data[nul:nxt].count(0) != nxt - nul:
        raise OscDecodeError("bad_string", f"{what} at byte {pos}: non-zero padding")
    try:
        text = data[pos:nul].decode("utf-8")
    except UnicodeDecodeError:
        raise OscDecodeError("bad_string", f"{what} at byte {pos} is not UTF-8") from None
    return text, nxt


def _decode_message(data: bytes, pos: int, end: int, limits: Limits) -> OscMessage:
    """The message that fills ``data[pos:end]`` exactly."""
    start = pos
    address, pos = _read_string(data, pos, end, limits.max_string, "address")
    if not address.startswith("/"):
        raise OscDecodeError("bad_address", f"address at byte {start} does not start with '/'")
    if _ADDRESS_BAD.search(address):
        raise OscDecodeError("bad_address", f"address at byte {start} holds a space or control character")
    if pos == end:
        # OSC 1.0: "robust in the case of a missing OSC Type Tag String" -> no arguments.
        return OscMessage(address, ())
    if data[pos] != 0x2C:  # ','
        raise OscDecodeError("bad_typetag", f"type tag string at byte {pos} does not start with ','")
    tag_pos = pos
    tags, pos = _read_string(data, pos, end, limits.max_args + 1, "type tag string", "too_many")
    tags = tags[1:]
    if len(tags) > limits.max_args:
        raise OscDecodeError("too_many", f"more than {limits.max_args} arguments")
    need = 0
    for tag in tags:
        size = _MIN_SIZE.get(tag)
        if size is None:
            raise OscDecodeError("unsupported_type", f"type tag {tag!r} at byte {tag_pos} is not supported")
        need += size
    if need > end - pos:
        raise OscDecodeError(
            "truncated", f"type tags ,{tags} need at least {need} bytes of data, {end - pos} left"
        )
    args = []
    for tag in tags:
        size = _TAG_SIZE[tag]
        if size > 0 and pos + size > end:
            raise OscDecodeError("truncated", f"argument {tag!r} at byte {pos} runs past the end")
        if tag == "i":
            args.append(_I32.unpack_from(data, pos)[0])
        elif tag == "f":
            args.append(_F32.unpack_from(data, pos)[0])
        elif tag == "s" or tag == "S":
            text, pos = _read_string(data, pos, end, limits.max_string, "string argument")
            args.append(text)
            continue
        elif tag == "b":
            if pos + 4 > end:
                raise OscDecodeError("truncated", f"blob size at byte {pos} runs past the end")
            n = _I32.unpack_from(data, pos)[0]
            if n < 0:
                raise OscDecodeError("bad_size", f"blob at byte {pos} claims a negative size {n}")
            if n > limits.max_blob:
                raise OscDecodeError("too_big", f"blob at byte {pos} of {n} bytes, limit {limits.max_blob}")
            padded = (n + 3) & ~3
            if padded > end - pos - 4:
                raise OscDecodeError("bad_size", f"blob at byte {pos} claims {n} bytes, {end - pos - 4} left")
            body = pos + 4
            if data[body + n:body + padded].count(0) != padded - n:
                raise OscDecodeError("bad_value", f"blob at byte {pos}: non-zero padding")
            args.append(bytes(data[body:body + n]))
            pos = body + padded
            continue
        elif tag == "h":
            args.append(_I64.unpack_from(data, pos)[0])
        elif tag == "d":
            args.append(_F64.unpack_from(data, pos)[0])
        elif tag == "t":
            args.append(TimeTag(_U64.unpack_from(data, pos)[0]))
        elif tag == "c":
            code = _I32.unpack_from(data, pos)[0]
            if not (0 <= code <= 0x10FFFF) or 0xD800 <= code <= 0xDFFF:
                raise OscDecodeError("bad_value", f"char argument at byte {pos} is not a character ({code})")
            args.append(chr(code))
        elif tag == "T":
            args.append(True)
        elif tag == "F":
            args.append(False)
        elif tag == "N":
            args.append(None)
        else:  # "I"
            args.append(IMPULSE)
        pos += size
    if pos != end:
        raise OscDecodeError("trailing", f"{end - pos} bytes after the last argument at byte {pos}")
    return OscMessage(address, tuple(args))


def _effective_time(ntp: int, parent: Optional[float], now: float, limits: Limits, pos: int) -> Optional[float]:
    """A bundle's due time (unix seconds, ``None`` = immediately) given its parent's."""
    t = None if ntp == NTP_IMMEDIATE else ntp_to_unix(ntp)
    if parent is not None and (t is None or t < parent):
        t = parent  # a nested bundle is never due before the bundle that holds it
    if t is not None and t <= now:
        return None
    if t is not None and t > now + limits.max_future:
        raise OscDecodeError(
            "far_future", f"bundle at byte {pos} is due {t - now:.0f} s from now, limit {limits.max_future:g} s"
        )
    return t


def decode_packet(
    data: Union[bytes, bytearray, memoryview],
    limits: Limits = _DEFAULT_LIMITS,
    now: Optional[float] = None,
) -> list[tuple[Optional[float], OscMessage]]:
    """Decode one OSC packet into ``[(due, message), ...]`` in packet order.

    ``due`` is unix seconds (wall clock, ``time.time()``), or ``None`` when the
    message is due now: not in a bundle, in an "immediately" bundle, or in a
    bundle whose time is not after ``now`` (default ``time.time()``).

    Raises :class:`OscDecodeError` for every malformed packet and nothing else;
    a non-bytes argument is a programming error (``TypeError``).
    """
    if isinstance(data, (bytearray, memoryview)):
        data = bytes(data)
    elif not isinstance(data, bytes):
        raise TypeError(f"decode_packet wants bytes, got {type(data).__name__}")
    n = len(data)
    if n > limits.max_packet:
        raise OscDecodeError("too_big", f"packet of {n} bytes, limit {limits.max_packet}")
    if n == 0:
        raise OscDecodeError("truncated", "empty packet")
    if n % 4:
        raise OscDecodeError("bad_packet", f"packet length {n} is not a multiple of 4")
    first = data[0]
    if first == 0x2F:  # '/'
        return [(None, _decode_message(data, 0, n, limits))]
    if first != 0x23 or not data.startswith(_BUNDLE_TAG):
        raise OscDecodeError("bad_packet", "packet is neither a message ('/') nor a bundle ('#bundle')")
    if now is None:
        now = time.time()

    out: list[tuple[Optional[float], OscMessage]] = []
    if n < 16:
        raise OscDecodeError("truncated", "bundle header shorter than 16 bytes")
    elements = 0
    # explicit stack of open bundles: [next element position, end, due time]
    stack = [[16, n, _effective_time(_U64.unpack_from(data, 8)[0], None, now, limits, 0)]]
    while stack:
        frame = stack[-1]
        pos, end, due = frame
        if pos == end:
            stack.pop()
            continue
        if end - pos < 4:
            raise OscDecodeError("truncated", f"bundle element size at byte {pos} runs past the end")
        size = _I32.unpack_from(data, pos)[0]
        if size <= 0 or size % 4:
            raise OscDecodeError("bad_size", f"bundle element at byte {pos} has size {size}")
        start = pos + 4
        if size > end - start:
            raise OscDecodeError(
                "bad_size", f"bundle element at byte {pos} claims {size} bytes, {end - start} left"
            )
        elements += 1
        if elements > limits.max_elements:
            raise OscDecodeError("too_many", f"more than {limits.max_elements} bundle elements")
        stop = start + size
        frame[0] = stop  # the parent resumes after this element whatever it holds
        kind = data[start]
        if kind == 0x2F:
            out.append((due, _decode_message(data, start, stop, limits)))
        elif kind == 0x23 and data.startswith(_BUNDLE_TAG, start):
            if len(stack) >= limits.max_depth:
                raise OscDecodeError("too_deep", f"bundles nested deeper than {limits.max_depth}")
            if size < 16:
                raise OscDecodeError("bad_bundle", f"bundle at byte {start} shorter than its 16-byte header")
            child_due = _effective_time(_U64.unpack_from(data, start + 8)[0], due, now, limits, start)
            stack.append([start + 16, stop, child_due])
        else:
            raise OscDecodeError("bad_bundle", f"bundle element at byte {start} is neither a message nor a bundle")
    return out


# --------------------------------------------------------------------------
# encoding
# --------------------------------------------------------------------------

def _pad_string(text: str, what: str) -> bytes:
    if not isinstance(text, str):
        raise OscEncodeError(f"{what} must be a str, got {type(text).__name__}")
    raw = text.encode("utf-8")
    if b"\x00" in raw:
        raise OscEncodeError(f"{what} must not contain NUL")
    return raw + b"\x00" * (4 - len(raw) % 4)


def _infer_tag(arg) -> str:
    if arg is True:
        return "T"
    if arg is False:
        return "F"
    if arg is None:
        return "N"
    if arg is IMPULSE:
        return "I"
    if isinstance(arg, TimeTag):
        return "t"
    if isinstance(arg, int):
        return "i" if -(1 << 31) <= arg < (1 << 31) else "h"
    if isinstance(arg, float):
        return "f"
    if isinstance(arg, str):
        return "s"
    if isinstance(arg, (bytes, bytearray, memoryview)):
        return "b"
    raise OscEncodeError(f"cannot encode an argument of type {type(arg).__name__}")


def _encode_arg(tag: str, arg, i: int) -> bytes:
    where = f"argument {i} ({tag!r})"
    try:
        if tag in "TFNI":
            expected = {"T": True, "F": False, "N": None, "I": IMPULSE}[tag]
            if arg is not expected:
                raise OscEncodeError(f"{where}: tag {tag!r} carries no data, got {arg!r}")
            return b""
        if tag in "ih":
            if not isinstance(arg, int) or isinstance(arg, bool):
                raise OscEncodeError(f"{where}: expected int, got {type(arg).__name__}")
            return (_I32 if tag == "i" else _I64).pack(arg)
        if tag in "fd":
            if not isinstance(arg, (int, float)) or isinstance(arg, bool):
                raise OscEncodeError(f"{where}: expected a number, got {type(arg).__name__}")
            return (_F32 if tag == "f" else _F64).pack(float(arg))
        if tag in "sS":
            return _pad_string(arg, where)
        if tag == "b":
            if not isinstance(arg, (bytes, bytearray, memoryview)):
                raise OscEncodeError(f"{where}: expected bytes, got {type(arg).__name__}")
            raw = bytes(arg)
            return _I32.pack(len(raw)) + raw + b"\x00" * (-len(raw) % 4)
        if tag == "t":
            ntp = arg.ntp if isinstance(arg, TimeTag) else unix_to_ntp(arg)
            return _U64.pack(ntp)
        if tag == "c":
            if not isinstance(arg, str) or len(arg) != 1:
                raise OscEncodeError(f"{where}: expected a one-character str")
            return _I32.pack(ord(arg))
    except (struct.error, OverflowError, ValueError) as e:
        if isinstance(e, OscEncodeError):
            raise
        raise OscEncodeError(f"{where}: {e}") from None
    raise OscEncodeError(f"{where}: type tag {tag!r} is not supported")


def encode_message(address: str, args: Sequence = (), types: Optional[str] = None) -> bytes:
    """Build one OSC message.

    Types are inferred (bool -> T/F, None -> N, int -> i, or h beyond int32,
    float -> f, str -> s, bytes -> b, IMPULSE -> I, TimeTag -> t) unless
    ``types`` (the type tags without the leading ',', e.g. ``"ifd"``) says
    otherwise. Raises :class:`OscEncodeError` (a ValueError) for what OSC
    cannot carry.
    """
    if not isinstance(address, str) or not address.startswith("/"):
        raise OscEncodeError(f"address must be a str starting with '/', got {address!r}")
    args = tuple(args)
    if types is None:
        types = "".join(_infer_tag(a) for a in args)
    elif len(types) != len(args):
        raise OscEncodeError(f"{len(types)} type tags for {len(args)} arguments")
    parts = [_pad_string(address, "address"), _pad_string("," + types, "type tags")]
    parts.extend(_encode_arg(tag, arg, i) for i, (tag, arg) in enumerate(zip(types, args)))
    return b"".join(parts)


def _encode_timetag(timetag) -> bytes:
    if timetag is IMMEDIATE:
        return _U64.pack(NTP_IMMEDIATE)
    if isinstance(timetag, TimeTag):
        if not 0 <= timetag.ntp <= _NTP_MAX:
            raise OscEncodeError(f"time tag {timetag.ntp} does not fit 64 bits")
        return _U64.pack(timetag.ntp)
    try:
        return _U64.pack(unix_to_ntp(timetag))
    except ValueError as e:
        raise OscEncodeError(str(e)) from None


def encode_packet(item: Union[OscMessage, OscBundle, bytes]) -> bytes:
    """Encode an :class:`OscMessage` or :class:`OscBundle`; bytes pass through."""
    if isinstance(item, (bytes, bytearray, memoryview)):
        return bytes(item)
    if isinstance(item, OscMessage):
        return encode_message(item.address, item.args)
    if isinstance(item, OscBundle):
        return encode_bundle(item.timetag, item.elements)
    raise OscEncodeError(f"cannot encode {type(item).__name__} as an OSC packet")


def encode_bundle(timetag: Union[float, None, TimeTag], elements: Iterable) -> bytes:
    """Build a bundle. ``timetag``: unix seconds, ``None``/IMMEDIATE, or a raw :class:`TimeTag`.

    ``elements``: :class:`OscMessage`, :class:`OscBundle` or encoded packets (bytes).
    """
    parts = [_BUNDLE_TAG, _encode_timetag(timetag)]
    for el in elements:
        raw = encode_packet(el)
        parts.append(_I32.pack(len(raw)))
        parts.append(raw)
    return b"".join(parts)


# --------------------------------------------------------------------------
# address patterns
# --------------------------------------------------------------------------

MAX_PATTERN = 1024  # characters in an address pattern
MAX_ALTERNATIVES = 64  # strings inside one {...}
MAX_SEGMENT_COST = 128  # tokens + brace alternatives in one part: bounds the checks per name position

_LIT, _ONE, _STAR, _SET, _ALT = range(5)
_SPECIAL_CHARS = set("?*[]{}")


class SegmentPattern:
    """One '/'-free part of an address pattern, compiled to tokens.

    Tokens: literal text, ``?``, ``*`` (runs collapsed), a character set, or a
    brace list of literal alternatives.
    """

    __slots__ = ("text", "tokens", "literal", "cost", "_choices")

    def __init__(self, text: str):
        self.text = text
        self.tokens = _compile_segment(text)
        self.literal = all(kind == _LIT for kind, _ in self.tokens)
        # a part that is one brace list ("{vox,gtr}") matches by set membership
        self._choices = frozenset(self.tokens[0][1]) if len(self.tokens) == 1 and self.tokens[0][0] == _ALT else None
        # checks per name position: one per token, plus one per extra alternative
        self.cost = sum(len(val) if kind == _ALT else 1 for kind, val in self.tokens) or 1
        if self.cost > MAX_SEGMENT_COST:
            raise _bad(text, f"more than {MAX_SEGMENT_COST} wildcards, sets and alternatives in one part")

    def __repr__(self) -> str:
        return f"SegmentPattern({self.text!r})"

    def match(self, name: str) -> bool:
        if self.literal:
            return name == self.text
        if self._choices is not None:
            return name in self._choices
        return self._run(name)[0]

    def match_steps(self, name: str) -> tuple[bool, int]:
        """(matched, checks made); always ``checks <= (len(name) + 1) * self.cost``.

        A check is one (name position, token or brace alternative) pair looked
        at; every position set holds each position at most once, so no input
        makes the matcher backtrack.
        """
        return self._run(name)

    def _run(self, name: str) -> tuple[bool, int]:
        n = len(name)
        cur = [0]  # sorted, distinct positions in name reachable after the tokens so far
        steps = 0
        for kind, val in self.tokens:
            if kind == _STAR:
                cur = list(range(cur[0], n + 1))  # any run from the earliest position
                steps += len(cur)
            else:
                seen = bytearray(n + 2)
                nxt = []
                for p in cur:
                    if kind == _LIT:
                        steps += 1
                        q = p + len(val)
                        if name.startswith(val, p) and not seen[q]:
                            seen[q] = 1
                            nxt.append(q)
                    elif kind == _ONE or kind == _SET:
                        steps += 1
                        if p < n and (kind == _ONE or _set_has(val, name[p])) and not seen[p + 1]:
                            seen[p + 1] = 1
                            nxt.append(p + 1)
                    else:  # _ALT
                        for alt in val:
                            steps += 1
                            q = p + len(alt)
                            if q <= n and not seen[q] and name.startswith(alt, p):
                                seen[q] = 1
                                nxt.append(q)
                if not nxt:
                    return False, steps
                nxt.sort()
                cur = nxt
        return (cur[-1] == n), steps


def _set_has(val, ch: str) -> bool:
    negate, ranges = val
    inside = any(lo <= ch <= hi for lo, hi in ranges)
    return inside != negate


def _bad(pattern: str, why: str):
    return OscDecodeError("bad_pattern", f"address pattern {pattern[:80]!r}: {why}")


def _compile_segment(text: str) -> list:
    tokens: list = []
    lit: list[str] = []

    def flush():
        if lit:
            tokens.append((_LIT, "".join(lit)))
            lit.clear()

    i, n = 0, len(text)
    while i < n:
        c = text[i]
        if c == "?":
            flush()
            tokens.append((_ONE, None))
        elif c == "*":
            flush()
            if not tokens or tokens[-1][0] != _STAR:
                tokens.append((_STAR, None))
        elif c == "[":
            flush()
            j = text.find("]", i + 1)
            if j < 0:
                raise _bad(text, "'[' without ']'")
            body = text[i + 1:j]
            negate = body.startswith("!")
            if negate:
                body = body[1:]
            if not body:
                raise _bad(text, "empty character set")
            ranges = []
            k = 0
            while k < len(body):
                ch = body[k]
                if ch in _SPECIAL_CHARS:
                    raise _bad(text, f"{ch!r} inside a character set")
                if k + 2 < len(body) and body[k + 1] == "-":
                    hi = body[k + 2]
                    if hi in _SPECIAL_CHARS or hi < ch:
                        raise _bad(text, f"bad range {ch}-{hi}")
                    ranges.append((ch, hi))
                    k += 3
                else:
                    ranges.append((ch, ch))  # includes a trailing '-', which is literal
                    k += 1
            tokens.append((_SET, (negate, tuple(ranges))))
            i = j
        elif c == "{":
            flush()
            j = text.find("}", i + 1)
            if j < 0:
                raise _bad(text, "'{' without '}'")
            alts = text[i + 1:j].split(",")
            if len(alts) > MAX_ALTERNATIVES:
                raise _bad(text, f"more than {MAX_ALTERNATIVES} alternatives in braces")
            if any(ch in _SPECIAL_CHARS for alt in alts for ch in alt):
                raise _bad(text, "wildcards inside braces")
            tokens.append((_ALT, tuple(dict.fromkeys(alts))))  # distinct, in order
            i = j
        elif c in "]}":
            raise _bad(text, f"unmatched {c!r}")
        else:
            lit.append(c)
        i += 1
    flush()
    return tokens


class Pattern:
    """A compiled OSC address pattern: one :class:`SegmentPattern` per '/'-part."""

    __slots__ = ("text", "parts")

    def __init__(self, text: str, parts: tuple):
        self.text = text
        self.parts = parts

    def __repr__(self) -> str:
        return f"Pattern({self.text!r})"

    @property
    def literal(self) -> bool:
        return all(p.literal for p in self.parts)

    def match_parts(self, parts: Sequence[str]) -> bool:
        """Does the pattern match an address already split into parts (no '/')?"""
        if len(parts) != len(self.parts):
            return False
        return all(sp.match(name) for sp, name in zip(self.parts, parts))

    def match(self, address: str) -> bool:
        if not address.startswith("/"):
            return False
        return self.match_parts(address[1:].split("/"))


@lru_cache(maxsize=512)
def compile_pattern(pattern: str) -> Pattern:
    """Compile an OSC 1.0 address pattern. Raises ``OscDecodeError('bad_pattern')``.

    Parts are separated by '/', none may be empty (OSC 1.1's '//' is not
    supported), and wildcards never cross a '/'.
    """
    if not isinstance(pattern, str) or not pattern.startswith("/"):
        raise _bad(str(pattern), "must start with '/'")
    if len(pattern) > MAX_PATTERN:
        raise _bad(pattern, f"longer than {MAX_PATTERN} characters")
    texts = pattern[1:].split("/")
    if any(t == "" for t in texts):
        raise _bad(pattern, "empty part ('//' or a trailing '/')")
    return Pattern(pattern, tuple(SegmentPattern(t) for t in texts))


@lru_cache(maxsize=512)
def _compile_one_segment(segment: str) -> SegmentPattern:
    if "/" in segment:
        raise _bad(segment, "a segment pattern must not contain '/'")
    if len(segment) > MAX_PATTERN:
        raise _bad(segment, f"longer than {MAX_PATTERN} characters")
    return SegmentPattern(segment)


def match_address(pattern: str, address: str) -> bool:
    """Does OSC address ``pattern`` match the concrete ``address``?"""
    return compile_pattern(pattern).match(address)


def match_segment(segment_pattern: Union[str, SegmentPattern], candidates: Sequence) -> list[int]:
    """Indices of the candidates that one part of a pattern matches.

    A candidate is a name, or a tuple of names for one thing (e.g. a source's
    id and its 1-based index as text: ``("vox", "1")``): it matches when any of
    its names does.
    """
    sp = segment_pattern if isinstance(segment_pattern, SegmentPattern) else _compile_one_segment(segment_pattern)
    hits = []
    for i, cand in enumerate(candidates):
        names = (cand,) if isinstance(cand, str) else cand
        if any(sp.match(name) for name in names):
            hits.append(i)
    return hits


# --------------------------------------------------------------------------
# SLIP framing (RFC 1055, double-END as OSC 1.1 over TCP uses it)
# --------------------------------------------------------------------------

END = 0xC0
ESC = 0xDB
ESC_END = 0xDC
ESC_ESC = 0xDD
_SLIP_SPECIAL = re.compile(b"[\xc0\xdb]")


def slip_encode(packet: bytes) -> bytes:
    """END + packet with END/ESC escaped + END."""
    body = bytes(packet).replace(b"\xdb", b"\xdb\xdd").replace(b"\xc0", b"\xdb\xdc")
    return b"\xc0" + body + b"\xc0"


class SlipDecoder:
    """Incremental SLIP decoder that never buffers more than ``max_frame`` bytes.

    ``feed(data)`` returns the complete frames found so far (empty frames, as
    between two END bytes, are skipped). A frame that grows past ``max_frame``
    is dropped up to its END (``dropped_oversize``); a frame with an ESC not
    followed by ESC_END or ESC_ESC is dropped whole (``dropped_bad_escape``).
    """

    def __init__(self, max_frame: int = 65536):
        if not isinstance(max_frame, int) or isinstance(max_frame, bool) or max_frame < 1:
            raise ValueError(f"max_frame must be a positive integer, got {max_frame!r}")
        self.max_frame = max_frame
        self._buf = bytearray()
        self._escape = False  # the last byte fed was ESC
        self._dropping = False  # discarding the current frame until END
        self.frames = 0
        self.dropped_oversize = 0
        self.dropped_bad_escape = 0

    @property
    def buffered(self) -> int:
        """Bytes of the unfinished frame held now (never more than ``max_frame``)."""
        return len(self._buf)

    def _append(self, chunk) -> None:
        if self._dropping or not chunk:
            return
        if len(self._buf) + len(chunk) > self.max_frame:
            self._buf.clear()
            self._dropping = True
            self.dropped_oversize += 1
            return
        self._buf += chunk

    def _bad_escape(self) -> None:
        if not self._dropping:
            self._buf.clear()
            self._dropping = True
            self.dropped_bad_escape += 1

    def _end(self, out: list) -> None:
        if not self._dropping and self._buf:
            out.append(bytes(self._buf))
            self.frames += 1
        self._buf.clear()
        self._dropping = False
        self._escape = False

    def feed(self, data: bytes) -> list[bytes]:
        out: list[bytes] = []
        data = bytes(data)
        i, n = 0, len(data)
        if self._escape and n:
            self._escape = False
            b = data[0]
            if b == ESC_END:
                self._append(b"\xc0")
                i = 1
            elif b == ESC_ESC:
                self._append(b"\xdb")
                i = 1
            else:
                self._bad_escape()  # data[0] is handled below (an END still ends the frame)
        while i < n:
            m = _SLIP_SPECIAL.search(data, i)
            if m is None:
                self._append(data[i:])
                break
            j = m.start()
            self._append(data[i:j])
            if data[j] == END:
                self._end(out)
                i = j + 1
                continue
            # ESC
            if j + 1 >= n:
                self._escape = True
                break
            b = data[j + 1]
            if b == ESC_END:
                self._append(b"\xc0")
                i = j + 2
            elif b == ESC_ESC:
                self._append(b"\xdb")
                i = j + 2
            else:
                self._bad_escape()
                i = j + 1  # the next byte (perhaps END) is read normally
        return out
