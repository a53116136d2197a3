"""The simulated G-code controller, spoken to over its pseudo-terminal by a bare pyserial
client: both dialects, kinematics on the clock, backlash, travel limits and injected
faults (every fault in both dialects). What real boards do is from memory where marked."""

from __future__ import annotations

import math
import os
import re
from collections.abc import Iterator

import pytest
import serial

from drivers.base import Position
from drivers.clock import ScaledClock
from drivers.gcode import grbl
from drivers.gcode.dialect import REPRAP, line_checksum
from drivers.sim.controller import BANNER, GcodeEmulator
from drivers.sim.grbl_board import UNLOCK_MESSAGE
from tests.gcode_rig import FOCUS, MOTION, STAGE, RawClient, wait_until

pytestmark = pytest.mark.timeout(30)

V_XY = STAGE.xy_speed_um_s
A_XY = STAGE.xy_accel_um_s2


def trapezoid_time_s(d_um: float, v: float, a: float) -> float:
    # Constant-acceleration kinematics (common practice): ramps of v/a s each, cruise in
    # between; a move shorter than v^2/a never reaches v and takes 2*sqrt(d/a).
    return d_um / v + v / a if d_um >= v * v / a else 2.0 * math.sqrt(d_um / a)


def make(
    clock: ScaledClock, start: Position | None = None, *, dialect: str = "reprap", busy_interval_s: float = math.inf
) -> tuple[GcodeEmulator, RawClient]:
    emulator = GcodeEmulator(
        clock=clock, stage=STAGE, focus=FOCUS, motion=MOTION, start=start, dialect=dialect,
        busy_interval_s=busy_interval_s,
    )
    client = RawClient(emulator.start())
    return emulator, client


Board = tuple[GcodeEmulator, RawClient, ScaledClock]
FAST_SPEED = 200.0
FROZEN_SPEED = 1e-6  # a clock that only moves when the test advances it, for exact kinematics


def serve(speed: float, dialect: str = "reprap") -> Iterator[Board]:
    clock = ScaledClock(speed=speed, start_s=1_772_442_000.0)
    emulator, client = make(clock, dialect=dialect)
    yield emulator, client, clock
    client.close()
    emulator.stop()


@pytest.fixture
def fast() -> Iterator[Board]:
    yield from serve(FAST_SPEED)


@pytest.fixture
def frozen() -> Iterator[Board]:
    yield from serve(FROZEN_SPEED)


# The report common printer firmware gives (from memory): axes, then extruder and step counts.
REPORT = re.compile(r"^X:(-?\d+\.\d{3}) Y:(-?\d+\.\d{3}) Z:(-?\d+\.\d{3}) E:0\.00 Count X:(-?\d+) Y:(-?\d+) Z:(-?\d+)$")


def report(client: RawClient) -> tuple[float, float, float]:
    lines = client.ask("M114")
    assert lines[-1] == "ok" and len(lines) == 2, lines
    m = REPORT.match(lines[0])
    assert m, lines[0]
    x, y, z = (float(v) for v in m.groups()[:3])
    # The step counts agree with the axes at 80/80/400 steps per mm.
    assert [int(v) for v in m.groups()[3:]] == [round(x * 80), round(y * 80), round(z * 400)]
    return x, y, z


def test_absolute_and_relative_moves_report_position(fast):
    emulator, client, _ = fast
    assert client.ask("G90") == ["ok"]
    assert client.ask("G1 X10 Y5 Z1 F30000") == ["ok"]
    assert client.ask("M400") == ["ok"]
    assert report(client) == (10.0, 5.0, 1.0)
    assert client.ask("G91") == ["ok"]
    assert client.ask("G1 X1.5 Z0.25") == ["ok"]
    assert client.ask("G0 Y-2") == ["ok"]
    assert client.ask("M400") == ["ok"]
    assert report(client) == (11.5, 3.0, 1.25)
    here = emulator.physical_position()
    assert (here.x_um, here.y_um, here.z_um) == pytest.approx((11500.0, 3000.0, 1250.0), abs=1e-6)


