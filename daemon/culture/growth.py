"""Growth curves: confluence against time per well, and the doubling time with its uncertainty.

Two models, both on confluence c (fraction 0..1) against time t:

* exponential phase, c(t) = c0 · exp(r·t) while c << 1, fitted as a straight line to
  logit c = ln(c / (1 − c)) over the sub-confluent points only: that is ln c at low
  coverage, and the (1 − c) term takes out the slowdown that a plateau at full coverage
  already causes there (``plateau`` is reported as 1.0 for this model);
* logistic (Verhulst) growth, c(t) = K / (1 + (K/c0 − 1) · exp(−r·t)), fitted to all points,
  chosen once the curve visibly levels off.

Either way the doubling time of the exponential phase is ln 2 / r. Its uncertainty comes
from the fit's parameter covariance (first-order error propagation: σ_Td = ln 2 · σ_r / r²).
A fit that is poor, too short or too uncertain says so in ``note`` and has ``ok = False``;
it is never dressed up as an answer.
"""

from __future__ import annotations

import dataclasses
import math
import warnings
from collections.abc import Mapping, Sequence

import numpy as np
from scipy.optimize import OptimizeWarning, curve_fit

LN2 = math.log(2.0)
S_PER_H = 3600.0

# Below this confluence cells rarely touch, so growth is still close to exponential
# (common practice: the "log phase" of an adherent culture is the sub-confluent part).
EXPONENTIAL_PHASE_MAX = 0.35
# Confluence below this is indistinguishable from debris and segmentation noise; ln c of
# such points would dominate an exponential fit with noise.
MEASURABLE_MIN = 0.003
MIN_POINTS = 4
GOOD_R2 = 0.95
MAX_RELATIVE_ERROR = 0.3


@dataclasses.dataclass(frozen=True)
class GrowthFit:
    """The fitted growth of one well. Times are seconds; ``t_ref_s`` is the fit's time origin.

    ``doubling_time_err_h`` is the fit's own (statistical) uncertainty. It does not include
    how well the imaged sites stand for the whole well, nor a segmentation bias.
    """

    model: str  # "exponential", "logistic" or "none"
    doubling_time_h: float | None
    doubling_time_err_h: float | None
    r2: float | None
    ok: bool
    note: str
    n_points: int
    n_fitted: int = 0
    rate_per_h: float | None = None
    rate_err_per_h: float | None = None
    c0: float | None = None
    plateau: float | None = None
    t_ref_s: float = 0.0

    def predict(self, times_s: Sequence[float] | np.ndarray) -> np.ndarray:
        """The fitted curve at ``times_s`` (for plotting beside the measured points)."""
        t_h = (np.asarray(times_s, dtype=float) - self.t_ref_s) / S_PER_H
        if self.model == "none" or self.rate_per_h is None or self.c0 is None:
            return np.full(t_h.shape, np.nan)
        return _logistic(t_h, self.c0, self.rate_per_h, self.plateau if self.plateau is not None else 1.0)

    def to_dict(self) -> dict[str, object]:
        return dataclasses.asdict(self)


def fit_growth(times_s: Sequence[float], confluence: Sequence[float | None]) -> GrowthFit:
    """Fit the growth of one well: exponential phase, or logistic once the curve levels off.

    ``times_s`` are time-point times (seconds, any origin), ``confluence`` fractions 0..1;
    ``None`` or NaN entries (a frame that could not be analysed) are left out.
    """
    t_all = np.asarray(times_s, dtype=float)
    c_all = np.asarray([np.nan if c is None else c for c in confluence], dtype=float)
    if t_all.shape != c_all.shape:
        raise ValueError(f"times_s has {t_all.size} entries but confluence has {c_all.size}")
    keep = np.isfinite(t_all) & np.isfinite(c_all)
    order = np.argsort(t_all[keep], kind="stable")
    t_s, c = t_all[keep][order], np.clip(c_all[keep][order], 0.0, 1.0)
    n = int(t_s.size)
    t_ref = float(t_s[0]) if n else 0.0
    if n < MIN_POINTS:
        return GrowthFit("none", None, None, None, False, f"only {n} usable time points; a fit needs {MIN_POINTS}", n, t_ref_s=t_ref)
    t_h = (t_s - t_ref) / S_PER_H
    if t_h[-1] - t_h[0] <= 0:
        return GrowthFit("none", None, None, None, False, "all time points at the same time", n, t_ref_s=t_ref)

    if float(np.max(c)) < MEASURABLE_MIN:
        return GrowthFit(
            "none", None, None, None, False,
            f"confluence never above {MEASURABLE_MIN * 100:.1f} %: nothing measurable grows (empty well?)", n, t_ref_s=t_ref,
        )
    expo = _fit_exponential_phase(t_h, c)
    levels_off = float(np.max(c)) >= 0.5 and np.sum(c > EXPONENTIAL_PHASE_MAX) >= 2
    logi = _fit_logistic(t_h, c, expo) if levels_off else None
    if logi is not None and logi.ok:
        chosen = logi
    elif expo is not None:
        chosen = expo if logi is None else _prefer(expo, logi)
    elif logi is not None:
        chosen = logi
    else:
        return GrowthFit("none", None, None, None, False, "no growth model could be fitted", n, t_ref_s=t_ref)
    return dataclasses.replace(chosen, n_points=n, t_ref_s=t_ref)


