"""The time-lapse scheduler: runs a plan's time points on the scope's clock, unattended.

* Time points are anchored at ``t0 + k * interval`` (:mod:`daemon.timelapse.timing`); a
  late one runs late and is recorded with its real start, one whose slot closed is
  recorded as missed with the reason (overrun, pause, daemon down), never invented.
* Each time point holds the hardware (``scope.claim``) and visits every position: move,
  focus (tracking, first time point only, or off), expose (z-stack optional), then
  correct, score, write and index every frame (:mod:`daemon.timelapse.processing`) in a
  worker thread. Where to focus is the plan's focus policy (:mod:`daemon.timelapse.focusing`).
  Confluence of the analysed plane is worked out by a background task while the scope
  moves on, and feeds the culture watch at the end of the time point
  (:mod:`daemon.timelapse.analysis`).
* A hardware fault at one position (controller reset, camera unplugged) is recorded for
  that position with its reason; the scope is brought back and the next position runs.
* A storage failure (disk full, I/O error) or the free-space reserve being reached stops
  the time-lapse cleanly with an alert; no partial file is ever left.
* Everything needed to go on is in the data folder's index (plan, positions, t0, state,
  time points, focus tracker, culture watch), so :meth:`Scheduler.resume` after a crash
  or power cut continues where the process stopped; a time point interrupted while its
  slot is still open is completed, position by position, without duplicating frames.
* ``pause``, ``resume`` and ``abort`` act between positions; other processes ask for
  them through the index (:meth:`Index.post_request`).
"""

from __future__ import annotations

import asyncio
import contextlib
import dataclasses
import json
import logging
import sqlite3
from collections.abc import Callable
from pathlib import Path
from typing import TYPE_CHECKING, Any

from daemon import events as ev
from daemon.events import Event
from daemon.states import (
    INTERRUPTED,
    STOP_REQUESTS,
    STOPPED_BY_USER,
    UNFINISHED_STATES,
    PositionState,
    Request,
    TimelapseState,
    TimePointState,
)
from daemon.storage.frames import FrameStore
from daemon.storage.index import Index
from daemon.storage.space import DEFAULT_RESERVE_MB, SpaceGuard, frame_bytes_estimate
from daemon.timelapse import timing
from daemon.timelapse.analysis import AnalysisJob, ConfluenceWorker, confluence_function, watch_time_point
from daemon.timelapse.focusing import FocusPolicy
from daemon.timelapse.plan import Plan, PlannedPosition
from daemon.timelapse.processing import FrameProcessor, PositionFrames, SavedPosition
from daemon.timelapse.recovery import recover
from daemon.timelapse.summary import RunningSummary
from drivers.base import Frame, HardwareError, Position

if TYPE_CHECKING:
    from daemon.focus.autofocus import FocusPoint, FocusResult
    from daemon.scope import Scope

log = logging.getLogger(__name__)

# Real seconds between looks for pause/abort requests from other processes while waiting.
POLL_REAL_S = 0.2
MISSED_DOWN = "phasewatch was not running"
# Missed time points are written to the index this many at a time.
MISSED_CHUNK = 10_000
MISSED_OVERRUN = "the previous time point ran into this one's slot"
MISSED_PAUSED = "the time-lapse was paused"


class StorageStop(Exception):
    """Raised inside a time point when storage can take no more frames."""


def positions_to_dicts(positions: list[PlannedPosition]) -> list[dict[str, Any]]:
    return [dataclasses.asdict(p) for p in positions]


def positions_from_dicts(items: list[dict[str, Any]]) -> list[PlannedPosition]:
    return [PlannedPosition(**d) for d in items]