def test_move_follows_trapezoidal_profile_on_the_clock(frozen):
    emulator, client, clock = frozen
    assert client.ask("G1 X20 F600000") == ["ok"]
    total_s = trapezoid_time_s(20000.0, V_XY, A_XY)  # 2.5 s cruise + 0.2 s of ramps
    ramp_s = V_XY / A_XY
    clock.advance(ramp_s)
    # End of the acceleration ramp: s = a t^2 / 2 (kinematics, common practice).
    assert emulator.physical_position().x_um == pytest.approx(0.5 * A_XY * ramp_s**2, abs=0.5)
    clock.advance(total_s / 2 - ramp_s)
    assert emulator.physical_position().x_um == pytest.approx(10000.0, abs=0.5)  # symmetric profile
    client.send("M400")
    assert client.silent_for(0.15), "M400 answered while the move still runs"
    clock.advance(total_s / 2 + 0.01)
    assert client.read_line() == b"ok"
    assert emulator.physical_position().x_um == pytest.approx(20000.0, abs=1e-6)


def test_short_move_never_reaches_full_speed(frozen):
    emulator, client, clock = frozen
    assert client.ask("G1 Y1") == ["ok"]
    total_s = trapezoid_time_s(1000.0, V_XY, A_XY)
    assert total_s == pytest.approx(2 * math.sqrt(1000.0 / A_XY))
    clock.advance(total_s * 0.999)
    assert emulator.physical_position().y_um < 1000.0
    clock.advance(total_s * 0.002)
    assert emulator.physical_position().y_um == pytest.approx(1000.0, abs=1e-6)


def test_feed_rate_limits_speed(frozen):
    emulator, client, clock = frozen
    # F60 mm/min = 1 mm/s, below the axis limit of 8 mm/s: the feed rate sets the speed.
    assert client.ask("G1 X2 F60") == ["ok"]
    clock.advance(trapezoid_time_s(2000.0, 1000.0, A_XY) / 2)
    assert emulator.physical_position().x_um == pytest.approx(1000.0, abs=0.5)


def test_focus_drive_has_backlash(fast):
    emulator, client, _ = fast
    backlash = MOTION.z_backlash_um

    def settle_z(line: str) -> float:
        assert client.ask(line) == ["ok"]
        assert client.ask("M400") == ["ok"]
        return emulator.physical_position().z_um

    # Play model of a lead screw (common practice): moving up, the mechanics follow the
    # motor; after a move down they trail above it by the backlash.
    assert settle_z("G1 Z1.5") == pytest.approx(1500.0, abs=1e-6)
    assert settle_z("G1 Z1.4") == pytest.approx(1400.0 + backlash, abs=1e-6)
    # Reversing by less than the play moves the motor only.
    assert settle_z("G1 Z1.403") == pytest.approx(1400.0 + backlash, abs=1e-6)
    assert settle_z("G1 Z1.41") == pytest.approx(1410.0, abs=1e-6)
    assert report(client)[2] == 1.41  # the firmware knows only the motor position


def test_travel_beyond_the_mechanics_is_refused_without_motion(fast):
    emulator, client, _ = fast
    before = emulator.physical_position()
    hard_z_mm = (FOCUS.z_safe_max_um + MOTION.z_crash_margin_um) / 1000.0
    reply = client.ask(f"G1 Z{hard_z_mm + 0.01:.3f}")
    assert len(reply) == 1 and reply[0].startswith("Error:") and "travel" in reply[0]
    reply = client.ask("G1 X-2.5")
    assert reply[0].startswith("Error:")
    assert client.ask("M400") == ["ok"]
    assert emulator.physical_position() == before
    assert report(client) == (0.0, 0.0, 0.0)
    # Inside the mechanical travel (beyond the soft limit, which only the driver enforces).
    assert client.ask("G1 X-1.5") == ["ok"]


def test_unknown_and_unreadable_lines_get_an_error_and_no_ok(fast):
    _, client, _ = fast
    assert client.ask("M42 P3") == ["Error:unknown command 'M42'"]
    assert client.ask("HELLO")[0].startswith("Error:cannot read")
    assert client.ask("G1 X1 X2")[0].startswith("Error:")
    assert client.ask("G1 E5")[0] == "Error:G1 does not take 'E'"
    # No stray ok was left behind: the next reply is the report's own.
    assert report(client) == (0.0, 0.0, 0.0)
    # Comments and empty lines: ignored, unanswered.
    client.send("; a comment")
    client.send("")
    assert client.silent_for(0.1)
    assert client.ask("G4 P0 ; dwell is not in this dialect")[0].startswith("Error:unknown command")


