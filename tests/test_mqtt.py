"""MQTT reporting against a real Mosquitto on loopback, checked with its stock mosquitto_sub:
retained state soon after start, readings after a time point, the last will after SIGKILL,
a broker that is away at start, the fleet view, and the site file's strict options."""

from __future__ import annotations

import json
import re
import signal
import subprocess
import time
import urllib.request

import pytest

from daemon.cli import main
from daemon.mqtt.options import MqttOptions, load_site, mqtt_options, parse_url, scope_level
from drivers.options import ConfigError
from tests.mqtt_support import Broker, free_port, subscribe, wait_json
from tests.web_support import PYTHON, QUICK_PLAN, REPO, Daemon

pytestmark = pytest.mark.timeout(240)

PREFIX = "lab-test"
KEEPALIVE_S = 2


def site_file(tmp_path, url: str, scope: str, **extra: object) -> str:
    lines = ["[mqtt]", f'url = "{url}"', f'topic_prefix = "{PREFIX}"', f'scope_name = "{scope}"',
             f"keepalive_s = {KEEPALIVE_S}"]
    lines += [f"{k} = {json.dumps(v)}" for k, v in extra.items()]
    path = tmp_path / f"site-{scope}.toml"
    path.write_text("\n".join(lines) + "\n")
    return str(path)


@pytest.fixture
def broker(tmp_path):
    b = Broker(tmp_path)
    try:
        yield b
    finally:
        b.close()


def start_daemon(tmp_path, broker_url: str, scope: str, speed: str = "1000") -> Daemon:
    folder = tmp_path / scope
    folder.mkdir()
    return Daemon(folder, folder / "data", extra=("--sim-speed", speed, "--site", site_file(tmp_path, broker_url, scope)))


def wait_until_over(d: Daemon, tl_id: int, timeout_s: float = 60) -> bool:
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        if d.call("GET", f"/api/v1/timelapses/{tl_id}")[1]["state"] == "completed":
            return True
        time.sleep(0.3)
    return False


# -- options -----------------------------------------------------------------------------


def test_urls_and_scope_levels():
    assert parse_url("mqtt://127.0.0.1").port == 1883  # IANA port for MQTT (common practice)
    ep = parse_url("mqtts://broker.lab.example:18883")
    assert (ep.host, ep.port, ep.tls) == ("broker.lab.example", 18883, True)
    for bad in ("http://x", "mqtt://", "mqtt://user:pw@host", "mqtt://host/topic", "mqtt://host:99999"):
        with pytest.raises(ValueError, match="url"):
            parse_url(bad)
    assert scope_level("Larkspur Row bench scope (simulated)") == "larkspur-row-bench-scope-simulated"


def test_site_file_is_strict_and_names_file_section_option(tmp_path):
    path = tmp_path / "site.toml"
    path.write_text('[mqtt]\nurl = "mqtt://127.0.0.1:1884"\nkeepalive = 5\n')
    with pytest.raises(ConfigError) as err:
        load_site(path)
    assert str(err.value).startswith(f"{path}: [mqtt] keepalive: unknown option (did you mean 'keepalive_s'?)")
    path.write_text('[mqtt]\nurl = "mqtt://127.0.0.1:1884"\n[mqtt.tls]\ncert_file = "c.pem"\n')
    with pytest.raises(ConfigError, match=r"\[mqtt.tls\] cert_file: .*key_file"):
        load_site(path)
    path.write_text('[mqtt]\nurl = "mqtt://h"\ntopic_prefix = "lab/#"\n')
    with pytest.raises(ConfigError, match=r"\[mqtt\] topic_prefix"):
        load_site(path)
    path.write_text('[mqt]\nurl = "mqtt://h"\n')
    with pytest.raises(ConfigError, match=r"mqt: unknown section \(did you mean 'mqtt'\?\)"):
        load_site(path)
    path.write_text('[mqtt]\nurl = "mqtt://h"\nusername = "scope-3"\npassword_file = "/no/such/file"\n')
    with pytest.raises(ConfigError, match=r"\[mqtt\] password_file: cannot be read"):
        load_site(path).get("mqtt").password()
    path.write_text('[mqtt]\nurl = "mqtt://h"\nkeepalive_s = 7\n')
    opts = mqtt_options(path, "mqtt://127.0.0.1:2000")
    assert (opts.url, opts.keepalive_s) == ("mqtt://127.0.0.1:2000", 7)
    with pytest.raises(ConfigError, match=r"\[serve\] --mqtt"):
        mqtt_options(None, "tcp://h")
    assert not MqttOptions().enabled


