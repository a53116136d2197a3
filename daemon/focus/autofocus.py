"""Autofocus on the scope: coarse-to-fine search of the focus curve, sized from the optics.

Frames are scored after binning to the optics' resolution (a camera usually samples the
image finer than the objective resolves, and the extra pixels carry only noise, which a
Laplacian amplifies most). Two scores per frame, both the chosen metric:

* the *score* on the frame binned to about 0.7·λ/NA (recorded in the focus curve): a
  narrow, precise peak about one depth of field d wide;
* the *coarse score* on a frame binned three times further: a wider peak that a sweep in
  steps of 2.25·d cannot step over.

Phase-contrast focus curves are not simple bells: defocused cells show contrast of their
own, so the main peak is flanked by lower side lobes a few depths of field out, and far
from focus (hundreds of um) the score can sink well below its level near focus. So a
peak is judged *locally*, never against the lowest score of the whole curve: the
sharpest frame counts as the focus only when the score falls to at most half of it on
*both* sides, 1.25 to 3 depths of field out (:func:`judge_peak` takes a frame on a
side that has none). The in-focus peak of the score is about one depth of field wide and
stands several times over its surroundings; a side lobe, a noise wiggle, a window edge
or a monotonic or flat curve does not. A coarse peak whose refinement fails that test is
passed over: the sweep goes on upwards.

The search: an upward coarse sweep at 2.25·d steps, stopped once it has gone over a
clear peak; a Gaussian fit of the coarse peak; two frames half a depth of field either
side of it; the flank frames that show the score falling on both sides; a Gaussian fit
of the score over its local floor for the sub-step peak; and a last frame at the chosen
plane to confirm it. Every frame is taken on the way up where it can be, and the
driver makes any lower target an approach from below, so the drive's backlash is always
taken up the same way. A search that finds no real peak says so, and the focus goes back
to the last good plane.
"""

from __future__ import annotations

import asyncio
import dataclasses
import math
from collections.abc import Callable, Sequence
from typing import TYPE_CHECKING, Any

import cv2
import numpy as np

from daemon.errors import BadRequest
from daemon.focus.metrics import DEFAULT_METRIC, METRICS, Roi, get_metric
from drivers.options import option

if TYPE_CHECKING:
    from daemon.profile import Profile
    from daemon.scope import Scope

# Search geometry in depths of field d, tuned on the simulated scope's focus curves
# (4x, 10x and 20x): the score's peak falls to half its height over the side lobes about
# 0.5·d from focus, the coarse score's about 1·d out.
COARSE_STEP_DOF = 2.25
REFINE_OFFSET_DOF = 0.5
FIT_HALF_WIDTH_DOF = 1.2
COLD_HALF_RANGE_UM = 150.0  # the ±150 um a focus drive may be off after a restart
COLD_HALF_RANGE_DOF = 15.0  # low-power objectives: their curves are wider, so is the range
SCORE_BIN_LAMBDA_NA = 0.7  # score pixel = 0.7·λ/NA in the sample
COARSE_BIN_FACTOR = 3

PEAK_OVER_FLOOR = 2.5  # a coarse peak must stand this far above the lowest coarse score
PASSED_PEAK_FALL = 2.0  # the sweep has passed the peak once a score falls this far below it
# Confidence = 1 - flank/peak, flank = the higher of the lowest scores 1.25-3 d either
# side of the peak's centre: found only when the score falls to half the peak on both
# sides. Measured on the simulated scope (4x, 10x, 20x; sparse and dense fields): the
# in-focus peak falls to 0.2-0.35 of its height 1 d from focus (1.25 d from a centre
# found to d/4), while side lobes and far-defocus wiggles fall by 10-40 % at most.
MIN_CONFIDENCE = 0.5
FLANK_NEAR_DOF = 1.25
FLANK_FAR_DOF = 3.0
FLANK_PROBE_DOF = 1.5  # where judge_peak takes a frame on a side that has none
# Brightest mean frame level (fraction of full scale) that still counts as "lamp off": the
# black level of budget cameras sits at a few per cent of full scale (common practice).
DARK_LEVEL = 0.05
VERIFY_FRACTION = 0.6  # the confirming frame keeps this share of the peak's height over the floor
MAX_REFINE_FRAMES = 8
MIN_ROI_PX = 3  # the smallest region a 3x3 Laplacian can score