def test_pwm_outputs_drive_the_lamp(fast):
    emulator, client, _ = fast
    assert client.ask("M106 P2 S128") == ["ok"]
    assert emulator.lamp_level(2) == pytest.approx(128 / 255)
    assert emulator.lamp_level(0) == 0.0
    assert client.ask("M106") == ["ok"]
    assert emulator.lamp_level(0) == 1.0
    assert client.ask("M107 P2") == ["ok"]
    assert emulator.lamp_level(2) == 0.0
    assert client.ask("M106 P9 S10")[0].startswith("Error:")
    assert client.ask("M106 P1 S300")[0].startswith("Error:")


def test_homing_goes_z_first_then_xy():
    clock = ScaledClock(speed=1e-6, start_s=1_772_442_000.0)
    emulator, client = make(clock, start=Position(50000.0, 30000.0, 1200.0))
    try:
        client.send("G28")
        assert wait_until(lambda: any(line == "G28" for _, line in emulator.received))
        z_time_s = trapezoid_time_s(1200.0, FOCUS.z_speed_um_s, FOCUS.z_accel_um_s2)
        clock.advance(z_time_s / 2)
        mid = emulator.physical_position()
        assert (mid.x_um, mid.y_um) == (50000.0, 30000.0)  # x and y wait for z
        # Half-way down in time is half-way in distance; going down, the mechanics trail
        # the motor by the backlash.
        assert mid.z_um == pytest.approx(600.0 + MOTION.z_backlash_um, abs=0.5)
        assert client.silent_for(0.1)  # G28 answers only when homing is done
        xy_um = math.hypot(50000.0, 30000.0)
        clock.advance(z_time_s / 2 + trapezoid_time_s(xy_um, V_XY * xy_um / 50000.0, A_XY * xy_um / 50000.0) + 0.01)
        assert client.read_line() == b"ok"
        assert emulator.physical_position() == Position(0.0, 0.0, 0.0)
        assert report(client) == (0.0, 0.0, 0.0)
    finally:
        client.close()
        emulator.stop()


def test_set_position_shifts_coordinates_not_mechanics(fast):
    emulator, client, _ = fast
    assert client.ask("G92 X1") == ["ok"]
    assert report(client) == (1.0, 0.0, 0.0)
    assert emulator.physical_position().x_um == 0.0
    assert client.ask("G1 X3") == ["ok"]
    assert client.ask("M400") == ["ok"]
    assert emulator.physical_position().x_um == pytest.approx(2000.0, abs=1e-6)
    assert client.ask("G92")[0].startswith("Error:")


def test_emergency_stop_halts_until_restart(fast):
    emulator, client, _ = fast
    assert client.ask("G1 X100 F60") == ["ok"]  # 100 s on the clock: 0.5 s here
    client.send("M400")
    assert wait_until(lambda: emulator.received[-1][1] == "M400")
    assert client.silent_for(0.01)
    client.send("M112")
    first = client.read_line()
    assert first is not None and first.startswith(b"!! emergency stop")
    stopped = emulator.physical_position()
    assert 0.0 < stopped.x_um < 100000.0
    assert client.silent_for(0.15)  # the aborted M400 is never answered
    assert emulator.physical_position() == stopped
    assert client.ask("M114")[0].startswith("!! ")
    assert client.ask("G1 X1")[0].startswith("!! ")
    # Restarting after a halt reboots the board (from memory): banner, position lost.
    client.send("M999")
    assert client.read_line() == BANNER.encode()
    assert client.read_line().startswith(b"echo:")
    assert client.ask("M114")[-1] == "ok"
    assert report(client) == (0.0, 0.0, 0.0)


def test_received_lines_carry_clock_times(fast):
    emulator, client, clock = fast
    before = clock.now()
    client.ask("M114")
    t, line = emulator.received[-1]
    assert line == "M114"
    assert before <= t <= clock.now()


# ------------------------------------------------------ both dialects, every fault


class Wire:
    """The same questions asked of the board in either dialect."""

    def __init__(self, dialect: str, client: RawClient) -> None:
        self.dialect = dialect
        self.client = client
        self.finish = "M400" if dialect == "reprap" else "G4 P0"

    def position(self) -> tuple[float, float, float]:
        if self.dialect == "reprap":
            return report(self.client)
        parsed = grbl.GrblDialect().parse_report(self.client.status())
        assert parsed is not None
        return (round(parsed.x_um) / 1000.0, round(parsed.y_um) / 1000.0, round(parsed.z_um) / 1000.0)

    def move(self, words: str) -> list[str]:
        return self.client.ask(f"G1 {words} F30000")

    def banner(self) -> bytes:
        return (BANNER if self.dialect == "reprap" else grbl.BANNER).encode()

    def unlock(self) -> None:
        if self.dialect == "grbl":
            assert self.client.ask("$X") == ["[MSG:Caution: Unlocked]", "ok"]


