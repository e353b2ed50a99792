"""The live daemon's HTTP API and websocket (aiohttp), for the control page and tools.

:class:`WebServer` serves, on one port:

- ``GET /`` the control page and ``GET /static/...`` its assets (the package's ``web``
  folder, shipped in the wheel; no CDN);
- ``GET /api/state`` (the whole state, :meth:`LiveCore.snapshot`), ``GET /api/layouts``,
  ``GET /api/status``, and ``POST /api/control`` (one request, as on the websocket);
- ``GET /ws``: a websocket that pushes every state change, meter frames and status frames,
  and takes control requests that go through the one control grammar
  (:meth:`LiveCore.apply_message`).

The protocol, the coalescing and back-pressure rules, the meter conventions, access rules
and limits are documented in docs/web-api.md; this module is its implementation.

How one slow client is kept from hurting the others: core events are not queued per
client. The server keeps the *latest* message per key (one per source, the master, the
layout, each alert kind, meters, status) with a sequence number; each client remembers the
sequence it has sent per key. A client's writer task wakes, takes every key that moved
since (in event order) plus its own replies, and sends them in one websocket frame, at most
``event_hz`` times a second. A client that does not read simply sends fewer, newer frames;
its memory is a dict of at most one entry per key plus the socket buffers (bounded by
``sndbuf`` and aiohttp's writer limit). A client whose send has been stuck for
``drop_after`` seconds is dropped. Each message is serialised once, however many clients
send it.
"""

from __future__ import annotations

import asyncio
import contextlib
import hmac
import ipaddress
import itertools
import json
import logging
import math
import numbers
import re
import socket
import time
from collections import deque
from pathlib import Path
from typing import Any, Callable, Optional, Sequence
from urllib.parse import urlsplit

import numpy as np
from aiohttp import WSMsgType, web

from .. import __version__ as FIELDMIX_VERSION
from ..control import parse_message
from ..errors import ControlError, FieldmixError
from .core import LiveCore, RateLimitedLog
from .ratelimit import TokenBucket

log = logging.getLogger("fieldmix.web")

PROTOCOL = 1
DEFAULT_ASSETS = Path(__file__).resolve().parent.parent / "web"

#: Meter values below this read as this (JSON has no -infinity).
METER_FLOOR_DB = -120.0

#: Reasons of error replies that the web layer adds to ControlError.REASONS.
WEB_REASONS = (
    "bad_json",  # not JSON, or NaN / Infinity / a number out of range
    "bad_message",  # JSON, but not a request object of the right shape
    "unknown_type",  # "type" is not a request type
    "too_large",  # over max_message characters
    "rate_limited",  # more messages than the client's rate allows
    "layout_error",  # the chosen layout file is broken (the old layout keeps playing)
    "unauthorized",  # token missing or wrong (HTTP 401)
    "forbidden",  # Origin or Host not allowed (HTTP 403)
    "busy",  # too many clients, or the server is stopping (HTTP 503)
    "not_found",  # no such endpoint (HTTP 404)
    "internal",  # a bug; nothing was applied
)

WS_REQUESTS = ("control", "move", "panic", "release", "layout", "ping", "snapshot", "subscribe")
HTTP_REQUESTS = ("control", "move", "panic", "release", "layout", "ping", "snapshot")
_KEYS = {
    "control": {"type", "id", "address", "args"},
    "move": {"type", "id", "source", "position", "azimuth", "elevation", "distance"},
    "panic": {"type", "id"},
    "release": {"type", "id"},
    "layout": {"type", "id", "name"},
    "ping": {"type", "id"},
    "snapshot": {"type", "id"},
    "subscribe": {"type", "id", "meters", "status"},
}

CLOSE_GOING_AWAY = 1001  # the server stops
CLOSE_POLICY = 1008  # a flood
CLOSE_TOO_BIG = 1009  # over the hard size limit (aiohttp closes)
CLOSE_TRY_LATER = 1013  # too slow: stayed behind (when a close frame can still be written)


_HOST_RE = re.compile(r"[A-Za-z0-9.\-]+(:[0-9]{1,5})?|\[[0-9A-Fa-f:.]+\](:[0-9]{1,5})?")


class WebError(Exception):
    """A request refused by the web layer (reason in WEB_REASONS)."""

    def __init__(self, reason: str, message: str):
        assert reason in WEB_REASONS, reason
        self.reason = reason
        self.message = message
        super().__init__(message)


class _BadConstant(Exception):
    pass


def _refuse_constant(name: str):
    raise _BadConstant(name)


def _parse_float(text: str) -> float:
    f = float(text)
    if not math.isfinite(f):
        raise _BadConstant(text)
    return f


def _json_default(o: Any):
    if isinstance(o, np.generic):
        return o.item()
    if isinstance(o, np.ndarray):
        return o.tolist()
    if isinstance(o, Path):
        return str(o)
    raise TypeError(f"{type(o).__name__} is not JSON serialisable")


def dumps(obj: Any) -> str:
    """Compact JSON; refuses NaN/infinity (ValueError) so none can reach a client."""
    return json.dumps(obj, allow_nan=False, separators=(",", ":"), ensure_ascii=False, default=_json_default)


def _clip(s: str, n: int = 120) -> str:
    s = str(s).replace("\n", " ")
    return s if len(s) <= n else s[: n - 3] + "..."


def _kind(v: Any) -> str:
    if v is None:
        return "null"
    if isinstance(v, bool):
        return "true/false"
    if isinstance(v, str):
        return "a string"
    if isinstance(v, list):
        return "an array"
    if isinstance(v, dict):
        return "an object"
    if isinstance(v, numbers.Number):
        return "a number"
    return type(v).__name__


def is_loopback_host(host: str) -> bool:
    """True for 127.0.0.0/8, ::1 and localhost; anything else counts as beyond loopback."""
    h = (host or "").strip().strip("[]").lower()
    if h == "localhost" or h.endswith(".localhost"):
        return True
    try:
        return ipaddress.ip_address(h).is_loopback
    except ValueError:
        return False


