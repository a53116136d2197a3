"""How the simulated camera sits against the stage: its true pixel size, rotation and mirror.

The world renders the sample on a grid aligned with the stage axes at the camera's true
pixel pitch ``p`` (the profile's ``camera_pixel_um / magnification`` off by
``[sim.camera_mount] pixel_size_error_percent``), then the camera sees that grid turned by
``rotation_deg`` and perhaps mirrored. For a frame pixel q = (column, row) counted from the
frame's centre, the sample point it shows lies at

    s = stage position + p * R(phi) * F * q,   F = diag(1, -1 if mirrored else 1),

with R(phi) the rotation by phi = ``rotation_deg`` from stage +x towards stage +y. So a
sample displacement ds (um) moves the image by A * ds pixels, A = F * R(-phi) / p (a
stage move by dS moves the image content by -A * dS). ``image_px_per_um`` is that A:
ground truth for what commissioning measures.
"""

from __future__ import annotations

import math

import cv2
import numpy as np

from drivers.sim.config import SimCameraMount


class CameraMount:
    def __init__(self, mount: SimCameraMount, nominal_pixel_um: float) -> None:
        self.rotation_deg = float(mount.rotation_deg)
        self.mirrored = bool(mount.mirrored)
        self.nominal_pixel_um = float(nominal_pixel_um)
        self.pixel_um = self.nominal_pixel_um * (1.0 + mount.pixel_size_error_percent / 100.0)
        phi = math.radians(self.rotation_deg)
        c, s = math.cos(phi), math.sin(phi)
        flip = -1.0 if self.mirrored else 1.0
        # Frame pixel offsets -> grid pixel offsets (grid pixels along stage x and y): R(phi) * F.
        self._frame_to_grid = np.array([[c, -s * flip], [s, c * flip]])
        self.square = self.rotation_deg % 360.0 == 0.0

    @property
    def image_px_per_um(self) -> np.ndarray:
        """A: image displacement (column, row) in px per sample displacement (x, y) in um."""
        return np.linalg.inv(self._frame_to_grid) / self.pixel_um

    def grid_half_extent_px(self, frame_shape: tuple[int, int]) -> tuple[float, float]:
        """Half-width and half-height (grid px) of the sample area the turned frame shows."""
        h, w = frame_shape
        m = np.abs(self._frame_to_grid)
        return (m[0, 0] * w / 2.0 + m[0, 1] * h / 2.0, m[1, 0] * w / 2.0 + m[1, 1] * h / 2.0)

    def to_frame(
        self, grid_image: np.ndarray, frame_shape: tuple[int, int], crop: tuple[slice, slice], *, nearest: bool = False
    ) -> np.ndarray:
        """The frame the camera sees of a stage-aligned grid image centred on the field.

        A camera square to the stage takes the centred crop as it is (rows reversed when
        mirrored); a turned one resamples the grid (Lanczos: the optical image is band-
        limited well below the pixel pitch, so little is lost; nearest for masks).
        """
        if self.square:
            out = grid_image[crop]
            return np.ascontiguousarray(out[::-1] if self.mirrored else out)
        h, w = frame_shape
        ny, nx = grid_image.shape
        frame_centre = np.array([(w - 1) / 2.0, (h - 1) / 2.0])
        grid_centre = np.array([(nx - 1) / 2.0, (ny - 1) / 2.0])
        m = np.empty((2, 3))
        m[:, :2] = self._frame_to_grid
        m[:, 2] = grid_centre - self._frame_to_grid @ frame_centre
        flags = (cv2.INTER_NEAREST if nearest else cv2.INTER_LANCZOS4) | cv2.WARP_INVERSE_MAP
        src = grid_image.view(np.uint8) if grid_image.dtype == bool else grid_image
        out = cv2.warpAffine(src, m, (w, h), flags=flags, borderMode=cv2.BORDER_REFLECT)
        return out.astype(bool) if grid_image.dtype == bool else out
