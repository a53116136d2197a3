"""The ribbon-cable camera of single-board computers, through the ``picamera2`` library.

``picamera2`` is imported inside :meth:`BoardCamera.open` only, so the package imports
(and every other driver works) on machines without it.

* **Mono from the main stream.** The main stream is configured as YUV420, whose first
  plane is already luma: the frame is that plane, cut to the configured width (rows can
  carry padding up to the stride). No colour conversion is needed.
* **Manual exposure and gain.** Automatic exposure (and white balance, where the sensor
  has colour) is switched off; ``ExposureTime`` is set in µs and ``AnalogueGain`` as a
  factor, 10^(dB/20). Limits are the profile's, narrowed to the sensor's own range from
  ``camera_controls``. Each frame reports the exposure and gain the sensor actually used
  (from the request metadata), not merely what was asked for.
* **No stale frames.** Every grab notes the time it started and throws away frames whose
  ``SensorTimestamp`` (start of exposure, boot-time clock in ns) is earlier, and after a
  change of exposure or gain also those not yet taken with the new settings (bounded).
  Without timestamps it discards ``flush_frames`` frames instead.
* **What the camera offers** (:meth:`BoardCamera.probe`, for ``check --probe``): the
  sensor modes and the control table, read when the camera opens
  (:func:`drivers.camera_probe.board_offer`).
"""

from __future__ import annotations

import asyncio
import dataclasses
import threading
import time
from typing import Any

import numpy as np

from drivers.base import CameraError, Frame
from drivers.camera_common import (
    amplitude_factor_to_db,
    check_exposure_ms,
    check_gain_db,
    db_to_amplitude_factor,
    to_mono,
)
from drivers.camera_probe import board_offer, profile_warnings
from drivers.clock import Clock, WallClock
from drivers.registry import CameraContext, CameraDriver
from drivers.sections import CameraSection

MISSING_LIBRARY = (
    "board camera support is not installed: pip install 'phasewatch[board]' (needs the board's camera stack)"
)
MAIN_FORMAT = "YUV420"
# Frames to wait for new exposure/gain to show up in the metadata (sensors apply controls
# a few frames late) before a frame is taken anyway with whatever it reports.
SETTLE_FRAMES_MAX = 12
EXPOSURE_TOLERANCE = 0.05  # relative; the sensor rounds exposure to whole lines
GAIN_TOLERANCE = 0.05  # relative; analogue gain comes in discrete codes
MAX_DISCARDS_PER_GRAB = 64  # about two seconds of frames: far more than the queue can hold


def boot_time_ns() -> int:
    """Now on the clock libcamera stamps frames with (boot time; monotonic where absent)."""
    clock_id = getattr(time, "CLOCK_BOOTTIME", time.CLOCK_MONOTONIC)
    return time.clock_gettime_ns(clock_id)


def main_stream_to_mono(array: np.ndarray, fmt: str, width: int, height: int) -> np.ndarray:
    """2-D uint8 luma from a picamera2 main-stream array of format ``fmt``.

    YUV420/YVU420 arrays are (1.5 × height, stride) with the Y plane first. picamera2's
    "RGB888" and "XRGB8888" are blue-first in memory, "BGR888" and "XBGR8888" red-first.
    """
    if fmt in ("YUV420", "YVU420"):
        if array.ndim != 2 or array.shape[0] < height or array.shape[1] < width:
            raise CameraError(f"board camera: {fmt} buffer has shape {array.shape}, too small for {width}x{height}")
        return np.ascontiguousarray(array[:height, :width])
    order = {"RGB888": "bgr", "XRGB8888": "bgr", "BGR888": "rgb", "XBGR8888": "rgb"}.get(fmt)
    if order is None:
        raise CameraError(f"board camera: main stream format {fmt!r} is not supported; use {MAIN_FORMAT}")
    return to_mono(array, channel_order=order, source="board camera")


@dataclasses.dataclass(frozen=True, kw_only=True)
class BoardOptions:
    """The board camera needs nothing beyond the common [camera] options."""


