"""The aiohttp application of ``phasewatch serve`` and the loop that runs it.

:func:`create_app` wires routes, middlewares and the station (scope, live view,
time-lapse) into a ``cleanup_ctx``, so the hardware is opened when the server starts and
closed however it stops. :func:`serve` runs it until SIGTERM/SIGINT, with DNS-SD
advertisement and systemd notification around it.
"""

from __future__ import annotations

import asyncio
import contextlib
import dataclasses
import logging
import signal
import sys
import weakref
from collections.abc import AsyncIterator, Callable
from pathlib import Path

from aiohttp import web
from aiohttp import web_response as aiohttp_response
from aiohttp.http_exceptions import HttpProcessingError

from daemon.profile import Profile
from daemon.storage.index import DATA_FOLDER_MODE
from daemon.storage.verify import DEFAULT_RATE_MB_S
from drivers import atomic
from daemon.storage.space import DEFAULT_RESERVE_MB
from daemon.web import API_PREFIX, api, events
from daemon.web.auth import MAX_FAILURES, MAX_TOTAL_FAILURES, Authenticator, FailureLimiter, load_or_create_token, token_path
from daemon.web.keys import AUTH, CONFIG, METRICS, MQTT, SOCKETS, STATION
from daemon.metrics import Metrics
from daemon.storage.offload import OffloadOptions
from daemon.web.notify import Notifier
from daemon.web.openapi import document
from daemon.station import Station
from daemon.live import DEFAULT_MAX_FPS
from daemon.mqtt.options import MqttOptions

log = logging.getLogger(__name__)

DEFAULT_HOST = "127.0.0.1"
DEFAULT_PORT = 8470
STATIC_DIR = Path(__file__).resolve().parent / "static"
# The only files the interface is made of; served by name, nothing else is reachable.
STATIC_FILES = {"app.js": "text/javascript", "style.css": "text/css", "plots.js": "text/javascript"}
SHUTDOWN_TIMEOUT_S = 5.0


@dataclasses.dataclass(frozen=True)
class ServeConfig:
    profile: Profile
    data_dir: Path
    host: str = DEFAULT_HOST
    port: int = DEFAULT_PORT
    sim_speed: float | None = None
    max_fps: float = DEFAULT_MAX_FPS
    discovery: bool = True
    reserve_mb: float = DEFAULT_RESERVE_MB
    verify: str = "recent"  # the start-up check: all, recent or size (see daemon.storage.reconcile)
    verify_rate_mb_s: float = DEFAULT_RATE_MB_S  # the background check of every frame after start; 0: off
    max_token_failures: int = MAX_FAILURES  # wrong tokens per client per minute before 429
    max_token_failures_total: int = MAX_TOTAL_FAILURES  # the same from all clients together
    mqtt: MqttOptions | None = None  # report to the lab's broker (see docs/MQTT.md)
    offload: OffloadOptions | None = None  # copying frames to lab storage; None: off


# -- pages and small endpoints ---------------------------------------------------------

_CSP = (
    "default-src 'self'; img-src 'self' data: blob:; style-src 'self'; script-src 'self'; "
    "connect-src 'self' ws: wss:; frame-ancestors 'none'; base-uri 'none'; form-action 'none'"
)


def _static(name: str, content_type: str) -> web.Response:
    body = (STATIC_DIR / name).read_bytes()
    return web.Response(body=body, content_type=content_type, headers={
        "Cache-Control": "no-cache", "Content-Security-Policy": _CSP, "X-Content-Type-Options": "nosniff",
    })


async def index_page(request: web.Request) -> web.Response:
    resp = _static("index.html", "text/html")
    resp.headers["X-Frame-Options"] = "DENY"
    return resp


async def static_file(request: web.Request) -> web.Response:
    name = request.match_info["name"]
    if name not in STATIC_FILES:
        raise web.HTTPNotFound()
    return _static(name, STATIC_FILES[name])


SERVER_HEADER = "phasewatch"


async def name_the_server(request: web.Request, response: web.StreamResponse) -> None:
    """No versions of Python or aiohttp in ``Server``: they only help someone match known flaws."""
    response.headers["Server"] = SERVER_HEADER


