"""Vessel geometry (ANSI/SLAS plates, culture formats, user files), the vessel-to-stage map,
and the ``phasewatch vessel`` command."""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from daemon.cli import main as cli_main
from daemon.profile import load_profile
from drivers.options import ConfigError
from daemon.vessels.geometry import (
    SLAS_LENGTH_MM,
    SLAS_WIDTH_MM,
    get_vessel,
    load_vessels,
    normalise_well_name,
    parse_wells,
    row_index,
    row_label,
)
from daemon.vessels.stage_map import (
    StageMap,
    fit_stage_map,
    load_stage_map,
    save_stage_map,
    sim_stage_map,
    stage_map_path,
    well_at_stage,
    well_position_um,
)
from drivers.sim.plate import PlateLayout
from tests.helpers import sim_profile

# --- ANSI/SLAS plates -------------------------------------------------------------------

# ANSI/SLAS 4-2004 (Microplates - Well Positions): distance from the left outer edge to the
# centre of column 1, from the top outer edge to the centre of row A, and the pitch, in mm.
# From memory (the standard itself was not looked up); cross-checked below against the
# standard's own rule that the array is centred on the 127.76 x 85.48 mm footprint of
# ANSI/SLAS 1-2004 (also from memory).
SLAS_4_2004 = {
    "96-well": dict(rows=8, columns=12, a1_x=14.38, a1_y=11.24, pitch=9.0, last="H12"),
    "384-well": dict(rows=16, columns=24, a1_x=12.13, a1_y=8.99, pitch=4.5, last="P24"),
    "1536-well": dict(rows=32, columns=48, a1_x=11.005, a1_y=7.865, pitch=2.25, last="AF48"),
}


@pytest.mark.parametrize("name", list(SLAS_4_2004))
def test_slas_well_centres_match_ansi_slas_4_2004(name: str) -> None:
    ref = SLAS_4_2004[name]
    v = get_vessel(name)
    # ANSI/SLAS 1-2004 footprint (from memory).
    assert (v.length_mm, v.width_mm) == (127.76, 85.48)
    assert len(v.wells) == ref["rows"] * ref["columns"]
    assert (v.rows, v.columns) == (ref["rows"], ref["columns"])
    a1 = v.well("A1")
    assert a1.x_mm == pytest.approx(ref["a1_x"], abs=1e-9)
    assert a1.y_mm == pytest.approx(ref["a1_y"], abs=1e-9)
    last = v.well(ref["last"])
    assert list(v.wells)[-1] == ref["last"]
    assert last.x_mm == pytest.approx(ref["a1_x"] + (ref["columns"] - 1) * ref["pitch"], abs=1e-9)
    assert last.y_mm == pytest.approx(ref["a1_y"] + (ref["rows"] - 1) * ref["pitch"], abs=1e-9)
    # Every centre on the pitch grid from A1 (ANSI/SLAS 4-2004, from memory).
    for w in v.wells.values():
        assert w.x_mm == pytest.approx(ref["a1_x"] + w.column * ref["pitch"], abs=1e-9)
        assert w.y_mm == pytest.approx(ref["a1_y"] + w.row * ref["pitch"], abs=1e-9)
    # The tabulated offsets and the centred-array rule agree: the mean centre is the footprint's.
    xs = [w.x_mm for w in v.wells.values()]
    ys = [w.y_mm for w in v.wells.values()]
    assert np.mean(xs) == pytest.approx(SLAS_LENGTH_MM / 2, abs=1e-9)
    assert np.mean(ys) == pytest.approx(SLAS_WIDTH_MM / 2, abs=1e-9)


