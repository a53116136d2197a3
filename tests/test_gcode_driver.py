"""The real G-code driver (pyserial) talking to the simulated controller over a real
pseudo-terminal: moves, timing, backlash approach, soft limits, lamp, and every fault,
in both dialects (the board speaks one, the driver finds which at connect)."""

from __future__ import annotations

import asyncio
import contextlib
import dataclasses
import math
import os
import re
import select
import threading
import time
import tty
from collections.abc import AsyncIterator

import pytest

from drivers.sections import IlluminationSection, StageSection
from drivers.base import LimitError, MotionController, MotionError, Position, PositionUnknownError
from drivers.clock import ScaledClock
from drivers.gcode import GcodeController
from drivers.limits import approach_overshoot_um
from drivers.sim.controller import GcodeEmulator
from tests.gcode_rig import FOCUS, LAMP, MOTION, stage, wait_until

pytestmark = pytest.mark.timeout(30)

PROFILE = "hw_profiles/sim.toml"
HOME = Position(0.0, 0.0, 0.0)
DIALECTS = ("reprap", "grbl")


@dataclasses.dataclass(frozen=True)
class Speech:
    """How the driver's lines look on the wire in one dialect (as the emulator records them)."""

    finish: str
    home: str
    report: str      # the report request as recorded, and as named in messages
    report_name: str
    halt: str        # the first byte or line of the halt sequence
    restart: str
    banner: str
    boot_line: str   # what follows the banner
    lamp_lines: tuple[str, str, str]  # channel 0 at 0.5, at 1.0, off


SPEECH = {
    "reprap": Speech("M400", "G28", "M114", "M114", "M112", "M999", "start", "echo:phasewatch",
                     ("M106 P0 S128", "M106 P0 S255", "M107 P0")),
    "grbl": Speech("G4 P0", "$H", "?", "the b'?' status request", "!", "\x18", "Grbl 1.1h ['$' for help]",
                   "[MSG:'$H'|'$X' to unlock]", ("M3 S500", "M3 S1000", "M5")),
}


@pytest.fixture(params=DIALECTS)
def dialect(request) -> str:
    return request.param


@dataclasses.dataclass
class Rig:
    emulator: GcodeEmulator
    driver: GcodeController
    clock: ScaledClock

    def sent(self, since: int = 0) -> list[str]:
        return [line for _, line in self.emulator.received[since:]]


@contextlib.asynccontextmanager
async def rig(
    *,
    speed: float = 50.0,
    stage_section: StageSection | None = None,
    lamp: IlluminationSection = LAMP,
    home: bool = True,
    dialect: str = "reprap",
    driver_dialect: str = "auto",
    line_checksums: bool = True,
    busy_interval_s: float = 2.0,
) -> AsyncIterator[Rig]:
    clock = ScaledClock(speed=speed, start_s=1_772_442_000.0)
    section = stage_section or stage(reply_timeout_s=0.5)
    emulator = GcodeEmulator(
        clock=clock, stage=section, focus=FOCUS, motion=MOTION, dialect=dialect, busy_interval_s=busy_interval_s
    )
    port = emulator.start()
    driver = GcodeController(
        port, baud=115200, stage=section, focus=FOCUS, illumination=lamp, clock=clock,
        profile_path=PROFILE, reconnect_attempts=2, reconnect_first_delay_s=0.05,
        dialect=driver_dialect, line_checksums=line_checksums,
    )
    try:
        await driver.connect()
        if home:
            await driver.home()
        yield Rig(emulator, driver, clock)
    finally:
        await driver.close()
        emulator.stop()


def z_lines(lines: list[str]) -> list[float]:
    """The Z targets (um) of the G1 lines among ``lines``."""
    out = []
    for line in lines:
        if line.startswith("G1"):
            for word in line.split():
                if word.startswith("Z"):
                    out.append(float(word[1:]) * 1000.0)
    return out


def trapezoid_time_s(d_um: float, v: float, a: float) -> float:
    # Constant-acceleration kinematics (common practice): d/v + v/a once the move is long
    # enough to reach v (d >= v^2/a), else 2*sqrt(d/a).
    return d_um / v + v / a if d_um >= v * v / a else 2.0 * math.sqrt(d_um / a)


