"""Tests of the OSC wire codec (fieldmix.oscwire).

References:
- OSC 1.0 specification (M. Wright, 2002): byte layout, the two example
  messages, time tags, address patterns. The example bytes are written from
  memory and verified against python-osc's encoder.
- python-osc (pythonosc.osc_message_builder / osc_bundle_builder /
  osc_message / osc_bundle / slip) as an independent encoder and decoder.
- RFC 1055 (SLIP): END 0xC0, ESC 0xDB, ESC_END 0xDC, ESC_ESC 0xDD.
"""

from __future__ import annotations

import math
import struct

import pytest
from pythonosc import osc_bundle, osc_message, slip
from pythonosc.osc_bundle_builder import OscBundleBuilder
from pythonosc.osc_message_builder import OscMessageBuilder

from fieldmix.oscwire import (
    IMMEDIATE,
    IMPULSE,
    NTP_IMMEDIATE,
    Limits,
    OscBundle,
    OscDecodeError,
    OscEncodeError,
    OscMessage,
    SegmentPattern,
    SlipDecoder,
    TimeTag,
    compile_pattern,
    decode_packet,
    encode_bundle,
    encode_message,
    match_address,
    match_segment,
    ntp_to_unix,
    slip_encode,
    unix_to_ntp,
)

NOW = 1_800_000_000.0  # a fixed "now" (January 2027) so time-tag tests do not read the clock
NTP_OFFSET = 2208988800  # 1900 -> 1970 in seconds (NTP epoch, RFC 868)


def ntp(unix: float) -> int:
    """Independent NTP conversion for building raw packets by hand."""
    return int(round((unix + NTP_OFFSET) * 2**32))


def raw_bundle(timetag: int, elements: list[bytes]) -> bytes:
    out = b"#bundle\x00" + struct.pack(">Q", timetag)
    for e in elements:
        out += struct.pack(">i", len(e)) + e
    return out


def reason_of(data: bytes, limits: Limits = Limits(), now: float = NOW) -> str:
    with pytest.raises(OscDecodeError) as info:
        decode_packet(data, limits, now=now)
    assert info.value.reason in OscDecodeError.REASONS
    return info.value.reason


MSG_A = encode_message("/a", [1])  # 12 bytes: "/a\0\0" ",i\0\0" 00000001


# ---------------------------------------------------------------------------
# byte-exact examples from the OSC 1.0 specification
# ---------------------------------------------------------------------------

def test_spec_example_oscillator_frequency():
    # OSC 1.0 spec (Wright 2002): "/oscillator/4/frequency" with float 440.0;
    # memory, verified against python-osc. 23 chars + NUL = 24 bytes, then
    # ",f" padded to 4, then 440.0 as float32 = 43 dc 00 00.
    expected = bytes.fromhex(
        "2f6f7363 696c6c61 746f722f 342f6672 65717565 6e637900 2c660000 43dc0000".replace(" ", "")
    )
    assert encode_message("/oscillator/4/frequency", [440.0]) == expected
    b = OscMessageBuilder("/oscillator/4/frequency")
    b.add_arg(440.0)
    assert b.build().dgram == expected
    assert decode_packet(expected) == [(None, OscMessage("/oscillator/4/frequency", (440.0,)))]


def test_spec_example_foo_five_args():
    # OSC 1.0 spec (Wright 2002): "/foo" with int32 1000, int32 -1, "hello",
    # float32 1.234, float32 5.678; memory, verified against python-osc.
    expected = bytes.fromhex(
        "2f666f6f 00000000 2c696973 66660000 000003e8 ffffffff"
        " 68656c6c 6f000000 3f9df3b6 40b5b22d".replace(" ", "")
    )
    assert encode_message("/foo", [1000, -1, "hello", 1.234, 5.678]) == expected
    b = OscMessageBuilder("/foo")
    for v in (1000, -1, "hello", 1.234, 5.678):
        b.add_arg(v)
    assert b.build().dgram == expected
    [(due, msg)] = decode_packet(expected)
    assert due is None and msg.address == "/foo"
    assert msg.args[:3] == (1000, -1, "hello")
    # float32 values come back as the nearest float32, as Python floats
    assert msg.args[3] == struct.unpack(">f", struct.pack(">f", 1.234))[0]
    assert msg.args[4] == struct.unpack(">f", struct.pack(">f", 5.678))[0]
    assert all(type(a) is float for a in msg.args[3:])


