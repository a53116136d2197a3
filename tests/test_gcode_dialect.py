"""The G-code dialect objects alone (RepRap family and grbl): what they write, how they read
replies and position reports, how a board parses commands, how the two are told apart,
and the planner's kinematics."""

from __future__ import annotations

import math
from pathlib import Path

import pytest
from hypothesis import given
from hypothesis import strategies as st

from drivers.base import Position
from drivers.gcode import dialect as dialect_module
from drivers.gcode import grbl as grbl_module
from drivers.gcode.detect import make_dialect, tell_apart
from drivers.gcode.dialect import (
    REPRAP,
    Command,
    CommandSyntaxError,
    Dialect,
    ReplyKind,
    RepRapDialect,
    feed_to_um_s,
    format_feed,
    format_mm,
    mm_to_um,
    path_limit,
    trapezoid_duration_s,
    trapezoid_travel_um,
)
from drivers.gcode.grbl import GrblDialect

REPO = Path(__file__).resolve().parents[1]


def test_is_a_dialect_and_names_the_module_that_documents_it():
    assert isinstance(REPRAP, Dialect)
    assert (REPO / REPRAP.described_in).resolve() == Path(dialect_module.__file__).resolve()
    assert REPRAP.parse_report(REPRAP.report_example) == Position(12500.0, 3000.0, 1500.0)


# ------------------------------------------------------------------ writing


@pytest.mark.parametrize(
    ("value_um", "wire"),
    [(0.0, "0.0000"), (1603.27, "1.6033"), (-1.0, "-0.0010"), (127760.0, "127.7600"), (0.04, "0.0000")],
)
def test_coordinates_go_out_as_millimetres_to_a_tenth_of_a_micrometre(value_um, wire):
    assert format_mm(value_um) == wire


def test_feed_rates_go_out_as_mm_per_minute():
    assert format_feed(8000.0) == "480.0"  # 8 mm/s = 480 mm/min
    assert format_feed(1000.0 / 60.0) == "1.0"
    assert feed_to_um_s(480.0) == pytest.approx(8000.0)
    assert mm_to_um(1.5) == 1500.0


def test_move_names_only_the_given_axes():
    assert REPRAP.move(x_um=20000.0, y_um=None, z_um=1500.5, feed_um_s=8000.0) == "G1 X20.0000 Z1.5005 F480.0"
    assert REPRAP.move(x_um=None, y_um=-250.0, z_um=None, feed_um_s=1000.0) == "G1 Y-0.2500 F60.0"


def test_a_move_line_reads_back_as_the_same_move():
    line = REPRAP.move(x_um=12345.6, y_um=85480.0, z_um=2999.97, feed_um_s=7321.0)
    command = REPRAP.parse_command(line)
    assert command is not None and command.word == "G1"
    assert [mm_to_um(command.params[a]) for a in "XYZ"] == pytest.approx([12345.6, 85480.0, 2999.97], abs=0.05)
    assert feed_to_um_s(command.params["F"]) == pytest.approx(7321.0, abs=1.0)


def test_set_position_declares_all_three_axes():
    assert REPRAP.set_position(1000.0, 0.0, 250.0) == "G92 X1.0000 Y0.0000 Z0.2500"


@pytest.mark.parametrize(
    ("level", "line"),
    [(1.0, "M106 P3 S255"), (0.5, "M106 P3 S128"), (1 / 255, "M106 P3 S1"), (0.001, "M107 P3"), (0.0, "M107 P3")],
)
def test_lamp_level_becomes_a_pwm_duty_or_off(level, line):
    assert REPRAP.lamp(3, level) == line


def test_the_handshake_and_motion_commands():
    d = REPRAP
    assert (d.probe_command, d.describe_command, d.absolute_command) == ("M114", "M115", "G90")
    assert (d.home_command, d.finish_command, d.halt_command, d.restart_command) == ("G28", "M400", "M112", "M999")


# ------------------------------------------------------------------ reading


