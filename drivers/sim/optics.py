"""Zernike phase-contrast image formation in Fourier optics (the simulated objective).

Conventions (Goodman, *Introduction to Fourier Optics*): time factor exp(-i*omega*t), so
light that is retarded by an optical path difference OPD picks up exp(+i*2*pi*OPD/lambda)
and the sample's field is t(x, y) = a * exp(i*phi). Spatial frequencies are in cycles/um,
lengths in um. ``scipy.fft`` conventions: forward transform unnormalised, inverse 1/N.

Image formation, per illumination direction f_i (a point of the condenser annulus, imaged
onto the phase ring), for object frequencies nu:

    U_i(x) = IFFT[ T(nu) * P(nu + f_i) * R(nu + f_i) * H_dz(nu + f_i) ](x)

T is the object's spectrum, P the pupil (cut-off NA/lambda), R the phase ring (amplitude
transmission tau and phase shift on an annulus of finite width that holds the direct
light nu = 0 of every direction), H_dz the angular-spectrum transfer over the defocus dz.
The source points are mutually incoherent (an extended LED behind an annulus), so

    I(x) = (1/N) * sum_i |U_i(x)|^2.

What was chosen: N = 8 points (profile: [sim.optics] illumination_angles) evenly in angle
round the annulus, spread across its radial width and across the LED's band by
low-discrepancy sequences, each carrying its own wavelength through pupil, ring and
defocus. With that spread, eight points keep images defocused by tens of um smooth (looked
at by eye at +-20 and +-60 um; without the spread the eight copies showed) at one inverse
FFT per point and frame.

Shifting the pupil instead of the spectrum drops a linear phase exp(i*2*pi*f_i*x) from
U_i, which |U_i|^2 does not see; so one forward FFT of the object serves every direction.
A ring of finite width passes the object's lowest frequencies along with the direct light,
which is what makes the halo and the shade-off. Summing directions on the annulus makes
a defocused image a blur over a ring of radius dz*NA_annulus instead of a coherent
fringe pattern, so focus curves have one clear peak.

The camera pixel then integrates the intensity over its area (100 % fill factor): the
image is multiplied in frequency by sinc(fx*p)*sinc(fy*p), p the pixel size in the sample.

Sign: the ring of a positive (dark-contrast) phase objective *advances* the direct light
by about a quarter wave, i.e. multiplies it by tau*exp(-i*pi/2) in this convention.
:func:`phase_ring` takes the phase *added* to the direct light's field (``shift_rad``);
the profile's ``phase_ring_shift_deg`` is the advance, so ``shift_rad = -radians(deg)``.
"""

from __future__ import annotations

import dataclasses
import math
import os
from collections import OrderedDict

import cv2
import numpy as np
import scipy.fft as sfft

FFT_WORKERS = max(1, len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1))
DZ_BUCKET_UM = 0.05  # defocus transfer grids are cached per bucket; far below any depth of field


def frequency_grid(shape: tuple[int, int], dx_um: float) -> tuple[np.ndarray, np.ndarray]:
    """(fy, fx) in cycles/um in FFT order, shaped (ny, 1) and (1, nx) for broadcasting."""
    ny, nx = shape
    fy = sfft.fftfreq(ny, d=dx_um)[:, None]
    fx = sfft.fftfreq(nx, d=dx_um)[None, :]
    return fy, fx


def pupil(fx: np.ndarray, fy: np.ndarray, *, na: float, wavelength_um: float) -> np.ndarray:
    """Coherent pupil of an aberration-free objective: 1 inside |f| <= NA/lambda, else 0
    (Goodman, Introduction to Fourier Optics, coherent transfer function)."""
    cutoff = na / wavelength_um
    return (fx * fx + fy * fy <= cutoff * cutoff).astype(np.float32)


def phase_ring(
    fx: np.ndarray,
    fy: np.ndarray,
    *,
    ring_radius_cpum: float,
    half_width_cpum: float,
    transmission: float,
    shift_rad: float,
) -> np.ndarray:
    """Zernike phase plate (Zernike 1942; Goodman, Introduction to Fourier Optics):
    amplitude ``transmission`` times exp(i*shift_rad) on the annulus
    | |f| - ring_radius | <= half_width (cycles/um), 1 elsewhere. With ring_radius 0 it is
    a disc of radius half_width around the direct light of on-axis illumination."""
    radial = np.abs(np.sqrt(fx * fx + fy * fy) - ring_radius_cpum)
    on_ring = radial <= half_width_cpum
    value = np.complex64(transmission * np.exp(1j * shift_rad))
    return np.where(on_ring, value, np.complex64(1.0)).astype(np.complex64)


