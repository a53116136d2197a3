"""A real Mosquitto broker on a loopback port, and its stock command-line subscriber."""

from __future__ import annotations

import getpass
import json
import shutil
import socket
import subprocess
import time
from pathlib import Path
from typing import Any

MOSQUITTO = shutil.which("mosquitto") or "/usr/sbin/mosquitto"
MOSQUITTO_SUB = shutil.which("mosquitto_sub") or "/usr/bin/mosquitto_sub"
LOOPBACK = "127.0.0.1"


def free_port() -> int:
    with socket.socket() as s:
        s.bind((LOOPBACK, 0))
        return int(s.getsockname()[1])


class Broker:
    """``mosquitto -c CONF`` listening on 127.0.0.1:PORT only, anonymous (tests only)."""

    def __init__(self, folder: Path, port: int | None = None, *, extra_conf: str = "") -> None:
        """``extra_conf``: more configuration lines (credentials, access list); anonymous
        clients are let in unless it says otherwise."""
        self.folder = folder
        self.port = port or free_port()
        self.conf = folder / f"mosquitto-{self.port}.conf"
        anonymous = "" if "allow_anonymous" in extra_conf else "allow_anonymous true\n"
        # Run as whoever runs the tests (mosquitto started as root would switch to its own
        # user, who cannot read the test's password and access files).
        self.conf.write_text(
            f"user {getpass.getuser()}\nlistener {self.port} {LOOPBACK}\n{anonymous}persistence false\n"
            f"log_dest stderr\nlog_type error\nlog_type warning\n{extra_conf}"
        )
        self.log = (folder / f"mosquitto-{self.port}.log").open("w")
        self.proc: subprocess.Popen[bytes] | None = None
        self.start()

    @property
    def url(self) -> str:
        return f"mqtt://{LOOPBACK}:{self.port}"

    def start(self) -> None:
        self.proc = subprocess.Popen([MOSQUITTO, "-c", str(self.conf)], stdout=self.log, stderr=subprocess.STDOUT)
        deadline = time.monotonic() + 10
        while time.monotonic() < deadline:
            with socket.socket() as s:
                if s.connect_ex((LOOPBACK, self.port)) == 0:
                    return
            if self.proc.poll() is not None:
                raise RuntimeError(f"mosquitto exited: {(self.folder / f'mosquitto-{self.port}.log').read_text()}")
            time.sleep(0.05)
        raise RuntimeError("mosquitto did not start listening")

    def stop(self) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.proc.terminate()
            self.proc.wait(10)
        self.proc = None

    def close(self) -> None:
        self.stop()
        self.log.close()


def credentials(user: str | None, password: str | None) -> list[str]:
    return [] if user is None else ["-u", user, "-P", password or ""]


def subscribe(port: int, topic: str, *, count: int, wait_s: float, user: str | None = None,
              password: str | None = None) -> list[tuple[str, str]]:
    """``mosquitto_sub -v -C count -W wait_s``: up to ``count`` (topic, payload) pairs, retained ones first."""
    proc = subprocess.run(
        [MOSQUITTO_SUB, "-h", LOOPBACK, "-p", str(port), "-t", topic, "-v", "-C", str(count), "-W", str(int(wait_s)),
         *credentials(user, password)],
        capture_output=True, timeout=wait_s + 10,
    )
    out = []
    for line in proc.stdout.decode("utf-8", "replace").splitlines():
        name, _, payload = line.partition(" ")
        out.append((name, payload))
    return out


def wait_json(port: int, topic: str, predicate: Any, *, timeout_s: float, user: str | None = None,
              password: str | None = None) -> dict[str, Any] | None:
    """Subscribe again and again until the retained JSON of ``topic`` satisfies ``predicate``."""
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        got = subscribe(port, topic, count=1, wait_s=max(1.0, min(3.0, deadline - time.monotonic())), user=user,
                        password=password)
        if got:
            payload = json.loads(got[0][1])
            if predicate(payload):
                return payload
        time.sleep(0.2)
    return None
