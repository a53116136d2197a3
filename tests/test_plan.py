"""Time-lapse plans: strict loading, site layout, stage positions, time estimates and fit checks."""

from __future__ import annotations

import dataclasses
import json
import math
import re
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from drivers.options import ConfigError
from daemon.timelapse.plan import (
    DEFAULT_FIELD_UM,
    Plan,
    ZStack,
    check_fits,
    count_from_duration,
    estimate_plan,
    estimate_position_s,
    field_of_view_um,
    load_plan,
    move_time_s,
    plan_positions,
    site_offsets_um,
)
from daemon.vessels.geometry import get_vessel
from daemon.vessels.stage_map import StageMap, load_stage_map
from drivers.sim.plate import PlateLayout
from tests.helpers import sim_profile

FULL_PLAN = """
name = "KVL-7 growth curve, plate LR-0412"
vessel = "96-well"
wells = ["B2:C4", "H12"]
sites_per_well = 4
interval_s = 1800
duration_s = 259200
autofocus = "track"
exposure_ms = 15.0
gain_db = 3.0
correction = true
save = "both"
notes = "Larkspur Row, incubator 3"

[z_stack]
count = 5
step_um = 2.5
"""


def _write(tmp_path: Path, text: str, name: str = "plan.toml") -> Path:
    p = tmp_path / name
    p.write_text(text, encoding="utf-8")
    return p


def _plan(**changes) -> Plan:
    base = Plan(
        name="LR-0412 test", vessel="96-well", wells=["B2", "B3"], sites_per_well=1, interval_s=600.0,
        count=10, autofocus="track", z_stack=None, exposure_ms=None, gain_db=None, correction=True,
        save="corrected",
    )
    return dataclasses.replace(base, **changes)


# --- loading ----------------------------------------------------------------------------


def test_load_toml_plan_with_every_key(tmp_path: Path) -> None:
    plan = load_plan(_write(tmp_path, FULL_PLAN))
    assert plan.name == "KVL-7 growth curve, plate LR-0412"
    assert plan.vessel == "96-well"
    assert plan.wells == ["B2", "B3", "B4", "C2", "C3", "C4", "H12"]
    assert plan.sites_per_well == 4
    assert plan.interval_s == 1800.0
    assert plan.count == 145  # 72 h every 30 min, both ends included
    assert plan.duration_s == 259200.0
    assert plan.autofocus == "track"
    assert plan.z_stack == ZStack(5, 2.5) and plan.z_stack.span_um == 10.0
    assert (plan.exposure_ms, plan.gain_db, plan.correction, plan.save) == (15.0, 3.0, True, "both")
    assert plan.frames_per_position == 5
    assert plan.source == str(tmp_path / "plan.toml")


def test_json_plan_defaults_and_round_trip(tmp_path: Path) -> None:
    raw = {"name": "LR-0412 quick look", "vessel": "24", "wells": "all", "interval_s": 900, "count": 3}
    plan = load_plan(_write(tmp_path, json.dumps(raw), "plan.json"))
    assert plan.vessel == "24-well" and len(plan.wells) == 24
    assert (plan.sites_per_well, plan.autofocus, plan.z_stack, plan.exposure_ms, plan.save) == (1, "track", None, None, "corrected")
    again = Plan.from_dict(json.loads(json.dumps(plan.to_dict())))
    assert again.to_dict() == plan.to_dict() and plan.focus_metric == "variance_of_laplacian"
    brenner = Plan.from_dict({**raw, "focus_metric": "brenner"})
    assert Plan.from_dict(json.loads(json.dumps(brenner.to_dict()))).focus_metric == "brenner"
    full = load_plan(_write(tmp_path, FULL_PLAN))
    assert Plan.from_dict(full.to_dict()).to_dict() == full.to_dict()


def test_count_from_duration_includes_both_ends() -> None:
    assert count_from_duration(3600.0, 600.0) == 7
    assert count_from_duration(3599.0, 600.0) == 6
    assert count_from_duration(0.0, 600.0) == 1
    assert count_from_duration(0.3 * 3, 0.3) == 4  # float rounding does not lose the last point


