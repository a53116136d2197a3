"""DNS-SD over multicast DNS: lets browsers and tools on the lab network find the scope.

Two services are advertised for the same server (RFC 6763): the product's own
``_phasewatch._tcp`` for tools that know the API, and ``_http._tcp`` so that any DNS-SD
browser lists the web interface. TXT records carry the API version, the interface's
path and whether a token is needed to view. Advertising happens only on the interfaces
the server listens on: a server bound to loopback is never announced on the LAN.
"""

from __future__ import annotations

import ipaddress
import logging
import re
import socket

import psutil
from zeroconf import InterfaceChoice, IPVersion, ServiceInfo
from zeroconf.asyncio import AsyncZeroconf

from daemon import __version__
from daemon.web import API_VERSION

log = logging.getLogger(__name__)

SERVICE_TYPE = "_phasewatch._tcp.local."
HTTP_TYPE = "_http._tcp.local."
MAX_INSTANCE_BYTES = 63  # RFC 6763 section 4.1.1


def instance_name(scope_name: str) -> str:
    """A DNS-SD instance label from the scope's name: at most 63 bytes of UTF-8, no dots."""
    name = re.sub(r"\s+", " ", scope_name.replace(".", " ")).strip() or "phasewatch"
    raw = name.encode("utf-8")[:MAX_INSTANCE_BYTES]
    return raw.decode("utf-8", errors="ignore").strip()


def host_label() -> str:
    label = re.sub(r"[^A-Za-z0-9-]+", "-", socket.gethostname()).strip("-").lower() or "scope"
    return f"phasewatch-{label}"[:MAX_INSTANCE_BYTES]


def listen_addresses(host: str) -> list[str]:
    """The IP addresses a server bound to ``host`` can be reached at."""
    try:
        ip = ipaddress.ip_address(host)
    except ValueError:
        infos = socket.getaddrinfo(host, None, type=socket.SOCK_STREAM)
        return sorted({str(info[4][0]) for info in infos})
    if not ip.is_unspecified:
        return [str(ip)]
    found = []
    for addrs in psutil.net_if_addrs().values():
        for a in addrs:
            if a.family == (socket.AF_INET if ip.version == 4 else socket.AF_INET6):
                addr = ipaddress.ip_address(a.address.split("%")[0])
                if not addr.is_loopback and not addr.is_link_local:
                    found.append(str(addr))
    return sorted(set(found))


def txt_record(*, token_to_view: bool, scope_name: str, profile_name: str) -> dict[str, str]:
    return {
        "api": API_VERSION,
        "path": "/",  # the key DNS-SD browsers use for an _http._tcp service's page
        "token": "view-and-control" if token_to_view else "control",
        "version": __version__,
        "scope": scope_name[:200],
        "profile": profile_name[:100],
    }


class Advertiser:
    """Registers both services while the server runs (start/stop around it)."""

    def __init__(
        self, *, host: str, port: int, scope_name: str, profile_name: str, token_to_view: bool
    ) -> None:
        self.host = host
        self.port = port
        self.addresses = listen_addresses(host)
        self.txt = txt_record(token_to_view=token_to_view, scope_name=scope_name, profile_name=profile_name)
        self.instance = instance_name(scope_name)
        self._zc: AsyncZeroconf | None = None
        self.infos: list[ServiceInfo] = []

    def _interfaces(self) -> InterfaceChoice | list[str]:
        try:
            if ipaddress.ip_address(self.host).is_unspecified:
                return InterfaceChoice.All
        except ValueError:
            pass
        return list(self.addresses)

    def _ip_version(self) -> IPVersion:
        versions = {ipaddress.ip_address(a).version for a in self.addresses}
        if versions == {6}:
            return IPVersion.V6Only
        if versions == {4}:
            return IPVersion.V4Only
        return IPVersion.All

    async def start(self) -> list[str]:
        """Announce; returns the registered service names (changed on a name clash)."""
        if not self.addresses:
            log.warning("no address to advertise for host %s; DNS-SD advertisement skipped", self.host)
            return []
        self._zc = AsyncZeroconf(interfaces=self._interfaces(), ip_version=self._ip_version())
        server = f"{host_label()}.local."
        packed = [ipaddress.ip_address(a).packed for a in self.addresses]
        for stype in (SERVICE_TYPE, HTTP_TYPE):
            info = ServiceInfo(
                stype, f"{self.instance}.{stype}", port=self.port, properties=self.txt,
                server=server, addresses=packed,
            )
            await self._zc.async_register_service(info, allow_name_change=True)
            self.infos.append(info)
        return [i.name for i in self.infos]

    async def stop(self) -> None:
        if self._zc is None:
            return
        try:
            await self._zc.async_unregister_all_services()
        finally:
            await self._zc.async_close()
            self._zc = None
            self.infos.clear()
