"""Focus tracking through thermal drift on the simulated scope (small frames, dense culture).

The simulator's focal plane drifts after a door opening, z += A·(1 - exp(-t/τ))
(drivers/sim/focal.py); the tracker must follow it from time point to time point with a
few frames each, and must say so honestly when a position has nothing to focus on.
"""

from __future__ import annotations

import json
import statistics

import pytest

from daemon.focus.tracking import FocusTracker
from daemon.profile import Profile
from daemon.scope import Scope
from tests.helpers import sim_profile, sim_scope

SPEED = 200.0
WELLS = ("B3", "C6", "E4", "F9")
INTERVAL_S = 900.0  # 15 min between time points


def drifting_profile(**changes: object) -> Profile:
    # The door opens 15 min after the simulated clock starts (door times count from
    # seeding; the clock starts culture_age_h after it); the plane then rises by up to
    # 30 um with a 40 min time constant: 9 um in the first interval, then 6, 4, ...
    # (drivers/sim/focal.py).
    age_h = sim_profile().sim.culture_age_h  # type: ignore[union-attr]
    return sim_profile(**{
        "sim.culture.seeding_per_mm2": 600.0,
        "sim.focal_plane.drift_um": 30.0,
        "sim.focal_plane.door_openings_h": [age_h + 0.25],
        **changes,
    })


async def visit(scope: Scope, tracker: FocusTracker, well: str) -> tuple[object, float]:
    assert scope.truth.known
    x, y = scope.truth.world.well_centre_um(well)
    await scope.move_to(x_um=x, y_um=y)
    result = await tracker.focus(scope, well, x, y)
    return result, x


async def run_time_points(scope: Scope, tracker: FocusTracker, count: int, t0_s: float, first: int = 0) -> list:
    results = []
    for tp in range(first, first + count):
        wait = t0_s + tp * INTERVAL_S - scope.clock.now()
        if wait > 0:
            scope.clock.advance(wait)  # type: ignore[attr-defined]  (the simulated clock)
        for well in WELLS:
            result, _ = await visit(scope, tracker, well)
            results.append((tp, well, result))
    return results


async def test_tracking_follows_drift_with_few_frames() -> None:
    profile = drifting_profile()
    d = profile.optics.depth_of_field_um
    tracker = FocusTracker(profile)
    async with sim_scope(profile, speed=SPEED) as scope:
        await scope.move_to(z_um=profile.focus.nominal_z_um)
        t0 = scope.clock.now()
        results = await run_time_points(scope, tracker, 5, t0)
    for tp, well, r in results:
        assert r.found, (tp, well, r.message)
        assert abs(r.z_um - r.true_z_um) <= d / 4, (tp, well, r.z_um, r.true_z_um)
    per_well: dict[str, list[float]] = {}
    for _, well, r in results:
        per_well.setdefault(well, []).append(r.true_z_um)
    steps = [abs(b - a) for zs in per_well.values() for a, b in zip(zs, zs[1:])]
    assert max(steps) >= 5.0, steps  # the door opening really moves the focal plane
    revisits = [r for tp, _, r in results if tp > 0]
    assert all("tracked" in r.message for r in revisits)
    frames = [r.frames for r in revisits]
    # docs/TARGETS.md: median <= 4 frames, 95th percentile <= 8 (here: every revisit).
    assert statistics.median(frames) <= 4 and max(frames) <= 8, frames
    # Most revisits need only the slope check of the predicted plane (2 frames where the
    # curve is steepest and 1 confirming frame); the rest fall back to the bracket.
    checked = [r for r in revisits if "slope check" in r.message]
    assert len(checked) >= len(revisits) // 2, [r.message for r in revisits]
    assert all(r.frames <= 6 for r in checked), [r.frames for r in checked]
    # The first position was a cold search; later first visits start from the surface.
    firsts = [r for tp, _, r in results if tp == 0]
    assert "cold" in firsts[0].message and all("focus surface" in r.message for r in firsts[1:])
    assert all(r.frames < firsts[0].frames for r in firsts[1:])


