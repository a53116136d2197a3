"""A simulated G-code motion controller, served on a pseudo-terminal.

The real serial driver (:mod:`drivers.gcode`) talks to this emulator through pyserial
exactly as it talks to a controller board on a USB serial port, so the simulated scope
exercises the real driver, its timeouts and its recovery paths. It speaks the
RepRap-style dialect of :mod:`drivers.gcode.dialect` (commands, replies, report format
and the planner's kinematics are described there); below is what is particular to this
board.

The board
---------
The planner queues up to 16 moves (:data:`PLANNER_DEPTH`); a move arriving when it is
full is acknowledged once a move has finished. ``G28`` homes Z first, down to its switch,
then X and Y; the home switches sit at the profile's lower limits (``x_min_um``,
``y_min_um``, ``z_min_um``). There are 8 PWM outputs (``M106``/``M107 P0``-``P7``).
``M115`` answers :data:`FIRMWARE_LINE`; the banner is followed by one ``echo:`` line
(:data:`INFO_LINE`). ``M112`` is acted on as the line arrives, even while an ``M400``
or ``G28`` waits.

Mechanics
---------
Moves follow the dialect's trapezoidal speed profile along the straight line, limited
per axis by the profile's speeds and accelerations (``[stage]`` for X and Y, ``[focus]``
for Z). All timing is read from the given clock, so an accelerated clock speeds moves
up. The mechanics are not quite where the motors are (:mod:`drivers.sim.mechanics`):
every axis has play (``[sim.motion] x_backlash_um``, ``y_backlash_um``,
``z_backlash_um``), so after a move downwards an axis sits higher than its motor by the
backlash and after a move upwards the two agree; x and y moves stop with a little
scatter and ring for a while after they end. The
mechanical travel is wider than the profile's soft limits by ``travel_margin_um``; on z
the objective hits the vessel ``z_crash_margin_um`` above ``z_safe_max_um``. A move
whose end lies outside the travel is refused with an ``Error:`` line and no motion.

Faults (:meth:`GcodeEmulator.inject`)
-------------------------------------
``reset``       reboot: motion stops where it is, queued lines are lost, the firmware's
                coordinates restart at 0 (the mechanics do not move), ``start`` is printed
``disconnect``  the cable is pulled: the pseudo-terminal closes and the link path
                disappears; motion already queued runs on. :meth:`reconnect` plugs it
                back in: a new pseudo-terminal behind the same link path
``garble``      the first line of the next reply arrives as noise (high-bit bytes)
``drop_reply``  the next reply is never sent
``stall``       the next move jams half-way: it never finishes and ``M400`` never
                answers until :meth:`clear_faults`, ``M112`` or a reset
:meth:`start` returns a stable link path (a symbolic link to the current pseudo-terminal)
for pyserial, the way a udev rule gives a board a stable name.
"""

from __future__ import annotations

import collections
import dataclasses
import logging
import math
import os
import select
import shutil
import tempfile
import threading
import time
import tty
from pathlib import Path
from typing import TYPE_CHECKING, Callable

from drivers.base import Position
from drivers.gcode.dialect import (
    REPRAP,
    CommandSyntaxError,
    feed_to_um_s,
    format_mm,
    mm_to_um,
    path_limit,
    trapezoid_duration_s,
    trapezoid_travel_um,
)
from drivers.sim.mechanics import StageMechanics

if TYPE_CHECKING:
    from drivers.clock import Clock
    from drivers.gcode.settings import FocusSettings, StageSettings
    from drivers.sim.config import SimMotion

log = logging.getLogger(__name__)

PWM_OUTPUTS = 8
PLANNER_DEPTH = 16
BANNER = REPRAP.banner
INFO_LINE = REPRAP.info_reply("phasewatch simulated motion controller 1.0; axes X Y Z; PWM outputs 0-7")
FIRMWARE_LINE = "firmware: phasewatch-sim motion 1.0; axes X Y Z; PWM outputs 0-7; planner 16 moves"
FAULTS = ("reset", "disconnect", "garble", "drop_reply", "stall")

# Real seconds between looks at the clock while a move runs: small against the
# link's millisecond latency, large enough not to spin a CPU core.
_POLL_S = 0.002
_STALL_FRACTION = 0.5
_AXES = ("X", "Y", "Z")

