"""Growth curves: confluence against time per well, and the doubling time with its uncertainty.

Two models, both on confluence c (fraction 0..1) against time t (hours):

* exponential growth, c(t) = c0 · exp(r·t), i.e. ln c a straight line in t: the
  exponential ("log") phase of a sub-confluent culture;
* logistic (Verhulst) growth, c(t) = K / (1 + (K/c0 − 1) · exp(−r·t)), with its plateau K
  fitted (at most 1: coverage cannot exceed the whole field): growth that slows as the
  cells run out of room.

Both are fitted by weighted non-linear least squares on c itself
(``scipy.optimize.least_squares``), weighted by the noise model of a confluence
measurement, ``NoiseModel``: an absolute part (specks, debris and segmentation noise at
the edge of every cell, which does not shrink with the coverage) and a relative part
(field-to-field and time-to-time scatter: cells enter and leave the imaged fields and
divide one at a time), added in quadrature and evaluated on the fitted curve
(iteratively reweighted least squares, so a point that happens to read low does not gain
weight for it).

Which model speaks for the well is decided by the small-sample Akaike information
criterion, AICc (Hurvich & Tsai 1989, Biometrika 76:297-307; least-squares form from
Burnham & Anderson 2002, Model Selection and Multimodel Inference, 2nd ed., Springer,
sections 2.2 and 2.4):

    AICc = n ln(WRSS / n) + 2k + 2k(k + 1) / (n − k − 1),

WRSS the weighted residual sum of squares and k the number of fitted parameters plus one
for the noise level (3 for the exponential, 4 for the logistic). The model with the lower
AICc is kept; it needs n > k + 1 points, so with fewer than six the logistic is not
considered. A curve that passes ``EXPONENTIAL_PHASE_MAX`` is compared on all its points
too; should neither model describe it (cells lifting off, say), the exponential phase
alone (the points before the curve first passes that level) is fitted instead.

Either way the doubling time is ln 2 / r. Its uncertainty (one standard deviation, as is
``rate_err_per_h``) comes from the fit's parameter covariance (J^T W J)^-1, scaled up by
the reduced chi-square when the points scatter more than the noise model says (Birge
ratio, R. T. Birge 1932, Phys. Rev. 40:207-227) and never scaled down, then propagated
to first order: σ_Td = ln 2 · σ_r / r². A fit that is poor, too short or too uncertain
says so in ``note`` and has ``ok = False``; it is never dressed up as an answer.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Callable, Mapping, Sequence

import numpy as np
from scipy.optimize import least_squares

LN2 = math.log(2.0)
S_PER_H = 3600.0

# Below this confluence cells rarely touch, so growth is still close to exponential
# (common practice: the "log phase" of an adherent culture is the sub-confluent part).
EXPONENTIAL_PHASE_MAX = 0.35
# A well whose confluence never rises above this holds nothing measurable that grows:
# it is indistinguishable from debris and segmentation noise.
MEASURABLE_MIN = 0.003
MIN_POINTS = 4
GOOD_R2 = 0.95
MAX_RELATIVE_ERROR = 0.3
# AICc needs n > k + 1 (k counts the noise level): 5 points for the exponential, 6 for the logistic.
AICC_PARAMS = {"exponential": 3, "logistic": 4}
# Reweighting passes: the weights come from the previous pass's curve; two passes settle
# them to well below the fit's own uncertainty.
REWEIGHT_PASSES = 1
# A weighted residual variance below this counts as an exact fit (noise-free data), so
# the logarithm in AICc stays finite and two exact fits tie (the simpler one wins).
EXACT_FIT_WRSS = 1e-20


@dataclasses.dataclass(frozen=True)
class NoiseModel:
    """Standard deviation of one well's measured confluence (a fraction, 0..1) at one time
    point: ``sqrt(absolute² + (relative · c)²)``.

    The defaults describe the mean of a few 10x fields of about a hundred cells each, as
    the time-lapses take them. Relative, 4 %: the scatter of such fields from time point to
    time point as cells enter and leave them and divide one at a time - counting
    statistics, about 1/sqrt of the ten-odd cells that are new over a few hours (an
    estimate, not a measurement; a lab with larger fields or more sites scatters less).
    Absolute, 0.5 pp: what an empty field reads (specks, debris; the segmentation keeps it
    below 1 %). They are the least error the fit states; when the points scatter more, the
    stated error grows with them (see the module docstring).
    """

    absolute: float = 0.005
    relative: float = 0.04

    def __post_init__(self) -> None:
        if not (self.absolute >= 0 and self.relative >= 0 and self.absolute + self.relative > 0):
            raise ValueError(f"noise model needs absolute >= 0, relative >= 0, not both 0 (got {self.absolute}, {self.relative})")

    def sigma(self, c: np.ndarray) -> np.ndarray:
        c = np.clip(np.asarray(c, dtype=float), 0.0, 1.0)
        return np.sqrt(self.absolute**2 + (self.relative * c) ** 2)


DEFAULT_NOISE = NoiseModel()


@dataclasses.dataclass(frozen=True)
class GrowthFit:
    """The fitted growth of one well. Times are seconds; ``t_ref_s`` is the fit's time origin.

    ``doubling_time_err_h`` is the fit's own (statistical) uncertainty, one standard
    deviation. It does not include how well the imaged sites stand for the whole well,
    nor a segmentation bias. ``plateau`` is the logistic's K (None for the exponential).
    ``aicc`` holds each candidate model's AICc where they were compared.
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
    aicc: dict[str, float] = dataclasses.field(default_factory=dict)

    def predict(self, times_s: Sequence[float] | np.ndarray) -> np.ndarray:
        """The fitted curve at ``times_s`` (for plotting beside the measured points)."""
        t_h = (np.asarray(times_s, dtype=float) - self.t_ref_s) / S_PER_H
        if self.model == "none" or self.rate_per_h is None or self.c0 is None:
            return np.full(t_h.shape, np.nan)
        if self.model == "exponential":
            return _exponential(t_h, math.log(self.c0), self.rate_per_h)
        return _logistic(t_h, math.log(self.c0), self.rate_per_h, self.plateau if self.plateau is not None else 1.0)

    def to_dict(self) -> dict[str, object]:
        return dataclasses.asdict(self)


