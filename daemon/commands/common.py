"""Options and helpers shared by several sub-commands."""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path
from typing import Any


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


def truth_beside(estimate: float, truth: float | None, unit: str, fmt: str = ".2f") -> str:
    """'12.34 um (simulator: 12.00 um)', the simulator's truth beside every estimate."""
    text = f"{estimate:{fmt}} {unit}".rstrip()
    if truth is not None:
        text += f"  (simulator: {truth:{fmt}} {unit})".rstrip()
    return text
