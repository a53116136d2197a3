"""The time-lapse scheduler on the simulated scope: anchoring, missed and late time points,
resume without duplicates, pause/abort, hardware faults, storage faults, correction."""

from __future__ import annotations

import errno
import json
import os
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import ome_types
import pytest
import tifffile

from drivers.options import ConfigError
from daemon.storage import frames as frames_mod
from daemon.storage.index import open_index
from daemon.storage.reconcile import reconcile
from daemon.storage.space import MB, SpaceGuard
from daemon.timelapse.plan import Plan, ZStack, field_of_view_um, plan_positions
from daemon.states import STOPPED_BY_USER
from daemon.timelapse.scheduler import MISSED_DOWN, MISSED_PAUSED, Scheduler
from daemon.timelapse.timing import late_tolerance_s
from daemon.vessels.stage_map import sim_stage_map
from drivers.base import CameraError
from tests.helpers import sim_profile, sim_scope

INTERVAL_S = 3600.0
SPEED = 1000.0


def make_plan(**changes: Any) -> Plan:
    base: dict[str, Any] = dict(
        name="LR-0412 KVL-7 scheduler test", vessel="96-well", wells=["B2", "B3"], sites_per_well=1,
        interval_s=INTERVAL_S, count=3, autofocus="off", z_stack=None, exposure_ms=None, gain_db=None,
        correction=False, save="raw",
    )
    base.update(changes)
    return Plan(**base)


class Driver:
    """Event hook for tests: records events, jumps the clock to the next time point once
    one closes (so tests do not sit out real intervals), and runs per-event actions."""

    def __init__(self, scope: Any, *, fast_forward: bool = True) -> None:
        self.scope = scope
        self.events: list[dict[str, Any]] = []
        self.actions: list[Callable[[dict[str, Any]], None]] = []
        self.fast_forward = fast_forward
        self.scheduler: Scheduler | None = None

    def __call__(self, event: dict[str, Any]) -> None:
        self.events.append(event)
        for action in list(self.actions):
            action(event)
        if self.fast_forward and event["type"] == "time_point" and event["status"] != "running":
            assert self.scheduler is not None
            nxt = self.scheduler.t0_s + (event["tp"] + 1) * self.scheduler.interval_s
            self.scope.clock.advance(max(0.0, nxt - self.scope.clock.now()))

    def of(self, kind: str) -> list[dict[str, Any]]:
        return [e for e in self.events if e["type"] == kind]


async def run_new(
    data_dir: Path, plan: Plan, *, profile: Any = None, setup: Callable[[Driver], None] | None = None,
    space_guard: SpaceGuard | None = None, fast_forward: bool = True,
) -> tuple[Scheduler, Driver, str]:
    profile = profile or sim_profile()
    positions = plan_positions(plan, plan.get_vessel(), sim_stage_map(profile), field_of_view_um(profile))
    index = open_index(data_dir)
    scope = sim_scope(profile, speed=SPEED, data_dir=data_dir)
    driver = Driver(scope, fast_forward=fast_forward)
    async with scope:
        # As a user would before starting: focus roughly on the plate (the profile's nominal plane).
        await scope.move_to(z_um=profile.sim.focal_plane.z0_um)
        scheduler = Scheduler.create(
            scope, plan, data_dir, index, positions, reserve_mb=0.0, on_event=driver, space_guard=space_guard
        )
        driver.scheduler = scheduler
        if setup is not None:
            setup(driver)
        state = await scheduler.run()
    return scheduler, driver, state


async def run_resume(
    data_dir: Path, tl_id: int, *, profile: Any = None, advance_s: float = 0.0, advance_to_s: float | None = None,
    setup: Callable[[Driver], None] | None = None,
) -> tuple[Scheduler, Driver, str]:
    index = open_index(data_dir)
    reconcile(data_dir, index, verify="all")
    scope = sim_scope(profile or sim_profile(), speed=SPEED, data_dir=data_dir)
    if advance_s:
        scope.clock.advance(advance_s)  # the time the daemon was down
    if advance_to_s is not None:
        scope.clock.advance(max(0.0, advance_to_s - scope.clock.now()))  # down until then
    driver = Driver(scope)
    async with scope:
        scheduler = Scheduler.resume(scope, data_dir, index, tl_id, on_event=driver)
        driver.scheduler = scheduler
        if setup is not None:
            setup(driver)
        state = await scheduler.run()
    return scheduler, driver, state