def open_board(dialect: str, speed: float) -> tuple[GcodeEmulator, RawClient, ScaledClock, Wire]:
    clock = ScaledClock(speed=speed, start_s=1_772_442_000.0)
    emulator, client = make(clock, dialect=dialect)
    wire = Wire(dialect, client)
    wire.unlock()
    return emulator, client, clock, wire


@pytest.fixture(params=["reprap", "grbl"])
def fast_board(request):
    emulator, client, clock, wire = open_board(request.param, 200.0)
    yield emulator, client, clock, wire
    client.close()
    emulator.stop()


@pytest.fixture(params=["reprap", "grbl"])
def frozen_board(request):
    emulator, client, clock, wire = open_board(request.param, 1e-6)
    yield emulator, client, clock, wire
    client.close()
    emulator.stop()


def test_fault_reset_mid_move(frozen_board):
    emulator, client, clock, wire = frozen_board
    assert wire.move("X20 Z1") == ["ok"]
    clock.advance(trapezoid_time_s(20000.0, V_XY, A_XY) / 2)
    emulator.inject("reset")
    assert client.read_line() == wire.banner()
    info = client.read_line()
    assert info is not None and info.startswith(b"echo:" if wire.dialect == "reprap" else b"[MSG:")
    stopped = emulator.physical_position()
    assert 0.0 < stopped.x_um < 20000.0
    clock.advance(100.0)
    assert emulator.physical_position() == stopped  # the move was aborted, not resumed
    assert wire.position() == (0.0, 0.0, 0.0)  # the firmware forgot where it was
    if wire.dialect == "grbl":
        # Power-up with homing enabled: locked until $H or $X (from memory).
        assert client.ask("G1 X1 F600") == ["error:9"]
        wire.unlock()
    assert wire.move("X1") == ["ok"]
    clock.advance(10.0)
    assert emulator.physical_position().x_um == pytest.approx(stopped.x_um + 1000.0, abs=1e-6)


def test_fault_disconnect_and_reconnect(fast_board):
    emulator, client, _, wire = fast_board
    link = emulator.link_path
    first_pty = emulator.device_path
    emulator.inject("disconnect")
    assert not os.path.exists(link)
    with pytest.raises(serial.SerialException):
        for _ in range(50):  # bounded: the first read after the hang-up fails
            client.port.read(1)
            client.port.write(b"M114\n")
    client.close()
    assert emulator.reconnect() == link
    assert os.path.exists(link) and os.path.realpath(link) == emulator.device_path
    fresh = RawClient(link)
    try:
        assert Wire(wire.dialect, fresh).position() == (0.0, 0.0, 0.0)
    finally:
        fresh.close()
    assert first_pty is not None


def test_fault_garble_corrupts_one_reply(fast_board):
    emulator, client, _, wire = fast_board
    emulator.inject("garble")
    if wire.dialect == "reprap":
        client.send("M114")
    else:
        client.send_bytes(b"?")
    noise = client.read_line()
    assert noise is not None and noise and all(b >= 0x80 for b in noise)
    if wire.dialect == "reprap":
        assert client.read_line() == b"ok"  # the rest of that reply is intact
    assert wire.position() == (0.0, 0.0, 0.0)


def test_fault_drop_reply_loses_one_reply(fast_board):
    emulator, client, _, wire = fast_board
    emulator.inject("drop_reply")
    client.send("M106 S255" if wire.dialect == "reprap" else "M3 S1000")
    assert client.silent_for(0.2)
    assert emulator.lamp_level() == 1.0  # the command itself was carried out
    assert wire.position() == (0.0, 0.0, 0.0)


def test_fault_stall_blocks_the_finish_barrier_until_cleared(fast_board):
    emulator, client, _, wire = fast_board
    emulator.inject("stall")
    assert wire.move("X10") == ["ok"]
    client.send(wire.finish)
    assert client.silent_for(0.3)  # the move itself takes 7 ms here
    # It jammed half-way in time, which is half-way in distance (symmetric profile).
    assert emulator.physical_position().x_um == pytest.approx(5000.0, abs=0.5)
    emulator.clear_faults()
    assert client.read_line() == b"ok"
    assert emulator.physical_position().x_um == pytest.approx(10000.0, abs=1e-6)


