"""``phasewatch calibrate dark|flat|retro|list``: dark and flat calibration frames.

    phasewatch calibrate dark  --profile P --data DIR [--frames N] [--exposure-ms E] [--gain-db G]
    phasewatch calibrate flat  --profile P --data DIR [--frames N] [--exposure-ms E] [--defocus-um D]
    phasewatch calibrate retro --profile P --data DIR FRAMES_OR_FOLDERS...
    phasewatch calibrate list  --profile P --data DIR

A flat is measured against the dark of the same exposure and gain, so take the dark
first. ``flat`` images the field under the objective (on the simulated scope: the centre
of its empty well) and ``--check`` then measures how even a corrected blank field is.
"""

from __future__ import annotations

import argparse
import asyncio
import dataclasses
import math
import sys
from pathlib import Path
from typing import Any

import numpy as np

from daemon.commands.common import (
    add_position_options,
    add_profile_options,
    add_request_options,
    move_from_args,
    print_json,
    stderr_progress,
    request_from_args,
    truth_beside,
)
from daemon.hardware import build_scope
from daemon.illumination import CalibrationError
from daemon.illumination.acquire import DarkRequest, FlatRequest, check_flat, setting, take_dark, take_flat
from daemon.illumination.calibration import EXPOSURE_TOLERANCE, GAIN_TOLERANCE_DB, CalibrationStore, check_blank_field
from daemon.illumination.inputs import expand_paths, read_input
from daemon.illumination.retrospective import RetrospectiveFlatBuilder
from daemon.manual import MoveTarget, apply_move
from daemon.profile import Profile, load_profile
from daemon.scope import Scope
from drivers.registry import offline_truth

EXIT_CALIBRATION = 2


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("calibrate", help="take dark and flat calibration frames, or list them")
    actions = p.add_subparsers(dest="what", metavar="WHAT", required=True)

    def common(q: argparse.ArgumentParser) -> None:
        add_profile_options(q, data=True)
        q.add_argument("--json", action="store_true", help="print the result as JSON")

    # The web API's calibration requests: the same fields, limits and checks.
    q = actions.add_parser("dark", help="average frames with the lamp off")
    common(q)
    add_request_options(q, DarkRequest)
    q.set_defaults(func=run_dark)

    q = actions.add_parser(
        "flat", help="average frames of a blank field (needs the dark of the same setting)",
        description="Average frames of a blank field and store them as the flat field. Without a position "
        "the field under the objective is used (on the simulated scope: the centre of its empty well).",
    )
    common(q)
    add_request_options(q, FlatRequest)
    add_position_options(q, verb="take the blank field")
    q.add_argument("--check", type=int, default=0, metavar="N",
                   help="then take N more frames and report the blank field's non-uniformity before and after correction")
    q.set_defaults(func=run_flat)

    q = actions.add_parser("retro", help="estimate a flat from saved frames of many positions (no blank field needed)")
    common(q)
    q.add_argument("inputs", nargs="+", type=Path, help="TIFF frames or folders of them (raw frames of a time-lapse)")
    q.add_argument("--exposure-ms", type=float, default=None, help="exposure of the frames (default: from their metadata)")
    q.add_argument("--gain-db", type=float, default=None, help="gain of the frames (default: from their metadata, else profile)")
    q.add_argument("--block-px", type=int, default=8, help="block size of the per-position medians (default 8)")
    q.add_argument("--degree", type=int, default=4, help="degree of the fitted shading surface (default 4)")
    q.set_defaults(func=run_retro)

    q = actions.add_parser("list", help="list the stored calibration frames of a profile")
    common(q)
    q.set_defaults(func=run_list)


def _fail(exc: CalibrationError) -> int:
    print(f"phasewatch: {exc}", file=sys.stderr)
    return EXIT_CALIBRATION


def _true_dark_dn(truth: dict[str, Any] | None, exposure_ms: float, gain_db: float) -> float | None:
    """The true mean dark level (simulator): black level plus K × dark current × exposure."""
    if not truth:
        return None
    try:
        k = float(truth["system_gain_dn_per_e"]) * 10 ** ((gain_db - float(truth.get("gain_db", 0.0))) / 20.0)
        return float(truth["dark_offset_dn"]) + k * float(truth["dark_current_e_per_s"]) * exposure_ms / 1000.0
    except (KeyError, TypeError, ValueError):
        return None


def _open_scope(profile: Profile, args: argparse.Namespace) -> Scope:
    args.data.mkdir(parents=True, exist_ok=True)
    return build_scope(profile, sim_speed=args.sim_speed, data_dir=args.data)


def _emit(args: argparse.Namespace, report: dict[str, Any], lines: list[str]) -> None:
    if args.json:
        print_json(report)
    else:
        print("\n".join(lines))


