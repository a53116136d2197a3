"""Builds the :class:`~daemon.scope.Scope` for a profile: real drivers or the simulated scope."""

from __future__ import annotations

from pathlib import Path

from drivers.options import ConfigError
from daemon.profile import Profile
from daemon.scope import Scope, SimHandles
from drivers.base import Camera, Position
from drivers.clock import Clock, ScaledClock, WallClock

SIM_CLOCK_FILE = "sim-clock.json"


def make_camera(profile: Profile, clock: Clock) -> Camera:
    cam = profile.camera
    if cam.driver == "opencv":
        from drivers.camera_opencv import OpenCVCamera

        return OpenCVCamera(cam, clock=clock)
    if cam.driver == "replay":
        from drivers.camera_replay import ReplayCamera

        return ReplayCamera(cam, clock)
    if cam.driver == "board":
        from drivers.camera_board import BoardCamera

        return BoardCamera(cam, clock=clock)
    raise ConfigError(profile.path, "camera", "driver", f"driver {cam.driver!r} needs the simulated stage")


def build_scope(
    profile: Profile, *, sim_speed: float | None = None, data_dir: Path | None = None
) -> Scope:
    """Wire drivers for ``profile``. Call ``await scope.start()`` (or ``async with``) to open them.

    On the simulated scope the clock persists in ``data_dir`` (when given), so simulated
    time keeps running while the daemon is down, and the G-code emulator is served on a
    pseudo-terminal that the real serial driver opens.
    """
    if profile.camera.driver == "sim" and profile.stage.driver != "sim":
        raise ConfigError(
            profile.path, "camera", "driver",
            "the sim camera images the simulated stage; set [stage] driver = \"sim\" too",
        )
    if profile.stage.driver == "sim":
        return _build_sim(profile, sim_speed=sim_speed, data_dir=data_dir)
    from drivers.gcode import GcodeController

    clock = WallClock()
    motion = GcodeController(
        profile.stage.port,
        baud=profile.stage.baud,
        stage=profile.stage,
        focus=profile.focus,
        illumination=profile.illumination,
        clock=clock,
    )
    return Scope(profile, make_camera(profile, clock), motion, clock)


def _build_sim(profile: Profile, *, sim_speed: float | None, data_dir: Path | None) -> Scope:
    from drivers.gcode import GcodeController
    from drivers.sim.camera import SimCamera
    from drivers.sim.controller import GcodeEmulator
    from drivers.sim.world import SimWorld

    assert profile.sim is not None  # load_profile guarantees [sim] for sim drivers
    world = SimWorld(profile)
    speed = sim_speed if sim_speed is not None else profile.sim.clock_speed
    if speed <= 0:
        raise ConfigError(profile.path, "sim", "clock_speed", f"--sim-speed must be > 0, got {speed}")
    state_file = data_dir / SIM_CLOCK_FILE if data_dir is not None else None
    clock = ScaledClock(speed, start_s=world.t0_s + profile.sim.culture_age_h * 3600.0, state_file=state_file)
    # Power on over well A1, a little below the focal plane, as a scope left parked would be.
    plate = profile.sim.plate
    start = Position(plate.a1_x_um, plate.a1_y_um, profile.sim.focal_plane.z0_um - 60.0)
    emulator = GcodeEmulator(
        clock=clock, stage=profile.stage, focus=profile.focus, motion=profile.sim.motion, start=start
    )
    port = emulator.start()
    motion = GcodeController(
        port,
        baud=profile.stage.baud,
        stage=profile.stage,
        focus=profile.focus,
        illumination=profile.illumination,
        clock=clock,
    )
    channel = profile.illumination.channel
    if profile.camera.driver == "sim":
        camera: Camera = SimCamera(
            world,
            profile.camera,
            clock,
            position_source=emulator.physical_position,
            lamp_source=lambda: emulator.lamp_level(channel),
        )
    else:
        camera = make_camera(profile, clock)
    return Scope(profile, camera, motion, clock, sim=SimHandles(world=world, emulator=emulator))
