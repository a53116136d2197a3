"""G-code motion controllers on a serial port (pyserial), as a :class:`MotionController`.

The board speaks a dialect (the RepRap family's, :mod:`drivers.gcode.dialect`, or grbl's,
:mod:`drivers.gcode.grbl`), named in the profile or found at connect; the line protocol
and the serial link are :mod:`drivers.gcode.protocol` and :mod:`drivers.gcode.link`. The
motion rules below are the same in every dialect:

* **Position known only after homing.** After connecting, after a reset (the banner), a
  lost link, an emergency stop, or a motion command whose reply went wrong, the position
  is unknown: :meth:`GcodeController.move_to` and :meth:`GcodeController.position` raise
  :class:`PositionUnknownError` until :meth:`GcodeController.home` or
  :meth:`GcodeController.set_position`. A board that lost power while nobody listened
  reports a position that means nothing, so the driver never trusts it
  (``[stage] home_on_connect`` homes at once).
* **Soft limits first.** Every target and every intermediate point is checked against the
  profile's limits (:mod:`drivers.limits`) before the first byte of a move is sent, in
  every dialect.
* **Backlash.** Every focus move ends with an approach from below: a lower target is
  reached via ``target - (backlash_um + margin)`` (clamped at ``z_min_um``), then up.
  x and y do the same once ``[stage] backlash_x_um`` / ``backlash_y_um`` are set (0, the
  default, moves straight there). ``backlash_approach=False`` moves straight to the
  target on every axis, for measuring the play itself (``phasewatch commission``).
* **Waiting for motion.** A move is complete when the dialect's finish command is
  answered; then the stage or focus settles (``settle_ms`` on the scope's clock) and the
  position report confirms where it went. A move that does not complete within
  ``[stage] move_timeout_s`` (on the scope's clock) is stopped with the dialect's halt
  sequence (a jammed stage must not keep pushing); the controller is then halted and
  :meth:`GcodeController.home` restarts it. An alarm (grbl) is handled the same way: the
  position is lost, and homing resets the board and homes it.
"""

from __future__ import annotations

import asyncio
import logging
import math
from pathlib import Path
from typing import TYPE_CHECKING

from drivers.base import MotionError, Position, PositionUnknownError
from drivers.gcode.dialect import Dialect, path_limit
from drivers.gcode.link import Backoff
from drivers.gcode.protocol import LineProtocol, NoReply
from drivers.limits import SoftLimits, plan_approach, plan_focus_approach

if TYPE_CHECKING:
    from drivers.clock import Clock
    from drivers.gcode.settings import FocusSettings, LampSettings, StageSettings

log = logging.getLogger(__name__)

# Position reports carry three decimals of a millimetre; agreement within this counts as "there".
_REPORT_TOLERANCE_UM = 1.0


def _where(p: Position) -> str:
    return f"x {p.x_um:.1f}, y {p.y_um:.1f}, z {p.z_um:.1f} um"


def _distance_um(a: Position, b: Position) -> float:
    return math.dist((a.x_um, a.y_um, a.z_um), (b.x_um, b.y_um, b.z_um))


