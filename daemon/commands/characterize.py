"""``phasewatch characterize``: photon-transfer characterisation of the camera (EMVA 1288).

    phasewatch characterize --profile P [--out DIR] [--json] [--gain-db G] [--steps N]
    phasewatch characterize --frames MANIFEST.csv [--out DIR] [--json] [--bit-depth N]

Put a blank field under the objective (an empty well, or no vessel); on the simulated
scope the stage goes to its empty well by itself. The command steps the exposure from
near zero to past saturation with the lamp on and off, then reports system gain K, read
noise, dark signal, DSNU, PRNU, saturation and dynamic range, writes
``photon-transfer.png`` and ``characterization.json`` into ``--out``, and on the
simulated scope puts the simulator's true sensor constants beside every estimate.

With ``--frames`` no scope is used: the same analysis, report and plot for a series
acquired elsewhere (any camera, any software), listed in a manifest (see
:mod:`daemon.illumination.manifest` for its columns).
"""

from __future__ import annotations

import argparse
import asyncio
import datetime as dt
import json
import sys
from pathlib import Path
from typing import Any

from daemon import __version__
from daemon.commands.calibrate import _move_to_blank
from daemon.commands.common import add_profile_options, print_json, stderr_progress
from daemon.manual import MoveTarget
from daemon.hardware import build_scope
from daemon.illumination import CalibrationError
from daemon.illumination.characterize import (
    Characterization,
    Measurement,
    analyse,
    measure,
    plot_photon_transfer,
    summary_rows,
)
from daemon.illumination.manifest import LoadedSeries, load_series
from daemon.profile import Profile, load_profile
from daemon.scope import Scope
from drivers import atomic

EXIT_CHARACTERIZATION = 2


#: Live-run defaults; None in the parser so that --frames can refuse them when given.
DEFAULT_STEPS = 24
DEFAULT_SPATIAL_FRAMES = 16
#: Options of a live run that mean nothing for frames acquired elsewhere.
LIVE_ONLY = (("gain_db", "--gain-db"), ("steps", "--steps"), ("spatial_frames", "--spatial-frames"),
             ("x_um", "--x-um"), ("y_um", "--y-um"), ("sim_speed", "--sim-speed"))


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("characterize", help="measure the camera's gain, noise and non-uniformity (EMVA 1288 photon transfer)")
    add_profile_options(p)
    p.add_argument("--frames", type=Path, default=None, metavar="MANIFEST.csv",
                   help="analyse a series acquired elsewhere, listed in a CSV manifest (columns exposure_ms,kind,path; "
                   "kind lit, dark, spatial_lit or spatial_dark); no scope is used")
    p.add_argument("--bit-depth", type=int, default=None, metavar="N",
                   help="with --frames: the camera's bit depth (default: from the largest value in the files)")
    p.add_argument("--out", type=Path, default=Path("phasewatch-characterization"),
                   help="folder for photon-transfer.png and characterization.json (default: ./phasewatch-characterization)")
    p.add_argument("--json", action="store_true", help="print the summary as JSON")
    p.add_argument("--gain-db", type=float, default=None, help="camera gain to characterise (default: profile)")
    p.add_argument("--steps", type=int, default=None, help=f"exposure steps from dark to past saturation (default {DEFAULT_STEPS})")
    p.add_argument("--spatial-frames", type=int, default=None,
                   help=f"frames averaged for DSNU and PRNU (default {DEFAULT_SPATIAL_FRAMES})")
    p.add_argument("--x-um", type=float, default=None, help="stage x of a blank field (default: here; sim: the empty well)")
    p.add_argument("--y-um", type=float, default=None, help="stage y of a blank field")
    p.set_defaults(func=run)


def simulator_truth(scope: Scope, gain_db: float) -> dict[str, float] | None:
    """The true sensor constants at ``gain_db`` where known (the simulator), named like the estimates."""
    raw = scope.truth.sensor(gain_db)
    if not raw:
        return None
    truth = dict(raw)
    out = {
        key: float(truth[key])
        for key in ("system_gain_dn_per_e", "read_noise_e", "dark_current_e_per_s", "dark_offset_dn", "dsnu_e",
                    "prnu_fraction", "full_well_e", "quantum_efficiency")
        if truth.get(key) is not None
    }
    if truth.get("saturation_e") is not None:
        out["saturation_capacity_e"] = float(truth["saturation_e"])
    return out


