"""Property and fuzz tests of fieldmix.oscwire (hypothesis, derandomized).

Every decode of arbitrary or damaged bytes must either return well-formed
messages or raise OscDecodeError -- nothing else. Valid packets must round
trip. Pattern matching is checked against an independent reference: brace
expansion plus the standard library's fnmatch.fnmatchcase (common practice,
no source; fnmatch's '*', '?', '[...]', '[!...]' agree with OSC 1.0 inside one
address part).
"""

from __future__ import annotations

import fnmatch
import itertools
import math
import random
import struct

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from fieldmix.oscwire import (
    IMPULSE,
    NTP_IMMEDIATE,
    Limits,
    OscBundle,
    OscDecodeError,
    OscMessage,
    SegmentPattern,
    SlipDecoder,
    TimeTag,
    decode_packet,
    encode_packet,
    match_segment,
    slip_encode,
)

NOW = 1_800_000_000.0
LIMITS = Limits()
ARG_TYPES = (int, float, str, bytes, bool, type(None), TimeTag, type(IMPULSE))


def fuzz_settings(n: int):
    return settings(
        max_examples=n,
        deadline=None,
        derandomize=True,
        database=None,
        suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large],
    )


def check_decode(data: bytes) -> list:
    """decode_packet returns well-formed results or raises OscDecodeError only."""
    try:
        out = decode_packet(data, LIMITS, now=NOW)
    except OscDecodeError as e:
        assert e.reason in OscDecodeError.REASONS
        return []
    assert isinstance(out, list)
    for due, msg in out:
        assert due is None or (type(due) is float and NOW < due <= NOW + LIMITS.max_future)
        assert type(msg) is OscMessage
        assert type(msg.address) is str and msg.address.startswith("/")
        assert type(msg.args) is tuple and len(msg.args) <= LIMITS.max_args
        for a in msg.args:
            assert type(a) in ARG_TYPES
            if isinstance(a, float):
                assert type(a) is float  # NaN allowed here; the control layer rejects it
    return out


# ---------------------------------------------------------------------------
# valid packets
# ---------------------------------------------------------------------------

part = st.text(alphabet="abcxyz019_-é", min_size=1, max_size=6)
address = st.lists(part, min_size=1, max_size=4).map(lambda ps: "/" + "/".join(ps))
arg = st.one_of(
    st.integers(-(2**31), 2**31 - 1),
    st.integers(-(2**63), 2**63 - 1),
    st.floats(width=32),
    st.text(alphabet=st.characters(blacklist_categories=("Cs",), blacklist_characters="\x00"), max_size=12),
    st.binary(max_size=12),
    st.booleans(),
    st.none(),
    st.just(IMPULSE),
)
message = st.builds(OscMessage, address, st.lists(arg, max_size=6).map(tuple))
bundle_time = st.one_of(
    st.none(),
    st.floats(-100.0, 100.0).map(lambda dt: NOW + dt),
    st.sampled_from([TimeTag(0), TimeTag(NTP_IMMEDIATE)]),
)
packet_tree = st.recursive(
    message,
    lambda children: st.builds(OscBundle, bundle_time, st.lists(children, max_size=4).map(tuple)),
    max_leaves=8,
)


def expected_flat(item, parent_due=None):
    """Independent reading of the OSC 1.0 timing rules for a packet tree."""
    if isinstance(item, OscMessage):
        return [(parent_due, item)]
    tt = item.timetag
    if isinstance(tt, TimeTag):
        t = None if tt.ntp == NTP_IMMEDIATE else tt.ntp / 2**32 - 2208988800
    else:
        t = tt
    if parent_due is not None and (t is None or t < parent_due):
        t = parent_due
    if t is not None and t <= NOW:
        t = None
    out = []
    for el in item.elements:
        out += expected_flat(el, t)
    return out


def same_args(a: tuple, b: tuple) -> bool:
    if len(a) != len(b):
        return False
    for x, y in zip(a, b):
        if isinstance(x, float) and isinstance(y, float) and math.isnan(x) and math.isnan(y):
            continue
        if type(x) is not type(y) or x != y:
            return False
    return True


def test_valid_packets_round_trip():
    @fuzz_settings(300)
    @given(packet_tree)
    def run(tree):
        data = encode_packet(tree)
        got = check_decode(data)
        want = expected_flat(tree)
        assert len(got) == len(want)
        for (gt, gm), (wt, wm) in zip(got, want):
            assert (gt is None) == (wt is None)
            if gt is not None:
                assert abs(gt - wt) < 1e-6
            assert gm.address == wm.address and same_args(gm.args, wm.args)

    run()


# ---------------------------------------------------------------------------
# random bytes
# ---------------------------------------------------------------------------