def _split_hostport(value: str, default_port: int) -> Optional[tuple]:
    """``host[:port]`` / ``[v6]:port`` -> (host lowercased, port); None if malformed."""
    v = (value or "").strip()
    try:
        if v.startswith("["):
            end = v.index("]")
            host, rest = v[1:end], v[end + 1 :]
            port = int(rest[1:]) if rest.startswith(":") else default_port
            if rest and not rest.startswith(":"):
                return None
        elif v.count(":") == 1:
            host, p = v.split(":")
            port = int(p)
        elif ":" in v:  # a bare IPv6 address
            host, port = v, default_port
        else:
            host, port = v, default_port
    except ValueError:
        return None
    if not host or not 0 < port < 65536:
        return None
    return host.lower(), port


def normalise_origin(origin: str) -> Optional[tuple]:
    """``scheme://host[:port]`` -> (scheme, host, port) with the default port filled in."""
    try:
        u = urlsplit(origin.strip())
        port = u.port
    except ValueError:
        return None
    if u.scheme not in ("http", "https") or not u.hostname or u.path not in ("", "/") or u.query or u.fragment:
        return None
    if u.username or u.password:
        return None
    return u.scheme, u.hostname.lower(), port or (443 if u.scheme == "https" else 80)


class _Out:
    """One outgoing message, serialised lazily and once for every client."""

    __slots__ = ("msg", "_text")

    def __init__(self, msg: dict):
        self.msg = msg
        self._text: Optional[str] = None

    @property
    def text(self) -> Optional[str]:
        if self._text is None:
            try:
                self._text = dumps(self.msg)
            except (TypeError, ValueError) as exc:
                log.error("not sent (cannot be serialised): %s: %s", self.msg.get("type"), exc)
                self._text = ""
        return self._text or None


class _Client:
    def __init__(self, cid: int, ws: web.WebSocketResponse, transport, remote: str, bucket: TokenBucket, base_seq: int):
        self.id = cid
        self.ws = ws
        self.transport = transport
        self.remote = remote
        self.bucket = bucket
        self.base_seq = base_seq  # everything up to here is in the hello snapshot
        self.seen: dict = {}  # key -> sequence sent
        self.replies: deque = deque()  # serialised replies (hello, ack, error, pong, state)
        self.wake = asyncio.Event()
        self.want_meters = True
        self.want_status = True
        self.task: Optional[asyncio.Task] = None
        self.next_at = 0.0
        self.sending_since: Optional[float] = None
        self.connected_at = time.time()
        self.closing = False
        self.close_request: Optional[tuple] = None  # (code, reason): the reader closes with it
        self.dropped: Optional[str] = None
        # rate limiting
        self.rl_unreported = 0
        self.rl_next_report = 0.0
        self.flood_t0 = 0.0
        self.flood_n = 0
        # counters
        self.received = 0
        self.frames = 0
        self.messages = 0
        self.bytes = 0

    def wants(self, key) -> bool:
        if key == "meters":
            return self.want_meters
        if key == "status":
            return self.want_status
        return True


