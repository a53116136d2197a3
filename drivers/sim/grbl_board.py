"""The simulated board's grbl language (:mod:`drivers.gcode.grbl`), on the emulator's mechanics.

What this board does, all from memory of grbl 1.1: homing is enabled (``$22=1``), so it
starts in the alarm lock and every G-code line gets ``error:9`` until ``$H`` (or ``$X``);
soft limits are on (``$20=1``): a target outside the mechanical travel raises
``ALARM:2`` before anything moves, and the board waits for a soft reset. The status
report shows ``MPos`` (``$10=1``) and the work offset ``WCO`` on the first report after
it changes and on every tenth. Feed hold stops motion where it is (a real board
decelerates along the path); a soft reset while moving raises ``ALARM:3``. The spindle
PWM (``M3 S``/``M5``) is lamp output 0, flood and mist coolant (``M8``/``M7``, off with
``M9``) are outputs 1 and 2. The feed rate is undefined after a reset: a ``G1`` without
``F`` is refused with ``error:22``.
"""

from __future__ import annotations

import re
from typing import TYPE_CHECKING

from drivers.gcode import grbl
from drivers.sim.controller import _AXES, Params, Refused

if TYPE_CHECKING:
    from drivers.sim.controller import GcodeEmulator

VERSION_LINES = ("[VER:1.1h.20190825:phasewatch-sim]", "[OPT:V,15,128]")
UNLOCK_MESSAGE = "[MSG:'$H'|'$X' to unlock]"
RESET_MESSAGE = "[MSG:Reset to continue]"
UNLOCKED_MESSAGE = "[MSG:Caution: Unlocked]"
HELP_LINE = "[HLP:$$ $# $G $I $N $x=val $Nx=line $J=line $SLP $C $X $H ~ ! ? ctrl-x]"
SETTINGS = ("$10=1", "$20=1", "$21=0", "$22=1", "$23=7", "$30=1000", "$32=0")
WCO_EVERY = 10  # reports between work-offset fields

_WORD = re.compile(r"([A-Z])([-+]?(?:\d+(?:\.\d*)?|\.\d+))")
_MODAL_ONLY = frozenset({"G17", "G21", "G54", "G94"})
_KNOWN = frozenset({"G0", "G1", "G4", "G17", "G21", "G54", "G90", "G91", "G92", "G92.1", "G94",
                    "M3", "M5", "M7", "M8", "M9"})


class _Error(Exception):
    def __init__(self, code: int) -> None:
        super().__init__(code)
        self.code = code


def parse_line(text: str) -> tuple[str, Params]:
    """(command word, parameters) of one grbl line; raises :class:`_Error` with its code."""
    body = re.sub(r"\(.*?\)", "", text.split(";", 1)[0]).replace(" ", "").upper()
    pos = 0
    word = ""
    params: Params = {}
    while pos < len(body):
        m = _WORD.match(body, pos)
        if m is None:
            raise _Error(1 if not body[pos].isalpha() else 2)
        letter, number = m.group(1), m.group(2)
        pos = m.end()
        if letter in "GM":
            value = float(number)
            name = f"{letter}{value:g}"
            if name in _MODAL_ONLY:
                word = word or name  # a mode word beside the command: taken, nothing to do
                continue
            if word and word not in _MODAL_ONLY:
                raise _Error(21)
            word = name
            continue
        if letter in params:
            raise _Error(25)
        params[letter] = float(number)
    if not word:
        raise _Error(31 if params else 20)
    if word not in _KNOWN:
        raise _Error(20)
    return word, params


