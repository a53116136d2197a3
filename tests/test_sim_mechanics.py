"""The simulated mechanics' imperfections (drivers/sim/mechanics.py), through the G-code
emulator as the camera sees them: play on x and y, stopping scatter, ringing, and the
ground truth that reports them."""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Iterator

import numpy as np
import pytest

from drivers.clock import ScaledClock
from drivers.sim.config import SimMotion
from drivers.sim.controller import GcodeEmulator
from drivers.sim.mechanics import Ringing
from tests.gcode_rig import FOCUS, STAGE, RawClient

pytestmark = pytest.mark.timeout(60)

# The demo profile's mechanics (hw_profiles/sim.toml [sim.motion]), whose defaults these are.
DEMO = SimMotion()


def rig(motion: SimMotion, speed: float, seed: int = 5) -> tuple[GcodeEmulator, RawClient, ScaledClock]:
    clock = ScaledClock(speed=speed, start_s=1_772_442_000.0)
    emulator = GcodeEmulator(clock=clock, stage=STAGE, focus=FOCUS, motion=motion, seed=seed)
    return emulator, RawClient(emulator.start()), clock


@pytest.fixture
def quiet_play() -> Iterator[tuple[GcodeEmulator, RawClient]]:
    """Play on every axis, but no scatter and no ringing: positions are exact."""
    emulator, client, _ = rig(dataclasses.replace(DEMO, repeatability_um=0.0, ring_amplitude_um=0.0), speed=200.0)
    yield emulator, client
    client.close()
    emulator.stop()


def go(client: RawClient, line: str) -> None:
    assert client.ask(line) == ["ok"]
    assert client.ask("M400") == ["ok"]


def test_x_and_y_drives_have_play(quiet_play):
    emulator, client = quiet_play
    bx, by = DEMO.x_backlash_um, DEMO.y_backlash_um
    assert bx > 0 and by > 0
    # Play model of a lead screw (common practice), as on the focus: moving up the mechanics
    # follow the motor; after a move down they trail above it by the backlash.
    go(client, "G1 X10 Y8")
    here = emulator.physical_position()
    assert (here.x_um, here.y_um) == pytest.approx((10000.0, 8000.0), abs=1e-6)
    go(client, "G1 X5 Y4")
    here = emulator.physical_position()
    assert (here.x_um, here.y_um) == pytest.approx((5000.0 + bx, 4000.0 + by), abs=1e-6)
    # Reversing by less than the play moves the motors only.
    go(client, "G1 X5.002 Y4.002")
    here = emulator.physical_position()
    assert (here.x_um, here.y_um) == pytest.approx((5000.0 + bx, 4000.0 + by), abs=1e-6)
    go(client, "G1 X5.5 Y4.5")
    here = emulator.physical_position()
    assert (here.x_um, here.y_um) == pytest.approx((5500.0, 4500.0), abs=1e-6)


def test_homing_takes_the_play_up(quiet_play):
    emulator, client = quiet_play
    go(client, "G1 X10 Y8 Z1")
    go(client, "G28")
    here = emulator.physical_position()
    assert (here.x_um, here.y_um, here.z_um) == pytest.approx((0.0, 0.0, 0.0), abs=1e-6)


def test_stopping_scatter_has_the_configured_spread_and_repeats_per_seed():
    motion = dataclasses.replace(DEMO, x_backlash_um=0.0, y_backlash_um=0.0, ring_amplitude_um=0.0, repeatability_um=0.5)

    def stops(seed: int, n: int) -> np.ndarray:
        emulator, client, _ = rig(motion, speed=500.0, seed=seed)
        try:
            out = []
            for k in range(n):
                go(client, f"G1 X{20 + (k % 2) * 0.3:.1f} Y10")  # away and back
                go(client, "G1 X20 Y10")
                here = emulator.physical_position()
                out.append((here.x_um - 20000.0, here.y_um - 10000.0))
            return np.array(out)
        finally:
            client.close()
            emulator.stop()

    errors = stops(seed=11, n=60)
    assert np.array_equal(errors, stops(seed=11, n=60))  # the n-th move of a run: same error
    # 60 draws per axis: the sample standard deviation lies within +-30 % of sigma with
    # probability > 99.9 % (chi-square with 59 degrees of freedom, from memory).
    assert np.std(errors, axis=0, ddof=1) == pytest.approx([0.5, 0.5], rel=0.3)
    assert np.abs(np.mean(errors, axis=0)).max() < 0.5 * 4 / math.sqrt(60)


