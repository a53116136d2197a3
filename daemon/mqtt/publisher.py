"""The daemon's MQTT publisher: retained state for the lab's broker, never in the way of a time point.

The station's events arrive on the event loop through a synchronous hub listener that
only notes what changed. Messages wait in a bounded queue keyed by topic: a newer message
for a topic replaces the one waiting, and when the queue is full the oldest waiting one
is dropped (``dropped`` counts them). The latest message of every topic is also kept, and
all of them are sent again on each (re)connection, so a broker restarted without
persistence, or one that was away while the queue overflowed, still ends up with the
whole present state. A separate task owns the connection: it reconnects with exponential
back-off (with jitter, so a lab's scopes do not all knock at once), and a broker that is
down or slow costs the scheduler nothing but a dictionary update per event.

Read-only: the client subscribes to nothing, so nothing received over MQTT can move the
scope. The broker publishes the last will (``state: offline``) when the connection
dies without a goodbye; a clean stop publishes ``offline`` itself.
"""

from __future__ import annotations

import asyncio
import collections
import contextlib
import datetime as dt
import logging
import random
import ssl
import time
from collections.abc import Mapping
from typing import TYPE_CHECKING, Any

import aiomqtt

from daemon.mqtt import topics as t
from daemon.mqtt.options import MqttOptions, scope_level
from daemon.states import ENDED_TIME_POINT_STATES

if TYPE_CHECKING:
    from daemon.station import Station

# An event of daemon.events, as the hub hands it on. Not imported from there: the event
# scan of tests/test_events.py reads every publish() call of a module that imports it, and
# this module's publish() calls go to the broker, not the hub.
Event = Mapping[str, Any]

log = logging.getLogger(__name__)

BACKOFF_FIRST_S = 0.5
BACKOFF_MAX_S = 15.0
# How often the station's state word and progress are looked at (cheap, on the loop).
WATCH_INTERVAL_S = 0.5
# The thumbnail is remade at most this often, however fast frames are saved.
THUMBNAIL_EVERY_S = 5.0
PUBLISH_TIMEOUT_S = 10.0
CONNECT_TIMEOUT_S = 10.0