@pytest.mark.parametrize(
    ("line", "kind", "detail"),
    [
        ("ok", ReplyKind.OK, ""),
        ("  ok \r", ReplyKind.OK, ""),
        ("ok T:21.0", ReplyKind.OK, ""),
        ("okay", ReplyKind.OTHER, ""),
        ("Error:unknown command 'M42'", ReplyKind.ERROR, "unknown command 'M42'"),
        ("Error: X200.0000 lies outside the travel ", ReplyKind.ERROR, "X200.0000 lies outside the travel"),
        ("!! emergency stop (M112): motion aborted", ReplyKind.HALT, "emergency stop (M112): motion aborted"),
        ("!!", ReplyKind.HALT, "halted"),
        ("start", ReplyKind.BANNER, ""),
        ("started", ReplyKind.OTHER, ""),
        ("echo:phasewatch simulated motion controller", ReplyKind.INFO, ""),
        ("// action:pause", ReplyKind.INFO, ""),
        ("X:12.500 Y:3.000 Z:1.500", ReplyKind.REPORT, ""),
        ("X:12.5 Y:3", ReplyKind.OTHER, ""),
        ("firmware: phasewatch-sim motion 1.0", ReplyKind.OTHER, ""),
    ],
)
def test_reply_classification(line, kind, detail):
    reply = REPRAP.classify(line)
    assert (reply.kind, reply.detail) == (kind, detail)
    assert reply.text == line.strip()


@pytest.mark.parametrize(
    ("line", "position"),
    [
        ("X:12.500 Y:3.000 Z:1.500", Position(12500.0, 3000.0, 1500.0)),
        ("X:-1.500 Y:0.000 Z:-0.001", Position(-1500.0, 0.0, -1.0)),
        ("X: 2 Y: 3 Z: 4", Position(2000.0, 3000.0, 4000.0)),
        # Some firmware appends more fields (extruder, step counts); the first X Y Z counts.
        ("X:10.00 Y:5.00 Z:1.00 E:0.00 Count X:800 Y:400 Z:400", Position(10000.0, 5000.0, 1000.0)),
    ],
)
def test_position_reports_are_read_in_micrometres(line, position):
    parsed = REPRAP.parse_report(line)
    assert parsed is not None
    assert (parsed.x_um, parsed.y_um, parsed.z_um) == pytest.approx((position.x_um, position.y_um, position.z_um))


@pytest.mark.parametrize(
    "line",
    [
        "",
        "ok",
        "X:1.000 Y:2.000",            # no Z
        "X:a Y:2.000 Z:3.000",        # not a number
        "X:1.0.0 Y:2.000 Z:3.000",    # two decimal points
        "X:1,5 Y:2.000 Z:3.000",      # decimal comma
        "Y:1.000 X:2.000 Z:3.000",    # axes out of order
        "X:1.000Y:2.000Z:3.000",      # fields run together
        "X:. Y:2.000 Z:3.000",
    ],
)
def test_malformed_position_reports_are_not_positions(line):
    assert REPRAP.parse_report(line) is None
    assert REPRAP.classify(line).kind is not ReplyKind.REPORT


def test_report_line_reads_back_to_the_micrometre():
    line = REPRAP.report_line(12345.6, -250.0, 2999.9)
    assert line == "X:12.346 Y:-0.250 Z:3.000"
    back = REPRAP.parse_report(line)
    assert back is not None
    assert (back.x_um, back.y_um, back.z_um) == pytest.approx((12346.0, -250.0, 3000.0))


def test_the_boards_replies_read_back_as_their_kinds():
    assert REPRAP.classify(REPRAP.ok).kind is ReplyKind.OK
    assert REPRAP.classify(REPRAP.banner).kind is ReplyKind.BANNER
    refused = REPRAP.classify(REPRAP.error_reply("F must be greater than 0 mm/min"))
    assert (refused.kind, refused.detail) == (ReplyKind.ERROR, "F must be greater than 0 mm/min")
    halted = REPRAP.classify(REPRAP.halt_reply("emergency stop"))
    assert (halted.kind, halted.detail) == (ReplyKind.HALT, "emergency stop")
    assert REPRAP.classify(REPRAP.info_reply("board 1.0")).kind is ReplyKind.INFO
    assert REPRAP.classify(REPRAP.report_line(1.0, 2.0, 3.0)).kind is ReplyKind.REPORT


