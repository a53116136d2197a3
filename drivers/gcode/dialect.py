"""The G-code dialects a controller board may speak, and its planner's kinematics.

This module describes the wire formats: the driver (:mod:`drivers.gcode.controller`)
writes and reads them through a :class:`Dialect` object, and the simulated board
(:mod:`drivers.sim.controller`) answers in them. Two dialects exist: the RepRap-family
one below (:data:`REPRAP`) and grbl's (:mod:`drivers.gcode.grbl`); which one a board
speaks is found at connect (:mod:`drivers.gcode.detect`) unless ``[stage] dialect`` says.

The RepRap-family dialect (:data:`REPRAP`)
------------------------------------------
Plain ASCII, one command per line ending in ``\\n``; millimetres and mm/min on the wire
(the driver works in micrometres and converts, see :func:`format_mm`). A line is a
command word (a letter G or M and a number, leading zeros allowed: ``G01`` is ``G1``)
followed by parameter words (a letter and an optional number); lower case is read as
upper case. Text after ``;`` is a comment; comment-only and empty lines get no answer.

=========================  ==============================================================
``G90`` / ``G91``          absolute / relative coordinates for the following moves
``G0``/``G1 X Y Z F``      move along a straight line (F: feed rate in mm/min, modal); the
                           named axes only. ``ok`` once the move is queued in the board's
                           planner (when the planner is full, ``ok`` waits for room)
``G28 [X] [Y] [Z]``        home the named axes (all when none are named); ``ok`` when
                           homing has finished; offsets declared with G92 are cleared
``G92 X Y Z``              declare the current position of the named axes (no motion)
``M114``                   the position report ``X:12.500 Y:3.000 Z:1.500`` then ``ok``:
                           where the motors are commanded to be (the end of the last
                           queued move), as common firmware reports it; send ``M400``
                           first for a settled position
``M400``                   ``ok`` once every queued move has finished
``M106 P<ch> S<0-255>``    PWM output ``ch`` (default 0) to duty S (default 255); the lamp
``M107 P<ch>``             PWM output ``ch`` off
``M110 N<n>``              the number of the last line: the next numbered line is n + 1
``M115``                   one or more lines describing the firmware, then ``ok``
                           (optional: a board that refuses it is still usable)
``M112``                   emergency stop, acted on as soon as it arrives (even while an
                           ``M400`` or ``G28`` waits): motion is aborted where it is and
                           the board is halted
``M999``                   restart after a halt: the board reboots (its banner follows,
                           the position is lost)
=========================  ==============================================================

**Numbered lines.** A line may be sent as ``N<n> <command>*<checksum>``: ``n`` one more
than the last line's number, the checksum the XOR of every byte before the ``*``
(:func:`line_checksum`). A numbered line that arrives damaged (checksum wrong, number
out of sequence, no checksum) is not run: the board answers
``Error:<why>, Last Line: <k>``, ``Resend: <k+1>`` and ``ok``, and the driver sends
that line again. The driver numbers its lines by default, so a noisy cable costs a
resend instead of a wrong move; lines without a number are accepted unchecked.

Replies (:meth:`RepRapDialect.classify`):

* ``ok``, possibly followed by text (``ok N12 P15 B3``: line, planner and buffer room),
  ends the answer to an accepted line;
* ``Error:<text>`` refuses a line (it had no effect); some boards follow it with ``ok``,
  so after a refusal the driver re-synchronises. ``echo:Unknown command: "..."`` is a
  refusal too;
* ``Resend: <n>`` asks for line ``n`` again (after a damaged numbered line);
* ``echo:busy: processing`` (or ``busy: ...``): the board is alive, still working on a
  long command (homing, waiting for motion); sent every couple of seconds;
* ``!! <reason>``: the board is halted (after ``M112``); it answers so to every line
  but ``M999``;
* ``start`` is the banner printed on boot and after a reset (the position is lost);
* ``echo:<text>`` and ``//<text>`` are informational lines, at any time;
* the position report: ``X:<mm> Y:<mm> Z:<mm>``, three or more decimals, possibly with
  more fields after it (extruder, step counts: ``E:0.00 Count X:800 Y:400 Z:400``).

The driver relies on: one line in flight at a time, every line answered; ``M400``
answered only once motion has stopped; ``M112`` acted on at once; a position report
that says where the motors were sent.

The planner's kinematics
------------------------
Firmware planners drive each move from rest to rest along a trapezoidal speed profile
(:func:`trapezoid_duration_s`, :func:`trapezoid_travel_um`), with the path speed and
acceleration limited so that no axis exceeds its own (:func:`path_limit`).
"""

