"""Confluence against the simulator's true cell masks and a real cell's phase map,
metamorphic checks, and the segmentation steps cross-checked against scikit-image's and
SciPy's reference implementations.

Both methods (``halo-rejection`` and the published ``jaccard-2014``) run on the same
frames. The accuracy grid (3 objectives x 3 wells x 5 times x in focus, slightly and
further out of focus x raw and flat-field corrected) uses wells and times other than
those the settings were chosen on. Errors are percentage points of coverage; the
per-case table is written to test-artifacts/confluence_errors.json, the comparison of
the two methods to test-artifacts/confluence_methods.json and a few mask overlays beside
them.
"""

from __future__ import annotations

import dataclasses
import json
import math
from pathlib import Path

import cv2
import numpy as np
import pytest
import skimage.data
import skimage.filters
import skimage.morphology

from daemon.culture.confluence import (
    COMPASS_STEPS,
    DEFAULT_METHOD,
    HALO_REJECTION,
    JACCARD_2014,
    METHOD_DESCRIPTIONS,
    METHODS,
    ConfluenceSettings,
    Jaccard2014Settings,
    background_level,
    close_seams,
    confluence,
    drop_specks,
    fill_flat_interiors,
    fill_holes,
    jaccard_halo_correction,
    kirsch_directions,
    local_contrast,
    majority_vote,
    noise_contrast,
    overlay,
)
from daemon.illumination.correction import Corrector
from drivers.sim.world import SimWorld
from tests.helpers import sim_profile

ARTIFACTS = Path(__file__).resolve().parent.parent / "test-artifacts"

# Objectives of budget phase-contrast scopes (common practice: 4x/0.10, 10x/0.25, 20x/0.40
# achromats); frame sizes keep each field a few cells across and the test fast.
OBJECTIVES = {
    "4x/0.10": (4.0, 0.10, (320, 240)),
    "10x/0.25": (10.0, 0.25, (480, 360)),
    "20x/0.40": (20.0, 0.40, (640, 480)),
}
WELLS = ("A3", "D6", "G9")
DAYS = (0.7, 2.2, 3.8, 5.2, 6.8)  # sparse (a few %) to confluent (~90 %)
# "Slightly out of focus": half the depth of field either side (twice the autofocus target
# of a quarter depth of field); the accuracy targets hold there. Both methods are also
# compared further out (1.5 depths of field, a focus that has drifted).
DEFOCUS_DOF = (0.0, -0.5, 0.5)
COMPARE_DEFOCUS_DOF = (*DEFOCUS_DOF, -1.5, 1.5)
FIELD_OFFSET_UM = (400.0, -300.0)  # off the well centre, where the settings were not chosen
EXPOSURE_MS = 20.0
MEDIAN_TARGET_PP = 5.0
MAX_TARGET_PP = 10.0
OVERLAY_CASES = {("10x/0.25", "D6", 2.2, 0.0), ("10x/0.25", "D6", 5.2, 0.0), ("4x/0.10", "G9", 3.8, 0.0), ("20x/0.40", "A3", 6.8, 0.5)}


def objective_world(name: str, **changes: object) -> SimWorld:
    magnification, na, (w, h) = OBJECTIVES[name]
    return SimWorld(sim_profile(w, h, **{"optics.magnification": magnification, "optics.numerical_aperture": na, **changes}))


def calibration(world: SimWorld) -> Corrector:
    """Dark (lamp off) and flat (the empty control well) frames, averaged, as a user takes them."""
    x, y = world.well_centre_um("H12")
    t = world.t0_s
    z = world.true_focus_z_um(x, y, t)
    dark = np.mean([world.render(x, y, z, t_s=t, exposure_ms=EXPOSURE_MS, lamp_level=0.0) for _ in range(4)], axis=0)
    flat = np.mean([world.render(x, y, z, t_s=t, exposure_ms=EXPOSURE_MS) for _ in range(4)], axis=0)
    return Corrector.from_frames(dark, flat)


def field(world: SimWorld, well: str) -> tuple[float, float]:
    x, y = world.well_centre_um(well)
    return x + FIELD_OFFSET_UM[0], y + FIELD_OFFSET_UM[1]


@dataclasses.dataclass(frozen=True)
class Case:
    method: str
    objective: str
    well: str
    day: float
    defocus_dof: float
    corrected: bool
    truth: float
    estimate: float

    @property
    def error_pp(self) -> float:
        return (self.estimate - self.truth) * 100.0


