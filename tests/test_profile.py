"""Strict profile loading: every kind of bad input gives one line naming file, section, option."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

from daemon.cli import main
from drivers.options import ConfigError
from daemon.profile import PROFILE_DIR, load_profile

SIM = (PROFILE_DIR / "sim.toml").read_text()


def write(tmp_path: Path, text: str) -> Path:
    p = tmp_path / "bench.toml"
    p.write_text(text)
    return p


def edit(old: str, new: str) -> str:
    assert old in SIM, old
    return SIM.replace(old, new, 1)


@pytest.mark.parametrize("name", sorted(p.stem for p in PROFILE_DIR.glob("*.toml")))
def test_shipped_profiles_load(name: str) -> None:
    profile = load_profile(name)
    assert profile.focus.z_safe_max_um > profile.focus.z_min_um
    assert profile.optics.depth_of_field_um > 0


def test_depth_of_field_formula() -> None:
    # Inoué & Spring, Video Microscopy: d = λ·n/NA² + n·e/(M·NA).
    # 10x/0.25, 550 nm, air, e = 3.75 um: 0.55/0.0625 + 3.75/2.5 = 8.8 + 1.5 = 10.3 um.
    assert load_profile("sim").optics.depth_of_field_um == pytest.approx(10.3, abs=1e-9)


@pytest.mark.parametrize(
    ("text", "section", "option", "fragment"),
    [
        (edit("exposure_ms = 20.0", "exposure_msec = 20.0"), "camera", "exposure_msec", "did you mean 'exposure_ms'"),
        (edit("[illumination]", "[ilumination]"), "ilumination", None, "did you mean 'illumination'"),
        (edit("exposure_ms = 20.0", 'exposure_ms = "fast"'), "camera", "exposure_ms", "must be a number from 0.01 to 10000.0 ms"),
        (edit("numerical_aperture = 0.25", "numerical_aperture = 2.5"), "optics", "numerical_aperture", "from 0.01 to 1.5"),
        (edit('driver = "sim"\nwidth_px', 'driver = "webcam"\nwidth_px'), "camera", "driver", "one of 'sim', 'opencv', 'replay', 'board'"),
        (edit("magnification = 10.0\n", ""), "optics", "magnification", "missing required option"),
        (edit("z_safe_max_um = 3000.0", "z_safe_max_um = -5.0"), "focus", "z_safe_max_um", "greater than z_min_um"),
        (edit("width_px = 1280", "width_px = 1280.5"), "camera", "width_px", "whole number"),
        (edit("seed = 20261201", "seed = 1\ncolour = 3"), "sim", "colour", "unknown option"),
        (edit("[sim.culture]", "[sim.cultures]"), "sim", "cultures", "did you mean 'culture'"),
        (edit("doubling_time_h = 22.0", "doubling_time_h = 0.0"), "sim.culture", "doubling_time_h", "from 1.0 to 1000.0 h"),
        (edit("empty_wells = [\"H12\"]", "empty_wells = \"H12\""), "sim.plate", "empty_wells", "a list of strings"),
        (edit("bit_depth = 8", "bit_depth = true"), "camera", "bit_depth", "one of 8, 10, 12, 16"),
    ],
)
def test_bad_profiles_name_file_section_option(
    tmp_path: Path, text: str, section: str, option: str | None, fragment: str
) -> None:
    path = write(tmp_path, text)
    with pytest.raises(ConfigError) as info:
        load_profile(path)
    err = info.value
    assert err.file == str(path)
    assert err.section == section
    assert err.option == option
    assert fragment in str(err)
    assert "\n" not in str(err)


def test_missing_section_and_bad_toml(tmp_path: Path) -> None:
    no_focus = SIM.split("[focus]")[0] + "[illumination]" + SIM.split("[illumination]")[1]
    with pytest.raises(ConfigError, match=r"\[focus\]: missing section"):
        load_profile(write(tmp_path, no_focus))
    with pytest.raises(ConfigError, match="not valid TOML"):
        load_profile(write(tmp_path, SIM + "\n[camera\n"))


def test_gcode_stage_needs_a_port(tmp_path: Path) -> None:
    text = (PROFILE_DIR / "usb-gcode.toml").read_text().replace('port = "/dev/ttyUSB0"\n', "")
    with pytest.raises(ConfigError, match=r"\[stage\] port: the gcode driver needs a serial port"):
        load_profile(write(tmp_path, text))


def test_unknown_profile_name_lists_known_ones() -> None:
    with pytest.raises(ConfigError, match="one of: board-camera, sim, usb-gcode"):
        load_profile("simm")


def test_check_command_exit_codes(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["check", "sim"]) == 0
    assert "valid" in capsys.readouterr().out
    bad = write(tmp_path, edit("exposure_ms = 20.0", "exposure_msec = 20.0"))
    assert main(["check", str(bad)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "did you mean 'exposure_ms'" in err


def test_check_missing_serial_port_is_one_line_no_traceback(tmp_path: Path) -> None:
    text = (PROFILE_DIR / "usb-gcode.toml").read_text().replace("/dev/ttyUSB0", str(tmp_path / "ttyNOPE"))
    path = write(tmp_path, text)
    proc = subprocess.run(
        [sys.executable, "-m", "daemon.cli", "check", str(path), "--probe"],
        capture_output=True, text=True, timeout=60,
    )
    assert proc.returncode != 0
    assert "Traceback" not in proc.stderr
    assert "ttyNOPE" in proc.stderr
    assert proc.stderr.strip().count("\n") == 0


USB = (PROFILE_DIR / "usb-gcode.toml").read_text()


def usb_edit(old: str, new: str) -> str:
    assert old in USB, old
    return USB.replace(old, new, 1)


@pytest.mark.parametrize(
    ("text", "section", "option", "fragments"),
    [
        (
            usb_edit('device = "/dev/video0"', 'device = "/dev/video0"\nreplay_dir = "/srv/lr0412"'),
            "camera", "replay_dir",
            ["is an option of the 'replay' camera driver, not of 'opencv'",
             "the opencv driver takes device, reconnect_max_s beside the common [camera] options"],
        ),
        (
            usb_edit('driver = "opencv"\ndevice = "/dev/video0"', 'driver = "board"\ndevice = "/dev/video0"'),
            "camera", "device",
            ["is an option of the 'opencv' camera driver, not of 'board'", "the board driver takes no options of its own"],
        ),
        (
            edit('[stage]\ndriver = "sim"', '[stage]\ndriver = "sim"\nport = "/dev/ttyUSB0"'),
            "stage", "port",
            ["is an option of the 'gcode' stage driver, not of 'sim'", "the sim driver takes dialect beside the common [stage] options"],
        ),
        (
            usb_edit("baud = 115200", "baud = 115200\nbaudrate = 9600"),
            "stage", "baudrate",
            ["unknown option (did you mean 'baud'?)", "allowed here:", "port", "xy_speed_um_s"],
        ),
        (
            usb_edit('driver = "gcode"', 'driver = "grbl"'),
            "stage", "driver",
            ["must be one of 'sim', 'gcode' (the registered stage drivers), got 'grbl'"],
        ),
        (
            usb_edit('driver = "opencv"', 'driver = "opnecv"'),
            "camera", "driver",
            ["must be one of 'sim', 'opencv', 'replay', 'board' (the registered camera drivers)", "did you mean 'opencv'"],
        ),
        (
            usb_edit('driver = "opencv"', "driver = 3"),
            "camera", "driver", ["must be one of 'sim', 'opencv', 'replay', 'board'", "got 3"],
        ),
        (
            usb_edit('driver = "opencv"\n', ""),
            "camera", "driver", ["missing required option; set it to one of 'sim', 'opencv', 'replay', 'board'"],
        ),
        (
            usb_edit('device = "/dev/video0"', 'device = "/dev/video0"\nreconnect_max_s = 0.0'),
            "camera", "reconnect_max_s", ["must be a number from 0.1 to 3600.0 s"],
        ),
        (
            usb_edit("baud = 115200", "baud = 115201"),
            "stage", "baud", ["one of 9600, 19200"],
        ),
        (
            usb_edit('dialect = "auto"', 'dialect = "marlin"'),
            "stage", "dialect", ["one of 'auto', 'reprap', 'grbl'"],
        ),
        (
            edit('[stage]\ndriver = "sim"', '[stage]\ndriver = "sim"\ndialect = "auto"'),
            "stage", "dialect", ["one of 'reprap', 'grbl'"],
        ),
        (
            USB + "\n[sim]\nseed = 7\n",
            "sim", None,
            ["[sim] sets up the simulated scope, but neither the 'opencv' camera nor the 'gcode' stage is simulated",
             "remove [sim]"],
        ),
        (
            usb_edit('driver = "opencv"\ndevice = "/dev/video0"', 'driver = "sim"'),
            "camera", "driver",
            ["the sim camera images the simulated stage; set [stage] driver = 'sim' too"],
        ),
        (
            SIM.split("[sim]")[0],
            "sim", None, ["missing section [sim]: the sim drivers need it"],
        ),
    ],
)
def test_driver_options_are_checked_against_the_chosen_driver(
    tmp_path: Path, text: str, section: str, option: str | None, fragments: list[str]
) -> None:
    path = write(tmp_path, text)
    with pytest.raises(ConfigError) as info:
        load_profile(path)
    err = info.value
    assert (err.file, err.section, err.option) == (str(path), section, option)
    for fragment in fragments:
        assert fragment in str(err)
    assert "\n" not in str(err)


def test_each_driver_gets_its_own_options(tmp_path: Path) -> None:
    from drivers.camera_opencv import OpenCVOptions
    from drivers.camera_replay import ReplayOptions
    from drivers.gcode import GcodeOptions

    usb = load_profile("usb-gcode")
    assert usb.camera.options == OpenCVOptions(device="/dev/video0", reconnect_max_s=30.0)
    assert usb.stage.options == GcodeOptions(port="/dev/ttyUSB0", baud=115200, dialect="auto", line_checksums=True)
    assert usb.sim is None and not usb.is_simulated
    # The simulated stage with a replay camera: a real camera driver over the simulated scope.
    text = edit('[camera]\ndriver = "sim"', '[camera]\ndriver = "replay"\nreplay_dir = "/srv/lr0412"\nreplay_fps = 12.5')
    replay = load_profile(write(tmp_path, text))
    assert replay.camera.options == ReplayOptions(replay_dir="/srv/lr0412", replay_fps=12.5)
    assert replay.is_simulated and replay.sim is not None


def test_replay_camera_needs_a_folder(tmp_path: Path) -> None:
    text = edit('[camera]\ndriver = "sim"', '[camera]\ndriver = "replay"')
    with pytest.raises(ConfigError, match=r"\[camera\] replay_dir: the replay driver needs a folder of images"):
        load_profile(write(tmp_path, text))
