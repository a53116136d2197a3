"""Focus metrics: one number per frame that is largest when the frame is sharpest.

Every metric takes a 2-D array (uint8, uint16 or float) and an optional region of
interest ``roi = (x, y, w, h)`` in pixels, and returns a float in squared grey levels
(DN², or DN for the normalised variance) of the input's own scale. Scores are means over
the pixels they are computed on, not sums, so a region and a full frame give comparable
numbers. OpenCV does the filtering because it is several times faster than NumPy here;
the tests check every metric against an independent SciPy or NumPy computation.

Border handling is the same for all: no padding. A filter output is kept only where the
whole kernel lies inside the image (or region), so a score never depends on how a border
would be extended.
"""

from __future__ import annotations

from collections.abc import Callable

import cv2
import numpy as np

Roi = tuple[int, int, int, int]

_OPENCV_DEPTH = {np.dtype(np.uint8): cv2.CV_16S, np.dtype(np.uint16): cv2.CV_32F,
                 np.dtype(np.float32): cv2.CV_32F, np.dtype(np.float64): cv2.CV_64F}


def _prepare(image: np.ndarray, roi: Roi | None, min_size: int) -> np.ndarray:
    """The region as an array OpenCV accepts (a view where possible: no copy of the frame)."""
    a = np.asarray(image)
    if a.ndim != 2:
        raise ValueError(f"focus metrics need a 2-D (monochrome) image, got shape {a.shape}")
    if roi is not None:
        x, y, w, h = (int(v) for v in roi)
        height, width = a.shape
        if w < 1 or h < 1 or x < 0 or y < 0 or x + w > width or y + h > height:
            raise ValueError(
                f"region of interest (x={x}, y={y}, w={w}, h={h}) px does not lie inside the "
                f"{width}x{height} px frame"
            )
        a = a[y : y + h, x : x + w]
    if min(a.shape) < min_size:
        raise ValueError(f"image or region {a.shape[1]}x{a.shape[0]} px is too small; need {min_size} px each way")
    if a.dtype not in _OPENCV_DEPTH:
        a = a.astype(np.float64)
    if a.strides[1] != a.itemsize or a.strides[0] < 0:
        a = np.ascontiguousarray(a)
    return a


def _mean_square(a: np.ndarray) -> float:
    return float(cv2.norm(a, cv2.NORM_L2SQR)) / a.size


def variance_of_laplacian(image: np.ndarray, roi: Roi | None = None) -> float:
    """Variance of the Laplacian (Pech-Pacheco et al. 2000, "Diatom autofocusing in
    brightfield microscopy: a comparative study", Proc. 15th ICPR, vol. 3, 314-317).

    L(x, y) = I(x-1, y) + I(x+1, y) + I(x, y-1) + I(x, y+1) - 4·I(x, y)   (4-neighbour kernel)
    score   = (1/N) Σ (L(x, y) - L̄)²,  L̄ = (1/N) Σ L(x, y)

    over the N = (W-2)(H-2) interior pixels of the W×H image (no padding). Units: DN²
    of the input scale. The paper sums over the image; dividing by N changes no ordering
    and makes regions of different size comparable.

    L is never formed: with the four neighbour differences dₖ = Iₖ - I (L = Σ dₖ) and
    2·dₖ·dⱼ = dₖ² + dⱼ² - (Iₖ - Iⱼ)², Σ L² = 4·Σₖ Σ dₖ² - Σₖ<ⱼ Σ (Iₖ - Iⱼ)², ten sums
    of squared differences of shifted views that OpenCV's ``norm`` takes straight from
    the pixels, faster than filtering into a new image and reading it back.
    """
    a = _prepare(image, roi, 3)
    centre = a[1:-1, 1:-1]
    neighbours = (a[1:-1, :-2], a[1:-1, 2:], a[:-2, 1:-1], a[2:, 1:-1])
    squares = sum(cv2.norm(n, centre, cv2.NORM_L2SQR) for n in neighbours)
    cross = sum(
        cv2.norm(neighbours[i], neighbours[j], cv2.NORM_L2SQR) for i in range(4) for j in range(i + 1, 4)
    )
    n = centre.size
    total = sum(cv2.sumElems(v)[0] for v in neighbours) - 4.0 * cv2.sumElems(centre)[0]
    mean = total / n
    return max(0.0, (4.0 * squares - cross) / n - mean * mean)


def brenner(image: np.ndarray, roi: Roi | None = None) -> float:
    """Brenner gradient (Brenner et al. 1976, "An automated microscope for cytologic
    research: a preliminary evaluation", J. Histochem. Cytochem. 24(1), 100-111).

    score = (1/N) Σ (I(x+2, y) - I(x, y))²

    over all N = (W-2)·H pixel pairs two apart along a row that lie inside the W×H image
    (no padding), with no threshold on the difference. Units: DN².
    """
    a = _prepare(image, roi, 3)
    n = a.shape[0] * (a.shape[1] - 2)
    return float(cv2.norm(a[:, 2:], a[:, :-2], cv2.NORM_L2SQR)) / n


def tenengrad(image: np.ndarray, roi: Roi | None = None) -> float:
    """Tenengrad (Krotkov 1988, "Focusing", Int. J. Computer Vision 1(3), 223-237, after
    Tenenbaum 1970): mean squared Sobel gradient magnitude.

    Gx = I ⊛ [[-1, 0, 1], [-2, 0, 2], [-1, 0, 1]],   Gy = I ⊛ Gxᵀ
    score = (1/N) Σ (Gx² + Gy²)

    over the N = (W-2)(H-2) interior pixels (no padding), with no gradient threshold.
    Units: DN² of the input scale.
    """
    a = _prepare(image, roi, 3)
    if a.dtype == np.uint8:
        gx, gy = cv2.spatialGradient(a)  # both 3×3 Sobel derivatives in one pass
    else:
        depth = _OPENCV_DEPTH[a.dtype]
        gx = cv2.Sobel(a, depth, 1, 0, ksize=3)
        gy = cv2.Sobel(a, depth, 0, 1, ksize=3)
    return _mean_square(gx[1:-1, 1:-1]) + _mean_square(gy[1:-1, 1:-1])


def normalized_variance(image: np.ndarray, roi: Roi | None = None) -> float:
    """Normalised variance (Groen, Young & Ligthart 1985, "A comparison of different focus
    functions for use in autofocus algorithms", Cytometry 6(2), 81-91).

    score = (1/(N·μ)) Σ (I(x, y) - μ)²,  μ = (1/N) Σ I(x, y)

    over all N pixels; 0 for an all-black image. Units: DN. Dividing by the mean makes the
    score independent of lamp brightness and exposure, to first order.
    """
    a = _prepare(image, roi, 1)
    mean, std = cv2.meanStdDev(a)
    mu = float(mean[0, 0])
    if mu <= 0.0:
        return 0.0
    return float(std[0, 0]) ** 2 / mu


# Adding a metric: a function above (paper cited, units stated) and a line here; the
# autofocus request, the CLI and time-lapse plans offer every name in this table.
METRICS: dict[str, Callable[..., float]] = {
    "variance_of_laplacian": variance_of_laplacian,
    "brenner": brenner,
    "tenengrad": tenengrad,
    "normalized_variance": normalized_variance,
}


DEFAULT_METRIC = "variance_of_laplacian"


def get_metric(name: str) -> Callable[..., float]:
    try:
        return METRICS[name]
    except KeyError:
        raise ValueError(f"unknown focus metric {name!r}; choose one of: {', '.join(METRICS)}") from None
