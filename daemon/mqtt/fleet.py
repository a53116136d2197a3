"""Every scope the lab's broker knows, from its retained messages alone.

Each daemon retains its status, time-lapse, well readings, alerts and a thumbnail under
``<prefix>/<scope>/`` (:mod:`daemon.mqtt.topics`). Subscribing to those topics hands
back the retained message of every scope at once, so :func:`collect` needs no registry
of scopes and no help from the daemons: a scope that died shows as offline because the
broker published its last will.
"""

from __future__ import annotations

import asyncio
import base64
import dataclasses
import html
import json
import logging
import time
from typing import Any

import aiomqtt

from daemon.mqtt import topics as t
from daemon.mqtt.options import MqttOptions
from daemon.mqtt.publisher import BACKOFF_MAX_S

log = logging.getLogger(__name__)

# Collecting ends this long after the last retained message arrived...
QUIET_S = 0.5
# ...or this long after subscribing, whichever comes first.
DEFAULT_WAIT_S = 3.0


@dataclasses.dataclass
class ScopeView:
    scope: str
    status: dict[str, Any] = dataclasses.field(default_factory=dict)
    timelapse: dict[str, Any] = dataclasses.field(default_factory=dict)
    alerts: list[dict[str, Any]] = dataclasses.field(default_factory=list)
    wells: dict[str, dict[str, Any]] = dataclasses.field(default_factory=dict)
    thumbnail: bytes | None = None
    seen_monotonic: float = 0.0

    @property
    def state(self) -> str:
        return str(self.status.get("state") or "unknown")

    def to_json(self, *, thumbnail: bool = False) -> dict[str, Any]:
        tl = self.timelapse if self.timelapse.get("timelapse_id") is not None else None
        out: dict[str, Any] = {
            "scope": self.scope, "name": self.status.get("name"), "state": self.state,
            "reason": self.status.get("reason"), "page_url": self.status.get("page_url"),
            "timelapse": tl, "alerts": self.alerts,
            "wells": dict(sorted(self.wells.items())),
            "thumbnail_bytes": None if self.thumbnail is None else len(self.thumbnail),
        }
        if thumbnail and self.thumbnail is not None:
            out["thumbnail_jpeg_base64"] = base64.b64encode(self.thumbnail).decode("ascii")
        return out


class Fleet:
    def __init__(self, prefix: str) -> None:
        self.prefix = prefix.strip("/")
        self.scopes: dict[str, ScopeView] = {}
        self.messages = 0

    @property
    def subscriptions(self) -> list[str]:
        p = self.prefix
        return [f"{p}/+/{t.STATUS}", f"{p}/+/{t.TIMELAPSE}", f"{p}/+/{t.ALERTS}", f"{p}/+/{t.THUMBNAIL}",
                f"{p}/+/{t.WELLS}/+"]

    def take(self, topic: str, payload: bytes) -> None:
        """One message of the broker; messages that are not ours or not readable are skipped."""
        if not topic.startswith(self.prefix + "/"):
            return
        scope, _, rest = topic[len(self.prefix) + 1:].partition("/")
        if not scope or not rest or not payload:
            return  # an empty retained message is a deletion
        view = self.scopes.setdefault(scope, ScopeView(scope))
        view.seen_monotonic = time.monotonic()
        self.messages += 1
        if rest == t.THUMBNAIL:
            view.thumbnail = bytes(payload)
            return
        try:
            data = json.loads(payload)
        except (ValueError, UnicodeDecodeError):
            log.warning("fleet: %s is not JSON; skipped", topic)
            return
        if not isinstance(data, dict):
            return
        if rest == t.STATUS:
            view.status = data
        elif rest == t.TIMELAPSE:
            view.timelapse = data
        elif rest == t.ALERTS:
            view.alerts = [a for a in data.get("alerts", []) if isinstance(a, dict)]
        elif rest.startswith(t.WELLS + "/"):
            view.wells[rest.split("/", 1)[1]] = data

    def rows(self, *, thumbnails: bool = False) -> list[dict[str, Any]]:
        return [v.to_json(thumbnail=thumbnails) for _k, v in sorted(self.scopes.items())]


def client_for(opts: MqttOptions, identifier: str | None = None) -> aiomqtt.Client:
    import ssl

    ep = opts.endpoint
    tls = None
    if ep.tls:
        tls = ssl.create_default_context(cafile=opts.tls.ca_file or None)
        if opts.tls.cert_file:
            tls.load_cert_chain(opts.tls.cert_file, opts.tls.key_file)
    return aiomqtt.Client(ep.host, ep.port, username=opts.username or None, password=opts.password(),
                          identifier=identifier, keepalive=opts.keepalive_s, timeout=10.0, tls_context=tls)


