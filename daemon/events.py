"""Events the daemon publishes, and the publish/subscribe hub that fans them out.

An event is a JSON-able dict whose ``type`` names what happened; the fields of each type
are declared below as a ``TypedDict`` (keys marked ``NotRequired`` appear only in some
events of that type). The time-lapse scheduler and the station publish them; the CLI's
progress display, the metrics and the web service's WebSocket stream listen.

:data:`EVENT_TYPES` is derived from :data:`EventType`, and ``tests/test_events.py`` scans
the source for every event published, so the list is complete by construction.
"""

from __future__ import annotations

import asyncio
import contextlib
from collections.abc import Callable, Mapping
from typing import Any, Literal, NotRequired, TypedDict, get_args

EventType = Literal[
    "state",  # a time-lapse started, resumed, paused, ended
    "time_point",  # a time point started, ended or was missed
    "progress",  # a time point moved on to a position, or the scope was recovered after a fault
    "frame",  # a frame was saved and indexed
    "frame_analysis",  # confluence of a saved plane is known
    "alert",  # something a person should know (recorded in the index too)
    "focus_start",  # a manual autofocus began
    "focus_point",  # one frame of a focus search (manual or in a time-lapse)
    "focus_result",  # a manual autofocus ended
    "stage",  # the stage was moved by hand
    "calibration",  # an illumination calibration set was taken
]
EVENT_TYPES: tuple[EventType, ...] = get_args(EventType)


class StateEvent(TypedDict):
    type: Literal["state"]
    timelapse_id: int
    state: str  # a daemon.states.TimelapseState
    reason: str | None
    # Only when a run starts or resumes:
    name: NotRequired[str]
    count: NotRequired[int]
    interval_s: NotRequired[float]
    positions: NotRequired[int]
    t0_s: NotRequired[float]


class TimePointEvent(TypedDict):
    type: Literal["time_point"]
    timelapse_id: int
    tp: int
    status: str  # a daemon.states.TimePointState
    planned_s: float
    started_s: NotRequired[float | None]
    finished_s: NotRequired[float | None]
    late_s: NotRequired[float]
    n_ok: NotRequired[int]
    n_failed: NotRequired[int]
    reason: NotRequired[str | None]


class ProgressEvent(TypedDict):
    type: Literal["progress"]
    timelapse_id: int
    tp: int
    position: str
    # Moving on to a position:
    count: NotRequired[int]
    index: NotRequired[int]
    positions: NotRequired[int]
    late_s: NotRequired[float]
    # After a hardware fault there: what brought the scope back.
    recovered: NotRequired[str]


class FrameEvent(TypedDict):
    type: Literal["frame"]
    timelapse_id: int
    tp: int
    position: str
    well: str
    site: int
    z_index: int
    kind: str  # "raw" or "corrected"
    path: str  # relative to the data folder
    frame_id: int
    t_s: float
    z_um: float
    focus_score: float | None
    focus_found: bool | None


class FrameAnalysisEvent(TypedDict):
    type: Literal["frame_analysis"]
    timelapse_id: int
    tp: int
    position: str
    frame_ids: list[int]
    confluence: float


class AlertEvent(TypedDict):
    type: Literal["alert"]
    timelapse_id: int | None
    id: NotRequired[int]  # absent when the index could not take the alert
    t_s: float
    level: str  # "info", "warning" or "error"
    kind: str
    message: str


class FocusStartEvent(TypedDict):
    type: Literal["focus_start"]
    source: str
    run: int


class FocusPointEvent(TypedDict):
    type: Literal["focus_point"]
    z_um: float
    score: float | None
    t_s: float
    # In a time-lapse:
    timelapse_id: NotRequired[int]
    tp: NotRequired[int]
    position: NotRequired[str]
    # From a manual autofocus:
    source: NotRequired[str]
    run: NotRequired[int]


class FocusResultEvent(TypedDict, total=False):
    # The autofocus result's own fields (found, z_um, score, curve, message, ...) beside these.
    type: Literal["focus_result"]
    source: str


class StageEvent(TypedDict):
    type: Literal["stage"]
    position_um: dict[str, float]
    well: str | None


class CalibrationEvent(TypedDict, total=False):
    # The calibration set's own description beside the type.
    type: Literal["calibration"]


Event = Mapping[str, Any]  # the wire form: one of the TypedDicts above, as JSON will carry it


class UnknownEvent(ValueError):
    """An event whose ``type`` is not one of :data:`EVENT_TYPES` (a programming error)."""


class EventHub:
    """Fans each published event out to listeners (called at once) and to asyncio queues.

    A slow subscriber loses its oldest events rather than holding the publisher up.
    """

    def __init__(self) -> None:
        self._queues: list[asyncio.Queue[Event]] = []
        self._listeners: list[Callable[[Event], None]] = []

    def publish(self, event: Event) -> None:
        if event.get("type") not in EVENT_TYPES:
            raise UnknownEvent(f"event type {event.get('type')!r} is not one of {', '.join(EVENT_TYPES)}")
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
