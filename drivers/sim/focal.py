"""The true focal plane of the simulated plate: tilt, bottom sag and thermal drift.

    z(x, y, t) = z0 + tilt_x * (x - xc) + tilt_y * (y - yc) + sag * rho(x, y)^2 + drift(t)

    rho^2 = ((x - xc) / hx)^2 + ((y - yc) / hy)^2
    drift(t) = drift_um * sum over openings t_k <= t of (1 - exp(-(t - t_k) / tau))

(xc, yc) is the centre of the well grid, hx and hy are half the distance between the
outermost well centres, so ``sag_um`` is how much further the focus must travel at the
middle of an outer row or column than at the plate centre (a bottom that sags towards the
objective at its centre: positive sag). Tilts are per mm of stage travel. Each door
opening starts a new exponential settling of ``drift_um`` with time constant ``tau``
(the plate and stage cool and re-warm; openings add up). ``t`` is seconds on the
simulated clock since ``[sim] start_time``.
"""

from __future__ import annotations

import math

from drivers.sim.config import SimFocalPlane
from drivers.sim.plate import PlateLayout


class FocalPlane:
    def __init__(self, focal: SimFocalPlane, plate: PlateLayout) -> None:
        self.z0_um = focal.z0_um
        self.tilt_x_um_per_um = focal.tilt_x_um_per_mm / 1000.0
        self.tilt_y_um_per_um = focal.tilt_y_um_per_mm / 1000.0
        self.sag_um = focal.sag_um
        self.drift_amplitude_um = focal.drift_um
        self.drift_tau_s = focal.drift_tau_min * 60.0
        self.door_openings_s = sorted(h * 3600.0 for h in focal.door_openings_h)
        self.centre_x_um = plate.centre_x_um
        self.centre_y_um = plate.centre_y_um
        # A one-column or one-row plate has no edge to sag towards; keep rho finite.
        self.half_x_um = max(plate.pitch_um * (plate.columns - 1) / 2.0, plate.well_radius_um)
        self.half_y_um = max(plate.pitch_um * (plate.rows - 1) / 2.0, plate.well_radius_um)

    def tilt_um(self, x_um: float, y_um: float) -> float:
        return self.tilt_x_um_per_um * (x_um - self.centre_x_um) + self.tilt_y_um_per_um * (y_um - self.centre_y_um)

    def sag_term_um(self, x_um: float, y_um: float) -> float:
        rho2 = ((x_um - self.centre_x_um) / self.half_x_um) ** 2 + ((y_um - self.centre_y_um) / self.half_y_um) ** 2
        return self.sag_um * rho2

    def drift_um(self, t_rel_s: float) -> float:
        total = 0.0
        for t_open in self.door_openings_s:
            if t_rel_s > t_open:
                total += self.drift_amplitude_um * (1.0 - math.exp(-(t_rel_s - t_open) / self.drift_tau_s))
        return total

    def z_um(self, x_um: float, y_um: float, t_rel_s: float) -> float:
        return self.z0_um + self.tilt_um(x_um, y_um) + self.sag_term_um(x_um, y_um) + self.drift_um(t_rel_s)
