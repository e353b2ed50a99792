"""The live OSC server over real UDP and TCP sockets on 127.0.0.1 (ephemeral ports).

Every test runs a real asyncio loop with a LiveCore on the example show (four sources:
buoy, waves, engine, gulls; layout ring8). Barriers are deterministic: a client sends
its messages and then ``/ping`` on the same socket; loopback UDP keeps the order and the
server handles one datagram at a time, so when ``/pong`` comes back every earlier
message has been handled. Packets are built with python-osc as an independent encoder
where a test builds them by hand, and with fieldmix.oscwire elsewhere.
"""

from __future__ import annotations

import ast
import asyncio
import contextlib
import struct
import time

import numpy as np
import pytest

from conftest import REPO

from fieldmix.control import ADDRESSES
from fieldmix.errors import ConfigError, ControlError
from fieldmix.live.core import LiveCore
from fieldmix.live.osc import ECHO_IGNORED, SERVER_ADDRESSES, SOURCE_OUTPUT, STATUS_KEYS, OscServer
from fieldmix.oscwire import (
    Limits,
    OscMessage,
    SlipDecoder,
    TimeTag,
    decode_packet,
    encode_bundle,
    encode_message,
    slip_encode,
)
from fieldmix.show import load_show

SHOW = REPO / "configs" / "shows" / "harbour.json"
IDS = ("buoy", "waves", "engine", "gulls")


def run(coro, timeout=30.0):
    return asyncio.run(asyncio.wait_for(coro, timeout))


@contextlib.asynccontextmanager
async def serving(**kw):
    core = LiveCore(load_show(SHOW))
    srv = OscServer(core, host="127.0.0.1", udp_port=0, **kw)
    await srv.start()
    try:
        yield core, srv
    finally:
        await srv.stop()


class Client(asyncio.DatagramProtocol):
    """A UDP client socket that keeps every message it receives."""

    def __init__(self):
        self.inbox: list[OscMessage] = []
        self.raw: list[bytes] = []
        self.event = asyncio.Event()
        self.transport = None

    def connection_made(self, transport):
        self.transport = transport

    def datagram_received(self, data, addr):
        self.raw.append(data)
        for _, m in decode_packet(data):
            self.inbox.append(m)
        self.event.set()

    @property
    def port(self) -> int:
        return self.transport.get_extra_info("sockname")[1]

    def send(self, srv, packet: bytes):
        self.transport.sendto(packet, ("127.0.0.1", srv.udp_port))

    def msg(self, srv, address, *args, types=None):
        self.send(srv, encode_message(address, args, types=types))

    async def wait_for(self, pred, timeout=3.0):
        """The first message received (now or later) for which pred(m) holds; fails on timeout."""
        deadline = time.monotonic() + timeout
        seen = 0
        while True:
            for m in self.inbox[seen:]:
                if pred(m):
                    return m
            seen = len(self.inbox)
            left = deadline - time.monotonic()
            if left <= 0:
                raise AssertionError(f"no matching message within {timeout} s; got {[x.address for x in self.inbox][-20:]}")
            self.event.clear()
            with contextlib.suppress(asyncio.TimeoutError):
                await asyncio.wait_for(self.event.wait(), left)

    async def barrier(self, srv, token=None):
        """Send /ping <token> and wait for its /pong: everything sent before it is handled."""
        token = token if token is not None else f"b{time.monotonic_ns()}"
        self.msg(srv, "/ping", token)
        await self.wait_for(lambda m: m.address == "/pong" and m.args == (token,))

    def close(self):
        self.transport.close()


async def client(port=0) -> Client:
    loop = asyncio.get_running_loop()
    _, proto = await loop.create_datagram_endpoint(Client, local_addr=("127.0.0.1", port))
    return proto


async def until(cond, timeout=3.0):
    """Poll cond() (every few ms) until true; fails the test if it stays false."""
    deadline = time.monotonic() + timeout
    while not cond():
        if time.monotonic() > deadline:
            raise AssertionError("condition not met in time")
        await asyncio.sleep(0.003)


_FLUSH_MARK = [0]


async def flushed(sub: "Client", core):
    """Wait until the server has sent ``sub`` everything queued so far.

    Updates and /error reports go out in coalescing flushes, in order; this changes the
    master gain to a fresh value (through the core) and waits for it to arrive.
    """
    _FLUSH_MARK[0] += 1
    v = -60.0 - 0.25 * _FLUSH_MARK[0]
    core.apply_message("/master/gain", [v], origin="test")
    await sub.wait_for(lambda m: m.address == "/master/gain" and m.args[0] == pytest.approx(v))


def src(core, sid):
    return core.state.sources[IDS.index(sid)]


# ------------------------------------------------------------------ control addresses