async def test_tracker_state_survives_a_restart() -> None:
    profile = drifting_profile()
    d = profile.optics.depth_of_field_um
    tracker = FocusTracker(profile)
    async with sim_scope(profile, speed=SPEED) as scope:
        await scope.move_to(z_um=profile.focus.nominal_z_um)
        t0 = scope.clock.now()
        await run_time_points(scope, tracker, 2, t0)
        saved = json.dumps(tracker.to_dict())
        restored = FocusTracker.from_dict(profile, json.loads(saved))
        results = await run_time_points(scope, restored, 1, t0, first=2)
    for _, well, r in results:
        assert r.found and "tracked" in r.message, (well, r.message)
        assert abs(r.z_um - r.true_z_um) <= d / 4
        assert r.frames <= 8


async def test_tracking_widens_when_the_prediction_is_far_off() -> None:
    profile = drifting_profile(**{"sim.focal_plane.drift_um": 0.0})
    d = profile.optics.depth_of_field_um
    tracker = FocusTracker(profile)
    async with sim_scope(profile, speed=SPEED) as scope:
        await scope.move_to(z_um=profile.focus.nominal_z_um)
        first, _ = await visit(scope, tracker, "C6")
        assert first.found
        # A knock on the stage: the remembered plane is now 6 depths of field off.
        t_last, z_last = tracker.keys["C6"].planes[-1]
        tracker.keys["C6"].planes[-1] = (t_last, z_last + 6 * d)
        result, _ = await visit(scope, tracker, "C6")
    assert result.found and "widened" in result.message, result.message
    assert abs(result.z_um - result.true_z_um) <= d / 4


@pytest.mark.parametrize("knock_dof", [1.0, 2.5, -2.5])
async def test_a_knocked_prediction_is_never_confirmed_out_of_focus(knock_dof: float) -> None:
    # The remembered plane moved by 1 and 2.5 depths of field: the slope check's frames then
    # sit on a flank or on a side lobe of the focus curve (about a quarter of the peak's
    # height 2-3 d out). Whatever it takes, a "found" must be in focus.
    profile = drifting_profile(**{"sim.focal_plane.drift_um": 0.0})
    d = profile.optics.depth_of_field_um
    tracker = FocusTracker(profile)
    async with sim_scope(profile, speed=SPEED) as scope:
        await scope.move_to(z_um=profile.focus.nominal_z_um)
        first, _ = await visit(scope, tracker, "E4")
        assert first.found
        t_last, z_last = tracker.keys["E4"].planes[-1]
        tracker.keys["E4"].planes[-1] = (t_last, z_last + knock_dof * d)
        result, _ = await visit(scope, tracker, "E4")
    assert result.found, result.message
    assert abs(result.z_um - result.true_z_um) <= d / 4, (result.z_um, result.true_z_um, result.message)
    assert result.frames <= 8 or "widened" in result.message, (result.frames, result.message)


async def test_no_focus_keeps_the_predicted_plane_and_the_history() -> None:
    profile = drifting_profile(**{"sim.focal_plane.drift_um": 0.0})
    tracker = FocusTracker(profile)
    async with sim_scope(profile, speed=SPEED) as scope:
        assert scope.truth.known
        await scope.move_to(z_um=profile.focus.nominal_z_um)
        good, _ = await visit(scope, tracker, "C6")
        assert good.found
        planes_before = list(tracker.keys["C6"].planes)
        # The same key, but the stage now looks at the empty well H12 (a bubble, say).
        x, y = scope.truth.world.well_centre_um("H12")
        await scope.move_to(x_um=x, y_um=y)
        predicted = tracker.predict_z_um("C6", x, y, scope.clock.now())
        result = await tracker.focus(scope, "C6", x, y)
        assert not result.found
        assert "predicted plane" in result.message
        assert predicted is not None and result.z_um == pytest.approx(predicted, abs=0.01)
        assert (await scope.position()).z_um == pytest.approx(predicted, abs=0.01)
    assert tracker.keys["C6"].planes == planes_before


