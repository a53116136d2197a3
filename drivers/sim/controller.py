"""A simulated G-code motion controller, served on a pseudo-terminal.

The real serial driver (:mod:`drivers.gcode`) talks to this emulator through pyserial
exactly as it talks to a controller board on a USB serial port, so the simulated scope
exercises the real driver, its timeouts and its recovery paths. It speaks either
dialect (``dialect="reprap"`` or ``"grbl"``): the RepRap family's of
:mod:`drivers.gcode.dialect` (this module's :class:`RepRapFirmware`) or grbl's of
:mod:`drivers.gcode.grbl` (:class:`drivers.sim.grbl_board.GrblFirmware`). Commands,
replies, report formats and the planner's kinematics are described there; below is what
is particular to this board.

The board
---------
The planner queues up to 16 moves (:data:`PLANNER_DEPTH`); a move arriving when it is
full is acknowledged once a move has finished. Homing goes Z first, down to its switch,
then X and Y; the home switches sit at the profile's lower limits (``x_min_um``,
``y_min_um``, ``z_min_um``). In the RepRap dialect there are 8 PWM outputs
(``M106``/``M107 P0``-``P7``), ``M115`` answers :data:`FIRMWARE_LINE`, the banner is
followed by one ``echo:`` line (:data:`INFO_LINE`), numbered lines are checked and a
damaged one is asked for again, long waits (homing, ``M400``) send
``echo:busy: processing`` every ``busy_interval_s`` on the clock, ``M114`` appends
extruder and step counts, and ``M999`` after an ``M112`` reboots the board. ``M112`` is
acted on as the line arrives, even while an ``M400`` or ``G28`` waits.

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
whose end lies outside the travel is refused with no motion (``Error:`` in the RepRap
dialect, a soft-limit ``ALARM:2`` in grbl's).

Faults (:meth:`GcodeEmulator.inject`), the same in both dialects
-----------------------------------------------------------------
``reset``         reboot: motion stops where it is, queued lines are lost, the firmware's
                  coordinates restart at 0 (the mechanics do not move), the banner is
                  printed (grbl then waits in its alarm lock for ``$H``)
``disconnect``    the cable is pulled: the pseudo-terminal closes and the link path
                  disappears; motion already queued runs on. :meth:`reconnect` plugs it
                  back in: a new pseudo-terminal behind the same link path
``garble``        the first line of the next reply arrives as noise (high-bit bytes)
``drop_reply``    the next reply is never sent
``stall``         the next move jams half-way: it never finishes and the finish barrier
                  never answers until :meth:`clear_faults`, the halt or a reset
``corrupt_line``  the next line from the host arrives with one byte turned to noise
                  (a noisy cable): a numbered line is asked for again, an unnumbered
                  one is refused as unreadable
``limit``         (grbl) a limit switch trips: motion stops at once, ``ALARM:1``, and the
                  board waits for a reset
:meth:`schedule_faults` strikes them at given times of the simulated clock instead (the
``[sim.faults]`` profile section), a disconnect followed by its reconnect.

:meth:`start` returns a stable link path (a symbolic link to the current pseudo-terminal)
for pyserial, the way a udev rule gives a board a stable name. The link lives in a
temporary folder of its own (``phasewatch-sim-*``) with the owning process's id beside it;
a process killed outright (SIGKILL, power cut) cannot remove it, so the next start
removes every such folder whose owner is gone.
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
from typing import TYPE_CHECKING, Callable, Protocol

from drivers import atomic
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
FAULTS = ("reset", "disconnect", "garble", "drop_reply", "stall", "corrupt_line", "limit")
LINK_DIR_PREFIX = "phasewatch-sim-"
OWNER_FILE = "owner.pid"


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True  # someone else's process: alive, and not ours to judge
    return True


def remove_stale_link_dirs(tmp_dir: str | Path | None = None) -> list[Path]:
    """Remove the link folders of emulators whose process is gone (killed before it could
    clean up); the folders removed. A folder without an owner file (from an older version)
    goes when its link points at no pseudo-terminal any more."""
    removed = []
    for folder in Path(tmp_dir or tempfile.gettempdir()).glob(f"{LINK_DIR_PREFIX}*"):
        if not folder.is_dir() or folder.is_symlink():
            continue
        try:
            if folder.stat().st_uid != os.getuid():
                continue
            owner = folder / OWNER_FILE
            pid = int(owner.read_text(encoding="ascii").strip() or "0") if owner.exists() else 0
            if pid > 0:
                stale = not _alive(pid)
            else:
                # No owner written (an older version, or one starting this instant): stale
                # only when its link points at no pseudo-terminal and it is not brand new.
                young = time.time() - folder.stat().st_mtime < 60.0
                stale = not young and not (folder / "ttySIM0").exists()
        except (OSError, ValueError):
            continue
        if stale:
            shutil.rmtree(folder, ignore_errors=True)
            removed.append(folder)
    return removed
DIALECTS = ("reprap", "grbl")
# Steps per millimetre behind the step counts of the RepRap position report: belt-driven
# x and y, lead-screw z, as on common printer-derived stages (common practice).
STEPS_PER_MM = (80.0, 80.0, 400.0)
# The noise byte a corrupted line carries in place of one character.
_NOISE_BYTE = 0xA5
# Room in the board's input buffer, reported in the numbered ok (lines).
_INPUT_BUFFER_LINES = 4

# Real seconds between looks at the clock while a move runs: small against the
# link's millisecond latency, large enough not to spin a CPU core.
_POLL_S = 0.002
_STALL_FRACTION = 0.5
_AXES = ("X", "Y", "Z")

Vec = tuple[float, float, float]
Params = dict[str, float | None]


class Refused(Exception):
    """A command the board refuses; its text is the dialect's refusal."""


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