def test_every_control_address_over_udp_changes_the_state():
    async def main():
        async with serving() as (core, srv):
            c = await client()
            c.msg(srv, "/source/buoy/azimuth", 90)  # int accepted
            c.msg(srv, "/source/waves/elevation", 30.0)
            c.msg(srv, "/source/engine/distance", 5)
            c.msg(srv, "/source/gulls/position", 1.0, 2.0, 0.5)
            c.msg(srv, "/source/2/gain", -7.5)  # 1-based index
            c.msg(srv, "/source/3/mute", 1)
            c.msg(srv, "/source/gulls/spread", 45.0)
            c.msg(srv, "/source/buoy/solo", 1)
            c.msg(srv, "/master/gain", -3)
            c.msg(srv, "/master/mute", 1)
            await c.barrier(srv)
            az, el, d = src(core, "buoy").spherical
            assert az == pytest.approx(90.0) and d == pytest.approx(3.0)
            az, el, d = src(core, "waves").spherical
            assert el == pytest.approx(30.0) and az == pytest.approx(180.0)
            assert src(core, "engine").spherical[2] == pytest.approx(5.0)
            assert np.allclose(src(core, "gulls").position, [1.0, 2.0, 0.5])
            assert src(core, "waves").gain_db == -7.5
            assert src(core, "engine").mute is True
            assert src(core, "gulls").spread == 45.0
            assert src(core, "buoy").solo is True and not src(core, "waves").solo
            assert core.state.master_gain_db == -3.0
            assert core.state.master_mute is True
            # position without z keeps the height
            c.msg(srv, "/source/gulls/position", -1, 3)
            await c.barrier(srv)
            assert np.allclose(src(core, "gulls").position, [-1.0, 3.0, 0.5])
            # every grammar template was exercised above
            sent = {"azimuth", "elevation", "distance", "position", "gain", "mute", "solo", "spread"}
            assert {s.param for s in ADDRESSES.values() if s.target == "source"} == sent
            st = srv.stats()
            assert st["applied"] == 11 + 2  # eleven messages and the two barriers' /ping
            assert st["rejected_total"] == 0 and core.applied["osc"] == 11
            c.close()

    run(main())


def test_true_false_are_accepted_for_mute_only():
    async def main():
        async with serving() as (core, srv):
            c = await client()
            c.msg(srv, "/source/buoy/mute", True)
            c.msg(srv, "/source/*/mute", True)  # a pattern that only selects mute
            await c.barrier(srv)
            assert all(s.mute for s in core.state.sources)
            c.msg(srv, "/source/{buoy,waves}/mute", False)
            c.msg(srv, "/master/mute", True)
            await c.barrier(srv)
            assert [s.mute for s in core.state.sources] == [False, False, True, True]
            assert core.state.master_mute is True
            c.msg(srv, "/source/buoy/gain", True)  # not a flag: refused
            c.msg(srv, "/master/*", False)  # selects gain too: T/F stay booleans, refused
            await c.barrier(srv)
            assert src(core, "buoy").gain_db == 0.0 and core.state.master_mute is True
            assert srv.stats()["rejected"] == {"bad_type": 2}
            c.close()

    run(main())


def test_wildcards_select_sources_by_id_and_index():
    async def main():
        async with serving() as (core, srv):
            c = await client()
            c.msg(srv, "/source/*/mute", 1)
            await c.barrier(srv)
            assert all(s.mute for s in core.state.sources)
            c.msg(srv, "/source/{buoy,gulls}/gain", -6)
            await c.barrier(srv)
            assert [s.gain_db for s in core.state.sources] == [-6.0, -2.0, 0.0, -6.0]
            c.msg(srv, "/source/[1-2]/spread", 30)
            await c.barrier(srv)
            assert [s.spread for s in core.state.sources] == [30.0, 30.0, 0.0, 20.0]
            c.msg(srv, "/source/?ng*/azimuth", -90.0)  # "engine"
            c.msg(srv, "/source/*[es]/distance", 4.0)  # waves, engine, gulls (not buoy, nor any index)
            await c.barrier(srv)
            assert src(core, "engine").spherical[0] == pytest.approx(-90.0)
            assert [round(s.spherical[2], 6) for s in core.state.sources][1:] == [4.0, 4.0, 4.0]
            assert src(core, "buoy").spherical[2] == pytest.approx(3.0)
            c.msg(srv, "/source/*/nothing", 1)
            c.msg(srv, "/source/x*/gain", 0)  # matches no source
            await c.barrier(srv)
            assert srv.stats()["rejected"] == {"unknown_address": 1, "unknown_source": 1}
            c.close()

    run(main())


def test_wildcards_never_reach_server_addresses():
    async def main():
        async with serving() as (core, srv):
            c = await client()
            c.msg(srv, "/master/p*")  # would be /master/panic if server addresses matched patterns
            c.msg(srv, "/layout/*", "stereo")
            c.msg(srv, "/sub*")
            await c.barrier(srv)
            assert core.panicked is False
            assert core.state.layout.name == "ring8"
            assert srv.stats()["subscribers"] == 0
            assert srv.stats()["rejected"] == {"unknown_address": 3}
            c.close()

    run(main())


# ---------------------------------------------------------------------- bundles & time


def test_bundle_applies_its_messages_in_order_including_nested_bundles():
    from pythonosc.osc_bundle_builder import IMMEDIATELY, OscBundleBuilder
    from pythonosc.osc_message_builder import OscMessageBuilder

    def pmsg(address, *vals):
        b = OscMessageBuilder(address=address)
        for v in vals:
            b.add_arg(v)
        return b.build()

    inner = OscBundleBuilder(IMMEDIATELY)
    inner.add_content(pmsg("/source/gulls/gain", -9.0))
    inner.add_content(pmsg("/source/buoy/azimuth", 20.0))
    outer = OscBundleBuilder(IMMEDIATELY)
    outer.add_content(pmsg("/source/buoy/azimuth", 10.0))
    outer.add_content(inner.build())
    outer.add_content(pmsg("/source/buoy/azimuth", 30.0))  # last one wins
    outer.add_content(pmsg("/master/gain", -1.5))
    packet = outer.build().dgram  # python-osc as an independent encoder

    async def main():
        async with serving() as (core, srv):
            c = await client()
            seen = []
            core.add_listener(lambda ev: seen.append(ev["source"]["azimuth"]) if ev.get("type") == "source" and ev["source"]["id"] == "buoy" else None)
            c.send(srv, packet)
            await c.barrier(srv)
            assert seen == pytest.approx([10.0, 20.0, 30.0])
            assert src(core, "gulls").gain_db == -9.0
            assert core.state.master_gain_db == -1.5
            assert srv.stats()["messages"] == 5 + 1  # five in the bundles, the /ping
            c.close()

    run(main())


