"""The simulated sensor against EMVA Standard 1288 (Release 4.0): photon transfer recovers the
system gain, read noise, DSNU and PRNU it was built with; exposure, gain and lamp act linearly."""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest

from drivers.sim.config import SimSensor
from drivers.sim.sensor import Sensor
from drivers.sim.world import SimWorld
from tests.helpers import sim_profile


@pytest.fixture(scope="module")
def world() -> SimWorld:
    return SimWorld(sim_profile(320, 240))


@pytest.fixture(scope="module")
def blank(world: SimWorld) -> tuple[float, float]:
    """The centre of the profile's empty well: a blank field (no cells)."""
    assert "H12" in world.sim.plate.empty_wells
    return world.well_centre_um("H12")


def frame(world: SimWorld, xy: tuple[float, float], **kw: float) -> np.ndarray:
    x, y = xy
    z = world.true_focus_z_um(x, y, world.t0_s)
    return world.render(x, y, z, t_s=world.t0_s, **kw).astype(np.float64)


def pair_stats(world: SimWorld, xy: tuple[float, float], **kw: float) -> tuple[float, float]:
    """EMVA 1288 mean and temporal variance from a pair of frames: mu = mean of both,
    sigma^2 = var(A - B) / 2 (fixed patterns and the scene cancel in the difference)."""
    a, b = frame(world, xy, **kw), frame(world, xy, **kw)
    return float((a.mean() + b.mean()) / 2.0), float(np.var(a - b) / 2.0)


@pytest.mark.parametrize(("gain_db", "exposures_ms"), [(0.0, (6, 10, 14, 18, 22)), (12.0, (1.5, 2.5, 3.5, 4.5, 5.5))])
def test_photon_transfer_recovers_system_gain(world: SimWorld, blank: tuple[float, float], gain_db: float, exposures_ms: tuple[float, ...]) -> None:
    # EMVA 1288 R4.0 photon transfer: sigma_y^2 - sigma_y.dark^2 = K * (mu_y - mu_y.dark) (+ the
    # quantisation term, which the fitted intercept absorbs); the slope is the system gain K.
    signal, variance = [], []
    for t in exposures_ms:
        mu, var = pair_stats(world, blank, exposure_ms=t, gain_db=gain_db)
        mu_d, var_d = pair_stats(world, blank, exposure_ms=t, gain_db=gain_db, lamp_level=0.0)
        signal.append(mu - mu_d)
        variance.append(var - var_d)
    assert max(signal) < 0.7 * 255  # EMVA fits below 70 % of saturation
    slope, _ = np.polyfit(signal, variance, 1)
    truth = world.sensor.truth_at(gain_db)["system_gain_dn_per_e"]
    assert slope == pytest.approx(truth, rel=0.03)


def test_dark_noise_and_dsnu_recovered_at_high_gain(world: SimWorld, blank: tuple[float, float]) -> None:
    # EMVA 1288 R4.0: sigma_y.dark^2 = K^2 * sigma_d^2 + sigma_q^2 (sigma_q^2 = 1/12 DN^2), with
    # sigma_d^2 = read noise^2 + dark-current shot noise. DSNU: spatial variance of the mean of N
    # dark frames minus the temporal variance / N.
    gain_db, exposure_ms = 24.0, 20.0
    truth = world.sensor.truth_at(gain_db)
    k = truth["system_gain_dn_per_e"]
    _, var_d = pair_stats(world, blank, exposure_ms=exposure_ms, gain_db=gain_db, lamp_level=0.0)
    sigma_d_e = math.sqrt(var_d - 1.0 / 12.0) / k
    expected_e = math.sqrt(truth["read_noise_e"] ** 2 + truth["dark_current_e_per_s"] * exposure_ms / 1000.0)
    assert sigma_d_e == pytest.approx(expected_e, rel=0.05)
    n = 16
    darks = np.stack([frame(world, blank, exposure_ms=exposure_ms, gain_db=gain_db, lamp_level=0.0) for _ in range(n)])
    spatial = float(np.var(darks.mean(axis=0)))
    dsnu_e = math.sqrt(max(spatial - var_d / n, 0.0)) / k
    assert dsnu_e == pytest.approx(truth["dsnu_e"], rel=0.12)


def test_prnu_recovered_from_flat_frames(world: SimWorld, blank: tuple[float, float]) -> None:
    # EMVA 1288 R4.0: PRNU = spatial std of the photo-response over its mean, after the temporal
    # noise is averaged down; the smooth illumination (known truth here) is divided out first.
    gain_db, exposure_ms, n = 12.0, 5.0, 16
    flats = np.stack([frame(world, blank, exposure_ms=exposure_ms, gain_db=gain_db) for _ in range(n)])
    darks = np.stack([frame(world, blank, exposure_ms=exposure_ms, gain_db=gain_db, lamp_level=0.0) for _ in range(4)])
    illum = world.illumination.relative_to_centre
    response = (flats.mean(axis=0) - darks.mean(axis=0)) / illum
    # Temporal noise left in both means, on the same illumination-divided scale.
    temporal = float(np.var((flats[0] - flats[1]) / illum)) / 2.0 / n + float(np.var((darks[0] - darks[1]) / illum)) / 2.0 / len(darks)
    prnu = math.sqrt(max(float(np.var(response)) - temporal, 0.0)) / float(response.mean())
    assert prnu == pytest.approx(world.sensor.truth_at(gain_db)["prnu_fraction"], rel=0.15)


