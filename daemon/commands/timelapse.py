"""``phasewatch timelapse start|resume|list|show|pause|abort``: run time-lapses in the foreground.

``start PLAN`` checks the plan against the scope (positions inside the stage limits, the
time per time point against the interval), then runs it with a progress display.
Ctrl-C (or SIGTERM) stops this process but leaves the time-lapse unfinished, recorded as
stopped by the user, so that ``resume`` (or ``phasewatch serve``) continues it; time
points that pass meanwhile are recorded as missed (see :mod:`daemon.timelapse.timing`),
a run that ended otherwise is recorded as interrupted. ``resume`` keeps the simulated
clock's speed unless ``--sim-speed`` is given. ``pause`` and ``abort`` act on a time-lapse running in another
process through the data folder's index.
"""

from __future__ import annotations

import argparse
import asyncio
import contextlib
import datetime as dt
import logging
import shlex
import signal
import sys
from collections.abc import Iterator
from pathlib import Path
from typing import Any

from daemon.commands.common import add_profile_options, print_json
from daemon.events import Event
from daemon.states import (
    ENDED_TIME_POINT_STATES,
    STOPPED_BY_USER,
    UNFINISHED_STATES,
    FrameState,
    PositionState,
    Request,
    TimelapseState,
    TimePointState,
)
from daemon.storage.space import DEFAULT_RESERVE_MB

EXIT_STOPPED = 3


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("timelapse", help="run, resume and list time-lapses")
    tsub = p.add_subparsers(dest="timelapse_command", metavar="ACTION", required=True)

    start = tsub.add_parser("start", help="run a time-lapse plan in the foreground")
    start.add_argument("plan", type=Path, metavar="PLAN", help="plan file (.toml or .json)")
    add_profile_options(start, data=True)
    start.add_argument(
        "--reserve-mb", type=float, default=DEFAULT_RESERVE_MB, metavar="MB",
        help=f"stop cleanly when less than this would stay free on the data disk (default {DEFAULT_RESERVE_MB:g})",
    )
    start.add_argument("--quiet", "-q", action="store_true", help="print only time point summaries and alerts")
    start.set_defaults(func=run_start)

    resume = tsub.add_parser("resume", help="continue the unfinished time-lapse of a data folder")
    resume.add_argument("id", type=int, nargs="?", default=None, metavar="ID", help="time-lapse id (default: the unfinished one)")
    add_profile_options(resume, data=True)
    resume.add_argument("--verify", choices=("recent", "all", "size"), default="recent",
                        help="how thoroughly to check indexed frames first (default: recent)")
    resume.add_argument("--quiet", "-q", action="store_true", help="print only time point summaries and alerts")
    resume.set_defaults(func=run_resume)

    lister = tsub.add_parser("list", help="list the time-lapses of a data folder")
    _data_option(lister)
    lister.add_argument("--json", action="store_true", help="print as JSON")
    lister.set_defaults(func=run_list)

    show = tsub.add_parser("show", help="time points, failed positions and alerts of one time-lapse")
    show.add_argument("id", type=int, metavar="ID")
    _data_option(show)
    show.add_argument("--json", action="store_true", help="print as JSON")
    show.set_defaults(func=run_show)

    for action, text in (("pause", "pause a time-lapse between positions"), ("abort", "end a time-lapse for good")):
        q = tsub.add_parser(action, help=text)
        q.add_argument("id", type=int, metavar="ID")
        _data_option(q)
        q.set_defaults(func=run_request, request=action)