def fit_growth(
    times_s: Sequence[float], confluence: Sequence[float | None], *, noise: NoiseModel = DEFAULT_NOISE
) -> GrowthFit:
    """Fit the growth of one well: exponential or logistic, whichever AICc prefers.

    ``times_s`` are time-point times (seconds, any origin), ``confluence`` fractions 0..1;
    ``None`` or NaN entries (a frame that could not be analysed) are left out. ``noise``
    is the measurement's noise model (weights, and the least error stated).
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
        return GrowthFit("none", None, None, None, False, f"only {n} usable time point{'' if n == 1 else 's'}; a fit needs {MIN_POINTS}", n, t_ref_s=t_ref)
    t_h = (t_s - t_ref) / S_PER_H
    if t_h[-1] - t_h[0] <= 0:
        return GrowthFit("none", None, None, None, False, "all time points at the same time", n, t_ref_s=t_ref)
    if float(np.max(c)) < MEASURABLE_MIN:
        return GrowthFit(
            "none", None, None, None, False,
            f"confluence never above {MEASURABLE_MIN * 100:.1f} %: nothing measurable grows (empty well?)", n, t_ref_s=t_ref,
        )

    chosen = _choose(t_h, c, noise)
    if not (chosen is not None and chosen.ok) and np.any(c > EXPONENTIAL_PHASE_MAX):
        phase = _exponential_phase(t_h, c)
        if phase is not None:
            early = _fit_exponential(t_h[phase], c[phase], noise)
            if early is not None and early[0].ok:
                chosen = dataclasses.replace(early[0], note=early[0].note + " (exponential phase only: the later points fit neither model)")
    if chosen is None:
        return GrowthFit("none", None, None, None, False, "no growth model could be fitted", n, t_ref_s=t_ref)
    return dataclasses.replace(chosen, n_points=n, t_ref_s=t_ref)


def fit_plate(
    series: Mapping[str, tuple[Sequence[float], Sequence[float | None]]], *, noise: NoiseModel = DEFAULT_NOISE
) -> dict[str, GrowthFit]:
    """``fit_growth`` for every well of a plate: ``{well: (times_s, confluence)}``."""
    return {well: fit_growth(t, c, noise=noise) for well, (t, c) in series.items()}


def aicc(wrss: float, n: int, k: int) -> float:
    """Small-sample Akaike information criterion of a least-squares fit (Hurvich & Tsai
    1989; Burnham & Anderson 2002, eq. 2.14 with the residual variance WRSS / n): ``k``
    counts the fitted parameters plus the noise level. Needs n > k + 1; lower is better."""
    if n <= k + 1:
        raise ValueError(f"AICc needs more than {k + 1} points for {k} parameters, got {n}")
    return n * math.log(max(wrss / n, EXACT_FIT_WRSS)) + 2 * k + 2 * k * (k + 1) / (n - k - 1)


def _choose(t_h: np.ndarray, c: np.ndarray, noise: NoiseModel) -> GrowthFit | None:
    """The candidate models fitted to all points, the one with the lower AICc kept."""
    n = int(t_h.size)
    fits = [_fit_exponential(t_h, c, noise)]
    if n > AICC_PARAMS["logistic"] + 1:
        fits.append(_fit_logistic(t_h, c, noise))
    candidates = [f for f in fits if f is not None]
    if not candidates:
        return None
    if len(candidates) == 1:
        return candidates[0][0]
    scores = {f.model: aicc(wrss, n, AICC_PARAMS[f.model]) for f, wrss in candidates}
    best = min((f for f, _ in candidates), key=lambda f: scores[f.model])
    other = next(m for m in scores if m != best.model)
    note = f"{best.note}; AICc {scores[best.model] - scores[other]:+.1f} against the {other}"
    return dataclasses.replace(best, note=note, aicc={m: round(v, 3) for m, v in scores.items()})


def _exponential_phase(t_h: np.ndarray, c: np.ndarray) -> np.ndarray | None:
    """Points before the curve first passes EXPONENTIAL_PHASE_MAX, if enough for a fit."""
    above = np.nonzero(c > EXPONENTIAL_PHASE_MAX)[0]
    end = int(above[0]) if above.size else int(c.size)
    sel = np.zeros(c.size, bool)
    sel[:end] = True
    return sel if end >= MIN_POINTS and np.ptp(t_h[sel]) > 0 else None


def _exponential(t_h: np.ndarray, ln_c0: float, r: float) -> np.ndarray:
    """Exponential growth c0 · exp(r t); t in hours, r in 1/h (exponent clipped against overflow)."""
    return np.exp(np.clip(ln_c0 + r * t_h, -700.0, 700.0))


def _logistic(t_h: np.ndarray, ln_c0: float, r: float, k: float) -> np.ndarray:
    """Verhulst logistic growth (P.-F. Verhulst 1838), written overflow-safely; t in hours, r in 1/h."""
    c0 = math.exp(ln_c0)
    return k / (1.0 + (k / c0 - 1.0) * np.exp(np.clip(-r * t_h, -700.0, 700.0)))


def _exponential_jac(t_h: np.ndarray, p: np.ndarray) -> np.ndarray:
    m = _exponential(t_h, p[0], p[1])
    return np.column_stack([m, m * t_h])


def _logistic_jac(t_h: np.ndarray, p: np.ndarray) -> np.ndarray:
    ln_c0, r, k = p
    c0 = math.exp(ln_c0)
    e = np.exp(np.clip(-r * t_h, -700.0, 700.0))
    a = k / c0 - 1.0
    d = 1.0 + a * e
    m = k / d
    dm_da = -k * e / d**2
    return np.column_stack([
        dm_da * (-k / c0),  # d/d ln c0: a = k e^{-ln c0} - 1
        -k * a * e * (-t_h) / d**2,  # d/dr
        1.0 / d + dm_da / c0,  # d/dk
    ])


def _weighted_fit(
    model: Callable[..., np.ndarray],
    jac: Callable[[np.ndarray, np.ndarray], np.ndarray],
    t_h: np.ndarray,
    c: np.ndarray,
    p0: np.ndarray,
    sigma_of: Callable[[np.ndarray], np.ndarray],
    bounds: tuple[Sequence[float], Sequence[float]] | None,
) -> tuple[np.ndarray, np.ndarray, float, float] | None:
    """Weighted least squares with weights 1/σ² from the curve of the previous pass.

    Returns parameters, their covariance (unscaled: the noise model taken as true), the
    weighted residual sum of squares and the plain residual sum of squares."""
    p = np.asarray(p0, dtype=float)
    sigma = sigma_of(model(t_h, *p))
    result = None
    for _ in range(REWEIGHT_PASSES):
        w = 1.0 / sigma

        def residuals(q: np.ndarray, w: np.ndarray = w) -> np.ndarray:
            return (model(t_h, *q) - c) * w

        def jacobian(q: np.ndarray, w: np.ndarray = w) -> np.ndarray:
            return jac(t_h, q) * w[:, None]

        kwargs = {"bounds": bounds, "method": "trf"} if bounds is not None else {"method": "lm"}
        try:
            result = least_squares(residuals, p, jac=jacobian, x_scale="jac", xtol=1e-10, ftol=1e-10, gtol=1e-10, max_nfev=400, **kwargs)
        except (ValueError, np.linalg.LinAlgError):
            return None
        if not np.all(np.isfinite(result.x)):
            return None
        p = result.x
        sigma = sigma_of(model(t_h, *p))
    assert result is not None
    jw = result.jac
    try:
        cov = np.linalg.inv(jw.T @ jw)
    except np.linalg.LinAlgError:
        cov = np.full((p.size, p.size), np.inf)
    wrss = float(np.sum(result.fun**2))
    rss = float(np.sum((model(t_h, *p) - c) ** 2))
    return p, cov, wrss, rss


def _rate_error(cov: np.ndarray, wrss: float, n: int, n_params: int) -> float:
    """σ of r: the covariance scaled by the reduced chi-square where it exceeds 1 (Birge 1932)."""
    var = float(cov[1, 1])
    if not (math.isfinite(var) and var >= 0):
        return math.inf
    dof = n - n_params
    scale = max(1.0, wrss / dof) if dof > 0 else 1.0
    return math.sqrt(var * scale)


def _doubling(rate: float, rate_err: float) -> tuple[float | None, float | None]:
    if rate <= 0 or not math.isfinite(rate):
        return None, None
    err = LN2 * rate_err / rate**2 if math.isfinite(rate_err) else math.inf
    return LN2 / rate, err


def _r2(y: np.ndarray, rss: float) -> float:
    ss_tot = float(np.sum((y - np.mean(y)) ** 2))
    return 1.0 - rss / ss_tot if ss_tot > 0 else (1.0 if rss == 0 else 0.0)


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


def _fit_exponential(t_h: np.ndarray, c: np.ndarray, noise: NoiseModel) -> tuple[GrowthFit, float] | None:
    """Exponential growth, ln c = ln c0 + r t, by weighted non-linear least squares on c.

    Started from a weighted straight line through ln c of the points above
    MEASURABLE_MIN (an absolute error σ becomes σ / c in ln c, hence weights (c / σ)²)."""
    pos = c >= MEASURABLE_MIN
    if np.sum(pos) < 2 or np.ptp(t_h[pos]) <= 0:
        return None
    slope, intercept = np.polyfit(t_h[pos], np.log(c[pos]), 1, w=c[pos] / noise.sigma(c[pos]))
    fit = _weighted_fit(_exponential, _exponential_jac, t_h, c, np.array([intercept, slope]), noise.sigma, None)
    if fit is None:
        return None
    (ln_c0, r), cov, wrss, rss = fit
    n = int(t_h.size)
    r_err = _rate_error(cov, wrss, n, 2)
    r2 = _r2(c, rss)
    ok, note = _judge("exponential", float(r), r_err, r2, n)
    td, td_err = _doubling(float(r), r_err)
    fit_ = GrowthFit("exponential", td, td_err, r2, ok, note, n, n, rate_per_h=float(r), rate_err_per_h=r_err, c0=math.exp(ln_c0))
    return fit_, wrss


def _fit_logistic(t_h: np.ndarray, c: np.ndarray, noise: NoiseModel) -> tuple[GrowthFit, float] | None:
    """Logistic growth by weighted non-linear least squares on c (trust-region reflective,
    bounded: the plateau K between half the highest point and full coverage)."""
    c_max = float(np.max(c))
    k_lo = max(0.05, 0.5 * c_max)
    # Start the plateau just above the highest point once the curve bends over, and at
    # full coverage while it is still sub-confluent (the plateau is not seen yet).
    k0 = min(1.0, max(c_max * 1.05, k_lo * 1.01)) if c_max > EXPONENTIAL_PHASE_MAX else 1.0
    # Start: the rate from the steepest rise of logit(c / K0), the earliest measurable point as c0.
    pos = c >= MEASURABLE_MIN
    if np.sum(pos) < 2:
        return None
    y = np.clip(c[pos] / k0, 1e-4, 1 - 1e-4)
    slope, intercept = np.polyfit(t_h[pos], np.log(y / (1 - y)), 1)
    r0 = max(float(slope), 1e-3)
    c00 = k0 / (1.0 + math.exp(-float(intercept)))
    lower, upper = np.array([math.log(1e-6), 1e-5, k_lo]), np.array([0.0, 10.0, 1.0])
    inset = 1e-6 * (upper - lower)
    p0 = np.clip([math.log(max(c00, 1e-6)), r0, k0], lower + inset, upper - inset)
    fit = _weighted_fit(_logistic, _logistic_jac, t_h, c, p0, noise.sigma, (lower, upper))
    if fit is None:
        return None
    (ln_c0, r, k), cov, wrss, rss = fit
    if not k > math.exp(ln_c0):
        return None
    n = int(t_h.size)
    r_err = _rate_error(cov, wrss, n, 3)
    r2 = _r2(c, rss)
    ok, note = _judge("logistic", float(r), r_err, r2, n)
    td, td_err = _doubling(float(r), r_err)
    fit_ = GrowthFit(
        "logistic", td, td_err, r2, ok, note, n, n, rate_per_h=float(r), rate_err_per_h=r_err, c0=math.exp(ln_c0), plateau=float(k)
    )
    return fit_, wrss


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
