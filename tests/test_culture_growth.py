"""Growth-curve fitting: doubling time and its uncertainty from confluence against time.

The truths here are the closed forms themselves: exponential growth c0 · 2^(t / Td)
(the definition of the doubling time Td) and the Verhulst (1838) logistic
K / (1 + (K / c0 - 1) · 2^(-t / Td)). The fitting machinery is checked against SciPy's
own ``curve_fit`` and the AICc against the Gaussian log-likelihood of ``scipy.stats``.
"""

from __future__ import annotations

import math
import time
from pathlib import Path

import numpy as np
import pytest
import scipy.optimize
import scipy.stats

from daemon.culture.growth import DEFAULT_NOISE, NoiseModel, aicc, fit_growth, fit_plate

H = 3600.0
TD_H = 22.0


def logistic(t_h: np.ndarray, c0: float, td_h: float, k: float) -> np.ndarray:
    # Verhulst logistic growth, rate r = ln 2 / Td (definition of the doubling time).
    r = math.log(2) / td_h
    return k / (1 + (k / c0 - 1) * np.exp(-r * t_h))


def exponential(t_h: np.ndarray, c0: float, td_h: float) -> np.ndarray:
    return c0 * 2.0 ** (t_h / td_h)


def exponential_times(c_start: float, c_end: float, n: int, td_h: float = TD_H) -> np.ndarray:
    return np.linspace(0.0, td_h * math.log2(c_end / c_start), n)


# -- bias on noise-free curves -------------------------------------------------------------------

@pytest.mark.parametrize("c_end", [0.09, 0.20, 0.35])
def test_noise_free_exponential_has_no_bias(c_end: float) -> None:
    # Pure exponential growth from 2 % (the ranges a linear fit of logit c got 5, 10 and
    # 15 % short). One time point per hour or so, as a time-lapse takes them.
    t_h = exponential_times(0.02, c_end, 25)
    fit = fit_growth(t_h * H, exponential(t_h, 0.02, TD_H))
    assert fit.model == "exponential", fit.note
    assert fit.ok, fit.note
    assert fit.doubling_time_h == pytest.approx(TD_H, rel=0.01)
    assert fit.plateau is None
    np.testing.assert_allclose(fit.predict(t_h * H), exponential(t_h, 0.02, TD_H), rtol=1e-3)


@pytest.mark.parametrize("k", [0.7, 0.9, 1.0])
@pytest.mark.parametrize("c_end", [0.09, 0.20, 0.35, "plateau"])
def test_noise_free_logistic_has_no_bias(k: float, c_end: float | str) -> None:
    # The same ranges of a logistic culture, and the whole curve up to its plateau K.
    r = math.log(2) / TD_H
    if c_end == "plateau":
        t_end = math.log((k / 0.02 - 1) / (k / (0.97 * k) - 1)) / r
    else:
        t_end = math.log((k / 0.02 - 1) / (k / float(c_end) - 1)) / r
    t_h = np.linspace(0.0, t_end, 30)
    fit = fit_growth(t_h * H, logistic(t_h, 0.02, TD_H, k))
    assert fit.model == "logistic", fit.note
    assert fit.doubling_time_h == pytest.approx(TD_H, rel=0.01)
    assert fit.plateau == pytest.approx(k, rel=0.01)


# -- the stated uncertainty against Monte Carlo ----------------------------------------------------

SEEDS = 500


def _coverage(t_h: np.ndarray, truth: np.ndarray) -> tuple[float, float, dict[str, int], float]:
    """Fraction of seeds whose stated ±1σ and ±2σ hold the true doubling time, with the
    data drawn from the fit's own noise model (absolute and relative parts)."""
    sigma = DEFAULT_NOISE.sigma(truth)
    z, models = [], {}
    start = time.perf_counter()
    for seed in range(SEEDS):
        c = truth + np.random.default_rng(seed).normal(0.0, 1.0, truth.size) * sigma
        fit = fit_growth(t_h * H, c)
        models[fit.model] = models.get(fit.model, 0) + 1
        assert fit.doubling_time_h is not None and fit.doubling_time_err_h is not None, fit.note
        z.append(abs(fit.doubling_time_h - TD_H) / fit.doubling_time_err_h)
    za = np.array(z)
    return float(np.mean(za <= 1.0)), float(np.mean(za <= 2.0)), models, time.perf_counter() - start