def test_plan_with_its_own_vessel_file(tmp_path: Path) -> None:
    _write(tmp_path, """
[vessel."lr-slide-2"]
kind = "dish"
length_mm = 75.0
width_mm = 25.0
rows = 1
columns = 2
pitch_mm = 30.0
well_shape = "square"
well_diameter_mm = 20.0
""", "vessels.toml")
    plan = load_plan(_write(tmp_path, 'name = "x"\nvessel = "lr-slide-2"\nvessel_file = "vessels.toml"\nwells = "all"\ninterval_s = 60\ncount = 2\n'))
    assert plan.wells == ["A1", "A2"]
    assert plan.get_vessel().well("A2").x_mm == pytest.approx(37.5 + 15.0)
    assert Plan.from_dict(plan.to_dict()).get_vessel().name == "lr-slide-2"


MINIMAL = {"name": "x", "vessel": "96-well", "wells": "B2", "interval_s": 600, "count": 4}


@pytest.mark.parametrize(
    ("change", "option", "pattern"),
    [
        ({"intervl_s": 5}, "intervl_s", "did you mean 'interval_s'"),
        ({"interval_s": "10 min"}, "interval_s", "must be a number from 1.0"),
        ({"interval_s": 0.2}, "interval_s", "from 1.0"),
        ({"autofocus": "always"}, "autofocus", "one of 'track', 'first', 'off'"),
        ({"save": "jpeg"}, "save", "one of 'corrected', 'raw', 'both'"),
        ({"focus_metric": "sharpness"}, "focus_metric", "one of 'variance_of_laplacian', 'brenner'"),
        ({"duration_s": 3600}, "duration_s", "count or duration_s, not both"),
        ({"count": None}, "count", "give either count"),
        ({"correction": False}, "save", "needs correction = true"),
        ({"wells": "B2:K3"}, "wells", "no well 'K3'.*A1 to H12"),
        ({"wells": 12}, "wells", "must be a string or a list of strings"),
        ({"vessel": "97-well"}, "vessel", "did you mean '96-well'"),
        ({"sites_per_well": 0}, "sites_per_well", "from 1 to 400"),
        ({"z_stack": {"count": 5, "stp_um": 2}}, "stp_um", "did you mean 'step_um'"),
        ({"exposure_ms": -1}, "exposure_ms", "from 0.01"),
        ({"name": "  "}, "name", "must not be empty"),
    ],
)
def test_validation_names_the_key_and_what_is_allowed(change: dict, option: str, pattern: str) -> None:
    raw = {**MINIMAL, **change}
    raw = {k: v for k, v in raw.items() if v is not None}
    with pytest.raises(ConfigError, match=pattern) as exc:
        Plan.from_dict(raw, file="plan.toml")
    assert exc.value.option == option
    assert "\n" not in str(exc.value) and str(exc.value).startswith("plan.toml:")


def test_missing_required_key_and_bad_files(tmp_path: Path) -> None:
    with pytest.raises(ConfigError, match="vessel: missing required option"):
        Plan.from_dict({k: v for k, v in MINIMAL.items() if k != "vessel"})
    with pytest.raises(ConfigError, match="not valid TOML"):
        load_plan(_write(tmp_path, "name = ", "broken.toml"))
    with pytest.raises(ConfigError, match="not valid JSON"):
        load_plan(_write(tmp_path, "{", "broken.json"))
    with pytest.raises(ConfigError, match="must be an object"):
        load_plan(_write(tmp_path, "[1, 2]", "list.json"))
    with pytest.raises(ConfigError, match="cannot read the plan"):
        load_plan(tmp_path / "absent.toml")
    with pytest.raises(ConfigError, match="no such file") as exc:
        Plan.from_dict({**MINIMAL, "vessel_file": "nowhere.toml"}, base_dir=tmp_path)
    assert exc.value.option == "vessel_file"