def no_partial_files(data_dir: Path) -> bool:
    return not [p for p in data_dir.rglob("*") if p.name.endswith(".partial")]


async def test_time_points_are_anchored_and_every_frame_is_complete(tmp_path: Path) -> None:
    plan = make_plan(z_stack=ZStack(3, 4.0))
    scheduler, driver, state = await run_new(tmp_path, plan)
    index = scheduler.index
    assert state == "completed"
    points = index.time_points(scheduler.id)
    assert [p["status"] for p in points] == ["done"] * 3
    for p in points:
        # Anchored: planned exactly t0 + k * interval, started at or after it, inside the slot.
        assert p["planned_s"] == scheduler.t0_s + p["tp"] * INTERVAL_S
        assert p["planned_s"] <= p["started_s"] < p["planned_s"] + INTERVAL_S
    frames = index.frames(scheduler.id)
    assert len(frames) == 3 * 2 * 3
    assert len({(f["tp"], f["key"], f["z_index"], f["kind"]) for f in frames}) == len(frames)
    for tp in range(3):
        for key in ("B2-1", "B3-1"):
            zs = sorted(f["z_um"] for f in frames if f["tp"] == tp and f["key"] == key)
            # Sim controller positions are exact to the G-code's 1 nm resolution (mm with 6 decimals).
            assert np.allclose(np.diff(zs), 4.0, atol=1e-3)
    for f in frames:
        pixels = tifffile.imread(tmp_path / f["path"])
        assert pixels.shape == (240, 320) and pixels.dtype == np.uint8
        assert f["delta_t_s"] == pytest.approx(f["t_s"] - scheduler.t0_s)
        assert f["focus_score"] is not None and f["focus_score"] > 0
        assert (f["confluence"] is not None) == (f["z_index"] == 1)  # the focal plane of the stack
    # OME-XML validated against the OME 2016-06 XSD (ome-types, general-purpose OME library).
    ome = ome_types.from_tiff(tmp_path / frames[0]["path"], validate=True)
    assert ome.images[0].pixels.physical_size_x == pytest.approx(sim_profile().optics.pixel_size_um)
    assert no_partial_files(tmp_path)
    kinds = {e["type"] for e in driver.events}
    assert {"state", "time_point", "progress", "frame", "frame_analysis"} <= kinds


def stop_after_first(driver: Driver) -> None:
    def act(e: dict[str, Any]) -> None:
        if e["type"] == "time_point" and e["status"] == "done" and e["tp"] == 0:
            driver.scheduler.shutdown()  # type: ignore[union-attr]  (as Ctrl-C or SIGTERM do)
            driver.fast_forward = False
    driver.actions.append(act)


@pytest.mark.parametrize(("down_until", "late_one", "missed"), [(2.1, 2, [1]), (2.5, 3, [1, 2])])
async def test_time_points_missed_while_down_are_recorded_and_the_next_on_time_one_runs(
    tmp_path: Path, down_until: float, late_one: int, missed: list[int]
) -> None:
    """The lateness rule (daemon.timelapse.timing): less than the tolerance late (15 min of
    the 1 h interval here) is taken late, more is missed, and the run goes on at the next
    time point still on time. Down until ``down_until`` intervals past t0."""
    plan = make_plan(count=5)
    first, _, state = await run_new(tmp_path, plan, setup=stop_after_first)
    assert state == "running"  # left unfinished, to be resumed
    assert first.index.timelapse(first.id)["stop_reason"] == STOPPED_BY_USER
    second, driver, state = await run_resume(tmp_path, first.id, advance_to_s=first.t0_s + down_until * INTERVAL_S)
    assert state == "completed"
    points = {p["tp"]: p for p in second.index.time_points(first.id)}
    assert sorted(points) == [0, 1, 2, 3, 4]
    for k in missed:
        assert points[k]["status"] == "missed" and points[k]["reason"] == f"{MISSED_DOWN}: {STOPPED_BY_USER}"
        assert points[k]["started_s"] is None  # never invented
    assert points[late_one]["status"] == "done"
    late = points[late_one]["started_s"] - points[late_one]["planned_s"]
    assert late < late_tolerance_s(INTERVAL_S)
    if late_one == 2:
        assert 0.05 * INTERVAL_S < late  # taken late: 0.1 of an interval
    assert points[late_one]["planned_s"] == first.t0_s + late_one * INTERVAL_S
    assert {f["tp"] for f in second.index.frames(first.id)} == {0, 2, 3, 4} - set(missed)
    assert any(a["kind"] == "missed" for a in second.index.alerts(first.id))


