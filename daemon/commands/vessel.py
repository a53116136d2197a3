"""``phasewatch vessel``: list and show vessel geometry, teach and show the vessel-to-stage map.

    phasewatch vessel list
    phasewatch vessel show 96-well [--json] [--stage --profile P --data DIR]
    phasewatch vessel teach 96-well A1=14380,11240 H12=113380,74240 --profile P --data DIR
    phasewatch vessel teach 96-well --here A1 --add --profile P --data DIR
    phasewatch vessel map --profile P --data DIR
"""

from __future__ import annotations

import argparse
import math
import re
from pathlib import Path
from typing import Any

from daemon.commands.common import add_profile_options, print_json
from drivers.options import ConfigError
from daemon.profile import Profile, load_profile
from daemon.vessels.geometry import Vessel, get_vessel, load_vessels
from daemon.vessels.stage_map import (
    DEFAULT_SCALE_TOLERANCE,
    DEFAULT_TOLERANCE_UM,
    StageMap,
    fit_stage_map,
    load_stage_map,
    save_stage_map,
    sim_stage_map,
    stage_map_path,
)

_POINT_RE = re.compile(r"^\s*([A-Za-z]{1,2}\d{1,3})\s*=\s*(-?[\d.]+(?:e-?\d+)?)\s*,\s*(-?[\d.]+(?:e-?\d+)?)\s*$", re.I)


def teach_point(text: str) -> tuple[str, float, float]:
    """'A1=14380,11240' -> ('A1', 14380.0, 11240.0): a well and its stage x, y in um."""
    m = _POINT_RE.match(text)
    if not m:
        raise argparse.ArgumentTypeError(
            f"{text!r}: write a teach point as WELL=X,Y with the stage position in um, e.g. A1=14380,11240"
        )
    try:
        return m.group(1).upper(), float(m.group(2)), float(m.group(3))
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r}: X and Y must be numbers (um)") from None


def _add_vessels_option(p: argparse.ArgumentParser) -> None:
    p.add_argument("--vessels", type=Path, default=None, metavar="FILE",
                   help="extra vessels file (TOML) with vessels of your own")


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("vessel", help="vessel geometry (plates, dishes, flasks) and the vessel-to-stage map")
    vsub = p.add_subparsers(dest="vessel_command", metavar="ACTION", required=True)

    lp = vsub.add_parser("list", help="list the known vessels")
    _add_vessels_option(lp)
    lp.add_argument("--json", action="store_true", help="print as JSON")
    lp.set_defaults(func=run_list)

    sp = vsub.add_parser("show", help="every well centre (mm from the top-left outer corner) and diameter")
    sp.add_argument("format", metavar="FORMAT", help="vessel, e.g. 96-well, 384-well, 24-well, 35mm-dish")
    _add_vessels_option(sp)
    sp.add_argument("--json", action="store_true", help="print as JSON")
    sp.add_argument("--stage", action="store_true", help="also give each well's stage position from the profile's map")
    add_profile_options(sp, data=True)
    sp.set_defaults(func=run_show)

    tp = vsub.add_parser(
        "teach", help="fit and store the vessel-to-stage map from wells centred in live view",
        description="Centre two or three wells far apart (e.g. A1, H12, H1) in live view, note the stage "
                    "positions, and give them here. The fit reports offset, rotation and scale and warns "
                    "when the points disagree with the vessel's geometry.",
    )
    tp.add_argument("format", metavar="VESSEL", help="vessel type on the stage, e.g. 96-well")
    tp.add_argument("points", nargs="*", type=teach_point, metavar="WELL=X,Y",
                    help="a well and the stage position of its centre in um, e.g. A1=14380,11240")
    tp.add_argument("--here", metavar="WELL", action="append", default=[],
                    help="teach WELL at the stage's current position (opens the scope; not while the daemon runs)")
    tp.add_argument("--add", action="store_true", help="keep the stored teach points and add these")
    tp.add_argument("--tolerance-um", type=float, default=DEFAULT_TOLERANCE_UM,
                    help=f"largest disagreement of a teach point with the geometry (default {DEFAULT_TOLERANCE_UM:g} um)")
    tp.add_argument("--scale-tolerance", type=float, default=DEFAULT_SCALE_TOLERANCE,
                    help=f"largest relative scale error (default {DEFAULT_SCALE_TOLERANCE:g})")
    tp.add_argument("--dry-run", action="store_true", help="fit and report, store nothing")
    tp.add_argument("--json", action="store_true", help="print as JSON")
    _add_vessels_option(tp)
    add_profile_options(tp, data=True)
    tp.set_defaults(func=run_teach)

    mp = vsub.add_parser("map", help="show the profile's vessel-to-stage map")
    mp.add_argument("--vessel", default=None, help="vessel whose corner wells to place (default: the taught one)")
    mp.add_argument("--json", action="store_true", help="print as JSON")
    _add_vessels_option(mp)
    add_profile_options(mp, data=True)
    mp.set_defaults(func=run_map)


