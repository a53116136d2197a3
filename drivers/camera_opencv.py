"""UVC/V4L2 cameras through OpenCV's VideoCapture.

What this driver adds to a bare VideoCapture:

* **Manual exposure and gain where the camera allows.** On the V4L2 back end automatic
  exposure is switched off (``V4L2_EXPOSURE_MANUAL`` = 1) and the exposure is written to
  ``V4L2_CID_EXPOSURE_ABSOLUTE``, which the kernel documents in 100 µs units: the value
  sent is ``round(exposure_ms × 10)`` (20 ms -> 200), at least 1 (0.1 ms). Every control is
  read back after it is written; ``describe()`` reports which ones the camera accepted and
  which actually took effect. UVC gain has no standard unit, so the gain number is sent
  to the camera as-is and reported as device units; measure the real gain with the
  photon-transfer characterisation. On other back ends the exposure units differ, so
  exposure is left to the camera and ``describe()`` says so.
* **Automatic white balance off** where the V4L2 back end takes it (``CAP_PROP_AUTO_WB``
  = 0): a colour camera's white balance feeds the luma, so automatic white balance would
  make brightness drift between time points.
* **What the camera offers** (:meth:`OpenCVCamera.probe`, for ``check --probe``): formats,
  frame sizes and controls from ``v4l2-ctl`` (:mod:`drivers.camera_probe`), or, without
  it, what the controls set at open showed.
* **No stale frames.** Cameras queue frames in driver buffers; after a stage move the
  queued ones show the old position. Every grab first discards ``flush_frames`` frames
  with ``grab()`` and then retrieves the next one. The V4L2 buffer queue is also asked
  to shrink to one buffer where the back end allows.
* **Reconnect after an unplug.** A failed read closes the device and reopens it with
  exponential back-off (0.1 s, doubling, each wait at most ``reconnect_max_s``); when the
  longest wait has been tried and failed the grab raises a one-line CameraError. The
  next grab starts a new round, so the daemon can keep trying at each time point.
* **Off the event loop.** Every VideoCapture call runs in a worker thread
  (``asyncio.to_thread``), and one lock makes sure only one thread touches the capture.

The capture factory is injectable (``capture_factory``) so the logic can be exercised
without hardware.
"""

from __future__ import annotations

import asyncio
import dataclasses
import os
import sys
import threading
from collections.abc import Callable
from typing import Protocol

import cv2
import numpy as np

from drivers.base import CameraError, Frame
from drivers.camera_common import check_exposure_ms, check_gain_db, delivered_bit_depth, to_mono
from drivers.camera_probe import CameraOffer, profile_warnings, run_v4l2_ctl, v4l2_offer
from drivers.clock import Clock, WallClock
from drivers.options import option
from drivers.registry import CameraContext, CameraDriver
from drivers.sections import CameraSection, driver_options

FIRST_RETRY_S = 0.1
V4L2_EXPOSURE_STEP_MS = 0.1  # V4L2_CID_EXPOSURE_ABSOLUTE counts 100 µs units (kernel camera control reference)
V4L2_EXPOSURE_MANUAL = 1  # enum v4l2_exposure_auto_type
# Some OpenCV builds map CAP_PROP_AUTO_EXPOSURE through a 0..1 range where 0.25 means manual.
LEGACY_MANUAL_EXPOSURE = 0.25


@dataclasses.dataclass(frozen=True, kw_only=True)
class OpenCVOptions:
    device: str = option("0", doc="OpenCV device index or /dev/video path")
    reconnect_max_s: float = option(
        30.0, doc="longest wait between reconnection attempts after an unplug", min=0.1, max=3600.0, unit="s"
    )


class CaptureLike(Protocol):
    """The part of ``cv2.VideoCapture`` this driver uses."""

    def isOpened(self) -> bool: ...

    def set(self, prop_id: int, value: float) -> bool: ...

    def get(self, prop_id: int) -> float: ...

    def grab(self) -> bool: ...

    def retrieve(self) -> tuple[bool, np.ndarray | None]: ...

    def release(self) -> None: ...