async def test_interrupted_time_point_is_completed_without_duplicates(tmp_path: Path) -> None:
    plan = make_plan(count=2, wells=["B2", "B3", "B4"])

    def stop_after_first_frame(driver: Driver) -> None:
        def act(e: dict[str, Any]) -> None:
            if e["type"] == "frame" and e["tp"] == 0:
                driver.scheduler.shutdown()  # type: ignore[union-attr]
        driver.actions.append(act)

    first, _, _ = await run_new(tmp_path, plan, setup=stop_after_first_frame)
    before = {f["key"]: f["id"] for f in first.index.frames(first.id)}
    assert list(before) == ["B2-1"]
    assert first.index.time_point(first.id, 0)["status"] == "running"
    second, driver, state = await run_resume(tmp_path, first.id)
    assert state == "completed"
    frames = second.index.frames(first.id)
    assert sorted((f["tp"], f["key"]) for f in frames) == [
        (0, "B2-1"), (0, "B3-1"), (0, "B4-1"), (1, "B2-1"), (1, "B3-1"), (1, "B4-1"),
    ]
    assert {f["key"]: f["id"] for f in frames if f["tp"] == 0}["B2-1"] == before["B2-1"]
    assert [p["status"] for p in second.index.time_points(first.id)] == ["done", "done"]
    # The position saved before the interruption was not visited again.
    assert "B2-1" not in [e["position"] for e in driver.of("progress") if e["tp"] == 0]


async def test_pause_resume_and_abort_requested_from_another_process(tmp_path: Path) -> None:
    plan = make_plan(count=6)
    other = open_index(tmp_path)  # a second connection, as `phasewatch timelapse pause` would use

    def control(driver: Driver) -> None:
        def act(e: dict[str, Any]) -> None:
            tl = driver.scheduler.id  # type: ignore[union-attr]
            if e["type"] == "time_point" and e["status"] == "done" and e["tp"] == 0:
                driver.fast_forward = False
                other.post_request(tl, "pause")
            elif e["type"] == "state" and e["state"] == "paused":
                # Past time point 1's tolerance, short of time point 2's plan: the real time the
                # pause takes at 1000x (the clock paying back host time at double speed) adds minutes.
                driver.scope.clock.advance(1.9 * INTERVAL_S)
                other.post_request(tl, "resume")
            elif e["type"] == "state" and e["state"] == "running" and e.get("reason") is None:
                driver.fast_forward = True
            elif e["type"] == "time_point" and e["status"] == "done" and e["tp"] == 2:
                other.post_request(tl, "abort")
        driver.actions.append(act)

    scheduler, driver, state = await run_new(tmp_path, plan, setup=control)
    assert state == "aborted"
    points = {p["tp"]: p for p in scheduler.index.time_points(scheduler.id)}
    assert points[0]["status"] == "done"
    assert points[1]["status"] == "missed" and points[1]["reason"] == MISSED_PAUSED
    assert points[2]["status"] == "done"
    assert max(points) <= 3  # nothing after the abort
    row = scheduler.index.timelapse(scheduler.id)
    assert row["state"] == "aborted" and row["finished_s"] is not None
    assert [e["state"] for e in driver.of("state")][1:] == ["paused", "running", "aborted"]
    other.close()