# ---------------------------------------------------------------------------
# round trips against python-osc
# ---------------------------------------------------------------------------

PYOSC_ARGS = [
    ("i", 7), ("i", -(2**31)), ("f", 0.5), ("f", -2.25), ("s", "héllo wörld"), ("s", ""),
    ("b", b"\x00\x01\x02\xc0\xdb"), ("h", 2**40), ("d", 1e-300), ("T", True), ("F", False),
    ("N", None),
]


def test_our_encoder_read_by_python_osc():
    types = "".join(t for t, _ in PYOSC_ARGS)
    values = [v for _, v in PYOSC_ARGS]
    dgram = encode_message("/x/y", values, types=types)
    parsed = osc_message.OscMessage(dgram)
    assert parsed.address == "/x/y"
    assert parsed.params == values


def test_python_osc_encoder_read_by_us():
    b = OscMessageBuilder("/src/3/pos")
    for tag, value in PYOSC_ARGS:
        b.add_arg(value, tag)
    [(due, msg)] = decode_packet(b.build().dgram)
    assert due is None
    assert msg.address == "/src/3/pos"
    assert list(msg.args) == [v for _, v in PYOSC_ARGS]
    assert [type(a) for a in msg.args] == [type(v) for _, v in PYOSC_ARGS]


def test_inferred_types_match_python_osc_inference():
    values = [3, 2.5, "s", b"blob", True, False, None, 2**33]
    ours = encode_message("/t", values)
    b = OscMessageBuilder("/t")
    for v in values:
        b.add_arg(v)
    assert ours == b.build().dgram  # python-osc infers i f s b T F N h as well
    assert decode_packet(ours)[0][1].args == tuple(values)


def _pyosc_message(address, *args):
    b = OscMessageBuilder(address)
    for a in args:
        b.add_arg(a)
    return b.build()


def test_python_osc_nested_bundle_read_by_us():
    inner = OscBundleBuilder(NOW + 20.0)
    inner.add_content(_pyosc_message("/inner", 2))
    outer = OscBundleBuilder(NOW + 10.0)
    outer.add_content(_pyosc_message("/first", 1.5))
    outer.add_content(inner.build())
    outer.add_content(_pyosc_message("/last", "z"))
    got = decode_packet(outer.build().dgram, now=NOW)
    assert [m for _, m in got] == [
        OscMessage("/first", (1.5,)), OscMessage("/inner", (2,)), OscMessage("/last", ("z",))
    ]
    assert [t for t, _ in got] == [pytest.approx(NOW + 10, abs=1e-6), pytest.approx(NOW + 20, abs=1e-6),
                                   pytest.approx(NOW + 10, abs=1e-6)]


def test_our_nested_bundle_read_by_python_osc():
    data = encode_bundle(NOW + 5.0, [
        OscMessage("/a", (1,)),
        OscBundle(NOW + 6.5, (OscMessage("/b", ("x", 2.0)), OscBundle(IMMEDIATE, (OscMessage("/c", ()),)))),
    ])
    top = osc_bundle.OscBundle(data)
    assert top.timestamp == pytest.approx(NOW + 5.0, abs=1e-6)
    assert top.num_contents == 2
    assert top.content(0).address == "/a" and top.content(0).params == [1]
    mid = top.content(1)
    assert mid.timestamp == pytest.approx(NOW + 6.5, abs=1e-6)
    assert mid.content(0).params == ["x", 2.0]
    assert mid.content(1).timestamp == 0  # python-osc's IMMEDIATELY
    assert mid.content(1).content(0).address == "/c"
    # and our own decoder: the immediate bundle inside the 6.5 s one is due at 6.5 s
    got = decode_packet(data, now=NOW)
    assert [(round(t - NOW, 6), m.address) for t, m in got] == [(5.0, "/a"), (6.5, "/b"), (6.5, "/c")]


