"""Backlash approaches of the G-code driver on x and y (once the profile knows the play), and
moves straight to the target for measuring the play, against the emulator's true play."""

from __future__ import annotations

import contextlib
import dataclasses
from collections.abc import AsyncIterator

import pytest

from drivers.base import LimitError
from drivers.clock import ScaledClock
from drivers.gcode import GcodeController
from drivers.limits import approach_overshoot_um
from drivers.sections import StageSection
from drivers.sim.controller import GcodeEmulator
from tests.gcode_rig import FOCUS, LAMP, MOTION, stage

pytestmark = pytest.mark.timeout(30)

# Play on every axis, as the demo scope has, but no stopping scatter or ringing: exact positions.
PLAY = dataclasses.replace(MOTION, x_backlash_um=7.0, y_backlash_um=4.5)


@contextlib.asynccontextmanager
async def driver_on(section: StageSection) -> AsyncIterator[tuple[GcodeEmulator, GcodeController]]:
    clock = ScaledClock(speed=50.0, start_s=1_772_442_000.0)
    emulator = GcodeEmulator(clock=clock, stage=section, focus=FOCUS, motion=PLAY)
    driver = GcodeController(emulator.start(), baud=115200, stage=section, focus=FOCUS, illumination=LAMP, clock=clock)
    try:
        await driver.connect()
        await driver.home()
        yield emulator, driver
    finally:
        await driver.close()
        emulator.stop()


def xy_lines(emulator: GcodeEmulator, since: int) -> list[str]:
    return [line for _, line in emulator.received[since:] if line.startswith("G1")]


def axis_values(line: str) -> dict[str, float]:
    """The axis words of a G1 line in um (G-code positions are in mm)."""
    return {word[0]: float(word[1:]) * 1000.0 for word in line.split()[1:] if word[0] in "XYZ"}


async def test_without_a_known_backlash_xy_moves_go_straight_and_keep_the_play():
    async with driver_on(stage(reply_timeout_s=0.5)) as (emulator, driver):
        await driver.move_to(x_um=20000.0, y_um=15000.0)
        mark = len(emulator.received)
        await driver.move_to(x_um=19000.0, y_um=14000.0)
        assert len(xy_lines(emulator, mark)) == 1
        here = emulator.physical_position()
        assert (here.x_um, here.y_um) == pytest.approx((19000.0 + PLAY.x_backlash_um, 14000.0 + PLAY.y_backlash_um), abs=1e-3)


async def test_with_the_backlash_in_the_profile_every_xy_move_ends_from_below():
    section = stage(reply_timeout_s=0.5, backlash_x_um=10.0, backlash_y_um=6.0)
    async with driver_on(section) as (emulator, driver):
        over_x, over_y = approach_overshoot_um(10.0), approach_overshoot_um(6.0)
        cur_x, cur_y = 0.0, 0.0
        for x, y in ((20000.0, 15000.0), (19000.0, 14000.0), (19500.0, 13000.0), (19400.0, 13100.0)):
            mark = len(emulator.received)
            await driver.move_to(x_um=x, y_um=y)
            lines = xy_lines(emulator, mark)
            if x < cur_x or y < cur_y:
                # One point below the target on the axes that come down, then up to it.
                assert len(lines) == 2
                first = axis_values(lines[0])
                assert first["X"] == pytest.approx(x - over_x if x < cur_x else x, abs=0.5)
                assert first["Y"] == pytest.approx(y - over_y if y < cur_y else y, abs=0.5)
            else:
                assert len(lines) == 1
            # With the play taken up from below the mechanics sit exactly at the target.
            here = emulator.physical_position()
            assert (here.x_um, here.y_um) == pytest.approx((x, y), abs=1e-3)
            cur_x, cur_y = x, y
        # A target closer to the lower limits than the overshoot gets a shorter approach,
        # clamped there: from 0 a rise of 3 um cannot take up 7 um of play.
        mark = len(emulator.received)
        await driver.move_to(x_um=3.0, y_um=2.0)
        first = axis_values(xy_lines(emulator, mark)[0])
        assert (first["X"], first["Y"]) == (0.0, 0.0)
        here = emulator.physical_position()
        assert (here.x_um, here.y_um) == pytest.approx((PLAY.x_backlash_um, PLAY.y_backlash_um), abs=1e-3)


async def test_a_straight_move_leaves_the_play_where_the_move_leaves_it():
    section = stage(reply_timeout_s=0.5, backlash_x_um=10.0, backlash_y_um=6.0)
    async with driver_on(section) as (emulator, driver):
        await driver.move_to(x_um=20000.0, y_um=15000.0, z_um=1500.0)
        mark = len(emulator.received)
        await driver.move_to(x_um=19000.0, y_um=14000.0, z_um=1400.0, backlash_approach=False)
        assert len(xy_lines(emulator, mark)) == 1
        here = emulator.physical_position()
        expected = (19000.0 + PLAY.x_backlash_um, 14000.0 + PLAY.y_backlash_um, 1400.0 + PLAY.z_backlash_um)
        assert (here.x_um, here.y_um, here.z_um) == pytest.approx(expected, abs=0.06)
        # Straight or not, the soft limits hold: nothing is sent for a target beyond them.
        mark = len(emulator.received)
        with pytest.raises(LimitError, match="focus safe limit"):
            await driver.move_to(z_um=FOCUS.z_safe_max_um + 1.0, backlash_approach=False)
        assert xy_lines(emulator, mark) == []
