"""Registration of two frames of one field: how far the image moved between them, in pixels.

The shift is found by correlation in the Fourier domain, the method of Kuglin & Hines
(1975, "The phase correlation image alignment method", Proc. IEEE Int. Conf. on
Cybernetics and Society, 163-165), located to a hundredth of a pixel by the upsampled
matrix-multiply DFT of Guizar-Sicairos, Thurman & Fienup (2008, "Efficient subpixel image
registration algorithms", Opt. Lett. 33, 156-158), both as scikit-image implements them
(``skimage.registration.phase_cross_correlation``).

Frames are prepared first: band-passed by a difference of Gaussians (1 to 15 px: the
pixel-to-pixel noise and the lamp's shading go, the texture stays) and weighted by a Hann
window (the frame's edges would otherwise correlate with themselves at zero shift). The
correlation is used unnormalised (``normalization=None``): a camera's fixed pattern
(pixel-to-pixel response, dark signal) is the same in every frame, and beyond the optics'
cutoff the frames hold nothing else, so the phase-normalised form, which weights every
frequency alike, locks onto it at zero shift (tests/test_commission_registration.py shows
both). A first pass finds the whole-pixel shift; the second registers only the region
both frames show, where the window no longer pulls the estimate towards zero.

Shifts are the motion of the image content, (columns, rows): content at pixel p in the
reference is at p + shift in the moving frame.
"""

from __future__ import annotations

import dataclasses
import functools
from typing import Literal

import cv2
import numpy as np
from skimage.filters import window
from skimage.registration import phase_cross_correlation

BAND_PX = (1.0, 15.0)  # difference-of-Gaussians sigmas (px)
UPSAMPLE = 100  # shifts to 1/100 px
MIN_OVERLAP = 0.25  # fraction of the frame both must show for the refinement
GUESS_REACH_PX = 8.0  # how far from a guessed shift the refinement may land


@dataclasses.dataclass(frozen=True, slots=True)
class Shift:
    """Image content motion (px) of the moving frame against the reference, and quality:
    ``error`` is scikit-image's translation-invariant normalised RMS error of the aligned
    regions (0 identical, 1 nothing in common), ``overlap`` the shared fraction of the frame."""

    dx_px: float
    dy_px: float
    error: float
    overlap: float

    @property
    def vector(self) -> np.ndarray:
        return np.array([self.dx_px, self.dy_px])


@functools.lru_cache(maxsize=8)
def _hann(shape: tuple[int, int]) -> np.ndarray:
    return window("hann", shape).astype(np.float32)


def prepare(frame: np.ndarray) -> np.ndarray:
    """Band-passed (difference of Gaussians, OpenCV's separable blur: several times faster
    than the equivalent ``skimage.filters.difference_of_gaussians``) and Hann-windowed float
    copy of a frame."""
    a = np.asarray(frame, dtype=np.float32)
    fine = cv2.GaussianBlur(a, (0, 0), BAND_PX[0])
    fine -= cv2.GaussianBlur(a, (0, 0), BAND_PX[1])
    fine *= _hann(a.shape)
    return fine


def _correlate(
    reference: np.ndarray, moving: np.ndarray, upsample: int, normalization: Literal["phase"] | None
) -> tuple[np.ndarray, float]:
    shift_rc, error, _ = phase_cross_correlation(
        prepare(reference), prepare(moving), upsample_factor=upsample, normalization=normalization
    )
    # scikit-image returns the shift that registers `moving` onto `reference`: minus the content's motion.
    return -np.asarray(shift_rc, float), float(error)


