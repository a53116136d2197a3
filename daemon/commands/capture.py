"""``phasewatch capture``: capture one frame and save it as a lossless (OME-)TIFF."""

from __future__ import annotations

import argparse
import asyncio
import sys
from pathlib import Path

import numpy as np
import tifffile

from daemon.commands.common import (
    POSITION_FIELDS,
    add_position_options,
    add_profile_options,
    add_request_options,
    move_from_args,
    request_from_args,
    truth_beside,
    use_demo_well,
)
from daemon.hardware import build_scope
from daemon.manual import CaptureRequest, apply_move, capture
from daemon.profile import load_profile
from daemon.storage.ome import iso_utc
from drivers import atomic
from drivers.base import Frame


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("capture", help="capture one frame and save it as a lossless TIFF")
    add_profile_options(p)
    p.add_argument("--output", "-o", type=Path, required=True, help="file to write (.tif)")
    add_position_options(p, verb="take the frame", z=True)
    p.add_argument(
        "--autofocus", action="store_true",
        help="focus before the frame (default on the simulated scope when no --z-um is given)",
    )
    add_request_options(p, CaptureRequest)
    p.set_defaults(func=run)


def write_tiff(path: Path, frame: Frame, *, pixel_size_um: float, x_um: float, y_um: float, z_um: float) -> None:
    """Write all or nothing: a temporary name, flushed and synced, then renamed over ``path``."""
    metadata = {
        "axes": "YX",
        "PhysicalSizeX": pixel_size_um,
        "PhysicalSizeXUnit": "µm",
        "PhysicalSizeY": pixel_size_um,
        "PhysicalSizeYUnit": "µm",
        "Plane": {
            "PositionX": x_um, "PositionXUnit": "µm",
            "PositionY": y_um, "PositionYUnit": "µm",
            "PositionZ": z_um, "PositionZUnit": "µm",
            "ExposureTime": frame.exposure_ms, "ExposureTimeUnit": "ms",
        },
        "AcquisitionDate": iso_utc(frame.t_s),
    }
    with atomic.open_atomic(path) as fh:
        tifffile.imwrite(fh, np.ascontiguousarray(frame.pixels), ome=True, photometric="minisblack", metadata=metadata)


async def run(args: argparse.Namespace) -> int:
    profile = load_profile(args.profile)
    if args.output.suffix.lower() not in (".tif", ".tiff"):
        print(f"phasewatch: --output {args.output}: use a .tif or .tiff name (lossless TIFF)", file=sys.stderr)
        return 2
    if not args.output.parent.exists():
        print(f"phasewatch: --output {args.output}: folder {args.output.parent} does not exist", file=sys.stderr)
        return 2
    settings = request_from_args(CaptureRequest, args)
    demo = use_demo_well(profile, args)
    target = move_from_args(profile, args, POSITION_FIELDS + ("z_um",))
    scope = build_scope(profile, sim_speed=args.sim_speed)
    async with scope, scope.claim("capture (command line)"):
        if target is not None:
            await apply_move(scope, target)
            if demo:
                print(demo)
        if args.autofocus or (profile.is_simulated and args.z_um is None):
            from daemon.focus.autofocus import autofocus

            focus = await autofocus(scope)
            print(focus.message)
        pos = await scope.position()
        frame = await capture(scope, settings)
        await asyncio.to_thread(
            write_tiff, args.output, frame,
            pixel_size_um=profile.optics.pixel_size_um, x_um=pos.x_um, y_um=pos.y_um, z_um=pos.z_um,
        )
        truth = scope.true_focus_z_um()
    h, w = frame.pixels.shape
    print(f"saved {args.output} ({w}x{h}, {frame.bit_depth}-bit, exposure {frame.exposure_ms:g} ms)")
    print(f"  stage x {pos.x_um:.1f} um, y {pos.y_um:.1f} um, z {truth_beside(pos.z_um, truth, 'um', '.1f')}")
    if truth is not None:
        print(f"  defocus against the simulator's focal plane: {pos.z_um - truth:+.1f} um")
        well = scope.truth.well_at(pos.x_um, pos.y_um)
        cov = scope.truth.field_coverage(pos.x_um, pos.y_um, frame.t_s)
        if well and cov is not None:
            print(f"  well {well}; true coverage of this field {cov * 100:.1f} %")
    return 0