def _relative_errors(result: Characterization, truth: dict[str, float] | None) -> dict[str, float | None] | None:
    if not truth:
        return None

    def rel(key: str, value: float) -> float | None:
        return value / truth[key] - 1.0 if truth.get(key) else None

    return {
        "system_gain": rel("system_gain_dn_per_e", result.system_gain_dn_per_e),
        "read_noise": rel("read_noise_e", result.read_noise_e),
        "dark_current": rel("dark_current_e_per_s", result.dark_current_e_per_s),
        "dsnu": rel("dsnu_e", result.dsnu_e),
        "prnu": rel("prnu_fraction", result.prnu_fraction),
        "saturation_capacity": rel("saturation_capacity_e", result.saturation_capacity_e),
    }


def report_dict(
    source: dict[str, Any], measurement: Measurement, result: Characterization, truth: dict[str, float] | None,
) -> dict[str, Any]:
    """The report of a live run or of a manifest: ``source`` says where the frames came from
    (profile, scope, camera and field; or manifest and files) and is merged in."""
    return {
        "standard": "EMVA 1288 (Release 4.0 Linear), photon transfer",
        "software": f"phasewatch {__version__}",
        "created_utc": dt.datetime.now(dt.timezone.utc).isoformat(),
        **source,
        "gain_db": measurement.gain_db,
        "bit_depth": measurement.bit_depth,
        "measuring_area_px": int(measurement.mask.sum()),
        "results": result.as_dict(),
        "simulator": truth,
        "relative_error": _relative_errors(result, truth),
        "points": [p.__dict__ for p in measurement.points],
        "dark_series": [d.__dict__ for d in measurement.dark_series],
        "spatial_stacks": {
            "exposure_ms": measurement.stacks.exposure_ms,
            "frames": measurement.stacks.frames,
            "dark_frames": measurement.stacks.dark_count,
        },
    }


def _write_json(path: Path, obj: Any) -> None:
    atomic.write_text(path, json.dumps(obj, indent=2, default=str))


async def _save(out: Path, m: Measurement, result: Characterization, report: dict[str, Any], title: str,
                truth: dict[str, float] | None) -> dict[str, Any]:
    out.mkdir(parents=True, exist_ok=True)
    png = out / "photon-transfer.png"
    await asyncio.to_thread(plot_photon_transfer, m, result, png, title=title, truth=truth)
    report["plot"] = str(png)
    report["summary"] = str(out / "characterization.json")
    await asyncio.to_thread(_write_json, out / "characterization.json", report)
    return report


async def characterize(
    profile: Profile, *, out: Path, gain_db: float | None = None, steps: int = DEFAULT_STEPS,
    spatial_frames: int = DEFAULT_SPATIAL_FRAMES, sim_speed: float | None = None, x_um: float | None = None,
    y_um: float | None = None, progress: Any = None,
) -> dict[str, Any]:
    """Measure, analyse, plot and save; returns the report (also in ``out``)."""
    if steps < 8:
        raise CalibrationError(f"--steps must be at least 8 (the fit needs several below 70 % of saturation), got {steps}")
    if spatial_frames < 2:
        raise CalibrationError(f"--spatial-frames must be at least 2, got {spatial_frames}")
    gain = gain_db if gain_db is not None else profile.camera.gain_db
    out.mkdir(parents=True, exist_ok=True)
    scope = build_scope(profile, sim_speed=sim_speed)
    async with scope, scope.claim("camera characterisation"):
        blank = MoveTarget(x_um, y_um, None) if x_um is not None or y_um is not None else None
        where = await _move_to_blank(scope, blank)
        if progress is not None:
            print(f"characterising on {where}", file=sys.stderr)
        m = await measure(scope, gain_db=gain, steps=steps, spatial_frames=spatial_frames, progress=progress)
        truth = simulator_truth(scope, gain)
    result = await asyncio.to_thread(analyse, m.points, m.stacks, m.dark_series)
    camera = f"{profile.camera.driver} {profile.camera.width_px}x{profile.camera.height_px} {profile.camera.bit_depth}-bit"
    source = {"profile": profile.name, "scope": profile.scope.name, "camera": camera, "field": where}
    report = report_dict(source, m, result, truth)
    title = (
        f"{profile.scope.name} — {camera}, gain {gain:g} dB"
        + (" — simulator's true values beside the estimates" if truth else "")
    )
    return await _save(out, m, result, report, title, truth)