@pytest.mark.parametrize("scenario", ["exponential 2-20 %", "logistic to plateau"])
def test_stated_uncertainty_holds_the_truth_as_often_as_it_says(scenario: str) -> None:
    if scenario == "exponential 2-20 %":
        t_h = exponential_times(0.02, 0.20, 20)
        truth = exponential(t_h, 0.02, TD_H)
    else:
        t_h = np.linspace(0.0, 150.0, 30)
        truth = logistic(t_h, 0.02, TD_H, 0.8)
    one, two, models, seconds = _coverage(t_h, truth)
    print(f"\n{scenario}: ±1σ holds the truth in {one:.1%}, ±2σ in {two:.1%} of {SEEDS} seeds; models {models} ({seconds:.1f} s)")
    # A normal error holds the truth within ±1σ 68.3 % and within ±2σ 95.4 % of the time
    # (normal distribution, any statistics handbook); the bands allow for the 500 seeds
    # (binomial standard error 2 %) and for the stated error being a floor.
    assert 0.60 <= one <= 0.76
    assert 0.90 <= two <= 0.98
    if scenario == "exponential 2-20 %":
        # AICc keeps the simpler, true model most of the time (not always: that is its price).
        assert models.get("exponential", 0) >= 0.8 * SEEDS
    else:
        assert models == {"logistic": SEEDS}


# -- the machinery against SciPy -------------------------------------------------------------------

def test_weighted_fit_matches_scipy_curve_fit() -> None:
    t_h = exponential_times(0.02, 0.25, 18)
    truth = exponential(t_h, 0.02, TD_H)
    for seed in range(5):
        c = truth + np.random.default_rng(100 + seed).normal(0.0, 1.0, truth.size) * DEFAULT_NOISE.sigma(truth)
        fit = fit_growth(t_h * H, c)
        assert fit.model == "exponential", fit.note
        # Reference: scipy.optimize.curve_fit, weighted by the noise model on our fitted curve.
        sigma = DEFAULT_NOISE.sigma(fit.predict(t_h * H))
        model = lambda t, ln_c0, r: np.exp(ln_c0 + r * t)  # noqa: E731
        p0 = (math.log(0.02), math.log(2) / TD_H)
        popt, pcov_abs = scipy.optimize.curve_fit(model, t_h, c, p0=p0, sigma=sigma, absolute_sigma=True)
        _, pcov_rel = scipy.optimize.curve_fit(model, t_h, c, p0=p0, sigma=sigma, absolute_sigma=False)
        assert fit.rate_per_h == pytest.approx(popt[1], rel=2e-3)
        # The stated error is the noise model's, or the scatter's where that is larger.
        assert fit.rate_err_per_h == pytest.approx(math.sqrt(max(pcov_abs[1, 1], pcov_rel[1, 1])), rel=0.02)
        assert fit.doubling_time_err_h == pytest.approx(math.log(2) * fit.rate_err_per_h / fit.rate_per_h**2)


def test_aicc_is_the_gaussian_likelihood_with_the_small_sample_term() -> None:
    rng = np.random.default_rng(7)
    residuals = rng.normal(0.0, 0.3, 12)
    n, k = residuals.size, 4
    wrss = float(np.sum(residuals**2))
    # -2 ln L of a normal with its maximum-likelihood variance WRSS / n (scipy.stats.norm),
    # plus 2k and the Hurvich & Tsai (1989) term 2k(k+1)/(n-k-1); AICc drops the constant
    # n (1 + ln 2π), which is the same for every model on the same points.
    log_l = float(np.sum(scipy.stats.norm.logpdf(residuals, scale=math.sqrt(wrss / n))))
    reference = -2.0 * log_l + 2 * k + 2 * k * (k + 1) / (n - k - 1) - n * (1.0 + math.log(2.0 * math.pi))
    assert aicc(wrss, n, k) == pytest.approx(reference, rel=1e-12)
    with pytest.raises(ValueError):
        aicc(wrss, 5, 4)


def test_noise_model() -> None:
    noise = NoiseModel(absolute=0.005, relative=0.04)
    np.testing.assert_allclose(noise.sigma(np.array([0.0, 0.5, 2.0])), [0.005, math.hypot(0.005, 0.02), math.hypot(0.005, 0.04)])
    with pytest.raises(ValueError):
        NoiseModel(absolute=0.0, relative=0.0)
    with pytest.raises(ValueError):
        NoiseModel(absolute=-0.01)
    # A tighter noise model states a smaller error on the same noise-free points.
    t_h = exponential_times(0.02, 0.2, 12)
    c = exponential(t_h, 0.02, TD_H)
    loose, tight = fit_growth(t_h * H, c), fit_growth(t_h * H, c, noise=NoiseModel(0.001, 0.01))
    assert tight.doubling_time_err_h < 0.5 * loose.doubling_time_err_h
    assert tight.doubling_time_h == pytest.approx(loose.doubling_time_h, rel=1e-6)


