"""Focus metrics against independent SciPy/NumPy computations on scikit-image's test images."""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from scipy import ndimage
from skimage import data

from daemon.focus.metrics import (
    METRICS,
    brenner,
    get_metric,
    normalized_variance,
    tenengrad,
    variance_of_laplacian,
)

# Images that scikit-image ships (skimage.data), no download needed.
IMAGES = {"camera": data.camera(), "moon": data.moon(), "coins": data.coins()}


def ref_variance_of_laplacian(a: np.ndarray) -> float:
    # SciPy's ndimage.laplace is the sum of 1-D second differences [1, -2, 1] along each
    # axis, i.e. the 4-neighbour kernel of Pech-Pacheco et al. 2000; interior pixels only.
    lap = ndimage.laplace(a.astype(np.float64))[1:-1, 1:-1]
    return float(np.var(lap))


def ref_brenner(a: np.ndarray) -> float:
    # Literal formula of Brenner et al. 1976: squared difference of pixels two apart in x.
    f = a.astype(np.float64)
    return float(np.mean((f[:, 2:] - f[:, :-2]) ** 2))


def ref_tenengrad(a: np.ndarray) -> float:
    # SciPy's ndimage.sobel: the 3x3 Sobel operator used by Krotkov 1988; interior only.
    f = a.astype(np.float64)
    gx = ndimage.sobel(f, axis=1)[1:-1, 1:-1]
    gy = ndimage.sobel(f, axis=0)[1:-1, 1:-1]
    return float(np.mean(gx**2 + gy**2))


def ref_normalized_variance(a: np.ndarray) -> float:
    # Groen et al. 1985: population variance over the mean.
    f = a.astype(np.float64)
    return float(np.var(f) / np.mean(f))


REFERENCES = {
    "variance_of_laplacian": ref_variance_of_laplacian,
    "brenner": ref_brenner,
    "tenengrad": ref_tenengrad,
    "normalized_variance": ref_normalized_variance,
}


@pytest.mark.parametrize("name", sorted(METRICS))
@pytest.mark.parametrize("image_name", sorted(IMAGES))
def test_metric_matches_independent_reference_uint8(name: str, image_name: str) -> None:
    img = IMAGES[image_name]
    assert img.dtype == np.uint8
    assert METRICS[name](img) == pytest.approx(REFERENCES[name](img), rel=1e-9)


@pytest.mark.parametrize("name", sorted(METRICS))
@pytest.mark.parametrize("dtype", [np.uint16, np.float32, np.float64])
def test_metric_matches_reference_for_16_bit_and_float(name: str, dtype: type) -> None:
    # A 16-bit or float frame with the same content: 8-bit camera image scaled into the
    # 12-bit range of a typical budget camera (common practice), plus an odd offset.
    img = (data.camera().astype(np.float64) * 16 + 3).astype(dtype)
    rel = 1e-5 if dtype == np.float32 else 1e-9
    assert METRICS[name](img) == pytest.approx(REFERENCES[name](img), rel=rel)


@pytest.mark.parametrize("name", sorted(METRICS))
def test_region_of_interest_is_the_same_as_cropping(name: str) -> None:
    img = data.coins()
    x, y, w, h = 37, 51, 200, 120
    cropped = np.ascontiguousarray(img[y : y + h, x : x + w])
    assert METRICS[name](img, roi=(x, y, w, h)) == pytest.approx(REFERENCES[name](cropped), rel=1e-9)


@pytest.mark.parametrize("name", ["variance_of_laplacian", "brenner", "tenengrad"])
def test_gradient_metrics_scale_with_the_square_of_the_grey_scale(name: str) -> None:
    # 8-bit to 16-bit by x257 (full scale 255 -> 65535): squared-difference metrics grow 257².
    img8 = data.camera()
    img16 = img8.astype(np.uint16) * 257
    assert METRICS[name](img16) == pytest.approx(METRICS[name](img8) * 257**2, rel=1e-9)


@pytest.mark.parametrize("name", sorted(METRICS))
@pytest.mark.parametrize("image_name", sorted(IMAGES))
def test_metric_order_under_increasing_gaussian_blur(name: str, image_name: str) -> None:
    img = IMAGES[image_name].astype(np.float64)
    sigmas_px = [0.0, 0.7, 1.5, 3.0, 6.0]
    scores = [METRICS[name](ndimage.gaussian_filter(img, s) if s else img) for s in sigmas_px]
    assert all(a > b for a, b in itertools.pairwise(scores)), scores


def test_flat_image_scores_zero() -> None:
    flat = np.full((64, 80), 120, np.uint8)
    for name, fn in METRICS.items():
        assert fn(flat) == 0.0, name
    assert normalized_variance(np.zeros((10, 10), np.uint8)) == 0.0


def test_bad_inputs_are_refused_with_a_reason() -> None:
    img = data.camera()
    with pytest.raises(ValueError, match="does not lie inside"):
        variance_of_laplacian(img, roi=(500, 0, 20, 20))
    with pytest.raises(ValueError, match="2-D"):
        brenner(np.zeros((4, 4, 3), np.uint8))
    with pytest.raises(ValueError, match="too small"):
        tenengrad(np.zeros((2, 50), np.uint8))
    with pytest.raises(ValueError, match="unknown focus metric"):
        get_metric("sharpness")


def test_strided_and_other_integer_inputs() -> None:
    img = data.camera()
    # A column-strided view and an int32 copy give the same score as a contiguous uint8 frame.
    view = img[:, ::2]
    assert variance_of_laplacian(view) == pytest.approx(ref_variance_of_laplacian(view), rel=1e-9)
    assert brenner(img.astype(np.int32)) == pytest.approx(ref_brenner(img), rel=1e-9)
