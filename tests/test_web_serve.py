"""``phasewatch serve`` and ``phasewatch token`` as processes: start-up, systemd notification,
graceful shutdown on SIGTERM with a time-lapse running, resumption on restart, user errors."""

from __future__ import annotations

import os
import re
import socket
import threading
import time
import urllib.request

import pytest

from daemon.cli import main
from daemon.storage.index import Index
from daemon.timelapse.resume import folder_busy
from tests.web_support import QUICK_PLAN, Daemon, small_profile

pytestmark = pytest.mark.timeout(180)


def cli(capsys, *argv: str) -> tuple[int, str, str]:
    """``phasewatch ARGV`` in this process (the same entry point as the script), with its output."""
    code = main(list(argv))
    out, err = capsys.readouterr()
    return code, out, err


def test_token_command_prints_the_token_and_keeps_it_private(tmp_path, capsys):
    data = tmp_path / "data"
    code, out, _ = cli(capsys, "token", "--data", str(data))
    assert code == 0
    token = out.strip()
    assert len(token) >= 40 and re.fullmatch(r"[A-Za-z0-9_-]+", token)
    assert (data / "access-token").stat().st_mode & 0o777 == 0o600
    assert cli(capsys, "token", "--data", str(data))[1].strip() == token
    renewed = cli(capsys, "token", "--data", str(data), "--new")[1].strip()
    assert renewed != token
    (data / "access-token").chmod(0o644)
    _, out, err = cli(capsys, "token", "--data", str(data))
    assert out.strip() == renewed
    assert "readable by others" in err
    assert (data / "access-token").stat().st_mode & 0o777 == 0o600


def test_user_errors_are_one_line(tmp_path, capsys):
    code, _, err = cli(capsys, "serve", "--profile", "no-such-scope", "--data", str(tmp_path / "d"), "--no-discovery")
    assert code == 2
    assert "Traceback" not in err and len(err.strip().splitlines()) == 1
    assert "no such profile" in err
    with socket.socket() as busy:
        busy.bind(("127.0.0.1", 0))
        busy.listen()
        port = busy.getsockname()[1]
        code, _, err = cli(capsys, "serve", "--profile", str(small_profile(tmp_path)), "--data", str(tmp_path / "d"),
                           "--port", str(port), "--no-discovery", "--sim-speed", "1000")
    assert code == 2
    assert "address already in use" in err.lower(), err
    assert not folder_busy(tmp_path / "d"), "a failed start must release the data folder"


def test_sigterm_stops_cleanly_notifies_systemd_and_the_time_lapse_resumes(tmp_path):
    data = tmp_path / "data"
    notify_path = str(tmp_path / "notify.sock")
    listener = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    listener.bind(notify_path)
    listener.settimeout(0.2)
    env = {**os.environ, "NOTIFY_SOCKET": notify_path, "WATCHDOG_USEC": "400000"}
    env.pop("WATCHDOG_PID", None)
    daemon = Daemon(tmp_path, data, env)
    messages: list[str] = []
    stop_listening = threading.Event()

    def listen() -> None:
        # Read all the time, as systemd does.
        while not stop_listening.is_set():
            try:
                messages.append(listener.recv(4096).decode())
            except TimeoutError:
                pass

    listener_thread = threading.Thread(target=listen, daemon=True)
    listener_thread.start()

    try:
        # A time-lapse with time points an hour apart (simulated): one runs, then it waits.
        status, started = daemon.call("POST", "/api/v1/timelapses", {**QUICK_PLAN, "count": 50})
        assert status == 201, started
        tl = started["id"]
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline:
            status, d = daemon.call("GET", f"/api/v1/timelapses/{tl}")
            if d["time_points"]["done"] >= 1:
                break
            time.sleep(0.2)
        assert d["time_points"]["done"] >= 1
        time.sleep(1.0)
        assert any("READY=1" in m for m in messages), messages
        assert sum("WATCHDOG=1" in m for m in messages) >= 2, messages  # every 0.2 s: half of 0.4 s
        stream = urllib.request.urlopen(urllib.request.Request(
            daemon.url + "api/v1/stream.mjpeg?fps=5&width=64", headers={"Authorization": f"Bearer {daemon.token}"}),
            timeout=30)
        assert stream.read(200).startswith(b"--phasewatchframe")
        t0 = time.monotonic()
        code = daemon.stop()
        took = time.monotonic() - t0
        stream.close()
    finally:
        if daemon.proc.poll() is None:
            daemon.proc.kill()
    out = daemon.output() if not daemon.log.closed else (tmp_path / "serve.log").read_text()
    assert code == 0, out
    assert took < 30, took
    assert "Traceback" not in out
    time.sleep(0.3)
    stop_listening.set()
    listener_thread.join(2)
    listener.close()
    assert any("STOPPING=1" in m for m in messages), messages
    assert not folder_busy(data), "the data folder's acquisition lock was left held"
    with Index(data / "index.sqlite") as index:
        row = index.timelapse(tl)
        assert row["state"] == "running"  # left unfinished on purpose: the next start resumes it

    again = Daemon(tmp_path, data)
    try:
        status, s = again.call("GET", "/api/v1/status")
        assert status == 200
        assert s["active_timelapse"] is not None and s["active_timelapse"]["id"] == tl
    finally:
        assert again.stop() == 0
