"""The ``timelapse`` and ``export`` commands: plan checks, one-line errors, list/show/export."""

from __future__ import annotations

import csv
import json
from pathlib import Path

import ome_types
import pytest
import tifffile

from daemon.cli import main
from daemon.storage.index import open_index

REPO = Path(__file__).resolve().parent.parent

TINY_PLAN = """
name = "LR-0412 CLI check"
vessel = "96-well"
wells = ["B2", "C3"]
sites_per_well = 2
interval_s = {interval}
count = {count}
autofocus = "off"
correction = false
save = "raw"
"""


def write_small_profile(folder: Path) -> Path:
    """The shipped sim profile with a 320 x 240 camera, as a file (the CLI takes a path)."""
    text = (REPO / "hw_profiles" / "sim.toml").read_text()
    text = text.replace("width_px = 1280", "width_px = 320").replace("height_px = 960", "height_px = 240")
    path = folder / "sim-small.toml"
    path.write_text(text)
    return path


@pytest.fixture
def small_profile(tmp_path: Path) -> Path:
    return write_small_profile(tmp_path)


def _plan(tmp_path: Path, *, interval: float = 600, count: int = 2, extra: str = "") -> Path:
    path = tmp_path / "plan.toml"
    path.write_text(TINY_PLAN.format(interval=interval, count=count) + extra)
    return path


def _start(plan: Path, profile: Path, data: Path) -> int:
    return main(["timelapse", "start", str(plan), "--profile", str(profile), "--data", str(data),
                 "--sim-speed", "2000", "--quiet"])


