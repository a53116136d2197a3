"""The real camera drivers: OpenCV/V4L2, replay of image folders, and the board camera.

No camera hardware here: the OpenCV driver is exercised with a real ``cv2.VideoCapture``
on an MJPG video written into tmp_path and with a fake capture for controls, unplugs and
flush counting; the board camera with a fake ``picamera2`` module.
"""

from __future__ import annotations

import asyncio
import dataclasses
import subprocess
import sys
import threading
import time
import types
from pathlib import Path
from typing import Any

import cv2
import numpy as np
import pytest
import tifffile

from drivers.base import Camera, CameraError
from drivers.camera_board import MISSING_LIBRARY, BoardCamera, boot_time_ns, main_stream_to_mono
from drivers.camera_common import (
    amplitude_factor_to_db,
    check_exposure_ms,
    check_gain_db,
    db_to_amplitude_factor,
    to_mono,
)
from drivers.camera_opencv import OpenCVCamera, OpenCVOptions, exposure_ms_to_v4l2, parse_device, v4l2_to_exposure_ms
from drivers.camera_replay import ReplayCamera, ReplayOptions
from drivers.sections import CameraSection


class VirtualClock:
    """A clock whose sleeps pass instantly (and are recorded), so back-off and pacing are exact."""

    speed = 1.0

    def __init__(self, start_s: float = 1_772_442_000.0) -> None:
        self.t = start_s
        self.sleeps: list[float] = []

    def now(self) -> float:
        return self.t

    async def sleep(self, seconds: float) -> None:
        self.sleeps.append(seconds)
        self.t += max(0.0, seconds)
        await asyncio.sleep(0)


def bt601_luma(r: float, g: float, b: float) -> float:
    # ITU-R BT.601 luma weights, as OpenCV documents for cvtColor RGB->GRAY.
    return 0.299 * r + 0.587 * g + 0.114 * b


def cam_section(**changes: Any) -> CameraSection:
    """An opencv [camera]: common options and the driver's own (device, reconnect_max_s) together."""
    base = {"driver": "opencv", "device": "3", "width_px": 64, "height_px": 48, "flush_frames": 2}
    base.update(changes)
    own = {name: base.pop(name) for name in ("device", "reconnect_max_s") if name in base}
    return CameraSection(**base, options=OpenCVOptions(**own))


# ------------------------------------------------------------------------ common


def test_decibel_conversion_is_amplitude_decibels() -> None:
    # Amplitude (field-quantity) decibels: G_dB = 20·log10(factor), ISO 80000-3 / IEC 60027-3
    # (from memory). 20·log10(2) = 6.0206 dB; 20 dB is a factor of 10.
    assert db_to_amplitude_factor(0.0) == pytest.approx(1.0)
    assert db_to_amplitude_factor(6.0206) == pytest.approx(2.0, rel=1e-4)
    assert db_to_amplitude_factor(20.0) == pytest.approx(10.0)
    assert amplitude_factor_to_db(16.0) == pytest.approx(24.0824, abs=1e-4)
    for db in (0.0, 3.5, 12.0, 47.9):
        assert amplitude_factor_to_db(db_to_amplitude_factor(db)) == pytest.approx(db)


def test_colour_to_mono_uses_bt601_luma_in_both_channel_orders() -> None:
    r, g, b = 50, 100, 200
    bgr = np.full((4, 5, 3), (b, g, r), np.uint8)
    rgb = np.full((4, 5, 3), (r, g, b), np.uint8)
    expected = bt601_luma(r, g, b)  # 96.45
    assert to_mono(bgr, channel_order="bgr").shape == (4, 5)
    assert abs(int(to_mono(bgr, channel_order="bgr")[0, 0]) - expected) <= 0.5
    assert abs(int(to_mono(rgb, channel_order="rgb")[0, 0]) - expected) <= 0.5
    bgra = np.dstack([bgr, np.full((4, 5), 255, np.uint8)])
    assert abs(int(to_mono(bgra, channel_order="bgr")[0, 0]) - expected) <= 0.5
    deep = to_mono((bgr.astype(np.uint16) * 100), channel_order="bgr")
    assert deep.dtype == np.uint16 and abs(int(deep[0, 0]) - expected * 100) <= 1
    with pytest.raises(CameraError, match="float32"):
        to_mono(np.zeros((4, 5), np.float32))


def test_exposure_and_gain_limits_name_what_is_allowed() -> None:
    assert check_exposure_ms(20, driver="opencv") == 20.0
    with pytest.raises(CameraError, match=r"use 0\.01 to 10000 ms"):
        check_exposure_ms(0.001, driver="opencv")
    with pytest.raises(CameraError, match=r"use 0\.01 to 10000 ms"):
        check_exposure_ms(float("nan"), driver="opencv")
    with pytest.raises(CameraError, match=r"use 0 to 48 dB"):
        check_gain_db(-1.0, driver="replay")
    with pytest.raises(CameraError, match=r"use 0 to 24 dB"):
        check_gain_db(30.0, driver="board", hi_db=24.0)


# ------------------------------------------------------------------- OpenCV: real capture

# Uniform colour frames (B, G, R): luma steps of ~20 are far apart from MJPEG error.
VIDEO_COLOURS = [(10 + 25 * i, 20 + 22 * i, 30 + 20 * i) for i in range(8)]


def write_mjpg_video(path: Path, width: int = 64, height: int = 48) -> list[float]:
    writer = cv2.VideoWriter(str(path), cv2.VideoWriter_fourcc(*"MJPG"), 10.0, (width, height))
    assert writer.isOpened(), "OpenCV in this environment cannot write MJPG .avi files"
    for colour in VIDEO_COLOURS:
        writer.write(np.full((height, width, 3), colour, np.uint8))
    writer.release()
    return [bt601_luma(r, g, b) for (b, g, r) in VIDEO_COLOURS]


