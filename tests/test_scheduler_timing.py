"""Time point arithmetic: anchored to t0, late ones run late, missed ones recorded, none invented."""

from __future__ import annotations

from hypothesis import given, settings
from hypothesis import strategies as st

from daemon.timelapse.timing import Next, due_index, next_step, planned_s, slot_open

T0 = 1_772_442_000.0  # 2026-03-02 09:00 UTC, the sim profile's start
I = 600.0


def test_first_time_point_runs_at_once_and_the_next_waits() -> None:
    assert next_step(0, 5, T0, I, T0) == Next("run", 0, T0)
    assert next_step(1, 5, T0, I, T0 + 100.0) == Next("wait", 1, T0 + I)


def test_late_time_point_runs_late_inside_its_slot() -> None:
    step = next_step(1, 5, T0, I, T0 + I + 599.0)
    assert step.action == "run" and step.k == 1 and step.at_s == T0 + I and step.missed == ()


def test_overrun_skips_to_the_open_slot_and_records_the_closed_one() -> None:
    step = next_step(1, 5, T0, I, T0 + 2 * I + 5.0)
    assert step == Next("run", 2, T0 + 2 * I, missed=(1,))


def test_downtime_past_the_end_misses_the_rest() -> None:
    assert next_step(2, 5, T0, I, T0 + 10 * I) == Next("done", missed=(2, 3, 4))
    assert next_step(5, 5, T0, I, T0 + 10 * I) == Next("done")


def test_slots_and_due_index() -> None:
    assert due_index(T0, I, T0 - 1.0) == -1
    assert due_index(T0, I, T0 + 3 * I) == 3  # exactly on time is that slot, not the one before
    assert slot_open(3, T0, I, T0 + 3 * I + 599.9)
    assert not slot_open(3, T0, I, T0 + 4 * I)


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
        for k in step.missed:
            assert k not in outcome
            outcome[k] = ("missed", now)
        if step.missed:
            next_k = step.missed[-1] + 1
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
            # Anchored: started in its own slot [t0 + k*I, t0 + (k+1)*I), whatever came before.
            assert planned_s(T0, I, k) <= at < planned_s(T0, I, k + 1)
        else:
            # Recorded as missed only once its slot had closed.
            assert at >= planned_s(T0, I, k + 1)
