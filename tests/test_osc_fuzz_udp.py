"""Fuzz the running OSC server over real UDP on 127.0.0.1: 13,000 hostile packets.

The server (LiveCore on the example show + OscServer) runs in its own event loop thread;
the tests send from a plain socket. Three generators, all deterministic:

- random bytes (hypothesis, derandomized): 3,000 packets, some starting like a message
  ("/") or a bundle ("#bundle") to get past the first check;
- crafted packet trees: messages and nested bundles with grammar addresses, wildcards,
  server addresses and hostile arguments (NaN, infinities, extreme ints, wrong types,
  blobs, time tags) under odd bundle time tags (immediately, 1900, the past, a few ms
  ahead, beyond the horizon, the largest tag), half of them then mutated: 1,000 drawn by
  hypothesis (derandomized) and 4,000 by a seeded generator of the same shape (hypothesis
  costs about 9 ms to draw one tree on this machine, the seeded generator microseconds);
- seeded mutations of valid packets (random.Random): 5,000 packets with bit flips, special
  bytes, truncations, inserts, deletions, duplicated runs, lying size fields, splices and
  swapped type tags.

Every 50 packets the sender sends /ping and waits for /pong (so nothing is lost to a full
socket buffer, and the server is proven alive throughout). At the end: /pong still comes
back, the server received every packet, no exception escaped (internal_errors == 0), the
state is valid (positions finite and within range, gains within range) and the target
matrix is finite. No timing is asserted. Packets never ask the server to subscribe
another port (that would send to whatever listens on this machine's loopback).
"""

from __future__ import annotations

import asyncio
import random
import socket
import threading
import time

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from conftest import REPO

from fieldmix.live.core import LiveCore
from fieldmix.live.osc import OscServer
from fieldmix.oscwire import IMPULSE, OscMessage, TimeTag, encode_bundle, encode_message
from fieldmix.show import load_show

SHOW = REPO / "configs" / "shows" / "harbour.json"
SYNC_EVERY = 50
N_RANDOM = 3000  # hypothesis: random bytes
N_CRAFTED = 1000  # hypothesis: packet trees (about 9 ms an example to draw here)
N_SEEDED_TREES = 4000  # the same kind of trees from a seeded generator
N_MUTATED = 5000  # seeded mutations of valid packets

FUZZ = settings(
    derandomize=True,
    database=None,
    deadline=None,
    print_blob=False,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large, HealthCheck.filter_too_much],
)


# ----------------------------------------------------------------------------- harness


class Running:
    """LiveCore + OscServer in an event loop on a thread of their own."""

    def __init__(self):
        self.loop = asyncio.new_event_loop()
        self.thread = threading.Thread(target=self.loop.run_forever, name="osc-fuzz-server", daemon=True)
        self.thread.start()
        self.core, self.srv = self.call(self._start())

    async def _start(self):
        core = LiveCore(load_show(SHOW))
        srv = OscServer(core, host="127.0.0.1", udp_port=0, tcp=False)
        await srv.start()
        return core, srv

    def call(self, coro, timeout=20.0):
        return asyncio.run_coroutine_threadsafe(coro, self.loop).result(timeout)

    def inside(self, fn):
        """Run fn() on the server's loop thread (the core is not thread-safe) and return its result."""

        async def wrap():
            return fn()

        return self.call(wrap())

    def close(self):
        try:
            self.call(self.srv.stop())
        finally:
            self.loop.call_soon_threadsafe(self.loop.stop)
            self.thread.join(5)
            self.loop.close()


class Sender:
    def __init__(self, running: Running):
        self.running = running
        self.addr = ("127.0.0.1", running.srv.udp_port)
        self.sock = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
        self.sock.bind(("127.0.0.1", 0))
        self.sock.settimeout(10.0)
        self.fuzz_sent = 0
        self.pings = 0
        self._since = 0
        self._token = 0

    def send(self, packet: bytes) -> None:
        self.sock.sendto(packet[:60000], self.addr)
        self.fuzz_sent += 1
        self._since += 1
        if self._since >= SYNC_EVERY:
            self.sync()

    def sync(self) -> None:
        """/ping and wait for its /pong: the server has handled everything sent before."""
        self._token += 1
        token = f"sync-{self._token}"
        want = encode_message("/pong", [token])
        self.sock.sendto(encode_message("/ping", [token]), self.addr)
        self.pings += 1
        self._since = 0
        deadline = time.monotonic() + 10.0
        while True:
            if time.monotonic() > deadline:
                raise AssertionError("the server stopped answering /ping")
            data, _ = self.sock.recvfrom(65536)  # other packets (updates, /status) are skipped
            if data == want:
                return