@pytest.fixture(scope="module")
def accuracy() -> list[Case]:
    cases: list[Case] = []
    ARTIFACTS.mkdir(exist_ok=True)
    for name in OBJECTIVES:
        world = objective_world(name)
        corrector = calibration(world)
        dof = world.profile.optics.depth_of_field_um
        for well in WELLS:
            x, y = field(world, well)
            for day in DAYS:
                t = world.t0_s + day * 86400.0
                z0 = world.true_focus_z_um(x, y, t)
                truth_mask = world.cell_mask(x, y, t)
                truth = float(truth_mask.mean())
                for k in COMPARE_DEFOCUS_DOF:
                    raw = world.render(x, y, z0 + k * dof, t_s=t, exposure_ms=EXPOSURE_MS)
                    for corrected, image in ((False, raw), (True, corrector.apply(raw))):
                        for method in METHODS:
                            result = confluence(image, pixel_size_um=world.pixel_um, return_mask=True, method=method)
                            cases.append(Case(method, name, well, day, k, corrected, truth, result.fraction))
                            if (name, well, day, k) in OVERLAY_CASES and not corrected:
                                tag = f"{method}-{name.split('/')[0]}-{well}-day{day}-dz{k:+.1f}"
                                # Left: estimate; right: the simulator's true mask, both over the frame.
                                pair = np.hstack([overlay(image, result.mask), overlay(image, truth_mask)])
                                cv2.imwrite(str(ARTIFACTS / f"confluence-{tag}.png"), pair)
    (ARTIFACTS / "confluence_errors.json").write_text(json.dumps(
        [{**dataclasses.asdict(c), "error_pp": round(c.error_pp, 2)} for c in cases], indent=1,
    ))
    return cases


def summary(cases: list[Case]) -> str:
    err = np.abs([c.error_pp for c in cases])
    return f"n={err.size} median {np.median(err):.2f} pp, max {np.max(err):.2f} pp"


def targeted(cases: list[Case], method: str = DEFAULT_METHOD) -> list[Case]:
    """The cases of one method within the defocus the accuracy targets are for."""
    return [c for c in cases if c.method == method and c.defocus_dof in DEFOCUS_DOF]


def test_error_against_ground_truth_coverage(accuracy: list[Case]) -> None:
    for method in METHODS:
        mine = [c for c in accuracy if c.method == method]
        print(f"\n{method}{' (default)' if method == DEFAULT_METHOD else ''}: within targets' defocus", summary(targeted(accuracy, method)))
        for name in OBJECTIVES:
            for k in COMPARE_DEFOCUS_DOF:
                print(f"  {name} dz {k:+.1f} DOF:", summary([c for c in mine if c.objective == name and c.defocus_dof == k]))
        print("  raw:", summary([c for c in mine if not c.corrected]), "| corrected:", summary([c for c in mine if c.corrected]))
    cases = targeted(accuracy)
    errors = np.abs([c.error_pp for c in cases])
    truths = [c.truth for c in cases]
    assert min(truths) < 0.1 and max(truths) > 0.8, "the grid must span sparse to confluent fields"
    worst = max(cases, key=lambda c: abs(c.error_pp))
    assert np.median(errors) <= MEDIAN_TARGET_PP, summary(cases)
    assert np.max(errors) <= MAX_TARGET_PP, f"{summary(cases)}; worst {worst}"


def test_raw_and_corrected_frames_agree(accuracy: list[Case]) -> None:
    cases = targeted(accuracy)
    raw = {(c.objective, c.well, c.day, c.defocus_dof): c.estimate for c in cases if not c.corrected}
    cor = {(c.objective, c.well, c.day, c.defocus_dof): c.estimate for c in cases if c.corrected}
    diff_pp = np.abs([100.0 * (raw[k] - cor[k]) for k in raw])
    print(f"\nraw vs corrected: median {np.median(diff_pp):.2f} pp, max {np.max(diff_pp):.2f} pp")
    # Flat-field correction removes the falloff and the black level; on a typical frame the
    # figure hardly moves, and it never moves by more than the accuracy target.
    assert np.median(diff_pp) <= 2.0
    assert np.max(diff_pp) <= MAX_TARGET_PP


@pytest.mark.parametrize("method", METHODS)
def test_empty_field_reads_near_zero(method: str) -> None:
    for name in OBJECTIVES:
        world = objective_world(name)
        x, y = world.well_centre_um("H12")  # the profile's empty control well
        t = world.t0_s + 5 * 86400.0
        z = world.true_focus_z_um(x, y, t)
        corrector = calibration(world)
        # Normal exposure, and a short one at high gain (noisy) where noise must not read as cells.
        for exposure_ms, gain_db in ((EXPOSURE_MS, 0.0), (1.0, 20.0)):
            raw = world.render(x, y, z, t_s=t, exposure_ms=exposure_ms, gain_db=gain_db)
            for image in (raw, corrector.apply(raw)):
                assert confluence(image, pixel_size_um=world.pixel_um, method=method).fraction < 0.01