def test_well_names_follow_the_trade() -> None:
    # Rows A..Z then AA..AF on 1536-well plates, columns from 1 (common practice).
    assert [row_label(i) for i in (0, 7, 15, 25, 26, 31)] == ["A", "H", "P", "Z", "AA", "AF"]
    assert all(row_index(row_label(i)) == i for i in range(64))
    v = get_vessel("1536-well")
    assert {n for n in v.wells if n.startswith("AF")} == {f"AF{c}" for c in range(1, 49)}
    assert v.well("af48").name == "AF48"
    assert normalise_well_name("b03") == "B3"
    assert normalise_well_name("B0") is None
    assert normalise_well_name("3B") is None
    # Row-major order: A1, A2, ..., A12, B1.
    assert list(get_vessel("96-well").wells)[:13] == [f"A{c}" for c in range(1, 13)] + ["B1"]


# Typical growth areas per well of culture plates and dishes (common practice; makers
# differ by some percent).
GROWTH_AREA_CM2 = {"6-well": 9.5, "12-well": 3.8, "24-well": 1.9, "48-well": 0.95, "35mm-dish": 8.5, "T25-flask": 25.0, "T75-flask": 75.0}


@pytest.mark.parametrize("name", list(GROWTH_AREA_CM2))
def test_culture_formats_have_the_usual_growth_area(name: str) -> None:
    v = get_vessel(name)
    areas = {round(w.area_mm2 / 100.0, 3) for w in v.wells.values()}
    assert len(areas) == 1
    assert areas.pop() == pytest.approx(GROWTH_AREA_CM2[name], rel=0.08)


def test_every_builtin_vessel_keeps_its_wells_inside_and_apart() -> None:
    vessels = load_vessels()
    for kind in ("plate", "dish", "flask"):
        assert any(v.kind == kind for v in vessels.values()), kind
    for v in vessels.values():
        ws = list(v.wells.values())
        for w in ws:
            ex, ey = w.extent_mm
            assert 0 <= w.x_mm - ex / 2 and w.x_mm + ex / 2 <= v.length_mm, (v.name, w.name)
            assert 0 <= w.y_mm - ey / 2 and w.y_mm + ey / 2 <= v.width_mm, (v.name, w.name)
        if len(ws) > 1:
            # Neighbouring wells must not overlap.
            assert v.pitch_x_mm >= max(w.extent_mm[0] for w in ws), v.name


def test_culture_plates_share_the_slas_footprint_and_are_centred() -> None:
    for name, (rows, cols) in {"6-well": (2, 3), "12-well": (3, 4), "24-well": (4, 6), "48-well": (6, 8)}.items():
        v = get_vessel(name)
        assert (v.rows, v.columns, len(v.wells)) == (rows, cols, rows * cols)
        assert v.footprint_mm == (SLAS_LENGTH_MM, SLAS_WIDTH_MM)
        assert np.mean([w.x_mm for w in v.wells.values()]) == pytest.approx(SLAS_LENGTH_MM / 2)


def test_get_vessel_by_alias_case_and_typo() -> None:
    assert get_vessel("96").name == "96-well"
    assert get_vessel("t25").name == "T25-flask"
    assert get_vessel(" 24-WELL ").name == "24-well"
    with pytest.raises(ConfigError, match="did you mean '24-well'") as exc:
        get_vessel("24-wel")
    assert "\n" not in str(exc.value)


def test_unknown_well_names_the_valid_range() -> None:
    v = get_vessel("96-well")
    with pytest.raises(ConfigError, match=r"no well 'I1'.*A1 to H12.*rows A to H, columns 1 to 12"):
        v.well("I1")
    with pytest.raises(ConfigError, match="no well 'A13'"):
        v.well("A13")


def test_parse_wells_ranges_lists_and_all() -> None:
    v = get_vessel("96-well")
    assert parse_wells("B2:C5", v) == ["B2", "B3", "B4", "B5", "C2", "C3", "C4", "C5"]
    assert parse_wells("C5:B2", v) == parse_wells("B2:C5", v)  # corners in either order
    assert parse_wells(["h12", "A1", "a01", "A1:A2"], v) == ["A1", "A2", "H12"]
    assert parse_wells("A1, B1:B2", v) == ["A1", "B1", "B2"]
    assert len(parse_wells("all", v)) == 96
    assert parse_wells("A11:B12", v) == ["A11", "A12", "B11", "B12"]
    with pytest.raises(ConfigError, match="no well 'Z9'"):
        parse_wells("A1:Z9", v)
    with pytest.raises(ConfigError, match="no wells given"):
        parse_wells([], v)
    with pytest.raises(ConfigError, match="not a well name"):
        parse_wells([3], v)  # type: ignore[list-item]


