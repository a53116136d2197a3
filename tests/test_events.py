"""Event types and states: the list of event types is exactly what the daemon publishes,
every event type has its declared fields, and states round-trip through the index."""

from __future__ import annotations

import ast
import asyncio
import sqlite3
import typing
from pathlib import Path

import pytest

from daemon import events
from daemon.events import EVENT_TYPES, EventHub, UnknownEvent
from daemon.states import (
    FrameState,
    PositionState,
    Request,
    TimelapseState,
    TimePointState,
    UNFINISHED_STATES,
)
from daemon.storage.index import Index, open_index
from daemon.storage.ome import FrameMeta

DAEMON = Path(__file__).resolve().parents[1] / "daemon"
PUBLISHERS = {"publish", "_publish", "on_event"}


def _imports_events(tree: ast.Module) -> bool:
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom) and node.module == "daemon.events":
            return True
        if isinstance(node, ast.ImportFrom) and node.module == "daemon" and any(a.name == "events" for a in node.names):
            return True
    return False


def _type_of(node: ast.expr) -> str | None:
    """The event type of a dict literal ``{"type": "x", ...}`` or a constructor ``XEvent(type="x", ...)``."""
    if isinstance(node, ast.Dict):
        for key, value in zip(node.keys, node.values, strict=True):
            if isinstance(key, ast.Constant) and key.value == "type" and isinstance(value, ast.Constant):
                return str(value.value)
    if isinstance(node, ast.Call):
        name = node.func.attr if isinstance(node.func, ast.Attribute) else getattr(node.func, "id", "")
        if name.endswith("Event"):
            for kw in node.keywords:
                if kw.arg == "type" and isinstance(kw.value, ast.Constant):
                    return str(kw.value.value)
    return None


def published_types() -> tuple[set[str], list[str]]:
    """Every event type published in daemon/, and the publish calls the scan cannot read."""
    found: set[str] = set()
    unreadable: list[str] = []
    for path in sorted(DAEMON.rglob("*.py")):
        tree = ast.parse(path.read_text(encoding="utf-8"))
        if path.name != "events.py" and not _imports_events(tree):
            continue
        for func in ast.walk(tree):
            if not isinstance(func, ast.FunctionDef | ast.AsyncFunctionDef):
                continue
            params = {a.arg for a in func.args.args + func.args.posonlyargs + func.args.kwonlyargs}
            for node in ast.walk(func):
                if not isinstance(node, ast.Call):
                    continue
                name = node.func.attr if isinstance(node.func, ast.Attribute) else getattr(node.func, "id", "")
                if isinstance(node, ast.Call) and name.endswith("Event") and _type_of(node):
                    found.add(_type_of(node))  # type: ignore[arg-type]
                if name not in PUBLISHERS or not node.args:
                    continue
                arg = node.args[0]
                kind = _type_of(arg)
                if kind is not None:
                    found.add(kind)
                elif not (isinstance(arg, ast.Name) and arg.id in params):
                    # Only a function handing on the event it was given may publish a variable.
                    unreadable.append(f"{path.relative_to(DAEMON.parent)}:{node.lineno}: {ast.unparse(node)}")
    return found, unreadable


def test_event_types_are_exactly_those_published() -> None:
    found, unreadable = published_types()
    assert unreadable == [], "publish calls whose event type the scan cannot read"
    assert set(EVENT_TYPES) == found
    assert len(EVENT_TYPES) == len(set(EVENT_TYPES))
    # The ones the station sends besides the time-lapse's (the old list lacked them).
    assert {"stage", "focus_start", "focus_result", "calibration"} <= found


def test_every_event_type_declares_its_fields() -> None:
    declared = {}
    for name in dir(events):
        obj = getattr(events, name)
        if isinstance(obj, type) and typing.is_typeddict(obj):
            (literal,) = typing.get_args(typing.get_type_hints(obj)["type"])
            declared[literal] = obj
    assert set(declared) == set(EVENT_TYPES)
    # The time-lapse's events all say which time-lapse they belong to.
    for kind in ("state", "time_point", "progress", "frame", "frame_analysis"):
        assert "timelapse_id" in declared[kind].__required_keys__, kind


async def test_the_hub_refuses_an_event_of_no_known_type() -> None:
    hub = EventHub()
    heard: list[object] = []
    hub.add_listener(heard.append)
    queue = hub.subscribe(maxsize=2)
    hub.publish(events.StageEvent(type="stage", position_um={"x_um": 1.0, "y_um": 2.0, "z_um": 3.0}, well="B3"))
    with pytest.raises(UnknownEvent, match="'stage_moved'"):
        hub.publish({"type": "stage_moved"})
    assert len(heard) == 1 and queue.qsize() == 1
    # A slow subscriber loses its oldest events, never blocks the publisher.
    for i in range(3):
        hub.publish(events.FocusStartEvent(type="focus_start", source="manual", run=i))
    got = [queue.get_nowait() for _ in range(queue.qsize())]
    assert [e["run"] for e in got] == [1, 2]
    await asyncio.sleep(0)