# -- behaviour ------------------------------------------------------------------------------------

def test_logistic_chosen_once_the_curve_levels_off() -> None:
    rng = np.random.default_rng(2)
    t_h = np.arange(0, 150, 2.0)
    c = logistic(t_h, 0.03, 20.0, 0.92) + rng.normal(0, 0.01, t_h.size)
    fit = fit_growth(t_h * H + 1.7e9, c)  # any time origin
    assert fit.model == "logistic"
    assert fit.ok, fit.note
    assert "AICc" in fit.note and fit.aicc["logistic"] < fit.aicc["exponential"]
    assert fit.doubling_time_h == pytest.approx(20.0, rel=0.08)
    assert abs(fit.doubling_time_h - 20.0) <= 3 * fit.doubling_time_err_h
    assert fit.plateau == pytest.approx(0.92, abs=0.03)
    # The fitted curve is what the interface draws beside the points.
    pred = fit.predict(t_h * H + 1.7e9)
    assert np.max(np.abs(pred - logistic(t_h, 0.03, 20.0, 0.92))) < 0.03


def test_unordered_and_missing_points_are_handled() -> None:
    t_h = np.arange(0, 40, 2.0)
    c = list(exponential(t_h, 0.03, 18.0))
    c[3] = None  # a frame that could not be analysed
    c[5] = float("nan")
    order = np.random.default_rng(3).permutation(t_h.size)
    fit = fit_growth(list(t_h[order] * H), [c[i] for i in order])
    assert fit.n_points == t_h.size - 2
    assert fit.model == "exponential"
    assert fit.doubling_time_h == pytest.approx(18.0, rel=1e-3)


def test_four_points_are_fitted_as_exponential_with_an_honest_error() -> None:
    # Too few points to compare models by AICc: the exponential alone, and with two
    # degrees of freedom the stated error comes from the noise model.
    t_h = np.array([0.0, 2.0, 4.0, 6.0])
    fit = fit_growth(t_h * H, exponential(t_h, 0.2, TD_H))
    assert fit.model == "exponential" and "AICc" not in fit.note and fit.aicc == {}
    assert fit.doubling_time_h == pytest.approx(TD_H, rel=1e-3)
    # Six hours of a 22-hour doubling time at 4 % noise cannot pin it down, and says so.
    assert fit.doubling_time_err_h > 0.2 * TD_H and not fit.ok and "uncertain" in fit.note


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
        "B3": (t_h * H, exponential(t_h, 0.03, 24.0)),
        "H12": (t_h * H, np.zeros(t_h.size)),  # the empty control well
    })
    assert fits["B3"].ok and fits["B3"].doubling_time_h == pytest.approx(24.0, rel=0.01)
    assert not fits["H12"].ok and fits["H12"].doubling_time_h is None
    d = fits["B3"].to_dict()
    assert d["model"] == "exponential" and d["doubling_time_h"] == fits["B3"].doubling_time_h
    assert set(d["aicc"]) == {"exponential", "logistic"} and d["plateau"] is None


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


def _within_stated_error(fit: object, truth_td: float, k: float = 2.0) -> bool:
    return abs(fit.doubling_time_h - truth_td) <= k * fit.doubling_time_err_h  # type: ignore[attr-defined]


def test_sim_sub_confluent_doubling_time(sim_series: dict[str, object]) -> None:
    # The first three days (a few % to about 30 %): the simulated culture grows as a
    # logistic towards 95 %, so AICc may well prefer the logistic already.
    s = sim_series
    early = s["hours"] <= 72.0
    truth_td = s["doubling_time_h"]
    on_truth = fit_growth(s["t_s"][early], s["truth"][early])
    on_measured = fit_growth(s["t_s"][early], s["measured"][early])
    print(f"\nfirst three days: truth coverage -> {on_truth.model} {on_truth.doubling_time_h:.2f} ± {on_truth.doubling_time_err_h:.2f} h, "
          f"measured -> {on_measured.model} {on_measured.doubling_time_h:.2f} ± {on_measured.doubling_time_err_h:.2f} h (simulator {truth_td} h)")
    assert on_truth.ok and on_measured.ok
    # Four 4x fields hold a few dozen cells at the start: the truth is within twice the
    # stated error, and within 15 % (segmentation adds its own bias to the measured).
    assert _within_stated_error(on_truth, truth_td) and _within_stated_error(on_measured, truth_td)
    assert on_truth.doubling_time_h == pytest.approx(truth_td, rel=0.15)
    assert on_measured.doubling_time_h == pytest.approx(truth_td, rel=0.15)


