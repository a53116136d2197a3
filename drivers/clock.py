"""Clocks: the wall clock for real scopes, an accelerated one for the simulated scope.

Everything that schedules or timestamps reads time through a ``Clock`` so that a 72 h
time-lapse on the simulated scope can run in seconds. The accelerated clock can persist
its reading in a file so that time keeps passing (at its speed) while the daemon is down.
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import threading
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Protocol

from drivers import atomic


class Clock(Protocol):
    speed: float

    def now(self) -> float:
        """Seconds since the Unix epoch on this clock."""
        ...

    async def sleep(self, seconds: float) -> None:
        """Sleep ``seconds`` of this clock's time."""
        ...

    def paused(self) -> contextlib.AbstractContextManager[None]:
        """Stop this clock while the block runs (only a simulated clock can)."""
        ...


class WallClock:
    speed = 1.0

    def now(self) -> float:
        return time.time()

    async def sleep(self, seconds: float) -> None:
        await asyncio.sleep(max(0.0, seconds))

    def paused(self) -> contextlib.AbstractContextManager[None]:
        return contextlib.nullcontext()


class ScaledClock:
    """Runs ``speed`` times faster than real time from ``start_s`` (simulated epoch seconds).

    With ``state_file`` the pair (simulated time, real time) is stored, so a restarted
    process resumes the simulated timeline as if it had kept running: time lost while
    the process was down shows up as elapsed simulated time.
    """

    def __init__(
        self,
        speed: float = 1.0,
        start_s: float | None = None,
        state_file: Path | None = None,
    ) -> None:
        if speed <= 0:
            raise ValueError(f"clock speed must be > 0, got {speed}")
        self.speed = float(speed)
        self._state_file = state_file
        real_now = time.time()
        sim_start = start_s if start_s is not None else real_now
        if state_file is not None and state_file.exists():
            saved = json.loads(state_file.read_text())
            # Time that passed in the real world while we were down passes here too, sped up.
            sim_start = saved["sim_s"] + (real_now - saved["real_s"]) * saved["speed"]
        self._sim_origin = sim_start
        self._real_origin = time.monotonic()
        self._offset_s = 0.0
        self._lock = threading.Lock()  # now() is read from the controller emulator's thread too
        self._held_real_s = 0.0  # real time spent paused, which does not count
        self._pause_depth = 0
        self._paused_at = 0.0
        self.save()

    def now(self) -> float:
        with self._lock:
            real = self._paused_at if self._pause_depth else time.monotonic()
            return self._sim_origin + self._offset_s + (real - self._real_origin - self._held_real_s) * self.speed

    @contextlib.contextmanager
    def paused(self) -> Iterator[None]:
        """Freeze simulated time while the block runs.

        The simulated camera renders inside such a block: a real camera delivers its frame
        in the exposure time, so the simulator's own computing must not age the culture,
        move the stage or make a time point late (at 500x, 0.2 s of rendering would
        otherwise be 100 simulated seconds).
        """
        with self._lock:
            if self._pause_depth == 0:
                self._paused_at = time.monotonic()
            self._pause_depth += 1
        try:
            yield
        finally:
            with self._lock:
                self._pause_depth -= 1
                if self._pause_depth == 0:
                    self._held_real_s += time.monotonic() - self._paused_at
            self.save()

    def advance(self, seconds: float) -> None:
        """Jump forward (tests): simulated time passes without waiting."""
        self._offset_s += seconds
        self.save()

    async def sleep(self, seconds: float) -> None:
        await asyncio.sleep(max(0.0, seconds) / self.speed)

    def save(self) -> None:
        if self._state_file is None:
            return
        state = {"sim_s": self.now(), "real_s": time.time(), "speed": self.speed}
        atomic.write_text(self._state_file, json.dumps(state))
