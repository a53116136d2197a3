"""``phasewatch commission`` on the simulated scope: every figure against the simulator's
truth and the targets (pixel size 0.5 %, rotation 0.1 deg, backlash 1 um or 10 %,
settling 20 %), what it writes, and the refusals."""

from __future__ import annotations

import asyncio
import json
import math
import re
import tomllib
from pathlib import Path
from typing import Any

import cv2
import numpy as np
import pytest

from daemon.cli import main
from daemon.commission import CommissionRefused
from daemon.commission.backlash import focus_sweep_plan
from daemon.commission.report import settle_tolerance_um, text_report, truth_of, write_results
from daemon.commission.run import commission, measure_map
from daemon.commission.session import Session, commissioning_profile
from daemon.hardware import build_scope
from daemon.profile import PROFILE_DIR, load_profile
from daemon.vessels.stage_map import well_position_um

pytestmark = pytest.mark.timeout(900)

# The demo profile with a smaller frame (640 x 480, 247 x 185 um): the same imperfections.
SMALL = (PROFILE_DIR / "sim.toml").read_text().replace("width_px = 1280", "width_px = 640").replace(
    "height_px = 960", "height_px = 480"
)


def small_profile(folder: Path, text: str = SMALL) -> Path:
    """The profile written into ``folder``, with a data folder beside it."""
    (folder / "data").mkdir(exist_ok=True)
    path = folder / "bench.toml"
    path.write_text(text)
    return path