@pytest.mark.parametrize("method", METHODS)
def test_uniform_brightness_change_does_not_move_the_figure(method: str) -> None:
    world = objective_world("10x/0.25")
    x, y = field(world, "D6")
    t = world.t0_s + 3.8 * 86400.0
    z = world.true_focus_z_um(x, y, t)
    corrected = calibration(world).apply(world.render(x, y, z, t_s=t, exposure_ms=EXPOSURE_MS))
    base = confluence(corrected, pixel_size_um=world.pixel_um, method=method).fraction
    assert 0.2 < base < 0.8
    # The same dark-subtracted frame scaled (as a change of exposure, lamp level or gain
    # would scale it): local contrast and brightness over background are ratios, so the
    # figure does not move.
    for factor in (0.4, 0.7, 1.5, 3.0):
        assert confluence(corrected * np.float32(factor), pixel_size_um=world.pixel_um, method=method).fraction == pytest.approx(base, abs=0.002)
    # New frames of the same field at other exposures, lamp levels and gains (new noise),
    # raw and dark-subtracted. Kept below saturation: clipped halos are not a uniform change.
    # In a raw frame the camera's black level stays, so the grey levels do not scale
    # exactly: the halo-rejection method's decisions hold up to that; the published
    # method's fixed threshold on std / mean assumes no offset and moves more at short
    # exposures (measured: up to 9 pp at 5 ms), so it wants dark-subtracted frames.
    corrector = calibration(world)
    spreads = {"raw": 0.0, "corrected": 0.0}
    for well, day in (("D6", 3.8), ("A3", 5.2)):
        x, y = field(world, well)
        t = world.t0_s + day * 86400.0
        z = world.true_focus_z_um(x, y, t)
        ref_raw = world.render(x, y, z, t_s=t, exposure_ms=10.0)
        ref = {"raw": confluence(ref_raw, pixel_size_um=world.pixel_um, method=method).fraction,
               "corrected": confluence(corrector.apply(ref_raw), pixel_size_um=world.pixel_um, method=method).fraction}
        for exposure_ms, gain_db, lamp in ((5.0, 0.0, 1.0), (7.0, 0.0, 1.0), (14.0, 0.0, 1.0), (14.0, 0.0, 0.5), (7.0, 3.0, 1.0)):
            raw = world.render(x, y, z, t_s=t, exposure_ms=exposure_ms, gain_db=gain_db, lamp_level=lamp)
            assert np.mean(raw >= 255) < 0.005
            for kind, image in (("raw", raw), ("corrected", corrector.apply(raw))):
                spread = abs(confluence(image, pixel_size_um=world.pixel_um, method=method).fraction - ref[kind])
                spreads[kind] = max(spreads[kind], spread)
    print(f"\n{method}: largest change with exposure, lamp and gain: raw {spreads['raw'] * 100:.1f} pp, corrected {spreads['corrected'] * 100:.1f} pp")
    assert spreads["corrected"] <= 0.035
    if method == HALO_REJECTION:
        assert spreads["raw"] <= 0.035
    else:
        assert spreads["raw"] <= 0.12


@pytest.mark.parametrize("method", METHODS)
def test_more_cells_never_read_lower(method: str) -> None:
    world = objective_world("10x/0.25")
    x, y = field(world, "A3")
    truths, estimates = [], []
    for day in np.arange(0.5, 8.0, 0.75):
        t = world.t0_s + day * 86400.0
        z = world.true_focus_z_um(x, y, t)
        truths.append(world.true_confluence(x, y, t))
        estimates.append(confluence(world.render(x, y, z, t_s=t, exposure_ms=EXPOSURE_MS), pixel_size_um=world.pixel_um, method=method).fraction)
    truths_a, est_a = np.array(truths), np.array(estimates)
    grows = np.diff(truths_a) > 0.0
    assert grows.sum() >= 6, truths
    assert np.all(np.diff(est_a)[grows] >= 0.0), list(zip(truths_a.round(3), est_a.round(3)))


def test_halo_rejection_is_what_keeps_the_figure_right() -> None:
    """Ablation: local contrast alone (no halo rejection) counts the halo as cells."""
    world = objective_world("10x/0.25")
    no_halo = ConfluenceSettings(halo_excess=np.inf)
    errs_full, errs_plain = [], []
    for well in WELLS:
        x, y = field(world, well)
        t = world.t0_s + 2.2 * 86400.0
        z = world.true_focus_z_um(x, y, t)
        raw = world.render(x, y, z, t_s=t, exposure_ms=EXPOSURE_MS)
        truth = world.true_confluence(x, y, t)
        errs_full.append(confluence(raw, pixel_size_um=world.pixel_um).fraction - truth)
        errs_plain.append(confluence(raw, pixel_size_um=world.pixel_um, settings=no_halo).fraction - truth)
    assert np.mean(errs_plain) > 0.05  # the halo reads as extra coverage
    assert np.mean(np.abs(errs_full)) < 0.5 * np.mean(np.abs(errs_plain))


