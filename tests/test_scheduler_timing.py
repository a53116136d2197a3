"""Time point arithmetic: anchored to t0, late ones run late, missed ones recorded, none invented."""

from __future__ import annotations

from hypothesis import given, settings
from hypothesis import strategies as st

from daemon.timelapse.timing import Next, describe_rule, due_index, late_tolerance_s, next_step, planned_s, slot_open

T0 = 1_772_442_000.0  # 2026-03-02 09:00 UTC, the sim profile's start
I = 600.0


def test_first_time_point_runs_at_once_and_the_next_waits() -> None:
    assert next_step(0, 5, T0, I, T0) == Next("run", 0, T0)
    assert next_step(1, 5, T0, I, T0 + 100.0) == Next("wait", 1, T0 + I)


def test_late_time_point_runs_late_within_the_tolerance() -> None:
    tol = late_tolerance_s(I)
    assert tol == 300.0  # half of the 600 s interval
    step = next_step(1, 5, T0, I, T0 + I + tol - 1.0)
    assert step.action == "run" and step.k == 1 and step.at_s == T0 + I and step.missed == ()


def test_beyond_the_tolerance_it_is_missed_and_the_next_on_time_one_is_waited_for() -> None:
    step = next_step(1, 5, T0, I, T0 + I + late_tolerance_s(I) + 1.0)
    assert step == Next("wait", 2, T0 + 2 * I, missed=(1, 1))


def test_the_tolerance_is_never_more_than_a_quarter_hour() -> None:
    assert late_tolerance_s(24 * 3600.0) == 900.0  # a daily time point is never hours late
    assert late_tolerance_s(1.0) == 0.5
    assert "900 s" in describe_rule(24 * 3600.0)


def test_overrun_skips_to_the_open_slot_and_records_the_closed_one() -> None:
    step = next_step(1, 5, T0, I, T0 + 2 * I + 5.0)
    assert step == Next("run", 2, T0 + 2 * I, missed=(1, 1))


def test_downtime_past_the_end_misses_the_rest() -> None:
    assert next_step(2, 5, T0, I, T0 + 10 * I) == Next("done", missed=(2, 4))
    assert next_step(5, 5, T0, I, T0 + 10 * I) == Next("done")


def test_a_long_downtime_is_one_range() -> None:
    step = next_step(0, 10_000_000, T0, 1.0, T0 + 86_400.0 + 0.2)
    assert step == Next("run", 86_400, T0 + 86_400.0, missed=(0, 86_399))


def test_slots_and_due_index() -> None:
    assert due_index(T0, I, T0 - 1.0) == -1
    assert due_index(T0, I, T0 + 3 * I) == 3  # exactly on time is that slot, not the one before
    assert slot_open(3, T0, I, T0 + 3 * I + 299.9)
    assert not slot_open(3, T0, I, T0 + 3 * I + 300.0)


@settings(max_examples=200, deadline=None)
@given(
    count=st.integers(1, 30),
    # How long each run takes (fractions of the interval; some overrun), and outages.
    run_fraction=st.lists(st.floats(0.01, 2.5), min_size=1, max_size=30),
    outages=st.lists(st.tuples(st.integers(0, 29), st.floats(0.0, 6.0)), max_size=4),
)
def test_every_time_point_is_run_once_or_missed_once_and_never_drifts(
    count: int, run_fraction: list[float], outages: list[tuple[int, float]]
) -> None:
    now = T0
    next_k = 0
    outcome: dict[int, tuple[str, float]] = {}
    down_after = dict(outages)
    for _ in range(10 * count + 10):  # bounded: each pass runs, waits or ends
        step = next_step(next_k, count, T0, I, now)
        if step.missed:
            first, last = step.missed
            for k in range(first, last + 1):
                assert k not in outcome
                outcome[k] = ("missed", now)
            next_k = last + 1
        if step.action == "done":
            break
        if step.action == "wait":
            assert step.at_s > now
            now = step.at_s
            continue
        assert step.k not in outcome
        outcome[step.k] = ("run", now)
        next_k = step.k + 1
        now += run_fraction[step.k % len(run_fraction)] * I
        now += down_after.get(step.k, 0.0) * I
    assert sorted(outcome) == list(range(count))
    for k, (what, at) in outcome.items():
        if what == "run":
            # Anchored, and within the tolerance: [t0 + k*I, t0 + k*I + tolerance).
            assert planned_s(T0, I, k) <= at < planned_s(T0, I, k) + late_tolerance_s(I)
        else:
            # Recorded as missed only once it was past its tolerance.
            assert at >= planned_s(T0, I, k) + late_tolerance_s(I)