CaptureFactory = Callable[[int | str, int], CaptureLike]


def default_capture_factory(source: int | str, api_preference: int) -> CaptureLike:
    return cv2.VideoCapture(source, api_preference)


def parse_device(device: str) -> tuple[int | str, int]:
    """``"0"`` -> (0, CAP_ANY); a /dev path on Linux -> (path, CAP_V4L2); anything else as given."""
    text = device.strip()
    if text.isdigit():
        return int(text), cv2.CAP_ANY
    if sys.platform.startswith("linux") and text.startswith("/dev/"):
        return text, cv2.CAP_V4L2
    return text, cv2.CAP_ANY


def exposure_ms_to_v4l2(exposure_ms: float) -> int:
    """Exposure in ms to the V4L2 absolute exposure value (100 µs units), at least 1."""
    return max(1, round(exposure_ms / V4L2_EXPOSURE_STEP_MS))


def v4l2_to_exposure_ms(value: float) -> float:
    return float(value) * V4L2_EXPOSURE_STEP_MS


@dataclasses.dataclass
class ControlState:
    """What happened to one camera control: asked for, accepted, read back, in effect."""

    requested: float | None = None
    sent: float | None = None
    accepted: bool = False
    readback: float | None = None
    effective: bool = False
    note: str = ""

    def as_dict(self) -> dict[str, object]:
        return dataclasses.asdict(self)


class _ReadFailed(Exception):
    """The capture stopped delivering (unplugged, device gone, end of a file)."""


