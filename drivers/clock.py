"""Clocks: the wall clock for real scopes, an accelerated one for the simulated scope.

Everything that schedules or timestamps reads time through a ``Clock`` so that a 72 h
time-lapse on the simulated scope can run in seconds. The accelerated clock can persist
its reading in a file so that time keeps passing (at its speed) while the daemon is down.

How simulated time passes (the accelerated clock)
--------------------------------------------------
Simulated time runs at ``speed`` times real time. Timed work (a time point, an
autofocus, a single capture) holds the clock (:meth:`ScaledClock.held`): while held, simulated
time passes only by the modelled durations of what the scope does (the holder's own waits
on the clock: exposure, settle; and the moves the simulated controller carries out, each
waited out at speed in real time and then counted exactly, :meth:`ScaledClock.model_until`),
never during the host's computing (rendering, saving, analysis) nor its lateness in waking. So a time point lasts
what the plan check estimates whatever the speed. The real time the host spent while
the clock was held is owed to everyone else and paid back afterwards, the clock running
faster (``CATCH_UP`` times) until it has caught up, so over a run simulated time keeps
``speed`` times real time as long as the host keeps up on average; what the host cannot
keep up with (more than ``MAX_DEBT_REAL_S`` owed) is dropped, not paid later in a jump.

Work marked :func:`untimed` (live view) never holds the clock: its rendering costs
nobody any simulated time and stops the clock for nobody.
"""

from __future__ import annotations

import asyncio
import contextlib
import contextvars
import json
import threading
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any, Protocol

from drivers import atomic

# Extra rate at which held time is paid back (the clock runs at (1 + CATCH_UP) x speed).
CATCH_UP = 1.0
# Real seconds of held time the clock will owe at most; beyond it the host is not keeping up.
MAX_DEBT_REAL_S = 5.0
# Real seconds between looks at the clock inside a sleep (the rate can change meanwhile).
_SLEEP_STEP_REAL_S = 0.05

# Set in work whose camera frames are not timed (live view): it never holds the clock.
_UNTIMED: contextvars.ContextVar[bool] = contextvars.ContextVar("clock_untimed", default=False)
# Set in the task that holds the clock: its own sleeps are modelled time passing.
_HOLDER: contextvars.ContextVar[object | None] = contextvars.ContextVar("clock_holder", default=None)
# How many holds this task has open: released() lifts its own, never another task's.
_OWN_HOLDS: contextvars.ContextVar[int] = contextvars.ContextVar("clock_own_holds", default=0)


@contextlib.contextmanager
def untimed() -> Iterator[None]:
    """Mark the block's work (and tasks/threads it starts) as untimed: it never holds a clock."""
    token = _UNTIMED.set(True)
    try:
        yield
    finally:
        _UNTIMED.reset(token)


def is_untimed() -> bool:
    return _UNTIMED.get()


class Clock(Protocol):
    speed: float

    def now(self) -> float:
        """Seconds since the Unix epoch on this clock."""
        ...

    async def sleep(self, seconds: float) -> None:
        """Sleep ``seconds`` of this clock's time."""
        ...

    def paused(self) -> contextlib.AbstractContextManager[None]:
        """Hold this clock while the block runs (only a simulated clock can; see ScaledClock.held)."""
        ...

    def released(self) -> contextlib.AbstractContextManager[None]:
        """Let a held clock run while the block runs (an idle wait inside held work)."""
        ...

    def real_s_for(self, sim_s: float) -> float:
        """Real seconds in which ``sim_s`` of this clock's time will pass at its present rate."""
        ...


class WallClock:
    speed = 1.0

    def now(self) -> float:
        return time.time()

    async def sleep(self, seconds: float) -> None:
        await asyncio.sleep(max(0.0, seconds))

    def paused(self) -> contextlib.AbstractContextManager[None]:
        return contextlib.nullcontext()

    def released(self) -> contextlib.AbstractContextManager[None]:
        return contextlib.nullcontext()

    def real_s_for(self, sim_s: float) -> float:
        return max(0.0, sim_s)


