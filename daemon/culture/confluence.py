"""Confluence of a phase-contrast frame: the fraction of the field covered by cells.

The segmentation follows Jaccard et al. 2014 (PHANTAST; "Automated method for the rapid
and precise estimation of adherent cell culture characteristics from phase contrast
microscopy images", Biotechnology and Bioengineering 111(3):504-517): cells are where the
*local contrast* (local standard deviation over local mean, in a Gaussian window) is
high; holes are filled and specks removed. Local contrast alone also marks the halo that
phase contrast leaves around every cell (bright in positive phase contrast), so pixels
brighter than the local background are rejected as halo, cells are joined across the
bright seams where they touch, and only enclosed gaps that are not halo-bright are filled.
Every decision is a ratio to a local mean, so illumination falloff, exposure and gain
do not move the figure; raw and flat-field-corrected frames read nearly the same (the
camera's black level, still in a raw frame, shifts those ratios a little).

All lengths are micrometres in the sample plane, converted with the frame's pixel size,
so one set of settings serves 4x to 20x objectives.
"""

from __future__ import annotations

import dataclasses

import cv2
import numpy as np

METHOD = "local contrast (Jaccard et al. 2014) with halo rejection"


@dataclasses.dataclass(frozen=True)
class ConfluenceSettings:
    """Segmentation settings, in micrometres of the sample plane where they are lengths.

    The defaults were chosen on simulated 4x/0.10, 10x/0.25 and 20x/0.40 cultures against
    the simulator's true cell masks (see tests/test_culture_confluence.py for the errors).
    """

    # Work on a grid of about this pixel size: cells are tens of um across, so finer
    # sampling adds time and noise but no coverage accuracy.
    work_pixel_um: float = 0.75
    # Gaussian sigma of the local-contrast window (Jaccard et al. use a few pixels at ~1 um/px).
    window_um: float = 1.5
    # Least local contrast (std / mean) counted as cell texture.
    contrast_threshold: float = 0.15
    # The threshold also stays this many times above the relative sensor noise, so a short
    # exposure at high gain does not turn noise into cells.
    noise_margin: float = 3.0
    # Halo polarity: "bright" for positive phase contrast (dark cells, bright halos),
    # "dark" for negative phase contrast.
    halo: str = "bright"
    # Pixels brighter than the local background by more than this (relative) are halo.
    halo_excess: float = 0.10
    # Scale of the background estimate: far larger than a cell and its halo.
    background_um: float = 60.0
    # Where two cells meet, the seam between them is bright like a halo; a closing of
    # this radius joins cells across seams narrower than twice it.
    seam_um: float = 2.5
    # Enclosed gaps smaller than this are cell interior (flat cytoplasm has little texture)
    # unless they are as bright as halo; larger ones are gaps between cells.
    max_hole_um2: float = 300.0
    min_object_um2: float = 60.0

    def __post_init__(self) -> None:
        if self.halo not in ("bright", "dark"):
            raise ValueError(f"halo must be 'bright' or 'dark', got {self.halo!r}")


DEFAULT_SETTINGS = ConfluenceSettings()


@dataclasses.dataclass(frozen=True)
class ConfluenceResult:
    fraction: float
    mask: np.ndarray | None
    method: str
    contrast_threshold: float
    noise_contrast: float
    halo_fraction: float
    work_pixel_um: float

    def to_dict(self) -> dict[str, object]:
        return {k: v for k, v in dataclasses.asdict(self).items() if k != "mask"}


