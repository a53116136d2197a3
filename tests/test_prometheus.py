"""The shipped Prometheus files (deploy/prometheus/) checked by Prometheus' own tools, and a
real Prometheus on loopback scraping a running daemon with the bearer token.

promtool and prometheus are Debian's ``prometheus`` package (.ci/run installs it); the tests
skip only where the binaries are missing on a developer's machine.
"""

from __future__ import annotations

import json
import re
import shutil
import socket
import subprocess
import time
import urllib.parse
import urllib.request
from pathlib import Path

import pytest

from tests.web_support import LOOPBACK, QUICK_PLAN, served_in_thread

pytestmark = pytest.mark.timeout(180)

DEPLOY = Path(__file__).resolve().parent.parent / "deploy" / "prometheus"
RULES = DEPLOY / "rules.yml"
PROMTOOL = shutil.which("promtool") or "/usr/bin/promtool"
PROMETHEUS = shutil.which("prometheus") or "/usr/bin/prometheus"
needs_promtool = pytest.mark.skipif(not Path(PROMTOOL).exists(), reason="promtool not installed (Debian package prometheus)")
needs_prometheus = pytest.mark.skipif(
    not Path(PROMETHEUS).exists(), reason="prometheus not installed (Debian package prometheus)"
)


def promtool(*args: str, cwd: Path = DEPLOY) -> subprocess.CompletedProcess[str]:
    return subprocess.run([PROMTOOL, *args], cwd=cwd, capture_output=True, text=True, timeout=60)


def rule_names() -> list[str]:
    return re.findall(r"^\s*- alert:\s*(\w+)", RULES.read_text(), re.M)


def metrics_the_rules_use() -> set[str]:
    """Every metric name in the rules' expressions (``up`` is Prometheus' own)."""
    text = RULES.read_text()
    return set(re.findall(r"\b(phasewatch_[a-z0-9_]+)", text)) | {"up"}


@needs_promtool
def test_rules_pass_promtool_check():
    r = promtool("check", "rules", "rules.yml")
    assert r.returncode == 0, r.stdout + r.stderr
    assert f"SUCCESS: {len(rule_names())} rules found" in r.stdout


@needs_promtool
def test_scrape_configuration_passes_promtool_check(tmp_path):
    # The example names a token file on the Prometheus host; its syntax is checked as shipped...
    r = promtool("check", "config", "--syntax-only", "prometheus.yml")
    assert r.returncode == 0, r.stdout + r.stderr
    # ...and in full (token file present, rule file loaded) once the token file exists.
    token = tmp_path / "scope.token"
    token.write_text("0123456789abcdef\n")
    token.chmod(0o600)
    text = (DEPLOY / "prometheus.yml").read_text()
    assert "credentials_file:" in text and "bearer_token:" not in text  # the token never sits in the file
    text = re.sub(r"credentials_file: .*", f"credentials_file: {token}", text)
    (tmp_path / "prometheus.yml").write_text(text)
    shutil.copy(RULES, tmp_path / "rules.yml")
    r = promtool("check", "config", "prometheus.yml", cwd=tmp_path)
    assert r.returncode == 0, r.stdout + r.stderr
    assert "SUCCESS" in r.stdout and f"{len(rule_names())} rules found" in r.stdout


@needs_promtool
def test_rule_unit_tests_pass_and_cover_every_rule():
    r = promtool("test", "rules", "rules_test.yml")
    assert r.returncode == 0, r.stdout + r.stderr
    assert "SUCCESS" in r.stdout
    tested = set(re.findall(r"alertname:\s*(\w+)", (DEPLOY / "rules_test.yml").read_text()))
    assert set(rule_names()) <= tested, f"rules without a unit test: {set(rule_names()) - tested}"
    assert len(rule_names()) == 7


@needs_promtool
def test_a_broken_rule_unit_test_fails(tmp_path):
    """The unit tests can fail: the same file with one expected value changed does."""
    text = (DEPLOY / "rules_test.yml").read_text()
    wrong = text.replace("is 85% confluent", "is 84% confluent")
    assert wrong != text
    (tmp_path / "rules_test.yml").write_text(wrong)
    shutil.copy(RULES, tmp_path / "rules.yml")
    r = promtool("test", "rules", "rules_test.yml", cwd=tmp_path)
    assert r.returncode != 0 and "FAILED" in (r.stdout + r.stderr)


def free_port() -> int:
    with socket.socket() as s:
        s.bind((LOOPBACK, 0))
        return int(s.getsockname()[1])


def query(base: str, promql: str) -> list[dict]:
    url = f"{base}/api/v1/query?" + urllib.parse.urlencode({"query": promql})
    with urllib.request.urlopen(url, timeout=5) as r:
        body = json.load(r)
    assert body["status"] == "success", body
    return body["data"]["result"]