def test_sim_logistic_growth_doubling_time(sim_series: dict[str, object]) -> None:
    s = sim_series
    every_12h = np.isclose(s["hours"] % 12.0, 0.0)
    truth_td = s["doubling_time_h"]
    on_truth = fit_growth(s["t_s"][every_12h], s["truth"][every_12h])
    on_measured = fit_growth(s["t_s"][every_12h], s["measured"][every_12h])
    print(f"\nlogistic, 7 days: truth coverage -> {on_truth.doubling_time_h:.2f} ± {on_truth.doubling_time_err_h:.2f} h (plateau {on_truth.plateau:.2f}), "
          f"measured -> {on_measured.doubling_time_h:.2f} ± {on_measured.doubling_time_err_h:.2f} h (plateau {on_measured.plateau:.2f}); "
          f"simulator {truth_td} h")
    assert on_truth.model == on_measured.model == "logistic"
    assert on_truth.ok and on_measured.ok
    assert _within_stated_error(on_truth, truth_td)
    assert on_truth.doubling_time_h == pytest.approx(truth_td, rel=0.05)
    # The segmentation's bias depends on the coverage, which bends the measured curve a
    # little: 15 %, beyond the statistical error.
    assert on_measured.doubling_time_h == pytest.approx(truth_td, rel=0.15)
    assert max(s["truth"]) > 0.7  # the series reaches the plateau region


def test_growth_rows_for_the_csv() -> None:
    import csv
    import io

    from daemon.culture.growth import GROWTH_COLUMNS, growth_rows

    t_h = np.arange(0, 30, 2.0)
    fits = fit_plate({"B3": (t_h * H, exponential(t_h, 0.03, 24.0)), "H12": (t_h * H, np.zeros(t_h.size))})
    buf = io.StringIO()
    writer = csv.writer(buf)
    writer.writerow(GROWTH_COLUMNS)
    writer.writerows(growth_rows(fits))
    rows = list(csv.DictReader(io.StringIO(buf.getvalue())))
    assert [r["well"] for r in rows] == ["B3", "H12"]
    assert float(rows[0]["doubling_time_h"]) == pytest.approx(24.0, rel=0.01) and rows[0]["ok"] == "yes"
    assert rows[1]["doubling_time_h"] == "" and rows[1]["ok"] == "no" and "empty well" in rows[1]["note"]


# -- the shipped demo time-lapse -------------------------------------------------------------------

@pytest.mark.slow
def test_demo_time_lapse_growth_csv_recovers_the_simulated_doubling_time(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """The README's demo, run as a user runs it: ``timelapse start examples/larkspur-demo.toml
    --profile sim --sim-speed 1000``, then ``export 1``; its growth.csv must hold the
    simulator's doubling time within the error it states (one standard deviation)."""
    import csv

    from daemon.cli import main
    from daemon.profile import load_profile

    repo = Path(__file__).resolve().parent.parent
    data = tmp_path / "lr-demo"
    argv = ["timelapse", "start", str(repo / "examples" / "larkspur-demo.toml"), "--profile", "sim",
            "--data", str(data), "--sim-speed", "1000", "--quiet"]
    assert main(argv) == 0
    assert main(["export", "1", "--data", str(data)]) == 0
    capsys.readouterr()
    (growth_csv,) = data.glob("exports/*/growth.csv")
    rows = {row["well"]: row for row in csv.DictReader(growth_csv.open(encoding="utf-8"))}
    truth_td = load_profile("sim").sim.culture.doubling_time_h
    assert set(rows) == {"B2", "C4"}
    for well, row in rows.items():
        td, err = float(row["doubling_time_h"]), float(row["doubling_time_err_h"])
        print(f"\ndemo {well}: {row['model']} {td:.1f} ± {err:.1f} h (simulator {truth_td} h); {row['note']}")
        assert abs(td - truth_td) <= err, row
        # Six hours of a 22-hour doubling time: the figure is rough and the row says so.
        assert err > 0.1 * td