async def test_row_h_after_row_a_is_searched_near_the_plate_not_millimetres_off() -> None:
    # Reported: after imaging only row A, predictions for row H were off by 0.37-1.5 mm
    # (twelve wells in a row were fitted a quadratic whose curvature across the rows
    # nothing fixed). Row A fixes the plate's tilt along x only; across the rows the
    # focus surface stays level and the first search is widened by how far it guesses.
    profile = drifting_profile(**{"sim.focal_plane.drift_um": 0.0})
    d = profile.optics.depth_of_field_um
    tracker = FocusTracker(profile)
    misses = []
    async with sim_scope(profile, speed=SPEED) as scope:
        assert scope.truth.known
        await scope.move_to(z_um=profile.focus.nominal_z_um)
        for well in [f"A{c}" for c in range(1, 13)] + ["H11", "H8", "H4", "H1"]:
            x, y = scope.truth.world.well_centre_um(well)
            await scope.move_to(x_um=x, y_um=y)
            truth = scope.true_focus_z_um()
            assert truth is not None
            predicted = tracker.predict_z_um(well, x, y, scope.clock.now())
            result = await tracker.focus(scope, well, x, y)
            assert result.found, (well, result.message)
            assert abs(result.z_um - result.true_z_um) <= d / 4, (well, result.z_um, result.true_z_um)
            if well.startswith("H"):
                # The simulated plate's focal plane changes by about 32 um from row A to
                # row H (tilt -0.5 um/mm over 63 mm, hw_profiles/sim.toml).
                assert predicted is not None
                misses.append(abs(predicted - truth))
                assert misses[-1] <= 40.0, (well, predicted, truth)
    assert max(misses[1:]) <= 15.0, misses  # once row H has a focused well, the surface spans both rows


async def test_a_50_um_jump_between_time_points_is_found_or_reported_never_faked() -> None:
    # Reported: when the focal plane moved about 50 um between widely spaced time points,
    # tracked positions reported "found" 40 um off with confidence 0.99. The shipped
    # culture density (sparse fields at 320x240); the door opens two hours after the
    # first time point and the plane settles 50 um higher (τ = 40 min) well before the
    # next, a day later; at the third the trend still says "rising" while the plane has
    # stopped. Whatever is reported found must be in focus.
    age_h = sim_profile().sim.culture_age_h  # type: ignore[union-attr]
    profile = sim_profile(**{
        "sim.focal_plane.drift_um": 50.0,
        "sim.focal_plane.door_openings_h": [age_h + 2.0],
    })
    d = profile.optics.depth_of_field_um
    tracker = FocusTracker(profile)
    wells = ("B2", "B5", "D3", "E10")
    async with sim_scope(profile, speed=SPEED) as scope:
        assert scope.truth.known
        await scope.move_to(z_um=profile.focus.nominal_z_um)
        t0 = scope.clock.now()
        results = []
        for tp in range(3):
            wait = t0 + tp * 86400.0 - scope.clock.now()
            if wait > 0:
                scope.clock.advance(wait)  # type: ignore[attr-defined]  (the simulated clock)
            for well in wells:
                result, _ = await visit(scope, tracker, well)
                results.append((tp, well, result))
    truth = {(tp, w): r.true_z_um for tp, w, r in results}
    assert all(truth[(1, w)] - truth[(0, w)] == pytest.approx(50.0, abs=1.0) for w in wells)
    report = [(tp, w, r.found, round(r.z_um - r.true_z_um, 1), r.message) for tp, w, r in results]
    for tp, well, r in results:
        if r.found:
            assert abs(r.z_um - r.true_z_um) <= d / 4, report
    assert sum(r.found for _, _, r in results) >= len(results) - 1, report
