"""Ten scopes and one broker: the fleet view, message rate, memory, and time points with the broker away.

Ten ``phasewatch serve`` processes (the simulated scope at 320x240, clock 60 times real
time) report to one Mosquitto on loopback; a fleet follower in this process
(:func:`daemon.mqtt.fleet.follow`, what ``phasewatch fleet --serve`` runs) reads them back.

Measured:

* how long after each daemon is ready (its "serving" line) the fleet sees its status
  (target: all ten within 5 s), and after it was spawned;
* the rate of messages the fleet receives while every scope runs a time-lapse;
* resident memory of the broker and of the daemons (psutil);
* time-point lateness (start minus planned, in real seconds) with the broker up, stopped,
  and flapping (stopped and started every 2 s), each daemon's phases cut by its own clock;
  the target is lateness with the broker down or flapping no worse than with it up plus
  the scatter of the up phase (the 95th percentile stays within twice the up phase's,
  plus 0.5 s);
* how long after a SIGKILL the fleet shows the killed scope offline (its socket closes, so
  the broker publishes the last will at once), and after a SIGSTOP (the connection stays
  open and silent, as after a power cut: only the keep-alive tells). The standard asks
  the broker to act after 1.5 keep-alives (MQTT 3.1.1 section 3.1.2.10); Mosquitto's own
  timing decides, so a frozen ``mosquitto_sub`` with the same keep-alive and a last will,
  frozen at the same moment, is the reference: the daemon must be shown offline no later
  than it plus 1 s. A killed scope must be shown within 1.5 keep-alives plus 2 s;
* how long after the broker returns for good every scope shows online again (each
  daemon's back-off, capped at 15 s plus jitter, decides).
"""

from __future__ import annotations

import asyncio
import json
import re
import signal
import statistics
import subprocess
import tempfile
import threading
import time
import urllib.request
from pathlib import Path
from typing import Any

import psutil

from daemon.mqtt.fleet import Fleet, follow
from daemon.mqtt.publisher import BACKOFF_MAX_S
from daemon.mqtt.options import MqttOptions
from tests.mqtt_support import MOSQUITTO_SUB, Broker
from tests.web_support import PYTHON, REPO, small_profile

SCOPES = 10
SPEED = 60.0
KEEPALIVE_S = 5  # mosquitto_sub's smallest, for the reference below
PREFIX = "bench"
PHASE_S = 30.0
FLAP_EVERY_S = 2.0
PLAN = {
    "name": "KVL-7 fleet benchmark LR-0412", "vessel": "96-well", "wells": ["B2", "C3"], "interval_s": 300,
    "count": 500, "autofocus": "track", "correction": False, "save": "raw",
}


class Scope:
    def __init__(self, folder: Path, profile: Path, broker_url: str, name: str) -> None:
        self.name = name
        folder.mkdir()
        site = folder / "site.toml"
        site.write_text(f'[mqtt]\nurl = "{broker_url}"\ntopic_prefix = "{PREFIX}"\nscope_name = "{name}"\n'
                        f"keepalive_s = {KEEPALIVE_S}\n")
        self.data = folder / "data"
        self.log_path = folder / "serve.log"
        self.log = self.log_path.open("w")
        self.spawned = time.monotonic()
        self.proc = subprocess.Popen(
            [PYTHON, "-m", "daemon.cli", "serve", "--profile", str(profile), "--data", str(self.data), "--port", "0",
             "--no-discovery", "--sim-speed", str(SPEED), "--site", str(site), "--log-level", "warning"],
            cwd=REPO, stdout=self.log, stderr=subprocess.STDOUT,
        )
        self.ready: float | None = None
        self.url = ""
        self.token = ""

    def poll_ready(self) -> bool:
        if self.ready is None:
            m = re.search(r"on (http://127\.0\.0\.1:\d+/)", self.log_path.read_text())
            if m:
                self.ready = time.monotonic()
                self.url = m.group(1)
                self.token = (self.data / "access-token").read_text().strip()
            elif self.proc.poll() is not None:
                raise RuntimeError(f"{self.name} exited:\n{self.log_path.read_text()}")
        return self.ready is not None

    def call(self, method: str, path: str, body: dict[str, Any] | None = None) -> dict[str, Any]:
        req = urllib.request.Request(
            self.url.rstrip("/") + path, method=method, data=None if body is None else json.dumps(body).encode(),
            headers={"Authorization": f"Bearer {self.token}", "Content-Type": "application/json"},
        )
        with urllib.request.urlopen(req, timeout=60) as r:
            return json.loads(r.read())

    def clock_s(self) -> float:
        return float(self.call("GET", "/api/v1/status")["clock_s"])


