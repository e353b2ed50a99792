"""The live daemon's OSC server: UDP and TCP (SLIP, OSC 1.1) endpoints over LiveCore.

Every packet is treated as hostile. The receive path is ours from the socket to
the core: asyncio endpoints, :func:`fieldmix.oscwire.decode_packet` (bounded work,
no recursion, one exception type), our own address-pattern matcher (through
``LiveCore.apply_message``), and loop timers for bundles due in the future. It
does not import python-osc at all: python-osc's parser can loop or recurse on
crafted bundles and its dispatcher sleeps in the event loop on a future time tag
(docs/osc-wire.md). ``tests/test_osc_server.py`` checks that this module imports
no python-osc.

Per packet: size check, allow-list check, decode, then each message is either
applied now or held in a bounded schedule until its time tag. Each message goes
to a server address handled here (``/ping``, ``/status``, ``/subscribe``,
``/unsubscribe``, ``/layout/load``, ``/master/panic``, matched literally) or to
``core.apply_message(address, args, origin="osc")`` (the control grammar, with
OSC 1.0 wildcards). Errors are counted by reason, logged at a bounded rate and
sent to subscribers as ``/error <reason> <message> <address> <origin>``.

Subscribers get every state change as OSC (the addresses a controller sends),
coalesced to one update per source per ``coalesce_interval`` and diffed against
what that subscriber was last sent. User documentation: docs/osc.md.

``python -m fieldmix.live.osc send|watch ...`` is a small command-line client.
"""

from __future__ import annotations

import argparse
import asyncio
import bisect
import heapq
import ipaddress
import itertools
import logging
import math
import numbers
import socket
import sys
import time
from collections import Counter, deque
from functools import lru_cache
from typing import Optional, Sequence

from ..control import ADDRESSES
from ..errors import ConfigError, ControlError
from ..oscwire import (
    IMPULSE,
    Limits,
    OscDecodeError,
    OscEncodeError,
    OscMessage,
    SlipDecoder,
    decode_packet,
    encode_bundle,
    encode_message,
    match_segment,
    slip_encode,
)
from .core import LiveCore, RateLimitedLog
from .ratelimit import TokenBucket

__all__ = ["OscServer", "SERVER_ADDRESSES", "ECHO_IGNORED", "SOURCE_OUTPUT", "MASTER_OUTPUT", "STATUS_KEYS"]

log = logging.getLogger("fieldmix.osc")

#: Addresses the OSC server handles itself (matched literally: a wildcard never
#: triggers panic, loads a layout or changes a subscription).
SERVER_ADDRESSES = (
    "/ping",
    "/status",
    "/subscribe",
    "/unsubscribe",
    "/layout/load",
    "/master/panic",
)

#: Addresses only the server sends. Arriving, they are ignored without an error, so a
#: surface that echoes what it receives cannot start an error storm.
ECHO_IGNORED = ("/pong", "/error", "/subscribed", "/layout/active")

#: What a subscriber is sent for a source (``<id>`` is the source id), in this order.
SOURCE_OUTPUT = ("position", "azimuth", "elevation", "distance", "gain", "mute", "solo", "spread")
#: ... and for the master.
MASTER_OUTPUT = ("gain", "mute", "panic")

#: Keys of the ``/status`` reply, in order (each followed by its value).
STATUS_KEYS = (
    "audio", "backend", "samplerate", "blocksize", "xruns", "callbacks_missed",
    "dsp_load", "dsp_load_max", "layout", "layout_error", "panic", "master_gain_db",
    "master_mute", "sources", "osc_packets", "osc_messages", "osc_applied",
    "osc_rejected", "osc_malformed", "osc_not_allowed", "osc_dropped_schedule",
    "osc_pending", "osc_rate", "subscribers", "tcp_connections", "applied_total",
    "rejected_total", "last_error", "uptime_s", "rejected_detail", "malformed_detail",
)

_SCHEDULE_SLACK = 0.0005  # s: a held message due within this is applied in the same timer run
_MAX_STR = 200  # characters of an address or message quoted in an /error report
_TCP_JUNK_LIMIT = 32  # consecutive bad frames after which a TCP connection is closed
_ERROR_QUEUE = 16  # /error reports held per subscriber between two flushes


# --------------------------------------------------------------------------- helpers


class _RateMeter:
    """Events over the last second, in ten 100 ms slots (the current one included)."""

    SLOTS = 10
    SLOT = 0.1

    def __init__(self):
        self.counts = [0] * self.SLOTS
        self.last = int(time.monotonic() / self.SLOT)

    def _advance(self, k: int) -> None:
        if k <= self.last:
            return
        if k - self.last >= self.SLOTS:
            self.counts = [0] * self.SLOTS
        else:
            for j in range(self.last + 1, k + 1):
                self.counts[j % self.SLOTS] = 0
        self.last = k

    def add(self, n: int, now: float) -> None:
        k = int(now / self.SLOT)
        self._advance(k)
        self.counts[k % self.SLOTS] += n

    def rate(self) -> float:
        self._advance(int(time.monotonic() / self.SLOT))
        return float(sum(self.counts))


def _clip(text: str, n: int = _MAX_STR) -> str:
    text = str(text).replace("\x00", "\\0")
    return text if len(text) <= n else text[: n - 3] + "..."


_LAST_PARTS = tuple(dict.fromkeys(spec.parts[-1] for spec in ADDRESSES.values()))
_FLAG_PARTS = frozenset(spec.parts[-1] for spec in ADDRESSES.values() if spec.kind == "flag")


@lru_cache(maxsize=256)
def _flag_only(address: str) -> bool:
    """Does the pattern's last part select only on/off parameters (``mute``)? Then T/F mean 1/0."""
    last = address.rsplit("/", 1)[-1]
    try:
        hits = match_segment(last, _LAST_PARTS)
    except OscDecodeError:
        return False
    return bool(hits) and all(_LAST_PARTS[i] in _FLAG_PARTS for i in hits)


