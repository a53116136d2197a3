"""Retrospective flat field: the shading estimated from the frames of a time-lapse.

A plate full of cells has no blank field to take a flat from. But across many positions
the cells lie in different places while the shading stays put, so a robust statistic per
pixel across positions (the median) keeps the shading and rejects the cells; a smooth
surface fitted to it then removes what is left of them and the noise. This is the
multi-image idea of retrospective shading correction (e.g. Piccinini et al. 2012,
J. Microsc. 248:6-22, from memory); the surface fit is ordinary least squares.

Memory stays small: each frame is reduced to block means as it arrives, so a time point
of 96 full frames needs a few megabytes, not hundreds.

How well the flat is determined is measured, not assumed, in two parts. Random error:
the frames are split in two halves (alternating), a flat is estimated from each, and half
the RMS difference between them estimates the uncertainty of the flat from all frames
(two independent halves each carry twice the variance of the whole). Systematic error:
the residuals of the fit averaged over several blocks, i.e. shading the smooth surface
cannot follow. Their quadrature sum is the stated error estimate.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Iterable

import numpy as np

from daemon.illumination import CalibrationError

#: Residuals averaged over this many blocks (each way) count as systematic misfit.
SYSTEMATIC_BOX_BLOCKS = 5
#: Fewer positions than this cannot out-vote the cells in a median, nor be split in two.
MIN_FRAMES = 6


@dataclasses.dataclass(frozen=True)
class RetrospectiveFlat:
    flat: np.ndarray
    """float32, full size, on the raw frames' scale: ``dark + level × shape``, so it can be
    stored as a flat and used with ``Corrector.from_frames(dark, flat)``."""
    shape: np.ndarray
    """float32 relative illumination, mean 1 (what a perfect flat divided by its mean is)."""
    frames: int
    uncertainty_fraction: float
    """estimated RMS error of ``shape`` (split-half), as a fraction of its mean."""
    misfit_fraction: float
    """RMS of the per-block medians about the fitted surface, relative (noise, cells left
    over and any shading the surface cannot follow)."""
    systematic_fraction: float
    """the misfit's large-scale part: shading the surface cannot follow."""
    shading_range_fraction: float
    """(max − min) / mean of ``shape``: how uneven the illumination is."""
    degree: int
    block_px: int

    @property
    def error_estimate_fraction(self) -> float:
        """Expected RMS error of ``shape``: random (split-half) and systematic parts together."""
        return float(np.hypot(self.uncertainty_fraction, self.systematic_fraction))

    def quality(self) -> dict[str, float | int]:
        return {
            "frames": self.frames,
            "error_estimate_fraction": self.error_estimate_fraction,
            "uncertainty_fraction": self.uncertainty_fraction,
            "systematic_fraction": self.systematic_fraction,
            "misfit_fraction": self.misfit_fraction,
            "shading_range_fraction": self.shading_range_fraction,
            "surface_degree": self.degree,
            "block_px": self.block_px,
        }


def block_means(frame: np.ndarray, block_px: int) -> np.ndarray:
    """Mean over ``block_px`` × ``block_px`` blocks (edge rows/columns that do not fill a
    block are dropped), float32."""
    h, w = frame.shape
    bh, bw = h // block_px, w // block_px
    if bh < 2 or bw < 2:
        raise CalibrationError(f"frame {w}x{h} is too small for {block_px}-pixel blocks; use smaller blocks")
    f = np.asarray(frame[: bh * block_px, : bw * block_px], dtype=np.float32)
    return f.reshape(bh, block_px, bw, block_px).mean(axis=(1, 3))


def _normalised_grid(n: int, block_px: int | None, full: int) -> np.ndarray:
    """Pixel-centre coordinates scaled to [-1, 1] over the full frame width ``full``."""
    centres = (np.arange(n) + 0.5) * block_px - 0.5 if block_px else np.arange(n, dtype=np.float64)
    return 2.0 * centres / max(full - 1, 1) - 1.0


