"""Photon-transfer series made and analysed by the EMVA 1288 reference implementation.

The ``emva1288`` package (published by the EMVA 1288 working group; 1.0.x implements
Release 4.0) has a camera simulator that writes a complete exposure series with its
descriptor file, and processing code that computes the standard's results from it. Here
its simulator writes the frames as TIFFs (integer grey values, 16-bit files for more than
8 bits, as most cameras deliver them), its own loader and processing read those same
files back, and the expected values are its results: nothing here comes from phasewatch.

emva1288 1.0.2's fitting routines call ``numpy.asfarray``, which numpy 2.0 removed; it is
put back on numpy for the duration of the calls only (:func:`numpy_shim`).
"""

from __future__ import annotations

import contextlib
import dataclasses
import logging
import os
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import tifffile

HEIGHT_PX, WIDTH_PX = 192, 256
#: Frames averaged for the DSNU and PRNU stacks.
STACK_FRAMES = 16
#: Full-well capacity of the simulated pixel (e⁻), emva1288's default.
FULL_WELL_E = 15000.0


@dataclasses.dataclass(frozen=True)
class Camera:
    """What is set on emva1288's simulator (its ``Camera`` arguments, in its units)."""

    bit_depth: int
    gain_dn_per_e: float
    black_offset_dn: float
    steps: int
    dark_e: float = 40.0
    """mean electrons from the electronics; keeps dark frames clear of zero"""
    dark_var_e2: float = 10.0
    dsnu_e: float = 5.0
    dsnu_column_e: float = 2.0
    prnu: float = 0.015
    prnu_row: float = 0.005
    prnu_column: float = 0.01
    seed: int = 11


@dataclasses.dataclass(frozen=True)
class Series:
    camera: Camera
    folder: Path
    descriptor: Path
    images: dict[str, Any]
    """emva1288's parse of the descriptor: {'temporal'|'spatial': {exposure_ns: {photons: [paths]}}}"""
    reference: dict[str, float]
    """emva1288's results (see :func:`reference_results`)"""
    data: dict[str, Any]
    """emva1288's processed data (Data1288.data), to rerun its results with other settings"""
    set_gain_dn_per_e: float
    """the gain the simulator really used (it rounds to its own list of gains)"""


@contextlib.contextmanager
def numpy_shim() -> Iterator[None]:
    with pytest.MonkeyPatch.context() as mp:
        if not hasattr(np, "asfarray"):
            mp.setattr(np, "asfarray", lambda a, dtype=np.float64: np.asarray(a, dtype=dtype), raising=False)
        yield


def reference_results(data: dict[str, Any], *, index_u_ysat: int | None = None) -> dict[str, float]:
    """emva1288's own results (Results1288) for its processed data, in its units except
    PRNU (a fraction here, a percentage there)."""
    from emva1288.process import Results1288

    with numpy_shim():
        r = Results1288(data, index_u_ysat=index_u_ysat, loglevel=logging.WARNING)
        return {
            "K": float(r.K),
            "sigma_y_dark": float(r.sigma_y_dark),
            "sigma_d": float(r.sigma_d),
            "DSNU1288": float(r.DSNU1288),
            "PRNU1288": float(r.PRNU1288) / 100.0,
            "u_I_mean": float(r.u_I_mean),
            "u_e_sat": float(r.u_e_sat),
            "u_e_min": float(r.u_e_min),
            "index_u_ysat": int(r.index_u_ysat),
            "index_sensitivity_max": int(r.index_sensitivity_max),
        }


def make_series(folder: Path, camera: Camera) -> Series:
    """Run emva1288's dataset generator (an exposure series from its minimum to its maximum
    exposure, under the light that reaches full scale at the longest; a lit and a dark
    pair at each step; stacks of ``STACK_FRAMES`` lit and dark frames mid-way) and its
    processing on what it wrote."""
    from emva1288.camera.dataset_generator import DatasetGenerator
    from emva1288.camera.routines import Qe
    from emva1288.process import Data1288, LoadImageData, ParseEmvaDescriptorFile

    rng = np.random.default_rng(camera.seed)
    shape = (HEIGHT_PX, WIDTH_PX)
    dsnu = camera.dsnu_e * rng.standard_normal(shape) + camera.dsnu_column_e * rng.standard_normal(WIDTH_PX)
    prnu = (
        (1.0 + camera.prnu * rng.standard_normal(shape))
        * (1.0 + camera.prnu_row * rng.standard_normal((HEIGHT_PX, 1)))
        * (1.0 + camera.prnu_column * rng.standard_normal(WIDTH_PX))
    )
    dtype = np.uint8 if camera.bit_depth <= 8 else np.uint16

    def save_tiff(self: Any, img: np.ndarray, name: str) -> None:
        assert int(img.max()) <= 2**camera.bit_depth - 1
        tifffile.imwrite(Path(self.outdir) / "images" / name, img.astype(dtype), photometric="minisblack")

    with numpy_shim(), pytest.MonkeyPatch.context() as mp:
        # Its own writer goes through a Pillow mode that recent Pillow no longer saves;
        # the images are the simulator's all the same.
        mp.setattr(DatasetGenerator, "save_image", save_tiff)
        gen = DatasetGenerator(
            steps=camera.steps, L=STACK_FRAMES, outdir=str(folder), image_format="tif",
            bit_depth=camera.bit_depth, width=WIDTH_PX, height=HEIGHT_PX,
            K=camera.gain_dn_per_e, blackoffset=camera.black_offset_dn,
            dark_signal_0=camera.dark_e, sigma2_dark_0=camera.dark_var_e2,
            # 30 °C is its reference temperature: a dark current of 30 e⁻/s.
            temperature=30, u_esat=FULL_WELL_E,
            # Monochromatic light, as the standard asks for.
            qe=Qe(wavelength=np.array([525.0]), width=WIDTH_PX, height=HEIGHT_PX),
            dsnu=dsnu, prnu=prnu, seed=camera.seed,
        )
        parsed = ParseEmvaDescriptorFile(gen.descriptor_path, loglevel=logging.WARNING)
        loaded = LoadImageData(parsed.images, loglevel=logging.WARNING)
        data = Data1288(loaded.data, loglevel=logging.WARNING).data
    return Series(
        camera, folder, Path(gen.descriptor_path), parsed.images, reference_results(data), data, float(gen.cam.K),
    )


def write_manifest(series: Series, path: Path) -> Path:
    """A phasewatch manifest listing the very files of ``series``, grouped as emva1288's
    descriptor groups them (exposures in ns there, ms here; paths relative to ``path``)."""
    lines = ["exposure_ms,kind,path"]
    for group, (lit_kind, dark_kind) in (("temporal", ("lit", "dark")), ("spatial", ("spatial_lit", "spatial_dark"))):
        for exposure_ns, by_photons in sorted(series.images[group].items()):
            for photons, files in sorted(by_photons.items()):
                kind = dark_kind if photons == 0.0 else lit_kind
                for f in files:
                    rel = os.path.relpath(Path(f).resolve(), path.parent.resolve())
                    lines.append(f"{exposure_ns / 1e6!r},{kind},{Path(rel).as_posix()}")
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path
