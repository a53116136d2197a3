"""``phasewatch analyze``: confluence and count of saved frames, overlays, clear errors."""

from __future__ import annotations

import json
from pathlib import Path

import cv2
import numpy as np
import pytest

from daemon.cli import main
from daemon.commands.capture import write_tiff
from drivers.base import Frame
from drivers.sim.world import SimWorld
from tests.helpers import sim_profile
from tests.web_support import small_profile


@pytest.fixture(scope="module")
def sim_frames(tmp_path_factory: pytest.TempPathFactory) -> dict[str, object]:
    """Two frames of plate LR-0412 saved as the daemon saves them (OME-TIFF with stage
    position and time), one also as a plain PNG in a sub-folder."""
    world = SimWorld(sim_profile(320, 240))
    folder = tmp_path_factory.mktemp("frames")
    (folder / "sub").mkdir()
    # The profile the CLI reads the truth from, its seeding date pinned as the frames' is.
    out: dict[str, object] = {"folder": folder, "profile": str(small_profile(tmp_path_factory.mktemp("profile")))}
    for name, well, day in (("c4-day2", "C4", 2.0), ("c4-day5", "C4", 5.0)):
        x, y = world.well_centre_um(well)
        t = world.t0_s + day * 86400.0
        z = world.true_focus_z_um(x, y, t)
        pixels = world.render(x, y, z, t_s=t, exposure_ms=20.0)
        # The daemon writes the profile's pixel size (the simulated camera's true one is a little larger).
        write_tiff(
            folder / f"{name}.tif", Frame(pixels, t, 20.0, 0.0, 8),
            pixel_size_um=world.profile.optics.pixel_size_um, x_um=x, y_um=y, z_um=z,
        )
        out[name] = world.true_confluence(x, y, t)
    cv2.imwrite(str(folder / "sub" / "c4-day5.png"), cv2.imread(str(folder / "c4-day5.tif"), cv2.IMREAD_UNCHANGED))
    return out