def _timelapse(index: Index) -> int:
    return index.create_timelapse(
        name="LR-0412 states", plan={"plan": {}, "positions": []}, profile_path="hw_profiles/sim.toml",
        profile_name="sim", created_s=1.77e9, t0_s=1.77e9, interval_s=600.0, count=len(TimePointState),
        n_positions=1, reserve_mb=0.0,
    )


def test_states_round_trip_through_the_index(tmp_path: Path) -> None:
    with open_index(tmp_path) as index:
        tl = _timelapse(index)
        assert TimelapseState(index.require_timelapse(tl)["state"]) is TimelapseState.RUNNING
        for state in TimelapseState:
            index.set_state(tl, state)
            back = index.require_timelapse(tl)["state"]
            assert type(back) is str and TimelapseState(back) is state
            assert (tl in [r["id"] for r in index.unfinished()]) == (state in UNFINISHED_STATES)
        for k, state in enumerate(TimePointState):
            if state is TimePointState.MISSED:
                index.record_missed(tl, [(k, 1.77e9 + 600 * k)], "the daemon was not running")
            else:
                index.begin_time_point(tl, k, planned_s=1.77e9 + 600 * k, started_s=1.77e9 + 600 * k)
                if state is not TimePointState.RUNNING:
                    index.finish_time_point(tl, k, status=state, finished_s=1.77e9 + 600 * k + 5)
            assert TimePointState(index.time_point(tl, k)["status"]) is state
        for state in PositionState:
            index.record_position(tl, 0, key="B3-1", well="B3", site=1, status=state)
            assert PositionState(index.positions(tl, 0)[0]["status"]) is state
        meta = FrameMeta(
            timelapse_id=tl, timelapse_name="LR-0412 states", tp=0, key="B3-1", well="B3", site=1, z_index=0,
            kind="raw", t_s=1.77e9, delta_t_s=0.0, x_um=0.0, y_um=0.0, z_um=1500.0, exposure_ms=20.0, gain_db=0.0,
            bit_depth=8, pixel_size_um=0.375,
        )
        frame_id = index.add_frame(meta, path="f.tif", nbytes=1, crc32=0, width_px=64, height_px=48)
        assert FrameState(index.frames(tl)[0]["status"]) is FrameState.OK  # the column's default
        for state in FrameState:
            index.set_frame_status(frame_id, state)
            assert FrameState(index.frames(tl)[0]["status"]) is state
        for request in (Request.PAUSE, Request.RESUME, Request.ABORT):
            index.post_request(tl, request)
            assert Request(index.take_request(tl)) is request


def test_the_index_refuses_a_state_that_is_not_declared(tmp_path: Path) -> None:
    with open_index(tmp_path) as index:
        tl = _timelapse(index)
        with pytest.raises(ValueError, match="state must be one of"):
            index.set_state(tl, "finished")
        with pytest.raises(ValueError, match="status must be one of"):
            index.finish_time_point(tl, 0, status="complete", finished_s=1.77e9)
        with pytest.raises(ValueError, match="request must be one of"):
            index.post_request(tl, Request.SHUTDOWN)  # this process's own, never posted
        # The schema's own checks, built from the same enums, hold against a raw write too.
        with pytest.raises(sqlite3.IntegrityError):
            index._conn.execute("UPDATE timelapses SET state = 'finished' WHERE id = ?", (tl,))
        with pytest.raises(sqlite3.IntegrityError):
            index.record_position(tl, 0, key="B3-1", well="B3", site=1, status="lost")


STATE_VALUES = {s.value for states in (TimelapseState, TimePointState, PositionState, FrameState) for s in states}
NOT_YET_SCANNED: tuple[str, ...] = ()


def _state_field(node: ast.expr) -> bool:
    """``x["state"]``, ``x["status"]``, ``x.state`` or ``x.status``."""
    if isinstance(node, ast.Subscript) and isinstance(node.slice, ast.Constant):
        return node.slice.value in ("state", "status")
    return isinstance(node, ast.Attribute) and node.attr in ("state", "status")


def _constants(node: ast.expr) -> list[str]:
    if isinstance(node, ast.Constant) and isinstance(node.value, str):
        return [node.value]
    if isinstance(node, ast.Tuple | ast.List | ast.Set):
        return [c for e in node.elts for c in _constants(e)]
    return []


def test_states_are_named_not_spelt_out() -> None:
    bare = []
    for path in sorted(DAEMON.rglob("*.py")):
        rel = path.relative_to(DAEMON)
        if rel.name == "states.py" or rel.parts[0] in NOT_YET_SCANNED:
            continue
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            found: list[str] = []
            if isinstance(node, ast.Compare) and any(_state_field(n) for n in (node.left, *node.comparators)):
                found = [c for n in (node.left, *node.comparators) for c in _constants(n)]
            elif isinstance(node, ast.keyword) and node.arg in ("state", "status"):
                found = _constants(node.value)
            if set(found) & STATE_VALUES:
                line = node.lineno if isinstance(node, ast.Compare) else node.value.lineno
                bare.append(f"daemon/{rel}:{line}")
    assert not bare, "compare with or pass a daemon.states member instead of its string: " + ", ".join(bare)
