"""``phasewatch export ID --data DIR [--stacks]``: CSV of per-frame metrics, per-position stacks."""

from __future__ import annotations

import argparse
from pathlib import Path


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("export", help="write a time-lapse's per-frame metrics as CSV (and stacks per position)")
    p.add_argument("id", type=int, metavar="ID", help="time-lapse id (phasewatch timelapse list)")
    p.add_argument("--data", type=Path, default=Path("phasewatch-data"), help="data folder (default: ./phasewatch-data)")
    p.add_argument("--output", "-o", type=Path, default=None, metavar="DIR",
                   help="where to write (default: DATA/exports/<time-lapse folder>)")
    p.add_argument("--stacks", action="store_true", help="also write one multi-page OME-TIFF per position")
    p.add_argument("--kind", choices=("raw", "corrected"), default=None,
                   help="frames for the stacks (default: corrected where saved, else raw)")
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    """The same exports as ``POST /api/v1/timelapses/{id}/exports`` (:meth:`Archive.make_exports`)."""
    import os
    import sys

    from daemon.archive import Archive
    from daemon.timelapse.resume import open_for_reading

    index, note = open_for_reading(args.data)
    if note:
        print(note, file=sys.stderr)
    if args.output is None and not os.access(args.data, os.W_OK):
        index.close()
        raise PermissionError(
            13, f"{args.data} is read-only; name a folder to write the export to with --output DIR", str(args.data)
        )
    with index:
        made = Archive(args.data, index).make_exports(args.id, folder=args.output, stacks=args.stacks, kind=args.kind)
    print(f"wrote {made.frames_csv} ({made.frames} frames), {made.time_points_csv}, "
          f"{made.frames_csv.with_name('wells.csv')} and {made.frames_csv.with_name('growth.csv')}")
    for s in made.stacks:
        skipped = f", {s.skipped_time_points} incomplete time points left out" if s.skipped_time_points else ""
        print(f"wrote {s.path} ({s.time_points} time points x {s.z_planes} planes{skipped})")
    if args.stacks and not made.stacks:
        print("no frames to stack")
    return 0