async def run_dark(args: argparse.Namespace) -> int:
    profile = load_profile(args.profile)
    request = request_from_args(DarkRequest, args)
    store = CalibrationStore(args.data / "calibration")
    try:
        scope = _open_scope(profile, args)
        async with scope, scope.claim("dark calibration"):
            taken = await take_dark(scope, store, request, progress=stderr_progress("dark frames"))
            truth = _true_dark_dn(scope.truth.sensor(taken.gain_db), taken.exposure_ms, taken.gain_db)
    except CalibrationError as exc:
        return _fail(exc)
    dark = taken.image
    mean = float(dark.mean())
    report = {
        "saved": str(taken.path), "exposure_ms": taken.exposure_ms, "gain_db": taken.gain_db, "frames": taken.frames,
        "mean_dn": mean, "std_dn": float(dark.std()), "simulator_mean_dn": truth,
    }
    _emit(args, report, [
        f"saved dark frame {taken.path} ({taken.frames} frames, {taken.exposure_ms:g} ms, {taken.gain_db:g} dB)",
        f"  mean {truth_beside(mean, truth, 'DN')}, spatial std {dark.std():.2f} DN",
    ])
    return 0


async def _move_to_blank(scope: Scope, target: MoveTarget | None) -> str:
    """Go to the blank field asked for; else the simulator's empty well, else stay."""
    if target is not None:
        pos = await apply_move(scope, target)
        return f"well {target.well}" if target.well else f"x {pos.x_um:.0f} um, y {pos.y_um:.0f} um"
    for well in scope.truth.blank_wells():
        centre = scope.truth.well_centre_um(well)
        if centre is not None:
            await scope.move_to(x_um=centre[0], y_um=centre[1])
            return f"empty well {well} ({scope.truth.source}: no cells)"
    pos = await scope.position()
    return f"the field under the objective (x {pos.x_um:.0f} um, y {pos.y_um:.0f} um); it must be blank"


def _illumination_truth_error(scope: Scope, flat: np.ndarray, dark: np.ndarray) -> float | None:
    """RMS of (measured shading − simulator's illumination map), both with mean 1. The
    measured shading is smoothed over 7 px first: the map holds the light, the flat also
    the sensor's pixel-to-pixel response (PRNU), which is not an error of the flat."""
    from scipy import ndimage  # here, not at import: SciPy's image module holds ~27 MB resident
    light = scope.truth.illumination_map()
    if light is None:
        return None
    truth = np.asarray(light, dtype=np.float64)
    if truth.shape != flat.shape:
        return None
    shading = ndimage.uniform_filter(flat.astype(np.float64) - dark, size=7, mode="nearest")
    return float(np.sqrt(np.mean((shading / shading.mean() - truth / truth.mean()) ** 2)))


async def run_flat(args: argparse.Namespace) -> int:
    profile = load_profile(args.profile)
    request = request_from_args(FlatRequest, args)
    store = CalibrationStore(args.data / "calibration")
    exposure, gain = setting(profile, request)
    try:
        await asyncio.to_thread(check_flat, store, profile, request)  # before the hardware is opened
        target = move_from_args(profile, args)
        scope = _open_scope(profile, args)
        async with scope, scope.claim("flat calibration"):
            where = await _move_to_blank(scope, target)
            print(f"flat field: {where}", file=sys.stderr)
            taken = await take_flat(scope, store, request, where=where, progress=stderr_progress("flat frames"))
            assert taken.dark is not None
            truth_err = _illumination_truth_error(scope, taken.image, taken.dark)
            check = None
            if args.check:
                corrector = store.require(profile, exposure, gain).corrector()
                check = await check_blank_field(
                    scope, corrector, taken.dark, frames=args.check, exposure_ms=exposure, gain_db=gain,
                    progress=stderr_progress("check frames"),
                )
    except CalibrationError as exc:
        return _fail(exc)
    path = taken.path
    meta = store.find(profile, exposure, gain)
    quality = meta.flat_meta["quality"] if meta else {}
    report: dict[str, Any] = {
        "saved": str(path), "exposure_ms": exposure, "gain_db": gain, "frames": taken.frames, "where": where,
        "quality": quality, "simulator_illumination_rms_error": truth_err, "check": check,
    }
    lines = [
        f"saved flat {path} ({taken.frames} frames, {exposure:g} ms, {gain:g} dB)",
        f"  signal above dark {quality.get('response_mean_dn', float('nan')):.1f} DN; shading "
        f"{quality.get('shading_std_fraction', float('nan')) * 100:.1f} % std, "
        f"{quality.get('shading_range_fraction', float('nan')) * 100:.0f} % from darkest to brightest",
        f"  small-scale non-uniformity {quality.get('small_scale_nonuniformity', float('nan')) * 100:.2f} %",
    ]
    if truth_err is not None:
        lines.append(f"  shading against the simulator's illumination map: {truth_err * 100:.2f} % RMS")
    lines += [f"  warning: {w}" for w in quality.get("warnings", [])]
    if check:
        lines.append(
            f"  blank field non-uniformity (noise removed, {args.check} frames): "
            f"{check['before_fraction'] * 100:.2f} % before correction, {check['after_fraction'] * 100:.2f} % after"
        )
    _emit(args, report, lines)
    return 0


