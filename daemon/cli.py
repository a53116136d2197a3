"""``phasewatch`` command line. Each sub-command lives in its own module in daemon/commands/.

A command module defines ``register(sub)``, adding its parser with
``set_defaults(func=...)``; the function takes the parsed arguments and returns an exit
code (it may be a coroutine function). Errors a user can cause are printed as one line,
without a traceback, and exit with status 2. A request refused for one of its values
(:class:`~daemon.errors.BadRequest`) is printed with the same text the web API answers,
naming the command-line option instead of the JSON field.
"""

from __future__ import annotations

import argparse
import asyncio
import importlib
import inspect
import pkgutil
import sys
from collections.abc import Sequence

import daemon.commands
from daemon import __version__
from daemon.commands.common import flag_for
from daemon.errors import BadRequest, Busy, NotFound
from drivers.base import HardwareError
from drivers.options import ConfigError

EXIT_USER_ERROR = 2


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="phasewatch",
        description="Acquisition daemon for phase-contrast microscopes inside incubators.",
    )
    parser.add_argument("--version", action="version", version=f"phasewatch {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)
    for info in sorted(pkgutil.iter_modules(daemon.commands.__path__), key=lambda m: m.name):
        module = importlib.import_module(f"daemon.commands.{info.name}")
        register = getattr(module, "register", None)
        if register is not None:
            register(sub)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    from daemon.memory import return_freed_frames_to_the_system

    return_freed_frames_to_the_system()  # before the first frame: see daemon.memory
    args = build_parser().parse_args(argv)
    try:
        result = args.func(args)
        if inspect.iscoroutine(result):
            result = asyncio.run(result)
        return int(result or 0)
    except BadRequest as exc:
        where = f"{flag_for(args, exc.field)}: " if exc.field else ""
        print(f"phasewatch: {where}{exc.problem}", file=sys.stderr)
        return EXIT_USER_ERROR
    except (ConfigError, HardwareError, Busy, NotFound) as exc:
        print(f"phasewatch: {exc}", file=sys.stderr)
        return EXIT_USER_ERROR
    except OSError as exc:
        where = f" ({exc.filename})" if exc.filename else ""
        print(f"phasewatch: {exc.strerror or exc}{where}", file=sys.stderr)
        return EXIT_USER_ERROR
    except KeyboardInterrupt:
        print("phasewatch: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