def test_future_bundle_is_applied_at_its_time_and_the_loop_stays_free():
    """A bundle due 300 ms ahead: held by a loop timer, applied at its time.

    The check is of the scheduling's correctness (never early, not later than a few
    audio blocks), measured against time.time() at the moment the core applies it; a
    message sent after the bundle is handled first, so nothing sleeps in the loop.
    """

    async def main():
        async with serving() as (core, srv):
            c = await client()
            applied = {}

            def listener(ev):
                if ev.get("type") == "source":
                    applied.setdefault(ev["source"]["id"], time.time())

            core.add_listener(listener)
            due = time.time() + 0.3
            c.send(srv, encode_bundle(due, [OscMessage("/source/buoy/azimuth", (90.0,))]))
            c.msg(srv, "/source/gulls/gain", -10.0)
            await c.barrier(srv)
            # the later message is applied, the bundle still waits
            assert src(core, "gulls").gain_db == -10.0
            assert "buoy" not in applied and src(core, "buoy").spherical[0] == pytest.approx(60.0)
            assert srv.stats()["pending"] == 1
            await until(lambda: "buoy" in applied, timeout=3.0)
            assert src(core, "buoy").spherical[0] == pytest.approx(90.0)
            late = applied["buoy"] - due
            assert -0.001 <= late <= 0.020, f"applied {late * 1000:.1f} ms after its time tag"
            assert srv.stats()["pending"] == 0
            c.close()

    run(main())


def test_held_messages_run_in_time_order_and_a_past_time_tag_applies_at_once():
    async def main():
        async with serving() as (core, srv):
            c = await client()
            now = time.time()
            order = []
            core.add_listener(lambda ev: order.append(ev["source"]["gain_db"]) if ev.get("type") == "source" else None)
            c.send(srv, encode_bundle(now + 0.25, [OscMessage("/source/buoy/gain", (-3.0,))]))
            c.send(srv, encode_bundle(now + 0.15, [
                OscMessage("/source/buoy/gain", (-1.0,)),
                OscMessage("/source/buoy/gain", (-2.0,)),  # same time: packet order
            ]))
            c.send(srv, encode_bundle(now - 5.0, [OscMessage("/source/buoy/gain", (-0.5,))]))  # past: now
            c.send(srv, encode_bundle(TimeTag(0), [OscMessage("/source/waves/gain", (-4.0,))]))  # 1900: now
            await c.barrier(srv)
            assert order == [-0.5, -4.0]
            await until(lambda: len(order) == 5, timeout=3.0)
            assert order == [-0.5, -4.0, -1.0, -2.0, -3.0]
            c.close()

    run(main())


def test_pending_schedule_is_bounded_and_far_future_is_refused():
    async def main():
        async with serving(max_pending=3) as (core, srv):
            c = await client()
            due = time.time() + 60
            c.send(srv, encode_bundle(due, [OscMessage("/source/buoy/gain", (float(-k),)) for k in range(5)]))
            c.send(srv, encode_bundle(time.time() + 7200, [OscMessage("/source/buoy/gain", (-1.0,))]))
            await c.barrier(srv)
            st = srv.stats()
            assert st["pending"] == 3 and st["dropped_schedule"] == 2
            assert st["malformed"] == {"far_future": 1}
            assert src(core, "buoy").gain_db == 0.0
            c.close()
        assert srv.stats()["pending"] == 0  # stop() forgets what was held

    run(main())


# ------------------------------------------------------------------------ server addresses


def test_ping_pong_echoes_arguments_to_the_sender_only():
    async def main():
        async with serving() as (core, srv):
            a, b = await client(), await client()
            a.msg(srv, "/ping", 7, 2.5, "hello")
            m = await a.wait_for(lambda m: m.address == "/pong")
            assert m.args == (7, 2.5, "hello")
            await b.barrier(srv)
            assert [m.address for m in b.inbox] == ["/pong"]  # b's own barrier only
            a.close(), b.close()

    run(main())


def test_status_reply_has_the_documented_keys():
    async def main():
        async with serving() as (core, srv):
            c = await client()
            c.msg(srv, "/source/buoy/gain", -3)
            c.msg(srv, "/source/buoy/gain", "loud")
            c.send(srv, b"\x00\x00\x00\x00")
            c.msg(srv, "/status")
            m = await c.wait_for(lambda m: m.address == "/status")
            keys, values = m.args[::2], m.args[1::2]
            assert tuple(keys) == STATUS_KEYS
            st = dict(zip(keys, values))
            assert st["audio"] == "offline" and st["samplerate"] == 48000
            assert st["layout"] == "ring8" and st["sources"] == 4 and st["panic"] == 0
            assert st["osc_packets"] == 4 and st["osc_messages"] == 3
            assert st["osc_applied"] == 1 and st["osc_rejected"] == 1 and st["osc_malformed"] == 1
            assert st["rejected_detail"] == "bad_type=1" and st["malformed_detail"] == "bad_packet=1"
            assert st["osc_rate"] == 3.0  # three messages within the last second
            for k in ("xruns", "blocksize", "dsp_load", "uptime_s"):
                assert isinstance(st[k], (int, float))
            assert len(m.args) <= Limits().max_args  # our own decoder reads it
            c.close()

    run(main())


