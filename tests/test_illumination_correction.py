"""Flat-field correction: the formula, recovery of a scene, and the guards."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp
from skimage import data

from daemon.illumination import CalibrationError
from daemon.illumination.correction import Corrector, correct
from tests.illumination_helpers import shading


def test_matches_the_flat_fielding_formula() -> None:
    # The formula (raw − dark) / (flat − dark) × mean(flat − dark): docs/TARGETS.md;
    # standard flat-fielding (common practice). Reference in float64.
    rng = np.random.default_rng(3)
    dark = rng.uniform(5, 15, (48, 64))
    flat = dark + rng.uniform(80, 200, (48, 64))
    raw = rng.integers(0, 255, (48, 64)).astype(np.uint8)
    expected = (raw - dark) / (flat - dark) * np.mean(flat - dark)
    got = correct(raw, dark, flat)
    assert got.dtype == np.float32
    np.testing.assert_allclose(got, expected, rtol=2e-5, atol=2e-3)


def test_recovers_a_scene_under_known_gain_and_offset_to_noise_level() -> None:
    # Scene: scikit-image's bundled 'camera' image (skimage.data), as photo-electrons.
    scene_e = data.camera().astype(np.float64) * 4.0 + 200.0
    shape = scene_e.shape
    rng = np.random.default_rng(7)
    gain_map = 0.25 * shading(shape, width=0.35) * (1 + 0.02 * rng.standard_normal(shape))  # DN/e-, vignetting × PRNU
    offset_map = 10.0 + 1.5 * rng.standard_normal(shape)  # DN, black level × DSNU
    read_dn = 1.2
    flat_e, n_cal = 3000.0, 64

    def expose(e: np.ndarray) -> np.ndarray:
        return offset_map + gain_map * rng.poisson(e) + read_dn * rng.standard_normal(shape)

    raw = expose(scene_e)
    dark = np.mean([offset_map + read_dn * rng.standard_normal(shape) for _ in range(n_cal)], axis=0)
    flat = np.mean([expose(np.full(shape, flat_e)) for _ in range(n_cal)], axis=0)
    corrected = correct(raw, dark, flat)

    # The formula returns the scene on the scale mean(flat − dark) / flat_e = mean(gain) DN per electron.
    scale = float(np.mean(flat - dark)) / flat_e
    recovered_e = corrected / scale
    error = recovered_e - scene_e
    # Noise expected in the recovered scene (e-): shot noise of the scene plus read noise
    # through the gain, plus the calibration frames' noise (small with 64 of each).
    expected_var = scene_e + (read_dn / gain_map) ** 2 + scene_e**2 / (flat_e * n_cal) + (read_dn / gain_map) ** 2 / n_cal
    z = error / np.sqrt(expected_var)
    assert abs(float(np.mean(z))) < 0.02, "bias: the shading was not removed"
    assert 0.95 < float(np.std(z)) < 1.05, "residual is not at the noise level"
    # Without correction the same comparison is far off (the shading dominates).
    uncorrected = (raw - dark) / float(np.mean(gain_map))
    assert float(np.std((uncorrected - scene_e) / np.sqrt(expected_var))) > 5


def test_dead_hot_and_zero_pixels_give_finite_values_and_borrow_a_neighbours_gain() -> None:
    shape = (40, 50)
    dark = np.full(shape, 10.0)
    flat = 10.0 + 100.0 * shading(shape, width=2.0)
    flat[5, 5] = 10.0  # dead: no response above the dark
    flat[6, 20] = 0.0  # below the dark
    flat[30, 40] = np.nan
    dark[12, 12] = 255.0  # hot in the dark as in the flat
    flat[12, 12] = 255.0
    flat[20, 25] = np.inf
    raw = (10.0 + 50.0 * shading(shape, width=2.0)).astype(np.float32)  # a blank field at half the flat's level
    raw[12, 12] = 255.0
    out = correct(raw, dark, flat)
    assert np.isfinite(out).all()
    c = Corrector.from_frames(dark, flat)
    assert c.bad_pixels == 5 and c.usable
    # A blank field comes out flat, including at the borrowed pixels (neighbour's gain).
    target = float(np.median(out))
    for y, x in [(5, 5), (6, 20), (30, 40), (20, 25)]:
        assert out[y, x] == pytest.approx(target, rel=0.02)


def test_a_zero_flat_only_subtracts_the_dark() -> None:
    dark = np.full((8, 8), 4.0, np.float32)
    raw = np.full((8, 8), 30, np.uint8)
    out = correct(raw, dark, np.zeros((8, 8)))
    assert np.isfinite(out).all()
    np.testing.assert_allclose(out, 26.0)
    assert not Corrector.from_frames(dark, np.zeros((8, 8))).usable


def test_nan_in_float_raw_is_zeroed_not_propagated() -> None:
    raw = np.full((4, 4), 50.0)
    raw[1, 1] = np.nan
    raw[2, 2] = np.inf
    out = correct(raw, np.zeros((4, 4)), np.full((4, 4), 100.0))
    assert np.isfinite(out).all()
    assert out[0, 0] == pytest.approx(50.0)


frames = hnp.arrays(np.float64, (6, 7), elements=st.one_of(
    st.floats(-1e4, 1e4), st.just(0.0), st.just(np.nan), st.just(np.inf), st.just(-np.inf)))


@settings(max_examples=200, deadline=None)
@given(dark=frames, flat=frames, raw=hnp.arrays(np.uint16, (6, 7)))
def test_never_nan_or_infinite(dark: np.ndarray, flat: np.ndarray, raw: np.ndarray) -> None:
    out = correct(raw, dark, flat)
    assert out.dtype == np.float32
    assert np.isfinite(out).all()


def test_apply_to_dtype_rounds_and_clips_to_the_raw_type() -> None:
    dark = np.zeros((2, 3))
    flat = np.array([[100.0, 50.0, 200.0], [100.0, 100.0, 100.0]])  # mean 108.33
    c = Corrector.from_frames(dark, flat)
    raw8 = np.array([[10, 250, 0], [100, 0, 3]], np.uint8)
    out = c.apply_to_dtype(raw8)
    assert out.dtype == np.uint8
    # 250 × 108.33/50 = 541.7 → clipped to 255; 10 × 1.0833 = 10.83 → 11.
    assert out[0, 1] == 255 and out[0, 0] == 11 and out[1, 2] == 3
    raw16 = raw8.astype(np.uint16)
    assert c.apply_to_dtype(raw16).dtype == np.uint16 and c.apply_to_dtype(raw16)[0, 1] == 542
    # Negative corrected values (raw below the dark) clip at 0, not wrap around.
    c2 = Corrector.from_frames(np.full((2, 3), 20.0), flat + 20.0)
    assert c2.apply_to_dtype(raw8)[0, 2] == 0


def test_mismatched_sizes_are_refused_with_a_clear_message() -> None:
    with pytest.raises(CalibrationError, match="dark frame is 64x48 but flat is 32x24"):
        Corrector.from_frames(np.zeros((48, 64)), np.ones((24, 32)))
    c = Corrector.from_frames(np.zeros((24, 32)), np.ones((24, 32)))
    with pytest.raises(CalibrationError, match="frame is 64x48 but the calibration is 32x24"):
        c.apply(np.zeros((48, 64), np.uint8))
    with pytest.raises(CalibrationError, match="2-D"):
        Corrector.from_frames(np.zeros((4, 4, 3)), np.ones((4, 4, 3)))


def test_apply_returns_a_new_array_each_time() -> None:
    c = Corrector.from_frames(np.zeros((4, 4)), np.full((4, 4), 10.0))
    raw = np.full((4, 4), 5, np.uint8)
    a = c.apply(raw)
    b = c.apply(raw)
    a[0, 0] = -1
    assert b[0, 0] == 5.0