def post(url: str, token: str, body: dict) -> dict:
    req = urllib.request.Request(
        url, data=json.dumps(body).encode(), method="POST",
        headers={"Authorization": f"Bearer {token}", "Content-Type": "application/json"},
    )
    with urllib.request.urlopen(req, timeout=30) as r:
        return json.load(r)


def poll(what: str, check, *, timeout_s: float, log: Path):
    """``check()`` until it returns something truthy; bounded in time."""
    deadline = time.monotonic() + timeout_s
    last = None
    while time.monotonic() < deadline:
        try:
            last = check()
        except OSError as exc:  # Prometheus still starting
            last = exc
        if last and not isinstance(last, Exception):
            return last
        time.sleep(0.5)
    pytest.fail(f"{what} within {timeout_s} s; last: {last!r}\nprometheus log tail:\n{log.read_text()[-3000:]}")


@needs_prometheus
def test_real_prometheus_scrapes_the_daemon_with_its_token(tmp_path):
    data = tmp_path / "data"
    prom_dir = tmp_path / "prometheus"
    prom_dir.mkdir()
    with served_in_thread(data) as (url, token):
        # A finished time-lapse gives per-well confluence readings to expose.
        tl = post(f"{url}/api/v1/timelapses", token, {**QUICK_PLAN, "count": 2})["id"]
        token_file = prom_dir / "scope.token"
        token_file.write_text(token + "\n")
        token_file.chmod(0o600)
        host_port = url.removeprefix("http://")
        (prom_dir / "prometheus.yml").write_text(
            "global:\n  scrape_interval: 1s\n  evaluation_interval: 1s\n"
            "rule_files:\n  - rules.yml\n"
            "scrape_configs:\n"
            "  - job_name: phasewatch\n"
            "    authorization:\n      type: Bearer\n"
            f"      credentials_file: {token_file}\n"
            f"    static_configs:\n      - targets: ['{host_port}']\n        labels:\n          scope: test-scope\n"
            # A second job without the token: the daemon must refuse it (up == 0).
            "  - job_name: phasewatch_no_token\n"
            f"    static_configs:\n      - targets: ['{host_port}']\n"
        )
        shutil.copy(RULES, prom_dir / "rules.yml")
        port = free_port()
        base = f"http://{LOOPBACK}:{port}"
        log = prom_dir / "prometheus.log"
        with log.open("w") as out:
            proc = subprocess.Popen(
                [PROMETHEUS, f"--config.file={prom_dir / 'prometheus.yml'}", f"--storage.tsdb.path={prom_dir / 'tsdb'}",
                 f"--web.listen-address={LOOPBACK}:{port}"],
                stdout=out, stderr=subprocess.STDOUT,
            )
        try:
            def up_values() -> dict[str, str] | None:
                got = {r["metric"]["job"]: r["value"][1] for r in query(base, "up")}
                return got if len(got) == 2 else None

            up = poll("Prometheus scraped both jobs", up_values, timeout_s=60, log=log)
            assert up["phasewatch_no_token"] == "0"  # refused without the token
            poll("the daemon up with the token", lambda: up_values() and up_values()["phasewatch"] == "1",
                 timeout_s=30, log=log)
            (row,) = query(base, 'up{job="phasewatch"}')
            assert row["metric"]["scope"] == "test-scope" and row["metric"]["instance"] == host_port

            def present() -> set[str]:
                names = set()
                for name in metrics_the_rules_use():
                    if query(base, f'{name}{{job="phasewatch"}}'):
                        names.add(name)
                return names

            def all_present() -> bool:
                return present() == metrics_the_rules_use()

            ok = poll("every metric the rules use, scraped", all_present, timeout_s=90, log=log)
            assert ok
            wells = {r["metric"]["well"]: float(r["value"][1])
                     for r in query(base, f'phasewatch_well_confluence_ratio{{timelapse_id="{tl}"}}')}
            assert set(wells) == set(QUICK_PLAN["wells"]) and all(0.0 <= v <= 1.0 for v in wells.values())
            thresholds = query(base, "phasewatch_well_passaging_confluence_ratio")
            assert {float(r["value"][1]) for r in thresholds} == {0.8}  # the culture watch's default
            free = float(query(base, "phasewatch_disk_free_bytes")[0]["value"][1])
            assert free == pytest.approx(shutil.disk_usage(data).free, rel=0.05)
            # Prometheus loaded the shipped rules and evaluates them against the scrape.
            with urllib.request.urlopen(f"{base}/api/v1/rules", timeout=5) as r:
                groups = json.load(r)["data"]["groups"]
            loaded = [rule for g in groups for rule in g["rules"]]
            assert {rule["name"] for rule in loaded} == set(rule_names())
            assert all(rule["health"] in ("ok", "unknown") for rule in loaded), loaded
        finally:
            proc.terminate()
            try:
                proc.wait(timeout=20)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait(timeout=10)