async def test_controller_reset_and_camera_unplug_fail_one_position_each_and_the_scope_recovers(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    plan = make_plan(count=2, wells=["B2", "B3", "B4"])

    def faults(driver: Driver) -> None:
        scope = driver.scope
        real_grab, real_open = scope.camera.grab, scope.camera.open
        state = {"unplugged": False, "open_fails": 0}

        async def grab() -> Any:
            if state["unplugged"]:
                state["unplugged"] = False
                raise CameraError("USB camera disconnected (simulated unplug)")
            return await real_grab()

        async def reopen() -> None:
            if state["open_fails"]:
                state["open_fails"] -= 1
                raise CameraError("camera not found yet")
            await real_open()

        monkeypatch.setattr(scope.camera, "grab", grab)
        monkeypatch.setattr(scope.camera, "open", reopen)

        def act(e: dict[str, Any]) -> None:
            if e["type"] == "progress" and e.get("index") == 1 and e["tp"] == 0:
                scope.truth.emulator.inject("reset")  # controller reboots: position lost
            if e["type"] == "progress" and e.get("index") == 2 and e["tp"] == 1:
                state["unplugged"], state["open_fails"] = True, 1
        driver.actions.append(act)

    scheduler, driver, state = await run_new(tmp_path, plan, setup=faults)
    assert state == "completed"
    pos = {(p["tp"], p["key"]): p for p in scheduler.index.positions(scheduler.id)}
    assert pos[(0, "B3-1")]["status"] == "failed"
    assert "PositionUnknownError" in pos[(0, "B3-1")]["reason"] or "restarted" in pos[(0, "B3-1")]["reason"]
    assert pos[(1, "B4-1")]["status"] == "failed" and "disconnected" in pos[(1, "B4-1")]["reason"]
    others = [p for k, p in pos.items() if k not in ((0, "B3-1"), (1, "B4-1"))]
    assert all(p["status"] == "ok" for p in others)
    points = scheduler.index.time_points(scheduler.id)
    assert [(p["status"], p["n_ok"], p["n_failed"]) for p in points] == [("partial", 2, 1), ("partial", 2, 1)]
    recovered = [e["recovered"] for e in driver.of("progress") if "recovered" in e]
    assert recovered == ["stage homed again", "camera reopened"]


async def test_free_space_reserve_stops_the_time_lapse_cleanly(tmp_path: Path) -> None:
    free = {"bytes": 10_000 * MB}

    def shrink(driver: Driver) -> None:
        def act(e: dict[str, Any]) -> None:
            if e["type"] == "time_point" and e["status"] == "done" and e["tp"] == 0:
                free["bytes"] = 120 * MB  # the disk filled up with something else meanwhile
        driver.actions.append(act)

    guard = SpaceGuard(tmp_path, reserve_mb=100.0, free=lambda _p: free["bytes"] - 20 * MB)
    scheduler, driver, state = await run_new(tmp_path, make_plan(count=4), setup=shrink, space_guard=guard)
    assert state == "stopped"
    points = scheduler.index.time_points(scheduler.id)
    assert [p["status"] for p in points] == ["done", "missed"]
    assert "free-space reserve" in points[1]["reason"]
    alerts = [a for a in scheduler.index.alerts(scheduler.id) if a["kind"] == "storage"]
    assert alerts and alerts[0]["level"] == "error" and "100 MB are kept in reserve" in alerts[0]["message"]
    assert "free-space reserve" in scheduler.index.timelapse(scheduler.id)["stop_reason"]
    assert no_partial_files(tmp_path)


async def test_disk_full_during_a_write_stops_cleanly_with_no_partial_file(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    calls = {"n": 0}
    real = frames_mod._write_all

    def fills_up(fh: Any, data: Any) -> None:
        calls["n"] += 1
        if calls["n"] == 4:
            fh.write(bytes(data)[: len(data) // 3])
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        real(fh, data)

    monkeypatch.setattr(frames_mod, "_write_all", fills_up)
    scheduler, driver, state = await run_new(tmp_path, make_plan(count=3))
    assert state == "stopped"
    index = scheduler.index
    assert len(index.frames(scheduler.id)) == 3
    points = index.time_points(scheduler.id)
    assert [p["status"] for p in points] == ["done", "partial"]
    skipped = [p for p in index.positions(scheduler.id, 1) if p["status"] == "skipped"]
    assert [p["key"] for p in skipped] == ["B3-1"] and "No space left" in skipped[0]["reason"]
    assert any(a["level"] == "error" and "No space left" in a["message"] for a in driver.of("alert"))
    assert no_partial_files(tmp_path)
    report = reconcile(tmp_path, index, verify="all")
    assert report.clean and not report.reindexed and report.verified == 3


async def test_correction_saves_both_kinds_and_says_so_when_uncalibrated(tmp_path: Path) -> None:
    from daemon.illumination.calibration import CalibrationStore, acquire_dark, acquire_flat

    profile = sim_profile()
    plan = make_plan(count=1, correction=True, save="both")
    # Without calibration frames: a warning, and raw frames only.
    uncal, driver, _ = await run_new(tmp_path / "a", plan, profile=profile)
    assert {f["kind"] for f in uncal.index.frames(uncal.id)} == {"raw"}
    assert any(a["kind"] == "correction" and a["level"] == "warning" for a in driver.of("alert"))

    data = tmp_path / "b"
    store = CalibrationStore(data / "calibration")
    cam = profile.camera
    async with sim_scope(profile, speed=SPEED) as scope:
        x, y = scope.truth.world.well_centre_um("H12")  # the sim plate's empty well: a blank field
        await scope.move_to(x_um=x, y_um=y, z_um=profile.sim.focal_plane.z0_um)
        dark = await acquire_dark(scope, frames=4, exposure_ms=cam.exposure_ms, gain_db=cam.gain_db)
        flat = await acquire_flat(scope, frames=4, exposure_ms=cam.exposure_ms, gain_db=cam.gain_db, defocus_um=200.0)
    store.save_dark(profile, dark, exposure_ms=cam.exposure_ms, gain_db=cam.gain_db, frames=4, bit_depth=8)
    store.save_flat(profile, flat, exposure_ms=cam.exposure_ms, gain_db=cam.gain_db, frames=4, bit_depth=8)
    cal, driver, _ = await run_new(data, plan, profile=profile)
    frames = cal.index.frames(cal.id)
    assert sorted(f["kind"] for f in frames) == ["corrected", "corrected", "raw", "raw"]
    corrector = store.corrector_for(profile, cam.exposure_ms, cam.gain_db)
    for key in ("B2-1", "B3-1"):
        raw = tifffile.imread(data / next(f["path"] for f in frames if f["key"] == key and f["kind"] == "raw"))
        cor = tifffile.imread(data / next(f["path"] for f in frames if f["key"] == key and f["kind"] == "corrected"))
        np.testing.assert_array_equal(cor, corrector.apply_to_dtype(raw))
    assert not any(a["kind"] == "correction" for a in driver.of("alert"))


async def test_focus_policy_first_and_tracking_state_kept_for_resume(tmp_path: Path) -> None:
    # 640 x 480: enough cells in the field for the focus curve to stand out of the noise.
    plan = make_plan(count=2, autofocus="first", interval_s=86400.0)  # the first searches take hours at this speed
    scheduler, driver, state = await run_new(tmp_path, plan, profile=sim_profile(640, 480))
    assert state == "completed"
    pos = {(p["tp"], p["key"]): p for p in scheduler.index.positions(scheduler.id)}
    frames = {(f["tp"], f["key"]): f for f in scheduler.index.frames(scheduler.id)}
    for key in ("B2-1", "B3-1"):
        first = json.loads(pos[(0, key)]["focus_json"])
        assert first["curve"], "every focus run records its focus curve"
        second = pos[(1, key)]["focus_json"]
        # "first": focus only at the first time point, unless it found nothing there.
        assert (second is None) == first["found"]
        if first["found"]:
            # The saved frame is the one in the plane focus found, then kept for later time points.
            assert frames[(0, key)]["z_um"] == pytest.approx(first["z_um"], abs=0.01)
            assert frames[(1, key)]["z_um"] == pytest.approx(first["z_um"], abs=0.01)
            assert frames[(1, key)]["focus_found"] is None  # not searched at time point 1
    saved = scheduler.index.resume_state(scheduler.id)
    assert set(saved["tracker"]["keys"]) >= {"B2-1"}
    assert saved["first_focus"]["planes"] == pytest.approx({
        k: json.loads(pos[(0, k)]["focus_json"])["z_um"]
        for k in ("B2-1", "B3-1") if json.loads(pos[(0, k)]["focus_json"])["found"]
    }, abs=0.001)
    assert driver.of("focus_point")


async def test_resume_with_another_profile_is_refused(tmp_path: Path) -> None:
    scheduler, _, _ = await run_new(tmp_path, make_plan(count=1))
    other = sim_profile()
    other = type(other)(**{**other.__dict__, "path": Path("hw_profiles/other-sim.toml")})
    async with sim_scope(other, data_dir=tmp_path) as scope:
        with pytest.raises(ConfigError, match="started with profile 'sim'"):
            Scheduler.resume(scope, tmp_path, scheduler.index, scheduler.id)

