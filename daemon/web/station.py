"""The station: one scope, its live view, its time-lapse, and who may use the hardware when.

Rules ("One hardware owner", docs/TARGETS.md):

* live view exposes only while the scope is free, so a time point pre-empts it;
* manual control (moves, autofocus) is refused while a time-lapse runs, with the reason
  and what to do; while it is paused, manual control is allowed;
* manual control is refused while another job holds the scope (an autofocus, a time
  point), naming the job; live view gives way within one frame;
* one time-lapse at a time per scope.

The station does not know HTTP: refusals are :class:`Busy` (409), unknown things
:class:`NotFound` (404), malformed requests :class:`BadRequest` (400). Driver errors
(LimitError, HardwareError) and plan errors (ConfigError) pass through to the API layer.
"""

from __future__ import annotations

import asyncio
import contextlib
import logging
import math
import time
from collections.abc import AsyncIterator
from pathlib import Path
from typing import TYPE_CHECKING, Any

from drivers.options import ConfigError
from daemon.storage.index import Index
from daemon.storage.space import DEFAULT_RESERVE_MB
from daemon.timelapse import timing
from daemon.events import Event, EventHub
from daemon.states import UNFINISHED_STATES as UNFINISHED
from daemon.web.checks import finite_number, only_keys
from daemon.web.errors import BadRequest, Busy, NotFound
from daemon.web.stream import LIVE_HOLDER, LiveView
from daemon.web.views import latest_per_position
from drivers.base import HardwareError, Position

if TYPE_CHECKING:
    from daemon.profile import Profile
    from daemon.scope import Scope
    from daemon.timelapse.plan import Plan, PlannedPosition
    from daemon.timelapse.scheduler import Scheduler
    from daemon.web.metrics import Metrics

log = logging.getLogger(__name__)

# How long a manual request waits for live view to finish its frame before giving up.
LIVE_YIELD_S = 3.0
# How long pause/resume/abort wait for the scheduler to act before answering "requested".
REQUEST_WAIT_S = 10.0
# Real seconds a shutdown waits for the position in progress before abandoning it.
SHUTDOWN_WAIT_S = 20.0


