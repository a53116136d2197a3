"""The focus surface: a fitted z(x, y) of the vessel bottom's in-focus plane.

A plate is never quite flat nor quite level in its holder: it tilts (a plane) and its
bottom sags (a bowl). Fitting z(x, y) over the positions already focused lets the
daemon start each new position close to its focal plane. The fit is robust: one
position focused on debris or a bubble must not tilt the whole surface.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Iterable, Sequence

import numpy as np
from scipy.optimize import least_squares

# Points needed before each model is trusted: a plane has 3 unknowns, the quadratic 6.
# Twice the unknowns (common practice for least squares) keeps one bad point from
# steering the fit and leaves residuals to judge it by.
PLANE_MIN_POINTS = 3
QUADRATIC_MIN_POINTS = 12


@dataclasses.dataclass(frozen=True, slots=True)
class SurfacePoint:
    x_um: float
    y_um: float
    z_um: float


@dataclasses.dataclass(frozen=True)
class SurfaceFit:
    """z = Σ cₖ·termₖ(u, v) with u, v the position relative to ``origin_um`` in mm."""

    kind: str  # "constant" | "plane" | "quadratic"
    coefficients: tuple[float, ...]
    origin_um: tuple[float, float]
    rms_um: float  # RMS residual of the points kept as inliers
    inliers: int
    points: int

    def z_um(self, x_um: float, y_um: float) -> float:
        u = (x_um - self.origin_um[0]) / 1000.0
        v = (y_um - self.origin_um[1]) / 1000.0
        return float(np.dot(self.coefficients, _terms(self.kind, np.array([u]), np.array([v]))[0]))


def _terms(kind: str, u: np.ndarray, v: np.ndarray) -> np.ndarray:
    one = np.ones_like(u)
    if kind == "constant":
        return one[:, None]
    if kind == "plane":
        return np.column_stack([one, u, v])
    return np.column_stack([one, u, v, u * u, u * v, v * v])


def _spread_mm(u: np.ndarray, v: np.ndarray) -> tuple[float, float]:
    """Singular values of the centred positions: how far the points extend in 2-D."""
    if len(u) < 2:
        return 0.0, 0.0
    s = np.linalg.svd(np.column_stack([u - u.mean(), v - v.mean()]), compute_uv=False)
    s = s / np.sqrt(len(u))
    return float(s[0]), float(s[1]) if len(s) > 1 else 0.0


def fit_focus_surface(
    points: Sequence[SurfacePoint], *, tolerance_um: float, min_extent_mm: float = 1.0
) -> SurfaceFit | None:
    """Robust least-squares fit of the focal plane over the stage.

    Model: the constant for 1–2 points, a plane z = c₀ + c₁u + c₂v from 3 points that
    span an area, the quadratic z = c₀ + c₁u + c₂v + c₃u² + c₄uv + c₅v² (tilt plus
    sag) from :data:`QUADRATIC_MIN_POINTS` points; u, v in mm. The loss is the smooth
    ℓ1 ("soft_l1") loss of SciPy's ``least_squares`` with scale ``tolerance_um`` (about
    a depth of field): residuals larger than that count linearly, not quadratically, so
    outliers pull little; points more than 3 tolerances off that fit are then dropped and
    the rest refitted by ordinary least squares. Points spread along a line only fit the constant, as a plane
    would be undetermined across the line.
    """
    if not points:
        return None
    x = np.array([p.x_um for p in points], float)
    y = np.array([p.y_um for p in points], float)
    z = np.array([p.z_um for p in points], float)
    origin = (float(x.mean()), float(y.mean()))
    u, v = (x - origin[0]) / 1000.0, (y - origin[1]) / 1000.0
    _, minor_mm = _spread_mm(u, v)
    if len(points) >= QUADRATIC_MIN_POINTS and minor_mm >= min_extent_mm:
        kind = "quadratic"
    elif len(points) >= PLANE_MIN_POINTS and minor_mm >= min_extent_mm / 4.0:
        kind = "plane"
    else:
        kind = "constant"
    a = _terms(kind, u, v)
    start = np.zeros(a.shape[1])
    start[0] = float(np.median(z))
    fit = least_squares(lambda c: a @ c - z, start, loss="soft_l1", f_scale=max(tolerance_um, 1e-6))
    coef = fit.x
    inlier = np.abs(a @ coef - z) <= 3.0 * tolerance_um
    if a.shape[1] < inlier.sum() < len(z):
        # The smooth-l1 fit still feels an outlier a little; refit the inliers alone.
        coef = np.linalg.lstsq(a[inlier], z[inlier], rcond=None)[0]
        inlier = np.abs(a @ coef - z) <= 3.0 * tolerance_um
    residuals = a @ coef - z
    rms = float(np.sqrt(np.mean(residuals[inlier] ** 2))) if inlier.any() else float("nan")
    return SurfaceFit(kind, tuple(float(c) for c in coef), origin, rms, int(inlier.sum()), len(points))


def surface_points(items: Iterable[tuple[float, float, float]]) -> list[SurfacePoint]:
    return [SurfacePoint(float(x), float(y), float(z)) for x, y, z in items]
