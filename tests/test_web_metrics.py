"""The /metrics endpoint parses with the Prometheus text parsers (text 0.0.4 and OpenMetrics)."""

from __future__ import annotations

import shutil

import pytest
from prometheus_client.openmetrics.parser import text_string_to_metric_families as parse_openmetrics
from prometheus_client.parser import text_string_to_metric_families as parse_text

from tests.web_support import QUICK_PLAN, served, wait_for

pytestmark = pytest.mark.timeout(120)


def samples(families) -> dict[tuple[str, tuple[tuple[str, str], ...]], float]:
    return {(s.name, tuple(sorted(s.labels.items()))): s.value for f in families for s in f.samples}


async def test_metrics_parse_and_count_what_happened(tmp_path):
    async with served(tmp_path) as srv:
        async with srv.session.get(srv.u("/metrics")) as r:
            assert r.status == 401  # viewing needs the token, scrapers too
        await srv.session.post(srv.u("/api/v1/stage/move"), headers=srv.auth, json={"well": "B3", "z_um": 1480})
        async with srv.session.post(srv.u("/api/v1/focus/auto"), headers=srv.auth, json={}) as r:
            focus = await r.json()
        async with srv.session.post(srv.u("/api/v1/stage/move"), headers=srv.auth, json={"z_um": 9999}) as r:
            assert r.status == 422  # a refused move is not a hardware error
        async with srv.session.get(srv.u("/metrics"), headers=srv.auth) as r:
            assert r.status == 200
            assert r.headers["Content-Type"].startswith("text/plain")
            text = await r.text()
        # Prometheus' own parser for the text exposition format 0.0.4.
        got = samples(parse_text(text))
        assert got[("phasewatch_frames_captured_total", ())] >= focus["frames"]
        assert got[("phasewatch_autofocus_runs_total", (("source", "api"),))] == 1
        assert got[("phasewatch_autofocus_failures_total", (("source", "api"),))] == (0 if focus["found"] else 1)
        assert got[("phasewatch_hardware_errors_total", (("where", "api"),))] == 0
        assert got[("phasewatch_disk_free_bytes", ())] > 0
        if focus["found"]:
            assert got[("phasewatch_focus_score_last", ())] == pytest.approx(focus["score"], rel=1e-6)

        async with srv.session.post(srv.u("/api/v1/timelapses"), headers=srv.auth, json={**QUICK_PLAN, "count": 1}) as r:
            tl = (await r.json())["id"]
        assert await wait_for(lambda: srv.station.active() is None, timeout_s=60)
        async with srv.session.get(srv.u("/metrics"), headers={**srv.auth, "Accept": "application/openmetrics-text"}) as r:
            assert r.headers["Content-Type"].startswith("application/openmetrics-text")
            om = await r.text()
        assert om.rstrip().endswith("# EOF")
        got = samples(parse_openmetrics(om))
        assert got[("phasewatch_timelapse_progress_ratio", (("state", "completed"), ("timelapse_id", str(tl))))] == 1.0
        assert got[("phasewatch_timelapse_frames_saved_total", ())] == 2
        assert got[("phasewatch_autofocus_runs_total", (("source", "timelapse"),))] == 2


async def test_metrics_for_the_alert_rules(tmp_path):
    """The metrics deploy/prometheus/rules.yml reads: missed time points, disk size and free
    space, per-well confluence with its passaging threshold, frames failing verification."""
    async with served(tmp_path) as srv:
        plan = {**QUICK_PLAN, "count": 3}
        async with srv.session.post(srv.u("/api/v1/timelapses"), headers=srv.auth, json=plan) as r:
            tl = (await r.json())["id"]
        s = srv.station.scheduler
        # Pause after the first time point and stay paused past the second one's slot.
        assert await wait_for(lambda: any(p["status"] == "done" for p in srv.station.index.time_points(tl)),
                              timeout_s=60)
        async with srv.session.post(srv.u(f"/api/v1/timelapses/{tl}/pause"), headers=srv.auth) as r:
            assert r.status in (200, 202)
        assert await wait_for(lambda: s.state == "paused", timeout_s=60)
        assert await wait_for(lambda: srv.station.scope.clock.now() > s.t0_s + 2.2 * s.interval_s, timeout_s=60)
        async with srv.session.post(srv.u(f"/api/v1/timelapses/{tl}/resume"), headers=srv.auth) as r:
            assert r.status in (200, 202)
        assert await wait_for(lambda: srv.station.active() is None, timeout_s=90)

        async with srv.session.get(srv.u("/metrics"), headers=srv.auth) as r:
            text = await r.text()
        # Reference parser: prometheus_client.parser.text_string_to_metric_families, Prometheus'
        # own client library's reader of the text exposition format 0.0.4.
        got = samples(parse_text(text))
        points = srv.station.index.time_points(tl)
        missed = sum(p["status"] == "missed" for p in points)
        assert missed >= 1, points
        assert got[("phasewatch_time_points_missed_total", ())] == missed
        usage = shutil.disk_usage(tmp_path)
        assert got[("phasewatch_disk_size_bytes", ())] == usage.total
        assert 0 < got[("phasewatch_disk_free_bytes", ())] <= usage.total
        assert got[("phasewatch_storage_check_damaged_frames", ())] == 0

        # Per-well confluence, worked out here from the index's frame rows: the mean over the
        # analysed sites of each well at the latest time point that ran.
        last = max(p["tp"] for p in points if p["status"] in ("done", "partial"))
        expected: dict[str, list[float]] = {}
        for f in srv.station.index.frames(tl, last):
            if f["confluence"] is not None and f["focus_found"] != 0:
                expected.setdefault(f["well"], []).append(f["confluence"])
        assert set(expected) == set(QUICK_PLAN["wells"])
        for well, values in expected.items():
            key = (("timelapse_id", str(tl)), ("well", well))
            assert got[("phasewatch_well_confluence_ratio", key)] == pytest.approx(sum(values) / len(values))
            # The culture watch's default passaging confluence (daemon/culture/alerts.py).
            assert got[("phasewatch_well_passaging_confluence_ratio", key)] == 0.8
        per_well = [k for k in got if k[0] == "phasewatch_well_confluence_ratio"]
        assert len(per_well) == len(QUICK_PLAN["wells"])  # one sample per well, nothing per frame or time point
