"""Growth-curve fitting: doubling time and its uncertainty from confluence against time."""

from __future__ import annotations

import math

import numpy as np
import pytest

from daemon.culture.growth import fit_growth, fit_plate

H = 3600.0


def logistic(t_h: np.ndarray, c0: float, td_h: float, k: float) -> np.ndarray:
    # Verhulst logistic growth, rate r = ln 2 / Td (definition of the doubling time).
    r = math.log(2) / td_h
    return k / (1 + (k / c0 - 1) * np.exp(-r * t_h))


def test_exponential_phase_doubling_time_recovered() -> None:
    rng = np.random.default_rng(1)
    t_h = np.arange(0, 48, 1.0)
    truth_td = 22.0
    # Pure exponential growth at low coverage (2 % to 9 %), with measurement noise.
    c = 0.02 * 2 ** (t_h / truth_td) + rng.normal(0, 0.002, t_h.size)
    fit = fit_growth(t_h * H, c)
    assert fit.model == "exponential"
    assert fit.ok, fit.note
    assert fit.doubling_time_h == pytest.approx(truth_td, rel=0.05)
    # The stated uncertainty must be honest: the truth lies within 3 sigma of the estimate.
    assert abs(fit.doubling_time_h - truth_td) <= 3 * fit.doubling_time_err_h
    assert 0 < fit.doubling_time_err_h < 0.1 * truth_td
    assert fit.r2 > 0.95


def test_logistic_chosen_once_the_curve_levels_off() -> None:
    rng = np.random.default_rng(2)
    t_h = np.arange(0, 150, 2.0)
    c = logistic(t_h, 0.03, 20.0, 0.92) + rng.normal(0, 0.01, t_h.size)
    fit = fit_growth(t_h * H + 1.7e9, c)  # any time origin
    assert fit.model == "logistic"
    assert fit.ok, fit.note
    assert fit.doubling_time_h == pytest.approx(20.0, rel=0.08)
    assert abs(fit.doubling_time_h - 20.0) <= 3 * fit.doubling_time_err_h
    assert fit.plateau == pytest.approx(0.92, abs=0.03)
    # The fitted curve is what the interface draws beside the points.
    pred = fit.predict(t_h * H + 1.7e9)
    assert np.max(np.abs(pred - logistic(t_h, 0.03, 20.0, 0.92))) < 0.03


def test_unordered_and_missing_points_are_handled() -> None:
    t_h = np.arange(0, 40, 2.0)
    c = list(logistic(t_h, 0.05, 18.0, 0.95))  # reaches 0.2: the exponential phase
    c[3] = None  # a frame that could not be analysed
    c[5] = float("nan")
    order = np.random.default_rng(3).permutation(t_h.size)
    fit = fit_growth(list(t_h[order] * H), [c[i] for i in order])
    assert fit.n_points == t_h.size - 2
    assert fit.model == "exponential"
    # The early-phase fit assumes the plateau at full coverage; with the true one at 95 %
    # that costs a little accuracy (measured: within 3 %).
    assert fit.doubling_time_h == pytest.approx(18.0, rel=0.03)


def test_noise_without_growth_is_reported_as_a_poor_fit() -> None:
    rng = np.random.default_rng(4)
    t_h = np.arange(0, 48, 2.0)
    c = 0.2 + rng.normal(0, 0.03, t_h.size)
    fit = fit_growth(t_h * H, c)
    assert not fit.ok
    assert fit.note  # says why
    assert "poor fit" in fit.note or "no growth" in fit.note or "uncertain" in fit.note


def test_detachment_is_not_fitted_as_growth() -> None:
    t_h = np.arange(0, 96, 3.0)
    c = logistic(t_h, 0.05, 22.0, 0.9)
    c[t_h > 70] = 0.1  # most cells lifted off
    fit = fit_growth(t_h * H, c)
    assert not fit.ok
    assert "poor fit" in fit.note


def test_too_few_points() -> None:
    fit = fit_growth([0.0, 3600.0, 7200.0], [0.1, 0.12, 0.14])
    assert fit.model == "none" and not fit.ok and fit.doubling_time_h is None
    assert "time points" in fit.note
    assert np.all(np.isnan(fit.predict([0.0, 1.0])))


def test_mismatched_lengths_raise() -> None:
    with pytest.raises(ValueError):
        fit_growth([0.0, 1.0], [0.1])


def test_fit_plate_and_dict_round_trip() -> None:
    t_h = np.arange(0, 30, 2.0)
    fits = fit_plate({
        "B3": (t_h * H, logistic(t_h, 0.03, 24.0, 1.0)),
        "H12": (t_h * H, np.zeros(t_h.size)),  # the empty control well
    })
    assert fits["B3"].ok and fits["B3"].doubling_time_h == pytest.approx(24.0, rel=0.01)
    assert not fits["H12"].ok and fits["H12"].doubling_time_h is None
    d = fits["B3"].to_dict()
    assert d["model"] == "exponential" and d["doubling_time_h"] == fits["B3"].doubling_time_h