from __future__ import annotations

import dataclasses
import math
import re
from collections.abc import Sequence
from enum import StrEnum
from typing import Protocol, runtime_checkable

from drivers.base import Position

UM_PER_MM = 1000.0
_S_PER_MIN = 60.0


# --------------------------------------------------------------------- numbers


def format_mm(value_um: float) -> str:
    """A coordinate on the wire: micrometres as millimetres with four decimals (0.1 um)."""
    return f"{value_um / UM_PER_MM:.4f}"


def format_feed(speed_um_s: float) -> str:
    """A feed rate on the wire: um/s as mm/min with one decimal."""
    return f"{speed_um_s * _S_PER_MIN / UM_PER_MM:.1f}"


def mm_to_um(value_mm: float) -> float:
    return value_mm * UM_PER_MM


def feed_to_um_s(feed_mm_min: float) -> float:
    return feed_mm_min * UM_PER_MM / _S_PER_MIN


# ------------------------------------------------------------------ kinematics


def trapezoid_duration_s(distance_um: float, speed_um_s: float, accel_um_s2: float) -> float:
    """Time of a point-to-point move from rest to rest with limited speed and acceleration.

    Constant-acceleration kinematics: with ramps of length v²/(2a) each, a move longer
    than v²/a takes d/v + v/a; a shorter one never reaches v and takes 2·√(d/a).
    Units: um, um/s, um/s², result in s.
    """
    if distance_um <= 0.0:
        return 0.0
    if distance_um >= speed_um_s**2 / accel_um_s2:
        return distance_um / speed_um_s + speed_um_s / accel_um_s2
    return 2.0 * math.sqrt(distance_um / accel_um_s2)


def trapezoid_travel_um(t_s: float, distance_um: float, speed_um_s: float, accel_um_s2: float) -> float:
    """Distance covered ``t_s`` seconds into the move of :func:`trapezoid_duration_s`."""
    total_s = trapezoid_duration_s(distance_um, speed_um_s, accel_um_s2)
    if t_s <= 0.0:
        return 0.0
    if t_s >= total_s:
        return distance_um
    ramp_s = min(speed_um_s / accel_um_s2, total_s / 2.0)
    if t_s < ramp_s:
        return 0.5 * accel_um_s2 * t_s**2
    if t_s <= total_s - ramp_s:
        return 0.5 * accel_um_s2 * ramp_s**2 + speed_um_s * (t_s - ramp_s)
    return distance_um - 0.5 * accel_um_s2 * (total_s - t_s) ** 2


def path_limit(delta_um: Sequence[float], axis_limits: Sequence[float]) -> float:
    """The largest path speed (or acceleration) at which no axis exceeds its own limit.

    Along a straight line each axis moves the fraction ``|d_i| / length`` of the path, so
    the path may go at ``limit_i * length / |d_i|`` for every moving axis; infinite when
    nothing moves. Units follow ``axis_limits`` (um/s or um/s²).
    """
    length = math.hypot(*delta_um)
    return min((v * length / abs(d) for d, v in zip(delta_um, axis_limits) if d != 0.0), default=math.inf)


# --------------------------------------------------------------------- replies