class ScaledClock:
    """Runs ``speed`` times faster than real time from ``start_s`` (simulated epoch seconds).

    With ``state_file`` the simulated time, the real time, the speed and ``frames`` (a
    frame counter the simulated camera keeps, so noise differs across restarts) are
    stored, so a restarted process resumes the simulated timeline as if it had kept
    running: time lost while the process was down shows up as elapsed simulated time.
    ``speed=None`` takes the saved speed (or 1 when there is none).
    """

    def __init__(
        self,
        speed: float | None = 1.0,
        start_s: float | None = None,
        state_file: Path | None = None,
    ) -> None:
        if speed is not None and speed <= 0:
            raise ValueError(f"clock speed must be > 0, got {speed}")
        self._state_file = state_file
        real_now = time.time()
        sim_start = start_s if start_s is not None else real_now
        self.frames = 0
        # Facts of the simulated world fixed at the clock's first start (kept with its state).
        self.world: dict[str, float] = {}
        saved: dict[str, Any] | None = None
        if state_file is not None and state_file.exists():
            saved = json.loads(state_file.read_text())
        if saved is not None:
            # Time that passed in the real world while we were down passes here too, sped up.
            sim_start = saved["sim_s"] + max(0.0, real_now - saved["real_s"]) * saved["speed"]
            self.frames = int(saved.get("frames", 0))
            self.world = dict(saved.get("world", {}))
            if speed is None:
                speed = float(saved["speed"])
        self.speed = float(speed if speed is not None else 1.0)
        self._lock = threading.RLock()  # now() is read from the controller emulator's thread too
        self._sim_s = sim_start
        self._real_s = time.monotonic()
        self._debt_s = 0.0  # simulated seconds owed to the others for host time spent held
        self._hold_depth = 0
        self.dropped_s = 0.0  # simulated seconds the host could not keep up with
        self.save()

    # -- reading -------------------------------------------------------------------------

    def _update(self) -> None:
        """Bring the reading up to the present real time (call with the lock held)."""
        real = time.monotonic()
        dt = max(0.0, real - self._real_s)
        self._real_s = real
        if self._hold_depth:
            self._debt_s += dt * self.speed
            cap = MAX_DEBT_REAL_S * self.speed
            if self._debt_s > cap:
                self.dropped_s += self._debt_s - cap
                self._debt_s = cap
            return
        self._sim_s += dt * self.speed
        if not self._hold_depth and self._debt_s > 0.0:
            paid = min(self._debt_s, dt * self.speed * CATCH_UP)
            self._sim_s += paid
            self._debt_s -= paid

    def now(self) -> float:
        with self._lock:
            self._update()
            return self._sim_s

    @property
    def debt_s(self) -> float:
        """Simulated seconds still to be paid back for host time spent while held."""
        with self._lock:
            self._update()
            return self._debt_s

    def rate(self) -> float:
        """Simulated seconds per real second right now."""
        with self._lock:
            self._update()
            if self._hold_depth:
                return 0.0
            if not self._hold_depth and self._debt_s > 0.0:
                return self.speed * (1.0 + CATCH_UP)
            return self.speed

    def real_s_for(self, sim_s: float) -> float:
        rate = self.rate()
        # While held, nothing but the holder's own waits moves the clock: look again soon.
        return _SLEEP_STEP_REAL_S if rate <= 0.0 else max(0.0, sim_s) / rate

    # -- holding ---------------------------------------------------------------------------

    @contextlib.contextmanager
    def held(self) -> Iterator[None]:
        """Hold simulated time while the block runs, except the modelled waits inside it.

        Timed work runs inside: a real camera delivers its frame in the exposure time, so
        the simulator's own computing must not age the culture, move the stage or make a
        time point late (at 500x, 0.2 s of rendering would otherwise be 100 simulated
        seconds). In work marked :func:`untimed` this does nothing. Nesting is allowed.
        """
        if _UNTIMED.get():
            yield
            return
        with self._lock:
            self._update()
            self._hold_depth += 1
        token = _HOLDER.set(self) if _HOLDER.get() is None else None
        own = _OWN_HOLDS.set(_OWN_HOLDS.get() + 1)
        try:
            yield
        finally:
            _OWN_HOLDS.reset(own)
            if token is not None:
                _HOLDER.reset(token)
            with self._lock:
                self._update()
                self._hold_depth -= 1
            self.save()

    paused = held  # the name the Clock protocol uses

    @contextlib.contextmanager
    def released(self) -> Iterator[None]:
        """Inside :meth:`held`: let the clock run for the block (the holder waits idle)."""
        own = _OWN_HOLDS.get() if self._holds_here() else 0
        with self._lock:
            self._update()
            self._hold_depth -= own
        try:
            yield
        finally:
            with self._lock:
                self._update()
                self._hold_depth += own

    def is_held(self) -> bool:
        with self._lock:
            return self._hold_depth > 0

    def model_until(self, t_s: float) -> None:
        """While held: a modelled action (a move, a dwell) ends at ``t_s``; its simulated
        time passes exactly, once the caller has waited it out in real time (which was
        counted as owed meanwhile, so it is not owed twice)."""
        with self._lock:
            self._update()
            if not self._hold_depth:
                return
            jump = max(0.0, t_s - self._sim_s)
            self._sim_s += jump
            self._debt_s = max(0.0, self._debt_s - jump)

    def _holds_here(self) -> bool:
        return _HOLDER.get() is self

    # -- waiting ---------------------------------------------------------------------------

    def advance(self, seconds: float) -> None:
        """Jump forward (tests): simulated time passes without waiting."""
        with self._lock:
            self._update()
            self._sim_s += seconds
        self.save()

    async def sleep(self, seconds: float) -> None:
        """Sleep ``seconds`` of simulated time. The holder's own sleeps are modelled time
        (exposure, settle): while held they pass exactly, after waiting them out at speed."""
        seconds = max(0.0, seconds)
        if _UNTIMED.get():
            # Untimed work (a live frame's exposure) waits its time at speed in real time and
            # costs nobody simulated time: it neither waits for a held clock nor moves it.
            await asyncio.sleep(seconds / self.speed)
            return
        if self._holds_here() and self.is_held():
            target = self.now() + seconds
            await asyncio.sleep(seconds / self.speed)
            self.model_until(target)
            return
        target = self.now() + seconds
        while True:
            left = target - self.now()
            if left <= 0.0:
                return
            await asyncio.sleep(min(_SLEEP_STEP_REAL_S, self.real_s_for(left)))

    @staticmethod
    def saved_state(state_file: Path) -> dict[str, Any] | None:
        """What a clock stored in ``state_file`` (None when there is none)."""
        if not state_file.exists():
            return None
        return dict(json.loads(state_file.read_text()))

    def save(self) -> None:
        if self._state_file is None:
            return
        state = {"sim_s": self.now(), "real_s": time.time(), "speed": self.speed, "frames": self.frames, "world": self.world}
        atomic.write_text(self._state_file, json.dumps(state))
