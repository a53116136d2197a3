"""``phasewatch serve``: the daemon. One process owns the scope and serves the API and interface."""

from __future__ import annotations

import argparse
import logging
import math
from pathlib import Path

from daemon.commands.common import add_profile_options
from drivers.options import ConfigError
from daemon.mqtt.options import mqtt_options
from daemon.profile import load_profile
from daemon.storage.offload import load_offload
from daemon.storage.space import DEFAULT_RESERVE_MB
from daemon.storage.verify import DEFAULT_RATE_MB_S


def register(sub: argparse._SubParsersAction) -> None:
    from daemon.web.app import DEFAULT_HOST, DEFAULT_PORT
    from daemon.live import DEFAULT_MAX_FPS

    p = sub.add_parser("serve", help="run the daemon: web interface, API, live view, time-lapses")
    add_profile_options(p, data=True)
    p.add_argument("--host", default=DEFAULT_HOST,
                   help=f"address to listen on (default {DEFAULT_HOST}: this machine only; 0.0.0.0 for the lab network)")
    p.add_argument("--port", type=int, default=DEFAULT_PORT, help=f"TCP port (default {DEFAULT_PORT})")
    p.add_argument("--max-fps", type=float, default=DEFAULT_MAX_FPS,
                   help=f"highest live-view frame rate any viewer gets (default {DEFAULT_MAX_FPS:g})")
    p.add_argument("--no-discovery", action="store_true", help="do not advertise the scope with DNS-SD/mDNS")
    p.add_argument("--reserve-mb", type=float, default=DEFAULT_RESERVE_MB, metavar="MB",
                   help=f"time-lapses stop cleanly when less than this would stay free (default {DEFAULT_RESERVE_MB:g})")
    p.add_argument("--verify", choices=("recent", "all", "size"), default="recent",
                   help="start-up check of the stored frames before serving: checksums of the latest time points "
                        "(default), of all frames, or sizes only; every frame is checked in the background after start")
    p.add_argument("--verify-rate-mb", type=float, default=DEFAULT_RATE_MB_S, metavar="MB_PER_S",
                   help=f"highest read rate of the background check of every stored frame "
                        f"(default {DEFAULT_RATE_MB_S:g} MB/s; 0 turns it off)")
    p.add_argument("--mqtt", metavar="URL", default=None,
                   help="report state, progress, readings and alerts to this MQTT broker: mqtt://host[:port] "
                        "or mqtts://host[:port] (read-only: nothing received moves the scope; docs/MQTT.md)")
    p.add_argument("--site", type=Path, metavar="FILE", default=None,
                   help="site configuration file (TOML) with the lab's [mqtt] broker, credentials and TLS files")
    p.add_argument("--offload", type=Path, metavar="TOML",
                   help="copy frames to lab storage with rclone, as set in the file's [offload] section "
                        "(remote, interval_s, prune_below_free_mb, ...); see daemon/storage/offload.py")
    p.add_argument("--log-level", choices=("debug", "info", "warning", "error"), default="info", help="log detail")
    p.set_defaults(func=run)


async def run(args: argparse.Namespace) -> int:
    from daemon.web.app import ServeConfig, serve
    from daemon.web.memory import limit_heap_growth

    profile = load_profile(args.profile)
    if not 0 <= args.port <= 65535:
        raise ConfigError("", "serve", "--port", f"must be 0..65535, got {args.port}")
    if not (math.isfinite(args.max_fps) and 0.1 <= args.max_fps <= 120):
        raise ConfigError("", "serve", "--max-fps", f"must be from 0.1 to 120, got {args.max_fps}")
    if not (math.isfinite(args.reserve_mb) and args.reserve_mb >= 0):
        raise ConfigError("", "serve", "--reserve-mb", f"must be 0 or more, got {args.reserve_mb}")
    if not (math.isfinite(args.verify_rate_mb) and args.verify_rate_mb >= 0):
        raise ConfigError("", "serve", "--verify-rate-mb", f"must be 0 or more, got {args.verify_rate_mb}")
    mqtt = mqtt_options(args.site, args.mqtt)
    if mqtt.enabled:
        mqtt.password()  # a missing password file is a start-up error, not a reconnect loop
    logging.basicConfig(level=args.log_level.upper(), format="%(levelname)s %(name)s: %(message)s")
    logging.getLogger("aiohttp.access").setLevel(logging.WARNING)
    limit_heap_growth()
    cfg = ServeConfig(
        profile=profile, data_dir=args.data, host=args.host, port=args.port, sim_speed=args.sim_speed,
        max_fps=args.max_fps, discovery=not args.no_discovery, reserve_mb=args.reserve_mb,
        verify=args.verify, verify_rate_mb_s=args.verify_rate_mb,
        mqtt=mqtt if mqtt.enabled else None,
        offload=load_offload(args.offload) if args.offload is not None else None,
    )
    return await serve(cfg)