# ---------------------------------------------------------- command words


@pytest.mark.parametrize(
    ("line", "word"),
    [("G1 X1", "G1"), ("g01 x1", "G1"), ("M0114", "M114"), ("  M400", "M400"), ("N7 G1 X1*12", "G1"), ("N7 X1", ""), ("", ""), ("T0", "")],
)
def test_command_word(line, word):
    assert REPRAP.command_word(line) == word


def test_which_lines_are_motion():
    for line in ("G0 X1", "G1 Z0.5 F60", "G28", "G92 X0 Y0 Z0", "M400"):
        assert REPRAP.affects_position(line), line
    for line in ("G90", "M114", "M115", "M106 P0 S255", "M999"):
        assert not REPRAP.affects_position(line), line
    # Only these are answered after the motion ends; a move's ok comes once it is queued.
    assert [line for line in ("G28", "M400", "G1 X1", "M114") if REPRAP.waits_for_motion(line)] == ["G28", "M400"]


def test_lines_that_could_move_an_axis():
    for line in ("G1 Z5", "g0 x1", "N7 G1 Z2.9*31", "G 28", "M114 G1 X3"):
        assert REPRAP.could_move(line), line
    for line in ("M114", "M106 P0 S255", "M115 ; G1 in a comment", "M42 P3"):
        assert not REPRAP.could_move(line), line


@pytest.mark.parametrize(
    ("line", "command"),
    [
        ("G1 X10 Y-2.5 F600", Command("G1", {"X": 10.0, "Y": -2.5, "F": 600.0})),
        ("g01 x.5 z+1.", Command("G1", {"X": 0.5, "Z": 1.0})),
        ("G28 X", Command("G28", {"X": None})),
        ("M114 ; where are we", Command("M114", {})),
        ("G1X1Y2", Command("G1", {"X": 1.0, "Y": 2.0})),
    ],
)
def test_parse_command(line, command):
    assert REPRAP.parse_command(line) == command


@pytest.mark.parametrize("line", ["", "   ", "; a comment"])
def test_empty_and_comment_lines_are_no_command(line):
    assert REPRAP.parse_command(line) is None


@pytest.mark.parametrize(
    ("line", "message"),
    [
        ("HELLO", r"cannot read 'HELLO': a line starts with a G or M command"),
        ("G1.5 X1", r"a line starts with a G or M command"),
        ("X1 G1", r"a line starts with a G or M command"),
        ("G1 X1 X2", r"'X' given twice in 'G1 X1 X2'"),
        ("G1 X1-", r"cannot read 'G1 X1-'$"),
        ("G1 X1 #", r"cannot read"),
    ],
)
def test_unreadable_commands_are_refused_with_the_reason(line, message):
    with pytest.raises(CommandSyntaxError, match=message):
        REPRAP.parse_command(line)


def test_emergency_stop_is_recognised_on_arrival():
    for line in ("M112", "m0112", "M112 ; stop now", " M112 "):
        assert REPRAP.is_emergency_stop(line), line
    for line in ("M1120", "G1 M112", "M11", "M400"):
        assert not REPRAP.is_emergency_stop(line), line


# --------------------------------------------------------------- kinematics
# Handbook kinematics: the constant-acceleration equations of motion, s = a·t²/2 and
# v = a·t (any mechanics handbook). A rest-to-rest move limited to speed v and
# acceleration a takes d/v + v/a when it is long enough to reach v (d >= v²/a), else
# 2·sqrt(d/a).

V_UM_S = 8000.0
A_UM_S2 = 40000.0


def test_long_move_takes_d_over_v_plus_v_over_a():
    # Handbook kinematics: 20 mm at 8 mm/s with 40 mm/s² ramps = 2.5 s + 0.2 s.
    assert trapezoid_duration_s(20000.0, V_UM_S, A_UM_S2) == pytest.approx(20000.0 / V_UM_S + V_UM_S / A_UM_S2)
    assert trapezoid_duration_s(20000.0, V_UM_S, A_UM_S2) == pytest.approx(2.7)


