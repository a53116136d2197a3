"""Soft limits and the focus approach plan (drivers/limits.py)."""

from __future__ import annotations

import math

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from drivers.base import LimitError, MotionError, Position
from drivers.limits import SoftLimits, approach_overshoot_um, plan_focus_approach
from tests.gcode_rig import FOCUS, STAGE

LIMITS = SoftLimits.from_sections(STAGE, FOCUS, source="hw_profiles/sim.toml")


def test_built_from_the_profile_sections():
    assert (LIMITS.x_min_um, LIMITS.x_max_um) == (STAGE.x_min_um, STAGE.x_max_um)
    assert (LIMITS.y_min_um, LIMITS.y_max_um) == (STAGE.y_min_um, STAGE.y_max_um)
    assert (LIMITS.z_min_um, LIMITS.z_safe_max_um) == (FOCUS.z_min_um, FOCUS.z_safe_max_um)
    assert SoftLimits.from_sections(STAGE, FOCUS).source == "the profile"


def test_inside_the_box_passes_including_the_edges():
    LIMITS.check(Position(0.0, 0.0, 0.0))
    LIMITS.check(Position(STAGE.x_max_um, STAGE.y_max_um, FOCUS.z_safe_max_um))
    assert LIMITS.contains(Position(60000.0, 40000.0, 1500.0))


@pytest.mark.parametrize(
    ("position", "message"),
    [
        (Position(0.0, 0.0, 3100.0),
         "z 3100.0 um is above the focus safe limit z_safe_max_um = 3000.0 um ([focus] in hw_profiles/sim.toml); nothing was sent"),
        (Position(0.0, 0.0, -1.0),
         "z -1.0 um is below the focus lower limit z_min_um = 0.0 um ([focus] in hw_profiles/sim.toml); nothing was sent"),
        (Position(130000.0, 0.0, 0.0),
         "x 130000.0 um is above the stage soft limit x_max_um = 127760.0 um ([stage] in hw_profiles/sim.toml); nothing was sent"),
        (Position(0.0, -0.5, 0.0),
         "y -0.5 um is below the stage soft limit y_min_um = 0.0 um ([stage] in hw_profiles/sim.toml); nothing was sent"),
    ],
)
def test_outside_the_box_names_the_limit(position, message):
    with pytest.raises(LimitError) as caught:
        LIMITS.check(position)
    assert str(caught.value) == message
    assert isinstance(caught.value, MotionError)
    assert not LIMITS.contains(position)


@pytest.mark.parametrize("bad", [math.nan, math.inf, -math.inf])
def test_non_finite_targets_are_refused(bad):
    with pytest.raises(LimitError, match="not a finite number"):
        LIMITS.check(Position(1.0, 1.0, bad))


def test_path_check_names_the_offending_waypoint():
    with pytest.raises(LimitError, match=r"z 3001\.0 um \(backlash approach point\)"):
        LIMITS.check_path([(Position(0, 0, 100.0), "target"), (Position(0, 0, 3001.0), "backlash approach point")])


def test_overshoot_exceeds_the_backlash():
    for backlash in (0.0, 2.0, 10.0, 25.0, 400.0):
        assert approach_overshoot_um(backlash) > backlash


def test_upward_focus_moves_are_direct():
    assert plan_focus_approach(100.0, 200.0, backlash_um=10.0, z_min_um=0.0) == [200.0]
    assert plan_focus_approach(200.0, 200.0, backlash_um=10.0, z_min_um=0.0) == [200.0]


def test_downward_focus_moves_come_back_up():
    overshoot = approach_overshoot_um(10.0)
    assert plan_focus_approach(1500.0, 1400.0, backlash_um=10.0, z_min_um=0.0) == [1400.0 - overshoot, 1400.0]


def test_approach_point_is_clamped_at_z_min():
    assert plan_focus_approach(100.0, 5.0, backlash_um=10.0, z_min_um=0.0) == [0.0, 5.0]
    # Already at the lower limit: nothing lower to come from.
    assert plan_focus_approach(100.0, 0.0, backlash_um=10.0, z_min_um=0.0) == [0.0]


@settings(max_examples=300, deadline=None)
@given(
    current=st.floats(0.0, 3000.0),
    target=st.floats(0.0, 3000.0),
    backlash=st.floats(0.0, 200.0),
)
def test_plan_stays_inside_and_ends_from_below(current, target, backlash):
    plan = plan_focus_approach(current, target, backlash_um=backlash, z_min_um=0.0)
    assert plan[-1] == target
    assert all(0.0 <= z <= max(current, target) for z in plan)  # never above start or target
    if len(plan) == 2:
        assert plan[0] < plan[1]  # the last leg goes up
    if target < current and target >= approach_overshoot_um(backlash):
        # Room below: the last leg is longer than the backlash, so the play is taken up.
        assert plan[1] - plan[0] > backlash
    for z in plan:
        LIMITS.check(Position(0.0, 0.0, z))
