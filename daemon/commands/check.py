"""``phasewatch check PROFILE [--probe]``: validate a profile, optionally open the hardware.

Every problem in the profile is listed in one run (one line each, naming file, section and
option; exit status 2), so a profile is fixed in one edit rather than one run per mistake.
Values that are allowed but implausible are warned about and do not fail the check.
"""

from __future__ import annotations

import argparse
import dataclasses
import sys

import numpy as np

from daemon.commands.common import print_json
from daemon.hardware import build_scope
from daemon.profile import Profile, load_profile, profile_warnings
from drivers.options import ConfigError, flatten

EXIT_PROBLEMS = 2


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "check", help="validate a scope profile; --probe also opens the hardware",
        description="List every problem in a scope profile, and warn about values that are allowed but unlikely.",
        epilog="Exit status: 0 valid (perhaps with warnings), 2 problems found (all of them are listed).",
    )
    p.add_argument("profile", help="profile path or name in hw_profiles/")
    p.add_argument("--probe", action="store_true", help="open camera and controller and report what was found")
    p.add_argument("--json", action="store_true", help="print the report as JSON")
    p.set_defaults(func=run)


def _options_text(options: object) -> str:
    """' (port /dev/ttyUSB0, baud 115200)' for a driver's own options, '' when it has none."""
    if options is None or not dataclasses.is_dataclass(options):
        return ""
    items = [f"{f.name} {getattr(options, f.name)}" for f in dataclasses.fields(options)]
    return f" ({', '.join(items)})" if items else ""


def summary(profile: Profile) -> dict[str, object]:
    o, s, f = profile.optics, profile.stage, profile.focus
    cam = profile.camera
    return {
        "profile": str(profile.path),
        "scope": profile.scope.name,
        "camera": f"{cam.driver} {cam.width_px}x{cam.height_px} {cam.bit_depth}-bit" + _options_text(cam.options),
        "objective": o.objective,
        "pixel_size_um": round(o.pixel_size_um, 4),
        "field_of_view_um": [round(cam.width_px * o.pixel_size_um, 1), round(cam.height_px * o.pixel_size_um, 1)],
        "depth_of_field_um": round(o.depth_of_field_um, 2),
        "stage": s.driver + _options_text(s.options),
        "limits_um": {"x": [s.x_min_um, s.x_max_um], "y": [s.y_min_um, s.y_max_um], "z": [f.z_min_um, f.z_safe_max_um]},
        "simulated": profile.is_simulated,
    }


async def probe(profile: Profile) -> dict[str, object]:
    scope = build_scope(profile)
    async with scope:
        frame = await scope.capture()
        pos = await scope.position()
        px = frame.pixels
        full_scale = float(2**frame.bit_depth - 1)
        controller = scope.motion.describe()
        camera_probe = getattr(scope.camera, "probe", None)
        offer: dict[str, object] | None = await camera_probe() if camera_probe is not None else None
        warnings = list(offer.get("warnings", [])) if offer else []  # type: ignore[call-overload]
        return {
            "controller_found": _controller_found(controller),
            "camera_offer": offer if offer is not None else (
                f"nothing to probe: the {profile.camera.driver} camera is not a device"
            ),
            "warnings": warnings,
            "camera": scope.camera.describe(),
            "controller": controller,
            "position_um": {"x": pos.x_um, "y": pos.y_um, "z": pos.z_um},
            "test_frame": {
                "shape": list(px.shape),
                "mean_fraction_of_full_scale": round(float(np.mean(px)) / full_scale, 4),
                "saturated_fraction": round(float(np.mean(px >= full_scale)), 6),
            },
        }


def _controller_found(controller: dict[str, object]) -> dict[str, object]:
    """Which dialect and firmware the controller answered with; a driver without dialects says so."""
    if "dialect" not in controller:
        return {"dialect": None, "firmware": controller.get("firmware")}
    return {
        "dialect": controller["dialect"],
        "dialect_name": controller.get("dialect_name"),
        "how": controller.get("dialect_found"),
        "firmware": controller.get("firmware"),
        "line_checksums": controller.get("line_checksums"),
    }


async def run(args: argparse.Namespace) -> int:
    try:
        profile = load_profile(args.profile)
    except ConfigError as exc:
        problems = [str(p) for p in flatten([exc])]
        if args.json:
            print_json({"valid": False, "problems": problems})
        elif len(problems) == 1:
            print(f"phasewatch: {problems[0]}", file=sys.stderr)
        else:
            print(f"phasewatch: {len(problems)} problems in the profile:", file=sys.stderr)
            for line in problems:
                print(f"  {line}", file=sys.stderr)
        return EXIT_PROBLEMS
    warnings = profile_warnings(profile)
    report: dict[str, object] = {"valid": True, **summary(profile), "warnings": warnings}
    if args.probe:
        report["probe"] = await probe(profile)
    if args.json:
        print_json(report)
        return 0
    print(f"{profile.path}: valid")
    for key, value in report.items():
        if key in ("valid", "probe", "warnings"):
            continue
        print(f"  {key}: {value}")
    for warning in warnings:
        print(f"  warning: {warning}")
    if args.probe:
        found = report["probe"]
        print("  probe:")
        for key, value in found.items():  # type: ignore[union-attr]
            if key == "warnings":
                continue
            print(f"    {key}: {value}")
        for warning in found["warnings"]:  # type: ignore[index]
            print(f"  warning: {warning}")
    return 0