class OneLineBadRequests(logging.Filter):
    """A request too malformed to reach the application (bad request line, bad header
    syntax, a line too long) is the client's fault: one warning line, not a traceback."""

    def filter(self, record: logging.LogRecord) -> bool:
        exc = record.exc_info[1] if record.exc_info else None
        if isinstance(exc, HttpProcessingError) and 400 <= (exc.code or 0) < 500:
            record.msg = "malformed request from %s: %s"
            record.args = (*(record.args or ("?",))[:1], str(exc.message).splitlines()[0] if exc.message else exc.code)
            record.exc_info = None
            record.levelno, record.levelname = logging.WARNING, "WARNING"
        return True


def _quiet_server_errors() -> None:
    # aiohttp answers such requests itself, before any application signal runs, naming
    # its own version in Server; its module default is the only place to change that.
    aiohttp_response.SERVER_SOFTWARE = SERVER_HEADER
    server_log = logging.getLogger("aiohttp.server")
    if not any(isinstance(f, OneLineBadRequests) for f in server_log.filters):
        server_log.addFilter(OneLineBadRequests())


async def openapi_json(request: web.Request) -> web.Response:
    return api.json_response(document())


async def metrics_endpoint(request: web.Request) -> web.Response:
    body, content_type = await asyncio.to_thread(request.app[METRICS].render, request.headers.get("Accept"))
    resp = web.Response(body=body)
    resp.headers["Content-Type"] = content_type
    return resp


# -- the station's life ----------------------------------------------------------------


async def station_ctx(app: web.Application) -> AsyncIterator[None]:
    """Data folder lock and check, scope open, time-lapse resumed; all undone in reverse."""
    from daemon.hardware import build_scope
    from daemon.timelapse.resume import open_data_folder, run_lock

    cfg = app[CONFIG]
    with run_lock(cfg.data_dir):
        scope = build_scope(cfg.profile, sim_speed=cfg.sim_speed, data_dir=cfg.data_dir)
        index, report = await asyncio.to_thread(
            open_data_folder, cfg.data_dir, verify=cfg.verify, now=scope.clock.now
        )
        try:
            if report.removed_partials or report.reindexed or not report.clean:
                log.warning("data folder checked: %s", report.summary())
            async with scope:
                station = Station(
                    profile=cfg.profile, scope=scope, data_dir=cfg.data_dir, index=index,
                    metrics=app[METRICS], max_fps=cfg.max_fps, reserve_mb=cfg.reserve_mb,
                    verify_rate_mb_s=cfg.verify_rate_mb_s, offload=cfg.offload,
                )
                app[STATION] = station
                await station.start()
                try:
                    yield
                finally:
                    await station.stop()
        finally:
            index.close()


async def mqtt_ctx(app: web.Application) -> AsyncIterator[None]:
    """Report to the broker while the station runs (after it opened, before it closes)."""
    cfg = app[CONFIG]
    if cfg.mqtt is None or not cfg.mqtt.enabled:
        yield
        return
    from daemon.mqtt.publisher import MqttPublisher

    publisher = MqttPublisher(cfg.mqtt, app[STATION])
    app[MQTT] = publisher
    await publisher.start()
    try:
        yield
    finally:
        await publisher.stop()


async def close_viewers(app: web.Application) -> None:
    """On shutdown: end MJPEG streams and WebSockets so the server need not wait for them."""
    if STATION in app:
        await app[STATION].live.close()
    for ws in list(app[SOCKETS]):
        with contextlib.suppress(Exception):
            await ws.close(code=1001, message=b"server shutting down")


def create_app(cfg: ServeConfig) -> web.Application:
    atomic.make_dirs(cfg.data_dir, mode=DATA_FOLDER_MODE)
    token, _created = load_or_create_token(cfg.data_dir)
    app = web.Application(
        client_max_size=api.MAX_BODY_BYTES, middlewares=[api.error_middleware, api.auth_middleware]
    )
    app[CONFIG] = cfg
    app[AUTH] = Authenticator(
        token, anonymous_viewing=cfg.profile.scope.allow_anonymous_viewing,
        limiter=FailureLimiter(max_failures=cfg.max_token_failures, max_total=cfg.max_token_failures_total),
        token_file=token_path(cfg.data_dir),
    )
    app[METRICS] = Metrics()
    app[SOCKETS] = weakref.WeakSet()
    app.add_routes(api.routes)
    app.add_routes(events.routes)
    app.router.add_get(f"{API_PREFIX}/openapi.json", openapi_json)
    app.router.add_get("/metrics", metrics_endpoint)
    app.router.add_get("/", index_page)
    app.router.add_get("/static/{name}", static_file)
    app.cleanup_ctx.append(station_ctx)
    app.cleanup_ctx.append(mqtt_ctx)
    app.on_shutdown.append(close_viewers)
    app.on_response_prepare.append(name_the_server)
    _quiet_server_errors()
    return app


