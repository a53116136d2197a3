"""The simulated stage: world, clock and G-code emulator, driven by the real G-code driver.

Opening it builds the simulated world from the profile, starts the accelerated clock
(its reading kept in the data folder, so simulated time runs on while the daemon is
down) and serves the G-code emulator on a pseudo-terminal that the real serial driver
(:mod:`drivers.gcode`) opens like any controller board. The :class:`SimBench` it hands on
is what the simulated camera images: the world, and where the emulator's mechanics
physically are.
"""

from __future__ import annotations

import dataclasses

from drivers.base import Position
from drivers.clock import ScaledClock
from drivers.gcode import GcodeController
from drivers.options import ConfigError
from drivers.registry import OfflineTruthContext, StageBuild, StageContext, StageDriver
from drivers.sections import HardwareSections
from drivers.sim.controller import GcodeEmulator
from drivers.sim.truth import SimTruth
from drivers.sim.world import SimWorld

SIM_CLOCK_FILE = "sim-clock.json"
# A pseudo-terminal ignores the line speed; any rate the driver accepts will do.
PTY_BAUD = 115200
# Power on a little below the focal plane, as a scope left parked would be.
PARKED_BELOW_FOCUS_UM = 60.0


@dataclasses.dataclass(frozen=True, kw_only=True)
class SimStageOptions:
    """The simulated stage takes its mechanics from [sim.motion]; nothing more in [stage]."""


@dataclasses.dataclass
class SimBench:
    world: SimWorld
    emulator: GcodeEmulator
    lamp_channel: int

    def position(self) -> Position:
        return self.emulator.physical_position()

    def lamp_level(self) -> float:
        return self.emulator.lamp_level(self.lamp_channel)


def _sim_section(profile: HardwareSections) -> object:
    if profile.sim is None:
        raise ConfigError(profile.path, "sim", None, "missing section [sim]: the simulated scope needs it")
    return profile.sim


def open_stage(ctx: StageContext) -> StageBuild:
    profile = ctx.profile
    sim = _sim_section(profile)
    world = SimWorld(profile)
    speed = ctx.sim_speed if ctx.sim_speed is not None else sim.clock_speed  # type: ignore[attr-defined]
    if not speed > 0:
        raise ConfigError(profile.path, "sim", "clock_speed", f"--sim-speed must be > 0, got {speed}")
    state_file = ctx.data_dir / SIM_CLOCK_FILE if ctx.data_dir is not None else None
    clock = ScaledClock(
        speed, start_s=world.t0_s + sim.culture_age_h * 3600.0, state_file=state_file  # type: ignore[attr-defined]
    )
    # Power on over well A1, as a plate put in by hand would sit.
    plate, focal = sim.plate, sim.focal_plane  # type: ignore[attr-defined]
    start = Position(plate.a1_x_um, plate.a1_y_um, focal.z0_um - PARKED_BELOW_FOCUS_UM)
    emulator = GcodeEmulator(
        clock=clock, stage=profile.stage, focus=profile.focus, motion=sim.motion, start=start,  # type: ignore[attr-defined]
        seed=sim.seed,  # type: ignore[attr-defined]
    )
    port = emulator.start()
    motion = GcodeController(
        port,
        baud=PTY_BAUD,
        stage=profile.stage,
        focus=profile.focus,
        illumination=profile.illumination,
        clock=clock,
    )
    return StageBuild(
        motion=motion,
        clock=clock,
        truth=SimTruth(world, emulator),
        stop=emulator.stop,
        bench=SimBench(world=world, emulator=emulator, lamp_channel=profile.illumination.channel),
    )


def offline_truth(ctx: OfflineTruthContext) -> SimTruth:
    """The world rebuilt from the profile (same seed, same culture), framed like the frames."""
    profile = ctx.profile
    _sim_section(profile)
    if ctx.frame_shape is not None:
        h, w = ctx.frame_shape
        camera = dataclasses.replace(profile.camera, width_px=w, height_px=h)
        profile = dataclasses.replace(profile, camera=camera)  # type: ignore[type-var]
    return SimTruth(SimWorld(profile))


DRIVER = StageDriver(
    name="sim",
    summary="the simulated stage and focus: a G-code emulator on a pseudo-terminal over a simulated plate",
    options=SimStageOptions,
    open=open_stage,
    simulated=True,
    offline_truth=offline_truth,
)
