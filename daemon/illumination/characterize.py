"""Camera characterisation by photon transfer, after EMVA Standard 1288 (Release 4.0 Linear).

The linear camera model of EMVA 1288: a pixel collecting μ_e electrons gives the mean
grey value ``μ_y = μ_y.dark + K·μ_e`` and the temporal variance
``σ²_y = K²σ²_d + σ²_q + K·(μ_y − μ_y.dark)``, with system gain K (DN/e⁻), temporal dark
noise σ_d (e⁻) and quantisation noise σ²_q = 1/12 DN². Stepping the exposure with the
lamp on and off and plotting σ²_y − σ²_y.dark against μ_y − μ_y.dark gives a line of
slope K (the photon-transfer curve); the dark series gives the dark signal; averaged
stacks give the spatial non-uniformities DSNU and PRNU.

No calibrated light source is needed for these (unlike quantum efficiency, which needs
the photon count and is not reported). What the standard asks that a scope cannot give
exactly is a uniform field: the statistics of the photon transfer are taken over the
most evenly lit part of the frame (within ``ROI_UNIFORMITY`` of its brightest level).
PRNU follows the standard's definition (:func:`prnu_1288`) when the field is uniform
(frames from a proper test rig); on a shaded field, as under a microscope, it is
computed after removing the smooth shading (:func:`prnu_highpass`), which would also
remove any smooth or row/column part of the sensor's own non-uniformity.

This module is split so that the analysis can be checked against frames of known
constants: :func:`pair_mean_variance` and :func:`analyse` are pure numpy, :func:`measure`
drives the scope, :func:`plot_photon_transfer` draws the report.
"""

from __future__ import annotations

import asyncio
import dataclasses
import math
from collections.abc import Callable
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from daemon.illumination import CalibrationError
from daemon.illumination.stats import RunningStats
from drivers import atomic

if TYPE_CHECKING:
    from daemon.scope import Scope

Progress = Callable[[int, int, str], None]

#: σ²_q, the variance of uniform quantisation in DN² (EMVA 1288 linear model).
QUANTISATION_VAR_DN2 = 1.0 / 12.0
#: Below this dark variance (DN²) the temporal dark noise is hidden by quantisation and
#: only an upper bound can be given (EMVA 1288 Release 4.0 uses 0.24 DN², from memory).
MIN_RESOLVED_DARK_VAR_DN2 = 0.24
#: The gain is fitted from the lowest point up to this fraction of the saturation signal
#: (EMVA 1288: 0 to 70 % of saturation).
FIT_MAX_FRACTION_OF_SATURATION = 0.70
#: Pixels lit within this fraction of the brightest smoothed level form the measuring area.
ROI_UNIFORMITY = 0.03
#: PRNU is relative and the high-pass removes shading, so it can use a wider area than
#: the photon transfer: every pixel lit to at least half the brightest level.
PRNU_AREA_UNIFORMITY = 0.5
#: Dark pairs at long exposures for the dark current (besides those of the steps).
DARK_SERIES_STEPS = 4
#: Box size (px) of the high-pass used for PRNU on an unevenly lit field.
HIGHPASS_BOX_PX = 7
#: A field whose smoothed lit signal stays within ± this fraction of its mean counts as
#: uniform, and PRNU then follows the standard's definition without a high-pass
#: (EMVA 1288 asks for an irradiation uniform to ±3 %, from memory).
UNIFORM_FIELD_TOLERANCE = 0.03
#: How PRNU was computed (Characterization.prnu_method).
PRNU_TOTAL = "EMVA 1288 total (uniform field)"
PRNU_HIGHPASS = f"high-pass {HIGHPASS_BOX_PX}x{HIGHPASS_BOX_PX} px (shaded field)"


@dataclasses.dataclass(frozen=True)
class PtcPoint:
    """One exposure step: a pair of lit frames and a pair of dark frames."""

    exposure_ms: float
    mean_dn: float
    var_dn2: float
    dark_mean_dn: float
    dark_var_dn2: float
    saturated_fraction: float


@dataclasses.dataclass(frozen=True)
class DarkPoint:
    """A pair of dark frames at one exposure (the long exposures of the dark-current series)."""

    exposure_ms: float
    mean_dn: float
    var_dn2: float


