"""``phasewatch calibrate``, ``correct`` and ``characterize`` from the command line, on the
simulated scope with small frames."""

from __future__ import annotations

import asyncio
import json
from pathlib import Path

import numpy as np
import pytest
import tifffile

from daemon.cli import main
from daemon.commands.capture import write_tiff
from daemon.profile import PROFILE_DIR
from tests.helpers import sim_scope

SPEED = ["--sim-speed", "10000"]


@pytest.fixture
def small_profile(tmp_path: Path) -> Path:
    """The shipped sim profile at 320x240, as a file the CLI can load."""
    text = (PROFILE_DIR / "sim.toml").read_text()
    text = text.replace("width_px = 1280", "width_px = 320").replace("height_px = 960", "height_px = 240")
    path = tmp_path / "sim-small.toml"
    path.write_text(text)
    return path


def _run(capsys, *argv: str) -> tuple[int, str, str]:
    rc = main(list(argv))
    out, err = capsys.readouterr()
    return rc, out, err


def _one_line_error(err: str) -> str:
    lines = [line for line in err.splitlines() if line.startswith("phasewatch:")]
    assert len(lines) == 1 and "Traceback" not in err, err
    return lines[0]


def test_calibrate_then_correct_a_new_frame(small_profile: Path, tmp_path: Path, capsys) -> None:
    data = tmp_path / "data"
    common = ["--profile", str(small_profile), "--data", str(data), *SPEED]
    rc, out, err = _run(capsys, "calibrate", "dark", *common, "--frames", "8")
    assert rc == 0, err
    assert "saved dark frame" in out and "(simulator:" in out
    assert "dark frames: 100 %" in err  # progress on stderr
    rc, out, err = _run(capsys, "calibrate", "flat", *common, "--frames", "32", "--check", "8", "--json")
    assert rc == 0, err
    report = json.loads(out)
    assert report["where"].startswith("empty well H12")
    assert report["check"]["after_fraction"] < 0.01 < report["check"]["before_fraction"]
    assert report["simulator_illumination_rms_error"] < 0.02
    rc, out, _ = _run(capsys, "calibrate", "list", *common)
    assert rc == 0 and out.count("20.000 ms") == 2 and out.startswith("dark")

    corrected, raw = tmp_path / "corrected.tif", tmp_path / "raw.tif"
    rc, out, err = _run(capsys, "correct", *common, "-o", str(corrected), "--raw", str(raw))
    assert rc == 0, err
    c, r = tifffile.imread(corrected), tifffile.imread(raw)
    assert c.dtype == r.dtype == np.uint8 and c.shape == r.shape == (240, 320)
    assert "brightness spread" in out

    # Saved frames: corrected into another folder, never over their inputs.
    outdir = tmp_path / "out"
    rc, out, err = _run(capsys, "correct", *common, str(raw), "-o", str(outdir))
    assert rc == 0, err
    np.testing.assert_array_equal(tifffile.imread(outdir / "raw.tif"), c)
    rc, _, err = _run(capsys, "correct", *common, str(raw), "-o", str(tmp_path))
    assert rc == 2 and "holds input frames" in _one_line_error(err)


def test_user_errors_are_one_line_and_change_nothing(small_profile: Path, tmp_path: Path, capsys) -> None:
    data = tmp_path / "data"
    common = ["--profile", str(small_profile), "--data", str(data), *SPEED]
    rc, _, err = _run(capsys, "calibrate", "flat", *common, "--frames", "4")
    assert rc == 2
    assert "no dark or flat frame" in _one_line_error(err) and "phasewatch calibrate dark" in err
    assert not (data / "calibration").exists() or not list((data / "calibration").rglob("*.tif"))
    rc, _, err = _run(capsys, "correct", *common, "-o", str(tmp_path / "c.tif"))
    assert rc == 2 and "run 'phasewatch calibrate dark" in _one_line_error(err)
    assert _run(capsys, "calibrate", "dark", *common, "--frames", "4")[0] == 0
    rc, _, err = _run(capsys, "correct", *common, "-o", str(tmp_path / "c.tif"), "--exposure-ms", "40")
    assert rc == 2 and "exposure 40 ms" in _one_line_error(err) and "dark 20 ms/0 dB" in err
    rc, _, err = _run(capsys, "calibrate", "dark", *common, "--frames", "0")
    # The dark request's own limit, in the words the web API uses for its 'frames' field.
    assert rc == 2 and "--frames: must be a whole number from 1 to 256, got 0" in _one_line_error(err)
    rc, _, err = _run(capsys, "calibrate", "dark", "--profile", str(tmp_path / "nope.toml"), "--data", str(data))
    assert rc == 2 and "no such profile" in _one_line_error(err)