class Follower:
    """The fleet view in a thread of its own, noting when each scope is first seen and seen offline."""

    def __init__(self, url: str) -> None:
        self.fleet = Fleet(PREFIX)
        self.first_seen: dict[str, float] = {}
        self.offline_at: dict[str, float] = {}
        self.loop = asyncio.new_event_loop()
        self.opts = MqttOptions(url=url, topic_prefix=PREFIX, keepalive_s=KEEPALIVE_S)
        self.thread = threading.Thread(target=self._run, daemon=True)
        self.thread.start()

    def _note(self) -> None:
        now = time.monotonic()
        for name, view in self.fleet.scopes.items():
            if view.status:
                self.first_seen.setdefault(name, now)
                if view.state == "offline":
                    self.offline_at.setdefault(name, now)

    def _run(self) -> None:
        asyncio.set_event_loop(self.loop)
        self.task = self.loop.create_task(follow(self.opts, self.fleet, on_message=self._note))
        try:
            self.loop.run_until_complete(self.task)
        except asyncio.CancelledError:
            pass

    def close(self) -> None:
        self.loop.call_soon_threadsafe(self.task.cancel)
        self.thread.join(10)


def lateness_by_phase(scope: Scope, tl_id: int, bounds: list[tuple[str, float, float]]) -> dict[str, list[float]]:
    detail = scope.call("GET", f"/api/v1/timelapses/{tl_id}")
    out: dict[str, list[float]] = {name: [] for name, _, _ in bounds}
    for p in detail["time_point_list"]:
        if p["started_s"] is None:
            continue
        for name, lo, hi in bounds:
            if lo <= p["planned_s"] < hi:
                out[name].append((p["started_s"] - p["planned_s"]) / SPEED)
    return out


def p95(values: list[float]) -> float:
    if not values:
        return float("nan")
    ordered = sorted(values)
    return ordered[min(len(ordered) - 1, round(0.95 * (len(ordered) - 1)))]


def main() -> list[dict[str, object]]:
    with tempfile.TemporaryDirectory(prefix="phasewatch-fleet-") as tmp:
        folder = Path(tmp)
        profile = small_profile(folder)
        broker = Broker(folder)
        followers = [Follower(broker.url)]
        scopes = [Scope(folder / f"s{i}", profile, broker.url, f"bench-scope-{i:02d}") for i in range(SCOPES)]
        try:
            return _run(folder, broker, followers, scopes)
        finally:
            for s in scopes:
                if s.proc.poll() is None:
                    s.proc.send_signal(signal.SIGTERM)
            for s in scopes:
                try:
                    s.proc.wait(60)
                except subprocess.TimeoutExpired:
                    s.proc.kill()
                s.log.close()
            for f in followers:
                f.close()
            broker.close()


