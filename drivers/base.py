"""The small async interfaces every camera and motion controller implements.

The daemon only ever talks to hardware through these. Positions are micrometres in
stage coordinates; ``z_um`` is the objective's focus position (larger = closer to the
vessel bottom on an inverted scope).
"""

from __future__ import annotations

import dataclasses
from typing import Protocol, runtime_checkable

import numpy as np


class HardwareError(RuntimeError):
    """A device did something the daemon cannot recover from by itself right now.

    The message is one line a technician can act on (what failed, what to do).
    """


class CameraError(HardwareError):
    pass


class MotionError(HardwareError):
    pass


class LimitError(MotionError):
    """A requested move lies outside the profile's soft limits; nothing was sent."""


class PositionUnknownError(MotionError):
    """The controller lost its position (reset, power) and must be homed or re-synced."""


@dataclasses.dataclass(frozen=True, slots=True)
class Frame:
    """One camera frame.

    ``pixels`` is 2-D (monochrome), uint8 or uint16. ``t_s`` is the acquisition time on
    the scope's clock (seconds since the Unix epoch, simulated on a simulated scope).
    """

    pixels: np.ndarray
    t_s: float
    exposure_ms: float
    gain_db: float
    bit_depth: int


@dataclasses.dataclass(frozen=True, slots=True)
class Position:
    x_um: float
    y_um: float
    z_um: float


@runtime_checkable
class Camera(Protocol):
    async def open(self) -> None: ...

    async def close(self) -> None: ...

    async def grab(self) -> Frame:
        """Return a frame exposed entirely after the call started (no stale buffers)."""
        ...

    async def set_exposure_ms(self, exposure_ms: float) -> None: ...

    async def set_gain_db(self, gain_db: float) -> None: ...

    def describe(self) -> dict[str, object]:
        """What was found: model, resolution, pixel format, controls supported."""
        ...


@runtime_checkable
class MotionController(Protocol):
    async def connect(self) -> None: ...

    async def close(self) -> None: ...

    async def home(self) -> None: ...

    async def move_to(
        self,
        x_um: float | None = None,
        y_um: float | None = None,
        z_um: float | None = None,
        *,
        backlash_approach: bool = True,
    ) -> Position:
        """Move (axes left ``None`` stay), wait until motion completes, return the position.

        Every final approach is made from below on the axes whose backlash the profile
        gives (always on the focus); ``backlash_approach=False`` goes straight to the
        target instead, leaving the play where the move leaves it (for measuring it)."""
        ...

    async def position(self) -> Position: ...

    async def set_lamp(self, on: bool, level: float = 1.0) -> None: ...

    def describe(self) -> dict[str, object]: ...
