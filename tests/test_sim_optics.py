"""The simulated objective against Fourier optics: Zernike's weak-phase limit, Gaussian-beam
spreading, energy conservation, and the fast imager against the plain reference."""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest
import scipy.fft as sfft

from drivers.sim.optics import (
    PhaseContrastImager,
    PhaseContrastOptics,
    angular_spectrum_transfer,
    coherent_intensity,
    frequency_grid,
    partially_coherent_intensity,
    phase_ring,
    propagate,
    pupil,
)

LAMBDA_UM = 0.55
DX_UM = 0.375  # 3.75 um camera pixel behind a 10x objective


def smooth_phase(shape: tuple[int, int], *, max_cpum: float, rms_rad: float, seed: int, dx_um: float = DX_UM) -> np.ndarray:
    """A zero-mean random phase screen whose spectrum lies inside 0 < |f| <= max_cpum."""
    rng = np.random.default_rng(seed)
    fy, fx = frequency_grid(shape, dx_um)
    f = np.sqrt(fx**2 + fy**2)
    spectrum = (rng.standard_normal(shape) + 1j * rng.standard_normal(shape)) * ((f <= max_cpum) & (f > 0))
    phi = np.real(sfft.ifft2(spectrum))
    return (phi - phi.mean()) * (rms_rad / phi.std())


@pytest.mark.parametrize(("tau", "shift_deg"), [(0.5, -90.0), (0.5, 90.0), (0.3, -45.0), (1.0, -90.0), (0.7, 30.0)])
def test_weak_phase_limit_matches_zernike(tau: float, shift_deg: float) -> None:
    # Goodman, Introduction to Fourier Optics (Zernike phase-contrast microscope): for a weak
    # phase object t = exp(i*phi) ~ 1 + i*phi and a ring that multiplies only the direct light by
    # tau*exp(i*theta), I ~ tau^2 + 2*tau*phi*sin(theta) (direct light normalised to 1).
    shape = (192, 256)
    phi = smooth_phase(shape, max_cpum=0.3, rms_rad=0.01, seed=1)  # all inside the 0.45 cycles/um pupil
    fy, fx = frequency_grid(shape, DX_UM)
    theta = math.radians(shift_deg)
    # An ideal ring: only the zero-frequency bin (half a bin in radius), on-axis light.
    ring = phase_ring(fx, fy, ring_radius_cpum=0.0, half_width_cpum=0.5 / (shape[1] * DX_UM), transmission=tau, shift_rad=theta)
    transfer = pupil(fx, fy, na=0.25, wavelength_um=LAMBDA_UM) * ring
    intensity = coherent_intensity(np.exp(1j * phi).astype(np.complex64), transfer)
    expected = tau**2 + 2.0 * tau * phi * math.sin(theta)
    # The neglected terms are O(phi^2).
    assert np.max(np.abs(intensity - expected)) < 3.0 * np.max(phi**2) + 1e-5
    # And the linear term is really there (not just tau^2 everywhere).
    assert np.corrcoef(intensity.ravel(), phi.ravel())[0, 1] * math.copysign(1.0, math.sin(theta)) > 0.999


def test_positive_phase_contrast_shows_retarding_objects_dark() -> None:
    # Common practice: in positive (dark) phase contrast the ring advances the direct light by
    # a quarter wave and objects of higher index than the medium look darker. With the module's
    # convention (a retardation multiplies the field by exp(+i*phi)) the advance is exp(-i*pi/2).
    shape = (128, 128)
    phi = smooth_phase(shape, max_cpum=0.3, rms_rad=0.01, seed=2)
    fy, fx = frequency_grid(shape, DX_UM)
    ring = phase_ring(fx, fy, ring_radius_cpum=0.0, half_width_cpum=0.5 / (128 * DX_UM), transmission=0.5, shift_rad=-math.pi / 2)
    intensity = coherent_intensity(np.exp(1j * phi).astype(np.complex64), pupil(fx, fy, na=0.25, wavelength_um=LAMBDA_UM) * ring)
    assert np.corrcoef(intensity.ravel(), phi.ravel())[0, 1] < -0.999


def test_quarter_wave_ring_gives_the_most_contrast() -> None:
    # Common practice (and Zernike's argument, Goodman): phase rings shift the direct light by
    # about a quarter wave because the weak-phase contrast 2*tau*phi*sin(theta) peaks at 90 deg.
    shape = (128, 128)
    phi = smooth_phase(shape, max_cpum=0.3, rms_rad=0.02, seed=3)
    fy, fx = frequency_grid(shape, DX_UM)
    p = pupil(fx, fy, na=0.25, wavelength_um=LAMBDA_UM)
    shifts = np.arange(0, 181, 15)
    contrast = []
    for deg in shifts:
        ring = phase_ring(fx, fy, ring_radius_cpum=0.0, half_width_cpum=0.5 / (128 * DX_UM), transmission=0.5, shift_rad=-math.radians(deg))
        image = coherent_intensity(np.exp(1j * phi).astype(np.complex64), p * ring)
        contrast.append(image.std() / image.mean())
    assert shifts[int(np.argmax(contrast))] == 90
    assert contrast[0] < 0.05 * max(contrast)  # no ring shift: a phase object is (nearly) invisible