# --- positions --------------------------------------------------------------------------


def test_positions_run_in_a_serpentine_with_site_keys(tmp_path: Path) -> None:
    plan = Plan.from_dict({**MINIMAL, "wells": "B2:C4", "sites_per_well": 2})
    smap = load_stage_map(tmp_path, sim_profile())
    positions = plan_positions(plan, get_vessel("96-well"), smap, field_um=(480.0, 360.0))
    assert [p.key for p in positions] == [
        "B2-1", "B2-2", "B3-1", "B3-2", "B4-1", "B4-2", "C4-1", "C4-2", "C3-1", "C3-2", "C2-1", "C2-2",
    ]
    assert all(p.key == f"{p.well}-{p.site}" for p in positions)


def _clear_of_wall(offsets, well, field) -> bool:
    fw, fh = field
    clearance = max(fw, fh)
    if well.shape == "circle":
        return all(math.hypot(abs(x) + fw / 2, abs(y) + fh / 2) <= well.diameter_mm * 500 - clearance + 1e-6 for x, y in offsets)
    ex, ey = well.extent_mm
    return all(abs(x) + fw / 2 <= ex * 500 - clearance + 1e-6 and abs(y) + fh / 2 <= ey * 500 - clearance + 1e-6 for x, y in offsets)


def _apart(offsets, field) -> bool:
    fw, fh = field
    return all(abs(a[0] - b[0]) >= fw or abs(a[1] - b[1]) >= fh for i, a in enumerate(offsets) for b in offsets[i + 1:])


@settings(max_examples=60, deadline=None)
@given(
    vessel=st.sampled_from(["96-well", "384-well", "6-well", "12-well", "24-well", "48-well", "35mm-dish", "T25-flask"]),
    n=st.integers(1, 30),
    field_w=st.floats(200.0, 1500.0),
    aspect=st.floats(0.5, 1.0),
)
def test_sites_never_overlap_and_stay_clear_of_the_wall(vessel: str, n: int, field_w: float, aspect: float) -> None:
    well = get_vessel(vessel).well("A1")
    field = (field_w, field_w * aspect)
    try:
        offsets = site_offsets_um(n, well, field)
    except ValueError as exc:
        assert "at most" in str(exc)
        return
    assert len(offsets) == n and len(set(offsets)) == n
    assert _apart(offsets, field)
    if n > 1:
        assert _clear_of_wall(offsets, well, field)
        # Centred on the well.
        assert abs(sum(x for x, _ in offsets) / n) < 1e-6 * field_w + 1e-6
    else:
        assert offsets == [(0.0, 0.0)]


def test_sites_spread_over_a_large_well_but_not_too_far() -> None:
    well = get_vessel("6-well").well("A1")
    offsets = site_offsets_um(4, well, (480.0, 360.0))
    xs = sorted({round(x, 3) for x, _ in offsets})
    # Spread three fields apart at most (34.8 mm wells have room for much more).
    assert xs[1] - xs[0] == pytest.approx(3 * 480.0)


def test_too_many_sites_says_how_many_fit() -> None:
    well = get_vessel("96-well").well("A1")  # 6.4 mm
    with pytest.raises(ValueError, match=r"at most (\d+) fit") as exc:
        site_offsets_um(40, well, (1000.0, 1000.0))
    most = int(exc.value.args[0].rsplit("at most ", 1)[1].split()[0])
    assert most >= 1
    site_offsets_um(most, well, (1000.0, 1000.0))  # the figure it gives does fit
    with pytest.raises(ValueError):
        site_offsets_um(most + 1, well, (1000.0, 1000.0))
    plan = Plan.from_dict({**MINIMAL, "sites_per_well": 40})
    with pytest.raises(ConfigError, match="at most") as cexc:
        plan_positions(plan, get_vessel("96-well"), StageMap(0.0, 0.0), field_um=(1000.0, 1000.0))
    assert cexc.value.option == "sites_per_well"


