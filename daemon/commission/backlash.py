"""Backlash of the stage and focus drives, and how repeatably the stage returns to a point.

* **x and y**: the same point is approached from below and from above along one axis
  (from :data:`~daemon.commission.session.APPROACH_UM` away, beyond any play), a frame
  taken each time, and the two frames registered. The play leaves the mechanics short of
  the target by the backlash on one side only, so the image shift between the two,
  turned into a stage displacement by the measured map, is the backlash. Repeated
  ``cycles`` times and averaged.
* **z**: the focus curve is swept upwards and downwards through the plane of best focus
  (each sweep after a take-up move from beyond it) and the peak of each found as the
  autofocus finds it (:func:`daemon.focus.autofocus.fit_peak`). Coming down, the
  objective sits higher than the motor by the play, so the peak comes at a motor
  position lower by the backlash. Up and down sweeps alternate, so a slow drift of the
  focal plane cancels out of the mean.
* **repeatability**: the stage leaves the point in a different direction each time and
  comes back to it from below on both axes; each return's frame is registered against
  the first, and the scatter of those positions (standard deviation per axis) is the
  repeatability.
"""

from __future__ import annotations

import asyncio
import dataclasses
import math

import numpy as np

from daemon.commission import CommissionRefused
from daemon.commission.image_map import StageImageMap
from daemon.commission.registration import register
from daemon.commission.session import Session
from daemon.focus.autofocus import FIT_HALF_WIDTH_DOF, FocusPlan, Sample, fit_peak, score_frame
from daemon.focus.metrics import get_metric

FOCUS_METRIC = "variance_of_laplacian"
SWEEP_HALF_RANGE_DOF = 2.0
SWEEP_STEP_DOF = 0.25
# The focus' take-up move before a sweep: beyond any play a budget focus drive has (common
# practice), and three times what the profile says.
MIN_TAKEUP_UM = 30.0
GOLDEN = (math.sqrt(5.0) - 1.0) / 2.0  # departures in directions that never repeat


@dataclasses.dataclass
class AxisBacklash:
    """The play of one stage axis: one sample per cycle (um), the cross-axis component of
    each (how far off the axis the two approaches ended, um)."""

    axis: str
    samples_um: list[float]
    across_um: list[float]

    @property
    def estimate_um(self) -> float:
        return float(np.mean(self.samples_um))

    @property
    def sd_um(self) -> float:
        return float(np.std(self.samples_um, ddof=1)) if len(self.samples_um) > 1 else float("nan")

    def to_dict(self) -> dict[str, object]:
        return {
            "estimate_um": round(self.estimate_um, 3),
            "sd_um": round(self.sd_um, 3) if math.isfinite(self.sd_um) else None,
            "samples_um": [round(v, 3) for v in self.samples_um],
            "across_um": [round(v, 3) for v in self.across_um],
        }


async def measure_stage_backlash(
    session: Session, smap: StageImageMap, x_um: float, y_um: float, *, axis: str, cycles: int
) -> AxisBacklash:
    """Approach (x, y) from below and from above along ``axis``, ``cycles`` times."""
    below, above = ((-1, 0), (1, 0)) if axis == "x" else ((0, -1), (0, 1))
    index = 0 if axis == "x" else 1
    samples, across = [], []
    for _ in range(cycles):
        await session.go(x_um, y_um, side=below)
        a = await session.frame()
        await session.go(x_um, y_um, side=above)
        b = await session.frame()
        shift = await asyncio.to_thread(register, a.pixels, b.pixels)
        move = smap.stage_move_um((shift.dx_px, shift.dy_px))
        samples.append(move[index])
        across.append(move[1 - index])
    return AxisBacklash(axis, samples, across)


@dataclasses.dataclass
class Repeatability:
    """Where the stage came to rest on each return (um, relative to the first arrival)."""

    positions_um: np.ndarray

    @property
    def sd_um(self) -> tuple[float, float]:
        sd = np.std(self.positions_um, axis=0, ddof=1)
        return float(sd[0]), float(sd[1])

    @property
    def max_um(self) -> float:
        centred = self.positions_um - self.positions_um.mean(axis=0)
        return float(np.max(np.hypot(centred[:, 0], centred[:, 1])))

    def to_dict(self) -> dict[str, object]:
        sx, sy = self.sd_um
        return {
            "sd_x_um": round(sx, 4),
            "sd_y_um": round(sy, 4),
            "max_from_mean_um": round(self.max_um, 4),
            "arrivals": len(self.positions_um),
            "positions_um": [[round(float(x), 4), round(float(y), 4)] for x, y in self.positions_um],
        }


