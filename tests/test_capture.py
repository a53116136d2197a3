"""``phasewatch capture``: one lossless OME-TIFF frame from the simulated scope."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import tifffile
from ome_types import from_xml

from daemon.cli import main
from daemon.profile import PROFILE_DIR

SMALL = (PROFILE_DIR / "sim.toml").read_text().replace("width_px = 1280", "width_px = 320").replace(
    "height_px = 960", "height_px = 240"
)


@pytest.fixture()
def small_profile(tmp_path: Path) -> Path:
    p = tmp_path / "small-sim.toml"
    p.write_text(SMALL)
    return p


def test_capture_writes_valid_ome_tiff_of_cells_in_focus(
    small_profile: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out = tmp_path / "frame.tif"
    rc = main(["capture", "--profile", str(small_profile), "--sim-speed", "500", "--well", "C4",
               "--output", str(out), "--data", str(tmp_path / "data")])
    assert rc == 0
    text = capsys.readouterr().out
    assert "(simulator:" in text  # the simulator's truth is printed beside the estimate
    pixels = tifffile.imread(out)
    assert pixels.shape == (240, 320) and pixels.dtype == np.uint8
    assert 10 < pixels.mean() < 245 and pixels.std() > 3
    with tifffile.TiffFile(out) as tif:
        # OME data model (ome-types, a general-purpose OME library from the registry) parses it.
        ome = from_xml(tif.ome_metadata)
    px = ome.images[0].pixels
    assert px.physical_size_x == pytest.approx(3.75 / 10.0)
    assert px.planes[0].exposure_time == pytest.approx(20.0)
    assert not list(tmp_path.glob(".*.partial"))


def test_capture_refuses_lossy_or_missing_folder(small_profile: Path, tmp_path: Path) -> None:
    assert main(["capture", "--profile", str(small_profile), "--output", str(tmp_path / "x.jpg")]) == 2
    assert main(["capture", "--profile", str(small_profile), "--output", str(tmp_path / "nope" / "x.tif")]) == 2


def test_capture_refuses_move_beyond_soft_limit(small_profile: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    rc = main(["capture", "--profile", str(small_profile), "--sim-speed", "500", "--x-um", "32000", "--y-um", "20000",
               "--z-um", "3500", "--output", str(tmp_path / "f.tif")])
    assert rc == 2
    err = capsys.readouterr().err
    assert "z_safe_max_um = 3000.0" in err and "nothing was sent" in err
    assert not (tmp_path / "f.tif").exists()


def test_capture_without_a_position_goes_to_the_demo_well_and_says_so(
    small_profile: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # The same line as `phasewatch focus` prints in the same case.
    out = tmp_path / "frame.tif"
    rc = main(["capture", "--profile", str(small_profile), "--sim-speed", "500", "--output", str(out),
               "--data", str(tmp_path / "data")])
    text = capsys.readouterr().out
    assert rc == 0, text
    assert text.splitlines()[0] == "moved to well B3 (the demo well: no position given)"
    assert "well B3; true coverage" in text
    assert out.exists()
