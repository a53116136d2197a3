"""What ``check --probe`` reports of a camera: v4l2-ctl listings parsed (fixtures invented
from memory of v4l2-ctl's output, see tests/fixtures/v4l2/README.md), board camera control
tables, warnings for a time-lapse, and the OpenCV driver's probe with and without v4l2-ctl."""

from __future__ import annotations

import os
import stat
from pathlib import Path
from typing import Any

import cv2
import pytest

from drivers.camera_opencv import OpenCVCamera, OpenCVOptions
from drivers.camera_probe import (
    board_offer,
    parse_v4l2_controls,
    parse_v4l2_formats,
    profile_warnings,
    run_v4l2_ctl,
    v4l2_device_path,
    v4l2_offer,
)
from drivers.sections import CameraSection
from tests.test_cameras import SIZE_OK, FakeWorld

FIXTURES = Path(__file__).parent / "fixtures" / "v4l2"


def listing(name: str) -> tuple[str, str]:
    return (FIXTURES / f"{name}.formats.txt").read_text(), (FIXTURES / f"{name}.ctrls.txt").read_text()


def test_formats_in_the_older_layout():
    formats = parse_v4l2_formats(listing("uvc-old")[0])
    assert [(f.fourcc, f.description) for f in formats] == [("MJPG", "Motion-JPEG, compressed"), ("YUYV", "YUYV 4:2:2")]
    mjpg, yuyv = formats
    assert [(s.width_px, s.height_px, s.fps) for s in mjpg.sizes] == [
        (1920, 1080, (30.0, 15.0)), (1280, 960, (30.0,)), (640, 480, (30.0,)),
    ]
    assert [(s.width_px, s.height_px, s.fps) for s in yuyv.sizes] == [(1280, 960, (7.5,)), (640, 480, (30.0, 20.0))]


def test_formats_in_the_newer_layout():
    formats = parse_v4l2_formats(listing("mono-y16")[0])
    assert [(f.fourcc, f.description) for f in formats] == [("GREY", "8-bit Greyscale"), ("Y16 ", "16-bit Greyscale")]
    assert [(s.width_px, s.height_px, s.fps) for s in formats[1].sizes] == [(1280, 960, (15.0,))]


def test_stepwise_sizes_are_ranges():
    text = "\t[0]: 'GREY' (8-bit Greyscale)\n\t\tSize: Stepwise 16x16 - 2592x1944 with step 8/8\n"
    (grey,) = parse_v4l2_formats(text)
    (size,) = grey.sizes
    assert (size.kind, size.width_px, size.max_width_px, size.max_height_px) == ("stepwise", 16, 2592, 1944)
    assert size.allows(1280, 960) and not size.allows(4000, 960)


def test_controls_with_menus_flags_and_values():
    controls = parse_v4l2_controls(listing("uvc-old")[1])
    ae = controls["exposure_auto"]
    assert (ae.type, ae.minimum, ae.maximum, ae.value) == ("menu", 0.0, 3.0, 3.0)
    assert ae.menu == {1: "Manual Mode", 3: "Aperture Priority Mode"}
    assert controls["power_line_frequency"].menu == {0: "Disabled", 1: "50 Hz", 2: "60 Hz"}
    exposure = controls["exposure_absolute"]
    assert (exposure.minimum, exposure.maximum, exposure.flags, exposure.settable) == (1.0, 5000.0, ("inactive",), True)
    assert controls["brightness"].minimum == -64.0
    newer = parse_v4l2_controls(listing("webcam-locked")[1])
    assert newer["auto_exposure"].menu == {3: "Aperture Priority Mode"}  # value shown with its item name
    assert newer["white_balance_automatic"].flags == ("read-only",)
    assert not newer["white_balance_automatic"].settable


def test_a_camera_fit_for_time_lapses_gets_no_warnings():
    offer = v4l2_offer(*listing("uvc-old"))
    assert offer.manual_exposure and offer.manual_gain
    assert offer.auto_exposure_can_be_off is True and offer.auto_white_balance_can_be_off is True
    assert offer.warnings == []
    assert profile_warnings(offer, width_px=1280, height_px=960, bit_depth=8) == []