def test_mean_signal_is_linear_in_exposure_lamp_and_gain(world: SimWorld, blank: tuple[float, float]) -> None:
    # EMVA 1288 linear model: mu_y - mu_y.dark = K * eta * mu_p, and gain in dB is 20*log10 of K's factor.
    dark = frame(world, blank, exposure_ms=10.0, lamp_level=0.0).mean()
    s10 = frame(world, blank, exposure_ms=10.0).mean() - dark
    s20 = frame(world, blank, exposure_ms=20.0).mean() - dark
    half = frame(world, blank, exposure_ms=20.0, lamp_level=0.5).mean() - dark
    gain6 = frame(world, blank, exposure_ms=10.0, gain_db=6.0).mean() - dark
    assert s20 / s10 == pytest.approx(2.0, rel=0.01)
    assert half / s20 == pytest.approx(0.5, rel=0.01)
    assert gain6 / s10 == pytest.approx(10 ** (6.0 / 20.0), rel=0.01)
    # Absolute: K * QE * photons, with photons = rate * t * tau^2 (empty field) * illumination.
    cfg = world.sim.sensor
    photons = cfg.photons_per_px_ms * 20.0 * world.background_intensity * world.illumination.relative_to_centre.mean()
    assert s20 == pytest.approx(cfg.system_gain_dn_per_e * cfg.quantum_efficiency * photons, rel=0.01)


def test_lamp_off_gives_only_the_dark_signal(world: SimWorld, blank: tuple[float, float]) -> None:
    cfg = world.sim.sensor
    x, y = world.well_centre_um("B3")  # cells there: with the lamp off they must not show
    z = world.true_focus_z_um(x, y, world.t0_s)
    dark = world.render(x, y, z, t_s=world.t0_s, exposure_ms=20.0, lamp_level=0.0).astype(float)
    expected = cfg.dark_offset_dn + cfg.system_gain_dn_per_e * cfg.dark_current_e_per_s * 0.02
    assert dark.mean() == pytest.approx(expected, abs=0.05)
    assert dark.max() <= expected + 2


def test_saturation_clips_at_full_scale(world: SimWorld, blank: tuple[float, float]) -> None:
    over = frame(world, blank, exposure_ms=300.0)
    assert over.max() == 255 and over.min() == world.sensor.truth_at(0.0)["saturation_dn"] == 255
    assert world.sensor.truth_at(0.0)["saturation_e"] <= world.sim.sensor.full_well_e


