"""The map between stage micrometres and image pixels: pixel size, rotation, skew, mirror.

``A`` (px per um) takes a displacement in the sample plane, in stage coordinates (x, y),
to a displacement in the image (column, row). A point of the sample at stage position
``s`` appears at pixel ``c + A (s - S)`` while the stage is at ``S`` (the field's centre
``c`` is the frame's centre pixel), so moving the stage by ``dS`` moves the image content
by ``-A dS``, and the point seen at pixel ``p`` is centred by moving the stage to
``S + A^-1 (p - c)`` (:func:`image_to_stage_um`).

Its parameters, as the profile stores them (``[optics]`` and ``[camera_mount]``):

* ``pixel_size_um``: the geometric mean of the pixel's length along the stage's x and y
  (um per px), ``pixel_x_um = pixel_size_um * sqrt(aspect)``, ``pixel_y_um = pixel_size_um / sqrt(aspect)``;
* ``rotation_deg``: the image's +column axis turned from the stage's +x axis towards +y,
  so a sample displacement along +x appears along (cos phi, -sin phi) (mirrored: +sin phi);
* ``skew_deg``: how far the images of the stage's x and y axes are from square;
* ``aspect``: image length of a y step over an equal x step;
* ``mirrored``: det A < 0 (the image is a mirror image of the stage's plane).
"""

from __future__ import annotations

import dataclasses
import math
from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:
    from daemon.profile import Profile


@dataclasses.dataclass(frozen=True)
class StageImageMap:
    """``px_per_um`` is A (2x2); ``centre_px`` the frame's centre pixel (column, row)."""

    px_per_um: np.ndarray
    centre_px: tuple[float, float]

    @classmethod
    def from_parameters(
        cls,
        *,
        pixel_size_um: float,
        rotation_deg: float = 0.0,
        skew_deg: float = 0.0,
        aspect: float = 1.0,
        mirrored: bool = False,
        frame_shape: tuple[int, int],
    ) -> StageImageMap:
        """A from its parameters (see the module docstring); ``frame_shape`` is (height, width)."""
        if not (pixel_size_um > 0 and aspect > 0):
            raise ValueError(f"pixel size and aspect must be > 0, got {pixel_size_um} um and {aspect}")
        m = -1.0 if mirrored else 1.0
        phi = math.radians(rotation_deg)
        x_axis = np.array([math.cos(phi), -m * math.sin(phi)])
        # The y axis' image: the x axis' image turned by 90 deg plus the skew (the other way when mirrored).
        turn = m * math.radians(90.0 + skew_deg)
        y_axis = np.array([[math.cos(turn), -math.sin(turn)], [math.sin(turn), math.cos(turn)]]) @ x_axis
        pixel_x = pixel_size_um * math.sqrt(aspect)
        pixel_y = pixel_size_um / math.sqrt(aspect)
        a = np.column_stack([x_axis / pixel_x, y_axis / pixel_y])
        h, w = frame_shape
        return cls(a, ((w - 1) / 2.0, (h - 1) / 2.0))

    @classmethod
    def from_profile(cls, profile: Profile) -> StageImageMap:
        mount = profile.camera_mount
        return cls.from_parameters(
            pixel_size_um=profile.optics.pixel_size_um,
            rotation_deg=mount.rotation_deg,
            skew_deg=mount.skew_deg,
            aspect=mount.aspect,
            mirrored=mount.mirrored,
            frame_shape=(profile.camera.height_px, profile.camera.width_px),
        )

    def parameters(self) -> dict[str, float | bool]:
        """pixel_size_um, pixel_x_um, pixel_y_um, rotation_deg, skew_deg, aspect, mirrored of A."""
        a = np.asarray(self.px_per_um, float)
        x_axis, y_axis = a[:, 0], a[:, 1]
        det = float(np.linalg.det(a))
        m = -1.0 if det < 0 else 1.0
        pixel_x, pixel_y = 1.0 / float(np.hypot(*x_axis)), 1.0 / float(np.hypot(*y_axis))
        rotation = math.degrees(math.atan2(-m * x_axis[1], x_axis[0]))
        between = math.degrees(math.atan2(x_axis[0] * y_axis[1] - x_axis[1] * y_axis[0], float(x_axis @ y_axis)))
        return {
            "pixel_size_um": math.sqrt(pixel_x * pixel_y),
            "pixel_x_um": pixel_x,
            "pixel_y_um": pixel_y,
            "rotation_deg": rotation,
            "skew_deg": m * between - 90.0,
            "aspect": pixel_x / pixel_y,
            "mirrored": det < 0,
        }

    def image_shift_px(self, stage_move_um: tuple[float, float]) -> tuple[float, float]:
        """How far the image content moves (column, row) when the stage moves by (dx, dy) um."""
        d = -np.asarray(self.px_per_um) @ np.asarray(stage_move_um, float)
        return float(d[0]), float(d[1])

    def stage_move_um(self, image_shift_px: tuple[float, float]) -> tuple[float, float]:
        """The stage move (dx, dy) um that moves the image content by (columns, rows)."""
        d = -np.linalg.solve(np.asarray(self.px_per_um, float), np.asarray(image_shift_px, float))
        return float(d[0]), float(d[1])