def confluence(
    image: np.ndarray,
    *,
    pixel_size_um: float,
    return_mask: bool = False,
    settings: ConfluenceSettings = DEFAULT_SETTINGS,
) -> ConfluenceResult:
    """Fraction of the frame covered by cells (0..1), and on request the boolean mask.

    ``image`` is a 2-D phase-contrast frame, raw or flat-field corrected, uint8, uint16 or
    float; ``pixel_size_um`` its pixel size in the sample plane (um). The mask, when
    returned, has the frame's shape.

    Steps (Jaccard et al. 2014, with the halo handled by brightness): local contrast
    above a threshold marks textured pixels; of those, pixels brighter than the local
    background by ``halo_excess`` are halo, not cell; a closing joins cells across the
    bright seams where they meet; small enclosed gaps that are not halo-bright are filled
    (flat cytoplasm); specks are dropped.
    """
    if image.ndim != 2:
        raise ValueError(f"confluence needs a 2-D monochrome frame, got shape {image.shape}")
    if not pixel_size_um > 0:
        raise ValueError(f"pixel_size_um must be > 0, got {pixel_size_um}")
    work, factor = _to_work_grid(image, pixel_size_um, settings.work_pixel_um)
    px_um = pixel_size_um * factor
    contrast = local_contrast(work, sigma_px=settings.window_um / px_um)
    noise = noise_contrast(work)
    threshold = max(settings.contrast_threshold, settings.noise_margin * noise)
    textured = contrast > threshold
    background = background_level(work, ~textured, sigma_px=settings.background_um / px_um)
    # A black frame (lamp failed) has no background to compare with; it holds no cells either.
    excess = work / np.maximum(background, np.float32(1e-6)) - np.float32(1.0)
    if settings.halo == "dark":
        np.negative(excess, out=excess)
    halo = textured & (excess >= settings.halo_excess)
    cells = textured & ~halo
    cells = close_seams(cells, radius_px=settings.seam_um / px_um)
    cells = fill_flat_interiors(
        cells, excess, max_hole_px=settings.max_hole_um2 / px_um**2, halo_excess=settings.halo_excess
    )
    cells = drop_specks(cells, min_object_px=settings.min_object_um2 / px_um**2)
    fraction = float(np.count_nonzero(cells)) / cells.size
    mask = None
    if return_mask:
        mask = cells if factor == 1 else _to_frame_grid(cells, image.shape)
    return ConfluenceResult(
        fraction=fraction,
        mask=mask,
        method=METHOD,
        contrast_threshold=float(threshold),
        noise_contrast=float(noise),
        halo_fraction=float(np.count_nonzero(halo & ~cells)) / halo.size,
        work_pixel_um=px_um,
    )


def _to_work_grid(image: np.ndarray, pixel_size_um: float, work_pixel_um: float) -> tuple[np.ndarray, int]:
    """float32 frame binned by an integer factor to about ``work_pixel_um`` (area averaging)."""
    factor = max(1, int(work_pixel_um / pixel_size_um + 0.5))
    img = image.astype(np.float32, copy=False)
    if factor == 1:
        return img, 1
    h, w = img.shape
    hh, ww = h // factor, w // factor
    if hh < 8 or ww < 8:
        return img, 1
    return cv2.resize(img[: hh * factor, : ww * factor], (ww, hh), interpolation=cv2.INTER_AREA), factor


def _to_frame_grid(mask: np.ndarray, shape: tuple[int, ...]) -> np.ndarray:
    """The work-grid mask at the frame's size: interpolated and cut at one half, so outlines
    come out smooth rather than in blocks of the binning factor."""
    h, w = shape
    up = cv2.resize(mask.astype(np.float32), (w, h), interpolation=cv2.INTER_LINEAR)
    return up > 0.5


def local_contrast(image: np.ndarray, *, sigma_px: float) -> np.ndarray:
    """Local standard deviation over local mean in a Gaussian window of ``sigma_px`` (pixels)
    (Jaccard et al. 2014, PHANTAST): std^2 = G*(I^2) - (G*I)^2. Dimensionless."""
    mean = cv2.GaussianBlur(image, (0, 0), sigma_px, borderType=cv2.BORDER_REFLECT)
    mean_sq = cv2.GaussianBlur(image * image, (0, 0), sigma_px, borderType=cv2.BORDER_REFLECT)
    var = mean_sq - mean * mean
    np.maximum(var, 0.0, out=var)
    return np.sqrt(var) / np.maximum(mean, np.float32(1e-6))


def noise_contrast(image: np.ndarray, *, block_px: int = 16) -> float:
    """Relative sensor noise (std / mean) of a frame, from its finest scale.

    The optics blur over several pixels, so the second difference along rows,
    I[x-1] - 2 I[x] + I[x+1], holds little but sensor noise: for white noise of std s it
    has std sqrt(6)*s, and its mean absolute value is sqrt(2/pi) times that (Gaussian).
    It is averaged per block of ``block_px`` and the flattest blocks (5th percentile)
    speak for the frame, so cell edges and granules do not count as noise (the idea of
    estimating noise from the finest-scale detail is that of Donoho & Johnstone 1994,
    Biometrika 81:425-455).
    """
    d = np.abs(image[:, 2:] - 2.0 * image[:, 1:-1] + image[:, :-2])
    scale = 1.0 / (np.sqrt(6.0) * np.sqrt(2.0 / np.pi))
    h, w = d.shape[0] // block_px, d.shape[1] // block_px
    if h < 1 or w < 1:
        mean = float(np.mean(image))
        return float(np.mean(d)) * scale / mean if mean > 0 else 0.0
    size = (w, h)
    block_abs = cv2.resize(d[: h * block_px, : w * block_px], size, interpolation=cv2.INTER_AREA)
    block_mean = cv2.resize(image[: h * block_px, 1 : 1 + w * block_px], size, interpolation=cv2.INTER_AREA)
    rel = block_abs * scale / np.maximum(block_mean, 1e-6)
    return float(np.percentile(rel, 5))


