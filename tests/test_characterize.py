"""Camera characterisation by photon transfer (EMVA Standard 1288, Release 4.0 Linear).

Every check here is against the EMVA 1288 linear camera model and its definitions
(EMVA Standard 1288, Release 4.0 Linear: mean and temporal variance from a pair of
frames, σ²_y = K²σ²_d + σ²_q + K(μ_y − μ_y.dark), gain fit up to 70 % of saturation,
DSNU_1288 and PRNU_1288), applied to sensors whose constants are set in the test: the
synthetic one in tests.illumination_helpers.py and the simulator's (drivers/sim/sensor.py).
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest

from daemon.commands.characterize import characterize
from daemon.illumination import CalibrationError
from daemon.illumination.characterize import (
    PRNU_HIGHPASS,
    QUANTISATION_VAR_DN2,
    analyse,
    measure,
    pair_mean_variance,
)
from tests.helpers import sim_profile
from tests.illumination_helpers import FakeScope, SyntheticSensor


def test_pair_variance_cancels_fixed_pattern_and_a_drift_of_the_mean() -> None:
    # EMVA 1288: σ²_y = ⟨(y_A − y_B)²⟩/2 − (μ_A − μ_B)²/2 over a pair of frames.
    rng = np.random.default_rng(0)
    pattern = 100.0 + 20.0 * rng.standard_normal((300, 300))  # strong fixed pattern
    a = pattern + 3.0 * rng.standard_normal(pattern.shape)
    b = pattern + 3.0 * rng.standard_normal(pattern.shape) + 5.0  # lamp drifted by 5 DN
    mean, var = pair_mean_variance(a, b)
    assert mean == pytest.approx(102.5, abs=0.05)
    assert var == pytest.approx(9.0, rel=0.02)
    mask = np.zeros(pattern.shape, bool)
    mask[:100] = True
    assert pair_mean_variance(a, b, mask)[1] == pytest.approx(9.0, rel=0.04)


# At K = 1 DN/e⁻ the read noise is 6 DN: the black level must sit well above it, or dark
# frames clip at 0 and their variance is lost (common practice for camera black levels).
@pytest.mark.parametrize("gain, offset_dn", [(0.08, 8.0), (0.3, 8.0), (1.0, 30.0)])
async def test_recovers_the_constants_of_a_synthetic_sensor(gain: float, offset_dn: float) -> None:
    sensor = SyntheticSensor(gain_dn_per_e=gain, offset_dn=offset_dn, seed=int(gain * 100))
    m = await measure(FakeScope(sensor), gain_db=0.0, steps=24, spatial_frames=16)
    r = analyse(m.points, m.stacks, m.dark_series)
    assert r.dark_resolved
    assert r.system_gain_dn_per_e == pytest.approx(gain, rel=0.03)
    assert r.read_noise_e == pytest.approx(sensor.read_noise_e, rel=0.05)
    assert r.dark_offset_dn == pytest.approx(sensor.offset_dn, abs=0.15)
    assert r.dark_current_e_per_s == pytest.approx(sensor.dark_current_e_per_s, rel=0.10)
    assert r.dsnu_e == pytest.approx(sensor.dsnu_e, rel=0.10)
    assert r.prnu_fraction == pytest.approx(sensor.prnu_fraction, rel=0.15)
    # The synthetic field is shaded like a microscope's: PRNU after the high-pass.
    assert r.prnu_method == PRNU_HIGHPASS and r.field_nonuniformity > 0.2
    # Saturation by the converter: (full scale − black level) / K electrons; EMVA's variance
    # peak lies somewhat below it, within one exposure step (5 % of the full-scale exposure).
    adc_e = (255 - sensor.offset_dn) / gain
    assert 0.8 * adc_e < r.saturation_capacity_e <= 1.02 * adc_e
    # Dynamic range = saturation / signal at SNR 1 (EMVA 1288 definitions).
    assert r.dynamic_range == pytest.approx(r.saturation_capacity_e / r.sensitivity_threshold_e)
    assert r.snr_max == pytest.approx(math.sqrt(r.saturation_capacity_e))


async def test_dark_noise_below_one_grey_level_is_reported_as_a_bound() -> None:
    # K = 0.02 DN/e⁻ with 6 e⁻ read noise: σ_y.dark = 0.12 DN, under the 0.24 DN² that
    # EMVA 1288 Release 4.0 takes as the lowest resolvable dark variance (from memory).
    sensor = SyntheticSensor(gain_dn_per_e=0.02, dsnu_e=2.0, seed=9)
    m = await measure(FakeScope(sensor), gain_db=0.0, steps=24, spatial_frames=8)
    r = analyse(m.points, m.stacks, m.dark_series)
    assert not r.dark_resolved and r.read_noise_is_upper_bound
    assert r.read_noise_e >= sensor.read_noise_e
    assert r.read_noise_e == pytest.approx(math.sqrt(0.24 - QUANTISATION_VAR_DN2) / r.system_gain_dn_per_e)
    # The gain is still right: the quantisation mismatch goes into the fit's offset.
    assert r.system_gain_dn_per_e == pytest.approx(0.02, rel=0.05)


async def test_a_lamp_that_does_not_light_is_a_clear_error() -> None:
    class DarkLamp(FakeScope):
        async def capture(self, *, exposure_ms=None, gain_db=None, lamp=True):
            return await super().capture(exposure_ms=exposure_ms, gain_db=gain_db, lamp=False)

    with pytest.raises(CalibrationError, match="is the lamp on"):
        await measure(DarkLamp(SyntheticSensor()), gain_db=0.0, steps=10, spatial_frames=2)


async def test_simulated_sensor_follows_the_photon_transfer_relation() -> None:
    """σ²_y − σ²_y.dark = K(μ_y − μ_y.dark) and σ²_y.dark = K²σ²_d + σ²_q (EMVA 1288) for the
    simulator's sensor at 24 dB, with its constants from the profile (drivers/sim/sensor.py)."""
    from drivers.sim.world import SimWorld

    profile = sim_profile(320, 240)
    world = SimWorld(profile)
    truth = world.sensor.truth_at(24.0)
    k = truth["system_gain_dn_per_e"]
    x, y = world.well_centre_um("H12")
    z = world.true_focus_z_um(x, y, world.t0_s)
    centre = (slice(100, 140), slice(140, 180))

    def pair(exposure_ms: float, lamp: float) -> tuple[float, float]:
        frames = [world.render(x, y, z, t_s=world.t0_s, exposure_ms=exposure_ms, gain_db=24.0, lamp_level=lamp)[centre] for _ in range(2)]
        return pair_mean_variance(*frames)

    dark_mean, dark_var = pair(0.5, 0.0)
    expected_dark_var = (k * truth["read_noise_e"]) ** 2 + QUANTISATION_VAR_DN2
    expected_dark_var += k**2 * truth["dark_current_e_per_s"] * 0.5e-3  # dark shot noise, tiny at 0.5 ms
    assert dark_var == pytest.approx(expected_dark_var, rel=0.12)
    for exposure_ms in (0.5, 1.0, 1.5):
        mean, var = pair(exposure_ms, 1.0)
        d_mean, d_var = pair(exposure_ms, 0.0)
        assert var - d_var == pytest.approx(k * (mean - d_mean), rel=0.12)


