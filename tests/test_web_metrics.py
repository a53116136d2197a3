"""The /metrics endpoint parses with the Prometheus text parsers (text 0.0.4 and OpenMetrics)."""

from __future__ import annotations

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
