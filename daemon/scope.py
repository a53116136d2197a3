"""The scope: the one owner of camera, motion controller and lamp in the daemon.

Everything that images or moves (live view, manual control, autofocus, calibration,
time-lapses) goes through one :class:`Scope`. Its lock serialises hardware use, and
``holder`` names who has it so that a refusal can say why.
"""

from __future__ import annotations

import asyncio
import contextlib
from collections.abc import AsyncIterator, Callable
from typing import TYPE_CHECKING, Any

from drivers.base import Camera, Frame, MotionController, Position, PositionUnknownError
from drivers.clock import Clock, is_untimed
from drivers.truth import GroundTruth, NoTruth

if TYPE_CHECKING:
    from daemon.profile import Profile


class Scope:
    """``truth`` is what the drivers know of the real scene (nothing, on real hardware);
    ``on_stop`` releases what building the drivers started (e.g. a simulated controller),
    after camera and controller are closed."""

    def __init__(
        self,
        profile: Profile,
        camera: Camera,
        motion: MotionController,
        clock: Clock,
        truth: GroundTruth | None = None,
        on_stop: Callable[[], None] | None = None,
    ) -> None:
        self.profile = profile
        self.camera = camera
        self.motion = motion
        self.clock = clock
        self.truth: GroundTruth = truth if truth is not None else NoTruth()
        self._on_stop = on_stop
        self.lock = asyncio.Lock()
        self.holder: str | None = None
        self.frames_captured = 0
        self.last_frame: Frame | None = None
        self.last_position: Position | None = None

    async def start(self) -> None:
        await self.motion.connect()
        try:
            await self.camera.open()
        except BaseException:
            await self.motion.close()
            raise
        if self.profile.stage.home_on_connect:
            await self.motion.home()
        try:
            self.last_position = await self.motion.position()
        except PositionUnknownError:
            # Not homed yet: moves are refused by the driver until the user homes the stage.
            self.last_position = None

    async def stop(self) -> None:
        # Close both even if one fails, so the serial port and camera are never left held.
        errors: list[BaseException] = []
        for closer in (self.camera.close, self.motion.close):
            try:
                await closer()
            except Exception as exc:  # noqa: BLE001 - reported below, after both are closed
                errors.append(exc)
        if self._on_stop is not None:
            self._on_stop()
        if errors:
            raise errors[0]

    async def __aenter__(self) -> Scope:
        await self.start()
        return self

    async def __aexit__(self, *exc: object) -> None:
        await self.stop()

    @contextlib.asynccontextmanager
    async def claim(self, holder: str, *, timed: bool = True) -> AsyncIterator[Scope]:
        """Hold the hardware for one job (``holder`` is shown to anyone refused meanwhile).

        A timed job (everything but live view) also holds the scope's clock, from its wait
        for the hardware to its end: on the simulated scope only the modelled durations of
        what it does (moves, settle, exposure) then pass, not the host's computing nor the
        live frame it waited for (:mod:`drivers.clock`). Live view claims untimed.
        """
        with self.clock.paused() if timed and not is_untimed() else contextlib.nullcontext():
            async with self.lock:
                self.holder = holder
                try:
                    yield self
                finally:
                    self.holder = None

    async def move_to(
        self,
        x_um: float | None = None,
        y_um: float | None = None,
        z_um: float | None = None,
        *,
        backlash_approach: bool = True,
    ) -> Position:
        """Move and wait until settled. Soft limits are checked by the driver before sending;
        ``backlash_approach=False`` skips the final approach from below (see the driver)."""
        self.last_position = await self.motion.move_to(
            x_um=x_um, y_um=y_um, z_um=z_um, backlash_approach=backlash_approach
        )
        return self.last_position

    async def home(self) -> Position:
        await self.motion.home()
        return await self.position()

    async def position(self) -> Position:
        self.last_position = await self.motion.position()
        return self.last_position

    async def capture(
        self,
        *,
        exposure_ms: float | None = None,
        gain_db: float | None = None,
        lamp: bool = True,
    ) -> Frame:
        """Expose one frame with the LED on only as long as needed (light harms living cells)."""
        cam = self.profile.camera
        await self.camera.set_exposure_ms(exposure_ms if exposure_ms is not None else cam.exposure_ms)
        await self.camera.set_gain_db(gain_db if gain_db is not None else cam.gain_db)
        illum = self.profile.illumination
        if lamp:
            await self.motion.set_lamp(True, illum.level)
            await self.clock.sleep(illum.warmup_ms / 1000.0)
        else:
            await self.motion.set_lamp(False)
        try:
            frame = await self.camera.grab()
        finally:
            if lamp and illum.off_between_frames:
                await self.motion.set_lamp(False)
        self.frames_captured += 1
        self.last_frame = frame
        return frame

    async def capture_at(self, z_um: float, **kwargs: Any) -> Frame:
        await self.move_to(z_um=z_um)
        return await self.capture(**kwargs)

    def true_focus_z_um(self) -> float | None:
        """The true focal plane under the objective now, where known (the simulator); else None."""
        if self.last_position is None:
            return None
        p = self.last_position
        return self.truth.focus_z_um(p.x_um, p.y_um, self.clock.now())
