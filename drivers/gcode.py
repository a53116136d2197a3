"""G-code motion controllers on a serial port (pyserial), as a :class:`MotionController`.

The dialect is the RepRap-style one documented in :mod:`drivers.sim.controller` (the
simulated controller speaks it too): millimetres and mm/min on the wire, one line at a
time, each answered ``ok``, ``Error:<text>`` (refused) or ``!! <reason>`` (halted).

How the driver behaves
----------------------
* **Serial I/O off the event loop.** One reader thread per open port does the blocking
  reads and hands complete lines to the event loop through an ``asyncio.Queue``
  (``loop.call_soon_threadsafe``). A thread rather than ``run_in_executor`` per read,
  because the controller also speaks unasked (the ``start`` banner after a reset, a link
  that drops) and a dedicated reader sees that at once, with exactly one blocking read in
  flight and no executor worker tied up. Writes are short and go through
  ``asyncio.to_thread``.
* **One line at a time.** A command is written only when the previous one has been
  answered; a plain command must be answered within ``[stage] reply_timeout_s`` (real
  seconds: it is a property of the link), ``M400``/``G28`` within ``move_timeout_s`` on
  the scope's clock plus ``reply_timeout_s``.
* **Handshake.** After the port opens, ``M114`` is sent until the controller answers
  (boards that restart when the port opens swallow the first lines while booting; their
  ``start`` banner is noted and the probe repeated), then ``M115`` (firmware description,
  optional) and ``G90``.
* **Position known only after homing.** After connecting, after a reset (``start``
  banner), a lost link, an emergency stop, or a motion command whose reply went wrong,
  the position is unknown: :meth:`move_to` and :meth:`position` raise
  :class:`PositionUnknownError` until :meth:`home` or :meth:`set_position`. A board that
  lost power while nobody listened reports a position that means nothing, so the driver
  never trusts it (``[stage] home_on_connect`` homes at once).
* **Soft limits first.** Every target and every intermediate point is checked against the
  profile's limits (:mod:`drivers.limits`) before the first byte of a move is sent.
* **Backlash.** Every focus move ends with an approach from below: a lower target is
  reached via ``target - (backlash_um + margin)`` (clamped at ``z_min_um``), then up.
* **Waiting for motion.** A move is complete when ``M400`` is answered; then the stage or
  focus settles (``settle_ms`` on the scope's clock) and ``M114`` confirms the position.
  A move that does not complete in time is stopped with ``M112`` (a jammed stage must not
  keep pushing); the controller is then halted and :meth:`home` restarts it (``M999``).
* **Reconnect.** A lost link is reopened on the next command, with back-off (real time:
  USB devices take real seconds to come back).
"""

from __future__ import annotations

import asyncio
import dataclasses
import errno
import logging
import math
import os
import re
import threading
from pathlib import Path
from typing import TYPE_CHECKING

import serial

from drivers.base import MotionError, Position, PositionUnknownError
from drivers.limits import SoftLimits, plan_focus_approach

from drivers.clock import WallClock
from drivers.options import option
from drivers.registry import StageBuild, StageContext, StageDriver
from drivers.sections import driver_options
from drivers.truth import NoTruth

if TYPE_CHECKING:
    from drivers.clock import Clock
    from drivers.sections import FocusSection, IlluminationSection, StageSection

log = logging.getLogger(__name__)

_REPORT = re.compile(r"X:\s*(-?\d+(?:\.\d+)?)\s+Y:\s*(-?\d+(?:\.\d+)?)\s+Z:\s*(-?\d+(?:\.\d+)?)")
_MOTION_COMMANDS = ("G0", "G1", "G28", "G92", "M400")
# M114 reports three decimals of a millimetre; agreement within this counts as "there".
_REPORT_TOLERANCE_UM = 1.0
_PROBE_ATTEMPTS = 3
_BOOT_QUIET_S = 0.2


class _NoReply(MotionError):
    pass


class _Halted(MotionError):
    pass


@dataclasses.dataclass(frozen=True, slots=True)
class _LinkLost:
    reason: str


def _um_to_mm(value_um: float) -> str:
    return f"{value_um / 1000.0:.4f}"


def _where(p: Position) -> str:
    return f"x {p.x_um:.1f}, y {p.y_um:.1f}, z {p.z_um:.1f} um"


