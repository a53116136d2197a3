"""Uneven illumination of the simulated field: vignetting times an off-centre LED spot.

The relative illumination map is fixed to the camera frame (it comes from the condenser,
the LED and the objective, not from the sample) and is what a flat field measures.
"""

from __future__ import annotations

import math

import numpy as np

from drivers.sim.config import SimIllumination


def cos4_vignetting(r_px: np.ndarray, corner_px: float, corner_loss: float) -> np.ndarray:
    """Natural vignetting, the cos^4 law of off-axis illumination (Smith, *Modern Optical
    Engineering*): E(r) = cos^4(atan(r / f)), with the effective distance f chosen so that
    E at the frame corner is 1 - corner_loss. r and f in pixels; 1 on the axis."""
    if corner_loss <= 0.0:
        return np.ones_like(r_px, dtype=np.float64)
    half_angle = math.acos((1.0 - corner_loss) ** 0.25)
    f_px = corner_px / math.tan(half_angle)
    return np.cos(np.arctan(r_px / f_px)) ** 4


def led_spot(dx_px: np.ndarray, dy_px: np.ndarray, sigma_px: float) -> np.ndarray:
    """A Gaussian light spot of an LED behind a diffuser, 1 at its centre."""
    return np.exp(-(dx_px * dx_px + dy_px * dy_px) / (2.0 * sigma_px * sigma_px))


class Illumination:
    def __init__(self, cfg: SimIllumination, shape: tuple[int, int]) -> None:
        h, w = shape
        self.shape = shape
        yc, xc = (h - 1) / 2.0, (w - 1) / 2.0
        y = np.arange(h, dtype=np.float64)[:, None] - yc
        x = np.arange(w, dtype=np.float64)[None, :] - xc
        diagonal = math.hypot(w, h)
        self._vignetting = lambda r: cos4_vignetting(r, math.hypot(xc, yc), cfg.vignetting)
        self._spot_centre = (cfg.led_offset_x * w, cfg.led_offset_y * h)
        self._sigma_px = cfg.led_spread * diagonal
        raw = self._value(x, y)
        centre = float(self._value(np.zeros(1), np.zeros(1))[0])
        # Relative to the field centre: the sensor's photon figure is quoted there.
        self.relative_to_centre = (raw / centre).astype(np.float32)
        self._mean_relative = float(self.relative_to_centre.mean(dtype=np.float64))

    @property
    def map(self) -> np.ndarray:
        """Relative illumination with mean 1: what a flat field shows."""
        return self.relative_to_centre / np.float32(self._mean_relative)

    def _value(self, x_px: np.ndarray, y_px: np.ndarray) -> np.ndarray:
        r = np.sqrt(x_px * x_px + y_px * y_px)
        sx, sy = self._spot_centre
        return self._vignetting(r) * led_spot(x_px - sx, y_px - sy, self._sigma_px)