def test_site_spacing_can_be_set() -> None:
    well = get_vessel("24-well").well("B2")
    offsets = site_offsets_um(3, well, (480.0, 360.0), spacing_um=1000.0)
    # Three sites: two in the first row, the third centred below them, 1 mm apart.
    assert offsets == [(-500.0, -500.0), (500.0, -500.0), (0.0, 500.0)]
    with pytest.raises(ValueError, match="would overlap"):
        site_offsets_um(3, well, (480.0, 360.0), spacing_um=300.0)
    with pytest.raises(ValueError, match="do not fit"):
        site_offsets_um(9, well, (480.0, 360.0), spacing_um=6000.0)


def test_positions_follow_a_rotated_stage_map() -> None:
    plan = Plan.from_dict({**MINIMAL, "wells": "A1", "sites_per_well": 1})
    smap = StageMap(5000.0, -2000.0, rotation_deg=90.0)
    (pos,) = plan_positions(plan, get_vessel("96-well"), smap)
    # A1 at (14.38, 11.24) mm turned by 90 deg: (-11240, 14380) um, plus the offset.
    assert (pos.x_um, pos.y_um) == pytest.approx((5000.0 - 11240.0, -2000.0 + 14380.0))
    assert (pos.vessel_x_mm, pos.vessel_y_mm) == pytest.approx((14.38, 11.24))
    assert DEFAULT_FIELD_UM == (1000.0, 1000.0)


def test_planned_sites_land_inside_the_simulated_wells(tmp_path: Path) -> None:
    profile = sim_profile(1280, 960)
    plan = Plan.from_dict({**MINIMAL, "wells": "all", "sites_per_well": 4})
    positions = plan_positions(plan, get_vessel("96-well"), load_stage_map(tmp_path, profile), field_um=field_of_view_um(profile))
    layout = PlateLayout(profile.sim.plate)  # the simulator's truth of where its wells are
    fw, fh = field_of_view_um(profile)
    assert len(positions) == 384
    for p in positions:
        assert layout.well_at(p.x_um, p.y_um) == p.well
        for cx, cy in ((-fw / 2, -fh / 2), (fw / 2, -fh / 2), (-fw / 2, fh / 2), (fw / 2, fh / 2)):
            assert layout.well_at(p.x_um + cx, p.y_um + cy) == p.well, p.key


# --- estimates --------------------------------------------------------------------------


def _distance_covered_um(t_s: float, v: float, a: float) -> float:
    """Distance of the fastest move lasting ``t_s`` under speed limit v and acceleration limit a:
    velocity min(a t, v, a (T - t)), integrated numerically (constant-acceleration
    kinematics, common practice)."""
    t = np.linspace(0.0, t_s, 200_001)
    vel = np.minimum(np.minimum(a * t, v), a * (t_s - t))
    return float(np.trapezoid(vel, t) if hasattr(np, "trapezoid") else np.trapz(vel, t))


@pytest.mark.parametrize(("d", "v", "a"), [(9000.0, 8000.0, 40000.0), (500.0, 8000.0, 40000.0), (20.0, 1000.0, 5000.0)])
def test_move_time_matches_kinematics(d: float, v: float, a: float) -> None:
    t = move_time_s(d, v, a)
    assert _distance_covered_um(t, v, a) == pytest.approx(d, rel=1e-6)
    # Any shorter move covers less: the estimate is the minimum time, not a loose bound.
    assert _distance_covered_um(0.99 * t, v, a) < d
    assert move_time_s(0.0, v, a) == 0.0