def test_status_replies_are_rate_limited():
    async def main():
        async with serving(status_replies_per_second=5.0) as (core, srv):
            c = await client()
            t0 = time.monotonic()
            for _ in range(20):
                c.msg(srv, "/status")
            await c.barrier(srv)
            refill = int((time.monotonic() - t0) * 5.0) + 1  # tokens that can come back meanwhile
            replies = [m for m in c.inbox if m.address == "/status"]
            assert 5 <= len(replies) <= 5 + refill and srv.stats()["status_limited"] == 20 - len(replies)
            c.close()

    run(main())


def test_panic_until_master_mute_zero():
    async def main():
        async with serving() as (core, srv):
            c = await client()
            c.msg(srv, "/master/panic")
            await c.barrier(srv)
            assert core.panicked is True
            c.msg(srv, "/master/panic", 0)  # a button's release: no effect
            c.msg(srv, "/master/panic", False)
            c.msg(srv, "/master/mute", 1)
            await c.barrier(srv)
            assert core.panicked is True
            c.msg(srv, "/master/mute", 0)
            await c.barrier(srv)
            assert core.panicked is False and core.state.master_mute is False
            for arg in (1, 127.0, True):
                c.msg(srv, "/master/panic", arg)
                await c.barrier(srv)
                assert core.panicked is True
                core.apply_message("/master/mute", [0], origin="web")  # every controller releases it
                assert core.panicked is False
            c.msg(srv, "/master/panic", "now")
            c.msg(srv, "/master/panic", float("nan"))
            c.msg(srv, "/master/panic", 1, 1)
            await c.barrier(srv)
            assert core.panicked is False
            assert srv.stats()["rejected"] == {"bad_type": 1, "not_finite": 1, "bad_arg_count": 1}
            c.close()

    run(main())


def test_layout_load_by_name_and_errors():
    async def main():
        async with serving() as (core, srv):
            c = await client()
            c.msg(srv, "/layout/load", "stereo")
            await c.barrier(srv)
            assert core.state.layout.name == "stereo"
            c.msg(srv, "/layout/load", "ring8.json")
            await c.barrier(srv)
            assert core.state.layout.name == "ring8"
            for bad in (("../shows/harbour",), ("nosuchlayout",), (3,), ()):
                c.msg(srv, "/layout/load", *bad)
            await c.barrier(srv)
            assert core.state.layout.name == "ring8"
            assert srv.stats()["rejected"] == {"out_of_range": 2, "bad_type": 1, "bad_arg_count": 1}
            c.close()

    run(main())


def test_a_layout_that_cannot_load_is_reported_and_the_old_one_kept(tmp_path):
    import json
    import shutil

    async def main():
        for name in ("ring8.json", "stereo.json"):
            shutil.copy(REPO / "configs" / "layouts" / name, tmp_path / name)
        (tmp_path / "broken.json").write_text(json.dumps({"format": "fieldmix-layout/1", "speakers": "none"}))
        core = LiveCore(load_show(SHOW), layouts_dir=tmp_path)
        srv = OscServer(core, udp_port=0, tcp=False)
        await srv.start()
        try:
            c = await client()
            c.msg(srv, "/subscribe")
            c.msg(srv, "/layout/load", "broken")
            m = await c.wait_for(lambda m: m.address == "/error")
            assert m.args[0] == "layout" and "broken.json" in m.args[1]
            assert core.state.layout.name == "ring8" and core.layout_error
            assert srv.stats()["rejected"] == {"bad_layout": 1}
            c.close()
        finally:
            await srv.stop()

    run(main())


def test_cue_addresses_reach_the_cue_list():
    """/cue/... goes to the live core's cue list (fieldmix.live.automation); the example show
    has no cue 7, so the desk's GO is refused and reported, and the state stays as it was."""
    async def main():
        async with serving() as (core, srv):
            c = await client()
            c.msg(srv, "/subscribe")
            c.msg(srv, "/cue/go", 7)
            m = await c.wait_for(lambda m: m.address == "/error")
            assert m.args[0] == "out_of_range" and "7" in m.args[1] and m.args[2] == "/cue/go"
            c.msg(srv, "/cue/fly")
            m = await c.wait_for(lambda m: m.address == "/error" and m.args[2] == "/cue/fly")
            assert m.args[0] == "unknown_address"
            c.close()

    run(main())


def test_server_output_addresses_coming_back_are_ignored_quietly():
    async def main():
        async with serving() as (core, srv):
            c = await client()
            c.msg(srv, "/subscribe")
            for a in ECHO_IGNORED:
                c.msg(srv, a, "x")
            await c.barrier(srv)
            await flushed(c, core)
            st = srv.stats()
            assert st["ignored"] == len(ECHO_IGNORED) and st["rejected_total"] == 0
            assert not [m for m in c.inbox if m.address == "/error"]
            c.close()

    run(main())


# ---------------------------------------------------------------------------- errors


