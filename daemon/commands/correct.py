"""``phasewatch correct``: flat-field correct a new frame, or saved frames.

    phasewatch correct --profile P --data DIR -o corrected.tif [--raw raw.tif]   capture one frame now
    phasewatch correct --profile P --data DIR -o OUTDIR FRAME.tif [FOLDER ...]    correct saved frames

The calibration set is picked by profile, objective, exposure and gain (saved frames
carry theirs; otherwise the profile's, or ``--exposure-ms``/``--gain-db``). Corrected
frames keep the raw frame's integer type (lossless TIFF) unless ``--float``.
"""

from __future__ import annotations

import argparse
import asyncio
import sys
from pathlib import Path

import numpy as np
import tifffile

from daemon.commands.common import (
    add_profile_options,
    add_request_options,
    move_from_args,
    request_from_args,
    truth_beside,
)
from daemon.commands.capture import write_tiff
from daemon.hardware import build_scope
from daemon.illumination import CalibrationError
from daemon.illumination.calibration import CalibrationStore
from daemon.illumination.correction import Corrector
from daemon.illumination.inputs import InputFrame, expand_paths, read_input
from daemon.manual import CaptureRequest, MoveRequest, apply_move, capture
from daemon.profile import Profile, load_profile
from drivers.base import Frame


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("correct", help="flat-field correct a new frame or saved frames (needs dark and flat)")
    add_profile_options(p, data=True)
    p.add_argument("inputs", nargs="*", type=Path, help="saved TIFF frames or folders; none: capture one frame now")
    p.add_argument("--output", "-o", type=Path, required=True, help="corrected .tif (capture) or output folder (saved frames)")
    p.add_argument("--raw", type=Path, default=None, help="capture only: also save the raw frame here")
    p.add_argument("--float", action="store_true", help="write float32 instead of the raw frame's integer type")
    add_request_options(p, CaptureRequest, helps={
        "exposure_ms": "exposure (default: the frame's, else the profile's)",
        "gain_db": "analogue gain (default: the frame's, else the profile's)",
    })
    add_request_options(p, MoveRequest, only=("x_um", "y_um", "z_um"), helps={
        "x_um": "capture only: stage x first", "y_um": "capture only: stage y first",
        "z_um": "capture only: focus position first",
    })
    p.set_defaults(func=run)


def _corrected(corrector: Corrector, raw: np.ndarray, as_float: bool) -> np.ndarray:
    return corrector.apply(raw) if as_float else corrector.apply_to_dtype(raw)


def _corrector(store: CalibrationStore, profile: Profile, exposure_ms: float, gain_db: float) -> Corrector:
    corrector = store.corrector_for(profile, exposure_ms, gain_db)
    if corrector is None:
        raise CalibrationError(store.describe_missing(profile, exposure_ms, gain_db))
    return corrector


def _tiff_name(path: Path) -> None:
    if path.suffix.lower() not in (".tif", ".tiff"):
        raise CalibrationError(f"{path}: use a .tif or .tiff name (lossless TIFF)")
    if not path.parent.exists():
        raise CalibrationError(f"{path}: folder {path.parent} does not exist")


async def _capture(args: argparse.Namespace, profile: Profile, store: CalibrationStore) -> int:
    _tiff_name(args.output)
    if args.raw is not None:
        _tiff_name(args.raw)
        if args.raw.resolve() == args.output.resolve():
            raise CalibrationError("--raw and --output name the same file")
    settings = request_from_args(CaptureRequest, args)
    exposure = settings.exposure_ms if settings.exposure_ms is not None else profile.camera.exposure_ms
    gain = settings.gain_db if settings.gain_db is not None else profile.camera.gain_db
    corrector = await asyncio.to_thread(_corrector, store, profile, exposure, gain)
    args.data.mkdir(parents=True, exist_ok=True)
    target = move_from_args(profile, args, ("x_um", "y_um", "z_um"))
    scope = build_scope(profile, sim_speed=args.sim_speed, data_dir=args.data)
    async with scope, scope.claim("corrected capture"):
        if target is not None:
            await apply_move(scope, target)
        pos = await scope.position()
        frame = await capture(scope, settings)
        truth_z = scope.true_focus_z_um()
    corrected = await asyncio.to_thread(_corrected, corrector, frame.pixels, args.float)
    geometry = {"pixel_size_um": profile.optics.pixel_size_um, "x_um": pos.x_um, "y_um": pos.y_um, "z_um": pos.z_um}
    await asyncio.to_thread(write_tiff, args.output, Frame(corrected, frame.t_s, frame.exposure_ms, frame.gain_db, frame.bit_depth), **geometry)
    if args.raw is not None:
        await asyncio.to_thread(write_tiff, args.raw, frame, **geometry)
    h, w = frame.pixels.shape
    print(f"saved corrected {args.output} ({w}x{h}, exposure {frame.exposure_ms:g} ms, gain {frame.gain_db:g} dB)")
    if args.raw is not None:
        print(f"saved raw {args.raw}")
    print(f"  stage x {pos.x_um:.1f} um, y {pos.y_um:.1f} um, z {truth_beside(pos.z_um, truth_z, 'um', '.1f')}")
    print(f"  {await asyncio.to_thread(_spread, frame.pixels, corrector)}")
    return 0