def test_user_vessel_file_adds_grid_and_listed_wells(tmp_path: Path) -> None:
    f = tmp_path / "mine.toml"
    f.write_text(
        """
[vessel."lr-chamber-4"]
kind = "dish"
description = "Larkspur Row four-chamber dish"
length_mm = 40.0
width_mm = 40.0
wells = [
  { name = "A1", x_mm = 12.0, y_mm = 12.0, diameter_mm = 14.0 },
  { name = "A2", x_mm = 28.0, y_mm = 12.0, diameter_mm = 14.0 },
  { name = "B1", x_mm = 12.0, y_mm = 28.0, diameter_mm = 14.0 },
  { name = "B2", x_mm = 28.0, y_mm = 28.0, diameter_mm = 14.0 },
]

[vessel."lr-strip-8"]
kind = "plate"
length_mm = 127.76
width_mm = 85.48
rows = 1
columns = 8
pitch_mm = 9.0
a1_x_mm = 14.38
a1_y_mm = 11.24
well_diameter_mm = 6.0

[vessel."96-well"]
kind = "plate"
description = "house 96-well plate with wide wells"
length_mm = 127.76
width_mm = 85.48
rows = 8
columns = 12
pitch_mm = 9.0
well_diameter_mm = 7.0
""",
        encoding="utf-8",
    )
    vessels = load_vessels(f)
    assert "384-well" in vessels  # built-ins are kept
    chamber = get_vessel("lr-chamber-4", f)
    assert list(chamber.wells) == ["A1", "A2", "B1", "B2"]
    assert (chamber.well("B2").row, chamber.well("B2").column) == (1, 1)
    assert parse_wells("A1:B1", chamber) == ["A1", "B1"]
    strip = get_vessel("lr-strip-8", f)
    assert strip.well("A8").x_mm == pytest.approx(14.38 + 7 * 9.0)
    assert get_vessel("96-well", f).well("A1").diameter_mm == 7.0  # user file replaces the built-in
    assert get_vessel("96-well").well("A1").diameter_mm == 6.4


@pytest.mark.parametrize(
    ("body", "pattern"),
    [
        ('kind = "plate"\nlength_mm = 100.0\nwidth_mm = 80.0\nwell_diamter_mm = 5.0', "did you mean 'well_diameter_mm'"),
        ('kind = "tube"\nlength_mm = 100.0\nwidth_mm = 80.0\nwell_diameter_mm = 5.0', "one of 'plate', 'dish', 'flask'"),
        ('kind = "plate"\nlength_mm = 100.0\nwidth_mm = 80.0\nrows = 2\ncolumns = 2\nwell_diameter_mm = 5.0', "pitch_mm"),
        ('kind = "plate"\nlength_mm = 30.0\nwidth_mm = 30.0\nrows = 1\ncolumns = 4\npitch_mm = 9.0\nwell_diameter_mm = 6.0', "reaches outside"),
        ('kind = "plate"\nwidth_mm = 30.0\nwell_diameter_mm = 6.0', "length_mm: missing required option"),
    ],
)
def test_user_vessel_file_errors_name_the_option(tmp_path: Path, body: str, pattern: str) -> None:
    f = tmp_path / "bad.toml"
    f.write_text(f'[vessel."x"]\n{body}\n', encoding="utf-8")
    with pytest.raises(ConfigError, match=pattern) as exc:
        load_vessels(f)
    assert str(f) in str(exc.value)
    assert 'vessel."x"' in str(exc.value)


# --- the vessel-to-stage map ------------------------------------------------------------