def test_extra_types_round_trip():
    tt = TimeTag(ntp(NOW + 1.25))
    data = encode_message("/e", ["Q", IMPULSE, tt, "sym"], types="cItS")
    assert data[4:12] == b",cItS\x00\x00\x00"
    [(_, msg)] = decode_packet(data)
    assert msg.args == ("Q", IMPULSE, tt, "sym")
    assert msg.args[2].unix == pytest.approx(NOW + 1.25, abs=1e-6)
    assert TimeTag(NTP_IMMEDIATE).unix is None


def test_message_without_type_tag_string_has_no_args():
    # OSC 1.0: receivers should be robust to a missing type tag string.
    assert decode_packet(b"/ping\x00\x00\x00") == [(None, OscMessage("/ping", ()))]
    assert decode_packet(b"/ping\x00\x00\x00,\x00\x00\x00") == [(None, OscMessage("/ping", ()))]


def test_nan_and_inf_pass_through_the_wire_layer():
    # The wire layer keeps NaN/inf; the control layer rejects them (not_finite).
    [(_, msg)] = decode_packet(encode_message("/g", [math.nan, math.inf, -math.inf], types="fdf"))
    assert math.isnan(msg.args[0]) and msg.args[1] == math.inf and msg.args[2] == -math.inf


# ---------------------------------------------------------------------------
# time tags
# ---------------------------------------------------------------------------

def test_ntp_conversion_matches_definition():
    # NTP era 0: seconds since 1900-01-01 in the high 32 bits, fraction in the low 32.
    assert unix_to_ntp(0.0) == NTP_OFFSET << 32
    assert unix_to_ntp(0.5) == (NTP_OFFSET << 32) | (1 << 31)
    assert ntp_to_unix((NTP_OFFSET + 10) << 32 | (1 << 30)) == 10.25
    for t in (NOW, NOW + 0.123456, 1.0, 2085978495.9):
        assert ntp_to_unix(unix_to_ntp(t)) == pytest.approx(t, abs=1e-9)
    assert unix_to_ntp(NOW) == ntp(NOW)
    # a fraction that rounds up to a whole second carries into the seconds
    assert unix_to_ntp(5 + (1 - 2**-34)) == (NTP_OFFSET + 6) << 32
    with pytest.raises(ValueError):
        unix_to_ntp(2085978496.0)  # 2036-02-07: past the end of era 0
    with pytest.raises(ValueError):
        unix_to_ntp(-NTP_OFFSET - 1.0)  # before 1900
    with pytest.raises(ValueError):
        unix_to_ntp(math.nan)


@pytest.mark.parametrize(
    "timetag, expected",
    [
        (NTP_IMMEDIATE, None),  # the spec's "immediately"
        (0, None),  # 1900: long past -> at once
        (ntp(NOW - 3600), None),  # past
        (ntp(NOW), None),  # exactly now -> at once
        (ntp(NOW + 0.5), NOW + 0.5),
        (ntp(NOW + 3599), NOW + 3599),  # inside the one-hour horizon
    ],
)
def test_bundle_time_tags(timetag, expected):
    [(due, msg)] = decode_packet(raw_bundle(timetag, [MSG_A]), now=NOW)
    assert msg == OscMessage("/a", (1,))
    if expected is None:
        assert due is None
    else:
        assert due == pytest.approx(expected, abs=1e-6)


@pytest.mark.parametrize("timetag", [ntp(NOW + 3601), ntp(NOW + 86400 * 365), (1 << 64) - 1])
def test_far_future_time_tags_are_rejected(timetag):
    assert reason_of(raw_bundle(timetag, [MSG_A])) == "far_future"


def test_horizon_is_configurable():
    data = raw_bundle(ntp(NOW + 7200), [MSG_A])
    assert reason_of(data) == "far_future"
    [(due, _)] = decode_packet(data, Limits(max_future=10_000), now=NOW)
    assert due == pytest.approx(NOW + 7200, abs=1e-6)
    assert reason_of(raw_bundle(ntp(NOW + 1), [MSG_A]), Limits(max_future=0)) == "far_future"


