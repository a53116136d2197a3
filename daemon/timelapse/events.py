"""A small publish/subscribe hub for scheduler events (progress, frames, alerts, state).

The scheduler calls one ``on_event(dict)`` hook; :meth:`EventHub.publish` is such a hook
and fans each event out to listeners (the CLI's progress display) and to asyncio queues
(the web service's WebSocket stream). A slow subscriber loses its oldest events rather
than holding the scheduler up.
"""

from __future__ import annotations

import asyncio
import contextlib
from collections.abc import Callable
from typing import Any

Event = dict[str, Any]
EVENT_TYPES = ("progress", "frame", "frame_analysis", "alert", "state", "focus_point", "time_point")


class EventHub:
    def __init__(self) -> None:
        self._queues: list[asyncio.Queue[Event]] = []
        self._listeners: list[Callable[[Event], None]] = []

    def publish(self, event: Event) -> None:
        for listener in list(self._listeners):
            listener(event)
        for queue in list(self._queues):
            if queue.full():
                with contextlib.suppress(asyncio.QueueEmpty):
                    queue.get_nowait()
            queue.put_nowait(event)

    def add_listener(self, listener: Callable[[Event], None]) -> None:
        self._listeners.append(listener)

    def subscribe(self, maxsize: int = 512) -> asyncio.Queue[Event]:
        queue: asyncio.Queue[Event] = asyncio.Queue(maxsize=maxsize)
        self._queues.append(queue)
        return queue

    def unsubscribe(self, queue: asyncio.Queue[Event]) -> None:
        with contextlib.suppress(ValueError):
            self._queues.remove(queue)