def _true_map(offset=(2150.0, -830.0), rotation_deg=0.7, scale=1.0, mirror=False) -> StageMap:
    return StageMap(offset[0], offset[1], rotation_deg=rotation_deg, scale=scale, mirror_y=mirror, vessel="96-well")


def _teach(truth: StageMap, wells: list[str], vessel_name: str = "96-well", noise_um: float = 0.0, seed: int = 0):
    v = get_vessel(vessel_name)
    rng = np.random.default_rng(seed)
    out = []
    for n in wells:
        x, y = truth.to_stage_um(v.well(n).x_mm, v.well(n).y_mm)
        dx, dy = rng.normal(0.0, noise_um, 2) if noise_um else (0.0, 0.0)
        out.append((n, x + dx, y + dy))
    return out


def test_stage_map_applies_rotation_about_the_vessel_corner() -> None:
    m = StageMap(1000.0, 2000.0, rotation_deg=90.0)
    # A point 1 mm along the vessel's x lands 1000 um along the stage's +y after a 90 deg turn.
    assert m.to_stage_um(1.0, 0.0) == pytest.approx((1000.0, 3000.0))
    assert m.to_vessel_mm(1000.0, 3000.0) == pytest.approx((1.0, 0.0))
    mirrored = StageMap(0.0, 0.0, mirror_y=True)
    assert mirrored.to_stage_um(2.0, 3.0) == pytest.approx((2000.0, -3000.0))


def test_two_teach_points_recover_offset_rotation_and_scale() -> None:
    truth = _true_map(scale=1.004)
    v = get_vessel("96-well")
    smap, warnings = fit_stage_map(v, _teach(truth, ["A1", "H12"]))
    assert smap.offset_x_um == pytest.approx(truth.offset_x_um, abs=1e-6)
    assert smap.offset_y_um == pytest.approx(truth.offset_y_um, abs=1e-6)
    assert smap.rotation_deg == pytest.approx(0.7, abs=1e-9)
    assert smap.scale == pytest.approx(1.004, abs=1e-12)
    assert warnings == []
    for w in v.wells.values():
        assert math.dist(smap.to_stage_um(w.x_mm, w.y_mm), truth.to_stage_um(w.x_mm, w.y_mm)) < 1e-6


def test_three_teach_points_detect_a_mirrored_y_axis() -> None:
    truth = _true_map(rotation_deg=-1.2, mirror=True)
    smap, warnings = fit_stage_map(get_vessel("96-well"), _teach(truth, ["A1", "A12", "H1"]))
    assert smap.mirror_y
    assert smap.rotation_deg == pytest.approx(-1.2, abs=1e-9)
    assert smap.rms_residual_um < 1e-6
    assert any("mirrored" in w for w in warnings)


def test_realistic_teaching_noise_stays_quiet_and_accurate() -> None:
    # Centring a well by eye at 10x lands within some tens of um (common practice): 20 um rms.
    truth = _true_map()
    v = get_vessel("96-well")
    smap, warnings = fit_stage_map(v, _teach(truth, ["A1", "A12", "H1", "H12"], noise_um=20.0, seed=3))
    assert warnings == []
    worst = max(math.dist(smap.to_stage_um(w.x_mm, w.y_mm), truth.to_stage_um(w.x_mm, w.y_mm)) for w in v.wells.values())
    assert worst < 60.0


def test_a_disagreeing_teach_point_is_named() -> None:
    truth = _true_map()
    points = _teach(truth, ["A1", "A12", "H1", "H12"])
    # The user centred B12 but typed H12: 63 mm off.
    bad = _teach(truth, ["B12"])[0]
    points[3] = ("H12", bad[1], bad[2])
    _, warnings = fit_stage_map(get_vessel("96-well"), points)
    assert any("teach point H12" in w and "um from where" in w for w in warnings)