@pytest.fixture(scope="module")
def run(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    """One whole run over well D6 at clock speed 1 (the settling is timed on the clock)."""
    folder = tmp_path_factory.mktemp("commission")
    profile = load_profile(small_profile(folder))

    async def go() -> dict[str, Any]:
        scope = build_scope(commissioning_profile(profile), sim_speed=1.0, data_dir=folder / "data")
        async with scope, scope.claim("test"):
            x, y = well_position_um(folder / "data", profile, "D6")
            await scope.move_to(x_um=x, y_um=y)
            mark = len(scope.truth.emulator.received)
            result = await commission(scope)
            truth = truth_of(scope.truth, settle_tolerance_um(result))
            sent = [line for _, line in scope.truth.emulator.received[mark:]]
        report = write_results(result, profile, truth, folder / "out")
        return {"result": result, "truth": truth, "report": report, "sent": sent, "profile": profile, "folder": folder}

    return asyncio.run(go())


def test_pixel_size_within_half_a_percent(run: dict[str, Any]) -> None:
    truth = run["truth"]
    estimate = run["result"].map_fit.map.parameters()["pixel_size_um"]
    nominal = run["profile"].optics.pixel_size_um
    assert abs(truth.pixel_size_um / nominal - 1) > 0.02  # the simulated camera is a few per cent off nominal
    assert estimate == pytest.approx(truth.pixel_size_um, rel=0.005)
    assert run["report"]["targets"]["pixel_size"]["met"]


def test_rotation_within_a_tenth_of_a_degree(run: dict[str, Any]) -> None:
    truth = run["truth"]
    params = run["result"].map_fit.map.parameters()
    assert 1.0 <= truth.rotation_deg <= 2.0
    assert params["rotation_deg"] == pytest.approx(truth.rotation_deg, abs=0.1)
    assert params["skew_deg"] == pytest.approx(0.0, abs=0.3)  # the simulated stage's axes are square
    assert params["mirrored"] is False
    assert run["report"]["targets"]["rotation"]["met"]


@pytest.mark.parametrize("axis", ["x", "y", "z"])
def test_backlash_within_a_micrometre_or_ten_percent(run: dict[str, Any], axis: str) -> None:
    true = run["truth"].backlash_um[axis]
    result = run["result"]
    estimate = result.focus_backlash.estimate_um if axis == "z" else result.backlash[axis].estimate_um
    assert true > 0
    assert abs(estimate - true) <= max(1.0, 0.1 * true)
    assert run["report"]["targets"][f"backlash_{axis}"]["met"]


def test_settling_time_within_twenty_percent(run: dict[str, Any]) -> None:
    truth_ms = run["truth"].settle_ms
    assert truth_ms > 100.0  # the simulated stage rings for longer than the demo profile waits (40 ms)
    assert 1000 * run["result"].settle_s == pytest.approx(truth_ms, rel=0.2)
    for axis in run["result"].settle:
        assert axis.still and axis.fit is not None and axis.fit.r2 > 0.9
    assert run["report"]["targets"]["settle_time"]["met"]


def test_repeatability_is_the_simulators_stopping_scatter(run: dict[str, Any]) -> None:
    sigma = run["truth"].repeatability_um
    arrivals = len(run["result"].repeatability.positions_um)
    assert arrivals == 11
    # 11 arrivals: the sample standard deviation lies within 0.4-1.7 sigma with probability
    # > 99.8 % per axis (chi-square with 10 degrees of freedom, from memory).
    for sd in run["result"].repeatability.sd_um:
        assert 0.4 * sigma <= sd <= 1.7 * sigma


def test_report_puts_the_simulators_truth_beside_every_estimate(run: dict[str, Any]) -> None:
    report = run["report"]
    assert report["truth"] == "simulator"
    for figure in (
        report["map"]["pixel_size_um"], report["map"]["rotation_deg"], report["map"]["skew_deg"],
        report["settle"]["settle_ms"], report["backlash_um"]["x"], report["backlash_um"]["y"],
        report["backlash_um"]["z"], report["repeatability_um"]["sd_x"], report["repeatability_um"]["sd_y"],
    ):
        assert {"estimate", "simulator", "error"} <= set(figure)
    assert all(t["met"] for t in report["targets"].values()), report["targets"]
    saved = json.loads(Path(report["files"]["report"]).read_text())
    assert saved["targets"] == report["targets"]
    text = text_report(report, report["files"])
    assert text.count("(simulator:") >= 9 and "MISSED" not in text


def test_exposure_fills_the_range_without_saturating(run: dict[str, Any]) -> None:
    exposure = run["result"].exposure
    assert exposure.high_fraction == pytest.approx(0.8, abs=0.05)
    assert exposure.saturated_fraction <= 1e-4


def test_patched_profile_loads_with_check_and_carries_the_measurements(run: dict[str, Any], capsys: pytest.CaptureFixture[str]) -> None:
    files = run["report"]["files"]
    assert main(["check", files["profile"]]) == 0
    assert "valid" in capsys.readouterr().out
    patched = load_profile(files["profile"])
    params = run["result"].map_fit.map.parameters()
    assert patched.optics.pixel_size_um == pytest.approx(params["pixel_size_um"], rel=1e-4)
    assert patched.camera_mount.rotation_deg == pytest.approx(params["rotation_deg"], abs=1e-3)
    assert patched.camera_mount.measured
    assert patched.stage.backlash_x_um == pytest.approx(run["result"].backlash["x"].estimate_um, abs=0.01)
    assert patched.stage.settle_ms >= 1000 * run["result"].settle_s
    assert patched.focus.backlash_um == pytest.approx(run["result"].focus_backlash.estimate_um, abs=0.01)
    # The rest of the profile is as it was, [sim] included.
    assert patched.sim == run["profile"].sim and patched.focus.z_safe_max_um == run["profile"].focus.z_safe_max_um
    # The patch alone: the same values, each key under a comment saying how it was measured.
    text = Path(files["profile patch"]).read_text()
    patch = tomllib.loads(text)
    assert patch["camera_mount"]["rotation_deg"] == patched.camera_mount.rotation_deg
    lines = text.splitlines()
    for k, line in enumerate(lines):
        if re.match(r"^\w+ = ", line):
            assert lines[k - 1].startswith("# "), line


def test_plots_are_written(run: dict[str, Any]) -> None:
    files = run["report"]["files"]
    for name in ("registration plot", "backlash plot", "settle plot"):
        image = cv2.imread(files[name])
        assert image is not None and image.shape[0] > 200 and image.shape[1] > 400, name


def test_every_move_stayed_inside_the_soft_limits(run: dict[str, Any]) -> None:
    profile = run["profile"]
    words: dict[str, list[float]] = {"X": [], "Y": [], "Z": []}
    for line in run["sent"]:
        if line.startswith(("G0", "G1")):
            for word in line.split()[1:]:
                if word[0] in words:
                    words[word[0]].append(float(word[1:]) * 1000.0)
    assert words["X"] and words["Z"]
    assert max(words["Z"]) <= profile.focus.z_safe_max_um and min(words["Z"]) >= profile.focus.z_min_um
    assert profile.stage.x_min_um <= min(words["X"]) and max(words["X"]) <= profile.stage.x_max_um
    assert profile.stage.y_min_um <= min(words["Y"]) and max(words["Y"]) <= profile.stage.y_max_um


# -- the map on a mirrored camera ------------------------------------------------------------


def test_a_mirrored_camera_is_found_mirrored(tmp_path: Path) -> None:
    text = SMALL.replace("mirrored = false", "mirrored = true")
    profile = load_profile(small_profile(tmp_path, text))

    async def go() -> dict[str, float | bool]:
        scope = build_scope(commissioning_profile(profile), sim_speed=20.0, data_dir=tmp_path / "data")
        async with scope, scope.claim("test"):
            x, y = well_position_um(tmp_path / "data", profile, "C5")
            await scope.move_to(x_um=x, y_um=y)
            await scope.move_to(z_um=scope.truth.focus_z_um(x, y, scope.clock.now()))  # the harness focuses
            session = Session(scope)
            fit = await measure_map(session, x, y, 30.0, 5)
            return fit.map.parameters()

    params = asyncio.run(go())
    assert params["mirrored"] is True
    assert params["rotation_deg"] == pytest.approx(1.6, abs=0.15)
    assert params["pixel_size_um"] == pytest.approx(0.375 * 1.028, rel=0.005)


# -- refusals --------------------------------------------------------------------------------


def refused(capsys: pytest.CaptureFixture[str], argv: list[str]) -> str:
    assert main(argv) == 1
    err = capsys.readouterr().err
    lines = [line for line in err.splitlines() if not line.startswith(("commission:", "commissioning "))]
    assert len(lines) == 1 and lines[0].startswith("phasewatch: commission refused: "), err
    assert "Traceback" not in err
    return lines[0]


def test_a_field_without_texture_is_refused(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # hw_profiles/sim.toml seeds no cells in well H12.
    path = small_profile(tmp_path)
    line = refused(capsys, ["commission", "--profile", str(path), "--well", "H12", "--sim-speed", "50",
                            "--data", str(tmp_path / "data"), "--out", str(tmp_path / "out")])
    assert "no texture" in line
    assert not (tmp_path / "out").exists()


def test_a_dark_lamp_is_refused_and_said_so_in_json(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = small_profile(tmp_path, SMALL.replace("level = 1.0", "level = 0.0"))
    assert main(["commission", "--profile", str(path), "--well", "D6", "--sim-speed", "50", "--json",
                 "--data", str(tmp_path / "data"), "--out", str(tmp_path / "out")]) == 1
    captured = capsys.readouterr()
    answer = json.loads(captured.out)
    assert answer["commissioned"] is False and "lamp is off" in answer["refused"]
    assert "lamp is off" in captured.err


def test_a_field_too_near_the_limits_is_refused_before_anything_moves(tmp_path: Path) -> None:
    profile = load_profile(small_profile(tmp_path))

    async def go() -> tuple[str, list[str]]:
        scope = build_scope(commissioning_profile(profile), sim_speed=50.0, data_dir=tmp_path / "data")
        async with scope, scope.claim("test"):
            await scope.move_to(x_um=60.0, y_um=40000.0)
            mark = len(scope.truth.emulator.received)
            with pytest.raises(CommissionRefused) as refusal:
                await commission(scope)
            return str(refusal.value), [line for _, line in scope.truth.emulator.received[mark:]]

    message, sent = asyncio.run(go())
    assert "soft limits" in message and "x_min_um" in message and "nothing was moved" in message
    assert not [line for line in sent if line.startswith(("G0", "G1", "G28"))]


def test_focus_sweeps_never_plan_past_the_focus_safe_limit() -> None:
    planes, takeup = focus_sweep_plan(10.0, 1500.0, 10.0, 0.0, 3000.0)
    assert planes[0] - takeup >= 0.0 and planes[-1] + takeup <= 3000.0
    assert takeup > 10.0 and len(planes) == 17
    with pytest.raises(CommissionRefused, match="z_safe_max_um"):
        focus_sweep_plan(10.0, 2980.0, 10.0, 0.0, 3000.0)


def test_bad_options_are_one_line(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["commission", "--profile", str(small_profile(tmp_path)), "--grid", "4"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "odd" in err


def test_standard_errors_are_consistent_with_the_scatter(run: dict[str, Any]) -> None:
    # The map's standard errors come from the residuals, which the stopping scatter dominates:
    # sigma / (pixel size) per axis over the grid's lever (least squares, common practice).
    fit = run["result"].map_fit
    se = fit.standard_errors()
    moves = fit.stage_moves_um[fit.used]
    sigma_px = run["truth"].repeatability_um / run["truth"].pixel_size_um
    lever_px = math.sqrt(float(np.mean(np.sum(moves**2, axis=1))) / 2.0) / run["truth"].pixel_size_um
    expected_deg = math.degrees(sigma_px / (lever_px * math.sqrt(len(moves))))
    assert se["rotation_deg"] == pytest.approx(expected_deg, rel=0.6)
