"""Focus tracking: keeping every position of a time-lapse in focus through thermal drift.

Each position (a ``key``: well and site) keeps the planes it was last found in focus.
Its next plane is predicted from its own last plane plus the drift trend, the rate at
which all positions' planes have been moving lately (a warming incubator moves every
position alike). A position never focused before is predicted from the focus surface
fitted over the positions focused so far (tilt and sag of the vessel), and searched with
a short coarse sweep around that prediction, which tells the main focus peak from its
side lobes; the farther the position lies from the positions the surface was fitted to,
the wider that sweep (the surface is level past its reach, and a plate's tilt and sag
add up with distance). A position seen before gets a bracket of a few frames around the
prediction. That bracket is first a *slope check* (:func:`check_at_slopes`): two frames
where the position's focus curve, modelled as a Gaussian of the width and height it had
last time, is steepest (one width either side of the prediction), whose ratio places the
peak, and one confirming frame there; three frames in all when the prediction holds.
When the check fails, the bracket goes on from those frames
(:func:`~daemon.focus.autofocus.refine`); when that shows no real peak as
high as the position's last one, the search widens to a coarse sweep around the
prediction that also covers the last plane (the drift may have stopped), and as a last
resort to the whole cold range. Every "found" is judged by
:func:`~daemon.focus.autofocus.conclude`: the peak must stand out of its own
neighbourhood on both sides.
"""

from __future__ import annotations

import dataclasses
import math
import statistics
from collections.abc import Callable
from typing import TYPE_CHECKING, Any

from daemon.focus.autofocus import (
    FocusPlan,
    FocusPoint,
    FocusProbe,
    FocusResult,
    Sample,
    _found,
    cold_search,
    conclude,
    default_centre_z_um,
    gaussian_peak,
    refine,
)
from daemon.focus.metrics import DEFAULT_METRIC
from daemon.focus.surface import SurfaceFit, SurfacePoint, fit_focus_surface

if TYPE_CHECKING:
    from daemon.profile import Profile
    from daemon.scope import Scope

HISTORY_PER_KEY = 8
# The tracking bracket may reach this many depths of field from the prediction (covers a
# 20 um step of drift at 10x/0.25) before the search widens to a coarse sweep.
TRACK_REACH_DOF = 4.0
# A position seen for the first time is predicted from the focus surface only: a short
# coarse sweep around the prediction tells the main peak from its side lobes.
NEW_KEY_HALF_RANGE_DOF = 4.0
WIDEN_HALF_RANGE_DOF = 8.0
# How much the focal plane may change per mm of stage travel past the positions the
# focus surface was fitted to: plate tilt in its holder plus bottom sag, about 1 um/mm
# on a budget stage (from memory; the simulated plate has 0.8 and 0.5 um/mm of tilt and
# 12 um of sag).
UNSUPPORTED_SLOPE_UM_PER_MM = 1.0
# A tracked peak must keep this share of the position's last peak score; a side lobe of
# the focus curve (defocused cells) reaches about a quarter of it.
PEAK_KEEP = 0.5
# The slope check (check_at_slopes). The ratio of two frames one Gaussian width either
# side of the prediction places the peak while it lies within about one width of the
# prediction; farther out the frame on the far side sinks into the floor and its
# excess is mostly noise. Measured on the simulated scope (10x/0.25, dense and sparse
# fields): frame-to-frame score noise is about 2 % of the peak's excess.
SLOPE_REACH_SIGMA = 1.2
# The Gaussian width of the score's peak where a position has none of its own recorded
# (a tracker state saved before widths were kept).
DEFAULT_WIDTH_DOF = 0.5
SLOPE_MIN_EXCESS = 0.15
# When both frames lie on one flank (the prediction is off by more than a width), the
# pair moves two widths towards the higher one at most this many times (one frame each).
SLOPE_SHIFTS = 2  # the lower slope frame keeps this share of the peak's excess
# The three frames (two slope frames and the confirming one) must trace the same peak as
# last time: a Gaussian whose width is within this factor of the remembered one and
# whose height keeps PEAK_KEEP of it.
SLOPE_WIDTH_FACTOR = 1.6
# The confirming frame at the placed peak keeps this share of the excess the model
# predicts there (the model's peak height from the two slope frames).
SLOPE_CONFIRM_SHARE = 0.8
# After the confirming frame, one more frame at the three frames' Gaussian vertex when
# it lies this far (in depths of field) from the placed plane.
SLOPE_RECHECK_DOF = 0.15
# Drift-rate samples older than this many revisit intervals no longer describe the trend.
TREND_HORIZON_INTERVALS = 2.0
STATE_VERSION = 1