def test_teach_points_of_the_wrong_vessel_fail_the_scale_check() -> None:
    # The stage holds a 384-well plate but the user named the wells as on a 96-well plate.
    truth = _true_map(rotation_deg=0.0)
    v384 = get_vessel("384-well")
    pts = [(n, *truth.to_stage_um(v384.well(n).x_mm, v384.well(n).y_mm)) for n in ("A1", "P24")]
    smap, warnings = fit_stage_map(get_vessel("96-well"), [("A1", *pts[0][1:]), ("H12", *pts[1][1:])])
    assert abs(smap.scale - 1.0) > 0.01
    assert any(w.startswith("scale") and "vessel type" in w for w in warnings)


def test_one_point_and_close_points_warn() -> None:
    v = get_vessel("96-well")
    smap, warnings = fit_stage_map(v, [("B3", 30000.0, 20000.0)])
    assert (smap.rotation_deg, smap.scale) == (0.0, 1.0)
    assert smap.to_stage_um(v.well("B3").x_mm, v.well("B3").y_mm) == pytest.approx((30000.0, 20000.0))
    assert any("offset only" in w for w in warnings)
    _, warnings = fit_stage_map(v, _teach(_true_map(), ["A1", "A2"]))
    assert any("span only 9.0 mm" in w for w in warnings)


def test_teach_input_errors() -> None:
    v = get_vessel("96-well")
    with pytest.raises(ConfigError, match="at least one teach point"):
        fit_stage_map(v, [])
    with pytest.raises(ConfigError, match="taught twice"):
        fit_stage_map(v, [("A1", 0.0, 0.0), ("a1", 10.0, 10.0)])
    with pytest.raises(ConfigError, match="no well 'Q1'"):
        fit_stage_map(v, [("Q1", 0.0, 0.0)])


@settings(max_examples=40, deadline=None)
@given(
    ox=st.floats(-50000, 50000), oy=st.floats(-50000, 50000),
    rot=st.floats(-20, 20), scale=st.floats(0.9, 1.1), mirror=st.booleans(),
)
def test_fit_inverts_any_similarity_map(ox: float, oy: float, rot: float, scale: float, mirror: bool) -> None:
    truth = StageMap(ox, oy, rotation_deg=rot, scale=scale, mirror_y=mirror)
    smap, _ = fit_stage_map(get_vessel("96-well"), _teach(truth, ["A1", "A12", "H1"]))
    assert smap.mirror_y == mirror
    for n in ("A1", "D7", "H12"):
        w = get_vessel("96-well").well(n)
        assert math.dist(smap.to_stage_um(w.x_mm, w.y_mm), truth.to_stage_um(w.x_mm, w.y_mm)) < 1e-3


def test_stage_map_round_trips_through_storage(tmp_path: Path) -> None:
    profile = sim_profile()
    smap, _ = fit_stage_map(get_vessel("96-well"), _teach(_true_map(), ["A1", "H12", "H1"], noise_um=5.0))
    path = save_stage_map(tmp_path, profile, smap)
    assert path == tmp_path / "stage-maps" / "sim.json"
    assert not list(path.parent.glob(".*partial"))
    back = load_stage_map(tmp_path, profile)
    assert back.to_dict() == smap.to_dict()
    assert StageMap.from_dict(json.loads(path.read_text())).to_stage_um(50.0, 40.0) == pytest.approx(smap.to_stage_um(50.0, 40.0))


def test_damaged_stage_map_is_a_clear_error(tmp_path: Path) -> None:
    profile = sim_profile()
    path = stage_map_path(tmp_path, profile)
    path.parent.mkdir(parents=True)
    path.write_text('{"offset_x_um": "left"}', encoding="utf-8")
    with pytest.raises(ConfigError, match="damaged stage map.*vessel teach"):
        load_stage_map(tmp_path, profile)