class Firmware(Protocol):
    """The language side of the board: what it reads and how it answers (one per dialect)."""

    def boot_lines(self) -> list[str]: ...

    def take_bytes(self, data: bytes) -> None:
        """Bytes from the host (the emulator's lock held): act on real-time ones, queue lines."""
        ...

    def execute(self, text: str) -> None:
        """Run one queued line (without the emulator's lock)."""
        ...

    def rebooted(self, *, power_cycle: bool) -> None:
        """After a reboot (the lock held): the firmware's own state starts afresh."""
        ...

    def lamp_level(self, channel: int) -> float: ...


class GcodeEmulator:
    """The simulated controller; see the module docstring for the dialects and faults."""

    def __init__(
        self,
        *,
        clock: Clock,
        stage: StageSettings,
        focus: FocusSettings,
        motion: SimMotion,
        start: Position | None = None,
        link_dir: str | Path | None = None,
        dialect: str = "reprap",
        busy_interval_s: float = 2.0,
        seed: int = 0,
    ) -> None:
        if dialect not in DIALECTS:
            raise ValueError(f"unknown dialect {dialect!r}; one of {', '.join(DIALECTS)}")
        self._clock = clock
        self._stage = stage
        self._focus = focus
        self._motion = motion
        self.dialect = dialect
        self.busy_interval_s = busy_interval_s
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
        self._feed_um_s: float | None = stage.xy_speed_um_s
        self._epoch = 0
        self._garble_next = False
        self._drop_next = False
        self._stall_next = False
        self._corrupt_next = False
        self._limit_next = False

        self.received: list[tuple[float, str]] = []
        self.busy_sent = 0  # keep-alive lines sent (RepRap dialect)
        self.line_noise = False  # while True every line from the host arrives damaged (a bad cable)
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
        if dialect == "grbl":
            from drivers.sim.grbl_board import GrblFirmware

            self._fw: Firmware = GrblFirmware(self)
        else:
            self._fw = RepRapFirmware(self)

    # ----------------------------------------------------------------- public

    def start(self) -> str:
        """Open the pseudo-terminal, boot (print the banner), serve; return the link path."""
        if self._thread is not None:
            raise RuntimeError("the emulator is already running")
        if self._link_dir is None:
            remove_stale_link_dirs()
            self._link_dir = Path(tempfile.mkdtemp(prefix=LINK_DIR_PREFIX))
            atomic.write_text(self._link_dir / OWNER_FILE, f"{os.getpid()}\n", encoding="ascii")
        self._link_dir.mkdir(parents=True, exist_ok=True)
        self._link_path = self._link_dir / "ttySIM0"
        with self._lock:
            self._open_pty()
            self._write_lines(self._fw.boot_lines())
        self._stopping.clear()
        self._thread = threading.Thread(target=self._serve, name="gcode-emulator", daemon=True)
        self._thread.start()
        return str(self._link_path)

    def schedule_faults(self, schedule: list[tuple[float, str]], *, reconnect_after_s: float = 30.0) -> None:
        """Strike each ``(t_s, fault)`` at ``t_s`` simulated seconds from now (call after
        :meth:`start`); a disconnect is plugged back in ``reconnect_after_s`` later."""
        for _t, fault in schedule:
            if fault not in FAULTS:
                raise ValueError(f"unknown fault {fault!r}; one of {', '.join(FAULTS)}")
        if not schedule:
            return
        start_s = self._clock.now()
        events = sorted([(start_s + t, fault) for t, fault in schedule])
        self.faults_struck: list[tuple[float, str]] = []

        def run() -> None:
            pending = list(events)
            while pending and not self._stopping.wait(0.02):
                now = self._clock.now()
                while pending and pending[0][0] <= now:
                    _at, fault = pending.pop(0)
                    if fault == "reconnect":
                        self.reconnect()
                    else:
                        self.inject(fault)
                        if fault == "disconnect":
                            pending.append((now + reconnect_after_s, "reconnect"))
                            pending.sort()
                    self.faults_struck.append((now - start_s, fault))
                    log.warning("simulated controller fault: %s at %.1f s", fault, now - start_s)

        self._fault_thread = threading.Thread(target=run, name="gcode-emulator-faults", daemon=True)
        self._fault_thread.start()

    def stop(self) -> None:
        self._stopping.set()
        with self._lock:
            self._epoch += 1
        fault_thread = getattr(self, "_fault_thread", None)
        if fault_thread is not None:
            fault_thread.join(timeout=5.0)
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
        """Level 0..1 of lamp output ``channel`` (a PWM output; grbl: 0 spindle, 1 flood, 2 mist)."""
        with self._lock:
            return self._fw.lamp_level(channel)

    def inject(self, fault: str) -> None:
        """Inject one of :data:`FAULTS`; see the module docstring for what each does."""
        if fault not in FAULTS:
            raise ValueError(f"unknown fault {fault!r}; one of {', '.join(FAULTS)}")
        if fault == "limit" and self.dialect != "grbl":
            raise ValueError("the limit fault is grbl's (ALARM:1); the RepRap board has no limit alarm")
        if fault == "reset":
            with self._lock:
                self._reboot(power_cycle=True)
        elif fault == "disconnect":
            if self._thread is None or not self._thread.is_alive():
                with self._lock:
                    self._close_pty()
                return
            self._disconnect_done.clear()
            self._disconnect_asked.set()
            if not self._disconnect_done.wait(timeout=5.0):
                raise RuntimeError("the emulator did not close its pseudo-terminal")
        elif fault == "limit":
            with self._lock:
                self._fw.limit_tripped()  # type: ignore[attr-defined]
        else:
            with self._lock:
                if fault == "garble":
                    self._garble_next = True
                elif fault == "drop_reply":
                    self._drop_next = True
                elif fault == "corrupt_line":
                    self._corrupt_next = True
                else:
                    self._stall_next = True

    def clear_faults(self) -> None:
        """Clear pending faults and free a jammed move (it then runs to its end)."""
        with self._lock:
            now = self._clock.now()
            self._garble_next = self._drop_next = self._stall_next = self._corrupt_next = False
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
        atomic.symlink(self._link_path, self._device_path)

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
        data = "".join(f"{line}\n" for line in lines).encode("ascii", errors="replace")
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
                    self._fw.execute(line)
                else:
                    self._read_input(0.02)
        except Exception:  # a bug here must not die silently behind a pty that stays open
            log.exception("the G-code emulator stopped serving")
            raise

    def _read_input(self, timeout_s: float) -> None:
        """Read what has arrived and hand it to the firmware (real-time bytes act at once)."""
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
            self._fw.take_bytes(data)

    def split_lines(self, data: bytes) -> list[str]:
        """Complete lines from the input buffer (the lock held), through the line fault."""
        self._inbuf += data
        *complete, self._inbuf = self._inbuf.split(b"\n")
        lines = []
        for raw in complete:
            raw = raw.rstrip(b"\r")
            if (self._corrupt_next or self.line_noise) and raw.strip():
                self._corrupt_next = False
                middle = len(raw) // 2
                raw = raw[:middle] + bytes([_NOISE_BYTE]) + raw[middle + 1:]
            text = raw.decode("ascii", errors="replace").strip()
            if text:
                lines.append(text)
        return lines

    def note_received(self, text: str) -> None:
        self.received.append((self._clock.now(), text))

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

    def wait_for(self, done: Callable[[], bool], epoch: int, *, busy: Callable[[], None] | None = None) -> bool:
        """Block this command until ``done()``; False if a reset, stop or halt came first.

        Input keeps being read meanwhile, so real-time commands (``M112``, grbl's ``?``,
        ``!``, Ctrl-X) act at once, as on boards that scan their serial input for them.
        ``busy`` is called every ``busy_interval_s`` on the clock while waiting.
        """
        last_busy = self._clock.now()
        # While timed work holds the clock, a move is waited out at speed in real time and
        # then its modelled end is counted exactly (drivers.clock), however late we woke.
        model_until = getattr(self._clock, "model_until", None)
        is_held = getattr(self._clock, "is_held", None)
        held_end, held_deadline = math.nan, 0.0
        while True:
            with self._lock:
                if self._epoch != epoch or self._stopping.is_set():
                    return False
                now = self._clock.now()
                self._advance(now)
                if done():
                    return True
                if busy is not None and now - last_busy >= self.busy_interval_s:
                    last_busy = now
                    busy()
                next_end = self._queue[0].end_s if self._queue else math.inf
                if model_until is not None and is_held is not None and math.isfinite(next_end) and is_held():
                    if next_end != held_end:
                        held_end, held_deadline = next_end, time.monotonic() + (next_end - now) / self._clock.speed
                    left_real = held_deadline - time.monotonic()
                    if left_real <= 0.0:
                        model_until(next_end)
                        continue
                    wait_s = min(_POLL_S, left_real)
                else:
                    wait_s = min(_POLL_S, self._clock.real_s_for(next_end - now))
            self._read_input(wait_s)

    def queue_end(self) -> Vec:
        return self._queue_end()

    def travel_check(self, target: Vec) -> int | None:
        """The index of the first axis whose ``target`` lies outside the mechanics, or None."""
        for i, (value, lo, hi) in enumerate(zip(target, self._travel_lo, self._travel_hi)):
            if not lo - 1e-6 <= value <= hi + 1e-6:
                return i
        return None

    def motor_now(self) -> Vec:
        now = self._clock.now()
        self._advance(now)
        return self._motor_at(now)

    def home_axes(self, axes: list[bool], epoch: int, *, busy: Callable[[], None] | None = None) -> bool:
        """Home the named axes (z first, then x and y together); False if interrupted."""
        if not self.wait_for(lambda: not self._queue, epoch, busy=busy):
            return False
        with self._lock:
            if self._epoch != epoch:
                return False
            now = self._clock.now()
            here = self._motor
            if axes[2]:
                down = (here[0], here[1], self._home[2])
                self._queue_move(here, down, math.inf, now=now)
                here = down
            if axes[0] or axes[1]:
                across = (self._home[0] if axes[0] else here[0], self._home[1] if axes[1] else here[1], here[2])
                self._queue_move(here, across, math.inf, now=now)
        if not self.wait_for(lambda: not self._queue, epoch, busy=busy):
            return False
        with self._lock:
            if self._epoch != epoch:
                return False
            # The switches are found on the way down, then the axes back off upwards: the
            # play is taken up from below, so mechanics and motors agree at home.
            self._mechanics.take_up(self._motor, tuple(axes))  # type: ignore[arg-type]
            self._offset = tuple(0.0 if homed else o for homed, o in zip(axes, self._offset))  # type: ignore[assignment]
            return True

    def hold(self) -> None:
        """Feed hold: motion stops where it is; the queue waits (grbl's ``!``)."""
        now = self._clock.now()
        self._advance(now)
        if not self._queue:
            return
        seg = self._queue[0]
        frozen = seg.at(now)
        self._mechanics.stop(frozen)
        self._motor = frozen
        self._queue[0] = dataclasses.replace(seg, start=frozen, t0_s=math.inf)
        for later in self._queue[1:]:
            later.t0_s = math.inf

    def resume(self) -> None:
        """Cycle start after a feed hold: the queue runs on from where it stopped."""
        now = self._clock.now()
        if self._queue and math.isinf(self._queue[0].t0_s):
            self._queue[0] = dataclasses.replace(self._queue[0], t0_s=now)
            t = now
            for seg in self._queue:
                seg.t0_s = t
                t = seg.end_s

    @property
    def moving(self) -> bool:
        now = self._clock.now()
        self._advance(now)
        return bool(self._queue) and not math.isinf(self._queue[0].t0_s)

    def interrupt(self) -> None:
        """Stop all motion where it is now, drop the queue and abort waiting commands."""
        self._interrupt()
        self._epoch += 1

    def _reboot(self, *, power_cycle: bool) -> None:
        self.interrupt()
        self._pending.clear()
        self._inbuf = b""
        if power_cycle:
            # The firmware restarts counting from 0 wherever the mechanics stopped.
            self._offset = self._motor
        self._absolute = True
        self._feed_um_s = self._stage.xy_speed_um_s
        self._garble_next = self._drop_next = self._stall_next = self._corrupt_next = False
        self._fw.rebooted(power_cycle=power_cycle)
        self._write_lines(self._fw.boot_lines())

    # ---------------------------------------------------- shared commands

    def queue_linear_move(self, params: Params, epoch: int, *, offset_um: Vec = (0.0, 0.0, 0.0)) -> Vec | None:
        """Queue a G0/G1 (waiting for planner room); the motor target, or None if aborted.

        ``offset_um``: a work offset (grbl's G92) between the line's and the board's
        coordinates. Raises :class:`Refused` naming the axis when the target lies outside
        the travel; the caller words the refusal in its dialect.
        """
        if not self.wait_for(lambda: len(self._queue) < PLANNER_DEPTH, epoch):
            return None
        with self._lock:
            if self._epoch != epoch:
                return None
            feed = params.get("F")
            if feed is not None:
                self._feed_um_s = feed_to_um_s(feed)
            begin = self._queue_end()
            logical = [m - o - w for m, o, w in zip(begin, self._offset, offset_um)]
            for i, axis in enumerate(_AXES):
                value = params.get(axis)
                if value is not None:
                    logical[i] = mm_to_um(value) if self._absolute else logical[i] + mm_to_um(value)
            target = tuple(v + o + w for v, o, w in zip(logical, self._offset, offset_um))
            bad = self.travel_check(target)  # type: ignore[arg-type]
            if bad is not None:
                raise Refused(f"{_AXES[bad]}{format_mm(logical[bad])} lies outside the travel of the mechanics; not moved")
            assert self._feed_um_s is not None
            self._queue_move(begin, target, self._feed_um_s)  # type: ignore[arg-type]
            return target  # type: ignore[return-value]

    def position_after_queue(self) -> Vec:
        """Where the queued moves end, in the firmware's coordinates."""
        end = self._queue_end()
        return tuple(m - o for m, o in zip(end, self._offset))  # type: ignore[return-value]


