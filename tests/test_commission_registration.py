"""Registration of frames by correlation, against an outside reference: scikit-image's
bundled camera picture moved by known sub-pixel amounts with SciPy."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage
from skimage import data

from daemon.commission.registration import register, texture_ratio


def moved(image: np.ndarray, dx_px: float, dy_px: float) -> np.ndarray:
    """The picture with its content moved by (dx, dy) px: scipy.ndimage.shift, cubic spline."""
    return ndimage.shift(image, (dy_px, dx_px), order=3, mode="nearest")


@pytest.fixture(scope="module")
def camera() -> np.ndarray:
    # skimage.data.camera(): 512 x 512 8-bit photograph bundled with scikit-image.
    return data.camera().astype(np.float64)


@pytest.mark.parametrize(("dx", "dy"), [(3.37, -7.81), (-0.42, 0.18), (41.6, 12.05), (-120.25, 95.5)])
def test_subpixel_shift_of_the_camera_picture(camera: np.ndarray, dx: float, dy: float) -> None:
    shift = register(camera, moved(camera, dx, dy))
    assert (shift.dx_px, shift.dy_px) == pytest.approx((dx, dy), abs=0.05)
    assert shift.error < 0.5


def test_shift_is_antisymmetric(camera: np.ndarray) -> None:
    a, b = camera, moved(camera, 5.25, -2.5)
    forward, backward = register(a, b), register(b, a)
    assert forward.vector == pytest.approx(-backward.vector, abs=0.05)


class Camera:
    """A camera with a fixed pattern (4 % pixel-to-pixel response and a dark pattern, the
    same in every frame) and fresh shot noise in each exposure."""

    def __init__(self, shape: tuple[int, int]) -> None:
        rng = np.random.default_rng(7)
        self.prnu = 1.0 + 0.04 * rng.standard_normal(shape)
        self.dark = 2.0 * rng.standard_normal(shape)
        self.exposures = 0

    def expose(self, scene: np.ndarray) -> np.ndarray:
        self.exposures += 1
        noise = np.random.default_rng(self.exposures).standard_normal(scene.shape)
        return scene * self.prnu + self.dark + np.sqrt(scene) * noise


def test_unnormalised_correlation_sees_through_the_cameras_fixed_pattern(camera: np.ndarray) -> None:
    cam = Camera(camera.shape)
    scene = 100.0 + 0.4 * camera  # 100-200 DN
    ref, mov = cam.expose(scene), cam.expose(moved(scene, 17.3, -9.6))
    shift = register(ref, mov)
    assert (shift.dx_px, shift.dy_px) == pytest.approx((17.3, -9.6), abs=0.1)
    # The phase-normalised form weighs the fixed pattern like the scene and finds it at zero shift.
    phase = register(ref, mov, normalization="phase")
    assert np.hypot(phase.dx_px, phase.dy_px) < 1.0


def test_frames_of_different_shapes_are_refused(camera: np.ndarray) -> None:
    with pytest.raises(ValueError, match="one shape"):
        register(camera, camera[:100])


def test_texture_ratio_tells_a_textured_field_from_a_blank_one(camera: np.ndarray) -> None:
    cam = Camera(camera.shape)
    scene = 100.0 + 0.4 * camera
    assert texture_ratio(cam.expose(scene), cam.expose(scene), cam.expose(moved(scene, 12.0, 0.0))) > 5.0
    blank = np.full(camera.shape, 150.0)
    # Only noise differs between the frames of a blank field, moved or not: the fixed pattern cancels.
    assert texture_ratio(cam.expose(blank), cam.expose(blank), cam.expose(blank)) == pytest.approx(1.0, abs=0.2)


def test_a_reference_prepared_once_registers_small_shifts_as_the_full_method_does(camera: np.ndarray) -> None:
    from daemon.commission.registration import Reference

    reference = Reference(camera)
    for dx, dy in ((0.0, 0.0), (1.3, -0.4), (-4.25, 6.5)):
        frame = moved(camera, dx, dy)
        once = reference.shift(frame)
        assert (once.dx_px, once.dy_px) == pytest.approx((dx, dy), abs=0.05)
        assert once.vector == pytest.approx(register(camera, frame).vector, abs=0.03)
