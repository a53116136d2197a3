"""``phasewatch fleet``: every scope the lab's MQTT broker knows, from its retained messages."""

from __future__ import annotations

import argparse
import asyncio
import json
import re
import sys
from pathlib import Path

from drivers.options import ConfigError

LOOPBACK = "127.0.0.1"


def register(sub: argparse._SubParsersAction) -> None:
    from daemon.mqtt.fleet import DEFAULT_WAIT_S

    p = sub.add_parser("fleet", help="list every scope reporting to an MQTT broker: state, time-lapse, alerts")
    p.add_argument("--mqtt", metavar="URL", default=None, help="the broker: mqtt://host[:port] or mqtts://host[:port]")
    p.add_argument("--site", type=Path, metavar="FILE", default=None,
                   help="site configuration file whose [mqtt] section names the broker, credentials, TLS and prefix")
    p.add_argument("--json", action="store_true", help="print the scopes as JSON (thumbnails as base64 JPEG)")
    p.add_argument("--wait", type=float, default=DEFAULT_WAIT_S, metavar="S",
                   help=f"longest wait for the broker's retained messages (default {DEFAULT_WAIT_S:g} s)")
    p.add_argument("--serve", type=int, metavar="PORT", default=None,
                   help=f"instead of printing once, serve a page that follows the broker on http://{LOOPBACK}:PORT/")
    p.set_defaults(func=run)


async def run(args: argparse.Namespace) -> int:
    import aiomqtt

    from daemon.mqtt.fleet import collect, text_table
    from daemon.mqtt.options import mqtt_options

    opts = mqtt_options(args.site, args.mqtt, command="fleet")
    if not opts.enabled:
        raise ConfigError("", "fleet", "--mqtt", "name the broker with --mqtt URL or a --site file's [mqtt] url")
    if not 0.5 <= args.wait <= 600:
        raise ConfigError("", "fleet", "--wait", f"must be from 0.5 to 600 s, got {args.wait}")
    if args.serve is not None:
        if not 0 <= args.serve <= 65535:
            raise ConfigError("", "fleet", "--serve", f"must be 0..65535, got {args.serve}")
        return await serve_page(opts, args.serve)
    try:
        fleet = await collect(opts, wait_s=args.wait)
    except aiomqtt.MqttError as exc:
        print(f"phasewatch: broker {opts.url}: {exc}", file=sys.stderr)
        return 2
    if args.json:
        json.dump(fleet.rows(thumbnails=True), sys.stdout, indent=2)
        sys.stdout.write("\n")
    else:
        print(text_table(fleet.rows()))
    return 0


async def serve_page(opts, port: int) -> int:  # type: ignore[no-untyped-def]
    """The fleet page on loopback, following the broker until interrupted."""
    import signal

    from aiohttp import web

    from daemon.mqtt.fleet import Fleet, follow, html_page

    fleet = Fleet(opts.prefix)

    async def page(request: web.Request) -> web.Response:
        return web.Response(text=html_page(fleet), content_type="text/html", headers={
            "Cache-Control": "no-cache", "Content-Security-Policy": "default-src 'none'; img-src 'self'; "
            "style-src 'unsafe-inline'", "X-Content-Type-Options": "nosniff",
        })

    async def as_json(request: web.Request) -> web.Response:
        return web.json_response(fleet.rows())

    async def thumbnail(request: web.Request) -> web.Response:
        name = request.match_info["scope"]
        view = fleet.scopes.get(name) if re.fullmatch(r"[A-Za-z0-9._-]+", name) else None
        if view is None or view.thumbnail is None:
            raise web.HTTPNotFound()
        return web.Response(body=view.thumbnail, content_type="image/jpeg", headers={"Cache-Control": "no-cache"})

    app = web.Application()
    app.router.add_get("/", page)
    app.router.add_get("/fleet.json", as_json)
    app.router.add_get("/thumbnail/{scope}.jpg", thumbnail)
    runner = web.AppRunner(app, handle_signals=False)
    await runner.setup()
    site = web.TCPSite(runner, LOOPBACK, port)
    await site.start()
    bound = next(a[1] for a in runner.addresses if isinstance(a, tuple))
    print(f"phasewatch: fleet of {opts.url} on http://{LOOPBACK}:{bound}/", flush=True)
    stop = asyncio.Event()
    loop = asyncio.get_running_loop()
    for sig in (signal.SIGTERM, signal.SIGINT):
        loop.add_signal_handler(sig, stop.set)
    task = asyncio.create_task(follow(opts, fleet))
    try:
        await stop.wait()
    finally:
        task.cancel()
        await runner.cleanup()
    return 0