random_packet = st.one_of(
    st.binary(max_size=200),
    st.binary(max_size=200).map(lambda b: b"/" + b),
    st.binary(max_size=200).map(lambda b: b"/a\x00\x00," + b),
    st.binary(max_size=200).map(lambda b: b"#bundle\x00" + b),
    st.binary(max_size=50).map(lambda b: b * 4),  # lengths that are multiples of 4 more often
)


def test_random_bytes_never_escape():
    count = [0]

    @fuzz_settings(10_000)
    @given(random_packet)
    def run(data):
        count[0] += 1
        check_decode(data)

    run()
    assert count[0] >= 10_000


# ---------------------------------------------------------------------------
# mutations of valid packets
# ---------------------------------------------------------------------------

def size_field_offsets(data: bytes, start: int = 0, end: int | None = None) -> list[int]:
    """Offsets of the element size fields of a valid packet (walks its bundles)."""
    end = len(data) if end is None else end
    if not data.startswith(b"#bundle\x00", start):
        return []
    out, pos = [], start + 16
    while pos + 4 <= end:
        size = struct.unpack_from(">i", data, pos)[0]
        out.append(pos)
        out += size_field_offsets(data, pos + 4, pos + 4 + size)
        pos += 4 + size
    return out


INTERESTING = [-(2**31), -8, -4, -1, 0, 1, 2, 3, 4, 8, 12, 16, 20, 2**31 - 1, 1_000_000, 65536]



def random_ops(seed: int) -> list[tuple]:
    """1-4 mutations: bit flips, truncation, inserts, deletes, duplicated runs,
    size-field corruption (with sizes that lie) and random aligned words."""
    rnd = random.Random(seed)
    ops = []
    for _ in range(rnd.randrange(1, 5)):
        off = rnd.randrange(10**6)
        kind = rnd.choice(["flip", "flip", "truncate", "insert", "delete", "dup", "size", "size", "word"])
        if kind == "flip":
            ops.append((kind, off, rnd.randrange(8)))
        elif kind == "truncate":
            ops.append((kind, off))
        elif kind == "insert":
            ops.append((kind, off, rnd.randbytes(rnd.randrange(1, 9))))
        elif kind == "delete":
            ops.append((kind, off, rnd.randrange(1, 9)))
        elif kind == "dup":
            ops.append((kind, off, rnd.randrange(1, 17)))
        elif kind == "size":
            ops.append((kind, off, rnd.choice(INTERESTING + [rnd.randrange(-64, 65) * 4])))
        else:
            ops.append((kind, off, rnd.randrange(-(2**31), 2**31)))
    return ops