@pytest.mark.parametrize("method", METHODS)
def test_sixteen_bit_frames(method: str) -> None:
    world = objective_world("10x/0.25", **{"camera.bit_depth": 12})
    x, y = field(world, "G9")
    for day in (2.2, 5.2):
        t = world.t0_s + day * 86400.0
        raw = world.render(x, y, world.true_focus_z_um(x, y, t), t_s=t, exposure_ms=EXPOSURE_MS)
        assert raw.dtype == np.uint16
        est = confluence(raw, pixel_size_um=world.pixel_um, method=method).fraction
        assert abs(est - world.true_confluence(x, y, t)) <= MAX_TARGET_PP / 100.0


def test_mask_has_frame_shape_and_matches_fraction() -> None:
    world = objective_world("10x/0.25")
    x, y = field(world, "D6")
    t = world.t0_s + 3.8 * 86400.0
    raw = world.render(x, y, world.true_focus_z_um(x, y, t), t_s=t, exposure_ms=EXPOSURE_MS)
    odd = raw[:357, :479]  # not a multiple of the binning factor
    result = confluence(odd, pixel_size_um=world.pixel_um, return_mask=True)
    assert result.mask is not None and result.mask.shape == odd.shape and result.mask.dtype == bool
    assert result.mask.mean() == pytest.approx(result.fraction, abs=0.01)
    assert confluence(odd, pixel_size_um=world.pixel_um).mask is None
    assert set(result.to_dict()) >= {"fraction", "method", "method_description", "contrast_threshold"} and "mask" not in result.to_dict()
    assert result.method == DEFAULT_METHOD and result.to_dict()["method_description"] == METHOD_DESCRIPTIONS[DEFAULT_METHOD]


def test_jaccard_halo_correction_is_what_keeps_its_figure_right() -> None:
    """Ablation of the published method: the local-contrast threshold alone counts the halo."""
    world = objective_world("10x/0.25")
    plain = Jaccard2014Settings(halo_correction=False)
    errs_full, errs_plain = [], []
    for well in WELLS:
        x, y = field(world, well)
        t = world.t0_s + 2.2 * 86400.0
        raw = world.render(x, y, world.true_focus_z_um(x, y, t), t_s=t, exposure_ms=EXPOSURE_MS)
        truth = world.true_confluence(x, y, t)
        errs_full.append(confluence(raw, pixel_size_um=world.pixel_um, method=JACCARD_2014).fraction - truth)
        errs_plain.append(confluence(raw, pixel_size_um=world.pixel_um, settings=plain).fraction - truth)
    # Its threshold on texture leaves out most of the smooth halo already; the rest
    # (measured: 1.5 to 3.6 pp here) is what the correction takes away.
    assert np.mean(errs_plain) > 0.015
    assert np.mean(np.abs(errs_full)) < 0.5 * np.mean(np.abs(errs_plain))


def test_method_choice() -> None:
    img = np.full((120, 160), 100, np.uint8)
    assert confluence(img, pixel_size_um=0.375).method == DEFAULT_METHOD
    assert confluence(img, pixel_size_um=0.375, settings=Jaccard2014Settings()).method == JACCARD_2014
    assert confluence(img, pixel_size_um=0.375, settings=ConfluenceSettings()).method == HALO_REJECTION
    with pytest.raises(ValueError, match="unknown confluence method"):
        confluence(img, pixel_size_um=0.375, method="otsu")
    with pytest.raises(ValueError):
        confluence(img, pixel_size_um=0.375, method=HALO_REJECTION, settings=Jaccard2014Settings())


def test_bad_input_is_refused() -> None:
    with pytest.raises(ValueError):
        confluence(np.zeros((10, 10, 3), np.uint8), pixel_size_um=0.5)
    with pytest.raises(ValueError):
        confluence(np.zeros((100, 100), np.uint8), pixel_size_um=0.0)
    # A black frame (lamp failed) is not cells.
    assert confluence(np.zeros((240, 320), np.uint8), pixel_size_um=0.375).fraction == 0.0


# -- the segmentation steps against scikit-image, on the image it ships --------------------------

@pytest.fixture(scope="module")
def cell_image() -> np.ndarray:
    # skimage.data.cell(): a cell in saline (quantitative phase image), bundled with scikit-image.
    return skimage.data.cell().astype(np.float32)


def _interior(a: np.ndarray, margin: int) -> np.ndarray:
    return a[margin:-margin, margin:-margin]


def test_local_contrast_matches_scikit_image_gaussian(cell_image: np.ndarray) -> None:
    sigma = 3.0
    ours = local_contrast(cell_image, sigma_px=sigma)
    # Reference: skimage.filters.gaussian (scipy.ndimage.gaussian_filter, truncate 4 sigma).
    mean = skimage.filters.gaussian(cell_image.astype(np.float64), sigma=sigma, mode="reflect", preserve_range=True, truncate=4.0)
    mean_sq = skimage.filters.gaussian(cell_image.astype(np.float64) ** 2, sigma=sigma, mode="reflect", preserve_range=True, truncate=4.0)
    ref = np.sqrt(np.maximum(mean_sq - mean**2, 0.0)) / mean
    np.testing.assert_allclose(_interior(ours, 13), _interior(ref, 13), rtol=2e-3, atol=2e-4)