@pytest.fixture(scope="module")
def running():
    r = Running()
    yield r
    r.close()


@pytest.fixture(scope="module")
def sender(running):
    s = Sender(running)
    yield s
    s.sock.close()


def check_state(core) -> dict:
    """Everything a fuzzed packet could have reached must still be valid."""
    st_ = core.state
    for s in st_.sources:
        assert np.all(np.isfinite(s.position)), s.id
        assert np.all(np.abs(s.position) <= 1000.0 + 1e-6), (s.id, s.position)
        assert -120.0 <= s.gain_db <= 24.0, (s.id, s.gain_db)
        assert 0.0 <= s.spread <= 360.0, (s.id, s.spread)
        assert isinstance(s.mute, bool)
    assert -120.0 <= st_.master_gain_db <= 12.0
    G = st_.target_matrix()
    assert np.all(np.isfinite(G)), "non-finite gain in the target matrix"
    return {"sources": [s.to_dict() for s in st_.sources], "gmax": float(np.abs(G).max())}


# ----------------------------------------------------------------------------- mutator

_TAGS = b"ifsbhdtcTFNIrm[]"
_LIES = (-4, -8, -1, 0, 1, 3, 4, 16, 0x7FFFFFFF, -(1 << 31))


def mutate(packet: bytes, rng: random.Random, corpus) -> bytes:
    b = bytearray(packet)
    for _ in range(rng.randint(1, 4)):
        if not b:
            b = bytearray(rng.choice(corpus))
        n = len(b)
        op = rng.randrange(9)
        if op == 0:  # bit flip
            i = rng.randrange(n)
            b[i] ^= 1 << rng.randrange(8)
        elif op == 1:  # a special byte
            b[rng.randrange(n)] = rng.choice((0x00, 0xFF, 0x80, 0x7F, 0x2F, 0x23, 0x2C, 0x2A, 0x7B, 0x5B))
        elif op == 2:  # truncate
            del b[rng.randrange(n):]
        elif op == 3:  # insert random bytes
            i = rng.randrange(n + 1)
            b[i:i] = rng.randbytes(rng.choice((1, 3, 4, 8, 16)))
        elif op == 4:  # delete a run
            i = rng.randrange(n)
            del b[i:i + rng.choice((1, 4, 8, 12))]
        elif op == 5:  # duplicate a run
            i = rng.randrange(n)
            run = b[i:i + rng.choice((4, 8, 16, 32))]
            b[i:i] = run * rng.randint(1, 8)
        elif op == 6:  # a lying int32 (sizes, blob lengths, time tag halves)
            if n >= 4:
                i = rng.randrange(n // 4) * 4
                lie = rng.choice(_LIES + (n, n + 4, n - 4))
                b[i:i + 4] = (lie & 0xFFFFFFFF).to_bytes(4, "big")
        elif op == 7:  # splice with another packet
            other = rng.choice(corpus)
            b = b[: rng.randrange(n + 1)] + other[rng.randrange(len(other) + 1):]
        else:  # swap a type tag
            comma = b.find(b",")
            if comma >= 0 and comma + 1 < n:
                b[comma + 1 + rng.randrange(min(4, n - comma - 1))] = rng.choice(_TAGS)
    if rng.random() < 0.75:  # mostly keep the length a multiple of 4, to get past the first check
        del b[len(b) - len(b) % 4:]
    return bytes(b[:8192])


def build_corpus() -> list[bytes]:
    now = time.time()
    msgs = [
        encode_message("/source/buoy/azimuth", [45.0]),
        encode_message("/source/2/elevation", [30]),
        encode_message("/source/engine/distance", [12.5]),
        encode_message("/source/gulls/position", [1.0, -2.0, 0.5]),
        encode_message("/source/gulls/position", [3, 4]),
        encode_message("/source/waves/gain", [-12.0]),
        encode_message("/source/*/mute", [1]),
        encode_message("/source/*/mute", [False]),
        encode_message("/source/{buoy,gulls}/gain", [-6]),
        encode_message("/source/[1-4]/spread", [30.0]),
        encode_message("/source/?uoy/azimuth", [-170.0]),
        encode_message("/master/gain", [-3.0]),
        encode_message("/master/mute", [0]),
        encode_message("/master/panic"),
        encode_message("/master/mute", [1]),
        encode_message("/master/mute", [0]),
        encode_message("/master/*", [0]),
        encode_message("/layout/load", ["stereo"]),
        encode_message("/layout/load", ["ring8"]),
        encode_message("/ping", [1, 2.0, "three"]),
        encode_message("/status"),
        encode_message("/unsubscribe"),
        encode_message("/cue/go", [1]),
        encode_message("/source/buoy/gain", [float("nan")]),
        encode_message("/source/buoy/blob", [b"\x00\x01\x02\x03\x04"]),
        encode_message("/source/buoy/azimuth", [1.0], types="d"),
        encode_message("/source/buoy/azimuth", [1], types="h"),
        encode_message("/source/buoy/azimuth", ["x"], types="c"),
    ]
    bundles = [
        encode_bundle(None, [OscMessage("/source/buoy/azimuth", (10.0,)), OscMessage("/source/waves/gain", (-3.0,))]),
        encode_bundle(now + 0.05, [OscMessage("/source/engine/spread", (90.0,))]),
        encode_bundle(now - 10, [encode_bundle(None, [OscMessage("/master/gain", (-9.0,))]), OscMessage("/ping", ())]),
        encode_bundle(TimeTag(0), [encode_bundle(TimeTag(1), [encode_bundle(None, [OscMessage("/source/1/mute", (1,))])])]),
        encode_bundle(None, [OscMessage(f"/source/{i}/gain", (float(-i),)) for i in range(1, 5)]),
    ]
    return msgs + bundles


CORPUS = build_corpus()


# ----------------------------------------------------------------------------- strategies

_SRC_PARTS = st.sampled_from(
    ["buoy", "waves", "engine", "gulls", "1", "2", "3", "4", "0", "5", "99999999999999999999", "*", "{buoy,gulls}",
     "[1-4]", "[!1]*", "?uoy", "b*y", "nobody", "[", "{a,", "*a*a*a*a*b", "[z-a]", "{}", "*?*?*"]
) | st.text(alphabet=st.characters(blacklist_characters="\x00/", blacklist_categories=("Cs",)), max_size=8)
_PARAMS = st.sampled_from(
    ["azimuth", "elevation", "distance", "position", "gain", "mute", "spread", "*", "{gain,mute}", "mu?e", "volume"]
)
_ADDRESS = st.one_of(
    st.builds(lambda s, p: f"/source/{s}/{p}", _SRC_PARTS, _PARAMS),
    st.sampled_from(["/master/gain", "/master/mute", "/master/*", "/master/panic", "/master", "/*/*", "/*"]),
    st.sampled_from(["/ping", "/status", "/subscribe", "/unsubscribe", "/layout/load", "/cue/go", "/pong",
                     "/error", "/layout/active"]),
    st.text(alphabet=st.characters(blacklist_characters="\x00", blacklist_categories=("Cs",)), max_size=16).map(lambda t: "/" + t),
)
_ARG = st.one_of(
    st.integers(-(2 ** 31), 2 ** 31 - 1).map(lambda v: ("i", v)),
    st.integers(-(2 ** 63), 2 ** 63 - 1).map(lambda v: ("h", v)),
    st.floats(width=32).map(lambda v: ("f", v)),
    st.floats().map(lambda v: ("d", v)),
    st.sampled_from([0.0, 1.0, -6.0, 45.0, 90.0, 359.0, 1000.0, 1000.001, -120.0, 24.0, 3e38, 5e-45,
                     float("inf"), float("-inf"), float("nan")]).map(lambda v: ("f", v)),
    st.text(alphabet=st.characters(blacklist_characters="\x00", blacklist_categories=("Cs",)), max_size=12).map(lambda s: ("s", s)),
    st.sampled_from(["ring8", "stereo", "itu-5.0", "nosuch", "../shows/harbour", ".hidden"]).map(lambda s: ("s", s)),
    st.binary(max_size=12).map(lambda b: ("b", b)),
    st.sampled_from([("T", True), ("F", False), ("N", None), ("I", IMPULSE)]),
    st.integers(0, 2 ** 64 - 1).map(lambda v: ("t", TimeTag(v))),
    st.characters(blacklist_categories=("Cs",)).map(lambda c: ("c", c)),
)


def _message(address: str, args: list) -> bytes:
    if address in ("/subscribe", "/unsubscribe"):
        args = []  # never subscribe another port of this machine
    return encode_message(address, [v for _, v in args], types="".join(t for t, _ in args))


_MESSAGE = st.builds(_message, _ADDRESS, st.lists(_ARG, max_size=4))
# a bundle time: ("tag", TimeTag) as is, or ("rel", seconds from the moment of sending)
_TIME = st.one_of(
    st.just(("tag", TimeTag(1))),
    st.just(("tag", TimeTag(0))),
    st.just(("tag", TimeTag((1 << 64) - 1))),
    st.integers(0, 2 ** 64 - 1).map(lambda v: ("tag", TimeTag(v))),
    st.floats(-1e6, 0.0).map(lambda d: ("rel", d)),
    st.floats(0.0, 0.2).map(lambda d: ("rel", d)),
    st.floats(3601.0, 1e7).map(lambda d: ("rel", d)),
)
_TREE = st.recursive(
    _MESSAGE,
    lambda children: st.tuples(_TIME, st.lists(children, max_size=4)),
    max_leaves=6,
)


def encode_tree(tree, now: float) -> bytes:
    if isinstance(tree, bytes):
        return tree
    (kind, t), children = tree
    tag = t if kind == "tag" else TimeTag(_ntp(now + t))
    return encode_bundle(tag, [encode_tree(c, now) for c in children])


def _ntp(unix: float) -> int:
    from fieldmix.oscwire import unix_to_ntp

    try:
        return unix_to_ntp(unix)
    except ValueError:  # beyond NTP era 0: the largest tag
        return (1 << 64) - 1


_RANDOM_BYTES = st.one_of(
    st.binary(max_size=600),
    st.binary(max_size=300).map(lambda b: b"/" + b),
    st.binary(max_size=300).map(lambda b: b"/source/buoy/gain\x00\x00\x00,f\x00\x00" + b),
    st.binary(max_size=300).map(lambda b: b"#bundle\x00" + b),
    st.binary(max_size=300).map(lambda b: b"#bundle\x00\x00\x00\x00\x00\x00\x00\x00\x01" + b),
)


# ----------------------------------------------------------------------------- tests


@settings(FUZZ, max_examples=N_RANDOM)
@given(packet=_RANDOM_BYTES)
def test_random_bytes(sender, packet):
    sender.send(packet)


@settings(FUZZ, max_examples=N_CRAFTED)
@given(tree=_TREE, mutate_seed=st.one_of(st.none(), st.integers(0, 2 ** 32 - 1)))
def test_crafted_packets_and_bundles(sender, tree, mutate_seed):
    packet = encode_tree(tree, time.time())
    if mutate_seed is not None:
        packet = mutate(packet, random.Random(mutate_seed), CORPUS)
    sender.send(packet)


_SRC_CHOICES = ["buoy", "waves", "engine", "gulls", "1", "2", "3", "4", "0", "5", "*", "{buoy,gulls}", "[1-4]",
                "[!1]*", "?uoy", "b*y", "nobody", "[", "{a,", "*a*a*a*a*b", "[z-a]", "{}", "*?*?*", "é"]
_PARAM_CHOICES = ["azimuth", "elevation", "distance", "position", "gain", "mute", "spread", "*", "{gain,mute}",
                  "mu?e", "volume"]
_OTHER_ADDRESSES = ["/master/gain", "/master/mute", "/master/*", "/master/panic", "/master", "/*/*", "/*", "/ping",
                    "/status", "/subscribe", "/unsubscribe", "/layout/load", "/cue/go", "/pong", "/error",
                    "/layout/active", "/", "/source", "/source/buoy"]
_NUMBERS = [0.0, 1.0, -1.0, -6.0, 45.0, 90.0, 180.0, 359.0, 360.0, 1000.0, 1000.001, -120.0, -120.5, 12.0, 24.0,
            24.5, 3e38, -3e38, 5e-45, float("inf"), float("-inf"), float("nan")]


def seeded_tree(rng: random.Random, depth: int = 0):
    """A random message or bundle tree, the seeded twin of the hypothesis strategy _TREE."""
    if depth < 6 and rng.random() < 0.35:
        kind = rng.randrange(7)
        if kind == 0:
            t = ("tag", TimeTag(1))
        elif kind == 1:
            t = ("tag", TimeTag(0))
        elif kind == 2:
            t = ("tag", TimeTag((1 << 64) - 1))
        elif kind == 3:
            t = ("tag", TimeTag(rng.getrandbits(64)))
        elif kind == 4:
            t = ("rel", -rng.uniform(0, 1e6))
        elif kind == 5:
            t = ("rel", rng.uniform(0, 0.2))
        else:
            t = ("rel", rng.uniform(3601, 1e7))
        return (t, [seeded_tree(rng, depth + 1) for _ in range(rng.randrange(5))])
    if rng.random() < 0.6:
        address = f"/source/{rng.choice(_SRC_CHOICES)}/{rng.choice(_PARAM_CHOICES)}"
    else:
        address = rng.choice(_OTHER_ADDRESSES)
    args = []
    for _ in range(rng.choice((0, 1, 1, 1, 2, 3, 4))):
        k = rng.randrange(10)
        if k == 0:
            args.append(("i", rng.randint(-(2 ** 31), 2 ** 31 - 1)))
        elif k == 1:
            args.append(("h", rng.randint(-(2 ** 63), 2 ** 63 - 1)))
        elif k in (2, 3):
            args.append(("f", rng.choice(_NUMBERS) if rng.random() < 0.5 else rng.uniform(-400, 400)))
        elif k == 4:
            args.append(("d", rng.choice(_NUMBERS) if rng.random() < 0.5 else rng.uniform(-2000, 2000)))
        elif k == 5:
            args.append(("s", rng.choice(["ring8", "stereo", "nosuch", "../shows/harbour", "", "x" * 50])))
        elif k == 6:
            args.append(("b", rng.randbytes(rng.randrange(9))))
        elif k == 7:
            args.append(rng.choice([("T", True), ("F", False), ("N", None), ("I", IMPULSE)]))
        elif k == 8:
            args.append(("t", TimeTag(rng.getrandbits(64))))
        else:
            args.append(("i", rng.choice((0, 1, 2, -1, 1000, 1001, 65535))))
    return _message(address, args)


def test_seeded_crafted_trees(sender):
    rng = random.Random(1357)
    for _ in range(N_SEEDED_TREES):
        packet = encode_tree(seeded_tree(rng), time.time())
        if rng.random() < 0.5:
            packet = mutate(packet, rng, CORPUS)
        sender.send(packet)


def test_seeded_mutations_of_valid_packets(sender, running):
    rng = random.Random(20240611)
    for k in range(N_MUTATED):
        sender.send(mutate(rng.choice(CORPUS), rng, CORPUS))
        if k % 1000 == 999:
            running.inside(lambda: check_state(running.core))


def test_server_survived_and_state_is_valid(sender, running):
    """Runs after the three generators (pytest keeps file order)."""
    sender.sync()
    srv, core = running.srv, running.core
    st_ = running.inside(srv.stats)
    total = N_RANDOM + N_CRAFTED + N_SEEDED_TREES + N_MUTATED
    assert sender.fuzz_sent >= total, "the generators did not run in full (run the whole file)"
    # the server received every packet (the /ping barriers keep the socket buffer from overflowing)
    assert st_["packets"] == sender.fuzz_sent + sender.pings
    assert st_["internal_errors"] == 0, "an exception escaped a handler"
    # the fuzz reached every stage: refused packets, refused messages, applied messages
    assert st_["malformed_total"] > total // 4, st_["malformed"]
    assert st_["rejected_total"] > 500, st_["rejected"]
    assert st_["applied"] > 500
    assert len(st_["malformed"]) >= 8 and len(st_["rejected"]) >= 5
    running.inside(lambda: check_state(core))
    # held messages are bounded; a final /ping still answers
    assert st_["pending"] <= srv.max_pending
    sender.sync()
    # what it looks like (pytest -s shows it)
    print(
        f"\nfuzz: {sender.fuzz_sent} packets, {st_['messages']} messages, applied {st_['applied']}, "
        f"rejected {st_['rejected_total']} {st_['rejected']}, malformed {st_['malformed_total']} {st_['malformed']}, "
        f"held {st_['pending']}, dropped from the schedule {st_['dropped_schedule']}"
    )