def test_nested_bundle_inherits_the_later_time():
    msg_b = encode_message("/b", [])
    # child earlier than its parent (a spec violation): it waits for the parent
    data = raw_bundle(ntp(NOW + 100), [raw_bundle(ntp(NOW + 1), [MSG_A])])
    assert decode_packet(data, now=NOW)[0][0] == pytest.approx(NOW + 100, abs=1e-6)
    # an "immediately" child inside a timed parent: due with the parent
    data = raw_bundle(ntp(NOW + 100), [raw_bundle(NTP_IMMEDIATE, [MSG_A])])
    assert decode_packet(data, now=NOW)[0][0] == pytest.approx(NOW + 100, abs=1e-6)
    # a later child inside an immediate parent keeps its own time
    data = raw_bundle(NTP_IMMEDIATE, [msg_b, raw_bundle(ntp(NOW + 7), [MSG_A])])
    got = decode_packet(data, now=NOW)
    assert got[0] == (None, OscMessage("/b", ()))
    assert got[1][0] == pytest.approx(NOW + 7, abs=1e-6)
    # a child beyond the horizon is rejected even if its parent is not
    data = raw_bundle(ntp(NOW + 10), [raw_bundle(ntp(NOW + 4000), [MSG_A])])
    assert reason_of(data) == "far_future"


# ---------------------------------------------------------------------------
# hostile packets: each gives OscDecodeError with a sensible reason
# ---------------------------------------------------------------------------

HDR = b"#bundle\x00" + struct.pack(">Q", NTP_IMMEDIATE)

HOSTILE = [
    ("empty", b"", "truncated"),
    ("length not a multiple of 4", b"/a\x00\x00\x00", "bad_packet"),
    ("neither message nor bundle", b"xyz\x00", "bad_packet"),
    ("hash but not #bundle", b"#bundlf\x00" + b"\x00" * 8, "bad_packet"),
    ("bundle header only", b"#bundle\x00", "truncated"),
    ("element size past the end", HDR + struct.pack(">i", 1000) + MSG_A, "bad_size"),
    ("element size negative", HDR + struct.pack(">i", -4) + MSG_A, "bad_size"),
    ("element size -8 (points back)", HDR + struct.pack(">i", -8) + MSG_A, "bad_size"),
    ("element size zero", HDR + struct.pack(">i", 0), "bad_size"),
    ("element size not a multiple of 4", HDR + struct.pack(">i", 6) + MSG_A, "bad_size"),
    ("element size claims a million bytes", HDR + struct.pack(">i", 1_000_000) + MSG_A, "bad_size"),
    ("element size int32 min", HDR + struct.pack(">i", -(2**31)) + MSG_A, "bad_size"),
    ("element neither message nor bundle", HDR + struct.pack(">i", 4) + b"abc\x00", "bad_bundle"),
    ("nested bundle shorter than its header", HDR + struct.pack(">i", 8) + b"#bundle\x00", "bad_bundle"),
    ("trailing half element", HDR + struct.pack(">i", 12) + MSG_A + struct.pack(">i", 12), "bad_size"),
    ("address without NUL", b"/abc", "bad_string"),
    ("address without NUL in bundle", HDR + struct.pack(">i", 8) + b"/abcdefg", "bad_string"),
    ("address not UTF-8", b"/\xff\xfe\x00,i\x00\x00\x00\x00\x00\x01", "bad_string"),
    ("address with a control char", b"/a\x01b\x00\x00\x00\x00", "bad_address"),
    ("address with a space", b"/a b\x00\x00\x00\x00", "bad_address"),
    ("non-zero string padding", b"/a\x00x,i\x00\x00\x00\x00\x00\x01", "bad_string"),
    ("type tags without comma", b"/a\x00\x00ii\x00\x00\x00\x00\x00\x01", "bad_typetag"),
    ("type tag string without NUL", b"/a\x00\x00,iii", "bad_string"),
    ("int arg missing", b"/a\x00\x00,i\x00\x00", "truncated"),
    ("double arg half there", b"/a\x00\x00,d\x00\x00\x00\x00\x00\x01", "truncated"),
    ("string arg without NUL", b"/a\x00\x00,s\x00\x00abcd", "bad_string"),
    ("string arg not UTF-8", b"/a\x00\x00,s\x00\x00\xc3\x28\x00\x00", "bad_string"),
    ("blob size negative", b"/a\x00\x00,b\x00\x00" + struct.pack(">i", -8) + b"\x00" * 8, "bad_size"),
    ("blob size past the end", b"/a\x00\x00,b\x00\x00" + struct.pack(">i", 9) + b"\x00" * 8, "bad_size"),
    ("blob non-zero padding", b"/a\x00\x00,b\x00\x00" + struct.pack(">i", 1) + b"x\x01\x00\x00", "bad_value"),
    ("blob size missing", b"/a\x00\x00,b\x00\x00", "truncated"),
    ("char not a character", b"/a\x00\x00,c\x00\x00" + struct.pack(">i", 0xD800), "bad_value"),
    ("char negative", b"/a\x00\x00,c\x00\x00" + struct.pack(">i", -1), "bad_value"),
    ("unsupported rgba", b"/a\x00\x00,r\x00\x00\x00\x00\x00\x00", "unsupported_type"),
    ("unsupported midi", b"/a\x00\x00,m\x00\x00\x00\x00\x00\x00", "unsupported_type"),
    ("unsupported array", b"/a\x00\x00,[i]\x00\x00\x00\x00\x00\x00\x00\x01", "unsupported_type"),
    ("unknown tag", b"/a\x00\x00,Z\x00\x00", "unsupported_type"),
    ("bytes after the last arg", MSG_A + b"\x00\x00\x00\x02", "trailing"),
    ("message in bundle with trailing bytes", HDR + struct.pack(">i", 16) + MSG_A + b"\x00" * 4, "trailing"),
]