def fit_surface(
    values: np.ndarray, block_px: int, frame_shape: tuple[int, int], degree: int, *, iterations: int = 3
) -> tuple[np.ndarray, float, float]:
    """Least-squares 2-D polynomial of total degree ``degree`` through per-block ``values``,
    with outlier blocks (over 3 robust sigmas) dropped and refitted ``iterations`` times.

    Returns the coefficient matrix (numpy.polynomial.polynomial order), the RMS relative
    misfit of the kept blocks, and the RMS of that misfit averaged over
    ``SYSTEMATIC_BOX_BLOCKS`` blocks (its systematic part).
    """
    from scipy import ndimage  # here, not at import: SciPy's image module holds ~27 MB resident
    h, w = frame_shape
    ny, nx = values.shape
    yy, xx = np.meshgrid(_normalised_grid(ny, block_px, h), _normalised_grid(nx, block_px, w), indexing="ij")
    vander = np.polynomial.polynomial.polyvander2d(yy.ravel(), xx.ravel(), [degree, degree])
    # Total degree: drop x^i y^j with i + j > degree (they only add wiggle at the corners).
    i, j = np.meshgrid(np.arange(degree + 1), np.arange(degree + 1), indexing="ij")
    keep_terms = (i + j).ravel() <= degree
    a = vander[:, keep_terms]
    b = values.ravel().astype(np.float64)
    keep = np.isfinite(b)
    coef = np.zeros(a.shape[1])
    for _ in range(iterations + 1):
        coef, *_ = np.linalg.lstsq(a[keep], b[keep], rcond=None)
        resid = b - a @ coef
        mad = float(np.median(np.abs(resid[keep] - np.median(resid[keep])))) * 1.4826
        new_keep = np.isfinite(b) & (np.abs(resid) <= 3.0 * max(mad, 1e-12))
        if new_keep.sum() < a.shape[1] * 2 or np.array_equal(new_keep, keep):
            break
        keep = new_keep
    full = np.zeros((degree + 1) * (degree + 1))
    full[keep_terms] = coef
    fitted = a @ coef
    scale = float(np.mean(fitted[keep]))
    if not scale > 0:
        return full.reshape(degree + 1, degree + 1), float("inf"), float("inf")
    misfit = float(np.sqrt(np.mean((b[keep] - fitted[keep]) ** 2)) / scale)
    # Residual structure larger than a few blocks is shading the surface cannot follow
    # (not noise, not single cells): its RMS estimates the surface's systematic error.
    resid = np.where(keep, b - fitted, 0.0).reshape(values.shape) / scale
    weight = keep.reshape(values.shape).astype(np.float64)
    size = min(SYSTEMATIC_BOX_BLOCKS, *values.shape)
    local = ndimage.uniform_filter(resid, size, mode="nearest") / np.maximum(
        ndimage.uniform_filter(weight, size, mode="nearest"), 1e-9
    )
    systematic = float(np.sqrt(np.mean(local[weight > 0] ** 2)))
    return full.reshape(degree + 1, degree + 1), misfit, systematic


def evaluate_surface(coef: np.ndarray, shape: tuple[int, int]) -> np.ndarray:
    h, w = shape
    y = _normalised_grid(h, None, h)
    x = _normalised_grid(w, None, w)
    return np.polynomial.polynomial.polygrid2d(y, x, coef).astype(np.float32)


