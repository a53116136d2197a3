"""``GET /api/v1/events``: a WebSocket of what happens, as JSON messages.

Each message is one event: ``hello`` (the status when connecting), ``state`` and
``time_point`` and ``progress`` and ``frame`` and ``alert`` from the time-lapse,
``focus_start``/``focus_point``/``focus_result`` from an autofocus, ``stage`` after a
manual move. A slow client loses its oldest events rather than slowing the scope down
(:class:`daemon.events.EventHub`).
"""

from __future__ import annotations

import asyncio
import contextlib
import json

from aiohttp import WSMsgType, web

from daemon.web import API_PREFIX
from daemon.web.checks import json_safe
from daemon.errors import BadRequest
from daemon.web.keys import SOCKETS, STATION

routes = web.RouteTableDef()
QUEUE_EVENTS = 256
HEARTBEAT_S = 20.0


@routes.get(f"{API_PREFIX}/events")
async def events(request: web.Request) -> web.StreamResponse:
    ws = web.WebSocketResponse(heartbeat=HEARTBEAT_S, max_msg_size=4096)
    if not ws.can_prepare(request).ok:
        raise BadRequest(f"{API_PREFIX}/events is a WebSocket: connect with a WebSocket client (Upgrade: websocket)")
    await ws.prepare(request)
    station = request.app[STATION]
    sockets = request.app[SOCKETS]
    queue = station.hub.subscribe(maxsize=QUEUE_EVENTS)
    sockets.add(ws)

    async def drain_incoming() -> None:
        # Clients send nothing we act on; reading keeps pings answered and notices a close.
        async for msg in ws:
            if msg.type == WSMsgType.ERROR:
                break

    reader = asyncio.create_task(drain_incoming())
    try:
        await ws.send_str(json.dumps(json_safe({"type": "hello", "status": station.status()}), default=str))
        while not ws.closed:
            getter = asyncio.ensure_future(queue.get())
            done, _ = await asyncio.wait({getter, reader}, return_when=asyncio.FIRST_COMPLETED)
            if getter not in done:
                getter.cancel()
                break
            await ws.send_str(json.dumps(json_safe(getter.result()), default=str))
    except (ConnectionResetError, RuntimeError):
        pass  # the client went away mid-send
    finally:
        station.hub.unsubscribe(queue)
        sockets.discard(ws)
        reader.cancel()
        with contextlib.suppress(asyncio.CancelledError, ConnectionResetError, RuntimeError):
            await reader
        await ws.close()
    return ws