@pytest.mark.parametrize("name, data, reason", HOSTILE, ids=[h[0] for h in HOSTILE])
def test_hostile_packets(name, data, reason):
    assert reason_of(data) == reason


def test_python_osc_hangs_where_we_stop():
    # python-osc's bundle parser moves its index by the element size without a
    # sign check: size -4 sends it back to the same size field forever (see
    # docs/osc-wire.md). Ours rejects it after reading one size field.
    data = HDR + struct.pack(">i", -4)
    assert reason_of(data) == "bad_size"


def test_ten_thousand_deep_nesting():
    packet = MSG_A
    for _ in range(10_000):
        packet = raw_bundle(NTP_IMMEDIATE, [packet])
    assert len(packet) == 10_000 * 20 + len(MSG_A)
    # the default packet limit stops it first...
    assert reason_of(packet) == "too_big"
    big = Limits(max_packet=1 << 20)
    # ...and with room for it, the depth limit (no RecursionError)
    assert reason_of(packet, big) == "too_deep"
    # the walk is iterative: allowed depth far past Python's recursion limit (1000)
    assert decode_packet(packet, Limits(max_packet=1 << 20, max_depth=10_001, max_elements=20_000), now=NOW) == [
        (None, OscMessage("/a", (1,)))
    ]


def test_depth_limit_is_exact():
    def nest(depth):
        p = MSG_A
        for _ in range(depth):
            p = raw_bundle(NTP_IMMEDIATE, [p])
        return p

    assert decode_packet(nest(8), now=NOW) == [(None, OscMessage("/a", (1,)))]
    assert reason_of(nest(9)) == "too_deep"
    assert reason_of(nest(3), Limits(max_depth=2)) == "too_deep"
    assert len(decode_packet(nest(2), Limits(max_depth=2), now=NOW)) == 1
    # 3000 levels fit in 64 KiB: refused by depth, not size
    assert reason_of(nest(3000)) == "too_deep"


