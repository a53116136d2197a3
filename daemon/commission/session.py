"""How commissioning moves and images: approaches from a chosen side, waits, frames, bursts.

Every move goes through the scope and its driver, so the profile's soft limits are
checked before anything is sent and the focus never goes above ``z_safe_max_um``. Moves
are made straight (``backlash_approach=False``): the measurements choose the side each
target is approached from themselves, since that is what they measure. The scope is
opened without the profile's ``[stage] settle_ms`` wait (:func:`commissioning_profile`),
so a burst of frames can start the moment a move ends; every other step waits
``settle_wait_s`` after each x/y move instead, which starts generous and becomes the
measured settling time once it is known.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Callable
from typing import TYPE_CHECKING

import numpy as np

from drivers.base import Frame, Position
from drivers.sections import EXPOSURE_RANGE_MS, GAIN_RANGE_DB

if TYPE_CHECKING:
    from daemon.profile import Profile
    from daemon.scope import Scope

Progress = Callable[[int, int, str], None]

# Before the settling time is measured (common practice for small stages: well under a second).
FIRST_SETTLE_WAIT_S = 0.6
SETTLE_WAIT_MARGIN = 1.5  # wait this many measured settling times (and at least 20 ms more)
APPROACH_UM = 100.0  # how far before a target the approach starts: beyond any budget stage's play
BURST_EXPOSURE_DIVISOR = 2.0


def commissioning_profile(profile: Profile) -> Profile:
    """The profile the commissioning scope runs on: no settle wait after x/y moves (bursts
    must see the stage settle), every other value as it is."""
    return dataclasses.replace(profile, stage=dataclasses.replace(profile.stage, settle_ms=0.0))


@dataclasses.dataclass(frozen=True, slots=True)
class Timed:
    """A frame's pixels and when (s after the burst's move ended) its exposure was half done."""

    t_s: float
    pixels: np.ndarray


class Session:
    def __init__(self, scope: Scope, *, progress: Progress | None = None, total_frames: int = 0) -> None:
        self.scope = scope
        cam = scope.profile.camera
        self.exposure_ms = cam.exposure_ms
        self.gain_db = cam.gain_db
        self.settle_wait_s = FIRST_SETTLE_WAIT_S
        self.approach_um = APPROACH_UM
        self.frames = 0
        self.total_frames = total_frames
        self._progress = progress
        self._message = ""

    # -- progress -------------------------------------------------------------------------

    def step(self, message: str) -> None:
        """Name the step now running (shown with the frame count)."""
        self._message = message
        self._show()

    def _show(self) -> None:
        if self._progress is not None:
            total = max(self.total_frames, self.frames)
            self._progress(self.frames, total, self._message)

    # -- camera ---------------------------------------------------------------------------

    def exposure_range_ms(self) -> tuple[float, float]:
        """The exposures the camera says it takes (its own controls, else the profile's limits)."""
        controls = self.scope.camera.describe().get("controls", {})
        exposure = controls.get("exposure", {}) if isinstance(controls, dict) else {}
        lo = float(exposure.get("min_ms", EXPOSURE_RANGE_MS[0]))
        hi = float(exposure.get("max_ms", EXPOSURE_RANGE_MS[1]))
        return max(lo, EXPOSURE_RANGE_MS[0]), min(hi, EXPOSURE_RANGE_MS[1])

    def use_exposure(self, exposure_ms: float, gain_db: float | None = None) -> None:
        """Every later frame (the autofocus' too) is exposed so."""
        self.exposure_ms = exposure_ms
        if gain_db is not None:
            self.gain_db = gain_db
        profile = self.scope.profile
        camera = dataclasses.replace(profile.camera, exposure_ms=self.exposure_ms, gain_db=self.gain_db)
        self.scope.profile = dataclasses.replace(profile, camera=camera)

    async def frame(self, *, lamp: bool = True, exposure_ms: float | None = None) -> Frame:
        frame = await self.scope.capture(
            exposure_ms=self.exposure_ms if exposure_ms is None else exposure_ms, gain_db=self.gain_db, lamp=lamp
        )
        self.frames += 1
        self._show()
        return frame

    async def burst(self, duration_s: float, *, started_s: float) -> list[Timed]:
        """Frames back to back, the lamp on throughout, for ``duration_s`` on the scope's clock.

        Exposures are half the session's (gain raised to match, where the camera allows)
        so the stage's motion is sampled finely; times are counted from ``started_s`` to
        each exposure's middle."""
        scope = self.scope
        lo, _ = self.exposure_range_ms()
        short_ms = max(lo, self.exposure_ms / BURST_EXPOSURE_DIVISOR)
        gain = min(GAIN_RANGE_DB[1], self.gain_db + 20.0 * math.log10(self.exposure_ms / short_ms))
        await scope.camera.set_exposure_ms(short_ms)
        await scope.camera.set_gain_db(gain)
        illum = scope.profile.illumination
        await scope.motion.set_lamp(True, illum.level)
        out: list[Timed] = []
        try:
            while not out or out[-1].t_s < duration_s:
                frame = await scope.camera.grab()
                out.append(Timed(frame.t_s + frame.exposure_ms / 2000.0 - started_s, frame.pixels))
                self.frames += 1
                if len(out) % 10 == 0:
                    self._show()
        finally:
            await scope.motion.set_lamp(False)
        self._show()
        return out

    # -- motion ---------------------------------------------------------------------------

    async def here(self) -> Position:
        return await self.scope.position()

    async def go(
        self,
        x_um: float,
        y_um: float,
        *,
        side: tuple[int, int] = (-1, -1),
        wait: bool = True,
    ) -> Position:
        """Move to (x, y), coming from below (-1), from above (+1) or straight (0) on each axis.

        The approach starts ``approach_um`` before the target on the axes that have a side,
        so the play of their drives is taken up the same way each time. ``wait``: settle
        for ``settle_wait_s`` afterwards."""
        sx, sy = side
        if sx or sy:
            await self.scope.move_to(
                x_um=x_um + sx * self.approach_um, y_um=y_um + sy * self.approach_um, backlash_approach=False
            )
        pos = await self.scope.move_to(x_um=x_um, y_um=y_um, backlash_approach=False)
        if wait:
            await self.scope.clock.sleep(self.settle_wait_s)
        return pos

    async def go_z(self, z_um: float) -> Position:
        """Move the focus straight to ``z_um`` (no approach from below: the sweeps choose)."""
        return await self.scope.move_to(z_um=z_um, backlash_approach=False)

    def settled_after(self, settle_s: float) -> None:
        """From now on wait a margin over the measured settling time after each x/y move."""
        self.settle_wait_s = max(SETTLE_WAIT_MARGIN * settle_s, settle_s + 0.02)