def _spread(raw: np.ndarray, corrector: Corrector) -> str:
    """How much the shading changed the frame: spread of 32-pixel block means, before and after."""
    def block_spread(img: np.ndarray) -> float:
        h, w = img.shape
        b = 32
        blocks = img[: h // b * b, : w // b * b].astype(np.float64).reshape(h // b, b, w // b, b).mean(axis=(1, 3))
        return float(blocks.std() / blocks.mean()) if blocks.size > 1 and blocks.mean() > 0 else float("nan")

    before = block_spread(raw.astype(np.float32) - corrector.offset / corrector.gain)
    after = block_spread(corrector.apply(raw))
    return f"large-scale brightness spread {before * 100:.1f} % before, {after * 100:.1f} % after correction"


def _frame_setting(f: InputFrame, args: argparse.Namespace, profile: Profile) -> tuple[float, float]:
    settings = request_from_args(CaptureRequest, args)
    exposure = settings.exposure_ms if settings.exposure_ms is not None else f.exposure_ms
    gain = settings.gain_db if settings.gain_db is not None else f.gain_db
    return (
        exposure if exposure is not None else profile.camera.exposure_ms,
        gain if gain is not None else profile.camera.gain_db,
    )


def _write_corrected(out: Path, f: InputFrame, corrected: np.ndarray, exposure_ms: float, gain_db: float) -> None:
    geometry = {
        "pixel_size_um": f.pixel_size_um or 0.0,
        "x_um": f.position[0] if f.position else float("nan"),
        "y_um": f.position[1] if f.position else float("nan"),
        "z_um": f.z_um if f.z_um is not None else float("nan"),
    }
    bit_depth = 8 * corrected.dtype.itemsize if corrected.dtype.kind in "ui" else 32
    write_tiff(out, Frame(corrected, f.t_s or 0.0, exposure_ms, gain_db, bit_depth), **geometry)


async def _files(args: argparse.Namespace, profile: Profile, store: CalibrationStore) -> int:
    if args.raw is not None:
        raise CalibrationError("--raw is for capturing a new frame; saved frames keep their raw file")
    paths = expand_paths(args.inputs)
    if not paths:
        raise CalibrationError("no TIFF frames found in the inputs given")
    args.output.mkdir(parents=True, exist_ok=True)
    if any(p.resolve().parent == args.output.resolve() for p in paths):
        raise CalibrationError(f"--output {args.output} holds input frames; choose another folder so nothing is overwritten")
    done = 0
    for p in paths:
        f = await asyncio.to_thread(read_input, p)
        if f.kind == "corrected":
            print(f"skipped {p}: already corrected", file=sys.stderr)
            continue
        exposure, gain = _frame_setting(f, args, profile)
        corrector = await asyncio.to_thread(_corrector, store, profile, exposure, gain)
        corrected = await asyncio.to_thread(_corrected, corrector, f.pixels, args.float)
        out = args.output / (p.stem + ".tif")
        await asyncio.to_thread(_write_corrected, out, f, corrected, exposure, gain)
        done += 1
    print(f"corrected {done} frame{'s' if done != 1 else ''} into {args.output}")
    return 0


async def run(args: argparse.Namespace) -> int:
    profile = load_profile(args.profile)
    store = CalibrationStore(args.data / "calibration")
    try:
        if args.inputs:
            return await _files(args, profile, store)
        return await _capture(args, profile, store)
    except CalibrationError as exc:
        print(f"phasewatch: {exc}", file=sys.stderr)
        return 2
    except tifffile.TiffFileError as exc:
        print(f"phasewatch: {exc}", file=sys.stderr)
        return 2
