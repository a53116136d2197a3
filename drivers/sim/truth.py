"""The simulated scope's ground truth, behind :class:`drivers.truth.GroundTruth`.

Everything here is read straight from the simulated world (and, while the scope runs,
the G-code emulator that moves its stage). ``world`` and ``emulator`` stay reachable
for tests, which are the harness that checks estimates against this truth.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

from drivers.sim.mechanics import Ringing

if TYPE_CHECKING:
    from drivers.sim.controller import GcodeEmulator
    from drivers.sim.world import SimWorld


class SimTruth:
    known = True
    source = "simulator"

    def __init__(self, world: SimWorld, emulator: GcodeEmulator | None = None) -> None:
        self.world = world
        self.emulator = emulator  # None for saved frames judged without a running scope

    def focus_z_um(self, x_um: float, y_um: float, t_s: float) -> float | None:
        return self.world.true_focus_z_um(x_um, y_um, t_s)

    def well_at(self, x_um: float, y_um: float) -> str | None:
        return self.world.well_at(x_um, y_um)

    def well_centre_um(self, well: str) -> tuple[float, float] | None:
        return self.world.well_centre_um(well)

    def blank_wells(self) -> list[str]:
        plate = self.world.plate
        return [plate.name(*plate.parse(name)) for name in self.world.sim.plate.empty_wells]

    def sensor(self, gain_db: float) -> dict[str, float] | None:
        return self.world.sensor.truth_at(gain_db)

    def illumination_map(self) -> np.ndarray | None:
        return self.world.illumination_map()

    def field_coverage(self, x_um: float, y_um: float, t_s: float) -> float | None:
        if self.world.well_at(x_um, y_um) is None:
            return None
        return self.world.true_confluence(x_um, y_um, t_s)

    def well_coverage(self, well: str, t_s: float) -> float | None:
        return self.world.true_well_coverage(well, t_s)

    def image_px_per_um(self) -> np.ndarray | None:
        return self.world.mount.image_px_per_um

    def camera_geometry(self) -> dict[str, float | bool] | None:
        mount = self.world.mount
        # The simulated stage's axes are square; the camera is turned and scaled, not sheared.
        return {"pixel_size_um": mount.pixel_um, "rotation_deg": mount.rotation_deg, "skew_deg": 0.0, "mirrored": mount.mirrored}

    def backlash_um(self) -> dict[str, float] | None:
        m = self.world.sim.motion
        return {"x": m.x_backlash_um, "y": m.y_backlash_um, "z": m.z_backlash_um}

    def repeatability_um(self) -> float | None:
        return self.world.sim.motion.repeatability_um

    def settle_ms(self, tolerance_um: float) -> float | None:
        return 1000.0 * Ringing.of(self.world.sim.motion).settle_s(tolerance_um)
