"""Mechanics of the simulated stage and focus: play, stopping scatter and ringing.

The simulated camera images where the mechanics are, and they are not quite where the
motors are. Three imperfections, all set in ``[sim.motion]`` and all known to the
ground truth, so that a measurement of them (``phasewatch commission``) can be judged:

* **Play (backlash)** on every axis: the mechanics lie between the motor position and
  the motor position plus the axis' backlash. Moving up (towards larger coordinates)
  pushes them along at the motor position; moving down they trail above it by the
  backlash; on a reversal the motor crosses the gap before they follow
  (:func:`play`).
* **Stopping scatter (repeatability)** in x and y: every move stops a little off its
  target, by an error drawn afresh for each move from a normal distribution of standard
  deviation ``repeatability_um`` per axis, from a generator seeded by ``[sim] seed`` (the
  n-th move of a run always gets the same error).
* **Ringing** after every move in x or y: the carriage oscillates along the move's
  direction as an underdamped second-order system released at the end of the move,

      d(t) = A * exp(-t / tau) * sin(2 * pi * f * t),   t = time since the move ended,

  A = ``ring_amplitude_um`` (no more than the move's own length), f =
  ``ring_frequency_hz``, tau = ``ring_decay_ms``. Only the latest move rings. The focus
  drive does not ring (it is stiffer and moves little).
"""

from __future__ import annotations

import dataclasses
import math
from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:
    from drivers.sim.config import SimMotion

Vec = tuple[float, float, float]


def play(mech_um: float, motor_um: float, backlash_um: float) -> float:
    """Mechanics of a drive with play: they lie between the motor and motor + backlash.

    Moving up pushes the mechanics along at the motor position; moving down they trail
    above it by the backlash; on reversal the motor crosses the gap before they follow.
    """
    return min(max(mech_um, motor_um), motor_um + backlash_um)


@dataclasses.dataclass(frozen=True, slots=True)
class Ringing:
    """Damped oscillation after a move: amplitude (um), frequency (Hz), decay time constant (s)."""

    amplitude_um: float
    frequency_hz: float
    decay_s: float

    @classmethod
    def of(cls, motion: SimMotion) -> Ringing:
        return cls(motion.ring_amplitude_um, motion.ring_frequency_hz, motion.ring_decay_ms / 1000.0)

    def offset_um(self, t_s: float, amplitude_um: float | None = None) -> float:
        """Displacement along the move direction ``t_s`` seconds after the move ended."""
        a = self.amplitude_um if amplitude_um is None else amplitude_um
        if t_s < 0.0 or a == 0.0 or self.decay_s <= 0.0:
            return 0.0
        return a * math.exp(-t_s / self.decay_s) * math.sin(2.0 * math.pi * self.frequency_hz * t_s)

    def settle_s(self, tolerance_um: float) -> float:
        """Settling time: the last moment the displacement reaches ``tolerance_um``; after it
        the stage stays inside the band (the usual definition of settling time of a
        second-order response, e.g. Ogata, Modern Control Engineering, from memory). 0 when
        the ringing never reaches the tolerance."""
        a = self.amplitude_um
        if a <= tolerance_um or self.decay_s <= 0.0 or self.frequency_hz <= 0.0:
            return 0.0
        # After the envelope has fallen below the tolerance nothing can reach it; before,
        # sample finely (1/2000 of a period) and refine the last crossing by bisection.
        t_end = self.decay_s * math.log(a / tolerance_um)
        step = 1.0 / (2000.0 * self.frequency_hz)
        t = np.arange(0.0, t_end + step, step)
        d = np.abs(a * np.exp(-t / self.decay_s) * np.sin(2.0 * np.pi * self.frequency_hz * t))
        above = np.flatnonzero(d >= tolerance_um)
        if above.size == 0:
            return 0.0
        lo, hi = float(t[above[-1]]), float(t[min(above[-1] + 1, t.size - 1)])
        for _ in range(40):
            mid = 0.5 * (lo + hi)
            if abs(self.offset_um(mid)) >= tolerance_um:
                lo = mid
            else:
                hi = mid
        return lo


class StageMechanics:
    """Where the simulated mechanics are, given where the motors are (see the module docstring).

    The emulator calls :meth:`at` for the mechanics at a motor position during a move
    (each move is monotonic on every axis, so the play evaluated from the move's start is
    exact), :meth:`finish` when a move has run to its end, :meth:`take_up` when homing
    takes the play up, and :meth:`stop` when motion is interrupted.
    """

    def __init__(self, motion: SimMotion, start: Vec, *, seed: int = 0) -> None:
        self.backlash_um: Vec = (motion.x_backlash_um, motion.y_backlash_um, motion.z_backlash_um)
        self.repeatability_um = motion.repeatability_um
        self.ringing = Ringing.of(motion)
        self._rng = np.random.default_rng([int(seed) & 0xFFFFFFFF, 0x5E77])
        self._play_state: Vec = start  # the mechanics at the start of the running move
        self._stop_error: tuple[float, float] = (0.0, 0.0)
        # The latest xy move that rang: when it ended, its direction (unit xy), its amplitude.
        self._ring: tuple[float, float, float, float] | None = None

    def played(self, motor: Vec) -> Vec:
        """The mechanics through the play alone, at a motor position of the running move."""
        return tuple(play(m, p, b) for m, p, b in zip(self._play_state, motor, self.backlash_um))  # type: ignore[return-value]

    def at(self, motor: Vec, now_s: float) -> Vec:
        """Where the mechanics are at ``now_s`` with the motors at ``motor``."""
        x, y, z = self.played(motor)
        ex, ey = self._stop_error
        x, y = x + ex, y + ey
        if self._ring is not None:
            t_end, ux, uy, amplitude = self._ring
            d = self.ringing.offset_um(now_s - t_end, amplitude)
            x, y = x + d * ux, y + d * uy
        return (x, y, z)

    def finish(self, start: Vec, end: Vec, end_s: float) -> None:
        """A move from ``start`` to ``end`` (motor positions) ran to its end at ``end_s``."""
        self._play_state = self.played(end)
        dx, dy = end[0] - start[0], end[1] - start[1]
        length = math.hypot(dx, dy)
        if length == 0.0:
            return
        if self.repeatability_um > 0.0:
            ex, ey = self._rng.normal(0.0, self.repeatability_um, 2)
            self._stop_error = (float(ex), float(ey))
        amplitude = min(self.ringing.amplitude_um, length)
        if amplitude > 0.0:
            self._ring = (end_s, dx / length, dy / length, amplitude)

    def take_up(self, motor: Vec, axes: tuple[bool, bool, bool]) -> None:
        """Homing ends by backing off the switches upwards: the play of those axes is taken up."""
        self._play_state = tuple(p if homed else m for p, m, homed in zip(motor, self._play_state, axes))  # type: ignore[assignment]

    def stop(self, motor: Vec) -> None:
        """Motion stopped at ``motor`` part-way through a move (reset, emergency stop, jam)."""
        self._play_state = self.played(motor)