def test_errors_are_counted_by_reason_and_reported_to_subscribers():
    async def main():
        async with serving() as (core, srv):
            watcher = await client()
            watcher.msg(srv, "/subscribe")
            await watcher.wait_for(lambda m: m.address == "/subscribed")
            before = core.state.target_matrix().copy()
            c = await client()
            cases = [
                (("/source/buoy/azimuth",), "bad_arg_count"),
                (("/source/buoy/azimuth", "left"), "bad_type"),
                (("/source/buoy/azimuth", float("nan")), "not_finite"),
                (("/source/buoy/gain", float("inf")), "not_finite"),
                (("/source/nobody/gain", 0.0), "unknown_source"),
                (("/source/9/gain", 0.0), "unknown_source"),
                (("/source/buoy/gain", 30.0), "out_of_range"),
                (("/source/buoy/mute", 2), "out_of_range"),
                (("/source/buoy/volume", 1.0), "unknown_address"),
                (("/subscribe", 70000), "out_of_range"),
                (("/subscribe", "port"), "bad_type"),
            ]
            for (address, *args), _ in cases:
                c.msg(srv, address, *args)
            c.send(srv, b"/bad")  # no NUL: bad_string
            c.send(srv, b"#bundle\x00" + b"\x00" * 7 + b"\x01" + struct.pack(">i", -4) + b"\x00" * 4)
            c.send(srv, b"xyz")  # length not a multiple of 4
            await c.barrier(srv)
            after = core.state.target_matrix()
            await flushed(watcher, core)
            want = {}
            for _, reason in cases:
                want[reason] = want.get(reason, 0) + 1
            st = srv.stats()
            assert st["rejected"] == want
            assert st["malformed"] == {"bad_string": 1, "bad_size": 1, "bad_packet": 1}
            assert {k: v for k, v in core.rejected.items()} == want  # the core counts them too
            reported = [m.args[0] for m in watcher.inbox if m.address == "/error"]
            assert sorted(reported) == sorted([r for _, r in cases] + ["malformed:bad_string", "malformed:bad_size", "malformed:bad_packet"])
            err = next(m for m in watcher.inbox if m.address == "/error" and m.args[0] == "unknown_source")
            assert err.args[2] == "/source/nobody/gain" and err.args[3] == "osc" and "nobody" in err.args[1]
            # nothing changed, nothing non-finite
            assert np.array_equal(before, after) and np.all(np.isfinite(after))
            assert st["internal_errors"] == 0
            c.close(), watcher.close()

    run(main())


def test_error_reports_to_subscribers_are_rate_limited():
    async def main():
        async with serving(error_reports_per_second=5.0) as (core, srv):
            w = await client()
            w.msg(srv, "/subscribe")
            await w.wait_for(lambda m: m.address == "/subscribed")
            t0 = time.monotonic()
            for _ in range(40):
                w.msg(srv, "/source/buoy/gain", "x")
            await w.barrier(srv)
            refill = int((time.monotonic() - t0) * 5.0) + 1
            await flushed(w, core)
            n = sum(1 for m in w.inbox if m.address == "/error")
            st = srv.stats()
            assert st["rejected"] == {"bad_type": 40}
            assert 5 <= n <= 5 + refill and st["errors_suppressed"] == 40 - n
            w.close()

    run(main())


# --------------------------------------------------------------------------- allow-list


def test_allow_list_refuses_other_networks():
    async def main():
        async with serving(allow=["10.0.0.0/8", "192.168.1.0/24"]) as (core, srv):
            c = await client()
            c.msg(srv, "/source/buoy/gain", -12)
            c.msg(srv, "/ping", "x")
            await asyncio.sleep(0.2)  # nothing comes back: wait a little, then look
            assert c.inbox == [] and src(core, "buoy").gain_db == 0.0
            st = srv.stats()
            assert st["not_allowed"] == 2 and st["messages"] == 0
            # TCP from a refused network is closed at once
            r, w = await asyncio.open_connection("127.0.0.1", srv.tcp_port)
            assert await asyncio.wait_for(r.read(), 3.0) == b""
            w.close()
            assert srv.stats()["not_allowed"] == 3
            c.close()
        async with serving(allow=["127.0.0.0/8"]) as (core, srv):
            c = await client()
            c.msg(srv, "/source/buoy/gain", -12)
            await c.barrier(srv)
            assert src(core, "buoy").gain_db == -12.0 and srv.stats()["not_allowed"] == 0
            c.close()

    run(main())


def test_bad_configuration_is_a_config_error():
    core = LiveCore(load_show(SHOW))
    with pytest.raises(ConfigError, match="allow-list entry 2"):
        OscServer(core, allow=["127.0.0.0/8", "not-a-net"])
    with pytest.raises(ConfigError, match="udp_port"):
        OscServer(core, udp_port=70000)
    with pytest.raises(ConfigError, match="subscriber_ttl"):
        OscServer(core, subscriber_ttl=float("nan"))

    async def main():
        async with serving() as (core2, srv):
            other = OscServer(core2, udp_port=srv.udp_port)
            with pytest.raises(ConfigError, match="cannot listen"):
                await other.start()

    run(main())


# ------------------------------------------------------------------------------- TCP


class TcpClient:
    def __init__(self, reader, writer):
        self.r, self.w = reader, writer
        self.dec = SlipDecoder()
        self.inbox: list[OscMessage] = []

    async def wait_for(self, pred, timeout=3.0):
        deadline = time.monotonic() + timeout
        while True:
            for m in self.inbox:
                if pred(m):
                    return m
            left = deadline - time.monotonic()
            if left <= 0:
                raise AssertionError("no matching TCP message in time")
            try:
                data = await asyncio.wait_for(self.r.read(65536), left)
            except asyncio.TimeoutError:
                continue
            if not data:
                raise AssertionError("connection closed")
            for frame in self.dec.feed(data):
                self.inbox.extend(m for _, m in decode_packet(frame))

    async def barrier(self, token="t"):
        self.w.write(slip_encode(encode_message("/ping", [token])))
        await self.w.drain()
        await self.wait_for(lambda m: m.address == "/pong" and m.args == (token,))
        self.inbox = [m for m in self.inbox if not (m.address == "/pong" and m.args == (token,))]


async def tcp_client(srv) -> TcpClient:
    r, w = await asyncio.open_connection("127.0.0.1", srv.tcp_port)
    return TcpClient(r, w)