async def test_real_capture_flushes_converts_and_reopens_at_end_of_file(tmp_path: Path) -> None:
    video = tmp_path / "lr0412-a1.avi"
    luma = write_mjpg_video(video)
    clock = VirtualClock()
    cam = OpenCVCamera(cam_section(device=str(video), flush_frames=2), clock=clock)
    assert isinstance(cam, Camera)
    await cam.open()  # reads frame 0 to learn what the source delivers
    try:
        first = await cam.grab()  # frames 1 and 2 discarded, 3 returned
        second = await cam.grab()  # 4 and 5 discarded, 6 returned
        assert first.pixels.shape == (48, 64) and first.pixels.dtype == np.uint8
        assert first.bit_depth == 8 and first.t_s == clock.now()
        assert abs(float(first.pixels.mean()) - luma[3]) < 4.0
        assert abs(float(second.pixels.mean()) - luma[6]) < 4.0
        # Frame 7 is flushed, frame 8 does not exist: a read failure, like an unplug. The
        # driver reopens the file, reads frame 0, flushes 1 and 2 and returns frame 3.
        third = await cam.grab()
        assert abs(float(third.pixels.mean()) - luma[3]) < 4.0
        info = cam.describe()
        assert info["reconnects"] == 1
        assert clock.sleeps == [0.1]  # the first back-off wait sufficed
        assert info["resolution"] == {"width_px": 64, "height_px": 48}
        assert info["bit_depth"] == 8
        assert info["backend"] == "FFMPEG"
        controls = info["controls"]
        assert isinstance(controls, dict)
        # A file has no exposure control and ignores frame-size requests: reported as such.
        assert "not known" in controls["exposure"]["note"]
        assert controls["width_px"]["effective"] is False
    finally:
        await cam.close()


async def test_missing_device_path_is_one_clear_line() -> None:
    cam = OpenCVCamera(cam_section(device="/dev/video-lr0412-missing"))
    with pytest.raises(CameraError) as err:
        await cam.open()
    assert str(err.value) == (
        "camera /dev/video-lr0412-missing not found; is it plugged in? check `device` in [camera]"
    )


def test_device_strings_choose_index_or_v4l2_path() -> None:
    assert parse_device("0") == (0, cv2.CAP_ANY)
    assert parse_device(" 2 ") == (2, cv2.CAP_ANY)
    source, api = parse_device("/dev/video0")
    assert source == "/dev/video0"
    assert api == (cv2.CAP_V4L2 if sys.platform.startswith("linux") else cv2.CAP_ANY)
    assert parse_device("/data/run.avi") == ("/data/run.avi", cv2.CAP_ANY)


def test_v4l2_exposure_units_are_100_microseconds() -> None:
    # Linux kernel V4L2 camera control reference, V4L2_CID_EXPOSURE_ABSOLUTE: "100 µs units,
    # where the value 1 stands for 1/10000th of a second, 10000 for 1 second".
    assert exposure_ms_to_v4l2(1000.0) == 10000
    assert exposure_ms_to_v4l2(0.1) == 1
    assert exposure_ms_to_v4l2(20.0) == 200
    assert exposure_ms_to_v4l2(0.01) == 1  # below one step: the shortest the control can say
    assert v4l2_to_exposure_ms(155) == pytest.approx(15.5)


# ------------------------------------------------------------------- OpenCV: fake capture


class FakeWorld:
    """One fake USB camera: plug state, frame counter and the controls it accepts."""

    def __init__(
        self,
        *,
        accepts: dict[int, tuple[float, float]] | None = None,
        legacy_auto_exposure: bool = False,
        raw16: bool = False,
    ) -> None:
        self.plugged = True
        self.replug_after_failed_opens: int | None = None
        self.failed_opens = 0
        self.opens = 0
        self.frame_no = 0
        self.grabs = 0
        self.retrieves = 0
        self.props: dict[int, float] = {cv2.CAP_PROP_FRAME_WIDTH: 640.0, cv2.CAP_PROP_FRAME_HEIGHT: 480.0}
        # prop -> (lowest, highest) value the camera takes; values outside are clamped.
        self.accepts = accepts if accepts is not None else {}
        self.legacy_auto_exposure = legacy_auto_exposure
        self.raw16 = raw16
        self.active = 0
        self.max_active = 0
        self.threads: set[int] = set()
        self.sources: list[tuple[object, int]] = []

    def factory(self, source: int | str, api: int) -> FakeCapture:
        self.opens += 1
        self.sources.append((source, api))
        if not self.plugged:
            self.failed_opens += 1
            if self.replug_after_failed_opens is not None and self.failed_opens >= self.replug_after_failed_opens:
                self.plugged = True  # plugged back in while the driver waited
            return FakeCapture(self, opened=False)
        return FakeCapture(self, opened=True)


