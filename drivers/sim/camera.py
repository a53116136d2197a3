"""The simulated camera: exposes on the scope's clock and renders the simulated world.

Each grab waits its exposure on the clock, asking the simulated controller half-way
through where the stage and focus physically are and how bright the LED is, and renders
that frame in a worker thread (FFTs and noise on a full frame are too heavy for the
event loop). The frame's time stamp is the start of the exposure. There is no frame
buffer, so no frame can be stale.
"""

from __future__ import annotations

import asyncio
import dataclasses
from collections.abc import Callable
from typing import TYPE_CHECKING

from drivers.base import CameraError, Frame, Position
from drivers.camera_common import EXPOSURE_RANGE_MS, FRAME_READOUT_S, GAIN_RANGE_DB, check_exposure_ms, check_gain_db
from drivers.clock import Clock
from drivers.options import ConfigError
from drivers.registry import CameraContext, CameraDriver
from drivers.sim.bench import SimBench

if TYPE_CHECKING:
    from drivers.sections import CameraSection
    from drivers.sim.world import SimWorld

LABEL = "simulated"  # how the camera names itself in messages and describe()


class SimCamera:
    def __init__(
        self,
        world: SimWorld,
        camera: CameraSection,
        clock: Clock,
        position_source: Callable[[], Position],
        lamp_source: Callable[[], float],
    ) -> None:
        self._world = world
        self._cfg = camera
        self._clock = clock
        self._position_source = position_source
        self._lamp_source = lamp_source
        self._exposure_ms = check_exposure_ms(camera.exposure_ms, driver=LABEL)
        self._gain_db = check_gain_db(camera.gain_db, driver=LABEL)
        self._open = False
        self._grab_lock = asyncio.Lock()
        self.frames_grabbed = 0

    async def open(self) -> None:
        self._open = True

    async def close(self) -> None:
        self._open = False

    async def set_exposure_ms(self, exposure_ms: float) -> None:
        self._exposure_ms = check_exposure_ms(exposure_ms, driver=LABEL)

    async def set_gain_db(self, gain_db: float) -> None:
        self._gain_db = check_gain_db(gain_db, driver=LABEL)

    @property
    def exposure_ms(self) -> float:
        return self._exposure_ms

    @property
    def gain_db(self) -> float:
        return self._gain_db

    async def grab(self) -> Frame:
        if not self._open:
            raise CameraError("simulated camera is not open; open the scope before grabbing frames")
        # One exposure at a time: frames draw their noise in order, so a run is reproducible.
        async with self._grab_lock:
            exposure_ms, gain_db = self._exposure_ms, self._gain_db
            t_start = self._clock.now()
            # The frame shows the stage where it was at mid-exposure (motion blur is not
            # rendered), so a ringing stage is seen at the frame's centre time.
            await self._clock.sleep(exposure_ms / 2000.0)
            pos = self._position_source()
            lamp = float(self._lamp_source())
            # The frame arrives after the rest of its exposure and the sensor's read-out.
            await self._clock.sleep(exposure_ms / 2000.0 + FRAME_READOUT_S)
            try:
                with self._clock.paused():
                    pixels = await asyncio.to_thread(
                        self._world.render,
                        pos.x_um,
                        pos.y_um,
                        pos.z_um,
                        t_s=t_start,
                        exposure_ms=exposure_ms,
                        gain_db=gain_db,
                        lamp_level=lamp,
                    )
            except ValueError as exc:
                raise CameraError(f"simulated camera could not render a frame: {exc}") from None
            self.frames_grabbed += 1
            if hasattr(self._clock, "frames"):
                # Kept with the clock's state: after a restart the noise goes on, not over.
                self._clock.frames = self._world.frame_counter
            return Frame(pixels=pixels, t_s=t_start, exposure_ms=exposure_ms, gain_db=gain_db, bit_depth=self._cfg.bit_depth)

    def describe(self) -> dict[str, object]:
        h, w = self._world.shape
        return {
            "driver": "sim",
            "model": LABEL,
            "device": "simulated scope",
            "resolution": {"width_px": w, "height_px": h},
            "bit_depth": self._cfg.bit_depth,
            "pixel_format": f"mono{self._cfg.bit_depth}",
            "pixel_size_um": self._world.mount.nominal_pixel_um,  # what the profile says; the truth knows better
            "exposure_ms": self._exposure_ms,
            "gain_db": self._gain_db,
            "controls": {
                "exposure": {"supported": True, "effective": True, "min_ms": EXPOSURE_RANGE_MS[0], "max_ms": EXPOSURE_RANGE_MS[1]},
                "gain": {"supported": True, "effective": True, "min_db": GAIN_RANGE_DB[0], "max_db": GAIN_RANGE_DB[1]},
            },
            "open": self._open,
        }


@dataclasses.dataclass(frozen=True, kw_only=True)
class SimCameraOptions:
    """The simulated camera takes its sensor from [sim.sensor]; nothing more in [camera]."""


def open_camera(ctx: CameraContext) -> SimCamera:
    bench = ctx.stage.bench
    if not isinstance(bench, SimBench):
        raise ConfigError(
            ctx.profile.path, "camera", "driver",
            'the sim camera images the simulated stage; set [stage] driver = "sim" too',
        )
    return SimCamera(
        bench.world, ctx.profile.camera, ctx.clock, position_source=bench.position, lamp_source=bench.lamp_level
    )


DRIVER = CameraDriver(
    name="sim",
    summary="the simulated camera: renders the simulated culture under the simulated stage",
    options=SimCameraOptions,
    open=open_camera,
    simulated=True,
)
