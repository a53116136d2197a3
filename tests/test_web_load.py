"""Live viewers that connect and never read: capped, dropped after the stall time, and the
camera and the LED stopped when nobody reads; the daemon's memory stays put.

Clients are raw loopback sockets with a tiny receive buffer that send one GET and then
never take a byte off the wire (the status line is only peeked at). Bounded in count
(50 clients) and time.
"""

from __future__ import annotations

import asyncio
import contextlib
import dataclasses
import socket
import time
import urllib.request
from pathlib import Path

import pytest

from tests.web_support import Daemon, served, small_profile, wait_for, web_profile

pytestmark = pytest.mark.timeout(240)

STALLED_CLIENTS = 50


def _request(token: str) -> bytes:
    return (f"GET /api/v1/stream.mjpeg?fps=20 HTTP/1.1\r\nHost: 127.0.0.1\r\n"
            f"Authorization: Bearer {token}\r\n\r\n").encode()


def _stalled_socket() -> socket.socket:
    sock = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
    sock.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, 4096)  # before connect: the window it offers
    return sock


def _peeked_status(sock: socket.socket) -> int | None:
    """The HTTP status the server sent, seen without reading it (MSG_PEEK); None: nothing yet."""
    try:
        head = sock.recv(64, socket.MSG_PEEK | socket.MSG_DONTWAIT)
    except BlockingIOError:
        return None
    if not head.startswith(b"HTTP/1.1 "):
        return None
    return int(head.split(b" ", 2)[1])


async def _open_stalled(port: int, token: str, n: int) -> list[socket.socket]:
    loop = asyncio.get_running_loop()
    socks = []
    for _ in range(n):
        sock = _stalled_socket()
        sock.setblocking(False)
        await loop.sock_connect(sock, ("127.0.0.1", port))
        await loop.sock_sendall(sock, _request(token))
        socks.append(sock)
    return socks


async def test_stalled_viewers_are_capped_dropped_and_the_camera_and_led_stop(tmp_path):
    profile = web_profile()
    profile = dataclasses.replace(profile, scope=dataclasses.replace(profile.scope, max_live_viewers=4, live_stall_s=2.0))
    async with served(tmp_path, profile) as srv:
        live, scope = srv.station.live, srv.station.scope
        lamp: list[bool] = []
        set_lamp = scope.motion.set_lamp

        async def spy(on: bool, level: float = 1.0) -> None:
            lamp.append(on)
            await set_lamp(on, level)

        scope.motion.set_lamp = spy  # type: ignore[method-assign]
        port = int(srv.url.rstrip("/").rsplit(":", 1)[1])
        socks = await _open_stalled(port, srv.token, 10)
        try:
            assert await wait_for(lambda: all(_peeked_status(s) is not None for s in socks), timeout_s=30)
            statuses = [_peeked_status(s) for s in socks]
            assert sorted(statuses) == [200] * 4 + [503] * 6, statuses
            refused = next(s for s in socks if _peeked_status(s) == 503)
            text = refused.recv(4096).decode()
            assert "max_live_viewers = 4" in text and "Retry-After: 10" in text
            assert live.streams == 4 and live.viewers == 4
            # Nobody reads: within the stall time (after the few frames the buffers hold)
            # every stream is dropped, the loop ends and the LED is off.
            assert await wait_for(lambda: live.streams == 0, timeout_s=30), live.streams
            assert live.streams_dropped == 4
            assert await wait_for(lambda: live._task is None or live._task.done(), timeout_s=5)
            assert lamp and lamp[-1] is False, lamp
            idle = scope.frames_captured
            await asyncio.sleep(1.0)
            assert scope.frames_captured == idle, "the camera still captures for nobody"
            # A place freed is a place to take: a reading viewer is served again.
            async with srv.session.get(srv.u("/api/v1/stream.mjpeg?frames=2&width=64"), headers=srv.auth) as r:
                assert r.status == 200
                await r.read()
        finally:
            for s in socks:
                s.close()


def _rss_kb(pid: int) -> int:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1])
    raise AssertionError("no VmRSS")


def test_fifty_stalled_viewers_hold_no_memory_and_are_let_go(tmp_path):
    path = small_profile(tmp_path)
    path.write_text(path.read_text().replace("[scope]\n", "[scope]\nlive_stall_s = 3.0\n", 1))
    daemon = Daemon(tmp_path, tmp_path / "data", profile=path)
    socks: list[socket.socket] = []
    try:
        port = int(daemon.url.rstrip("/").rsplit(":", 1)[1])
        # One viewer that reads first, so that what live view costs once (the capture loop,
        # JPEG encoding, worker threads) is in the baseline and only the stalled ones are measured.
        req = urllib.request.Request(daemon.url + "api/v1/stream.mjpeg?frames=5&fps=20",
                                     headers={"Authorization": f"Bearer {daemon.token}"})
        with urllib.request.urlopen(req, timeout=30) as r:
            assert r.status == 200 and r.read().count(b"--phasewatchframe\r\n") == 5
        before_kb = _rss_kb(daemon.proc.pid)
        for _ in range(STALLED_CLIENTS):
            sock = _stalled_socket()
            sock.settimeout(10)
            sock.connect(("127.0.0.1", port))
            sock.sendall(_request(daemon.token))
            socks.append(sock)
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline and any(_peeked_status(s) is None for s in socks):
            time.sleep(0.1)
        statuses = [_peeked_status(s) for s in socks]
        cap = 8  # the default [scope] max_live_viewers
        assert statuses.count(200) == cap and statuses.count(503) == STALLED_CLIENTS - cap, statuses
        time.sleep(1.5)  # frames flow into the held streams until their buffers fill
        held_kb = _rss_kb(daemon.proc.pid)
        deadline = time.monotonic() + 60
        live: dict = {}
        while time.monotonic() < deadline:
            _, s = daemon.call("GET", "/api/v1/status")
            live = s["live"]
            if live["viewers"] == 0:
                break
            time.sleep(0.5)
        assert live["viewers"] == 0, live
        after_kb = _rss_kb(daemon.proc.pid)
        print(f"\ndaemon RSS: {before_kb / 1024:.0f} MB before, {held_kb / 1024:.0f} MB with {STALLED_CLIENTS} "
              f"stalled clients ({cap} held), {after_kb / 1024:.0f} MB after they were dropped")
        # Each held stream may queue its send buffers (2 x 64 KiB) and a frame or two:
        # well under 10 MB for all, where unbounded queues grew the daemon by tens of MB.
        assert held_kb - before_kb < 10 * 1024, (before_kb, held_kb)
        assert after_kb - before_kb < 10 * 1024, (before_kb, after_kb)
    finally:
        for s in socks:
            with contextlib.suppress(OSError):
                s.close()
        assert daemon.stop() == 0
