"""Helpers for the web service tests: a daemon on loopback around a small simulated scope."""

from __future__ import annotations

import asyncio
import contextlib
import dataclasses
import json
import re
import signal
import subprocess
import sys
import threading
import time
import urllib.error
import urllib.request
from collections.abc import AsyncIterator, Iterator
from pathlib import Path
from typing import Any

import aiohttp
from aiohttp.test_utils import TestServer

from daemon.profile import PROFILE_DIR, Profile
from daemon.web.app import ServeConfig, create_app, serve
from daemon.web.auth import token_path
from daemon.web.keys import STATION
from daemon.station import Station
from daemon.storage.offload import OffloadOptions
from tests.helpers import sim_profile

LOOPBACK = "127.0.0.1"
# Ten times the shipped seeding: a 320x240 field (120 x 90 um) then holds about six cells
# rather than under one, so an autofocus always has cells to focus on.
DENSE = {"sim.culture.seeding_per_mm2": 600.0}


def web_profile(width_px: int = 320, height_px: int = 240) -> Profile:
    """The small simulated scope the web tests use (see DENSE)."""
    return sim_profile(width_px, height_px, **DENSE)
MULTIPART_BOUNDARY = b"--phasewatchframe"

# A time-lapse that finishes in seconds on the simulated scope at clock speed 1000: two
# wells of the Larkspur Row plate, two time points an hour apart in simulated time (3.6 s
# real). The hour leaves room for the rendering: at speed 1000 every real second of CPU
# spent rendering frames is 1000 simulated seconds, and a time point takes about two.
QUICK_PLAN: dict[str, Any] = {
    "name": "KVL-7 quick check LR-0412",
    "vessel": "96-well",
    "wells": ["B2", "B3"],
    "interval_s": 3600,
    "count": 2,
    "autofocus": "track",
    "correction": False,
    "save": "raw",
}


@dataclasses.dataclass
class Served:
    url: str
    token: str
    app: Any
    session: aiohttp.ClientSession
    data_dir: Path

    @property
    def station(self) -> Station:
        return self.app[STATION]

    @property
    def auth(self) -> dict[str, str]:
        return {"Authorization": f"Bearer {self.token}"}

    def u(self, path: str) -> str:
        return self.url.rstrip("/") + path


@contextlib.asynccontextmanager
async def served(
    data_dir: Path, profile: Profile | None = None, *, speed: float = 1000.0, max_fps: float = 20.0,
    offload: OffloadOptions | None = None,
) -> AsyncIterator[Served]:
    """The daemon's application on a loopback port, and a client session (no token by default)."""
    cfg = ServeConfig(
        profile=profile or web_profile(), data_dir=data_dir, host=LOOPBACK, port=0, sim_speed=speed,
        max_fps=max_fps, discovery=False, offload=offload,
    )
    server = TestServer(create_app(cfg), host=LOOPBACK, port=0, shutdown_timeout=2.0)
    await server.start_server()
    try:
        # unsafe=True: keep cookies from an IP-address host, as a browser does.
        jar = aiohttp.CookieJar(unsafe=True)
        async with aiohttp.ClientSession(timeout=aiohttp.ClientTimeout(total=60), cookie_jar=jar) as session:
            token = token_path(data_dir).read_text().strip()
            yield Served(str(server.make_url("/")), token, server.app, session, data_dir)
    finally:
        await server.close()


@contextlib.contextmanager
def served_in_thread(
    data_dir: Path, profile: Profile | None = None, *, speed: float = 1000.0, max_token_failures: int = 10,
    max_token_failures_total: int = 100,
) -> Iterator[tuple[str, str]]:
    """The whole daemon (:func:`daemon.web.app.serve`) in a thread, for blocking clients; (url, token)."""
    cfg = ServeConfig(
        profile=profile or web_profile(), data_dir=data_dir, host=LOOPBACK, port=0, sim_speed=speed, discovery=False,
        max_token_failures=max_token_failures, max_token_failures_total=max_token_failures_total,
    )
    ready = threading.Event()
    port: list[int] = []
    errors: list[BaseException] = []
    holder: dict[str, Any] = {}

    def run() -> None:
        async def main() -> None:
            stop = asyncio.Event()
            holder["stop"], holder["loop"] = stop, asyncio.get_running_loop()

            def on_ready(p: int) -> None:
                port.append(p)
                ready.set()

            await serve(cfg, stop=stop, on_ready=on_ready)

        try:
            asyncio.run(main())
        except BaseException as exc:  # noqa: BLE001 - handed to the test thread
            errors.append(exc)
            ready.set()

    thread = threading.Thread(target=run, name="phasewatch serve (test)", daemon=True)
    thread.start()
    if not ready.wait(60) or errors:
        raise RuntimeError(f"the daemon did not start: {errors[:1]}")
    try:
        yield f"http://{LOOPBACK}:{port[0]}", token_path(data_dir).read_text().strip()
    finally:
        holder["loop"].call_soon_threadsafe(holder["stop"].set)
        thread.join(30)
        if errors:
            raise errors[0]