def _position_dict(p: Position | None) -> dict[str, float] | None:
    if p is None:
        return None
    return {"x_um": round(p.x_um, 3), "y_um": round(p.y_um, 3), "z_um": round(p.z_um, 3)}


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
    ) -> None:
        self.profile = profile
        self.scope = scope
        self.data_dir = data_dir
        self.index = index
        self.metrics = metrics
        self.reserve_mb = reserve_mb
        self.hub = EventHub()
        self.live = LiveView(scope, max_fps=max_fps, on_error=lambda _exc: self._hardware_error("live_view"))
        self.scheduler: Scheduler | None = None
        self._task: asyncio.Task[str] | None = None
        self._progress: dict[str, Any] | None = None
        self._af_seen: set[tuple[int, int, str]] = set()
        self.last_focus: dict[str, Any] | None = None
        self.started_monotonic = time.monotonic()
        metrics.attach(self)

    # -- life cycle --------------------------------------------------------------------

    async def start(self) -> None:
        """Resume the data folder's unfinished time-lapse of this profile, if any."""
        from daemon.timelapse.resume import pick_unfinished, resume_scheduler

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

    async def stop(self) -> None:
        """Leave the time-lapse unfinished (resumed on the next start) and stop live view."""
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
        if s is not None and s.state == "running":
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

    # -- manual control ----------------------------------------------------------------

    async def move(self, body: dict[str, Any]) -> dict[str, Any]:
        """Absolute or relative move in um, or to a well centre; soft limits checked by the driver."""
        only_keys(body, ("mode", "x_um", "y_um", "z_um", "well"))
        mode = body.get("mode", "absolute")
        if mode not in ("absolute", "relative"):
            raise BadRequest(f"'mode' must be 'absolute' or 'relative', got {mode!r}")
        well = body.get("well")
        if well is not None and not isinstance(well, str):
            raise BadRequest(f"'well' must be a well name such as 'B3', got {well!r}")
        axes = {k: finite_number(body, k) for k in ("x_um", "y_um", "z_um")}
        if well is None and all(v is None for v in axes.values()):
            raise BadRequest("give at least one of x_um, y_um, z_um (micrometres), or a well such as 'B3'")
        if well is not None:
            if mode == "relative" or axes["x_um"] is not None or axes["y_um"] is not None:
                raise BadRequest("a move to a well takes no x_um/y_um and no relative mode (z_um may be given)")
            axes["x_um"], axes["y_um"] = await asyncio.to_thread(self.well_centre_um, well)
        async with self.control("manual move (API)") as scope:
            try:
                if mode == "relative":
                    here = await scope.position()
                    target = {
                        "x_um": None if axes["x_um"] is None else here.x_um + axes["x_um"],
                        "y_um": None if axes["y_um"] is None else here.y_um + axes["y_um"],
                        "z_um": None if axes["z_um"] is None else here.z_um + axes["z_um"],
                    }
                else:
                    target = axes
                pos = await scope.move_to(**target)
            except HardwareError as exc:
                if not _is_limit(exc):
                    self._hardware_error("api")
                raise
        out = {"position_um": _position_dict(pos), "well": self.well_here(pos)}
        self.publish({"type": "stage", "position_um": out["position_um"], "well": out["well"]})
        return out

    def well_centre_um(self, well: str) -> tuple[float, float]:
        from daemon.vessels.stage_map import well_position_um

        return well_position_um(self.data_dir, self.profile, well)

    def well_here(self, pos: Position | None) -> str | None:
        """The well under the objective by the vessel-to-stage map; None between wells, off
        the vessel, or while no map has been taught."""
        from daemon.vessels.stage_map import well_at_stage

        if pos is None:
            return None
        try:
            return well_at_stage(self.data_dir, self.profile, pos.x_um, pos.y_um)
        except ConfigError:
            return None

    async def autofocus(self, body: dict[str, Any]) -> dict[str, Any]:
        from daemon.focus.autofocus import FocusPoint, autofocus
        from daemon.focus.metrics import METRICS

        only_keys(body, ("metric", "range_um", "centre_z_um"))
        metric = body.get("metric", "variance_of_laplacian")
        if metric not in METRICS:
            raise BadRequest(f"'metric' must be one of {', '.join(sorted(METRICS))}, got {metric!r}")
        range_um = finite_number(body, "range_um", positive=True)
        centre = finite_number(body, "centre_z_um")
        f = self.profile.focus
        if range_um is not None and range_um > f.z_safe_max_um - f.z_min_um:
            raise BadRequest(f"'range_um' {range_um:g} is wider than the focus travel {f.z_safe_max_um - f.z_min_um:g} um")
        if centre is not None and not f.z_min_um <= centre <= f.z_safe_max_um:
            raise BadRequest(f"'centre_z_um' must lie within the focus limits {f.z_min_um:g}..{f.z_safe_max_um:g} um")
        run_id = int(time.time() * 1000)

        def point(p: FocusPoint) -> None:
            self.publish({"type": "focus_point", "source": "manual", "run": run_id, **p.to_dict()})

        self.publish({"type": "focus_start", "source": "manual", "run": run_id})
        async with self.control("autofocus (API)") as scope:
            try:
                result = await autofocus(scope, metric=metric, centre_z_um=centre, range_um=range_um, on_point=point)
            except HardwareError as exc:
                if not _is_limit(exc):
                    self._hardware_error("api")
                raise
            pos = scope.last_position
        self.metrics.autofocus_runs.labels("api").inc()
        if not result.found:
            self.metrics.autofocus_failures.labels("api").inc()
        elif math.isfinite(result.score):
            self.metrics.last_focus_score.set(result.score)
        out = {**result.to_dict(), "run": run_id, "position_um": _position_dict(pos)}
        self.last_focus = out
        self.publish({"type": "focus_result", "source": "manual", **out})
        return out

    async def calibrate(self, kind: str, body: dict[str, Any]) -> dict[str, Any]:
        """Take and store a dark (lamp off) or flat (blank field under the objective) calibration frame."""
        from daemon.illumination import CalibrationError
        from daemon.illumination.calibration import CalibrationStore, acquire_dark, acquire_flat

        only_keys(body, ("frames", "exposure_ms", "gain_db", "defocus_um") if kind == "flat" else ("frames", "exposure_ms", "gain_db"))
        frames = body.get("frames", 16)
        if isinstance(frames, bool) or not isinstance(frames, int) or not 1 <= frames <= 256:
            raise BadRequest(f"'frames' must be a whole number from 1 to 256, got {frames!r}")
        cam = self.profile.camera
        exposure = finite_number(body, "exposure_ms", positive=True) or cam.exposure_ms
        gain = finite_number(body, "gain_db")
        gain = cam.gain_db if gain is None else gain
        from daemon.web.checks import camera_limits

        for name, value in (("exposure_ms", exposure), ("gain_db", gain)):
            lo, hi, unit = camera_limits(name)
            if not lo <= value <= hi:
                raise BadRequest(f"'{name}' must be from {lo:g} to {hi:g} {unit} ([camera] limits), got {value:g}")
        defocus = finite_number(body, "defocus_um")
        store = CalibrationStore(self.data_dir / "calibration")
        if kind == "flat" and await asyncio.to_thread(store.find_dark, self.profile, exposure, gain) is None:
            raise CalibrationError(store.describe_missing(self.profile, exposure, gain))
        async with self.control(f"{kind} calibration (API)") as scope:
            try:
                if kind == "dark":
                    image = await acquire_dark(scope, frames=frames, exposure_ms=exposure, gain_db=gain)
                else:
                    image = await acquire_flat(scope, frames=frames, exposure_ms=exposure, gain_db=gain, defocus_um=defocus)
            except HardwareError as exc:
                if not _is_limit(exc):
                    self._hardware_error("api")
                raise
            t_s = scope.clock.now()
            pos = scope.last_position
        common = {"exposure_ms": exposure, "gain_db": gain, "frames": frames,
                  "bit_depth": cam.bit_depth, "acquired_t_s": t_s}
        if kind == "dark":
            path = await asyncio.to_thread(store.save_dark, self.profile, image, **common)
        else:
            extra = {"position_um": _position_dict(pos), "where": "blank field chosen over the API"}
            method = "blank field, averaged" + (f", defocused {defocus:g} um" if defocus else "")
            path = await asyncio.to_thread(store.save_flat, self.profile, image, method=method, extra=extra, **common)
        meta = next((m for m in await asyncio.to_thread(store.list_sets, self.profile) if m["path"] == str(path)), {})
        out = {"kind": kind, "file": str(path.relative_to(self.data_dir)), "exposure_ms": exposure, "gain_db": gain,
               "frames": frames, "quality": meta.get("quality")}
        self.publish({"type": "calibration", **out})
        return out

    def calibrations(self) -> list[dict[str, Any]]:
        from daemon.illumination.calibration import CalibrationStore

        rows = CalibrationStore(self.data_dir / "calibration").list_sets(self.profile)
        keep = ("kind", "method", "objective", "exposure_ms", "gain_db", "frames_averaged", "acquired_utc", "quality")
        return [{k: m.get(k) for k in keep} for m in rows]

    # -- time-lapses ---------------------------------------------------------------------

    def _plan_and_positions(self, raw: Any) -> tuple[Plan, list[PlannedPosition], list[str], dict[str, Any]]:
        from daemon.timelapse.plan import Plan, check_fits, estimate_plan, field_of_view_um, plan_positions
        from daemon.vessels.stage_map import load_stage_map

        if not isinstance(raw, dict):
            raise BadRequest("the plan must be a JSON object with the keys of a plan file (name, vessel, wells, ...)")
        if "vessel_file" in raw:
            # A plan over the network must not make the daemon read a file of the sender's choosing.
            raise ConfigError("plan", "", "vessel_file", "not accepted over the network; use a built-in vessel name")
        plan = Plan.from_dict(raw, file="plan")
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
        }
        return plan, positions, warnings, estimate

    async def check_plan(self, raw: Any) -> dict[str, Any]:
        plan, positions, warnings, estimate = await asyncio.to_thread(self._plan_and_positions, raw)
        return {"plan": plan.to_dict(), "positions": [p.key for p in positions], "warnings": warnings, "estimate": estimate}

    async def start_timelapse(self, raw: Any) -> dict[str, Any]:
        from daemon.timelapse.scheduler import Scheduler

        s = self.active()
        if s is not None:
            raise Busy(
                f"time-lapse {s.id} '{s.plan.name}' is {s.state}; one time-lapse at a time: "
                f"abort it (POST /api/v1/timelapses/{s.id}/abort) or wait until it completes"
            )
        plan, positions, warnings, estimate = await asyncio.to_thread(self._plan_and_positions, raw)
        if self.active() is not None:  # another request started one while this was checked
            raise Busy("another time-lapse was started meanwhile; one time-lapse at a time")
        scheduler = Scheduler.create(
            self.scope, plan, self.data_dir, self.index, positions, reserve_mb=self.reserve_mb,
            warnings=warnings, on_event=self._on_event,
        )
        self._launch(scheduler)
        return {"id": scheduler.id, "name": plan.name, "state": scheduler.state, "warnings": warnings, "estimate": estimate}

    async def request(self, tl_id: int, action: str) -> tuple[bool, dict[str, Any]]:
        """Pause, resume or abort; returns (took effect already, the time-lapse's state)."""
        row = await asyncio.to_thread(self.index.timelapse, tl_id)
        if row is None:
            raise NotFound(f"no time-lapse {tl_id}; GET /api/v1/timelapses lists them")
        s = self.scheduler if self.scheduler is not None and self.scheduler.id == tl_id else None
        state = s.state if s is not None and self.active() is s else row["state"]
        if state not in UNFINISHED:
            raise Busy(f"time-lapse {tl_id} is {state}; there is nothing to {action}")
        wanted = {"pause": "paused", "resume": "running", "abort": "aborted"}[action]
        if state == wanted:
            raise Busy(f"time-lapse {tl_id} is already {state}")
        if s is None or self.active() is not s:
            if action != "abort":
                raise Busy(
                    f"time-lapse {tl_id} belongs to profile {row['profile_name']!r} and is not run by this daemon; "
                    f"start the daemon with --profile {row['profile_name']} to {action} it"
                )
            await asyncio.to_thread(self.index.set_state, tl_id, "aborted", reason="aborted by request",
                                    finished_s=self.scope.clock.now())
            return True, {"id": tl_id, "state": "aborted"}
        {"pause": s.pause, "resume": s.resume_running, "abort": s.abort}[action]()
        deadline = time.monotonic() + REQUEST_WAIT_S
        while s.state != wanted and time.monotonic() < deadline and not (self._task and self._task.done()):
            await asyncio.sleep(0.05)
        return s.state == wanted, {"id": tl_id, "state": s.state}

    def progress_summary(self) -> dict[str, Any] | None:
        """For metrics: the station's latest time-lapse, its state and share of time points over
        (blocking: reads the index, so a resumed time-lapse counts the time points before the restart)."""
        s = self.scheduler
        if s is None:
            return None
        counts: dict[str, int] = {}
        for p in self.index.time_points(s.id):
            if p["status"] != "running":
                counts[p["status"]] = counts.get(p["status"], 0) + 1
        over = sum(counts.values())
        return {"id": s.id, "state": s.state, "ratio": over / s.count if s.count else 0.0, "time_points": counts}

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

    def timelapse_detail(self, tl_id: int) -> dict[str, Any]:
        """Everything about one time-lapse (blocking: index reads; call through a thread)."""
        row = self.index.timelapse(tl_id)
        if row is None:
            raise NotFound(f"no time-lapse {tl_id}; GET /api/v1/timelapses lists them")
        import json

        points = self.index.time_points(tl_id)
        frames = self.index.frames(tl_id)
        statuses = {st: sum(p["status"] == st for p in points) for st in ("done", "partial", "failed", "missed", "running")}
        over = statuses["done"] + statuses["partial"] + statuses["failed"] + statuses["missed"]
        s = self.scheduler if self.scheduler is not None and self.scheduler.id == tl_id else None
        state = s.state if s is not None and self.active() is s else row["state"]
        spec = json.loads(row["plan_json"])
        out = {
            "id": tl_id, "name": row["name"], "state": state, "stop_reason": row["stop_reason"],
            "profile": row["profile_name"], "t0_s": row["t0_s"], "created_s": row["created_s"],
            "finished_s": row["finished_s"], "interval_s": row["interval_s"], "count": row["count"],
            "positions": [p["key"] for p in spec.get("positions", [])], "plan": spec.get("plan"),
            "time_points": statuses, "progress_ratio": over / row["count"] if row["count"] else 0.0,
            "frames": len(frames), "frames_not_ok": sum(f["status"] != "ok" for f in frames),
            "missed": [{"tp": p["tp"], "planned_s": p["planned_s"], "reason": p["reason"]} for p in points if p["status"] == "missed"],
            "time_point_list": points[-200:],
            "failed_positions": [p for p in self.index.positions(tl_id) if p["status"] != "ok"][-100:],
            "alerts": self.index.alerts(tl_id)[-200:],
            "latest": latest_per_position(frames),
            "clock_s": self.scope.clock.now(),
            "running_here": s is not None and self.active() is s,
        }
        if out["running_here"] and s is not None:
            out["progress"] = self._progress_of(s)
        return out

    def timelapse_list(self) -> list[dict[str, Any]]:
        rows = []
        for row in self.index.timelapses():
            points = self.index.time_points(row["id"])
            over = sum(p["status"] != "running" for p in points)
            s = self.scheduler if self.scheduler is not None and self.scheduler.id == row["id"] else None
            rows.append({
                "id": row["id"], "name": row["name"],
                "state": s.state if s is not None and self.active() is s else row["state"],
                "profile": row["profile_name"], "t0_s": row["t0_s"], "interval_s": row["interval_s"],
                "count": row["count"], "positions": row["n_positions"], "time_points_over": over,
                "missed": sum(p["status"] == "missed" for p in points), "stop_reason": row["stop_reason"],
            })
        return rows

    def require_timelapse(self, tl_id: int) -> dict[str, Any]:
        row = self.index.timelapse(tl_id)
        if row is None:
            raise NotFound(f"no time-lapse {tl_id}; GET /api/v1/timelapses lists them")
        return row

    # -- status ------------------------------------------------------------------------

    def state_word(self) -> str:
        holder = self.scope.holder
        s = self.active()
        if holder is not None and holder.startswith("time-lapse"):
            return "acquiring"
        if holder is not None and holder != LIVE_HOLDER:
            return "busy"
        if s is not None:
            return "paused" if s.state == "paused" else "waiting"
        if self.live.viewers:
            return "live"
        return "idle"

    def status(self) -> dict[str, Any]:
        p = self.profile
        scope = self.scope
        pos = scope.last_position
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
            "position_um": _position_dict(pos),
            "well": self.well_here(pos),
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


def _is_limit(exc: HardwareError) -> bool:
    from drivers.base import LimitError

    return isinstance(exc, LimitError)
