"""Flat-field correction: ``(raw − dark) / (flat − dark) × mean(flat − dark)`` in float32.

Budget scopes lose a third of their light towards the frame corners (vignetting, an
off-centre LED) and cheap sensors add a fixed dark pattern; both must go before
intensities or confluence can be compared across a plate or across days.

:class:`Corrector` does the division once, when the calibration is loaded, so that the
hot path per frame is one multiply and one subtract. Pixels whose flat response is too
small to divide by (dead pixels, a pixel as hot in the dark frame as in the flat, a flat
that is zero there) or implausibly large (hot in the flat only) take the gain of their
nearest usable neighbour, so the correction never produces NaN or infinity.
"""

from __future__ import annotations

import dataclasses

import numpy as np

from daemon.illumination import CalibrationError

#: A pixel whose flat response (flat − dark) is below this fraction of the median response
#: is treated as dead: dividing by it would multiply its noise by 20 or more.
MIN_RESPONSE_FRACTION = 0.05


def _shape_text(shape: tuple[int, ...]) -> str:
    return "x".join(str(n) for n in reversed(shape)) if len(shape) == 2 else str(shape)


def _finite_f32(values: np.ndarray) -> np.ndarray:
    """float32 copy with values beyond float32's range clipped, so later sums stay finite."""
    lim = float(np.finfo(np.float32).max) / 4
    return np.ascontiguousarray(np.clip(values, -lim, lim), dtype=np.float32)


def _as_float_frame(name: str, frame: np.ndarray) -> np.ndarray:
    arr = np.asarray(frame)
    if arr.ndim != 2:
        raise CalibrationError(f"{name} frame must be 2-D (monochrome), got shape {arr.shape}")
    return arr.astype(np.float64, copy=False)


@dataclasses.dataclass(frozen=True, eq=False)
class Corrector:
    """Precomputed per-pixel gain and offset: ``apply(raw) = raw·gain − offset``.

    ``gain = mean(flat − dark) / (flat − dark)`` and ``offset = dark·gain``, which is the
    flat-fielding formula of docs/TARGETS.md rearranged so that a frame costs two passes over memory.
    """

    gain: np.ndarray
    offset: np.ndarray
    level_dn: float
    """mean(flat − dark) over usable pixels: the corrected image keeps this brightness scale."""
    bad_pixels: int
    """pixels whose gain was borrowed from a neighbour (dead, hot, non-finite)."""
    usable: bool
    """False when the flat had no usable response at all: only the dark is subtracted."""

    @property
    def shape(self) -> tuple[int, int]:
        return self.gain.shape  # type: ignore[return-value]

    @classmethod
    def from_frames(
        cls, dark: np.ndarray, flat: np.ndarray, *, min_response_fraction: float = MIN_RESPONSE_FRACTION
    ) -> Corrector:
        from scipy import ndimage  # here, not at import: SciPy's image module holds ~27 MB resident
        d = _as_float_frame("dark", dark)
        f = _as_float_frame("flat", flat)
        if d.shape != f.shape:
            raise CalibrationError(
                f"dark frame is {_shape_text(d.shape)} but flat is {_shape_text(f.shape)}; "
                "take both with the same camera resolution"
            )
        dark_ok = np.isfinite(d)
        if not dark_ok.all():
            # An unreadable dark value is replaced by the typical black level, not zero,
            # so that pixel is not left with the offset in it.
            d = np.where(dark_ok, d, np.median(d[dark_ok]) if dark_ok.any() else 0.0)
        response = f - d
        finite = np.isfinite(response)
        typical = float(np.median(response[finite])) if finite.any() else 0.0
        if not typical > 0.0:
            # Nothing to divide by anywhere: the flat is black (lamp off, shutter) or no
            # brighter than the dark. Subtract the dark and leave the shading alone.
            gain = np.ones(d.shape, np.float32)
            return cls(gain, _finite_f32(d), 0.0, int(d.size), False)
        # Too dark to divide by, or so much brighter than the rest (a hot pixel) that it
        # cannot be a response to light: both borrow a neighbour's gain. This also bounds
        # every gain to [MIN_RESPONSE_FRACTION², 1/MIN_RESPONSE_FRACTION²].
        usable = finite & (response >= min_response_fraction * typical) & (response <= typical / min_response_fraction)
        level = float(np.mean(response[usable]))
        gain64 = np.zeros(d.shape, np.float64)
        np.divide(level, response, out=gain64, where=usable)
        bad = int(d.size - np.count_nonzero(usable))
        if bad:
            # Nearest usable neighbour's gain: keeps the shading correction continuous
            # across a dead pixel instead of leaving a black or white dot.
            _, (iy, ix) = ndimage.distance_transform_edt(~usable, return_indices=True)
            gain64 = gain64[iy, ix]
        gain = np.ascontiguousarray(gain64, dtype=np.float32)
        return cls(gain, _finite_f32(d * gain64), level, bad, True)

    def _check(self, raw: np.ndarray) -> None:
        if raw.shape != self.gain.shape:
            raise CalibrationError(
                f"frame is {_shape_text(raw.shape)} but the calibration is {_shape_text(self.gain.shape)}; "
                "calibrate again at this resolution"
            )

    def apply(self, raw: np.ndarray) -> np.ndarray:
        """Corrected frame, float32, on the scale of ``level_dn`` (a new array)."""
        self._check(raw)
        out = np.multiply(raw, self.gain, dtype=np.float32)
        np.subtract(out, self.offset, out=out)
        if out.dtype.kind == "f" and raw.dtype.kind == "f":
            # Only float input can carry NaN/inf in; integer frames cannot, so they skip this.
            np.nan_to_num(out, copy=False, nan=0.0, posinf=0.0, neginf=0.0)
        return out

    def apply_to_dtype(self, raw: np.ndarray) -> np.ndarray:
        """Corrected frame rounded and clipped back to ``raw``'s integer type (lossless TIFF)."""
        out = self.apply(raw)
        if raw.dtype.kind not in "ui":
            return out
        info = np.iinfo(raw.dtype)
        np.rint(out, out=out)
        np.clip(out, info.min, info.max, out=out)
        return out.astype(raw.dtype)


def correct(raw: np.ndarray, dark: np.ndarray, flat: np.ndarray) -> np.ndarray:
    """``(raw − dark) / (flat − dark) × mean(flat − dark)`` as float32, guarded.

    Dead pixels in the flat and a flat that is zero or NaN never give NaN or infinity
    (see :class:`Corrector`). For many frames build a :class:`Corrector` once instead.
    """
    return Corrector.from_frames(dark, flat).apply(np.asarray(raw))
