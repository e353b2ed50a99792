"""DNS-SD advertising (fieldmix.live.discovery.Advertiser).

The network test advertises on the loopback interface only (127.0.0.1: no packet leaves
the machine) and browses the services back with a second, independent zeroconf instance
(zeroconf's AsyncServiceBrowser), then resolves them and checks port, address and TXT.
Multicast over loopback works on this machine; where it does not, the network tests skip
with the reason, except under CI=true, where that is a failure.
"""

from __future__ import annotations

import asyncio
import logging
import socket
import sys
import time

import pytest

from conftest import IN_CI
from fieldmix import __version__
from fieldmix.live.discovery import (
    HTTP_TCP,
    OSC_TCP,
    OSC_UDP,
    Advertiser,
    instance_name,
    is_loopback,
    wants_advertising,
    zeroconf_available,
)

WAIT = 15.0  # safety bound for browsing (registration itself takes 1-2 s of probing)


def need_zeroconf():
    if zeroconf_available():
        return
    if IN_CI:
        pytest.fail("python-zeroconf is required under CI=true but is not installed")
    pytest.skip("python-zeroconf is not installed (pip install zeroconf)")


def multicast_on_loopback() -> tuple[bool, str]:
    """Send one multicast datagram out of 127.0.0.1 and try to receive it."""
    group = "239.255.77.77"  # administratively scoped; and it stays on lo anyway
    rx = socket.socket(socket.AF_INET, socket.SOCK_DGRAM, socket.IPPROTO_UDP)
    tx = socket.socket(socket.AF_INET, socket.SOCK_DGRAM, socket.IPPROTO_UDP)
    try:
        rx.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        rx.bind(("", 0))
        port = rx.getsockname()[1]
        rx.setsockopt(socket.IPPROTO_IP, socket.IP_ADD_MEMBERSHIP, socket.inet_aton(group) + socket.inet_aton("127.0.0.1"))
        rx.settimeout(2.0)
        tx.setsockopt(socket.IPPROTO_IP, socket.IP_MULTICAST_IF, socket.inet_aton("127.0.0.1"))
        tx.setsockopt(socket.IPPROTO_IP, socket.IP_MULTICAST_LOOP, 1)
        tx.setsockopt(socket.IPPROTO_IP, socket.IP_MULTICAST_TTL, 0)
        tx.sendto(b"fieldmix-probe", (group, port))
        data, _ = rx.recvfrom(64)
        return data == b"fieldmix-probe", "received"
    except OSError as exc:
        return False, f"{type(exc).__name__}: {exc}"
    finally:
        rx.close()
        tx.close()


def need_multicast():
    need_zeroconf()
    ok, why = multicast_on_loopback()
    if ok:
        return
    if IN_CI:
        pytest.fail(f"multicast over loopback does not work here ({why}); CI=true needs it")
    pytest.skip(f"multicast over loopback does not work in this sandbox ({why})")


# ---------------------------------------------------------------------------- deciding


@pytest.mark.parametrize("host", ["127.0.0.1", "127.3.2.1", "::1", "[::1]", "localhost", "LOCALHOST", "box.localhost"])
def test_loopback_hosts_advertise_nothing(host):
    assert is_loopback(host) and not wants_advertising(host)
    adv = Advertiser("show", 9000, 8080, host)
    assert not adv.should_advertise

    async def main():
        assert await adv.start() is False
        assert adv._zc is None and not adv.active and adv.names == {}  # no zeroconf was even opened
        await adv.stop()

    asyncio.run(main())


@pytest.mark.parametrize("host", ["0.0.0.0", "::", "", "192.0.2.10", "fd00::2", "stage-box.example"])
def test_other_hosts_advertise(host):
    assert not is_loopback(host) and wants_advertising(host)
    assert Advertiser("show", 9000, 8080, host).should_advertise
    assert not wants_advertising(host, enabled=False)


def test_flag_turns_it_off():
    adv = Advertiser("show", 9000, 8080, "0.0.0.0", enabled=False)
    assert not adv.should_advertise

    async def main():
        assert await adv.start() is False  # and nothing was opened: no packet on any interface
        assert adv._zc is None

    asyncio.run(main())