def gaussian_beam_radius_um(field: np.ndarray, dx_um: float) -> float:
    """1/e^2 intensity radius from the second moment: for I ~ exp(-2 r^2 / w^2), <x^2> = w^2 / 4."""
    intensity = np.abs(field) ** 2
    ny, nx = field.shape
    x = (np.arange(nx) - nx // 2) * dx_um
    px = intensity.sum(axis=0)
    return 2.0 * math.sqrt(float((px * x**2).sum() / px.sum()))


@pytest.mark.parametrize("n", [1.0, 1.335])
def test_angular_spectrum_spreads_gaussian_beam_like_saleh_teich(n: float) -> None:
    # Saleh & Teich, Fundamentals of Photonics (Gaussian beams): w(z) = w0*sqrt(1 + (z/zR)^2),
    # zR = pi*w0^2*n/lambda. w0 = 3 um keeps the beam paraxial (divergence ~0.06 rad), where
    # the exact angular spectrum and the paraxial law agree to well under 1 %.
    dx, w0 = 0.2, 3.0
    shape = (640, 640)
    y = (np.arange(shape[0]) - shape[0] // 2)[:, None] * dx
    x = (np.arange(shape[1]) - shape[1] // 2)[None, :] * dx
    waist = np.exp(-(x**2 + y**2) / w0**2).astype(np.complex64)  # field ~ exp(-r^2/w0^2)
    z_r = math.pi * w0**2 * n / LAMBDA_UM
    assert gaussian_beam_radius_um(waist, dx) == pytest.approx(w0, rel=1e-3)
    for z in (0.5 * z_r, z_r, 2.0 * z_r, 3.0 * z_r):
        out = propagate(waist, dx_um=dx, dz_um=z, wavelength_um=LAMBDA_UM, n=n)
        expected = w0 * math.sqrt(1.0 + (z / z_r) ** 2)
        assert gaussian_beam_radius_um(out, dx) == pytest.approx(expected, rel=0.01)


def test_pure_phase_object_keeps_its_energy_under_propagation() -> None:
    # Parseval's theorem (Goodman, ch. 2): |H| = 1 for propagating waves, so without a pupil a
    # field whose spectrum has no evanescent part keeps its energy over any distance. At
    # 0.5 um sampling even the grid's corner frequency (1.41 cycles/um) propagates (1/0.55).
    shape = (256, 256)
    phi = smooth_phase(shape, max_cpum=0.8, rms_rad=1.5, seed=4, dx_um=0.5)
    field = np.exp(1j * phi).astype(np.complex64)
    energy = float(np.sum(np.abs(field) ** 2))
    for dz in (-80.0, 5.0, 40.0, 250.0):
        out = propagate(field, dx_um=0.5, dz_um=dz, wavelength_um=LAMBDA_UM, n=1.0)
        assert float(np.sum(np.abs(out) ** 2)) == pytest.approx(energy, rel=1e-4)


def test_transfer_function_is_unit_modulus_inside_and_zero_for_evanescent_waves() -> None:
    # Goodman, ch. 3: |H| = 1 for |f| < n/lambda; evanescent components (|f| > n/lambda) are dropped here.
    fy, fx = frequency_grid((64, 64), 0.1)  # Nyquist 5 cycles/um > 1/0.55
    h = angular_spectrum_transfer(fx, fy, dz_um=10.0, wavelength_um=LAMBDA_UM, n=1.0)
    f = np.sqrt(fx**2 + fy**2) * np.ones_like(h.real)
    assert np.allclose(np.abs(h[f < 1.0 / LAMBDA_UM]), 1.0, atol=1e-6)
    assert np.all(h[f > 1.0 / LAMBDA_UM] == 0)


def test_pupil_cuts_off_at_na_over_lambda() -> None:
    # Goodman, coherent imaging: the coherent cut-off frequency is NA/lambda.
    fy, fx = frequency_grid((256, 256), DX_UM)
    p = pupil(fx, fy, na=0.25, wavelength_um=LAMBDA_UM)
    f = np.sqrt(fx**2 + fy**2) * np.ones_like(p)
    assert p[f <= 0.25 / LAMBDA_UM * 0.999].min() == 1.0
    assert p[f > 0.25 / LAMBDA_UM * 1.001].max() == 0.0


OPTICS = PhaseContrastOptics(
    na=0.25,
    wavelength_um=LAMBDA_UM,
    immersion_index=1.0,
    ring_transmission=0.5,
    ring_shift_rad=-math.pi / 2,
    annulus_fraction=0.6,
    ring_half_width_fraction=0.08,
    n_directions=8,
    bandwidth_um=0.03,
    annulus_width_fraction=0.8,
)


@pytest.mark.parametrize("dz_um", [0.0, -12.35, 40.0])
def test_fast_imager_agrees_with_plain_reference(dz_um: float) -> None:
    # Not an outside value: the cropped-grid imager must reproduce the straightforward sum.
    shape = (150, 200)
    rng = np.random.default_rng(5)
    phi = smooth_phase(shape, max_cpum=1.3, rms_rad=1.0, seed=6)
    amplitude = 1.0 - 0.05 * rng.random(shape)
    field = (amplitude * np.exp(1j * phi)).astype(np.complex64)
    reference = partially_coherent_intensity(field, dx_um=DX_UM, dz_um=dz_um, optics=OPTICS)
    imager = PhaseContrastImager(shape, DX_UM, OPTICS)
    assert imager.opt_shape[0] < shape[0] and imager.opt_shape[1] < shape[1]  # it really works on a coarser grid
    fast = imager.intensity(field, dz_um)
    assert np.max(np.abs(fast - reference)) < 2e-3 * float(reference.mean())


def test_empty_field_images_to_tau_squared() -> None:
    # Goodman (Zernike): with no object only the direct light passes, attenuated to tau^2.
    imager = PhaseContrastImager((96, 128), DX_UM, OPTICS)
    for dz in (0.0, 25.0):
        image = imager.intensity(np.ones((96, 128), np.complex64), dz)
        assert np.allclose(image, 0.25, atol=1e-5)


def test_defocus_lowers_contrast_and_focus_curve_has_one_peak() -> None:
    # Common practice: a defocused phase-contrast image loses contrast; a sharpness metric
    # (here the Brenner gradient, Brenner et al. 1976, J. Histochem. Cytochem.) has one clear
    # maximum at focus. Object: disc-shaped "cells" of 1 rad phase with smooth edges.
    shape = (256, 320)
    y, x = np.mgrid[0 : shape[0], 0 : shape[1]] * DX_UM
    rng = np.random.default_rng(7)
    phi = np.zeros(shape)
    for cx, cy in rng.uniform(10.0, 110.0, (8, 2)):
        r = np.hypot(x - cx * 1.1, y - cy * 0.8)
        phi += 1.0 * np.clip((9.0 - r) / 3.0, 0.0, 1.0)
    field = np.exp(1j * phi).astype(np.complex64)
    imager = PhaseContrastImager(shape, DX_UM, OPTICS)
    dof = LAMBDA_UM / 0.25**2 + 3.75 / (10 * 0.25)  # Inoué & Spring, Video Microscopy: 10.3 um
    dzs = np.arange(-40.0, 40.01, 2.5)
    brenner, contrast = [], []
    for dz in dzs:
        image = imager.intensity(field, float(dz))
        brenner.append(float(np.mean((image[:, 2:] - image[:, :-2]) ** 2)))
        contrast.append(float(image.std()))
    brenner_a = np.array(brenner)
    assert abs(dzs[int(np.argmax(brenner_a))]) <= 2.5
    assert brenner_a.max() > 1.5 * brenner_a[np.abs(dzs) >= dof].max()
    assert contrast[int(np.argmin(np.abs(dzs)))] > max(c for c, dz in zip(contrast, dzs) if abs(dz) >= dof)


def test_sources_sample_annulus_and_led_band() -> None:
    srcs = OPTICS.sources()
    assert len(srcs) == 8
    radii_na = [math.hypot(s.fx, s.fy) * s.wavelength_um / OPTICS.na for s in srcs]
    # The direct light of every source lies on the phase ring.
    assert all(abs(r - 0.6) <= 0.08 for r in radii_na)
    lams = [s.wavelength_um for s in srcs]
    assert abs(np.mean(lams) - LAMBDA_UM) < 1e-3 and max(lams) - min(lams) > 0.015
    on_axis = dataclasses.replace(OPTICS, annulus_fraction=0.0).sources()
    assert len(on_axis) == 1 and on_axis[0].fx == 0.0 and on_axis[0].wavelength_um == LAMBDA_UM


@pytest.mark.parametrize("keep", [0, 1, 3])
def test_defocus_cache_of_any_size_gives_the_same_image(keep: int) -> None:
    # keep_defocus = 0 turns the transfer cache off; it must still image (once raised KeyError).
    shape = (96, 128)
    field = np.exp(1j * smooth_phase(shape, max_cpum=0.6, rms_rad=0.8, seed=11)).astype(np.complex64)
    plain = PhaseContrastImager(shape, DX_UM, OPTICS, keep_defocus=3)
    imager = PhaseContrastImager(shape, DX_UM, OPTICS, keep_defocus=keep)
    spectrum = imager.spectrum(field)
    for dz in (0.0, 7.5, 0.0, -20.0, 7.5):
        assert np.array_equal(imager.image(spectrum, dz), plain.image(spectrum, dz))
    with pytest.raises(ValueError, match="keep_defocus"):
        PhaseContrastImager(shape, DX_UM, OPTICS, keep_defocus=-1)