async def test_implements_the_motion_interface_and_needs_homing_first(dialect):
    async with rig(dialect=dialect, home=False) as r:
        assert isinstance(r.driver, MotionController)
        info = r.driver.describe()
        assert info["port"] == r.emulator.link_path and info["connected"] is True
        assert "phasewatch-sim" in str(info["firmware"])
        assert info["dialect"] == dialect and info["dialect_found"].startswith("found at connect")
        assert info["line_checksums"] is (dialect == "reprap")
        assert info["position_um"] is None
        with pytest.raises(PositionUnknownError, match="home the stage"):
            await r.driver.position()
        with pytest.raises(PositionUnknownError):
            await r.driver.move_to(x_um=1000.0)
        assert not any(line.startswith("G1") for line in r.sent())
        await r.driver.home()
        assert await r.driver.position() == HOME
        assert r.driver.describe()["position_um"] == {"x": 0.0, "y": 0.0, "z": 0.0}


async def test_home_on_connect(dialect):
    async with rig(dialect=dialect, stage_section=stage(reply_timeout_s=0.5, home_on_connect=True), home=False) as r:
        assert await r.driver.position() == HOME
        assert SPEECH[dialect].home in r.sent()


async def test_absolute_and_relative_moves(dialect):
    async with rig(dialect=dialect) as r:
        target = Position(20000.0, 10000.0, 1500.0)
        assert await r.driver.move_to(20000.0, 10000.0, 1500.0) == target
        assert await r.driver.position() == target
        assert r.emulator.physical_position() == target
        after = await r.driver.move_by(dx_um=-5000.0, dz_um=100.0)
        assert after == Position(15000.0, 10000.0, 1600.0)
        assert r.emulator.physical_position() == after
        # Only the named axis moves.
        assert await r.driver.move_to(y_um=12345.6) == Position(15000.0, 12345.6, 1600.0)
        # Sub-micrometre targets survive the wire (0.1 um) though M114 reports 1 um.
        fine = await r.driver.move_to(z_um=1603.27)
        assert fine.z_um == 1603.27
        assert (await r.driver.position()).z_um == 1603.27
        assert r.emulator.physical_position().z_um == pytest.approx(1603.3, abs=0.051)


async def test_moves_take_the_time_speed_and_acceleration_imply(dialect):
    async with rig(dialect=dialect, speed=5.0) as r:
        cases = [
            ("x", 20000.0, (20000.0, None, None), trapezoid_time_s(20000.0, 8000.0, 40000.0), 0.040),
            ("y", 1000.0, (None, 1000.0, None), trapezoid_time_s(1000.0, 8000.0, 40000.0), 0.040),
            ("z", 500.0, (None, None, 500.0), trapezoid_time_s(500.0, 1000.0, 5000.0), 0.020),
        ]
        for axis, distance, target, move_s, settle_s in cases:
            t0 = r.clock.now()
            await r.driver.move_to(*target)
            elapsed = r.clock.now() - t0
            # Never sooner than the kinematics allow; the slack above is link latency
            # (about 10 ms here, times the clock's speed of 5).
            assert elapsed >= move_s + settle_s - 1e-3, (axis, distance, elapsed, move_s)
            assert elapsed <= move_s + settle_s + 0.5, (axis, distance, elapsed, move_s)
        # 20 mm at 8 mm/s with 40 mm/s^2 ramps: 2.5 s + 0.2 s (kinematics, common practice).
        assert cases[0][3] == pytest.approx(2.7)