def background_level(image: np.ndarray, background: np.ndarray, *, sigma_px: float) -> np.ndarray:
    """Smooth estimate of the empty-field brightness under every pixel from the pixels
    marked ``background`` only: normalised convolution (Knutsson & Westin 1993, CVPR).

    The estimate is smooth on the scale ``sigma_px``, so it is computed on a grid binned
    by about sigma/4 and interpolated back (a large Gaussian at full size costs far more).
    """
    h, w = image.shape
    weight = background.astype(np.float32)
    fallback = float(np.median(image[background])) if np.any(background) else float(np.median(image))
    step = max(1, int(sigma_px / 4.0))
    if step > 1 and h // step >= 4 and w // step >= 4:
        size = (w // step, h // step)
        num_small = cv2.resize(image * weight, size, interpolation=cv2.INTER_AREA)
        den_small = cv2.resize(weight, size, interpolation=cv2.INTER_AREA)
        sigma = sigma_px / step
    else:
        num_small, den_small, sigma = image * weight, weight, sigma_px
    num = cv2.GaussianBlur(num_small, (0, 0), sigma, borderType=cv2.BORDER_REFLECT)
    den = cv2.GaussianBlur(den_small, (0, 0), sigma, borderType=cv2.BORDER_REFLECT)
    level = np.where(den > 1e-3, num / np.maximum(den, np.float32(1e-6)), np.float32(fallback)).astype(np.float32)
    if level.shape != image.shape:
        level = cv2.resize(level, (w, h), interpolation=cv2.INTER_LINEAR)
    return level


def _disc(radius_px: float) -> np.ndarray:
    k = max(1, int(round(radius_px)))
    return cv2.getStructuringElement(cv2.MORPH_ELLIPSE, (2 * k + 1, 2 * k + 1))


def close_seams(mask: np.ndarray, *, radius_px: float) -> np.ndarray:
    """Morphological closing with a disc (Serra 1982, Image Analysis and Mathematical
    Morphology): joins regions across gaps narrower than about twice the radius (pixels)."""
    return cv2.morphologyEx(mask.astype(np.uint8), cv2.MORPH_CLOSE, _disc(radius_px)) > 0


def fill_flat_interiors(mask: np.ndarray, excess: np.ndarray, *, max_hole_px: float, halo_excess: float) -> np.ndarray:
    """Fill enclosed non-cell regions smaller than ``max_hole_px`` whose mean brightness
    excess over the background stays below ``halo_excess``: flat cytoplasm has little
    texture, while a gap between cells shows the bright halo of the cells around it."""
    n, labels, stats, _ = cv2.connectedComponentsWithStats((~mask).astype(np.uint8), connectivity=4)
    if n <= 1:
        return mask
    area = stats[:, cv2.CC_STAT_AREA]
    mean_excess = np.bincount(labels.ravel(), weights=excess.ravel(), minlength=n) / np.maximum(area, 1)
    fill = (area < max_hole_px) & (mean_excess < halo_excess)
    fill[0] = False
    return mask | fill[labels]


def drop_specks(mask: np.ndarray, *, min_object_px: float) -> np.ndarray:
    """Remove connected regions (8-connected) smaller than ``min_object_px`` pixels: debris, noise."""
    n, labels, stats, _ = cv2.connectedComponentsWithStats(mask.astype(np.uint8), connectivity=8)
    keep = stats[:, cv2.CC_STAT_AREA] >= min_object_px
    keep[0] = False
    return keep[labels]


def overlay(image: np.ndarray, mask: np.ndarray) -> np.ndarray:
    """8-bit BGR picture of the frame with the mask's outline drawn on it, for checking by eye."""
    img = image.astype(np.float32)
    lo, hi = np.percentile(img, (0.5, 99.5))
    gray = np.clip((img - lo) * (255.0 / max(hi - lo, 1e-6)), 0, 255).astype(np.uint8)
    bgr = cv2.cvtColor(gray, cv2.COLOR_GRAY2BGR)
    tint = bgr.copy()
    tint[mask] = (0.6 * tint[mask] + 0.4 * np.array([40, 200, 255])).astype(np.uint8)
    contours, _ = cv2.findContours(mask.astype(np.uint8), cv2.RETR_LIST, cv2.CHAIN_APPROX_NONE)
    cv2.drawContours(tint, contours, -1, (0, 160, 255), 1)
    return tint
