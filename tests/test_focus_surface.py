"""Peak fitting, the coarse sweep's stop rule, the focus surface and the tracker's predictions."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from daemon.focus.autofocus import FocusPoint, FocusResult, gaussian_peak, passed_peak
from daemon.focus.surface import SurfacePoint, fit_focus_surface
from daemon.focus.tracking import FocusTracker
from tests.helpers import sim_profile


def gaussian(z: np.ndarray, mu: float, sigma: float, height: float, floor: float) -> np.ndarray:
    return floor + height * np.exp(-((z - mu) ** 2) / (2 * sigma**2))


@settings(max_examples=60, deadline=None)
@given(
    offset=st.floats(-0.95, 0.95),
    sigma=st.floats(3.0, 30.0),
    step=st.floats(1.0, 10.0),
)
def test_gaussian_peak_recovers_a_gaussian_exactly(offset: float, sigma: float, step: float) -> None:
    # A Gaussian focus curve over a known floor: ln(s - f) is an exact parabola, so the
    # fit must give back mu and sigma to rounding (three-point Gaussian interpolation).
    mu = offset * step  # the peak lies between the outer points
    z = np.array([-step, 0.0, step])
    s = gaussian(z, mu, sigma, 500.0, 40.0)
    fit = gaussian_peak(z, s, 40.0)
    assert fit is not None
    assert fit.z_um == pytest.approx(mu, abs=1e-6 * sigma + 1e-9)
    assert fit.sigma_um == pytest.approx(sigma, rel=1e-6)
    assert fit.height == pytest.approx(540.0, rel=1e-6)


def test_gaussian_peak_refuses_points_that_do_not_bend_down() -> None:
    z = np.array([0.0, 5.0, 10.0])
    assert gaussian_peak(z, np.array([1.0, 2.0, 3.0]), 0.5) is None  # still rising: vertex beyond the points
    assert gaussian_peak(z, np.array([3.0, 1.0, 3.0]), 0.5) is None  # a valley
    assert gaussian_peak(z[:2], np.array([3.0, 1.0]), 0.5) is None  # too few points


def test_passed_peak_waits_for_a_clear_fall() -> None:
    assert not passed_peak([10, 11, 10.5, 10.2, 10.1])  # flat: no peak stands out
    assert not passed_peak([10, 30, 60])  # still rising
    assert not passed_peak([10, 30, 60, 40])  # one lower point only
    assert passed_peak([10, 30, 60, 25, 11])  # up, over, back near the floor
    assert passed_peak([60, 25, 11])  # started on the peak
    # Frames before ``first`` were judged already: they set the floor, and a new peak
    # must rise above the last of them (not just continue its falling side).
    assert not passed_peak([100, 30, 10], first=1)
    assert passed_peak([8, 30, 60, 25], first=1)
    assert not passed_peak([8, 300, 60, 25], first=2)


def test_surface_recovers_a_tilted_sagging_plate_despite_an_outlier() -> None:
    # Plate tilt and sag magnitudes as in hw_profiles/sim.toml (invented, plausible).
    rng = np.random.default_rng(4)
    xs = rng.uniform(10_000, 110_000, 24)
    ys = rng.uniform(10_000, 75_000, 24)

    def truth(x: float, y: float) -> float:
        u, v = (x - 60_000) / 1000, (y - 42_000) / 1000
        return 1500 + 0.8 * u - 0.5 * v + 0.004 * (u * u + v * v)

    pts = [SurfacePoint(x, y, truth(x, y) + rng.normal(0, 0.5)) for x, y in zip(xs, ys)]
    pts[5] = SurfacePoint(pts[5].x_um, pts[5].y_um, pts[5].z_um + 80.0)  # focused on debris
    fit = fit_focus_surface(pts, tolerance_um=10.0)
    assert fit is not None and fit.kind == "quadratic"
    assert fit.inliers == 23
    for x, y in [(20_000, 20_000), (60_000, 42_000), (100_000, 70_000)]:
        assert fit.z_um(x, y) == pytest.approx(truth(x, y), abs=1.5)


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_soft_l1_fit_agrees_with_scipy_least_squares(seed: int) -> None:
    # Reference: SciPy's least_squares with loss="soft_l1" minimises the same objective
    # (scipy.optimize.least_squares documentation); the daemon solves it without SciPy.
    from scipy.optimize import least_squares

    from daemon.focus.surface import soft_l1_fit

    rng = np.random.default_rng(seed)
    a, b = rng.uniform(-30, 30, 40), rng.uniform(-20, 20, 40)
    m = np.column_stack([np.ones_like(a), a, b, a * a, a * b, b * b])
    z = m @ np.array([1500.0, 0.8, -0.5, 0.004, 0.001, 0.004]) + rng.normal(0, 1.0, 40)
    z[rng.choice(40, 4, replace=False)] += rng.uniform(30, 120, 4)  # debris, bubbles
    ours = soft_l1_fit(m, z, 10.0)
    start = np.zeros(6)
    start[0] = float(np.median(z))
    ref = least_squares(lambda c: m @ c - z, start, loss="soft_l1", f_scale=10.0, xtol=1e-12, ftol=1e-12, gtol=1e-12).x
    assert m @ ours == pytest.approx(m @ ref, abs=0.01)


def test_surface_model_grows_with_the_points() -> None:
    assert fit_focus_surface([], tolerance_um=10.0) is None
    one = fit_focus_surface([SurfacePoint(0, 0, 100)], tolerance_um=10.0)
    assert one is not None and one.kind == "constant" and one.z_um(5000, 5000) == pytest.approx(100)
    # Collinear points fix the tilt along their line only: across it the surface is level.
    line = fit_focus_surface([SurfacePoint(x, 0, 100 + x / 1000) for x in (0, 9000, 18000)], tolerance_um=10.0)
    assert line is not None and line.kind == "line"
    assert line.z_um(13500, 0) == pytest.approx(113.5, abs=1e-6)
    assert line.z_um(13500, 40000) == pytest.approx(113.5, abs=1e-6)
    assert line.beyond_support_mm(13500, 40000) == pytest.approx(40.0)
    assert line.beyond_support_mm(13500, 0) == pytest.approx(0.0, abs=1e-9)
    tri = [SurfacePoint(0, 0, 100), SurfacePoint(9000, 0, 109), SurfacePoint(0, 9000, 91)]
    plane = fit_focus_surface(tri, tolerance_um=10.0)
    assert plane is not None and plane.kind == "plane"
    assert plane.z_um(3000, 3000) == pytest.approx(100.0, abs=1e-6)  # z = 100 + x/1000 - y/1000
    assert plane.z_um(9000, 9000) == pytest.approx(100.0, abs=1e-6)  # followed one extent past the points


def sim_like_plate(x_um: float, y_um: float) -> float:
    """A focal plane like the simulated plate's (drivers/sim/focal.py with hw_profiles/sim.toml:
    0.8 and -0.5 um/mm of tilt, 12 um of sag over a 96-well grid centred at 63.9, 42.7 mm)."""
    u, v = (x_um - 63_880) / 1000, (y_um - 42_740) / 1000
    return 1500 + 0.8 * u - 0.5 * v + 12.0 * ((u / 49.5) ** 2 + (v / 31.5) ** 2)


WELL_X_UM = [14_380 + 9_000 * c for c in range(12)]  # ANSI/SLAS 4-2004 96-well pitch, 9 mm
ROW_A_Y_UM, ROW_H_Y_UM = 11_240, 11_240 + 7 * 9_000


def test_a_single_row_is_not_extrapolated_across_the_plate() -> None:
    # Reported: after imaging only row A, predictions for row H were off by 0.37-1.5 mm.
    # Row A plus one well of row H fixes no curvature across the rows (two rows only):
    # no quadratic, and predictions stay within the plate's own focal range.
    rng = np.random.default_rng(11)
    pts = [SurfacePoint(x, ROW_A_Y_UM, sim_like_plate(x, ROW_A_Y_UM) + rng.normal(0, 1.0)) for x in WELL_X_UM]
    row_a = fit_focus_surface(pts, tolerance_um=10.0)
    assert row_a is not None and row_a.kind == "line"
    for x in WELL_X_UM:
        truth_h = sim_like_plate(x, ROW_H_Y_UM)
        # Level across the row: off by the plate's change from row A to H (tilt + sag), no more.
        assert abs(row_a.z_um(x, ROW_H_Y_UM) - truth_h) <= 40.0
        assert row_a.beyond_support_mm(x, ROW_H_Y_UM) == pytest.approx(63.0, abs=0.01)
    pts.append(SurfacePoint(WELL_X_UM[10], ROW_H_Y_UM, sim_like_plate(WELL_X_UM[10], ROW_H_Y_UM)))
    both = fit_focus_surface(pts, tolerance_um=10.0)
    assert both is not None and both.kind == "plane"  # 13 points, yet the quadratic is undetermined
    for x in WELL_X_UM:
        assert abs(both.z_um(x, ROW_H_Y_UM) - sim_like_plate(x, ROW_H_Y_UM)) <= 15.0


def test_a_tilt_measured_inside_one_well_is_not_carried_across_the_plate() -> None:
    # Four sites 1 mm apart in well A1, each focused to within a quarter depth of field
    # (2.6 um at 10x/0.25): the tilt they suggest is mostly noise, so it must not be
    # followed 60 mm out; there the surface stays level and says how far it is guessing.
    rng = np.random.default_rng(5)
    sites = [(WELL_X_UM[0] + dx, ROW_A_Y_UM + dy) for dx in (-500, 500) for dy in (-500, 500)]
    pts = [SurfacePoint(x, y, sim_like_plate(x, y) + rng.uniform(-2.6, 2.6)) for x, y in sites]
    fit = fit_focus_surface(pts, tolerance_um=10.0)
    assert fit is not None
    far_x, far_y = WELL_X_UM[7], ROW_H_Y_UM
    mean_z = float(np.mean([p.z_um for p in pts]))
    assert abs(fit.z_um(far_x, far_y) - mean_z) <= 2 * 2.6 + 2.0  # level beyond the reach
    assert fit.beyond_support_mm(far_x, far_y) > 60.0


@settings(max_examples=40, deadline=None)
@given(rows=st.integers(1, 3), noise_um=st.floats(0.0, 2.6), seed=st.integers(0, 2**16))
def test_predictions_anywhere_on_the_plate_stay_near_the_plate(rows: int, noise_um: float, seed: int) -> None:
    # Whatever rows were imaged first, a prediction anywhere on the plate is off by at most
    # about what the plate itself changes beyond them (tilt 0.5 um/mm over the 63 mm from
    # row A to H, plus a row's 12 um of sag) and the noise: never the hundreds of um an
    # undetermined or unbounded polynomial gives.
    rng = np.random.default_rng(seed)
    pts = [SurfacePoint(x, ROW_A_Y_UM + 9000 * r, 0.0) for r in range(rows) for x in WELL_X_UM]
    pts = [SurfacePoint(p.x_um, p.y_um, sim_like_plate(p.x_um, p.y_um) + rng.uniform(-noise_um, noise_um)) for p in pts]
    fit = fit_focus_surface(pts, tolerance_um=10.0)
    assert fit is not None
    for r in range(8):
        for x in WELL_X_UM[::3]:
            y = ROW_A_Y_UM + 9000 * r
            assert abs(fit.z_um(x, y) - sim_like_plate(x, y)) <= 0.5 * 63 + 12 + 2 * noise_um


def found(z_um: float, t_s: float) -> FocusResult:
    curve = [FocusPoint(z_um + dz, 100.0 - dz * dz, t_s) for dz in (-40.0, -5.0, 0.0, 5.0, 40.0)]
    return FocusResult(True, z_um, 100.0, 5, 1.0, 0.8, curve, "focus found", None, floor=10.0, width_um=6.0)


def test_tracker_predicts_drift_and_surface_and_survives_a_restart() -> None:
    profile = sim_profile()
    tracker = FocusTracker(profile)
    assert tracker.predict_z_um("A1-1", 0, 0, 0.0) is None
    # Time point 1: three wells on a plane z = 1000 + 1 um/mm in x.
    wells = {"A1": (0.0, 0.0), "A2": (9000.0, 0.0), "B1": (0.0, 9000.0)}
    for i, (key, (x, y)) in enumerate(wells.items()):
        tracker.record(key, x, y, found(1000.0 + x / 1000.0, 100.0 + i))
    # A new well is predicted from the focus surface (plane through the three).
    assert tracker.predict_z_um("B2", 9000.0, 9000.0, 110.0) == pytest.approx(1009.0, abs=1e-3)
    # Time point 2, 600 s later: A1 and A2 have drifted up 6 um (0.01 um/s).
    tracker.record("A1", 0.0, 0.0, found(1006.0, 700.0))
    tracker.record("A2", 9000.0, 0.0, found(1015.0, 701.0))
    assert tracker.drift_rate_um_s(702.0) == pytest.approx(0.01, rel=1e-6)
    # B1 has not been revisited: its last plane plus the common trend.
    assert tracker.predict_z_um("B1", 0.0, 9000.0, 702.0) == pytest.approx(1000.0 + 0.01 * 600.0, abs=1e-6)
    restored = FocusTracker.from_dict(profile, tracker.to_dict())
    assert restored.predict_z_um("B1", 0.0, 9000.0, 702.0) == tracker.predict_z_um("B1", 0.0, 9000.0, 702.0)
    assert restored.keys["A1"].floor == 10.0
    with pytest.raises(ValueError, match="version"):
        FocusTracker.from_dict(profile, {"version": 99})


def test_tracker_ignores_failed_runs() -> None:
    tracker = FocusTracker(sim_profile())
    tracker.record("A1", 0.0, 0.0, found(1000.0, 0.0))
    miss = FocusResult(False, 1200.0, math.nan, 20, 3.0, 0.05, [], "no focus found", None)
    tracker.record("A1", 0.0, 0.0, miss)
    assert tracker.predict_z_um("A1", 0.0, 0.0, 100.0) == pytest.approx(1000.0)