class FakeCapture:
    def __init__(self, world: FakeWorld, *, opened: bool) -> None:
        self.world = world
        self.opened = opened
        self.last = 0

    def _enter(self) -> None:
        w = self.world
        w.active += 1
        w.max_active = max(w.max_active, w.active)
        w.threads.add(threading.get_ident())
        time.sleep(0.0005)  # widen the window in which a second thread could get in

    def _leave(self) -> None:
        self.world.active -= 1

    def isOpened(self) -> bool:
        return self.opened and self.world.plugged

    def getBackendName(self) -> str:
        return "V4L2"

    def set(self, prop: int, value: float) -> bool:
        self._enter()
        try:
            if prop == cv2.CAP_PROP_AUTO_EXPOSURE and self.world.legacy_auto_exposure and value != 0.25:
                return False
            if prop not in self.world.accepts:
                return False
            lo, hi = self.world.accepts[prop]
            self.world.props[prop] = min(max(value, lo), hi)
            return True
        finally:
            self._leave()

    def get(self, prop: int) -> float:
        return self.world.props.get(prop, 0.0)

    def grab(self) -> bool:
        self._enter()
        try:
            if not self.world.plugged:
                return False
            self.world.frame_no += 1
            self.world.grabs += 1
            self.last = self.world.frame_no
            return True
        finally:
            self._leave()

    def retrieve(self) -> tuple[bool, np.ndarray | None]:
        self._enter()
        try:
            if not self.world.plugged:
                return False, None
            self.world.retrieves += 1
            w = int(self.world.props[cv2.CAP_PROP_FRAME_WIDTH])
            h = int(self.world.props[cv2.CAP_PROP_FRAME_HEIGHT])
            if self.world.raw16 and self.world.props.get(cv2.CAP_PROP_CONVERT_RGB, 1.0) == 0.0:
                deep = np.full((h, w), 1000 + self.last, "<u2")
                return True, deep.view(np.uint8).reshape(1, w * h * 2)
            # Grey BGR frame whose level is the frame number: tells which frame came back.
            return True, np.full((h, w, 3), self.last % 256, np.uint8)
        finally:
            self._leave()

    def release(self) -> None:
        self.opened = False


SIZE_OK = {cv2.CAP_PROP_FRAME_WIDTH: (16.0, 4096.0), cv2.CAP_PROP_FRAME_HEIGHT: (16.0, 4096.0)}


async def test_every_grab_discards_flush_frames_before_the_returned_one() -> None:
    world = FakeWorld(accepts=dict(SIZE_OK))
    cam = OpenCVCamera(cam_section(flush_frames=3), capture_factory=world.factory, clock=VirtualClock())
    await cam.open()
    assert world.sources == [(3, cv2.CAP_ANY)]
    assert (world.grabs, world.retrieves) == (1, 1)  # the probe frame
    frame = await cam.grab()
    assert (world.grabs, world.retrieves) == (5, 2)  # 3 discarded + 1 kept
    assert frame.pixels.shape == (48, 64) and frame.pixels.dtype == np.uint8
    assert int(frame.pixels[0, 0]) == 5  # the fifth frame the camera produced
    frame = await cam.grab()
    assert int(frame.pixels[0, 0]) == 9
    info = cam.describe()
    assert info["resolution"] == {"width_px": 64, "height_px": 48}
    assert info["source_format"] == "BGR (to luma)"
    await cam.close()


async def test_v4l2_manual_exposure_and_gain_are_read_back() -> None:
    world = FakeWorld(
        accepts={
            **SIZE_OK,
            cv2.CAP_PROP_AUTO_EXPOSURE: (0.0, 3.0),
            cv2.CAP_PROP_EXPOSURE: (1.0, 1000.0),  # this camera tops out at 100 ms
            cv2.CAP_PROP_BUFFERSIZE: (1.0, 4.0),
        }
    )
    cam = OpenCVCamera(cam_section(exposure_ms=20.0, gain_db=3.0), capture_factory=world.factory)
    await cam.open()
    assert world.props[cv2.CAP_PROP_AUTO_EXPOSURE] == 1.0  # V4L2_EXPOSURE_MANUAL
    assert world.props[cv2.CAP_PROP_EXPOSURE] == 200.0  # 20 ms in 100 µs units
    controls = cam.describe()["controls"]
    assert controls["exposure"]["effective"] is True
    assert controls["auto_exposure_off"]["effective"] is True
    assert controls["buffer_size_1"]["effective"] is True
    assert controls["gain"]["accepted"] is False and controls["gain"]["effective"] is False
    assert (await cam.grab()).exposure_ms == pytest.approx(20.0)

    await cam.set_exposure_ms(15.5)
    assert world.props[cv2.CAP_PROP_EXPOSURE] == 155.0
    await cam.set_exposure_ms(250.0)  # the camera clamps to 1000 units
    controls = cam.describe()["controls"]
    assert controls["exposure"]["accepted"] is True
    assert controls["exposure"]["readback"] == 1000.0
    assert controls["exposure"]["effective"] is False
    assert (await cam.grab()).exposure_ms == pytest.approx(250.0)  # requested: readback did not match
    with pytest.raises(CameraError, match="use 0.01 to 10000 ms"):
        await cam.set_exposure_ms(20000.0)
    with pytest.raises(CameraError, match="use 0 to 48 dB"):
        await cam.set_gain_db(60.0)
    await cam.close()


async def test_legacy_auto_exposure_value_is_tried_when_manual_is_refused() -> None:
    world = FakeWorld(
        accepts={**SIZE_OK, cv2.CAP_PROP_AUTO_EXPOSURE: (0.0, 1.0), cv2.CAP_PROP_EXPOSURE: (1.0, 5000.0)},
        legacy_auto_exposure=True,
    )
    cam = OpenCVCamera(cam_section(), capture_factory=world.factory)
    await cam.open()
    state = cam.describe()["controls"]["auto_exposure_off"]
    assert state["sent"] == 0.25 and state["effective"] is True
    await cam.close()


async def test_unplug_then_replug_reconnects_with_exponential_back_off() -> None:
    world = FakeWorld(accepts=dict(SIZE_OK))
    clock = VirtualClock()
    cam = OpenCVCamera(cam_section(reconnect_max_s=30.0), capture_factory=world.factory, clock=clock)
    await cam.open()
    world.plugged = False
    world.replug_after_failed_opens = 4  # back on the fifth attempt
    frame = await cam.grab()
    assert frame.pixels.shape == (48, 64)
    assert clock.sleeps == [0.1, 0.2, 0.4, 0.8, 1.6]
    assert cam.describe()["reconnects"] == 1
    assert world.opens == 1 + 5
    await cam.close()