async def follow(opts: MqttOptions, fleet: Fleet, *, on_message: Any = None) -> None:
    """Keep ``fleet`` up to date for ever, reconnecting with back-off."""
    delay_s = 0.5
    while True:
        try:
            async with client_for(opts) as client:
                delay_s = 0.5
                for sub in fleet.subscriptions:
                    await client.subscribe(sub, qos=1)
                async for message in client.messages:
                    fleet.take(str(message.topic), bytes(message.payload or b""))  # type: ignore[arg-type]
                    if on_message is not None:
                        on_message()
        except aiomqtt.MqttError as exc:
            log.warning("fleet: broker %s: %s; next try in %.1f s", opts.url, exc, delay_s)
        await asyncio.sleep(delay_s)
        delay_s = min(delay_s * 2, BACKOFF_MAX_S)


async def collect(opts: MqttOptions, *, wait_s: float = DEFAULT_WAIT_S, quiet_s: float = QUIET_S) -> Fleet:
    """The retained picture: subscribe, take messages until quiet, return. Raises MqttError
    when the broker cannot be reached."""
    fleet = Fleet(opts.prefix)
    async with client_for(opts) as client:
        for sub in fleet.subscriptions:
            await client.subscribe(sub, qos=1)
        deadline = time.monotonic() + wait_s
        messages = client.messages
        while (left := deadline - time.monotonic()) > 0:
            try:
                async with asyncio.timeout(min(quiet_s, left)):
                    message = await anext(messages)
            except TimeoutError:
                if fleet.scopes:
                    break
                continue
            fleet.take(str(message.topic), bytes(message.payload or b""))  # type: ignore[arg-type]
    return fleet


# -- showing it --------------------------------------------------------------------------


def _progress(tl: dict[str, Any] | None) -> str:
    if not tl:
        return "-"
    over, total = tl.get("time_points_over"), tl.get("time_points")
    share = f" {over}/{total} time points" if over is not None else ""
    return f"#{tl['timelapse_id']} {tl.get('name') or ''} ({tl.get('state')}){share}".strip()


def text_table(rows: list[dict[str, Any]]) -> str:
    if not rows:
        return "no scope has reported to this broker"
    lines = []
    for r in rows:
        alerts = r["alerts"]
        newest = f"; newest alert: {alerts[0].get('level')}: {alerts[0].get('message')}" if alerts else ""
        lines.append(f"{r['scope']:<28} {r['state']:<10} {_progress(r['timelapse'])}")
        lines.append(f"    {r.get('name') or ''}  {r.get('page_url') or 'no page address'}"
                     f"  alerts: {len(alerts)}{newest}")
    return "\n".join(lines)


_PAGE_CSS = (
    "body{font-family:sans-serif;margin:1em}table{border-collapse:collapse}"
    "td,th{border-bottom:1px solid #ccc;padding:.3em .6em;text-align:left;vertical-align:top}"
    ".offline{color:#a00;font-weight:bold}.warning{color:#a60}.error{color:#a00}"
)


def html_page(fleet: Fleet, refresh_s: int = 5) -> str:
    rows = []
    for r in fleet.rows():
        esc = html.escape
        url = r.get("page_url") or ""
        link = f'<a href="{esc(url)}">{esc(url)}</a>' if url.startswith(("http://", "https://")) else "-"
        thumb = (f'<img src="thumbnail/{esc(r["scope"])}.jpg" alt="latest frame of {esc(r["scope"])}" width="160">'
                 if r["thumbnail_bytes"] else "-")
        alerts = "".join(f'<li class="{esc(str(a.get("level")))}">{esc(str(a.get("message")))}</li>'
                         for a in r["alerts"][:5])
        rows.append(
            f'<tr><td>{esc(r["scope"])}<br><small>{esc(r.get("name") or "")}</small></td>'
            f'<td class="{esc(r["state"])}">{esc(r["state"])}</td><td>{esc(_progress(r["timelapse"]))}</td>'
            f'<td><ul>{alerts}</ul></td><td>{thumb}</td><td>{link}</td></tr>'
        )
    body = "".join(rows) or '<tr><td colspan="6">no scope has reported to this broker</td></tr>'
    return (
        f'<!doctype html><html><head><meta charset="utf-8"><meta http-equiv="refresh" content="{refresh_s}">'
        f"<title>phasewatch fleet</title><style>{_PAGE_CSS}</style></head><body><h1>Scopes on this broker</h1>"
        "<table><tr><th>scope</th><th>state</th><th>time-lapse</th><th>alerts</th><th>latest frame</th>"
        f"<th>page</th></tr>{body}</table></body></html>"
    )