class MqttPublisher:
    def __init__(self, opts: MqttOptions, station: Station, *, page_url: str | None = None) -> None:
        self.opts = opts
        self.station = station
        self.name = station.profile.scope.name
        self.level = opts.scope_name or scope_level(self.name)
        self.page_url = opts.page_url or page_url
        self.since_utc = dt.datetime.now(dt.UTC).isoformat(timespec="seconds")
        self._pending: collections.OrderedDict[str, bytes] = collections.OrderedDict()
        self._latest: dict[str, bytes] = {}
        self._wake = asyncio.Event()
        self._changed = asyncio.Event()
        self._dirty_tps: set[tuple[int, int]] = set()
        self._thumb_frame: tuple[int, int] | None = None
        self._thumb_made_at = 0.0
        self._alerts: list[dict[str, Any]] = []
        self._tasks: list[asyncio.Task[None]] = []
        self._last_status: bytes | None = None
        self._last_timelapse: bytes | None = None
        self.connected = False
        self.connections = 0
        self.sent = 0
        self.dropped = 0

    # -- topics and the queue -----------------------------------------------------------

    def topic(self, *levels: str) -> str:
        return t.topic(self.opts.prefix, self.level, *levels)

    def put(self, topic: str, payload: bytes) -> None:
        """Queue a retained message; a newer one for the same topic replaces it (no I/O)."""
        self._latest[topic] = payload
        self._pending.pop(topic, None)
        self._pending[topic] = payload
        while len(self._pending) > self.opts.queue_size:
            self._pending.popitem(last=False)
            self.dropped += 1
        self._wake.set()

    def set_page_url(self, url: str) -> None:
        """The page's address once the server listens (unless the site configuration names one)."""
        if not self.opts.page_url:
            self.page_url = url
            self._changed.set()

    def _status(self, state: str, reason: str | None = None) -> bytes:
        p = self.station.profile
        return t.encode(t.status_payload(
            scope=self.level, name=self.name, state=state, reason=reason, page_url=self.page_url, profile=p.name,
            simulated=p.is_simulated, since_utc=self.since_utc,
            clock_s=None if state == t.OFFLINE else self.station.scope.clock.now(),
        ))

    # -- the station's side -------------------------------------------------------------

    def on_event(self, event: Event) -> None:
        """Hub listener: note what the event changes; never blocks, never raises into the hub."""
        try:
            kind = event.get("type")
            if kind in ("state", "progress", "time_point"):
                self._changed.set()
            if kind == "time_point" and event.get("status") in ENDED_TIME_POINT_STATES:
                self._dirty_tps.add((int(event["timelapse_id"]), int(event["tp"])))
                self._changed.set()
            elif kind == "frame_analysis":
                self._dirty_tps.add((int(event["timelapse_id"]), int(event["tp"])))
                self._changed.set()
            elif kind == "frame":
                self._thumb_frame = (int(event["timelapse_id"]), int(event["frame_id"]))
                self._changed.set()
            elif kind == "alert":
                self._alerts.insert(0, t.alert_entry(dict(event)))
                del self._alerts[t.ALERTS_KEPT:]
                self.put(self.topic(t.ALERTS), t.encode(t.alerts_payload(self._alerts)))
        except Exception:  # noqa: BLE001 - a reporting fault must not reach the scheduler
            log.exception("MQTT: could not note event %s", event.get("type"))

    async def _initial(self) -> None:
        from daemon.archive import AlertsQuery

        rows = await asyncio.to_thread(self.station.archive.alerts, AlertsQuery(limit=t.ALERTS_KEPT))
        self._alerts = [t.alert_entry(r) for r in reversed(rows)] + self._alerts
        del self._alerts[t.ALERTS_KEPT:]
        self.put(self.topic(t.ALERTS), t.encode(t.alerts_payload(self._alerts)))
        s = self.station.scheduler
        if s is not None:
            await self._publish_readings(s.id, None)

    async def _watch(self) -> None:
        """Publish status and progress when they change; readings and thumbnail when due."""
        while True:
            with contextlib.suppress(TimeoutError):
                async with asyncio.timeout(WATCH_INTERVAL_S):
                    await self._changed.wait()
            self._changed.clear()
            try:
                await self._refresh()
            except asyncio.CancelledError:
                raise
            except Exception:  # noqa: BLE001 - keep reporting; the next change tries again
                log.exception("MQTT: could not gather the scope's state")

    async def _refresh(self) -> None:
        st = self.station
        status = self._status(st.state_word())
        if _without_clock(status) != _without_clock(self._last_status):
            self._last_status = status
            self.put(self.topic(t.STATUS), status)
        summary = st.active_summary()
        over = await asyncio.to_thread(st.progress_summary) if summary is not None else None
        timelapse = t.encode(t.timelapse_payload(summary, over))
        if timelapse != self._last_timelapse:
            self._last_timelapse = timelapse
            self.put(self.topic(t.TIMELAPSE), timelapse)
        while self._dirty_tps:
            tl_id, tp = self._dirty_tps.pop()
            await self._publish_readings(tl_id, tp)
        if self._thumb_frame is not None and time.monotonic() - self._thumb_made_at >= THUMBNAIL_EVERY_S:
            tl_id, frame_id = self._thumb_frame
            self._thumb_frame = None
            self._thumb_made_at = time.monotonic()
            await self._publish_thumbnail(tl_id, frame_id)

    async def _publish_readings(self, tl_id: int, tp: int | None) -> None:
        from daemon.culture.readings import timelapse_readings

        readings = await asyncio.to_thread(timelapse_readings, self.station.index, tl_id, tp=tp)
        latest = {}
        for r in readings:  # ordered by well, then time point: the last of a well is its newest
            latest[r.well] = r
        for well, r in latest.items():
            self.put(self.topic(t.WELLS, well), t.encode(t.well_payload(r)))

    async def _publish_thumbnail(self, tl_id: int, frame_id: int) -> None:
        from daemon.archive import PreviewQuery
        from daemon.errors import NotFound

        try:
            jpeg = await asyncio.to_thread(self.station.archive.preview, tl_id, frame_id,
                                           PreviewQuery(width=self.opts.thumbnail_px))
        except NotFound as exc:
            log.warning("MQTT: no thumbnail of frame %s: %s", frame_id, exc)
            return
        self.put(self.topic(t.THUMBNAIL), jpeg)

    # -- the broker's side --------------------------------------------------------------

    def _client(self) -> aiomqtt.Client:
        ep = self.opts.endpoint
        tls = None
        if ep.tls:
            ctx = ssl.create_default_context(cafile=self.opts.tls.ca_file or None)
            if self.opts.tls.cert_file:
                ctx.load_cert_chain(self.opts.tls.cert_file, self.opts.tls.key_file)
            tls = ctx
        return aiomqtt.Client(
            ep.host, ep.port, username=self.opts.username or None, password=self.opts.password(),
            identifier=f"phasewatch-{self.level}", keepalive=self.opts.keepalive_s, timeout=CONNECT_TIMEOUT_S,
            will=aiomqtt.Will(self.topic(t.STATUS), self._status(t.OFFLINE, "connection lost"), qos=1, retain=True),
            tls_context=tls, clean_session=True,
        )

    async def _connection(self) -> None:
        """Stay connected: send what waits, reconnect with back-off when the broker goes."""
        delay_s = BACKOFF_FIRST_S
        ep = self.opts.endpoint
        while True:
            try:
                async with self._client() as client:
                    self.connected = True
                    self.connections += 1
                    delay_s = BACKOFF_FIRST_S
                    log.info("MQTT: connected to %s:%s as %s", ep.host, ep.port, self.topic())
                    for topic, payload in self._latest.items():  # the broker may have lost them
                        self._pending.setdefault(topic, payload)
                    self._wake.set()
                    await _first_done(self._send(client), _until_lost(client))
            except aiomqtt.MqttError as exc:
                if self.connected:
                    log.warning("MQTT: lost the broker at %s:%s (%s); reconnecting", ep.host, ep.port, exc)
                else:
                    log.warning("MQTT: broker at %s:%s unreachable (%s); next try in %.1f s", ep.host, ep.port,
                                exc, delay_s)
            except (OSError, ssl.SSLError) as exc:
                log.warning("MQTT: broker at %s:%s: %s; next try in %.1f s", ep.host, ep.port, exc, delay_s)
            except Exception:  # noqa: BLE001 - reporting must outlive any fault of its own
                log.exception("MQTT: unexpected fault talking to %s:%s; next try in %.1f s", ep.host, ep.port, delay_s)
            self.connected = False
            await asyncio.sleep(delay_s * random.uniform(0.8, 1.2))
            delay_s = min(delay_s * 2, BACKOFF_MAX_S)

    async def _send(self, client: aiomqtt.Client) -> None:
        while True:
            await self._wake.wait()
            self._wake.clear()
            while self._pending:
                topic, payload = self._pending.popitem(last=False)
                try:
                    await client.publish(topic, payload, qos=1, retain=True, timeout=PUBLISH_TIMEOUT_S)
                except BaseException:
                    if topic not in self._pending:  # no newer one: send it after reconnecting
                        self._pending[topic] = payload
                        self._pending.move_to_end(topic, last=False)
                    raise
                self.sent += 1

    # -- life cycle ----------------------------------------------------------------------

    async def start(self) -> None:
        self.station.hub.add_listener(self.on_event)
        self._last_status = self._status(self.station.state_word())
        self.put(self.topic(t.STATUS), self._last_status)
        await self._initial()
        self._tasks = [
            asyncio.create_task(self._connection(), name="MQTT connection"),
            asyncio.create_task(self._watch(), name="MQTT state watch"),
        ]

    async def stop(self, reason: str = "daemon stopped") -> None:
        """Say goodbye: retained ``offline`` (best effort, bounded in time), then disconnect."""
        for task in self._tasks:
            task.cancel()
        for task in self._tasks:
            with contextlib.suppress(asyncio.CancelledError, Exception):
                await task
        if not self.connected:
            return
        offline = self._status(t.OFFLINE, reason)
        try:
            async with asyncio.timeout(3.0):
                async with self._client() as client:
                    await client.publish(self.topic(t.STATUS), offline, qos=1, retain=True)
        except (aiomqtt.MqttError, OSError, TimeoutError) as exc:
            log.warning("MQTT: could not say offline (%s); the broker's last will will", exc)


def _without_clock(payload: bytes | None) -> bytes | None:
    """A status message less its clock, which moves every time and is no change of state."""
    if payload is None:
        return None
    import json

    d = json.loads(payload)
    d.pop("clock_s", None)
    return json.dumps(d, sort_keys=True).encode()


async def _until_lost(client: aiomqtt.Client) -> None:
    # Subscribed to nothing, so no message ever arrives; the iterator raises MqttError when
    # the connection is lost, which is what this waits for.
    async for _message in client.messages:
        pass


async def _first_done(*coros: Any) -> None:
    tasks = [asyncio.ensure_future(c) for c in coros]
    try:
        done, _ = await asyncio.wait(tasks, return_when=asyncio.FIRST_COMPLETED)
    finally:
        for task in tasks:
            task.cancel()
        for task in tasks:
            with contextlib.suppress(asyncio.CancelledError, Exception):
                await task
    for task in done:
        task.result()
