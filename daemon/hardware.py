"""Builds the :class:`~daemon.scope.Scope` for a profile from the registered drivers.

The stage driver opens first: it gives the motion controller, the clock everything runs
on, what is known of the real scene (ground truth) and, for a simulated stage, the bench
the simulated camera images. Then the camera driver opens with that build in hand. Which
drivers exist and how each is opened is the registry's business (:mod:`drivers.registry`).
"""

from __future__ import annotations

from pathlib import Path

from daemon.profile import Profile
from daemon.scope import Scope
from drivers.registry import CameraContext, StageContext, camera_driver, stage_driver


def build_scope(
    profile: Profile, *, sim_speed: float | None = None, data_dir: Path | None = None
) -> Scope:
    """Wire drivers for ``profile``. Call ``await scope.start()`` (or ``async with``) to open them.

    ``sim_speed`` overrides a simulated clock's speed; ``data_dir`` is where a driver may
    keep state between runs (the simulated clock's reading, so that simulated time keeps
    running while the daemon is down).
    """
    stage_spec = stage_driver(profile.stage.driver)
    camera_spec = camera_driver(profile.camera.driver)
    build = stage_spec.open(StageContext(profile=profile, sim_speed=sim_speed, data_dir=data_dir))
    try:
        camera = camera_spec.open(CameraContext(profile=profile, stage=build))
    except BaseException:
        build.stop()
        raise
    return Scope(profile, camera, build.motion, build.clock, truth=build.truth, on_stop=build.stop)
