"""``phasewatch index rebuild --data DIR``: rebuild a data folder's index from its frame files."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("index", help="look after a data folder's index")
    isub = p.add_subparsers(dest="index_command", metavar="ACTION", required=True)
    r = isub.add_parser(
        "rebuild",
        help="rebuild the index from the frame files (the old one is kept aside, renamed with the time)",
    )
    r.add_argument("--data", type=Path, default=Path("phasewatch-data"), help="data folder (default: ./phasewatch-data)")
    r.add_argument("--verify", choices=("all", "recent", "size"), default="all",
                   help="how frames still indexed are checked: all by checksum (default), recent time points only, sizes only")
    r.add_argument("--quiet", action="store_true", help="no progress lines")
    r.set_defaults(func=run_rebuild)


def run_rebuild(args: argparse.Namespace) -> int:
    from daemon.timelapse.resume import has_frames, rebuild_index

    if not args.data.is_dir():
        raise FileNotFoundError(2, f"{args.data}: no such data folder", str(args.data))
    if not has_frames(args.data):
        print(f"phasewatch: {args.data}: no frame files under timelapses/; nothing to rebuild from", file=sys.stderr)
        return 2
    last = [-1.0]

    def progress(done: int, total: int, what: str) -> None:
        if args.quiet or not total:
            return
        ratio = done / total
        if ratio - last[0] >= 0.1 or done == total:
            last[0] = ratio
            print(f"  {what}: {done}/{total}", file=sys.stderr, flush=True)

    report = rebuild_index(args.data, verify=args.verify, progress=progress, force=True)
    print(f"index of {args.data} rebuilt: {report.summary()}")
    return 0 if report.clean else 1