def test_auto_exposure_and_white_balance_that_cannot_be_turned_off_are_warned_about():
    offer = v4l2_offer(*listing("webcam-locked"))
    assert offer.auto_exposure_can_be_off is False and offer.manual_exposure is False
    assert offer.auto_white_balance_can_be_off is False
    assert offer.manual_gain is True
    text = " | ".join(offer.warnings)
    assert "automatic exposure cannot be turned off (auto_exposure offers: Aperture Priority Mode)" in text
    assert "automatic white balance cannot be turned off (white_balance_automatic)" in text
    # The profile asks for a size the camera does not have.
    (size,) = profile_warnings(offer, width_px=1280, height_px=960, bit_depth=8)
    assert "no format offers 1280x960 px" in size and "1280x720" in size


def test_a_monochrome_camera_has_no_white_balance_and_a_deep_format():
    offer = v4l2_offer(*listing("mono-y16"))
    assert offer.auto_white_balance_can_be_off is None  # nothing to turn off
    assert offer.auto_exposure_can_be_off is True and offer.manual_exposure and offer.manual_gain
    assert offer.warnings == []
    assert profile_warnings(offer, width_px=1280, height_px=960, bit_depth=16) == []
    eight_bit_only = v4l2_offer(*listing("uvc-old"))
    (deep,) = profile_warnings(eight_bit_only, width_px=1280, height_px=960, bit_depth=12)
    assert "no deep grey format (Y10/Y12/Y16)" in deep


def test_as_dict_is_what_check_prints():
    report = v4l2_offer(*listing("mono-y16")).as_dict()
    assert report["formats"][1] == {"fourcc": "Y16", "description": "16-bit Greyscale", "sizes": ["1280x960 @ 15 fps"]}
    assert report["source"] == "v4l2-ctl" and report["warnings"] == []


def test_board_camera_offer_from_its_control_table():
    # The camera library's shapes (from memory): controls map to (min, max, default),
    # sensor modes list format, size, fps and bit depth.
    controls = {"AeEnable": (False, True, True), "AwbEnable": (False, True, True), "ExposureTime": (60, 6_000_000, 20000),
                "AnalogueGain": (1.0, 16.0, 1.0), "ColourGains": (0.0, 32.0, None)}
    modes = [{"format": "SRGGB10_CSI2P", "size": (2028, 1520), "fps": 40.0, "bit_depth": 10},
             {"format": "SRGGB10_CSI2P", "size": (1332, 990), "fps": 120.0, "bit_depth": 10}]
    offer = board_offer(controls, modes)
    assert offer.manual_exposure and offer.manual_gain
    assert offer.auto_exposure_can_be_off is True and offer.auto_white_balance_can_be_off is True
    assert offer.as_dict()["formats"] == [
        {"fourcc": "SRGGB10_CSI2P", "description": "10-bit sensor mode", "sizes": ["2028x1520 @ 40 fps", "1332x990 @ 120 fps"]}
    ]
    assert offer.warnings == []
    # The main stream is scaled from a sensor mode, so any frame size will do.
    assert profile_warnings(offer, width_px=1280, height_px=960, bit_depth=8, scaled=True) == []
    locked = board_offer({"ColourGains": (0.0, 32.0, None)}, modes)
    assert locked.auto_white_balance_can_be_off is False
    assert len(locked.warnings) == 3


# ------------------------------------------------------------ the OpenCV driver


def opencv_section(device: str = "/dev/video7", **changes: Any) -> CameraSection:
    return CameraSection(driver="opencv", width_px=1280, height_px=960, options=OpenCVOptions(device=device), **changes)