# -- on the simulated culture: the simulator's doubling time is the truth ---------------------

SITES_UM = ((-1200.0, -800.0), (1200.0, -800.0), (-1200.0, 800.0), (1200.0, 800.0))


@pytest.fixture(scope="module")
def sim_series() -> dict[str, object]:
    from daemon.culture.confluence import confluence
    from drivers.sim.world import SimWorld
    from tests.helpers import sim_profile

    # 4x/0.10 fields (450 x 340 um) hold enough cells for a smooth curve; four sites per well.
    world = SimWorld(sim_profile(480, 360, **{"optics.magnification": 4.0, "optics.numerical_aperture": 0.10}))
    cx, cy = world.well_centre_um("B4")
    hours = sorted(set(np.arange(0.0, 73.0, 6.0)) | set(np.arange(0.0, 169.0, 12.0)))
    measured, field_truth, times = [], [], []
    for h in hours:
        t = world.t0_s + h * H
        est, tru = [], []
        for dx, dy in SITES_UM:
            x, y = cx + dx, cy + dy
            frame = world.render(x, y, world.true_focus_z_um(x, y, t), t_s=t, exposure_ms=20.0)
            est.append(confluence(frame, pixel_size_um=world.pixel_um).fraction)
            tru.append(world.true_confluence(x, y, t))
        times.append(t)
        measured.append(float(np.mean(est)))
        field_truth.append(float(np.mean(tru)))
    return {
        "hours": np.array(hours), "t_s": np.array(times), "measured": np.array(measured),
        "truth": np.array(field_truth), "doubling_time_h": world.profile.sim.culture.doubling_time_h,
    }


def test_sim_exponential_phase_doubling_time(sim_series: dict[str, object]) -> None:
    s = sim_series
    early = s["hours"] <= 72.0
    truth_td = s["doubling_time_h"]
    on_truth = fit_growth(s["t_s"][early], s["truth"][early])
    on_measured = fit_growth(s["t_s"][early], s["measured"][early])
    print(f"\nexponential phase: truth coverage -> {on_truth.doubling_time_h:.2f} ± {on_truth.doubling_time_err_h:.2f} h, "
          f"measured -> {on_measured.doubling_time_h:.2f} ± {on_measured.doubling_time_err_h:.2f} h (simulator {truth_td} h)")
    assert on_truth.model == on_measured.model == "exponential"
    assert on_truth.ok and on_measured.ok
    # Stated tolerances: 5 % on the true field coverage (sampling of a few hundred cells
    # per field), 15 % on the measured confluence (segmentation bias adds to it).
    assert on_truth.doubling_time_h == pytest.approx(truth_td, rel=0.05)
    assert on_measured.doubling_time_h == pytest.approx(truth_td, rel=0.15)


def test_sim_logistic_growth_doubling_time(sim_series: dict[str, object]) -> None:
    s = sim_series
    every_12h = np.isclose(s["hours"] % 12.0, 0.0)
    truth_td = s["doubling_time_h"]
    on_truth = fit_growth(s["t_s"][every_12h], s["truth"][every_12h])
    on_measured = fit_growth(s["t_s"][every_12h], s["measured"][every_12h])
    print(f"\nlogistic, 7 days: truth coverage -> {on_truth.doubling_time_h:.2f} h (plateau {on_truth.plateau:.2f}), "
          f"measured -> {on_measured.doubling_time_h:.2f} ± {on_measured.doubling_time_err_h:.2f} h (plateau {on_measured.plateau:.2f}); "
          f"simulator {truth_td} h")
    assert on_truth.model == on_measured.model == "logistic"
    assert on_truth.ok and on_measured.ok
    assert on_truth.doubling_time_h == pytest.approx(truth_td, rel=0.05)
    assert on_measured.doubling_time_h == pytest.approx(truth_td, rel=0.15)
    assert max(s["truth"]) > 0.7  # the series reaches the plateau region


def test_growth_rows_for_the_csv() -> None:
    import csv
    import io

    from daemon.culture.growth import GROWTH_COLUMNS, growth_rows

    t_h = np.arange(0, 30, 2.0)
    fits = fit_plate({"B3": (t_h * H, logistic(t_h, 0.03, 24.0, 1.0)), "H12": (t_h * H, np.zeros(t_h.size))})
    buf = io.StringIO()
    writer = csv.writer(buf)
    writer.writerow(GROWTH_COLUMNS)
    writer.writerows(growth_rows(fits))
    rows = list(csv.DictReader(io.StringIO(buf.getvalue())))
    assert [r["well"] for r in rows] == ["B3", "H12"]
    assert float(rows[0]["doubling_time_h"]) == pytest.approx(24.0, rel=0.01) and rows[0]["ok"] == "yes"
    assert rows[1]["doubling_time_h"] == "" and rows[1]["ok"] == "no" and "empty well" in rows[1]["note"]