@dataclasses.dataclass(frozen=True)
class SpatialStacks:
    """Averages of L frames lit (near half saturation) and dark, at the same exposure."""

    exposure_ms: float
    frames: int
    """L of the lit stack"""
    bright_mean: np.ndarray
    bright_var: np.ndarray
    """per-pixel temporal variance over the L lit frames (DN²)"""
    dark_mean: np.ndarray
    dark_var: np.ndarray
    dark_frames: int | None = None
    """L of the dark stack where it differs from the lit one's"""

    @property
    def dark_count(self) -> int:
        return self.dark_frames if self.dark_frames is not None else self.frames

    @property
    def dark_temporal_var_dn2(self) -> float:
        return float(np.mean(self.dark_var))

    @property
    def bright_temporal_var_dn2(self) -> float:
        return float(np.mean(self.bright_var))


@dataclasses.dataclass(frozen=True)
class Characterization:
    system_gain_dn_per_e: float
    read_noise_e: float
    read_noise_is_upper_bound: bool
    dark_offset_dn: float
    dark_current_e_per_s: float
    dark_noise_dn: float
    dsnu_e: float
    prnu_fraction: float
    saturation_dn: float
    saturation_capacity_e: float
    sensitivity_threshold_e: float
    dynamic_range: float
    snr_max: float
    fit_first: int
    fit_last: int
    saturation_index: int
    gain_fit_rel_residual: float
    gain_fit_offset_dn2: float
    """0 for the standard fit through the origin; the fitted offset when the dark noise is
    below the quantisation step (then σ²_q is not the same in lit and dark frames)."""
    dark_resolved: bool
    """False when the temporal dark noise is below the quantisation step: read noise is
    then an upper bound and DSNU and dark current are not resolved either."""
    field_nonuniformity: float
    """Peak-to-peak spread of the smoothed lit stack over the frame, as a fraction of its
    mean (see :func:`field_nonuniformity`)."""
    prnu_method: str
    """:data:`PRNU_TOTAL` on a uniform field, :data:`PRNU_HIGHPASS` on a shaded one."""

    @property
    def dynamic_range_db(self) -> float:
        return 20.0 * math.log10(self.dynamic_range) if self.dynamic_range > 0 else float("nan")

    @property
    def snr_max_db(self) -> float:
        return 20.0 * math.log10(self.snr_max) if self.snr_max > 0 else float("nan")

    def as_dict(self) -> dict[str, Any]:
        d = dataclasses.asdict(self)
        d["dynamic_range_db"] = self.dynamic_range_db
        d["snr_max_db"] = self.snr_max_db
        return d


def pair_mean_variance(a: np.ndarray, b: np.ndarray, mask: np.ndarray | None = None) -> tuple[float, float]:
    """Mean μ_y (DN) and temporal variance σ²_y (DN²) from two frames taken under the same
    conditions (EMVA 1288 Release 4.0 Linear, section on mean and variance):

        μ_y = (μ_A + μ_B) / 2,   σ²_y = ⟨(y_A − y_B)²⟩ / 2 − (μ_A − μ_B)² / 2.

    The difference of the pair cancels every fixed pattern (DSNU, PRNU, shading); the
    second term removes a small change of mean between the two frames (lamp drift).
    """
    fa = np.asarray(a, dtype=np.float64)
    fb = np.asarray(b, dtype=np.float64)
    if mask is not None:
        fa, fb = fa[mask], fb[mask]
    mu_a, mu_b = float(fa.mean()), float(fb.mean())
    var = float(np.mean((fa - fb) ** 2)) / 2.0 - (mu_a - mu_b) ** 2 / 2.0
    return (mu_a + mu_b) / 2.0, var


class SeriesStats:
    """Mean μ_y and temporal variance σ²_y of L ≥ 2 frames taken under the same conditions,
    fed one frame at a time (the frames need not all be in memory).

    For L = 2 this is :func:`pair_mean_variance` (the same sums, rounding aside); for more
    frames it is its generalisation: the per-pixel sample variance over the L frames, averaged over the
    pixels, less the sample variance of the L frame means (which removes a drift of the
    lamp or the black level from frame to frame, as the pair formula's second term does).
    """

    def __init__(self, mask: np.ndarray | None = None, *, full_scale_dn: float | None = None) -> None:
        self.mask = mask
        self.full_scale_dn = full_scale_dn
        self._pixels: RunningStats | None = None
        self._frame_means: list[float] = []
        self._saturated = 0

    def add(self, frame: np.ndarray) -> None:
        px = np.asarray(frame, dtype=np.float64)
        if self.mask is not None:
            px = px[self.mask]
        if self.full_scale_dn is not None:
            self._saturated += int(np.count_nonzero(px >= self.full_scale_dn))
        if self._pixels is None:
            self._pixels = RunningStats(px.shape)
        self._pixels.add(px)
        self._frame_means.append(float(px.mean()))

    @property
    def frames(self) -> int:
        return len(self._frame_means)

    @property
    def saturated_fraction(self) -> float:
        """Share of the pixel values at or above full scale (0 without ``full_scale_dn``)."""
        return self._saturated / max(1, self.frames * (self._pixels.mean.size if self._pixels is not None else 1))

    def mean_variance(self) -> tuple[float, float]:
        if self.frames < 2 or self._pixels is None:
            raise CalibrationError(f"the temporal variance needs two or more frames, got {self.frames}")
        drift = float(np.var(self._frame_means, ddof=1))
        return float(np.mean(self._frame_means)), float(np.mean(self._pixels.variance)) - drift