def _command_word(line: str) -> str:
    m = re.match(r"\s*([GMgm])0*(\d+)", line)
    return f"{m.group(1).upper()}{m.group(2)}" if m else ""


class _Reader(threading.Thread):
    """Blocking reads on the port; every complete line (bytes) goes to the event loop."""

    def __init__(self, port: serial.Serial, loop: asyncio.AbstractEventLoop, queue: asyncio.Queue[object]) -> None:
        super().__init__(name=f"gcode-reader {port.port}", daemon=True)
        self._port = port
        self._loop = loop
        self._queue = queue
        self._stopping = threading.Event()

    def run(self) -> None:
        buffer = b""
        while not self._stopping.is_set():
            try:
                data = self._port.read(self._port.in_waiting or 1)
            except (serial.SerialException, OSError, TypeError, AttributeError) as exc:
                if not self._stopping.is_set():
                    self._put(_LinkLost(str(exc) or type(exc).__name__))
                return
            if not data:
                continue
            buffer += data
            *lines, buffer = buffer.split(b"\n")
            for line in lines:
                self._put(line.rstrip(b"\r"))

    def _put(self, item: object) -> None:
        try:
            self._loop.call_soon_threadsafe(self._queue.put_nowait, item)
        except RuntimeError:  # the event loop has closed; nobody is listening any more
            self._stopping.set()

    def stop(self) -> None:
        self._stopping.set()
        try:
            self._port.cancel_read()
        except Exception:  # the port may already be gone; the thread ends either way
            pass
        self.join(timeout=2.0)