def test_short_move_takes_two_root_d_over_a():
    # Handbook kinematics: 1 mm < v²/a = 1.6 mm, so the speed never reaches v.
    assert trapezoid_duration_s(1000.0, V_UM_S, A_UM_S2) == pytest.approx(2.0 * math.sqrt(1000.0 / A_UM_S2))


def test_the_two_cases_meet_where_the_move_just_reaches_full_speed():
    d = V_UM_S**2 / A_UM_S2
    # Handbook kinematics: at d = v²/a both give 2·v/a.
    assert trapezoid_duration_s(d, V_UM_S, A_UM_S2) == pytest.approx(2.0 * V_UM_S / A_UM_S2)
    assert trapezoid_duration_s(d * (1 - 1e-9), V_UM_S, A_UM_S2) == pytest.approx(2.0 * V_UM_S / A_UM_S2)


@pytest.mark.parametrize("distance_um", [0.0, -5.0])
def test_no_distance_takes_no_time(distance_um):
    assert trapezoid_duration_s(distance_um, V_UM_S, A_UM_S2) == 0.0


def test_travel_along_a_long_move():
    d = 20000.0
    total = trapezoid_duration_s(d, V_UM_S, A_UM_S2)
    ramp = V_UM_S / A_UM_S2
    # Handbook kinematics: s = a·t²/2 while accelerating, then s grows by v per second.
    assert trapezoid_travel_um(0.05, d, V_UM_S, A_UM_S2) == pytest.approx(0.5 * A_UM_S2 * 0.05**2)
    assert trapezoid_travel_um(ramp, d, V_UM_S, A_UM_S2) == pytest.approx(V_UM_S**2 / (2 * A_UM_S2))
    assert trapezoid_travel_um(1.0, d, V_UM_S, A_UM_S2) == pytest.approx(V_UM_S**2 / (2 * A_UM_S2) + V_UM_S * (1.0 - ramp))
    assert trapezoid_travel_um(total / 2, d, V_UM_S, A_UM_S2) == pytest.approx(d / 2)  # symmetric profile
    # Decelerating: what is left is a·(T - t)²/2.
    assert trapezoid_travel_um(total - 0.05, d, V_UM_S, A_UM_S2) == pytest.approx(d - 0.5 * A_UM_S2 * 0.05**2)
    assert trapezoid_travel_um(-1.0, d, V_UM_S, A_UM_S2) == 0.0
    assert trapezoid_travel_um(total, d, V_UM_S, A_UM_S2) == d
    assert trapezoid_travel_um(total + 5.0, d, V_UM_S, A_UM_S2) == d


def test_travel_along_a_short_move_peaks_at_root_a_d():
    d = 1000.0
    total = trapezoid_duration_s(d, V_UM_S, A_UM_S2)
    half = total / 2
    # Handbook kinematics: half the distance by half the time, at the speed a·t = sqrt(a·d) < v.
    assert trapezoid_travel_um(half, d, V_UM_S, A_UM_S2) == pytest.approx(d / 2)
    dt = 1e-6
    peak = (trapezoid_travel_um(half + dt, d, V_UM_S, A_UM_S2) - trapezoid_travel_um(half - dt, d, V_UM_S, A_UM_S2)) / (2 * dt)
    assert peak == pytest.approx(math.sqrt(A_UM_S2 * d), rel=1e-4)
    assert peak < V_UM_S


@given(
    distance_um=st.floats(0.1, 200_000.0),
    speed_um_s=st.floats(10.0, 50_000.0),
    accel_um_s2=st.floats(100.0, 500_000.0),
)
def test_profiles_respect_both_limits_and_arrive(distance_um, speed_um_s, accel_um_s2):
    total = trapezoid_duration_s(distance_um, speed_um_s, accel_um_s2)
    # Never faster than cruising all the way, nor than accelerating flat out half-way.
    assert total >= distance_um / speed_um_s * (1 - 1e-9)
    assert total >= 2.0 * math.sqrt(distance_um / accel_um_s2) * (1 - 1e-9)
    samples = [trapezoid_travel_um(total * i / 64, distance_um, speed_um_s, accel_um_s2) for i in range(65)]
    assert samples[0] == 0.0 and samples[-1] == distance_um
    step_s = total / 64
    for before, after in zip(samples, samples[1:]):
        assert after >= before
        assert (after - before) / step_s <= speed_um_s * (1 + 1e-6)