class OpenCVCamera:
    def __init__(
        self,
        camera: CameraSection,
        *,
        clock: Clock | None = None,
        capture_factory: CaptureFactory | None = None,
    ) -> None:
        self._cfg = camera
        self._opts = driver_options(camera, OpenCVOptions)
        self._clock: Clock = clock or WallClock()
        self._factory: CaptureFactory = capture_factory or default_capture_factory
        self._source, self._api = parse_device(self._opts.device)
        self._cap: CaptureLike | None = None
        self._io_lock = threading.Lock()  # one thread at a time on the VideoCapture
        self._grab_lock: asyncio.Lock | None = None
        self._closed = True
        self._exposure_ms = check_exposure_ms(camera.exposure_ms, driver="opencv")
        self._gain_db = check_gain_db(camera.gain_db, driver="opencv")
        self._backend = ""
        self._delivered: tuple[int, int] | None = None  # (width, height)
        self._bit_depth: int | None = None
        self._source_format = ""
        self._controls: dict[str, ControlState] = {}
        self._reconnects = 0
        self._failed_rounds = 0

    # ---------------------------------------------------------------- public API

    async def open(self) -> None:
        await asyncio.to_thread(self._open_blocking)
        self._grab_lock = asyncio.Lock()
        self._closed = False

    async def close(self) -> None:
        self._closed = True
        await asyncio.to_thread(self._release_blocking)

    async def grab(self) -> Frame:
        if self._grab_lock is None or self._closed:
            raise CameraError(f"camera {self._opts.device} is not open; open it before grabbing")
        async with self._grab_lock:
            try:
                return await asyncio.to_thread(self._grab_blocking)
            except _ReadFailed:
                return await self._reconnect()

    async def set_exposure_ms(self, exposure_ms: float) -> None:
        value = check_exposure_ms(exposure_ms, driver="opencv")
        if value == self._exposure_ms and "exposure" in self._controls:
            return
        self._exposure_ms = value
        await asyncio.to_thread(self._locked, self._apply_exposure)

    async def set_gain_db(self, gain_db: float) -> None:
        value = check_gain_db(gain_db, driver="opencv")
        if value == self._gain_db and "gain" in self._controls:
            return
        self._gain_db = value
        await asyncio.to_thread(self._locked, self._apply_gain)

    def describe(self) -> dict[str, object]:
        width, height = self._delivered or (None, None)
        return {
            "driver": "opencv",
            "device": self._opts.device,
            "backend": self._backend or None,
            "open": self._cap is not None,
            "resolution": {"width_px": width, "height_px": height},
            "requested_resolution": {"width_px": self._cfg.width_px, "height_px": self._cfg.height_px},
            "bit_depth": self._bit_depth,
            "source_format": self._source_format or None,
            "flush_frames": self._cfg.flush_frames,
            "exposure_ms": self._exposure_ms,
            "gain_db": self._gain_db,
            "gain_units": "device units (UVC gain has no standard scale)",
            "controls": {name: state.as_dict() for name, state in self._controls.items()},
            "reconnects": self._reconnects,
            "reconnect_rounds_failed": self._failed_rounds,
        }

    async def probe(self) -> dict[str, object]:
        """What the camera offers (formats, sizes, manual controls), with warnings for a time-lapse."""
        listings = await asyncio.to_thread(run_v4l2_ctl, self._opts.device)
        if isinstance(listings, str):
            offer = self._offer_from_controls(listings)
        else:
            offer = v4l2_offer(*listings)
        cfg = self._cfg
        offer.warnings += profile_warnings(offer, width_px=cfg.width_px, height_px=cfg.height_px, bit_depth=cfg.bit_depth)
        return offer.as_dict()

    def _offer_from_controls(self, why: str) -> CameraOffer:
        """Without v4l2-ctl: what setting the controls at open showed (OpenCV properties)."""
        controls = self._controls

        def took(name: str) -> bool | None:
            state = controls.get(name)
            return None if state is None or not state.accepted else state.effective

        ae_off, awb_off = took("auto_exposure_off"), took("auto_white_balance_off")
        warnings = [why]
        if ae_off is False or (self._backend == "V4L2" and ae_off is None):
            warnings.append("automatic exposure could not be turned off; brightness will drift between time points")
        if awb_off is False:
            warnings.append("automatic white balance could not be turned off")
        return CameraOffer(
            source="OpenCV properties",
            formats=[],
            manual_exposure=bool(took("exposure")),
            manual_gain=bool(took("gain")),
            auto_exposure_can_be_off=ae_off,
            auto_white_balance_can_be_off=awb_off,
            controls={},
            warnings=warnings,
        )

    # ---------------------------------------------------------- blocking helpers

    def _locked(self, fn: Callable[[], None]) -> None:
        with self._io_lock:
            if self._cap is not None:
                fn()

    def _not_found(self) -> CameraError:
        return CameraError(f"camera {self._opts.device} not found; is it plugged in? check `device` in [camera]")

    def _open_blocking(self) -> None:
        with self._io_lock:
            self._release_unlocked()
            if isinstance(self._source, str) and self._source.startswith("/dev/") and not os.path.exists(self._source):
                raise self._not_found()
            cap = self._factory(self._source, self._api)
            if not cap.isOpened():
                cap.release()
                if isinstance(self._source, str) and os.path.exists(self._source):
                    raise CameraError(
                        f"camera {self._opts.device} exists but could not be opened; is another program "
                        "using it, or does this user lack permission (the 'video' group)?"
                    )
                raise self._not_found()
            self._cap = cap
            backend_name = getattr(cap, "getBackendName", None)
            try:
                self._backend = str(backend_name()) if backend_name else "unknown"
            except cv2.error:
                self._backend = "unknown"
            self._controls = {}
            self._configure_format()
            self._apply_exposure()
            self._apply_gain()
            self._apply_white_balance()
            # One frame now tells what the camera really delivers (size, depth, colour).
            try:
                pixels = self._read_one()
            except _ReadFailed:
                self._release_unlocked()
                raise CameraError(
                    f"camera {self._opts.device} opened but delivered no frame; check the cable and "
                    "that the camera supports the requested width_px/height_px in [camera]"
                ) from None
            self._note_delivered(pixels)

    def _note_delivered(self, pixels: np.ndarray) -> None:
        self._delivered = (int(pixels.shape[1]), int(pixels.shape[0]))
        self._bit_depth = delivered_bit_depth(pixels, self._cfg.bit_depth)

    def _set_and_read(self, name: str, prop: int, value: float, *, tolerance: float = 0.5) -> ControlState:
        assert self._cap is not None
        state = ControlState(requested=value, sent=value)
        try:
            state.accepted = bool(self._cap.set(prop, value))
            readback = float(self._cap.get(prop))
        except cv2.error as exc:
            state.note = f"OpenCV refused: {exc.msg if hasattr(exc, 'msg') else exc}"
            self._controls[name] = state
            return state
        state.readback = readback
        state.effective = state.accepted and abs(readback - value) <= tolerance
        self._controls[name] = state
        return state

    def _configure_format(self) -> None:
        assert self._cap is not None
        if self._cfg.bit_depth > 8:
            # Raw 16-bit grey needs RGB conversion off; many UVC cameras do not offer it.
            self._set_and_read("pixel_format_y16", cv2.CAP_PROP_FOURCC, float(cv2.VideoWriter_fourcc(*"Y16 ")))
            self._set_and_read("convert_rgb_off", cv2.CAP_PROP_CONVERT_RGB, 0.0)
        self._set_and_read("width_px", cv2.CAP_PROP_FRAME_WIDTH, float(self._cfg.width_px))
        self._set_and_read("height_px", cv2.CAP_PROP_FRAME_HEIGHT, float(self._cfg.height_px))
        if self._backend == "V4L2":
            self._set_and_read("buffer_size_1", cv2.CAP_PROP_BUFFERSIZE, 1.0)

    def _apply_exposure(self) -> None:
        if self._backend != "V4L2":
            self._controls["exposure"] = ControlState(
                requested=self._exposure_ms,
                note=f"exposure units on the {self._backend or 'unknown'} back end are not known; left to the camera",
            )
            return
        auto = self._set_and_read("auto_exposure_off", cv2.CAP_PROP_AUTO_EXPOSURE, float(V4L2_EXPOSURE_MANUAL))
        if not auto.effective:
            legacy = self._set_and_read(
                "auto_exposure_off", cv2.CAP_PROP_AUTO_EXPOSURE, LEGACY_MANUAL_EXPOSURE, tolerance=0.01
            )
            if not legacy.effective:
                legacy.note = "the camera kept automatic exposure; exposure_ms may be ignored"
        sent = exposure_ms_to_v4l2(self._exposure_ms)
        state = self._set_and_read("exposure", cv2.CAP_PROP_EXPOSURE, float(sent))
        state.requested = self._exposure_ms
        state.note = "sent in V4L2 units of 100 µs"

    def _apply_white_balance(self) -> None:
        if self._backend != "V4L2":
            return
        state = self._set_and_read("auto_white_balance_off", cv2.CAP_PROP_AUTO_WB, 0.0)
        if not state.accepted:
            state.note = "not taken: no automatic white balance (a monochrome camera) or it cannot be turned off"

    def _apply_gain(self) -> None:
        state = self._set_and_read("gain", cv2.CAP_PROP_GAIN, self._gain_db)
        state.note = "device units"

    def _actual_exposure_ms(self) -> float:
        state = self._controls.get("exposure")
        if state is not None and state.effective and state.readback is not None:
            return v4l2_to_exposure_ms(state.readback)
        return self._exposure_ms

    def _grab_raw(self) -> None:
        assert self._cap is not None
        try:
            ok = self._cap.grab()
        except cv2.error:
            ok = False  # some back ends raise instead of returning False when the device vanishes
        if not ok:
            raise _ReadFailed

    def _read_one(self) -> np.ndarray:
        assert self._cap is not None
        self._grab_raw()
        try:
            ok, image = self._cap.retrieve()
        except cv2.error:
            ok, image = False, None
        if not ok or image is None or image.size == 0:
            raise _ReadFailed
        return self._to_pixels(image)

    def _to_pixels(self, image: np.ndarray) -> np.ndarray:
        width, height = self._cfg.width_px, self._cfg.height_px
        if self._cap is not None and self._cfg.bit_depth > 8:
            width = int(self._cap.get(cv2.CAP_PROP_FRAME_WIDTH)) or width
            height = int(self._cap.get(cv2.CAP_PROP_FRAME_HEIGHT)) or height
        if image.dtype == np.uint8 and image.ndim == 2 and image.shape[0] == 1 and image.size == width * height * 2:
            # With RGB conversion off, OpenCV hands Y16 over as one row of raw bytes (little-endian).
            self._source_format = "Y16 raw"
            return image.view("<u2").reshape(height, width).astype(np.uint16, copy=False)
        channels = 1 if image.ndim == 2 else image.shape[2]
        self._source_format = {1: "mono", 2: "YUYV (luma kept)", 3: "BGR (to luma)", 4: "BGRA (to luma)"}.get(
            channels, f"{channels} channels"
        )
        return to_mono(image, channel_order="bgr", source=f"camera {self._opts.device}")

    def _grab_blocking(self) -> Frame:
        with self._io_lock:
            if self._cap is None:
                raise _ReadFailed
            for _ in range(self._cfg.flush_frames):
                self._grab_raw()
            pixels = self._read_one()
            t_s = self._clock.now()
            self._note_delivered(pixels)
            return Frame(
                pixels=pixels,
                t_s=t_s,
                exposure_ms=self._actual_exposure_ms(),
                gain_db=self._gain_db,
                bit_depth=delivered_bit_depth(pixels, self._cfg.bit_depth),
            )

    def _release_unlocked(self) -> None:
        if self._cap is not None:
            try:
                self._cap.release()
            finally:
                self._cap = None

    def _release_blocking(self) -> None:
        with self._io_lock:
            self._release_unlocked()

    async def _reconnect(self) -> Frame:
        """Reopen with exponential back-off; a frame on success, CameraError when out of tries."""
        await asyncio.to_thread(self._release_blocking)
        max_wait_s = self._opts.reconnect_max_s
        delay_s = min(FIRST_RETRY_S, max_wait_s)
        waited_s = 0.0
        attempts = 0
        last_problem = "no frame"
        while not self._closed:
            await self._clock.sleep(delay_s)
            waited_s += delay_s
            attempts += 1
            try:
                await asyncio.to_thread(self._open_blocking)
                frame = await asyncio.to_thread(self._grab_blocking)
            except CameraError as exc:
                # Keep the reason, drop the advice: the final message gives its own.
                last_problem = str(exc).split(";")[0].removeprefix(f"camera {self._opts.device} ")
            except _ReadFailed:
                last_problem = "opened again but delivered no frame"
                await asyncio.to_thread(self._release_blocking)
            else:
                self._reconnects += 1
                return frame
            if delay_s >= max_wait_s:
                break
            delay_s = min(delay_s * 2.0, max_wait_s)
        if self._closed:
            raise CameraError(f"camera {self._opts.device} was closed while reconnecting")
        self._failed_rounds += 1
        raise CameraError(
            f"camera {self._opts.device} stopped delivering frames and did not come back after "
            f"{attempts} attempts over {waited_s:.1f} s (last try: {last_problem}); "
            "is it plugged in? check the cable and `device` in [camera]"
        )


def open_camera(ctx: CameraContext) -> OpenCVCamera:
    return OpenCVCamera(ctx.profile.camera, clock=ctx.clock)


DRIVER = CameraDriver(
    name="opencv",
    summary="UVC/V4L2 camera through OpenCV (USB cameras, /dev/video devices)",
    options=OpenCVOptions,
    open=open_camera,
)