def test_bad_mqtt_url_is_one_line_before_anything_opens(tmp_path, capsys):
    code = main(["serve", "--data", str(tmp_path / "d"), "--no-discovery", "--mqtt", "mqtt://host:notaport"])
    err = capsys.readouterr().err
    assert code == 2 and len(err.strip().splitlines()) == 1 and "--mqtt" in err and "port" in err


# -- against the broker ------------------------------------------------------------------


def test_state_readings_fleet_and_last_will(tmp_path, broker):
    d = start_daemon(tmp_path, broker.url, "incubator-3-left")
    try:
        t0 = time.monotonic()
        status = wait_json(broker.port, f"{PREFIX}/incubator-3-left/status", lambda s: s["state"] == "idle",
                           timeout_s=10)
        assert status is not None, d.output()
        assert time.monotonic() - t0 < 10
        assert status["page_url"] == d.url and status["commands_accepted"] is False
        assert status["name"] == "Larkspur Row bench scope (simulated)"

        code, body = d.call("POST", "/api/v1/timelapses", QUICK_PLAN)
        assert code == 201, body
        well = wait_json(broker.port, f"{PREFIX}/incubator-3-left/wells/B2",
                         lambda w: w["confluence_fraction"] is not None, timeout_s=60)
        assert well is not None, d.output()
        assert well["well"] == "B2" and 0 <= well["confluence_fraction"] <= 1
        assert well["focus"] in ("found", "failed", "not_searched") and well["sites_total"] >= 1
        tl = wait_json(broker.port, f"{PREFIX}/incubator-3-left/timelapse",
                       lambda x: x["timelapse_id"] is not None or x["state"] is None, timeout_s=10)
        assert tl is not None
        thumb = subprocess.run(
            ["mosquitto_sub", "-h", "127.0.0.1", "-p", str(broker.port), "-t", f"{PREFIX}/incubator-3-left/thumbnail",
             "-C", "1", "-W", "15", "-N"], capture_output=True, timeout=30,
        ).stdout
        assert thumb[:2] == b"\xff\xd8", "the thumbnail is a JPEG (SOI marker, ITU-T T.81 B.1.1.3)"

        assert wait_until_over(d, body["id"]), d.output()
        # Nothing received moves the scope: a "command" on the scope's own topics changes nothing.
        before = d.call("GET", "/api/v1/status")[1]["position_um"]
        subprocess.run(["mosquitto_pub", "-h", "127.0.0.1", "-p", str(broker.port), "-t",
                        f"{PREFIX}/incubator-3-left/move", "-m", '{"x_um": 1000, "y_um": 1000}'], check=True, timeout=10)
        time.sleep(0.5)
        assert d.call("GET", "/api/v1/status")[1]["position_um"] == before

        out = subprocess.run([PYTHON, "-m", "daemon.cli", "fleet", "--site", site_file(tmp_path, broker.url, "x"),
                              "--json"], cwd=REPO, capture_output=True, text=True, timeout=60)
        assert out.returncode == 0, out.stderr
        rows = {r["scope"]: r for r in json.loads(out.stdout)}
        assert rows["incubator-3-left"]["page_url"] == d.url
        assert rows["incubator-3-left"]["state"] in ("idle", "waiting", "acquiring", "paused")
        assert rows["incubator-3-left"]["wells"]["B2"]["well"] == "B2"
    finally:
        d.proc.send_signal(signal.SIGKILL)
        d.proc.wait(10)
        d.log.close()
    killed = time.monotonic()
    offline = wait_json(broker.port, f"{PREFIX}/incubator-3-left/status", lambda s: s["state"] == "offline",
                        timeout_s=KEEPALIVE_S * 1.5 + 8)
    assert offline is not None and offline["reason"] == "connection lost"
    # MQTT 3.1.1 section 3.1.2.10: the broker drops a client silent for 1.5 keep-alives.
    assert time.monotonic() - killed < KEEPALIVE_S * 1.5 + 8