@dataclasses.dataclass(frozen=True, slots=True)
class Prediction:
    """Where a position should be in focus, and how far off that may be.

    ``source`` is "last plane" (its own last plane moved by the drift trend) or
    "surface" (the focus surface); ``spread_um`` is the part of the prediction that
    rests on extrapolation: the trend's correction for a known position, the unsupported
    distance times :data:`UNSUPPORTED_SLOPE_UM_PER_MM` for a new one.
    """

    z_um: float
    source: str
    spread_um: float


@dataclasses.dataclass
class KeyState:
    """What the tracker remembers of one position."""

    x_um: float
    y_um: float
    planes: list[tuple[float, float]] = dataclasses.field(default_factory=list)  # (t_s, z_um), found only
    floor: float | None = None  # the score its last peak stood out of (PeakVerdict.floor)
    peak: float | None = None  # focus score at its last plane
    width_um: float | None = None  # Gaussian width (sigma) of its last fitted peak

    @property
    def last(self) -> tuple[float, float] | None:
        return self.planes[-1] if self.planes else None

    def rate_um_s(self) -> tuple[float, float] | None:
        """(time of the latest plane, focus rate between its last two planes)."""
        if len(self.planes) < 2:
            return None
        (t0, z0), (t1, z1) = self.planes[-2], self.planes[-1]
        if t1 <= t0:
            return None
        return t1, (z1 - z0) / (t1 - t0)


async def check_at_slopes(
    probe: FocusProbe, predicted_um: float, *, sigma_um: float, floor: float, peak: float
) -> FocusResult | None:
    """Check a predicted focal plane with frames where the focus curve is steepest.

    Model: near focus the score is a Gaussian over its floor,
    s(z) = f + A·exp(-(z-μ)²/(2σ²)), the focus-measure curve model of DiMeo, Sun & Du,
    "Fast and accurate autofocus control using Gaussian standard deviation and
    gradient-based binning", Optics Express 29(13):19862-19878 (2021), who place its
    centre from 3-4 defocused frames. Here f (``floor``), σ (``sigma_um``) and the height
    ``peak`` are the position's own from its last visit, so two frames suffice: they go
    at the prediction p ± σ, where |ds/dz| is largest, so a shift of the peak changes
    their ratio most. When both fall on one flank (one of them under
    :data:`SLOPE_MIN_EXCESS` of the peak's excess), the pair moves two widths towards
    the higher frame, one new frame each time, at most :data:`SLOPE_SHIFTS` times. With excesses e₁, e₂ over the floor at z₁ < z₂,
    μ = (z₁+z₂)/2 + σ²·ln(e₂/e₁)/(z₂-z₁) and A = e₁·exp((z₁-μ)²/(2σ²)). One confirming
    frame at μ; when the three frames' own Gaussian vertex (:func:`gaussian_peak`) lies
    more than :data:`SLOPE_RECHECK_DOF` depths of field from μ, one frame there too.

    The check holds only when the frames trace the peak seen last time: both slope frames
    keep :data:`SLOPE_MIN_EXCESS` of its excess, μ lies within
    :data:`SLOPE_REACH_SIGMA`·σ of p, A keeps :data:`PEAK_KEEP` of the last height (a
    side lobe reaches about a quarter), the confirming frame keeps
    :data:`SLOPE_CONFIRM_SHARE` of A, and the three frames bend down with a width within
    :data:`SLOPE_WIDTH_FACTOR` of σ. Otherwise None (the frames stay in ``probe`` for the
    bracket that follows). Confidence is reported as elsewhere, 1 - floor/peak, with the
    remembered floor. z and σ in um, scores in the metric's units.
    """
    plan = probe.plan
    full = peak - floor
    if not (full > 0 and sigma_um > 0):
        return None
    lower = await probe.at(predicted_um - sigma_um)
    upper = await probe.at(predicted_um + sigma_um)
    direction = 0
    for shift in range(SLOPE_SHIFTS + 1):
        e1, e2 = lower.score - floor, upper.score - floor
        if min(e1, e2) >= SLOPE_MIN_EXCESS * full:
            break
        # Both frames on one flank: the peak lies beyond the higher one. Move the pair
        # two widths that way (the higher frame stays, one new frame past it). A pair
        # that would turn back has the peak between its frames, narrower than the
        # model: the bracket that follows takes it from there.
        way = 1 if e2 > e1 else -1
        if shift == SLOPE_SHIFTS or max(e1, e2) < SLOPE_MIN_EXCESS * full or way == -direction:
            return None
        direction = way
        if way > 0:
            lower, upper = upper, await probe.at(upper.z_um + 2.0 * sigma_um)
        else:
            lower, upper = await probe.at(lower.z_um - 2.0 * sigma_um), lower
    span = upper.z_um - lower.z_um
    if span <= 0:
        return None  # the pair ran into a focus limit
    two_var = 2.0 * sigma_um * sigma_um
    centre = (lower.z_um + upper.z_um) / 2.0
    mu = centre + sigma_um * sigma_um * math.log(e2 / e1) / span
    if abs(mu - centre) > SLOPE_REACH_SIGMA * sigma_um:
        return None
    height = math.sqrt(e1 * math.exp((lower.z_um - mu) ** 2 / two_var) * e2 * math.exp((upper.z_um - mu) ** 2 / two_var))
    if height < PEAK_KEEP * full:
        return None
    confirm = await probe.at(mu)
    if confirm.score - floor < SLOPE_CONFIRM_SHARE * height:
        return None
    three = sorted((lower, confirm, upper), key=lambda s: s.z_um)
    fit = gaussian_peak([s.z_um for s in three], [s.score for s in three], floor)
    if fit is None or not sigma_um / SLOPE_WIDTH_FACTOR <= fit.sigma_um <= sigma_um * SLOPE_WIDTH_FACTOR:
        return None
    final: Sample = confirm
    if abs(fit.z_um - confirm.z_um) > SLOPE_RECHECK_DOF * plan.dof_um:
        again = await probe.at(fit.z_um)
        final = max(confirm, again, key=lambda s: s.score)
    if final is not confirm:
        await probe.scope.move_to(z_um=final.z_um)  # the focus ends where the result says
    confidence = max(0.0, 1.0 - floor / final.score) if final.score > 0 else 0.0
    return _found(probe, final.z_um, final.score, confidence, floor, fit.sigma_um,
                  "focus found by the slope check of the predicted plane")