def test_without_zeroconf_the_show_goes_on(monkeypatch, caplog):
    monkeypatch.setitem(sys.modules, "zeroconf", None)  # import zeroconf -> ImportError
    adv = Advertiser("show", 9000, 8080, "198.51.100.7")

    async def main():
        with caplog.at_level(logging.WARNING, logger="fieldmix.discovery"):
            assert await adv.start() is False
        assert not adv.active and "zeroconf is not installed" in adv.error
        assert "not advertising over DNS-SD" in caplog.text
        await adv.stop()

    asyncio.run(main())


def test_bad_ports_are_refused():
    for bad in (0, 70000, -1, "9000", 9000.0, True):
        with pytest.raises(ValueError):
            Advertiser("show", bad, 8080, "0.0.0.0")


def test_instance_names():
    assert instance_name("Harbour at dusk") == "Harbour at dusk"
    assert instance_name("v1.2 show") == "v1-2 show"  # a dot would split the DNS name
    assert instance_name("line\nbreak\x00") == "line break"
    assert instance_name("") == "fieldmix"
    long = instance_name("é" * 100)  # 2 bytes each: cut at 63 bytes, never inside a character
    assert len(long.encode("utf-8")) <= 63 and long == "é" * 31


# ---------------------------------------------------------------------------- records


def test_service_records():
    need_zeroconf()
    # a documentation address (RFC 5737): the records are only built, nothing is sent
    adv = Advertiser("Harbour", 9000, 8080, "198.51.100.7", osc_tcp_port=9001, token_required=True, server="stagebox.local.")
    infos = {i.type: i for i in adv.service_infos()}
    assert set(infos) == {OSC_UDP, OSC_TCP, HTTP_TCP}
    osc, tcp, http = infos[OSC_UDP], infos[OSC_TCP], infos[HTTP_TCP]
    assert osc.name == "Harbour._osc._udp.local." and osc.port == 9000
    assert tcp.name == "Harbour._osc._tcp.local." and tcp.port == 9001
    assert http.name == "Harbour._http._tcp.local." and http.port == 8080
    for i in infos.values():
        assert i.parsed_addresses() == ["198.51.100.7"] and i.server == "stagebox.local."
        assert i.properties[b"txtvers"] == b"1" and i.properties[b"app"] == b"fieldmix"
        assert i.properties[b"version"] == __version__.encode()
        assert i.text.startswith(b"\x09txtvers=1")  # RFC 6763 6.7: txtvers first
    assert osc.properties[b"osc"] == b"1.0" and osc.properties[b"framing"] == b"none"
    assert tcp.properties[b"framing"] == b"slip"
    assert http.properties[b"path"] == b"/" and http.properties[b"api"] == b"/api/state"
    assert http.properties[b"auth"] == b"token"
    assert b"osc" not in http.properties and b"path" not in osc.properties

    plain = Advertiser("Harbour", 9000, None, "198.51.100.7")
    assert [i.type for i in plain.service_infos()] == [OSC_UDP]  # no HTTP, no TCP: not advertised
    assert b"auth" not in Advertiser("x", 1, 2, "198.51.100.7").service_infos()[1].properties


def test_wildcard_points_to_real_addresses_not_loopback():
    need_zeroconf()
    addrs = Advertiser("show", 9000, 8080, "0.0.0.0").addresses()
    assert all(not is_loopback(a) for a in addrs)
    assert all(":" not in a for a in addrs)  # 0.0.0.0 is IPv4
    assert Advertiser("show", 9000, 8080, "192.0.2.10").addresses() == ["192.0.2.10"]
    assert Advertiser("show", 9000, 8080, "127.0.0.1", allow_loopback=True).addresses() == ["127.0.0.1"]


# ---------------------------------------------------------------------------- on the wire (loopback)