def test_element_count_limit():
    tiny = b"/\x00\x00\x00"  # the shortest message: "/" and no type tags
    many = raw_bundle(NTP_IMMEDIATE, [tiny] * 2000)
    assert reason_of(many) == "too_many"
    got = decode_packet(many, Limits(max_elements=2000), now=NOW)
    assert len(got) == 2000 and got[0] == (None, OscMessage("/", ()))
    # nested bundles count as elements too
    nested = raw_bundle(NTP_IMMEDIATE, [raw_bundle(NTP_IMMEDIATE, [tiny])] * 3)
    assert reason_of(nested, Limits(max_elements=5)) == "too_many"
    assert len(decode_packet(nested, Limits(max_elements=6), now=NOW)) == 3


def test_ten_thousand_int_tags_without_data():
    data = b"/a\x00\x00," + b"i" * 10_000
    data += b"\x00" * (4 - len(data) % 4)  # NUL-terminated and padded, but no argument data
    assert reason_of(data) == "too_many"  # more tags than max_args
    # with the arg limit lifted, the up-front size check finds the data missing
    assert reason_of(data, Limits(max_args=20_000)) == "truncated"


def test_string_and_blob_limits():
    long_addr = encode_message("/" + "a" * 5000, [])
    assert reason_of(long_addr) == "too_big"
    assert decode_packet(long_addr, Limits(max_string=8000))[0][1].address == "/" + "a" * 5000
    blob = encode_message("/b", [b"x" * 100])
    assert reason_of(blob, Limits(max_blob=99)) == "too_big"
    assert decode_packet(blob, Limits(max_blob=100))[0][1].args == (b"x" * 100,)
    assert reason_of(b"/a\x00\x00" * 20000) == "too_big"  # 80 000 bytes > max_packet
    assert reason_of(encode_message("/a", [1] * 65)) == "too_many"
    assert len(decode_packet(encode_message("/a", [1] * 64))[0][1].args) == 64


def test_decode_accepts_bytes_likes_and_refuses_other_types():
    assert decode_packet(bytearray(MSG_A)) == decode_packet(memoryview(MSG_A)) == decode_packet(MSG_A)
    with pytest.raises(TypeError):
        decode_packet("/a")  # a str is a programming error, not a packet


def test_error_reason_codes():
    e = OscDecodeError("bad_size", "element at byte 16 has size -4")
    assert e.reason == "bad_size" and "bad_size" in str(e) and "byte 16" in str(e)
    with pytest.raises(ValueError):
        OscDecodeError("made_up")


def test_limits_validation():
    with pytest.raises(ValueError):
        Limits(max_depth=0)
    with pytest.raises(ValueError):
        Limits(max_future=math.inf)
    with pytest.raises(ValueError):
        Limits(max_packet=True)


# ---------------------------------------------------------------------------
# encoding errors (our own mistakes)
# ---------------------------------------------------------------------------

@pytest.mark.parametrize(
    "address, args, types",
    [
        ("no-slash", [], None),
        ("/a", [2**70], None),  # beyond int64
        ("/a", [2**31], "i"),
        ("/a", ["x\x00y"], None),  # NUL in a string
        ("/a", [1e300], "f"),  # does not fit float32
        ("/a", [object()], None),
        ("/a", [1, 2], "i"),  # tag count mismatch
        ("/a", [1], "r"),  # unsupported tag
        ("/a", [True], "i"),  # a bool is no int on the wire
        ("/a", [1], "T"),
        ("/a", ["ab"], "c"),
    ],
)
def test_encode_errors(address, args, types):
    with pytest.raises(OscEncodeError):
        encode_message(address, args, types=types)


def test_encode_bundle_time_tags():
    assert encode_bundle(IMMEDIATE, [])[8:] == struct.pack(">Q", 1)
    assert encode_bundle(TimeTag(0), [])[8:] == b"\x00" * 8
    assert encode_bundle(NOW, [])[8:] == struct.pack(">Q", ntp(NOW))
    with pytest.raises(OscEncodeError):
        encode_bundle(3e9, [])  # after 2036
    with pytest.raises(OscEncodeError):
        encode_bundle(None, [42])


# ---------------------------------------------------------------------------
# address patterns
# ---------------------------------------------------------------------------