async def test_camera_that_stays_away_raises_one_line_after_the_longest_wait() -> None:
    world = FakeWorld(accepts=dict(SIZE_OK))
    clock = VirtualClock()
    cam = OpenCVCamera(
        cam_section(device="1", reconnect_max_s=1.0), capture_factory=world.factory, clock=clock
    )
    await cam.open()
    world.plugged = False
    with pytest.raises(CameraError) as err:
        await cam.grab()
    assert clock.sleeps == [0.1, 0.2, 0.4, 0.8, 1.0]  # capped at reconnect_max_s, then given up
    message = str(err.value)
    assert "\n" not in message
    assert message.startswith("camera 1 stopped delivering frames and did not come back after 5 attempts")
    assert "not found" in message and "is it plugged in?" in message
    assert cam.describe()["reconnect_rounds_failed"] == 1
    # The next grab tries again from the start (the daemon keeps going between time points).
    world.plugged = True
    assert (await cam.grab()).pixels.shape == (48, 64)
    await cam.close()


async def test_open_of_an_absent_index_is_one_clear_line() -> None:
    world = FakeWorld()
    world.plugged = False
    cam = OpenCVCamera(cam_section(device="7"), capture_factory=world.factory)
    with pytest.raises(CameraError, match=r"^camera 7 not found; is it plugged in\? check `device` in \[camera\]$"):
        await cam.open()
    with pytest.raises(CameraError, match="is not open"):
        await cam.grab()  # a failed open leaves nothing half-open to grab from


async def test_capture_calls_are_serialised_and_off_the_event_loop() -> None:
    world = FakeWorld(accepts={**SIZE_OK, cv2.CAP_PROP_GAIN: (0.0, 100.0)})
    cam = OpenCVCamera(cam_section(flush_frames=1), capture_factory=world.factory)
    await cam.open()
    jobs = [cam.grab() for _ in range(6)] + [cam.set_gain_db(float(g)) for g in range(1, 5)]
    results = await asyncio.gather(*jobs)
    assert world.max_active == 1
    assert threading.get_ident() not in world.threads
    values = sorted(int(r.pixels[0, 0]) for r in results if r is not None)
    assert len(set(values)) == 6  # six distinct frames, none handed out twice
    await cam.close()


async def test_raw_16_bit_frames_are_unpacked_for_deep_cameras() -> None:
    world = FakeWorld(
        accepts={**SIZE_OK, cv2.CAP_PROP_CONVERT_RGB: (0.0, 1.0), cv2.CAP_PROP_FOURCC: (0.0, 2.0**32)},
        raw16=True,
    )
    cam = OpenCVCamera(cam_section(bit_depth=12, flush_frames=0), capture_factory=world.factory)
    await cam.open()
    frame = await cam.grab()
    assert frame.pixels.dtype == np.uint16 and frame.pixels.shape == (48, 64)
    assert int(frame.pixels[5, 7]) == 1000 + 2
    assert frame.bit_depth == 12
    info = cam.describe()
    assert info["bit_depth"] == 12 and info["source_format"] == "Y16 raw"
    await cam.close()


# ------------------------------------------------------------------------ replay


def replay_section(folder: Path, **changes: Any) -> CameraSection:
    return CameraSection(driver="replay", options=ReplayOptions(replay_dir=str(folder), replay_fps=15.0), **changes)


def write_mixed_folder(folder: Path) -> list[np.ndarray]:
    """Three 40x30 frames as PNG (colour), TIFF (grey) and JPEG (grey); returns the expected mono frames."""
    folder.mkdir()
    yy, xx = np.mgrid[0:30, 0:40]
    colour = np.zeros((30, 40, 3), np.uint8)
    colour[..., 0] = 200  # blue
    colour[..., 1] = 100
    colour[..., 2] = 50
    cv2.imwrite(str(folder / "lr0412_t000.png"), colour)
    grey = (xx * 3 + yy).astype(np.uint8)
    tifffile.imwrite(folder / "lr0412_t001.tif", grey)
    flat = np.full((30, 40), 140, np.uint8)
    cv2.imwrite(str(folder / "lr0412_t002.jpg"), flat)
    (folder / "notes.txt").write_text("KVL-7, passage 12")  # not an image: ignored
    return [cv2.cvtColor(colour, cv2.COLOR_BGR2GRAY), grey, flat]


async def test_replay_plays_the_folder_in_name_order_paced_on_the_clock(tmp_path: Path) -> None:
    expected = write_mixed_folder(tmp_path / "run")
    clock = VirtualClock()
    cam = ReplayCamera(replay_section(tmp_path / "run"), clock)
    assert isinstance(cam, Camera)
    t_open = clock.now()
    await cam.open()
    frames = [await cam.grab() for _ in range(4)]
    # Slot k falls due at t_open + k/15 s; the first grab gets slot 1 (image 1), and the
    # loop wraps after the third image.
    assert [f.t_s for f in frames] == pytest.approx([t_open + k / 15.0 for k in (1, 2, 3, 4)])
    np.testing.assert_array_equal(frames[0].pixels, expected[1])
    assert abs(int(frames[1].pixels.mean()) - 140) <= 1  # JPEG of a flat field
    np.testing.assert_array_equal(frames[2].pixels, expected[0])
    assert abs(int(frames[2].pixels[0, 0]) - bt601_luma(50, 100, 200)) <= 0.5
    np.testing.assert_array_equal(frames[3].pixels, expected[1])
    assert all(f.pixels.shape == (30, 40) and f.bit_depth == 8 for f in frames)
    # A consumer that falls 2.5 frame periods behind gets the next frame due, not old ones.
    clock.t += 2.5 / 15.0
    late = await cam.grab()
    assert late.t_s == pytest.approx(t_open + 7 / 15.0)
    np.testing.assert_array_equal(late.pixels, expected[7 % 3])
    info = cam.describe()
    assert info["resolution"] == {"width_px": 40, "height_px": 30}
    assert info["frames"] == 3 and info["bit_depth"] == 8
    await cam.close()