def test_estimate_grows_with_the_work_per_position() -> None:
    profile = sim_profile(1280, 960)
    off = estimate_position_s(profile, _plan(autofocus="off"))
    track = estimate_position_s(profile, _plan(autofocus="track"))
    first = estimate_position_s(profile, _plan(autofocus="first"))
    stack = estimate_position_s(profile, _plan(autofocus="track", z_stack=ZStack(7, 2.0)))
    both = estimate_position_s(profile, _plan(autofocus="off", save="both"))
    assert first == pytest.approx(off)  # steady state: no search after the first time point
    assert off < track < stack
    # The simulated scope holds its clock while the host saves: a second saved frame is no scope time.
    assert both == pytest.approx(off)
    hardware = dataclasses.replace(profile, sim=None)
    off_hw = estimate_position_s(hardware, _plan(autofocus="off"))
    both_hw = estimate_position_s(hardware, _plan(autofocus="off", save="both"))
    assert both_hw - off_hw == pytest.approx(0.030)  # on hardware: one more saved frame of software time
    # Floor: a 9 mm move, stage settle and one exposure at least.
    p = profile.stage
    assert off > move_time_s(9000.0, p.xy_speed_um_s, p.xy_accel_um_s2) + p.settle_ms / 1000 + profile.camera.exposure_ms / 1000


def test_first_time_point_pays_for_the_cold_search(tmp_path: Path) -> None:
    profile = sim_profile(1280, 960)
    plan = Plan.from_dict({**MINIMAL, "wells": "B2:C4"})
    positions = plan_positions(plan, get_vessel("96-well"), load_stage_map(tmp_path, profile), field_of_view_um(profile))
    est = estimate_plan(profile, plan, positions)
    assert est.positions == 6
    assert est.first_time_point_s > est.time_point_s
    assert est.time_point_s == pytest.approx(6 * est.per_position_s + est.travel_s)
    assert est.bytes_per_time_point == 6 * 1280 * 960
    assert "6 positions" in est.summary()


def test_check_fits_refuses_a_plan_that_cannot_keep_its_interval(tmp_path: Path) -> None:
    profile = sim_profile(1280, 960)
    plan = Plan.from_dict({**MINIMAL, "wells": "all", "sites_per_well": 4, "interval_s": 60, "z_stack": {"count": 5}})
    positions = plan_positions(plan, get_vessel("96-well"), load_stage_map(tmp_path, profile), field_of_view_um(profile))
    with pytest.raises(ConfigError, match=r"a time point needs about \d+ s \(384 positions x .* raise interval_s to at least \d+") as exc:
        check_fits(profile, plan, positions)
    assert exc.value.option == "interval_s"
    need = int(str(exc.value).split("at least ")[1].split()[0])
    relaxed = dataclasses.replace(plan, interval_s=float(need))
    warnings = check_fits(profile, relaxed, positions)  # the figure it suggests is accepted
    assert not any("needs about" in w and "interval" in w and "%" in w for w in warnings)


def test_check_fits_warns_when_headroom_is_thin(tmp_path: Path) -> None:
    profile = sim_profile(1280, 960)
    plan = Plan.from_dict({**MINIMAL, "wells": "B2:C4"})
    positions = plan_positions(plan, get_vessel("96-well"), load_stage_map(tmp_path, profile), field_of_view_um(profile))
    est = estimate_plan(profile, plan, positions)
    tight = dataclasses.replace(plan, interval_s=est.time_point_s / 0.9)
    warnings = check_fits(profile, tight, positions)
    assert any("of the" in w and "late" in w for w in warnings)
    assert any("first time point" in w for w in warnings)
    assert check_fits(profile, dataclasses.replace(plan, interval_s=est.first_time_point_s * 2), positions) == []


def test_check_fits_refuses_positions_outside_the_stage(tmp_path: Path) -> None:
    profile = sim_profile()
    plan = Plan.from_dict({**MINIMAL, "wells": "H10:H12"})
    shifted = StageMap(25000.0, 0.0)  # plate pushed 25 mm along x: H11 and H12 beyond the end of travel
    positions = plan_positions(plan, get_vessel("96-well"), shifted, field_of_view_um(profile))
    with pytest.raises(ConfigError, match=r"2 positions lie outside the stage limits.*H12-1") as exc:
        check_fits(profile, plan, positions)
    assert exc.value.option == "wells"
    with pytest.raises(ConfigError, match="no positions"):
        check_fits(profile, plan, [])