def register(
    reference: np.ndarray,
    moving: np.ndarray,
    *,
    guess_px: tuple[float, float] | None = None,
    upsample: int = UPSAMPLE,
    normalization: Literal["phase"] | None = None,
) -> Shift:
    """How far the content of ``moving`` lies from where it is in ``reference`` (px).

    ``guess_px`` (columns, rows), when the shift is known roughly (from the stage move and
    a first map), replaces the first pass: for large shifts the windowed whole frames
    share little of their weighted middles and that pass can lock onto a wrong peak.
    Raises ValueError for frames of different shapes, ones that share less than
    :data:`MIN_OVERLAP` of the frame at the shift found, or a refinement that lands
    farther than :data:`GUESS_REACH_PX` from the guess."""
    ref = np.asarray(reference)
    mov = np.asarray(moving)
    if ref.shape != mov.shape or ref.ndim != 2:
        raise ValueError(f"register needs two 2-D frames of one shape, got {ref.shape} and {mov.shape}")
    h, w = ref.shape
    if guess_px is None:
        coarse, _ = _correlate(ref, mov, 1, normalization)
        dr, dc = (int(round(v)) for v in coarse)
    else:
        dr, dc = int(round(guess_px[1])), int(round(guess_px[0]))
    overlap = max(0, h - abs(dr)) * max(0, w - abs(dc)) / float(h * w)
    if overlap < MIN_OVERLAP:
        raise ValueError(f"the frames share {overlap:.0%} of the field at the shift found; need {MIN_OVERLAP:.0%}")
    # The region both frames show: reference pixel p is moving pixel p + (dr, dc).
    ref_part = ref[max(0, -dr) : h - max(0, dr), max(0, -dc) : w - max(0, dc)]
    mov_part = mov[max(0, dr) : h - max(0, -dr), max(0, dc) : w - max(0, -dc)]
    fine, error = _correlate(ref_part, mov_part, upsample, normalization)
    if guess_px is not None and float(np.hypot(*fine)) > GUESS_REACH_PX:
        raise ValueError(f"the frames do not match near the expected shift ({fine[1]:+.1f}, {fine[0]:+.1f} px off it)")
    return Shift(dx_px=dc + float(fine[1]), dy_px=dr + float(fine[0]), error=error, overlap=overlap)


class Reference:
    """A frame prepared once, for registering many frames of small shifts against it (a
    burst of the settling stage): one pass on the whole frames, the reference's transform
    reused. For shifts of a few pixels in a frame of hundreds the window's pull towards
    zero is below a hundredth of a pixel, so the second pass of :func:`register` is not needed."""

    def __init__(self, frame: np.ndarray) -> None:
        self.shape = np.asarray(frame).shape
        self._spectrum = np.fft.fft2(prepare(frame))

    def shift(self, moving: np.ndarray, *, upsample: int = UPSAMPLE) -> Shift:
        mov = np.asarray(moving)
        if mov.shape != self.shape:
            raise ValueError(f"register needs two 2-D frames of one shape, got {self.shape} and {mov.shape}")
        shift_rc, error, _ = phase_cross_correlation(
            self._spectrum, np.fft.fft2(prepare(mov)), space="fourier", upsample_factor=upsample, normalization=None
        )
        h, w = self.shape
        dr, dc = -float(shift_rc[0]), -float(shift_rc[1])
        return Shift(dx_px=dc, dy_px=dr, error=float(error), overlap=max(0.0, (h - abs(dr)) * (w - abs(dc)) / (h * w)))


def texture_ratio(still_a: np.ndarray, still_b: np.ndarray, moved: np.ndarray) -> float:
    """How much a stage step changes the image, against how much camera noise does.

    ``still_a`` and ``still_b`` are two frames of the same field, ``moved`` one after a
    small stage step. Their band-passed differences hold, for the still pair, only the
    camera's temporal noise (twice over), and for the moved one the texture as well; the
    fixed pattern of the camera cancels in both. Returns var(moved - a) / var(b - a): about
    1 for a field without texture (or a stage that did not move), far above it with cells.
    """
    a = prepare(still_a)
    noise = float(np.var(prepare(still_b) - a))
    change = float(np.var(prepare(moved) - a))
    return change / noise if noise > 0 else float("inf")