async def _write_positions(folder: Path, profile_path: Path, n: int, exposure_ms: float = 20.0) -> None:
    from daemon.profile import load_profile

    profile = load_profile(profile_path)
    folder.mkdir(parents=True, exist_ok=True)
    wells = [f"{r}{c}" for r in "ABCDEF" for c in (2, 5, 8, 11)]
    async with sim_scope(profile, speed=10000.0) as scope:
        for i, well in enumerate(wells[:n]):
            x, y = scope.truth.world.well_centre_um(well)
            z = scope.truth.world.true_focus_z_um(x, y, scope.clock.now())
            pos = await scope.move_to(x_um=x + 400.0 * (i % 3), y_um=y, z_um=z)
            frame = await scope.capture(exposure_ms=exposure_ms)
            write_tiff(folder / f"{well}.tif", frame, pixel_size_um=profile.optics.pixel_size_um,
                       x_um=pos.x_um, y_um=pos.y_um, z_um=pos.z_um)


def test_retrospective_flat_from_saved_frames(small_profile: Path, tmp_path: Path, capsys) -> None:
    data = tmp_path / "data"
    common = ["--profile", str(small_profile), "--data", str(data), *SPEED]
    frames = tmp_path / "frames"
    asyncio.run(_write_positions(frames, small_profile, 16))
    rc, _, err = _run(capsys, "calibrate", "retro", *common, str(frames))
    assert rc == 2 and "no dark" in _one_line_error(err)
    assert _run(capsys, "calibrate", "dark", *common, "--frames", "8")[0] == 0
    rc, out, err = _run(capsys, "calibrate", "retro", *common, str(frames), "--json")
    assert rc == 0, err
    report = json.loads(out)
    assert report["frames"] == 16
    # Against the simulator's illumination map; stated error for 16 positions: ≤ 2 % RMS.
    assert report["simulator_illumination_rms_error"] < 0.02
    assert report["error_estimate_fraction"] < 0.03
    meta = json.loads(next((data / "calibration").rglob("flat.json")).read_text())
    assert meta["method"].startswith("retrospective") and meta["retrospective"]["frames"] == 16

    # A frame of another exposure among them is refused, and the stored flat stays.
    before = next((data / "calibration").rglob("flat.tif")).read_bytes()
    asyncio.run(_write_positions(tmp_path / "other", small_profile, 1, exposure_ms=40.0))
    (tmp_path / "other" / "A2.tif").rename(frames / "zz-other.tif")
    rc, _, err = _run(capsys, "calibrate", "retro", *common, str(frames))
    assert rc == 2 and "mismatched exposures" in _one_line_error(err)
    assert next((data / "calibration").rglob("flat.tif")).read_bytes() == before


def test_characterize_shows_progress_and_truth(small_profile: Path, tmp_path: Path, capsys) -> None:
    out_dir = tmp_path / "char"
    rc, out, err = _run(capsys, "characterize", "--profile", str(small_profile), *SPEED, "--gain-db", "24",
                        "--steps", "16", "--spatial-frames", "4", "--out", str(out_dir))
    assert rc == 0, err
    assert "characterize: 100 %" in err and "characterising on empty well H12" in err
    assert "system gain K" in out and "(simulator: 0.3328 DN/e-)" in out
    assert (out_dir / "photon-transfer.png").exists() and (out_dir / "characterization.json").exists()
    rc, _, err = _run(capsys, "characterize", "--profile", str(small_profile), *SPEED, "--steps", "4")
    assert rc == 2 and "--steps must be at least 8" in _one_line_error(err)