class GcodeController:
    """A G-code controller board on a serial port; see the module docstring."""

    def __init__(
        self,
        port: str,
        *,
        baud: int,
        stage: StageSection,
        focus: FocusSection,
        illumination: IlluminationSection,
        clock: Clock,
        profile_path: str | Path | None = None,
        boot_wait_s: float = 0.0,
        reconnect_attempts: int = 5,
        reconnect_first_delay_s: float = 0.2,
        reconnect_max_delay_s: float = 5.0,
    ) -> None:
        self._port_name = port
        self._baud = baud
        self._stage = stage
        self._focus = focus
        self._illumination = illumination
        self._clock = clock
        self._limits = SoftLimits.from_sections(stage, focus, source=profile_path)
        self._boot_wait_s = boot_wait_s
        self._reconnect_attempts = max(1, reconnect_attempts)
        self._reconnect_first_delay_s = reconnect_first_delay_s
        self._reconnect_max_delay_s = reconnect_max_delay_s

        self._serial: serial.Serial | None = None
        self._reader: _Reader | None = None
        self._lines: asyncio.Queue[object] | None = None
        self._lock = asyncio.Lock()
        self._link_up = False
        self._needs_resync = False
        self._absolute_sent = False
        self._halted: str | None = None
        self._position: Position | None = None
        self._unknown_reason = "the stage has not been homed since the driver connected"
        self._boot_lines: list[str] = []
        self._firmware = ""

    # ----------------------------------------------------------------- API

    async def connect(self) -> None:
        async with self._lock:
            await self._open_link()
            if self._stage.home_on_connect:
                await self._home_locked()

    async def close(self) -> None:
        async with self._lock:
            await asyncio.to_thread(self._close_link)

    async def reconnect(self) -> None:
        """Reopen the port, retrying with back-off; the position is unknown afterwards."""
        async with self._lock:
            await self._reconnect_locked()

    async def home(self) -> None:
        async with self._lock:
            await self._home_locked()

    async def set_position(self, x_um: float, y_um: float, z_um: float) -> Position:
        """Declare where the stage is (``G92``), e.g. after a reset with the stage untouched."""
        declared = Position(x_um, y_um, z_um)
        async with self._lock:
            await self._ensure_link()
            self._require_running()
            await self._send(f"G92 X{_um_to_mm(x_um)} Y{_um_to_mm(y_um)} Z{_um_to_mm(z_um)}")
            self._position = declared
            return declared

    async def move_to(
        self, x_um: float | None = None, y_um: float | None = None, z_um: float | None = None
    ) -> Position:
        async with self._lock:
            return await self._move_locked(x_um, y_um, z_um)

    async def move_by(self, dx_um: float = 0.0, dy_um: float = 0.0, dz_um: float = 0.0) -> Position:
        """Relative move, planned and limit-checked as the absolute move it amounts to."""
        async with self._lock:
            here = await self._known_position()
            return await self._move_locked(here.x_um + dx_um, here.y_um + dy_um, here.z_um + dz_um)

    async def position(self) -> Position:
        async with self._lock:
            here = await self._known_position()
            reported = await self._report()
            if self._distance_um(here, reported) > _REPORT_TOLERANCE_UM:
                log.warning("controller reports %s, expected %s; taking the report", reported, here)
                self._position = reported
            return self._position  # type: ignore[return-value]

    async def set_lamp(self, on: bool, level: float = 1.0) -> None:
        if self._illumination.control == "always_on":
            return
        if not 0.0 <= level <= 1.0:
            raise ValueError(f"lamp level must be 0..1, got {level}")
        channel = self._illumination.channel
        duty = round(level * 255)
        line = f"M106 P{channel} S{duty}" if on and duty > 0 else f"M107 P{channel}"
        async with self._lock:
            await self._ensure_link()
            self._require_running()
            await self._send(line)

    async def send_raw(self, line: str) -> list[str]:
        """Send one non-motion line (diagnostics) and return the lines answered before ``ok``.

        Motion commands are refused here: they must go through :meth:`move_to` or
        :meth:`home`, where the soft limits are checked.
        """
        if "\n" in line or "\r" in line:
            raise MotionError("send_raw takes a single line")
        if re.search(r"[Gg]\s*\d", line.split(";", 1)[0]):
            raise MotionError(
                f"send_raw refuses motion commands ('{line.strip()}'); use move_to or home so the soft limits are checked"
            )
        async with self._lock:
            await self._ensure_link()
            return await self._exchange(line.strip(), timeout_s=self._stage.reply_timeout_s, info=True)

    def describe(self) -> dict[str, object]:
        where = self._position
        return {
            "driver": "gcode",
            "port": self._port_name,
            "baud": self._baud,
            "connected": self._link_up,
            "firmware": self._firmware,
            "boot_banner": " / ".join(self._boot_lines),
            "position_um": None if where is None else {"x": where.x_um, "y": where.y_um, "z": where.z_um},
            "position_unknown_reason": None if where is not None else self._unknown_reason,
            "halted": self._halted,
            "soft_limits_um": {
                "x": [self._limits.x_min_um, self._limits.x_max_um],
                "y": [self._limits.y_min_um, self._limits.y_max_um],
                "z": [self._limits.z_min_um, self._limits.z_safe_max_um],
            },
        }

    # ------------------------------------------------------------ motion

    async def _move_locked(self, x_um: float | None, y_um: float | None, z_um: float | None) -> Position:
        here = await self._known_position()
        self._require_running()
        target = Position(
            here.x_um if x_um is None else float(x_um),
            here.y_um if y_um is None else float(y_um),
            here.z_um if z_um is None else float(z_um),
        )
        self._limits.check(target, what="target")
        z_stops = plan_focus_approach(
            here.z_um, target.z_um, backlash_um=self._focus.backlash_um, z_min_um=self._focus.z_min_um
        )
        waypoints = [
            (Position(target.x_um, target.y_um, z), "backlash approach point below the target")
            for z in z_stops[:-1]
        ] + [(target, "target")]
        self._limits.check_path(waypoints)
        if self._distance_um(here, target) == 0.0:
            return here
        try:
            await self._ensure_absolute()
            previous = here
            for point, _ in waypoints:
                await self._send(self._move_line(previous, point))
                previous = point
            await self._wait_for_motion()
            await self._settle(here, target)
            reported = await self._report()
        except BaseException as exc:
            if self._position is not None:
                self._forget_position(f"a move to {_where(target)} was interrupted ({type(exc).__name__})")
            if isinstance(exc, asyncio.CancelledError):
                self._needs_resync = True
            raise
        self._position = target
        if self._distance_um(reported, target) > _REPORT_TOLERANCE_UM:
            self._position = reported
            raise MotionError(
                f"controller reports {_where(reported)} after a move to {_where(target)}; it may clip moves to its own "
                "travel limits: set them wider than the profile's soft limits"
            )
        return target

    def _move_line(self, start: Position, end: Position) -> str:
        deltas = (end.x_um - start.x_um, end.y_um - start.y_um, end.z_um - start.z_um)
        length = math.hypot(*deltas)
        limits = (self._stage.xy_speed_um_s, self._stage.xy_speed_um_s, self._focus.z_speed_um_s)
        # The fastest path speed at which no axis exceeds its own speed.
        speed = min(v * length / abs(d) for d, v in zip(deltas, limits) if d != 0.0)
        words = [f"{axis}{_um_to_mm(value)}" for axis, value, d in zip("XYZ", (end.x_um, end.y_um, end.z_um), deltas) if d != 0.0]
        return f"G1 {' '.join(words)} F{speed * 60.0 / 1000.0:.1f}"

    async def _wait_for_motion(self) -> None:
        try:
            await self._exchange("M400", timeout_s=self._move_allowance_s())
        except _NoReply:
            await self._emergency_stop()
            raise MotionError(
                f"a move did not finish within move_timeout_s = {self._stage.move_timeout_s:g} s; stopped it "
                "with M112. The stage or focus may be jammed: check the mechanics, then home"
            ) from None

    async def _settle(self, start: Position, end: Position) -> None:
        settle_ms = 0.0
        if (start.x_um, start.y_um) != (end.x_um, end.y_um):
            settle_ms = self._stage.settle_ms
        if start.z_um != end.z_um:
            settle_ms = max(settle_ms, self._focus.settle_ms)
        await self._clock.sleep(settle_ms / 1000.0)

    async def _home_locked(self) -> None:
        await self._ensure_link()
        if self._halted is not None:
            await self._send("M999")
            self._halted = None
        try:
            await self._exchange("G28", timeout_s=self._move_allowance_s())
        except _NoReply:
            await self._emergency_stop()
            raise MotionError(
                f"homing did not finish within move_timeout_s = {self._stage.move_timeout_s:g} s; stopped it "
                "with M112. Check the home switches and the mechanics, then home again"
            ) from None
        await self._ensure_absolute()
        self._position = await self._report()
        await self._clock.sleep(max(self._stage.settle_ms, self._focus.settle_ms) / 1000.0)

    async def _emergency_stop(self) -> None:
        """Send ``M112`` and wait briefly for the halt; the controller is halted either way."""
        self._forget_position("the controller was stopped with M112 after a move timed out")
        self._halted = "stopped by the driver with M112 after a move timed out"
        self._needs_resync = True
        try:
            await self._write("M112")
            loop = asyncio.get_running_loop()
            deadline = loop.time() + self._stage.reply_timeout_s
            while (remaining := deadline - loop.time()) > 0:
                item = await asyncio.wait_for(self._queue().get(), remaining)
                if isinstance(item, _LinkLost):
                    self._link_down(item.reason)
                    return
                if item.decode("ascii", errors="replace").startswith("!!"):  # type: ignore[union-attr]
                    return
        except (TimeoutError, MotionError):
            log.warning("no halt confirmation after M112 on %s", self._port_name)

    def _move_allowance_s(self) -> float:
        return self._stage.move_timeout_s / self._clock.speed + self._stage.reply_timeout_s

    # ----------------------------------------------------------- position

    async def _known_position(self) -> Position:
        await self._ensure_link()
        if self._position is None:
            raise PositionUnknownError(
                f"the stage position is unknown: {self._unknown_reason}; home the stage "
                "(or declare its position with set_position) before moving"
            )
        return self._position

    async def _report(self) -> Position:
        lines = await self._exchange("M114", timeout_s=self._stage.reply_timeout_s, report=True)
        return self._parse_report(lines, "M114")

    def _parse_report(self, lines: list[str], command: str) -> Position:
        for line in lines:
            m = _REPORT.search(line)
            if m:
                x, y, z = (float(v) * 1000.0 for v in m.groups())
                return Position(x, y, z)
        self._needs_resync = True
        raise MotionError(
            f"controller answered '{command}' without a position report (got {lines!r}); "
            "it should answer like 'X:12.500 Y:3.000 Z:1.500'"
        )

    def _forget_position(self, reason: str) -> None:
        self._position = None
        self._unknown_reason = reason

    @staticmethod
    def _distance_um(a: Position, b: Position) -> float:
        return math.dist((a.x_um, a.y_um, a.z_um), (b.x_um, b.y_um, b.z_um))

    def _require_running(self) -> None:
        if self._halted is not None:
            raise MotionError(f"the controller is halted ({self._halted}); home the stage to restart it")

    # ------------------------------------------------------------- link

    def _queue(self) -> asyncio.Queue[object]:
        if self._lines is None or not self._link_up:
            raise MotionError(f"not connected to the controller on {self._port_name}; connect first")
        return self._lines

    def _open_serial(self) -> serial.Serial:
        port = self._port_name
        missing = (
            f"serial port {port} not found; is the controller plugged in? check `port` in [stage]"
        )
        if not os.path.exists(port):
            raise MotionError(missing)
        try:
            return serial.Serial(
                port, self._baud, timeout=0.1, write_timeout=self._stage.reply_timeout_s, exclusive=True
            )
        except serial.SerialException as exc:
            code = exc.errno
            if code in (errno.ENOENT, errno.ENODEV, errno.ENXIO):
                raise MotionError(missing) from None
            if code in (errno.EACCES, errno.EPERM):
                raise MotionError(
                    f"no permission to open serial port {port}; add the daemon's user to the group "
                    "owning it (often 'dialout') or fix its udev rule"
                ) from None
            text = str(exc)
            if code in (errno.EBUSY, errno.EAGAIN) or "lock" in text.lower():
                raise MotionError(f"serial port {port} is in use by another program; stop it and retry") from None
            if "configure" in text.lower() or code == errno.ENOTTY:
                raise MotionError(f"{port} is not a serial port; check `port` in [stage]") from None
            raise MotionError(f"cannot open serial port {port} ({text}); check `port` in [stage]") from None

    async def _open_link(self) -> None:
        self._close_link()
        port = await asyncio.to_thread(self._open_serial)
        loop = asyncio.get_running_loop()
        self._lines = asyncio.Queue()
        self._serial = port
        self._reader = _Reader(port, loop, self._lines)
        self._reader.start()
        self._link_up = True
        self._needs_resync = False
        self._absolute_sent = False
        self._halted = None
        self._boot_lines = []
        self._forget_position("the stage has not been homed since the driver connected")
        try:
            await self._await_boot(self._boot_wait_s)
            await self._probe()
            try:
                info = await self._exchange("M115", timeout_s=self._stage.reply_timeout_s, info=True)
                self._firmware = " / ".join(info)
            except (_Halted, PositionUnknownError):
                raise
            except MotionError:
                if not self._link_up:
                    raise
                # Not every board describes itself; a missing M115 is no reason to fail.
                self._firmware = "(the controller does not describe itself: no M115)"
            if self._needs_resync:
                await self._resync()
            if self._halted is None:
                await self._ensure_absolute()
        except BaseException:
            self._close_link()
            raise

    async def _probe(self) -> None:
        """Ask for the position until the controller answers (see the module docstring)."""
        for attempt in range(1, _PROBE_ATTEMPTS + 1):
            try:
                await self._exchange("M114", timeout_s=self._stage.reply_timeout_s, report=True, skip_stale_ok=True)
                return
            except PositionUnknownError:
                # It has just booted: let the boot chatter pass, then ask again.
                await self._await_boot(self._stage.reply_timeout_s, banner_seen=True)
            except _Halted:
                return  # it answers, halted: home() restarts it
            except _NoReply:
                if attempt == _PROBE_ATTEMPTS:
                    raise _NoReply(
                        f"no reply from the controller on {self._port_name} to M114 within "
                        f"{self._stage.reply_timeout_s:g} s (reply_timeout_s), {attempt} tries; is it powered, "
                        f"is this its port, and does baud = {self._baud} match it?"
                    ) from None
        raise MotionError(f"the controller on {self._port_name} keeps restarting; check its power supply")

    async def _await_boot(self, wait_s: float, *, banner_seen: bool = False) -> None:
        """Pass over boot chatter: up to ``wait_s``, ending early once quiet after a banner."""
        if wait_s <= 0:
            return
        loop = asyncio.get_running_loop()
        deadline = loop.time() + wait_s
        while (remaining := deadline - loop.time()) > 0:
            timeout = min(remaining, _BOOT_QUIET_S) if banner_seen else remaining
            try:
                item = await asyncio.wait_for(self._queue().get(), timeout)
            except TimeoutError:
                if banner_seen:
                    return
                continue
            self._note_unasked(item)
            if not self._link_up:
                raise MotionError(f"the serial link to {self._port_name} dropped while the controller booted")
            banner_seen = banner_seen or bool(self._boot_lines)

    def _close_link(self) -> None:
        if self._reader is not None:
            self._reader.stop()
            self._reader = None
        if self._serial is not None:
            try:
                self._serial.close()
            except Exception:  # closing a port whose device has vanished may fail; it is gone either way
                pass
            self._serial = None
        self._link_up = False

    def _link_down(self, reason: str) -> None:
        self._forget_position(
            f"the serial link to {self._port_name} was lost ({reason}); the controller may have restarted meanwhile"
        )
        self._close_link()

    async def _reconnect_locked(self) -> None:
        loop = asyncio.get_running_loop()
        started = loop.time()
        delay = self._reconnect_first_delay_s
        last: MotionError | None = None
        for attempt in range(1, self._reconnect_attempts + 1):
            try:
                await self._open_link()
                self._forget_position(
                    f"the serial link to {self._port_name} was reopened and the controller may have restarted meanwhile"
                )
                log.info("reconnected to %s after %d attempt(s)", self._port_name, attempt)
                return
            except MotionError as exc:
                last = exc
            if attempt < self._reconnect_attempts:
                await asyncio.sleep(delay)
                delay = min(delay * 2.0, self._reconnect_max_delay_s)
        raise MotionError(
            f"{last} (gave up reconnecting after {self._reconnect_attempts} tries over {loop.time() - started:.1f} s)"
        )

    async def _ensure_link(self) -> None:
        if self._link_up:
            self._drain()
        if not self._link_up:
            await self._reconnect_locked()
            self._drain()
        if self._needs_resync:
            await self._resync()

    def _drain(self) -> None:
        queue = self._lines
        while queue is not None and self._link_up and not queue.empty():
            self._note_unasked(queue.get_nowait())

    def _note_unasked(self, item: object) -> None:
        """A line nobody asked for: a reset banner, boot chatter, a late reply, a lost link."""
        if isinstance(item, _LinkLost):
            self._link_down(item.reason)
            return
        text = item.decode("ascii", errors="replace").strip()  # type: ignore[union-attr]
        if text == "start":
            self._mark_reset()
        elif text.startswith("echo:") and self._boot_lines and len(self._boot_lines) < 6:
            self._boot_lines.append(text)
        else:
            log.debug("unasked line from %s: %r", self._port_name, text)

    def _mark_reset(self) -> None:
        self._forget_position(
            f"the controller on {self._port_name} restarted (its 'start' banner arrived) and lost its position"
        )
        self._boot_lines = ["start"]
        self._absolute_sent = False
        self._halted = None
        self._needs_resync = False

    async def _resync(self) -> None:
        """After a reply went wrong: skip stale replies until an M114 report and its ok."""
        try:
            await self._exchange("M114", timeout_s=self._stage.reply_timeout_s, report=True, skip_stale_ok=True)
        except _Halted:
            pass
        self._needs_resync = False

    async def _ensure_absolute(self) -> None:
        if not self._absolute_sent:
            await self._send("G90")
            self._absolute_sent = True

    async def _send(self, line: str) -> None:
        timeout = self._move_allowance_s() if _command_word(line) in ("G28", "M400") else self._stage.reply_timeout_s
        await self._exchange(line, timeout_s=timeout)

    async def _write(self, line: str) -> None:
        port = self._serial
        if port is None or not self._link_up:
            raise MotionError(f"not connected to the controller on {self._port_name}")
        try:
            await asyncio.to_thread(port.write, f"{line}\n".encode("ascii"))
        except (serial.SerialException, OSError) as exc:
            self._link_down(str(exc))
            raise MotionError(
                f"lost the serial link to {self._port_name} while sending '{line}' ({exc}); the position is "
                "now unknown. Check the USB cable; the port is reopened on the next command"
            ) from None

    async def _exchange(
        self,
        line: str,
        *,
        timeout_s: float,
        report: bool = False,
        info: bool = False,
        skip_stale_ok: bool = False,
    ) -> list[str]:
        """Write one line and collect its answer up to ``ok``; every failure is a MotionError."""
        queue = self._queue()
        motion = _command_word(line) in _MOTION_COMMANDS
        await self._write(line)
        loop = asyncio.get_running_loop()
        deadline = loop.time() + timeout_s
        collected: list[str] = []
        while True:
            try:
                item = await asyncio.wait_for(queue.get(), max(0.0, deadline - loop.time()))
            except TimeoutError:
                self._needs_resync = True
                if motion:
                    self._forget_position(f"the reply to '{line}' never came, so where the stage went is not known")
                raise _NoReply(
                    f"no reply to '{line}' from the controller on {self._port_name} within {timeout_s:g} s; "
                    "check the cable and that the controller is powered (the driver re-synchronises on the next command)"
                ) from None
            if isinstance(item, _LinkLost):
                self._link_down(item.reason)
                raise MotionError(
                    f"lost the serial link to {self._port_name} while waiting for the reply to '{line}' "
                    f"({item.reason}); the position is now unknown. Check the USB cable; the port is reopened "
                    "on the next command"
                )
            raw: bytes = item  # type: ignore[assignment]
            try:
                text = raw.decode("ascii").strip()
                readable = text.isprintable()
            except UnicodeDecodeError:
                text, readable = "", False
            if not readable:
                self._needs_resync = True
                if motion:
                    self._forget_position(f"the reply to '{line}' was unreadable, so whether it ran is not known")
                raise MotionError(
                    f"controller on {self._port_name} sent an unreadable reply {raw!r} to '{line}'; check that "
                    f"baud = {self._baud} matches the controller's and that the cable is sound"
                )
            if not text:
                continue
            if text == "ok" or text.startswith("ok "):
                if skip_stale_ok and report and not collected:
                    continue  # a late 'ok' to an earlier line
                return collected
            if text.startswith("Error:"):
                raise MotionError(f"controller refused '{line}': {text[len('Error:'):].strip()}")
            if text.startswith("!!"):
                self._halted = text[2:].strip() or "halted"
                self._forget_position(f"the controller is halted ({self._halted})")
                raise _Halted(f"the controller is halted ({self._halted}); home the stage to restart it")
            if text == "start":
                self._mark_reset()
                raise PositionUnknownError(
                    f"the controller on {self._port_name} restarted while running '{line}' and lost its position; "
                    "home the stage (or declare its position with set_position)"
                )
            if text.startswith("echo:") or text.startswith("//"):
                log.info("controller %s: %s", self._port_name, text)
                continue
            if info or (report and _REPORT.search(text)):
                collected.append(text)
                continue
            self._needs_resync = True
            if motion:
                self._forget_position(f"the reply to '{line}' was not understood, so whether it ran is not known")
            raise MotionError(
                f"controller on {self._port_name} sent an unexpected reply {text!r} to '{line}'; check that it "
                f"speaks the G-code dialect described in drivers/gcode.py and that baud = {self._baud} is right"
            )


