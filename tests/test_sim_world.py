"""The simulated world: culture, growth, plate geometry, focal plane, illumination, determinism,
what a frame looks like, and the simulated camera on top of it."""

from __future__ import annotations

import asyncio
import math
from pathlib import Path

import cv2
import numpy as np
import pytest

from drivers.base import Camera, CameraError, Position
from drivers.clock import ScaledClock
from drivers.sim.camera import SimCamera
from drivers.sim.culture import logistic_coverage
from drivers.sim.illumination import cos4_vignetting
from drivers.sim.world import SimWorld
from tests.helpers import sim_profile

ARTIFACTS = Path(__file__).resolve().parent.parent / "test-artifacts"
HOUR = 3600.0


@pytest.fixture(scope="module")
def world() -> SimWorld:
    return SimWorld(sim_profile(320, 240))


def busy_field(world: SimWorld, t_h: float, lo: float = 0.15, hi: float = 0.6) -> tuple[float, float]:
    """A field in well B3 whose true confluence at t_h lies in [lo, hi] (searched deterministically)."""
    cx, cy = world.well_centre_um("B3")
    t = world.t0_s + t_h * HOUR
    for k in range(60):
        x, y = cx + 150.0 * (k % 8 - 4), cy + 150.0 * (k // 8 - 4)
        if lo <= world.true_confluence(x, y, t) <= hi:
            return x, y
    raise AssertionError("no field with cells found in B3")


# -- determinism ---------------------------------------------------------------------------


def test_same_seed_gives_identical_frames_and_another_seed_another_culture() -> None:
    a, b = SimWorld(sim_profile(160, 120)), SimWorld(sim_profile(160, 120))
    other = SimWorld(sim_profile(160, 120, **{"sim.seed": 7}))
    x, y = a.well_centre_um("C5")
    t = a.t0_s + 60 * HOUR
    z = a.true_focus_z_um(x, y, t)
    frames_a = [a.render(x, y, z + dz, t_s=t, exposure_ms=20.0) for dz in (0.0, 0.0, 4.0)]
    frames_b = [b.render(x, y, z + dz, t_s=t, exposure_ms=20.0) for dz in (0.0, 0.0, 4.0)]
    for fa, fb in zip(frames_a, frames_b):
        assert np.array_equal(fa, fb)
    assert not np.array_equal(frames_a[0], frames_a[1])  # each frame has its own noise
    assert a.frame_counter == 3
    assert np.array_equal(a.cell_mask(x, y, t), b.cell_mask(x, y, t))
    assert not np.array_equal(a.cell_mask(x, y, t), other.cell_mask(x, y, t))
    assert a.cell_mask(x, y, t).any() and other.cell_mask(x, y, t).any()


def test_fields_are_generated_lazily_from_a_few_tiles(world: SimWorld) -> None:
    x, y = world.well_centre_um("D7")
    world.cell_mask(x, y, world.t0_s + 10 * HOUR)
    # A whole 96-well plate has millions of cell sites; one field needs only the tiles under it.
    assert len(world.culture._tiles) < 200
    sites_per_well = math.pi * world.plate.well_radius_um**2 * world.culture.site_density_per_um2
    assert sites_per_well * world.plate.n_wells > 1e6


# -- plate ---------------------------------------------------------------------------------


def test_the_tile_cache_stays_bounded_across_a_plate_and_redraws_tiles_identically(world: SimWorld) -> None:
    from drivers.sim.culture import TILE_CACHE

    culture = world.culture
    x, y = world.well_centre_um("B3")
    first = culture.sites_in_rect(x - 400, y - 300, x + 400, y + 300)
    for row in "ABCDEFGH":
        for col in range(1, 13):
            cx, cy = world.well_centre_um(f"{row}{col}")
            culture.sites_in_rect(cx - 400, cy - 300, cx + 400, cy + 300)
            assert len(culture._tiles) <= TILE_CACHE
    again = culture.sites_in_rect(x - 400, y - 300, x + 400, y + 300)
    for name in ("x_um", "y_um", "well", "uni", "nor"):
        assert np.array_equal(getattr(first, name), getattr(again, name)), name


def test_wells_sit_on_the_configured_grid(world: SimWorld) -> None:
    plate = world.sim.plate
    assert world.well_centre_um("A1") == (plate.a1_x_um, plate.a1_y_um)
    assert world.well_centre_um("H12") == (plate.a1_x_um + 11 * plate.pitch_um, plate.a1_y_um + 7 * plate.pitch_um)
    assert world.well_at(*world.well_centre_um("C4")) == "C4"
    x, y = world.well_centre_um("B2")
    assert world.well_at(x + 0.49 * plate.well_diameter_um, y) == "B2"
    assert world.well_at(x + 0.51 * plate.well_diameter_um, y) is None  # between wells
    assert world.well_at(0.0, 0.0) is None
    with pytest.raises(ValueError, match="not on this 96-well plate"):
        world.well_centre_um("I1")


def test_empty_well_and_space_between_wells_have_no_cells(world: SimWorld) -> None:
    x, y = world.well_centre_um("H12")
    for t_h in (0.0, 100.0, 400.0):
        assert world.true_confluence(x, y, world.t0_s + t_h * HOUR) == 0.0
    image = world.render_intensity(x, y, world.true_focus_z_um(x, y, world.t0_s), t_s=world.t0_s)
    assert np.allclose(image, world.background_intensity, atol=1e-4)
    bx, by = world.well_centre_um("B2")
    gap = (bx + world.sim.plate.pitch_um / 2.0, by)
    assert world.true_confluence(*gap, world.t0_s + 300 * HOUR) == 0.0
    # Cells stay inside the well bottom: a field on the wall's edge is only partly covered.
    edge = (bx + world.plate.well_radius_um, by)
    mask = world.cell_mask(*edge, world.t0_s + 300 * HOUR)
    w = mask.shape[1]
    assert mask[:, w // 2 + 20 :].sum() == 0 and mask[:, : w // 2 - 40].any()


# -- growth and motion ---------------------------------------------------------------------


def well_coverage_from_masks(world: SimWorld, well: str, t_h: float, px_um: float = 2.0) -> float:
    """Covered fraction of a whole well bottom, rasterised from the true cell outlines."""
    cx, cy = world.well_centre_um(well)
    r = world.plate.well_radius_um
    culture = world.culture
    cells = culture.cells_in_rect(cx - r, cy - r, cx + r, cy + r, t_h * HOUR)
    n = int(2 * r / px_um)
    mask = culture.coverage_mask(cells, cx - r + px_um / 2, cy - r + px_um / 2, (n, n), px_um)
    yy, xx = (np.mgrid[0:n, 0:n] + 0.5) * px_um - r
    inside = xx**2 + yy**2 <= r * r
    return float(mask[inside].mean())


def test_well_coverage_grows_logistically_with_the_doubling_time(world: SimWorld) -> None:
    # Logistic (Verhulst) growth C(t) = K / (1 + (K/C0 - 1) exp(-r t)), r = ln 2 / doubling time:
    # in the exponential phase (C << K) the covered area doubles every doubling time.
    td = world.sim.culture.doubling_time_h
    times_h = np.array([0.0, 0.5 * td, td, 2 * td, 4 * td])
    measured = np.array([well_coverage_from_masks(world, "C3", t) for t in times_h])
    c0 = measured[0]
    assert 0.01 < c0 < 0.15
    model = logistic_coverage(times_h, c0, world.sim.culture.max_confluence, td)
    assert measured / c0 == pytest.approx(model / c0, rel=0.05)
    assert measured[2] / c0 == pytest.approx(2.0, rel=0.06)  # early on: one doubling per doubling time
    assert measured[4] / measured[3] < 0.8 * (measured[2] / c0) ** 2  # and slower once the well fills
    # The model's well coverage (what fields average to) matches the drawn cells.
    for t, m in zip(times_h, measured):
        assert world.true_well_coverage("C3", world.t0_s + t * HOUR) == pytest.approx(m, rel=0.05)


def test_growth_levels_off_at_max_confluence(world: SimWorld) -> None:
    k = world.sim.culture.max_confluence
    late = well_coverage_from_masks(world, "C3", 30 * 24.0, px_um=4.0)
    assert late == pytest.approx(k, abs=0.03)
    # Common practice: cultures pass 70-90 % confluence in a few days at these seeding densities.
    days = [t_h for t_h in range(0, 24 * 14, 12) if world.true_well_coverage("C3", world.t0_s + t_h * HOUR) >= 0.8]
    assert 48 <= days[0] <= 24 * 10


def test_seeding_density_differs_from_well_to_well(world: SimWorld) -> None:
    c = world.culture.c0[world.culture.c0 > 0]
    spread = float(c.std() / c.mean())
    assert 0.5 * world.sim.plate.density_spread < spread < 1.5 * world.sim.plate.density_spread
    assert world.culture.c0[world.plate.columns * 7 + 11] == 0.0  # H12 is empty


def test_cells_move_slowly_at_the_configured_speed(world: SimWorld) -> None:
    cx, cy = world.well_centre_um("C3")
    culture = world.culture
    t = 50 * HOUR
    dt_h = 0.25
    a = culture.cells_in_rect(cx - 800, cy - 800, cx + 800, cy + 800, t)
    b = culture.cells_in_rect(cx - 800, cy - 800, cx + 800, cy + 800, t + dt_h * HOUR)
    n = min(len(a), len(b))  # newborn cells rank last, so the first n are the same cells
    speed = np.hypot(b.x_um[:n] - a.x_um[:n], b.y_um[:n] - a.y_um[:n]) / dt_h
    rms = float(np.sqrt(np.mean(speed**2)))
    assert rms == pytest.approx(world.sim.culture.motility_um_per_h, rel=0.25)
    # And a field looks nearly the same a few minutes later.
    x, y = busy_field(world, 50.0)
    m0 = world.cell_mask(x, y, world.t0_s + t)
    m1 = world.cell_mask(x, y, world.t0_s + t + 300.0)
    assert (m0 & m1).sum() / (m0 | m1).sum() > 0.9


def test_phase_of_cells_follows_index_and_thickness(world: SimWorld) -> None:
    # phi = 2*pi/lambda * (n_cell - n_medium) * thickness (optical path difference).
    x, y = busy_field(world, 60.0)
    cx, cy = x, y
    ny, nx = world.grid_shape
    cells = world.culture.cells_in_rect(cx - 80, cy - 80, cx + 80, cy + 80, 60 * HOUR)
    maps = world.culture.rasterize(cells, cx - 80, cy - 80, (400, 400), 0.4)
    cfg = world.sim.culture
    assert maps.thickness_um.max() == pytest.approx(cfg.nucleus_thickness_um, rel=0.01)
    cyto = (maps.label > 0) & (maps.opd_um < (cfg.cell_index - cfg.medium_index) * cfg.cell_thickness_um * 1.001)
    ratio = maps.opd_um[cyto & (maps.thickness_um > 0.5)] / maps.thickness_um[cyto & (maps.thickness_um > 0.5)]
    assert np.median(ratio) == pytest.approx(cfg.cell_index - cfg.medium_index, rel=0.02)
    field = world.culture.transmission(maps, world.wavelength_um)
    phi = np.angle(field[maps.label == 0])
    assert np.all(phi == 0.0)
    assert float(np.abs(field).min()) ** 2 >= 1.0 - cfg.absorption * cfg.nucleus_thickness_um / cfg.cell_thickness_um - 1e-3


# -- frame geometry ------------------------------------------------------------------------


@pytest.fixture(scope="module")
def square_world() -> SimWorld:
    """The demo world with its camera square to the stage (the pixel size still off nominal)."""
    return SimWorld(sim_profile(320, 240, **{"sim.camera_mount.rotation_deg": 0.0}))


def test_stage_position_is_the_centre_of_the_field(square_world: SimWorld) -> None:
    world = square_world
    x, y = busy_field(world, 80.0)
    t = world.t0_s + 80 * HOUR
    shift_px = 40
    a = world.cell_mask(x, y, t)
    b = world.cell_mask(x + shift_px * world.pixel_um, y, t)  # stage +x: content moves left
    assert np.array_equal(a[:, shift_px:], b[:, :-shift_px])
    c = world.cell_mask(x, y + shift_px * world.pixel_um, t)
    assert np.array_equal(a[shift_px:, :], c[:-shift_px, :])
    assert world.true_confluence(x, y, t) == pytest.approx(float(a.mean()))


def test_pixel_size_is_off_the_nominal_by_the_mount_error(world: SimWorld) -> None:
    mount = world.profile.sim.camera_mount
    nominal = world.profile.optics.camera_pixel_um / world.profile.optics.magnification
    assert mount.pixel_size_error_percent != 0.0  # the demo's camera is not what the profile says
    assert world.pixel_um == pytest.approx(nominal * (1 + mount.pixel_size_error_percent / 100))


def test_turned_camera_sees_the_stage_aligned_field_turned(world: SimWorld, square_world: SimWorld) -> None:
    from scipy import ndimage

    phi = math.radians(world.mount.rotation_deg)
    assert 1.0 <= world.mount.rotation_deg <= 2.0  # a camera turned by a degree or two
    x, y = busy_field(square_world, 80.0)
    t = world.t0_s + 80 * HOUR
    square = square_world.cell_mask(x, y, t).astype(np.uint8)
    turned = world.cell_mask(x, y, t).astype(np.uint8)
    # Frame pixel q (from the centre) shows the square frame's pixel R(phi) q
    # (drivers/sim/mount.py); SciPy resamples in (row, column) order, an independent path.
    c, s_ = math.cos(phi), math.sin(phi)
    rc = np.array([[c, s_], [-s_, c]])  # R(phi) with both axes swapped to (row, column)
    centre = (np.array(square.shape) - 1) / 2.0
    expected = ndimage.affine_transform(square, rc, offset=centre - rc @ centre, order=0)
    inner = (slice(20, -20), slice(20, -20))  # corners beyond the square frame are unknown to it
    agree = float(np.mean(turned[inner] == expected[inner]))
    assert agree > 0.99


def test_truth_map_moves_the_image_as_a_stage_move_does(world: SimWorld) -> None:
    from skimage.filters import window
    from skimage.registration import phase_cross_correlation

    x, y = busy_field(world, 80.0)
    t = world.t0_s + 80 * HOUR
    a_px_per_um = world.mount.image_px_per_um
    step = np.array([3.7, -2.9])  # um: small against the frame, so the overlap is nearly all of it
    z = world.true_focus_z_um(x, y, t)
    hann = window("hann", world.shape)  # the frame's edges would otherwise dominate
    ref = world.render_intensity(x, y, z, t_s=t)
    moved = world.render_intensity(x + step[0], y + step[1], z, t_s=t)
    # scikit-image's cross-correlation with DFT upsampling (Guizar-Sicairos et al. 2008) gives
    # the shift that registers `moved` onto `ref` in (row, column): minus the content's shift.
    # Unnormalised: beyond the optics' cutoff the frames hold only the same rounding pattern.
    shift_rc, _, _ = phase_cross_correlation(
        (ref - ref.mean()) * hann, (moved - moved.mean()) * hann, upsample_factor=50, normalization=None
    )
    content_shift = -np.array([shift_rc[1], shift_rc[0]])
    # The window pulls the estimate towards zero by a few hundredths of a pixel; a rotation of
    # the wrong sense or the nominal pixel size would be off by about 0.3 px.
    assert content_shift == pytest.approx(-a_px_per_um @ step, abs=0.1)


def test_mirrored_camera_reverses_the_rows(square_world: SimWorld) -> None:
    mirrored = SimWorld(sim_profile(320, 240, **{"sim.camera_mount.rotation_deg": 0.0, "sim.camera_mount.mirrored": True}))
    x, y = busy_field(square_world, 80.0)
    t = square_world.t0_s + 80 * HOUR
    assert np.array_equal(mirrored.cell_mask(x, y, t), square_world.cell_mask(x, y, t)[::-1])
    assert np.linalg.det(mirrored.mount.image_px_per_um) < 0


# -- image content (facts of the trade) ----------------------------------------------------


def test_cells_are_dark_with_bright_halos_in_positive_phase_contrast(world: SimWorld) -> None:
    # Common practice: in positive phase contrast, cells look darker than the background and
    # a bright halo surrounds them.
    x, y = busy_field(world, 30.0, lo=0.05, hi=0.35)
    t = world.t0_s + 30 * HOUR
    image = world.render_intensity(x, y, world.true_focus_z_um(x, y, t), t_s=t)
    mask = world.cell_mask(x, y, t).astype(np.uint8)
    px = world.pixel_um
    inner = cv2.erode(mask, np.ones((3, 3), np.uint8), iterations=int(3 / px)).astype(bool)
    ring = cv2.dilate(mask, np.ones((3, 3), np.uint8), iterations=int(2.5 / px)).astype(bool) & ~mask.astype(bool)
    far = ~cv2.dilate(mask, np.ones((3, 3), np.uint8), iterations=int(15 / px)).astype(bool)
    background = float(np.median(image[far]))
    assert background == pytest.approx(world.background_intensity, rel=0.1)
    assert float(np.mean(image[ring])) > 1.15 * background  # bright halo
    assert float(np.median(image[inner])) < 0.9 * background  # dark cells


def test_defocus_lowers_contrast_of_the_culture(world: SimWorld) -> None:
    # Common practice: contrast (and sharpness) fall off on both sides of focus.
    x, y = busy_field(world, 60.0)
    t = world.t0_s + 60 * HOUR
    z0 = world.true_focus_z_um(x, y, t)
    dof = world.profile.optics.depth_of_field_um

    def brenner(dz: float) -> float:
        # Brenner et al. 1976 (J. Histochem. Cytochem.): sum of squared differences two pixels apart.
        im = world.render_intensity(x, y, z0 + dz, t_s=t)
        return float(np.mean((im[:, 2:] - im[:, :-2]) ** 2))

    at_focus = brenner(0.0)
    for dz in (-3 * dof, -dof, dof, 3 * dof):
        assert brenner(dz) < 0.6 * at_focus
    assert brenner(-0.1 * dof) > 0.95 * at_focus and brenner(0.1 * dof) > 0.95 * at_focus


def test_saved_frame_png_for_a_look() -> None:
    # Written for people to look at (test-artifacts/ is git-ignored): a full-size frame of the
    # shipped profile, in focus, at three days and at ten days.
    w = SimWorld(sim_profile(1280, 960))
    ARTIFACTS.mkdir(exist_ok=True)
    x, y = w.well_centre_um("B3")
    for t_h, name in ((72.0, "sim_frame_B3_72h.png"), (240.0, "sim_frame_B3_240h.png")):
        t = w.t0_s + t_h * HOUR
        frame = w.render(x, y, w.true_focus_z_um(x, y, t), t_s=t, exposure_ms=20.0)
        assert frame.shape == (960, 1280) and frame.dtype == np.uint8
        assert cv2.imwrite(str(ARTIFACTS / name), frame)
        assert 20 < float(frame.mean()) < 200 and float(np.mean(frame == 255)) < 0.05


# -- focal plane ---------------------------------------------------------------------------


def test_focal_plane_tilt_sag_and_drift_are_as_configured() -> None:
    fp = {"sim.focal_plane.tilt_x_um_per_mm": 0.8, "sim.focal_plane.tilt_y_um_per_mm": -0.5, "sim.focal_plane.sag_um": 0.0}
    w = SimWorld(sim_profile(64, 48, **fp))
    cfg = w.sim.focal_plane
    cx, cy = w.plate.centre_x_um, w.plate.centre_y_um
    t = w.t0_s
    assert w.true_focus_z_um(cx, cy, t) == pytest.approx(cfg.z0_um)
    assert w.true_focus_z_um(cx + 1000.0, cy, t) - w.true_focus_z_um(cx, cy, t) == pytest.approx(0.8)
    assert w.true_focus_z_um(cx, cy + 1000.0, t) - w.true_focus_z_um(cx, cy, t) == pytest.approx(-0.5)
    # Sag: the middle of an outer column is sag_um further than the plate centre.
    no_tilt = {"sim.focal_plane.tilt_x_um_per_mm": 0.0, "sim.focal_plane.tilt_y_um_per_mm": 0.0, "sim.focal_plane.sag_um": 12.0}
    sag = SimWorld(sim_profile(64, 48, **no_tilt))
    a1x = sag.sim.plate.a1_x_um
    assert sag.true_focus_z_um(a1x, cy, t) - sag.true_focus_z_um(cx, cy, t) == pytest.approx(12.0)
    assert sag.true_focus_z_um(cx + 0.5 * (cx - a1x), cy, t) - sag.true_focus_z_um(cx, cy, t) == pytest.approx(3.0)
    # Drift: drift_um * (1 - exp(-(t - t_open) / tau)) after each door opening, adding up.
    t1, t2 = (h * HOUR for h in cfg.door_openings_h)
    tau = cfg.drift_tau_min * 60.0
    z = lambda dt: w.true_focus_z_um(cx, cy, w.t0_s + dt) - cfg.z0_um  # noqa: E731
    assert z(t1 - 1.0) == 0.0
    assert z(t1 + tau) == pytest.approx(cfg.drift_um * (1 - math.exp(-1.0)))
    assert z(t2 - 1.0) == pytest.approx(cfg.drift_um, rel=1e-6)
    assert z(t2 + 20 * tau) == pytest.approx(2 * cfg.drift_um, rel=1e-6)


def test_frames_come_out_sharpest_at_the_true_focal_plane(world: SimWorld) -> None:
    x, y = busy_field(world, 60.0)
    t = world.t0_s + 60 * HOUR
    z0 = world.true_focus_z_um(x, y, t)
    dzs = np.arange(-12.0, 12.1, 2.0)
    scores = [float(np.var(world.render_intensity(x, y, z0 + dz, t_s=t))) for dz in dzs]
    assert abs(dzs[int(np.argmax(scores))]) <= 2.0


# -- illumination --------------------------------------------------------------------------


def test_illumination_map_has_mean_one_and_configured_vignetting() -> None:
    # Smith, Modern Optical Engineering (cos^4 law): E(r) = cos^4(atan(r / f)); with the LED's spot
    # made very wide and centred, the corner falls to 1 - vignetting.
    flat = {"sim.illumination.led_spread": 10.0, "sim.illumination.led_offset_x": 0.0, "sim.illumination.led_offset_y": 0.0}
    w = SimWorld(sim_profile(320, 240, **flat))
    m = w.illumination_map()
    assert m.dtype == np.float32 and m.shape == (240, 320)
    assert float(m.mean()) == pytest.approx(1.0, abs=1e-5)
    rel = w.illumination.relative_to_centre
    corner = float(rel[0, 0])
    assert corner == pytest.approx(1.0 - w.sim.illumination.vignetting, abs=0.005)
    r = np.array([0.0, 100.0, 200.0])
    assert cos4_vignetting(r, 200.0, 0.35)[-1] == pytest.approx(0.65)
    # The off-centre LED moves the brightest spot towards its offset.
    spot = {
        "sim.illumination.led_offset_x": 0.3,
        "sim.illumination.led_offset_y": -0.2,
        "sim.illumination.led_spread": 0.3,
        "sim.illumination.vignetting": 0.0,
    }
    led = SimWorld(sim_profile(320, 240, **spot))
    iy, ix = np.unravel_index(np.argmax(led.illumination_map()), (240, 320))
    assert ix == pytest.approx(159.5 + 0.3 * 320, abs=2) and iy == pytest.approx(119.5 - 0.2 * 240, abs=2)


def test_render_applies_illumination_map(world: SimWorld) -> None:
    x, y = world.well_centre_um("H12")  # blank
    t = world.t0_s
    frame = world.render(x, y, world.true_focus_z_um(x, y, t), t_s=t, exposure_ms=20.0).astype(float)
    expected = world.photons(world.render_intensity(x, y, 0.0, t_s=t), exposure_ms=20.0, lamp_level=1.0)
    k_qe = world.sim.sensor.system_gain_dn_per_e * world.sim.sensor.quantum_efficiency
    smooth = cv2.blur(frame, (15, 15)) - world.sim.sensor.dark_offset_dn
    assert np.corrcoef(smooth[10:-10, 10:-10].ravel(), (expected * k_qe)[10:-10, 10:-10].ravel())[0, 1] > 0.99


# -- camera --------------------------------------------------------------------------------


async def test_sim_camera_grabs_exposed_frames_on_the_clock(world: SimWorld) -> None:
    clock = ScaledClock(speed=1000.0, start_s=world.t0_s + 24 * HOUR)
    x, y = world.well_centre_um("B3")
    lamp = {"level": 1.0}
    pos = Position(x, y, world.true_focus_z_um(x, y, clock.now()))
    cam = SimCamera(world, world.profile.camera, clock, position_source=lambda: pos, lamp_source=lambda: lamp["level"])
    assert isinstance(cam, Camera)
    with pytest.raises(CameraError, match="not open"):
        await cam.grab()
    await cam.open()
    await cam.set_exposure_ms(50.0)
    t_before = clock.now()
    frame = await cam.grab()
    assert frame.t_s >= t_before and clock.now() - frame.t_s >= 0.05
    assert frame.pixels.shape == (240, 320) and frame.pixels.dtype == np.uint8
    assert frame.exposure_ms == 50.0 and frame.gain_db == 0.0 and frame.bit_depth == 8
    lamp["level"] = 0.0
    dark = await cam.grab()
    assert dark.pixels.mean() < frame.pixels.mean() / 5
    info = cam.describe()
    assert info["model"] == "simulated" and info["resolution"] == {"width_px": 320, "height_px": 240} and info["bit_depth"] == 8
    assert "exposure" in info["controls"] and "gain" in info["controls"]
    for bad in (0.0, -5.0, 1e6, float("nan")):
        with pytest.raises(CameraError, match="exposure"):
            await cam.set_exposure_ms(bad)
    with pytest.raises(CameraError, match="gain"):
        await cam.set_gain_db(99.0)
    await cam.set_gain_db(6.0)
    lamp["level"] = 1.0
    brighter = await cam.grab()
    assert brighter.gain_db == 6.0 and brighter.pixels.mean() > frame.pixels.mean()
    # Rendering happens off the event loop: other tasks keep running during a grab.
    ticks = 0

    async def ticker() -> None:
        nonlocal ticks
        while True:
            ticks += 1
            await asyncio.sleep(0)

    task = asyncio.create_task(ticker())
    await cam.grab()
    task.cancel()
    assert ticks > 3
    await cam.close()
    with pytest.raises(CameraError):
        await cam.grab()