def _one_number(v, address: str, what: str) -> float:
    """A finite int or float (not a bool); ControlError otherwise."""
    if isinstance(v, bool) or not isinstance(v, numbers.Real):
        raise ControlError("bad_type", f"{_clip(address, 80)}: expected a number for <{what}>, got {_kind(v)}")
    try:
        f = float(v)
    except OverflowError:
        raise ControlError("out_of_range", f"{_clip(address, 80)}: <{what}> is far out of range") from None
    if not math.isfinite(f):
        raise ControlError("not_finite", f"{_clip(address, 80)}: {f!r} is not a finite number")
    return f


def _kind(v) -> str:
    if isinstance(v, bool):
        return "true/false"
    if isinstance(v, str):
        return f'"{_clip(v, 30)}"'
    if v is None:
        return "nil"
    if v is IMPULSE:
        return "an impulse"
    if isinstance(v, (bytes, bytearray)):
        return "a blob"
    return type(v).__name__


def _status_value(v):
    """A /status value as an OSC-friendly scalar: int, float or str (bools as 0/1)."""
    if v is None:
        return ""
    if isinstance(v, bool):
        return int(v)
    if isinstance(v, numbers.Integral):
        return int(v)
    if isinstance(v, numbers.Real):
        f = float(v)
        return f if math.isfinite(f) else str(f)
    return _clip(v)


def _detail(counts: dict) -> str:
    return ",".join(f"{k}={v}" for k, v in sorted(counts.items()))


# --------------------------------------------------------------------------- peers


class _Peer:
    """Where a message came from and how to answer it (UDP address or TCP connection)."""

    __slots__ = ("addr", "host", "port", "conn")

    def __init__(self, addr, conn=None):
        self.addr = addr
        self.host = addr[0]
        self.port = addr[1]
        self.conn = conn

    def __repr__(self) -> str:
        return f"{self.host}:{self.port}" + (" (tcp)" if self.conn is not None else "")


class _Subscriber:
    """One subscription: a UDP address (own connected socket) or a TCP connection."""

    def __init__(self, server: "OscServer", key, host: str, port: int, conn=None):
        self.server = server
        self.key = key
        self.host = host
        self.port = port
        self.conn = conn
        self.sock: Optional[socket.socket] = None
        self.expires = math.inf
        self.errors = 0  # send errors since the last /subscribe
        self.sent: dict = {}  # (what, index, field) -> value last sent
        self.dirty_sources: set = set()
        self.dirty_master = False
        self.dirty_layout = False
        self.notices: deque = deque(maxlen=_ERROR_QUEUE)  # encoded /error and /subscribed packets
        self.reading = False
        self.cursor = 0  # the source index the next flush starts from

    def __repr__(self) -> str:
        return f"{self.host}:{self.port}" + (" (tcp)" if self.conn is not None else "")

    def open_udp(self, bind_host: Optional[str]) -> None:
        fam = socket.AF_INET6 if ":" in self.host else socket.AF_INET
        s = socket.socket(fam, socket.SOCK_DGRAM)
        try:
            s.setblocking(False)
            if bind_host:
                s.bind((bind_host, 0))
            s.connect((self.host, self.port))  # UDP connect: no traffic, errors come back to us
        except OSError:
            s.close()
            raise
        self.sock = s
        loop = self.server._loop
        try:  # read it: ICMP errors are seen at once, and surfaces that answer to our port work
            loop.add_reader(s.fileno(), self._readable)
            self.reading = True
        except (NotImplementedError, AttributeError):  # pragma: no cover - non-selector loops
            self.reading = False

    def _readable(self) -> None:
        srv = self.server
        for _ in range(64):  # bounded work per wake-up
            try:
                data = self.sock.recv(65536)
            except BlockingIOError:
                return
            except OSError as exc:  # ConnectionRefused (ICMP port unreachable) and the like
                srv._send_error(self, exc)
                return
            srv._on_datagram(data, (self.host, self.port))
            if self.sock is None:  # dropped meanwhile
                return

    def send(self, packet: bytes) -> bool:
        srv = self.server
        if self.conn is not None:
            if self.conn.send(packet):
                return True
            srv._send_error(self, None)
            return False
        if self.sock is None:
            return False
        try:
            self.sock.send(packet)
            return True
        except BlockingIOError:  # our socket buffer is full: drop this datagram, never wait
            srv.send_dropped += 1
            return True
        except OSError as exc:
            srv._send_error(self, exc)
            return False

    def close(self) -> None:
        if self.sock is not None:
            if self.reading:
                try:
                    self.server._loop.remove_reader(self.sock.fileno())
                except Exception:  # pragma: no cover - loop already closed
                    pass
            self.sock.close()
            self.sock = None
        if self.conn is not None and self.conn.sub is self:
            self.conn.sub = None


class _UdpEndpoint:
    """The listening UDP socket, read straight from the loop's selector.

    asyncio's datagram transport reads one datagram per wake-up of the loop, and a
    wake-up costs more than decoding a small OSC packet. Here each readiness event
    drains up to ``batch`` datagrams (bounded, so a flood cannot starve the loop's
    other work), and after a wake-up that found traffic the socket rests for
    ``rest_s`` (1 ms) before it is watched again, so that under a stream of packets
    each wake-up finds several (the kernel buffers them; SO_RCVBUF is raised for
    bursts). The first datagram after a quiet spell is handled at once. Replies go out
    with a non-blocking ``sendto``; one the kernel cannot take at once is dropped and
    counted (UDP promises no more).
    """

    def __init__(self, server: "OscServer", sock: socket.socket, loop: asyncio.AbstractEventLoop,
                 batch: int = 64, rest_s: float = 0.001):  # fmt: skip
        self.server = server
        self.sock = sock
        self.loop = loop
        self.batch = batch
        self.rest_s = rest_s
        self.closed = False
        self._fd = sock.fileno()
        self._resting: Optional[asyncio.TimerHandle] = None
        loop.add_reader(self._fd, self._readable)

    def _readable(self) -> None:
        if self._drain() and not self.closed and self.rest_s > 0:
            self.loop.remove_reader(self._fd)
            self._resting = self.loop.call_later(self.rest_s, self._wake)

    def _wake(self) -> None:
        self._resting = None
        if self.closed:
            return
        self.loop.add_reader(self._fd, self._readable)
        self._readable()

    def _drain(self) -> int:
        recv = self.sock.recvfrom
        size = self.server.limits.max_packet + 1  # one more byte: an oversized packet is seen as such
        handle = self.server._on_datagram
        n = 0
        for _ in range(self.batch):
            try:
                data, addr = recv(size)
            except (BlockingIOError, InterruptedError):
                break
            except OSError:  # an ICMP error queued on the socket: count it, keep reading
                self.server.send_errors += 1
                continue
            n += 1
            handle(data, addr)
            if self.closed:
                break
        return n

    def sockname(self):
        return self.sock.getsockname()

    def sendto(self, packet: bytes, addr) -> bool:
        if self.closed:
            return False
        try:
            self.sock.sendto(packet, addr)
            return True
        except (BlockingIOError, InterruptedError):
            self.server.send_dropped += 1
        except OSError:
            self.server.send_errors += 1
        return False

    def close(self) -> None:
        if self.closed:
            return
        self.closed = True
        if self._resting is not None:
            self._resting.cancel()
            self._resting = None
        try:
            self.loop.remove_reader(self._fd)
        except (ValueError, OSError):  # pragma: no cover - already gone
            pass
        self.sock.close()


