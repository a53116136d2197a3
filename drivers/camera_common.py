"""What the real camera drivers share: exposure and gain limits, decibel conversion, and
turning whatever a camera or image file delivers into a 2-D monochrome frame.

The limits come from the ``[camera]`` section's own option declarations
(:class:`drivers.sections.CameraSection`), so the drivers and the profile loader can never
disagree about what is allowed.
"""

from __future__ import annotations

import math

import cv2
import numpy as np

from drivers.base import CameraError
from drivers.sections import EXPOSURE_RANGE_MS, GAIN_RANGE_DB

# Read-out of a frame after its exposure on a USB/board camera (about one frame at 30 fps;
# common practice). The simulated camera takes it; the plan estimate counts it.
FRAME_READOUT_S = 1.0 / 30.0


def _check_range(
    value: float, *, what: str, unit: str, option: str, full: tuple[float, float],
    driver: str, lo: float | None, hi: float | None,
) -> float:
    low = max(full[0], lo) if lo is not None else full[0]
    high = min(full[1], hi) if hi is not None else full[1]
    number = float(value)
    if not math.isfinite(number) or not low <= number <= high:
        raise CameraError(
            f"{driver} camera: {what} {value!r} {unit} is not allowed; use {low:g} to {high:g} {unit} "
            f"([camera] {option} limits)"
        )
    return number


def check_exposure_ms(
    exposure_ms: float, *, driver: str, lo_ms: float | None = None, hi_ms: float | None = None
) -> float:
    """Return ``exposure_ms`` as a float, or raise CameraError saying what is allowed.

    ``lo_ms``/``hi_ms`` narrow the profile's range to what this camera can do.
    """
    return _check_range(
        exposure_ms, what="exposure", unit="ms", option="exposure_ms", full=EXPOSURE_RANGE_MS,
        driver=driver, lo=lo_ms, hi=hi_ms,
    )


def check_gain_db(
    gain_db: float, *, driver: str, lo_db: float | None = None, hi_db: float | None = None
) -> float:
    """Return ``gain_db`` as a float, or raise CameraError saying what is allowed."""
    return _check_range(
        gain_db, what="gain", unit="dB", option="gain_db", full=GAIN_RANGE_DB, driver=driver, lo=lo_db, hi=hi_db
    )


def db_to_amplitude_factor(gain_db: float) -> float:
    """Gain in dB to a linear signal factor: 10^(dB/20) (amplitude decibels, 20·log10)."""
    return float(10.0 ** (gain_db / 20.0))


def amplitude_factor_to_db(factor: float) -> float:
    """Inverse of :func:`db_to_amplitude_factor`; ``factor`` must be > 0."""
    return float(20.0 * math.log10(factor))


_TO_GRAY = {
    ("bgr", 3): cv2.COLOR_BGR2GRAY,
    ("bgr", 4): cv2.COLOR_BGRA2GRAY,
    ("rgb", 3): cv2.COLOR_RGB2GRAY,
    ("rgb", 4): cv2.COLOR_RGBA2GRAY,
}


def to_mono(pixels: np.ndarray, *, channel_order: str = "bgr", source: str = "camera") -> np.ndarray:
    """A C-contiguous 2-D uint8 or uint16 array from a 2-D, 1-, 2-, 3- or 4-channel image.

    Colour is weighted to luma by OpenCV (ITU-R BT.601 weights). Two channels are taken
    as packed YUYV as OpenCV hands it over with RGB conversion off, so channel 0 is luma.
    ``channel_order`` is "bgr" (OpenCV) or "rgb" (tifffile, most other libraries).
    """
    if pixels.dtype not in (np.uint8, np.uint16):
        raise CameraError(f"{source}: pixels are {pixels.dtype}, only 8- or 16-bit unsigned integers are supported")
    if pixels.ndim == 2:
        return np.ascontiguousarray(pixels)
    if pixels.ndim != 3:
        raise CameraError(f"{source}: image has shape {pixels.shape}, expected height x width [x channels]")
    channels = pixels.shape[2]
    if channels == 1:
        return np.ascontiguousarray(pixels[:, :, 0])
    if channels == 2:
        return np.ascontiguousarray(pixels[:, :, 0])
    code = _TO_GRAY.get((channel_order, channels))
    if code is None:
        raise CameraError(f"{source}: image has {channels} channels, expected 1, 3 or 4")
    return cv2.cvtColor(np.ascontiguousarray(pixels), code)


def delivered_bit_depth(pixels: np.ndarray, configured_bit_depth: int) -> int:
    """8 for uint8 frames; for uint16 frames the profile's 10/12/16 (how many bits carry data)."""
    if pixels.dtype == np.uint8:
        return 8
    return configured_bit_depth if configured_bit_depth > 8 else 16
