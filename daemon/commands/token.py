"""``phasewatch token --data DIR``: print the access token of a data folder (made on first use)."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from daemon.web.auth import load_or_create_token, token_path


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("token", help="print the access token that control from the browser or API needs")
    p.add_argument("--data", type=Path, default=Path("phasewatch-data"), help="data folder (default: ./phasewatch-data)")
    p.add_argument("--new", action="store_true",
                   help="make a new token; the old one, and every browser signed in with it, stop working")
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    token, created = load_or_create_token(args.data, renew=args.new)
    print(token)
    if created:
        note = "; a running daemon takes it from its next request on" if args.new else ""
        print(f"(new token stored in {token_path(args.data)}, readable by this user only{note})", file=sys.stderr)
    return 0