class GrblFirmware:
    """grbl 1.1 on the emulator's mechanics; see the module docstring."""

    def __init__(self, board: GcodeEmulator) -> None:
        self.b = board
        self._outputs = [0.0] * grbl.LAMP_OUTPUTS
        self._locked = True        # the alarm lock: homing enabled, not homed yet
        self._critical: str | None = None  # an alarm that needs a reset first
        self._held = False
        self._homing = False
        self._wco: tuple[float, float, float] = (0.0, 0.0, 0.0)  # G92 offset, machine um
        self._wco_due = True
        self._reports = 0
        board._feed_um_s = None

    # ------------------------------------------------------------ board side

    def boot_lines(self) -> list[str]:
        return [grbl.BANNER, UNLOCK_MESSAGE] if self._locked else [grbl.BANNER]

    def lamp_level(self, channel: int) -> float:
        return self._outputs[channel] if 0 <= channel < len(self._outputs) else 0.0

    def rebooted(self, *, power_cycle: bool) -> None:
        self._outputs = [0.0] * grbl.LAMP_OUTPUTS
        self._held = False
        self._homing = False
        self._critical = None
        self._wco = (0.0, 0.0, 0.0)
        self._wco_due = True
        if power_cycle:
            self._locked = True
        self.b._feed_um_s = None

    def limit_tripped(self) -> None:
        """A limit switch closes: everything stops at once, ALARM:1, reset needed."""
        self.b.interrupt()
        self._alarm(1)

    def _alarm(self, code: int) -> None:
        self._locked = True
        self._critical = f"ALARM:{code}"
        self.b._write_lines([f"ALARM:{code}", RESET_MESSAGE])

    def take_bytes(self, data: bytes) -> None:
        line_bytes = bytearray()
        for byte in data:
            if byte in grbl.REALTIME_BYTES:
                # Flush what came before, so lines and real-time bytes keep their order.
                self._queue_lines(bytes(line_bytes))
                line_bytes.clear()
                self._realtime(byte)
            else:
                line_bytes.append(byte)
        self._queue_lines(bytes(line_bytes))

    def _queue_lines(self, data: bytes) -> None:
        if not data:
            return
        for text in self.b.split_lines(data):
            self.b.note_received(text)
            self.b._pending.append(text)

    def _realtime(self, byte: int) -> None:
        b = self.b
        b.note_received(chr(byte))
        if byte == grbl.STATUS_QUERY[0]:
            b._reply(self._status())
        elif byte == grbl.FEED_HOLD[0]:
            if b.moving:
                b.hold()
                self._held = True
        elif byte == grbl.CYCLE_START[0]:
            if self._held:
                b.resume()
                self._held = False
        elif byte == grbl.SOFT_RESET[0]:
            self._soft_reset()

    def _soft_reset(self) -> None:
        b = self.b
        if b.moving or self._homing:
            # Steps stopped abruptly: the counted position is kept but cannot be trusted.
            b._write_lines(["ALARM:6" if self._homing else "ALARM:3"])
            self._locked = True
        b._reboot(power_cycle=False)  # the banner (and the unlock hint when locked)

    def _state(self) -> str:
        if self._critical is not None or (self._locked and not self._homing):
            return "Alarm"
        if self._homing:
            return "Home"
        if self._held:
            return "Hold:0"
        return "Run" if self.b.moving else "Idle"

    def _status(self) -> str:
        b = self.b
        motor = b.motor_now()
        mpos = tuple(m - o for m, o in zip(motor, b._offset))
        self._reports += 1
        wco = None
        if self._wco_due or self._reports % WCO_EVERY == 0:
            wco = self._wco
            self._wco_due = False
        feed = (b._feed_um_s or 0.0) * 60.0 / 1000.0 if b.moving else 0.0
        return grbl.status_line(self._state(), mpos, wco_um=wco, feed_mm_min=feed)  # type: ignore[arg-type]

    # --------------------------------------------------------------- lines

    def execute(self, text: str) -> None:
        b = self.b
        with b._lock:
            epoch = b._epoch
        body = text.strip()
        try:
            if body.startswith("$"):
                self._system(body.upper().replace(" ", ""), epoch)
                return
            word, params = parse_line(body)
            with b._lock:
                if self._locked or self._critical is not None:
                    raise _Error(9)
            self._gcode(word, params, epoch)
        except _Error as exc:
            with b._lock:
                if b._epoch == epoch:
                    b._reply(f"error:{exc.code}")

    def _ok(self, epoch: int) -> None:
        with self.b._lock:
            if self.b._epoch == epoch:
                self.b._reply("ok")

    def _system(self, command: str, epoch: int) -> None:
        b = self.b
        if command == "$":
            with b._lock:
                b._reply(HELP_LINE, "ok")
        elif command == "$$":
            with b._lock:
                b._reply(*SETTINGS, "ok")
        elif command == "$I":
            with b._lock:
                b._reply(*VERSION_LINES, "ok")
        elif command == "$G":
            with b._lock:
                mode = "G90" if b._absolute else "G91"
                feed = (b._feed_um_s or 0.0) * 60.0 / 1000.0
                spindle = "M3" if self._outputs[0] > 0 else "M5"
                b._reply(f"[GC:G0 G54 G17 G21 {mode} G94 {spindle} M9 T0 F{feed:g} S{self._outputs[0] * grbl.SPINDLE_MAX_S:g}]", "ok")
        elif command == "$X":
            with b._lock:
                if self._critical is not None:
                    raise _Error(9)
                self._locked = False
                b._reply(UNLOCKED_MESSAGE, "ok")
        elif command == "$H":
            with b._lock:
                if self._critical is not None:
                    raise _Error(9)
                self._homing = True
            homed = b.home_axes([True, True, True], epoch)
            with b._lock:
                self._homing = False
                if homed and b._epoch == epoch:
                    self._locked = False
                    b._reply("ok")
        else:
            raise _Error(3)

    def _gcode(self, word: str, params: Params, epoch: int) -> None:
        b = self.b
        if word in ("G0", "G1"):
            for key in params:
                if key not in "XYZF":
                    raise _Error(20)
            if params.get("F") is None and b._feed_um_s is None and word == "G1":
                raise _Error(22)
            if params.get("F") is not None and params["F"] <= 0:  # type: ignore[operator]
                raise _Error(4)
            try:
                target = b.queue_linear_move(params, epoch, offset_um=self._wco)
            except Refused:
                with b._lock:
                    self._alarm(2)
                return
            if target is not None:
                self._ok(epoch)
        elif word == "G4":
            seconds = params.get("P")
            if seconds is None or seconds < 0:
                raise _Error(28)
            if not b.wait_for(lambda: not b._queue, epoch):
                return
            if seconds > 0:
                until = b._clock.now() + seconds
                if not b.wait_for(lambda: b._clock.now() >= until, epoch):
                    return
            self._ok(epoch)
        elif word in ("G90", "G91"):
            with b._lock:
                b._absolute = word == "G90"
            self._ok(epoch)
        elif word in ("G17", "G21", "G54", "G94"):
            self._ok(epoch)
        elif word == "G92":
            if not params or any(k not in "XYZ" for k in params):
                raise _Error(26)
            if not b.wait_for(lambda: not b._queue, epoch):
                return
            with b._lock:
                motor = b._motor
                wco = list(self._wco)
                for i, axis in enumerate(_AXES):
                    value = params.get(axis)
                    if value is not None:
                        wco[i] = motor[i] - b._offset[i] - value * 1000.0
                self._wco = tuple(wco)  # type: ignore[assignment]
                self._wco_due = True
            self._ok(epoch)
        elif word == "G92.1":
            with b._lock:
                self._wco = (0.0, 0.0, 0.0)
                self._wco_due = True
            self._ok(epoch)
        elif word in ("M3", "M5"):
            level = 0.0
            if word == "M3":
                speed = params.get("S", grbl.SPINDLE_MAX_S)
                if speed is None or speed < 0:
                    raise _Error(4)
                level = min(speed, grbl.SPINDLE_MAX_S) / grbl.SPINDLE_MAX_S
            # Spindle changes wait for the moves before them (laser mode off).
            if not b.wait_for(lambda: not b._queue, epoch):
                return
            with b._lock:
                self._outputs[0] = level
            self._ok(epoch)
        elif word in ("M7", "M8", "M9"):
            with b._lock:
                if word == "M9":
                    self._outputs[1] = self._outputs[2] = 0.0
                else:
                    self._outputs[1 if word == "M8" else 2] = 1.0
            self._ok(epoch)
        else:
            raise _Error(20)
