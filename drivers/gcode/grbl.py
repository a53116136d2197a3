"""The grbl dialect, common on budget CNC shields: what the driver writes and reads.

Everything here is from memory of grbl 1.1 (not looked up); the simulated board
(:mod:`drivers.sim.controller`) answers the same way. Millimetres and mm/min on the wire,
as in the RepRap-family dialect (:mod:`drivers.gcode.dialect`); one line at a time, every
line answered by ``ok`` or ``error:<code>``.

==========================  =============================================================
``G90`` / ``G91``           absolute / relative coordinates
``G0``/``G1 X Y Z F``       move; ``ok`` once queued in the planner
``G4 P<s>``                 dwell; ``G4 P0`` is answered only once every queued move has
                            finished: the "motion finished" barrier
``G92 X Y Z`` / ``G92.1``   declare the current position (a work offset) / clear it
``M3 S<0-1000>`` / ``M5``   spindle PWM on to S (of ``$30`` = 1000) / off: lamp output 0
``M8`` / ``M9``             flood coolant on / off (and ``M7`` mist): lamp outputs 1 and 2
``$H``                      home; ``ok`` when homing has finished (also clears an alarm)
``$X``                      unlock an alarm without homing (the position stays unknown)
``$I``                      build information ``[VER:1.1h.20190825:]`` ``[OPT:V,15,128]``
``$G``                      the modal state ``[GC:G0 G54 G17 G21 G90 G94 M5 M9 T0 F0 S0]``
``$$``                      the settings, one ``$<n>=<value>`` line each
==========================  =============================================================

Real-time bytes, acted on as they arrive (even in the middle of a line) and never
answered with ``ok``:

* ``?`` the status report ``<Idle|MPos:12.500,3.000,1.500|FS:0,0>`` (also ``Run``,
  ``Hold:0``, ``Home``, ``Alarm``, ...). ``MPos`` is the machine position; the work
  position is ``MPos - WCO``, and the work offset ``WCO:x,y,z`` is only sent every so
  many reports and when it changes, so the reader remembers the last one seen;
* ``!`` feed hold (motion stops, the queue is kept), ``~`` cycle start (it resumes);
* ``0x18`` (Ctrl-X) soft reset: motion stops at once, the queue is dropped and the
  banner ``Grbl 1.1h ['$' for help]`` is printed. A reset while moving raises
  ``ALARM:3``: the position can no longer be trusted.

Alarms: ``ALARM:<code>`` (1 hard limit, 2 soft limit, 3 reset while moving, 6-9 homing
failed). After power-up (homing enabled) and after an alarm the board is locked:
G-code lines get ``error:9`` until ``$H`` (or ``$X``); some alarms first need a soft
reset (``[MSG:Reset to continue]``). The driver treats every alarm as a lost position:
it resets and homes.
"""

from __future__ import annotations

import re

from drivers.base import Position
from drivers.gcode.dialect import Reply, ReplyKind, declare_position, linear_move, mm_to_um

BANNER = "Grbl 1.1h ['$' for help]"
SOFT_RESET = b"\x18"
FEED_HOLD = b"!"
CYCLE_START = b"~"
STATUS_QUERY = b"?"
REALTIME_BYTES = frozenset(SOFT_RESET + FEED_HOLD + CYCLE_START + STATUS_QUERY)
SPINDLE_MAX_S = 1000.0  # $30, the spindle speed at full PWM (grbl's default, from memory)
LAMP_OUTPUTS = 3        # 0: spindle PWM, 1: flood coolant (M8), 2: mist coolant (M7)

# grbl 1.1's error codes (from memory).
ERRORS: dict[int, str] = {
    1: "expected command letter",
    2: "bad number format",
    3: "invalid statement",
    4: "value < 0",
    5: "setting disabled (homing not enabled)",
    8: "not idle",
    9: "G-code locked out during alarm or jog state",
    10: "soft limits need homing enabled",
    11: "line overflow",
    15: "travel exceeded",
    20: "unsupported or invalid G-code command",
    21: "modal group violation",
    22: "undefined feed rate",
    23: "command value not an integer",
    25: "repeated word",
    26: "no axis words",
    33: "invalid motion target",
    36: "unused value words",
}
LOCKED_ERROR = 9
# A refusal that a well-formed line can only get if it was damaged on the way.
DAMAGE_ERRORS = frozenset({1, 2, 3, 20, 21, 22, 23, 25, 26, 33, 36})

