"""The driver registry, the scope it builds, and ground truth behind its interface."""

from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np
import pytest

from daemon.hardware import build_scope
from daemon.profile import load_profile
from daemon.scope import Scope
from drivers import registry
from drivers.clock import WallClock
from drivers.options import ConfigError
from drivers.sim.bench import SIM_CLOCK_FILE
from drivers.sim.truth import SimTruth
from drivers.truth import GroundTruth, NoTruth
from tests.helpers import sim_profile, sim_scope


def test_the_registered_drivers_are_listed_in_table_order() -> None:
    assert registry.camera_names() == ("sim", "opencv", "replay", "board")
    assert registry.stage_names() == ("sim", "gcode")


@pytest.mark.parametrize(
    ("kind", "name"),
    [("camera", n) for n in registry.CAMERA_MODULES] + [("stage", n) for n in registry.STAGE_MODULES],
)
def test_every_driver_declares_itself_with_documented_frozen_options(kind: str, name: str) -> None:
    spec = registry.camera_driver(name) if kind == "camera" else registry.stage_driver(name)
    assert spec.name == name and spec.summary and callable(spec.open)
    assert dataclasses.is_dataclass(spec.options)
    assert spec.options.__dataclass_params__.frozen  # type: ignore[attr-defined]
    for f in dataclasses.fields(spec.options):
        assert f.metadata.get("doc"), f"{name}: option {f.name} has no doc"
    # The simulated drivers are the ones that need [sim].
    assert spec.simulated == (name == "sim")


def test_unknown_drivers_list_the_registered_ones() -> None:
    with pytest.raises(registry.UnknownDriver, match=r"no camera driver 'webcam'; registered: 'sim', 'opencv', 'replay', 'board'"):
        registry.camera_driver("webcam")
    with pytest.raises(LookupError, match=r"no stage driver 'grbl'; registered: 'sim', 'gcode'"):
        registry.stage_driver("grbl")


def test_option_owners_name_the_driver_an_option_belongs_to() -> None:
    assert registry.option_owners("camera", "replay_dir") == ["replay"]
    assert registry.option_owners("stage", "port") == ["gcode"]
    assert registry.option_owners("camera", "exposure_ms") == []  # a common option, no driver's own


def test_real_hardware_has_no_truth() -> None:
    truth = registry.offline_truth(load_profile("usb-gcode"))
    assert isinstance(truth, NoTruth) and isinstance(truth, GroundTruth)
    assert not truth.known and truth.source == "none"
    assert truth.focus_z_um(1.0, 2.0, 3.0) is None and truth.well_at(1.0, 2.0) is None
    assert truth.blank_wells() == [] and truth.sensor(0.0) is None and truth.illumination_map() is None
    assert truth.field_coverage(1.0, 2.0, 3.0) is None and truth.well_coverage("B3", 3.0) is None


def test_a_scope_without_truth_reports_none() -> None:
    class Idle:
        def describe(self) -> dict[str, object]:
            return {}

    scope = Scope(load_profile("usb-gcode"), Idle(), Idle(), WallClock())  # type: ignore[arg-type]
    assert isinstance(scope.truth, NoTruth)
    assert scope.true_focus_z_um() is None


def test_offline_truth_of_the_simulated_scope_is_the_simulator() -> None:
    profile = sim_profile()
    truth = registry.offline_truth(profile, frame_shape=(48, 64))
    assert isinstance(truth, SimTruth) and truth.known and truth.source == "simulator"
    assert truth.world.shape == (48, 64)  # framed like the frames it judges
    assert truth.emulator is None  # no running scope
    assert truth.blank_wells() == ["H12"]  # hw_profiles/sim.toml [sim.plate] empty_wells
    x, y = truth.well_centre_um("H12")
    assert truth.well_at(x, y) == "H12"
    t_s = truth.world.t0_s + 48 * 3600.0
    assert truth.field_coverage(x, y, t_s) == 0.0  # the empty well holds no cells
    cx, cy = truth.well_centre_um("B3")
    assert truth.field_coverage(cx, cy, t_s) == truth.world.true_confluence(cx, cy, t_s)
    assert truth.field_coverage(cx + 4500.0, cy, t_s) is None  # between wells
    assert truth.well_coverage("B3", t_s) == truth.world.true_well_coverage("B3", t_s)
    assert truth.focus_z_um(cx, cy, t_s) == truth.world.true_focus_z_um(cx, cy, t_s)
    assert truth.sensor(12.0) == truth.world.sensor.truth_at(12.0)
    light = truth.illumination_map()
    assert light is not None and light.shape == (48, 64) and np.all(light > 0)


async def test_the_simulated_stage_owns_world_clock_and_emulator(tmp_path: Path) -> None:
    scope = sim_scope(data_dir=tmp_path)
    assert isinstance(scope.truth, SimTruth) and scope.truth.emulator is not None
    link = Path(scope.truth.emulator.link_path)
    async with scope:
        assert link.exists()
        pos = await scope.position()
        assert scope.true_focus_z_um() == scope.truth.world.true_focus_z_um(pos.x_um, pos.y_um, scope.clock.now())
    assert not link.exists()  # the stop hook released the emulator's pseudo-terminal
    assert (tmp_path / SIM_CLOCK_FILE).exists()  # the simulated clock keeps its reading in the data folder
    await scope.stop()  # a second stop is harmless


def test_a_sim_camera_without_the_simulated_stage_is_refused() -> None:
    base = load_profile("usb-gcode")
    profile = dataclasses.replace(
        base, camera=dataclasses.replace(sim_profile().camera), sim=sim_profile().sim
    )
    with pytest.raises(ConfigError, match=r"\[camera\] driver: the sim camera images the simulated stage"):
        build_scope(profile)