def test_clean_stop_says_offline(tmp_path, broker):
    d = start_daemon(tmp_path, broker.url, "incubator-4")
    assert wait_json(broker.port, f"{PREFIX}/incubator-4/status", lambda s: s["state"] == "idle", timeout_s=10)
    assert d.stop() == 0
    got = subscribe(broker.port, f"{PREFIX}/incubator-4/status", count=1, wait_s=3)
    assert got and json.loads(got[0][1])["state"] == "offline"
    assert json.loads(got[0][1])["reason"] == "daemon stopped"


def test_a_broker_away_at_start_neither_stops_the_time_lapse_nor_loses_the_state(tmp_path):
    port = free_port()
    d = start_daemon(tmp_path, f"mqtt://127.0.0.1:{port}", "incubator-5")
    broker = None
    try:
        code, body = d.call("POST", "/api/v1/timelapses", QUICK_PLAN)
        assert code == 201, body
        assert wait_until_over(d, body["id"]), d.output()
        broker = Broker(tmp_path, port)
        # Back-off tops out at 15 s (plus jitter); the tries so far have reached a few seconds.
        status = wait_json(port, f"{PREFIX}/incubator-5/status", lambda s: s["state"] == "idle", timeout_s=40)
        assert status is not None, d.output()
        wells = subscribe(port, f"{PREFIX}/incubator-5/wells/+", count=2, wait_s=5)
        assert sorted(t for t, _ in wells) == [f"{PREFIX}/incubator-5/wells/B2", f"{PREFIX}/incubator-5/wells/B3"]
        assert all(json.loads(p)["time_point"] == 1 for _, p in wells)
    finally:
        d.stop()
        if broker is not None:
            broker.close()


def readme_acl() -> str:
    """The access list the README's lab network section recommends, as written there."""
    text = (REPO / "README.md").read_text()
    block = text[text.index("      # every scope:"):]
    block = block[: block.index("topic read phasewatch/#") + len("topic read phasewatch/#")]
    return "\n".join(line.strip() for line in block.splitlines()) + "\n"