async def test_every_focus_move_ends_with_an_approach_from_below(dialect):
    async with rig(dialect=dialect) as r:
        overshoot = approach_overshoot_um(FOCUS.backlash_um)
        assert overshoot > FOCUS.backlash_um > MOTION.z_backlash_um
        z_now = 0.0
        for z_target in [1500.0, 1400.0, 1450.0, 1449.0, 1000.0, 2990.0, 2985.0, 12.0]:
            mark = len(r.emulator.received)
            await r.driver.move_to(z_um=z_target)
            zs = z_lines(r.sent(mark))
            assert zs[-1] == pytest.approx(z_target, abs=0.05)
            if z_target < z_now:
                # Down: first below the target by more than the backlash (or to z_min), then up.
                assert len(zs) == 2
                assert zs[0] == pytest.approx(max(FOCUS.z_min_um, z_target - overshoot), abs=0.05)
            else:
                assert len(zs) == 1
            # With the play taken up from below the mechanics sit exactly at the target.
            assert r.emulator.physical_position().z_um == pytest.approx(z_target, abs=0.051)
            z_now = z_target
        all_z = z_lines(r.sent())
        assert max(all_z) <= FOCUS.z_safe_max_um and min(all_z) >= FOCUS.z_min_um


async def test_approach_near_z_min_is_clamped_at_the_limit(dialect):
    async with rig(dialect=dialect) as r:
        await r.driver.move_to(z_um=100.0)
        mark = len(r.emulator.received)
        await r.driver.move_to(z_um=5.0)
        assert z_lines(r.sent(mark)) == [pytest.approx(0.0), pytest.approx(5.0)]


async def test_soft_limits_refuse_before_anything_is_sent(dialect):
    async with rig(dialect=dialect) as r:
        await r.driver.move_to(50000.0, 40000.0, 1500.0)
        mark = len(r.emulator.received)
        with pytest.raises(LimitError, match=r"z 3100\.0 um .*above the focus safe limit z_safe_max_um = 3000\.0 um .*hw_profiles/sim\.toml"):
            await r.driver.move_to(z_um=3100.0)
        with pytest.raises(LimitError, match=r"z_safe_max_um"):
            await r.driver.move_by(dz_um=1500.1)
        with pytest.raises(LimitError, match=r"x -1\.0 um .*below the stage soft limit x_min_um = 0\.0 um"):
            await r.driver.move_to(x_um=-1.0)
        with pytest.raises(LimitError, match=r"y_max_um = 85480\.0 um"):
            await r.driver.move_to(y_um=90000.0)
        with pytest.raises(LimitError, match="not a finite number"):
            await r.driver.move_to(z_um=float("nan"))
        with pytest.raises(LimitError, match="z_min_um"):
            await r.driver.move_to(z_um=-0.5)
        assert r.sent(mark) == []
        assert r.emulator.physical_position() == Position(50000.0, 40000.0, 1500.0)
        assert await r.driver.position() == Position(50000.0, 40000.0, 1500.0)


async def test_lamp_uses_the_configured_pwm_output():
    async with rig(lamp=dataclasses.replace(LAMP, channel=3)) as r:
        await r.driver.set_lamp(True, 0.5)
        assert r.emulator.lamp_level(3) == pytest.approx(128 / 255)
        await r.driver.set_lamp(True)
        assert r.emulator.lamp_level(3) == 1.0
        await r.driver.set_lamp(False)
        assert r.emulator.lamp_level(3) == 0.0
        assert [line for line in r.sent() if line.startswith("M10")] == ["M106 P3 S128", "M106 P3 S255", "M107 P3"]
        with pytest.raises(ValueError):
            await r.driver.set_lamp(True, 1.5)


async def test_grbl_lamp_outputs_are_the_spindle_pwm_and_the_coolant_switches():
    async with rig(dialect="grbl") as r:
        await r.driver.set_lamp(True, 0.5)
        assert r.emulator.lamp_level(0) == pytest.approx(0.5)
        await r.driver.set_lamp(True)
        await r.driver.set_lamp(False)
        assert [line for line in r.sent() if line.startswith(("M3", "M5"))] == list(SPEECH["grbl"].lamp_lines)
    async with rig(dialect="grbl", lamp=dataclasses.replace(LAMP, channel=1)) as r:
        await r.driver.set_lamp(True, 0.3)  # an on/off output: any level is on
        assert r.emulator.lamp_level(1) == 1.0
        await r.driver.set_lamp(False)
        assert r.emulator.lamp_level(1) == 0.0
    async with rig(dialect="grbl", lamp=dataclasses.replace(LAMP, channel=3)) as r:
        with pytest.raises(MotionError, match=r"grbl has lamp outputs 0 .*check `channel` in \[illumination\]"):
            await r.driver.set_lamp(True)