class _TcpConnection(asyncio.Protocol):
    """One TCP connection: SLIP frames in (bounded decoder), SLIP frames out."""

    def __init__(self, server: "OscServer"):
        self.server = server
        self.transport: Optional[asyncio.Transport] = None
        self.decoder = SlipDecoder(max_frame=server.limits.max_packet)
        self.peer: Optional[tuple] = None
        self.paused = False
        self.sub: Optional[_Subscriber] = None
        self.junk = 0  # consecutive bad frames
        self._seen = (0, 0)
        self.accepted = False

    def connection_made(self, transport) -> None:
        srv = self.server
        self.transport = transport
        peer = transport.get_extra_info("peername") or ("?", 0)
        self.peer = tuple(peer[:2])
        if not srv._allowed(self.peer[0]):
            srv.not_allowed += 1
            srv._ratelog.warning(f"osc: refused a TCP connection from {self.peer[0]} (not in the allow-list)")
            transport.abort()
            return
        if len(srv._conns) >= srv.max_tcp_connections:
            srv.tcp_refused += 1
            srv._ratelog.warning(f"osc: refused a TCP connection from {self.peer[0]}: {srv.max_tcp_connections} open")
            transport.abort()
            return
        transport.set_write_buffer_limits(high=srv.max_tcp_buffer)
        srv._conns.add(self)
        self.accepted = True

    def data_received(self, data: bytes) -> None:
        srv = self.server
        if not self.accepted or srv._closed:
            return
        try:
            frames = self.decoder.feed(data)
            d = self.decoder
            over = d.dropped_oversize - self._seen[0]
            bad = d.dropped_bad_escape - self._seen[1]
            self._seen = (d.dropped_oversize, d.dropped_bad_escape)
            if over:
                srv.malformed["slip_oversize"] += over
                srv._ratelog.warning(f"osc: dropped {over} SLIP frame(s) over {d.max_frame} bytes from {self.peer[0]}")
            if bad:
                srv.malformed["slip_bad_escape"] += bad
                srv._ratelog.warning(f"osc: dropped {bad} SLIP frame(s) with a bad escape from {self.peer[0]}")
            self.junk += over + bad
            for frame in frames:
                if srv._packet(frame, _Peer(self.peer, self)):
                    self.junk = 0
                else:
                    self.junk += 1
            if self.junk >= _TCP_JUNK_LIMIT and self.transport is not None:
                srv.tcp_closed_junk += 1
                srv._ratelog.warning(f"osc: closed the TCP connection from {self.peer[0]}: {self.junk} bad frames in a row")
                self.transport.abort()
        except Exception:  # a bug must never stop the server
            srv._internal_error("TCP data")

    def connection_lost(self, exc) -> None:
        srv = self.server
        srv._conns.discard(self)
        if self.sub is not None:
            srv._drop(self.sub, "closed")
        self.transport = None

    def pause_writing(self) -> None:  # the peer does not read what we send
        self.paused = True

    def resume_writing(self) -> None:
        self.paused = False

    def send(self, packet: bytes) -> bool:
        t = self.transport
        if t is None or t.is_closing():
            return False
        if self.paused:
            self.server.send_dropped += 1
            return False
        t.write(slip_encode(packet))
        return True


# --------------------------------------------------------------------------- server