def test_fault_corrupt_line_is_not_run(fast_board):
    emulator, client, _, wire = fast_board
    emulator.inject("corrupt_line")
    reply = wire.move("X10")
    # An unnumbered line with a noise byte is refused whole: no motion (a damaged line
    # that still reads as another command is what numbered lines are for).
    assert reply[0].startswith("Error:" if wire.dialect == "reprap" else "error:"), reply
    assert client.ask(wire.finish) == ["ok"]
    assert emulator.physical_position().x_um == 0.0
    assert any("\ufffd" in line for _, line in emulator.received)


def test_fault_corrupt_numbered_line_is_asked_for_again(fast):
    emulator, client, _ = fast
    assert client.ask("M110 N0") == ["ok"]
    line = REPRAP.frame("G1 X10 F30000", 1)
    emulator.inject("corrupt_line")
    # Marlin-style (from memory): the error names the last good line, then Resend and ok.
    assert client.ask(line) == ["Error:checksum mismatch, Last Line: 0"]
    assert client.read_line() == b"Resend: 1"
    assert client.read_line() == b"ok"
    assert client.ask("M400") == ["ok"]
    assert emulator.physical_position().x_um == 0.0  # the damaged line did not run
    reply = client.ask(line)
    assert reply[0].startswith("ok N1 P") and " B" in reply[0]  # ok with line, planner, buffer
    assert client.ask("M400") == ["ok"]
    assert emulator.physical_position().x_um == pytest.approx(10000.0, abs=1e-6)


def test_unknown_fault_name_is_refused(fast):
    emulator, _, _ = fast
    with pytest.raises(ValueError, match="unknown fault"):
        emulator.inject("flood")


def test_stop_removes_the_link():
    clock = ScaledClock(speed=100.0)
    emulator = GcodeEmulator(clock=clock, stage=STAGE, focus=FOCUS, motion=MOTION)
    link = emulator.start()
    assert os.path.islink(link)
    emulator.stop()
    assert not os.path.exists(link)


def test_planner_holds_sixteen_moves_then_ok_waits_for_room(frozen):
    emulator, client, clock = frozen
    for i in range(1, 17):
        assert client.ask(f"G1 X{i}") == ["ok"]
    client.send("G1 X17")
    assert client.silent_for(0.1)  # full: the 17th is acknowledged once a move has finished
    clock.advance(trapezoid_time_s(1000.0, V_XY, A_XY) + 0.001)
    assert client.read_line() == b"ok"


# ------------------------------------------------------------ numbered lines (reprap)


def test_checksum_is_the_xor_of_the_bytes_before_the_star():
    # RepRap line checksum (from memory): XOR of every character up to the '*'.
    assert line_checksum("N1 G1 X10") == (ord("N") ^ ord("1") ^ ord(" ") ^ ord("G") ^ ord("1") ^ ord(" ")
                                          ^ ord("X") ^ ord("1") ^ ord("0"))
    assert REPRAP.frame("M114", 7) == f"N7 M114*{line_checksum('N7 M114')}"


def test_numbered_lines_must_follow_each_other(fast):
    emulator, client, _ = fast
    assert client.ask("M110 N41") == ["ok"]
    assert client.ask(REPRAP.frame("G90", 42))[0].startswith("ok N42")
    # Skipped a number: refused, the next expected one asked for.
    assert client.ask(REPRAP.frame("G1 X5 F600", 44)) == ["Error:Line Number is not Last Line Number+1, Last Line: 42"]
    assert client.read_line() == b"Resend: 43"
    assert client.read_line() == b"ok"
    # A number without a checksum, a checksum without a number.
    assert client.ask("N43 G1 X5")[0] == "Error:No Checksum with line number, Last Line: 42"
    assert client.read_line() == b"Resend: 43"
    assert client.read_line() == b"ok"
    assert client.ask("G1 X5*12")[0].startswith("Error:No Line Number with checksum")
    assert client.read_line() == b"Resend: 43"
    assert client.read_line() == b"ok"
    assert client.ask("M400") == ["ok"]
    assert emulator.physical_position().x_um == 0.0
    # Unnumbered lines are still taken, unchecked.
    assert client.ask("M114")[-1] == "ok"
    # What was received is recorded without number and checksum.
    assert "G90" in [line for _, line in emulator.received]