async def test_always_on_lamp_sends_nothing(dialect):
    async with rig(dialect=dialect, lamp=dataclasses.replace(LAMP, control="always_on")) as r:
        mark = len(r.emulator.received)
        await r.driver.set_lamp(True, 0.7)
        await r.driver.set_lamp(False)
        assert r.sent(mark) == []


async def test_unknown_command_error_reply_is_raised_with_its_text(dialect):
    async with rig(dialect=dialect) as r:
        refusal = "unknown command 'M42'" if dialect == "reprap" else "error 20: unsupported or invalid G-code command"
        with pytest.raises(MotionError, match=f"controller refused 'M42 P3': {refusal}"):
            await r.driver.send_raw("M42 P3")
        assert await r.driver.position() == HOME  # still in step with the controller
        mark = len(r.emulator.received)
        for sneaky in ("G1 Z5", "g0 x1", "N7 G1 Z2.9*31") + (("$H", "$J=G91 Z5 F10", "!") if dialect == "grbl" else ()):
            with pytest.raises(MotionError, match="refuses motion commands"):
                await r.driver.send_raw(sneaky)
        assert r.sent(mark) == []


async def test_fault_reset_mid_move_leaves_position_unknown_until_homed(dialect):
    async with rig(dialect=dialect, speed=20.0) as r:
        move = asyncio.create_task(r.driver.move_to(x_um=100000.0))  # 12.7 s on the clock
        assert await asyncio.to_thread(wait_until, lambda: r.sent()[-1:] == [SPEECH[dialect].finish])
        await asyncio.sleep(0.1)
        r.emulator.inject("reset")
        with pytest.raises(PositionUnknownError, match="restarted"):
            await move
        stopped = r.emulator.physical_position()
        assert 0.0 < stopped.x_um < 100000.0
        with pytest.raises(PositionUnknownError, match="home the stage"):
            await r.driver.position()
        mark = len(r.emulator.received)
        with pytest.raises(PositionUnknownError):
            await r.driver.move_to(x_um=50000.0)
        assert not any(line.startswith("G1") for line in r.sent(mark))
        await r.driver.home()
        assert await r.driver.position() == HOME
        assert r.emulator.physical_position() == HOME


async def test_fault_reset_while_idle_is_noticed(dialect):
    async with rig(dialect=dialect) as r:
        await r.driver.move_to(x_um=3000.0)
        r.emulator.inject("reset")
        await asyncio.sleep(0.05)
        with pytest.raises(PositionUnknownError, match="restarted"):
            await r.driver.position()
        assert str(r.driver.describe()["boot_banner"]).startswith(SPEECH[dialect].banner)


async def test_fault_disconnect_gives_a_clear_error_then_reconnects(dialect):
    async with rig(dialect=dialect) as r:
        await r.driver.move_to(x_um=2000.0)
        r.emulator.inject("disconnect")
        with pytest.raises(MotionError, match=r"lost the serial link|not found; is the controller plugged in"):
            await r.driver.position()
        # Still unplugged: the back-off gives up with the missing-port message.
        with pytest.raises(MotionError, match=r"not found; is the controller plugged in\? check `port` in \[stage\].*gave up"):
            await r.driver.position()
        assert r.driver.describe()["connected"] is False
        r.emulator.reconnect()
        with pytest.raises(PositionUnknownError, match="reopened"):
            await r.driver.position()
        assert r.driver.describe()["connected"] is True
        await r.driver.home()
        assert await r.driver.move_to(x_um=1000.0) == Position(1000.0, 0.0, 0.0)


async def test_fault_garbled_reply(dialect):
    async with rig(dialect=dialect) as r:
        await r.driver.move_to(x_um=4000.0)
        r.emulator.inject("garble")
        name = re.escape(SPEECH[dialect].report_name)
        with pytest.raises(MotionError, match=rf"unreadable reply .* to '{name}'; check that baud = 115200"):
            await r.driver.position()
        # Position queries are harmless: the driver re-synchronises and carries on.
        assert await r.driver.position() == Position(4000.0, 0.0, 0.0)
        # A garbled acknowledgement of a move leaves its outcome unknown.
        r.emulator.inject("garble")
        with pytest.raises(MotionError, match="unreadable reply"):
            await r.driver.move_to(x_um=6000.0)
        with pytest.raises(PositionUnknownError, match="unreadable"):
            await r.driver.position()
        await r.driver.home()
        assert await r.driver.position() == HOME