class GcodeController:
    """A G-code controller board on a serial port; see the module docstring."""

    def __init__(
        self,
        port: str,
        *,
        baud: int,
        stage: StageSettings,
        focus: FocusSettings,
        illumination: LampSettings,
        clock: Clock,
        profile_path: str | Path | None = None,
        boot_wait_s: float = 0.0,
        reconnect_attempts: int = 5,
        reconnect_first_delay_s: float = 0.2,
        reconnect_max_delay_s: float = 5.0,
        dialect: Dialect | str = "auto",
        line_checksums: bool = True,
    ) -> None:
        self._stage = stage
        self._focus = focus
        self._illumination = illumination
        self._clock = clock
        self._limits = SoftLimits.from_sections(stage, focus, source=profile_path)  # type: ignore[arg-type]
        self._position: Position | None = None
        self._unknown_reason = "the stage has not been homed since the driver connected"
        self._lock = asyncio.Lock()
        self._line = LineProtocol(
            port,
            baud,
            dialect=dialect,
            reply_timeout_s=stage.reply_timeout_s,
            move_allowance_s=self._move_allowance_s,
            forget=self._forget_position,
            boot_wait_s=boot_wait_s,
            backoff=Backoff(reconnect_attempts, reconnect_first_delay_s, reconnect_max_delay_s),
            line_checksums=line_checksums,
        )

    @property
    def _dialect(self) -> Dialect:
        # The protocol's: with dialect "auto" it is only known once connected.
        return self._line.dialect

    # ----------------------------------------------------------------- API

    async def connect(self) -> None:
        async with self._lock:
            await self._line.open()
            if self._stage.home_on_connect:
                await self._home_locked()

    async def close(self) -> None:
        async with self._lock:
            await asyncio.to_thread(self._line.close)

    async def reconnect(self) -> None:
        """Reopen the port, retrying with back-off; the position is unknown afterwards."""
        async with self._lock:
            await self._line.reconnect()

    async def home(self) -> None:
        async with self._lock:
            await self._home_locked()

    async def set_position(self, x_um: float, y_um: float, z_um: float) -> Position:
        """Declare where the stage is, e.g. after a reset with the stage untouched."""
        declared = Position(x_um, y_um, z_um)
        async with self._lock:
            await self._line.ensure()
            self._line.require_running()
            await self._line.send(self._dialect.set_position(x_um, y_um, z_um))
            self._position = declared
            return declared

    async def move_to(
        self,
        x_um: float | None = None,
        y_um: float | None = None,
        z_um: float | None = None,
        *,
        backlash_approach: bool = True,
    ) -> Position:
        async with self._lock:
            return await self._move_locked(x_um, y_um, z_um, backlash_approach=backlash_approach)

    async def move_by(self, dx_um: float = 0.0, dy_um: float = 0.0, dz_um: float = 0.0) -> Position:
        """Relative move, planned and limit-checked as the absolute move it amounts to."""
        async with self._lock:
            here = await self._known_position()
            return await self._move_locked(here.x_um + dx_um, here.y_um + dy_um, here.z_um + dz_um)

    async def position(self) -> Position:
        async with self._lock:
            here = await self._known_position()
            reported = await self._line.report()
            if _distance_um(here, reported) > _REPORT_TOLERANCE_UM:
                log.warning("controller reports %s, expected %s; taking the report", reported, here)
                self._position = reported
            return self._position  # type: ignore[return-value]

    async def set_lamp(self, on: bool, level: float = 1.0) -> None:
        if self._illumination.control == "always_on":
            return
        if not 0.0 <= level <= 1.0:
            raise ValueError(f"lamp level must be 0..1, got {level}")
        try:
            line = self._dialect.lamp(self._illumination.channel, level if on else 0.0)
        except ValueError as exc:
            raise MotionError(str(exc)) from None
        async with self._lock:
            await self._line.ensure()
            self._line.require_running()
            await self._line.send(line)

    async def send_raw(self, line: str) -> list[str]:
        """Send one non-motion line (diagnostics) and return the lines answered before ``ok``.

        Motion commands are refused here: they must go through :meth:`move_to` or
        :meth:`home`, where the soft limits are checked.
        """
        if "\n" in line or "\r" in line:
            raise MotionError("send_raw takes a single line")
        if self._dialect.could_move(line):
            raise MotionError(
                f"send_raw refuses motion commands ('{line.strip()}'); use move_to or home so the soft limits are checked"
            )
        async with self._lock:
            await self._line.ensure()
            return await self._line.exchange(line.strip(), timeout_s=self._stage.reply_timeout_s, info=True)

    def describe(self) -> dict[str, object]:
        where = self._position
        link = self._line.link
        return {
            "driver": "gcode",
            "port": link.port,
            "baud": link.baud,
            "connected": link.up,
            "dialect": self._dialect.key,
            "dialect_name": self._dialect.name,
            "dialect_found": self._line.dialect_found,
            "line_checksums": self._line.numbered,
            "resends": self._line.resends,
            "firmware": self._line.firmware,
            "boot_banner": " / ".join(self._line.boot_lines),
            "position_um": None if where is None else {"x": where.x_um, "y": where.y_um, "z": where.z_um},
            "position_unknown_reason": None if where is not None else self._unknown_reason,
            "halted": self._line.halted,
            "soft_limits_um": {
                "x": [self._limits.x_min_um, self._limits.x_max_um],
                "y": [self._limits.y_min_um, self._limits.y_max_um],
                "z": [self._limits.z_min_um, self._limits.z_safe_max_um],
            },
        }

    # ------------------------------------------------------------ motion

    async def _move_locked(
        self, x_um: float | None, y_um: float | None, z_um: float | None, *, backlash_approach: bool = True
    ) -> Position:
        here = await self._known_position()
        self._line.require_running()
        target = Position(
            here.x_um if x_um is None else float(x_um),
            here.y_um if y_um is None else float(y_um),
            here.z_um if z_um is None else float(z_um),
        )
        self._limits.check(target, what="target")
        waypoints = self._approach(here, target) if backlash_approach else [(target, "target")]
        self._limits.check_path(waypoints)
        if _distance_um(here, target) == 0.0:
            return here
        try:
            await self._line.ensure_absolute()
            previous = here
            for point, _ in waypoints:
                await self._line.send(self._move_line(previous, point))
                previous = point
            await self._wait_for_motion()
            await self._settle(here, target)
            reported = await self._line.report()
        except BaseException as exc:
            if self._position is not None:
                self._forget_position(f"a move to {_where(target)} was interrupted ({type(exc).__name__})")
            if isinstance(exc, asyncio.CancelledError):
                self._line.needs_resync = True
            raise
        self._position = target
        if _distance_um(reported, target) > _REPORT_TOLERANCE_UM:
            self._position = reported
            raise MotionError(
                f"controller reports {_where(reported)} after a move to {_where(target)}; it may clip moves to its own "
                "travel limits: set them wider than the profile's soft limits"
            )
        return target

    def _approach(self, here: Position, target: Position) -> list[tuple[Position, str]]:
        """The target, preceded where needed by one point below it on every axis that must
        be approached from below (all three at once, so the play is taken up together)."""
        s, f = self._stage, self._focus

        def stage_axis(current: float, goal: float, backlash_um: float, lower_um: float) -> list[float]:
            if backlash_um <= 0.0:
                return [goal]
            return plan_approach(current, goal, backlash_um=backlash_um, lower_um=lower_um)

        stops = [
            stage_axis(here.x_um, target.x_um, s.backlash_x_um, s.x_min_um),
            stage_axis(here.y_um, target.y_um, s.backlash_y_um, s.y_min_um),
            plan_focus_approach(here.z_um, target.z_um, backlash_um=f.backlash_um, z_min_um=f.z_min_um),
        ]
        if all(len(axis) == 1 for axis in stops):
            return [(target, "target")]
        below = Position(*(axis[0] for axis in stops))
        return [(below, "backlash approach point below the target"), (target, "target")]

    def _move_line(self, start: Position, end: Position) -> str:
        ends = (end.x_um, end.y_um, end.z_um)
        deltas = tuple(b - a for a, b in zip((start.x_um, start.y_um, start.z_um), ends))
        speed_um_s = path_limit(deltas, (self._stage.xy_speed_um_s, self._stage.xy_speed_um_s, self._focus.z_speed_um_s))
        x, y, z = (value if d != 0.0 else None for value, d in zip(ends, deltas))
        return self._dialect.move(x_um=x, y_um=y, z_um=z, feed_um_s=speed_um_s)

    async def _wait_for_motion(self) -> None:
        try:
            await self._line.exchange(
                self._dialect.finish_command, timeout_s=self._move_allowance_s(), resend_damaged=True
            )
        except NoReply:
            await self._line.emergency_stop()
            raise MotionError(
                f"a move did not finish within move_timeout_s = {self._stage.move_timeout_s:g} s; stopped it "
                f"with {self._dialect.halt_name}. The stage or focus may be jammed: check the mechanics, then home"
            ) from None

    async def _settle(self, start: Position, end: Position) -> None:
        settle_ms = 0.0
        if (start.x_um, start.y_um) != (end.x_um, end.y_um):
            settle_ms = self._stage.settle_ms
        if start.z_um != end.z_um:
            settle_ms = max(settle_ms, self._focus.settle_ms)
        await self._clock.sleep(settle_ms / 1000.0)

    async def _home_locked(self) -> None:
        await self._line.ensure()
        await self._line.restart()
        try:
            await self._line.exchange(
                self._dialect.home_command, timeout_s=self._move_allowance_s(), resend_damaged=True
            )
        except NoReply:
            await self._line.emergency_stop()
            raise MotionError(
                f"homing did not finish within move_timeout_s = {self._stage.move_timeout_s:g} s; stopped it "
                f"with {self._dialect.halt_name}. Check the home switches and the mechanics, then home again"
            ) from None
        for line in self._dialect.after_home_commands:
            await self._line.send(line)
        await self._line.ensure_absolute()
        self._position = await self._line.report()
        await self._clock.sleep(max(self._stage.settle_ms, self._focus.settle_ms) / 1000.0)

    def _move_allowance_s(self) -> float:
        return self._stage.move_timeout_s / self._clock.speed + self._stage.reply_timeout_s

    # ----------------------------------------------------------- position

    async def _known_position(self) -> Position:
        await self._line.ensure()
        if self._position is None:
            raise PositionUnknownError(
                f"the stage position is unknown: {self._unknown_reason}; home the stage "
                "(or declare its position with set_position) before moving"
            )
        return self._position

    def _forget_position(self, reason: str) -> None:
        self._position = None
        self._unknown_reason = reason
