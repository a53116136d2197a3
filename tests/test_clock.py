"""The accelerated clock of the simulated scope, and its persistence across restarts."""

from __future__ import annotations

import json
import time
from pathlib import Path

import pytest

from drivers.clock import ScaledClock


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


def test_paused_clock_stands_still_then_resumes_without_a_jump(tmp_path: Path) -> None:
    state = tmp_path / "sim-clock.json"
    clock = ScaledClock(speed=1000.0, start_s=0.0, state_file=state)
    with clock.paused():
        frozen = clock.now()
        time.sleep(0.05)  # 50 simulated seconds would pass if the clock ran
        with clock.paused():  # nesting is allowed
            assert clock.now() == frozen
        assert clock.now() == frozen
    after = clock.now()
    assert 0.0 <= after - frozen < 20.0
    # The saved state excludes the pause, so a restart does not count it either.
    restarted = ScaledClock(speed=1000.0, start_s=0.0, state_file=state)
    assert restarted.now() - clock.now() < 20.0