async def test_fault_missing_reply_times_out(dialect):
    async with rig(dialect=dialect, stage_section=stage(reply_timeout_s=0.3)) as r:
        r.emulator.inject("drop_reply")
        started = time.monotonic()
        lamp_on = re.escape(SPEECH[dialect].lamp_lines[1])
        with pytest.raises(MotionError, match=rf"no reply to '{lamp_on}' .* within 0\.3 s"):
            await r.driver.set_lamp(True)
        assert time.monotonic() - started >= 0.3
        await r.driver.set_lamp(True)
        assert r.emulator.lamp_level(0) == 1.0
        assert await r.driver.position() == HOME  # not a motion command: position kept
        # A lost acknowledgement of a move: its outcome is unknown.
        r.emulator.inject("drop_reply")
        with pytest.raises(MotionError, match="no reply to 'G1"):
            await r.driver.move_to(y_um=500.0)
        with pytest.raises(PositionUnknownError):
            await r.driver.position()


async def test_fault_stall_times_out_and_stops_the_move(dialect):
    section = stage(reply_timeout_s=0.3, move_timeout_s=5.0)
    async with rig(dialect=dialect, speed=20.0, stage_section=section) as r:
        r.emulator.inject("stall")
        started = time.monotonic()
        halt = re.escape(r.driver._dialect.halt_name)
        with pytest.raises(MotionError, match=rf"did not finish within move_timeout_s = 5 s; stopped it with {halt}"):
            await r.driver.move_to(x_um=10000.0)  # 1.45 s on the clock when it runs
        # 5 s on a clock 20x fast, plus the link allowance.
        assert time.monotonic() - started >= 5.0 / 20.0 + 0.3
        assert SPEECH[dialect].halt in r.sent()
        assert r.driver.describe()["halted"]
        assert r.emulator.physical_position().x_um == pytest.approx(5000.0, abs=0.5)
        with pytest.raises(PositionUnknownError):
            await r.driver.position()
        await r.driver.home()
        assert SPEECH[dialect].restart in r.sent()
        assert await r.driver.move_to(x_um=10000.0) == Position(10000.0, 0.0, 0.0)
        assert r.emulator.physical_position().x_um == pytest.approx(10000.0)


async def test_halt_reply_is_an_error_until_homed(dialect):
    async with rig(dialect=dialect) as r:
        if dialect == "reprap":
            with pytest.raises(MotionError, match=r"halted \(emergency stop"):
                await r.driver.send_raw("M112")
        else:
            r.emulator.inject("limit")  # a limit switch trips: ALARM:1, unasked
            await asyncio.sleep(0.05)
        with pytest.raises(MotionError, match="halted"):
            await r.driver.set_lamp(True)
        with pytest.raises(PositionUnknownError, match="halted"):
            await r.driver.move_to(x_um=1000.0)
        await r.driver.home()
        await r.driver.set_lamp(True)
        assert await r.driver.move_to(x_um=1000.0) == Position(1000.0, 0.0, 0.0)


async def test_missing_port_message():
    clock = ScaledClock(speed=1.0)
    driver = GcodeController(
        "/dev/ttyPHASEWATCH-missing", baud=115200, stage=stage(), focus=FOCUS, illumination=LAMP, clock=clock
    )
    with pytest.raises(MotionError) as caught:
        await driver.connect()
    assert str(caught.value) == (
        "serial port /dev/ttyPHASEWATCH-missing not found; is the controller plugged in? check `port` in [stage]"
    )


async def test_a_plain_file_is_not_a_serial_port(tmp_path):
    not_a_port = tmp_path / "ttyUSB0"
    not_a_port.write_text("")
    driver = GcodeController(
        str(not_a_port), baud=115200, stage=stage(), focus=FOCUS, illumination=LAMP, clock=ScaledClock()
    )
    with pytest.raises(MotionError, match="is not a serial port"):
        await driver.connect()