def test_check_fits_warns_when_the_plan_is_not_the_simulated_plate(tmp_path: Path) -> None:
    profile = sim_profile()
    plan = Plan.from_dict({**MINIMAL, "vessel": "24-well", "wells": "A1", "interval_s": 3600})
    positions = plan_positions(plan, get_vessel("24-well"), load_stage_map(tmp_path, profile), field_of_view_um(profile))
    assert any("simulated scope holds a 96-well plate" in w for w in check_fits(profile, plan, positions))


def test_check_fits_warns_when_one_field_fills_a_small_well(tmp_path: Path) -> None:
    # A 4x objective (1.2 x 0.9 mm field at 1280 x 960) in a 1536-well plate's 1.5 mm wells.
    profile = sim_profile(1280, 960, **{"optics.magnification": 4.0})
    plan = Plan.from_dict({**MINIMAL, "vessel": "1536-well", "wells": "A1:A4", "interval_s": 3600})
    positions = plan_positions(plan, get_vessel("1536-well"), StageMap(0.0, 0.0), field_of_view_um(profile))
    assert any("meniscus" in w for w in check_fits(profile, plan, positions))


async def test_move_estimate_matches_the_simulated_stage() -> None:
    # The simulated controller's moves take simulated time from its motion model; at a
    # clock speed of 5 the software's own latency adds only a few tens of ms of sim time.
    from tests.helpers import sim_scope

    profile = sim_profile()
    p = profile.stage
    async with sim_scope(profile, speed=5.0) as scope:
        await scope.move_to(x_um=14380.0, y_um=11240.0)
        for d in (9000.0, 1080.0):  # the next well (cruise phase), the next site (triangular)
            start = await scope.position()
            t0 = scope.clock.now()
            await scope.move_to(x_um=start.x_um + d, y_um=start.y_um)
            measured = scope.clock.now() - t0
            expected = move_time_s(d, p.xy_speed_um_s, p.xy_accel_um_s2) + p.settle_ms / 1000.0
            assert expected * 0.97 <= measured <= expected + 0.3, (d, measured, expected)


def test_conditions_per_well_are_strict_and_keep_the_plan_file_form():
    from daemon.timelapse.plan import Plan, WellCondition

    base = {"name": "KVL-7 dose check", "vessel": "96-well", "wells": "B2:B4", "interval_s": 1800, "count": 3}
    plan = Plan.from_dict({**base, "conditions": [
        {"wells": ["B2", "B4"], "label": "vehicle", "notes": "0.1 % DMSO"}, {"wells": "B3", "label": "R-17 5 uM"}]})
    assert plan.condition_of("B2") == WellCondition("vehicle", "0.1 % DMSO")
    assert plan.condition_of("B3") == WellCondition("R-17 5 uM", "")
    assert plan.to_dict()["conditions"] == [
        {"wells": ["B2", "B4"], "label": "vehicle", "notes": "0.1 % DMSO"}, {"wells": ["B3"], "label": "R-17 5 uM", "notes": ""}]
    assert Plan.from_dict(plan.to_dict()) == dataclasses.replace(plan, source="plan")
    assert "conditions" not in Plan.from_dict(base).to_dict()  # plans without conditions keep their old form
    for conditions, words in (
        ([{"wells": "C2", "label": "x"}], "[conditions[0]] wells: C2 not in the plan's wells"),
        ([{"wells": "B2", "label": "a"}, {"wells": "B2:B3", "label": "b"}], "B2 already has condition 'a'"),
        ([{"wells": "B2", "label": " "}], "label: must not be empty"),
        ([{"wells": "B2", "label": "a", "dose": 5}], "unknown option"),
        ([7], "must be a table"),
    ):
        with pytest.raises(ConfigError, match=re.escape(words)):
            Plan.from_dict({**base, "conditions": conditions})