# --- the driver's [stage] options and its registration ----------------------------------
# Kept together at the end of the module: what a profile sets for this driver beyond the
# common [stage] options, and how the registry opens it.

BAUD_RATES = (9600, 19200, 38400, 57600, 115200, 250000, 500000, 1000000)


@dataclasses.dataclass(frozen=True, kw_only=True)
class GcodeOptions:
    port: str = option("", doc="serial port of the G-code controller, e.g. /dev/ttyUSB0")
    baud: int = option(115200, doc="serial speed", choices=BAUD_RATES)

    def __post_init__(self) -> None:
        if not self.port:
            raise ValueError("port: the gcode driver needs a serial port, e.g. /dev/ttyUSB0")


def open_stage(ctx: StageContext) -> StageBuild:
    """A controller board on a serial port, on the wall clock; nothing knows the truth."""
    profile = ctx.profile
    opts = driver_options(profile.stage, GcodeOptions)
    clock = WallClock()
    motion = GcodeController(
        opts.port,
        baud=opts.baud,
        stage=profile.stage,
        focus=profile.focus,
        illumination=profile.illumination,
        clock=clock,
    )
    return StageBuild(motion=motion, clock=clock, truth=NoTruth(), stop=lambda: None)


DRIVER = StageDriver(
    name="gcode",
    summary="G-code controller board (RepRap-style dialect) on a USB or UART serial port",
    options=GcodeOptions,
    open=open_stage,
)
