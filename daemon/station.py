"""The station: the typed service behind every front end that drives the scope.

One :class:`Station` owns one scope, its live view and its time-lapse, and decides who
may use the hardware when ("One hardware owner" in docs/TARGETS.md):

* live view exposes only while the scope is free, so a time point pre-empts it;
* manual control (moves, autofocus, calibration) is refused while a time-lapse runs,
  with the reason and what to do; while it is paused, manual control is allowed;
* manual control is refused while another job holds the scope (an autofocus, a time
  point), naming the job; live view gives way within one frame;
* one time-lapse at a time per scope.

Every operation takes a request dataclass (:mod:`daemon.requests`: parsed strictly by
the profile loader's rules) and returns a typed result (:mod:`daemon.results`). The work
itself is done by the domain functions the command line calls too
(:func:`daemon.manual.apply_move`, :func:`daemon.focus.autofocus.autofocus`,
:func:`daemon.illumination.acquire.take_flat`, ...), which hold the checks that need the
profile; the data folder's read side is :class:`daemon.archive.Archive`.

The station knows no HTTP: refusals are :class:`~daemon.errors.Busy`,
:class:`~daemon.errors.NotFound` and :class:`~daemon.errors.BadRequest`; driver errors
(LimitError, HardwareError), plan errors (ConfigError) and calibration errors pass
through to the front end.
"""

from __future__ import annotations

import asyncio
import contextlib
import dataclasses
import errno
import logging
import math
import time
from collections.abc import AsyncIterator
from pathlib import Path
from typing import TYPE_CHECKING, Any

from daemon.archive import (
    Archive, AlertsQuery, ExportFile, ExportRequest, ExportsMade, FramePage, FramesQuery, MovieQuery, PreviewQuery,
)
from daemon.errors import Busy, NoSpace, NotFound
from daemon.culture.readings import timelapse_readings
from daemon.focus.autofocus import AutofocusRequest, FocusPoint, autofocus_as_asked
from daemon.illumination.acquire import DarkRequest, FlatRequest, Taken, check_flat, take_dark, take_flat
from daemon.illumination.calibration import CalibrationStore
from daemon.live import LIVE_HOLDER, LiveView
from daemon.manual import MoveRequest, apply_move, resolve_move
from daemon.results import (
    CalibrationStored,
    ControlDone,
    FocusDone,
    MoveDone,
    PlanChecked,
    TimelapseStarted,
    position_json,
)
from daemon.storage.index import Index
from daemon.storage.offload import Offloader, OffloadOptions
from daemon.storage.space import DEFAULT_RESERVE_MB
from daemon.storage.verify import DEFAULT_RATE_MB_S, VerifyProgress, verify_all
from daemon.timelapse import timing
from daemon.events import Event, EventHub
from daemon.states import UNFINISHED_STATES as UNFINISHED
from daemon.states import TimelapseState, TimePointState
from drivers.base import HardwareError, LimitError, Position
from drivers.options import ConfigError, load_section

if TYPE_CHECKING:
    from daemon.culture.readings import WellReading
    from daemon.metrics import Metrics
    from daemon.profile import Profile
    from daemon.scope import Scope
    from daemon.timelapse.plan import Plan, PlannedPosition, PlanOptions
    from daemon.timelapse.scheduler import Scheduler

log = logging.getLogger(__name__)

# How long a manual request waits for live view to finish its frame before giving up.
LIVE_YIELD_S = 3.0
# How long pause/resume/abort wait for the scheduler to act before answering "requested".
REQUEST_WAIT_S = 10.0
# Real seconds a shutdown waits for the position in progress before abandoning it.
SHUTDOWN_WAIT_S = 20.0
# Stage points this close to a vessel's outer edge count as off it (the stage map is rounded to 1 nm;
# a tenth of a millimetre is well inside a plate's skirt).
ON_VESSEL_EDGE_MM = 0.1
ACTIONS = {"pause": TimelapseState.PAUSED, "resume": TimelapseState.RUNNING, "abort": TimelapseState.ABORTED}
# A write that fails with one of these failed for want of space, not for a broken disk.
NO_SPACE_ERRNOS = (errno.ENOSPC, errno.EDQUOT)


