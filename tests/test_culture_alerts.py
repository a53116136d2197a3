"""Culture alerts: passaging confluence, sudden drop, repeated focus failure; persistence."""

from __future__ import annotations

import json

import pytest

from daemon.culture.alerts import (
    CONFLUENCE_DROP,
    CONFLUENCE_REACHED,
    FOCUS_FAILING,
    Alert,
    CultureWatch,
    WatchRules,
)

H = 3600.0


def feed(watch: CultureWatch, well: str, values: list[float | None], focus: list[bool] | None = None) -> list[Alert]:
    out: list[Alert] = []
    for i, c in enumerate(values):
        out += watch.update(well, i * H, c, True if focus is None else focus[i])
    return out


def test_default_threshold_is_in_the_passaging_range() -> None:
    # Adherent cultures are usually passaged at about 70-90 % confluence (common practice).
    assert 0.7 <= WatchRules().confluence_threshold <= 0.9


def test_threshold_crossing_fires_once_after_confirmation() -> None:
    watch = CultureWatch()
    alerts = feed(watch, "C4", [0.5, 0.62, 0.74, 0.81, 0.84, 0.86, 0.83, 0.88])
    assert [a.kind for a in alerts] == [CONFLUENCE_REACHED]
    # Two readings at/above 80 % in a row: the alert comes with the second (t = 4 h).
    assert alerts[0].t_s == 4 * H and alerts[0].well == "C4"
    assert "C4" in alerts[0].message and "80 %" in alerts[0].message


def test_single_noisy_reading_above_threshold_does_not_fire() -> None:
    watch = CultureWatch()
    assert feed(watch, "A1", [0.6, 0.85, 0.62, 0.64]) == []


def test_threshold_rearms_after_passaging() -> None:
    watch = CultureWatch(WatchRules(drop_abs=1.0, drop_rel=1.0))  # passaging would read as a drop
    alerts = feed(watch, "B2", [0.82, 0.85, 0.2, 0.3, 0.5, 0.81, 0.83])
    assert [a.t_s for a in alerts] == [1 * H, 6 * H]


def test_user_set_threshold_per_well() -> None:
    watch = CultureWatch()
    watch.set_rules("D5", WatchRules(confluence_threshold=0.7))
    assert [a.kind for a in feed(watch, "D5", [0.6, 0.71, 0.72])] == [CONFLUENCE_REACHED]
    assert feed(watch, "D6", [0.6, 0.71, 0.72]) == []


def test_sudden_drop_fires_and_small_wobble_does_not() -> None:
    watch = CultureWatch()
    assert feed(watch, "E1", [0.4, 0.45, 0.42, 0.47, 0.44]) == []
    alerts = feed(watch, "E2", [0.4, 0.5, 0.55, 0.3, 0.28])
    assert [a.kind for a in alerts] == [CONFLUENCE_DROP]
    assert alerts[0].t_s == 3 * H and "55 %" in alerts[0].message and "30 %" in alerts[0].message


def test_drop_in_sparse_well_needs_absolute_size() -> None:
    # 6 % to 3 % is half the cells, but within the noise of a sparse field.
    watch = CultureWatch()
    assert feed(watch, "F1", [0.05, 0.06, 0.03, 0.04]) == []


def test_defocused_frames_are_not_mistaken_for_detachment() -> None:
    watch = CultureWatch()
    alerts = feed(watch, "G3", [0.6, 0.62, 0.1, 0.63], focus=[True, True, False, True])
    assert alerts == []


def test_repeated_focus_failure() -> None:
    watch = CultureWatch()
    focus = [True, False, False, True, False, False, False, False, True, False, False, False]
    alerts = feed(watch, "H12", [None] * len(focus), focus)
    assert [(a.kind, a.t_s) for a in alerts] == [(FOCUS_FAILING, 6 * H), (FOCUS_FAILING, 11 * H)]
    assert alerts[0].value == 3


