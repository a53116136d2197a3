"""The calibration store: saving, matching, refusing bad frames, and acquisition."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
import tifffile

from daemon.illumination import CalibrationError
from daemon.illumination.calibration import (
    CalibrationStore,
    acquire_dark,
    acquire_flat,
    blank_field_nonuniformity,
)
from tests.helpers import sim_profile
from tests.illumination_helpers import FakeScope, SyntheticSensor, shading

SHAPE = (60, 80)


def _dark() -> np.ndarray:
    rng = np.random.default_rng(1)
    return (8.0 + 0.3 * rng.standard_normal(SHAPE)).astype(np.float32)


def _flat(level: float = 150.0) -> np.ndarray:
    return (_dark() + level * shading(SHAPE, width=1.0)).astype(np.float32)


@pytest.fixture
def store(tmp_path: Path) -> CalibrationStore:
    return CalibrationStore(tmp_path / "calibration")


@pytest.fixture
def profile():
    return sim_profile(80, 60)


def _files(root: Path) -> dict[str, bytes]:
    return {str(p.relative_to(root)): p.read_bytes() for p in sorted(root.rglob("*")) if p.is_file()}


def test_saves_and_finds_a_set_with_its_metadata(store: CalibrationStore, profile) -> None:
    store.save_dark(profile, _dark(), exposure_ms=20.0, gain_db=0.0, frames=16, bit_depth=8, acquired_t_s=1.77e9)
    path = store.save_flat(profile, _flat(), exposure_ms=20.0, gain_db=0.0, frames=16, bit_depth=8)
    found = store.find(profile, 20.0, 0.0)
    assert found is not None
    np.testing.assert_array_equal(found.flat, _flat())
    np.testing.assert_array_equal(found.dark, _dark())
    meta = json.loads(path.with_suffix(".json").read_text())
    assert meta["kind"] == "flat" and meta["objective"] == profile.optics.objective
    assert meta["exposure_ms"] == 20.0 and meta["frames_averaged"] == 16 and meta["bit_depth"] == 8
    assert len(meta["sha256"]) == 64 and meta["dark_sha256"] == found.dark_meta["sha256"]
    assert found.dark_meta["acquired_utc"] == "2026-02-02T02:40:00+00:00"  # 1.77e9 s after the Unix epoch
    # The TIFF carries the same metadata (tifffile's JSON description).
    with tifffile.TiffFile(path) as tif:
        assert tif.shaped_metadata[0]["kind"] == "flat"
        assert tif.pages[0].dtype == np.float32
    assert "10x_0.25_Ph1" in str(path) and "20.000ms_0.00dB" in str(path)


def test_matches_exposure_within_tolerance_and_gain_and_objective_exactly(store: CalibrationStore, profile) -> None:
    store.save_dark(profile, _dark(), exposure_ms=20.0, gain_db=0.0, frames=4, bit_depth=8)
    store.save_flat(profile, _flat(), exposure_ms=20.0, gain_db=0.0, frames=4, bit_depth=8)
    assert store.find(profile, 20.1, 0.0) is not None  # 0.5 %: a camera's rounding of the exposure
    assert store.find(profile, 21.0, 0.0) is None  # 5 %: another exposure
    assert store.find(profile, 20.0, 6.0) is None
    other_objective = sim_profile(80, 60, **{"optics.objective": "20x/0.40 Ph2"})
    assert store.find(other_objective, 20.0, 0.0) is None
    assert store.corrector_for(other_objective, 20.0, 0.0) is None


def test_says_what_is_missing_and_how_to_make_it(store: CalibrationStore, profile) -> None:
    assert "none" in store.describe_missing(profile, 20.0, 0.0)
    store.save_dark(profile, _dark(), exposure_ms=40.0, gain_db=0.0, frames=4, bit_depth=8)
    text = store.describe_missing(profile, 20.0, 0.0)
    assert "no dark or flat frame" in text and "dark 40 ms/0 dB" in text
    assert "phasewatch calibrate dark --exposure-ms 20" in text
    with pytest.raises(CalibrationError, match="no dark or flat frame"):
        store.require(profile, 20.0, 0.0)


def test_flat_needs_the_dark_of_its_setting(store: CalibrationStore, profile) -> None:
    store.save_dark(profile, _dark(), exposure_ms=40.0, gain_db=0.0, frames=4, bit_depth=8)
    with pytest.raises(CalibrationError, match="no dark frame for exposure 20 ms"):
        store.save_flat(profile, _flat(), exposure_ms=20.0, gain_db=0.0, frames=4, bit_depth=8)
    assert not list(store.root.rglob("flat*"))


@pytest.mark.parametrize(
    "bad, message",
    [
        (_flat(level=10.0), "flat is too dark"),
        (np.minimum(_flat(level=400.0), 255.0), "flat is saturated"),
        (np.ones((30, 40), np.float32) * 100, "flat is 40x30 but the dark frame is 80x60"),
        (np.where(np.arange(80)[None, :] < 8, _dark(), _flat()), "too dark to divide by"),
        (np.full(SHAPE, np.nan, np.float32), "NaN"),
    ],
)
def test_a_bad_flat_is_refused_and_the_good_one_kept(store: CalibrationStore, profile, bad, message) -> None:
    store.save_dark(profile, _dark(), exposure_ms=20.0, gain_db=0.0, frames=4, bit_depth=8)
    store.save_flat(profile, _flat(), exposure_ms=20.0, gain_db=0.0, frames=4, bit_depth=8)
    before = _files(store.root)
    with pytest.raises(CalibrationError, match=message):
        store.save_flat(profile, bad, exposure_ms=20.0, gain_db=0.0, frames=4, bit_depth=8)
    assert _files(store.root) == before
    np.testing.assert_array_equal(store.find(profile, 20.0, 0.0).flat, _flat())


def test_a_dark_with_light_in_it_is_refused(store: CalibrationStore, profile) -> None:
    store.save_dark(profile, _dark(), exposure_ms=20.0, gain_db=0.0, frames=4, bit_depth=8)
    before = _files(store.root)
    with pytest.raises(CalibrationError, match="dark frame is bright.*lamp off"):
        store.save_dark(profile, _flat(), exposure_ms=20.0, gain_db=0.0, frames=4, bit_depth=8)
    assert _files(store.root) == before


def test_a_dark_of_another_size_than_the_stored_flat_is_refused(store: CalibrationStore, profile) -> None:
    store.save_dark(profile, _dark(), exposure_ms=20.0, gain_db=0.0, frames=4, bit_depth=8)
    store.save_flat(profile, _flat(), exposure_ms=20.0, gain_db=0.0, frames=4, bit_depth=8)
    before = _files(store.root)
    with pytest.raises(CalibrationError, match="dark is 40x30 but the stored flat for this setting is 80x60"):
        store.save_dark(profile, np.zeros((30, 40), np.float32), exposure_ms=20.0, gain_db=0.0, frames=4, bit_depth=8)
    assert _files(store.root) == before


def test_a_damaged_file_is_noticed_not_used(store: CalibrationStore, profile) -> None:
    store.save_dark(profile, _dark(), exposure_ms=20.0, gain_db=0.0, frames=4, bit_depth=8)
    path = store.save_flat(profile, _flat(), exposure_ms=20.0, gain_db=0.0, frames=4, bit_depth=8)
    tifffile.imwrite(path, np.ones(SHAPE, np.float32))
    with pytest.raises(CalibrationError, match="does not match its metadata"):
        store.find(profile, 20.0, 0.0)


def test_corrector_is_cached_until_a_new_flat_arrives(store: CalibrationStore, profile) -> None:
    store.save_dark(profile, _dark(), exposure_ms=20.0, gain_db=0.0, frames=4, bit_depth=8)
    store.save_flat(profile, _flat(), exposure_ms=20.0, gain_db=0.0, frames=4, bit_depth=8)
    a = store.corrector_for(profile, 20.0, 0.0)
    assert a is not None and store.corrector_for(profile, 20.0, 0.0) is a
    import os
    import time

    time.sleep(0.01)
    path = store.save_flat(profile, _flat(level=120.0), exposure_ms=20.0, gain_db=0.0, frames=4, bit_depth=8)
    os.utime(path, (time.time() + 5, time.time() + 5))  # mtime resolution of some filesystems is coarse
    b = store.corrector_for(profile, 20.0, 0.0)
    assert b is not a and b.level_dn < a.level_dn
    assert [m["kind"] for m in store.list_sets(profile)] == ["dark", "flat"]


async def test_acquire_dark_averages_lamp_off_frames() -> None:
    sensor = SyntheticSensor(shape=(40, 50), gain_dn_per_e=0.3)
    scope = FakeScope(sensor)
    seen: list[tuple[int, int]] = []
    dark = await acquire_dark(scope, frames=16, exposure_ms=20.0, gain_db=0.0, progress=lambda d, t, m: seen.append((d, t)))
    assert all(lamp is False for _, lamp in scope.calls) and len(scope.calls) == 16
    assert seen[-1] == (16, 16)
    # Mean dark = black level + K × dark current × exposure (EMVA 1288 linear model) = 8.24 DN.
    assert float(dark.mean()) == pytest.approx(8.0 + 0.3 * 40.0 * 0.020, abs=0.1)
    assert dark.dtype == np.float32


async def test_acquire_flat_refuses_an_exposure_the_camera_did_not_use() -> None:
    scope = FakeScope(SyntheticSensor(shape=(40, 50)), clamp_exposure_ms=10.0)
    with pytest.raises(CalibrationError, match="camera exposed 10 ms instead of the 20 ms"):
        await acquire_flat(scope, frames=4, exposure_ms=20.0, gain_db=0.0)


def test_blank_field_nonuniformity_removes_temporal_noise() -> None:
    # PRNU-style spatial non-uniformity after EMVA 1288: s² = s²_measured − σ²_temporal / L.
    rng = np.random.default_rng(5)
    pattern = 100.0 * (1 + 0.01 * rng.standard_normal((200, 200)))
    frames = pattern + 5.0 * rng.standard_normal((8, 200, 200))
    mean = frames.mean(axis=0)
    var = frames.var(axis=0, ddof=1)
    assert blank_field_nonuniformity(mean, var, 8) == pytest.approx(0.01, rel=0.05)
    # Without the noise term the estimate would be √(0.01² + 0.05²/8) ≈ 0.0202.
    assert float(mean.std() / mean.mean()) > 0.019


def test_a_damaged_set_gives_no_corrector_and_says_why(store: CalibrationStore, profile) -> None:
    store.save_dark(profile, _dark(), exposure_ms=20.0, gain_db=0.0, frames=4, bit_depth=8)
    path = store.save_flat(profile, _flat(), exposure_ms=20.0, gain_db=0.0, frames=4, bit_depth=8)
    with open(path, "r+b") as fh:
        fh.seek(-4, 2)
        fh.write(b"\x00\x01\x02\x03")
    assert store.corrector_for(profile, 20.0, 0.0) is None
    assert "flat frame for profile sim" in store.describe_missing(profile, 20.0, 0.0)
    assert "is damaged" in store.describe_missing(profile, 20.0, 0.0)