def test_tcp_slip_frames_split_and_joined():
    from pythonosc.slip import encode as py_slip_encode  # independent SLIP encoder

    async def main():
        async with serving() as (core, srv):
            t = await tcp_client(srv)
            one = py_slip_encode(encode_message("/source/buoy/gain", [-4.0]))
            # a frame fed one byte at a time
            for i in range(len(one)):
                t.w.write(one[i:i + 1])
                await t.w.drain()
                await asyncio.sleep(0)
            # two frames in one write, then a frame split in the middle of an escape:
            # the value 0xC0 in the float forces END to be escaped (ESC ESC_END)
            x = struct.unpack(">f", b"\xc0\x00\x00\x00")[0]  # -2.0
            two = slip_encode(encode_message("/source/waves/gain", [-5.0])) + slip_encode(encode_message("/source/gulls/gain", [x]))
            esc = two.index(b"\xdb\xdc")
            t.w.write(two[:esc + 1])
            await t.w.drain()
            await asyncio.sleep(0.01)
            t.w.write(two[esc + 1:])
            # single-END framing works too
            t.w.write(b"\xc0" + encode_message("/source/engine/gain", [-12.0]) + b"\xc0")  # no byte to escape
            await t.barrier()
            assert [s.gain_db for s in core.state.sources] == [-4.0, -5.0, -12.0, -2.0]
            # a bundle over TCP, and /status as a SLIP frame
            t.w.write(slip_encode(encode_bundle(None, [OscMessage("/source/buoy/mute", (1,)), OscMessage("/status", ())])))
            m = await t.wait_for(lambda m: m.address == "/status")
            assert m.args[0] == "audio" and src(core, "buoy").mute
            assert srv.stats()["tcp_connections"] == 1
            t.w.close()
            await until(lambda: srv.stats()["tcp_connections"] == 0)

    run(main())


def test_tcp_junk_does_not_grow_memory_and_the_connection_is_closed():
    async def main():
        async with serving(limits=Limits(max_packet=4096)) as (core, srv):
            t = await tcp_client(srv)
            # an endless frame (no END): the decoder holds at most max_packet bytes
            chunk = b"\x01" * 65536
            for _ in range(16):
                t.w.write(chunk)
                await t.w.drain()
            await until(lambda: srv.stats()["packets"] == 0 and srv._conns)
            conn = next(iter(srv._conns))
            assert conn.decoder.buffered <= 4096
            # frames end, the connection still works
            t.w.write(b"\xc0")
            await t.barrier("ok")
            assert srv.stats()["malformed"].get("slip_oversize") == 1
            # a stream of bad frames: closed after a bounded number
            t.w.write(b"\xc0\x01\x02\x03\x04" * 200)
            try:  # closed: EOF, or a reset if our junk was still unread when the server closed
                assert await asyncio.wait_for(t.r.read(), 3.0) == b""
            except ConnectionResetError:
                pass
            assert srv.stats()["tcp_closed_junk"] == 1
            await until(lambda: srv.stats()["tcp_connections"] == 0)

    run(main())


def test_tcp_connection_count_is_bounded():
    async def main():
        async with serving(max_tcp_connections=2) as (core, srv):
            a, b = await tcp_client(srv), await tcp_client(srv)
            await a.barrier()
            await b.barrier()
            c = await tcp_client(srv)
            assert await asyncio.wait_for(c.r.read(), 3.0) == b""  # refused: closed at once
            assert srv.stats()["tcp_refused"] == 1
            await a.barrier("still")
            a.w.close(), b.w.close(), c.w.close()

    run(main())


def test_tcp_subscription_without_port_uses_the_connection():
    async def main():
        async with serving() as (core, srv):
            t = await tcp_client(srv)
            t.w.write(slip_encode(encode_message("/subscribe")))
            m = await t.wait_for(lambda m: m.address == "/subscribed")
            assert m.args == (0.0,)  # no lease: the connection lives as long as it is open
            core.apply_message("/source/engine/spread", [90.0], origin="web")
            m = await t.wait_for(lambda m: m.address == "/source/engine/spread" and m.args[0] == 90.0)
            assert srv.stats()["subscribers"] == 1
            t.w.close()
            await until(lambda: srv.stats()["subscribers"] == 0)
            assert srv.stats()["subscribers_dropped"] == {"closed": 1}

    run(main())


# ------------------------------------------------------------------------- subscribers


def test_subscriber_gets_the_state_then_moves_made_elsewhere():
    async def main():
        async with serving() as (core, srv):
            surface = await client()
            surface.msg(srv, "/subscribe")
            await surface.wait_for(lambda m: m.address == "/subscribed")
            # the full picture first
            await surface.wait_for(lambda m: m.address == "/layout/active" and m.args == ("ring8", "ring8"))
            m = await surface.wait_for(lambda m: m.address == "/source/buoy/azimuth")
            assert m.args[0] == pytest.approx(60.0)
            await surface.wait_for(lambda m: m.address == "/master/gain" and m.args == (-6.0,))
            for sid in IDS:
                for f in ("position", "azimuth", "elevation", "distance", "gain", "mute", "spread"):
                    await surface.wait_for(lambda m, a=f"/source/{sid}/{f}": m.address == a)
            surface.inbox.clear()
            # a move by another OSC sender
            other = await client()
            other.msg(srv, "/source/gulls/azimuth", 10)
            m = await surface.wait_for(lambda m: m.address == "/source/gulls/azimuth")
            assert m.args[0] == pytest.approx(10.0)
            pos = await surface.wait_for(lambda m: m.address == "/source/gulls/position")
            assert np.allclose(pos.args, src(core, "gulls").position, atol=1e-5)
            await flushed(surface, core)
            # only what changed is sent
            assert not [m for m in surface.inbox if m.address in ("/source/gulls/gain", "/source/buoy/azimuth")]
            # a move made through the core by another controller (the web page)
            core.apply_message("/source/buoy/gain", [-4.5], origin="web")
            m = await surface.wait_for(lambda m: m.address == "/source/buoy/gain")
            assert m.args == (-4.5,)
            core.apply_message("/master/mute", [1], origin="web")
            await surface.wait_for(lambda m: m.address == "/master/mute" and m.args == (1,))
            other.msg(srv, "/master/panic")
            await surface.wait_for(lambda m: m.address == "/master/panic" and m.args == (1,))
            other.msg(srv, "/layout/load", "stereo")
            await surface.wait_for(lambda m: m.address == "/layout/active" and m.args == ("stereo", "stereo"))
            # the values sent read back as the same state (a surface can echo them)
            surface.inbox.clear()
            surface.msg(srv, "/source/gulls/azimuth", 10.0)
            await surface.barrier(srv)
            await flushed(surface, core)
            assert not [m for m in surface.inbox if m.address.startswith("/source/")]
            surface.close(), other.close()

    run(main())