async def test_a_silent_port_gives_no_reply_error():
    master, slave = os.openpty()
    tty.setraw(slave)
    try:
        driver = GcodeController(
            os.ttyname(slave), baud=115200, stage=stage(reply_timeout_s=0.1), focus=FOCUS,
            illumination=LAMP, clock=ScaledClock(),
        )
        with pytest.raises(MotionError, match=r"no reply from the controller .* within 0\.1 s .*3 tries"):
            await driver.connect()
        assert driver.describe()["connected"] is False
    finally:
        os.close(master)
        os.close(slave)


async def test_garbage_on_connect_points_at_the_baud_rate():
    clock = ScaledClock(speed=50.0)
    emulator = GcodeEmulator(clock=clock, stage=stage(), focus=FOCUS, motion=MOTION)
    port = emulator.start()
    emulator.inject("garble")
    driver = GcodeController(port, baud=115200, stage=stage(), focus=FOCUS, illumination=LAMP, clock=clock)
    try:
        with pytest.raises(MotionError, match="unreadable reply .* baud = 115200"):
            await driver.connect()
    finally:
        await driver.close()
        emulator.stop()


async def test_board_that_restarts_when_the_port_opens(dialect):
    # Such a board swallows the first lines while booting, then prints its banner.
    clock = ScaledClock(speed=50.0)
    section = stage(reply_timeout_s=0.5)
    emulator = GcodeEmulator(clock=clock, stage=section, focus=FOCUS, motion=MOTION, dialect=dialect)
    port = emulator.start()
    emulator.inject("drop_reply")
    speech = SPEECH[dialect]

    def boot_when_probed() -> None:
        if wait_until(lambda: any(line == "M115" for _, line in emulator.received)):
            emulator.inject("reset")

    booter = threading.Thread(target=boot_when_probed)
    booter.start()
    driver = GcodeController(port, baud=115200, stage=section, focus=FOCUS, illumination=LAMP, clock=clock)
    try:
        await driver.connect()
        booter.join()
        info = driver.describe()
        assert str(info["boot_banner"]).startswith(f"{speech.banner} / {speech.boot_line}")
        assert info["connected"] is True and info["position_um"] is None
        # The banner told the dialect; the first line, sent while it booted, was lost.
        assert info["dialect"] == dialect and "banner" in str(info["dialect_found"])
        assert [line for _, line in emulator.received].count("M115") >= 1
        await driver.home()
        assert await driver.position() == HOME
    finally:
        booter.join()
        await driver.close()
        emulator.stop()


async def test_boot_wait_ends_early_after_the_banner(dialect):
    clock = ScaledClock(speed=50.0)
    emulator = GcodeEmulator(clock=clock, stage=stage(), focus=FOCUS, motion=MOTION, dialect=dialect)
    port = emulator.start()
    driver = GcodeController(
        port, baud=115200, stage=stage(), focus=FOCUS, illumination=LAMP, clock=clock, boot_wait_s=3.0
    )
    timer = threading.Timer(0.1, emulator.inject, args=("reset",))
    try:
        started = time.monotonic()
        timer.start()
        await driver.connect()
        # Banner after 0.1 s, then 0.2 s of quiet: far less than the 3 s allowed.
        assert time.monotonic() - started < 1.5
        assert str(driver.describe()["boot_banner"]).startswith(SPEECH[dialect].banner)
        # Nothing was sent during the boot, and the banner told the dialect: no need to ask.
        assert emulator.received[0][1] == SPEECH[dialect].report
        assert driver.describe()["dialect"] == dialect and "banner" in str(driver.describe()["dialect_found"])
    finally:
        timer.cancel()
        await driver.close()
        emulator.stop()


async def test_a_second_owner_of_the_port_is_refused(dialect):
    async with rig(dialect=dialect, home=False) as r:
        second = GcodeController(
            r.emulator.link_path, baud=115200, stage=stage(), focus=FOCUS, illumination=LAMP, clock=r.clock
        )
        with pytest.raises(MotionError, match="is in use by another program"):
            await second.connect()
        assert r.driver.describe()["connected"] is True