def image_to_stage_um(smap: StageImageMap, px: float, py: float, *, stage_x_um: float, stage_y_um: float) -> tuple[float, float]:
    """Where to move the stage, now at (stage_x_um, stage_y_um), to centre image pixel (px, py)."""
    offset = np.array([px - smap.centre_px[0], py - smap.centre_px[1]], float)
    d = np.linalg.solve(np.asarray(smap.px_per_um, float), offset)
    return stage_x_um + float(d[0]), stage_y_um + float(d[1])


@dataclasses.dataclass(frozen=True)
class MapFit:
    """A least-squares fit of the map to stage moves and the image shifts they caused.

    ``residuals_px`` (n x 2) are measured minus fitted image shifts; ``used`` marks the
    points the fit kept (a registration that went wrong is left out, see :func:`fit_image_map`)."""

    map: StageImageMap
    stage_moves_um: np.ndarray
    image_shifts_px: np.ndarray
    residuals_px: np.ndarray
    used: np.ndarray

    @property
    def rms_residual_px(self) -> float:
        r = self.residuals_px[self.used]
        return float(np.sqrt(np.mean(np.sum(r * r, axis=1)))) if len(r) else float("nan")

    def standard_errors(self) -> dict[str, float]:
        """Standard errors of the map's parameters from the scatter of the residuals: the
        least-squares covariance of each row of A (with its offset), sigma^2 (X^T X)^-1 with
        sigma^2 the residual variance over n - 3 degrees of freedom (each row is its own regression),
        carried to the parameters through their derivatives (first-order propagation)."""
        s = self.stage_moves_um[self.used]
        r = self.residuals_px[self.used]
        n = len(s)
        if n <= 3:
            return {}
        design = np.column_stack([-s, np.ones(n)])
        inv = np.linalg.inv(design.T @ design)[:2, :2]
        cov = np.zeros((4, 4))
        for k in range(2):
            cov[2 * k : 2 * k + 2, 2 * k : 2 * k + 2] = float(np.sum(r[:, k] ** 2)) / (n - 3) * inv
        a = np.asarray(self.map.px_per_um, float)
        base = self.map.parameters()
        names = [k for k, v in base.items() if not isinstance(v, bool)]
        jac = np.zeros((len(names), 4))
        for j in range(4):
            step = 1e-6 * max(abs(a.flat[j]), float(np.abs(a).max()))
            bumped = a.copy()
            bumped.flat[j] += step
            moved = StageImageMap(bumped, self.map.centre_px).parameters()
            jac[:, j] = [(float(moved[name]) - float(base[name])) / step for name in names]
        return {name: float(math.sqrt(max(v, 0.0))) for name, v in zip(names, np.diag(jac @ cov @ jac.T))}


OUTLIER_PX = 1.0  # a point this far off (and 5 median residuals) is a failed registration


def fit_image_map(
    stage_moves_um: np.ndarray, image_shifts_px: np.ndarray, *, frame_shape: tuple[int, int]
) -> MapFit:
    """A from stage moves dS_i (um) and the image shifts d_i (px) they caused: the linear
    least-squares solution of d_i = -A dS_i + c. The offset c is where the reference frame
    itself stopped off its target (the stage's stopping scatter is in every shift measured
    from it). Points off by more than :data:`OUTLIER_PX` and five times the median residual
    are dropped and the rest refitted, twice at most. Raises ValueError when fewer than
    three points span the plane."""
    s = np.asarray(stage_moves_um, float).reshape(-1, 2)
    d = np.asarray(image_shifts_px, float).reshape(-1, 2)
    if len(s) != len(d):
        raise ValueError(f"{len(s)} stage moves but {len(d)} image shifts")
    used = np.ones(len(s), bool)
    h, w = frame_shape
    for _ in range(3):
        if used.sum() < 3 or np.linalg.matrix_rank(s[used]) < 2:
            raise ValueError("need at least three stage moves that span x and y to fit the map")
        design = np.column_stack([-s, np.ones(len(s))])
        coef, *_ = np.linalg.lstsq(design[used], d[used], rcond=None)
        a = coef[:2].T
        residuals = d - design @ coef
        size = np.hypot(residuals[:, 0], residuals[:, 1])
        limit = max(OUTLIER_PX, 5.0 * float(np.median(size[used])))
        keep = size <= limit
        if np.array_equal(keep & used, used):
            break
        used = keep & used
    return MapFit(StageImageMap(a, ((w - 1) / 2.0, (h - 1) / 2.0)), s, d, residuals, used)