class WebServer:
    """HTTP API + websocket for a :class:`LiveCore`. See the module docstring and docs/web-api.md.

    ``host``/``port``: where to listen (``port=0``: an ephemeral port, see :attr:`port`).
    Beyond loopback a ``token`` is required. ``allowed_origins``: extra page origins
    (``"http://host:port"``) allowed to open the websocket besides the same origin.
    ``meter_hz`` / ``status_hz`` / ``event_hz``: meter frames, status frames and event
    batches per second. ``stats``: an optional callable returning a dict of other services'
    figures (``{"osc": {"messages_per_s": ...}}``), merged into status frames.
    """

    def __init__(
        self,
        core: LiveCore,
        host: str = "127.0.0.1",
        port: int = 8080,
        token: Optional[str] = None,
        allowed_origins: Optional[Sequence[str]] = None,
        meter_hz: float = 25,
        assets_dir: Optional[Path] = None,
        *,
        status_hz: float = 2.0,
        event_hz: float = 50.0,
        stats: Optional[Callable[[], dict]] = None,
        max_clients: int = 64,
        max_message: int = 65536,
        hard_max_message: int = 2 * 1024 * 1024,
        rate: float = 200.0,
        burst: float = 400.0,
        flood_close: int = 5000,
        drop_after: float = 5.0,
        sndbuf: Optional[int] = 256 * 1024,
        heartbeat: Optional[float] = 20.0,
    ):
        self.core = core
        if not isinstance(host, str) or not host.strip():
            raise FieldmixError(f"--listen: expected an address, got {host!r}")
        self.host = host.strip()
        if isinstance(port, bool) or not isinstance(port, int) or not 0 <= port <= 65535:
            raise FieldmixError(f"--http-port: expected a port number 0..65535, got {port!r}")
        self._want_port = port
        self.loopback = is_loopback_host(self.host)
        if token is not None:
            if not isinstance(token, str) or not token or not token.isprintable() or any(c.isspace() for c in token):
                raise FieldmixError("web token: expected a non-empty string without spaces or control characters")
        elif not self.loopback:
            raise FieldmixError(
                f"--listen {self.host}: beyond loopback the web control needs a token "
                "(set one on the command line or in the show's network settings)"
            )
        self.token = token
        self._token_b = token.encode("utf-8") if token else b""
        self.allowed_origins: set = set()
        self._allowed_hosts: set = set()
        for o in allowed_origins or ():
            n = normalise_origin(o) if isinstance(o, str) else None
            if n is None:
                raise FieldmixError(f'allowed origin {o!r}: expected "http://host:port" or "https://host:port"')
            self.allowed_origins.add(n)
            self._allowed_hosts.add(n[1])

        def _rate(name, v, lo, hi):
            if isinstance(v, bool) or not isinstance(v, numbers.Real) or not lo <= float(v) <= hi:
                raise FieldmixError(f"web server: {name} must be a number {lo:g}..{hi:g}, got {v!r}")
            return float(v)

        self.meter_hz = _rate("meter_hz", meter_hz, 1, 100)
        self.status_hz = _rate("status_hz", status_hz, 0.1, 20)
        self.event_hz = _rate("event_hz", event_hz, 1, 1000)
        self.rate = _rate("rate", rate, 1, 100000)
        self.burst = _rate("burst", burst, 1, 100000)
        self.drop_after = _rate("drop_after", drop_after, 0.05, 600)
        self.max_clients = int(max_clients)
        self.max_message = int(max_message)
        self.hard_max_message = max(int(hard_max_message), self.max_message + 1024)
        self.flood_close = int(flood_close)
        self.sndbuf = int(sndbuf) if sndbuf else None
        self.heartbeat = heartbeat
        self.assets_dir = Path(assets_dir) if assets_dir is not None else DEFAULT_ASSETS
        self.stats_callback = stats

        self.port: Optional[int] = None
        self._clients: dict[int, _Client] = {}
        self._ids = itertools.count(1)
        self._seq = 0
        self._latest: dict = {}  # key -> (seq, _Out)
        self._acting: Optional[int] = None  # the websocket client whose request is being applied
        self._runner: Optional[web.AppRunner] = None
        self._tasks: list[asyncio.Task] = []
        self._closing = False
        self._http_bucket: Optional[TokenBucket] = None
        self._last_meter_frame = None
        self._last_invalid_meters = -1e9
        self._rates: dict = {}
        self._rate_base: Optional[tuple] = None
        self._ratelog = RateLimitedLog(log)
        self._stats = {
            "connections": 0,
            "refused": {"host": 0, "origin": 0, "token": 0, "busy": 0},
            "dropped_slow": 0,
            "closed_flood": 0,
            "closed_too_big": 0,
            "messages_in": 0,
            "rate_limited": 0,
            "errors": {},
            "frames_sent": 0,
            "messages_sent": 0,
            "bytes_sent": 0,
            "events": 0,
            "meters_frames": 0,
            "status_frames": 0,
            "http_requests": 0,
        }
        self.app = self._make_app()

    # ================================================================ lifecycle
    def _make_app(self) -> web.Application:
        app = web.Application(client_max_size=self.max_message, middlewares=[self._middleware])
        r = app.router
        r.add_get("/", self._page)
        r.add_get("/index.html", self._page)
        r.add_get("/api/state", self._api_state)
        r.add_get("/api/layouts", self._api_layouts)
        r.add_get("/api/status", self._api_status)
        r.add_post("/api/control", self._api_control)
        r.add_get("/ws", self._ws)
        if self.assets_dir.is_dir():
            r.add_static("/static/", self.assets_dir, show_index=False, follow_symlinks=False)
        return app

    async def start(self) -> "WebServer":
        loop = asyncio.get_running_loop()
        self._http_bucket = TokenBucket(self.rate, self.burst, loop.time())
        self._runner = web.AppRunner(self.app, access_log=None, handle_signals=False, shutdown_timeout=1.0)
        await self._runner.setup()
        site = web.TCPSite(self._runner, self.host, self._want_port)
        try:
            await site.start()
        except OSError as exc:
            await self._runner.cleanup()
            self._runner = None
            raise FieldmixError(f"web server: cannot listen on {self.host}:{self._want_port}: {exc.strerror or exc}") from None
        self.port = int(self._runner.addresses[0][1])
        self.core.add_listener(self._on_core_event)
        self._tasks = [
            asyncio.create_task(self._ticker(self.meter_hz, self._meter_tick), name="fieldmix-web-meters"),
            asyncio.create_task(self._ticker(self.status_hz, self._status_tick), name="fieldmix-web-status"),
        ]
        log.info("web: http://%s:%d/ (token %s)", self.host, self.port, "required" if self.token else "off")
        return self

    async def stop(self) -> None:
        """Close every websocket (code 1001), stop listening."""
        if self._runner is None:
            return
        self._closing = True
        self.core.remove_listener(self._on_core_event)
        for t in self._tasks:
            t.cancel()
        await asyncio.gather(*self._tasks, return_exceptions=True)
        self._tasks = []
        clients = list(self._clients.values())

        async def close(c: _Client):
            if c.task is not None:
                c.task.cancel()
            try:
                await asyncio.wait_for(c.ws.close(code=CLOSE_GOING_AWAY, message=b"server stopping"), 1.0)
            except (asyncio.TimeoutError, Exception):
                self._abort(c)

        await asyncio.gather(*(close(c) for c in clients), return_exceptions=True)
        await self._runner.cleanup()
        self._runner = None

    @property
    def clients(self) -> int:
        return len(self._clients)

    @property
    def url(self) -> str:
        host = f"[{self.host}]" if ":" in self.host else self.host
        return f"http://{host}:{self.port}/"

    # ================================================================ access rules
    @web.middleware
    async def _middleware(self, request: web.Request, handler):
        self._stats["http_requests"] += 1
        try:
            resp = await handler(request)
        except web.HTTPException as exc:
            if not request.path.startswith("/api/"):
                raise
            reason = {401: "unauthorized", 403: "forbidden", 404: "not_found", 413: "too_large", 503: "busy"}.get(
                exc.status, "bad_message"
            )
            resp = self._json_error(exc.status, reason, exc.reason or "refused")
        if not getattr(resp, "prepared", False):
            h = resp.headers
            h.setdefault("X-Content-Type-Options", "nosniff")
            h.setdefault("Referrer-Policy", "no-referrer")
            h.setdefault("X-Frame-Options", "DENY")
            if request.path.startswith("/api/"):
                h.setdefault("Cache-Control", "no-store")
            else:  # the page and its assets: nothing but this server, no inline script
                host = request.host or ""
                ws = f" ws://{host} wss://{host}" if _HOST_RE.fullmatch(host) else ""
                h.setdefault(
                    "Content-Security-Policy",
                    "default-src 'self'; script-src 'self'; style-src 'self'; img-src 'self' data:; "
                    f"connect-src 'self'{ws}; frame-ancestors 'none'; base-uri 'none'; form-action 'self'",
                )
        return resp

    def _json_error(self, status: int, reason: str, message: str, **extra) -> web.Response:
        body = {"type": "error", "reason": reason, "message": message, **extra}
        resp = web.Response(status=status, text=dumps(body), content_type="application/json")
        if status == 401:
            resp.headers["WWW-Authenticate"] = 'Bearer realm="fieldmix"'
        return resp

    def _host_ok(self, request: web.Request) -> bool:
        """Bound to loopback: the Host header must name loopback (a DNS-rebinding guard)."""
        if not self.loopback:
            return True
        host = request.headers.get("Host")
        if host is None:
            return True  # HTTP/1.0 tools; browsers always send Host
        hp = _split_hostport(host, 80)
        return hp is not None and (is_loopback_host(hp[0]) or hp[0] in self._allowed_hosts)

    def _origin_ok(self, request: web.Request) -> bool:
        origin = request.headers.get("Origin")
        if origin is None:
            return True  # not a browser page (a script or tool): the token protects beyond loopback
        n = normalise_origin(origin)
        if n is None:
            return False  # "null", file://, garbage
        if n in self.allowed_origins:
            return True
        hp = _split_hostport(request.headers.get("Host", ""), 443 if request.secure else 80)
        return hp is not None and (n[1], n[2]) == hp

    def _token_ok(self, request: web.Request) -> bool:
        if self.token is None:
            return True
        given = None
        auth = request.headers.get("Authorization")
        if auth:
            scheme, _, value = auth.partition(" ")
            if scheme.lower() == "bearer":
                given = value.strip()
        if given is None:
            given = request.query.get("token")
        if given is None:
            return False
        return hmac.compare_digest(given.encode("utf-8", "replace"), self._token_b)

    def _guard(self, request: web.Request, *, token: bool, origin: bool) -> Optional[web.Response]:
        if not self._host_ok(request):
            self._stats["refused"]["host"] += 1
            return self._json_error(
                403, "forbidden",
                f"Host {_clip(request.headers.get('Host', ''), 80)!r} is not allowed: this server listens on loopback "
                "only; open it as http://127.0.0.1:PORT/ or http://localhost:PORT/",
            )  # fmt: skip
        if origin and not self._origin_ok(request):
            self._stats["refused"]["origin"] += 1
            return self._json_error(
                403, "forbidden",
                f"Origin {_clip(request.headers.get('Origin', ''), 80)!r} is not allowed: only pages served by this "
                "server (same host and port) and the configured allowed origins may control it",
            )  # fmt: skip
        if token and not self._token_ok(request):
            self._stats["refused"]["token"] += 1
            return self._json_error(
                401, "unauthorized",
                "a token is required: send it as ?token=... or an Authorization: Bearer header",
            )  # fmt: skip
        return None

    # ================================================================ HTTP
    async def _page(self, request: web.Request) -> web.StreamResponse:
        refused = self._guard(request, token=False, origin=False)
        if refused is not None:
            return refused
        index = self.assets_dir / "index.html"
        if not index.is_file():
            return web.Response(status=404, text="fieldmix: the control page is not installed\n")
        return web.FileResponse(index, headers={"Cache-Control": "no-cache"})

    async def _api_state(self, request: web.Request) -> web.Response:
        refused = self._guard(request, token=True, origin=False)
        return refused or self._json(self.core.snapshot())

    async def _api_layouts(self, request: web.Request) -> web.Response:
        refused = self._guard(request, token=True, origin=False)
        return refused or self._json(self.layouts())

    async def _api_status(self, request: web.Request) -> web.Response:
        refused = self._guard(request, token=True, origin=False)
        return refused or self._json(self.status_payload())

    def _json(self, obj: Any, status: int = 200) -> web.Response:
        try:
            text = dumps(obj)
        except (TypeError, ValueError) as exc:
            log.error("cannot serialise a response: %s", exc)
            return self._json_error(500, "internal", "the state could not be serialised (a bug: see the server log)")
        return web.Response(status=status, text=text, content_type="application/json")

    async def _api_control(self, request: web.Request) -> web.Response:
        refused = self._guard(request, token=True, origin=True)
        if refused is not None:
            return refused
        loop = asyncio.get_running_loop()
        if not self._http_bucket.take(loop.time()):
            self._stats["rate_limited"] += 1
            return self._json_error(429, "rate_limited", f"more than {self.rate:g} requests a second (burst {self.burst:g})")
        if request.content_length is not None and request.content_length > self.max_message:
            return self._json_error(413, "too_large", f"request body over the limit of {self.max_message} bytes")
        try:
            raw = await request.read()
        except web.HTTPRequestEntityTooLarge:
            return self._json_error(413, "too_large", f"request body over the limit of {self.max_message} bytes")
        try:
            text = raw.decode("utf-8")
        except UnicodeDecodeError:
            return self._json(self._error_reply(None, None, "bad_json", "the body is not UTF-8 text"), 400)
        reply = self.handle_text(text, origin="http", client=None)
        status = 200 if reply.get("type") != "error" else (429 if reply["reason"] == "rate_limited" else 400)
        return self._json(reply, status)

    def layouts(self) -> dict:
        lay = self.core.state.layout
        return {
            "active": lay.name,
            "active_file": lay.path.stem if lay.path else None,
            "available": self.core.available_layouts(),
            "error": self.core.layout_error,
        }

    # ================================================================ requests (websocket and POST)
    def handle_text(self, text: str, origin: str, client: Optional[_Client]) -> dict:
        """One request as JSON text -> its reply (ack, pong, state or error). Never raises."""
        req_id = None
        typ = None
        try:
            obj = self._parse(text)
            req_id = self._request_id(obj)
            typ = obj.get("type")
            allowed = WS_REQUESTS if client is not None else HTTP_REQUESTS
            if not isinstance(typ, str):
                raise WebError("bad_message", f'a request needs "type": one of {", ".join(allowed)}; got {_kind(typ)}')
            if typ not in allowed:
                where = " on the websocket only" if typ in WS_REQUESTS else ""
                raise WebError(
                    "unknown_type", f'unknown request type "{_clip(typ, 40)}"{where}: one of {", ".join(allowed)}'
                )
            extra = sorted(k for k in obj if k not in _KEYS[typ])
            if extra:
                raise WebError(
                    "bad_message",
                    f'{typ}: unexpected key{"s" if len(extra) > 1 else ""} {", ".join(repr(_clip(k, 30)) for k in extra[:5])} '
                    f'(allowed: {", ".join(sorted(_KEYS[typ]))})',
                )
            return getattr(self, f"_r_{typ}")(obj, req_id, origin, client)
        except WebError as exc:
            return self._error_reply(req_id, typ, exc.reason, exc.message)
        except ControlError as exc:
            return self._error_reply(req_id, typ, exc.reason, exc.message)
        except Exception:  # a bug must not take the server down or apply half a request
            log.exception("web request failed")
            return self._error_reply(req_id, typ, "internal", "server error: the request was not applied (see the server log)")

    def _parse(self, text: str) -> dict:
        if len(text) > self.max_message:
            raise WebError("too_large", f"message of {len(text)} characters is over the limit of {self.max_message}")
        try:
            obj = json.loads(text, parse_constant=_refuse_constant, parse_float=_parse_float)
        except _BadConstant as exc:
            raise WebError(
                "bad_json",
                f"{_clip(str(exc), 30)} is not a finite JSON number (NaN, infinities and numbers beyond "
                "the float range are refused)",
            ) from None
        except RecursionError:
            raise WebError("bad_json", "not valid JSON: nested too deeply") from None
        except ValueError as exc:
            raise WebError("bad_json", f"not valid JSON: {_clip(exc, 100)}") from None
        if not isinstance(obj, dict):
            raise WebError("bad_message", f'expected a JSON object such as {{"type": "ping"}}, got {_kind(obj)}')
        return obj

    @staticmethod
    def _request_id(obj: dict):
        rid = obj.get("id")
        if rid is None:
            return None
        if isinstance(rid, bool) or not isinstance(rid, (str, int)):
            raise WebError("bad_message", f'"id" must be a string or an integer, got {_kind(rid)}')
        if isinstance(rid, str) and len(rid) > 64:
            raise WebError("bad_message", '"id" is longer than 64 characters')
        if isinstance(rid, int) and abs(rid) >= 2**53:
            raise WebError("bad_message", '"id" is beyond the integers JavaScript holds exactly (2^53)')
        return rid

    def _error_reply(self, req_id, typ, reason: str, message: str, **extra) -> dict:
        errs = self._stats["errors"]
        errs[reason] = errs.get(reason, 0) + 1
        return {"type": "error", "id": req_id, "request": typ if typ in WS_REQUESTS else None,
                "reason": reason, "message": message, **extra}  # fmt: skip

    @staticmethod
    def _ack(req_id, typ: str, **extra) -> dict:
        return {"type": "ack", "id": req_id, "request": typ, **extra}

    @contextlib.contextmanager
    def _acting_as(self, client: Optional[_Client]):
        """Events emitted inside carry ``client``: the websocket connection that caused them."""
        self._acting = client.id if client is not None else None
        try:
            yield
        finally:
            self._acting = None

    def _r_control(self, obj, req_id, origin, client):
        address = obj.get("address")
        if not isinstance(address, str):
            raise WebError("bad_message", f'control: "address" must be a string such as "/source/1/azimuth", got {_kind(address)}')
        args = obj.get("args", [])
        if not isinstance(args, list):
            raise WebError("bad_message", f'control: "args" must be an array of numbers, got {_kind(args)}')
        with self._acting_as(client):
            cmds = self.core.apply_message(address, args, origin=origin)
        return self._ack(req_id, "control", applied=len(cmds))

    def _r_move(self, obj, req_id, origin, client):
        src = obj.get("source")
        ids = self.core.state.source_ids
        addr = f"/source/{_clip(src, 40)}" if isinstance(src, (str, int)) and not isinstance(src, bool) else "move"
        try:
            if isinstance(src, bool) or not isinstance(src, (str, int)):
                raise WebError("bad_message", f'move: "source" must be a source id or its 1-based number, got {_kind(src)}')
            if isinstance(src, int):
                if not 1 <= src <= len(ids):
                    raise ControlError("unknown_source", f"no source number {src}: the show has {len(ids)} (1..{len(ids)})")
                sid = ids[src - 1]
            elif src in ids:
                sid = src
            else:
                raise ControlError("unknown_source", f'unknown source "{_clip(src, 40)}" (sources: {", ".join(ids[:20])})')
            sph = [k for k in ("azimuth", "elevation", "distance") if k in obj]
            if "position" in obj:
                if sph:
                    raise WebError("bad_message", "move: give position or azimuth/elevation/distance, not both")
                pos = obj["position"]
                if not isinstance(pos, list):
                    raise WebError("bad_message", f'move: "position" must be an array [x, y] or [x, y, z], got {_kind(pos)}')
                messages = [(f"/source/{sid}/position", pos)]
            elif sph:
                messages = [(f"/source/{sid}/{k}", [obj[k]]) for k in sph]
            else:
                raise WebError("bad_message", "move: needs position [x, y, z] or azimuth / elevation / distance")
            cmds = []
            for address, args in messages:
                addr = address
                cmds.extend(parse_message(address, args, ids))
        except ControlError as exc:
            self.core.reject(exc, origin, addr)
            raise
        with self._acting_as(client):
            self.core.apply_commands(cmds, origin)
        return self._ack(req_id, "move", applied=len(cmds))

    def _r_panic(self, obj, req_id, origin, client):
        with self._acting_as(client):
            self.core.set_panic(True, origin=origin)
        return self._ack(req_id, "panic", panic=True)

    def _r_release(self, obj, req_id, origin, client):
        with self._acting_as(client):
            self.core.set_panic(False, origin=origin)
        return self._ack(req_id, "release", panic=False)

    def _r_layout(self, obj, req_id, origin, client):
        name = obj.get("name")
        if not isinstance(name, str):
            raise WebError("bad_message", f'layout: "name" must be a layout name (see GET /api/layouts), got {_kind(name)}')
        try:
            path = self.core.layout_path_for(name)
        except ControlError as exc:
            self.core.reject(exc, origin, f"layout {_clip(name, 40)}")
            raise
        with self._acting_as(client):
            try:
                self.core.load_layout_file(path, origin=origin)
            except FieldmixError as exc:  # ConfigError: reported by the core, old layout kept
                raise WebError("layout_error", f"{exc} (the previous layout keeps playing)") from None
        return self._ack(req_id, "layout", layout=self.core.state.layout.name)

    def _r_ping(self, obj, req_id, origin, client):
        return {"type": "pong", "id": req_id, "time": round(time.time(), 6)}

    def _r_snapshot(self, obj, req_id, origin, client):
        return {"type": "state", "id": req_id, "state": self.core.snapshot()}

    def _r_subscribe(self, obj, req_id, origin, client):
        for k in ("meters", "status"):
            if k in obj and not isinstance(obj[k], bool):
                raise WebError("bad_message", f'subscribe: "{k}" must be true or false, got {_kind(obj[k])}')
        if "meters" in obj:
            client.want_meters = obj["meters"]
        if "status" in obj:
            client.want_status = obj["status"]
        if client.want_meters or client.want_status:
            client.wake.set()
        return self._ack(req_id, "subscribe", meters=client.want_meters, status=client.want_status)

    # ================================================================ websocket
    async def _ws(self, request: web.Request) -> web.StreamResponse:
        refused = self._guard(request, token=True, origin=True)
        if refused is not None:
            return refused
        if self._closing:
            return self._json_error(503, "busy", "the server is stopping")
        if len(self._clients) >= self.max_clients:
            self._stats["refused"]["busy"] += 1
            return self._json_error(503, "busy", f"too many clients (at most {self.max_clients})")
        ws = web.WebSocketResponse(
            max_msg_size=self.hard_max_message, compress=False, heartbeat=self.heartbeat, autoping=True, writer_limit=65536
        )
        await ws.prepare(request)
        transport = request.transport
        if self.sndbuf and transport is not None:
            sock = transport.get_extra_info("socket")
            try:
                sock.setsockopt(socket.SOL_SOCKET, socket.SO_SNDBUF, self.sndbuf)
            except (OSError, AttributeError):
                pass
        loop = asyncio.get_running_loop()
        cid = next(self._ids)
        c = _Client(cid, ws, transport, request.remote or "?", TokenBucket(self.rate, self.burst, loop.time()), self._seq)
        # snapshot and registration with no await in between: no event can fall in a gap
        c.replies.append(dumps(self._hello(c)))
        self._clients[cid] = c
        self._stats["connections"] += 1
        c.wake.set()
        c.task = asyncio.create_task(self._writer(c), name=f"fieldmix-web-client-{cid}")
        self._publish_status()  # a fresh status frame (with the new client count) for everyone
        log.info("web: client %d connected from %s (%d connected)", cid, c.remote, len(self._clients))
        try:
            await self._reader(c)
        except Exception:
            log.exception("web: client %d reader failed", cid)
        finally:
            self._forget(c)
        return ws

    def _hello(self, c: _Client) -> dict:
        return {
            "type": "hello",
            "protocol": PROTOCOL,
            "server": "fieldmix",
            "version": FIELDMIX_VERSION,
            "client": c.id,
            "requests": list(WS_REQUESTS),
            "event_hz": self.event_hz,
            "status_hz": self.status_hz,
            "meters": {
                "hz": self.meter_hz,
                "peak": "sample peak, dB FS: 20 log10 |x|, full scale = 1.0 = 0 dB FS",
                "rms": "RMS, dB FS per AES17: a full-scale sine reads 0 dB FS (plain RMS + 3.01 dB)",
                "floor_db": METER_FLOOR_DB,
                "inputs": "in the order of state.sources",
                "outputs": "in the order of state.layout.speakers",
            },
            "limits": {
                "max_message": self.max_message,
                "hard_max_message": self.hard_max_message,
                "rate_per_s": self.rate,
                "burst": self.burst,
            },
            "state": self.core.snapshot(),
        }

    async def _reader(self, c: _Client) -> None:
        ws = c.ws
        n = 0
        while not c.closing:
            msg = await ws.receive()
            if msg.type in (WSMsgType.TEXT, WSMsgType.BINARY):
                self._on_frame(c, msg)
                if c.close_request is not None:
                    await self._close(c, *c.close_request)
                    break
                n += 1
                if n % 16 == 0:
                    await asyncio.sleep(0)  # a flood must not keep the loop to itself
            elif msg.type == WSMsgType.ERROR:
                exc = msg.data if isinstance(msg.data, BaseException) else ws.exception()
                if getattr(exc, "code", None) == CLOSE_TOO_BIG:
                    self._stats["closed_too_big"] += 1
                log.info("web: client %d: %s", c.id, _clip(exc, 200))
                break
            else:  # CLOSE, CLOSING, CLOSED
                break

    def _on_frame(self, c: _Client, msg) -> None:
        now = asyncio.get_running_loop().time()
        c.received += 1
        self._stats["messages_in"] += 1
        if not c.bucket.take(now):
            self._refuse_rate(c, now)
            return
        if msg.type == WSMsgType.BINARY:
            reply = self._error_reply(None, None, "bad_message", "binary frames are not accepted: send JSON text")
        else:
            reply = self.handle_text(msg.data, origin="web", client=c)
        self._reply(c, reply)

    def _reply(self, c: _Client, reply: dict) -> None:
        try:
            text = dumps(reply)
        except (TypeError, ValueError) as exc:  # pragma: no cover - replies are built from checked values
            log.error("web: reply not serialisable: %s", exc)
            text = dumps(self._error_reply(reply.get("id"), reply.get("request"), "internal", "reply not serialisable"))
        if len(c.replies) >= 1024:  # it sends and never reads
            self._drop(c, "not reading its replies")
            return
        c.replies.append(text)
        c.wake.set()

    def _refuse_rate(self, c: _Client, now: float) -> None:
        self._stats["rate_limited"] += 1
        c.rl_unreported += 1
        if now - c.flood_t0 > 5.0:
            c.flood_t0, c.flood_n = now, 0
        c.flood_n += 1
        if c.flood_n > self.flood_close:
            self._stats["closed_flood"] += 1
            log.warning("web: client %d closed: a flood of %d messages in 5 s over its rate", c.id, c.flood_n)
            c.close_request = (CLOSE_POLICY, "flood: too many messages over the rate limit")
            return
        if now >= c.rl_next_report:
            self._report_rate(c, now)

    def _report_rate(self, c: _Client, now: float) -> None:
        n, c.rl_unreported = c.rl_unreported, 0
        c.rl_next_report = now + 1.0
        self._reply(c, self._error_reply(
            None, None, "rate_limited",
            f"{n} message{'s' if n != 1 else ''} refused: more than {self.rate:g} messages a second (burst {self.burst:g}); "
            "refused messages are not read, and further refusals are reported at most once a second",
            refused=n,
        ))  # fmt: skip

    async def _close(self, c: _Client, code: int, reason: str) -> None:
        if c.task is not None:
            c.task.cancel()
        try:
            await asyncio.wait_for(c.ws.close(code=code, message=reason.encode()[:120]), 1.0)
        except (asyncio.TimeoutError, Exception):
            self._abort(c)

    def _abort(self, c: _Client) -> None:
        t = c.transport
        if t is not None:
            try:
                t.abort()
            except Exception:
                pass

    def _drop(self, c: _Client, why: str) -> None:
        if c.dropped:
            return
        c.dropped = why
        c.closing = True
        self._stats["dropped_slow"] += 1
        log.warning("web: client %d dropped: %s", c.id, why)
        if c.task is not None:
            c.task.cancel()
        self._abort(c)  # its buffers are full: a close frame would never get through
        self._forget(c)

    def _forget(self, c: _Client) -> None:
        if self._clients.pop(c.id, None) is not None:
            log.info("web: client %d gone (%d connected)", c.id, len(self._clients))
            if not self._closing:
                self._publish_status()
        if c.task is not None and not c.task.done():
            c.task.cancel()

    async def _writer(self, c: _Client) -> None:
        loop = asyncio.get_running_loop()
        frame = 1.0 / self.event_hz
        try:
            while True:
                await c.wake.wait()
                c.wake.clear()
                if not c.replies:  # replies go at once; events at most event_hz batches a second
                    delay = c.next_at - loop.time()
                    if delay > 0:
                        await asyncio.sleep(delay)
                texts = list(c.replies)
                c.replies.clear()
                texts.extend(self._collect(c))
                if not texts:
                    continue
                text = texts[0] if len(texts) == 1 else '{"type":"batch","messages":[' + ",".join(texts) + "]}"
                c.sending_since = loop.time()
                await c.ws.send_str(text)
                c.sending_since = None
                c.next_at = loop.time() + frame
                c.frames += 1
                c.messages += len(texts)
                c.bytes += len(text)
                self._stats["frames_sent"] += 1
                self._stats["messages_sent"] += len(texts)
                self._stats["bytes_sent"] += len(text)
        except asyncio.CancelledError:
            pass
        except (ConnectionError, RuntimeError) as exc:  # closed under us
            log.debug("web: client %d writer stopped: %s", c.id, exc)
            c.closing = True
        except Exception:
            log.exception("web: client %d writer failed", c.id)
            c.closing = True

    def _collect(self, c: _Client) -> list:
        items = []
        base = c.base_seq
        seen = c.seen
        for key, (seq, out) in self._latest.items():
            if seq > seen.get(key, base) and c.wants(key):
                items.append((seq, key, out))
        if not items:
            return []
        items.sort(key=lambda it: it[0])
        texts = []
        for seq, key, out in items:
            seen[key] = seq
            t = out.text
            if t:
                texts.append(t)
        return texts

    def _publish(self, key, msg: dict) -> None:
        self._seq += 1
        self._latest[key] = (self._seq, _Out(msg))
        for c in self._clients.values():
            if c.wants(key):
                c.wake.set()

    # ================================================================ core events
    def _on_core_event(self, ev: dict) -> None:
        """Core listener: keep the latest message per key and wake the writers. Never raises."""
        try:
            typ = ev.get("type")
            msg = dict(ev)
            if typ == "source":
                key = ("source", ev["source"]["id"])
            elif typ in ("master", "layout"):
                key = typ
            elif typ == "error":
                err = ev.get("error") or {}
                key = ("alert", err.get("kind"))
                msg = {"type": "alert", "alert": err}
            else:
                key = ("event", str(typ))
            if self._acting is not None:
                msg["client"] = self._acting
            self._stats["events"] += 1
            self._publish(key, msg)
        except Exception:  # pragma: no cover - defensive: the core would drop us
            log.exception("web: core event not forwarded: %r", ev)

    # ================================================================ meters and status
    async def _ticker(self, hz: float, fn: Callable[[float], None]) -> None:
        loop = asyncio.get_running_loop()
        period = 1.0 / hz
        nxt = loop.time() + period
        while True:
            await asyncio.sleep(max(0.0, nxt - loop.time()))
            now = loop.time()
            try:
                fn(now)
            except Exception:
                self._ratelog.warning("web: a periodic task failed")
                log.debug("periodic task failure", exc_info=True)
            nxt += period
            if nxt < now:  # fell behind (a busy loop): skip, do not burst
                nxt = now + period

    def _meter_tick(self, now: float) -> None:
        for c in list(self._clients.values()):  # housekeeping: slow clients, rate reports
            if c.sending_since is not None and now - c.sending_since > self.drop_after:
                self._drop(c, f"stayed behind: a send waited more than {self.drop_after:g} s")
            elif c.rl_unreported and now >= c.rl_next_report:
                self._report_rate(c, now)
        link = self.core.link
        if link is None or not any(c.want_meters for c in self._clients.values()):
            return
        m = link.meters()
        if m.get("valid"):
            key = (m.get("frame"), m.get("layout_generation"))
            if key == self._last_meter_frame:
                return
            self._last_meter_frame = key
        else:
            if now - self._last_invalid_meters < 1.0:
                return
            self._last_invalid_meters = now
            self._last_meter_frame = None
        self._stats["meters_frames"] += 1
        self._publish("meters", meter_message(m))

    def _status_tick(self, now: float) -> None:
        self._update_rates(now)
        self._publish_status()

    def _publish_status(self) -> None:
        if not any(c.want_status for c in self._clients.values()):
            return
        self._stats["status_frames"] += 1
        self._publish("status", {"type": "status", "status": self.status_payload()})

    def _update_rates(self, now: float) -> None:
        applied = dict(self.core.applied)
        rejected = sum(self.core.rejected.values())
        if self._rate_base is not None:
            t0, a0, r0 = self._rate_base
            dt = max(1e-6, now - t0)
            self._rates = {
                "applied_per_s": {k: round((v - a0.get(k, 0)) / dt, 1) for k, v in applied.items()},
                "rejected_per_s": round((rejected - r0) / dt, 1),
            }
        self._rate_base = (now, applied, rejected)

    def _services(self) -> dict:
        if self.stats_callback is None:
            return {}
        try:
            s = self.stats_callback()
            if not isinstance(s, dict):
                raise TypeError(f"stats callback returned {type(s).__name__}, not a dict")
            dumps(s)
            return s
        except Exception as exc:
            self._ratelog.warning(f"web: stats callback failed: {exc}")
            return {}

    def status_payload(self) -> dict:
        """What status frames and GET /api/status carry: core.status() plus web and service figures."""
        st = self.core.status()
        services = self._services()
        audio = st.get("audio") or {}
        osc = services.get("osc") if isinstance(services.get("osc"), dict) else {}
        osc_rate = None
        for k in ("messages_per_s", "rate"):  # the OSC server's own figure, if it gives one
            v = osc.get(k)
            if not isinstance(v, bool) and isinstance(v, numbers.Real) and math.isfinite(v):
                osc_rate = v
                break
        if osc_rate is None:  # else: commands the core applied from OSC per second
            osc_rate = (self._rates.get("applied_per_s") or {}).get("osc", 0.0)
        load = audio.get("dsp_load_mean")
        st["web"] = {
            "clients": len(self._clients),
            "connections": self._stats["connections"],
            "dropped_slow": self._stats["dropped_slow"],
            "rate_limited": self._stats["rate_limited"],
        }
        st["rates"] = self._rates
        st["services"] = services
        st["summary"] = {
            "audio": audio.get("state"),
            "backend": audio.get("backend"),
            "device": audio.get("device"),
            "samplerate": audio.get("samplerate"),
            "blocksize": audio.get("blocksize"),
            "xruns": audio.get("xruns"),
            "dsp_load": round(float(load), 4) if isinstance(load, numbers.Real) else None,
            "osc_per_s": round(float(osc_rate), 1),
            "clients": len(self._clients),
            "layout": st.get("layout"),
            "layout_error": st.get("layout_error"),
            "panic": st.get("panic"),
        }
        return st

    # ================================================================ reports
    def stats(self) -> dict:
        s = {k: (dict(v) if isinstance(v, dict) else v) for k, v in self._stats.items()}
        s["clients"] = len(self._clients)
        return s

    def client_info(self) -> list[dict]:
        try:
            loop_now = asyncio.get_running_loop().time()
        except RuntimeError:
            loop_now = time.monotonic()
        out = []
        for c in self._clients.values():
            t = c.transport
            out.append({
                "id": c.id,
                "remote": c.remote,
                "connected_s": round(time.time() - c.connected_at, 3),
                "received": c.received,
                "frames": c.frames,
                "messages": c.messages,
                "bytes": c.bytes,
                "replies_queued": len(c.replies),
                "keys_tracked": len(c.seen),
                "sending_for_s": None if c.sending_since is None else round(loop_now - c.sending_since, 3),
                "buffered_bytes": t.get_write_buffer_size() if t is not None and not t.is_closing() else 0,
                "meters": c.want_meters,
                "status": c.want_status,
            })  # fmt: skip
        return out