PATTERN_CASES = [
    # (pattern, address, matches) -- OSC 1.0 address pattern rules
    ("/source/vox/gain", "/source/vox/gain", True),
    ("/source/vox/gain", "/source/vox/gai", False),
    ("/source/?ox/gain", "/source/vox/gain", True),
    ("/source/?/gain", "/source/vox/gain", False),
    ("/source/*/gain", "/source/vox/gain", True),
    ("/source/*", "/source/vox/gain", False),  # '*' does not cross '/'
    ("/*/*/gain", "/source/vox/gain", True),
    ("/source/*x/gain", "/source/vox/gain", True),
    ("/source/v*x*/gain", "/source/vox/gain", True),
    ("/source/[vg]ox/gain", "/source/vox/gain", True),
    ("/source/[!v]ox/gain", "/source/vox/gain", False),
    ("/source/[!g]ox/gain", "/source/vox/gain", True),
    ("/source/[1-4]/spread", "/source/3/spread", True),
    ("/source/[1-4]/spread", "/source/5/spread", False),
    ("/source/[a-]/x", "/source/-/x", True),  # '-' at the end is literal
    ("/source/{vox,gtr}/gain", "/source/gtr/gain", True),
    ("/source/{vox,gtr}/gain", "/source/bass/gain", False),
    ("/source/{vox,gtr}{1,2}/gain", "/source/gtr2/gain", True),
    ("/source/x{,y}/gain", "/source/x/gain", True),
    ("/a/b", "/a/b/c", False),
    ("/a/b/c", "/a/b", False),
    ("/source/vox/gain", "source/vox/gain", False),
]


@pytest.mark.parametrize("pattern, address, expected", PATTERN_CASES)
def test_match_address(pattern, address, expected):
    assert match_address(pattern, address) is expected
    if address.startswith("/"):
        assert compile_pattern(pattern).match_parts(address[1:].split("/")) is expected


@pytest.mark.parametrize(
    "pattern",
    ["source/x", "/a//b", "/a/", "/a[bc", "/a{b,c", "/a]b", "/a}b", "/a[]", "/a[!]", "/a[z-a]",
     "/a{b,*}", "/a[b*]", "/" + "a" * 1100, "/{" + ",".join(str(i) for i in range(65)) + "}",
     "/" + "?" * 129],
)
def test_bad_patterns(pattern):
    with pytest.raises(OscDecodeError) as info:
        compile_pattern(pattern)
    assert info.value.reason == "bad_pattern"


def test_match_segment_with_ids_and_indices():
    sources = [("vox", "1"), ("gtr", "2"), ("bass", "3"), ("kick", "4"), ("snare", "5")]
    assert match_segment("{vox,gtr}", sources) == [0, 1]
    assert match_segment("[1-4]", sources) == [0, 1, 2, 3]
    assert match_segment("*", sources) == [0, 1, 2, 3, 4]
    assert match_segment("?ick", sources) == [3]
    assert match_segment("[!1-3]", sources) == [3, 4]
    assert match_segment("none", sources) == []
    assert match_segment("g*", ["gtr", "bass", "gong"]) == [0, 2]
    with pytest.raises(OscDecodeError):
        match_segment("a/b", ["a"])


def _naive_match(pat: str, name: str, counter: list) -> bool:
    """Textbook backtracking matcher for '*' and literals only, counting calls."""
    counter[0] += 1
    if counter[0] > 1_000_000:
        raise OverflowError
    if not pat:
        return not name
    if pat[0] == "*":
        return any(_naive_match(pat[1:], name[k:], counter) for k in range(len(name) + 1))
    return bool(name) and name[0] == pat[0] and _naive_match(pat[1:], name[1:], counter)