ALARMS: dict[int, str] = {
    1: "hard limit triggered; position likely lost",
    2: "soft limit: motion target exceeds machine travel",
    3: "reset while in motion; position lost",
    4: "probe fail",
    5: "probe fail",
    6: "homing fail: reset during homing",
    7: "homing fail: safety door opened",
    8: "homing fail: could not clear the switch",
    9: "homing fail: switch not found",
}

_BANNER = re.compile(r"Grbl\s+\d+\.\d+\w*\s+\[.*\]")
_ERROR = re.compile(r"error:(\d+)")
_ALARM = re.compile(r"ALARM:(\d+)")
_STATUS = re.compile(r"<([A-Za-z]+)(?::\d+)?((?:\|[^|>]*)*)>")
_NUMBERS = r"(-?\d+(?:\.\d+)?),(-?\d+(?:\.\d+)?),(-?\d+(?:\.\d+)?)"
_FIELD = {name: re.compile(rf"{name}:{_NUMBERS}(?:,[-\d.,]*)?") for name in ("MPos", "WPos", "WCO")}
_ANY_MOTION = re.compile(r"[Gg]\s*\d|\$\s*[HhJj]")


def error_text(code: int) -> str:
    return ERRORS.get(code, "unknown error")


def alarm_text(code: int) -> str:
    return ALARMS.get(code, "unknown alarm")


def status_fields(line: str) -> tuple[str, dict[str, tuple[float, float, float]]] | None:
    """The state and the position fields (mm) of a status report; None if it is not one."""
    m = _STATUS.fullmatch(line.strip())
    if m is None:
        return None
    fields: dict[str, tuple[float, float, float]] = {}
    for part in m.group(2).split("|")[1:]:
        for name, pattern in _FIELD.items():
            found = pattern.fullmatch(part)
            if found:
                fields[name] = tuple(float(v) for v in found.groups())  # type: ignore[assignment]
    return m.group(1), fields