@pytest.mark.parametrize("gain_db", [0.0, 24.0])
async def test_characterize_on_the_simulated_scope_recovers_gain_and_read_noise(tmp_path: Path, gain_db: float) -> None:
    # Targets (docs/TARGETS.md): system gain within 5 %, read noise within 10 % of the simulator's.
    profile = sim_profile(320, 240)
    report = await characterize(profile, out=tmp_path, gain_db=gain_db, steps=20, spatial_frames=8, sim_speed=10000.0)
    truth = report["simulator"]
    results = report["results"]
    assert truth["system_gain_dn_per_e"] == pytest.approx(0.021 * 10 ** (gain_db / 20))
    assert abs(report["relative_error"]["system_gain"]) < 0.05
    if gain_db == 24.0:
        assert results["dark_resolved"]
        assert abs(report["relative_error"]["read_noise"]) < 0.10
        assert abs(report["relative_error"]["dsnu"]) < 0.25
        assert abs(report["relative_error"]["prnu"]) < 0.30
        assert abs(report["relative_error"]["dark_current"]) < 0.25
    else:
        # 0.13 DN of read noise on an 8-bit converter: below one grey level, a bound only.
        assert not results["dark_resolved"] and results["read_noise_e"] > truth["read_noise_e"]
    assert report["field"].startswith("empty well H12")
    saved = json.loads((tmp_path / "characterization.json").read_text())
    assert saved["simulator"] == truth and len(saved["points"]) == 20
    png = (tmp_path / "photon-transfer.png").read_bytes()
    assert png[:8] == b"\x89PNG\r\n\x1a\n" and len(png) > 20000