def test_path_limit_keeps_every_axis_within_its_own():
    limits = (8000.0, 8000.0, 1000.0)
    delta = (3000.0, 4000.0, 0.0)
    speed = path_limit(delta, limits)
    assert speed == pytest.approx(8000.0 * 5000.0 / 4000.0)  # y, the longer leg, binds
    axis_speeds = [speed * abs(d) / math.hypot(*delta) for d in delta]
    assert axis_speeds[1] == pytest.approx(limits[1])
    assert all(v <= lim * (1 + 1e-12) for v, lim in zip(axis_speeds, limits))
    assert path_limit((0.0, 0.0, -200.0), limits) == pytest.approx(1000.0)
    assert path_limit((1000.0, 0.0, 1000.0), limits) == pytest.approx(1000.0 * math.sqrt(2.0))
    assert path_limit((0.0, 0.0, 0.0), limits) == math.inf


# ------------------------------------------------ RepRap family: what real boards add
# From memory (not looked up): RepRap-family firmware numbers lines with an XOR checksum,
# asks for a damaged one again, keeps the host waiting with busy lines and appends counts
# to its position report.


@pytest.mark.parametrize(
    ("line", "kind", "detail"),
    [
        ("Resend: 42", ReplyKind.RESEND, "42"),
        ("rs N42", ReplyKind.RESEND, "42"),
        ("Error:checksum mismatch, Last Line: 41", ReplyKind.RESEND, ""),
        ("Error:Line Number is not Last Line Number+1, Last Line: 7", ReplyKind.RESEND, ""),
        ("echo:busy: processing", ReplyKind.BUSY, ""),
        ("busy: paused for user", ReplyKind.BUSY, ""),
        ('echo:Unknown command: "G1X"', ReplyKind.ERROR, 'Unknown command: "G1X"'),
        ("ok N12 P15 B3", ReplyKind.OK, ""),
        ("ok T:21.0 /0.0 B:20.9 /0.0", ReplyKind.OK, ""),
    ],
)
def test_what_real_reprap_boards_reply(line, kind, detail):
    reply = REPRAP.classify(line)
    assert (reply.kind, reply.detail) == (kind, detail)


def test_numbered_lines_are_read_back_and_checked():
    framed = REPRAP.frame("G1 X1.0000 F480.0", 12)
    good = REPRAP.read_numbered(framed)
    assert (good.body, good.number, good.checksum_ok) == ("G1 X1.0000 F480.0", 12, True)
    damaged = REPRAP.read_numbered(framed.replace("X1", "X7"))
    assert (damaged.number, damaged.checksum_ok, damaged.problem) == (12, False, "checksum mismatch")
    assert REPRAP.read_numbered("N3 G28").problem == "No Checksum with line number"
    assert REPRAP.read_numbered("G28*5").problem == "No Line Number with checksum"
    plain = REPRAP.read_numbered("M114")
    assert (plain.body, plain.number, plain.checksum_ok) == ("M114", None, True)
    assert REPRAP.renumber(0) == "M110 N0"
    assert REPRAP.is_emergency_stop(REPRAP.frame("M112", 9))


def test_which_refusals_mean_a_damaged_line():
    for text in ("Error:cannot read 'G1 X1?'", 'echo:Unknown command: "G\x01"', "Error:'X' given twice in 'G1 X1 X2'"):
        assert REPRAP.damaged_in_transit(REPRAP.classify(text)), text
    for text in ("Error:X200.0000 lies outside the travel of the mechanics; not moved", "!! halted", "ok"):
        assert not REPRAP.damaged_in_transit(REPRAP.classify(text)), text