def test_background_level_matches_normalised_convolution(cell_image: np.ndarray) -> None:
    textured = local_contrast(cell_image, sigma_px=3.0) > 0.1
    ours = background_level(cell_image, ~textured, sigma_px=40.0)
    w = (~textured).astype(np.float64)
    num = skimage.filters.gaussian(cell_image * w, sigma=40.0, mode="reflect", preserve_range=True)
    den = skimage.filters.gaussian(w, sigma=40.0, mode="reflect", preserve_range=True)
    ref = num / den
    # Ours is computed on a binned grid (smooth on the scale sigma): within 1 % away from the border.
    np.testing.assert_allclose(_interior(ours, 40), _interior(ref, 40), rtol=0.01)


def test_morphology_steps_match_scikit_image(cell_image: np.ndarray) -> None:
    mask = local_contrast(cell_image, sigma_px=2.0) > 0.08
    assert 0.01 < mask.mean() < 0.5 and np.any(~mask)
    # Closing: skimage.morphology.closing with the same disc footprint.
    radius = 3.0
    footprint = cv2.getStructuringElement(cv2.MORPH_ELLIPSE, (7, 7)).astype(bool)
    ref_closed = skimage.morphology.closing(mask, footprint)
    np.testing.assert_array_equal(_interior(close_seams(mask, radius_px=radius), 4), _interior(ref_closed, 4))
    # Hole filling without the brightness condition is skimage.morphology.remove_small_holes
    # (4-connected holes; ours fills area < 200, skimage fills area <= max_size).
    ours_filled = fill_flat_interiors(mask, np.zeros(mask.shape, np.float32), max_hole_px=200, halo_excess=1.0)
    np.testing.assert_array_equal(ours_filled, skimage.morphology.remove_small_holes(mask, max_size=199, connectivity=1))
    # Speck removal is skimage.morphology.remove_small_objects with 8-connectivity.
    ours_clean = drop_specks(mask, min_object_px=50)
    np.testing.assert_array_equal(ours_clean, skimage.morphology.remove_small_objects(mask, max_size=49, connectivity=2))


def test_noise_estimate_recovers_added_noise(cell_image: np.ndarray) -> None:
    rng = np.random.default_rng(5)
    sigma_dn = 6.0
    # The image's own finest-scale detail reads as about 0.2 DN, so the added noise dominates.
    assert noise_contrast(cell_image) * float(np.mean(cell_image)) < 0.5
    noisy = cell_image + 60.0 + rng.normal(0.0, sigma_dn, cell_image.shape).astype(np.float32)
    ours_dn = noise_contrast(noisy) * float(np.mean(noisy))
    # Taken from the flattest blocks it reads somewhat low (a lower percentile of block
    # estimates); it only keeps the contrast threshold above noise.
    assert 0.8 * sigma_dn <= ours_dn <= 1.05 * sigma_dn


# -- the published method's steps against their definitions and reference libraries ------------