# --- list / show ----------------------------------------------------------------------


def run_list(args: argparse.Namespace) -> int:
    vessels = load_vessels(args.vessels)
    if args.json:
        print_json([
            {"name": v.name, "kind": v.kind, "wells": len(v.wells), "aliases": list(v.aliases),
             "description": v.description, "source": v.source}
            for v in vessels.values()
        ])
        return 0
    width = max(len(n) for n in vessels)
    for v in vessels.values():
        aka = f"  (also: {', '.join(v.aliases)})" if v.aliases else ""
        print(f"{v.name:<{width}}  {v.kind:<6} {len(v.wells):>5} wells  {v.description}{aka}")
    return 0


def _shape_text(w: Any) -> str:
    if w.shape == "rect":
        return f"rect {w.size_x_mm:g} x {w.size_y_mm:g}"
    return w.shape


def run_show(args: argparse.Namespace) -> int:
    vessel = get_vessel(args.format, args.vessels)
    smap: StageMap | None = None
    if args.stage:
        smap = load_stage_map(args.data, load_profile(args.profile))
    if args.json:
        out = vessel.to_dict()
        if smap is not None:
            for w in out["wells"]:
                x, y = smap.to_stage_um(w["x_mm"], w["y_mm"])
                w["stage_x_um"], w["stage_y_um"] = round(x, 1), round(y, 1)
            out["stage_map"] = smap.to_dict()
        print_json(out)
        return 0
    print(f"{vessel.name}: {vessel.description}")
    print(f"  {vessel.kind}, outer {vessel.length_mm:g} x {vessel.width_mm:g} mm"
          + (f"; {vessel.standard}" if vessel.standard else ""))
    print("  centres in mm from the top-left outer corner (A1 at top left; x along the long side, y across it)")
    header = f"  {'well':<5} {'x_mm':>9} {'y_mm':>9} {'diameter_mm':>12}  shape"
    if smap is not None:
        header += f"  {'stage_x_um':>11} {'stage_y_um':>11}"
    print(header)
    for w in vessel.wells.values():
        line = f"  {w.name:<5} {w.x_mm:>9.3f} {w.y_mm:>9.3f} {w.diameter_mm:>12.2f}  {_shape_text(w)}"
        if smap is not None:
            x, y = smap.to_stage_um(w.x_mm, w.y_mm)
            line += f"  {x:>11.1f} {y:>11.1f}"
        print(line)
    return 0


# --- teach / map ----------------------------------------------------------------------


async def _current_xy_um(profile: Profile, args: argparse.Namespace) -> tuple[float, float]:
    from daemon.hardware import build_scope  # the scope is opened only for --here

    scope = build_scope(profile, sim_speed=args.sim_speed, data_dir=args.data)
    async with scope:
        pos = await scope.position()
    return pos.x_um, pos.y_um


def _corner_wells(vessel: Vessel) -> list[str]:
    names = list(vessel.wells)
    if len(names) == 1:
        return names
    first_row = [n for n, w in vessel.wells.items() if w.row == 0]
    last_row = [n for n, w in vessel.wells.items() if w.row == vessel.rows - 1]
    return list(dict.fromkeys([first_row[0], first_row[-1], last_row[0], last_row[-1]]))


def _outside_limits(profile: Profile, vessel: Vessel, smap: StageMap) -> list[str]:
    s = profile.stage
    bad = []
    for w in vessel.wells.values():
        x, y = smap.to_stage_um(w.x_mm, w.y_mm)
        if not (s.x_min_um <= x <= s.x_max_um and s.y_min_um <= y <= s.y_max_um):
            bad.append(w.name)
    return bad