def test_run_list_show_and_export(tmp_path: Path, small_profile: Path, capsys: pytest.CaptureFixture[str]) -> None:
    data = tmp_path / "data"
    assert _start(_plan(tmp_path), small_profile, data) == 0
    out = capsys.readouterr().out
    assert "4 positions" in out and "completed" in out and "phasewatch export 1" in out

    assert main(["timelapse", "list", "--data", str(data), "--json"]) == 0
    (row,) = json.loads(capsys.readouterr().out)
    assert (row["state"], row["frames"], row["time_points"]["done"]) == ("completed", 8, 2)

    assert main(["timelapse", "show", "1", "--data", str(data)]) == 0
    shown = capsys.readouterr().out
    # Numbered from 1 for people, as the progress lines are.
    assert "time point    1: done" in shown and "time point    2: done" in shown and "time point    0" not in shown

    out_dir = tmp_path / "export"
    assert main(["export", "1", "--data", str(data), "--output", str(out_dir), "--stacks"]) == 0
    printed = capsys.readouterr().out
    assert "8 frames" in printed
    with open(out_dir / "frames.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert len(rows) == 8 and {r["well"] for r in rows} == {"B2", "C3"}
    assert all(float(r["focus_score"]) > 0 for r in rows)
    with open(out_dir / "growth.csv", newline="") as fh:
        growth = list(csv.DictReader(fh))
    # Two time points per well are too few for a growth fit: said so, never a doubling time.
    assert {g["well"] for g in growth} == {"B2", "C3"}
    assert all(g["ok"] == "no" and g["doubling_time_h"] == "" and g["note"] for g in growth)
    stacks = sorted(out_dir.glob("*.ome.tif"))
    assert [p.name for p in stacks] == ["B2-1_raw.ome.tif", "B2-2_raw.ome.tif", "C3-1_raw.ome.tif", "C3-2_raw.ome.tif"]
    with tifffile.TiffFile(stacks[0]) as tif:
        assert tif.series[0].axes == "TYX" and tif.series[0].shape == (2, 240, 320)
    # OME 2016-06 XSD via ome-types (general-purpose OME data-model library).
    ome = ome_types.from_tiff(stacks[0], validate=True)
    assert len(ome.images[0].pixels.planes) == 2


def test_plan_that_cannot_fit_its_interval_is_refused_in_one_line(
    tmp_path: Path, small_profile: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    code = _start(_plan(tmp_path, interval=2), small_profile, tmp_path / "data")
    err = capsys.readouterr().err
    assert code == 2
    assert err.count("\n") == 1 and "interval_s" in err and "Traceback" not in err
    assert not (tmp_path / "data" / "index.sqlite").exists()


def test_plan_with_unknown_key_names_it(tmp_path: Path, small_profile: Path, capsys: pytest.CaptureFixture[str]) -> None:
    code = _start(_plan(tmp_path, extra='autofokus = "track"\n'), small_profile, tmp_path / "data")
    err = capsys.readouterr().err
    assert code == 2 and "autofokus" in err and "autofocus" in err and err.count("\n") == 1


def test_unfinished_time_lapse_blocks_a_new_start_until_aborted(
    tmp_path: Path, small_profile: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    data = tmp_path / "data"
    assert _start(_plan(tmp_path, count=1), small_profile, data) == 0
    with open_index(data) as index:
        index.set_state(1, "running")  # as a kill mid-run would leave it
    capsys.readouterr()
    assert _start(_plan(tmp_path, count=1), small_profile, data) == 2
    assert "unfinished time-lapse 1" in capsys.readouterr().err
    assert main(["timelapse", "abort", "1", "--data", str(data)]) == 0
    assert "aborted" in capsys.readouterr().out
    assert _start(_plan(tmp_path, count=1), small_profile, data) == 0


def test_export_of_unknown_time_lapse_is_one_line(tmp_path: Path, small_profile: Path, capsys: pytest.CaptureFixture[str]) -> None:
    data = tmp_path / "data"
    assert main(["export", "3", "--data", str(data)]) == 2
    assert "no phasewatch index" in capsys.readouterr().err
    assert _start(_plan(tmp_path, count=1), small_profile, data) == 0
    capsys.readouterr()
    assert main(["export", "3", "--data", str(data)]) == 2
    err = capsys.readouterr().err
    assert "no time-lapse 3" in err and err.count("\n") == 1


def test_demo_plan_loads_and_fits_the_simulated_scope() -> None:
    from daemon.profile import load_profile
    from daemon.timelapse.plan import check_fits, field_of_view_um, load_plan, plan_positions
    from daemon.vessels.stage_map import sim_stage_map

    profile = load_profile("sim")
    plan = load_plan(REPO / "examples" / "larkspur-demo.toml")
    positions = plan_positions(plan, plan.get_vessel(), sim_stage_map(profile), field_of_view_um(profile))
    assert len(positions) == 4
    check_fits(profile, plan, positions)  # raises ConfigError if it could not run


def test_pause_and_resume_commands(tmp_path: Path, small_profile: Path, capsys: pytest.CaptureFixture[str]) -> None:
    from daemon.timelapse.resume import run_lock

    data = tmp_path / "data"
    assert _start(_plan(tmp_path, count=1), small_profile, data) == 0
    with open_index(data) as index:
        index.set_state(1, "running")
    capsys.readouterr()
    # While another process holds the folder, the request goes through the index.
    with run_lock(data):
        assert main(["timelapse", "pause", "1", "--data", str(data)]) == 0
        assert "asked the running process" in capsys.readouterr().out
        with open_index(data) as index:
            assert index.peek_request(1) == "pause" and index.timelapse(1)["state"] == "running"
        # And a second acquiring process is refused, in one line.
        assert _start(_plan(tmp_path, count=1), small_profile, data) == 2
        assert "another phasewatch process" in capsys.readouterr().err
    with open_index(data) as index:
        index.take_request(1)
    # With nobody running it, pause applies at once; resume lifts it and finishes the run.
    assert main(["timelapse", "pause", "1", "--data", str(data)]) == 0
    with open_index(data) as index:
        assert index.timelapse(1)["state"] == "paused"
    assert main(["timelapse", "resume", "--profile", str(small_profile), "--data", str(data),
                 "--sim-speed", "2000", "--quiet"]) == 0
    with open_index(data) as index:
        assert index.timelapse(1)["state"] == "completed"


def test_ctrl_c_is_stopped_by_the_user_and_the_printed_hint_resumes_at_the_saved_speed(
    tmp_path: Path, small_profile: Path
) -> None:
    """Ctrl-C (SIGINT) leaves the time-lapse unfinished, recorded as stopped by the user; the
    printed hint is exactly what to type, and resuming keeps the simulated clock's speed."""
    import shlex
    import signal
    import subprocess
    import sys
    import time

    data = tmp_path / "data"
    plan = _plan(tmp_path, interval=600, count=3)
    cmd = [sys.executable, "-m", "daemon.cli", "timelapse", "start", str(plan), "--profile", str(small_profile),
           "--data", str(data), "--sim-speed", "20"]
    proc = subprocess.Popen(cmd, cwd=REPO, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)
    deadline = time.monotonic() + 120
    lines: list[str] = []
    assert proc.stdout is not None
    for line in proc.stdout:  # bounded: the process ends on SIGINT or by itself
        lines.append(line)
        if any(f"time point 1/3 {end}" in line for end in ("done", "partial", "failed")):
            proc.send_signal(signal.SIGINT)
        if time.monotonic() > deadline:
            proc.kill()
            break
    assert proc.wait(30) == 0, "".join(lines)
    hint = next(ln for ln in lines if "continue it with:" in ln)
    assert "stopped by the user" in hint
    typed = shlex.split(hint.split("continue it with:", 1)[1])
    assert typed[:3] == ["phasewatch", "timelapse", "resume"] and "--sim-speed" not in typed
    index = open_index(data)
    try:
        assert index.timelapse(1)["stop_reason"] == "stopped by the user"
    finally:
        index.close()
    saved = json.loads((data / "sim-clock.json").read_text())
    assert saved["speed"] == 20.0  # what resume goes on at, as no --sim-speed is typed