async def test_replay_16_bit_and_colour_tiff(tmp_path: Path) -> None:
    folder = tmp_path / "deep"
    folder.mkdir()
    deep = (np.arange(32 * 24, dtype=np.uint16).reshape(24, 32) * 5).astype(np.uint16)
    tifffile.imwrite(folder / "a.tif", deep)
    rgb16 = np.zeros((24, 32, 3), np.uint16)
    rgb16[...] = (5000, 10000, 20000)
    tifffile.imwrite(folder / "b.tiff", rgb16, photometric="rgb")
    cv2.imwrite(str(folder / "c.png"), deep)  # 16-bit PNG through OpenCV
    clock = VirtualClock()
    cam = ReplayCamera(replay_section(folder, bit_depth=12), clock)
    await cam.open()
    b, c, a = (await cam.grab()), (await cam.grab()), (await cam.grab())
    assert a.pixels.dtype == np.uint16 and a.bit_depth == 12
    np.testing.assert_array_equal(a.pixels, deep)
    np.testing.assert_array_equal(c.pixels, deep)
    assert abs(int(b.pixels[3, 3]) - bt601_luma(5000, 10000, 20000)) <= 1
    assert cam.describe()["bit_depth"] == 12
    await cam.close()


async def test_replay_errors_are_clear(tmp_path: Path) -> None:
    clock = VirtualClock()
    empty = tmp_path / "empty"
    empty.mkdir()
    (empty / "readme.txt").write_text("no images")
    with pytest.raises(CameraError, match=r"has no images .*check `replay_dir` in \[camera\]"):
        await ReplayCamera(replay_section(empty), clock).open()
    with pytest.raises(CameraError, match="does not exist"):
        await ReplayCamera(replay_section(tmp_path / "nowhere"), clock).open()

    broken = tmp_path / "broken"
    broken.mkdir()
    cv2.imwrite(str(broken / "a.png"), np.zeros((10, 10), np.uint8))
    (broken / "b.png").write_bytes(b"\x89PNG not really a picture")
    with pytest.raises(CameraError, match=r"b\.png cannot be read"):
        await ReplayCamera(replay_section(broken), clock).open()

    def png_then_tiff(name: str, tiff_pixels: np.ndarray) -> Path:
        folder = tmp_path / name
        folder.mkdir()
        cv2.imwrite(str(folder / "a.png"), np.zeros((10, 12), np.uint8))
        tifffile.imwrite(folder / "b.tif", tiff_pixels)
        return folder

    mixed = png_then_tiff("mixed", np.zeros((10, 14), np.uint8))
    with pytest.raises(CameraError, match=r"mixes image sizes: b\.tif is 14x10 px but a\.png is 12x10 px"):
        await ReplayCamera(replay_section(mixed), clock).open()

    cam = ReplayCamera(replay_section(png_then_tiff("depths", np.zeros((10, 12), np.uint16))), clock)
    await cam.open()
    with pytest.raises(CameraError, match=r"b\.tif is 16-bit but a\.png is 8-bit"):
        await cam.grab()
    with pytest.raises(CameraError, match="use 0.01 to 10000 ms"):
        await cam.set_exposure_ms(0.0)


async def test_replay_cache_respects_its_memory_bound(tmp_path: Path) -> None:
    folder = tmp_path / "loop"
    folder.mkdir()
    for i in range(4):
        tifffile.imwrite(folder / f"f{i}.tif", np.full((100, 100), i * 10, np.uint8))
    clock = VirtualClock()
    # Room for two 10 000-byte frames: images 0 and 1 stay, 2 and 3 are decoded every loop.
    small = ReplayCamera(replay_section(folder), clock, cache_bytes=25_000)
    await small.open()
    for _ in range(8):  # slots 1..8 = images 1,2,3,0,1,2,3,0
        await small.grab()
    cache = small.describe()["cache"]
    assert cache["frames"] == 2 and cache["bytes"] == 20_000 <= cache["limit_bytes"]
    assert cache["decodes"] == 1 + 1 + 2 + 2  # open (image 0), image 1 once, images 2 and 3 twice

    roomy = ReplayCamera(replay_section(folder), clock)
    await roomy.open()
    frame = await roomy.grab()
    frame.pixels[:] = 255  # a consumer working in place must not spoil the cache
    for _ in range(7):
        frame = await roomy.grab()
    assert int(frame.pixels.max()) == 0  # slot 8 -> image 0 (level 0)
    assert roomy.describe()["cache"]["decodes"] == 4
    again = [await roomy.grab() for _ in range(3)]  # slot 9 -> image 1, which was painted over
    assert int(again[0].pixels.max()) == 10