class ReplyKind(StrEnum):
    OK = "ok"            # the line was accepted; its answer is complete
    ERROR = "error"      # the line was refused and had no effect
    RESEND = "resend"    # the line arrived damaged: send line number ``detail`` again
    BUSY = "busy"        # keep-alive: still working on a long command
    HALT = "halt"        # the board is halted and needs the restart sequence
    ALARM = "alarm"      # the board stopped on an alarm: its position is lost until homed
    BANNER = "banner"    # the board has (re)started and lost its position
    INFO = "info"        # informational, ignorable at any time
    REPORT = "report"    # a position report
    STATE = "state"      # the answer to the sync command (grbl's modal state)
    OTHER = "other"      # not part of the dialect


@dataclasses.dataclass(frozen=True, slots=True)
class Reply:
    kind: ReplyKind
    text: str
    detail: str = ""  # the refusal's text (ERROR), the halt's or alarm's reason, the line to resend


@runtime_checkable
class Dialect(Protocol):
    """What the driver needs to know of a controller's language; see the module docstring.

    Positions are micrometres and speeds um/s on this side; the dialect converts. A
    dialect object may keep what its reports leave implicit (grbl's work offset), so
    each connection has its own (:func:`drivers.gcode.detect.make_dialect`).
    """

    key: str                   # the name in ``[stage] dialect``
    name: str                  # for messages: "the <name> dialect described in <described_in>"
    described_in: str          # repository path of the module documenting it
    report_example: str        # a well-formed position report, for messages
    sync_command: str          # answered by a STATE or REPORT line, then ok: re-synchronises
    describe_command: str      # asks the firmware to describe itself (may be refused)
    absolute_command: str      # absolute coordinates for the following moves
    home_command: str          # home all axes; answered when homing has finished
    after_home_commands: tuple[str, ...]  # sent after homing: clear leftover coordinate offsets
    finish_command: str        # answered once every queued move has finished
    halt_bytes: bytes          # emergency stop, acted on at once
    halt_name: str             # the emergency stop, for messages
    restart_bytes: bytes       # leave the halted state: answered by ok or the banner
    numbered: bool             # whether lines can carry numbers and checksums

    def report_request(self) -> bytes:
        """The bytes that ask for a position report (a line, or a real-time byte)."""
        ...

    @property
    def report_ends_answer(self) -> bool:
        """Whether the report is the whole answer (no ok follows it)."""
        ...

    def frame(self, line: str, number: int) -> str:
        """``line`` as numbered line ``number`` with its checksum (numbered dialects)."""
        ...

    def renumber(self, last: int) -> str:
        """The line that makes ``last`` the number of the last line (numbered dialects)."""
        ...

    def move(self, *, x_um: float | None, y_um: float | None, z_um: float | None, feed_um_s: float) -> str:
        """A straight move of the given axes (None: not named) at the path speed ``feed_um_s``."""
        ...

    def set_position(self, x_um: float, y_um: float, z_um: float) -> str:
        """Declare the current position without moving."""
        ...

    def lamp(self, channel: int, level: float) -> str:
        """Drive lamp output ``channel`` to ``level`` (0..1; 0 is off)."""
        ...

    def classify(self, line: str) -> Reply: ...

    def parse_report(self, line: str) -> Position | None:
        """The position in a report line, or None when the line is not a (readable) report."""
        ...

    def report_halt(self, line: str) -> str | None:
        """Why the board is halted, when its report says so (grbl's Alarm state); else None."""
        ...

    def damaged_in_transit(self, reply: Reply) -> bool:
        """Whether a refusal of a well-formed line means it arrived damaged (safe to resend)."""
        ...

    def affects_position(self, line: str) -> bool:
        """Whether, if this line's answer goes wrong, where the stage is becomes unknown."""
        ...

    def waits_for_motion(self, line: str) -> bool:
        """Whether this line is answered only after motion ends (needs the move timeout)."""
        ...

    def could_move(self, line: str) -> bool:
        """Whether a line typed by a person might move an axis (refused outside the motion rules)."""
        ...

    def is_banner(self, line: str) -> bool:
        """Whether ``line`` is this dialect's start-up banner (used to tell dialects apart)."""
        ...


