"""DNS-SD advertisement, found and resolved by a stock zeroconf browser on loopback only."""

from __future__ import annotations

import asyncio
import socket

import pytest
from zeroconf import IPVersion, ServiceStateChange
from zeroconf.asyncio import AsyncServiceBrowser, AsyncZeroconf

from daemon.web.discovery import HTTP_TYPE, MAX_INSTANCE_BYTES, SERVICE_TYPE, Advertiser, instance_name, listen_addresses

pytestmark = pytest.mark.timeout(60)


async def browse(service_type: str, timeout_s: float = 10.0) -> list[str]:
    zc = AsyncZeroconf(interfaces=["127.0.0.1"], ip_version=IPVersion.V4Only)
    found: list[str] = []
    seen = asyncio.Event()

    def on_change(zeroconf, service_type, name, state_change):  # noqa: ARG001 - zeroconf's handler signature
        if state_change is ServiceStateChange.Added:
            found.append(name)
            seen.set()

    browser = AsyncServiceBrowser(zc.zeroconf, service_type, handlers=[on_change])
    try:
        await asyncio.wait_for(seen.wait(), timeout_s)
        infos = []
        for name in found:
            info = await zc.async_get_service_info(service_type, name, timeout=3000)
            infos.append(info)
        return infos
    finally:
        await browser.async_cancel()
        await zc.async_close()


async def test_both_services_are_found_and_resolved_on_loopback():
    adv = Advertiser(host="127.0.0.1", port=8470, scope_name="Larkspur Row bench scope (simulated)",
                     profile_name="sim", token_to_view=True)
    names = await adv.start()
    try:
        assert names == [f"Larkspur Row bench scope (simulated).{SERVICE_TYPE}",
                         f"Larkspur Row bench scope (simulated).{HTTP_TYPE}"]
        for stype in (SERVICE_TYPE, HTTP_TYPE):
            infos = await browse(stype)
            info = next(i for i in infos if i is not None and i.name.startswith("Larkspur Row"))
            # RFC 6763 section 4.1: <Instance> . <Service> . <Domain>, the service as _name._tcp.
            instance, _, rest = info.name.partition(".")
            assert rest == stype and stype.endswith("._tcp.local.") and stype.startswith("_")
            assert info.port == 8470
            assert [socket.inet_ntoa(a) for a in info.addresses] == ["127.0.0.1"]
            txt = {k.decode(): (v or b"").decode() for k, v in info.properties.items()}
            assert txt["api"] == "v1"
            assert txt["token"] == "view-and-control"
            assert txt["path"] == "/"
    finally:
        await adv.stop()


def test_instance_names_fit_dns_sd():
    long = "Larkspur Row — incubator 3, shelf 2, the long scope with the new LED ring and a very long name"
    name = instance_name(long)
    assert len(name.encode()) <= MAX_INSTANCE_BYTES  # RFC 6763 section 4.1.1: at most 63 octets
    assert "." not in instance_name("v1.2 scope")
    assert instance_name("   ") == "phasewatch"


def test_loopback_server_is_advertised_on_loopback_only():
    assert listen_addresses("127.0.0.1") == ["127.0.0.1"]
    adv = Advertiser(host="127.0.0.1", port=1, scope_name="x", profile_name="sim", token_to_view=False)
    assert adv._interfaces() == ["127.0.0.1"]
    assert adv.txt["token"] == "control"
    # Address arithmetic only: nothing is bound or advertised on the wildcard here.
    every = listen_addresses("0.0.0.0")
    assert "127.0.0.1" not in every  # a LAN-wide server advertises its LAN addresses, not loopback