# -- running it ------------------------------------------------------------------------


def bound_port(runner: web.AppRunner) -> int:
    for addr in runner.addresses:
        if isinstance(addr, tuple) and len(addr) >= 2:
            return int(addr[1])
    raise OSError("the server is not listening on any TCP port")


def browser_url(host: str, port: int) -> str:
    shown = "127.0.0.1" if host in ("0.0.0.0", "") else ("[::1]" if host == "::" else host)
    if ":" in shown and not shown.startswith("["):
        shown = f"[{shown}]"
    return f"http://{shown}:{port}/"


async def serve(
    cfg: ServeConfig,
    *,
    stop: asyncio.Event | None = None,
    on_ready: Callable[[int], None] | None = None,
    notifier: Notifier | None = None,
) -> int:
    """Run until ``stop`` is set or SIGTERM/SIGINT arrives; returns an exit code."""
    stop = stop or asyncio.Event()
    notifier = notifier or Notifier()
    app = create_app(cfg)
    runner = web.AppRunner(app, shutdown_timeout=SHUTDOWN_TIMEOUT_S, handle_signals=False)
    loop = asyncio.get_running_loop()
    signals = (signal.SIGTERM, signal.SIGINT)
    installed = []
    for sig in signals:
        with contextlib.suppress(NotImplementedError, RuntimeError, ValueError):
            loop.add_signal_handler(sig, stop.set)
            installed.append(sig)
    advertiser = None
    watchdog: asyncio.Task[None] | None = None
    try:
        notifier.status("opening the scope")
        await runner.setup()  # opens the data folder and the scope (cleanup_ctx)
        site = web.TCPSite(runner, cfg.host, cfg.port)
        await site.start()
        port = bound_port(runner)
        if cfg.discovery:
            from daemon.web.discovery import Advertiser

            advertiser = Advertiser(
                host=cfg.host, port=port, scope_name=cfg.profile.scope.name, profile_name=cfg.profile.name,
                token_to_view=not cfg.profile.scope.allow_anonymous_viewing,
            )
            try:
                names = await advertiser.start()
                log.info("advertised as %s", ", ".join(names))
            except OSError as exc:
                log.warning("DNS-SD advertisement failed (%s); the server runs without it", exc)
                advertiser = None
        watchdog = asyncio.create_task(notifier.watchdog_loop(), name="systemd watchdog")
        url = browser_url(cfg.host, port)
        if MQTT in app:
            app[MQTT].set_page_url(page_url(cfg.host, port))
        notifier.ready(f"serving {cfg.profile.name} on {url}")
        _greet(cfg, url)
        if on_ready is not None:
            on_ready(port)
        await stop.wait()
        log.info("stopping: finishing the frame in progress and closing the hardware")
        return 0
    finally:
        notifier.stopping()
        if watchdog is not None:
            watchdog.cancel()
            with contextlib.suppress(asyncio.CancelledError):
                await watchdog
        if advertiser is not None:
            with contextlib.suppress(OSError):
                await advertiser.stop()
        await runner.cleanup()
        for sig in installed:
            loop.remove_signal_handler(sig)
        notifier.close()


def page_url(host: str, port: int) -> str:
    """The page's address as another machine of the lab would use it (for the fleet view)."""
    if host in ("0.0.0.0", "", "::"):
        import socket

        return browser_url(socket.getfqdn(), port)
    return browser_url(host, port)


def _greet(cfg: ServeConfig, url: str) -> None:
    """Say where to look. The token itself goes only to an interactive terminal, never to a log."""
    print(f"phasewatch: serving {cfg.profile.scope.name} on {url}", flush=True)
    if sys.stdout.isatty():
        token = token_path(cfg.data_dir).read_text(encoding="ascii").strip()
        print(f"  open in a browser (signs it in): {url}#token={token}", flush=True)
    else:
        print(f"  access token: phasewatch token --data {cfg.data_dir}", flush=True)
    if cfg.host in ("127.0.0.1", "localhost", "::1"):
        print("  listening on this machine only; --host 0.0.0.0 opens it to the lab network", flush=True)