def linear_move(*, x_um: float | None, y_um: float | None, z_um: float | None, feed_um_s: float) -> str:
    """``G1`` naming the given axes, in millimetres, at the feed rate: the same in every dialect."""
    words = [f"{axis}{format_mm(value)}" for axis, value in zip("XYZ", (x_um, y_um, z_um)) if value is not None]
    return f"G1 {' '.join(words)} F{format_feed(feed_um_s)}"


def declare_position(x_um: float, y_um: float, z_um: float) -> str:
    """``G92`` with all three axes: the same in every dialect."""
    return f"G92 X{format_mm(x_um)} Y{format_mm(y_um)} Z{format_mm(z_um)}"


def line_checksum(text: str) -> int:
    """The RepRap line checksum: XOR of the bytes of ``text`` (everything before ``*``)."""
    value = 0
    for byte in text.encode("ascii", errors="replace"):
        value ^= byte
    return value


# ---------------------------------------------------------------- commands


class CommandSyntaxError(ValueError):
    """A line that is not a command of the dialect; the text is the ``Error:`` reply."""


@dataclasses.dataclass(frozen=True, slots=True)
class Command:
    word: str                          # "G1", "M114": letter and number without leading zeros
    params: dict[str, float | None]    # parameter letter -> number (None: letter alone)


@dataclasses.dataclass(frozen=True, slots=True)
class NumberedLine:
    """What a board reads off a line that may carry ``N<n>`` and ``*<checksum>``."""

    body: str              # the command, without number and checksum
    number: int | None     # None: the line had no number
    checksum_ok: bool      # False: wrong or missing checksum on a numbered line (or a stray one)
    problem: str = ""      # why the line cannot be taken, for the Error: reply


_WORD = re.compile(r"\s*([A-Z])([-+]?(?:\d+(?:\.\d*)?|\.\d+))?")
_COMMAND_WORD = re.compile(r"\s*(?:[Nn]\d+\s*)?([GMgm])0*(\d+)")
_REPORT = re.compile(r"X:\s*(-?\d+(?:\.\d+)?)\s+Y:\s*(-?\d+(?:\.\d+)?)\s+Z:\s*(-?\d+(?:\.\d+)?)")
_EMERGENCY_STOP = re.compile(r"(?:N\d+\s*)?M0*112(\s.*|;.*|\*\d+)?")
_ANY_G_WORD = re.compile(r"[Gg]\s*\d")
_RESEND = re.compile(r"(?:Resend|rs)\s*:?\s*N?(\d+)", re.IGNORECASE)
_NUMBERED = re.compile(r"\s*N(\d+)\s*(.*?)\s*(?:\*(\d*))?\s*$", re.IGNORECASE | re.DOTALL)
_LAST_LINE = re.compile(r"Last Line\s*:?\s*\d+", re.IGNORECASE)
_UNKNOWN = re.compile(r"echo:\s*unknown command", re.IGNORECASE)
_BUSY = re.compile(r"(?:echo:)?\s*busy:", re.IGNORECASE)
# Refusals of a well-formed line that only damage on the way can explain.
_DAMAGE_WORDS = ("cannot read", "unknown command", "given twice", "does not take", "needs a number")