def angular_spectrum_transfer(
    fx: np.ndarray, fy: np.ndarray, *, dz_um: float, wavelength_um: float, n: float
) -> np.ndarray:
    """Angular-spectrum propagation over dz (Goodman, Introduction to Fourier Optics, ch. 3):
    H(f) = exp(i*2*pi*dz*sqrt((n/lambda)^2 - |f|^2)); evanescent components (|f| > n/lambda)
    are dropped (H = 0)."""
    k2 = (n / wavelength_um) ** 2 - (fx * fx + fy * fy)
    kz = np.sqrt(np.maximum(k2, 0.0))
    h = np.exp(1j * 2.0 * np.pi * dz_um * kz)
    return np.where(k2 >= 0.0, h, 0.0).astype(np.complex64)


def propagate(field: np.ndarray, *, dx_um: float, dz_um: float, wavelength_um: float, n: float) -> np.ndarray:
    """The complex field ``field`` (sampled at dx) after free propagation over dz (angular spectrum)."""
    fy, fx = frequency_grid(field.shape, dx_um)
    h = angular_spectrum_transfer(fx, fy, dz_um=dz_um, wavelength_um=wavelength_um, n=n)
    return sfft.ifft2(sfft.fft2(field.astype(np.complex64), workers=FFT_WORKERS) * h, workers=FFT_WORKERS)


def radical_inverse(i: int, base: int) -> float:
    """Van der Corput radical inverse of i in ``base``, on [0, 1): a well-spread sequence."""
    out, f = 0.0, 1.0 / base
    while i > 0:
        out += f * (i % base)
        i //= base
        f /= base
    return out


def annulus_directions(n_directions: int, radius_cpum: float) -> np.ndarray:
    """(N, 2) spatial frequencies (fx, fy) of N illumination directions evenly spaced on the
    condenser annulus (one on-axis direction when the radius is 0)."""
    if radius_cpum <= 0.0:
        return np.zeros((1, 2))
    # Half a step off the axes so a frame's x and y are treated alike.
    angles = 2.0 * np.pi * (np.arange(n_directions) + 0.5) / n_directions
    return radius_cpum * np.stack([np.cos(angles), np.sin(angles)], axis=1)


def coherent_intensity(field: np.ndarray, transfer: np.ndarray) -> np.ndarray:
    """|IFFT(FFT(field) * transfer)|^2: the image of one illumination direction, whose
    transfer (pupil x ring x defocus, already shifted for the direction) is on the same grid."""
    u = sfft.ifft2(sfft.fft2(field, workers=FFT_WORKERS) * transfer, workers=FFT_WORKERS)
    return (u.real * u.real + u.imag * u.imag).astype(np.float32)


def pixel_aperture_mtf(fx: np.ndarray, fy: np.ndarray, pixel_um: float) -> np.ndarray:
    """Transfer function of a square pixel of side p integrating intensity: sinc(fx*p)*sinc(fy*p)."""
    return (np.sinc(fx * pixel_um) * np.sinc(fy * pixel_um)).astype(np.float32)


@dataclasses.dataclass(frozen=True, slots=True)
class Source:
    """One incoherent point of the illumination: direction (cycles/um) and wavelength."""

    fx: float
    fy: float
    wavelength_um: float