def test_numbered_emergency_stop_acts_at_once(fast):
    emulator, client, _ = fast
    assert client.ask("M110 N0") == ["ok"]
    client.send(REPRAP.frame("M112", 1))
    assert client.read_line().startswith(b"!! emergency stop")


def test_long_waits_send_busy_keepalives():
    clock = ScaledClock(speed=1e-6, start_s=1_772_442_000.0)
    emulator, client = make(clock, busy_interval_s=2.0)
    try:
        assert client.ask("G1 X100 F600") == ["ok"]  # 10 mm/s: 10 s on the clock
        client.send("M400")
        assert wait_until(lambda: emulator.received[-1][1] == "M400")
        busy = []
        for _ in range(3):
            clock.advance(2.5)
            line = client.read_line(keep_busy=True)
            busy.append(line)
        # Keep-alive while the board works on a long command (from memory: Marlin's
        # "busy: processing", every 2 s by default).
        assert busy == [b"echo:busy: processing"] * 3
        clock.advance(10.0)
        assert client.read_line(keep_busy=True) == b"ok"
    finally:
        client.close()
        emulator.stop()


# --------------------------------------------------------------------- grbl


@pytest.fixture
def grbl_fast() -> Iterator[Board]:
    yield from serve(FAST_SPEED, "grbl")


@pytest.fixture
def grbl_frozen() -> Iterator[Board]:
    yield from serve(FROZEN_SPEED, "grbl")


STATUS = re.compile(r"^<(\w+(?::\d)?)\|MPos:(-?\d+\.\d{3}),(-?\d+\.\d{3}),(-?\d+\.\d{3})\|FS:\d+,0(\|WCO:[-\d.,]+)?>$")


def test_grbl_boots_locked_and_unlocks(grbl_fast):
    emulator, client, _ = grbl_fast
    status = client.status()
    assert STATUS.match(status) and status.startswith("<Alarm|"), status
    assert client.ask("G1 X1 F600") == ["error:9"]
    assert client.ask("$I") == ["[VER:1.1h.20190825:phasewatch-sim]", "[OPT:V,15,128]", "ok"]
    assert client.ask("$G")[0].startswith("[GC:G0 G54 G17 G21 G90 G94")
    assert client.ask("$X") == ["[MSG:Caution: Unlocked]", "ok"]
    assert client.status().startswith("<Idle|MPos:0.000,0.000,0.000|")
    assert client.ask("M115") == ["error:20"]
    # grbl 1.1 with homing enabled (from memory): the banner, then the unlock hint.
    emulator.inject("reset")
    assert client.read_line() == b"Grbl 1.1h ['$' for help]"
    assert client.read_line() == UNLOCK_MESSAGE.encode()
    assert client.status().startswith("<Alarm|")


def test_grbl_errors_for_lines_it_cannot_take(grbl_fast):
    emulator, client, _ = grbl_fast
    client.ask("$X")
    assert client.ask("G1 X1") == ["error:22"]   # no feed rate yet after boot (from memory)
    assert client.ask("G1 X1 X2 F60") == ["error:25"]
    assert client.ask("G38.2 Z-1 F10") == ["error:20"]
    assert client.ask("$Q") == ["error:3"]
    assert client.ask("G4") == ["error:28"]
    assert client.ask("M3 S500") == ["ok"]
    assert emulator.lamp_level(0) == 0.5
    assert client.ask("M8") == ["ok"] and emulator.lamp_level(1) == 1.0
    assert client.ask("M9") == ["ok"] and emulator.lamp_level(1) == 0.0
    assert client.ask("M5") == ["ok"] and emulator.lamp_level(0) == 0.0


def test_grbl_dwell_waits_for_motion_and_status_shows_it(grbl_frozen):
    emulator, client, clock = grbl_frozen
    client.ask("$X")
    assert client.ask("G1 X20 F600000") == ["ok"]
    client.send("G4 P0")
    assert client.silent_for(0.1)  # the barrier waits for the move
    clock.advance(trapezoid_time_s(20000.0, V_XY, A_XY) / 2)
    # The status report is real time: answered while G4 P0 waits, showing the live position.
    status = client.status()
    m = STATUS.match(status)
    assert m and m.group(1) == "Run" and float(m.group(2)) == pytest.approx(10.0, abs=0.001), status
    clock.advance(trapezoid_time_s(20000.0, V_XY, A_XY) / 2 + 0.01)
    assert client.read_line() == b"ok"
    assert client.status().startswith("<Idle|MPos:20.000,0.000,0.000|")