class RepRapDialect:
    """The RepRap-family dialect of the module docstring.

    The driver uses the :class:`Dialect` part; the rest (:meth:`parse_command`,
    :meth:`read_numbered` and the reply builders) is the board's side, used by the
    simulated board.
    """

    key = "reprap"
    name = "RepRap-style G-code"
    described_in = "drivers/gcode/dialect.py"
    probe_command = "M114"
    sync_command = "M114"
    describe_command = "M115"
    absolute_command = "G90"
    relative_command = "G91"
    home_command = "G28"
    after_home_commands: tuple[str, ...] = ()
    finish_command = "M400"
    halt_command = "M112"
    halt_bytes = b"M112\n"
    halt_name = "M112"
    restart_command = "M999"
    restart_bytes = b"M999\n"
    renumber_command = "M110"
    numbered = True
    banner = "start"
    ok = "ok"
    busy_line = "echo:busy: processing"
    _AFFECTS_POSITION = frozenset({"G0", "G1", "G28", "G92", "M400"})
    _WAITS_FOR_MOTION = frozenset({"G28", "M400"})

    @property
    def report_example(self) -> str:
        return self.report_line(12500.0, 3000.0, 1500.0)

    # ---------------------------------------------------------- writing

    def report_request(self) -> bytes:
        return f"{self.probe_command}\n".encode("ascii")

    @property
    def report_ends_answer(self) -> bool:
        return False

    def frame(self, line: str, number: int) -> str:
        head = f"N{number} {line}"
        return f"{head}*{line_checksum(head)}"

    def renumber(self, last: int) -> str:
        return f"{self.renumber_command} N{last}"

    def move(self, *, x_um: float | None, y_um: float | None, z_um: float | None, feed_um_s: float) -> str:
        return linear_move(x_um=x_um, y_um=y_um, z_um=z_um, feed_um_s=feed_um_s)

    def set_position(self, x_um: float, y_um: float, z_um: float) -> str:
        return declare_position(x_um, y_um, z_um)

    def lamp(self, channel: int, level: float) -> str:
        duty = round(level * 255)
        return f"M106 P{channel} S{duty}" if duty > 0 else f"M107 P{channel}"

    # ---------------------------------------------------------- reading

    def classify(self, line: str) -> Reply:
        text = line.strip()
        if text == "ok" or text.startswith("ok "):
            return Reply(ReplyKind.OK, text)
        if text.startswith("Error:") and _LAST_LINE.search(text):
            # A damaged numbered line: the Resend request that follows says which to send.
            return Reply(ReplyKind.RESEND, text)
        if text.startswith("Error:"):
            return Reply(ReplyKind.ERROR, text, text[len("Error:"):].strip())
        if _UNKNOWN.match(text):
            return Reply(ReplyKind.ERROR, text, text.split(":", 1)[1].strip())
        resend = _RESEND.fullmatch(text)
        if resend:
            return Reply(ReplyKind.RESEND, text, resend.group(1))
        if _BUSY.match(text):
            return Reply(ReplyKind.BUSY, text)
        if text.startswith("!!"):
            return Reply(ReplyKind.HALT, text, text[2:].strip() or "halted")
        if text == self.banner:
            return Reply(ReplyKind.BANNER, text)
        if text.startswith("echo:") or text.startswith("//"):
            return Reply(ReplyKind.INFO, text)
        if _REPORT.search(text):
            return Reply(ReplyKind.REPORT, text)
        return Reply(ReplyKind.OTHER, text)

    def parse_report(self, line: str) -> Position | None:
        m = _REPORT.search(line)
        if m is None:
            return None
        x, y, z = (mm_to_um(float(v)) for v in m.groups())
        return Position(x, y, z)

    def report_halt(self, line: str) -> str | None:
        return None

    def damaged_in_transit(self, reply: Reply) -> bool:
        detail = reply.detail.lower()
        return reply.kind is ReplyKind.ERROR and any(word in detail for word in _DAMAGE_WORDS)

    def is_banner(self, line: str) -> bool:
        return line.strip() == self.banner

    @staticmethod
    def command_word(line: str) -> str:
        """``"G1"`` for ``"g01 x1"`` (or ``"N7 G1 X1*3"``); ``""`` without a G or M word."""
        m = _COMMAND_WORD.match(line)
        return f"{m.group(1).upper()}{m.group(2)}" if m else ""

    def affects_position(self, line: str) -> bool:
        return self.command_word(line) in self._AFFECTS_POSITION

    def waits_for_motion(self, line: str) -> bool:
        return self.command_word(line) in self._WAITS_FOR_MOTION

    def could_move(self, line: str) -> bool:
        # Any G word anywhere before a comment, whatever precedes it (line numbers, other
        # words): every motion command of the dialect is a G command.
        return _ANY_G_WORD.search(line.split(";", 1)[0]) is not None

    # ------------------------------------------------------ the board's side

    @staticmethod
    def read_numbered(line: str) -> NumberedLine:
        """Split ``N<n> <body>*<checksum>`` and check it; plain lines pass through unchecked."""
        text = line.strip()
        m = _NUMBERED.fullmatch(text)
        if m is None:
            if "*" in text.split(";", 1)[0]:
                return NumberedLine(text.split("*", 1)[0].strip(), None, False, "No Line Number with checksum")
            return NumberedLine(text, None, True)
        number, body, given = int(m.group(1)), m.group(2), m.group(3)
        if given is None or given == "":
            return NumberedLine(body, number, False, "No Checksum with line number")
        head = text[: text.rindex("*")]
        if int(given) != line_checksum(head):
            return NumberedLine(body, number, False, "checksum mismatch")
        return NumberedLine(body, number, True)

    def parse_command(self, line: str) -> Command | None:
        """The command on ``line``; None for an empty or comment-only line.

        Raises :class:`CommandSyntaxError` for anything else that is not a command word
        followed by distinct parameter words.
        """
        body = line.split(";", 1)[0].strip().upper()
        if not body:
            return None
        words: list[tuple[str, str | None]] = []
        pos = 0
        while pos < len(body):
            m = _WORD.match(body, pos)
            if m is None or m.end() == pos:
                raise CommandSyntaxError(f"cannot read '{line}'")
            words.append((m.group(1), m.group(2)))
            pos = m.end()
        (letter, number), *rest = words
        if letter not in "GM" or number is None or not number.isdigit():
            raise CommandSyntaxError(f"cannot read '{line}': a line starts with a G or M command")
        params: dict[str, float | None] = {}
        for key, value in rest:
            if key in params:
                raise CommandSyntaxError(f"'{key}' given twice in '{line}'")
            params[key] = float(value) if value is not None else None
        return Command(f"{letter}{int(number)}", params)

    @staticmethod
    def is_emergency_stop(line: str) -> bool:
        """Whether ``line`` is ``M112``: boards look for it as lines arrive, before queueing."""
        return _EMERGENCY_STOP.fullmatch(line.strip().upper()) is not None

    @staticmethod
    def error_reply(text: str) -> str:
        return f"Error:{text}"

    @staticmethod
    def resend_reply(number: int) -> str:
        return f"Resend: {number}"

    @staticmethod
    def numbered_ok(number: int, planner_free: int, buffer_free: int) -> str:
        """``ok`` with the line number and the room left in planner and input buffer."""
        return f"ok N{number} P{planner_free} B{buffer_free}"

    @staticmethod
    def halt_reply(reason: str) -> str:
        return f"!! {reason}"

    @staticmethod
    def info_reply(text: str) -> str:
        return f"echo:{text}"

    @staticmethod
    def report_line(x_um: float, y_um: float, z_um: float, *, extra: str = "") -> str:
        """The position report, three decimals of a millimetre as common firmware prints.

        ``extra``: fields some firmware appends (extruder, step counts).
        """
        x, y, z = (v / UM_PER_MM for v in (x_um, y_um, z_um))
        line = f"X:{x:.3f} Y:{y:.3f} Z:{z:.3f}"
        return f"{line} {extra}" if extra else line


REPRAP = RepRapDialect()