@dataclasses.dataclass(frozen=True, kw_only=True)
class AutofocusRequest:
    """One cold autofocus as a person asks for it (command line, web API).

    The limits that depend on the scope (the focus travel, the frame size) are checked by
    :func:`check_search`, which :func:`autofocus` itself calls.
    """

    metric: str = option(DEFAULT_METRIC, doc="focus metric", choices=tuple(METRICS))
    centre_z_um: float | None = option(
        None, unit="um",
        doc="centre of the search, within [focus] z_min_um to z_safe_max_um (default: the present focus, "
            "or [focus] nominal_z_um when the focus is far from it, as after homing)",
    )
    range_um: float | None = option(
        None, unit="um",
        doc="width of the search, more than 0 and at most the focus travel from [focus] z_min_um to "
            "z_safe_max_um (default: 2 x max(150 um, 15 depths of field))",
    )
    roi_px: tuple[int, ...] | None = option(
        None, min=0,
        doc="score only this region of the frame: x, y, width, height in pixels, inside the frame and "
            f"at least {MIN_ROI_PX} x {MIN_ROI_PX} (default: the whole frame)",
    )

    def check(self, profile: Profile) -> None:
        """:func:`check_search` of this request: refused before the scope is opened or claimed."""
        check_search(profile, metric=self.metric, centre_z_um=self.centre_z_um, range_um=self.range_um, roi=self.roi_px)


@dataclasses.dataclass(slots=True)
class FocusPoint:
    """One frame of a focus curve: focus position (um), focus score, scope-clock time (s)."""

    z_um: float
    score: float
    t_s: float

    def to_dict(self) -> dict[str, float | None]:
        return {"z_um": round(self.z_um, 3), "score": _finite(self.score), "t_s": round(self.t_s, 3)}


@dataclasses.dataclass
class FocusResult:
    """What one autofocus run found. ``curve`` holds every frame in the order taken.

    ``score`` is the focus score of the confirming frame at ``z_um`` (NaN when no frame
    was taken there); after a successful run ``scope.last_frame`` is that frame, so a
    caller that wants an image at the focused plane can use it. ``floor`` is the score
    the peak stands out of (the higher of the lowest scores 1.25-3 depths of field
    either side of it), ``confidence`` = 1 - floor/peak, and ``width_um`` the fitted Gaussian
    width of the peak.
    """

    found: bool
    z_um: float
    score: float
    frames: int
    elapsed_s: float
    confidence: float
    curve: list[FocusPoint]
    message: str
    true_z_um: float | None = None
    metric: str = DEFAULT_METRIC
    floor: float = float("nan")
    width_um: float = float("nan")

    def to_dict(self) -> dict[str, Any]:
        return {
            "found": self.found,
            "z_um": round(self.z_um, 3),
            "score": _finite(self.score),
            "frames": self.frames,
            "elapsed_s": round(self.elapsed_s, 3),
            "confidence": round(self.confidence, 4),
            "message": self.message,
            "true_z_um": None if self.true_z_um is None else round(self.true_z_um, 3),
            "error_um": None if self.true_z_um is None else round(self.z_um - self.true_z_um, 3),
            "metric": self.metric,
            "floor": _finite(self.floor),
            "width_um": _finite(self.width_um),
            "curve": [p.to_dict() for p in self.curve],
        }


def _finite(value: float) -> float | None:
    return float(value) if math.isfinite(value) else None


@dataclasses.dataclass(frozen=True)
class FocusPlan:
    """Search geometry for one objective, all scaled from its depth of field d (um)."""

    dof_um: float
    coarse_step_um: float
    refine_offset_um: float
    fit_half_width_um: float
    cold_half_range_um: float
    z_min_um: float
    z_max_um: float
    score_bin: int
    coarse_bin: int

    @classmethod
    def for_profile(cls, profile: Profile) -> FocusPlan:
        o = profile.optics
        d = o.depth_of_field_um
        resolution_um = (o.wavelength_nm / 1000.0) / o.numerical_aperture
        score_bin = max(1, round(SCORE_BIN_LAMBDA_NA * resolution_um / o.pixel_size_um))
        return cls(
            dof_um=d,
            coarse_step_um=COARSE_STEP_DOF * d,
            refine_offset_um=REFINE_OFFSET_DOF * d,
            fit_half_width_um=FIT_HALF_WIDTH_DOF * d,
            cold_half_range_um=max(COLD_HALF_RANGE_UM, COLD_HALF_RANGE_DOF * d),
            z_min_um=profile.focus.z_min_um,
            z_max_um=profile.focus.z_safe_max_um,
            score_bin=score_bin,
            coarse_bin=score_bin * COARSE_BIN_FACTOR,
        )

    def clamp(self, z_um: float) -> float:
        return min(max(z_um, self.z_min_um), self.z_max_um)


