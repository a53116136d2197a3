"""Taking a dark or flat calibration as a person asks for it, from any front end.

``phasewatch calibrate dark|flat`` and ``POST /api/v1/calibration/dark|flat`` take the
same :class:`DarkRequest` / :class:`FlatRequest` and call :func:`take_dark` /
:func:`take_flat`, so the checks are the same wherever the request came from: frames
averaged and camera settings within their declared limits (the request's loader), a
flat only against a stored dark of the same exposure and gain (:func:`check_flat`),
the defocus within the focus limits (:func:`~daemon.illumination.calibration.acquire_flat`),
and the frames themselves (:meth:`~daemon.illumination.calibration.CalibrationStore.save_flat`).
"""

from __future__ import annotations

import asyncio
import dataclasses
import json
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from daemon.illumination import CalibrationError
from daemon.illumination.calibration import CalibrationStore, Progress, acquire_dark, acquire_flat
from daemon.requests import camera_option
from drivers.base import Position
from drivers.options import option

if TYPE_CHECKING:
    from daemon.profile import Profile
    from daemon.scope import Scope

# Averaging N frames lowers the temporal noise of the stored frame by sqrt(N): 32 puts it
# under a fifth of one frame's, well below the shading a flat corrects (common practice).
DEFAULT_FRAMES = 32
MAX_FRAMES = 256


@dataclasses.dataclass(frozen=True, kw_only=True)
class DarkRequest:
    """Average frames with the lamp off and store them for this exposure and gain."""

    frames: int = option(DEFAULT_FRAMES, doc="frames averaged", min=1, max=MAX_FRAMES)
    exposure_ms: float | None = camera_option("exposure_ms", doc="exposure (default: the profile's [camera] exposure_ms)")
    gain_db: float | None = camera_option("gain_db", doc="analogue gain (default: the profile's [camera] gain_db)")


@dataclasses.dataclass(frozen=True, kw_only=True)
class FlatRequest(DarkRequest):
    """Average frames of the blank field under the objective and store them as the flat field."""

    defocus_um: float | None = option(
        None, min=0.0, unit="um",
        doc="defocus this far first (away from the vessel where the focus limits allow), so that "
            "structure in the field washes out; the focus goes back after",
    )


@dataclasses.dataclass(frozen=True)
class Taken:
    """A calibration frame averaged and stored. ``dark`` is the dark a flat was measured against."""

    kind: str
    path: Path
    image: np.ndarray
    exposure_ms: float
    gain_db: float
    frames: int
    acquired_t_s: float
    position: Position | None
    quality: dict[str, Any] | None
    dark: np.ndarray | None = None


def setting(profile: Profile, request: DarkRequest) -> tuple[float, float]:
    """(exposure ms, gain dB) of a request, the profile's where it gives none."""
    cam = profile.camera
    exposure = request.exposure_ms if request.exposure_ms is not None else cam.exposure_ms
    gain = request.gain_db if request.gain_db is not None else cam.gain_db
    return exposure, gain


def check_flat(store: CalibrationStore, profile: Profile, request: FlatRequest) -> np.ndarray:
    """The stored dark a flat of this request is measured against (blocking: reads it), or
    CalibrationError saying which dark to take first. Cheap enough to ask before opening
    or claiming the scope, and asked again by :func:`take_flat`."""
    exposure, gain = setting(profile, request)
    found = store.find_dark(profile, exposure, gain)
    if found is None:
        raise CalibrationError(store.describe_missing(profile, exposure, gain))
    return found[0]


def _position_meta(pos: Position | None) -> dict[str, float] | None:
    if pos is None:
        return None
    return {"x_um": round(pos.x_um, 3), "y_um": round(pos.y_um, 3), "z_um": round(pos.z_um, 3)}


def _quality(path: Path) -> dict[str, Any] | None:
    try:
        return json.loads(path.with_suffix(".json").read_text(encoding="utf-8")).get("quality")
    except (OSError, ValueError):
        return None


async def take_dark(
    scope: Scope, store: CalibrationStore, request: DarkRequest, *, progress: Progress | None = None
) -> Taken:
    """Average and store a dark frame; the caller holds the scope. The stored dark stays if
    the new one is refused (light reached the sensor, a size that does not match the flat)."""
    profile = scope.profile
    exposure, gain = setting(profile, request)
    image = await acquire_dark(scope, frames=request.frames, exposure_ms=exposure, gain_db=gain, progress=progress)
    t_s = scope.clock.now()
    path = await asyncio.to_thread(
        store.save_dark, profile, image, exposure_ms=exposure, gain_db=gain, frames=request.frames,
        bit_depth=profile.camera.bit_depth, acquired_t_s=t_s,
    )
    return Taken("dark", path, image, exposure, gain, request.frames, t_s, scope.last_position,
                 await asyncio.to_thread(_quality, path))


async def take_flat(
    scope: Scope, store: CalibrationStore, request: FlatRequest, *, where: str, progress: Progress | None = None
) -> Taken:
    """Average the field under the objective and store it as the flat; the caller has put a
    blank field there (``where`` says which, for the record) and holds the scope."""
    profile = scope.profile
    exposure, gain = setting(profile, request)
    dark = await asyncio.to_thread(check_flat, store, profile, request)
    image = await acquire_flat(
        scope, frames=request.frames, exposure_ms=exposure, gain_db=gain, defocus_um=request.defocus_um,
        progress=progress,
    )
    t_s = scope.clock.now()
    pos = await scope.position()
    method = "blank field, averaged" + (f", defocused {request.defocus_um:g} um" if request.defocus_um else "")
    path = await asyncio.to_thread(
        store.save_flat, profile, image, exposure_ms=exposure, gain_db=gain, frames=request.frames,
        bit_depth=profile.camera.bit_depth, method=method, acquired_t_s=t_s,
        extra={"position_um": _position_meta(pos), "where": where},
    )
    return Taken("flat", path, image, exposure, gain, request.frames, t_s, pos,
                 await asyncio.to_thread(_quality, path), dark=dark)
