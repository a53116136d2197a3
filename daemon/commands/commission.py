"""``phasewatch commission``: measure the scope with its own camera and stage, and write what it found.

    phasewatch commission --profile P [--json] [--out DIR] [--well W | --x-um X --y-um Y]

Over a textured field (cells, or any target) it sets the exposure, fits the map from
stage micrometres to image pixels (pixel size, rotation, skew, mirror), measures the
backlash of x, y and the focus, the stage's repeatability and settling time
(:mod:`daemon.commission`), and writes a report, a profile patch, the patched profile and
plots into DIR. On the simulated scope the simulator's true values stand beside the
estimates. The field is the one under the objective, or ``--well`` / ``--x-um --y-um``;
with neither, a profile with a vessel map (taught, or the simulated plate's) starts over
the well nearest the vessel's middle.
"""

from __future__ import annotations

import argparse
import asyncio
import sys
from pathlib import Path

from daemon.commands.common import (
    add_position_options,
    add_profile_options,
    print_json,
    move_from_args,
    stderr_progress,
)
from daemon.commission import CommissionRefused
from daemon.commission.report import settle_tolerance_um, text_report, truth_of, write_results
from daemon.commission.run import CommissionOptions, commission
from daemon.commission.session import commissioning_profile
from daemon.hardware import build_scope
from daemon.profile import Profile, load_profile
from drivers.options import ConfigError

EXIT_REFUSED = 1


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "commission", help="measure pixel size, camera rotation, backlash, repeatability and settling; write a profile patch",
        description="Measure the scope with its own camera and stage over a textured field (cells or any target): "
        "exposure, the stage-to-image map (pixel size, rotation, skew, mirror), backlash on x, y and z, "
        "repeatability and settling time. Writes report.json, profile-patch.toml, the patched profile and "
        "PNG plots into --out. On the simulated scope the simulator's true values stand beside the estimates.",
        epilog="Exit status: 0 commissioned, 1 refused (no texture, lamp off, moves beyond the soft limits, "
        "no focus), 2 a bad option, profile or hardware error.",
    )
    add_profile_options(p)
    p.add_argument("--json", action="store_true", help="print the report as JSON")
    p.add_argument("--out", type=Path, default=None, help="folder for the results (default: ./commission-<profile>)")
    add_position_options(p, verb="commission")
    p.add_argument("--grid", type=int, default=CommissionOptions.grid, help="map grid positions per axis, odd (default 7)")
    p.add_argument("--repeats", type=int, default=CommissionOptions.repeats, help="returns for the repeatability (default 10)")
    p.add_argument("--cycles", type=int, default=CommissionOptions.backlash_cycles, help="backlash cycles per axis (default 3)")
    p.set_defaults(func=run)


def _options(args: argparse.Namespace, profile: Profile) -> CommissionOptions:
    try:
        return CommissionOptions(grid=args.grid, repeats=args.repeats, backlash_cycles=args.cycles)
    except ValueError as exc:
        raise ConfigError(profile.path, "", "--grid/--repeats/--cycles", str(exc)) from None


def _field(profile: Profile, args: argparse.Namespace) -> tuple[float | None, float | None, str]:
    """Where to commission: the options' field, else the middle well of a known vessel map, else here."""
    target = move_from_args(profile, args)
    x, y = (target.x_um, target.y_um) if target is not None else (None, None)
    if x is not None or y is not None:
        return x, y, f"well {args.well}" if args.well else "the given position"
    from daemon.vessels.geometry import get_vessel
    from daemon.vessels.stage_map import load_stage_map, sim_vessel_name

    try:
        smap = load_stage_map(args.data, profile)
        vessel = get_vessel(smap.vessel or sim_vessel_name(profile))
    except ConfigError:
        return None, None, "the field under the objective"
    # The well nearest the vessel's middle: cells there are the most even (no edge effect).
    mid_x, mid_y = vessel.length_mm / 2.0, vessel.width_mm / 2.0
    well = min(vessel.wells.values(), key=lambda w: (w.x_mm - mid_x) ** 2 + (w.y_mm - mid_y) ** 2)
    x, y = smap.well_stage_um(vessel, well.name)
    return x, y, f"well {well.name} (the middle of the {vessel.name} by its stage map)"


def _refused(args: argparse.Namespace, message: str) -> int:
    print(f"phasewatch: commission refused: {message}", file=sys.stderr)
    if args.json:
        print_json({"commissioned": False, "refused": message})
    return EXIT_REFUSED


async def run(args: argparse.Namespace) -> int:
    profile = load_profile(args.profile)
    options = _options(args, profile)
    x_um, y_um, where = _field(profile, args)
    out = args.out if args.out is not None else Path(f"commission-{profile.name}")
    args.data.mkdir(parents=True, exist_ok=True)
    scope = build_scope(commissioning_profile(profile), sim_speed=args.sim_speed, data_dir=args.data)
    progress = stderr_progress("commission")
    print(f"commissioning {profile.path} over {where}", file=sys.stderr)
    try:
        async with scope, scope.claim("commissioning (command line)"):
            if x_um is not None or y_um is not None:
                await scope.move_to(x_um=x_um, y_um=y_um)
            result = await commission(scope, options=options, progress=progress)
            truth = truth_of(scope.truth, settle_tolerance_um(result))
    except CommissionRefused as exc:
        return _refused(args, str(exc))
    report = await asyncio.to_thread(write_results, result, profile, truth, out)
    if args.json:
        print_json(report)
    else:
        print(text_report(report, report["files"]))
    return 0
