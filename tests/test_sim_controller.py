"""The simulated G-code controller, spoken to over its pseudo-terminal by a bare pyserial
client: dialect, kinematics on the clock, backlash, travel limits and injected faults."""

from __future__ import annotations

import math
import os
import re
from collections.abc import Iterator

import pytest
import serial

from drivers.base import Position
from drivers.clock import ScaledClock
from drivers.sim.controller import BANNER, GcodeEmulator
from tests.gcode_rig import FOCUS, MOTION, STAGE, RawClient, wait_until

pytestmark = pytest.mark.timeout(30)

V_XY = STAGE.xy_speed_um_s
A_XY = STAGE.xy_accel_um_s2


def trapezoid_time_s(d_um: float, v: float, a: float) -> float:
    # Constant-acceleration kinematics (common practice): ramps of v/a s each, cruise in
    # between; a move shorter than v^2/a never reaches v and takes 2*sqrt(d/a).
    return d_um / v + v / a if d_um >= v * v / a else 2.0 * math.sqrt(d_um / a)


def make(clock: ScaledClock, start: Position | None = None) -> tuple[GcodeEmulator, RawClient]:
    emulator = GcodeEmulator(clock=clock, stage=STAGE, focus=FOCUS, motion=MOTION, start=start)
    client = RawClient(emulator.start())
    return emulator, client


@pytest.fixture
def fast() -> Iterator[tuple[GcodeEmulator, RawClient, ScaledClock]]:
    clock = ScaledClock(speed=200.0, start_s=1_772_442_000.0)
    emulator, client = make(clock)
    yield emulator, client, clock
    client.close()
    emulator.stop()


@pytest.fixture
def frozen() -> Iterator[tuple[GcodeEmulator, RawClient, ScaledClock]]:
    """A clock that only moves when the test advances it, for exact kinematics."""
    clock = ScaledClock(speed=1e-6, start_s=1_772_442_000.0)
    emulator, client = make(clock)
    yield emulator, client, clock
    client.close()
    emulator.stop()


REPORT = re.compile(r"^X:-?\d+\.\d{3} Y:-?\d+\.\d{3} Z:-?\d+\.\d{3}$")


def report(client: RawClient) -> tuple[float, float, float]:
    lines = client.ask("M114")
    assert lines[-1] == "ok" and len(lines) == 2, lines
    assert REPORT.match(lines[0]), lines[0]
    x, y, z = (float(part.split(":")[1]) for part in lines[0].split())
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
    assert client.ask("M999") == ["ok"]
    assert client.ask("M114")[-1] == "ok"


def test_received_lines_carry_clock_times(fast):
    emulator, client, clock = fast
    before = clock.now()
    client.ask("M114")
    t, line = emulator.received[-1]
    assert line == "M114"
    assert before <= t <= clock.now()


def test_fault_reset_mid_move(frozen):
    emulator, client, clock = frozen
    assert client.ask("G1 X20 Z1") == ["ok"]
    clock.advance(trapezoid_time_s(20000.0, V_XY, A_XY) / 2)
    emulator.inject("reset")
    assert client.read_line() == BANNER.encode()
    info = client.read_line()
    assert info is not None and info.startswith(b"echo:")
    stopped = emulator.physical_position()
    assert 0.0 < stopped.x_um < 20000.0
    clock.advance(100.0)
    assert emulator.physical_position() == stopped  # the move was aborted, not resumed
    assert report(client) == (0.0, 0.0, 0.0)  # the firmware forgot where it was
    assert client.ask("G1 X1") == ["ok"]
    clock.advance(10.0)
    assert emulator.physical_position().x_um == pytest.approx(stopped.x_um + 1000.0, abs=1e-6)


def test_fault_disconnect_and_reconnect(fast):
    emulator, client, _ = fast
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
        assert report(fresh) == (0.0, 0.0, 0.0)
    finally:
        fresh.close()
    assert first_pty is not None


def test_fault_garble_corrupts_one_reply(fast):
    emulator, client, _ = fast
    emulator.inject("garble")
    client.send("M114")
    noise = client.read_line()
    assert noise is not None and noise and all(b >= 0x80 for b in noise)
    assert client.read_line() == b"ok"  # the rest of that reply is intact
    assert report(client) == (0.0, 0.0, 0.0)


def test_fault_drop_reply_loses_one_reply(fast):
    emulator, client, _ = fast
    emulator.inject("drop_reply")
    client.send("M106 S255")
    assert client.silent_for(0.2)
    assert emulator.lamp_level() == 1.0  # the command itself was carried out
    assert report(client) == (0.0, 0.0, 0.0)


def test_fault_stall_blocks_m400_until_cleared(fast):
    emulator, client, clock = fast
    emulator.inject("stall")
    assert client.ask("G1 X10") == ["ok"]
    client.send("M400")
    assert client.silent_for(0.3)  # the move itself takes 7 ms here
    # It jammed half-way in time, which is half-way in distance (symmetric profile).
    assert emulator.physical_position().x_um == pytest.approx(5000.0, abs=0.5)
    emulator.clear_faults()
    assert client.read_line() == b"ok"
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