class BoardCamera:
    def __init__(self, camera: CameraSection, *, clock: Clock | None = None, camera_num: int = 0) -> None:
        self._cfg = camera
        self._clock: Clock = clock or WallClock()
        self._camera_num = camera_num
        self._cam: Any = None
        self._io_lock = threading.Lock()
        self._exposure_ms = check_exposure_ms(camera.exposure_ms, driver="board")
        self._gain_db = check_gain_db(camera.gain_db, driver="board")
        self._exposure_range_ms: tuple[float, float] | None = None
        self._gain_range_db: tuple[float, float] | None = None
        self._size: tuple[int, int] | None = None
        self._stride_format = MAIN_FORMAT
        self._model = ""
        self._controls_pending = False
        self._has_colour_gains = False
        self._last_metadata: dict[str, Any] = {}
        self._discarded_total = 0
        self._camera_controls: dict[str, Any] = {}
        self._sensor_modes: list[dict[str, Any]] = []

    # ---------------------------------------------------------------- public API

    async def open(self) -> None:
        await asyncio.to_thread(self._open_blocking)

    async def close(self) -> None:
        await asyncio.to_thread(self._close_blocking)

    async def grab(self) -> Frame:
        if self._cam is None:
            raise CameraError("board camera is not open; open it before grabbing")
        started_ns = boot_time_ns()
        return await asyncio.to_thread(self._grab_blocking, started_ns)

    async def set_exposure_ms(self, exposure_ms: float) -> None:
        lo, hi = self._exposure_range_ms or (None, None)
        value = check_exposure_ms(exposure_ms, driver="board", lo_ms=lo, hi_ms=hi)
        if value != self._exposure_ms:
            self._exposure_ms = value
            await asyncio.to_thread(self._apply_controls)

    async def set_gain_db(self, gain_db: float) -> None:
        lo, hi = self._gain_range_db or (None, None)
        value = check_gain_db(gain_db, driver="board", lo_db=lo, hi_db=hi)
        if value != self._gain_db:
            self._gain_db = value
            await asyncio.to_thread(self._apply_controls)

    def describe(self) -> dict[str, object]:
        width, height = self._size or (None, None)
        md = self._last_metadata
        actual_exposure_ms = md["ExposureTime"] / 1000.0 if "ExposureTime" in md else None
        actual_gain_db = amplitude_factor_to_db(md["AnalogueGain"]) if md.get("AnalogueGain", 0) > 0 else None
        return {
            "driver": "board",
            "device": f"board camera {self._camera_num}" + (f" ({self._model})" if self._model else ""),
            "open": self._cam is not None,
            "resolution": {"width_px": width, "height_px": height},
            "requested_resolution": {"width_px": self._cfg.width_px, "height_px": self._cfg.height_px},
            "bit_depth": 8,
            "source_format": f"{self._stride_format} (luma plane)",
            "exposure_ms": self._exposure_ms,
            "gain_db": self._gain_db,
            "controls": {
                "exposure": {
                    "supported": self._exposure_range_ms is not None,
                    "range_ms": self._exposure_range_ms,
                    "actual_ms": actual_exposure_ms,
                    "effective": actual_exposure_ms is not None
                    and abs(actual_exposure_ms - self._exposure_ms) <= EXPOSURE_TOLERANCE * self._exposure_ms,
                },
                "gain": {
                    "supported": self._gain_range_db is not None,
                    "range_db": self._gain_range_db,
                    "factor": db_to_amplitude_factor(self._gain_db),
                    "actual_db": actual_gain_db,
                    "effective": actual_gain_db is not None
                    and abs(md["AnalogueGain"] - db_to_amplitude_factor(self._gain_db))
                    <= GAIN_TOLERANCE * db_to_amplitude_factor(self._gain_db),
                },
                "auto_white_balance_off": self._has_colour_gains,
            },
            "frames_discarded": self._discarded_total,
        }

    async def probe(self) -> dict[str, object]:
        """What the camera offers (sensor modes, manual controls), with warnings for a time-lapse."""
        if self._cam is None:
            raise CameraError("board camera is not open; open it before probing")
        offer = board_offer(self._camera_controls, self._sensor_modes)
        if not self._sensor_modes:
            offer.warnings.append("the camera library listed no sensor modes")
        cfg = self._cfg
        offer.warnings += profile_warnings(
            offer, width_px=cfg.width_px, height_px=cfg.height_px, bit_depth=cfg.bit_depth, scaled=True
        )
        return offer.as_dict()

    # ---------------------------------------------------------- blocking helpers

    def _open_blocking(self) -> None:
        try:
            from picamera2 import Picamera2  # optional: only on boards with the camera stack
        except ImportError:
            raise CameraError(MISSING_LIBRARY) from None
        with self._io_lock:
            if self._cam is not None:
                return
            try:
                cam = Picamera2(self._camera_num)
            except Exception as exc:  # the library raises IndexError/RuntimeError when nothing is attached
                raise CameraError(
                    f"board camera {self._camera_num} not found ({type(exc).__name__}: {exc}); check the ribbon "
                    "cable and that the camera is enabled on the board"
                ) from None
            try:
                # Listing the modes reconfigures the sensor: only while it is not running.
                self._sensor_modes = [dict(m) for m in getattr(cam, "sensor_modes", None) or []]
            except Exception:  # some sensors cannot list their modes; the report says so
                self._sensor_modes = []
            try:
                config = cam.create_video_configuration(
                    main={"size": (self._cfg.width_px, self._cfg.height_px), "format": MAIN_FORMAT}
                )
                cam.configure(config)
                main = cam.camera_configuration()["main"]
                self._size = (int(main["size"][0]), int(main["size"][1]))
                self._stride_format = str(main.get("format", MAIN_FORMAT))
                self._read_limits(cam.camera_controls)
                self._camera_controls = dict(cam.camera_controls)
                # The profile's defaults must suit this sensor too, or the error says what does.
                lo, hi = self._exposure_range_ms or (None, None)
                check_exposure_ms(self._exposure_ms, driver="board", lo_ms=lo, hi_ms=hi)
                lo, hi = self._gain_range_db or (None, None)
                check_gain_db(self._gain_db, driver="board", lo_db=lo, hi_db=hi)
                self._model = str(getattr(cam, "camera_properties", {}).get("Model", ""))
                self._cam = cam
                self._apply_controls_unlocked()
                cam.start()
            except Exception as exc:
                self._cam = None
                self._shutdown_unlocked(cam)
                if isinstance(exc, CameraError):
                    raise
                raise CameraError(
                    f"board camera could not be configured for {self._cfg.width_px}x{self._cfg.height_px} "
                    f"({type(exc).__name__}: {exc}); check width_px/height_px in [camera]"
                ) from None

    def _read_limits(self, controls: dict[str, Any]) -> None:
        if "ExposureTime" in controls:
            lo_us, hi_us = controls["ExposureTime"][:2]
            self._exposure_range_ms = (float(lo_us) / 1000.0, float(hi_us) / 1000.0)
        if "AnalogueGain" in controls:
            lo_f, hi_f = controls["AnalogueGain"][:2]
            self._gain_range_db = (amplitude_factor_to_db(max(float(lo_f), 1e-6)), amplitude_factor_to_db(float(hi_f)))
        self._has_colour_gains = "ColourGains" in controls

    def _requested_controls(self) -> dict[str, Any]:
        controls: dict[str, Any] = {
            "AeEnable": False,
            "ExposureTime": int(round(self._exposure_ms * 1000.0)),
            "AnalogueGain": db_to_amplitude_factor(self._gain_db),
        }
        if self._has_colour_gains:
            # Luma depends on the colour gains; automatic white balance would drift day to day.
            controls["AwbEnable"] = False
        return controls

    def _apply_controls_unlocked(self) -> None:
        if self._cam is None:
            return
        self._cam.set_controls(self._requested_controls())
        self._controls_pending = True

    def _apply_controls(self) -> None:
        with self._io_lock:
            self._apply_controls_unlocked()

    def _settled(self, md: dict[str, Any]) -> bool:
        want = self._requested_controls()
        exposure_us = md.get("ExposureTime")
        gain = md.get("AnalogueGain")
        if exposure_us is None or gain is None:
            return True  # nothing to compare against: trust the request
        return (
            abs(exposure_us - want["ExposureTime"]) <= EXPOSURE_TOLERANCE * want["ExposureTime"]
            and abs(gain - want["AnalogueGain"]) <= GAIN_TOLERANCE * want["AnalogueGain"]
        )

    def _discard_reason(self, md: dict[str, Any], started_ns: int, discards: int, settle_waits: int) -> str | None:
        stamp = md.get("SensorTimestamp")
        if stamp is None:
            return "untimed flush" if discards < self._cfg.flush_frames else None
        if stamp < started_ns:
            return "exposed before the request"
        if self._controls_pending and settle_waits < SETTLE_FRAMES_MAX and not self._settled(md):
            return "new exposure/gain not yet in effect"
        return None

    def _grab_blocking(self, started_ns: int) -> Frame:
        with self._io_lock:
            if self._cam is None:
                raise CameraError("board camera is not open; open it before grabbing")
            assert self._size is not None
            width, height = self._size
            discards = 0
            settle_waits = 0
            while True:
                request = self._cam.capture_request()
                try:
                    md = dict(request.get_metadata())
                    reason = self._discard_reason(md, started_ns, discards, settle_waits)
                    if reason is None:
                        pixels = main_stream_to_mono(request.make_array("main"), self._stride_format, width, height)
                finally:
                    request.release()
                if reason is None:
                    break
                discards += 1
                self._discarded_total += 1
                settle_waits += reason.startswith("new exposure")
                if discards >= MAX_DISCARDS_PER_GRAB:
                    raise CameraError(
                        f"board camera delivered {discards} unusable frames in a row ({reason}); "
                        "check the board's camera stack and restart the daemon"
                    )
            self._controls_pending = False
            self._last_metadata = md
            exposure_ms = md["ExposureTime"] / 1000.0 if "ExposureTime" in md else self._exposure_ms
            gain = md.get("AnalogueGain")
            gain_db = amplitude_factor_to_db(gain) if gain and gain > 0 else self._gain_db
            return Frame(pixels=pixels, t_s=self._clock.now(), exposure_ms=exposure_ms, gain_db=gain_db, bit_depth=8)

    def _shutdown_unlocked(self, cam: Any) -> None:
        for step in ("stop", "close"):
            try:
                getattr(cam, step)()
            except Exception:  # best effort: the camera may already be gone
                pass

    def _close_blocking(self) -> None:
        with self._io_lock:
            if self._cam is not None:
                cam, self._cam = self._cam, None
                self._shutdown_unlocked(cam)


def open_camera(ctx: CameraContext) -> BoardCamera:
    return BoardCamera(ctx.profile.camera, clock=ctx.clock)


DRIVER = CameraDriver(
    name="board",
    summary="a single-board computer's ribbon-cable camera module (needs the board extra)",
    options=BoardOptions,
    open=open_camera,
)
