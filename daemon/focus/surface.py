"""The focus surface: a fitted z(x, y) of the vessel bottom's in-focus plane.

A plate is never quite flat nor quite level in its holder: it tilts (a plane) and its
bottom sags (a bowl). Fitting z(x, y) over the positions already focused lets the
daemon start each new position close to its focal plane. The fit is robust: one
position focused on debris or a bubble must not tilt the whole surface.

A fit is only as good as the spread of its points. A model is chosen only when the
points determine it (enough of them, spread far enough, and not lying so that one of
its terms is undetermined, as a quadratic's curvature across a single row of wells), and
it is followed only a bounded distance past the points it was fitted to: beyond that the
surface stays level at its value there, and :meth:`SurfaceFit.beyond_support_mm` tells
the caller how far its prediction is from anything measured, so it can search wider.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Iterable, Sequence

import numpy as np

# Points needed before each model is trusted: a plane has 3 unknowns, the quadratic 6.
# Twice the unknowns (common practice for least squares) keeps one bad point from
# steering the fit and leaves residuals to judge it by.
PLANE_MIN_POINTS = 3
QUADRATIC_MIN_POINTS = 12
# Smallest ratio of the least to the largest singular value of the design matrix (in
# coordinates scaled to the points' spread along each axis) for a model to count as
# determined by its points; below it a term is fixed by noise alone.
MIN_CONDITION = 1e-3
# How far past its points (as a fraction of their extent along each axis) a model is
# followed: a straight tilt extrapolates tamely, a curvature's error grows with the
# square of the distance.
LINEAR_REACH_FRACTION = 1.0
QUADRATIC_REACH_FRACTION = 0.25

KINDS = ("constant", "line", "plane", "quadratic")
# Iterations of the reweighted fit; each shrinks the step by a constant factor, and the
# fits here have at most 6 unknowns and a few hundred points.
IRLS_ITERATIONS = 50
IRLS_TOLERANCE = 1e-10


def soft_l1_fit(m: np.ndarray, z: np.ndarray, scale: float) -> np.ndarray:
    """Coefficients c minimising Σ ρ((m·c - z)²/scale²) with the smooth ℓ1 loss
    ρ(u) = 2(√(1+u) - 1), the same objective as SciPy's ``least_squares(loss="soft_l1",
    f_scale=scale)``, by iteratively reweighted least squares (Holland & Welsch, "Robust
    regression using iteratively reweighted least-squares", Communications in Statistics
    - Theory and Methods 6(9):813-827, 1977; from memory): each pass solves the weighted
    least-squares problem with weights ρ'(u) = 1/√(1+u) of the last residuals. Done
    here rather than through ``scipy.optimize``, whose import alone holds some 50 MB
    resident in a daemon that must stay within its memory budget; the tests check the
    two agree. Units: those of ``z`` (and ``scale``)."""
    coef = np.linalg.lstsq(m, z, rcond=None)[0]
    for _ in range(IRLS_ITERATIONS):
        r = m @ coef - z
        w = 1.0 / np.sqrt(np.sqrt(1.0 + (r / scale) ** 2))  # square root of the weight
        new = np.linalg.lstsq(m * w[:, None], z * w, rcond=None)[0]
        if np.max(np.abs(new - coef)) <= IRLS_TOLERANCE * max(1.0, float(np.max(np.abs(coef)))):
            return new
        coef = new
    return coef


@dataclasses.dataclass(frozen=True, slots=True)
class SurfacePoint:
    x_um: float
    y_um: float
    z_um: float


@dataclasses.dataclass(frozen=True, slots=True)
class Axes:
    """The points' principal axes: a along their widest spread, b across it (mm from origin)."""

    origin_um: tuple[float, float]
    a_dir: tuple[float, float]
    b_dir: tuple[float, float]

    @classmethod
    def of(cls, x_um: np.ndarray, y_um: np.ndarray) -> Axes:
        ox, oy = float(np.mean(x_um)), float(np.mean(y_um))
        if len(x_um) < 2:
            return cls((ox, oy), (1.0, 0.0), (0.0, 1.0))
        centred = np.column_stack([x_um - ox, y_um - oy])
        _, _, vt = np.linalg.svd(centred, full_matrices=False)
        a = (float(vt[0, 0]), float(vt[0, 1]))
        return cls((ox, oy), a, (-a[1], a[0]))

    def ab_mm(self, x_um: np.ndarray, y_um: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        u = (np.asarray(x_um, float) - self.origin_um[0]) / 1000.0
        v = (np.asarray(y_um, float) - self.origin_um[1]) / 1000.0
        return u * self.a_dir[0] + v * self.a_dir[1], u * self.b_dir[0] + v * self.b_dir[1]


@dataclasses.dataclass(frozen=True)
class SurfaceFit:
    """z = Σ cₖ·termₖ(a, b), with (a, b) the position along the points' principal axes in mm.

    ``support_mm`` is (a_min, a_max, b_min, b_max) of the points kept as inliers and
    ``reach_mm`` how far past that box, along a and b, the model is followed; farther out
    the surface is level (evaluated at the nearest point of the reach box).
    """

    kind: str  # one of KINDS
    coefficients: tuple[float, ...]
    axes: Axes
    support_mm: tuple[float, float, float, float]
    reach_mm: tuple[float, float]
    rms_um: float  # RMS residual of the points kept as inliers
    inliers: int
    points: int

    @property
    def origin_um(self) -> tuple[float, float]:
        return self.axes.origin_um

    def z_um(self, x_um: float, y_um: float) -> float:
        a, b = self.axes.ab_mm(np.array([x_um]), np.array([y_um]))
        a_lo, a_hi, b_lo, b_hi = self.support_mm
        ra, rb = self.reach_mm
        a = np.clip(a, a_lo - ra, a_hi + ra)
        b = np.clip(b, b_lo - rb, b_hi + rb)
        return float(np.dot(self.coefficients, _terms(self.kind, a, b)[0]))

    def beyond_support_mm(self, x_um: float, y_um: float) -> float:
        """Distance (mm) from (x, y) to the box of the points the surface was fitted to."""
        a, b = self.axes.ab_mm(np.array([x_um]), np.array([y_um]))
        a_lo, a_hi, b_lo, b_hi = self.support_mm
        da = max(a_lo - float(a[0]), 0.0, float(a[0]) - a_hi)
        db = max(b_lo - float(b[0]), 0.0, float(b[0]) - b_hi)
        return math.hypot(da, db)


def _terms(kind: str, a: np.ndarray, b: np.ndarray) -> np.ndarray:
    one = np.ones_like(a)
    if kind == "constant":
        return one[:, None]
    if kind == "line":
        return np.column_stack([one, a])
    if kind == "plane":
        return np.column_stack([one, a, b])
    return np.column_stack([one, a, b, a * a, a * b, b * b])


def _determined(kind: str, a: np.ndarray, b: np.ndarray) -> bool:
    """Whether the points fix every term of ``kind``: the design matrix, in coordinates
    scaled to the points' spread, is far from singular."""
    sa, sb = float(np.std(a)), float(np.std(b))
    if sa <= 0 or (kind in ("plane", "quadratic") and sb <= 0):
        return False
    m = _terms(kind, a / sa, b / sb if sb > 0 else b)
    s = np.linalg.svd(m, compute_uv=False)
    return bool(s[-1] >= MIN_CONDITION * s[0])


def choose_model(a_mm: np.ndarray, b_mm: np.ndarray, min_extent_mm: float) -> str:
    """The richest model the points determine: the quadratic (tilt plus sag) from
    :data:`QUADRATIC_MIN_POINTS` points spread at least ``min_extent_mm`` (standard
    deviation) across their main direction; the plane from 3 points spread a quarter of
    that across; a line (tilt along the points) from 3 points along one direction; else
    the constant. Each only when :func:`_determined`."""
    n = len(a_mm)
    spread_a, spread_b = float(np.std(a_mm)), float(np.std(b_mm))
    if n >= QUADRATIC_MIN_POINTS and spread_b >= min_extent_mm and _determined("quadratic", a_mm, b_mm):
        return "quadratic"
    if n >= PLANE_MIN_POINTS and spread_b >= min_extent_mm / 4.0 and _determined("plane", a_mm, b_mm):
        return "plane"
    if n >= PLANE_MIN_POINTS and spread_a >= min_extent_mm / 4.0 and _determined("line", a_mm, b_mm):
        return "line"
    return "constant"


def fit_focus_surface(
    points: Sequence[SurfacePoint], *, tolerance_um: float, min_extent_mm: float = 1.0
) -> SurfaceFit | None:
    """Robust least-squares fit of the focal plane over the stage.

    Model (:func:`choose_model`, a and b in mm along the points' principal axes): the
    constant; a line z = c₀ + c₁a; a plane z = c₀ + c₁a + c₂b; or the quadratic
    z = c₀ + c₁a + c₂b + c₃a² + c₄ab + c₅b². The loss is the smooth ℓ1 ("soft_l1") loss
    (:func:`soft_l1_fit`) with scale ``tolerance_um`` (about a depth of field):
    residuals larger than that count linearly, not quadratically, so outliers pull
    little; points more than 3 tolerances off that fit are then dropped, the model chosen
    again for the rest (an outlier may have been all that spread them) and refitted by
    ordinary least squares. The model is followed :data:`LINEAR_REACH_FRACTION`
    (:data:`QUADRATIC_REACH_FRACTION` for the quadratic) of the inliers' extent past them
    along each axis, and is level beyond.
    """
    if not points:
        return None
    x = np.array([p.x_um for p in points], float)
    y = np.array([p.y_um for p in points], float)
    z = np.array([p.z_um for p in points], float)
    axes = Axes.of(x, y)
    a, b = axes.ab_mm(x, y)
    kind = choose_model(a, b, min_extent_mm)
    m = _terms(kind, a, b)
    coef = soft_l1_fit(m, z, max(tolerance_um, 1e-6))
    inlier = np.abs(m @ coef - z) <= 3.0 * tolerance_um
    if 0 < inlier.sum() < len(z):
        # The smooth-l1 fit still feels an outlier a little; refit the inliers alone, in
        # their own axes and with the model they determine.
        axes = Axes.of(x[inlier], y[inlier])
        a, b = axes.ab_mm(x, y)
        kind = choose_model(a[inlier], b[inlier], min_extent_mm)
        m = _terms(kind, a, b)
        coef = np.linalg.lstsq(m[inlier], z[inlier], rcond=None)[0]
        inlier = np.abs(m @ coef - z) <= 3.0 * tolerance_um
        if not inlier.any():
            inlier = np.abs(m @ coef - z) <= np.min(np.abs(m @ coef - z)) + 1e-9
    residuals = m @ coef - z
    rms = float(np.sqrt(np.mean(residuals[inlier] ** 2)))
    support = (float(a[inlier].min()), float(a[inlier].max()), float(b[inlier].min()), float(b[inlier].max()))
    fraction = QUADRATIC_REACH_FRACTION if kind == "quadratic" else LINEAR_REACH_FRACTION
    reach = (fraction * (support[1] - support[0]), fraction * (support[3] - support[2]))
    return SurfaceFit(kind, tuple(float(c) for c in coef), axes, support, reach, rms, int(inlier.sum()), len(points))


def surface_points(items: Iterable[tuple[float, float, float]]) -> list[SurfacePoint]:
    return [SurfacePoint(float(x), float(y), float(z)) for x, y, z in items]