def test_subscribe_with_a_port_sends_there():
    async def main():
        async with serving() as (core, srv):
            sender = await client()
            listener = await client()
            sender.msg(srv, "/subscribe", listener.port)
            await listener.wait_for(lambda m: m.address == "/subscribed" and m.args == (60.0,))
            sender.msg(srv, "/source/waves/spread", 200.0)
            await listener.wait_for(lambda m: m.address == "/source/waves/spread" and m.args == (200.0,))
            assert srv.subscribers()[0]["port"] == listener.port
            # renewing does not add a second subscription
            sender.msg(srv, "/subscribe", float(listener.port))
            await sender.barrier(srv)
            assert srv.stats()["subscribers"] == 1
            sender.msg(srv, "/unsubscribe", listener.port)
            await sender.barrier(srv)
            assert srv.stats()["subscribers"] == 0 and srv.stats()["subscribers_dropped"] == {"unsubscribed": 1}
            sender.close(), listener.close()

    run(main())


def test_updates_are_coalesced_per_source_keeping_the_latest():
    async def main():
        async with serving(coalesce_interval=0.05) as (core, srv):
            surface = await client()
            surface.msg(srv, "/subscribe")
            await surface.wait_for(lambda m: m.address == "/source/gulls/spread")  # end of the dump
            await surface.barrier(srv)
            surface.inbox.clear()
            # 50 moves in one bundle are applied in one go: one update, the last value
            moves = [OscMessage("/source/buoy/azimuth", (float(k),)) for k in range(50)]
            other = await client()
            other.send(srv, encode_bundle(None, moves))
            await surface.wait_for(lambda m: m.address == "/source/buoy/azimuth")
            await flushed(surface, core)  # nothing else was queued
            az = [m.args[0] for m in surface.inbox if m.address == "/source/buoy/azimuth"]
            assert az == [pytest.approx(49.0)]
            # 30 separate packets within well under one period: far fewer updates, the last one last
            surface.inbox.clear()
            for k in range(30):
                other.msg(srv, "/source/buoy/azimuth", float(100 + k))
            await other.barrier(srv)
            await surface.wait_for(lambda m: m.address == "/source/buoy/azimuth" and m.args[0] == pytest.approx(129.0))
            az = [m.args[0] for m in surface.inbox if m.address == "/source/buoy/azimuth"]
            assert len(az) < 30 and az[-1] == pytest.approx(129.0)
            surface.close(), other.close()

    run(main())


def test_dead_subscriber_is_dropped_after_a_bounded_number_of_errors():
    async def main():
        async with serving(max_send_errors=3) as (core, srv):
            sender = await client()
            dead = await client()
            port = dead.port
            sender.msg(srv, "/subscribe", port)
            await dead.wait_for(lambda m: m.address == "/subscribed")
            dead.close()  # the surface goes away; the port now answers with ICMP port unreachable
            await asyncio.sleep(0.01)
            moves = 0
            while srv.stats()["subscribers"] and moves < 20:
                sender.msg(srv, "/source/buoy/gain", -float(moves % 10))
                await sender.barrier(srv)
                await asyncio.sleep(0.03)  # one coalescing period: each move is sent
                moves += 1
            st = srv.stats()
            assert st["subscribers"] == 0, "a dead subscriber is still served"
            assert st["subscribers_dropped"] == {"errors": 1}
            assert st["send_errors"] >= 3
            assert moves <= 6  # bound: 3 errors, one per refused datagram (every other send)
            # the server goes on
            await sender.barrier(srv, "alive")
            sender.close()

    run(main())


def test_subscription_lease_expires_unless_renewed():
    async def main():
        async with serving(subscriber_ttl=0.6) as (core, srv):
            renewing, lapsing = await client(), await client()
            renewing.msg(srv, "/subscribe")
            lapsing.msg(srv, "/subscribe")
            await renewing.barrier(srv)
            assert srv.stats()["subscribers"] == 2
            t_end = time.monotonic() + 1.5  # beyond the lapsing one's lease and a housekeeping round
            while time.monotonic() < t_end:
                renewing.msg(srv, "/subscribe")
                await asyncio.sleep(0.1)
            await renewing.barrier(srv)
            subs = srv.subscribers()
            assert [s["port"] for s in subs] == [renewing.port]
            assert srv.stats()["subscribers_dropped"] == {"expired": 1}
            renewing.close(), lapsing.close()

    run(main())