async def measure_repeatability(
    session: Session, smap: StageImageMap, x_um: float, y_um: float, *, returns: int
) -> Repeatability:
    """Arrive at (x, y) from below ``returns + 1`` times, leaving in a new direction in between."""
    await session.go(x_um, y_um, side=(-1, -1))
    first = await session.frame()
    positions = [(0.0, 0.0)]
    away = session.approach_um
    for k in range(1, returns + 1):
        angle = 2.0 * math.pi * GOLDEN * k
        await session.go(x_um + away * math.cos(angle), y_um + away * math.sin(angle), side=(0, 0), wait=False)
        await session.go(x_um, y_um, side=(-1, -1))
        frame = await session.frame()
        shift = await asyncio.to_thread(register, first.pixels, frame.pixels)
        positions.append(smap.stage_move_um((shift.dx_px, shift.dy_px)))
    return Repeatability(np.array(positions))


@dataclasses.dataclass
class FocusSweep:
    """One sweep through focus: the motor positions (um) in the order taken, their focus
    scores, and the fitted peak (None when the sweep showed none)."""

    direction: str  # "up" or "down"
    z_um: list[float]
    scores: list[float]
    peak_z_um: float | None


@dataclasses.dataclass
class FocusBacklash:
    sweeps: list[FocusSweep]
    takeup_um: float

    def peaks(self, direction: str) -> list[float]:
        return [s.peak_z_um for s in self.sweeps if s.direction == direction and s.peak_z_um is not None]

    @property
    def estimate_um(self) -> float:
        up, down = self.peaks("up"), self.peaks("down")
        if not up or not down:
            return float("nan")
        return float(np.mean(up) - np.mean(down))

    def to_dict(self) -> dict[str, object]:
        est = self.estimate_um
        return {
            "estimate_um": round(est, 3) if math.isfinite(est) else None,
            "peaks_up_um": [round(v, 3) for v in self.peaks("up")],
            "peaks_down_um": [round(v, 3) for v in self.peaks("down")],
            "takeup_um": self.takeup_um,
            "metric": FOCUS_METRIC,
            "sweeps": [
                {"direction": s.direction, "z_um": [round(z, 3) for z in s.z_um], "scores": [float(v) for v in s.scores]}
                for s in self.sweeps
            ],
        }


def focus_sweep_plan(profile_focus_backlash_um: float, z_centre_um: float, dof_um: float,
                     z_min_um: float, z_safe_max_um: float) -> tuple[list[float], float]:
    """The planes of one sweep (upwards) and the take-up distance; the planes with the
    take-up beyond them must stay inside the focus limits, never above the safe limit."""
    half = SWEEP_HALF_RANGE_DOF * dof_um
    n = int(round(2 * SWEEP_HALF_RANGE_DOF / SWEEP_STEP_DOF))
    planes = [float(z) for z in np.linspace(z_centre_um - half, z_centre_um + half, n + 1)]
    takeup = max(MIN_TAKEUP_UM, 3.0 * profile_focus_backlash_um)
    room = min(planes[0] - z_min_um, z_safe_max_um - planes[-1])
    if room < takeup:
        raise CommissionRefused(
            f"the focus sweeps need {takeup:.0f} um of travel beyond {planes[0]:.1f}-{planes[-1]:.1f} um on both "
            f"sides, but the focus limits ({z_min_um:g}-{z_safe_max_um:g} um, [focus] z_min_um and z_safe_max_um) "
            "leave less; focus on a plane farther from them"
        )
    return planes, takeup


async def measure_focus_backlash(session: Session, z_centre_um: float, *, sweeps: int) -> FocusBacklash:
    """``sweeps`` pairs of sweeps, up then down, through ``z_centre_um`` (the plane of best focus)."""
    scope = session.scope
    plan = FocusPlan.for_profile(scope.profile)
    focus = scope.profile.focus
    planes, takeup = focus_sweep_plan(focus.backlash_um, z_centre_um, plan.dof_um, focus.z_min_um, focus.z_safe_max_um)
    metric = get_metric(FOCUS_METRIC)
    out: list[FocusSweep] = []
    for _ in range(sweeps):
        for direction, order, start in (("up", planes, planes[0] - takeup), ("down", planes[::-1], planes[-1] + takeup)):
            await session.go_z(start)
            samples: list[Sample] = []
            for z in order:
                pos = await session.go_z(z)
                frame = await session.frame()
                full = float(2**frame.bit_depth - 1)
                score, coarse, level = await asyncio.to_thread(score_frame, frame.pixels, metric, None, plan, full)
                samples.append(Sample(pos.z_um, score, coarse, level, frame.t_s))
            best = max(samples, key=lambda s: s.score)
            inside = planes[0] + FIT_HALF_WIDTH_DOF * plan.dof_um * 0.5 <= best.z_um <= planes[-1] - 0.5 * FIT_HALF_WIDTH_DOF * plan.dof_um
            fit = fit_peak(samples, best, plan) if inside else None
            out.append(FocusSweep(direction, [s.z_um for s in samples], [s.score for s in samples], fit.z_um if fit else None))
    await session.go_z(z_centre_um - takeup)
    await session.go_z(z_centre_um)  # back at the plane of best focus, reached from below
    return FocusBacklash(out, takeup)