@pytest.mark.parametrize("driver_dialect", ["reprap", "grbl", "auto"])
async def test_a_board_speaking_another_language_is_pointed_at_the_dialect(driver_dialect):
    master, slave = os.openpty()
    tty.setraw(slave)
    stop = threading.Event()

    def answer_everything_wrongly() -> None:
        deadline = time.monotonic() + 10.0  # bounded: the driver gives up long before
        while not stop.is_set() and time.monotonic() < deadline:
            ready, _, _ = select.select([master], [], [], 0.02)
            if ready and os.read(master, 1024):
                os.write(master, b"huh?\n")

    board = threading.Thread(target=answer_everything_wrongly)
    board.start()
    try:
        driver = GcodeController(
            os.ttyname(slave), baud=115200, stage=stage(reply_timeout_s=0.3), focus=FOCUS,
            illumination=LAMP, clock=ScaledClock(), dialect=driver_dialect,
        )
        with pytest.raises(MotionError) as caught:
            await driver.connect()
        message = str(caught.value)
        if driver_dialect == "reprap":
            assert "unexpected reply 'huh?' to 'M114'" in message
            assert "speaks the RepRap-style G-code dialect described in drivers/gcode/dialect.py" in message
        elif driver_dialect == "grbl":
            assert "unexpected reply 'huh?' to 'the b'?' status request'" in message
            assert "speaks the grbl dialect described in drivers/gcode/grbl.py" in message
        else:
            assert "answers in neither known dialect (got ['huh?'" in message
            assert "set `dialect` in [stage] (reprap or grbl)" in message
        if driver_dialect != "auto":
            described_in = driver.describe()["dialect"]
            assert described_in == driver_dialect
            module = "dialect.py" if driver_dialect == "reprap" else "grbl.py"
            assert os.path.exists(os.path.join(os.path.dirname(__file__), "..", "drivers", "gcode", module))
        assert driver.describe()["connected"] is False
    finally:
        stop.set()
        board.join()
        os.close(master)
        os.close(slave)


# ------------------------------------------------- what real boards of each family do


async def test_a_damaged_line_costs_a_resend_not_a_wrong_move(dialect):
    async with rig(dialect=dialect) as r:
        await r.driver.move_to(x_um=2000.0)
        for target in (Position(12000.0, 3000.0, 1500.0), Position(4000.0, 8000.0, 1200.0)):
            r.emulator.inject("corrupt_line")  # the next line the driver sends is hit by noise
            assert await r.driver.move_to(target.x_um, target.y_um, target.z_um) == target
            assert r.emulator.physical_position() == pytest.approx(target)
            assert await r.driver.position() == target
        assert r.driver.describe()["resends"] == 2
        if dialect == "reprap":
            # Numbered and checksummed (from memory: RepRap-family firmware asks again).
            assert r.driver.describe()["line_checksums"] is True


async def test_without_checksums_a_refused_damaged_line_is_still_resent():
    async with rig(dialect="reprap", line_checksums=False) as r:
        r.emulator.inject("corrupt_line")
        assert await r.driver.move_to(x_um=7000.0) == Position(7000.0, 0.0, 0.0)
        assert r.emulator.physical_position().x_um == pytest.approx(7000.0)
        info = r.driver.describe()
        assert info["line_checksums"] is False and info["resends"] == 1
        assert not any(line.startswith("M110") for line in r.sent())


async def test_a_line_that_keeps_arriving_damaged_gives_up_with_advice(dialect):
    async with rig(dialect=dialect) as r:
        mark = len(r.emulator.received)
        r.emulator.line_noise = True
        try:
            with pytest.raises(MotionError, match=r"(?i)damaged .*check the USB cable"):
                await r.driver.move_to(x_um=9000.0)
        finally:
            r.emulator.line_noise = False
        assert r.emulator.physical_position().x_um == 0.0  # never ran a damaged line
        assert len(r.sent(mark)) <= 40  # bounded retries
        await r.driver.home()
        assert await r.driver.move_to(x_um=9000.0) == Position(9000.0, 0.0, 0.0)