def fit_plate(series: Mapping[str, tuple[Sequence[float], Sequence[float | None]]]) -> dict[str, GrowthFit]:
    """``fit_growth`` for every well of a plate: ``{well: (times_s, confluence)}``."""
    return {well: fit_growth(t, c) for well, (t, c) in series.items()}


def _prefer(expo: GrowthFit, logi: GrowthFit) -> GrowthFit:
    """Neither passed: report the one with the better fit, keeping its honest note."""
    return logi if (logi.r2 or -math.inf) > (expo.r2 or -math.inf) else expo


def _logistic(t_h: np.ndarray, c0: float, r: float, k: float) -> np.ndarray:
    """Verhulst logistic growth (P.-F. Verhulst 1838), written overflow-safely; t in hours, r in 1/h."""
    return k / (1.0 + (k / c0 - 1.0) * np.exp(np.clip(-r * t_h, -700.0, 700.0)))


def _doubling(rate: float, rate_err: float) -> tuple[float | None, float | None]:
    if rate <= 0 or not math.isfinite(rate):
        return None, None
    err = LN2 * rate_err / rate**2 if math.isfinite(rate_err) else math.inf
    return LN2 / rate, err


def _r2(y: np.ndarray, y_fit: np.ndarray) -> float:
    ss_res = float(np.sum((y - y_fit) ** 2))
    ss_tot = float(np.sum((y - np.mean(y)) ** 2))
    return 1.0 - ss_res / ss_tot if ss_tot > 0 else (1.0 if ss_res == 0 else 0.0)


def _judge(model: str, rate: float, rate_err: float, r2: float, n_fit: int, extra: str = "") -> tuple[bool, str]:
    td, td_err = _doubling(rate, rate_err)
    problems: list[str] = []
    if td is None:
        problems.append("no growth (the fitted rate is not positive)")
    if r2 < GOOD_R2:
        problems.append(f"poor fit (R² {r2:.2f} < {GOOD_R2})")
    if td is not None and td_err is not None and td_err > MAX_RELATIVE_ERROR * td:
        problems.append(f"doubling time uncertain (±{td_err:.1f} h on {td:.1f} h)")
    if extra:
        problems.append(extra)
    if problems:
        return False, f"{model} fit on {n_fit} points: " + "; ".join(problems)
    return True, f"{model} fit on {n_fit} points"