def split_mjpeg(body: bytes) -> list[tuple[dict[str, str], bytes]]:
    """Parts of a multipart/x-mixed-replace body: (headers, payload) each."""
    parts = []
    for chunk in body.split(MULTIPART_BOUNDARY)[1:]:
        if chunk.startswith(b"--"):
            break
        head, _, rest = chunk.lstrip(b"\r\n").partition(b"\r\n\r\n")
        headers = {}
        for line in head.decode("latin-1").split("\r\n"):
            key, _, value = line.partition(":")
            headers[key.strip().lower()] = value.strip()
        length = int(headers["content-length"])
        parts.append((headers, rest[:length]))
    return parts


async def wait_for(predicate: Any, *, timeout_s: float, interval_s: float = 0.05) -> bool:
    """Poll ``predicate()`` (sync or async) until true or ``timeout_s`` real seconds pass."""
    loop = asyncio.get_running_loop()
    deadline = loop.time() + timeout_s
    while loop.time() < deadline:
        value = predicate()
        if asyncio.iscoroutine(value):
            value = await value
        if value:
            return True
        await asyncio.sleep(interval_s)
    return False


PYTHON = sys.executable
REPO = Path(__file__).resolve().parent.parent


def small_profile(folder: Path, width_px: int = 320, height_px: int = 240) -> Path:
    """hw_profiles/sim.toml with a small frame (fast rendering), written into ``folder``."""
    text = (PROFILE_DIR / "sim.toml").read_text()
    text = text.replace("width_px = 1280", f"width_px = {width_px}").replace("height_px = 960", f"height_px = {height_px}")
    # A pinned seeding date, as the tests' profiles have (the shipped default is 'now').
    text = text.replace("[sim]\n", '[sim]\nstart_time = "2026-03-02T09:00:00+00:00"\n', 1)
    path = folder / f"sim-{width_px}x{height_px}.toml"
    path.write_text(text)
    return path


class Daemon:
    """``phasewatch serve`` as a child process on a loopback port of its choosing."""

    def __init__(
        self, tmp_path: Path, data: Path, env: dict[str, str] | None = None, *,
        profile: Path | None = None, extra: tuple[str, ...] = ("--sim-speed", "1000"),
    ) -> None:
        self.log = (tmp_path / "serve.log").open("w+")
        self.proc = subprocess.Popen(
            [PYTHON, "-m", "daemon.cli", "serve", "--profile", str(profile or small_profile(tmp_path)),
             "--data", str(data), "--port", "0", "--no-discovery", "--log-level", "info", *extra],
            cwd=REPO, stdout=self.log, stderr=subprocess.STDOUT, text=True, env=env,
        )
        self.url = self._wait_for_url()
        self.token = (data / "access-token").read_text().strip()

    def output(self) -> str:
        self.log.flush()
        self.log.seek(0)
        return self.log.read()

    def _wait_for_url(self) -> str:
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline:
            m = re.search(r"on (http://127\.0\.0\.1:\d+/)", self.output())
            if m:
                return m.group(1)
            if self.proc.poll() is not None:
                raise AssertionError(f"serve exited early:\n{self.output()}")
            time.sleep(0.1)
        raise AssertionError(f"serve did not start:\n{self.output()}")

    def call(self, method: str, path: str, body: dict | None = None) -> tuple[int, dict]:
        req = urllib.request.Request(
            self.url.rstrip("/") + path, method=method, data=None if body is None else json.dumps(body).encode(),
            headers={"Authorization": f"Bearer {self.token}", "Content-Type": "application/json"},
        )
        try:
            with urllib.request.urlopen(req, timeout=30) as r:
                return r.status, json.loads(r.read())
        except urllib.error.HTTPError as exc:
            return exc.code, json.loads(exc.read())

    def stop(self, timeout_s: float = 60.0) -> int:
        self.proc.send_signal(signal.SIGTERM)
        try:
            return self.proc.wait(timeout_s)
        finally:
            self.log.close()