def _describe_map(smap: StageMap) -> list[str]:
    lines = [
        # + 0.0 turns a rounding -0.0 into 0.0
        f"  offset of the vessel corner: x {smap.offset_x_um + 0.0:.1f} um, y {smap.offset_y_um + 0.0:.1f} um",
        f"  rotation {smap.rotation_deg:+.3f} deg, scale {smap.scale:.5f}"
        + (", y mirrored" if smap.mirror_y else ""),
    ]
    for p in smap.teach:
        lines.append(f"  teach point {p.well}: stage ({p.x_um:.1f}, {p.y_um:.1f}) um, off the fit by {p.residual_um:.1f} um")
    return lines


def _truth_lines(profile: Profile, vessel: Vessel, smap: StageMap) -> list[str]:
    """On the simulated scope, how far the fitted map puts wells from where the simulator has them."""
    if profile.sim is None:
        return []
    truth = sim_stage_map(profile)
    worst = max(
        math.dist(smap.to_stage_um(w.x_mm, w.y_mm), truth.to_stage_um(w.x_mm, w.y_mm)) for w in vessel.wells.values()
    )
    return [
        # + 0.0 so that a rounding -0.0 prints as 0.0
        f"  (simulator: offset x {truth.offset_x_um + 0.0:.1f} um, y {truth.offset_y_um + 0.0:.1f} um, rotation +0.000 deg, "
        f"scale 1.00000; fitted wells lie within {worst:.1f} um of the simulator's)"
    ]


async def run_teach(args: argparse.Namespace) -> int:
    profile = load_profile(args.profile)
    vessel = get_vessel(args.format, args.vessels)
    points: list[tuple[str, float, float]] = list(args.points)
    for well in args.here:
        x, y = await _current_xy_um(profile, args)
        points.append((well.upper(), x, y))
    if args.add and stage_map_path(args.data, profile).exists():
        stored = load_stage_map(args.data, profile)
        if stored.vessel != vessel.name:
            raise ConfigError(
                stage_map_path(args.data, profile), "", None,
                f"the stored teach points are for a {stored.vessel or 'different vessel'}; "
                f"teach the {vessel.name} afresh without --add",
            )
        new = {vessel.well(w).name for w, _, _ in points}
        points = [(p.well, p.x_um, p.y_um) for p in stored.teach if p.well not in new] + points
    if not points:
        raise ConfigError("", "vessel teach", None, "give teach points as WELL=X,Y (stage um) or --here WELL")
    smap, warnings = fit_stage_map(vessel, points, tolerance_um=args.tolerance_um, scale_tolerance=args.scale_tolerance)
    outside = _outside_limits(profile, vessel, smap)
    if outside:
        warnings.append(
            f"{len(outside)} wells (e.g. {', '.join(outside[:3])}) fall outside the stage limits of profile "
            f"{profile.name}; they cannot be imaged"
        )
    stored_at = None if args.dry_run else save_stage_map(args.data, profile, smap)
    if args.json:
        print_json({"stage_map": smap.to_dict(), "warnings": warnings, "stored": str(stored_at) if stored_at else None})
        return 0
    print(f"{vessel.name} on profile {profile.name}, {len(points)} teach point{'s' if len(points) != 1 else ''}:")
    for line in _describe_map(smap) + _truth_lines(profile, vessel, smap):
        print(line)
    for w in warnings:
        print(f"  warning: {w}")
    print(f"  stored in {stored_at}" if stored_at else "  not stored (--dry-run)")
    return 0


def run_map(args: argparse.Namespace) -> int:
    profile = load_profile(args.profile)
    smap = load_stage_map(args.data, profile)
    vessel = get_vessel(args.vessel or smap.vessel or "96-well", args.vessels)
    corners = {n: smap.to_stage_um(vessel.well(n).x_mm, vessel.well(n).y_mm) for n in _corner_wells(vessel)}
    if args.json:
        print_json({"stage_map": smap.to_dict(), "vessel": vessel.name,
                    "corner_wells_um": {n: [round(x, 1), round(y, 1)] for n, (x, y) in corners.items()}})
        return 0
    origin = "taught" if smap.source == "taught" else "derived from the simulator's [sim.plate] (none taught)"
    print(f"vessel-to-stage map of profile {profile.name}: {origin}"
          + (f", on a {smap.vessel}" if smap.vessel else "") + (f", {smap.created}" if smap.created else ""))
    for line in _describe_map(smap):
        print(line)
    for name, (x, y) in corners.items():
        print(f"  {vessel.name} {name}: stage x {x:.1f} um, y {y:.1f} um")
    return 0