def _run(folder: Path, broker: Broker, followers: list[Follower], scopes: list[Scope]) -> list[dict[str, object]]:
    follower = followers[0]
    deadline = time.monotonic() + 180
    while not all(s.poll_ready() for s in scopes):
        if time.monotonic() > deadline:
            raise RuntimeError("the daemons did not all start within 180 s")
        time.sleep(0.05)
    deadline = time.monotonic() + 30
    while len(follower.first_seen) < SCOPES and time.monotonic() < deadline:
        time.sleep(0.05)
    seen_count = len(follower.first_seen)
    seen_after_ready = [follower.first_seen[s.name] - s.ready for s in scopes if s.name in follower.first_seen]  # type: ignore[operator]
    seen_after_spawn = [follower.first_seen[s.name] - s.spawned for s in scopes if s.name in follower.first_seen]
    all_seen_s = max(seen_after_ready) if len(seen_after_ready) == SCOPES else float("inf")

    tl_ids = [s.call("POST", "/api/v1/timelapses", PLAN)["id"] for s in scopes]
    clocks: dict[str, list[float]] = {s.name: [s.clock_s()] for s in scopes}

    def boundary() -> None:
        for s in scopes:
            clocks[s.name].append(s.clock_s())

    # Broker up: message rate and memory.
    m0, t0 = follower.fleet.messages, time.monotonic()
    time.sleep(PHASE_S)
    rate = (follower.fleet.messages - m0) / (time.monotonic() - t0)
    broker_rss_mb = psutil.Process(broker.proc.pid).memory_info().rss / 1e6  # type: ignore[union-attr]
    daemon_rss_mb = [psutil.Process(s.proc.pid).memory_info().rss / 1e6 for s in scopes]
    boundary()
    # Broker down.
    broker.stop()
    time.sleep(PHASE_S)
    boundary()
    # Broker flapping.
    end = time.monotonic() + PHASE_S
    up = False
    while time.monotonic() < end:
        if up:
            broker.stop()
        else:
            broker.start()
        up = not up
        time.sleep(FLAP_EVERY_S)
    if not up:
        broker.start()
    back = time.monotonic()
    boundary()
    # Back up for good: a fresh fleet view (the old one may be backing off) sees every scope
    # online again once each daemon's back-off lets it reconnect and send its state again.
    follower.close()
    follower = Follower(broker.url)
    followers.append(follower)
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline and not (
        len(follower.fleet.scopes) == SCOPES and all(v.state not in ("offline", "unknown") for v in follower.fleet.scopes.values())
    ):
        time.sleep(0.1)
    back_s = time.monotonic() - back
    back_online = sum(1 for v in follower.fleet.scopes.values() if v.state not in ("offline", "unknown"))

    late: dict[str, list[float]] = {"up": [], "down": [], "flapping": []}
    for s, tl_id in zip(scopes, tl_ids):
        c = clocks[s.name]
        bounds = [("up", c[0], c[1]), ("down", c[1], c[2]), ("flapping", c[2], c[3])]
        for name, values in lateness_by_phase(s, tl_id, bounds).items():
            late[name].extend(values)

    # Kill one; the fleet must show it offline within its keep-alive.
    victim = scopes[0]
    follower.offline_at.pop(victim.name, None)
    victim.proc.send_signal(signal.SIGKILL)
    killed = time.monotonic()
    victim.proc.wait(10)
    deadline = killed + KEEPALIVE_S * 1.5 + 15
    while victim.name not in follower.offline_at and time.monotonic() < deadline:
        time.sleep(0.05)
    offline_s = follower.offline_at.get(victim.name, float("inf")) - killed
    # Frozen rather than killed (SIGSTOP: its connection stays open but falls silent, as
    # after a power cut or a pulled cable): only the keep-alive can tell the broker.
    # The reference: the broker's own client with the same keep-alive and a last will in the
    # same layout, frozen at the same moment.
    frozen = scopes[1]
    reference = subprocess.Popen(
        [MOSQUITTO_SUB, "-h", "127.0.0.1", "-p", str(broker.port), "-k", str(KEEPALIVE_S), "-i", "bench-reference",
         "-t", f"{PREFIX}/reference/unused", "--will-topic", f"{PREFIX}/reference/status",
         "--will-payload", '{"state": "offline"}'], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
    )
    time.sleep(1.0)
    follower.offline_at.pop(frozen.name, None)
    frozen.proc.send_signal(signal.SIGSTOP)
    reference.send_signal(signal.SIGSTOP)
    stopped = time.monotonic()
    deadline = stopped + KEEPALIVE_S * 3 + 15
    while not {frozen.name, "reference"} <= follower.offline_at.keys() and time.monotonic() < deadline:
        time.sleep(0.05)
    silent_s = follower.offline_at.get(frozen.name, float("inf")) - stopped
    reference_s = follower.offline_at.get("reference", float("inf")) - stopped
    for proc in (frozen.proc, reference):
        proc.send_signal(signal.SIGKILL)
        proc.wait(10)
    others_up = sum(1 for s in scopes[2:] if follower.fleet.scopes[s.name].state != "offline")

    up_p95 = p95(late["up"])
    rows: list[dict[str, object]] = [
        {"name": "scopes seen by the fleet", "value": seen_count, "unit": "scopes",
         "target": f"== {SCOPES}", "ok": seen_count == SCOPES},
        {"name": "fleet sees a scope, after ready (max)", "value": all_seen_s, "unit": "s", "target": "<= 5",
         "ok": all_seen_s <= 5.0},
        {"name": "fleet sees a scope, after ready (median)", "value": statistics.median(seen_after_ready), "unit": "s",
         "target": "-", "ok": None},
        {"name": "fleet sees a scope, after spawn (max)", "value": max(seen_after_spawn), "unit": "s",
         "target": "-", "ok": None},
        {"name": "messages to the fleet, 10 scopes running", "value": rate, "unit": "msg/s", "target": "-", "ok": None},
        {"name": "broker resident memory", "value": broker_rss_mb, "unit": "MB", "target": "-", "ok": None},
        {"name": "daemon resident memory (max)", "value": max(daemon_rss_mb), "unit": "MB", "target": "-", "ok": None},
        {"name": "daemon resident memory (median)", "value": statistics.median(daemon_rss_mb), "unit": "MB",
         "target": "-", "ok": None},
    ]
    for phase in ("up", "down", "flapping"):
        values = late[phase]
        rows.append({"name": f"time points, broker {phase}", "value": len(values), "unit": "tps", "target": "> 0",
                     "ok": len(values) > 0})
        rows.append({"name": f"lateness, broker {phase} (median)", "value": statistics.median(values) if values else
                     float("nan"), "unit": "s", "target": "-", "ok": None})
        target = "-" if phase == "up" else "<= 2 x up + 0.5"
        ok = None if phase == "up" else p95(values) <= 2 * up_p95 + 0.5
        rows.append({"name": f"lateness, broker {phase} (p95)", "value": p95(values), "unit": "s", "target": target,
                     "ok": ok})
    # The longest wait between tries (the cap, plus its 20 % jitter), and 5 s to connect and send.
    back_limit_s = BACKOFF_MAX_S * 1.2 + 5
    rows.append({"name": "all scopes online again after the broker returned", "value": back_s, "unit": "s",
                 "target": f"<= {back_limit_s:g}", "ok": back_online == SCOPES and back_s <= back_limit_s})
    limit_s = KEEPALIVE_S * 1.5 + 2
    rows.append({"name": "killed scope (SIGKILL) shown offline after", "value": offline_s, "unit": "s",
                 "target": f"<= {limit_s:g}", "ok": offline_s <= limit_s})
    rows.append({"name": "silent scope (SIGSTOP) shown offline after", "value": silent_s, "unit": "s",
                 "target": "<= mosquitto_sub + 1", "ok": silent_s <= reference_s + 1.0})
    rows.append({"name": "silent mosquitto_sub (same keep-alive) offline after", "value": reference_s, "unit": "s",
                 "target": "-", "ok": None})
    rows.append({"name": "keep-alive", "value": KEEPALIVE_S, "unit": "s", "target": "-", "ok": None})
    rows.append({"name": "other scopes still online", "value": others_up, "unit": "scopes",
                 "target": f"== {SCOPES - 2}", "ok": others_up == SCOPES - 2})
    return rows


if __name__ == "__main__":
    for row in main():
        print(row)