def _kirsch_reference(image: np.ndarray) -> np.ndarray:
    """Kirsch (1971) compass kernels written out as Kirsch wrote them (5 on three
    neighbours, -3 on the rest), correlated with scipy.ndimage.correlate, strongest wins."""
    import scipy.ndimage

    east = np.array([[-3, -3, 5], [-3, 0, 5], [-3, -3, 5]], np.float64)
    north_east = np.array([[-3, 5, 5], [-3, 0, 5], [-3, -3, -3]], np.float64)
    kernels = []
    for d in range(8):
        base = east if d % 2 == 0 else north_east
        kernels.append(np.rot90(base, k=d // 2))  # rot90 turns counter-clockwise: E, N, W, S
    responses = np.stack([scipy.ndimage.correlate(image.astype(np.float64), k, mode="nearest") for k in kernels])
    return np.argmax(responses, axis=0)


def test_kirsch_directions_match_the_kernels(cell_image: np.ndarray) -> None:
    img = cell_image[:200, :200]
    ours = kirsch_directions(img)
    ref = _kirsch_reference(img)
    # Ties (flat patches, equal sums) may go either way; elsewhere the winner is the same.
    assert np.mean(ours == ref) > 0.995
    # A ramp rising to the east (+x) points east; rising to the north (-row), north (away
    # from the frame's edge, where the replicated border makes ties).
    ramp = np.tile(np.arange(32, dtype=np.float32), (32, 1))
    assert np.all(_interior(kirsch_directions(ramp), 1) == 0) and tuple(COMPASS_STEPS[0]) == (0, 1)
    assert np.all(_interior(kirsch_directions(ramp.T[::-1].copy()), 1) == 2) and tuple(COMPASS_STEPS[2]) == (-1, 0)


def test_majority_vote_matches_a_direct_count() -> None:
    import scipy.ndimage

    rng = np.random.default_rng(11)
    mask = rng.random((60, 80)) < 0.45
    # One pass by definition: set where at least 5 of the 3 x 3 neighbourhood are set
    # (outside counts as unset), counted with scipy.ndimage.generic_filter.
    votes = scipy.ndimage.generic_filter(mask.astype(np.uint8), np.sum, size=3, mode="constant", cval=0)
    one_pass = votes >= 5
    neighbours = scipy.ndimage.generic_filter(one_pass.astype(np.uint8), np.sum, size=3, mode="constant", cval=0) - one_pass
    np.testing.assert_array_equal(majority_vote(mask, passes=1), one_pass & (neighbours > 0))
    # Repeated, it settles: another pass changes nothing.
    settled = majority_vote(mask, passes=50)
    np.testing.assert_array_equal(majority_vote(settled, passes=1), settled)


def test_fill_holes_matches_scikit_image(cell_image: np.ndarray) -> None:
    mask = local_contrast(cell_image, sigma_px=2.0) > 0.08
    np.testing.assert_array_equal(fill_holes(mask, max_hole_px=150), skimage.morphology.remove_small_holes(mask, max_size=149, connectivity=1))


def test_halo_correction_stops_at_the_crest_of_the_halo() -> None:
    """A dark disc (radius 20 px) in a bright halo peaking at radius 22 px that fades out
    by 30 px, as positive phase contrast draws a cell: the thresholded mask takes in the
    whole halo; the correction shrinks it back to the crest (Jaccard et al. 2014, Fig. S1 D)."""
    yy, xx = np.mgrid[0:120, 0:120]
    r = np.hypot(yy - 60.0, xx - 60.0)
    image = np.where(r < 20, 60.0, 100.0 + 60.0 * np.exp(-0.5 * ((r - 22.0) / 3.0) ** 2)).astype(np.float32)
    mask = r < 30
    corrected = jaccard_halo_correction(mask, kirsch_directions(image))
    radius = math.sqrt(corrected.sum() / math.pi)
    assert 21.0 <= radius <= 23.5, radius
    # In a flat image every direction ties (east wins) and the shrinking would run right
    # through the object; the method's guard stops it once 70 % of the object is gone.
    flat = jaccard_halo_correction(mask, kirsch_directions(np.full(image.shape, 100.0, np.float32)))
    assert 0.25 <= flat.sum() / mask.sum() <= 0.32


# -- a real phase object: skimage.data.cell() through the simulated phase-contrast optics --------

# skimage.data.cell(): a cell floating in saline, a quantitative phase image from a digital
# hologram, 0.107 um per pixel (scikit-image's documentation of the image; Mueller et al.
# 2018, Optics Express 26:10729). Its grey levels are taken as phase above the median
# (the background) and scaled so that the cell's peak is PEAK_RAD; the reconstruction's
# own dark rim round the cell (below the background) is set to zero phase, since the
# medium there is not optically thinner than elsewhere.
CELL_PIXEL_UM = 0.107
PEAKS_RAD = (0.8, 1.6)  # about a flat cytoplasm's and a nucleus' phase at 550 nm (from memory)
# What the phase map itself marks as cell: phase above 20 % of the peak. The background's
# banding stays below 14 % of the peak (checked in the fixture), so the mask is the cell.
CELL_PHASE_FRACTION = 0.2
REAL_OBJECTIVES = ("10x/0.25", "20x/0.40")
REAL_DEFOCUS_DOF = (0.0, -0.5, 0.5)
REAL_PHOTONS = 5000.0  # electrons per pixel of empty field: a 20 ms exposure of the simulated camera
PAD_UM = 60.0  # empty medium round the image, beyond the reach of halo and defocus blur here


def cell_phase(peak_rad: float) -> np.ndarray:
    raw = skimage.data.cell().astype(np.float64)
    phi = np.clip(raw - np.median(raw), 0.0, None)
    return phi * (peak_rad / np.percentile(phi, 99.9))


@dataclasses.dataclass
class RealCell:
    objective: str
    peak_rad: float
    stretch: float
    pixel_um: float
    dof_um: float
    background: float  # empty-field intensity
    phase: np.ndarray  # on the camera grid
    imager: object
    spectrum: np.ndarray
    pad: int

    @property
    def truth(self) -> np.ndarray:
        return self.phase > CELL_PHASE_FRACTION * self.peak_rad

    def image(self, dz_um: float) -> np.ndarray:
        p = self.pad
        return self.imager.image(self.spectrum, dz_um)[p:-p, p:-p]  # type: ignore[attr-defined]

    def frame(self, dz_um: float, seed: int) -> np.ndarray:
        """The image as the camera counts it: photon (shot) noise, REAL_PHOTONS on empty field."""
        scale = REAL_PHOTONS / self.background
        return np.random.default_rng(seed).poisson(self.image(dz_um) * scale).astype(np.float32)

    def bands(self) -> tuple[np.ndarray, np.ndarray]:
        """Distance (um) outside and inside the phase map's cell outline, per pixel."""
        import scipy.ndimage

        return (scipy.ndimage.distance_transform_edt(~self.truth) * self.pixel_um,
                scipy.ndimage.distance_transform_edt(self.truth) * self.pixel_um)


def real_cell(objective: str, peak_rad: float, stretch: float = 1.0) -> RealCell:
    """The phase map on the camera grid of ``objective`` (area-averaged, or interpolated
    when ``stretch`` makes it coarser than the camera), imaged by the simulator's optics."""
    from drivers.sim.optics import PhaseContrastImager

    world = objective_world(objective)
    px = world.pixel_um
    phi = cell_phase(peak_rad)
    size = (round(phi.shape[1] * CELL_PIXEL_UM * stretch / px), round(phi.shape[0] * CELL_PIXEL_UM * stretch / px))
    shrink = CELL_PIXEL_UM * stretch < px
    phase = cv2.resize(phi.astype(np.float32), size, interpolation=cv2.INTER_AREA if shrink else cv2.INTER_CUBIC)
    pad = math.ceil(PAD_UM / px)
    padded = np.pad(phase, pad)
    imager = PhaseContrastImager(padded.shape, px, world.optics, keep_defocus=1)
    spectrum = imager.spectrum(np.exp(1j * padded).astype(np.complex64))
    return RealCell(objective, peak_rad, stretch, px, world.profile.optics.depth_of_field_um,
                    world.background_intensity, phase, imager, spectrum, pad)


@pytest.fixture(scope="module")
def real_cells() -> dict[tuple[str, float], RealCell]:
    cells = {(o, p): real_cell(o, p) for o in REAL_OBJECTIVES for p in PEAKS_RAD}
    for cell in cells.values():
        n, _ = cv2.connectedComponents(cell.truth.astype(np.uint8), connectivity=8)
        assert n == 2, "the phase threshold must mark one cell and no background"
        assert 0.02 < cell.truth.mean() < 0.06
    return cells


def test_real_cell_is_dark_with_a_bright_halo_at_its_border(real_cells: dict[tuple[str, float], RealCell]) -> None:
    # Positive phase contrast shows a cell darker than the background, ringed by a bright
    # halo just outside its border (Zernike 1942, Physica 9:686-698; Yin, Kanade & Chen
    # 2012, Medical Image Analysis, "Understanding the phase contrast optics to restore
    # artifact-free microscopy images for segmentation": halo and shade-off artefacts).
    for (objective, peak), cell in real_cells.items():
        image = cell.image(0.0)
        outside, inside = cell.bands()
        halo = float(image[(outside > 0) & (outside <= 1.5)].mean()) / cell.background
        interior = float(image[inside > 2.0].mean()) / cell.background
        print(f"\n{objective}, peak {peak} rad: halo {halo:.2f} x background, interior {interior:.2f} x")
        assert halo > 1.15
        assert interior < 0.9


def test_real_cell_shows_shade_off_inside_a_large_flat_region() -> None:
    # Shade-off: the inside of a large object of even phase reads close to the background,
    # its contrast left at the edges (Yin, Kanade & Chen 2012, as above; the phase ring
    # passes the object's lowest spatial frequencies along with the direct light). The
    # same cell stretched three-fold (about 40 um across, a large spread cell), 20x/0.40,
    # phase weak enough (0.5 rad) for contrast to follow phase.
    cell = real_cell("20x/0.40", 0.5, stretch=3.0)
    image = cell.image(0.0)
    _, inside = cell.bands()
    radius_um = float(inside.max())
    per_rad = (cell.background - image) / cell.background / np.maximum(cell.phase, 1e-6)
    rim = float(per_rad[(inside > 0.05 * radius_um) & (inside < 0.25 * radius_um)].mean())
    core = float(per_rad[inside > 0.75 * radius_um].mean())
    print(f"\nstretched cell (radius {radius_um:.0f} um): contrast per radian {rim:.2f} near the edge, {core:.2f} in the middle")
    assert rim > 0.2
    assert abs(core) < 0.25 * rim
    # At its real size (radius about 7 um) the same optics keep much more of the middle's contrast.
    small = real_cell("20x/0.40", 0.5)
    small_image = small.image(0.0)
    _, small_inside = small.bands()
    small_per_rad = (small.background - small_image) / small.background / np.maximum(small.phase, 1e-6)
    small_core = float(small_per_rad[small_inside > 0.75 * float(small_inside.max())].mean())
    assert small_core > 2.0 * abs(core)


def test_real_cell_contrast_reverses_with_defocus(real_cells: dict[tuple[str, float], RealCell]) -> None:
    # Common practice (what every user of a phase-contrast scope sees while focusing): the
    # dark cell edge of the in-focus image turns bright once the focus is off by a depth of
    # field or two, on either side.
    for objective in REAL_OBJECTIVES:
        cell = real_cells[(objective, 1.6)]
        _, inside = cell.bands()
        band = (inside > 0) & (inside <= 1.5)
        levels = {k: float(cell.image(k * cell.dof_um)[band].mean()) / cell.background for k in (0.0, -1.5, 1.5)}
        print(f"\n{objective}: cell edge at 0 / -1.5 / +1.5 DOF: " + ", ".join(f"{v:.2f}" for v in levels.values()) + " x background")
        assert levels[0.0] < 0.9
        assert levels[-1.5] > 1.05 and levels[1.5] > 1.05


@pytest.fixture(scope="module")
def real_cell_errors(real_cells: dict[tuple[str, float], RealCell]) -> list[dict[str, object]]:
    rows = []
    ARTIFACTS.mkdir(exist_ok=True)
    for (objective, peak), cell in real_cells.items():
        truth = float(cell.truth.mean())
        for i, k in enumerate(REAL_DEFOCUS_DOF):
            frame = cell.frame(k * cell.dof_um, seed=i)
            for method in METHODS:
                result = confluence(frame, pixel_size_um=cell.pixel_um, return_mask=True, method=method)
                rows.append({"method": method, "objective": objective, "peak_rad": peak, "defocus_dof": k,
                             "truth": truth, "estimate": result.fraction,
                             "error_pp": 100.0 * (result.fraction - truth), "area_ratio": result.fraction / truth})
                if k == 0.0:
                    pair = np.hstack([overlay(frame, result.mask), overlay(frame, cell.truth)])
                    cv2.imwrite(str(ARTIFACTS / f"confluence-real-cell-{method}-{objective.split('/')[0]}-{peak}rad.png"), pair)
    return rows


def test_confluence_of_the_real_cell_against_its_phase_map(real_cell_errors: list[dict[str, object]]) -> None:
    for method in METHODS:
        mine = [r for r in real_cell_errors if r["method"] == method]
        ratios = ", ".join(f"{r['objective'].split('/')[0]} {r['peak_rad']} rad {r['defocus_dof']:+.1f}: x{r['area_ratio']:.2f}" for r in mine)  # type: ignore[union-attr]
        print(f"\n{method}: area found / phase-map area: {ratios}")
    for row in real_cell_errors:
        ratio = float(row["area_ratio"])  # type: ignore[arg-type]
        # Both find the cell's area to within 30 % (measured: halo-rejection 0.95-1.13,
        # jaccard-2014 1.01-1.20), except that the halo-rejection method takes in parts of
        # the strong halo of a thick cell at 20x (a known weakness, measured: up to 1.9
        # times the area, 3 pp of this frame).
        strong_halo = row["objective"] == "20x/0.40" and row["peak_rad"] == 1.6
        high = 2.5 if row["method"] == HALO_REJECTION and strong_halo else 1.3
        assert 0.75 <= ratio <= high, row
        assert abs(float(row["error_pp"])) <= MAX_TARGET_PP  # type: ignore[arg-type]


def test_default_method_is_the_more_accurate(accuracy: list[Case], real_cell_errors: list[dict[str, object]]) -> None:
    """Both methods on every simulated field (objectives, densities, in focus to 1.5 depths
    of field off, raw and corrected) and on the real cell. The default is the one with the
    smaller RMS error over the simulated fields: those are the conditions of a time-lapse
    (focus drifts after the door opens; raw frames before calibration). The real cell's
    errors are reported beside them; there the published method does better."""
    table = {}
    for method in METHODS:
        sim = np.array([c.error_pp for c in accuracy if c.method == method])
        in_range = np.array([c.error_pp for c in targeted(accuracy, method)])
        real = np.array([float(r["area_ratio"]) - 1.0 for r in real_cell_errors if r["method"] == method])  # type: ignore[arg-type]
        table[method] = {
            "simulated_rms_pp": float(np.sqrt(np.mean(sim**2))), "simulated_median_abs_pp": float(np.median(np.abs(sim))),
            "simulated_max_abs_pp": float(np.max(np.abs(sim))), "simulated_mean_pp": float(np.mean(sim)),
            "within_half_dof_rms_pp": float(np.sqrt(np.mean(in_range**2))), "within_half_dof_max_abs_pp": float(np.max(np.abs(in_range))),
            "real_cell_rms_area_error": float(np.sqrt(np.mean(real**2))), "real_cell_max_area_error": float(np.max(np.abs(real))),
        }
        print(f"\n{method}: " + ", ".join(f"{k} {v:.3f}" for k, v in table[method].items()))
    (ARTIFACTS / "confluence_methods.json").write_text(json.dumps({"default": DEFAULT_METHOD, "methods": table}, indent=1))
    other = next(m for m in METHODS if m != DEFAULT_METHOD)
    assert table[DEFAULT_METHOD]["simulated_rms_pp"] <= table[other]["simulated_rms_pp"]