def meter_message(m: dict) -> dict:
    """An AudioLink.meters() frame (linear) -> the websocket's meters message (dB FS, rounded)."""
    from ..engine import peak_dbfs, rms_dbfs

    def conv(values, fn):
        a = np.nan_to_num(np.asarray(values, dtype=np.float64), nan=0.0, posinf=1e6, neginf=1e6)
        if a.size == 0:
            return []
        return [round(float(v), 1) for v in np.atleast_1d(fn(a, floor_db=METER_FLOOR_DB))]

    age = m.get("age_s")
    return {
        "type": "meters",
        "valid": bool(m.get("valid")),
        "frame": int(m.get("frame") or 0),
        "age_ms": None if age is None or not math.isfinite(age) else round(age * 1000.0, 1),
        "panic": bool(m.get("panic")),
        "layout_generation": int(m.get("layout_generation") or 0),
        "first_block": int(m.get("first_block") or 0),
        "blocks": int(m.get("blocks") or 0),
        "panic_block": int(m.get("panic_block") or 0),
        "in_peak": conv(m.get("in_peak", ()), peak_dbfs),
        "in_rms": conv(m.get("in_rms", ()), rms_dbfs),
        "out_peak": conv(m.get("out_peak", ()), peak_dbfs),
        "out_rms": conv(m.get("out_rms", ()), rms_dbfs),
    }


__all__ = ["WebServer", "WebError", "PROTOCOL", "WEB_REASONS", "METER_FLOOR_DB", "meter_message", "dumps",
           "is_loopback_host", "normalise_origin"]  # fmt: skip
