"""Settling: how long after an x/y move the image stops shifting.

The stage moves by a step and frames are taken back to back from the moment the move
ends (:meth:`Session.burst`). Each is registered against the last, which is taken once
the stage is still, and the settling time is the last moment the image lies farther
than :data:`TOLERANCE_PX` from where it comes to rest: after it the image stays inside
that band (the usual definition of the settling time of a step response, e.g. Ogata,
*Modern Control Engineering*; from memory). A quarter of a pixel is where motion during
an exposure starts to soften the image (common practice).

Two estimates of that moment:

* from the frames alone: half-way between the last frame outside the band and the next
  one (good to half a frame interval, :func:`settle_from_samples`);
* from a fit of the ringing of an underdamped second-order system to the displacement
  along the move, d(t) = exp(-t / tau) (a sin 2 pi f t + b cos 2 pi f t)
  (:func:`fit_ringing`), whose last crossing of the band is found on a fine grid. It
  needs no frame to fall on the last swing out of the band, so it is the estimate used
  when the fit explains the motion well (:data:`MIN_FIT_R2`).
"""

from __future__ import annotations

import asyncio
import dataclasses
import math

import numpy as np
from scipy import optimize, signal

from daemon.commission.registration import Reference
from daemon.commission.session import Session, Timed

TOLERANCE_PX = 0.25
MIN_FIT_R2 = 0.9
STILL_FRACTION = 0.3  # the last 30 % of a burst must lie inside the band: the stage was still
FIRST_WINDOW_S = 1.0
LONGEST_WINDOW_S = 6.0


@dataclasses.dataclass(frozen=True)
class RingingFit:
    """d(t) = exp(-t / decay_s) * (a sin(2 pi f t) + b cos(2 pi f t)), px; ``r2`` its share
    of the displacement's variance explained."""

    a_px: float
    b_px: float
    frequency_hz: float
    decay_s: float
    r2: float

    @property
    def amplitude_px(self) -> float:
        return math.hypot(self.a_px, self.b_px)

    def __call__(self, t_s: np.ndarray) -> np.ndarray:
        w = 2.0 * np.pi * self.frequency_hz * t_s
        return np.exp(-t_s / self.decay_s) * (self.a_px * np.sin(w) + self.b_px * np.cos(w))

    def settle_s(self, tolerance_px: float) -> float:
        """The last time the fitted motion reaches the tolerance (0 if it never does)."""
        if self.amplitude_px <= tolerance_px:
            return 0.0
        end = self.decay_s * math.log(self.amplitude_px / tolerance_px)  # the envelope's crossing
        t = np.linspace(0.0, end, max(2, int(end * self.frequency_hz * 4000) + 2))
        above = np.flatnonzero(np.abs(self(t)) >= tolerance_px)
        return float(t[above[-1]]) if above.size else 0.0


def _damped(t: np.ndarray, a: float, b: float, f: float, tau: float) -> np.ndarray:
    w = 2.0 * np.pi * f * t
    return np.exp(-t / tau) * (a * np.sin(w) + b * np.cos(w))


def fit_ringing(t_s: np.ndarray, d_px: np.ndarray) -> RingingFit | None:
    """Least-squares fit of a damped oscillation (see the module docstring) to displacements
    d (px) at times t (s after the move ended); None when it cannot be fitted.

    Start values: the frequency from the Lomb-Scargle periodogram (for unevenly spaced
    samples; Lomb 1976, Scargle 1982, as SciPy implements it), then for each of a range of
    decay times the amplitudes by linear least squares; the best start is refined by
    Levenberg-Marquardt (``scipy.optimize.curve_fit``)."""
    t = np.asarray(t_s, float)
    d = np.asarray(d_px, float)
    if len(t) < 8 or float(np.ptp(d)) == 0.0:
        return None
    span = float(t.max() - t.min())
    spacing = float(np.median(np.diff(np.sort(t))))
    if span <= 0 or spacing <= 0:
        return None
    freqs = np.linspace(0.5 / span, 0.5 / spacing, 400)
    power = signal.lombscargle(t, d - d.mean(), 2.0 * np.pi * freqs)
    f0 = float(freqs[int(np.argmax(power))])
    best: tuple[float, tuple[float, float, float, float]] | None = None
    for f in (0.8 * f0, f0, 1.25 * f0):
        w = 2.0 * np.pi * f * t
        for tau in np.geomspace(max(spacing, 1e-3), max(span, 2 * spacing), 30):
            basis = np.exp(-t / tau)[:, None] * np.column_stack([np.sin(w), np.cos(w)])
            coef, *_ = np.linalg.lstsq(basis, d, rcond=None)
            cost = float(np.sum((basis @ coef - d) ** 2))
            if best is None or cost < best[0]:
                best = (cost, (float(coef[0]), float(coef[1]), f, float(tau)))
    assert best is not None
    try:
        params, _ = optimize.curve_fit(_damped, t, d, p0=best[1], maxfev=5000)
    except (RuntimeError, ValueError):
        params = np.asarray(best[1])
    a, b, f, tau = (float(v) for v in params)
    if not (tau > 0 and f > 0 and all(math.isfinite(v) for v in params)):
        return None
    residual = float(np.sum((_damped(t, a, b, f, tau) - d) ** 2))
    total = float(np.sum((d - d.mean()) ** 2))
    return RingingFit(a, b, f, tau, 1.0 - residual / total if total > 0 else 0.0)