def _fit_exponential_phase(t_h: np.ndarray, c: np.ndarray) -> GrowthFit | None:
    """Weighted least-squares line through logit(c) = ln(c / (1 - c)) of the sub-confluent points.

    While c << 1 this is ln c, the exponential phase itself; the (1 - c) term is the
    logistic's own slowdown with the plateau at full coverage (coverage cannot exceed 1),
    so the growth rate is not underestimated as the culture nears the end of this phase.
    An absolute confluence error sigma becomes sigma / (c (1 - c)) in the logit, hence
    weights c (1 - c).
    """
    sel = (c >= MEASURABLE_MIN) & (c <= EXPONENTIAL_PHASE_MAX)
    # Only the run before the culture first leaves the exponential phase counts: a late dip
    # (detachment) below the limit is not exponential growth.
    above = np.nonzero(c > EXPONENTIAL_PHASE_MAX)[0]
    if above.size:
        sel[above[0]:] = False
    if np.sum(sel) < 3:
        return None
    t, cs = t_h[sel], c[sel]
    if np.ptp(t) <= 0:
        return None
    y, w = np.log(cs / (1.0 - cs)), cs * (1.0 - cs)
    # cov=True scales by the weighted residual variance with n - 2 degrees of freedom.
    (slope, intercept), cov = np.polyfit(t, y, 1, w=w, cov=True)
    slope_err = float(math.sqrt(max(cov[0, 0], 0.0)))
    c0 = 1.0 / (1.0 + math.exp(-intercept))
    r2 = _r2(cs, _logistic(t, c0, float(slope), 1.0))
    n_fit = int(sel.sum())
    extra = "" if n_fit >= MIN_POINTS else f"only {n_fit} points in the exponential phase"
    ok, note = _judge("exponential", float(slope), slope_err, r2, n_fit, extra)
    td, td_err = _doubling(float(slope), slope_err)
    return GrowthFit(
        "exponential", td, td_err, r2, ok, note, int(t_h.size), n_fit,
        rate_per_h=float(slope), rate_err_per_h=slope_err, c0=c0, plateau=1.0,
    )


def _fit_logistic(t_h: np.ndarray, c: np.ndarray, expo: GrowthFit | None) -> GrowthFit | None:
    """Non-linear least squares (scipy.optimize.curve_fit, trust-region reflective) of the logistic."""
    k0 = min(1.0, max(float(np.max(c)) * 1.02, 0.06))
    c_first = max(float(c[0]), MEASURABLE_MIN)
    if expo is not None and expo.rate_per_h and expo.rate_per_h > 0 and expo.c0:
        r0, c00 = expo.rate_per_h, min(max(expo.c0, 1e-4), 0.9 * k0)
    else:
        half = np.nonzero(c >= 0.5 * k0)[0]
        span_h = max(float(t_h[half[0]]) if half.size else float(t_h[-1]), 1e-3)
        r0 = max(math.log(max(0.5 * k0 / c_first, 1.5)) / span_h, 1e-3)
        c00 = min(c_first, 0.9 * k0)
    lower = (1e-6, 1e-5, max(0.05, 0.5 * float(np.max(c))))
    upper = (1.0, 10.0, 1.0)
    p0 = np.clip([c00, r0, k0], np.array(lower) * 1.0001, np.array(upper) * 0.9999)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", OptimizeWarning)
            popt, pcov = curve_fit(_logistic, t_h, c, p0=p0, bounds=(lower, upper), method="trf", maxfev=5000)
    except (RuntimeError, ValueError):
        return None
    c0, r, k = (float(v) for v in popt)
    r_err = float(math.sqrt(pcov[1, 1])) if np.all(np.isfinite(pcov)) and pcov[1, 1] >= 0 else math.inf
    r2 = _r2(c, _logistic(t_h, c0, r, k))
    ok, note = _judge("logistic", r, r_err, r2, int(t_h.size))
    td, td_err = _doubling(r, r_err)
    return GrowthFit(
        "logistic", td, td_err, r2, ok, note, int(t_h.size), int(t_h.size),
        rate_per_h=r, rate_err_per_h=r_err, c0=c0, plateau=k,
    )


GROWTH_COLUMNS = (
    "well", "n_points", "model", "doubling_time_h", "doubling_time_err_h", "rate_per_h", "plateau", "r2", "ok", "note",
)


def growth_rows(fits: Mapping[str, GrowthFit]) -> list[list[object]]:
    """One CSV row per well (columns ``GROWTH_COLUMNS``), empty cells where a figure is absent."""

    def fmt(value: float | None, digits: int) -> str:
        return "" if value is None or not math.isfinite(value) else f"{value:.{digits}f}"

    return [
        [
            well, fit.n_points, fit.model, fmt(fit.doubling_time_h, 3), fmt(fit.doubling_time_err_h, 3),
            fmt(fit.rate_per_h, 5), fmt(fit.plateau, 4), fmt(fit.r2, 4), "yes" if fit.ok else "no", fit.note,
        ]
        for well, fit in sorted(fits.items())
    ]