@dataclasses.dataclass(frozen=True)
class WellConfluence:
    """A well's latest confluence reading and the confluence at which it is to be passaged."""

    timelapse_id: int
    well: str
    confluence: float  # fraction 0..1
    threshold: float  # fraction 0..1


@dataclasses.dataclass(frozen=True, kw_only=True)
class ControlRequest:
    """Pause, resume or abort a time-lapse: no options, so any given is refused as unknown."""


class Station:
    def __init__(
        self,
        *,
        profile: Profile,
        scope: Scope,
        data_dir: Path,
        index: Index,
        metrics: Metrics,
        max_fps: float,
        reserve_mb: float = DEFAULT_RESERVE_MB,
        verify_rate_mb_s: float = DEFAULT_RATE_MB_S,
        offload: OffloadOptions | None = None,
    ) -> None:
        self.profile = profile
        self.scope = scope
        self.data_dir = data_dir
        self.index = index
        self.archive = Archive(data_dir, index)
        self.calibration = CalibrationStore(data_dir / "calibration")
        self.metrics = metrics
        self.reserve_mb = reserve_mb
        self.hub = EventHub()
        self.live = LiveView(
            scope, max_fps=max_fps, on_error=lambda _exc: self._hardware_error("live_view"),
            max_viewers=profile.scope.max_live_viewers, stall_s=profile.scope.live_stall_s,
        )
        self.scheduler: Scheduler | None = None
        self._task: asyncio.Task[str] | None = None
        self._progress: dict[str, Any] | None = None
        self._af_seen: set[tuple[int, int, str]] = set()
        self._wells_cache: tuple[tuple[int, int, int], list[WellConfluence]] | None = None
        self.last_focus: dict[str, Any] | None = None
        self.started_monotonic = time.monotonic()
        self.verify_rate_mb_s = verify_rate_mb_s
        self.storage_check = VerifyProgress()
        self._verify_task: asyncio.Task[VerifyProgress] | None = None
        self.offloader = Offloader(data_dir, index, offload) if offload is not None else None
        self._offload_due = asyncio.Event()
        self._offload_task: asyncio.Task[None] | None = None
        metrics.attach(self)

    # -- life cycle --------------------------------------------------------------------

    async def start(self) -> None:
        """Start the background check of every stored frame, and resume the data folder's
        unfinished time-lapse of this profile, if any."""
        from daemon.timelapse.resume import pick_unfinished, resume_scheduler

        if self.verify_rate_mb_s > 0:
            self._verify_task = asyncio.create_task(self._verify(), name="background frame check")
        if self.offloader is not None:
            self._offload_task = asyncio.create_task(self._offload_loop(), name="copy to lab storage")
        row = await asyncio.to_thread(pick_unfinished, self.index)
        if row is None:
            return
        if row["profile_name"] != self.profile.name:
            log.warning(
                "time-lapse %s was started with profile %s, not %s; left as it is", row["id"], row["profile_name"],
                self.profile.name,
            )
            return
        scheduler = resume_scheduler(self.scope, self.data_dir, self.index, row, on_event=self._on_event)
        self._launch(scheduler)

    async def _verify(self) -> VerifyProgress:
        try:
            return await verify_all(
                self.data_dir, self.index, self.storage_check, rate_mb_s=self.verify_rate_mb_s, now=self.scope.clock.now,
            )
        except asyncio.CancelledError:
            raise
        except Exception as exc:  # noqa: BLE001 - reported in the status; the daemon goes on serving
            log.exception("background frame check failed")
            self.storage_check.error = str(exc)
            return self.storage_check

    async def _offload_loop(self) -> None:
        """Copy passes on the schedule and after each time point, in their own task: rclone runs
        as a child process, so a slow or absent lab store never delays acquisition."""
        assert self.offloader is not None
        interval_s = self.offloader.options.interval_s
        while True:
            with contextlib.suppress(TimeoutError):
                await asyncio.wait_for(self._offload_due.wait(), interval_s)
            self._offload_due.clear()
            try:
                done = await self.offloader.run_once()
            except asyncio.CancelledError:
                raise
            except Exception:  # noqa: BLE001 - logged; the next pass tries again
                log.exception("copy to lab storage failed")
                self.metrics.offload_failures.inc()
                continue
            self.metrics.offload_copied.inc(done.copied)
            self.metrics.offload_pruned.inc(done.pruned)
            if done.rclone_error is not None:
                self.metrics.offload_failures.inc()
            if done.copied or done.pruned or done.rclone_error:
                log.info("copy to lab storage: %d of %d frames verified, %d local files removed%s", done.copied,
                         done.candidates, done.pruned, f"; {done.rclone_error}" if done.rclone_error else "")

    async def stop(self) -> None:
        """Leave the time-lapse unfinished (resumed on the next start) and stop live view."""
        if self._offload_task is not None and not self._offload_task.done():
            self._offload_task.cancel()
            with contextlib.suppress(asyncio.CancelledError):
                await self._offload_task
        if self._verify_task is not None and not self._verify_task.done():
            self._verify_task.cancel()
            with contextlib.suppress(asyncio.CancelledError):
                await self._verify_task
        if self._task is not None and not self._task.done() and self.scheduler is not None:
            self.scheduler.shutdown()
            try:
                async with asyncio.timeout(SHUTDOWN_WAIT_S):
                    await asyncio.shield(self._task)
            except TimeoutError:
                log.warning("time-lapse did not stop within %.0f s; abandoning the position in progress", SHUTDOWN_WAIT_S)
                self._task.cancel()
                with contextlib.suppress(asyncio.CancelledError):
                    await self._task
            except Exception:  # noqa: BLE001 - already logged by _run; shutting down regardless
                pass
        await self.live.close()

    def _launch(self, scheduler: Scheduler) -> None:
        self.scheduler = scheduler
        self._progress = None
        self._task = asyncio.create_task(self._run(scheduler), name=f"time-lapse {scheduler.id}")

    async def _run(self, scheduler: Scheduler) -> str:
        try:
            return await scheduler.run()
        except Exception as exc:
            log.exception("time-lapse %s failed", scheduler.id)
            self.publish({"type": "alert", "timelapse_id": scheduler.id, "level": "error", "kind": "daemon",
                          "message": f"time-lapse {scheduler.id} stopped by an internal error: {exc}",
                          "t_s": self.scope.clock.now()})
            return "failed"

    # -- events ------------------------------------------------------------------------

    def publish(self, event: Event) -> None:
        self.hub.publish(event)

    def _on_event(self, event: Event) -> None:
        """Scheduler hook: keep progress and metrics, then fan the event out."""
        kind = event.get("type")
        m = self.metrics
        if kind == "progress" and "index" in event:
            self._progress = dict(event)
        elif kind == "frame":
            m.frames_saved.inc()
            if event.get("focus_score") is not None:
                m.last_focus_score.set(event["focus_score"])
            if event.get("confluence") is not None:
                m.last_confluence.set(event["confluence"])
            found = event.get("focus_found")
            run = (int(event.get("timelapse_id", 0)), int(event.get("tp", 0)), str(event.get("position")))
            if found is not None and run not in self._af_seen:
                # One autofocus per position and time point, however many planes were saved.
                self._af_seen.add(run)
                if len(self._af_seen) > 10000:
                    self._af_seen.clear()
                m.autofocus_runs.labels("timelapse").inc()
                if not found:
                    m.autofocus_failures.labels("timelapse").inc()
        elif kind == "time_point" and event.get("status") == TimePointState.MISSED:
            m.time_points_missed.inc()
        elif kind == "time_point" and event.get("status") in (TimePointState.DONE, TimePointState.PARTIAL):
            self._offload_due.set()  # the new frames go to lab storage now, not at the next scheduled pass
        elif kind == "alert":
            level = event.get("level", "warning")
            m.alerts.labels(level if level in ("info", "warning", "error") else "warning").inc()
            if event.get("kind") == "hardware":
                m.hardware_errors.labels("timelapse").inc()
        self.publish(event)

    # -- arbitration -------------------------------------------------------------------

    def active(self) -> Scheduler | None:
        """The time-lapse this station runs that is not over (running or paused)."""
        s = self.scheduler
        if s is not None and s.state in UNFINISHED and self._task is not None and not self._task.done():
            return s
        return None

    def refusal(self) -> str | None:
        """Why manual control is refused right now, or None when it is allowed."""
        s = self.active()
        if s is not None and s.state == TimelapseState.RUNNING:
            return (
                f"time-lapse {s.id} '{s.plan.name}' is running and owns the scope; pause it first "
                f"(POST /api/v1/timelapses/{s.id}/pause), then move or focus"
            )
        holder = self.scope.holder
        if holder is not None and holder != LIVE_HOLDER:
            return f"the scope is busy: {holder}; try again when it has finished"
        return None

    @contextlib.asynccontextmanager
    async def control(self, holder: str) -> AsyncIterator[Scope]:
        """Hold the scope for one manual job, or raise :class:`Busy` saying who has it."""
        reason = self.refusal()
        if reason is not None:
            raise Busy(reason)
        async with contextlib.AsyncExitStack() as stack:
            try:
                async with asyncio.timeout(LIVE_YIELD_S):
                    await stack.enter_async_context(self.scope.claim(holder))
            except TimeoutError:
                raise Busy(f"the scope is busy: {self.scope.holder or 'another job'}; try again shortly") from None
            yield self.scope

    def _hardware_error(self, where: str) -> None:
        self.metrics.hardware_errors.labels(where).inc()

    @contextlib.asynccontextmanager
    async def hardware(self, holder: str) -> AsyncIterator[Scope]:
        """:meth:`control`, counting hardware faults (not soft-limit refusals) for the metrics."""
        async with self.control(holder) as scope:
            try:
                yield scope
            except HardwareError as exc:
                if not isinstance(exc, LimitError):
                    self._hardware_error("api")
                raise

    # -- manual control ----------------------------------------------------------------

    async def move(self, request: MoveRequest) -> MoveDone:
        """Absolute or relative move in um, or to a well centre; soft limits checked by the driver."""
        target = await asyncio.to_thread(resolve_move, request, self.profile, self.data_dir)
        async with self.hardware("manual move (API)") as scope:
            pos = await apply_move(scope, target)
        done = MoveDone(pos, await asyncio.to_thread(self.well_here, pos))
        self.publish({"type": "stage", **done.to_json()})
        return done

    def well_here(self, pos: Position | None) -> str | None:
        """The well under the objective by the vessel-to-stage map; None between wells, off
        the vessel, or while no map has been taught (blocking: reads the map)."""
        where = self.on_vessel(pos)
        return None if where is None else where["well"]

    def on_vessel(self, pos: Position | None) -> dict[str, Any] | None:
        """Where the objective is over the mapped vessel: the vessel's name, the point in
        vessel mm, whether it lies on the vessel at all, and the well there (None between
        wells). None without a position or a map (blocking: reads the map)."""
        from daemon.vessels.stage_map import mapped_vessel

        if pos is None:
            return None
        try:
            smap, vessel = mapped_vessel(self.data_dir, self.profile)
        except ConfigError:
            return None
        x_mm, y_mm = smap.to_vessel_mm(pos.x_um, pos.y_um)
        # The outer edge itself (where a homed stage often sits) counts as off, within the map's rounding.
        edge = ON_VESSEL_EDGE_MM
        inside = edge < x_mm < vessel.length_mm - edge and edge < y_mm < vessel.width_mm - edge
        return {"vessel": vessel.name, "x_mm": round(x_mm, 4), "y_mm": round(y_mm, 4), "on_vessel": inside,
                "well": smap.well_at(vessel, pos.x_um, pos.y_um) if inside else None}

    def vessel_drawing(self, name: str | None) -> dict[str, Any]:
        """A vessel's geometry for drawing it to scale (mm from its top-left outer corner):
        the named one, or the one the stage map was taught on; with whether it is mapped
        (blocking: reads the vessels files and the map)."""
        from daemon.vessels.geometry import get_vessel
        from daemon.vessels.stage_map import mapped_vessel

        mapped: str | None = None
        try:
            mapped = mapped_vessel(self.data_dir, self.profile)[1].name
        except ConfigError:
            mapped = None
        if name is None:
            if mapped is None:
                raise NotFound("no vessel is mapped to the stage yet; name one, e.g. /api/v1/vessels/96-well")
            name = mapped
        try:
            vessel = get_vessel(name)
        except ConfigError as exc:
            raise NotFound(str(exc)) from None
        return {**vessel.to_dict(), "mapped": vessel.name == mapped}

    async def autofocus(self, request: AutofocusRequest) -> FocusDone:
        """One cold autofocus here; its focus points stream as events while it runs."""
        request.check(self.profile)  # before the scope is claimed or any event sent (autofocus checks again)
        run_id = int(time.time() * 1000)

        def point(p: FocusPoint) -> None:
            self.publish({"type": "focus_point", "source": "manual", "run": run_id, **p.to_dict()})

        self.publish({"type": "focus_start", "source": "manual", "run": run_id})
        async with self.hardware("autofocus (API)") as scope:
            result = await autofocus_as_asked(scope, request, on_point=point)
            pos = scope.last_position
        self.metrics.autofocus_runs.labels("api").inc()
        if not result.found:
            self.metrics.autofocus_failures.labels("api").inc()
        elif math.isfinite(result.score):
            self.metrics.last_focus_score.set(result.score)
        done = FocusDone(result, run_id, pos)
        self.last_focus = done.to_json()
        self.publish({"type": "focus_result", "source": "manual", **self.last_focus})
        return done

    # -- calibration -------------------------------------------------------------------

    async def calibrate_dark(self, request: DarkRequest) -> CalibrationStored:
        """Average frames with the lamp off and store them for this exposure and gain."""
        async with self.hardware("dark calibration (API)") as scope:
            taken = await take_dark(scope, self.calibration, request)
        return self._stored(taken)

    async def calibrate_flat(self, request: FlatRequest) -> CalibrationStored:
        """Average the blank field under the objective and store it as the flat field."""
        await asyncio.to_thread(check_flat, self.calibration, self.profile, request)  # before claiming the scope
        async with self.hardware("flat calibration (API)") as scope:
            taken = await take_flat(scope, self.calibration, request, where="blank field chosen over the API")
        return self._stored(taken)

    def _stored(self, taken: Taken) -> CalibrationStored:
        out = CalibrationStored(taken.kind, str(taken.path.relative_to(self.data_dir)), taken.exposure_ms,
                                taken.gain_db, taken.frames, taken.quality)
        self.publish({"type": "calibration", **out.to_json()})
        return out

    async def calibrations(self) -> list[dict[str, Any]]:
        """The stored dark and flat frames of this profile."""
        rows = await asyncio.to_thread(self.calibration.list_sets, self.profile)
        keep = ("kind", "method", "objective", "exposure_ms", "gain_db", "frames_averaged", "acquired_utc", "quality")
        return [{k: m.get(k) for k in keep} for m in rows]

    # -- time-lapses ---------------------------------------------------------------------

    def _plan_and_positions(self, options: PlanOptions) -> tuple[Plan, list[PlannedPosition], list[str], dict[str, Any]]:
        from daemon.timelapse.plan import check_fits, estimate_plan, field_of_view_um, plan_from_options, plan_positions
        from daemon.timelapse.timing import describe_rule, late_tolerance_s
        from daemon.vessels.stage_map import load_stage_map

        if options.vessel_file:
            # A plan over the network must not make the daemon read a file of the sender's choosing.
            raise ConfigError("plan", "", "vessel_file", "not accepted over the network; use a built-in vessel name")
        plan = plan_from_options(options, file="plan")
        smap = load_stage_map(self.data_dir, self.profile)
        positions = plan_positions(plan, plan.get_vessel(), smap, field_of_view_um(self.profile))
        warnings = check_fits(self.profile, plan, positions)
        est = estimate_plan(self.profile, plan, positions)
        estimate = {
            "positions": est.positions, "time_point_s": round(est.time_point_s, 2),
            "first_time_point_s": round(est.first_time_point_s, 2), "per_position_s": round(est.per_position_s, 3),
            "travel_s": round(est.travel_s, 2), "frames_per_time_point": est.frames_per_time_point,
            "bytes_per_time_point": est.bytes_per_time_point, "duration_s": plan.duration_s,
            "summary": est.summary(),
            "late_tolerance_s": late_tolerance_s(plan.interval_s),
            "lateness_rule": describe_rule(plan.interval_s),
        }
        return plan, positions, warnings, estimate

    async def check_plan(self, options: PlanOptions) -> PlanChecked:
        """Where a plan images, whether it fits its interval, and how long it takes; starts nothing."""
        plan, positions, warnings, estimate = await asyncio.to_thread(self._plan_and_positions, options)
        return PlanChecked(plan, [p.key for p in positions], warnings, estimate)

    async def start_timelapse(self, options: PlanOptions) -> TimelapseStarted:
        from daemon.timelapse.scheduler import Scheduler

        s = self.active()
        if s is not None:
            raise Busy(
                f"time-lapse {s.id} '{s.plan.name}' is {s.state}; one time-lapse at a time: "
                f"abort it (POST /api/v1/timelapses/{s.id}/abort) or wait until it completes"
            )
        plan, positions, warnings, estimate = await asyncio.to_thread(self._plan_and_positions, options)
        if self.active() is not None:  # another request started one while this was checked
            raise Busy("another time-lapse was started meanwhile; one time-lapse at a time")
        scheduler = Scheduler.create(
            self.scope, plan, self.data_dir, self.index, positions, reserve_mb=self.reserve_mb,
            warnings=warnings, on_event=self._on_event,
        )
        self._launch(scheduler)
        return TimelapseStarted(scheduler.id, plan.name, scheduler.state, warnings, estimate)

    def _state_of(self, tl_id: int, indexed: str) -> str:
        """A time-lapse's state: the running scheduler's when this station runs it, else the index's."""
        s = self._running_here(tl_id)
        return s.state if s is not None else indexed

    def _running_here(self, tl_id: int) -> Scheduler | None:
        s = self.scheduler
        return s if s is not None and s.id == tl_id and self.active() is s else None

    async def control_timelapse(self, tl_id: int, action: str) -> ControlDone:
        """Pause, resume or abort (``action``); waits a little for it to take effect."""
        if action not in ACTIONS:
            raise ValueError(f"unknown action {action!r}")
        row = await asyncio.to_thread(self.archive.timelapse, tl_id)
        s = self._running_here(tl_id)
        state = s.state if s is not None else row["state"]
        if state not in UNFINISHED:
            raise Busy(f"time-lapse {tl_id} is {state}; there is nothing to {action}")
        wanted = ACTIONS[action]
        if state == wanted:
            raise Busy(f"time-lapse {tl_id} is already {state}")
        if s is None:
            if action != "abort":
                raise Busy(
                    f"time-lapse {tl_id} belongs to profile {row['profile_name']!r} and is not run by this daemon; "
                    f"start the daemon with --profile {row['profile_name']} to {action} it"
                )
            await asyncio.to_thread(self.index.set_state, tl_id, TimelapseState.ABORTED, reason="aborted by request",
                                    finished_s=self.scope.clock.now())
            return ControlDone(tl_id, action, TimelapseState.ABORTED, True)
        {"pause": s.pause, "resume": s.resume_running, "abort": s.abort}[action]()
        deadline = time.monotonic() + REQUEST_WAIT_S
        while s.state != wanted and time.monotonic() < deadline and not (self._task and self._task.done()):
            await asyncio.sleep(0.05)
        return ControlDone(tl_id, action, s.state, s.state == wanted)

    def progress_summary(self) -> dict[str, Any] | None:
        """For metrics: the station's latest time-lapse, its state and share of time points over
        (blocking: reads the index, so a resumed time-lapse counts the time points before the restart)."""
        s = self.scheduler
        if s is None:
            return None
        # Counted in the index: a run of millions of time points reads no more than a short one.
        counts = {st: n for st, n in self.index.time_point_counts(s.id).items() if st != TimePointState.RUNNING}
        over = sum(counts.values())
        return {"id": s.id, "state": s.state, "ratio": over / s.count if s.count else 0.0, "time_points": counts}

    def well_confluence_summary(self) -> list[WellConfluence]:
        """For metrics: each well's confluence at the latest time point of the station's latest
        time-lapse that gave it a reading, with its passaging threshold (blocking: reads the index).
        Recomputed only when a time point has ended since the last call."""
        s = self.scheduler
        if s is None:
            return []
        points = self.index.time_points(s.id)
        ended = tuple(p["tp"] for p in points if p["status"] in (TimePointState.DONE, TimePointState.PARTIAL))
        key = (s.id, ended[-1] if ended else -1, len(ended))
        if self._wells_cache is not None and self._wells_cache[0] == key:
            return self._wells_cache[1]
        latest: dict[str, WellConfluence] = {}
        for r in timelapse_readings(self.index, s.id):  # ordered by well, then time point
            if r.confluence is not None and r.tp in ended:
                latest[r.well] = WellConfluence(s.id, r.well, r.confluence, s.watch.rules_for(r.well).confluence_threshold)
        out = list(latest.values())
        self._wells_cache = (key, out)
        return out

    def _progress_of(self, s: Scheduler) -> dict[str, Any]:
        now = self.scope.clock.now()
        p = self._progress or {}
        next_k = timing.due_index(s.t0_s, s.interval_s, now) + 1
        return {
            "time_point": p.get("tp"),
            "position": p.get("position"),
            "position_index": p.get("index"),
            "positions": len(s.positions),
            "count": s.count,
            "acquiring": self.scope.holder is not None and self.scope.holder.startswith("time-lapse"),
            "next_time_point_s": timing.planned_s(s.t0_s, s.interval_s, next_k) if next_k < s.count else None,
        }

    def active_summary(self) -> dict[str, Any] | None:
        s = self.active()
        if s is None:
            return None
        return {"id": s.id, "name": s.plan.name, "state": s.state, "interval_s": s.interval_s, **self._progress_of(s)}

    def _detail(self, tl_id: int) -> dict[str, Any]:
        out = self.archive.detail(tl_id)
        s = self._running_here(tl_id)
        out["clock_s"] = self.scope.clock.now()
        out["running_here"] = s is not None
        if s is not None:
            out["state"] = s.state
            out["progress"] = self._progress_of(s)
        return out

    async def timelapse(self, tl_id: int) -> dict[str, Any]:
        """Everything about one time-lapse: progress, time points, alerts, latest frames."""
        return await asyncio.to_thread(self._detail, tl_id)

    def _summaries(self) -> list[dict[str, Any]]:
        return [{**row, "state": self._state_of(row["id"], row["state"])} for row in self.archive.summaries()]

    async def timelapses(self) -> list[dict[str, Any]]:
        """Every time-lapse of the data folder, with the running one's live state."""
        return await asyncio.to_thread(self._summaries)

    # -- the data folder (read side) ----------------------------------------------------

    async def frames(self, tl_id: int, query: FramesQuery) -> FramePage:
        return await asyncio.to_thread(self.archive.frames, tl_id, query)

    async def frame_path(self, tl_id: int, frame_id: int) -> Path:
        return await asyncio.to_thread(self.archive.frame_path, tl_id, frame_id)

    async def preview(self, tl_id: int, frame_id: int, query: PreviewQuery) -> bytes:
        return await asyncio.to_thread(self.archive.preview, tl_id, frame_id, query)

    async def latest(self, tl_id: int) -> list[dict[str, Any]]:
        return await asyncio.to_thread(self.archive.latest, tl_id)

    async def series(self, tl_id: int) -> dict[str, Any]:
        return await asyncio.to_thread(self.archive.series, tl_id)

    async def well_readings(self, tl_id: int, well: str) -> list[WellReading]:
        return await asyncio.to_thread(self.archive.well_readings, tl_id, well)

    async def movie(self, tl_id: int, position: str, query: MovieQuery) -> Path:
        return await asyncio.to_thread(self.archive.movie, tl_id, position, query)

    async def vessel(self, name: str | None) -> dict[str, Any]:
        return await asyncio.to_thread(self.vessel_drawing, name)

    async def exports(self, tl_id: int) -> list[ExportFile]:
        return await asyncio.to_thread(self.archive.exports, tl_id)

    async def make_exports(self, tl_id: int, request: ExportRequest | None = None) -> ExportsMade:
        """The exports of ``tl_id``; :class:`NoSpace` when the disk fills (each export file is
        written whole or not at all, so none is left half-written)."""
        request = request or ExportRequest()
        try:
            return await asyncio.to_thread(
                self.archive.make_exports, tl_id, stacks=request.stacks, kind=request.kind
            )
        except OSError as exc:
            if exc.errno not in NO_SPACE_ERRNOS:
                raise
            folder = self.archive.export_folder(tl_id)
            raise NoSpace(f"not enough space for the exports in {folder}: {exc.strerror}; "
                          "free some space and ask again (no partial file was left)") from None

    async def export_path(self, tl_id: int, name: str) -> Path:
        return await asyncio.to_thread(self.archive.export_path, tl_id, name)

    async def alerts(self, query: AlertsQuery) -> list[dict[str, Any]]:
        return await asyncio.to_thread(self.archive.alerts, query)

    # -- status ------------------------------------------------------------------------

    def state_word(self) -> str:
        holder = self.scope.holder
        s = self.active()
        if holder is not None and holder.startswith("time-lapse"):
            return "acquiring"
        if holder is not None and holder != LIVE_HOLDER:
            return "busy"
        if s is not None:
            return "paused" if s.state == TimelapseState.PAUSED else "waiting"
        if self.live.viewers:
            return "live"
        return "idle"

    def status(self) -> dict[str, Any]:
        p = self.profile
        scope = self.scope
        pos = scope.last_position
        here = self.on_vessel(pos)
        truth = None
        if scope.truth.known and pos is not None:
            true_z_um = scope.true_focus_z_um()
            truth = {
                "focus_z_um": None if true_z_um is None else round(true_z_um, 3),
                "well": scope.truth.well_at(pos.x_um, pos.y_um),
            }
        return {
            "state": self.state_word(),
            "holder": scope.holder,
            "manual_control": {"allowed": self.refusal() is None, "reason": self.refusal()},
            "position_um": position_json(pos),
            "well": (here or {}).get("well"),
            "vessel_position": here,
            "limits_um": {
                "x": [p.stage.x_min_um, p.stage.x_max_um],
                "y": [p.stage.y_min_um, p.stage.y_max_um],
                "z": [p.focus.z_min_um, p.focus.z_safe_max_um],
            },
            "profile": {
                "name": p.name, "scope": p.scope.name, "notes": p.scope.notes, "objective": p.optics.objective,
                "pixel_size_um": round(p.optics.pixel_size_um, 5), "depth_of_field_um": round(p.optics.depth_of_field_um, 3),
                "frame_px": [p.camera.width_px, p.camera.height_px], "bit_depth": p.camera.bit_depth,
                "exposure_ms": p.camera.exposure_ms, "simulated": p.is_simulated,
            },
            "active_timelapse": self.active_summary(),
            "live": {"viewers": self.live.viewers, "fps": round(self.live.fps, 2), "max_fps": self.live.max_fps,
                     "error": self.live.last_error},
            "frames_captured": scope.frames_captured,
            "last_focus": None if self.last_focus is None else {
                k: self.last_focus.get(k) for k in ("found", "z_um", "score", "confidence", "message", "true_z_um", "error_um")
            },
            "clock_s": scope.clock.now(),
            "clock_speed": scope.clock.speed,
            "uptime_s": round(time.monotonic() - self.started_monotonic, 1),
            "storage_check": self.storage_check.to_dict(),
            "simulator": truth,
        }

    def demo_plan(self) -> dict[str, Any]:
        """A small plan to try the daemon with: three wells of the Larkspur Row plate, tracked focus."""
        from daemon.vessels.stage_map import sim_vessel_name

        vessel = sim_vessel_name(self.profile) or "96-well"
        return {
            "name": "KVL-7 growth check, plate LR-0412",
            "vessel": vessel,
            "wells": ["B2", "B3", "C3"],
            "sites_per_well": 1,
            "interval_s": 120,
            "count": 30,
            "autofocus": "track",
            "correction": False,
            "save": "raw",
            "notes": "demo time-lapse of the Larkspur Row lab, incubator 3",
        }


    async def demo(self) -> tuple[dict[str, Any], PlanChecked]:
        """The demo plan and its check against this scope."""
        plan = self.demo_plan()
        return plan, await self.check_plan(plan_request(plan))


def plan_request(body: Any) -> PlanOptions:
    """A plan's options from a JSON object, by the plan file's own strict rules. Its errors
    are ConfigError: a plan is refused (422) as a whole, like a plan file, rather than
    malformed."""
    from daemon.timelapse.plan import PlanOptions

    return load_section(PlanOptions, body, file="plan", section="")

