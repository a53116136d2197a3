"""The ``[mqtt]`` section of a site configuration file, and the broker URL.

A site configuration file (``phasewatch serve --site FILE``) holds what belongs to the
lab rather than to the scope's hardware: today the broker the daemon reports to. It is
strict TOML like a profile: an unknown section or option is an error naming the file,
the section and the option::

    [mqtt]
    url = "mqtts://broker.lab.example:8883"
    username = "scope-incubator-3"
    password_file = "/etc/phasewatch/mqtt-password"
    topic_prefix = "phasewatch"
    scope_name = "incubator-3-left"

    [mqtt.tls]
    ca_file = "/etc/phasewatch/lab-ca.pem"

``--mqtt URL`` on the command line sets or overrides ``url``.
"""

from __future__ import annotations

import dataclasses
import re
import tomllib
import urllib.parse
from pathlib import Path
from typing import Any

from drivers.options import ConfigError, load_section, option, section, suggest

DEFAULT_PREFIX = "phasewatch"
PLAIN_PORT = 1883  # IANA-registered MQTT port (common practice)
TLS_PORT = 8883  # IANA-registered MQTT over TLS port (common practice)
SCHEMES = {"mqtt": PLAIN_PORT, "mqtts": TLS_PORT}
# Topic levels must not carry MQTT's wildcards or separators (MQTT 3.1.1 section 4.7).
_LEVEL_OK = re.compile(r"[A-Za-z0-9._-]+")


@dataclasses.dataclass(frozen=True)
class TlsOptions:
    ca_file: str = option("", doc="certificate authority that signed the broker's certificate (PEM); "
                                  "empty: the system's trusted authorities")
    cert_file: str = option("", doc="this scope's client certificate (PEM), when the broker asks for one")
    key_file: str = option("", doc="the private key of cert_file (PEM)")

    def __post_init__(self) -> None:
        if bool(self.cert_file) != bool(self.key_file):
            raise ValueError("cert_file: a client certificate needs both cert_file and key_file")


@dataclasses.dataclass(frozen=True)
class MqttOptions:
    url: str = option("", doc="broker address, mqtt://host[:port] or mqtts://host[:port] (TLS); empty: no MQTT")
    username: str = option("", doc="user name at the broker; empty: connect without credentials")
    password_file: str = option("", doc="file holding the broker password (one line; keep it mode 600)")
    topic_prefix: str = option(DEFAULT_PREFIX, doc="first topic level(s) of everything this scope publishes")
    scope_name: str = option("", doc="this scope's topic level; empty: made from the profile's scope name")
    keepalive_s: int = option(30, doc="keep-alive; the broker marks the scope offline about 1.5 times this "
                                      "after it goes silent", min=2, max=3600, unit="s")
    queue_size: int = option(1000, doc="messages kept while the broker is away; the oldest go first",
                             min=10, max=100000)
    thumbnail_px: int = option(160, doc="width of the retained thumbnail of the latest frame", min=32, max=640,
                               unit="px")
    page_url: str = option("", doc="address of this scope's own page for the fleet view; empty: worked out "
                                   "from --host and --port")
    tls: TlsOptions = section(TlsOptions, doc="TLS files (with an mqtts:// url)")

    def __post_init__(self) -> None:
        if self.url:
            parse_url(self.url)
        for level in filter(None, self.topic_prefix.split("/")):
            if not _LEVEL_OK.fullmatch(level):
                raise ValueError(f"topic_prefix: {self.topic_prefix!r} may hold only letters, digits, '.', '_', '-' "
                                 "and '/' between levels")
        if not self.topic_prefix.strip("/"):
            raise ValueError("topic_prefix: must not be empty")
        if self.scope_name and not _LEVEL_OK.fullmatch(self.scope_name):
            raise ValueError(f"scope_name: {self.scope_name!r} may hold only letters, digits, '.', '_' and '-'")
        if self.password_file and not self.username:
            raise ValueError("password_file: a password needs a username")

    @property
    def enabled(self) -> bool:
        return bool(self.url)

    @property
    def prefix(self) -> str:
        return self.topic_prefix.strip("/")

    @property
    def endpoint(self) -> Endpoint:
        return parse_url(self.url)

    def password(self) -> str | None:
        """The password from ``password_file`` (first line), or None without one."""
        if not self.password_file:
            return None
        path = Path(self.password_file)
        try:
            return path.read_text(encoding="utf-8").splitlines()[0] if path.stat().st_size else ""
        except OSError as exc:
            raise ConfigError(path, "mqtt", "password_file", f"cannot be read ({exc.strerror or exc})") from None


@dataclasses.dataclass(frozen=True)
class Endpoint:
    host: str
    port: int
    tls: bool


def parse_url(url: str) -> Endpoint:
    """``mqtt://host[:port]`` or ``mqtts://host[:port]``; raises ValueError("url: ...")."""
    parts = urllib.parse.urlsplit(url)
    if parts.scheme not in SCHEMES:
        raise ValueError(f"url: {url!r} must start with mqtt:// or mqtts://")
    if parts.username or parts.password:
        raise ValueError("url: put the user name in 'username' and the password in 'password_file', not in the url")
    if parts.path not in ("", "/") or parts.query or parts.fragment:
        raise ValueError(f"url: {url!r} must be only mqtt[s]://host[:port]")
    try:
        port = parts.port or SCHEMES[parts.scheme]
    except ValueError:
        raise ValueError(f"url: {url!r} has a port that is not a number from 1 to 65535") from None
    if not parts.hostname:
        raise ValueError(f"url: {url!r} names no host")
    return Endpoint(parts.hostname, port, parts.scheme == "mqtts")


def scope_level(name: str) -> str:
    """A scope's display name as one topic level: 'Larkspur Row bench scope (simulated)' ->
    'larkspur-row-bench-scope-simulated'."""
    level = re.sub(r"[^a-z0-9]+", "-", name.lower()).strip("-")
    return level or "scope"


SITE_SECTIONS = {"mqtt": MqttOptions}


def load_site(path: Path) -> dict[str, Any]:
    """Every section of a site configuration file, strictly; missing sections take their defaults."""
    try:
        raw = tomllib.loads(path.read_text(encoding="utf-8"))
    except OSError as exc:
        raise ConfigError(path, "", None, f"cannot be read ({exc.strerror or exc})") from None
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(path, "", None, f"is not valid TOML ({exc})") from None
    for key in raw:
        if key not in SITE_SECTIONS:
            raise ConfigError(path, "", key, f"unknown section{suggest(key, SITE_SECTIONS)}; allowed: "
                                             f"{', '.join(SITE_SECTIONS)}")
    return {name: load_section(cls, raw.get(name, {}), file=path, section=name) for name, cls in SITE_SECTIONS.items()}


def mqtt_options(site: Path | None, url: str | None, *, command: str = "serve") -> MqttOptions:
    """The MQTT options of ``--site FILE`` (if given) with ``--mqtt URL`` (if given) over its url."""
    opts = load_site(site)["mqtt"] if site is not None else MqttOptions()
    if url is not None:
        try:
            opts = dataclasses.replace(opts, url=url)
        except ValueError as exc:
            raise ConfigError("", command, "--mqtt", str(exc).partition(": ")[2] or str(exc)) from None
    return opts
