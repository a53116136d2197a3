"""``phasewatch characterize --frames MANIFEST.csv``: reading a series acquired elsewhere.

The analysis of such a series is checked against the EMVA 1288 reference implementation
in tests/test_characterize_emva1288.py; here, what a person gets for a manifest or a file
that cannot be used (one line naming the manifest line, no traceback) and the statistics
of more than two frames per exposure.
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path

import imageio.v3 as iio
import numpy as np
import pytest
import tifffile

from daemon.cli import main
from daemon.illumination.characterize import SeriesStats, pair_mean_variance
from daemon.illumination.manifest import ManifestError, load_series

SHAPE = (24, 32)
HEADER = "exposure_ms,kind,path"
#: A structurally complete series: two steps of lit and dark pairs and both stacks.
ROWS = [
    "1,lit,l1a.tif", "1,lit,l1b.tif", "1,dark,d1a.tif", "1,dark,d1b.tif",
    "2,lit,l2a.tif", "2,lit,l2b.tif", "2,dark,d2a.tif", "2,dark,d2b.tif",
    "2,spatial_lit,sla.tif", "2,spatial_lit,slb.tif", "2,spatial_dark,sda.tif", "2,spatial_dark,sdb.tif",
]


def write_series(folder: Path, rows: list[str], *, header: str = HEADER) -> Path:
    """The manifest and, for each row whose file is not there yet, a small 12-bit frame
    (noise only: lit ones bright, dark ones dark)."""
    rng = np.random.default_rng(0)
    for row in rows:
        name = folder / row.split(",")[-1]
        if name.suffix == ".tif" and not name.exists() and "missing" not in name.name:
            low, high = (100, 300) if "dark" in row else (1000, 4000)
            tifffile.imwrite(name, rng.integers(low, high, SHAPE).astype(np.uint16))
    manifest = folder / "manifest.csv"
    manifest.write_text("\n".join([header, *rows]) + "\n")
    return manifest


def one_line_error(capsys: pytest.CaptureFixture[str], manifest: Path, *extra: str) -> str:
    rc = main(["characterize", "--frames", str(manifest), "--out", str(manifest.parent / "out"), *extra])
    _, err = capsys.readouterr()
    lines = [line for line in err.splitlines() if line.startswith("phasewatch:")]
    assert rc == 2 and len(lines) == 1 and "Traceback" not in err, err
    return lines[0]


def replace_row(index: int, row: str) -> Callable[[Path], list[str]]:
    def edit(folder: Path) -> list[str]:
        return [row if i == index else r for i, r in enumerate(ROWS)]

    return edit


def junk(name: str, row: str) -> Callable[[Path], list[str]]:
    def edit(folder: Path) -> list[str]:
        (folder / name).write_text("these are not pixels\n")
        return [*ROWS[:4], row, *ROWS[5:]]

    return edit


def image(name: str, row: str, pixels: np.ndarray) -> Callable[[Path], list[str]]:
    def edit(folder: Path) -> list[str]:
        path = folder / name
        tifffile.imwrite(path, pixels) if path.suffix == ".tif" else iio.imwrite(path, pixels)
        return [*ROWS[:4], row, *ROWS[5:]]

    return edit


# Line numbers count the header as line 1: ROWS[i] is on line i + 2.
CASES = {
    "missing file": (
        replace_row(4, "2,lit,missing.tif"),
        "manifest.csv line 6 (lit, 2 ms, missing.tif): no such file ",
    ),
    "unknown kind": (
        replace_row(1, "1,flat,l1b.tif"),
        "manifest.csv line 3 (flat, 1 ms, l1b.tif): unknown kind 'flat'; expected one of lit, dark, spatial_lit, spatial_dark",
    ),
    "one frame for an exposure": (
        lambda folder: [r for r in ROWS if r != "2,lit,l2b.tif"],
        "manifest.csv line 6 (lit, 2 ms, l2a.tif): the only lit frame at 2 ms; two or more are needed at each exposure",
    ),
    "one frame of a stack": (
        lambda folder: [r for r in ROWS if r != "2,spatial_dark,sdb.tif"],
        "(spatial_dark, 2 ms, sda.tif): the only spatial_dark frame at 2 ms; two or more are needed",
    ),
    "mixed shapes": (
        image("wide.tif", "2,lit,wide.tif", np.zeros((24, 40), np.uint16)),
        "manifest.csv line 6 (lit, 2 ms, wide.tif): a 40x24 frame, but line 2 (l1a.tif) is 32x24; all frames must be one size",
    ),
    "unreadable TIFF": (
        junk("junk.tif", "2,lit,junk.tif"),
        "manifest.csv line 6 (lit, 2 ms, junk.tif): cannot read the image (not a TIFF file",
    ),
    "unreadable PNG": (
        junk("junk.png", "2,lit,junk.png"),
        "manifest.csv line 6 (lit, 2 ms, junk.png): cannot read the image (",
    ),
    "colour image": (
        image("colour.png", "2,lit,colour.png", np.zeros((*SHAPE, 3), np.uint8)),
        "manifest.csv line 6 (lit, 2 ms, colour.png): an image of shape (24, 32, 3); a monochrome frame is needed",
    ),
    "floating-point pixels": (
        image("float.tif", "2,lit,float.tif", np.zeros(SHAPE, np.float32)),
        "manifest.csv line 6 (lit, 2 ms, float.tif): float32 pixels; the camera's raw integer grey values are needed",
    ),
    "lit without dark": (
        lambda folder: [*ROWS, "3,lit,l2a.tif", "3,lit,l2b.tif"],
        "manifest.csv line 14 (lit, 3 ms, l2a.tif): no dark frames at 3 ms; every lit exposure needs its dark frames",
    ),
    "no stacks": (
        lambda folder: ROWS[:8],
        "manifest.csv: no spatial_lit rows; DSNU and PRNU need a stack of lit frames (two or more, one exposure)",
    ),
    "stacks at different exposures": (
        lambda folder: [*ROWS[:10], "1,spatial_dark,sda.tif", "1,spatial_dark,sdb.tif"],
        "manifest.csv line 12 (spatial_dark, 1 ms, sda.tif): spatial_dark at 1 ms but spatial_lit at 2 ms; "
        "both stacks need one exposure",
    ),
    "no lit frames": (
        lambda folder: [r for r in ROWS if ",lit," not in r],
        "manifest.csv: no lit rows; the photon transfer needs lit and dark frames at each exposure",
    ),
    "bad exposure": (
        replace_row(2, "fast,dark,d1a.tif"),
        "manifest.csv line 4: exposure_ms 'fast' is not a positive number of milliseconds",
    ),
    "negative exposure": (
        replace_row(2, "-1,dark,d1a.tif"),
        "manifest.csv line 4: exposure_ms '-1' is not a positive number of milliseconds",
    ),
    "missing value": (
        replace_row(2, "1,dark"),
        "manifest.csv line 4: 2 values; expected 3 (exposure_ms,kind,path)",
    ),
}


@pytest.mark.parametrize("case", sorted(CASES))
def test_an_unusable_manifest_is_one_line_naming_the_row(case: str, tmp_path: Path, capsys) -> None:
    edit, expected = CASES[case]
    rows = edit(tmp_path)
    manifest = write_series(tmp_path, rows)
    assert expected in one_line_error(capsys, manifest)


def test_stacks_at_two_exposures_name_both(tmp_path: Path, capsys) -> None:
    # Both stacks must be at one exposure; a stack split over two is named too.
    rows = [*ROWS, "1,spatial_dark,sdc.tif", "1,spatial_dark,sdd.tif"]
    error = one_line_error(capsys, write_series(tmp_path, rows))
    assert "manifest.csv line 14 (spatial_dark, 1 ms, sdc.tif): spatial_dark frames at 2 exposures (1, 2 ms); one stack is needed" in error


def test_an_unusable_header_or_manifest(tmp_path: Path, capsys) -> None:
    manifest = write_series(tmp_path, ROWS, header="exposure,kind,file")
    assert "manifest.csv line 1: the header is exposure,kind,file; expected the columns exposure_ms,kind,path" in one_line_error(
        capsys, manifest
    )
    assert f"{tmp_path / 'none.csv'}: no such manifest" in one_line_error(capsys, tmp_path / "none.csv")


def test_live_run_options_are_refused_with_frames_and_bit_depth_without(tmp_path: Path, capsys) -> None:
    manifest = write_series(tmp_path, ROWS)
    assert "--gain-db, --steps: for a live run only, not with --frames" in one_line_error(
        capsys, manifest, "--gain-db", "6", "--steps", "10"
    )
    rc = main(["characterize", "--bit-depth", "12", "--out", str(tmp_path / "out")])
    assert rc == 2 and "--bit-depth: with --frames only" in capsys.readouterr().err


def test_comments_blank_lines_column_order_and_paths_above_the_manifest(tmp_path: Path) -> None:
    frames = tmp_path / "frames"
    frames.mkdir()
    write_series(frames, ROWS)
    folder = tmp_path / "analysis"
    folder.mkdir()
    rows = [f"../frames/{r.split(',')[2]},{r.split(',')[1]},{r.split(',')[0]}" for r in ROWS]
    manifest = folder / "series.csv"
    manifest.write_text("# taken on the bench camera\npath,kind,exposure_ms\n\n" + "\n".join(rows) + "\n")
    # Random frames have no photon transfer, but they are read: the analysis is what refuses.
    series = load_series(manifest)
    assert series.frames == len(ROWS) and series.measurement.bit_depth == 12
    assert [p.exposure_ms for p in series.measurement.points] == [1.0, 2.0]


def test_a_stack_smaller_than_the_other_is_accounted_for(tmp_path: Path) -> None:
    rows = [*ROWS, "2,spatial_lit,slc.tif", "2,spatial_lit,sld.tif"]
    stacks = load_series(write_series(tmp_path, rows)).measurement.stacks
    assert (stacks.frames, stacks.dark_count) == (4, 2)


def test_values_past_sixteen_bits_need_the_bit_depth(tmp_path: Path, capsys) -> None:
    rows = [*ROWS[:4], "2,lit,big.tif", *ROWS[5:]]
    tifffile.imwrite(tmp_path / "big.tif", np.full(SHAPE, 70001, np.uint32))
    error = one_line_error(capsys, write_series(tmp_path, rows))
    assert "manifest.csv: values reach 70001, beyond 16 bits; give the camera's bit depth with --bit-depth" in error
    with pytest.raises(ManifestError, match="--bit-depth must be between 1 and 32"):
        load_series(tmp_path / "manifest.csv", bit_depth=0)


def test_more_than_two_frames_per_exposure() -> None:
    # EMVA 1288's pair formula σ²_y = ⟨(y_A − y_B)²⟩/2 − (μ_A − μ_B)²/2, generalised to L
    # frames: same result for two, the true variance (set here) for more, despite a
    # fixed pattern and a drift of the mean from frame to frame.
    rng = np.random.default_rng(3)
    pattern = 500.0 + 40.0 * rng.standard_normal((200, 200))
    frames = [pattern + 4.0 * rng.standard_normal(pattern.shape) + 3.0 * k for k in range(8)]
    two = SeriesStats()
    for f in frames[:2]:
        two.add(f)
    assert two.mean_variance() == pytest.approx(pair_mean_variance(frames[0], frames[1]), rel=1e-12)
    eight = SeriesStats(full_scale_dn=520.0)
    for f in frames:
        eight.add(f)
    mean, var = eight.mean_variance()
    assert mean == pytest.approx(float(pattern.mean()) + 3.0 * 3.5, abs=0.05)
    assert var == pytest.approx(16.0, rel=0.01)
    assert eight.saturated_fraction == pytest.approx(np.mean(np.array(frames) >= 520.0))
