"""``phasewatch characterize``: photon-transfer characterisation of the camera (EMVA 1288).

    phasewatch characterize --profile P [--out DIR] [--json] [--gain-db G] [--steps N]

Put a blank field under the objective (an empty well, or no vessel); on the simulated
scope the stage goes to its empty well by itself. The command steps the exposure from
near zero to past saturation with the lamp on and off, then reports system gain K, read
noise, dark signal, DSNU, PRNU, saturation and dynamic range, writes
``photon-transfer.png`` and ``characterization.json`` into ``--out``, and on the
simulated scope puts the simulator's true sensor constants beside every estimate.
"""

from __future__ import annotations

import argparse
import asyncio
import datetime as dt
import json
import os
import sys
from pathlib import Path
from typing import Any

from daemon import __version__
from daemon.commands.calibrate import _move_to_blank
from daemon.commands.common import add_profile_options, print_json, stderr_progress
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
from daemon.profile import Profile, load_profile
from daemon.scope import Scope

EXIT_CHARACTERIZATION = 2


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("characterize", help="measure the camera's gain, noise and non-uniformity (EMVA 1288 photon transfer)")
    add_profile_options(p)
    p.add_argument("--out", type=Path, default=Path("phasewatch-characterization"),
                   help="folder for photon-transfer.png and characterization.json (default: ./phasewatch-characterization)")
    p.add_argument("--json", action="store_true", help="print the summary as JSON")
    p.add_argument("--gain-db", type=float, default=None, help="camera gain to characterise (default: profile)")
    p.add_argument("--steps", type=int, default=24, help="exposure steps from dark to past saturation (default 24)")
    p.add_argument("--spatial-frames", type=int, default=16, help="frames averaged for DSNU and PRNU (default 16)")
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


def report_dict(
    profile: Profile, measurement: Measurement, result: Characterization, truth: dict[str, float] | None, where: str,
) -> dict[str, Any]:
    def rel(key: str, value: float) -> float | None:
        if not truth or not truth.get(key):
            return None
        return value / truth[key] - 1.0

    return {
        "standard": "EMVA 1288 (Release 4.0 Linear), photon transfer",
        "software": f"phasewatch {__version__}",
        "created_utc": dt.datetime.now(dt.timezone.utc).isoformat(),
        "profile": profile.name,
        "scope": profile.scope.name,
        "camera": f"{profile.camera.driver} {profile.camera.width_px}x{profile.camera.height_px} {profile.camera.bit_depth}-bit",
        "gain_db": measurement.gain_db,
        "field": where,
        "measuring_area_px": int(measurement.mask.sum()),
        "results": result.as_dict(),
        "simulator": truth,
        "relative_error": None if not truth else {
            "system_gain": rel("system_gain_dn_per_e", result.system_gain_dn_per_e),
            "read_noise": rel("read_noise_e", result.read_noise_e),
            "dark_current": rel("dark_current_e_per_s", result.dark_current_e_per_s),
            "dsnu": rel("dsnu_e", result.dsnu_e),
            "prnu": rel("prnu_fraction", result.prnu_fraction),
            "saturation_capacity": rel("saturation_capacity_e", result.saturation_capacity_e),
        },
        "points": [p.__dict__ for p in measurement.points],
        "spatial_stacks": {"exposure_ms": measurement.stacks.exposure_ms, "frames": measurement.stacks.frames},
    }


def _write_json(path: Path, obj: Any) -> None:
    tmp = path.with_name(f".{path.name}.partial")
    tmp.write_text(json.dumps(obj, indent=2, default=str), encoding="utf-8")
    os.replace(tmp, path)


async def characterize(
    profile: Profile, *, out: Path, gain_db: float | None = None, steps: int = 24, spatial_frames: int = 16,
    sim_speed: float | None = None, x_um: float | None = None, y_um: float | None = None, progress: Any = None,
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
        where = await _move_to_blank(scope, argparse.Namespace(x_um=x_um, y_um=y_um))
        if progress is not None:
            print(f"characterising on {where}", file=sys.stderr)
        m = await measure(scope, gain_db=gain, steps=steps, spatial_frames=spatial_frames, progress=progress)
        truth = simulator_truth(scope, gain)
    result = await asyncio.to_thread(analyse, m.points, m.stacks, m.dark_series)
    report = report_dict(profile, m, result, truth, where)
    png = out / "photon-transfer.png"
    title = (
        f"{profile.scope.name} — {report['camera']}, gain {gain:g} dB"
        + (" — simulator's true values beside the estimates" if truth else "")
    )
    await asyncio.to_thread(plot_photon_transfer, m, result, png, title=title, truth=truth)
    report["plot"] = str(png)
    report["summary"] = str(out / "characterization.json")
    await asyncio.to_thread(_write_json, out / "characterization.json", report)
    return report


async def run(args: argparse.Namespace) -> int:
    profile = load_profile(args.profile)
    try:
        report = await characterize(
            profile, out=args.out, gain_db=args.gain_db, steps=args.steps, spatial_frames=args.spatial_frames,
            sim_speed=args.sim_speed, x_um=args.x_um, y_um=args.y_um, progress=stderr_progress("characterize"),
        )
    except CalibrationError as exc:
        print(f"phasewatch: {exc}", file=sys.stderr)
        return EXIT_CHARACTERIZATION
    if args.json:
        print_json({k: v for k, v in report.items() if k != "points"})
        return 0
    results = Characterization(**{k: v for k, v in report["results"].items() if k not in ("dynamic_range_db", "snr_max_db")})
    truth = report["simulator"]
    print(f"{report['scope']}: {report['camera']}, gain {report['gain_db']:g} dB ({report['standard']})")
    width = max(len(r[0]) for r in summary_rows(results, truth))
    for name, est, sim, unit in summary_rows(results, truth):
        line = f"  {name:<{width}}  {est:>9} {unit}"
        if sim:
            line += f"   (simulator: {sim} {unit})"
        print(line)
    if not results.dark_resolved:
        print(
            "  the dark noise is below one grey level at this gain: read noise is an upper bound and DSNU and "
            "dark current are not resolved (EMVA 1288); measure again with a higher --gain-db"
        )
    print(f"  photon-transfer plot: {report['plot']}")
    print(f"  summary: {report['summary']}")
    return 0