@dataclasses.dataclass(frozen=True, slots=True)
class PhaseContrastOptics:
    """What the image formation needs to know about the objective, ring, condenser and LED.

    The source is sampled at ``n_directions`` points: evenly in angle round the annulus,
    and - by well-spread sequences, so a few points cover it - across the annulus' radial
    width (``annulus_width_fraction`` of the ring's width) and the LED's band (uniform over
    ``bandwidth_um``). Each point carries its own wavelength through pupil, ring and
    defocus (the ring sits at a fixed NA, so at r*NA/lambda_i); the object's phase is
    taken at the centre wavelength.
    """

    na: float
    wavelength_um: float
    immersion_index: float
    ring_transmission: float
    ring_shift_rad: float  # phase added to the direct light's field (= -advance)
    annulus_fraction: float  # condenser annulus / ring radius, fraction of NA/lambda
    ring_half_width_fraction: float
    n_directions: int
    bandwidth_um: float = 0.0
    annulus_width_fraction: float = 0.0

    @property
    def cutoff_cpum(self) -> float:
        return self.na / self.wavelength_um

    @property
    def max_cutoff_cpum(self) -> float:
        return self.na / (self.wavelength_um - 0.5 * self.bandwidth_um - 1e-9)

    def ring(self, fx: np.ndarray, fy: np.ndarray, wavelength_um: float | None = None) -> np.ndarray:
        cutoff = self.na / (wavelength_um or self.wavelength_um)
        return phase_ring(
            fx,
            fy,
            ring_radius_cpum=self.annulus_fraction * cutoff,
            half_width_cpum=self.ring_half_width_fraction * cutoff,
            transmission=self.ring_transmission,
            shift_rad=self.ring_shift_rad,
        )

    def directions(self) -> np.ndarray:
        return annulus_directions(self.n_directions, self.annulus_fraction * self.cutoff_cpum)

    def sources(self) -> list[Source]:
        if self.annulus_fraction <= 0.0:
            return [Source(0.0, 0.0, self.wavelength_um)]
        n = self.n_directions
        # Centred spreads in [-0.5, 0.5): radius (base 2) and wavelength (base 3) vary independently of angle.
        radial = np.array([radical_inverse(i, 2) for i in range(n)])
        spectral = np.array([radical_inverse(i, 3) for i in range(n)])
        radial -= radial.mean()
        spectral -= spectral.mean()
        out = []
        for i in range(n):
            angle = 2.0 * np.pi * (i + 0.5) / n
            lam = self.wavelength_um + self.bandwidth_um * spectral[i]
            offset = 2.0 * self.annulus_width_fraction * self.ring_half_width_fraction * radial[i]
            radius = (self.annulus_fraction + offset) * self.na / lam
            out.append(Source(radius * math.cos(angle), radius * math.sin(angle), lam))
        return out

    def transfer(self, fx: np.ndarray, fy: np.ndarray, source: Source, dz_um: float) -> np.ndarray:
        """Pupil x ring x defocus of one source, for object frequencies (fx, fy)."""
        gx, gy = fx + source.fx, fy + source.fy
        lam = source.wavelength_um
        return (
            pupil(gx, gy, na=self.na, wavelength_um=lam)
            * self.ring(gx, gy, lam)
            * angular_spectrum_transfer(gx, gy, dz_um=dz_um, wavelength_um=lam, n=self.immersion_index)
        )


def partially_coherent_intensity(
    field: np.ndarray, *, dx_um: float, dz_um: float, optics: PhaseContrastOptics, pixel_mtf: bool = True
) -> np.ndarray:
    """Reference implementation on the full grid (slow, plain): the incoherent mean over the
    source points of the coherent images, then the pixel aperture. See the module
    docstring. :class:`PhaseContrastImager` must agree with it."""
    fy, fx = frequency_grid(field.shape, dx_um)
    spectrum = sfft.fft2(field.astype(np.complex64), workers=FFT_WORKERS)
    total = np.zeros(field.shape, np.float64)
    sources = optics.sources()
    for source in sources:
        u = sfft.ifft2(spectrum * optics.transfer(fx, fy, source, dz_um), workers=FFT_WORKERS)
        total += u.real**2 + u.imag**2
    intensity = total / len(sources)
    if pixel_mtf:
        intensity = np.real(sfft.ifft2(sfft.fft2(intensity) * pixel_aperture_mtf(fx, fy, dx_um)))
    return intensity.astype(np.float32)


def _centred_blocks(n_full: int, n_crop: int) -> list[tuple[slice, slice]]:
    """(full-grid slice, crop slice) pairs that copy the n_crop lowest frequencies of an axis in
    FFT order (..., -1, 0, 1, ...) of a grid of n_full into centred order (crop index
    k + n_crop // 2 holds frequency k)."""
    neg = n_crop // 2
    pos = n_crop - neg
    return [(slice(n_full - neg, n_full), slice(0, neg)), (slice(0, pos), slice(neg, n_crop))]


