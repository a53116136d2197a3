"""``phasewatch check --probe``: which controller dialect and firmware it found (on the
simulated scope, whose board speaks either dialect), and what the camera offers, with the
warnings a time-lapse needs to see."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import pytest

from daemon.cli import main
from daemon.commands import check
from daemon.profile import PROFILE_DIR
from tests.test_camera_probe import listing
from drivers.camera_probe import v4l2_offer

pytestmark = pytest.mark.timeout(120)

SIM = (PROFILE_DIR / "sim.toml").read_text()


def sim_profile(tmp_path: Path, dialect: str) -> Path:
    # A fast clock: homing on connect takes seconds of simulated time.
    text = SIM.replace('[stage]\ndriver = "sim"', f'[stage]\ndriver = "sim"\ndialect = "{dialect}"', 1)
    text = text.replace("clock_speed = 1.0", "clock_speed = 50.0", 1)
    path = tmp_path / f"bench-{dialect}.toml"
    path.write_text(text)
    return path


@pytest.mark.parametrize(
    ("dialect", "firmware", "checksums"),
    [("reprap", "firmware: phasewatch-sim motion 1.0", True), ("grbl", "[VER:1.1h.20190825:phasewatch-sim]", False)],
)
def test_probe_reports_the_dialect_and_firmware_it_found(tmp_path, capsys, dialect, firmware, checksums):
    assert main(["check", str(sim_profile(tmp_path, dialect)), "--probe", "--json"]) == 0
    report = json.loads(capsys.readouterr().out)
    found = report["probe"]["controller_found"]
    assert found["dialect"] == dialect
    assert found["how"].startswith("found at connect")
    assert found["firmware"].startswith(firmware)
    assert found["line_checksums"] is checksums
    assert report["probe"]["camera_offer"] == "nothing to probe: the sim camera is not a device"
    assert report["probe"]["warnings"] == []
    # Homed on connect, in either dialect.
    assert report["probe"]["position_um"] == {"x": 0.0, "y": 0.0, "z": 0.0}


class _FakeCamera:
    async def probe(self) -> dict[str, object]:
        return v4l2_offer(*listing("webcam-locked")).as_dict()

    def describe(self) -> dict[str, object]:
        return {"driver": "opencv"}


class _FakeMotion:
    def describe(self) -> dict[str, object]:
        return {"driver": "gcode", "dialect": "grbl", "dialect_name": "grbl", "dialect_found": "set in the profile",
                "firmware": "[VER:1.1h.20190825:]", "line_checksums": False}


class _FakeScope:
    """Stands in for the hardware a bench would have: a webcam and a grbl board."""

    camera = _FakeCamera()
    motion = _FakeMotion()

    async def __aenter__(self) -> _FakeScope:
        return self

    async def __aexit__(self, *exc: Any) -> None:
        return None

    async def capture(self) -> Any:
        import numpy as np

        from drivers.base import Frame

        return Frame(pixels=np.full((8, 8), 100, np.uint8), t_s=0.0, exposure_ms=20.0, gain_db=0.0, bit_depth=8)

    async def position(self) -> Any:
        from drivers.base import Position

        return Position(0.0, 0.0, 0.0)


def test_probe_prints_camera_warnings_one_per_line(capsys, monkeypatch):
    monkeypatch.setattr(check, "build_scope", lambda profile: _FakeScope())
    assert main(["check", "usb-gcode", "--probe"]) == 0
    out = capsys.readouterr().out
    warnings = [line for line in out.splitlines() if line.startswith("  warning: ")]
    assert any("automatic exposure cannot be turned off" in w for w in warnings)
    assert any("automatic white balance cannot be turned off" in w for w in warnings)
    assert len(warnings) == 2
    assert "controller_found: {'dialect': 'grbl'" in out
    assert any("camera_offer:" in line and "'source': 'v4l2-ctl'" in line for line in out.splitlines())
