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


def test_surface_model_grows_with_the_points() -> None:
    assert fit_focus_surface([], tolerance_um=10.0) is None
    one = fit_focus_surface([SurfacePoint(0, 0, 100)], tolerance_um=10.0)
    assert one is not None and one.kind == "constant" and one.z_um(5000, 5000) == pytest.approx(100)
    line = fit_focus_surface([SurfacePoint(x, 0, 100 + x / 1000) for x in (0, 9000, 18000)], tolerance_um=10.0)
    assert line is not None and line.kind == "constant"  # collinear: a plane is undetermined
    tri = [SurfacePoint(0, 0, 100), SurfacePoint(9000, 0, 109), SurfacePoint(0, 9000, 91)]
    plane = fit_focus_surface(tri, tolerance_um=10.0)
    assert plane is not None and plane.kind == "plane"
    assert plane.z_um(9000, 9000) == pytest.approx(100.0, abs=1e-6)


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