class Scheduler:
    """Runs one time-lapse (a row of the index) on ``scope``; create with :meth:`create` or :meth:`resume`."""

    def __init__(
        self,
        scope: Scope,
        data_dir: Path,
        index: Index,
        timelapse_id: int,
        *,
        on_event: Callable[[Event], None] | None = None,
        space_guard: SpaceGuard | None = None,
        resumed: bool = False,
    ) -> None:
        from daemon.culture.alerts import CultureWatch

        row = index.require_timelapse(timelapse_id)
        self.scope = scope
        self.profile = scope.profile
        self.data_dir = data_dir
        self.index = index
        self.id = timelapse_id
        spec = json.loads(row["plan_json"])
        self.plan = Plan.from_dict(spec["plan"], file=f"time-lapse {timelapse_id} in {index.path}")
        self.positions = positions_from_dicts(spec["positions"])
        self.t0_s: float = row["t0_s"]
        self.interval_s: float = row["interval_s"]
        self.count: int = row["count"]
        self.state = TimelapseState(row["state"])
        self.on_event = on_event
        self.store = FrameStore(data_dir, index)
        self.guard = space_guard or SpaceGuard(data_dir, row["reserve_mb"])
        saved = index.resume_state(timelapse_id)
        self.focusing = FocusPolicy.from_saved(self.profile, self.plan.autofocus, saved, metric=self.plan.focus_metric)
        self.watch = CultureWatch.from_dict(saved["watch"]) if saved.get("watch") else CultureWatch()
        cam = self.profile.camera
        self.exposure_ms = self.plan.exposure_ms if self.plan.exposure_ms is not None else cam.exposure_ms
        self.gain_db = self.plan.gain_db if self.plan.gain_db is not None else cam.gain_db
        self.processor: FrameProcessor | None = None
        # Critical-path software time of each position saved (s): a bounded record, the run lasts days.
        self.software_s = RunningSummary()
        self.analysis = ConfluenceWorker(
            index, timelapse_id, data_dir, pixel_size_um=self.profile.optics.pixel_size_um,
            analysis_plane=self.plan.analysis_plane, publish=self._publish, alert=self._alert,
            measure=confluence_function(),
        )
        self._request: str | None = None  # a Request, or what another process posted
        self._shutdown = False
        self._wake = asyncio.Event()
        self._miss_reason = MISSED_OVERRUN
        if resumed:
            # A shutdown asked for (Ctrl-C, SIGTERM, systemctl stop) left its mark; anything else
            # that ended the last run was a crash or a power cut.
            why = (index.timelapse(timelapse_id) or {}).get("stop_reason")
            self._miss_reason = f"{MISSED_DOWN}: {STOPPED_BY_USER if why == STOPPED_BY_USER else INTERRUPTED}"
        self._next_k, self._open_k = self._progress_from_index()

    # -- construction ------------------------------------------------------------------

    @classmethod
    def create(
        cls,
        scope: Scope,
        plan: Plan,
        data_dir: Path,
        index: Index,
        positions: list[PlannedPosition],
        *,
        reserve_mb: float = DEFAULT_RESERVE_MB,
        warnings: list[str] | None = None,
        on_event: Callable[[Event], None] | None = None,
        space_guard: SpaceGuard | None = None,
    ) -> Scheduler:
        """Record a new time-lapse starting now (time point 0 is due at once)."""
        now = scope.clock.now()
        tl_id = index.create_timelapse(
            name=plan.name,
            plan={"plan": plan.to_dict(), "positions": positions_to_dicts(positions)},
            profile_path=str(scope.profile.path),
            profile_name=scope.profile.name,
            created_s=now,
            t0_s=now,
            interval_s=plan.interval_s,
            count=plan.count,
            n_positions=len(positions),
            reserve_mb=reserve_mb,
        )
        for text in warnings or []:
            index.add_alert(tl_id, t_s=now, level="warning", kind="plan", message=text)
        return cls(scope, data_dir, index, tl_id, on_event=on_event, space_guard=space_guard)

    @classmethod
    def resume(
        cls,
        scope: Scope,
        data_dir: Path,
        index: Index,
        timelapse_id: int,
        *,
        on_event: Callable[[Event], None] | None = None,
        space_guard: SpaceGuard | None = None,
    ) -> Scheduler:
        """Continue an unfinished time-lapse of this data folder (after a restart)."""
        row = index.require_timelapse(timelapse_id)
        if row["profile_name"] != scope.profile.name:
            from drivers.options import ConfigError

            raise ConfigError(
                scope.profile.path, "", None,
                f"time-lapse {timelapse_id} was started with profile {row['profile_name']!r}; resume it with that profile",
            )
        return cls(scope, data_dir, index, timelapse_id, on_event=on_event, space_guard=space_guard, resumed=True)

    def _progress_from_index(self) -> tuple[int, int | None]:
        """(first time point not yet recorded, time point left running by a crash or pause)."""
        points = self.index.time_points(self.id)
        open_k = next((p["tp"] for p in points if p["status"] == TimePointState.RUNNING), None)
        next_k = max((p["tp"] for p in points), default=-1) + 1
        return next_k, open_k

    # -- control -----------------------------------------------------------------------

    def pause(self) -> None:
        self._ask(Request.PAUSE)

    def resume_running(self) -> None:
        self._ask(Request.RESUME)

    def abort(self) -> None:
        self._ask(Request.ABORT)

    def shutdown(self) -> None:
        """Stop in this process but leave the time-lapse unfinished, to be resumed later."""
        self._ask(Request.SHUTDOWN)

    def set_miss_reason(self, reason: str) -> None:
        """Why time points due before the next run were not run (recorded with them)."""
        self._miss_reason = reason

    def _ask(self, request: Request) -> None:
        self._request = request
        self._wake.set()

    async def _take_requests(self) -> None:
        external = await asyncio.to_thread(self.index.take_request, self.id)
        request = self._request or external
        self._request = None
        if request == Request.PAUSE and self.state == TimelapseState.RUNNING:
            await self._set_state(TimelapseState.PAUSED, "paused by request")
        elif request == Request.RESUME and self.state == TimelapseState.PAUSED:
            self._miss_reason = MISSED_PAUSED
            await self._set_state(TimelapseState.RUNNING)
        elif request == Request.ABORT:
            await self._close_open_time_point("aborted")
            await self._set_state(TimelapseState.ABORTED, "aborted by request", finished=True)
        elif request == Request.SHUTDOWN:
            self._shutdown = True
            if self.state == TimelapseState.RUNNING:
                await self._set_state(TimelapseState.RUNNING, STOPPED_BY_USER)

    async def _interrupted(self) -> bool:
        """Checked between positions: a request (here or from another process) that ends
        this time point's run here, leaving it open."""
        if self._request is None:
            external = await asyncio.to_thread(self.index.peek_request, self.id)
            # A pause/abort asked in this process while the index was read must not be overwritten.
            if self._request is None:
                self._request = external
        return self._request in STOP_REQUESTS

    # -- events ------------------------------------------------------------------------

    def _publish(self, event: Event) -> None:
        if self.on_event is not None:
            self.on_event(event)

    async def _alert(self, level: str, kind: str, message: str) -> None:
        now = self.scope.clock.now()
        try:
            alert = await asyncio.to_thread(
                self.index.add_alert, self.id, t_s=now, level=level, kind=kind, message=message
            )
        except (OSError, sqlite3.DatabaseError):
            # The index itself may be what ran out of space: the alert still goes out.
            alert = {"timelapse_id": self.id, "t_s": now, "level": level, "kind": kind, "message": message}
        self._publish(ev.AlertEvent(type="alert", **alert))

    async def _set_state(self, state: TimelapseState, reason: str | None = None, *, finished: bool = False) -> None:
        self.state = state
        finished_s = self.scope.clock.now() if finished else None
        with contextlib.suppress(OSError, sqlite3.DatabaseError):
            await asyncio.to_thread(self.index.set_state, self.id, state, reason=reason, finished_s=finished_s)
        self._publish(ev.StateEvent(type="state", timelapse_id=self.id, state=state, reason=reason))

    # -- the main loop -----------------------------------------------------------------

    async def run(self) -> TimelapseState:
        """Run until completed, aborted, stopped (storage) or shut down; returns the state."""
        # The whole run holds the scope's clock but for its idle waits (_idle): on the simulated
        # scope the bookkeeping between time points is then no time either, and time points
        # start on their planned time at any speed (drivers.clock).
        with self.scope.clock.paused():
            await self._run_held()
        return self.state

    async def _run_held(self) -> None:
        await self._prepare()
        try:
            async with self.analysis.running():
                while self.state in UNFINISHED_STATES and not self._shutdown:
                    await self._take_requests()
                    if self._shutdown or self.state not in UNFINISHED_STATES:
                        break
                    if self.state == TimelapseState.PAUSED:
                        await self._idle(POLL_REAL_S)
                        continue
                    await self._step()
                await self.analysis.drain()
        finally:
            await self._save_resume_state(watch=True)

    async def _step(self) -> None:
        now = self.scope.clock.now()
        if self._open_k is not None:
            if self._open_k < self.count and timing.slot_open(self._open_k, self.t0_s, self.interval_s, now):
                await self._run_time_point(self._open_k)
                return
            await self._close_open_time_point(self._miss_reason)
        step = timing.next_step(self._next_k, self.count, self.t0_s, self.interval_s, now)
        if step.missed:
            await self._record_missed(step.missed)
        if step.action == "done":
            await self._set_state(TimelapseState.COMPLETED, finished=True)
        elif step.action == "wait":
            with self.scope.clock.released():
                real_s = self.scope.clock.real_s_for(step.at_s - now)
            if real_s <= POLL_REAL_S:
                # The last stretch is waited out holding the clock, which then reads the planned
                # time exactly: on a fast simulated clock a late wake-up would be seconds late.
                await self.scope.clock.sleep(step.at_s - now)
            else:
                await self._idle(min(POLL_REAL_S, real_s / 2.0))
        else:
            await self._run_time_point(step.k)

    async def _idle(self, real_s: float) -> None:
        self._wake.clear()
        with self.scope.clock.released(), contextlib.suppress(asyncio.TimeoutError):
            await asyncio.wait_for(self._wake.wait(), timeout=max(real_s, 0.0))

    async def _prepare(self) -> None:
        """Correction, frame kinds and analysis for this run; announce the start."""
        from daemon.illumination.calibration import CalibrationStore

        corrector = None
        calibration = CalibrationStore(self.data_dir / "calibration")
        if self.plan.correction:
            corrector = await asyncio.to_thread(
                calibration.corrector_for, self.profile, self.exposure_ms, self.gain_db
            )
        kinds: tuple[str, ...] = ("raw",)
        if corrector is not None:
            kinds = {"raw": ("raw",), "corrected": ("corrected",), "both": ("raw", "corrected")}[self.plan.save]
        self.processor = FrameProcessor(
            self.store, timelapse_id=self.id, timelapse_name=self.plan.name, t0_s=self.t0_s,
            pixel_size_um=self.profile.optics.pixel_size_um, objective=self.profile.optics.objective,
            kinds=kinds, corrector=corrector, analysis_plane=self.plan.analysis_plane,
            conditions=self.plan.conditions,
        )
        resumed = bool(await asyncio.to_thread(self.index.time_points, self.id))
        if resumed and self.state == TimelapseState.RUNNING:
            # Running again: should this run end without a shutdown, it was interrupted.
            await asyncio.to_thread(self.index.set_state, self.id, TimelapseState.RUNNING, reason=None)
        if not resumed:
            # Time point 0 is planned for when acquisition can really begin, not for when
            # the plan was recorded: on a fast simulated clock the set-up above is hours.
            self.t0_s = self.scope.clock.now()
            await asyncio.to_thread(self.index.set_t0, self.id, self.t0_s)
            self.processor.t0_s = self.t0_s
        self._publish(ev.StateEvent(
            type="state", timelapse_id=self.id, state=self.state, reason="resumed" if resumed else "started",
            name=self.plan.name, count=self.count, interval_s=self.interval_s,
            positions=len(self.positions), t0_s=self.t0_s,
        ))
        if self.plan.correction and corrector is None:
            why = calibration.describe_missing(self.profile, self.exposure_ms, self.gain_db)
            await self._alert(
                "warning", "correction",
                f"illumination correction asked for but not possible: {why}; saving raw frames",
            )

    @property
    def kinds(self) -> tuple[str, ...]:
        return self.processor.kinds if self.processor is not None else ("raw",)

    async def _record_missed(self, missed: tuple[int, int] | tuple[()]) -> None:
        """Record the time points ``first..last`` (both included) as missed.

        In the index one row each, written in bounded chunks; to listeners one event per
        range (the last one's), however many there are, so a long downtime on a short
        interval floods nothing."""
        if not missed:
            return
        first, last = missed
        for lo in range(first, last + 1, MISSED_CHUNK):
            hi = min(last, lo + MISSED_CHUNK - 1)
            items = [(k, timing.planned_s(self.t0_s, self.interval_s, k)) for k in range(lo, hi + 1)]
            await asyncio.to_thread(self.index.record_missed, self.id, items, self._miss_reason)
        self._next_k = max(self._next_k, last + 1)
        n = last - first + 1
        self._publish(ev.TimePointEvent(
            type="time_point", timelapse_id=self.id, tp=last, status=TimePointState.MISSED,
            planned_s=timing.planned_s(self.t0_s, self.interval_s, last),
            reason=self._miss_reason if n == 1 else f"{self._miss_reason} ({n} time points, {first + 1} to {last + 1})",
        ))
        span = f"{first + 1}" + (f" to {last + 1}" if n > 1 else "")
        await self._alert("warning", "missed", f"{n} time point(s) missed ({span}): {self._miss_reason}")

    async def _close_open_time_point(self, reason: str) -> None:
        k = self._open_k
        if k is None:
            return
        done = {p["key"] for p in await asyncio.to_thread(self.index.positions, self.id, k)}
        for pos in self.positions:
            if pos.key not in done:
                await asyncio.to_thread(
                    self.index.record_position, self.id, k, key=pos.key, well=pos.well, site=pos.site,
                    status=PositionState.SKIPPED, reason=reason,
                )
        await self._finish_time_point(k, forced_reason=reason)

    async def _finish_time_point(self, k: int, forced_reason: str | None = None) -> None:
        rows = await asyncio.to_thread(self.index.positions, self.id, k)
        ok = sum(r["status"] == PositionState.OK for r in rows)
        if ok == len(self.positions):
            status = TimePointState.DONE
        else:
            status = TimePointState.FAILED if ok == 0 else TimePointState.PARTIAL
        reason = forced_reason
        if reason is None and status != TimePointState.DONE:
            reason = f"{len(self.positions) - ok} of {len(self.positions)} positions not imaged"
        row = await asyncio.to_thread(
            self.index.finish_time_point, self.id, k, status=status, finished_s=self.scope.clock.now(), reason=reason
        )
        self._open_k = None
        self._next_k = max(self._next_k, k + 1)
        await self.analysis.drain()
        await watch_time_point(self.index, self.id, self.watch, k, self._alert)
        await self._save_resume_state(watch=True)
        self._publish(ev.TimePointEvent(
            type="time_point", timelapse_id=self.id, tp=row["tp"], status=row["status"], planned_s=row["planned_s"],
            started_s=row["started_s"], finished_s=row["finished_s"], n_ok=row["n_ok"], n_failed=row["n_failed"],
            reason=row["reason"],
        ))

    # -- one time point ----------------------------------------------------------------

    async def _run_time_point(self, k: int) -> None:
        # Held from the first look at the index to the time point's record: on the simulated
        # scope it then lasts the modelled durations of its moves, settles and exposures,
        # as the plan check estimates, not the host's computing times the clock's speed.
        with self.scope.clock.paused():
            await self._run_time_point_held(k)

    async def _run_time_point_held(self, k: int) -> None:
        planned = timing.planned_s(self.t0_s, self.interval_s, k)
        done = {p["key"] for p in await asyncio.to_thread(self.index.positions, self.id, k)}
        todo = [p for p in self.positions if p.key not in done]
        frames_each = len(self.kinds) * self.plan.frames_per_position
        cam = self.profile.camera
        needed = len(todo) * frames_each * frame_bytes_estimate(cam.width_px, cam.height_px, cam.bit_depth)
        space = await asyncio.to_thread(self.guard.check, needed)
        if not space.ok:
            why = f"free-space reserve reached: {space.message}"
            if self._open_k is None:
                self._miss_reason = why
                await self._record_missed((k, k))
            await self._stop_for_storage(why)
            return
        started = self.scope.clock.now()
        await asyncio.to_thread(self.index.begin_time_point, self.id, k, planned_s=planned, started_s=started)
        self._open_k = k
        self._miss_reason = MISSED_OVERRUN
        late_s = started - planned
        self._publish(ev.TimePointEvent(
            type="time_point", timelapse_id=self.id, tp=k, status=TimePointState.RUNNING, planned_s=planned,
            started_s=started, late_s=late_s,
        ))
        async with self.scope.claim(f"time-lapse {self.plan.name}"):
            if self.scope.last_position is None:
                # Position unknown (not homed since connecting, or lost): nothing can move until homed.
                with contextlib.suppress(HardwareError):
                    await self.scope.home()
            for i, pos in enumerate(todo):
                if await self._interrupted():
                    return  # the time point stays open; a resume inside its slot completes it
                self._publish(ev.ProgressEvent(
                    type="progress", timelapse_id=self.id, tp=k, count=self.count, position=pos.key,
                    index=len(done) + i, positions=len(self.positions), late_s=round(late_s, 3),
                ))
                try:
                    await self._image_position(k, pos)
                except StorageStop as exc:
                    await self._stop_for_storage(str(exc))
                    return
                except Exception as exc:  # noqa: BLE001 - one position's bug must not end a days-long run
                    log.exception("time point %d, position %s", k, pos.key)
                    text = f"internal error: {type(exc).__name__}: {exc}"
                    await self._record_position(k, pos, PositionState.FAILED, text)
                    await self._alert("error", "internal", f"time point {k}, position {pos.key}: {text}")
        await self._finish_time_point(k)

    async def _stop_for_storage(self, why: str) -> None:
        await self._alert("error", "storage", f"time-lapse stopped: {why}")
        if self._open_k is not None:
            with contextlib.suppress(OSError, sqlite3.DatabaseError):
                await self._close_open_time_point(f"stopped: {why}")
        await self._set_state(TimelapseState.STOPPED, why, finished=True)

    async def _image_position(self, k: int, pos: PlannedPosition) -> None:
        done_planes = await asyncio.to_thread(self.index.frame_planes, self.id, k, pos.key)
        wanted = {(z, kind) for z in range(self.plan.frames_per_position) for kind in self.kinds}
        if wanted <= done_planes:
            # Saved in full before a restart; only its record was lost.
            await self._record_position(k, pos, PositionState.OK, "frames were saved before the restart")
            return
        try:
            await self.scope.move_to(x_um=pos.x_um, y_um=pos.y_um)
            focus_z, result = await self._focus(k, pos)
            frames = await self._expose(focus_z, result, done_planes)
        except HardwareError as exc:
            await self._position_failed(k, pos, exc)
            return
        assert self.processor is not None
        data = PositionFrames(k, pos, frames, None if result is None else result.found, done_planes)
        try:
            saved = await asyncio.to_thread(self.processor.save_position, data)
        except (OSError, sqlite3.DatabaseError) as exc:
            raise StorageStop(str(exc)) from exc
        self.software_s.add(saved.software_s)
        reason = None if result is None or result.found else result.message
        await self._record_position(k, pos, PositionState.OK, reason, focus=None if result is None else result.to_dict())
        self._publish_frames(k, pos, saved)
        if saved.analysis_frame_ids:
            await self.analysis.submit(AnalysisJob(k, pos.key, saved.analysis_frame_ids, saved.analysis_image))
        await self._save_resume_state()

    def _publish_frames(self, k: int, pos: PlannedPosition, saved: SavedPosition) -> None:
        for meta, path, frame_id in saved.frames:
            self._publish(ev.FrameEvent(
                type="frame", timelapse_id=self.id, tp=k, position=pos.key, well=pos.well, site=pos.site,
                z_index=meta.z_index, kind=meta.kind, path=path, frame_id=frame_id, t_s=meta.t_s, z_um=meta.z_um,
                focus_score=meta.focus_score, focus_found=meta.focus_found,
            ))

    async def _record_position(
        self, k: int, pos: PlannedPosition, status: PositionState, reason: str | None,
        focus: dict[str, Any] | None = None,
    ) -> None:
        await asyncio.to_thread(
            self.index.record_position, self.id, k, key=pos.key, well=pos.well, site=pos.site,
            status=status, reason=reason, t_s=self.scope.clock.now(), focus=focus,
        )

    async def _position_failed(self, k: int, pos: PlannedPosition, exc: HardwareError) -> None:
        reason = f"{type(exc).__name__}: {exc}"
        await self._record_position(k, pos, PositionState.FAILED, reason)
        await self._alert("warning", "hardware", f"time point {k}, position {pos.key} failed: {exc}")
        try:
            what = await recover(self.scope, exc)
        except HardwareError as again:
            await self._alert("error", "hardware", f"scope not recovered after the fault at {pos.key}: {again}")
            return
        self._publish(ev.ProgressEvent(type="progress", timelapse_id=self.id, tp=k, position=pos.key, recovered=what))

    async def _focus(self, k: int, pos: PlannedPosition) -> tuple[float, FocusResult | None]:
        """The plane to image at, by the plan's focus policy; each focus frame goes out as an event."""

        def point(p: FocusPoint) -> None:
            self._publish(ev.FocusPointEvent(
                type="focus_point", timelapse_id=self.id, tp=k, position=pos.key, z_um=p.z_um, score=p.score, t_s=p.t_s,
            ))

        return await self.focusing.focus(self.scope, k, pos, point)

    async def _expose(
        self, focus_z_um: float, result: FocusResult | None, done_planes: set[tuple[int, str]]
    ) -> list[tuple[int, Frame, Position]]:
        frames: list[tuple[int, Frame, Position]] = []
        planes = self.plan.planes_um(focus_z_um)
        scope = self.scope
        for zi, z in enumerate(planes):
            if all((zi, kind) in done_planes for kind in self.kinds):
                continue
            last, here = scope.last_frame, scope.last_position
            if (
                result is not None and result.found and len(planes) == 1 and last is not None and here is not None
                and abs(here.z_um - z) < 1e-6 and last.exposure_ms == self.exposure_ms and last.gain_db == self.gain_db
            ):
                # Autofocus ended on a frame in this very plane at these settings: keep it
                # rather than light the cells once more.
                frames.append((zi, last, here))
                continue
            here = await scope.move_to(z_um=z)
            frame = await scope.capture(exposure_ms=self.exposure_ms, gain_db=self.gain_db)
            frames.append((zi, frame, here))
        return frames

    async def _save_resume_state(self, *, watch: bool = False) -> None:
        parts: dict[str, Any] = self.focusing.resume_state()
        if watch:
            parts["watch"] = self.watch.to_dict()
        with contextlib.suppress(OSError, sqlite3.DatabaseError):
            await asyncio.to_thread(self.index.save_resume_state, self.id, **parts)