def test_subscriber_count_is_bounded():
    async def main():
        async with serving(max_subscribers=2) as (core, srv):
            cs = [await client() for _ in range(3)]
            for c in cs:
                c.msg(srv, "/subscribe")
                await c.barrier(srv)
            assert srv.stats()["subscribers"] == 2
            assert srv.stats()["rejected"] == {"out_of_range": 1}
            assert not [m for m in cs[2].inbox if m.address == "/subscribed"]
            for c in cs:
                c.close()

    run(main())


# ---------------------------------------------------------------------- receive path


def test_receive_path_does_not_use_python_osc():
    """python-osc's dispatcher sleeps in the event loop on a future time tag and its parser
    loops on lying sizes (docs/osc-wire.md): nothing on our receive path imports it."""
    for rel in ("server/fieldmix/live/osc.py", "server/fieldmix/oscwire.py", "server/fieldmix/live/core.py"):
        tree = ast.parse((REPO / rel).read_text(encoding="utf-8"))
        names = []
        for node in ast.walk(tree):
            if isinstance(node, ast.Import):
                names += [a.name for a in node.names]
            elif isinstance(node, ast.ImportFrom):
                names.append(node.module or "")
        assert not [n for n in names if n.split(".")[0] == "pythonosc"], rel
        assert "pythonosc" not in (REPO / rel).read_text(encoding="utf-8").replace("python-osc", ""), rel


def test_a_hostile_bundle_does_not_stop_the_server():
    """Lying sizes (python-osc loops forever on -4), deep nesting and odd time tags."""
    lying = b"#bundle\x00" + struct.pack(">Q", 1) + struct.pack(">i", -4) + b"\x00" * 4
    deep = encode_message("/source/buoy/gain", [-1.0])
    for _ in range(40):
        deep = encode_bundle(None, [deep])
    huge_time = encode_bundle(TimeTag((1 << 64) - 1), [OscMessage("/source/buoy/gain", (-2.0,))])

    async def main():
        async with serving() as (core, srv):
            c = await client()
            for p in (lying, deep, huge_time, b"#bundle\x00", b"/" + b"\xff" * 3):
                c.send(srv, p)
            await c.barrier(srv)
            st = srv.stats()
            assert st["malformed"] == {"bad_size": 1, "too_deep": 1, "far_future": 1, "truncated": 1, "bad_string": 1}
            assert st["internal_errors"] == 0 and src(core, "buoy").gain_db == 0.0
            c.close()

    run(main())


def test_the_command_line_sender(capsys):
    from fieldmix.live import osc as oscmod

    async def main():
        async with serving() as (core, srv):
            loop = asyncio.get_running_loop()
            rc = await loop.run_in_executor(None, oscmod._cli, ["send", "--port", str(srv.udp_port), "/source/buoy/gain", "-9"])
            assert rc == 0
            rc = await loop.run_in_executor(None, oscmod._cli, ["send", "--port", str(srv.tcp_port), "--tcp", "/source/buoy/mute", "true"])
            assert rc == 0
            rc = await loop.run_in_executor(None, oscmod._cli, ["send", "--port", str(srv.udp_port), "--wait", "2", "/ping", "42"])
            assert rc == 0
            await until(lambda: src(core, "buoy").mute)
            assert src(core, "buoy").gain_db == -9.0

    run(main())
    assert "/pong 42" in capsys.readouterr().out


def test_a_surface_answering_to_the_update_port_is_heard():
    """Updates come from the subscriber's own socket; what the surface sends back to it is handled."""

    async def main():
        async with serving() as (core, srv):
            loop = asyncio.get_running_loop()
            got = []

            class Surface(asyncio.DatagramProtocol):
                def connection_made(self, transport):
                    self.t = transport

                def datagram_received(self, data, addr):
                    got.append(addr)
                    for _, m in decode_packet(data):
                        if m.address == "/subscribed":
                            self.t.sendto(encode_message("/source/waves/gain", [-8.0]), addr)  # answer the sender

            t, _ = await loop.create_datagram_endpoint(Surface, local_addr=("127.0.0.1", 0))
            t.sendto(encode_message("/subscribe"), ("127.0.0.1", srv.udp_port))
            await until(lambda: src(core, "waves").gain_db == -8.0)
            assert got[0][1] != srv.udp_port  # the subscriber's own socket
            assert srv.stats()["subscribers"] == 1
            t.close()

    run(main())


def test_docs_cover_every_address_key_and_counter():
    text = (REPO / "docs" / "osc.md").read_text(encoding="utf-8")
    for template in ADDRESSES:
        assert f"`{template}`" in text, template
    for a in SERVER_ADDRESSES + ECHO_IGNORED:
        assert f"`{a}`" in text, a
    for k in STATUS_KEYS:
        assert f"`{k}`" in text, k
    core = LiveCore(load_show(SHOW))
    for k in OscServer(core, udp_port=0).stats():
        assert f"`{k}`" in text, k
    for reason in ControlError.REASONS:
        assert f"`{reason}`" in text, reason


def test_a_large_update_is_spread_over_flushes_and_arrives_complete():
    """With a burst budget of 8 datagrams per flush, the 33-message picture still arrives whole."""

    async def main():
        async with serving(max_burst=8) as (core, srv):
            surface = await client()
            surface.msg(srv, "/subscribe")
            for sid in IDS:
                for f in ("position", "azimuth", "elevation", "distance", "gain", "mute", "spread"):
                    await surface.wait_for(lambda m, a=f"/source/{sid}/{f}": m.address == a)
            await flushed(surface, core)
            addresses = [m.address for m in surface.inbox if m.address.startswith("/source/")]
            assert len(addresses) == len(set(addresses)) == 4 * len(SOURCE_OUTPUT)  # each once, nothing lost or doubled
            surface.close()

    run(main())