def _only(params: Params, allowed: str, command: str) -> None:
    for key in params:
        if key not in allowed:
            raise Refused(f"{command} does not take '{key}'")


class RepRapFirmware:
    """The RepRap-family language (:mod:`drivers.gcode.dialect`), on the emulator's mechanics."""

    def __init__(self, board: GcodeEmulator) -> None:
        self.b = board
        self._pwm = [0.0] * PWM_OUTPUTS
        self._halted: str | None = None
        self._last_number = 0
        self._number: int | None = None  # of the line being run, for its ok

    def boot_lines(self) -> list[str]:
        return [BANNER, INFO_LINE]

    def lamp_level(self, channel: int) -> float:
        return self._pwm[channel]

    def rebooted(self, *, power_cycle: bool) -> None:
        self._pwm = [0.0] * PWM_OUTPUTS
        self._halted = None
        self._last_number = 0

    def take_bytes(self, data: bytes) -> None:
        for text in self.b.split_lines(data):
            numbered = REPRAP.read_numbered(text)
            self.b.note_received(numbered.body if numbered.checksum_ok else text)
            if numbered.checksum_ok and REPRAP.is_emergency_stop(numbered.body):
                self._emergency_stop()
            else:
                self.b._pending.append(text)

    def _ok(self) -> None:
        if self._number is None:
            self.b._reply(REPRAP.ok)
        else:
            free = PLANNER_DEPTH - len(self.b._queue)
            self.b._reply(REPRAP.numbered_ok(self._number, free, _INPUT_BUFFER_LINES - len(self.b._pending)))

    def _busy(self) -> None:
        self.b.busy_sent += 1
        self.b._write_lines([REPRAP.busy_line])

    def execute(self, text: str) -> None:
        b = self.b
        with b._lock:
            epoch = b._epoch
            if self._halted is not None:
                if REPRAP.command_word(text) == REPRAP.restart_command:
                    b._reboot(power_cycle=True)
                else:
                    b._reply(REPRAP.halt_reply(self._halted))
                return
            numbered = REPRAP.read_numbered(text)
            if not numbered.checksum_ok or (
                numbered.number is not None and numbered.number != self._last_number + 1
                and REPRAP.command_word(numbered.body) != REPRAP.renumber_command
            ):
                problem = numbered.problem or "Line Number is not Last Line Number+1"
                b._reply(
                    REPRAP.error_reply(f"{problem}, Last Line: {self._last_number}"),
                    REPRAP.resend_reply(self._last_number + 1),
                    REPRAP.ok,
                )
                return
            if numbered.number is not None:
                self._last_number = numbered.number
            self._number = numbered.number
        try:
            parsed = REPRAP.parse_command(numbered.body)
        except CommandSyntaxError as exc:
            with b._lock:
                b._reply(REPRAP.error_reply(str(exc)))
            return
        if parsed is None:
            return
        handler = self._handlers().get(parsed.word)
        try:
            if handler is None:
                raise Refused(f"unknown command '{parsed.word}'")
            handler(parsed.params, epoch)
        except Refused as exc:
            with b._lock:
                if b._epoch == epoch:
                    b._reply(REPRAP.error_reply(str(exc)))

    def _handlers(self) -> dict[str, Callable[[Params, int], None]]:
        return {
            "G0": self._cmd_move,
            "G1": self._cmd_move,
            "G28": self._cmd_home,
            "G90": self._cmd_absolute,
            "G91": self._cmd_relative,
            "G92": self._cmd_set_position,
            "M106": self._cmd_pwm_on,
            "M107": self._cmd_pwm_off,
            "M110": self._cmd_line_number,
            "M114": self._cmd_report,
            "M115": self._cmd_firmware,
            "M400": self._cmd_finish,
        }

    def _cmd_move(self, params: Params, epoch: int) -> None:
        _only(params, "XYZF", "G1")
        for key, value in params.items():
            if value is None or not math.isfinite(value):
                raise Refused(f"'{key}' needs a number")
        feed = params.get("F")
        if feed is not None and feed <= 0:
            raise Refused("F must be greater than 0 mm/min")
        if self.b.queue_linear_move(params, epoch) is not None:
            with self.b._lock:
                self._ok()

    def _cmd_home(self, params: Params, epoch: int) -> None:
        _only(params, "XYZ", "G28")
        axes = [axis in params for axis in _AXES] if params else [True, True, True]
        if self.b.home_axes(axes, epoch, busy=self._busy):
            with self.b._lock:
                self._ok()

    def _cmd_absolute(self, params: Params, epoch: int) -> None:
        with self.b._lock:
            self.b._absolute = True
            self._ok()

    def _cmd_relative(self, params: Params, epoch: int) -> None:
        with self.b._lock:
            self.b._absolute = False
            self._ok()

    def _cmd_set_position(self, params: Params, epoch: int) -> None:
        _only(params, "XYZ", "G92")
        if not params or any(v is None for v in params.values()):
            raise Refused("G92 needs at least one axis with a value, e.g. G92 X0 Y0 Z1.5")
        b = self.b
        if not b.wait_for(lambda: not b._queue, epoch):
            return
        with b._lock:
            if b._epoch != epoch:
                return
            offset = list(b._offset)
            for i, axis in enumerate(_AXES):
                value = params.get(axis)
                if value is not None:
                    offset[i] = b._motor[i] - mm_to_um(value)
            b._offset = tuple(offset)  # type: ignore[assignment]
            self._ok()

    def _pwm_channel(self, params: Params, command: str) -> int:
        p = params.get("P", 0.0)
        if p is None or p != int(p) or not 0 <= p < PWM_OUTPUTS:
            raise Refused(f"{command} P must be a PWM output 0-{PWM_OUTPUTS - 1}")
        return int(p)

    def _cmd_pwm_on(self, params: Params, epoch: int) -> None:
        _only(params, "PS", "M106")
        channel = self._pwm_channel(params, "M106")
        s = params.get("S", 255.0)
        if s is None or not 0.0 <= s <= 255.0:
            raise Refused("M106 S must be 0-255")
        with self.b._lock:
            self._pwm[channel] = s / 255.0
            self._ok()

    def _cmd_pwm_off(self, params: Params, epoch: int) -> None:
        _only(params, "P", "M107")
        channel = self._pwm_channel(params, "M107")
        with self.b._lock:
            self._pwm[channel] = 0.0
            self._ok()

    def _cmd_line_number(self, params: Params, epoch: int) -> None:
        _only(params, "N", "M110")
        with self.b._lock:
            n = params.get("N")
            self._last_number = int(n) if n is not None else (self._number or 0)
            self._ok()

    def _cmd_report(self, params: Params, epoch: int) -> None:
        with self.b._lock:
            x, y, z = self.b.position_after_queue()
            counts = " ".join(f"{a}:{round(v / 1000.0 * k)}" for a, v, k in zip(_AXES, (x, y, z), STEPS_PER_MM))
            self.b._reply(REPRAP.report_line(x, y, z, extra=f"E:0.00 Count {counts}"), REPRAP.ok)

    def _cmd_firmware(self, params: Params, epoch: int) -> None:
        with self.b._lock:
            self.b._reply(FIRMWARE_LINE, REPRAP.ok)

    def _cmd_finish(self, params: Params, epoch: int) -> None:
        b = self.b
        if not b.wait_for(lambda: not b._queue, epoch, busy=self._busy):
            return
        with b._lock:
            if b._epoch == epoch:
                self._ok()

    def _emergency_stop(self) -> None:
        self.b.interrupt()
        self._halted = "emergency stop (M112): motion aborted; send M999 to restart"
        self.b._reply(REPRAP.halt_reply(self._halted))
