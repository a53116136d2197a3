"""Typed application keys shared by the web modules (kept apart to avoid import cycles)."""

from __future__ import annotations

import weakref
from typing import TYPE_CHECKING

from aiohttp import web

if TYPE_CHECKING:
    from daemon.web.app import ServeConfig
    from daemon.web.auth import Authenticator
    from daemon.metrics import Metrics
    from daemon.mqtt.publisher import MqttPublisher
    from daemon.station import Station

CONFIG: web.AppKey[ServeConfig] = web.AppKey("config")
AUTH: web.AppKey[Authenticator] = web.AppKey("auth")
METRICS: web.AppKey[Metrics] = web.AppKey("metrics")
STATION: web.AppKey[Station] = web.AppKey("station")
SOCKETS: web.AppKey[weakref.WeakSet[web.WebSocketResponse]] = web.AppKey("sockets")
MQTT: web.AppKey[MqttPublisher] = web.AppKey("mqtt")