def mutate(data: bytes, other: bytes, ops) -> bytes:
    sizes = size_field_offsets(data)  # found on the valid packet, before any damage
    buf = bytearray(data)
    for op in ops:
        kind, off = op[0], op[1]
        n = len(buf)
        if kind == "flip" and n:
            buf[off % n] ^= 1 << op[2]
        elif kind == "truncate":
            del buf[off % (n + 1):]
        elif kind == "insert":
            i = off % (n + 1)
            buf[i:i] = op[2]
        elif kind == "delete" and n:
            i = off % n
            del buf[i:i + op[2]]
        elif kind == "dup" and n:
            i = off % n
            buf[i:i] = buf[i:i + op[2]]
        elif kind in ("size", "word") and n >= 4:
            if kind == "size" and sizes:
                i = sizes[off % len(sizes)]  # may lie past the end after a truncation: then appended
            else:
                i = (off % (n // 4)) * 4
            buf[i:i + 4] = struct.pack(">i", op[2])
    if other and ops and ops[0][1] % 5 == 0:  # splice: our head, another packet's tail
        cut = ops[0][1] % (len(buf) + 1)
        buf = buf[:cut] + other[cut % (len(other) + 1):]
    return bytes(buf)


def seeded_tree(seed: int):
    """A valid packet tree from a seeded PRNG: much cheaper to draw than packet_tree,
    so hypothesis spends its time on the mutations."""
    rnd = random.Random(seed)

    def one_arg():
        k = rnd.randrange(9)
        if k == 0:
            return rnd.randrange(-(2**31), 2**31)
        if k == 1:
            return rnd.randrange(-(2**63), 2**63)
        if k == 2:
            return struct.unpack(">f", struct.pack(">f", rnd.uniform(-1e6, 1e6)))[0]
        if k == 3:
            return "".join(rnd.choice("abcé€ \t,/") for _ in range(rnd.randrange(12)))
        if k == 4:
            return rnd.randbytes(rnd.randrange(12))
        return (True, False, None, IMPULSE)[k - 5]

    def one_message():
        addr = "/" + "/".join("".join(rnd.choice("abc019_") for _ in range(rnd.randrange(1, 6)))
                              for _ in range(rnd.randrange(1, 4)))
        return OscMessage(addr, tuple(one_arg() for _ in range(rnd.randrange(6))))

    def one_item(depth):
        if depth >= 4 or rnd.random() < 0.5:
            return one_message()
        t = rnd.choice([None, NOW + rnd.uniform(-50, 50), TimeTag(0), TimeTag(NTP_IMMEDIATE)])
        return OscBundle(t, tuple(one_item(depth + 1) for _ in range(rnd.randrange(5))))

    return one_item(0)


def test_seeded_trees_round_trip():
    for seed in range(300):
        tree = seeded_tree(seed)
        got = check_decode(encode_packet(tree))
        assert [m for _, m in got] == [m for _, m in expected_flat(tree)]


def test_mutated_packets_never_escape():
    count = [0]

    # hypothesis drives two seeds (drawing structured mutations through it cost
    # 3 ms an example here; seeds keep 10 000 cases near 15 s)
    @fuzz_settings(10_000)
    @given(st.integers(0, 2**32), st.integers(0, 2**32))
    def run(tree_seed, op_seed):
        count[0] += 1
        data = encode_packet(seeded_tree(tree_seed))
        other = encode_packet(seeded_tree(tree_seed ^ 0x5A5A5A5A))
        check_decode(mutate(data, other, random_ops(op_seed)))

    run()
    assert count[0] >= 10_000


def test_size_field_offsets_helper_finds_every_element():
    data = encode_packet(OscBundle(None, (OscMessage("/a"), OscBundle(None, (OscMessage("/b"), OscMessage("/c"))))))
    # "/a" with an empty type tag string is 8 bytes; the inner bundle 16 + 2 * (4 + 8)
    assert size_field_offsets(data) == [16, 28, 48, 60]
    assert [struct.unpack_from(">i", data, o)[0] for o in size_field_offsets(data)] == [8, 40, 8, 8]


# ---------------------------------------------------------------------------
# address patterns vs a reference
# ---------------------------------------------------------------------------

token = st.one_of(
    st.sampled_from(list("abc")),
    st.just("?"),
    st.just("*"),
    st.sampled_from(["[ab]", "[!a]", "[a-b]", "[b-c]", "[!a-b]", "[c]"]),
    st.sampled_from(["{a,bc}", "{,a}", "{b}", "{ab,a,abc}"]),
)
segment = st.lists(token, min_size=1, max_size=7).map("".join)
name = st.text(alphabet="abc", max_size=8)


def reference_match(pattern: str, text: str) -> bool:
    """Expand {..} into every combination, then fnmatch.fnmatchcase each."""
    pieces, i = [], 0
    while i < len(pattern):
        if pattern[i] == "{":
            j = pattern.index("}", i)
            pieces.append(pattern[i + 1:j].split(","))
            i = j + 1
        else:
            pieces.append([pattern[i]])
            i += 1
    return any(fnmatch.fnmatchcase(text, "".join(combo)) for combo in itertools.product(*pieces))


def test_segment_matching_agrees_with_reference():
    @fuzz_settings(1000)
    @given(segment, st.lists(name, min_size=1, max_size=6))
    def run(pat, names):
        seg = SegmentPattern(pat)
        expected = [i for i, nm in enumerate(names) if reference_match(pat, nm)]
        assert match_segment(pat, names) == expected
        for nm in names:
            matched, steps = seg.match_steps(nm)
            assert matched == reference_match(pat, nm)
            assert steps <= (len(nm) + 1) * seg.cost

    run()


# ---------------------------------------------------------------------------
# SLIP
# ---------------------------------------------------------------------------

frame = st.binary(min_size=1, max_size=40).map(lambda b: b.replace(b"x", b"\xc0").replace(b"y", b"\xdb"))


def test_slip_round_trip_any_chunking():
    @fuzz_settings(500)
    @given(st.lists(frame, max_size=6), st.lists(st.integers(1, 17), min_size=1, max_size=30))
    def run(frames, cuts):
        stream = b"".join(slip_encode(f) for f in frames)
        dec = SlipDecoder(max_frame=64)
        out, pos, k = [], 0, 0
        while pos < len(stream):
            step = cuts[k % len(cuts)]
            out += dec.feed(stream[pos:pos + step])
            assert dec.buffered <= 64
            pos += step
            k += 1
        assert out == frames
        assert dec.dropped_oversize == dec.dropped_bad_escape == 0

    run()


def test_slip_garbage_is_bounded():
    @fuzz_settings(500)
    @given(st.lists(st.binary(max_size=300), max_size=8))
    def run(chunks):
        dec = SlipDecoder(max_frame=100)
        for c in chunks:
            for f in dec.feed(c):
                assert 1 <= len(f) <= 100
            assert dec.buffered <= 100

    run()
