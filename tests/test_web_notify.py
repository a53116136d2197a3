"""systemd notification (sd_notify(3) protocol): datagrams on $NOTIFY_SOCKET, never blocking."""

from __future__ import annotations

import asyncio
import os
import socket
import time

from daemon.web.notify import Notifier


def test_ready_status_and_stopping_arrive_as_datagrams(tmp_path):
    path = str(tmp_path / "n.sock")
    with socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM) as listener:
        listener.bind(path)
        listener.settimeout(2)
        n = Notifier({"NOTIFY_SOCKET": path})
        assert n.enabled and n.watchdog_s is None
        assert n.ready("serving sim")
        assert listener.recv(4096) == b"READY=1\nSTATUS=serving sim"
        assert n.stopping()
        assert listener.recv(4096) == b"STOPPING=1\nSTATUS=shutting down"
        n.close()


def test_abstract_socket_address(tmp_path):
    name = f"phasewatch-test-{os.getpid()}-{time.monotonic_ns()}"
    with socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM) as listener:
        listener.bind("\0" + name)
        listener.settimeout(2)
        n = Notifier({"NOTIFY_SOCKET": "@" + name})
        assert n.status("opening the scope")
        assert listener.recv(4096) == b"STATUS=opening the scope"
        n.close()


def test_watchdog_interval_and_pid_rules():
    assert Notifier({"NOTIFY_SOCKET": "/x", "WATCHDOG_USEC": "30000000"}).watchdog_s == 30.0
    # sd_watchdog_enabled(3): the watchdog is for the process named by WATCHDOG_PID only.
    assert Notifier({"NOTIFY_SOCKET": "/x", "WATCHDOG_USEC": "30000000", "WATCHDOG_PID": "1"}).watchdog_s is None
    assert Notifier({}).enabled is False
    assert Notifier({}).ready("x") is False


async def test_watchdog_pings_at_half_the_interval(tmp_path):
    path = str(tmp_path / "w.sock")
    with socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM) as listener:
        listener.bind(path)
        listener.setblocking(False)
        n = Notifier({"NOTIFY_SOCKET": path, "WATCHDOG_USEC": "200000"})
        task = asyncio.create_task(n.watchdog_loop())
        await asyncio.sleep(0.55)
        task.cancel()
        pings = []
        while True:
            try:
                pings.append(listener.recv(64))
            except BlockingIOError:
                break
        n.close()
    assert set(pings) == {b"WATCHDOG=1"}
    assert 4 <= len(pings) <= 7  # one at once, then every 0.1 s


def test_a_listener_that_does_not_read_never_blocks_the_daemon(tmp_path):
    path = str(tmp_path / "full.sock")
    with socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM) as listener:
        listener.bind(path)
        n = Notifier({"NOTIFY_SOCKET": path})
        t0 = time.monotonic()
        results = [n.send("WATCHDOG=1") for _ in range(5000)]  # far more than the socket buffer holds
        assert time.monotonic() - t0 < 5.0
        assert results[0] is True and results[-1] is False
        n.close()