async def _browse(types, want, timeout=WAIT):
    """Browse ``types`` on loopback until ``want(found)`` holds; returns (found, browser, zc)."""
    from zeroconf import IPVersion, ServiceStateChange
    from zeroconf.asyncio import AsyncServiceBrowser, AsyncZeroconf

    zc = AsyncZeroconf(interfaces=["127.0.0.1"], ip_version=IPVersion.V4Only)
    found: dict = {}
    changed = asyncio.Event()

    def on_change(zeroconf, service_type, name, state_change):
        found.setdefault(name, []).append(state_change)
        changed.set()

    browser = AsyncServiceBrowser(zc.zeroconf, list(types), handlers=[on_change])
    deadline = time.monotonic() + timeout
    while not want(found):
        left = deadline - time.monotonic()
        if left <= 0:
            break
        changed.clear()
        try:
            await asyncio.wait_for(changed.wait(), left)
        except asyncio.TimeoutError:
            pass
    return found, browser, zc, ServiceStateChange


def test_advertise_and_browse_back_on_loopback():
    need_multicast()
    from zeroconf import ServiceStateChange

    async def main():
        adv = Advertiser("fieldmix test show", 9123, 8123, "127.0.0.1", allow_loopback=True, osc_tcp_port=9124)
        t0 = time.monotonic()
        assert await adv.start() is True, adv.error
        registered = time.monotonic() - t0
        assert adv.active and set(adv.names) == {OSC_UDP, OSC_TCP, HTTP_TCP}
        names = set(adv.names.values())
        found, browser, zc, _ = await _browse([OSC_UDP, OSC_TCP, HTTP_TCP], lambda f: names <= set(f))
        try:
            assert names <= set(found), f"browsed {found}, wanted {names}"
            for stype, port in ((OSC_UDP, 9123), (OSC_TCP, 9124), (HTTP_TCP, 8123)):
                info = await zc.async_get_service_info(stype, adv.names[stype], timeout=5000)
                assert info is not None, stype
                assert info.port == port and info.parsed_addresses() == ["127.0.0.1"]
                assert info.properties[b"app"] == b"fieldmix"
                assert info.properties[b"version"] == __version__.encode()
            info = await zc.async_get_service_info(OSC_UDP, adv.names[OSC_UDP], timeout=5000)
            assert info.properties[b"osc"] == b"1.0" and info.properties[b"framing"] == b"none"
            # stop: goodbye packets remove the services from the browser
            await adv.stop()
            assert not adv.active
            deadline = time.monotonic() + WAIT
            while time.monotonic() < deadline and not all(ServiceStateChange.Removed in found[n] for n in names):
                await asyncio.sleep(0.05)
            assert all(ServiceStateChange.Removed in found[n] for n in names), found
        finally:
            await adv.stop()
            await browser.async_cancel()
            await zc.async_close()
        print(f"\nregistered in {registered:.2f} s (RFC 6762 probing), browsed back and resolved on 127.0.0.1")

    asyncio.run(asyncio.wait_for(main(), 60))


def test_name_conflict_gets_a_new_name():
    need_multicast()

    async def main():
        a = Advertiser("twin", 9131, None, "127.0.0.1", allow_loopback=True)
        b = Advertiser("twin", 9132, None, "127.0.0.1", allow_loopback=True, server="other-host.local.")
        try:
            assert await a.start() is True, a.error
            assert await b.start(wait=False) is True
            assert await b.wait_started() is True, b.error
            assert a.names[OSC_UDP] == "twin._osc._udp.local."
            assert b.names[OSC_UDP] != a.names[OSC_UDP] and b.names[OSC_UDP].startswith("twin")
            names = {a.names[OSC_UDP], b.names[OSC_UDP]}
            found, browser, zc, _ = await _browse([OSC_UDP], lambda f: names <= set(f))
            try:
                assert names <= set(found)
                ports = set()
                for n in names:
                    info = await zc.async_get_service_info(OSC_UDP, n, timeout=5000)
                    ports.add(info.port)
                assert ports == {9131, 9132}
            finally:
                await browser.async_cancel()
                await zc.async_close()
        finally:
            await a.stop()
            await b.stop()

    asyncio.run(asyncio.wait_for(main(), 60))