def test_simulated_scope_map_puts_wells_where_the_simulator_has_them(tmp_path: Path) -> None:
    profile = sim_profile()
    smap = load_stage_map(tmp_path, profile)  # none stored: derived from [sim.plate]
    assert smap.source == "simulator" and smap.vessel == "96-well"
    layout = PlateLayout(profile.sim.plate)  # the simulator's own truth
    v = get_vessel("96-well")
    for w in v.wells.values():
        assert smap.to_stage_um(w.x_mm, w.y_mm) == pytest.approx(layout.centre_um(w.row, w.column), abs=1e-6)
        assert layout.well_at(*smap.to_stage_um(w.x_mm, w.y_mm)) == w.name
    # A shifted simulated plate moves the derived map with it.
    shifted = sim_profile(**{"sim.plate.a1_x_um": 15380.0, "sim.plate.a1_y_um": 10240.0})
    assert sim_stage_map(shifted).well_stage_um(v, "C4") == pytest.approx(PlateLayout(shifted.sim.plate).centre_um(2, 3))


def test_real_scope_without_a_map_says_how_to_teach(tmp_path: Path) -> None:
    profile = load_profile("usb-gcode")
    with pytest.raises(ConfigError, match="phasewatch vessel teach 96-well A1=X,Y H12=X,Y"):
        load_stage_map(tmp_path, profile)


def test_well_at_stage_inverts_a_taught_map_on_a_real_scope(tmp_path: Path) -> None:
    """On a scope with no simulator the well under the objective comes from the taught map
    and the vessel's geometry alone."""
    profile = load_profile("usb-gcode")
    truth = _true_map(offset=(3150.0, -420.0), rotation_deg=-1.2, scale=1.002)
    smap, _ = fit_stage_map(get_vessel("96-well"), _teach(truth, ["A1", "H12", "A12"]))
    save_stage_map(tmp_path, profile, smap)
    v = get_vessel("96-well")
    for name in ("A1", "B3", "D7", "H12"):
        x, y = well_position_um(tmp_path, profile, name)
        assert well_at_stage(tmp_path, profile, x, y) == name
        # The built-in 96-well bottoms are 6.4 mm across on a 9 mm pitch (daemon/data/vessels.toml):
        # 3 mm from the centre is still inside, 3.5 mm is in the wall between wells.
        w = v.well(name)
        assert well_at_stage(tmp_path, profile, *smap.to_stage_um(w.x_mm + 3.0, w.y_mm)) == name
        assert well_at_stage(tmp_path, profile, *smap.to_stage_um(w.x_mm + 3.5, w.y_mm)) is None
    assert well_at_stage(tmp_path, profile, *smap.to_stage_um(-5.0, -5.0)) is None  # off the plate
    assert well_at_stage(tmp_path, profile, *smap.to_stage_um(4.5, 4.5)) is None  # plate corner, before A1


def test_well_at_stage_agrees_with_the_simulator_on_the_simulated_scope(tmp_path: Path) -> None:
    profile = sim_profile()
    layout = PlateLayout(profile.sim.plate)  # the simulator's own truth
    rng = np.random.default_rng(412)
    xs = rng.uniform(0.0, 127760.0, 400)
    ys = rng.uniform(0.0, 85480.0, 400)
    for x, y in zip(xs, ys):
        assert well_at_stage(tmp_path, profile, float(x), float(y)) == layout.well_at(float(x), float(y))


def test_well_at_stage_without_a_map_says_how_to_teach(tmp_path: Path) -> None:
    with pytest.raises(ConfigError, match="phasewatch vessel teach"):
        well_at_stage(tmp_path, load_profile("usb-gcode"), 1000.0, 1000.0)


# --- phasewatch vessel ------------------------------------------------------------------