def test_folder_as_json_with_overlays(sim_frames: dict[str, object], tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    folder: Path = sim_frames["folder"]  # type: ignore[assignment]
    overlays = tmp_path / "overlays"
    assert main(["analyze", "--profile", str(sim_frames["profile"]), str(folder), "--json", "--overlay", str(overlays)]) == 0
    rows = {Path(r["file"]).relative_to(folder).as_posix(): r for r in json.loads(capsys.readouterr().out)}
    assert set(rows) == {"c4-day2.tif", "c4-day5.tif", "sub/c4-day5.png"}
    for name in ("c4-day2", "c4-day5"):
        row = rows[f"{name}.tif"]
        # Pixel size from the OME metadata; the simulator's truth from the saved position and time.
        assert row["pixel_size_um"] == pytest.approx(0.375)
        assert row["simulator_confluence"] == pytest.approx(sim_frames[name], abs=1e-4)
        assert abs(row["confluence"] - row["simulator_confluence"]) <= 0.10
    assert rows["c4-day2.tif"]["confluence"] < rows["c4-day5.tif"]["confluence"]
    # The PNG carries no metadata: the profile's pixel size, no truth, same figure as its TIFF.
    png = rows["sub/c4-day5.png"]
    assert "simulator_confluence" not in png and png["confluence"] == rows["c4-day5.tif"]["confluence"]
    for row in rows.values():
        picture = cv2.imread(row["overlay"])
        assert picture is not None and picture.shape == (240, 320, 3)
        if row["count_reliable"]:
            assert isinstance(row["cell_count"], int)
        else:
            assert row["cell_count"] is None and row["count_note"]
    assert (overlays / "sub" / "c4-day5-overlay.png").exists()
    # Overlays written into the analysed folder are not analysed on the next run.
    assert main(["analyze", "--profile", str(sim_frames["profile"]), str(folder), "--json", "--overlay", str(folder)]) == 0
    assert len(json.loads(capsys.readouterr().out)) == 3


def test_json_names_the_method_and_another_can_be_chosen(sim_frames: dict[str, object], capsys: pytest.CaptureFixture[str]) -> None:
    from daemon.culture.confluence import DEFAULT_METHOD, JACCARD_2014, METHOD_DESCRIPTIONS

    folder: Path = sim_frames["folder"]  # type: ignore[assignment]
    frame = str(folder / "c4-day5.tif")
    assert main(["analyze", "--profile", str(sim_frames["profile"]), frame, "--json"]) == 0
    (row,) = json.loads(capsys.readouterr().out)
    assert row["method"] == DEFAULT_METHOD and row["method_description"] == METHOD_DESCRIPTIONS[DEFAULT_METHOD]
    assert main(["analyze", "--profile", str(sim_frames["profile"]), frame, "--json", "--method", JACCARD_2014]) == 0
    (other,) = json.loads(capsys.readouterr().out)
    assert other["method"] == JACCARD_2014 and "as published" in other["method_description"]
    # Both read the same frame close to the simulator's truth.
    assert abs(other["confluence"] - row["simulator_confluence"]) <= 0.10
    with pytest.raises(SystemExit):
        main(["analyze", "--profile", str(sim_frames["profile"]), frame, "--method", "otsu"])
    assert "invalid choice" in capsys.readouterr().err


def test_single_file_as_text(sim_frames: dict[str, object], capsys: pytest.CaptureFixture[str]) -> None:
    folder: Path = sim_frames["folder"]  # type: ignore[assignment]
    assert main(["analyze", "--profile", str(sim_frames["profile"]), str(folder / "c4-day2.tif")]) == 0
    text = capsys.readouterr().out
    from daemon.culture.confluence import DEFAULT_METHOD

    assert "confluence" in text and "(simulator:" in text and f"({DEFAULT_METHOD})" in text
    assert "cells" in text


def test_missing_path_is_one_clear_line(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["analyze", str(tmp_path / "nowhere")]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "no such file or folder" in err and "Traceback" not in err


def test_unreadable_file_is_reported_and_the_rest_analysed(sim_frames: dict[str, object], tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    folder: Path = sim_frames["folder"]  # type: ignore[assignment]
    (tmp_path / "broken.tif").write_bytes(b"this is not a TIFF")
    (tmp_path / "good.tif").write_bytes((folder / "c4-day2.tif").read_bytes())
    assert main(["analyze", "--profile", str(sim_frames["profile"]), str(tmp_path), "--json"]) == 1
    captured = capsys.readouterr()
    assert len(json.loads(captured.out)) == 1
    assert "broken.tif" in captured.err and "Traceback" not in captured.err
    assert main(["analyze", "--profile", str(sim_frames["profile"]), str(tmp_path / "broken.tif")]) == 2


def test_empty_folder_and_bad_pixel_size(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["analyze", str(tmp_path)]) == 2
    assert "no image files" in capsys.readouterr().err
    np.save(tmp_path / "not-an-image.npy", np.zeros(3))
    assert main(["analyze", str(tmp_path), "--pixel-size-um", "0"]) == 2
    assert "--pixel-size-um" in capsys.readouterr().err


def test_colour_file_and_bad_profile(sim_frames: dict[str, object], tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    folder: Path = sim_frames["folder"]  # type: ignore[assignment]
    gray = cv2.imread(str(folder / "c4-day5.tif"), cv2.IMREAD_UNCHANGED)
    cv2.imwrite(str(tmp_path / "gray.png"), gray)
    cv2.imwrite(str(tmp_path / "colour.png"), cv2.cvtColor(gray, cv2.COLOR_GRAY2BGR))
    assert main(["analyze", "--profile", str(sim_frames["profile"]), str(tmp_path), "--json"]) == 0
    rows = {Path(r["file"]).name: r for r in json.loads(capsys.readouterr().out)}
    assert rows["colour.png"]["confluence"] == rows["gray.png"]["confluence"]
    assert main(["analyze", "--profile", str(sim_frames["profile"]), str(tmp_path), "--profile", "no-such-scope"]) == 2
    err = capsys.readouterr().err
    assert "no such profile" in err and "Traceback" not in err