async def test_busy_keepalives_during_long_moves_and_homing_are_taken_in_stride():
    # From memory: RepRap-family boards print "echo:busy: processing" every 2 s while a
    # blocking command (homing, M400) runs.
    async with rig(dialect="reprap", speed=20.0, busy_interval_s=0.5) as r:
        assert await r.driver.move_to(x_um=100000.0) == Position(100000.0, 0.0, 0.0)  # 12.7 s on the clock
        await r.driver.home()
        assert r.emulator.busy_sent >= 20
        assert await r.driver.position() == HOME


async def test_the_dialect_can_be_set_instead_of_found(dialect):
    async with rig(dialect=dialect, driver_dialect=dialect) as r:
        info = r.driver.describe()
        assert info["dialect"] == dialect and info["dialect_found"] == "set in the profile"
        assert "M115" not in r.sent() or dialect == "reprap"  # no asking which dialect
        assert await r.driver.move_to(z_um=1500.0) == Position(0.0, 0.0, 1500.0)


async def test_a_wrongly_set_dialect_is_a_clear_error():
    clock = ScaledClock(speed=50.0)
    emulator = GcodeEmulator(clock=clock, stage=stage(), focus=FOCUS, motion=MOTION, dialect="grbl")
    port = emulator.start()
    driver = GcodeController(port, baud=115200, stage=stage(reply_timeout_s=0.3), focus=FOCUS,
                             illumination=LAMP, clock=clock, dialect="reprap")
    try:
        with pytest.raises(MotionError, match=r"speaks the RepRap-style G-code dialect"):
            await driver.connect()
    finally:
        await driver.close()
        emulator.stop()


async def test_grbl_alarm_loses_the_position_and_homing_resets_the_board():
    async with rig(dialect="grbl") as r:
        await r.driver.move_to(x_um=5000.0)
        move = asyncio.create_task(r.driver.move_to(x_um=60000.0))
        assert await asyncio.to_thread(wait_until, lambda: r.sent()[-1:] == ["G4 P0"])
        r.emulator.inject("limit")
        with pytest.raises(MotionError, match=r"halted \(alarm 1: hard limit triggered"):
            await move
        stopped = r.emulator.physical_position()
        assert 5000.0 < stopped.x_um < 60000.0
        with pytest.raises(PositionUnknownError, match="alarm 1"):
            await r.driver.position()
        mark = len(r.emulator.received)
        await r.driver.home()
        # The alarm needs a soft reset before $H, then the G92 offset is cleared.
        assert r.sent(mark)[:1] == ["\x18"] and "$H" in r.sent(mark) and "G92.1" in r.sent(mark)
        assert await r.driver.move_to(x_um=1000.0) == Position(1000.0, 0.0, 0.0)


async def test_grbl_declared_position_is_a_work_offset_the_driver_follows():
    async with rig(dialect="grbl") as r:
        await r.driver.move_to(x_um=10000.0, y_um=5000.0)
        await r.driver.set_position(0.0, 0.0, 0.0)
        assert await r.driver.position() == HOME
        # Reports carry the offset only now and then; the driver keeps it between them.
        for _ in range(12):
            assert await r.driver.position() == HOME
        assert await r.driver.move_to(x_um=2000.0) == Position(2000.0, 0.0, 0.0)
        assert r.emulator.physical_position().x_um == pytest.approx(12000.0)
        await r.driver.home()
        assert await r.driver.position() == HOME
        assert r.emulator.physical_position() == HOME


async def test_grbl_board_found_locked_loses_the_position_and_is_homed():
    async with rig(dialect="grbl") as r:
        await r.driver.move_to(x_um=3000.0)
        # The board slipped into its lock unseen (say, someone typed on another link):
        # the refusal error:9 counts as an alarm, not as a plain refusal.
        r.emulator._fw._locked = True  # type: ignore[attr-defined]
        with pytest.raises(MotionError, match=r"halted \(alarm lock \(error 9"):
            await r.driver.move_to(x_um=4000.0)
        assert r.emulator.physical_position().x_um == pytest.approx(3000.0)
        with pytest.raises(PositionUnknownError, match="alarm lock"):
            await r.driver.position()
        await r.driver.home()
        assert await r.driver.move_to(x_um=4000.0) == Position(4000.0, 0.0, 0.0)
