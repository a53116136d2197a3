"""Options and helpers shared by several sub-commands."""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path
from typing import TYPE_CHECKING, Any

from drivers.options import ConfigError

if TYPE_CHECKING:
    from daemon.profile import Profile


def add_profile_options(parser: argparse.ArgumentParser, *, data: bool = False) -> None:
    parser.add_argument(
        "--profile", "-p", default="sim",
        help="scope profile: a path, or a name in hw_profiles/ (default: sim)",
    )
    parser.add_argument(
        "--sim-speed", type=float, default=None, metavar="X",
        help="simulated scope only: run the clock X times faster than real time",
    )
    if data:
        parser.add_argument(
            "--data", type=Path, default=Path("phasewatch-data"),
            help="data folder (default: ./phasewatch-data)",
        )


def print_json(obj: Any) -> None:
    json.dump(obj, sys.stdout, indent=2, default=str)
    sys.stdout.write("\n")


def stderr_progress(prefix: str) -> Any:
    """A ``progress(done, total, message)`` that keeps one updating line on a terminal and
    prints about ten lines otherwise (logs, pipes)."""
    tty = sys.stderr.isatty()
    last_shown = [-1]

    def show(done: int, total: int, message: str) -> None:
        pct = int(100 * done / max(total, 1))
        if tty:
            end = "\n" if done >= total else ""
            sys.stderr.write(f"\r\x1b[K{prefix}: {pct:3d} % ({done}/{total}) {message}{end}")
        elif pct // 10 != last_shown[0] // 10 or done >= total:
            sys.stderr.write(f"{prefix}: {pct:3d} % ({done}/{total}) {message}\n")
        last_shown[0] = pct
        sys.stderr.flush()

    return show


def truth_beside(estimate: float, truth: float | None, unit: str, fmt: str = ".2f") -> str:
    """'12.34 um (simulator: 12.00 um)', the simulator's truth beside every estimate."""
    text = f"{estimate:{fmt}} {unit}".rstrip()
    if truth is not None:
        text += f"  (simulator: {truth:{fmt}} {unit})".rstrip()
    return text


def add_position_options(parser: argparse.ArgumentParser, *, verb: str) -> None:
    """--x-um/--y-um or --well (through the profile's vessel-to-stage map) for commands that image."""
    parser.add_argument("--x-um", type=float, default=None, help=f"stage x to {verb} at (default: where it is)")
    parser.add_argument("--y-um", type=float, default=None, help=f"stage y to {verb} at (default: where it is)")
    parser.add_argument(
        "--well", default=None,
        help=f"{verb} at the centre of this well, e.g. C4, through the vessel-to-stage map "
        "(taught with 'phasewatch vessel teach'; built in on the simulated scope)",
    )
    parser.add_argument("--vessel", default=None, help="vessel format for --well (default: the stage map's)")
    if not any(a.dest == "data" for a in parser._actions):
        parser.add_argument(
            "--data", type=Path, default=Path("phasewatch-data"),
            help="data folder holding the stage maps (default: ./phasewatch-data)",
        )


def target_position_um(profile: Profile, args: argparse.Namespace) -> tuple[float | None, float | None]:
    """Where --well or --x-um/--y-um ask the stage to go; (None, None) to stay."""
    if args.well is None:
        return args.x_um, args.y_um
    if args.x_um is not None or args.y_um is not None:
        raise ConfigError(profile.path, "", "--well", "give either --well or --x-um/--y-um, not both")
    from daemon.vessels.stage_map import well_position_um

    try:
        return well_position_um(args.data, profile, args.well, args.vessel)
    except ConfigError as exc:
        raise ConfigError(profile.path, "", "--well", exc.problem) from None