class RetrospectiveFlatBuilder:
    """Feed frames from many positions with :meth:`add`, then call :meth:`result`.

    ``dark`` (the matching averaged dark frame) is subtracted first; without it the black
    level flattens the estimated shading.
    """

    def __init__(self, dark: np.ndarray | None = None, *, block_px: int = 8, degree: int = 4) -> None:
        if block_px < 1:
            raise CalibrationError(f"block size must be at least 1 pixel, got {block_px}")
        if not 0 <= degree <= 8:
            raise CalibrationError(f"surface degree must be 0 to 8, got {degree}")
        self.dark = None if dark is None else np.asarray(dark, dtype=np.float32)
        self.block_px = block_px
        self.degree = degree
        self._frame_shape: tuple[int, int] | None = None
        self._blocks: list[np.ndarray] = []

    @property
    def frames(self) -> int:
        return len(self._blocks)

    def add(self, frame: np.ndarray) -> None:
        frame = np.asarray(frame)
        if frame.ndim != 2:
            raise CalibrationError(f"frames must be 2-D (monochrome), got shape {frame.shape}")
        if self._frame_shape is None:
            if self.dark is not None and self.dark.shape != frame.shape:
                raise CalibrationError(
                    f"frame is {frame.shape[1]}x{frame.shape[0]} but the dark is "
                    f"{self.dark.shape[1]}x{self.dark.shape[0]}"
                )
            self._frame_shape = frame.shape  # type: ignore[assignment]
        elif frame.shape != self._frame_shape:
            h, w = self._frame_shape
            raise CalibrationError(f"frame is {frame.shape[1]}x{frame.shape[0]}, earlier frames were {w}x{h}")
        signal = frame.astype(np.float32) - self.dark if self.dark is not None else frame
        self._blocks.append(block_means(signal, self.block_px))

    def add_all(self, frames: Iterable[np.ndarray]) -> None:
        for f in frames:
            self.add(f)

    def _shape_from(self, blocks: list[np.ndarray]) -> tuple[np.ndarray, float, float]:
        """(coefficients normalised so the full-size surface has mean 1, misfit, systematic misfit)."""
        assert self._frame_shape is not None
        median = np.median(np.stack(blocks), axis=0)
        coef, misfit, systematic = fit_surface(median, self.block_px, self._frame_shape, self.degree)
        surface = evaluate_surface(coef, self._frame_shape)
        mean = float(surface.mean())
        if not mean > 0:
            raise CalibrationError("the estimated flat is not positive: are the frames dark or dark-subtracted twice?")
        return coef / mean, misfit, systematic

    def result(self) -> RetrospectiveFlat:
        if self.frames < MIN_FRAMES or self._frame_shape is None:
            raise CalibrationError(
                f"a retrospective flat needs frames from at least {MIN_FRAMES} different positions, got {self.frames}"
            )
        coef, misfit, systematic = self._shape_from(self._blocks)
        shape = evaluate_surface(coef, self._frame_shape)
        if float(shape.min()) <= 0:
            raise CalibrationError(
                "the estimated flat falls to zero or below somewhere: too few positions, or the "
                "field is mostly covered; use more positions or a lower surface degree"
            )
        coef_a, _, _ = self._shape_from(self._blocks[0::2])
        coef_b, _, _ = self._shape_from(self._blocks[1::2])
        diff = evaluate_surface(coef_a - coef_b, self._frame_shape)
        uncertainty = float(np.sqrt(np.mean(diff.astype(np.float64) ** 2))) / 2.0
        level = float(np.mean(np.stack(self._blocks)))
        base = self.dark if self.dark is not None else np.zeros(self._frame_shape, np.float32)
        flat = (base + np.float32(level) * shape).astype(np.float32)
        return RetrospectiveFlat(
            flat=flat,
            shape=shape,
            frames=self.frames,
            uncertainty_fraction=uncertainty,
            misfit_fraction=misfit,
            systematic_fraction=systematic,
            shading_range_fraction=float(shape.max() - shape.min()),
            degree=self.degree,
            block_px=self.block_px,
        )


def retrospective_flat(
    frames: Iterable[np.ndarray], dark: np.ndarray | None = None, *, block_px: int = 8, degree: int = 4
) -> RetrospectiveFlat:
    """Flat field from frames at many positions (see the module docstring)."""
    builder = RetrospectiveFlatBuilder(dark, block_px=block_px, degree=degree)
    builder.add_all(frames)
    return builder.result()