async def characterize_frames(
    manifest: Path, *, out: Path, bit_depth: int | None = None, progress: Any = None,
) -> dict[str, Any]:
    """Analyse a series acquired elsewhere (a manifest), plot and save; returns the report."""
    series: LoadedSeries = await asyncio.to_thread(load_series, manifest, bit_depth=bit_depth, progress=progress)
    m = series.measurement
    result = await asyncio.to_thread(analyse, m.points, m.stacks, m.dark_series)
    h, w = m.frame_shape
    camera = f"{w}x{h} {m.bit_depth}-bit (bit depth from {series.bit_depth_from})"
    source = {
        "manifest": str(manifest),
        "camera": camera,
        "frames": series.frames,
        "bit_depth_from": series.bit_depth_from,
        "high_bits_shift": series.high_bits_shift,
    }
    report = report_dict(source, m, result, None)
    title = f"{manifest.name} — {w}x{h}, {m.bit_depth}-bit, {series.frames} frames acquired elsewhere"
    return await _save(out, m, result, report, title, None)


def _live_only_given(args: argparse.Namespace) -> list[str]:
    return [flag for dest, flag in LIVE_ONLY if getattr(args, dest) is not None]


def print_report(report: dict[str, Any]) -> None:
    results = Characterization(**{k: v for k, v in report["results"].items() if k not in ("dynamic_range_db", "snr_max_db")})
    truth = report["simulator"]
    if "manifest" in report:
        shift = report["high_bits_shift"]
        print(f"{report['manifest']}: {report['frames']} frames, {report['camera']} ({report['standard']})")
        if shift:
            print(f"  the values were stored in the high bits (all multiples of {2**shift}): divided by {2**shift}")
    else:
        print(f"{report['scope']}: {report['camera']}, gain {report['gain_db']:g} dB ({report['standard']})")
    width = max(len(r[0]) for r in summary_rows(results, truth))
    for name, est, sim, unit in summary_rows(results, truth):
        line = f"  {name:<{width}}  {est:>9} {unit}"
        if sim:
            line += f"   (simulator: {sim} {unit})"
        print(line)
    print(f"  PRNU: {results.prnu_method}; the field's smoothed level spreads {100 * results.field_nonuniformity:.1f} %")
    if not results.dark_resolved:
        advice = "a higher gain" if "manifest" in report else "a higher --gain-db"
        print(
            "  the dark noise is below one grey level at this gain: read noise is an upper bound and DSNU and "
            f"dark current are not resolved (EMVA 1288); measure again with {advice}"
        )
    print(f"  photon-transfer plot: {report['plot']}")
    print(f"  summary: {report['summary']}")


async def run(args: argparse.Namespace) -> int:
    try:
        if args.frames is not None:
            if given := _live_only_given(args):
                raise CalibrationError(f"{', '.join(given)}: for a live run only, not with --frames")
            report = await characterize_frames(
                args.frames, out=args.out, bit_depth=args.bit_depth, progress=stderr_progress("characterize"),
            )
        else:
            if args.bit_depth is not None:
                raise CalibrationError("--bit-depth: with --frames only (a live run takes it from the profile)")
            profile = load_profile(args.profile)
            report = await characterize(
                profile, out=args.out, gain_db=args.gain_db,
                steps=args.steps if args.steps is not None else DEFAULT_STEPS,
                spatial_frames=args.spatial_frames if args.spatial_frames is not None else DEFAULT_SPATIAL_FRAMES,
                sim_speed=args.sim_speed, x_um=args.x_um, y_um=args.y_um, progress=stderr_progress("characterize"),
            )
    except CalibrationError as exc:
        print(f"phasewatch: {exc}", file=sys.stderr)
        return EXIT_CHARACTERIZATION
    if args.json:
        print_json({k: v for k, v in report.items() if k not in ("points", "dark_series")})
        return 0
    print_report(report)
    return 0
