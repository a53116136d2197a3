"""Which camera and stage drivers exist, what options each takes, and how each is opened.

Every driver module declares itself next to its code with a module-level ``DRIVER``
(:class:`CameraDriver` or :class:`StageDriver`): its name as written in a profile, a
one-line summary, its options dataclass (``option(...)`` fields, loaded strictly from
the profile's ``[camera]`` or ``[stage]`` beside the common fields of
:mod:`drivers.sections`) and how to open it. The tables below map names to modules,
which are imported only when a driver is looked up, so a driver's dependencies load only
when it is used. Adding a camera is one new file in ``drivers/`` and one line in
:data:`CAMERA_MODULES`.

The stage driver opens first (:class:`StageBuild`: the motion controller, the clock
everything runs on, the ground truth, and for a simulated stage the bench a simulated
camera images), then the camera driver with that build in its context.
"""

from __future__ import annotations

import dataclasses
import importlib
from collections.abc import Callable
from pathlib import Path
from typing import TYPE_CHECKING, Literal

from drivers.options import option_names
from drivers.truth import GroundTruth, NoTruth

if TYPE_CHECKING:
    from drivers.base import Camera, MotionController
    from drivers.clock import Clock
    from drivers.sections import HardwareSections

Kind = Literal["camera", "stage"]

CAMERA_MODULES: dict[str, str] = {
    "sim": "drivers.sim.camera",
    "opencv": "drivers.camera_opencv",
    "replay": "drivers.camera_replay",
    "board": "drivers.camera_board",
}
STAGE_MODULES: dict[str, str] = {
    "sim": "drivers.sim.bench",
    "gcode": "drivers.gcode",
}


class UnknownDriver(LookupError):
    """No driver of that name is registered. ``str()`` is one line listing the registered ones."""

    def __init__(self, kind: Kind, name: str) -> None:
        self.kind = kind
        self.name = name
        self.known = driver_names(kind)
        super().__init__(
            f"no {kind} driver {name!r}; registered: {', '.join(repr(n) for n in self.known)}"
        )


@dataclasses.dataclass
class StageBuild:
    """What an opened stage driver hands on: to the scope, and to the camera driver."""

    motion: MotionController
    clock: Clock
    truth: GroundTruth
    stop: Callable[[], None]  # releases what the build started; safe to call more than once
    bench: object | None = None  # what a simulated camera images (None on real hardware)


@dataclasses.dataclass(frozen=True)
class StageContext:
    profile: HardwareSections
    sim_speed: float | None = None  # a simulated clock's speed, overriding the profile's
    data_dir: Path | None = None  # where a driver may keep state between runs


@dataclasses.dataclass(frozen=True)
class CameraContext:
    profile: HardwareSections
    stage: StageBuild

    @property
    def clock(self) -> Clock:
        return self.stage.clock


@dataclasses.dataclass(frozen=True)
class OfflineTruthContext:
    """Ground truth for saved frames, without a running scope."""

    profile: HardwareSections
    frame_shape: tuple[int, int] | None = None  # (height, width) of the frames to judge
    data_dir: Path | None = None  # the data folder the frames were taken into (driver state)


@dataclasses.dataclass(frozen=True)
class CameraDriver:
    name: str
    summary: str
    options: type  # frozen dataclass of option() fields (may have none)
    open: Callable[[CameraContext], Camera]
    simulated: bool = False  # needs [sim] and the simulated stage


@dataclasses.dataclass(frozen=True)
class StageDriver:
    name: str
    summary: str
    options: type
    open: Callable[[StageContext], StageBuild]
    simulated: bool = False  # needs [sim]
    offline_truth: Callable[[OfflineTruthContext], GroundTruth] | None = None


def _modules(kind: Kind) -> dict[str, str]:
    return CAMERA_MODULES if kind == "camera" else STAGE_MODULES


def driver_names(kind: Kind) -> tuple[str, ...]:
    return tuple(_modules(kind))


def camera_names() -> tuple[str, ...]:
    return driver_names("camera")


def stage_names() -> tuple[str, ...]:
    return driver_names("stage")


def _load(kind: Kind, name: str) -> CameraDriver | StageDriver:
    module_name = _modules(kind).get(name)
    if module_name is None:
        raise UnknownDriver(kind, name)
    spec = getattr(importlib.import_module(module_name), "DRIVER", None)
    expected = CameraDriver if kind == "camera" else StageDriver
    if not isinstance(spec, expected) or spec.name != name:
        raise TypeError(f"{module_name} must declare DRIVER = {expected.__name__}(name={name!r}, ...)")
    return spec


def camera_driver(name: str) -> CameraDriver:
    """The camera driver registered as ``name``; :class:`UnknownDriver` if there is none."""
    spec = _load("camera", name)
    assert isinstance(spec, CameraDriver)
    return spec


def stage_driver(name: str) -> StageDriver:
    """The stage driver registered as ``name``; :class:`UnknownDriver` if there is none."""
    spec = _load("stage", name)
    assert isinstance(spec, StageDriver)
    return spec


def option_owners(kind: Kind, option: str) -> list[str]:
    """Registered drivers of ``kind`` whose own options include ``option``.

    For error messages only: a driver whose module cannot be imported here (a missing
    optional dependency) is skipped rather than failing the message.
    """
    owners = []
    for name in driver_names(kind):
        try:
            spec = _load(kind, name)
        except ImportError:
            continue
        if option in option_names(spec.options):
            owners.append(name)
    return owners


def sim_section() -> type:
    """The ``[sim]`` section's options class, read when a simulated driver is chosen."""
    from drivers.sim.config import SimConfig

    return SimConfig


def offline_truth(
    profile: HardwareSections, *, frame_shape: tuple[int, int] | None = None, data_dir: Path | None = None
) -> GroundTruth:
    """Ground truth for frames saved on this profile's scope: :class:`NoTruth` unless the
    stage driver knows it (the simulated stage rebuilds its world from the profile)."""
    build = stage_driver(profile.stage.driver).offline_truth
    if build is None:
        return NoTruth()
    return build(OfflineTruthContext(profile=profile, frame_shape=frame_shape, data_dir=data_dir))