def settle_from_samples(t_s: np.ndarray, distance_px: np.ndarray, tolerance_px: float) -> tuple[float, int]:
    """(settling time s, frames after the move until the image is still) from the frames
    alone: half-way between the last frame outside the band and the next; 0 when even
    the first frame was inside."""
    t = np.asarray(t_s, float)
    outside = np.flatnonzero(np.asarray(distance_px, float) > tolerance_px)
    if outside.size == 0:
        return 0.0, 0
    k = int(outside[-1])
    if k + 1 >= len(t):
        return float(t[k]), k + 1
    return 0.5 * float(t[k] + t[k + 1]), k + 1


@dataclasses.dataclass
class AxisSettle:
    """One axis' burst: when each frame was half exposed (s after the move ended), how far
    the image lay from where it came to rest (px, columns and rows), the estimates."""

    axis: str
    move_um: float
    t_s: np.ndarray
    shifts_px: np.ndarray
    along_px: np.ndarray  # displacement along the direction the image moved most
    settle_s: float  # the estimate used (the fit's when good, else the frames')
    samples_settle_s: float
    frames_until_still: int
    fit: RingingFit | None
    still: bool  # the burst's last part lay inside the band

    @property
    def frame_interval_s(self) -> float:
        return float(np.median(np.diff(self.t_s))) if len(self.t_s) > 1 else float("nan")

    def to_dict(self, px_um: float | None = None) -> dict[str, object]:
        out: dict[str, object] = {
            "axis": self.axis,
            "move_um": self.move_um,
            "settle_ms": round(1000 * self.settle_s, 2),
            "from_frames_ms": round(1000 * self.samples_settle_s, 2),
            "frames_until_still": self.frames_until_still,
            "frame_interval_ms": round(1000 * self.frame_interval_s, 3),
            "frames": len(self.t_s),
            "still_at_end": self.still,
        }
        if self.fit is not None:
            out["fit"] = {
                "amplitude_px": round(self.fit.amplitude_px, 4),
                "frequency_hz": round(self.fit.frequency_hz, 4),
                "decay_ms": round(1000 * self.fit.decay_s, 3),
                "r2": round(self.fit.r2, 4),
            }
            if px_um is not None:
                out["fit"]["amplitude_um"] = round(self.fit.amplitude_px * px_um, 4)  # type: ignore[index]
        return out


def analyse_burst(frames: list[Timed], *, axis: str, move_um: float, tolerance_px: float = TOLERANCE_PX) -> AxisSettle:
    """Register every frame of a burst against its last (whole frames: a part of one is
    registered faster, but less of the field's texture pins it) and estimate the settling time."""
    rest = Reference(frames[-1].pixels)
    t = np.array([f.t_s for f in frames])
    shifts = np.array([rest.shift(f.pixels).vector for f in frames])
    distance = np.hypot(shifts[:, 0], shifts[:, 1])
    # The direction the image swings in: the principal axis of the displacements.
    _, _, vt = np.linalg.svd(shifts - shifts.mean(axis=0), full_matrices=False)
    along = shifts @ vt[0]
    samples_s, frames_until_still = settle_from_samples(t, distance, tolerance_px)
    tail = t >= t[-1] - STILL_FRACTION * (t[-1] - t[0])
    still = bool(np.all(distance[tail] <= tolerance_px))
    fit = fit_ringing(t, along) if frames_until_still > 0 else None
    settle_s = samples_s
    if fit is not None and fit.r2 >= MIN_FIT_R2:
        settle_s = fit.settle_s(tolerance_px)
    return AxisSettle(axis, move_um, t, shifts, along, settle_s, samples_s, frames_until_still, fit, still)


async def measure_settle(session: Session, x_um: float, y_um: float, *, axis: str, move_um: float) -> AxisSettle:
    """Move by ``move_um`` along ``axis`` from (x, y) (settled there first), frame the
    settling, and come back. The burst grows (to :data:`LONGEST_WINDOW_S`) until its last
    part is still."""
    window = FIRST_WINDOW_S
    dx, dy = (move_um, 0.0) if axis == "x" else (0.0, move_um)
    scope = session.scope
    while True:
        await session.go(x_um, y_um, side=(-1, -1))
        # A move returns after the controller has said it finished and then reported where it
        # is; one report exchange is timed here and taken off, so the times count from when
        # the motion ended (the moment the driver's settle wait starts from).
        asked = scope.clock.now()
        await scope.position()
        report_s = scope.clock.now() - asked
        await scope.move_to(x_um=x_um + dx, y_um=y_um + dy, backlash_approach=False)
        ended = scope.clock.now() - report_s
        frames = await session.burst(window, started_s=ended)
        result = await asyncio.to_thread(analyse_burst, frames, axis=axis, move_um=move_um)
        if result.still or window >= LONGEST_WINDOW_S:
            return result
        window = min(2.0 * window, LONGEST_WINDOW_S)