class FocusTracker:
    """One per time-lapse (or vessel): remembers planes, drift and the focus surface."""

    def __init__(self, profile: Profile) -> None:
        self.profile = profile
        self.plan = FocusPlan.for_profile(profile)
        self.keys: dict[str, KeyState] = {}

    # -- prediction -----------------------------------------------------------------

    def drift_rate_um_s(self, t_s: float) -> float:
        """The common focus drift rate now: the median over positions of the rate between
        their last two planes, over positions revisited recently. 0 before any revisit."""
        samples = [r for k in self.keys.values() if (r := k.rate_um_s()) is not None]
        if not samples:
            return 0.0
        intervals = [k.planes[-1][0] - k.planes[-2][0] for k in self.keys.values() if len(k.planes) >= 2]
        horizon_s = TREND_HORIZON_INTERVALS * statistics.median(intervals)
        recent = [rate for t_latest, rate in samples if t_s - t_latest <= horizon_s]
        return statistics.median(recent) if recent else 0.0

    def surface(self, t_s: float) -> SurfaceFit | None:
        """The focus surface now: every position's last plane, carried forward by the trend."""
        rate = self.drift_rate_um_s(t_s)
        points = [
            SurfacePoint(k.x_um, k.y_um, k.last[1] + rate * (t_s - k.last[0]))
            for k in self.keys.values()
            if k.last is not None
        ]
        return fit_focus_surface(points, tolerance_um=self.plan.dof_um)

    def predict(self, key: str, x_um: float, y_um: float, t_s: float) -> Prediction | None:
        """Where ``key`` at (x, y) should be in focus at ``t_s``, or None with nothing to go by."""
        state = self.keys.get(key)
        rate = self.drift_rate_um_s(t_s)
        if state is not None and state.last is not None:
            t_last, z_last = state.last
            trend_um = rate * (t_s - t_last)
            return Prediction(z_last + trend_um, "last plane", abs(trend_um))
        fit = self.surface(t_s)
        if fit is None:
            return None
        beyond_mm = fit.beyond_support_mm(x_um, y_um)
        return Prediction(fit.z_um(x_um, y_um), "surface", UNSUPPORTED_SLOPE_UM_PER_MM * beyond_mm)

    def predict_z_um(self, key: str, x_um: float, y_um: float, t_s: float) -> float | None:
        """:meth:`predict`'s plane alone."""
        p = self.predict(key, x_um, y_um, t_s)
        return None if p is None else p.z_um

    # -- focusing -------------------------------------------------------------------

    async def focus(
        self,
        scope: Scope,
        key: str,
        x_um: float,
        y_um: float,
        *,
        on_point: Callable[[FocusPoint], None] | None = None,
        metric: str = DEFAULT_METRIC,
    ) -> FocusResult:
        """Focus ``key``; the stage is already at (x_um, y_um). Records the plane if found."""
        plan = self.plan
        d = plan.dof_um
        t_s = scope.clock.now()
        prediction = self.predict(key, x_um, y_um, t_s)
        probe = FocusProbe(scope, plan, metric=metric, on_point=on_point)
        if prediction is None:
            start = await scope.position()
            centre = default_centre_z_um(self.profile, plan, start.z_um)
            lo, hi = plan.clamp(centre - plan.cold_half_range_um), plan.clamp(centre + plan.cold_half_range_um)
            result = await cold_search(probe, lo, hi, fallback_z_um=start.z_um, fallback_name="starting plane")
            result.message += " (cold: nothing known yet)"
            return self.record(key, x_um, y_um, result)

        predicted = plan.clamp(prediction.z_um)
        state = self.keys.get(key)
        if prediction.source == "last plane" and state is not None and state.floor is not None and state.peak is not None:
            fallback_name = "predicted plane (last good plane moved by the drift trend)"
            sigma = state.width_um if state.width_um is not None else DEFAULT_WIDTH_DOF * d
            checked = await check_at_slopes(probe, predicted, sigma_um=sigma, floor=state.floor, peak=state.peak)
            if checked is not None:
                checked.message += " (tracked)"
                return self.record(key, x_um, y_um, checked)
            outcome = await refine(probe, predicted, reach_um=TRACK_REACH_DOF * d, floor=state.floor)
            if not outcome.edge and outcome.best.score >= PEAK_KEEP * state.peak:
                result = await conclude(probe, outcome, fallback_z_um=predicted, fallback_name=fallback_name)
                if result.found:
                    result.message += " (tracked)"
                    return self.record(key, x_um, y_um, result)
            # Wide enough to take in the last plane too: a drift trend may have stopped.
            half = max(WIDEN_HALF_RANGE_DOF * d, prediction.spread_um + NEW_KEY_HALF_RANGE_DOF * d)
            searches = [(half, "widened search after the tracking bracket found no peak")]
        else:
            fallback_name = "predicted plane (from the focus surface)"
            first = NEW_KEY_HALF_RANGE_DOF * d + prediction.spread_um
            where = "around the focus surface"
            if prediction.spread_um >= d:
                where += f", {prediction.spread_um / UNSUPPORTED_SLOPE_UM_PER_MM:.0f} mm past its points"
            searches = [(first, f"first visit, {where}"),
                        (max(2.0 * first, WIDEN_HALF_RANGE_DOF * d), "first visit, widened")]
        searches = [(h, label) for h, label in searches if h < plan.cold_half_range_um]
        searches.append((plan.cold_half_range_um, "cold search around the prediction"))
        for half_um, label in searches:
            result = await cold_search(
                probe, plan.clamp(predicted - half_um), plan.clamp(predicted + half_um),
                fallback_z_um=predicted, fallback_name=fallback_name,
            )
            if result.found:
                break
        result.message += f" ({label})"
        return self.record(key, x_um, y_um, result)

    def record(self, key: str, x_um: float, y_um: float, result: FocusResult) -> FocusResult:
        """Remember a result (only found planes feed the predictions)."""
        state = self.keys.setdefault(key, KeyState(x_um, y_um))
        state.x_um, state.y_um = x_um, y_um
        if result.found:
            t_s = result.curve[-1].t_s if result.curve else 0.0
            state.planes.append((t_s, result.z_um))
            del state.planes[:-HISTORY_PER_KEY]
            if math.isfinite(result.score):
                state.peak = result.score
            if math.isfinite(result.floor):
                state.floor = result.floor
            if math.isfinite(result.width_um) and result.width_um > 0:
                state.width_um = result.width_um
        return result

    # -- persistence ----------------------------------------------------------------

    def to_dict(self) -> dict[str, Any]:
        return {
            "version": STATE_VERSION,
            "keys": {
                key: {"x_um": s.x_um, "y_um": s.y_um, "planes": [list(p) for p in s.planes], "floor": s.floor, "peak": s.peak,
                        "width_um": s.width_um}
                for key, s in self.keys.items()
            },
        }

    @classmethod
    def from_dict(cls, profile: Profile, d: dict[str, Any]) -> FocusTracker:
        if d.get("version") != STATE_VERSION:
            raise ValueError(f"focus tracker state version {d.get('version')!r} is not {STATE_VERSION}")
        tracker = cls(profile)
        for key, s in d.get("keys", {}).items():
            tracker.keys[key] = KeyState(
                float(s["x_um"]), float(s["y_um"]),
                [(float(t), float(z)) for t, z in s.get("planes", [])],
                None if s.get("floor") is None else float(s["floor"]),
                None if s.get("peak") is None else float(s["peak"]),
                None if s.get("width_um") is None else float(s["width_um"]),
            )
        return tracker