def test_report_with_extra_fields_reads_back():
    line = REPRAP.report_line(12345.0, 2000.0, 1500.0, extra="E:0.00 Count X:988 Y:160 Z:600")
    assert line == "X:12.345 Y:2.000 Z:1.500 E:0.00 Count X:988 Y:160 Z:600"
    assert REPRAP.parse_report(line) == Position(12345.0, 2000.0, 1500.0)


# ----------------------------------------------------------------------- grbl
# grbl 1.1's replies and status reports, from memory (not looked up).


def test_grbl_is_a_dialect_documented_in_its_module():
    d = GrblDialect()
    assert isinstance(d, Dialect)
    assert (REPO / d.described_in).resolve() == Path(grbl_module.__file__).resolve()
    assert d.parse_report(d.report_example) == Position(12500.0, 3000.0, 1500.0)
    assert (d.home_command, d.finish_command, d.sync_command, d.describe_command) == ("$H", "G4 P0", "$G", "$I")
    assert d.report_request() == b"?" and d.report_ends_answer
    assert d.halt_bytes == b"!\x18" and d.restart_bytes == b"\x18"
    assert not d.numbered and d.after_home_commands == ("G92.1",)


@pytest.mark.parametrize(
    ("line", "kind", "detail"),
    [
        ("ok", ReplyKind.OK, ""),
        ("error:20", ReplyKind.ERROR, "error 20: unsupported or invalid G-code command"),
        ("error:9", ReplyKind.ALARM, "alarm lock (error 9: G-code locked out during alarm or jog state)"),
        ("error:99", ReplyKind.ERROR, "error 99: unknown error"),
        ("ALARM:3", ReplyKind.ALARM, "alarm 3: reset while in motion; position lost"),
        ("Grbl 1.1h ['$' for help]", ReplyKind.BANNER, ""),
        ("Grbl 0.9j ['$' for help]", ReplyKind.BANNER, ""),
        ("[MSG:'$H'|'$X' to unlock]", ReplyKind.INFO, ""),
        ("[VER:1.1h.20190825:]", ReplyKind.INFO, ""),
        ("$110=500.000", ReplyKind.INFO, ""),
        ("[GC:G0 G54 G17 G21 G90 G94 M5 M9 T0 F0 S0]", ReplyKind.STATE, ""),
        ("<Idle|MPos:1.000,2.000,3.000|FS:0,0>", ReplyKind.REPORT, ""),
        ("<Hold:0|MPos:1.000,2.000,3.000|FS:0,0|WCO:0.000,0.000,0.000>", ReplyKind.REPORT, ""),
        ("<Idle|FS:0,0>", ReplyKind.OTHER, ""),
        ("okay", ReplyKind.OTHER, ""),
        ("start", ReplyKind.OTHER, ""),
    ],
)
def test_grbl_reply_classification(line, kind, detail):
    reply = GrblDialect().classify(line)
    assert (reply.kind, reply.detail) == (kind, detail)


def test_grbl_work_position_is_machine_position_less_the_remembered_offset():
    d = GrblDialect()
    assert d.parse_report("<Idle|MPos:5.000,2.000,1.000|FS:0,0>") == Position(5000.0, 2000.0, 1000.0)
    assert d.parse_report("<Idle|MPos:5.000,2.000,1.000|FS:0,0|WCO:5.000,2.000,0.000>") == Position(0.0, 0.0, 1000.0)
    # No offset in this report: the last one seen still holds.
    assert d.parse_report("<Run|MPos:6.000,2.000,1.000|FS:480,0>") == Position(1000.0, 0.0, 1000.0)
    # A work-position report ($10=0) is taken as it is; with extra axes, the first three count.
    assert d.parse_report("<Idle|WPos:1.500,0.000,0.250|FS:0,0>") == Position(1500.0, 0.0, 250.0)
    assert d.parse_report("<Idle|MPos:1.000,2.000,3.000,4.000|FS:0,0|WCO:0.000,0.000,0.000,0.000>") == Position(1000.0, 2000.0, 3000.0)
    d.forget_offsets()
    assert d.parse_report("<Idle|MPos:5.000,2.000,1.000|FS:0,0>") == Position(5000.0, 2000.0, 1000.0)
    assert d.parse_report("X:1.000 Y:2.000 Z:3.000") is None
    assert d.report_halt("<Alarm|MPos:0.000,0.000,0.000|FS:0,0>") == "in alarm (locked until homed)"
    assert d.report_halt("<Idle|MPos:0.000,0.000,0.000|FS:0,0>") is None