Vec = tuple[float, float, float]


class _Refused(Exception):
    """A command the controller answers with ``Error:<text>``."""


@dataclasses.dataclass(slots=True)
class _Segment:
    start: Vec
    end: Vec
    speed_um_s: float
    accel_um_s2: float
    t0_s: float
    stalled: bool = False

    @property
    def length_um(self) -> float:
        return math.dist(self.start, self.end)

    @property
    def duration_s(self) -> float:
        return trapezoid_duration_s(self.length_um, self.speed_um_s, self.accel_um_s2)

    @property
    def end_s(self) -> float:
        return math.inf if self.stalled else self.t0_s + self.duration_s

    def at(self, t_s: float) -> Vec:
        elapsed = t_s - self.t0_s
        if self.stalled:
            elapsed = min(elapsed, _STALL_FRACTION * self.duration_s)
        length = self.length_um
        if length == 0.0:
            return self.end
        f = trapezoid_travel_um(elapsed, length, self.speed_um_s, self.accel_um_s2) / length
        return tuple(a + f * (b - a) for a, b in zip(self.start, self.end))  # type: ignore[return-value]


class GcodeEmulator:
    """The simulated controller; see the module docstring for the dialect and faults."""

    def __init__(
        self,
        *,
        clock: Clock,
        stage: StageSettings,
        focus: FocusSettings,
        motion: SimMotion,
        start: Position | None = None,
        link_dir: str | Path | None = None,
        seed: int = 0,
    ) -> None:
        self._clock = clock
        self._stage = stage
        self._focus = focus
        self._motion = motion
        self._home: Vec = (stage.x_min_um, stage.y_min_um, focus.z_min_um)
        m = motion.travel_margin_um
        self._travel_lo: Vec = (stage.x_min_um - m, stage.y_min_um - m, focus.z_min_um - m)
        self._travel_hi: Vec = (stage.x_max_um + m, stage.y_max_um + m, focus.z_safe_max_um + motion.z_crash_margin_um)
        self._speed_max: Vec = (stage.xy_speed_um_s, stage.xy_speed_um_s, focus.z_speed_um_s)
        self._accel_max: Vec = (stage.xy_accel_um_s2, stage.xy_accel_um_s2, focus.z_accel_um_s2)
        first = start if start is not None else Position(*self._home)
        for axis, value, lo, hi in zip(_AXES, (first.x_um, first.y_um, first.z_um), self._travel_lo, self._travel_hi):
            if not lo <= value <= hi:
                raise ValueError(f"start {axis.lower()} = {value} um lies outside the mechanical travel {lo}..{hi} um")

        self._lock = threading.RLock()
        self._motor: Vec = (first.x_um, first.y_um, first.z_um)
        self._mechanics = StageMechanics(motion, self._motor, seed=seed)
        self._queue: list[_Segment] = []
        # The board has been homed before: its coordinates are the stage coordinates.
        self._offset: Vec = (0.0, 0.0, 0.0)
        self._absolute = True
        self._feed_um_s = stage.xy_speed_um_s
        self._pwm = [0.0] * PWM_OUTPUTS
        self._halted: str | None = None
        self._epoch = 0
        self._garble_next = False
        self._drop_next = False
        self._stall_next = False

        self.received: list[tuple[float, str]] = []
        self._pending: collections.deque[str] = collections.deque()
        self._inbuf = b""
        self._master_fd: int | None = None
        self._slave_fd: int | None = None
        self._device_path: str | None = None
        self._own_link_dir = link_dir is None
        self._link_dir = Path(link_dir) if link_dir is not None else None
        self._link_path: Path | None = None
        self._thread: threading.Thread | None = None
        self._stopping = threading.Event()
        self._disconnect_asked = threading.Event()
        self._disconnect_done = threading.Event()

    # ----------------------------------------------------------------- public

    def start(self) -> str:
        """Open the pseudo-terminal, boot (print the banner), serve; return the link path."""
        if self._thread is not None:
            raise RuntimeError("the emulator is already running")
        if self._link_dir is None:
            self._link_dir = Path(tempfile.mkdtemp(prefix="phasewatch-sim-"))
        self._link_dir.mkdir(parents=True, exist_ok=True)
        self._link_path = self._link_dir / "ttySIM0"
        with self._lock:
            self._open_pty()
            self._write_lines([BANNER, INFO_LINE])
        self._stopping.clear()
        self._thread = threading.Thread(target=self._serve, name="gcode-emulator", daemon=True)
        self._thread.start()
        return str(self._link_path)

    def stop(self) -> None:
        self._stopping.set()
        with self._lock:
            self._epoch += 1
        if self._thread is not None:
            self._thread.join(timeout=5.0)
            self._thread = None
        with self._lock:
            self._close_pty()
        if self._own_link_dir and self._link_dir is not None:
            shutil.rmtree(self._link_dir, ignore_errors=True)
            self._link_dir = None

    @property
    def link_path(self) -> str:
        if self._link_path is None:
            raise RuntimeError("the emulator has not been started")
        return str(self._link_path)

    @property
    def device_path(self) -> str | None:
        """The pseudo-terminal behind the link now (None while disconnected)."""
        return self._device_path

    def reconnect(self) -> str:
        """Plug the cable back in after ``disconnect``: a new pseudo-terminal, same link path."""
        with self._lock:
            self._close_pty()
            self._inbuf = b""
            self._pending.clear()
            self._open_pty()
        return self.link_path

    def physical_position(self) -> Position:
        """Where the mechanics truly are now (what the simulated camera images)."""
        with self._lock:
            now = self._clock.now()
            self._advance(now)
            return Position(*self._mechanics.at(self._motor_at(now), now))

    @property
    def mechanics(self) -> StageMechanics:
        """The simulated mechanics (play, stopping scatter, ringing): ground truth for tests."""
        return self._mechanics

    def lamp_level(self, channel: int = 0) -> float:
        """Level 0..1 of PWM output ``channel``."""
        with self._lock:
            return self._pwm[channel]

    def inject(self, fault: str) -> None:
        """Inject one of :data:`FAULTS`; see the module docstring for what each does."""
        if fault not in FAULTS:
            raise ValueError(f"unknown fault {fault!r}; one of {', '.join(FAULTS)}")
        if fault == "reset":
            with self._lock:
                self._reboot()
        elif fault == "disconnect":
            if self._thread is None or not self._thread.is_alive():
                with self._lock:
                    self._close_pty()
                return
            self._disconnect_done.clear()
            self._disconnect_asked.set()
            if not self._disconnect_done.wait(timeout=5.0):
                raise RuntimeError("the emulator did not close its pseudo-terminal")
        else:
            with self._lock:
                if fault == "garble":
                    self._garble_next = True
                elif fault == "drop_reply":
                    self._drop_next = True
                else:
                    self._stall_next = True

    def clear_faults(self) -> None:
        """Clear pending reply faults and free a jammed move (it then runs to its end)."""
        with self._lock:
            now = self._clock.now()
            self._garble_next = self._drop_next = self._stall_next = False
            self._advance(now)
            if self._queue and self._queue[0].stalled:
                seg = self._queue[0]
                frozen = seg.at(now)
                self._mechanics.stop(frozen)
                self._queue[0] = dataclasses.replace(seg, start=frozen, t0_s=now, stalled=False)
                self._retime(now)

    # --------------------------------------------------------------- the pty

    def _open_pty(self) -> None:
        master, slave = os.openpty()
        # Raw: no echo and no line editing, so bytes pass unchanged as on a UART.
        tty.setraw(slave)
        os.set_blocking(master, False)
        self._master_fd, self._slave_fd = master, slave
        self._device_path = os.ttyname(slave)
        assert self._link_path is not None
        tmp = self._link_path.with_name(self._link_path.name + ".new")
        tmp.unlink(missing_ok=True)
        tmp.symlink_to(self._device_path)
        os.replace(tmp, self._link_path)

    def _close_pty(self) -> None:
        for fd in (self._master_fd, self._slave_fd):
            if fd is not None:
                try:
                    os.close(fd)
                except OSError:
                    pass
        self._master_fd = self._slave_fd = None
        self._device_path = None
        if self._link_path is not None:
            self._link_path.unlink(missing_ok=True)

    def _write_lines(self, lines: list[str]) -> None:
        """Send lines as they are (banner); a full or closed link drops them, like a UART."""
        if self._master_fd is None:
            return
        data = "".join(f"{line}\n" for line in lines).encode("ascii")
        try:
            os.write(self._master_fd, data)
        except OSError:
            log.debug("emulator output dropped: %r", data)

    def _reply(self, *lines: str) -> None:
        """Send the reply to one command, through the injected reply faults."""
        if self._drop_next:
            self._drop_next = False
            return
        if self._garble_next and lines:
            self._garble_next = False
            noise = bytes((b ^ 0x5A) | 0x80 for b in lines[0].encode("ascii"))
            if self._master_fd is not None:
                try:
                    os.write(self._master_fd, noise + b"\n")
                except OSError:
                    pass
            lines = lines[1:]
        self._write_lines(list(lines))

    # ------------------------------------------------------------ serving

    def _serve(self) -> None:
        try:
            while not self._stopping.is_set():
                with self._lock:
                    line = self._pending.popleft() if self._pending else None
                if line is not None:
                    self._execute(line)
                else:
                    self._read_input(0.02)
        except Exception:  # a bug here must not die silently behind a pty that stays open
            log.exception("the G-code emulator stopped serving")
            raise

    def _read_input(self, timeout_s: float) -> None:
        """Read what has arrived; act on ``M112`` at once, queue the other lines."""
        if self._disconnect_asked.is_set():
            with self._lock:
                self._close_pty()
                self._inbuf = b""
                self._pending.clear()
            self._disconnect_asked.clear()
            self._disconnect_done.set()
        fd = self._master_fd
        if fd is None:
            time.sleep(timeout_s)
            return
        try:
            ready, _, _ = select.select([fd], [], [], timeout_s)
            if not ready:
                return
            data = os.read(fd, 4096)
        except (OSError, ValueError):
            # No client has the port open, or the fd was closed under us by a disconnect.
            time.sleep(timeout_s)
            return
        with self._lock:
            if fd != self._master_fd:
                return
            self._inbuf += data
            *complete, self._inbuf = self._inbuf.split(b"\n")
            for raw in complete:
                text = raw.decode("ascii", errors="replace").strip()
                if not text:
                    continue
                self.received.append((self._clock.now(), text))
                if REPRAP.is_emergency_stop(text):
                    self._emergency_stop()
                else:
                    self._pending.append(text)

    def _execute(self, text: str) -> None:
        with self._lock:
            epoch = self._epoch
            if self._halted is not None:
                if text.upper().startswith(REPRAP.restart_command):
                    self._halted = None
                    self._reply(REPRAP.ok)
                else:
                    self._reply(REPRAP.halt_reply(self._halted))
                return
        try:
            parsed = REPRAP.parse_command(text)
        except CommandSyntaxError as exc:
            with self._lock:
                self._reply(REPRAP.error_reply(str(exc)))
            return
        if parsed is None:
            return
        handler = self._handlers().get(parsed.word)
        try:
            if handler is None:
                raise _Refused(f"unknown command '{parsed.word}'")
            handler(parsed.params, epoch)
        except _Refused as exc:
            with self._lock:
                if self._epoch == epoch:
                    self._reply(REPRAP.error_reply(str(exc)))

    def _handlers(self) -> dict[str, Callable[[dict[str, float | None], int], None]]:
        return {
            "G0": self._cmd_move,
            "G1": self._cmd_move,
            "G28": self._cmd_home,
            "G90": self._cmd_absolute,
            "G91": self._cmd_relative,
            "G92": self._cmd_set_position,
            "M106": self._cmd_pwm_on,
            "M107": self._cmd_pwm_off,
            "M114": self._cmd_report,
            "M115": self._cmd_firmware,
            "M400": self._cmd_finish,
            "M999": self._cmd_restart,
        }

    # ----------------------------------------------------------- commands

    @staticmethod
    def _only(params: dict[str, float | None], allowed: str, command: str) -> None:
        for key in params:
            if key not in allowed:
                raise _Refused(f"{command} does not take '{key}'")

    def _cmd_move(self, params: dict[str, float | None], epoch: int) -> None:
        self._only(params, "XYZF", "G1")
        for key, value in params.items():
            if value is None or not math.isfinite(value):
                raise _Refused(f"'{key}' needs a number")
        feed = params.get("F")
        if feed is not None and feed <= 0:
            raise _Refused("F must be greater than 0 mm/min")
        if not self._wait_for(lambda: len(self._queue) < PLANNER_DEPTH, epoch):
            return
        with self._lock:
            if self._epoch != epoch:
                return
            if feed is not None:
                self._feed_um_s = feed_to_um_s(feed)
            begin = self._queue_end()
            logical = [m - o for m, o in zip(begin, self._offset)]
            for i, axis in enumerate(_AXES):
                value = params.get(axis)
                if value is not None:
                    logical[i] = mm_to_um(value) if self._absolute else logical[i] + mm_to_um(value)
            target = tuple(v + o for v, o in zip(logical, self._offset))
            for axis, value, lo, hi, log_um in zip(_AXES, target, self._travel_lo, self._travel_hi, logical):
                if not lo - 1e-6 <= value <= hi + 1e-6:
                    raise _Refused(f"{axis}{format_mm(log_um)} lies outside the travel of the mechanics; not moved")
            self._queue_move(begin, target, self._feed_um_s)  # type: ignore[arg-type]
            self._reply(REPRAP.ok)

    def _cmd_home(self, params: dict[str, float | None], epoch: int) -> None:
        self._only(params, "XYZ", "G28")
        axes = [axis in params for axis in _AXES] if params else [True, True, True]
        if not self._wait_for(lambda: not self._queue, epoch):
            return
        with self._lock:
            if self._epoch != epoch:
                return
            now = self._clock.now()
            here = self._motor
            if axes[2]:
                down = (here[0], here[1], self._home[2])
                self._queue_move(here, down, math.inf, now=now)
                here = down
            if axes[0] or axes[1]:
                across = (self._home[0] if axes[0] else here[0], self._home[1] if axes[1] else here[1], here[2])
                self._queue_move(here, across, math.inf, now=now)
        if not self._wait_for(lambda: not self._queue, epoch):
            return
        with self._lock:
            if self._epoch != epoch:
                return
            # The switches are found on the way down, then the axes back off upwards: the
            # play is taken up from below, so mechanics and motors agree at home.
            self._mechanics.take_up(self._motor, tuple(axes))  # type: ignore[arg-type]
            self._offset = tuple(0.0 if homed else o for homed, o in zip(axes, self._offset))  # type: ignore[assignment]
            self._reply(REPRAP.ok)

    def _cmd_absolute(self, params: dict[str, float | None], epoch: int) -> None:
        with self._lock:
            self._absolute = True
            self._reply(REPRAP.ok)

    def _cmd_relative(self, params: dict[str, float | None], epoch: int) -> None:
        with self._lock:
            self._absolute = False
            self._reply(REPRAP.ok)

    def _cmd_set_position(self, params: dict[str, float | None], epoch: int) -> None:
        self._only(params, "XYZ", "G92")
        if not params or any(v is None for v in params.values()):
            raise _Refused("G92 needs at least one axis with a value, e.g. G92 X0 Y0 Z1.5")
        if not self._wait_for(lambda: not self._queue, epoch):
            return
        with self._lock:
            if self._epoch != epoch:
                return
            offset = list(self._offset)
            for i, axis in enumerate(_AXES):
                value = params.get(axis)
                if value is not None:
                    offset[i] = self._motor[i] - mm_to_um(value)
            self._offset = tuple(offset)  # type: ignore[assignment]
            self._reply(REPRAP.ok)

    def _pwm_channel(self, params: dict[str, float | None], command: str) -> int:
        p = params.get("P", 0.0)
        if p is None or p != int(p) or not 0 <= p < PWM_OUTPUTS:
            raise _Refused(f"{command} P must be a PWM output 0-{PWM_OUTPUTS - 1}")
        return int(p)

    def _cmd_pwm_on(self, params: dict[str, float | None], epoch: int) -> None:
        self._only(params, "PS", "M106")
        channel = self._pwm_channel(params, "M106")
        s = params.get("S", 255.0)
        if s is None or not 0.0 <= s <= 255.0:
            raise _Refused("M106 S must be 0-255")
        with self._lock:
            self._pwm[channel] = s / 255.0
            self._reply(REPRAP.ok)

    def _cmd_pwm_off(self, params: dict[str, float | None], epoch: int) -> None:
        self._only(params, "P", "M107")
        channel = self._pwm_channel(params, "M107")
        with self._lock:
            self._pwm[channel] = 0.0
            self._reply(REPRAP.ok)

    def _cmd_report(self, params: dict[str, float | None], epoch: int) -> None:
        with self._lock:
            end = self._queue_end()
            x, y, z = (m - o for m, o in zip(end, self._offset))
            self._reply(REPRAP.report_line(x, y, z), REPRAP.ok)

    def _cmd_firmware(self, params: dict[str, float | None], epoch: int) -> None:
        with self._lock:
            self._reply(FIRMWARE_LINE, REPRAP.ok)

    def _cmd_finish(self, params: dict[str, float | None], epoch: int) -> None:
        if not self._wait_for(lambda: not self._queue, epoch):
            return
        with self._lock:
            if self._epoch == epoch:
                self._reply(REPRAP.ok)

    def _cmd_restart(self, params: dict[str, float | None], epoch: int) -> None:
        with self._lock:
            self._reply(REPRAP.ok)

    # ------------------------------------------------------------- motion

    def _queue_end(self) -> Vec:
        return self._queue[-1].end if self._queue else self._motor

    def _queue_move(self, begin: Vec, target: Vec, feed_um_s: float, *, now: float | None = None) -> None:
        delta = [b - a for a, b in zip(begin, target)]
        if math.hypot(*delta) == 0.0:
            return
        speed = min(feed_um_s, path_limit(delta, self._speed_max))
        accel = path_limit(delta, self._accel_max)
        t_now = self._clock.now() if now is None else now
        t0 = max(t_now, self._queue[-1].end_s) if self._queue else t_now
        seg = _Segment(begin, target, speed, accel, t0, stalled=self._stall_next)
        self._stall_next = False
        self._queue.append(seg)

    def _retime(self, now: float) -> None:
        t = now
        for seg in self._queue:
            seg.t0_s = max(seg.t0_s, t) if seg is self._queue[0] else t
            t = seg.end_s

    def _advance(self, now: float) -> None:
        """Retire the moves that have finished by ``now``."""
        while self._queue and self._queue[0].end_s <= now:
            seg = self._queue.pop(0)
            self._motor = seg.end
            self._mechanics.finish(seg.start, seg.end, seg.end_s)

    def _motor_at(self, now: float) -> Vec:
        if self._queue and self._queue[0].t0_s <= now:
            return self._queue[0].at(now)
        return self._motor

    def _interrupt(self) -> None:
        """Stop all motion where it is now (reset, emergency stop)."""
        now = self._clock.now()
        self._advance(now)
        motor = self._motor_at(now)
        self._mechanics.stop(motor)
        self._motor = motor
        self._queue.clear()

    def _wait_for(self, done: Callable[[], bool], epoch: int) -> bool:
        """Block this command until ``done()``; False if a reset, stop or M112 came first.

        Input keeps being read meanwhile, so an ``M112`` acts at once, as on boards that
        scan their serial input for it.
        """
        while True:
            with self._lock:
                if self._epoch != epoch or self._stopping.is_set():
                    return False
                now = self._clock.now()
                self._advance(now)
                if done():
                    return True
                next_end = self._queue[0].end_s if self._queue else math.inf
                wait_s = min(_POLL_S, max(0.0, (next_end - now) / self._clock.speed))
            self._read_input(wait_s)

    def _emergency_stop(self) -> None:
        self._interrupt()
        self._epoch += 1
        self._halted = "emergency stop (M112): motion aborted; send M999 to restart"
        self._reply(REPRAP.halt_reply(self._halted))

    def _reboot(self) -> None:
        self._interrupt()
        self._epoch += 1
        self._pending.clear()
        self._inbuf = b""
        # The firmware restarts counting from 0 wherever the mechanics stopped.
        self._offset = self._motor
        self._absolute = True
        self._feed_um_s = self._stage.xy_speed_um_s
        self._pwm = [0.0] * PWM_OUTPUTS
        self._halted = None
        self._garble_next = self._drop_next = self._stall_next = False
        self._write_lines([BANNER, INFO_LINE])