def test_catastrophic_pattern_is_bounded_by_count():
    seg = SegmentPattern("*a*a*a*a*a*a*a*b")
    assert seg.cost == 16  # 8 stars + 8 literals
    steps_by_n = {}
    for n in (10, 40, 160, 640):
        matched, steps = seg.match_steps("a" * n)
        assert matched is False
        assert steps <= (n + 1) * seg.cost  # the structural bound
        steps_by_n[n] = steps
    # linear: four times the name, about four times the work (a polynomial
    # blow-up of degree 7 would be 4**7 times)
    assert steps_by_n[640] <= 5 * steps_by_n[160]
    assert seg.match_steps("a" * 640 + "b")[0] is True
    # a backtracking matcher on the same input passes a million calls already at n = 40
    counter = [0]
    with pytest.raises(OverflowError):
        _naive_match("*a*a*a*a*a*a*a*b", "a" * 40, counter)
    assert steps_by_n[40] * 1000 < counter[0]


def test_brace_and_set_steps_stay_within_bound():
    seg = SegmentPattern("{a,aa,aaa}*[ab]?{b,ab}*")
    for n in (5, 50, 500):
        name = "a" * n
        matched, steps = seg.match_steps(name)
        assert steps <= (n + 1) * seg.cost
        assert matched is False
        assert seg.match("a" * n + "b") is True


# ---------------------------------------------------------------------------
# SLIP framing
# ---------------------------------------------------------------------------

def test_slip_escapes_per_rfc1055():
    assert slip_encode(b"\xc0") == b"\xc0\xdb\xdc\xc0"
    assert slip_encode(b"\xdb") == b"\xc0\xdb\xdd\xc0"
    assert slip_encode(b"a\xdb\xdcb\xc0") == b"\xc0a\xdb\xdd\xdcb\xdb\xdc\xc0"
    payload = bytes(range(256)) * 3
    assert slip_encode(payload) == slip.encode(payload)  # python-osc's double-END SLIP


def test_slip_round_trip_every_chunk_size():
    packets = [MSG_A, encode_message("/b", [b"\xc0\xdb\xc0", "x"]), bytes([0xDB]) * 7 + b"\xc0" * 5, b"z"]
    stream = b"".join(slip_encode(p) for p in packets)
    for chunk in (1, 2, 3, 5, 7, 64, len(stream)):
        dec = SlipDecoder()
        out = []
        for i in range(0, len(stream), chunk):
            out += dec.feed(stream[i:i + chunk])
        assert out == packets, chunk
        assert dec.frames == len(packets) and dec.buffered == 0


def test_slip_single_end_framing_and_empty_frames():
    dec = SlipDecoder()
    assert dec.feed(b"abc\xc0def\xc0\xc0\xc0ghi") == [b"abc", b"def"]
    assert dec.feed(b"\xc0") == [b"ghi"]


def test_slip_oversized_frame_dropped_and_memory_bounded():
    dec = SlipDecoder(max_frame=100)
    assert dec.feed(b"\xc0" + b"x" * 100 + b"\xc0") == [b"x" * 100]  # exactly the limit is fine
    for _ in range(1000):  # an endless frame: 1 MB without END
        assert dec.feed(b"y" * 1000) == []
        assert dec.buffered <= 100
    assert dec.dropped_oversize == 1
    assert dec.feed(b"tail\xc0ok\xc0") == [b"ok"]  # the bad frame ends at END; the next is kept
    assert dec.dropped_oversize == 1


def test_slip_bad_escape_drops_the_frame():
    dec = SlipDecoder()
    assert dec.feed(b"\xc0ab\xdbxcd\xc0ok\xc0") == [b"ok"]
    assert dec.dropped_bad_escape == 1
    # ESC right before END: the frame is dropped, the END still ends it
    assert dec.feed(b"\xc0bad\xdb\xc0good\xc0") == [b"good"]
    assert dec.dropped_bad_escape == 2
    # an escape split across two feeds
    assert dec.feed(b"\xc0p\xdb") == []
    assert dec.feed(b"\xdcq\xc0") == [b"p\xc0q"]
    assert dec.feed(b"\xc0p\xdb") == []
    assert dec.feed(b"zq\xc0r\xc0") == [b"r"]
    assert dec.dropped_bad_escape == 3


def test_slip_decoder_validates_max_frame():
    with pytest.raises(ValueError):
        SlipDecoder(0)