def test_stage_rings_after_a_move_as_a_damped_oscillation():
    motion = dataclasses.replace(DEMO, x_backlash_um=0.0, y_backlash_um=0.0, repeatability_um=0.0)
    emulator, client, clock = rig(motion, speed=1e-6)  # a clock that moves only when told to
    try:
        a, f, tau = motion.ring_amplitude_um, motion.ring_frequency_hz, motion.ring_decay_ms / 1000.0
        for axis, line in ((0, "G1 X0.3"), (1, "G1 X0.3 Y0.3")):
            t_start = clock.now()
            assert client.ask(line) == ["ok"]
            # 300 um never reaches full speed: it takes 2 sqrt(d / a) (kinematics, common practice).
            t_end = t_start + 2.0 * math.sqrt(300.0 / STAGE.xy_accel_um_s2)
            clock.advance(t_end - clock.now() + 0.001)
            for t in (0.001, 0.02, 0.05, 0.1, 0.2, 0.5):
                clock.advance(t_end + t - clock.now())
                here = emulator.physical_position()
                since = clock.now() - t_end
                # Underdamped second-order response released at the end of the move
                # (textbook control theory, e.g. Ogata, Modern Control Engineering; from memory).
                expected = a * math.exp(-since / tau) * math.sin(2.0 * math.pi * f * since)
                along, across = (here.x_um - 300.0, here.y_um - 300.0 * axis)[:: 1 if axis == 0 else -1]
                assert along == pytest.approx(expected, abs=0.01)
                assert across == pytest.approx(0.0, abs=1e-6)
    finally:
        client.close()
        emulator.stop()


def test_settle_time_is_the_last_moment_the_ringing_reaches_the_tolerance():
    ringing = Ringing.of(DEMO)
    for tolerance in (0.05, 0.1, 0.5, 1.0):
        settle = ringing.settle_s(tolerance)
        # Brute force on a 10 us grid, independent of the bisection.
        t = np.arange(0.0, 2.0, 1e-5)
        d = np.abs(ringing.amplitude_um * np.exp(-t / ringing.decay_s) * np.sin(2 * np.pi * ringing.frequency_hz * t))
        assert settle == pytest.approx(t[np.flatnonzero(d >= tolerance)[-1]], abs=2e-5)
    assert ringing.settle_s(10.0) == 0.0  # never reaches it


def test_ground_truth_reports_the_imperfections_and_real_hardware_knows_none():
    from drivers.registry import offline_truth
    from drivers.truth import GroundTruth, NoTruth
    from tests.helpers import sim_profile

    profile = sim_profile()
    truth = offline_truth(profile)
    assert isinstance(truth, GroundTruth)
    mount, motion = profile.sim.camera_mount, profile.sim.motion
    geometry = truth.camera_geometry()
    assert geometry == {
        "pixel_size_um": pytest.approx(profile.optics.pixel_size_um * (1 + mount.pixel_size_error_percent / 100)),
        "rotation_deg": mount.rotation_deg, "skew_deg": 0.0, "mirrored": mount.mirrored,
    }
    a = truth.image_px_per_um()
    assert abs(np.linalg.det(a)) == pytest.approx(geometry["pixel_size_um"] ** -2)
    # A sample displacement along stage +x appears in the image along (cos phi, -sin phi).
    assert math.degrees(math.atan2(-a[1, 0], a[0, 0])) == pytest.approx(mount.rotation_deg)
    assert truth.backlash_um() == {"x": motion.x_backlash_um, "y": motion.y_backlash_um, "z": motion.z_backlash_um}
    assert truth.repeatability_um() == motion.repeatability_um
    assert truth.settle_ms(0.1) == pytest.approx(1000.0 * Ringing.of(motion).settle_s(0.1))
    none = NoTruth()
    assert none.camera_geometry() is None and none.image_px_per_um() is None and none.backlash_um() is None
    assert none.repeatability_um() is None and none.settle_ms(0.1) is None
