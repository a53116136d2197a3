"""Cell count estimates: close to the simulator's true count in sparse fields, and an honest
"not reliable" once cells touch."""

from __future__ import annotations

import numpy as np
import pytest

from daemon.culture.confluence import confluence
from daemon.culture.counting import RELIABLE_MAX_CONFLUENCE, count_cells, count_regions
from drivers.sim.world import SimWorld
from tests.helpers import sim_profile


def true_count(world: SimWorld, x_um: float, y_um: float, t_s: float) -> int:
    """Cells whose centre lies in the field (the simulator's cell list, its ground truth)."""
    h, w = world.shape
    half_w, half_h = w * world.pixel_um / 2.0, h * world.pixel_um / 2.0
    cells = world.culture.cells_in_rect(
        x_um - half_w, y_um - half_h, x_um + half_w, y_um + half_h, world.culture.quantise_time(world.rel_s(t_s))
    )
    inside = (np.abs(cells.x_um - x_um) <= half_w) & (np.abs(cells.y_um - y_um) <= half_h)
    return int(np.count_nonzero(inside))


# true_count takes the frame as a rectangle on the stage axes, so these worlds have the
# camera square to the stage and its pixel the profile's (a commissioned scope).
SQUARE_CAMERA = {"sim.camera_mount.rotation_deg": 0.0, "sim.camera_mount.pixel_size_error_percent": 0.0}


@pytest.fixture(scope="module")
def world_4x() -> SimWorld:
    return SimWorld(sim_profile(640, 480, **{"optics.magnification": 4.0, "optics.numerical_aperture": 0.10}, **SQUARE_CAMERA))


def test_reliability_limit_is_sub_confluent() -> None:
    assert 0.1 <= RELIABLE_MAX_CONFLUENCE <= 0.3


@pytest.mark.parametrize(("well", "day"), [("B3", 0.5), ("B3", 1.5), ("E7", 0.5), ("E7", 1.5), ("B3", 2.5)])
def test_sparse_count_close_to_truth(world_4x: SimWorld, well: str, day: float) -> None:
    x, y = world_4x.well_centre_um(well)
    t = world_4x.t0_s + day * 86400.0
    frame = world_4x.render(x, y, world_4x.true_focus_z_um(x, y, t), t_s=t, exposure_ms=20.0)
    result = count_cells(frame, pixel_size_um=world_4x.pixel_um)
    truth = true_count(world_4x, x, y, t)
    print(f"\n{well} day {day}: estimated {result.count}, true {truth} ({result.reason})")
    assert result.reliable and result.count is not None
    assert truth >= 10
    # Touching cells merge into regions split by area: within 20 % of the true number.
    assert abs(result.count - truth) <= 0.2 * truth


def test_small_counts_at_higher_magnification() -> None:
    world = SimWorld(sim_profile(640, 480, **SQUARE_CAMERA))  # 10x/0.25, 240 x 180 um
    for well, day in (("B3", 1.5), ("E7", 1.5), ("E7", 2.5)):
        x, y = world.well_centre_um(well)
        t = world.t0_s + day * 86400.0
        frame = world.render(x, y, world.true_focus_z_um(x, y, t), t_s=t, exposure_ms=20.0)
        result = count_cells(frame, pixel_size_um=world.pixel_um)
        truth = true_count(world, x, y, t)
        assert result.reliable, result.reason
        # Cells cut by the frame edge make small counts uncertain by a few cells.
        assert abs(result.count - truth) <= max(3, 0.3 * truth), (well, day, result.count, truth)


def test_dense_field_is_not_counted(world_4x: SimWorld) -> None:
    x, y = world_4x.well_centre_um("E7")
    t = world_4x.t0_s + 4.5 * 86400.0
    frame = world_4x.render(x, y, world_4x.true_focus_z_um(x, y, t), t_s=t, exposure_ms=20.0)
    measured = confluence(frame, pixel_size_um=world_4x.pixel_um, return_mask=True)
    assert measured.fraction > RELIABLE_MAX_CONFLUENCE
    result = count_cells(frame, pixel_size_um=world_4x.pixel_um, confluence=measured.fraction, mask=measured.mask)
    assert result.count is None and not result.reliable
    assert "confluence" in result.reason and "%" in result.reason


def test_empty_field_counts_zero(world_4x: SimWorld) -> None:
    x, y = world_4x.well_centre_um("H12")
    t = world_4x.t0_s + 3 * 86400.0
    frame = world_4x.render(x, y, world_4x.true_focus_z_um(x, y, t), t_s=t, exposure_ms=20.0)
    result = count_cells(frame, pixel_size_um=world_4x.pixel_um)
    assert result.count == 0 and result.reliable


def test_area_splitting_on_drawn_regions() -> None:
    # Eight separate discs of one size and one blob of three overlapping ones (union about
    # 2.6 discs): 8 + 3 = 11 cells (area over the single-cell area, rounded).
    import cv2

    mask = np.zeros((400, 600), np.uint8)
    for i in range(8):
        cv2.circle(mask, (40 + 70 * i, 60), 20, 1, -1)
    for cx in (250, 280, 310):
        cv2.circle(mask, (cx, 250), 20, 1, -1)
    result = count_regions(mask.astype(bool), pixel_size_um=1.0)
    assert result.regions == 9
    assert result.count == 11
    assert result.single_cell_area_um2 == pytest.approx(np.pi * 20**2, rel=0.05)


def test_mostly_clumps_is_not_counted() -> None:
    import cv2

    mask = np.zeros((400, 600), np.uint8)
    for i in range(3):
        cv2.circle(mask, (40 + 70 * i, 40), 20, 1, -1)  # three single cells
    for k in range(4):  # four clumps of three touching cells each, in an L (not convex)
        for dx, dy in ((0, 0), (36, 0), (0, 36)):
            cv2.circle(mask, (60 + 130 * k + dx, 150 + dy), 20, 1, -1)
    result = count_regions(mask.astype(bool), pixel_size_um=1.0)
    assert not result.reliable and result.count is None and "clumps" in result.reason