@dataclasses.dataclass(frozen=True, slots=True)
class Sample:
    z_um: float
    score: float
    coarse: float
    level: float  # mean grey level, fraction of full scale
    t_s: float


def bin_frame(region: np.ndarray, factor: int) -> np.ndarray:
    """factor x factor pixel binning by area averaging, in float so sub-DN contrast survives."""
    img = region.astype(np.float32)
    if factor <= 1:
        return img
    h, w = img.shape
    return cv2.resize(img, (max(3, w // factor), max(3, h // factor)), interpolation=cv2.INTER_AREA)


def score_frame(
    pixels: np.ndarray, metric: Callable[..., float], roi: Roi | None, plan: FocusPlan, full_scale: float
) -> tuple[float, float, float]:
    """(score, coarse score, mean level) of one frame. Runs in a worker thread."""
    region = pixels if roi is None else pixels[roi[1] : roi[1] + roi[3], roi[0] : roi[0] + roi[2]]
    fine = bin_frame(region, plan.score_bin)
    coarse = bin_frame(fine, COARSE_BIN_FACTOR)
    return metric(fine), metric(coarse), float(np.mean(region)) / full_scale


class FocusProbe:
    """Takes frames at focus positions, scores them off the event loop, keeps the curve."""

    def __init__(
        self,
        scope: Scope,
        plan: FocusPlan,
        *,
        metric: str = DEFAULT_METRIC,
        roi: Roi | None = None,
        on_point: Callable[[FocusPoint], None] | None = None,
    ) -> None:
        self.scope = scope
        self.plan = plan
        self.metric_name = metric
        self.metric = get_metric(metric)
        self.roi = roi
        self.on_point = on_point
        self.samples: list[Sample] = []
        self.curve: list[FocusPoint] = []
        self.t0_s = scope.clock.now()

    async def at(self, z_um: float) -> Sample:
        z = self.plan.clamp(z_um)  # plans stay inside the limits; this makes sure of it
        pos = await self.scope.move_to(z_um=z)
        frame = await self.scope.capture()
        full_scale = float(2**frame.bit_depth - 1)
        score, coarse, level = await asyncio.to_thread(
            score_frame, frame.pixels, self.metric, self.roi, self.plan, full_scale
        )
        sample = Sample(pos.z_um, score, coarse, level, frame.t_s)
        self.samples.append(sample)
        point = FocusPoint(pos.z_um, score, frame.t_s)
        self.curve.append(point)
        if self.on_point is not None:
            self.on_point(point)
        return sample

    def near(self, z_um: float, tol_um: float) -> Sample | None:
        """A frame already taken within ``tol_um`` of ``z_um`` (saves a frame)."""
        best = min(self.samples, key=lambda s: abs(s.z_um - z_um), default=None)
        return best if best is not None and abs(best.z_um - z_um) <= tol_um else None

    @property
    def frames(self) -> int:
        return len(self.samples)

    def elapsed_s(self) -> float:
        return self.scope.clock.now() - self.t0_s


@dataclasses.dataclass(frozen=True, slots=True)
class PeakFit:
    z_um: float
    height: float  # fitted score at the peak, floor included
    sigma_um: float  # Gaussian width of the fitted peak


def gaussian_peak(z_um: Sequence[float], scores: Sequence[float], floor: float) -> PeakFit | None:
    """Sub-step peak of a focus curve from a Gaussian model: s(z) = f + A·exp(-(z-μ)²/(2σ²)).

    With the floor f known, ln(s - f) is a parabola in z, fitted by weighted least squares
    (weights s - f: the logarithm of a small excess is mostly noise). For three points this
    is the usual three-point Gaussian interpolation of a sampled peak (common practice for
    focus curves, whose tops are close to Gaussian). Returns None when
    the points do not bend down or the vertex lies outside them (no peak among them).
    z and σ in um.
    """
    z = np.asarray(z_um, float)
    s = np.asarray(scores, float) - floor
    if len(z) < 3 or len(np.unique(np.round(z, 3))) < 3 or np.any(s <= 0):
        return None
    zref = float(z.mean())
    c2, c1, c0 = np.polyfit(z - zref, np.log(s), 2, w=s / s.max())
    if not c2 < 0:
        return None
    mu = -c1 / (2 * c2)
    if not (z.min() - zref <= mu <= z.max() - zref):
        return None
    height = floor + math.exp(c0 - c1 * c1 / (4 * c2))
    return PeakFit(zref + mu, height, math.sqrt(-1 / (2 * c2)))


def passed_peak(coarse: Sequence[float], scores: Sequence[float] | None = None, first: int = 0) -> bool:
    """True once a sweep has clearly gone over a peak: the highest coarse score so far
    (among frames from index ``first`` on: earlier ones were judged already, and the
    peak must rise above the last of them) stands :data:`PEAK_OVER_FLOOR` times above
    the lowest, and the newest frame has fallen :data:`PASSED_PEAK_FALL` times below the
    peak frame in the coarse score or, when the peak frame is also the best by the
    (narrower) score, in the score."""
    if len(coarse) - first < 1 or len(coarse) < 2:
        return False
    k = first + int(np.argmax(coarse[first:]))
    if k == len(coarse) - 1 or coarse[k] < PEAK_OVER_FLOOR * min(coarse):
        return False
    if first > 0 and coarse[k] <= coarse[first - 1]:
        return False  # still the falling side of the peak judged before
    if coarse[-1] <= coarse[k] / PASSED_PEAK_FALL:
        return True
    if scores is None or first + int(np.argmax(scores[first:])) != k:
        return False
    return scores[-1] <= scores[k] / PASSED_PEAK_FALL


def sweep_planes(plan: FocusPlan, lo_um: float, hi_um: float) -> list[float]:
    """Evenly spaced planes from lo to hi, no more than one coarse step apart."""
    n = max(1, math.ceil((hi_um - lo_um) / plan.coarse_step_um - 1e-9))
    return [float(z) for z in np.linspace(lo_um, hi_um, n + 1)]


async def coarse_sweep(
    probe: FocusProbe, planes: Sequence[float], prior: Sequence[Sample] = ()
) -> tuple[float | None, list[Sample]]:
    """Frames at ``planes`` in order (upwards) until the coarse score has gone over a peak.

    Returns the coarse peak's z (Gaussian fit of the best frame and its neighbours), or
    None when no peak stood out, and the sweep frames taken (``len`` of it: how many of
    ``planes`` were used). ``prior`` frames (from an earlier part of the sweep, whose
    peak was judged already) count for the floor and as the lower neighbour of a peak,
    but cannot be the peak.
    """
    taken: list[Sample] = list(prior)
    first = len(taken)
    for z in planes:
        taken.append(await probe.at(z))
        if passed_peak([s.coarse for s in taken], [s.score for s in taken], first):
            break
    new = taken[first:]
    if not new:
        return None, new
    coarse = [s.coarse for s in taken]
    k = first + int(np.argmax(coarse[first:]))
    if coarse[k] < PEAK_OVER_FLOOR * min(coarse) or (first > 0 and coarse[k] <= coarse[first - 1]):
        return None, new
    fit = None
    if 0 < k < len(taken) - 1:
        fit = gaussian_peak([s.z_um for s in taken[k - 1 : k + 2]], coarse[k - 1 : k + 2], 0.98 * min(coarse))
    return (fit.z_um if fit is not None else taken[k].z_um), new


@dataclasses.dataclass
class RefineOutcome:
    fit: PeakFit | None
    best: Sample
    edge: str  # "" when a peak was bracketed; "upper"/"lower" when the best frame is at that end


async def refine(
    probe: FocusProbe,
    centre_um: float,
    *,
    reach_um: float,
    floor: float | None = None,
) -> RefineOutcome:
    """Bracket the score's peak near ``centre_um`` and fit it (:func:`gaussian_peak`).

    Frames half a depth of field either side of the centre (reusing any frame already
    that close); while the best frame has no neighbour within the fit width on one
    side, one more frame on that side, up to ``reach_um`` from the centre. When the score
    shows no peak yet (best under twice the floor), the coarse score's slope says
    which way to go, in bigger steps.
    """
    plan = probe.plan
    a = plan.refine_offset_um
    lo_lim, hi_lim = plan.clamp(centre_um - reach_um), plan.clamp(centre_um + reach_um)
    for z in (centre_um - a, centre_um + a):
        z = min(max(z, lo_lim), hi_lim)
        if probe.near(z, 0.4 * a) is None:
            await probe.at(z)
    for _ in range(MAX_REFINE_FRAMES + 1):
        window = [s for s in probe.samples if lo_lim - 1e-6 <= s.z_um <= hi_lim + 1e-6]
        base = floor if floor is not None else min(s.score for s in probe.samples)
        best = max(window, key=lambda s: s.score)
        fit_set = [s for s in window if abs(s.z_um - best.z_um) <= plan.fit_half_width_um]
        has_below = any(s.z_um < best.z_um - 0.2 * a for s in fit_set)
        has_above = any(s.z_um > best.z_um + 0.2 * a for s in fit_set)
        if has_below and has_above:
            break
        target = _next_refine_z(window, best, has_above, base, a)
        if target > hi_lim + 1e-6:
            if max(s.z_um for s in window) >= hi_lim - 1e-6:
                return RefineOutcome(None, best, "upper")
            target = hi_lim
        if target < lo_lim - 1e-6:
            if min(s.z_um for s in window) <= lo_lim + 1e-6:
                return RefineOutcome(None, best, "lower")
            target = lo_lim
        if probe.near(target, 0.2 * a) is not None:
            return RefineOutcome(None, best, "unbracketed")
        await probe.at(target)
    else:
        return RefineOutcome(None, best, "unbracketed")
    return RefineOutcome(fit_peak(probe.samples, best, plan), best, "")


def fit_peak(samples: Sequence[Sample], best: Sample, plan: FocusPlan) -> PeakFit | None:
    """:func:`gaussian_peak` of the frames within the fit width of the sharpest one, over
    the local floor (the lowest score within :data:`FLANK_FAR_DOF` of it): the background
    the peak stands on, not the far-defocus minimum of the whole curve."""
    near = [s for s in samples if abs(s.z_um - best.z_um) <= FLANK_FAR_DOF * plan.dof_um]
    fit_set = sorted((s for s in near if abs(s.z_um - best.z_um) <= plan.fit_half_width_um), key=lambda s: s.z_um)
    floor = min(s.score for s in near)
    return gaussian_peak([s.z_um for s in fit_set], [s.score for s in fit_set], 0.98 * floor)


@dataclasses.dataclass(frozen=True, slots=True)
class PeakVerdict:
    """How far the sharpest frame stands out of its own neighbourhood.

    ``lower``/``upper``: the lowest score 1.25-3 depths of field below/above the peak's
    centre (None: no frame there, as at a focus limit). ``confidence`` is
    1 - max(lower, upper)/peak, and 0 when a side is missing, so a peak that cannot be
    seen to fall on both sides (a monotonic curve, a window edge, a limit) is never
    taken for the focus.
    """

    peak: float
    lower: float | None
    upper: float | None

    @property
    def floor(self) -> float:
        sides = [v for v in (self.lower, self.upper) if v is not None]
        return max(sides) if sides else float("nan")

    @property
    def confidence(self) -> float:
        if self.lower is None or self.upper is None or not self.peak > 0:
            return 0.0
        return max(0.0, 1.0 - self.floor / self.peak)


def peak_centre_um(samples: Sequence[Sample], best: Sample, plan: FocusPlan) -> float:
    """Where the peak lies: its :func:`fit_peak` vertex, else the sharpest frame (which
    may sit up to half a bracket step off the top)."""
    fit = fit_peak(samples, best, plan)
    return fit.z_um if fit is not None else best.z_um


def flanks(samples: Sequence[Sample], best: Sample, plan: FocusPlan, centre_um: float | None = None) -> PeakVerdict:
    """The :class:`PeakVerdict` of ``best`` (a peak centred at ``centre_um``, default
    :func:`peak_centre_um`) from the frames already taken."""
    c = peak_centre_um(samples, best, plan) if centre_um is None else centre_um
    # The frames' z is what the drive reports, a hair off the planned plane.
    near, far = (FLANK_NEAR_DOF - 0.02) * plan.dof_um, FLANK_FAR_DOF * plan.dof_um
    below = [s.score for s in samples if near <= c - s.z_um <= far]
    above = [s.score for s in samples if near <= s.z_um - c <= far]
    return PeakVerdict(best.score, min(below) if below else None, min(above) if above else None)


async def judge_peak(probe: FocusProbe, best: Sample) -> PeakVerdict:
    """Check that ``best`` is a real peak: a frame :data:`FLANK_PROBE_DOF` out from the
    peak's centre on each side that has none 1.25-3 d out (inside the focus limits: a side
    with no room stays unknown), then :func:`flanks`. May reach past the searched range,
    never past the limits."""
    plan = probe.plan
    centre = peak_centre_um(probe.samples, best, plan)
    verdict = flanks(probe.samples, best, plan, centre)
    for missing, sign in ((verdict.lower is None, -1.0), (verdict.upper is None, 1.0)):
        if not missing:
            continue
        z = plan.clamp(centre + sign * FLANK_PROBE_DOF * plan.dof_um)
        if abs(z - centre) >= FLANK_NEAR_DOF * plan.dof_um:
            await probe.at(z)
    return flanks(probe.samples, best, plan, centre)


def _next_refine_z(window: list[Sample], best: Sample, has_above: bool, floor: float, a: float) -> float:
    """Where the next refinement frame goes."""
    if best.score >= 2.0 * floor:
        return best.z_um + a if not has_above else best.z_um - a
    # The score is still at its floor here: follow the wider coarse score, in bigger steps.
    ordered = sorted(window, key=lambda s: s.z_um)
    i = max(range(len(ordered)), key=lambda j: ordered[j].coarse)
    if i == len(ordered) - 1:
        return ordered[i].z_um + 2.0 * a
    if i == 0:
        return ordered[0].z_um - 2.0 * a
    lower, upper = ordered[i - 1], ordered[i + 1]
    side = upper if upper.coarse >= lower.coarse else lower
    return (ordered[i].z_um + side.z_um) / 2.0


async def conclude(
    probe: FocusProbe,
    outcome: RefineOutcome | None,
    *,
    fallback_z_um: float,
    fallback_name: str,
    confirm: bool = True,
) -> FocusResult:
    """Decide found / not found; go to the plane (taking the confirming frame) or back.

    Found needs a bracketed peak (no edge) that :func:`judge_peak` shows standing out of
    its own neighbourhood on both sides (confidence >= :data:`MIN_CONFIDENCE`), and a
    confirming frame at the chosen plane that keeps most of the peak's height.
    """
    samples = probe.samples
    verdict: PeakVerdict | None = None
    if outcome is not None and not outcome.edge:
        verdict = await judge_peak(probe, outcome.best)
    elif samples:
        verdict = flanks(samples, outcome.best if outcome is not None else max(samples, key=lambda s: s.score), probe.plan)
    confidence = verdict.confidence if verdict is not None else 0.0
    base = verdict.floor if verdict is not None else float("nan")
    reason = ""
    if not samples:
        reason = "no frames were taken"
    elif (level := max(s.level for s in samples)) < DARK_LEVEL:
        reason = f"frames are dark (mean level {100 * level:.1f} % of full scale): lamp off or exposure too short"
    elif outcome is None:
        reason = f"the focus curve has no real peak (confidence {confidence:.2f}): empty field, bubble or debris?"
    elif outcome.edge == "upper":
        reason = ("the sharpest frame is at the safe focus limit: the focal plane may lie above it"
                  if outcome.best.z_um >= probe.plan.z_max_um - 1e-6 else
                  "the sharpest frame is at the top of the searched range")
    elif outcome.edge == "unbracketed":
        reason = "the focus peak could not be bracketed"
    elif outcome.edge == "lower":
        reason = ("the sharpest frame is at the lowest focus position: the focal plane may lie below it"
                  if outcome.best.z_um <= probe.plan.z_min_um + 1e-6 else
                  "the sharpest frame is at the bottom of the searched range")
    elif verdict is not None and (verdict.lower is None or verdict.upper is None):
        reason = "the sharpest frame is too close to a focus limit to see the score fall on both sides"
    elif confidence < MIN_CONFIDENCE:
        reason = (f"the sharpest frame does not stand out of its neighbours on both sides (confidence "
                  f"{confidence:.2f} < {MIN_CONFIDENCE}): a side lobe, or an empty field, bubble or debris?")
    if reason:
        return await _give_up(probe, reason, fallback_z_um, fallback_name, confidence, base)

    assert outcome is not None
    fit = fit_peak(probe.samples, outcome.best, probe.plan)
    z_target = fit.z_um if fit is not None else outcome.best.z_um
    width = fit.sigma_um if fit is not None else float("nan")
    if not confirm:
        pos = await probe.scope.move_to(z_um=probe.plan.clamp(z_target))
        height = fit.height if fit is not None else outcome.best.score
        return _found(probe, pos.z_um, height, confidence, base, width, "focus found (not confirmed by a frame)")
    final = await probe.at(z_target)
    message = "focus found"
    if final.score - base < VERIFY_FRACTION * (outcome.best.score - base):
        # The fitted plane did not hold up (focus still moving, or the fit was pulled):
        # go to the sharpest frame actually seen and check that one.
        final = await probe.at(outcome.best.z_um)
        if final.score - base < VERIFY_FRACTION * (outcome.best.score - base):
            return await _give_up(
                probe, "the focus peak did not repeat when revisited (focus moving?)",
                fallback_z_um, fallback_name, confidence, base,
            )
        message = "focus found at the sharpest frame seen (the fitted plane did not confirm)"
    return _found(probe, final.z_um, final.score, confidence, base, width, message)


def _found(
    probe: FocusProbe, z_um: float, score: float, confidence: float, floor: float, width_um: float, message: str
) -> FocusResult:
    return FocusResult(
        found=True, z_um=z_um, score=score, frames=probe.frames, elapsed_s=probe.elapsed_s(),
        confidence=confidence, curve=list(probe.curve), message=f"{message}, confidence {confidence:.2f}",
        true_z_um=probe.scope.true_focus_z_um(), metric=probe.metric_name, floor=floor, width_um=width_um,
    )


async def _give_up(
    probe: FocusProbe, reason: str, fallback_z_um: float, fallback_name: str, confidence: float, floor: float
) -> FocusResult:
    pos = await probe.scope.move_to(z_um=probe.plan.clamp(fallback_z_um))
    return FocusResult(
        found=False, z_um=pos.z_um, score=float("nan"), frames=probe.frames, elapsed_s=probe.elapsed_s(),
        confidence=confidence, curve=list(probe.curve),
        message=f"no focus found: {reason}; kept the {fallback_name}, z = {pos.z_um:.1f} um",
        true_z_um=probe.scope.true_focus_z_um(), metric=probe.metric_name, floor=floor,
    )


def check_search(
    profile: Profile,
    *,
    metric: str,
    centre_z_um: float | None,
    range_um: float | None,
    roi: Sequence[int] | None,
) -> None:
    """Refuse a search this scope cannot make, before anything moves (:class:`BadRequest`
    naming the field): an unknown metric, a range that is not positive or wider than the
    focus travel, a centre outside the focus limits, a region not inside the frame."""
    if metric not in METRICS:
        raise BadRequest(f"unknown focus metric {metric!r}; choose one of: {', '.join(METRICS)}", field="metric")
    f = profile.focus
    travel_um = f.z_safe_max_um - f.z_min_um
    limits = f"[focus] z_min_um {f.z_min_um:g} to z_safe_max_um {f.z_safe_max_um:g} um"
    if range_um is not None:
        if not (math.isfinite(range_um) and range_um > 0):
            raise BadRequest(f"must be more than 0 um, got {range_um:g}", field="range_um")
        if range_um > travel_um:
            raise BadRequest(
                f"{range_um:g} um is wider than the focus travel of {travel_um:g} um ({limits})", field="range_um"
            )
    if centre_z_um is not None and not (math.isfinite(centre_z_um) and f.z_min_um <= centre_z_um <= f.z_safe_max_um):
        raise BadRequest(f"{centre_z_um:g} um lies outside the focus limits ({limits})", field="centre_z_um")
    if roi is not None:
        cam = profile.camera
        if len(roi) != 4:
            raise BadRequest(f"give 4 whole numbers (x, y, width, height in px), got {len(roi)}", field="roi_px")
        x, y, w, h = roi
        if w < MIN_ROI_PX or h < MIN_ROI_PX or x < 0 or y < 0 or x + w > cam.width_px or y + h > cam.height_px:
            raise BadRequest(
                f"region {x} {y} {w} {h} must lie inside the {cam.width_px}x{cam.height_px} px frame, "
                f"at least {MIN_ROI_PX}x{MIN_ROI_PX} px", field="roi_px",
            )


def default_centre_z_um(profile: Profile, plan: FocusPlan, present_z_um: float) -> float:
    """Where a cold search centres when told nothing: the present focus, unless it lies
    farther than the full width of the search from the profile's nominal focus plane (a homed or
    parked drive says nothing about where focus is)."""
    nominal = profile.focus.nominal_z_um
    if nominal is not None and abs(present_z_um - nominal) > 2.0 * plan.cold_half_range_um:
        return plan.clamp(nominal)
    return present_z_um


async def cold_search(
    probe: FocusProbe,
    lo_um: float,
    hi_um: float,
    *,
    fallback_z_um: float,
    fallback_name: str,
    confirm: bool = True,
) -> FocusResult:
    """Coarse sweep over [lo, hi], refinement, decision (shared by autofocus and tracking).

    A coarse peak whose refinement shows no real peak of the score (:func:`judge_peak`:
    a side lobe of the focus curve, since defocused cells have contrast too, or a wiggle
    far from focus) is passed over, and the sweep goes on upwards from where it stopped.
    """
    plan = probe.plan
    planes = sweep_planes(plan, lo_um, hi_um)
    used = 0
    outcome: RefineOutcome | None = None
    last_sweep: list[Sample] = []
    while used < len(planes):
        coarse_z, swept = await coarse_sweep(probe, planes[used:], last_sweep[-1:])
        used += len(swept)
        last_sweep = swept or last_sweep
        if coarse_z is None:
            break
        outcome = await refine(probe, coarse_z, reach_um=plan.coarse_step_um)
        if outcome.edge and lo_um + 1e-6 < outcome.best.z_um < hi_um - 1e-6:
            # Inside the range, so not an edge of the search: follow the peak further.
            outcome = await refine(probe, outcome.best.z_um, reach_um=plan.coarse_step_um)
        if not outcome.edge and (await judge_peak(probe, outcome.best)).confidence >= MIN_CONFIDENCE:
            break
    return await conclude(probe, outcome, fallback_z_um=fallback_z_um, fallback_name=fallback_name, confirm=confirm)


async def autofocus(
    scope: Scope,
    *,
    metric: str = DEFAULT_METRIC,
    centre_z_um: float | None = None,
    range_um: float | None = None,
    roi: Roi | None = None,
    on_point: Callable[[FocusPoint], None] | None = None,
    fallback_z_um: float | None = None,
    confirm: bool = True,
) -> FocusResult:
    """Cold autofocus: nothing known beyond "focus lies within ``centre_z_um`` ± ``range_um``/2".

    ``centre_z_um`` defaults to the present focus position (or to the profile's
    ``[focus] nominal_z_um`` when the focus sits farther than the search's full width from it,
    as after homing), ``range_um`` to 2·max(150 um, 15·d), both clipped to the
    profile's focus limits (never above ``z_safe_max_um``). When no focus is found the
    focus returns to ``fallback_z_um`` (the last good plane) if given, else to where it
    started, and the result says so.
    ``confirm=False`` skips the confirming frame at the chosen plane. The caller holds
    the scope (``scope.claim``) for the duration. A search the scope cannot make is
    refused by :func:`check_search` before anything moves.
    """
    check_search(scope.profile, metric=metric, centre_z_um=centre_z_um, range_um=range_um, roi=roi)
    plan = FocusPlan.for_profile(scope.profile)
    start = await scope.position()
    centre = default_centre_z_um(scope.profile, plan, start.z_um) if centre_z_um is None else centre_z_um
    half = plan.cold_half_range_um if range_um is None else range_um / 2.0
    lo, hi = plan.clamp(centre - half), plan.clamp(centre + half)
    probe = FocusProbe(scope, plan, metric=metric, roi=roi, on_point=on_point)
    if fallback_z_um is not None:
        fallback, name = fallback_z_um, "last good plane"
    else:
        fallback, name = start.z_um, "starting plane"
    return await cold_search(probe, lo, hi, fallback_z_um=fallback, fallback_name=name, confirm=confirm)


async def autofocus_as_asked(
    scope: Scope, request: AutofocusRequest, *, on_point: Callable[[FocusPoint], None] | None = None
) -> FocusResult:
    """:func:`autofocus` with a person's request (command line, web API); the caller holds the scope."""
    roi = tuple(request.roi_px) if request.roi_px is not None else None
    return await autofocus(
        scope, metric=request.metric, centre_z_um=request.centre_z_um, range_um=request.range_um,
        roi=roi,  # type: ignore[arg-type]
        on_point=on_point,
    )