async def test_replay_decodes_off_the_event_loop(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    import drivers.camera_replay as replay

    folder = tmp_path / "t"
    folder.mkdir()
    for i in range(3):
        tifffile.imwrite(folder / f"{i}.tif", np.full((8, 8), i, np.uint8))
    threads: list[int] = []
    real_decode = replay.decode_image

    def recording_decode(path: Path) -> np.ndarray:
        threads.append(threading.get_ident())
        return real_decode(path)

    monkeypatch.setattr(replay, "decode_image", recording_decode)
    cam = ReplayCamera(replay_section(folder), VirtualClock())
    await cam.open()
    await cam.grab()
    await cam.grab()
    assert len(threads) == 3 and threading.get_ident() not in threads


# ------------------------------------------------------------------------ board camera


async def test_board_camera_without_the_library_says_how_to_install(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setitem(sys.modules, "picamera2", None)  # import now raises ImportError
    cam = BoardCamera(CameraSection(driver="board"))
    with pytest.raises(CameraError) as err:
        await cam.open()
    assert str(err.value) == MISSING_LIBRARY
    assert "pip install 'phasewatch[board]'" in MISSING_LIBRARY


def test_board_driver_module_imports_without_the_library() -> None:
    code = "import sys; sys.modules['picamera2'] = None; import drivers.camera_board; print('imported')"
    done = subprocess.run(
        [sys.executable, "-c", code], cwd=Path(__file__).resolve().parent.parent,
        capture_output=True, text=True, timeout=60,
    )
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip() == "imported"


@dataclasses.dataclass
class FakeBoardSensor:
    """What the fake board camera's sensor is doing: queued stale frames, control latency."""

    width: int
    height: int
    stride: int
    stale_frames: int = 2
    control_latency: int = 2
    timestamps: bool = True
    frame_no: int = 0
    applied: dict[str, Any] = dataclasses.field(default_factory=lambda: {"ExposureTime": 33000, "AnalogueGain": 1.0})
    pending: list[tuple[int, dict[str, Any]]] = dataclasses.field(default_factory=list)
    control_calls: list[dict[str, Any]] = dataclasses.field(default_factory=list)
    released: int = 0
    started: bool = False
    closed: bool = False


def fake_picamera2(sensor: FakeBoardSensor) -> types.ModuleType:
    module = types.ModuleType("picamera2")

    class FakeRequest:
        def __init__(self, number: int, stamp: int | None, controls: dict[str, Any]) -> None:
            self.number = number
            self.stamp = stamp
            self.controls = dict(controls)

        def get_metadata(self) -> dict[str, Any]:
            md = dict(self.controls)
            if self.stamp is not None:
                md["SensorTimestamp"] = self.stamp
            return md

        def make_array(self, name: str) -> np.ndarray:
            assert name == "main"
            buf = np.full((sensor.height * 3 // 2, sensor.stride), 128, np.uint8)  # chroma planes
            buf[: sensor.height, : sensor.width] = self.number  # luma
            buf[: sensor.height, sensor.width :] = 255  # row padding up to the stride
            return buf

        def release(self) -> None:
            sensor.released += 1

    class Picamera2:
        camera_controls = {
            "ExposureTime": (100, 2_000_000, 20000),
            "AnalogueGain": (1.0, 16.0, 1.0),
            "ColourGains": (0.0, 32.0, None),
        }
        camera_properties = {"Model": "lr-sensor"}

        def __init__(self, camera_num: int = 0) -> None:
            self.camera_num = camera_num

        def create_video_configuration(self, main: dict[str, Any]) -> dict[str, Any]:
            return {"main": dict(main)}

        def configure(self, config: dict[str, Any]) -> None:
            assert config["main"]["format"] == "YUV420"

        def camera_configuration(self) -> dict[str, Any]:
            return {"main": {"size": (sensor.width, sensor.height), "format": "YUV420", "stride": sensor.stride}}

        def set_controls(self, controls: dict[str, Any]) -> None:
            sensor.control_calls.append(dict(controls))
            sensor.pending.append((sensor.frame_no + sensor.control_latency, dict(controls)))

        def start(self) -> None:
            sensor.started = True

        def stop(self) -> None:
            sensor.started = False

        def close(self) -> None:
            sensor.closed = True

        def capture_request(self) -> FakeRequest:
            sensor.frame_no += 1
            for due, controls in list(sensor.pending):
                if sensor.frame_no >= due:
                    sensor.applied.update({k: controls[k] for k in ("ExposureTime", "AnalogueGain")})
                    sensor.pending.remove((due, controls))
            now = boot_time_ns()
            if sensor.stale_frames > 0:
                sensor.stale_frames -= 1
                stamp = now - 50_000_000  # exposed 50 ms ago: queued before the grab began
            else:
                stamp = now
            return FakeRequest(sensor.frame_no, stamp if sensor.timestamps else None, sensor.applied)

    module.Picamera2 = Picamera2  # type: ignore[attr-defined]
    return module


async def test_board_camera_controls_flush_and_luma(monkeypatch: pytest.MonkeyPatch) -> None:
    sensor = FakeBoardSensor(width=64, height=48, stride=80, stale_frames=0, control_latency=2)
    monkeypatch.setitem(sys.modules, "picamera2", fake_picamera2(sensor))
    clock = VirtualClock()
    cam = BoardCamera(CameraSection(driver="board", width_px=64, height_px=48, exposure_ms=20.0, gain_db=6.0), clock=clock)
    await cam.open()
    assert sensor.started
    first = sensor.control_calls[0]
    assert first["AeEnable"] is False and first["AwbEnable"] is False
    assert first["ExposureTime"] == 20000  # µs
    assert first["AnalogueGain"] == pytest.approx(1.9953, abs=1e-4)  # 10^(6/20)

    frame = await cam.grab()
    # The sensor applies controls two frames late: frame 1 still has the old exposure and
    # is thrown away; frame 2 is taken.
    assert frame.pixels.shape == (48, 64) and frame.pixels.dtype == np.uint8
    assert np.all(frame.pixels == 2)  # luma only: no chroma rows, no stride padding
    assert frame.exposure_ms == pytest.approx(20.0) and frame.gain_db == pytest.approx(6.0, abs=1e-3)
    assert frame.bit_depth == 8 and frame.t_s == clock.now()

    sensor.stale_frames = 3  # a stage move: three frames exposed before the next grab started
    frame = await cam.grab()
    assert int(frame.pixels[0, 0]) == 6
    info = cam.describe()
    assert info["frames_discarded"] == 1 + 3
    assert info["resolution"] == {"width_px": 64, "height_px": 48}
    assert info["controls"]["exposure"]["effective"] is True
    assert info["controls"]["gain"]["range_db"] == pytest.approx((0.0, 24.0824), abs=1e-4)

    await cam.set_exposure_ms(30.0)
    frame = await cam.grab()
    assert frame.exposure_ms == pytest.approx(30.0)  # frames with the old exposure were skipped
    with pytest.raises(CameraError, match=r"use 0 to 24\.08\d* dB"):
        await cam.set_gain_db(30.0)  # the profile allows 48 dB, this sensor 16x
    with pytest.raises(CameraError, match=r"use 0\.1 to 2000 ms"):
        await cam.set_exposure_ms(5000.0)
    assert sensor.released == sensor.frame_no  # every request went back to the camera
    await cam.close()
    assert sensor.closed


async def test_board_camera_without_timestamps_discards_flush_frames(monkeypatch: pytest.MonkeyPatch) -> None:
    sensor = FakeBoardSensor(width=32, height=16, stride=32, stale_frames=0, control_latency=0, timestamps=False)
    monkeypatch.setitem(sys.modules, "picamera2", fake_picamera2(sensor))
    cam = BoardCamera(CameraSection(driver="board", width_px=32, height_px=16, flush_frames=3), clock=VirtualClock())
    await cam.open()
    frame = await cam.grab()
    assert int(frame.pixels[0, 0]) == 4
    await cam.close()


def test_board_main_stream_colour_formats() -> None:
    # picamera2 names formats by the DRM fourcc: "RGB888" is blue-first in memory and
    # "BGR888" red-first (picamera2's own PIL mode table maps RGB888 -> "BGR").
    r, g, b = 30, 160, 90
    blue_first = np.full((2, 3, 3), (b, g, r), np.uint8)
    red_first = np.full((2, 3, 3), (r, g, b), np.uint8)
    expected = bt601_luma(r, g, b)
    assert abs(int(main_stream_to_mono(blue_first, "RGB888", 3, 2)[0, 0]) - expected) <= 0.5
    assert abs(int(main_stream_to_mono(red_first, "BGR888", 3, 2)[0, 0]) - expected) <= 0.5
    with pytest.raises(CameraError, match="not supported"):
        main_stream_to_mono(blue_first, "MJPEG", 3, 2)


async def test_board_camera_refuses_what_the_sensor_cannot_do(monkeypatch: pytest.MonkeyPatch) -> None:
    sensor = FakeBoardSensor(width=32, height=16, stride=32)
    monkeypatch.setitem(sys.modules, "picamera2", fake_picamera2(sensor))
    cam = BoardCamera(CameraSection(driver="board", width_px=32, height_px=16, exposure_ms=5000.0))
    with pytest.raises(CameraError, match=r"exposure 5000\.0 ms is not allowed; use 0\.1 to 2000 ms"):
        await cam.open()
    assert sensor.closed and not sensor.started and cam.describe()["open"] is False

    module = types.ModuleType("picamera2")

    def no_camera(camera_num: int = 0) -> None:
        raise IndexError("list index out of range")  # what the library does with nothing attached

    module.Picamera2 = no_camera  # type: ignore[attr-defined]
    monkeypatch.setitem(sys.modules, "picamera2", module)
    with pytest.raises(CameraError, match=r"^board camera 0 not found .*check the ribbon cable"):
        await BoardCamera(CameraSection(driver="board")).open()


# ------------------------------------------------- replay at the profile's pixel size


def sinusoid_image(width: int, height: int, period_px: float, seed: int = 7) -> np.ndarray:
    """16-bit grey: a sinusoid along x of the given period plus smooth texture."""
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[0:height, 0:width]
    texture = cv2.GaussianBlur(rng.normal(0.0, 1.0, (height, width)), (0, 0), 6.0)
    texture /= np.abs(texture).max()
    level = 30000 + 20000 * np.sin(2 * np.pi * xx / period_px) + 8000 * texture + 0 * yy
    return np.clip(level, 0, 65535).astype(np.uint16)


def dominant_period_px(pixels: np.ndarray) -> float:
    """Period of the strongest frequency along x, from the FFT of the mean row."""
    row = pixels.astype(float).mean(axis=0)
    spectrum = np.abs(np.fft.rfft((row - row.mean()) * np.hanning(row.size)))
    k = int(np.argmax(spectrum[1:])) + 1
    # Parabolic interpolation of the peak (common practice) for sub-bin precision.
    a, b, c = spectrum[k - 1], spectrum[k], spectrum[k + 1]
    k_fine = k + 0.5 * (a - c) / (a - 2 * b + c)
    return row.size / k_fine


def pixel_replay(folder: Path, recorded_um: float, *, follow: bool = False, **changes: Any) -> CameraSection:
    opts = ReplayOptions(replay_dir=str(folder), replay_fps=15.0, recorded_pixel_size_um=recorded_um, follow_stage=follow)
    return CameraSection(driver="replay", options=opts, **changes)


@pytest.mark.parametrize("recorded_um", [0.5, 0.25])
async def test_replay_resamples_to_the_profiles_pixel_size(tmp_path: Path, recorded_um: float) -> None:
    from skimage.transform import rescale

    folder = tmp_path / "other-scope"
    folder.mkdir()
    target_um = 0.375  # 3.75 um camera pixels behind a 10x objective
    period_um = 24.0
    recorded = sinusoid_image(800, 600, period_um / recorded_um)
    tifffile.imwrite(folder / "lr0412_b03.tif", recorded)
    cam = ReplayCamera(pixel_replay(folder, recorded_um, width_px=320, height_px=240, bit_depth=16), VirtualClock(),
                       pixel_size_um=target_um)
    await cam.open()
    frame = (await cam.grab()).pixels
    info = cam.describe()
    await cam.close()
    assert frame.shape == (240, 320) and frame.dtype == np.uint16
    assert info["resolution"] == {"width_px": 320, "height_px": 240}
    assert info["recorded_size"] == {"width_px": 800, "height_px": 600}
    # The same 24 um period now spans 24 / 0.375 = 64 pixels.
    assert dominant_period_px(frame) == pytest.approx(period_um / target_um, rel=0.01)
    # Against scikit-image's rescale (reference library), cut at the same centre.
    scale = recorded_um / target_um
    reference = rescale(recorded.astype(float), scale, order=3, anti_aliasing=scale < 1.0, preserve_range=True)
    rows, cols = reference.shape
    top, left = (rows - 240) // 2, (cols - 320) // 2
    expected = reference[top:top + 240, left:left + 320]
    assert np.mean(np.abs(frame.astype(float) - expected)) < 0.01 * 40000  # under 1 % of the sinusoid's swing


async def test_replay_following_the_stage_pans_across_a_mosaic(tmp_path: Path) -> None:
    from skimage.registration import phase_cross_correlation

    folder = tmp_path / "mosaic"
    folder.mkdir()
    rng = np.random.default_rng(3)
    mosaic = cv2.GaussianBlur(rng.integers(0, 255, (900, 1200)).astype(np.uint8), (0, 0), 2.0)
    cv2.imwrite(str(folder / "lr0412_mosaic.png"), mosaic)
    stage_xy = [(50000.0, 30000.0)]
    cam = ReplayCamera(pixel_replay(folder, 0.375, follow=True, width_px=256, height_px=192), VirtualClock(),
                       pixel_size_um=0.375, stage_position=lambda: stage_xy[0])
    await cam.open()
    first = (await cam.grab()).pixels
    stage_xy[0] = (50000.0 + 30.0, 30000.0 - 15.0)
    moved = (await cam.grab()).pixels
    # Phase correlation (scikit-image, reference library): 30 um along +x at 0.375 um/px is
    # 80 columns, -15 um along y is -40 rows.
    shift, _, _ = phase_cross_correlation(first, moved, upsample_factor=10)
    assert shift == pytest.approx((-40.0, 80.0), abs=0.1)
    stage_xy[0] = (50000.0 + 500.0, 30000.0)
    with pytest.raises(CameraError, match=r"the stage has moved 500, 0 um from where replay started, beyond the recorded images"):
        await cam.grab()
    await cam.close()


async def test_replay_at_a_pixel_size_refuses_what_it_cannot_do(tmp_path: Path) -> None:
    folder = tmp_path / "small"
    folder.mkdir()
    cv2.imwrite(str(folder / "a.png"), np.zeros((100, 100), np.uint8))
    with pytest.raises(ValueError, match="follow_stage: needs recorded_pixel_size_um"):
        ReplayOptions(replay_dir=str(folder), follow_stage=True)
    with pytest.raises(CameraError, match=r"needs the profile's pixel size"):
        ReplayCamera(pixel_replay(folder, 0.5), VirtualClock())
    cam = ReplayCamera(pixel_replay(folder, 0.5, width_px=640, height_px=480), VirtualClock(), pixel_size_um=0.375)
    await cam.open()
    with pytest.raises(CameraError, match=r"replay images cover 50 x 50 um .* less than a 640x480 px frame"):
        await cam.grab()
    await cam.close()


async def test_replay_following_the_simulated_stage_is_a_rehearsal_with_a_known_answer(tmp_path: Path) -> None:
    """Through the registry, the replay camera pans with the stage the profile drives."""
    from skimage.registration import phase_cross_correlation

    from daemon.hardware import build_scope
    from daemon.profile import load_profile

    folder = tmp_path / "mosaic"
    folder.mkdir()
    rng = np.random.default_rng(11)
    cv2.imwrite(str(folder / "lr0412_mosaic.png"), cv2.GaussianBlur(rng.integers(0, 255, (800, 800)).astype(np.uint8), (0, 0), 2.0))
    text = (Path(__file__).parents[1] / "hw_profiles" / "sim.toml").read_text()
    camera = text[text.index("[camera]"):text.index("[optics]")]
    replay = (f'[camera]\ndriver = "replay"\nwidth_px = 256\nheight_px = 192\nreplay_dir = "{folder}"\n'
              'recorded_pixel_size_um = 0.375\nfollow_stage = true\n\n')
    profile_path = tmp_path / "rehearsal.toml"
    profile_path.write_text(text.replace(camera, replay))
    scope = build_scope(load_profile(profile_path), sim_speed=200.0)
    async with scope:
        here = await scope.position()
        first = (await scope.capture()).pixels
        await scope.move_to(x_um=here.x_um + 20.0, y_um=here.y_um + 10.0)
        moved = (await scope.capture()).pixels
    # Phase correlation (scikit-image, reference library): +20 um in x, +10 um in y at the
    # profile's 0.375 um per pixel.
    shift, _, _ = phase_cross_correlation(first, moved, upsample_factor=100)
    # Sub-pixel stage positions are cut by bicubic interpolation; phase correlation leans
    # towards whole pixels on interpolated frames (pixel locking), hence 0.2 px.
    assert shift == pytest.approx((10.0 / 0.375, 20.0 / 0.375), abs=0.2)
