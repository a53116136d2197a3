"""The accelerated clock of the simulated scope, and its persistence across restarts."""

from __future__ import annotations

import asyncio
import json
import time
from pathlib import Path

import pytest

from drivers.clock import CATCH_UP, MAX_DEBT_REAL_S, ScaledClock, untimed


async def test_scaled_clock_runs_fast_and_sleeps_in_its_own_time() -> None:
    clock = ScaledClock(speed=1000.0, start_s=1_000_000.0)
    t0 = clock.now()
    real0 = time.monotonic()
    await clock.sleep(50.0)  # 50 simulated seconds = 50 ms real
    real = time.monotonic() - real0
    assert clock.now() - t0 >= 50.0
    assert real < 1.0


def test_advance_jumps_forward() -> None:
    clock = ScaledClock(speed=1.0, start_s=0.0)
    before = clock.now()
    clock.advance(3600.0)
    assert clock.now() - before == pytest.approx(3600.0, abs=0.5)


def test_persisted_clock_counts_downtime(tmp_path: Path) -> None:
    state = tmp_path / "sim-clock.json"
    first = ScaledClock(speed=100.0, start_s=5_000.0, state_file=state)
    first.save()
    saved = json.loads(state.read_text())
    # Pretend the process was down for 2 real seconds: 200 simulated seconds pass.
    saved["real_s"] -= 2.0
    state.write_text(json.dumps(saved))
    second = ScaledClock(speed=100.0, start_s=5_000.0, state_file=state)
    assert second.now() - saved["sim_s"] == pytest.approx(200.0, abs=20.0)


def test_rejects_nonpositive_speed() -> None:
    with pytest.raises(ValueError, match="speed must be > 0"):
        ScaledClock(speed=0.0)


def test_held_clock_stands_still_then_catches_up_without_a_jump(tmp_path: Path) -> None:
    state = tmp_path / "sim-clock.json"
    clock = ScaledClock(speed=1000.0, start_s=0.0, state_file=state)
    with clock.held():
        frozen = clock.now()
        time.sleep(0.05)  # 50 simulated seconds would pass if the clock ran
        with clock.held():  # nesting is allowed
            assert clock.now() == frozen
        assert clock.now() == frozen
        released = time.monotonic()
    after = clock.now()
    # No jump on release: at most the catch-up rate over the real time since.
    assert 0.0 <= after - frozen <= (time.monotonic() - released) * 1000.0 * (1.0 + CATCH_UP) + 1e-6
    owed = clock.debt_s
    assert owed >= 45.0 - (after - frozen)
    # The time owed is paid back by running faster, (1 + CATCH_UP) x speed, until caught up.
    t_real, t_sim = time.monotonic(), clock.now()
    time.sleep(0.01)
    rate = (clock.now() - t_sim) / (time.monotonic() - t_real)
    assert 1000.0 < rate <= 1000.0 * (1.0 + CATCH_UP) * 1.001
    time.sleep(owed / 1000.0 / CATCH_UP + 0.02)
    assert clock.debt_s == 0.0
    # The saved state has the reading, so a restart does not count the hold a second time.
    restarted = ScaledClock(speed=1000.0, start_s=0.0, state_file=state)
    assert restarted.now() - clock.now() < 20.0


def test_debt_is_bounded_when_the_host_cannot_keep_up() -> None:
    clock = ScaledClock(speed=1e6, start_s=0.0)
    with clock.held():
        time.sleep(0.02)
        assert clock.debt_s <= MAX_DEBT_REAL_S * 1e6
    assert clock.dropped_s == 0.0 or clock.debt_s == pytest.approx(MAX_DEBT_REAL_S * 1e6)


async def test_the_holders_own_waits_pass_while_held_and_nobody_elses_do() -> None:
    clock = ScaledClock(speed=100.0, start_s=0.0)
    others: list[float] = []

    async def someone_else() -> None:
        t = clock.now()
        await asyncio.sleep(0.05)  # 5 simulated seconds if the clock ran
        others.append(clock.now() - t)

    with clock.held():
        other = asyncio.create_task(someone_else())
        await asyncio.sleep(0)  # the other task starts while nothing modelled is happening
        t0 = clock.now()
        await clock.sleep(3.0)  # an exposure or a settle: modelled time
        assert clock.now() - t0 == pytest.approx(3.0, abs=0.5)
        await other
    assert others[0] <= 3.5  # only the holder's 3 s passed meanwhile


async def test_untimed_work_never_holds_the_clock() -> None:
    clock = ScaledClock(speed=1000.0, start_s=0.0)
    with untimed():
        with clock.held():  # what the simulated camera does around a render
            t0 = clock.now()
            time.sleep(0.05)  # a live frame rendering
            assert clock.now() - t0 >= 40.0  # the clock ran on for everyone
    assert clock.debt_s == 0.0


def test_restart_keeps_the_saved_speed_and_frame_count(tmp_path: Path) -> None:
    state = tmp_path / "sim-clock.json"
    first = ScaledClock(speed=60.0, start_s=0.0, state_file=state)
    first.frames = 17
    first.save()
    again = ScaledClock(speed=None, start_s=0.0, state_file=state)
    assert (again.speed, again.frames) == (60.0, 17)
    faster = ScaledClock(speed=1000.0, start_s=0.0, state_file=state)
    assert faster.speed == 1000.0