class OscServer:
    """OSC over UDP and TCP (SLIP) for one :class:`~fieldmix.live.core.LiveCore`.

    ``tcp_port=None`` means the same number as ``udp_port`` (for port 0 each gets
    its own ephemeral port); ``tcp=False`` opens no TCP listener. ``allow`` is a
    list of sender networks in CIDR notation (``None``: everyone who can reach the
    socket). Call ``await start()`` and ``await stop()`` from the event loop that
    runs the core.
    """

    def __init__(
        self,
        core: LiveCore,
        host: str = "127.0.0.1",
        udp_port: int = 9000,
        tcp_port: Optional[int] = None,
        allow: Optional[Sequence[str]] = None,
        limits: Limits = Limits(),
        *,
        tcp: bool = True,
        max_pending: int = 1024,
        max_subscribers: int = 32,
        subscriber_ttl: float = 60.0,
        max_send_errors: int = 3,
        coalesce_interval: float = 0.015,
        max_burst: int = 64,
        max_tcp_connections: int = 16,
        max_tcp_buffer: int = 256 * 1024,
        error_reports_per_second: float = 20.0,
        status_replies_per_second: float = 20.0,
    ):
        self.core = core
        self.host = host
        self._want_udp = self._port(udp_port, "udp_port")
        self._want_tcp = self._want_udp if tcp_port is None else self._port(tcp_port, "tcp_port")
        self.tcp_enabled = bool(tcp)
        self.limits = limits
        self._allow = self._parse_allow(allow)
        self._allow_cache: dict = {}
        for name, v, lo in (
            ("max_pending", max_pending, 0),
            ("max_subscribers", max_subscribers, 0),
            ("max_send_errors", max_send_errors, 1),
            ("max_burst", max_burst, 8),
            ("max_tcp_connections", max_tcp_connections, 0),
            ("max_tcp_buffer", max_tcp_buffer, 1024),
        ):
            if not isinstance(v, int) or isinstance(v, bool) or v < lo:
                raise ConfigError(f"OSC server {name}", f"must be an integer >= {lo}, got {v!r}")
        for name, v in (
            ("subscriber_ttl", subscriber_ttl),
            ("coalesce_interval", coalesce_interval),
            ("error_reports_per_second", error_reports_per_second),
            ("status_replies_per_second", status_replies_per_second),
        ):
            if isinstance(v, bool) or not isinstance(v, numbers.Real) or not (math.isfinite(v) and v > 0):
                raise ConfigError(f"OSC server {name}", f"must be a finite number > 0, got {v!r}")
        self.max_pending = max_pending
        self.max_subscribers = max_subscribers
        self.subscriber_ttl = float(subscriber_ttl)
        self.max_send_errors = max_send_errors
        self.coalesce_interval = float(coalesce_interval)
        self.max_burst = max_burst
        self.max_tcp_connections = max_tcp_connections
        self.max_tcp_buffer = max_tcp_buffer

        self.udp_port: Optional[int] = None
        self.tcp_port: Optional[int] = None
        self._loop: Optional[asyncio.AbstractEventLoop] = None
        self._udp: Optional[_UdpEndpoint] = None
        self._tcp_server: Optional[asyncio.AbstractServer] = None
        self._bind_host: Optional[str] = None
        self._conns: set = set()
        self._closed = True

        # schedule of messages with a future time tag: heap of (due unix s, seq, message, peer)
        self._pending: list = []
        self._seq = itertools.count()
        self._timer: Optional[asyncio.TimerHandle] = None
        self._timer_due: Optional[float] = None

        # subscribers
        self._subs: dict = {}
        self._flush_handle: Optional[asyncio.Handle] = None
        self._last_flush = 0.0
        self._house: Optional[asyncio.TimerHandle] = None
        self._source_index = {sid: i for i, sid in enumerate(core.state.source_ids)}

        # counters
        self.packets = 0
        self.messages = 0
        self.applied = 0
        self.rejected: Counter = Counter()
        self.malformed: Counter = Counter()
        self.not_allowed = 0
        self.dropped_schedule = 0
        self.send_errors = 0
        self.send_dropped = 0
        self.errors_suppressed = 0
        self.status_limited = 0
        self.internal_errors = 0
        self.tcp_refused = 0
        self.tcp_closed_junk = 0
        self.subscribers_dropped: Counter = Counter()
        self._rate = _RateMeter()
        self._err_bucket = TokenBucket(error_reports_per_second, max(1.0, error_reports_per_second))
        self._status_bucket = TokenBucket(status_replies_per_second, max(1.0, status_replies_per_second))
        self._ratelog = RateLimitedLog(log)
        self._trace_next = 0.0
        self.ignored = 0
        self.mapped = 0  # messages taken by a sensor mapping

        self._handlers = {
            "/ping": self._h_ping,
            "/status": self._h_status,
            "/subscribe": self._h_subscribe,
            "/unsubscribe": self._h_unsubscribe,
            "/layout/load": self._h_layout_load,
            "/master/panic": self._h_panic,
        }
        for a in ECHO_IGNORED:
            self._handlers[a] = self._h_ignore

    # ------------------------------------------------------------ config checks
    @staticmethod
    def _port(v, name: str) -> int:
        if isinstance(v, bool) or not isinstance(v, int) or not 0 <= v <= 65535:
            raise ConfigError(f"OSC {name}", f"must be a port number 0..65535, got {v!r}")
        return v

    @staticmethod
    def _parse_allow(allow) -> Optional[list]:
        if allow is None:
            return None
        if isinstance(allow, str):
            allow = [a for a in allow.replace(",", " ").split() if a]
        nets = []
        for i, text in enumerate(allow):
            try:
                nets.append(ipaddress.ip_network(str(text).strip(), strict=False))
            except ValueError as exc:
                raise ConfigError(f"OSC allow-list entry {i + 1}", f'"{_clip(text, 60)}" is not a network: {exc}') from None
        return nets

    def _allowed(self, host: str) -> bool:
        if self._allow is None:
            return True
        ok = self._allow_cache.get(host)
        if ok is None:
            try:
                ip = ipaddress.ip_address(str(host).split("%", 1)[0])
                if ip.version == 6 and ip.ipv4_mapped is not None:
                    ip = ip.ipv4_mapped
                ok = any(ip.version == net.version and ip in net for net in self._allow)
            except ValueError:
                ok = False
            if len(self._allow_cache) >= 4096:
                self._allow_cache.clear()
            self._allow_cache[host] = ok
        return ok

    # --------------------------------------------------------------- lifecycle
    async def start(self) -> None:
        if not self._closed:
            return
        loop = asyncio.get_running_loop()
        self._loop = loop
        where = f"OSC UDP {self.host}:{self._want_udp}"
        try:
            infos = await loop.getaddrinfo(self.host, self._want_udp, type=socket.SOCK_DGRAM, flags=socket.AI_PASSIVE)
            fam, _, _, _, sockaddr = infos[0]
            sock = socket.socket(fam, socket.SOCK_DGRAM)
            try:
                try:  # room for bursts (best effort: the kernel caps it)
                    sock.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, 1 << 20)
                except OSError:
                    pass
                sock.bind(sockaddr)
                sock.setblocking(False)
            except OSError:
                sock.close()
                raise
            self._udp = _UdpEndpoint(self, sock, loop)
        except OSError as exc:
            raise ConfigError(where, f"cannot listen: {exc.strerror or exc}") from None
        bound = self._udp.sockname()
        self.udp_port = bound[1]
        self._bind_host = None if bound[0] in ("0.0.0.0", "::") else bound[0]
        if self.tcp_enabled:
            try:
                self._tcp_server = await loop.create_server(lambda: _TcpConnection(self), self.host, self._want_tcp)
            except OSError as exc:
                self._udp.close()
                self._udp = None
                raise ConfigError(f"OSC TCP {self.host}:{self._want_tcp}", f"cannot listen: {exc.strerror or exc}") from None
            self.tcp_port = self._tcp_server.sockets[0].getsockname()[1]
        self._closed = False
        self.core.add_listener(self._on_event)
        self._house = loop.call_later(self._house_interval, self._housekeeping)
        log.info(
            "OSC listening on %s udp %d%s", self.host, self.udp_port,
            f", tcp {self.tcp_port} (SLIP)" if self.tcp_port else "",
        )

    async def stop(self) -> None:
        if self._closed:
            return
        self._closed = True
        self.core.remove_listener(self._on_event)
        for h in (self._timer, self._flush_handle, self._house):
            if h is not None:
                h.cancel()
        self._timer = self._flush_handle = self._house = None
        self._pending.clear()
        for sub in list(self._subs.values()):
            sub.close()
        self._subs.clear()
        if self._udp is not None:
            self._udp.close()
            self._udp = None
        for conn in list(self._conns):
            if conn.transport is not None:
                conn.transport.abort()
        self._conns.clear()
        if self._tcp_server is not None:
            self._tcp_server.close()
            try:
                await asyncio.wait_for(self._tcp_server.wait_closed(), 2.0)
            except asyncio.TimeoutError:  # pragma: no cover
                pass
            self._tcp_server = None
        await asyncio.sleep(0)  # let the transports' close callbacks run

    async def __aenter__(self) -> "OscServer":
        await self.start()
        return self

    async def __aexit__(self, *exc) -> None:
        await self.stop()

    # ------------------------------------------------------------------- stats
    def stats(self) -> dict:
        """Counters of this server (OSC only; the core counts every controller)."""
        return {
            "udp_port": self.udp_port,
            "tcp_port": self.tcp_port,
            "packets": self.packets,
            "messages": self.messages,
            "applied": self.applied,
            "ignored": self.ignored,
            "mapped": self.mapped,
            "rejected": dict(self.rejected),
            "rejected_total": sum(self.rejected.values()),
            "malformed": dict(self.malformed),
            "malformed_total": sum(self.malformed.values()),
            "not_allowed": self.not_allowed,
            "dropped_schedule": self.dropped_schedule,
            "pending": len(self._pending),
            "rate": self._rate.rate(),
            "subscribers": len(self._subs),
            "subscribers_dropped": dict(self.subscribers_dropped),
            "tcp_connections": len(self._conns),
            "tcp_refused": self.tcp_refused,
            "tcp_closed_junk": self.tcp_closed_junk,
            "send_errors": self.send_errors,
            "send_dropped": self.send_dropped,
            "errors_suppressed": self.errors_suppressed,
            "status_limited": self.status_limited,
            "internal_errors": self.internal_errors,
        }

    def subscribers(self) -> list[dict]:
        now = time.monotonic()
        return [
            {
                "host": s.host,
                "port": s.port,
                "transport": "tcp" if s.conn is not None else "udp",
                "expires_in": None if s.expires == math.inf else round(s.expires - now, 3),
                "errors": s.errors,
            }
            for s in self._subs.values()
        ]

    # ----------------------------------------------------------------- receive
    def _on_datagram(self, data: bytes, addr) -> None:
        try:
            self._packet(data, _Peer(addr))
        except Exception:  # a bug must never escape into the event loop
            self._internal_error("UDP packet")

    def _internal_error(self, what: str) -> None:
        self.internal_errors += 1
        now = time.monotonic()
        if now >= self._trace_next:  # a traceback at most every 5 s
            self._trace_next = now + 5.0
            log.exception("osc: internal error while handling a %s (the server keeps running)", what)

    def _packet(self, data: bytes, peer: _Peer) -> bool:
        """One packet from ``peer``; True if it decoded."""
        self.packets += 1
        n = len(data)
        if n > self.limits.max_packet:
            self._malformed("too_big", f"packet of {n} bytes, limit {self.limits.max_packet}", peer)
            return False
        if not self._allowed(peer.host):
            self.not_allowed += 1
            self._ratelog.warning(f"osc: ignored a packet from {peer.host} (not in the allow-list)")
            return False
        try:
            items = decode_packet(data, self.limits)
        except OscDecodeError as exc:
            self._malformed(exc.reason, exc.message, peer)
            return False
        self.messages += len(items)
        self._rate.add(len(items), time.monotonic())
        if self._subs:  # traffic from a subscriber's own address renews its lease
            sub = self._subs.get(("udp", peer.host, peer.port)) if peer.conn is None else None
            if sub is not None:
                sub.expires = time.monotonic() + self.subscriber_ttl
        for due, msg in items:
            if due is None:
                self._dispatch(msg, peer)
            else:
                self._schedule(due, msg, peer)
        return True

    def _malformed(self, reason: str, message: str, peer: _Peer) -> None:
        self.malformed[reason] += 1
        self._ratelog.warning(f"osc: dropped a malformed packet from {peer}: {reason}: {message}")
        self._report_error(f"malformed:{reason}", f"{message} (from {peer})", "", "osc")

    def _dispatch(self, msg: OscMessage, peer: _Peer) -> None:
        address = msg.address
        try:
            handler = self._handlers.get(address)
            if handler is None:
                args = msg.args
                if self.core.automation.feed(address, args):  # a sensor mapping took it
                    self.mapped += 1
                    self.applied += 1
                    return
                if args and any(isinstance(a, bool) for a in args) and _flag_only(address):
                    args = tuple(int(a) if isinstance(a, bool) else a for a in args)
                self.core.apply_message(address, args, origin="osc")  # counts and reports its errors
            else:
                try:
                    if handler(msg, peer) is False:  # ignored, not applied
                        return
                except ControlError as exc:
                    self.core.reject(exc, "osc", address)
                    raise
        except ControlError as exc:
            self.rejected[exc.reason] += 1
            return
        except ConfigError:  # a layout that cannot load: the core logged and reported it
            self.rejected["bad_layout"] += 1
            return
        except Exception:
            self._internal_error(f"message {_clip(address, 80)}")
            return
        self.applied += 1

    # ---------------------------------------------------------------- schedule
    def _schedule(self, due: float, msg: OscMessage, peer: _Peer) -> None:
        if len(self._pending) >= self.max_pending:
            self.dropped_schedule += 1
            self._ratelog.warning(
                f"osc: dropped a message due in {due - time.time():.3f} s from {peer}: "
                f"{self.max_pending} messages already wait for their time"
            )
            return
        heapq.heappush(self._pending, (due, next(self._seq), msg, peer))
        if self._timer_due is None or due < self._timer_due:
            self._arm()

    def _arm(self) -> None:
        if self._timer is not None:
            self._timer.cancel()
            self._timer = None
            self._timer_due = None
        if not self._pending or self._closed:
            return
        due = self._pending[0][0]
        loop = self._loop
        when = loop.time() + (due - time.time())  # unix (wall clock) -> loop (monotonic) time
        self._timer = loop.call_at(when, self._run_due)
        self._timer_due = due

    def _run_due(self) -> None:
        self._timer = None
        self._timer_due = None
        now = time.time()
        while self._pending and self._pending[0][0] <= now + _SCHEDULE_SLACK:
            _, _, msg, peer = heapq.heappop(self._pending)
            self._dispatch(msg, peer)
        self._arm()

    # ---------------------------------------------------------------- replies
    def _reply(self, peer: _Peer, packet: bytes) -> None:
        if peer.conn is not None:
            peer.conn.send(packet)
            return
        if self._udp is not None:
            self._udp.sendto(packet, peer.addr)

    def _h_ignore(self, msg: OscMessage, peer: _Peer) -> bool:
        self.ignored += 1
        return False

    def _h_ping(self, msg: OscMessage, peer: _Peer) -> None:
        try:
            packet = encode_message("/pong", msg.args)
        except OscEncodeError:  # pragma: no cover - every decoded argument re-encodes
            packet = encode_message("/pong")
        self._reply(peer, packet)

    def _h_status(self, msg: OscMessage, peer: _Peer) -> None:
        if not self._status_bucket.take():
            self.status_limited += 1
            return
        self._reply(peer, encode_message("/status", self.status_args()))

    def status_args(self) -> list:
        """The ``/status`` reply's arguments: key, value, key, value ... (see STATUS_KEYS)."""
        core = self.core
        st = core.status()
        audio = st.get("audio") or {}
        me = self.stats()
        last = st.get("last_error")
        values = {
            "audio": audio.get("state", "offline"),
            "backend": audio.get("backend") or "",
            "samplerate": int(audio.get("samplerate") or core.show.samplerate or 0),
            "blocksize": int(audio.get("blocksize") or 0),
            "xruns": int(audio.get("xruns") or 0),
            "callbacks_missed": int(audio.get("callbacks_missed") or 0),
            "dsp_load": float(audio.get("dsp_load_mean") or 0.0),
            "dsp_load_max": float(audio.get("dsp_load_max") or 0.0),
            "layout": st.get("layout") or "",
            "layout_error": st.get("layout_error") or "",
            "panic": int(bool(core.panicked)),
            "master_gain_db": float(core.state.master_gain_db),
            "master_mute": int(bool(core.state.master_mute)),
            "sources": len(core.state.sources),
            "osc_packets": me["packets"],
            "osc_messages": me["messages"],
            "osc_applied": me["applied"],
            "osc_rejected": me["rejected_total"],
            "osc_malformed": me["malformed_total"],
            "osc_not_allowed": me["not_allowed"],
            "osc_dropped_schedule": me["dropped_schedule"],
            "osc_pending": me["pending"],
            "osc_rate": me["rate"],
            "subscribers": me["subscribers"],
            "tcp_connections": me["tcp_connections"],
            "applied_total": sum(core.applied.values()),
            "rejected_total": sum(core.rejected.values()),
            "last_error": f"{last.get('reason', '')}: {last.get('message', '')}" if last else "",
            "uptime_s": float(st.get("uptime_s") or 0.0),
            "rejected_detail": _detail(me["rejected"]),
            "malformed_detail": _detail(me["malformed"]),
        }
        out: list = []
        for k in STATUS_KEYS:
            out.append(k)
            out.append(_status_value(values[k]))
        return out

    # ------------------------------------------------------- server addresses
    def _port_arg(self, msg: OscMessage) -> Optional[int]:
        if len(msg.args) > 1:
            raise ControlError("bad_arg_count", f"{msg.address} takes 0 or 1 arguments ([<port>]), got {len(msg.args)}")
        if not msg.args:
            return None
        f = _one_number(msg.args[0], msg.address, "port")
        if not f.is_integer() or not 1 <= f <= 65535:
            raise ControlError("out_of_range", f"{msg.address}: {msg.args[0]!r} is not a port number (1 .. 65535)")
        return int(f)

    def _h_subscribe(self, msg: OscMessage, peer: _Peer) -> None:
        port = self._port_arg(msg)
        if peer.conn is not None and port is None:
            key = ("tcp", id(peer.conn))
            host, sport, conn = peer.host, peer.port, peer.conn
        else:
            key = ("udp", peer.host, port or peer.port)
            host, sport, conn = peer.host, port or peer.port, None
        sub = self._subs.get(key)
        if sub is None:
            if len(self._subs) >= self.max_subscribers:
                raise ControlError(
                    "out_of_range", f"/subscribe from {peer}: the server already has {self.max_subscribers} subscribers"
                )
            sub = _Subscriber(self, key, host, sport, conn)
            if conn is None:
                try:
                    sub.open_udp(self._bind_host)
                except OSError as exc:
                    raise ControlError("out_of_range", f"/subscribe: cannot send to {host}:{sport}: {exc.strerror or exc}") from None
            else:
                if conn.sub is not None:
                    self._drop(conn.sub, "replaced")
                conn.sub = sub
            self._subs[key] = sub
            log.info("osc: subscriber %s added", sub)
        sub.expires = math.inf if conn is not None else time.monotonic() + self.subscriber_ttl
        sub.errors = 0
        lease = 0.0 if conn is not None else self.subscriber_ttl
        sub.notices.appendleft(encode_message("/subscribed", [float(lease)]))
        # a full picture for a new (or restarted) surface: forget what it was sent
        sub.sent.clear()
        sub.dirty_sources.update(range(len(self.core.state.sources)))
        sub.dirty_master = True
        sub.dirty_layout = True
        self._want_flush()

    def _h_unsubscribe(self, msg: OscMessage, peer: _Peer) -> None:
        port = self._port_arg(msg)
        if peer.conn is not None and port is None:
            key = ("tcp", id(peer.conn))
        else:
            key = ("udp", peer.host, port or peer.port)
        sub = self._subs.get(key)
        if sub is not None:
            self._drop(sub, "unsubscribed")

    def _h_layout_load(self, msg: OscMessage, peer: _Peer) -> None:
        if len(msg.args) != 1:
            raise ControlError("bad_arg_count", f"/layout/load takes 1 argument (<name>), got {len(msg.args)}")
        name = msg.args[0]
        if not isinstance(name, str):
            raise ControlError("bad_type", f"/layout/load: expected a layout name (string), got {_kind(name)}")
        path = self.core.layout_path_for(name)  # ControlError for names outside the layouts folder
        self.core.load_layout_file(path, origin="osc")  # ConfigError: reported by the core, old layout kept

    def _h_panic(self, msg: OscMessage, peer: _Peer) -> None:
        args = msg.args
        if len(args) > 1:
            raise ControlError("bad_arg_count", f"/master/panic takes 0 or 1 arguments, got {len(args)}")
        if args:
            a = args[0]
            if a is IMPULSE or a is True:
                pass
            elif a is False:
                return  # a button's release: panic stays until /master/mute 0
            else:
                if _one_number(a, "/master/panic", "flag") == 0.0:
                    return
        self.core.set_panic(True, origin="osc")

    # ------------------------------------------------------------ subscribers
    def _on_event(self, event: dict) -> None:
        """Core listener: mark what changed; the coalescing flush sends it."""
        if not self._subs:
            return
        try:
            self._mark(event)
        except Exception:  # the core would drop a listener that raises: stay subscribed
            self._internal_error("core event")

    def _mark(self, event: dict) -> None:
        kind = event.get("type")
        if kind == "source":
            src = event.get("source") or {}
            i = self._source_index.get(src.get("id"))
            if i is None:
                return
            for sub in self._subs.values():
                sub.dirty_sources.add(i)
        elif kind == "master":
            for sub in self._subs.values():
                sub.dirty_master = True
        elif kind == "layout":
            for sub in self._subs.values():
                sub.dirty_layout = True
        elif kind == "error":
            err = event.get("error") or {}
            if err.get("kind") == "layout":
                self._report_error("layout", err.get("message", ""), "", err.get("origin", ""))
            else:
                self._report_error(
                    err.get("reason", "error"), err.get("message", ""), err.get("address", ""), err.get("origin", "")
                )
            return
        else:
            return
        self._want_flush()

    def _report_error(self, reason: str, message: str, address: str, origin: str) -> None:
        if not self._subs:
            return
        if not self._err_bucket.take():
            self.errors_suppressed += 1
            return
        try:
            packet = encode_message(
                "/error", [_clip(reason, 64), _clip(message), _clip(address), _clip(origin or "", 32)]
            )
        except OscEncodeError:  # pragma: no cover - _clip leaves no NUL
            return
        for sub in self._subs.values():
            sub.notices.append(packet)
        self._want_flush()

    def _want_flush(self) -> None:
        if self._flush_handle is not None or self._closed:
            return
        delay = max(0.0, self._last_flush + self.coalesce_interval - time.monotonic())
        self._flush_handle = self._loop.call_later(delay, self._flush)

    def _source_values(self, i: int) -> dict:
        s = self.core.state.sources[i].to_dict()
        return {
            "position": tuple(float(v) for v in s["position"]),
            "azimuth": (float(s["azimuth"]),),
            "elevation": (float(s["elevation"]),),
            "distance": (float(s["distance"]),),
            "gain": (float(s["gain_db"]),),
            "mute": (int(bool(s["mute"])),),
            "solo": (int(bool(s["solo"])),),
            "spread": (float(s["spread"]),),
        }

    def _layout_args(self) -> tuple:
        lay = self.core.state.layout
        name = lay.path.stem if lay.path else lay.name
        return (name, lay.name)

    def _flush(self) -> None:
        self._flush_handle = None
        self._last_flush = time.monotonic()
        if self._closed:
            return
        try:
            self._flush_subscribers()
        except Exception:
            self._internal_error("subscriber update")

    def _flush_subscribers(self) -> None:
        core = self.core
        ids = core.state.source_ids
        cache: dict = {}  # (index, field) -> (value, packet), shared by every subscriber
        master = None
        layout = None
        more = False
        for sub in list(self._subs.values()):
            packets = list(sub.notices)
            sub.notices.clear()
            if sub.dirty_layout:
                sub.dirty_layout = False
                layout = layout or self._layout_args()
                if sub.sent.get(("layout",)) != layout:
                    sub.sent[("layout",)] = layout
                    packets.append(encode_message("/layout/active", layout))
            if sub.dirty_master:
                sub.dirty_master = False
                if master is None:
                    master = {
                        "gain": (float(core.state.master_gain_db),),
                        "mute": (int(bool(core.state.master_mute)),),
                        "panic": (int(bool(core.panicked)),),
                    }
                for f in MASTER_OUTPUT:
                    if sub.sent.get(("master", f)) != master[f]:
                        sub.sent[("master", f)] = master[f]
                        packets.append(encode_message(f"/master/{f}", master[f]))
            if sub.dirty_sources:
                order = sorted(sub.dirty_sources)
                k = bisect.bisect_left(order, sub.cursor)  # round robin: no source waits for ever
                for i in order[k:] + order[:k]:
                    if len(packets) >= self.max_burst:
                        more = True  # the rest goes out with the next flush, at its latest value
                        break
                    sub.dirty_sources.discard(i)
                    sub.cursor = i + 1
                    if not 0 <= i < len(ids):
                        continue
                    for f in SOURCE_OUTPUT:
                        hit = cache.get((i, f))
                        if hit is None:
                            vals = self._source_values(i)
                            for g in SOURCE_OUTPUT:
                                cache[(i, g)] = (vals[g], None)
                            hit = cache[(i, f)]
                        value, packet = hit
                        if sub.sent.get(("source", i, f)) == value:
                            continue
                        if packet is None:
                            packet = encode_message(f"/source/{ids[i]}/{f}", value)
                            cache[(i, f)] = (value, packet)
                        sub.sent[("source", i, f)] = value
                        packets.append(packet)
            for p in packets:
                if not sub.send(p):
                    if sub.key not in self._subs:  # dropped after too many errors
                        break
        if more:
            self._want_flush()

    def _send_error(self, sub: _Subscriber, exc: Optional[BaseException]) -> None:
        self.send_errors += 1
        sub.errors += 1
        if sub.errors >= self.max_send_errors and sub.key in self._subs:
            why = f": {exc.strerror or exc}" if isinstance(exc, OSError) else ""
            self._drop(sub, "errors", f"{sub.errors} send errors{why}")

    def _drop(self, sub: _Subscriber, reason: str, detail: str = "") -> None:
        if self._subs.get(sub.key) is sub:
            del self._subs[sub.key]
            self.subscribers_dropped[reason] += 1
            log.info("osc: subscriber %s dropped (%s%s)", sub, reason, f": {detail}" if detail else "")
        sub.close()

    @property
    def _house_interval(self) -> float:
        return min(1.0, self.subscriber_ttl / 4.0)

    def _housekeeping(self) -> None:
        self._house = None
        if self._closed:
            return
        try:
            now = time.monotonic()
            for sub in list(self._subs.values()):
                if sub.expires <= now:
                    self._drop(sub, "expired", f"no /subscribe for {self.subscriber_ttl:g} s")
        except Exception:  # pragma: no cover
            self._internal_error("housekeeping")
        self._house = self._loop.call_later(self._house_interval, self._housekeeping)