def _smooth_signal(lit: np.ndarray, dark: np.ndarray) -> np.ndarray:
    """Lit minus dark, box-filtered over 1/16 of the frame: the shading of the field,
    with the pixel-to-pixel pattern and the temporal noise averaged away."""
    from scipy import ndimage  # here, not at import: SciPy's image module holds ~27 MB resident
    signal = np.asarray(lit, dtype=np.float32) - np.asarray(dark, dtype=np.float32)
    size = max(5, min(signal.shape) // 16) | 1
    return ndimage.uniform_filter(signal, size=size, mode="nearest")


def uniform_area(lit: np.ndarray, dark: np.ndarray, *, uniformity: float = ROI_UNIFORMITY, min_px: int = 2000) -> np.ndarray:
    """Boolean mask of the most evenly lit part of the field: pixels whose smoothed signal
    is within ``uniformity`` of the brightest (widened until it holds ``min_px`` pixels)."""
    smooth = _smooth_signal(lit, dark)
    top = float(np.percentile(smooth, 99.9))
    if top <= 0:
        raise CalibrationError("the lit frame is no brighter than the dark one: is the lamp on?")
    min_px = min(min_px, smooth.size // 4)
    tol = uniformity
    while True:
        mask = smooth >= (1.0 - tol) * top
        if mask.sum() >= min_px or tol >= 0.5:
            return mask
        tol *= 1.5


def _fit_through_origin(x: np.ndarray, y: np.ndarray) -> float:
    return float(np.sum(x * y) / np.sum(x * x))


def _fit_line(x: np.ndarray, y: np.ndarray) -> tuple[float, float]:
    """(slope, intercept) by least squares; a flat line when all x are equal."""
    if len(x) < 2 or np.ptp(x) == 0:
        return 0.0, float(np.mean(y))
    slope, intercept = np.polyfit(x, y, 1)
    return float(slope), float(intercept)


def saturation_index(points: list[PtcPoint]) -> int:
    """Index of the saturation point: where the temporal variance peaks (EMVA 1288; past
    it, clipping at full scale removes the noise)."""
    return int(np.argmax([p.var_dn2 for p in points]))


def _spatial_var_dn2(mean_image: np.ndarray, temporal_var_dn2: float, frames: int) -> float:
    """s²_y of an average of L frames (EMVA 1288 Release 4.0 Linear): the spatial variance
    of the averaged image over all M·N pixels (divisor MN − 1) less the temporal variance
    that the average still holds, σ²_y.stack / L."""
    return float(np.var(mean_image.astype(np.float64), ddof=1)) - temporal_var_dn2 / frames


def dsnu_e(stacks: SpatialStacks, gain: float) -> float:
    """DSNU_1288 = s_y.dark / K (e⁻), with s²_y.dark the spatial variance of the averaged
    dark stack (EMVA 1288 Release 4.0 Linear; see :func:`_spatial_var_dn2`)."""
    s2 = _spatial_var_dn2(stacks.dark_mean, stacks.dark_temporal_var_dn2, stacks.dark_count)
    return math.sqrt(max(s2, 0.0)) / gain


def field_nonuniformity(stacks: SpatialStacks) -> float:
    """(max − min) / mean of the lit stack's smoothed signal over the frame: 0 for a
    perfectly even field; a microscope's vignetting gives tens of percent."""
    smooth = _smooth_signal(stacks.bright_mean, stacks.dark_mean).astype(np.float64)
    mean = float(smooth.mean())
    if mean <= 0:
        raise CalibrationError("the lit stack is no brighter than the dark one: is the lamp on?")
    return float(smooth.max() - smooth.min()) / mean


def prnu_1288(stacks: SpatialStacks) -> float:
    """PRNU_1288 = √(s²_y.50 − s²_y.dark) / (μ_y.50 − μ_y.dark) (fraction), EMVA 1288
    Release 4.0 Linear, over the whole frame of a uniformly lit sensor; both spatial
    variances as in :func:`_spatial_var_dn2`. This includes every part of the pattern:
    pixel, row and column non-uniformity."""
    s2_lit = _spatial_var_dn2(stacks.bright_mean, stacks.bright_temporal_var_dn2, stacks.frames)
    s2_dark = _spatial_var_dn2(stacks.dark_mean, stacks.dark_temporal_var_dn2, stacks.dark_count)
    signal = float(np.mean(stacks.bright_mean)) - float(np.mean(stacks.dark_mean))
    if signal <= 0:
        raise CalibrationError("the lit stack is no brighter than the dark one: is the lamp on?")
    return math.sqrt(max(s2_lit - s2_dark, 0.0)) / signal


def prnu_highpass(stacks: SpatialStacks, mask: np.ndarray, box_px: int = HIGHPASS_BOX_PX) -> float:
    """PRNU_1288 (fraction) on an unevenly lit field.

    EMVA 1288 defines PRNU = √(s²_y.50 − s²_y.dark) / (μ_y.50 − μ_y.dark) on a uniform field
    (:func:`prnu_1288`). Here the dark average is subtracted pixel by pixel (which removes the DSNU term), the
    result is divided by its own ``box_px`` running mean (removing the smooth shading and
    giving relative values), and the variance of that is corrected for the high-pass
    (a white pattern keeps 1 − 1/box² of its variance) and for the temporal noise left
    in the two averages of L frames. A smooth, row or column part of the sensor's own
    pattern is removed with the shading, so this reads lower than :func:`prnu_1288` for
    such a sensor.
    """
    from scipy import ndimage  # here, not at import: SciPy's image module holds ~27 MB resident
    signal = stacks.bright_mean.astype(np.float64) - stacks.dark_mean
    smooth = ndimage.uniform_filter(signal, size=box_px, mode="nearest")
    inner = np.zeros_like(mask)
    m = box_px // 2
    inner[m:-m, m:-m] = mask[m:-m, m:-m]
    inner &= smooth > 0
    rel = signal[inner] / smooth[inner] - 1.0
    measured = float(np.var(rel)) / (1.0 - 1.0 / box_px**2)
    noise = float(np.mean((stacks.bright_var[inner] / stacks.frames + stacks.dark_var[inner] / stacks.dark_count) / smooth[inner] ** 2))
    return math.sqrt(max(measured - noise, 0.0))


def analyse(points: list[PtcPoint], stacks: SpatialStacks, dark_series: list[DarkPoint] | None = None) -> Characterization:
    """EMVA 1288 parameters from an exposure series, an optional series of long dark
    exposures (dark current) and averaged stacks (see the module docstring)."""
    if len(points) < 5:
        raise CalibrationError(f"photon transfer needs at least 5 exposure steps, got {len(points)}")
    pts = sorted(points, key=lambda p: p.exposure_ms)
    signal = np.array([p.mean_dn - p.dark_mean_dn for p in pts])
    noise = np.array([p.var_dn2 - p.dark_var_dn2 for p in pts])
    darks = [DarkPoint(p.exposure_ms, p.dark_mean_dn, p.dark_var_dn2) for p in pts] + list(dark_series or [])
    dark_t_s = np.array([d.exposure_ms for d in darks]) / 1000.0
    dark_mean = np.array([d.mean_dn for d in darks])
    dark_var = np.array([d.var_dn2 for d in darks])

    i_sat = saturation_index(pts)
    sat_signal = float(signal[i_sat])
    if i_sat < 3 or sat_signal <= 0:
        raise CalibrationError(
            "the variance peaks within the first exposure steps: the camera saturates too early "
            "or the light is unsteady; lower the lamp level or the gain and measure again"
        )
    in_fit = (signal > 0) & (signal <= FIT_MAX_FRACTION_OF_SATURATION * sat_signal)
    in_fit[i_sat:] = False
    idx = np.flatnonzero(in_fit)
    if len(idx) < 3:
        raise CalibrationError("fewer than 3 exposure steps below 70 % of saturation; use more steps")

    # Dark series against exposure: the intercept is the signal and noise at zero exposure,
    # the slope of the mean the dark current.
    dark_slope, dark_offset = _fit_line(dark_t_s, dark_mean)
    _, dark_var0 = _fit_line(dark_t_s, dark_var)
    if dark_var0 <= 0:
        dark_var0 = float(np.min(dark_var))
    resolved = dark_var0 >= MIN_RESOLVED_DARK_VAR_DN2

    if resolved:
        gain = _fit_through_origin(signal[idx], noise[idx])
        offset = 0.0
    else:
        # Dark frames that barely leave one grey level have almost no quantisation noise,
        # lit ones the full 1/12 DN²: the difference is a constant, fitted as an offset.
        gain, offset = _fit_line(signal[idx], noise[idx])
    if not gain > 0:
        raise CalibrationError("the temporal variance does not grow with the signal: is the lamp on and steady?")
    resid = noise[idx] - (gain * signal[idx] + offset)
    rel_resid = float(np.sqrt(np.mean(resid**2)) / np.mean(noise[idx]))

    dark_var_used = max(dark_var0, MIN_RESOLVED_DARK_VAR_DN2)
    read_noise = math.sqrt(dark_var_used - QUANTISATION_VAR_DN2) / gain
    sat_capacity = sat_signal / gain
    nonuniformity = field_nonuniformity(stacks)
    if nonuniformity <= 2.0 * UNIFORM_FIELD_TOLERANCE:
        prnu, prnu_method = prnu_1288(stacks), PRNU_TOTAL
    else:
        area = uniform_area(stacks.bright_mean, stacks.dark_mean, uniformity=PRNU_AREA_UNIFORMITY)
        prnu, prnu_method = prnu_highpass(stacks, area), PRNU_HIGHPASS
    # Signal at SNR = 1 from the model's SNR = μ_e / √(σ²_y.dark/K² + μ_e):
    # μ_e² − μ_e − σ²_y.dark/K² = 0.
    threshold = 0.5 + math.sqrt(0.25 + dark_var_used / gain**2)
    return Characterization(
        system_gain_dn_per_e=gain,
        read_noise_e=read_noise,
        read_noise_is_upper_bound=not resolved,
        dark_offset_dn=dark_offset,
        dark_current_e_per_s=dark_slope / gain,
        dark_noise_dn=math.sqrt(dark_var_used),
        dsnu_e=dsnu_e(stacks, gain),
        prnu_fraction=prnu,
        saturation_dn=float(pts[i_sat].mean_dn),
        saturation_capacity_e=sat_capacity,
        sensitivity_threshold_e=threshold,
        dynamic_range=sat_capacity / threshold,
        snr_max=math.sqrt(sat_capacity),
        fit_first=int(idx[0]),
        fit_last=int(idx[-1]),
        saturation_index=i_sat,
        gain_fit_rel_residual=rel_resid,
        gain_fit_offset_dn2=offset,
        dark_resolved=resolved,
        field_nonuniformity=nonuniformity,
        prnu_method=prnu_method,
    )


# -- acquisition -----------------------------------------------------------------------------


@dataclasses.dataclass(frozen=True)
class Measurement:
    points: list[PtcPoint]
    dark_series: list[DarkPoint]
    stacks: SpatialStacks
    mask: np.ndarray
    gain_db: float | None
    """None for frames acquired elsewhere (a manifest), where the gain is not known"""
    bit_depth: int
    frame_shape: tuple[int, int]


def _step_point(
    exposure_ms: float, la: np.ndarray, lb: np.ndarray, da: np.ndarray, db: np.ndarray, mask: np.ndarray, top: float
) -> PtcPoint:
    mu, var = pair_mean_variance(la, lb, mask)
    dmu, dvar = pair_mean_variance(da, db, mask)
    saturated = (np.count_nonzero(la[mask] >= top) + np.count_nonzero(lb[mask] >= top)) / (2 * np.count_nonzero(mask))
    return PtcPoint(exposure_ms, mu, var, dmu, dvar, float(saturated))


async def _pair(scope: Scope, exposure_ms: float, gain_db: float, lamp: bool) -> tuple[np.ndarray, np.ndarray]:
    a = await scope.capture(exposure_ms=exposure_ms, gain_db=gain_db, lamp=lamp)
    b = await scope.capture(exposure_ms=exposure_ms, gain_db=gain_db, lamp=lamp)
    return a.pixels, b.pixels


async def _stack(scope: Scope, frames: int, exposure_ms: float, gain_db: float, lamp: bool) -> tuple[np.ndarray, np.ndarray]:
    """(mean image, per-pixel temporal variance) of ``frames`` frames."""
    stats: RunningStats | None = None
    for _ in range(frames):
        px = (await scope.capture(exposure_ms=exposure_ms, gain_db=gain_db, lamp=lamp)).pixels
        if stats is None:
            stats = RunningStats(px.shape)
        await asyncio.to_thread(stats.add, px)
    assert stats is not None
    return stats.mean, stats.variance


async def measure(
    scope: Scope,
    *,
    gain_db: float,
    steps: int = 24,
    spatial_frames: int = 16,
    start_exposure_ms: float | None = None,
    max_exposure_ms: float = 10000.0,
    dark_long_ms: float | None = None,
    progress: Progress | None = None,
) -> Measurement:
    """Take the exposure series and the averaged stacks on the field under the objective.

    First a probe finds the exposure that fills the evenly lit area to full scale; then
    ``steps`` exposures from 2 % to 120 % of it (past saturation, so the variance peak
    is seen) each get a lit pair and a dark pair; dark pairs at longer exposures (up to
    ``dark_long_ms``, default the longer of 1 s and 4× the saturation exposure) give the
    dark current; last, ``spatial_frames`` lit and dark frames near half saturation give
    DSNU and PRNU. The caller holds the scope.
    """
    bit_depth = scope.profile.camera.bit_depth
    top = float(2**bit_depth - 1)
    t_ms = start_exposure_ms or scope.profile.camera.exposure_ms
    total = 2 + steps * 4 + 2 * DARK_SERIES_STEPS + 2 * spatial_frames
    done = 0

    def tick(n: int, text: str) -> None:
        nonlocal done
        done += n
        if progress is not None:
            progress(min(done, total), total, text)

    # Probe: shorten the exposure until the brightest area is below 80 % of full scale.
    for _ in range(20):
        lit = (await scope.capture(exposure_ms=t_ms, gain_db=gain_db, lamp=True)).pixels
        dark = (await scope.capture(exposure_ms=t_ms, gain_db=gain_db, lamp=False)).pixels
        mask = await asyncio.to_thread(uniform_area, lit, dark)
        level, dark_level = float(np.mean(lit[mask])), float(np.mean(dark[mask]))
        if level < 0.8 * top:
            break
        t_ms /= 3.0
    else:
        raise CalibrationError("the camera saturates even at the shortest exposure tried; lower the lamp level")
    tick(2, f"probe at {t_ms:.3g} ms")
    rate = (level - dark_level) / t_ms
    if rate <= 0.002 * top / t_ms:
        raise CalibrationError(
            f"the lit frame is hardly brighter than the dark one ({level:.1f} vs {dark_level:.1f} DN): "
            "is the lamp on and the field clear?"
        )
    full_ms = (top - dark_level) / rate
    if full_ms * 1.2 > max_exposure_ms:
        raise CalibrationError(
            f"full scale needs about {full_ms:.0f} ms, beyond the {max_exposure_ms:g} ms allowed; raise the lamp level or gain"
        )
    exposures = np.linspace(0.02, 1.2, steps) * full_ms
    points: list[PtcPoint] = []
    for k, e_ms in enumerate(exposures):
        la, lb = await _pair(scope, float(e_ms), gain_db, True)
        da, db = await _pair(scope, float(e_ms), gain_db, False)
        points.append(await asyncio.to_thread(_step_point, float(e_ms), la, lb, da, db, mask, top))
        mu, var = points[-1].mean_dn, points[-1].var_dn2
        tick(4, f"step {k + 1}/{steps}: {e_ms:.3g} ms, mean {mu:.1f} DN, variance {var:.2f} DN²")

    longest = dark_long_ms if dark_long_ms is not None else max(1000.0, 4.0 * full_ms)
    longest = min(longest, max_exposure_ms)
    dark_series: list[DarkPoint] = []
    for k in range(1, DARK_SERIES_STEPS + 1):
        e_ms = longest * k / DARK_SERIES_STEPS
        if e_ms <= exposures[-1]:
            tick(2, "dark current: covered by the exposure steps")
            continue
        da, db = await _pair(scope, e_ms, gain_db, False)
        dmu, dvar = await asyncio.to_thread(pair_mean_variance, da, db, mask)
        dark_series.append(DarkPoint(e_ms, dmu, dvar))
        tick(2, f"dark current: {e_ms:.4g} ms, mean {dmu:.2f} DN")

    i_sat = saturation_index(points)
    half = 0.5 * (points[i_sat].mean_dn - points[i_sat].dark_mean_dn)
    rates = [(p.mean_dn - p.dark_mean_dn) / p.exposure_ms for p in points[: max(i_sat, 1)]]
    half_ms = half / float(np.median(rates))
    bright, bright_var = await _stack(scope, spatial_frames, half_ms, gain_db, True)
    tick(spatial_frames, f"lit stack of {spatial_frames} at {half_ms:.3g} ms")
    dark_img, dark_var = await _stack(scope, spatial_frames, half_ms, gain_db, False)
    tick(spatial_frames, f"dark stack of {spatial_frames} at {half_ms:.3g} ms")
    stacks = SpatialStacks(half_ms, spatial_frames, bright, bright_var, dark_img, dark_var)
    return Measurement(points, dark_series, stacks, mask, gain_db, bit_depth, lit.shape)  # type: ignore[arg-type]


# -- report -----------------------------------------------------------------------------------


#: Shown instead of a value that the quantisation step hides.
UNRESOLVED = "n/r"


def summary_rows(result: Characterization, truth: dict[str, float] | None = None) -> list[tuple[str, str, str, str]]:
    """(quantity, estimate, simulator's value or '', unit) for reports and the plot."""
    t = truth or {}

    def fmt(key: str, value: float, digits: str = ".4g", scale: float = 1.0) -> tuple[str, str]:
        sim = f"{t[key] * scale:{digits}}" if key in t and t[key] is not None else ""
        return f"{value * scale:{digits}}", sim

    bound = "< " if result.read_noise_is_upper_bound else ""
    k_est, k_sim = fmt("system_gain_dn_per_e", result.system_gain_dn_per_e, ".4g")
    rn_est, rn_sim = fmt("read_noise_e", result.read_noise_e)
    dc_est, dc_sim = fmt("dark_current_e_per_s", result.dark_current_e_per_s)
    dsnu_est, dsnu_sim = fmt("dsnu_e", result.dsnu_e)
    if not result.dark_resolved:
        dc_est = dsnu_est = UNRESOLVED
    rows = [
        ("system gain K", k_est, k_sim, "DN/e-"),
        ("read noise", bound + rn_est, rn_sim, "e-"),
        ("dark offset", *fmt("dark_offset_dn", result.dark_offset_dn, ".2f"), "DN"),
        ("dark current", dc_est, dc_sim, "e-/s"),
        ("DSNU", dsnu_est, dsnu_sim, "e-"),
        ("PRNU", *fmt("prnu_fraction", result.prnu_fraction, ".3f", 100.0), "%"),
        ("saturation", *fmt("saturation_capacity_e", result.saturation_capacity_e, ".0f"), "e-"),
        ("dynamic range", f"{result.dynamic_range_db:.1f}", "", "dB"),
        ("SNR max", f"{result.snr_max_db:.1f}", "", "dB"),
    ]
    return rows


def plot_photon_transfer(
    measurement: Measurement,
    result: Characterization,
    path: Path,
    *,
    title: str,
    truth: dict[str, float] | None = None,
) -> None:
    """Save the photon-transfer report as a PNG: variance against signal with the gain fit,
    signal against exposure with the dark signal, SNR against signal with the model, and
    a table of the results (the simulator's values beside them where known)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    pts = sorted(measurement.points, key=lambda p: p.exposure_ms)
    sig = np.array([p.mean_dn - p.dark_mean_dn for p in pts])
    var = np.array([p.var_dn2 - p.dark_var_dn2 for p in pts])
    mean = np.array([p.mean_dn for p in pts])
    dark = np.array([p.dark_mean_dn for p in pts])
    t_ms = np.array([p.exposure_ms for p in pts])
    fit = np.zeros(len(pts), bool)
    fit[result.fit_first : result.fit_last + 1] = True
    fit &= sig > 0
    k = result.system_gain_dn_per_e
    i_sat = result.saturation_index

    fig = plt.figure(figsize=(17, 5.4), constrained_layout=True)
    grid = fig.add_gridspec(1, 4, width_ratios=[1.25, 1.0, 1.0, 0.9])
    axes = [fig.add_subplot(grid[0, i]) for i in range(4)]
    fig.suptitle(title, fontsize=12)

    ax = axes[0]
    ax.plot(sig[fit], var[fit], "o", color="tab:blue", label="in fit (up to 70 % of saturation)")
    ax.plot(sig[~fit], var[~fit], "o", mfc="none", color="0.45", label="not fitted")
    xs = np.linspace(0, sig[i_sat] * 1.05, 50)
    c = result.gain_fit_offset_dn2
    fit_label = f"fit: slope K = {k:.4g} DN/e⁻" + (f" (+ offset {c:.2f} DN²)" if c else "")
    ax.plot(xs, k * xs + c, "-", color="tab:red", label=fit_label)
    if truth and truth.get("system_gain_dn_per_e"):
        ax.plot(xs, truth["system_gain_dn_per_e"] * xs, "--", color="k", lw=1,
                label=f"simulator: K = {truth['system_gain_dn_per_e']:.4g} DN/e⁻")
    ax.axvline(sig[i_sat], color="tab:orange", ls=":", label="saturation point (variance peak)")
    ax.set_xlabel("signal  μ_y − μ_y.dark  (DN)")
    ax.set_ylabel("temporal variance  σ²_y − σ²_y.dark  (DN²)")
    ax.set_title("Photon transfer")
    ax.set_xlim(left=0)
    ax.set_ylim(bottom=min(0.0, float(var.min()) * 1.1))
    ax.grid(alpha=0.3)
    ax.legend(fontsize=8, loc="upper left")

    ax = axes[1]
    ax.plot(t_ms, mean, "o-", color="tab:blue", ms=4, label="lamp on  μ_y")
    ax.plot(t_ms, dark, "s-", color="0.3", ms=3, label="lamp off  μ_y.dark")
    ax.axhline(2**measurement.bit_depth - 1, color="tab:orange", ls=":", label="full scale")
    ax.axvline(measurement.stacks.exposure_ms, color="tab:green", ls="--", lw=1,
               label=f"DSNU/PRNU stacks ({measurement.stacks.frames} frames)")
    ax.set_xlabel("exposure (ms)")
    ax.set_ylabel("mean grey value (DN)")
    ax.set_title("Response")
    ax.set_xlim(left=0)
    ax.set_ylim(bottom=0)
    ax.grid(alpha=0.3)
    ax.legend(fontsize=8, loc="upper left")

    ax = axes[2]
    good = (sig > 0) & (np.arange(len(pts)) <= i_sat)
    snr = sig[good] / np.sqrt(np.maximum(var[good] + result.dark_noise_dn**2, 1e-12))
    ax.loglog(sig[good] / k, snr, "o", color="tab:blue", label="measured")
    lo = max(result.sensitivity_threshold_e * 0.5, 0.1)
    mu_e = np.logspace(np.log10(lo), np.log10(result.saturation_capacity_e), 100)
    ax.loglog(mu_e, mu_e / np.sqrt(result.dark_noise_dn**2 / k**2 + mu_e), "-", color="tab:red",
              label="linear model (fitted K, σ_y.dark)")
    ax.loglog(mu_e, np.sqrt(mu_e), ":", color="0.5", label="shot-noise limit √μ_e")
    ax.axhline(1.0, color="0.6", lw=0.8)
    ax.set_xlabel("signal  μ_e  (electrons)")
    ax.set_ylabel("signal-to-noise ratio")
    ax.set_title("Signal-to-noise ratio")
    ax.grid(alpha=0.3, which="both")
    ax.legend(fontsize=8, loc="upper left")

    ax = axes[3]
    ax.axis("off")
    rows = summary_rows(result, truth)
    has_truth = any(r[2] for r in rows)
    header = ["", "estimate", "simulator", "unit"] if has_truth else ["", "estimate", "unit"]
    cells = [list(r) if has_truth else [r[0], r[1], r[3]] for r in rows]
    widths = [0.34, 0.22, 0.28, 0.16] if has_truth else [0.45, 0.33, 0.22]
    table = ax.table(cellText=cells, colLabels=header, colWidths=widths, loc="upper center", cellLoc="left", colLoc="left")
    table.auto_set_font_size(False)
    table.set_fontsize(9)
    table.scale(1.0, 1.45)
    for (r, _), cell in table.get_celld().items():
        cell.set_edgecolor("0.8")
        if r == 0:
            cell.set_text_props(weight="bold")
    ax.set_title("EMVA 1288 results")
    notes = [
        "saturation: the variance peak (EMVA 1288)",
        f"{len(pts)} exposure steps, lit and dark pairs",
        f"measured on {int(measurement.mask.sum())} evenly lit pixels",
        f"PRNU: {result.prnu_method}; field spread {100 * result.field_nonuniformity:.1f} %",
        f"{measurement.bit_depth}-bit"
        + (f", gain {measurement.gain_db:g} dB" if measurement.gain_db is not None else ", frames acquired elsewhere"),
    ]
    if not result.dark_resolved:
        notes += [
            "n/r: not resolved. The dark noise is below one grey",
            "level: read noise is an upper bound; measure DSNU",
            "and dark current at a higher gain",
        ]
    ax.text(0.0, 0.02, "\n".join(notes), transform=ax.transAxes, fontsize=8, color="0.3", va="bottom")

    atomic.make_dirs(path.parent)
    try:
        with atomic.open_atomic(path) as fh:
            fig.savefig(fh, dpi=110, format="png")
    finally:
        plt.close(fig)
