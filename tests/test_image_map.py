"""The stage-to-image map: its parameters, the profile's [camera_mount], and centring a
point of the image on the simulated scope."""

from __future__ import annotations

import itertools
import math
from pathlib import Path

import numpy as np
import pytest
from skimage.filters import window
from skimage.registration import phase_cross_correlation

from daemon.commission.image_map import StageImageMap, image_to_stage_um
from daemon.profile import PROFILE_DIR, load_profile
from drivers.options import ConfigError
from drivers.registry import offline_truth
from drivers.sim.world import SimWorld
from tests.helpers import sim_profile


@pytest.mark.parametrize(
    ("rotation", "skew", "aspect", "mirrored"),
    list(itertools.product((-2.0, 0.0, 1.6, 30.0), (0.0, 0.7), (1.0, 1.03), (False, True))),
)
def test_parameters_round_trip(rotation: float, skew: float, aspect: float, mirrored: bool) -> None:
    smap = StageImageMap.from_parameters(
        pixel_size_um=0.3855, rotation_deg=rotation, skew_deg=skew, aspect=aspect, mirrored=mirrored, frame_shape=(960, 1280)
    )
    got = smap.parameters()
    assert got["pixel_size_um"] == pytest.approx(0.3855)
    assert got["rotation_deg"] == pytest.approx(rotation)
    assert got["skew_deg"] == pytest.approx(skew, abs=1e-9)
    assert got["aspect"] == pytest.approx(aspect)
    assert got["mirrored"] is mirrored
    assert smap.centre_px == (639.5, 479.5)


def test_worked_example_of_a_turned_camera() -> None:
    # Plane geometry (common practice): a camera turned by 30 deg sees a 1 um move along
    # stage +x as (cos 30, -sin 30) / pixel size, and its content moves the opposite way.
    smap = StageImageMap.from_parameters(pixel_size_um=0.5, rotation_deg=30.0, frame_shape=(100, 100))
    assert smap.image_shift_px((1.0, 0.0)) == pytest.approx((-math.sqrt(3.0), 1.0))
    assert smap.image_shift_px((0.0, 1.0)) == pytest.approx((-1.0, -math.sqrt(3.0)))
    assert smap.stage_move_um(smap.image_shift_px((3.0, -4.0))) == pytest.approx((3.0, -4.0))


def test_the_simulators_true_map_has_its_mount_as_parameters() -> None:
    profile = sim_profile()
    truth = offline_truth(profile)
    geometry = truth.camera_geometry()
    smap = StageImageMap.from_parameters(
        pixel_size_um=geometry["pixel_size_um"], rotation_deg=geometry["rotation_deg"],
        skew_deg=geometry["skew_deg"], mirrored=geometry["mirrored"], frame_shape=(240, 320),
    )
    assert smap.px_per_um == pytest.approx(truth.image_px_per_um())


def test_centring_a_point_of_the_image_on_the_simulated_scope() -> None:
    profile = sim_profile(640, 480)
    world = SimWorld(profile)
    truth = offline_truth(profile)
    smap = StageImageMap(truth.image_px_per_um(), ((640 - 1) / 2.0, (480 - 1) / 2.0))
    x, y = world.well_centre_um("C5")
    t = world.t0_s + 60 * 3600.0
    z = world.true_focus_z_um(x, y, t)
    before = world.render_intensity(x, y, z, t_s=t)
    px, py = 470.0, 130.0  # a point up and right of the centre
    nx, ny = image_to_stage_um(smap, px, py, stage_x_um=x, stage_y_um=y)
    after = world.render_intensity(nx, ny, z, t_s=t)
    half = 64
    hann = window("hann", (2 * half, 2 * half))
    # Patches of 2 * half px around whole pixels: their centres lie half a pixel before them,
    # so the clicked point sits 0.5 px past the first patch's centre and on the second's
    # (the frame's centre pixel is (319.5, 239.5)).
    clicked = before[int(py) - half : int(py) + half, int(px) - half : int(px) + half]
    centred = after[240 - half : 240 + half, 320 - half : 320 + half]
    # scikit-image cross-correlation (Guizar-Sicairos et al. 2008): the shift that registers
    # the centred patch onto the clicked one, (row, column).
    shift, _, _ = phase_cross_correlation(
        (clicked - clicked.mean()) * hann, (centred - centred.mean()) * hann, upsample_factor=20, normalization=None
    )
    assert shift == pytest.approx([0.5, 0.5], abs=0.3)


def test_profile_camera_mount_is_optional_and_strict(tmp_path: Path) -> None:
    assert load_profile("sim").camera_mount.rotation_deg == 0.0  # the demo profile is not commissioned
    text = (PROFILE_DIR / "sim.toml").read_text()
    path = tmp_path / "mounted.toml"
    path.write_text(text + "\n[camera_mount]\nrotation_deg = 1.5\nmirrored = true\n")
    mount = load_profile(path).camera_mount
    assert (mount.rotation_deg, mount.mirrored, mount.skew_deg) == (1.5, True, 0.0)
    path.write_text(text + "\n[camera_mount]\nrotation = 1.5\n")
    with pytest.raises(ConfigError, match=r"\[camera_mount\] rotation: .*rotation_deg"):
        load_profile(path)


def test_map_fit_matches_scikit_images_affine_estimate_and_drops_a_failed_registration() -> None:
    from skimage.transform import AffineTransform

    from daemon.commission.image_map import fit_image_map

    true = StageImageMap.from_parameters(
        pixel_size_um=0.3855, rotation_deg=1.6, skew_deg=0.3, aspect=1.01, frame_shape=(480, 640)
    )
    steps = np.array([(i * 40.0, j * 40.0) for i in range(-2, 3) for j in range(-2, 3)])
    rng = np.random.default_rng(3)
    shifts = np.array([true.image_shift_px(tuple(s)) for s in steps]) + 0.05 * rng.standard_normal(steps.shape)
    shifts[7] += (6.0, -4.0)  # one registration gone wrong
    fit = fit_image_map(steps, shifts, frame_shape=(480, 640))
    assert not fit.used[7] and fit.used.sum() == 24
    assert fit.rms_residual_px < 0.1
    # scikit-image's least-squares affine estimate (with an offset, fitted here as well) on the
    # same good points, with stage moves as source and minus the image shifts as destination.
    ok = fit.used
    reference = AffineTransform.from_estimate(steps[ok], -shifts[ok])
    assert fit.map.px_per_um == pytest.approx(reference.params[:2, :2], abs=2e-4)
    params = fit.map.parameters()
    assert params["rotation_deg"] == pytest.approx(1.6, abs=0.01)
    assert params["skew_deg"] == pytest.approx(0.3, abs=0.02)
    assert params["pixel_size_um"] == pytest.approx(0.3855, rel=2e-4)