def test_default_exposure_puts_field_centre_near_mid_scale(world: SimWorld, blank: tuple[float, float]) -> None:
    # Project target (docs/TARGETS.md): a 20 ms exposure at full lamp puts the field centre at
    # 40-60 % of an 8-bit camera's full scale, blank or with cells.
    h, w = world.shape
    for xy in (blank, world.well_centre_um("B3")):
        f = frame(world, xy, exposure_ms=20.0)
        centre = f[h // 2 - 40 : h // 2 + 40, w // 2 - 40 : w // 2 + 40].mean() / 255.0
        assert 0.40 <= centre <= 0.60


def test_poisson_statistics_below_the_gaussian_threshold() -> None:
    # Poisson shot noise (EMVA 1288 R4.0 assumes it): with 3 e- mean, P(0 e-) = exp(-3) and var = mean.
    cfg = SimSensor(read_noise_e=0.0, dsnu_e=0.0, prnu_fraction=0.0, system_gain_dn_per_e=1.0, dark_current_e_per_s=0.0, dark_offset_dn=10.0)
    sensor = Sensor(cfg, (200, 300), 16, seed=1)
    photons = np.full((200, 300), 3.0 / cfg.quantum_efficiency, np.float32)
    e = sensor.expose(photons, exposure_ms=1.0, gain_db=0.0, rng=np.random.default_rng(2)).astype(float) - 10.0
    assert e.mean() == pytest.approx(3.0, rel=0.02)
    assert e.var() == pytest.approx(3.0, rel=0.03)
    assert float(np.mean(e == 0)) == pytest.approx(math.exp(-3.0), rel=0.06)


def test_fixed_patterns_are_deterministic_from_the_seed() -> None:
    cfg = SimSensor()
    a, b, c = Sensor(cfg, (120, 160), 8, seed=5), Sensor(cfg, (120, 160), 8, seed=5), Sensor(cfg, (120, 160), 8, seed=6)
    assert np.array_equal(a.prnu_pattern, b.prnu_pattern) and np.array_equal(a.dsnu_pattern_e, b.dsnu_pattern_e)
    assert not np.array_equal(a.prnu_pattern, c.prnu_pattern)
    assert float(a.dsnu_pattern_e.std()) == pytest.approx(cfg.dsnu_e, rel=0.03)
    assert float(a.prnu_pattern.std()) == pytest.approx(cfg.prnu_fraction, rel=0.03)


def test_truth_reports_constants_at_the_asked_gain(world: SimWorld) -> None:
    t0, t12 = world.sensor_truth, world.sensor.truth_at(12.0)
    assert t12["system_gain_dn_per_e"] / t0["system_gain_dn_per_e"] == pytest.approx(10 ** (12 / 20))
    assert t12["read_noise_dn"] == pytest.approx(t12["system_gain_dn_per_e"] * t12["read_noise_e"])
    for key in ("read_noise_e", "dark_current_e_per_s", "dsnu_e", "prnu_fraction", "full_well_e", "saturation_dn", "quantum_efficiency", "bit_depth"):
        assert isinstance(t0[key], float)
    assert t0["bit_depth"] == 8.0


def test_deeper_bit_depths_use_uint16_and_their_full_scale() -> None:
    # Common practice: the output saturates at the ADC's full scale or at the full well, whichever comes first.
    for k, limit in ((0.4, "adc"), (0.3, "full well")):
        profile = sim_profile(160, 120, **{"camera.bit_depth": 12, "sim.sensor.system_gain_dn_per_e": k})
        w = SimWorld(profile)
        x, y = w.well_centre_um("H12")
        over = w.render(x, y, w.true_focus_z_um(x, y, w.t0_s), t_s=w.t0_s, exposure_ms=400.0)
        truth = w.sensor_truth
        assert over.dtype == np.uint16 and over.max() <= 4095
        assert truth["system_gain_dn_per_e"] == dataclasses.asdict(profile.sim.sensor)["system_gain_dn_per_e"]
        if limit == "adc":
            assert truth["saturation_dn"] == 4095 and over.min() == 4095
        else:
            # Full well 12000 e- * 0.3 DN/e- + 8 DN offset; DSNU still varies the clipped pixels a little.
            assert truth["saturation_dn"] == 3608
            assert abs(float(np.median(over)) - 3608) <= 1 and over.max() < 3620


def test_temporal_noise_at_full_well_keeps_the_read_noise() -> None:
    # EMVA 1288 R4.0 linear model: dark noise is added in the readout, after the pixel's charge;
    # once the well is full the shot noise is gone and sigma_y^2 = K^2 * sigma_read^2 + 1/12 DN^2
    # remains. A 12-bit camera at 24 dB: K * full well + offset = 4004 DN < 4095, so the ADC
    # does not clip first.
    cfg = SimSensor()
    sensor = Sensor(cfg, (240, 320), 12, seed=3)
    k = sensor.system_gain(24.0)
    assert k * cfg.full_well_e + cfg.dark_offset_dn < 4095
    photons = np.full((240, 320), 10.0 * cfg.full_well_e / cfg.quantum_efficiency, np.float32)
    a, b = (sensor.expose(photons, exposure_ms=10.0, gain_db=24.0, rng=np.random.default_rng(s)).astype(np.float64) for s in (1, 2))
    var = float(np.var(a - b) / 2.0)
    expected = k**2 * cfg.read_noise_e**2 + 1.0 / 12.0
    assert var == pytest.approx(expected, rel=0.05)
    # The mean sits at the full well (DSNU averages out over the frame).
    assert float((a.mean() + b.mean()) / 2.0) == pytest.approx(k * cfg.full_well_e + cfg.dark_offset_dn, abs=0.5)
    # Just below the well the photon transfer still holds: sigma_y^2 = K^2 sigma_d^2 + sigma_q^2 + K (mu_y - mu_dark).
    half = np.full((240, 320), 0.5 * cfg.full_well_e / cfg.quantum_efficiency, np.float32)
    c, d = (sensor.expose(half, exposure_ms=10.0, gain_db=24.0, rng=np.random.default_rng(s)).astype(np.float64) for s in (3, 4))
    dark_e = cfg.dark_current_e_per_s * 0.01
    signal_e = 0.5 * cfg.full_well_e + dark_e
    assert float(np.var(c - d) / 2.0) == pytest.approx(k**2 * (cfg.read_noise_e**2 + signal_e) + 1.0 / 12.0, rel=0.05)


def test_temporal_noise_vanishes_only_where_the_adc_clips_first() -> None:
    # EMVA 1288 R4.0: where the digital range ends below the full well the output sticks at
    # 2^bits - 1 and has no temporal noise (the default 8-bit profile at 0 dB: 0.021 * 12000 + 8 > 255).
    cfg = SimSensor()
    sensor = Sensor(cfg, (120, 160), 8, seed=3)
    photons = np.full((120, 160), 10.0 * cfg.full_well_e / cfg.quantum_efficiency, np.float32)
    a = sensor.expose(photons, exposure_ms=10.0, gain_db=0.0, rng=np.random.default_rng(5))
    assert np.all(a == 255)
