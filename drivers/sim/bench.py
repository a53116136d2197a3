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
from drivers.options import ConfigError, option
from drivers.registry import OfflineTruthContext, StageBuild, StageContext, StageDriver
from drivers.sections import HardwareSections, driver_options
from drivers.sim.controller import DIALECTS, GcodeEmulator
from drivers.sim.truth import SimTruth
from drivers.sim.world import SimWorld

SIM_CLOCK_FILE = "sim-clock.json"
# A pseudo-terminal ignores the line speed; any rate the driver accepts will do.
PTY_BAUD = 115200
# Power on a little below the focal plane, as a scope left parked would be.
PARKED_BELOW_FOCUS_UM = 60.0


@dataclasses.dataclass(frozen=True, kw_only=True)
class SimStageOptions:
    """The simulated stage takes its mechanics from [sim.motion]; [stage] says which language
    its board speaks (the driver finds out at connect, as with a real board)."""

    dialect: str = option(
        "reprap", doc="the G-code dialect the simulated board speaks: reprap or grbl", choices=DIALECTS
    )


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
    # The speed the clock was saved with goes on unless one is given (--sim-speed).
    state_file = ctx.data_dir / SIM_CLOCK_FILE if ctx.data_dir is not None else None
    saved = ScaledClock.saved_state(state_file) if state_file is not None else None
    speed = ctx.sim_speed if ctx.sim_speed is not None else (None if saved else sim.clock_speed)  # type: ignore[attr-defined]
    if speed is not None and not speed > 0:
        raise ConfigError(profile.path, "sim", "clock_speed", f"--sim-speed must be > 0, got {speed}")
    age_s = sim.culture_age_h * 3600.0  # type: ignore[attr-defined]
    clock = ScaledClock(speed, start_s=world.t0_s + age_s, state_file=state_file)
    if sim.start_time == "now":  # type: ignore[attr-defined]
        # Seeded culture_age_h before the clock first started; the same world on every restart.
        world.t0_s = clock.world.setdefault("seeded_s", world.t0_s)
        clock.save()
    world.frame_counter = clock.frames
    # Power on over well A1, as a plate put in by hand would sit.
    plate, focal = sim.plate, sim.focal_plane  # type: ignore[attr-defined]
    start = Position(plate.a1_x_um, plate.a1_y_um, focal.z0_um - PARKED_BELOW_FOCUS_UM)
    opts = driver_options(profile.stage, SimStageOptions)
    emulator = GcodeEmulator(
        clock=clock, stage=profile.stage, focus=profile.focus, motion=sim.motion, start=start,  # type: ignore[attr-defined]
        dialect=opts.dialect,
        seed=sim.seed,  # type: ignore[attr-defined]
    )
    port = emulator.start()
    faults = sim.faults  # type: ignore[attr-defined]
    emulator.schedule_faults(faults.schedule(), reconnect_after_s=faults.reconnect_after_s)
    motion = GcodeController(
        port,
        baud=PTY_BAUD,
        stage=profile.stage,
        focus=profile.focus,
        illumination=profile.illumination,
        clock=clock,
    )
    def stop() -> None:
        emulator.stop()
        clock.save()  # with the frame count, so the noise goes on after a restart

    return StageBuild(
        motion=motion,
        clock=clock,
        truth=SimTruth(world, emulator),
        stop=stop,
        bench=SimBench(world=world, emulator=emulator, lamp_channel=profile.illumination.channel),
    )


def offline_truth(ctx: OfflineTruthContext) -> SimTruth:
    """The world rebuilt from the profile (same seed, same culture), framed like the frames.

    With ``[sim] start_time = "now"`` the seeding time is read from the data folder's
    clock state, where the simulated stage fixed it."""
    profile = ctx.profile
    sim = _sim_section(profile)
    if ctx.frame_shape is not None:
        h, w = ctx.frame_shape
        camera = dataclasses.replace(profile.camera, width_px=w, height_px=h)
        profile = dataclasses.replace(profile, camera=camera)  # type: ignore[type-var]
    world = SimWorld(profile)
    if sim.start_time == "now":  # type: ignore[attr-defined]
        saved = ScaledClock.saved_state(ctx.data_dir / SIM_CLOCK_FILE) if ctx.data_dir is not None else None
        seeded = (saved or {}).get("world", {}).get("seeded_s")
        if seeded is None:
            raise ConfigError(
                profile.path, "sim", "start_time",
                "is 'now': the seeding time is kept in the data folder's clock state; give the data folder "
                "the frames were taken into, or set an ISO 8601 start_time",
            )
        world.t0_s = float(seeded)
    return SimTruth(world)


DRIVER = StageDriver(
    name="sim",
    summary="the simulated stage and focus: a G-code emulator on a pseudo-terminal over a simulated plate",
    options=SimStageOptions,
    open=open_stage,
    simulated=True,
    offline_truth=offline_truth,
)
