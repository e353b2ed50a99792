"""DNS-SD (mDNS) advertising of the OSC and HTTP services: :class:`Advertiser`.

When the daemon listens beyond loopback, control surfaces and tablets on the same network
find it by browsing for ``_osc._udp`` (and ``_osc._tcp`` when the SLIP/TCP transport is
on) and ``_http._tcp`` (the control page), instead of typing an address. Built on the
python-zeroconf library's asyncio API (``AsyncZeroconf``), which does the multicast DNS
work of RFC 6762 / RFC 6763 (probing for a unique name, announcing, answering queries,
saying goodbye at exit).

- Only when listening beyond loopback: a loopback ``host`` (127.0.0.0/8, ::1,
  ``localhost``) advertises nothing, since nobody else could reach the services. The
  daemon's flag (``enabled=False``) turns advertising off altogether.
- Addresses: a wildcard host (``0.0.0.0`` / ``::`` / empty) advertises every non-loopback
  address of the machine and answers on every interface; a specific address advertises
  that address only and answers on that interface only.
- The instance name (``name``, e.g. the show's name) is the same for every service type;
  if another device already uses it, zeroconf picks a free variant (``name (2)``) and
  :attr:`Advertiser.names` tells which.
- TXT records (RFC 6763 section 6, ``txtvers`` first): ``app=fieldmix``, ``version``
  (fieldmix's version), on the OSC services ``osc=1.0`` (the packet format) and
  ``framing`` (``none`` on UDP, ``slip`` on TCP, as OSC 1.1 frames streams), on the HTTP
  service ``path=/`` (the DNS-SD convention for ``_http._tcp``), ``api=/api/state``, and
  ``auth=token`` when control over HTTP needs a token.
- Advertising is never essential: if zeroconf is missing, the network refuses multicast,
  or registration fails, the reason is logged once and the show goes on
  (:meth:`start` returns False; :attr:`Advertiser.error` keeps the reason).

Registration takes one to two seconds (the probing RFC 6762 prescribes);
``start(wait=False)`` runs it in the background.
"""

from __future__ import annotations

import asyncio
import importlib
import ipaddress
import logging
import re
import socket
from typing import Optional, Sequence

from .. import __version__

log = logging.getLogger("fieldmix.discovery")

OSC_UDP = "_osc._udp.local."
OSC_TCP = "_osc._tcp.local."
HTTP_TCP = "_http._tcp.local."
MAX_INSTANCE_BYTES = 63  # RFC 6763 section 4.1.1
REGISTER_TIMEOUT_S = 10.0
STOP_TIMEOUT_S = 3.0


def zeroconf_available() -> bool:
    try:
        importlib.import_module("zeroconf")
    except ImportError:
        return False
    return True


def is_loopback(host: str) -> bool:
    """True for 127.0.0.0/8, ::1 and ``localhost`` (names ending in ``.localhost`` too)."""
    h = (host or "").strip().strip("[]").lower()
    if h == "localhost" or h.endswith(".localhost"):
        return True
    try:
        return ipaddress.ip_address(h).is_loopback
    except ValueError:
        return False


def is_wildcard(host: str) -> bool:
    h = (host or "").strip().strip("[]")
    return h in ("", "0.0.0.0", "::", "*")


def wants_advertising(host: str, enabled: bool = True) -> bool:
    """Whether a daemon listening on ``host`` should advertise (not loopback, not turned off)."""
    return bool(enabled) and not is_loopback(host)


def instance_name(name: str) -> str:
    """A DNS-SD instance name: printable, no dots, at most 63 UTF-8 bytes."""
    text = re.sub(r"[\x00-\x1f\x7f]+", " ", str(name or "")).replace(".", "-").strip() or "fieldmix"
    raw = text.encode("utf-8")
    if len(raw) > MAX_INSTANCE_BYTES:
        text = raw[:MAX_INSTANCE_BYTES].decode("utf-8", "ignore").rstrip()
    return text


def host_label() -> str:
    """This machine's mDNS host name: ``<first label of the hostname>.local.``"""
    label = re.sub(r"[^A-Za-z0-9-]+", "-", socket.gethostname().split(".")[0]).strip("-")[:63] or "fieldmix"
    return f"{label}.local."


def local_addresses(include_v6: bool = False) -> list[str]:
    """The machine's non-loopback interface addresses (through ifaddr, zeroconf's helper)."""
    try:
        import ifaddr
    except ImportError:
        return []
    out: list[str] = []
    for adapter in ifaddr.get_adapters():
        for ip in adapter.ips:
            if isinstance(ip.ip, str):
                addr = ip.ip
            elif include_v6:
                addr = ip.ip[0]
            else:
                continue
            try:
                a = ipaddress.ip_address(addr.split("%")[0])
            except ValueError:
                continue
            if a.is_loopback or a.is_unspecified or (a.version == 6 and a.is_link_local):
                continue
            if str(a) not in out:
                out.append(str(a))
    return out