def test_readme_access_list_with_passwords_and_the_fleet_page(tmp_path):
    passwd = tmp_path / "passwd"
    users = {"incubator-6": "p6-quartz-7", "incubator-7": "p7-basalt-2", "fleet-viewer": "fv-slate-9"}
    for i, (user, pw) in enumerate(users.items()):
        subprocess.run(["mosquitto_passwd", "-b", *(["-c"] if i == 0 else []), str(passwd), user, pw], check=True,
                       timeout=20)
    (tmp_path / "acl").write_text(readme_acl())
    broker = Broker(tmp_path, extra_conf=f"allow_anonymous false\npassword_file {passwd}\nacl_file {tmp_path / 'acl'}\n")
    pw_file = tmp_path / "mqtt-password"
    pw_file.write_text(users["incubator-6"] + "\n")
    pw_file.chmod(0o600)
    folder = tmp_path / "scope"
    folder.mkdir()
    site = tmp_path / "site.toml"
    site.write_text(f'[mqtt]\nurl = "{broker.url}"\nusername = "incubator-6"\npassword_file = "{pw_file}"\n'
                    'scope_name = "incubator-6"\nkeepalive_s = 2\n')
    d = Daemon(folder, folder / "data", extra=("--sim-speed", "1000", "--site", str(site)))
    fleet_page = None
    viewer = {"user": "fleet-viewer", "password": users["fleet-viewer"]}
    try:
        status = wait_json(broker.port, "phasewatch/incubator-6/status", lambda s: s["state"] == "idle", timeout_s=15,
                           **viewer)
        assert status is not None, d.output()
        def pub(user: str, topic: str) -> None:
            subprocess.run(["mosquitto_pub", "-h", "127.0.0.1", "-p", str(broker.port), "-u", user, "-P", users[user],
                            "-q", "1", "-r", "-t", topic, "-m", '{"state": "offline"}'], check=True, timeout=10)

        # Another scope, and the read-only viewer, cannot overwrite this scope's state...
        pub("incubator-7", "phasewatch/incubator-6/status")
        pub("fleet-viewer", "phasewatch/incubator-6/status")
        # ... while the other scope may write its own.
        pub("incubator-7", "phasewatch/incubator-7/status")
        got = subscribe(broker.port, "phasewatch/incubator-7/status", count=1, wait_s=3, **viewer)
        assert got and json.loads(got[0][1])["state"] == "offline"
        got = subscribe(broker.port, "phasewatch/incubator-6/status", count=1, wait_s=3, **viewer)
        assert got and json.loads(got[0][1])["state"] == "idle"
        # ... and without a password nobody reads anything.
        assert subscribe(broker.port, "phasewatch/#", count=1, wait_s=2) == []

        viewer_site = tmp_path / "viewer.toml"
        (tmp_path / "viewer-password").write_text(users["fleet-viewer"])
        viewer_site.write_text(f'[mqtt]\nurl = "{broker.url}"\nusername = "fleet-viewer"\n'
                               f'password_file = "{tmp_path / "viewer-password"}"\n')
        fleet_page = subprocess.Popen([PYTHON, "-m", "daemon.cli", "fleet", "--site", str(viewer_site), "--serve", "0"],
                                      cwd=REPO, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)
        line = fleet_page.stdout.readline()  # type: ignore[union-attr]
        m = re.search(r"on (http://127\.0\.0\.1:\d+/)", line)
        assert m, line
        deadline = time.monotonic() + 15
        rows: list[dict] = []
        while time.monotonic() < deadline and len(rows) < 2:
            with urllib.request.urlopen(m.group(1) + "fleet.json", timeout=10) as r:
                rows = json.loads(r.read())
            time.sleep(0.2)
        by_scope = {r["scope"]: r for r in rows}
        assert by_scope["incubator-6"]["state"] == "idle" and by_scope["incubator-7"]["state"] == "offline"
        with urllib.request.urlopen(m.group(1), timeout=10) as r:
            page = r.read().decode()
        assert "incubator-6" in page and f'href="{d.url}"' in page and ">idle<" in page
    finally:
        if fleet_page is not None:
            fleet_page.send_signal(signal.SIGTERM)
            fleet_page.wait(20)
        d.stop()
        broker.close()


def test_the_queue_keeps_the_newest_per_topic_and_drops_the_oldest_when_full():
    from types import SimpleNamespace

    from daemon.mqtt.publisher import MqttPublisher

    station = SimpleNamespace(profile=SimpleNamespace(scope=SimpleNamespace(name="Larkspur Row incubator 3")))
    pub = MqttPublisher(MqttOptions(url="mqtt://127.0.0.1", queue_size=10), station)  # type: ignore[arg-type]
    assert pub.topic("status") == "phasewatch/larkspur-row-incubator-3/status"
    for i in range(15):
        pub.put(pub.topic("wells", f"A{i + 1}"), b"%d" % i)
    assert pub.dropped == 5 and len(pub._pending) == 10
    assert next(iter(pub._pending)) == pub.topic("wells", "A6")  # the five oldest went
    pub.put(pub.topic("wells", "A6"), b"newer")  # replaces the waiting one: nothing dropped
    assert pub.dropped == 5 and list(pub._pending)[-1] == pub.topic("wells", "A6")
    assert pub._pending[pub.topic("wells", "A6")] == b"newer"
    # Every topic's latest is kept for the next connection, dropped from the queue or not.
    assert len(pub._latest) == 15 and pub._latest[pub.topic("wells", "A1")] == b"0"
    pub.on_event({"type": "alert", "timelapse_id": 2, "id": 9, "t_s": 10.0, "level": "warning", "kind": "focus",
                  "message": "focus failed at B3-s0"})
    alerts = json.loads(pub._latest[pub.topic("alerts")])
    assert alerts["count"] == 1 and alerts["alerts"][0]["message"] == "focus failed at B3-s0"
    assert alerts["schema"] == 1