def test_grbl_feed_hold_and_cycle_start(grbl_frozen):
    emulator, client, clock = grbl_frozen
    client.ask("$X")
    assert client.ask("G1 X20 F600000") == ["ok"]
    clock.advance(1.0)
    client.send_bytes(b"!")
    assert wait_until(lambda: emulator.received[-1][1] == "!")
    held = emulator.physical_position()
    assert 0.0 < held.x_um < 20000.0
    clock.advance(50.0)
    assert emulator.physical_position() == held
    assert client.status().startswith("<Hold:0|")
    client.send_bytes(b"~")
    assert wait_until(lambda: emulator.received[-1][1] == "~")
    clock.advance(10.0)
    assert emulator.physical_position().x_um == pytest.approx(20000.0, abs=1e-6)


def test_grbl_soft_reset_while_moving_raises_alarm_3(grbl_frozen):
    emulator, client, clock = grbl_frozen
    client.ask("$X")
    assert client.ask("G1 X20 F600000") == ["ok"]
    clock.advance(1.0)
    client.send_bytes(b"\x18")
    # From memory: the alarm, the banner, then the unlock hint; locked again.
    assert client.read_line() == b"ALARM:3"
    assert client.read_line() == b"Grbl 1.1h ['$' for help]"
    assert client.read_line() == UNLOCK_MESSAGE.encode()
    stopped = emulator.physical_position()
    clock.advance(20.0)
    assert emulator.physical_position() == stopped
    assert client.status().startswith("<Alarm|")
    assert client.ask("G1 X1 F600") == ["error:9"]
    # A reset while idle keeps the (trusted) position and raises nothing.
    client.ask("$X")
    client.send_bytes(b"\x18")
    assert client.read_line() == b"Grbl 1.1h ['$' for help]"
    assert client.status().startswith("<Idle|")


def test_grbl_homing_and_work_offsets(grbl_fast):
    emulator, client, _ = grbl_fast
    assert client.ask("$H") == ["ok"]
    assert emulator.physical_position() == Position(0.0, 0.0, 0.0)
    assert client.ask("G1 X5 Y2 F6000") == ["ok"]
    assert client.ask("G4 P0") == ["ok"]
    assert client.ask("G92 X0 Y0") == ["ok"]
    dialect = grbl.GrblDialect()
    # The work offset comes with the first report after it changed ...
    first = client.status()
    assert "|WCO:5.000,2.000,0.000" in first
    assert dialect.parse_report(first) == Position(0.0, 0.0, 0.0)
    # ... and only now and then after that: the reader remembers it.
    later = [client.status() for _ in range(5)]
    assert all("WCO" not in line for line in later)
    assert dialect.parse_report(later[-1]) == Position(0.0, 0.0, 0.0)
    assert client.ask("G92.1") == ["ok"]
    assert dialect.parse_report(client.status()) == Position(5000.0, 2000.0, 0.0)


def test_grbl_soft_limit_alarm_before_any_motion(grbl_fast):
    emulator, client, _ = grbl_fast
    client.ask("$X")
    hard_z_mm = (FOCUS.z_safe_max_um + MOTION.z_crash_margin_um) / 1000.0
    assert client.ask(f"G1 Z{hard_z_mm + 0.01:.3f} F600") == ["ALARM:2"]
    assert client.read_line() == b"[MSG:Reset to continue]"
    assert emulator.physical_position() == Position(0.0, 0.0, 0.0)
    assert client.ask("$X") == ["error:9"]  # needs the reset first
    client.send_bytes(b"\x18")
    assert client.read_line() == b"Grbl 1.1h ['$' for help]"
    assert client.read_line() == UNLOCK_MESSAGE.encode()
    assert client.ask("$H") == ["ok"]


def test_grbl_limit_switch_fault(grbl_fast):
    emulator, client, _ = grbl_fast
    client.ask("$X")
    emulator.inject("limit")
    assert client.read_line() == b"ALARM:1"
    assert client.read_line() == b"[MSG:Reset to continue]"
    assert client.status().startswith("<Alarm|")
    with pytest.raises(ValueError, match="grbl"):
        GcodeEmulator(clock=ScaledClock(), stage=STAGE, focus=FOCUS, motion=MOTION).inject("limit")