def fake_v4l2_ctl(folder: Path, name: str, *, fail: bool = False) -> Path:
    """A stand-in v4l2-ctl on PATH that prints a fixture (the real one needs a camera)."""
    formats, ctrls = (FIXTURES / f"{name}.formats.txt"), (FIXTURES / f"{name}.ctrls.txt")
    script = folder / "v4l2-ctl"
    body = 'echo "Cannot open device $2, exiting." >&2; exit 1' if fail else (
        f'case "$3" in --list-formats-ext) cat "{formats}";; --list-ctrls-menus) cat "{ctrls}";; *) exit 2;; esac'
    )
    script.write_text(f"#!/bin/sh\n{body}\n")
    script.chmod(script.stat().st_mode | stat.S_IXUSR)
    return folder


def test_v4l2_ctl_is_run_on_the_device(tmp_path, monkeypatch):
    monkeypatch.setenv("PATH", f"{fake_v4l2_ctl(tmp_path, 'uvc-old')}{os.pathsep}{os.environ['PATH']}")
    listings = run_v4l2_ctl("3")
    assert isinstance(listings, tuple) and "Pixel Format: 'MJPG'" in listings[0] and "exposure_auto" in listings[1]
    assert v4l2_device_path("3") == "/dev/video3" and v4l2_device_path("/dev/v4l/by-id/x") == "/dev/v4l/by-id/x"
    fail = tmp_path / "failing"
    fail.mkdir()
    monkeypatch.setenv("PATH", f"{fake_v4l2_ctl(fail, 'uvc-old', fail=True)}{os.pathsep}{os.environ['PATH']}")
    assert run_v4l2_ctl("/dev/video9") == "v4l2-ctl --list-formats-ext on /dev/video9 failed: Cannot open device /dev/video9, exiting."
    monkeypatch.setenv("PATH", str(tmp_path / "nowhere"))
    assert run_v4l2_ctl("0").startswith("v4l2-ctl not found: install v4l-utils")


async def test_opencv_probe_reports_the_v4l2_listing_and_profile_warnings(tmp_path, monkeypatch):
    monkeypatch.setenv("PATH", f"{fake_v4l2_ctl(tmp_path, 'webcam-locked')}{os.pathsep}{os.environ['PATH']}")
    world = FakeWorld(accepts=dict(SIZE_OK))
    cam = OpenCVCamera(opencv_section(device="2"), capture_factory=world.factory)
    await cam.open()
    try:
        report = await cam.probe()
    finally:
        await cam.close()
    assert report["source"] == "v4l2-ctl"
    assert report["auto_exposure_can_be_off"] is False and report["auto_white_balance_can_be_off"] is False
    assert [f["fourcc"] for f in report["formats"]] == ["MJPG", "YUYV"]
    warnings = report["warnings"]
    assert any("automatic exposure cannot be turned off" in w for w in warnings)
    assert any("no format offers 1280x960 px" in w for w in warnings)


async def test_opencv_probe_without_v4l2_ctl_reports_what_the_controls_showed(tmp_path, monkeypatch):
    monkeypatch.setenv("PATH", str(tmp_path))
    world = FakeWorld(
        accepts={**SIZE_OK, cv2.CAP_PROP_AUTO_EXPOSURE: (0.0, 3.0), cv2.CAP_PROP_EXPOSURE: (1.0, 5000.0),
                 cv2.CAP_PROP_GAIN: (0.0, 100.0), cv2.CAP_PROP_AUTO_WB: (1.0, 1.0)}  # white balance stuck on
    )
    cam = OpenCVCamera(opencv_section(device="1", gain_db=3.0), capture_factory=world.factory)
    await cam.open()
    try:
        report = await cam.probe()
        controls = cam.describe()["controls"]
    finally:
        await cam.close()
    assert controls["auto_white_balance_off"]["accepted"] is True and controls["auto_white_balance_off"]["effective"] is False
    assert report["source"] == "OpenCV properties" and report["formats"] == []
    assert report["manual_exposure"] is True and report["manual_gain"] is True
    assert report["auto_exposure_can_be_off"] is True and report["auto_white_balance_can_be_off"] is False
    assert report["warnings"][0].startswith("v4l2-ctl not found")
    assert "automatic white balance could not be turned off" in report["warnings"]