def test_round_trip_keeps_state_and_rules() -> None:
    watch = CultureWatch(WatchRules(confluence_threshold=0.75))
    watch.set_rules("A2", WatchRules(confluence_threshold=0.9))
    feed(watch, "A1", [0.5, 0.76])  # one reading above: not yet confirmed
    feed(watch, "A3", [None, None], focus=[False, False])
    saved = json.loads(json.dumps(watch.to_dict()))
    restored = CultureWatch.from_dict(saved)
    assert restored.rules_for("A2").confluence_threshold == 0.9
    assert [a.kind for a in restored.update("A1", 2 * H, 0.77, True)] == [CONFLUENCE_REACHED]
    assert [a.kind for a in restored.update("A3", 2 * H, None, False)] == [FOCUS_FAILING]
    # The original, fed the same, agrees: persistence changed nothing.
    assert [a.kind for a in watch.update("A1", 2 * H, 0.77, True)] == [CONFLUENCE_REACHED]


def test_alert_dict_round_trip_and_validation() -> None:
    a = Alert(CONFLUENCE_DROP, "B7", 1.5e9, "well B7: confluence fell", 0.31)
    assert Alert.from_dict(json.loads(json.dumps(a.to_dict()))) == a
    with pytest.raises(ValueError):
        Alert.from_dict({**a.to_dict(), "kind": "weather"})
    with pytest.raises(ValueError):
        WatchRules(confluence_threshold=1.5)
    with pytest.raises(ValueError):
        WatchRules.from_dict({"confluence_treshold": 0.8})


def test_alerts_on_simulated_cultures() -> None:
    """Nine days of 6-hourly time points on plate LR-0412, confluence measured from the frames."""
    import numpy as np

    from daemon.culture.confluence import confluence
    from drivers.sim.world import SimWorld
    from tests.helpers import sim_profile

    world = SimWorld(sim_profile(320, 240, **{"optics.magnification": 4.0, "optics.numerical_aperture": 0.10}))
    watch = CultureWatch()
    threshold = watch.rules.confluence_threshold
    hours = np.arange(0.0, 24.0 * 9 + 1, 6.0)
    detach_h = 144.0  # well F6: the cells lift off on day 6
    alerts: list[Alert] = []
    first_truth_above: dict[str, float] = {}
    for h in hours:
        t = world.t0_s + h * H
        for well in ("B4", "D9", "F6", "H12"):
            x, y = world.well_centre_um(well)
            truth = world.true_confluence(x, y, t)
            if truth >= threshold and well not in first_truth_above:
                first_truth_above[well] = h
            if well == "H12":
                # The empty control well: autofocus finds no plane, so no confluence is measured.
                alerts += watch.update(well, t, None, focus_found=False)
                continue
            shown = well
            if well == "F6" and h >= detach_h:
                x, y = world.well_centre_um("H12")  # what an emptied well looks like
            frame = world.render(x, y, world.true_focus_z_um(x, y, t), t_s=t, exposure_ms=20.0)
            alerts += watch.update(shown, t, confluence(frame, pixel_size_um=world.pixel_um).fraction, focus_found=True)
    by = {(a.kind, a.well): a for a in alerts}
    assert len(by) == len(alerts), "no alert repeats"
    for well in ("B4", "D9"):
        reached = by[(CONFLUENCE_REACHED, well)]
        t_h = (reached.t_s - world.t0_s) / H
        # Within two time points of the simulator's own crossing (one is the confirmation).
        assert abs(t_h - first_truth_above[well]) <= 12.0, (well, t_h, first_truth_above[well])
    drop = by[(CONFLUENCE_DROP, "F6")]
    assert (drop.t_s - world.t0_s) / H == detach_h
    assert (FOCUS_FAILING, "H12") in by and (by[(FOCUS_FAILING, "H12")].t_s - world.t0_s) / H == 12.0
    assert {a.kind for a in alerts if a.well == "H12"} == {FOCUS_FAILING}