def test_grbl_board_side_status_line_reads_back():
    line = grbl_module.status_line("Run", (12345.0, 0.0, 1500.0), wco_um=(1000.0, 0.0, 0.0), feed_mm_min=480.0)
    assert line == "<Run|MPos:12.345,0.000,1.500|FS:480,0|WCO:1.000,0.000,0.000>"
    assert GrblDialect().parse_report(line) == Position(11345.0, 0.0, 1500.0)


def test_grbl_writing():
    d = GrblDialect()
    assert d.move(x_um=20000.0, y_um=None, z_um=1500.5, feed_um_s=8000.0) == "G1 X20.0000 Z1.5005 F480.0"
    assert d.set_position(1000.0, 0.0, 250.0) == "G92 X1.0000 Y0.0000 Z0.2500"
    assert [d.lamp(0, level) for level in (1.0, 0.5, 0.0004, 0.0)] == ["M3 S1000", "M3 S500", "M5", "M5"]
    assert (d.lamp(1, 0.2), d.lamp(1, 0.0), d.lamp(2, 1.0)) == ("M8", "M9", "M7")
    with pytest.raises(ValueError, match="lamp outputs 0"):
        d.lamp(4, 1.0)
    assert d.frame("G1 X1", 3) == "G1 X1"


def test_grbl_lines_that_move_or_wait():
    d = GrblDialect()
    # Real-time bytes are refused too: they act outside the one-line-at-a-time protocol.
    for line in ("G1 X1 F60", "G0Z1", "$H", "$J=G91 X1 F100", "!", "~", "?", "G4 P0 (wait)"):
        assert d.could_move(line), line
    for line in ("$I", "$G", "M3 S100", "$X", "M5 ; G1 in a comment", "M5 (G1 in a remark)"):
        assert not d.could_move(line), line
    assert [line for line in ("G1 X1", "G4 P0", "$H", "G92.1", "G90", "M5") if d.affects_position(line)] == [
        "G1 X1", "G4 P0", "$H", "G92.1"
    ]
    assert [line for line in ("G1 X1", "G4 P0", "$H", "$I") if d.waits_for_motion(line)] == ["G4 P0", "$H"]
    damaged = d.classify("error:2")
    assert d.damaged_in_transit(damaged) and not d.damaged_in_transit(d.classify("error:5"))


# ---------------------------------------------------------------- telling them apart


@pytest.mark.parametrize(
    ("line", "family"),
    [
        ("error:20", "grbl"),
        ("Grbl 1.1h ['$' for help]", "grbl"),
        ("ALARM:1", "grbl"),
        ("[MSG:'$H'|'$X' to unlock]", "grbl"),
        ("<Alarm|MPos:0.000,0.000,0.000|FS:0,0>", "grbl"),
        ("FIRMWARE_NAME:SomeFirmware 2.1 PROTOCOL_VERSION:1.0", "reprap"),
        ("ok", "reprap"),
        ("start", "reprap"),
        ("Error:unknown command 'M115'", "reprap"),
        ('echo:Unknown command: "M115"', "reprap"),
        ("!! emergency stop", "reprap"),
        ("firmware: phasewatch-sim motion 1.0", None),
        ("huh?", None),
    ],
)
def test_an_answer_tells_the_families_apart(line, family):
    assert tell_apart(line) == family


def test_dialects_by_name():
    assert isinstance(make_dialect("reprap"), RepRapDialect) and isinstance(make_dialect("grbl"), GrblDialect)
    assert make_dialect("grbl") is not make_dialect("grbl")  # one per connection: grbl's keeps an offset
    with pytest.raises(ValueError, match="one of reprap, grbl"):
        make_dialect("marlin")