def _data_option(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--data", type=Path, default=Path("phasewatch-data"), help="data folder (default: ./phasewatch-data)")


def clock_text(t_s: float | None) -> str:
    if t_s is None:
        return "-"
    return dt.datetime.fromtimestamp(t_s, tz=dt.timezone.utc).strftime("%Y-%m-%d %H:%M:%S")


class ProgressDisplay:
    """Prints scheduler events: one line per time point and alert, a live line per position on a terminal."""

    def __init__(self, *, quiet: bool = False, stream: Any = None) -> None:
        self.stream = stream or sys.stdout
        self.quiet = quiet
        self.live = self.stream.isatty() and not quiet
        self.count = 0

    def _line(self, text: str) -> None:
        if self.live:
            self.stream.write("\r\033[K")
        self.stream.write(text + "\n")
        self.stream.flush()

    def __call__(self, event: Event) -> None:
        kind = event["type"]
        if kind == "state":
            if event.get("count"):
                self.count = event["count"]
                self._line(
                    f"time-lapse {event['timelapse_id']} '{event.get('name', '')}' {event.get('reason', '')}: "
                    f"{event['count']} time points every {event['interval_s']:g} s, {event['positions']} positions, "
                    f"t0 {clock_text(event.get('t0_s'))} UTC"
                )
            else:
                why = f" ({event['reason']})" if event.get("reason") else ""
                self._line(f"time-lapse {event['timelapse_id']}: {event['state']}{why}")
        elif kind == "time_point":
            self._time_point(event)
        elif kind == "alert":
            self._line(f"  ALERT {event['level']}: {event['message']}")
        elif kind == "progress" and self.live and "index" in event:
            self.stream.write(
                f"\r\033[K  time point {event['tp'] + 1}: position {event['index'] + 1}/{event['positions']} {event['position']}"
            )
            self.stream.flush()
        elif kind == "frame" and not self.quiet and not self.live:
            score = event.get("focus_score")
            conf = event.get("confluence")
            extra = "" if conf is None else f", confluence {conf * 100:.1f} %"
            self._line(
                f"    {event['position']} z{event['z_index']} {event['kind']}: z {event['z_um']:.1f} um, "
                f"focus score {score:.4g}{extra}"
            )

    def _time_point(self, event: Event) -> None:
        k = event["tp"]
        of = f"/{self.count}" if self.count else ""  # shown counting from 1; stored from 0
        if event["status"] == TimePointState.RUNNING:
            late = event.get("late_s") or 0.0
            self._line(f"time point {k + 1}{of} started {clock_text(event['started_s'])} UTC ({late:+.1f} s from plan)")
        elif event["status"] == TimePointState.MISSED:
            self._line(f"time point {k + 1}{of} missed (planned {clock_text(event['planned_s'])} UTC): {event.get('reason')}")
        else:
            took = (event["finished_s"] or 0.0) - (event["started_s"] or 0.0)
            why = f" - {event['reason']}" if event.get("reason") else ""
            self._line(
                f"time point {k + 1}{of} {event['status']}: {event['n_ok']} positions ok, {event['n_failed']} failed, "
                f"{took:.1f} s{why}"
            )


def resume_command(profile_arg: str, data_dir: Path) -> str:
    """What to type to go on with a time-lapse left unfinished (the clock keeps its speed)."""
    return f"phasewatch timelapse resume --profile {shlex.quote(profile_arg)} --data {shlex.quote(str(data_dir))}"


async def _run_scheduler(scheduler: Any, display: ProgressDisplay, data_dir: Path, profile_arg: str) -> int:
    loop = asyncio.get_running_loop()
    for sig in (signal.SIGINT, signal.SIGTERM):
        loop.add_signal_handler(sig, scheduler.shutdown)
    try:
        state = await scheduler.run()
    finally:
        for sig in (signal.SIGINT, signal.SIGTERM):
            loop.remove_signal_handler(sig)
    if state in UNFINISHED_STATES:
        print(
            f"time-lapse {scheduler.id} left {state} ({STOPPED_BY_USER}); continue it with: "
            f"{resume_command(profile_arg, data_dir)}"
        )
        return 0
    if state == TimelapseState.STOPPED:
        print(f"time-lapse {scheduler.id} stopped: {scheduler.index.timelapse(scheduler.id)['stop_reason']}", file=sys.stderr)
        return EXIT_STOPPED
    rows = scheduler.index.time_points(scheduler.id)
    counts = {s: sum(r["status"] == s for r in rows) for s in ENDED_TIME_POINT_STATES}
    print(
        f"time-lapse {scheduler.id} {state}: " + ", ".join(f"{v} {k}" for k, v in counts.items())
        + f"; export with: phasewatch export {scheduler.id} --data {data_dir}"
    )
    return 0


@contextlib.contextmanager
def _log_to_data_folder(data_dir: Path) -> Iterator[None]:
    """Diagnostics (tracebacks of internal errors) go to DATA/phasewatch.log, not the console."""
    from daemon.storage.index import DATA_FILE_MODE, DATA_FOLDER_MODE
    from drivers import atomic

    atomic.make_dirs(data_dir, mode=DATA_FOLDER_MODE)
    log_path = data_dir / "phasewatch.log"
    atomic.create_private(log_path, permissions=DATA_FILE_MODE)
    handler = logging.FileHandler(log_path, encoding="utf-8")
    handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(name)s: %(message)s"))
    root = logging.getLogger()
    level = root.level
    root.addHandler(handler)
    root.setLevel(logging.INFO)
    try:
        yield
    finally:
        root.removeHandler(handler)
        root.setLevel(level)
        handler.close()


def _report_reconcile(report: Any) -> None:
    if report.removed_partials or report.reindexed or not report.clean:
        print(f"data folder checked: {report.summary()}")


async def run_start(args: argparse.Namespace) -> int:
    from daemon.hardware import build_scope
    from daemon.profile import load_profile
    from daemon.timelapse.plan import check_fits, estimate_plan, field_of_view_um, load_plan, plan_positions
    from daemon.timelapse.resume import open_data_folder, run_lock
    from daemon.timelapse.timing import describe_rule
    from daemon.timelapse.scheduler import Scheduler
    from daemon.vessels.stage_map import load_stage_map

    profile = load_profile(args.profile)
    plan = load_plan(args.plan)
    vessel = plan.get_vessel()
    stage_map = load_stage_map(args.data, profile)
    positions = plan_positions(plan, vessel, stage_map, field_of_view_um(profile))
    warnings = check_fits(profile, plan, positions)
    estimate = estimate_plan(profile, plan, positions)
    print(f"plan '{plan.name}': {estimate.summary()}")
    print(f"  late or missed: {describe_rule(plan.interval_s)}")
    print(f"  {plan.count} time points every {plan.interval_s:g} s; about {estimate.bytes_per_time_point / 1e6:.1f} MB per time point")
    if plan.autofocus == "off" and profile.stage.home_on_connect:
        warnings = [*warnings, (
            f"autofocus is off and the stage homes when it connects: every frame is taken at the "
            f"homed focus position z = {profile.focus.z_min_um:g} um"
        )]
    for text in warnings:
        print(f"  warning: {text}")
    with _log_to_data_folder(args.data), run_lock(args.data):
        scope = build_scope(profile, sim_speed=args.sim_speed, data_dir=args.data)
        index, report = open_data_folder(args.data, now=scope.clock.now)
        try:
            _report_reconcile(report)
            unfinished = index.unfinished()
            if unfinished:
                tl = unfinished[-1]
                print(
                    f"phasewatch: {args.data} has an unfinished time-lapse {tl['id']} '{tl['name']}' ({tl['state']}); "
                    f"resume it ({resume_command(args.profile, args.data)}) or abort it "
                    f"(phasewatch timelapse abort {tl['id']} --data {args.data}) first",
                    file=sys.stderr,
                )
                return 2
            display = ProgressDisplay(quiet=args.quiet)
            async with scope:
                scheduler = Scheduler.create(
                    scope, plan, args.data, index, positions, reserve_mb=args.reserve_mb,
                    warnings=warnings, on_event=display,
                )
                return await _run_scheduler(scheduler, display, args.data, args.profile)
        finally:
            index.close()


async def run_resume(args: argparse.Namespace) -> int:
    from daemon.hardware import build_scope
    from daemon.profile import load_profile
    from daemon.timelapse.resume import open_data_folder, pick_unfinished, resume_scheduler, run_lock

    profile = load_profile(args.profile)
    with _log_to_data_folder(args.data), run_lock(args.data):
        scope = build_scope(profile, sim_speed=args.sim_speed, data_dir=args.data)
        index, report = open_data_folder(args.data, verify=args.verify, now=scope.clock.now)
        try:
            _report_reconcile(report)
            row = pick_unfinished(index, args.id)
            if row is None:
                print(f"no unfinished time-lapse in {args.data}")
                return 0
            display = ProgressDisplay(quiet=args.quiet)
            async with scope:
                scheduler = resume_scheduler(scope, args.data, index, row, on_event=display, unpause=True)
                return await _run_scheduler(scheduler, display, args.data, args.profile)
        finally:
            index.close()


def _open_existing(data_dir: Path, *, write: bool = False) -> Any:
    from daemon.timelapse.resume import open_for_reading

    index, note = open_for_reading(data_dir, write=write)
    if note:
        print(note, file=sys.stderr)
    return index


def summarise(index: Any, tl: dict[str, Any]) -> dict[str, Any]:
    points = index.time_points(tl["id"])
    statuses = {
        str(s): sum(p["status"] == s for p in points) for s in (*ENDED_TIME_POINT_STATES, TimePointState.RUNNING)
    }
    frames = index.frames(tl["id"])
    return {
        "id": tl["id"], "name": tl["name"], "state": tl["state"], "profile": tl["profile_name"],
        "count": tl["count"], "interval_s": tl["interval_s"], "positions": tl["n_positions"],
        "t0_utc": clock_text(tl["t0_s"]), "time_points": statuses, "frames": len(frames),
        "frames_not_ok": sum(f["status"] != FrameState.OK for f in frames), "stop_reason": tl["stop_reason"],
        "folder": tl["folder"],
    }


def run_list(args: argparse.Namespace) -> int:
    with _open_existing(args.data) as index:
        rows = [summarise(index, tl) for tl in index.timelapses()]
    if args.json:
        print_json(rows)
        return 0
    if not rows:
        print(f"no time-lapses in {args.data}")
        return 0
    print(f"{'id':>4}  {'state':<9} {'time points':<26} {'frames':>7}  {'t0 (UTC)':<19}  name")
    for r in rows:
        tp = r["time_points"]
        done = f"{tp[TimePointState.DONE] + tp[TimePointState.PARTIAL]}/{r['count']} run, {tp[TimePointState.MISSED]} missed"
        print(f"{r['id']:>4}  {r['state']:<9} {done:<26} {r['frames']:>7}  {r['t0_utc']:<19}  {r['name']}")
    return 0


def run_show(args: argparse.Namespace) -> int:
    with _open_existing(args.data) as index:
        tl = index.require_timelapse(args.id)
        report = {
            **summarise(index, tl),
            "time_point_list": index.time_points(args.id),
            "failed_positions": [p for p in index.positions(args.id) if p["status"] != PositionState.OK],
            "alerts": index.alerts(args.id),
        }
    if args.json:
        print_json(report)
        return 0
    print(f"time-lapse {tl['id']} '{tl['name']}': {tl['state']}" + (f" ({tl['stop_reason']})" if tl["stop_reason"] else ""))
    # Time points are numbered from 1 for people, as in the progress lines (tp + 1).
    points = report["time_point_list"]
    i = 0
    while i < len(points):
        p = points[i]
        if p["status"] == TimePointState.MISSED:
            j = i
            while j + 1 < len(points) and points[j + 1]["status"] == TimePointState.MISSED \
                    and points[j + 1]["reason"] == p["reason"] and points[j + 1]["tp"] == points[j]["tp"] + 1:
                j += 1
            span = f"{p['tp'] + 1:>4}" if j == i else f"{p['tp'] + 1} to {points[j]['tp'] + 1} ({j - i + 1})"
            print(f"  time point {span}: missed   planned {clock_text(p['planned_s'])} - {p['reason']}")
            i = j + 1
            continue
        late = "" if p["started_s"] is None else f" {p['started_s'] - p['planned_s']:+.1f} s"
        why = f" - {p['reason']}" if p["reason"] else ""
        print(f"  time point {p['tp'] + 1:>4}: {p['status']:<8} planned {clock_text(p['planned_s'])}{late}, {p['n_ok']} ok, {p['n_failed']} failed{why}")
        i += 1
    for p in report["failed_positions"]:
        print(f"  position {p['key']} at time point {p['tp'] + 1}: {p['status']} - {p['reason']}")
    for a in report["alerts"]:
        print(f"  alert {a['level']} {clock_text(a['t_s'])}: {a['message']}")
    return 0


def run_request(args: argparse.Namespace) -> int:
    from daemon.timelapse.resume import folder_busy

    with _open_existing(args.data, write=True) as index:
        tl = index.require_timelapse(args.id)
        if tl["state"] not in UNFINISHED_STATES:
            print(f"phasewatch: time-lapse {args.id} is {tl['state']}; nothing to {args.request}", file=sys.stderr)
            return 2
        if folder_busy(args.data):
            index.post_request(args.id, args.request)
            print(f"asked the running process to {args.request} time-lapse {args.id} (takes effect between positions)")
            return 0
        # Nobody is running it: apply directly.
        state = TimelapseState.PAUSED if args.request == Request.PAUSE else TimelapseState.ABORTED
        if state == TimelapseState.ABORTED:
            for p in index.time_points(args.id):
                if p["status"] == TimePointState.RUNNING:
                    # Left open by a crash; when it really ended is unknown, so its start stands in.
                    ok = sum(q["status"] == PositionState.OK for q in index.positions(args.id, p["tp"]))
                    index.finish_time_point(
                        args.id, p["tp"], status=TimePointState.PARTIAL if ok else TimePointState.FAILED,
                        finished_s=p["started_s"], reason="aborted while interrupted",
                    )
        index.set_state(args.id, state, reason=f"{state} by request", finished_s=None)
        print(f"time-lapse {args.id} {state}")
        return 0
