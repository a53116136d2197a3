"""Helpers for the illumination tests and benchmark: a synthetic camera and scope with
frames of known constants, and the calibrate-then-check round trip on a (simulated) scope.

The sensor follows the EMVA 1288 linear model (EMVA Standard 1288, Release 4.0 Linear):
Poisson photo-electrons and dark electrons, per-pixel PRNU and DSNU, Gaussian read
noise, system gain K, black level, rounding to integers and clipping to the bit depth.
Written independently of the simulator in drivers/sim so that the analysis is checked
against a model whose constants are set here.
"""

from __future__ import annotations

import dataclasses
import types

import numpy as np


def shading(shape: tuple[int, int], *, centre: tuple[float, float] = (0.6, 0.45), width: float = 0.5) -> np.ndarray:
    """Off-centre, smooth illumination falloff (max ≈ 1), like an LED off the axis."""
    h, w = shape
    y, x = np.mgrid[0:h, 0:w]
    r2 = ((x - w * centre[0]) / w) ** 2 + ((y - h * centre[1]) / h) ** 2
    return np.exp(-r2 / width)


@dataclasses.dataclass
class SyntheticSensor:
    shape: tuple[int, int] = (240, 320)
    gain_dn_per_e: float = 0.3
    read_noise_e: float = 6.0
    dark_current_e_per_s: float = 40.0
    offset_dn: float = 8.0
    dsnu_e: float = 2.0
    prnu_fraction: float = 0.01
    quantum_efficiency: float = 0.6
    photons_per_px_ms: float = 180.0
    full_well_e: float = 12000.0
    bit_depth: int = 8
    seed: int = 1

    def __post_init__(self) -> None:
        self.rng = np.random.default_rng(self.seed)
        self.illumination = shading(self.shape)
        self.prnu_map = 1.0 + self.prnu_fraction * self.rng.standard_normal(self.shape)
        self.dsnu_map = self.dsnu_e * self.rng.standard_normal(self.shape)

    @property
    def dtype(self) -> type:
        return np.uint8 if self.bit_depth <= 8 else np.uint16

    def frame(self, exposure_ms: float, lamp: bool = True) -> np.ndarray:
        electrons = self.rng.poisson(self.dark_current_e_per_s * exposure_ms / 1000.0, self.shape).astype(np.float64)
        if lamp:
            mean_e = self.quantum_efficiency * self.photons_per_px_ms * exposure_ms * self.illumination * self.prnu_map
            electrons += self.rng.poisson(mean_e)
        electrons = np.minimum(electrons, self.full_well_e) + self.dsnu_map
        electrons += self.read_noise_e * self.rng.standard_normal(self.shape)
        dn = np.round(self.offset_dn + self.gain_dn_per_e * electrons)
        return np.clip(dn, 0, 2**self.bit_depth - 1).astype(self.dtype)


class FakeScope:
    """Just what the acquisition code uses of :class:`daemon.scope.Scope`: ``profile``
    (camera bit depth and default exposure) and ``capture``, with a record of the calls."""

    def __init__(self, sensor: SyntheticSensor, *, exposure_ms: float = 20.0, clamp_exposure_ms: float | None = None) -> None:
        self.sensor = sensor
        self.clamp_exposure_ms = clamp_exposure_ms
        self.profile = types.SimpleNamespace(
            camera=types.SimpleNamespace(bit_depth=sensor.bit_depth, exposure_ms=exposure_ms, gain_db=0.0),
        )
        self.calls: list[tuple[float, bool]] = []

    async def capture(self, *, exposure_ms: float | None = None, gain_db: float | None = None, lamp: bool = True):
        e = exposure_ms if exposure_ms is not None else self.profile.camera.exposure_ms
        if self.clamp_exposure_ms is not None:
            e = min(e, self.clamp_exposure_ms)
        self.calls.append((e, lamp))
        return types.SimpleNamespace(
            pixels=self.sensor.frame(e, lamp), exposure_ms=e, gain_db=gain_db or 0.0, bit_depth=self.sensor.bit_depth, t_s=0.0
        )


async def calibrate_and_check_blank_field(
    scope, store, *, exposure_ms: float = 20.0, gain_db: float = 0.0, dark_frames: int = 16,
    flat_frames: int = 64, check_frames: int = 16,
) -> tuple[np.ndarray, np.ndarray, dict[str, float]]:
    """Over the simulated plate's empty well: take and store a dark and a flat, then
    measure a fresh blank field before and after correction. Returns (dark, flat, check)."""
    from daemon.illumination.calibration import acquire_dark, acquire_flat, check_blank_field

    profile = scope.profile
    bits = profile.camera.bit_depth
    x, y = scope.truth.world.well_centre_um("H12")
    await scope.move_to(x_um=x, y_um=y)
    dark = await acquire_dark(scope, frames=dark_frames, exposure_ms=exposure_ms, gain_db=gain_db)
    store.save_dark(profile, dark, exposure_ms=exposure_ms, gain_db=gain_db, frames=dark_frames, bit_depth=bits)
    flat = await acquire_flat(scope, frames=flat_frames, exposure_ms=exposure_ms, gain_db=gain_db)
    store.save_flat(profile, flat, exposure_ms=exposure_ms, gain_db=gain_db, frames=flat_frames, bit_depth=bits)
    corrector = store.corrector_for(profile, exposure_ms, gain_db)
    assert corrector is not None
    check = await check_blank_field(scope, corrector, dark, frames=check_frames, exposure_ms=exposure_ms, gain_db=gain_db)
    return dark, flat, check


def record_capture_z(scope) -> list[float]:
    """Wrap ``scope.capture`` so that each call first records the focus position."""
    seen: list[float] = []
    capture = scope.capture

    async def recording_capture(**kwargs):
        seen.append((await scope.position()).z_um)
        return await capture(**kwargs)

    scope.capture = recording_capture
    return seen