class GrblDialect:
    """The grbl dialect of the module docstring; one per connection (it keeps the last WCO)."""

    key = "grbl"
    name = "grbl"
    described_in = "drivers/gcode/grbl.py"
    sync_command = "$G"
    describe_command = "$I"
    absolute_command = "G90"
    home_command = "$H"
    after_home_commands: tuple[str, ...] = ("G92.1",)
    finish_command = "G4 P0"
    halt_bytes = FEED_HOLD + SOFT_RESET
    halt_name = "feed hold and soft reset (! then Ctrl-X)"
    restart_bytes = SOFT_RESET
    numbered = False
    banner = BANNER
    report_example = "<Idle|MPos:12.500,3.000,1.500|FS:0,0>"

    def __init__(self) -> None:
        self._wco_mm: tuple[float, float, float] = (0.0, 0.0, 0.0)

    # ---------------------------------------------------------- writing

    def report_request(self) -> bytes:
        return STATUS_QUERY

    @property
    def report_ends_answer(self) -> bool:
        return True

    def frame(self, line: str, number: int) -> str:
        return line

    def renumber(self, last: int) -> str:
        raise NotImplementedError("grbl lines carry no numbers")

    def move(self, *, x_um: float | None, y_um: float | None, z_um: float | None, feed_um_s: float) -> str:
        return linear_move(x_um=x_um, y_um=y_um, z_um=z_um, feed_um_s=feed_um_s)

    def set_position(self, x_um: float, y_um: float, z_um: float) -> str:
        return declare_position(x_um, y_um, z_um)

    def lamp(self, channel: int, level: float) -> str:
        if channel == 0:
            speed = round(level * SPINDLE_MAX_S)
            return f"M3 S{speed}" if speed > 0 else "M5"
        if channel == 1:
            return "M8" if level > 0 else "M9"
        if channel == 2:
            return "M7" if level > 0 else "M9"
        raise ValueError(
            f"grbl has lamp outputs 0 (spindle PWM), 1 (flood, on/off) and 2 (mist, on/off), not {channel}; "
            "check `channel` in [illumination]"
        )

    # ---------------------------------------------------------- reading

    def classify(self, line: str) -> Reply:
        text = line.strip()
        if text == "ok":
            return Reply(ReplyKind.OK, text)
        m = _ERROR.fullmatch(text)
        if m:
            code = int(m.group(1))
            if code == LOCKED_ERROR:
                # Refused because the board sits in its alarm lock: as good as an alarm.
                return Reply(ReplyKind.ALARM, text, f"alarm lock (error {code}: {error_text(code)})")
            return Reply(ReplyKind.ERROR, text, f"error {code}: {error_text(code)}")
        m = _ALARM.fullmatch(text)
        if m:
            code = int(m.group(1))
            return Reply(ReplyKind.ALARM, text, f"alarm {code}: {alarm_text(code)}")
        if _BANNER.fullmatch(text):
            return Reply(ReplyKind.BANNER, text)
        if text.startswith("[GC:"):
            return Reply(ReplyKind.STATE, text)
        if text.startswith("[") and text.endswith("]"):
            return Reply(ReplyKind.INFO, text)
        if text.startswith("$") and "=" in text:
            return Reply(ReplyKind.INFO, text)
        status = status_fields(text)
        if status is not None and ("MPos" in status[1] or "WPos" in status[1]):
            return Reply(ReplyKind.REPORT, text)
        return Reply(ReplyKind.OTHER, text)

    def parse_report(self, line: str) -> Position | None:
        status = status_fields(line)
        if status is None:
            return None
        _, fields = status
        if "WCO" in fields:
            self._wco_mm = fields["WCO"]
        if "WPos" in fields:
            work = fields["WPos"]
        elif "MPos" in fields:
            work = tuple(m - o for m, o in zip(fields["MPos"], self._wco_mm))  # type: ignore[assignment]
        else:
            return None
        return Position(*(mm_to_um(v) for v in work))

    def report_halt(self, line: str) -> str | None:
        status = status_fields(line)
        if status is not None and status[0] == "Alarm":
            return "in alarm (locked until homed)"
        return None

    def damaged_in_transit(self, reply: Reply) -> bool:
        m = _ERROR.fullmatch(reply.text)
        return reply.kind is ReplyKind.ERROR and m is not None and int(m.group(1)) in DAMAGE_ERRORS

    def affects_position(self, line: str) -> bool:
        word = line.strip().upper()
        return word.startswith(("G0", "G1", "G4", "G92", "$H")) and not word.startswith(("G90", "G91", "G17", "G18", "G19"))

    def waits_for_motion(self, line: str) -> bool:
        word = line.strip().upper()
        return word.startswith("$H") or word.startswith("G4")

    def could_move(self, line: str) -> bool:
        # Any G word, homing or jogging; real-time bytes (feed hold, resume) too.
        body = line.split(";", 1)[0].split("(", 1)[0]
        return _ANY_MOTION.search(body) is not None or any(ord(c) in REALTIME_BYTES for c in line)

    def is_banner(self, line: str) -> bool:
        return _BANNER.fullmatch(line.strip()) is not None

    def forget_offsets(self) -> None:
        """After a reset: the offset is re-learnt from the next report that carries it."""
        self._wco_mm = (0.0, 0.0, 0.0)


def status_line(state: str, mpos_um: tuple[float, float, float], *, wco_um: tuple[float, float, float] | None = None,
                feed_mm_min: float = 0.0) -> str:
    """A status report as grbl 1.1 prints it with ``$10=1`` (the board's side)."""
    mpos = ",".join(f"{v / 1000.0:.3f}" for v in mpos_um)
    parts = [state, f"MPos:{mpos}", f"FS:{feed_mm_min:.0f},0"]
    if wco_um is not None:
        parts.append("WCO:" + ",".join(f"{v / 1000.0:.3f}" for v in wco_um))
    return "<" + "|".join(parts) + ">"