def _consistent(values: list[tuple[Path, float | None]], given: float | None, what: str, unit: str,
                tolerance: float, relative: bool) -> float | None:
    known = [(p, v) for p, v in values if v is not None and math.isfinite(v)]
    if given is not None:
        return given
    if not known:
        return None
    ref_path, ref = known[0]
    for p, v in known[1:]:
        off = abs(v - ref) / max(abs(ref), 1e-9) if relative else abs(v - ref)
        if off > tolerance:
            raise CalibrationError(
                f"mismatched {what}s: {ref_path.name} {ref:g} {unit} but {p.name} {v:g} {unit}; "
                f"a flat belongs to one {what}, give frames of one setting"
            )
    return ref


async def run_retro(args: argparse.Namespace) -> int:
    profile = load_profile(args.profile)
    store = CalibrationStore(args.data / "calibration")
    try:
        paths = expand_paths(args.inputs)
        frames = [await asyncio.to_thread(read_input, p) for p in paths]
        raw = [f for f in frames if f.kind != "corrected"]
        skipped = len(frames) - len(raw)
        exposure = _consistent([(f.path, f.exposure_ms) for f in raw], args.exposure_ms, "exposure", "ms",
                               EXPOSURE_TOLERANCE, True)
        gain = _consistent([(f.path, f.gain_db) for f in raw], args.gain_db, "gain", "dB", GAIN_TOLERANCE_DB, False)
        exposure = exposure if exposure is not None else profile.camera.exposure_ms
        gain = gain if gain is not None else profile.camera.gain_db
        found_dark = await asyncio.to_thread(store.find_dark, profile, exposure, gain)
        if found_dark is None:
            raise CalibrationError(store.describe_missing(profile, exposure, gain))
        dark, _ = found_dark
        positions = {f.position for f in raw if f.position is not None}
        builder = RetrospectiveFlatBuilder(dark, block_px=args.block_px, degree=args.degree)
        for f in raw:
            await asyncio.to_thread(builder.add, f.pixels)
        if len(positions) and len(positions) < min(len(raw), 6):
            raise CalibrationError(
                f"the {len(raw)} frames come from only {len(positions)} stage positions; a retrospective flat "
                "needs frames from many different positions"
            )
        result = await asyncio.to_thread(builder.result)
        path = await asyncio.to_thread(
            store.save_flat, profile, result.flat, exposure_ms=exposure, gain_db=gain, frames=result.frames,
            bit_depth=profile.camera.bit_depth, method="retrospective (median of positions, fitted surface)",
            extra={"retrospective": result.quality(), "sources": [str(f.path) for f in raw[:2000]]},
        )
    except CalibrationError as exc:
        return _fail(exc)
    truth_err = _retro_truth_error(profile, result.shape)
    report = {
        "saved": str(path), "exposure_ms": exposure, "gain_db": gain, "frames": result.frames,
        "skipped_corrected": skipped, **result.quality(), "simulator_illumination_rms_error": truth_err,
    }
    lines = [
        f"saved retrospective flat {path} from {result.frames} frames ({exposure:g} ms, {gain:g} dB)",
        f"  expected error {result.error_estimate_fraction * 100:.2f} % RMS (random {result.uncertainty_fraction * 100:.2f} %, "
        f"systematic {result.systematic_fraction * 100:.2f} %); shading range {result.shading_range_fraction * 100:.0f} %",
    ]
    if truth_err is not None:
        lines.append(f"  against the simulator's illumination map: {truth_err * 100:.2f} % RMS")
    if skipped:
        lines.append(f"  skipped {skipped} corrected frames (a flat is estimated from raw frames)")
    _emit(args, report, lines)
    return 0


def _retro_truth_error(profile: Profile, shape: np.ndarray) -> float | None:
    # The map is the profile's full frame: a flat of another size is a crop, not comparable.
    sim = profile.sim
    if sim is not None and getattr(sim, "start_time", None) == "now":
        # The lamp's map does not depend on when the plate was seeded: any fixed date will do.
        profile = dataclasses.replace(profile, sim=dataclasses.replace(sim, start_time="2026-01-01T00:00:00+00:00"))  # type: ignore[type-var]
    light = offline_truth(profile).illumination_map()
    if light is None:
        return None
    truth = np.asarray(light, dtype=np.float64)
    if truth.shape != shape.shape:
        return None
    return float(np.sqrt(np.mean((shape / shape.mean() - truth / truth.mean()) ** 2)))


async def run_list(args: argparse.Namespace) -> int:
    profile = load_profile(args.profile)
    store = CalibrationStore(args.data / "calibration")
    rows = store.list_sets(profile)
    if args.json:
        print_json(rows)
        return 0
    if not rows:
        print(f"no calibration frames for profile {profile.name} under {store.root}")
        return 0
    for r in rows:
        print(
            f"{r['kind']:<5} {r['objective']:<16} {r['exposure_ms']:>9.3f} ms {r['gain_db']:>6.2f} dB "
            f"{r.get('frames_averaged', '?'):>4} frames  {r.get('acquired_utc') or '-':<32} {r.get('method', '')}"
        )
    return 0
