"""Options and helpers shared by several sub-commands."""

from __future__ import annotations

import argparse
import json
import sys
import typing
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any, TypeVar

from daemon.errors import BadRequest
from daemon.manual import MoveRequest, MoveTarget, resolve_move
from daemon.requests import alternatives, default_of, parse_text_request, request_fields
from drivers.options import ConfigError, describe_option

if TYPE_CHECKING:
    from daemon.profile import Profile

T = TypeVar("T")


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


def add_request_options(
    parser: argparse.ArgumentParser,
    cls: type,
    *,
    only: Sequence[str] | None = None,
    flags: Mapping[str, Sequence[str]] | None = None,
    metavars: Mapping[str, str | tuple[str, ...]] | None = None,
    helps: Mapping[str, str] | None = None,
) -> None:
    """Options for the fields of a request dataclass (``only`` these, in this order).

    Each field becomes ``--field-name`` (or the flags given for it, the first one named in
    errors), its help is the field's doc, what it allows and its default. The values stay
    text: :func:`request_from_args` parses them with the request's loader, so a bad value
    is refused with the same words the web API uses, naming the option
    (``phasewatch: --range-um: must be ...``).
    """
    fields = {f.name: (f, tp) for f, tp in request_fields(cls)}
    names = list(only) if only is not None else list(fields)
    named = dict(parser.get_default("request_flags") or {})
    for name in names:
        f, tp = fields[name]
        options = list((flags or {}).get(name) or ["--" + name.replace("_", "-")])
        many = any(typing.get_origin(a) in (list, tuple) for a in alternatives(tp))
        text = (helps or {}).get(name) or str(f.metadata["doc"])
        meta = f.metadata
        limited = meta.get("choices") or meta.get("min") is not None or meta.get("max") is not None
        unit = f" [{meta['unit']}]" if meta.get("unit") and not limited else ""
        default = default_of(f)
        help_text = (f"{text}{unit}" + (f"; {describe_option(cls, name)}" if limited else "")
                     + (f" (default {default})" if default is not None else ""))
        kwargs: dict[str, Any] = {"dest": name, "default": None, "help": help_text.replace("%", "%%")}
        metavar = (metavars or {}).get(name)
        if metavar is not None:
            kwargs["metavar"] = metavar
        if many:
            kwargs["nargs"] = len(metavar) if isinstance(metavar, tuple) else "+"
        parser.add_argument(*options, **kwargs)
        named[name] = options[0]
    parser.set_defaults(request_flags=named)


def request_from_args(cls: type[T], args: argparse.Namespace, only: Sequence[str] | None = None) -> T:
    """The request of the options given for ``cls`` (absent ones take the request's defaults)."""
    names = list(only) if only is not None else [f.name for f, _ in request_fields(cls)]
    texts = {n: getattr(args, n) for n in names if getattr(args, n, None) is not None}
    return parse_text_request(cls, texts)


def flag_for(args: argparse.Namespace, field: str) -> str:
    """The command-line option that sets a request field."""
    return dict(getattr(args, "request_flags", None) or {}).get(field) or "--" + field.replace("_", "-")


POSITION_FIELDS = ("x_um", "y_um", "well", "vessel")


def add_position_options(parser: argparse.ArgumentParser, *, verb: str, z: bool = False) -> None:
    """Where to go first (the web API's move request): --x-um/--y-um or --well through the
    profile's vessel-to-stage map, and with ``z`` the focus too."""
    add_request_options(parser, MoveRequest, only=POSITION_FIELDS + (("z_um",) if z else ()), helps={
        "x_um": f"stage x to {verb} at (default: where it is)",
        "y_um": f"stage y to {verb} at (default: where it is)",
        "well": f"{verb} at the centre of this well, e.g. C4, through the vessel-to-stage map "
                "(taught with 'phasewatch vessel teach'; built in on the simulated scope)",
        "vessel": "vessel format of --well (default: the stage map's)",
        "z_um": f"focus position to {verb} at (default: where it is)",
    })
    if not any(a.dest == "data" for a in parser._actions):
        parser.add_argument(
            "--data", type=Path, default=Path("phasewatch-data"),
            help="data folder holding the stage maps (default: ./phasewatch-data)",
        )


DEMO_WELL = "B3"
"""The simulated plate's well with cells that a command goes to when given no position."""


def use_demo_well(profile: Profile, args: argparse.Namespace) -> str | None:
    """On the simulated scope with no position given, aim at :data:`DEMO_WELL` and return the
    line that says so; None (and no change) otherwise.

    After homing, the simulated stage sits off the plate, where there is nothing to focus on
    or to see: every command that works at one position goes to the same well and says it
    did, rather than failing in one command and moving silently in another. A real scope
    stays where it is: it is never moved without being asked."""
    if not profile.is_simulated or any(getattr(args, n, None) is not None for n in POSITION_FIELDS):
        return None
    args.well = DEMO_WELL
    return f"moved to well {DEMO_WELL} (the demo well: no position given)"


def move_from_args(profile: Profile, args: argparse.Namespace, fields: Sequence[str] = POSITION_FIELDS) -> MoveTarget | None:
    """The move the position options ask for, its well resolved through the stage map; None
    to stay. Refused as the web API refuses it (BadRequest naming the option)."""
    if all(getattr(args, n, None) is None for n in fields):
        return None
    request = request_from_args(MoveRequest, args, fields)
    try:
        return resolve_move(request, profile, args.data)
    except ConfigError as exc:
        if request.well is None:
            raise
        raise BadRequest(exc.problem, field="well") from None