class PhaseContrastImager:
    """Fast image formation on a fixed grid: the same physics as
    :func:`partially_coherent_intensity`, arranged for speed.

    * The object spectrum is needed only inside |nu| <= (1 + annulus) * NA/lambda and each
      source's intensity only up to 2*NA/lambda, so every source is transformed back on a
      coarser grid of the same field of view whose Nyquist frequency is just above
      2*NA/lambda (exact, no aliasing), and the summed intensity is brought to the pixel
      grid by zero-padding its spectrum (together with the pixel aperture).
    * The cropped spectrum is kept in centred order, so each source's pupil is one
      rectangle of it; transforming a centred spectrum multiplies the field by a linear
      phase, which |U|^2 does not see.
    * Per source, the dz-independent ring values and the axial frequency kz are kept on
      that rectangle; defocus transfers are made per 0.05 um bucket of dz and the last few
      are kept.
    """

    def __init__(self, shape: tuple[int, int], dx_um: float, optics: PhaseContrastOptics, *, keep_defocus: int = 3) -> None:
        if keep_defocus < 0:
            raise ValueError(f"keep_defocus must be >= 0 (0 = no cache), got {keep_defocus}")
        self.shape = shape
        self.dx_um = dx_um
        self.optics = optics
        ny, nx = shape
        cutoff = optics.max_cutoff_cpum
        # Nyquist of the optical grid >= 2*cutoff (+2 bins): the intensity's whole band.
        self.opt_shape = (
            min(ny, sfft.next_fast_len(math.ceil(4.0 * cutoff * ny * dx_um) + 4)),
            min(nx, sfft.next_fast_len(math.ceil(4.0 * cutoff * nx * dx_um) + 4)),
        )
        my, mx = self.opt_shape
        self._row_blocks = _centred_blocks(ny, my)
        self._col_blocks = _centred_blocks(nx, mx)
        fy_c = ((np.arange(my) - my // 2) / (ny * dx_um))[:, None]
        fx_c = ((np.arange(mx) - mx // 2) / (nx * dx_um))[None, :]
        self._sources: list[tuple[tuple[slice, slice], np.ndarray, np.ndarray, np.ndarray]] = []
        for source in optics.sources():
            f_x, f_y, lam = source.fx, source.fy, source.wavelength_um
            radius = optics.na / lam
            # The pupil of this source is the disc |nu + f| <= NA/lambda: its bounding rectangle.
            box = (
                self._index_span(-f_y, radius, my, ny * dx_um),
                self._index_span(-f_x, radius, mx, nx * dx_um),
            )
            gy = fy_c[box[0]] + f_y
            gx = fx_c[:, box[1]] + f_x
            inside = gx * gx + gy * gy <= radius * radius
            ring = optics.ring(gx, gy, lam) * inside
            k0 = optics.immersion_index / lam
            # kz relative to the source's own direct light: the constant phase is invisible in |U|^2
            # and keeping it out leaves float32 enough precision for millimetres of defocus.
            kz = np.sqrt(np.maximum(k0 * k0 - gx * gx - gy * gy, 0.0)) - math.sqrt(max(k0 * k0 - f_x * f_x - f_y * f_y, 0.0))
            self._sources.append((box, np.abs(ring).astype(np.float32), np.angle(ring).astype(np.float32), kz.astype(np.float32)))
        # Scale of a cropped inverse transform relative to the full grid's.
        self._field_scale2 = np.float32(((my * mx) / (ny * nx)) ** 2 / len(self._sources))
        # Zero-padding of the optical grid's half spectrum onto the pixel grid's, with the pixel aperture.
        keep_y = (my - 1) // 2  # positive rows kept (Nyquist row of an even grid dropped; it holds nothing)
        keep_x = (mx - 1) // 2
        self._pad_rows = [(slice(0, keep_y + 1), slice(0, keep_y + 1)), (slice(my - keep_y, my), slice(ny - keep_y, ny))]
        self._pad_cols = slice(0, keep_x + 1)
        fy_full, fx_full = frequency_grid(shape, dx_um)
        mtf = pixel_aperture_mtf(fx_full[:, : keep_x + 1], fy_full, dx_um) * ((ny * nx) / (my * mx))
        self._pad_mtf = [mtf[dst, :].astype(np.float32) for _, dst in self._pad_rows]
        self._defocus: OrderedDict[int, list[np.ndarray]] = OrderedDict()
        self._keep_defocus = keep_defocus

    @staticmethod
    def _index_span(centre_cpum: float, radius_cpum: float, n_crop: int, length_um: float) -> slice:
        lo = math.floor((centre_cpum - radius_cpum) * length_um) - 1 + n_crop // 2
        hi = math.ceil((centre_cpum + radius_cpum) * length_um) + 2 + n_crop // 2
        return slice(max(lo, 0), min(hi, n_crop))

    @property
    def n_directions(self) -> int:
        return len(self._sources)

    def spectrum(self, field: np.ndarray, *, consume: bool = False) -> np.ndarray:
        """The object's spectrum on the optical grid, centred (what :meth:`image` needs; cache it
        per object). ``consume=True`` lets the transform overwrite ``field`` (saves a copy)."""
        if field.shape != self.shape:
            raise ValueError(f"object field is {field.shape}, imager grid is {self.shape}")
        field = field.astype(np.complex64, copy=False)
        full = sfft.fft2(field, workers=FFT_WORKERS, overwrite_x=consume)
        crop = np.empty(self.opt_shape, np.complex64)
        for rows_full, rows_crop in self._row_blocks:
            for cols_full, cols_crop in self._col_blocks:
                crop[rows_crop, cols_crop] = full[rows_full, cols_full]
        return crop

    def _transfers(self, dz_um: float) -> list[np.ndarray]:
        key = round(dz_um / DZ_BUCKET_UM)
        hit = self._defocus.get(key)
        if hit is not None:
            self._defocus.move_to_end(key)
            return hit
        # Make room first, so old and new transfers are never held together (keep_defocus = 0: no cache).
        while self._defocus and len(self._defocus) >= self._keep_defocus:
            self._defocus.popitem(last=False)
        two_pi_dz = np.float32(2.0 * np.pi * key * DZ_BUCKET_UM)
        transfers = []
        for _, magnitude, phase, kz in self._sources:
            re, im = cv2.polarToCart(magnitude, phase + two_pi_dz * kz)
            t = np.empty(magnitude.shape, np.complex64)
            t.real, t.imag = re, im
            transfers.append(t)
        if self._keep_defocus > 0:
            self._defocus[key] = transfers
        return transfers

    def image(self, spectrum: np.ndarray, dz_um: float, *, shift_px: tuple[float, float] = (0.0, 0.0)) -> np.ndarray:
        """Intensity on the pixel grid (float32, direct light of an empty field = tau^2) for the
        object whose :meth:`spectrum` is given, propagated by ``dz_um``, its content moved by
        ``shift_px`` = (columns, rows). The intensity is band-limited below the grid's Nyquist
        frequency, so a linear phase on its spectrum (Fourier shift theorem) moves it by
        fractions of a pixel exactly."""
        acc = np.zeros(self.opt_shape, np.float32)
        for (box, _, _, _), transfer in zip(self._sources, self._transfers(dz_um)):
            buf = np.zeros(self.opt_shape, np.complex64)
            np.multiply(spectrum[box], transfer, out=buf[box])
            u = sfft.ifft2(buf, workers=FFT_WORKERS, overwrite_x=True)
            acc += np.abs(u) ** 2
        acc *= self._field_scale2
        half = sfft.rfft2(acc, workers=FFT_WORKERS)
        ny, nx = self.shape
        padded = np.zeros((ny, nx // 2 + 1), np.complex64)
        for (src, dst), mtf in zip(self._pad_rows, self._pad_mtf):
            np.multiply(half[src, self._pad_cols], mtf, out=padded[dst, self._pad_cols])
        if shift_px != (0.0, 0.0):
            fy = sfft.fftfreq(ny).astype(np.float32)[:, None]
            fx = sfft.rfftfreq(nx).astype(np.float32)[None, :]
            padded *= np.exp(np.complex64(-2j * np.pi) * (fx * np.float32(shift_px[0]) + fy * np.float32(shift_px[1])))
        return sfft.irfft2(padded, s=self.shape, workers=FFT_WORKERS).astype(np.float32, copy=False)

    def intensity(self, field: np.ndarray, dz_um: float) -> np.ndarray:
        return self.image(self.spectrum(field), dz_um)
