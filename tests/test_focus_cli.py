"""``phasewatch focus`` on a small simulated scope: JSON and text output, clear errors."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from daemon.cli import main
from daemon.profile import PROFILE_DIR


def small_profile(tmp_path: Path) -> Path:
    """The shipped sim profile with 320x240 frames and a dense culture (fast, populated)."""
    text = (PROFILE_DIR / "sim.toml").read_text()
    for old, new in (
        ("width_px = 1280", "width_px = 320"),
        ("height_px = 960", "height_px = 240"),
        ("seeding_per_mm2 = 60.0", "seeding_per_mm2 = 600.0"),
    ):
        assert old in text, old
        text = text.replace(old, new, 1)
    path = tmp_path / "small-sim.toml"
    path.write_text(text)
    return path


def test_focus_json_reports_the_plane_beside_the_simulators_truth(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    profile = small_profile(tmp_path)
    rc = main(["focus", "--profile", str(profile), "--json", "--sim-speed", "200", "--well", "C4"])
    out = json.loads(capsys.readouterr().out)
    assert rc == 0, out["message"]
    assert out["found"] is True
    for key in ("z_um", "score", "frames", "elapsed_s", "confidence", "curve", "true_z_um"):
        assert key in out
    assert out["frames"] == len(out["curve"]) and out["frames"] <= 20
    # Depth of field of the 10x/0.25 profile: d = λ/NA² + e/(M·NA) = 10.3 um
    # (Inoué & Spring, Video Microscopy); the target is |error| <= d/4.
    assert abs(out["z_um"] - out["true_z_um"]) <= 10.3 / 4
    assert out["curve"][-1]["z_um"] == pytest.approx(out["z_um"], abs=0.01)
    # The sim scope homes on connect (z = 0), out of reach of the focal plane: the search
    # centres on the profile's nominal plane (1480 um) instead and sweeps up from the
    # bottom of the cold range, max(150 um, 15 d) below it.
    assert out["curve"][0]["z_um"] == pytest.approx(1480.0 - max(150.0, 15 * 10.3), abs=0.01)


def test_focus_text_draws_the_curve(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    profile = small_profile(tmp_path)
    rc = main(["focus", "--profile", str(profile), "--sim-speed", "200", "--well", "C4", "--metric", "brenner"])
    text = capsys.readouterr().out
    assert rc == 0
    assert "focus found" in text and "simulator:" in text and "(brenner)" in text
    rows = [line for line in text.splitlines() if "|" in line]
    assert len(rows) >= 5
    assert sum("<" in row for row in rows) == 1  # the chosen plane is marked once
    zs = [float(row.split("|")[0]) for row in rows]
    assert zs == sorted(zs)


@pytest.mark.parametrize(
    "extra, fragment",
    [
        (["--roi", "300", "0", "100", "100"], "--roi"),
        (["--range-um", "-5"], "--range-um"),
        (["--well", "Q77"], "--well"),
    ],
)
def test_bad_options_give_one_line_and_exit_2(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], extra: list[str], fragment: str
) -> None:
    rc = main(["focus", "--profile", str(small_profile(tmp_path)), "--sim-speed", "200", *extra])
    err = capsys.readouterr().err.strip()
    assert rc == 2
    assert fragment in err and "\n" not in err and "Traceback" not in err


def test_empty_well_exits_1_and_says_so(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # H12 is seeded empty in hw_profiles/sim.toml.
    rc = main(["focus", "--profile", str(small_profile(tmp_path)), "--json", "--sim-speed", "200", "--well", "H12"])
    out = json.loads(capsys.readouterr().out)
    assert rc == 1
    assert out["found"] is False and "no focus found" in out["message"]


def test_focus_without_a_position_goes_to_the_demo_well_and_says_so(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # The simulated stage homes off the plate; like capture, focus goes to the demo well.
    profile = small_profile(tmp_path)
    rc = main(["focus", "--profile", str(profile), "--sim-speed", "200", "--data", str(tmp_path / "data")])
    text = capsys.readouterr().out
    assert rc == 0, text
    assert text.splitlines()[0] == "moved to well B3 (the demo well: no position given)"
    assert "focus found" in text
    # With a position given nothing is said about the demo well.
    rc = main(["focus", "--profile", str(profile), "--sim-speed", "200", "--well", "C4", "--json"])
    captured = capsys.readouterr()
    assert rc == 0 and "demo well" not in captured.out + captured.err
    json.loads(captured.out)