def _port(value, what: str) -> Optional[int]:
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, int) or not 1 <= value <= 65535:
        raise ValueError(f"{what}: expected a port 1..65535, got {value!r}")
    return value


class Advertiser:
    """Advertise fieldmix's OSC and HTTP services over DNS-SD while it runs.

    ``name``: instance name (the show's name, say). ``osc_port`` / ``http_port``: the UDP
    OSC port and the HTTP port (None: that service is not advertised). ``host``: the
    address the daemon listens on (``--listen``). ``osc_tcp_port``: the OSC-over-TCP (SLIP)
    port, if that transport is on. ``enabled``: False turns advertising off (the daemon's
    flag). ``token_required``: HTTP control needs a token (said in TXT, never the token).
    ``allow_loopback``: advertise on the loopback interface even for a loopback host
    (tests, and apps on the same machine); the services then point to 127.0.0.1.
    """

    def __init__(
        self,
        name: str,
        osc_port: Optional[int],
        http_port: Optional[int],
        host: str = "0.0.0.0",
        *,
        osc_tcp_port: Optional[int] = None,
        enabled: bool = True,
        token_required: bool = False,
        allow_loopback: bool = False,
        server: Optional[str] = None,
    ):
        self.name = instance_name(name)
        self.osc_port = _port(osc_port, "osc_port")
        self.http_port = _port(http_port, "http_port")
        self.osc_tcp_port = _port(osc_tcp_port, "osc_tcp_port")
        self.host = (host or "").strip().strip("[]")
        self.enabled = bool(enabled)
        self.token_required = bool(token_required)
        self.allow_loopback = bool(allow_loopback)
        self.server = server or host_label()
        self.error: Optional[str] = None
        self.names: dict[str, str] = {}  # service type -> registered full name
        self._zc = None
        self._infos: list = []
        self._task: Optional[asyncio.Task] = None

    # ----------------------------------------------------------------- deciding
    @property
    def loopback_only(self) -> bool:
        return is_loopback(self.host)

    @property
    def should_advertise(self) -> bool:
        if not self.enabled:
            return False
        if self.loopback_only:
            return self.allow_loopback
        return True

    @property
    def active(self) -> bool:
        """Registered and answering."""
        return bool(self.names) and self._zc is not None

    def addresses(self) -> list[str]:
        """The addresses the services point to."""
        if self.loopback_only:
            return ["127.0.0.1"] if ":" not in self.host else ["::1"]
        if is_wildcard(self.host):
            return local_addresses(include_v6=(self.host == "::"))
        try:
            return [str(ipaddress.ip_address(self.host.split("%")[0]))]
        except ValueError:  # a host name: what it resolves to
            try:
                infos = socket.getaddrinfo(self.host, None, type=socket.SOCK_DGRAM)
            except OSError:
                return []
            return list(dict.fromkeys(i[4][0] for i in infos if not ipaddress.ip_address(i[4][0].split("%")[0]).is_loopback))

    def _interfaces(self, addresses: Sequence[str]):
        from zeroconf import InterfaceChoice, IPVersion

        if is_wildcard(self.host):
            return InterfaceChoice.All, (IPVersion.All if self.host == "::" else IPVersion.V4Only)
        v6 = any(":" in a for a in addresses)
        v4 = any(":" not in a for a in addresses)
        version = IPVersion.All if (v4 and v6) else IPVersion.V6Only if v6 else IPVersion.V4Only
        return list(addresses), version

    # ------------------------------------------------------------------ records
    def properties(self, service_type: str) -> dict:
        """The TXT record of one service type (str -> str)."""
        props = {"txtvers": "1", "app": "fieldmix", "version": __version__}
        if service_type in (OSC_UDP, OSC_TCP):
            props["osc"] = "1.0"
            props["framing"] = "slip" if service_type == OSC_TCP else "none"
        elif service_type == HTTP_TCP:
            props["path"] = "/"
            props["api"] = "/api/state"
            if self.token_required:
                props["auth"] = "token"
        return props

    def service_infos(self, addresses: Optional[Sequence[str]] = None) -> list:
        """The zeroconf ServiceInfo records this advertiser registers."""
        from zeroconf.asyncio import AsyncServiceInfo

        addrs = list(self.addresses() if addresses is None else addresses)
        out = []
        for stype, port in ((OSC_UDP, self.osc_port), (OSC_TCP, self.osc_tcp_port), (HTTP_TCP, self.http_port)):
            if port is None:
                continue
            out.append(
                AsyncServiceInfo(
                    stype,
                    f"{self.name}.{stype}",
                    port=port,
                    properties=self.properties(stype),
                    server=self.server,
                    parsed_addresses=addrs,
                )
            )
        return out

    # -------------------------------------------------------------------- start
    async def start(self, wait: bool = True) -> bool:
        """Register the services. Returns True once they are advertised (``wait``), False if
        advertising is off, not wanted (loopback) or failed (logged). With ``wait=False``
        registration runs in the background and this returns at once (True if it started)."""
        if self._zc is not None or self._task is not None:
            return self.active if wait else True
        if not self.enabled:
            log.info("DNS-SD advertising is turned off")
            return False
        if not self.should_advertise:
            log.info("listening on loopback only (%s): not advertising over DNS-SD", self.host)
            return False
        if not zeroconf_available():
            self.error = "python-zeroconf is not installed (pip install zeroconf)"
            log.warning("not advertising over DNS-SD: %s", self.error)
            return False
        if not wait:
            self._task = asyncio.get_running_loop().create_task(self._register(), name="fieldmix-dns-sd")
            return True
        return await self._register()

    async def _register(self) -> bool:
        from zeroconf.asyncio import AsyncZeroconf

        addrs = self.addresses()
        if not addrs:
            self.error = f"no usable network address for {self.host or 'this machine'}"
            log.warning("not advertising over DNS-SD: %s", self.error)
            return False
        try:
            interfaces, version = self._interfaces(addrs)
            self._zc = AsyncZeroconf(interfaces=interfaces, ip_version=version)
            self._infos = self.service_infos(addrs)
            await asyncio.wait_for(self._register_all(), REGISTER_TIMEOUT_S)
        except asyncio.CancelledError:
            await self._close()
            raise
        except Exception as exc:  # OSError (no multicast), zeroconf's own errors, timeouts
            self.error = f"{type(exc).__name__}: {exc}" if str(exc) else type(exc).__name__
            log.warning("not advertising over DNS-SD: %s", self.error)
            await self._close()
            return False
        self.names = {i.type: i.name for i in self._infos}
        self.error = None
        log.info(
            "advertising over DNS-SD as \"%s\" on %s: %s",
            self._infos[0].name.split(".")[0] if self._infos else self.name,
            ", ".join(addrs),
            ", ".join(f"{i.type[:-7]} port {i.port}" for i in self._infos),
        )
        return True

    async def _register_all(self) -> None:
        # probing (and renaming on a conflict) runs for all services at once, then the announcements
        zc = self._zc
        announced = await asyncio.gather(*(zc.async_register_service(i, allow_name_change=True) for i in self._infos))
        await asyncio.gather(*announced)

    async def wait_started(self, timeout: float = REGISTER_TIMEOUT_S + 2) -> bool:
        """With ``start(wait=False)``: wait for the background registration; True if advertised."""
        if self._task is None:
            return self.active
        try:
            return bool(await asyncio.wait_for(asyncio.shield(self._task), timeout))
        except asyncio.TimeoutError:
            return False

    # --------------------------------------------------------------------- stop
    async def stop(self) -> None:
        """Say goodbye (the services disappear from browsers at once) and close."""
        task, self._task = self._task, None
        if task is not None and not task.done():
            task.cancel()
            try:
                await task
            except (asyncio.CancelledError, Exception):
                pass
        await self._close()

    async def _close(self) -> None:
        zc, self._zc = self._zc, None
        self.names = {}
        if zc is None:
            return
        try:
            await asyncio.wait_for(zc.async_unregister_all_services(), STOP_TIMEOUT_S)
        except Exception as exc:
            log.debug("DNS-SD goodbye failed: %s", exc)
        try:
            await asyncio.wait_for(zc.async_close(), STOP_TIMEOUT_S)
        except Exception as exc:
            log.debug("DNS-SD close failed: %s", exc)

    async def __aenter__(self) -> "Advertiser":
        await self.start()
        return self

    async def __aexit__(self, *exc) -> None:
        await self.stop()

    def status(self) -> dict:
        return {
            "enabled": self.enabled,
            "advertising": self.active,
            "names": dict(self.names),
            "error": self.error,
        }


__all__ = [
    "Advertiser",
    "OSC_UDP",
    "OSC_TCP",
    "HTTP_TCP",
    "is_loopback",
    "wants_advertising",
    "instance_name",
    "local_addresses",
    "zeroconf_available",
]