# --------------------------------------------------------------------------- command line


def _arg_token(tok: str):
    from ..control import parse_token

    low = tok.lower()
    if low == "true":
        return True
    if low == "false":
        return False
    return parse_token(tok)


def _print_packet(data: bytes, out=None) -> None:
    out = out or sys.stdout
    try:
        items = decode_packet(data)
    except OscDecodeError as exc:
        print(f"(malformed reply: {exc})", file=out)
        return
    for _, m in items:
        if m.address == "/status":
            pairs = list(m.args)
            print("/status", file=out)
            for k, v in zip(pairs[::2], pairs[1::2]):
                print(f"  {k} = {v}", file=out)
        else:
            print(m.address, *[repr(a) if isinstance(a, str) else a for a in m.args], file=out)


def _cli(argv: Optional[Sequence[str]] = None) -> int:
    p = argparse.ArgumentParser(
        prog="python -m fieldmix.live.osc",
        description="A small OSC client for the fieldmix server (send a message, watch the updates).",
    )
    sub = p.add_subparsers(dest="cmd", required=True)
    ps = sub.add_parser("send", help="send one message (numbers as int/float, true/false as T/F)")
    ps.add_argument("address")
    ps.add_argument("args", nargs="*")
    ps.add_argument("--host", default="127.0.0.1")
    ps.add_argument("--port", type=int, default=9000)
    ps.add_argument("--tcp", action="store_true", help="send over TCP with SLIP framing")
    ps.add_argument("--at", type=float, metavar="SECONDS", help="send in a bundle due SECONDS from now")
    ps.add_argument("--wait", type=float, default=None, metavar="SECONDS",
                    help="print replies for SECONDS (default: 1 s for /ping and /status, else 0)")
    pw = sub.add_parser("watch", help="subscribe and print every update until Ctrl-C")
    pw.add_argument("--host", default="127.0.0.1")
    pw.add_argument("--port", type=int, default=9000)
    pw.add_argument("--seconds", type=float, default=0.0, help="stop after SECONDS (0: run until Ctrl-C)")
    pw.add_argument("--renew", type=float, default=20.0, help="re-send /subscribe every SECONDS")
    ns = p.parse_args(argv)

    if ns.cmd == "send":
        try:
            packet = encode_message(ns.address, [_arg_token(a) for a in ns.args])
            if ns.at is not None:
                packet = encode_bundle(time.time() + ns.at, [packet])
        except OscEncodeError as exc:
            print(f"error: {exc}", file=sys.stderr)
            return 2
        wait = ns.wait if ns.wait is not None else (1.0 if ns.address in ("/ping", "/status") else 0.0)
        if ns.tcp:
            with socket.create_connection((ns.host, ns.port), timeout=5) as s:
                s.sendall(slip_encode(packet))
                if wait > 0:
                    dec = SlipDecoder()
                    end = time.monotonic() + wait
                    while (left := end - time.monotonic()) > 0:
                        s.settimeout(left)
                        try:
                            chunk = s.recv(65536)
                        except socket.timeout:
                            break
                        if not chunk:
                            break
                        for frame in dec.feed(chunk):
                            _print_packet(frame)
            return 0
        with socket.socket(socket.AF_INET6 if ":" in ns.host else socket.AF_INET, socket.SOCK_DGRAM) as s:
            s.sendto(packet, (ns.host, ns.port))
            end = time.monotonic() + wait
            while wait > 0 and (left := end - time.monotonic()) > 0:
                s.settimeout(left)
                try:
                    data, _ = s.recvfrom(65536)
                except socket.timeout:
                    break
                _print_packet(data)
        return 0

    with socket.socket(socket.AF_INET6 if ":" in ns.host else socket.AF_INET, socket.SOCK_DGRAM) as s:
        s.bind(("", 0))
        sub_packet = encode_message("/subscribe")
        start = time.monotonic()
        next_renew = start
        try:
            while not ns.seconds or time.monotonic() - start < ns.seconds:
                now = time.monotonic()
                if now >= next_renew:
                    s.sendto(sub_packet, (ns.host, ns.port))
                    next_renew = now + ns.renew
                s.settimeout(max(0.05, next_renew - now))
                try:
                    data, _ = s.recvfrom(65536)
                except socket.timeout:
                    continue
                _print_packet(data)
                sys.stdout.flush()
        except KeyboardInterrupt:
            pass
        finally:
            try:
                s.sendto(encode_message("/unsubscribe"), (ns.host, ns.port))
            except OSError:
                pass
    return 0


if __name__ == "__main__":  # pragma: no cover - exercised by hand and in docs
    sys.exit(_cli())
