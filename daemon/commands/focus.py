"""``phasewatch focus``: run one autofocus and print the result and its focus curve."""

from __future__ import annotations

import argparse
import math
import sys

from daemon.commands.common import (
    add_position_options,
    add_profile_options,
    add_request_options,
    move_from_args,
    print_json,
    request_from_args,
    truth_beside,
    use_demo_well,
)
from daemon.focus.autofocus import AutofocusRequest, FocusPoint, FocusResult, autofocus_as_asked
from daemon.hardware import build_scope
from daemon.manual import apply_move
from daemon.profile import load_profile

BAR_WIDTH = 40


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "focus", help="run one autofocus and print the focus curve",
        description="Run one cold autofocus and print the plane, its score and confidence, the frames "
        "and time it took, and the focus curve (with the simulator's true plane on a simulated scope).",
        epilog="Exit status: 0 focus found, 1 no focus found (the focus is left at the starting plane), "
        "2 a bad option or profile.",
    )
    add_profile_options(p)
    p.add_argument("--json", action="store_true", help="print the result as JSON")
    add_position_options(p, verb="focus")
    # The web API's autofocus request: the same fields, limits and checks.
    add_request_options(
        p, AutofocusRequest, flags={"centre_z_um": ["--z-um", "--centre-z-um"], "roi_px": ["--roi"]},
        metavars={"roi_px": ("X", "Y", "W", "H")},
    )
    p.set_defaults(func=run)


async def run(args: argparse.Namespace) -> int:
    profile = load_profile(args.profile)
    request = request_from_args(AutofocusRequest, args)
    request.check(profile)  # refused before the hardware is opened
    demo = use_demo_well(profile, args)
    target = move_from_args(profile, args)
    scope = build_scope(profile, sim_speed=args.sim_speed)
    async with scope, scope.claim("autofocus (command line)"):
        if target is not None:
            await apply_move(scope, target)
            if demo:
                # Beside JSON on stdout the note goes to stderr, so the JSON stays parseable.
                print(demo, file=sys.stderr if args.json else sys.stdout)
        result = await autofocus_as_asked(scope, request)
        if scope.truth.known and not result.found:
            here = await scope.position()
            if scope.truth.well_at(here.x_um, here.y_um) is None:
                result.message += f"; the {scope.truth.source} has no well under the stage (try --well B3)"
    if args.json:
        print_json(result.to_dict())
    else:
        print(report(result, depth_of_field_um=profile.optics.depth_of_field_um))
    return 0 if result.found else 1


def report(result: FocusResult, *, depth_of_field_um: float) -> str:
    lines = [result.message]
    lines.append(f"  z         {truth_beside(result.z_um, result.true_z_um, 'um')}")
    if result.true_z_um is not None:
        err = result.z_um - result.true_z_um
        lines.append(f"  error     {err:+.2f} um ({abs(err) / depth_of_field_um:.2f} depth of field)")
    score = "-" if not math.isfinite(result.score) else f"{result.score:.4g}"
    lines.append(f"  score     {score} ({result.metric})")
    lines.append(f"  confidence {result.confidence:.2f}")
    lines.append(f"  frames    {result.frames} in {result.elapsed_s:.2f} s")
    lines.append("  focus curve (z um, score; in the order taken: #):")
    lines.extend("  " + row for row in curve_picture(result.curve, result.z_um, result.true_z_um))
    return "\n".join(lines)


def curve_picture(curve: list[FocusPoint], z_um: float | None = None, true_z_um: float | None = None) -> list[str]:
    """The curve as a bar per frame, sorted by z; '<' marks the chosen plane, '*' the true one."""
    if not curve:
        return ["(no frames)"]
    scores = [p.score for p in curve]
    lo, hi = min(scores), max(scores)
    span = hi - lo if hi > lo else 1.0
    order = sorted(range(len(curve)), key=lambda i: curve[i].z_um)
    rows = []
    closest = min(order, key=lambda i: abs(curve[i].z_um - z_um)) if z_um is not None else None
    zs = [p.z_um for p in curve]
    truest = None
    if true_z_um is not None and min(zs) <= true_z_um <= max(zs):
        truest = min(order, key=lambda i: abs(curve[i].z_um - true_z_um))
    for i in order:
        p = curve[i]
        n = 1 + round((p.score - lo) / span * (BAR_WIDTH - 1))
        mark = ("<" if i == closest else " ") + ("*" if i == truest else " ")
        rows.append(f"{p.z_um:9.2f} |{'#' * n:<{BAR_WIDTH}}| {p.score:10.4g} #{i + 1:<3}{mark}")
    return rows