def test_cli_show_json_gives_every_well(capsys: pytest.CaptureFixture[str]) -> None:
    assert cli_main(["vessel", "show", "384-well", "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["name"] == "384-well" and len(out["wells"]) == 384
    p24 = next(w for w in out["wells"] if w["name"] == "P24")
    # ANSI/SLAS 4-2004 (from memory): P24 at 12.13 + 23 x 4.5, 8.99 + 15 x 4.5 mm.
    assert (p24["x_mm"], p24["y_mm"]) == pytest.approx((115.63, 76.49))
    assert p24["diameter_mm"] == 3.3


def test_cli_show_text_and_stage_columns(capsys: pytest.CaptureFixture[str], tmp_path: Path) -> None:
    assert cli_main(["vessel", "show", "24-well"]) == 0
    lines = capsys.readouterr().out.splitlines()
    rows = [ln.split() for ln in lines if ln.strip()[:1] in "ABCD" and ln.strip()[1:2].isdigit()]
    assert len(rows) == 24 and rows[0][0] == "A1" and rows[-1][0] == "D6"
    assert cli_main(["vessel", "show", "96", "--stage", "--data", str(tmp_path)]) == 0
    a1 = next(ln.split() for ln in capsys.readouterr().out.splitlines() if ln.split()[:1] == ["A1"])
    assert [float(a1[-2]), float(a1[-1])] == pytest.approx([14380.0, 11240.0])


def test_cli_unknown_vessel_is_one_line(capsys: pytest.CaptureFixture[str]) -> None:
    assert cli_main(["vessel", "show", "97-well"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "did you mean '96-well'" in err and "Traceback" not in err


def test_cli_teach_stores_adds_and_reports(capsys: pytest.CaptureFixture[str], tmp_path: Path) -> None:
    data = str(tmp_path)
    assert cli_main(["vessel", "teach", "96-well", "A1=14430,11210", "--data", data]) == 0
    out = capsys.readouterr().out
    assert "offset only" in out and "stored in" in out
    assert cli_main(["vessel", "teach", "96-well", "H12=113430,74210", "--add", "--data", data]) == 0
    out = capsys.readouterr().out
    assert "2 teach points" in out and "simulator:" in out
    stored = load_stage_map(tmp_path, sim_profile())
    assert {p.well for p in stored.teach} == {"A1", "H12"}
    assert stored.to_stage_um(14.38, 11.24) == pytest.approx((14430.0, 11210.0), abs=1e-6)
    assert cli_main(["vessel", "map", "--data", data, "--json"]) == 0
    shown = json.loads(capsys.readouterr().out)
    assert shown["corner_wells_um"]["H12"] == pytest.approx([113430.0, 74210.0])
    # A dry run of a bad teach reports its warnings and leaves the stored map alone.
    assert cli_main(["vessel", "teach", "96-well", "A1=14380,11240", "H12=213380,74240", "--dry-run", "--data", data]) == 0
    assert "warning: scale" in capsys.readouterr().out
    assert load_stage_map(tmp_path, sim_profile()).to_dict() == stored.to_dict()


def test_cli_teach_rejects_malformed_points(capsys: pytest.CaptureFixture[str], tmp_path: Path) -> None:
    with pytest.raises(SystemExit) as exc:
        cli_main(["vessel", "teach", "96-well", "A1=14380", "--data", str(tmp_path)])
    assert exc.value.code == 2
    assert "WELL=X,Y" in capsys.readouterr().err
    assert cli_main(["vessel", "teach", "96-well", "--data", str(tmp_path)]) == 2
    assert "give teach points" in capsys.readouterr().err


def test_cli_teach_here_reads_the_stage_position(capsys: pytest.CaptureFixture[str], tmp_path: Path) -> None:
    # The simulated stage starts at its origin, so --here A1 teaches A1 at stage (0, 0).
    assert cli_main(["vessel", "teach", "96-well", "--here", "A1", "--sim-speed", "1000", "--data", str(tmp_path)]) == 0
    out = capsys.readouterr().out
    assert "teach point A1: stage (0.0, 0.0) um" in out
    # The simulator's plate has A1 at (14380, 11240) um: the truth line shows the 18.3 mm miss.
    assert f"fitted wells lie within {math.hypot(14380.0, 11240.0):.1f} um of the simulator's" in out
    smap = load_stage_map(tmp_path, sim_profile())
    assert smap.to_stage_um(14.38, 11.24) == pytest.approx((0.0, 0.0), abs=1e-6)
