"""Time-lapses over the API: start, arbitration with manual control, progress, downloads, exports."""

from __future__ import annotations

import csv
import io

import pytest
import tifffile
import yarl

from tests.test_web_api import decode_jpeg
from tests.web_support import QUICK_PLAN, served, wait_for

pytestmark = pytest.mark.timeout(180)


async def _start(srv, plan=None):
    async with srv.session.post(srv.u("/api/v1/timelapses"), headers=srv.auth, json=plan or QUICK_PLAN) as r:
        body = await r.json()
        assert r.status == 201, body
        assert r.headers["Location"] == f"/api/v1/timelapses/{body['id']}"
        return body


async def _detail(srv, tl_id):
    async with srv.session.get(srv.u(f"/api/v1/timelapses/{tl_id}"), headers=srv.auth) as r:
        assert r.status == 200
        return await r.json()


async def test_timelapse_runs_to_the_end_and_its_frames_download(tmp_path):
    async with served(tmp_path) as srv:
        started = await _start(srv)
        tl = started["id"]
        assert started["estimate"]["positions"] == 2
        async with srv.session.get(srv.u("/api/v1/status"), headers=srv.auth) as r:
            active = (await r.json())["active_timelapse"]
        assert active is not None and active["id"] == tl
        assert await wait_for(lambda: srv.station.active() is None, timeout_s=90), "time-lapse did not finish"
        d = await _detail(srv, tl)
        assert d["state"] == "completed"
        assert d["time_points"]["done"] == 2 and d["missed"] == [], d["time_point_list"]
        assert d["progress_ratio"] == 1.0
        assert d["frames"] == 4  # 2 time points x 2 positions x 1 plane, raw only
        assert sorted(p["key"] for p in d["latest"]) == ["B2-1", "B3-1"]
        assert all(p["tp"] == 1 for p in d["latest"])

        async with srv.session.get(srv.u(f"/api/v1/timelapses/{tl}/frames?position=B3-1"), headers=srv.auth) as r:
            frames = await r.json()
        assert frames["total"] == 2 and [f["tp"] for f in frames["frames"]] == [0, 1]
        first = frames["frames"][0]
        async with srv.session.get(srv.u(first["download"]), headers=srv.auth) as r:
            assert r.status == 200 and r.headers["Content-Type"] == "image/tiff"
            pixels = tifffile.imread(io.BytesIO(await r.read()))
        assert pixels.shape == (240, 320)
        async with srv.session.get(srv.u(first["preview"] + "?width=160"), headers=srv.auth) as r:
            assert decode_jpeg(await r.read()).shape[:2] == (120, 160)

        async with srv.session.get(srv.u(f"/api/v1/timelapses/{tl}/series"), headers=srv.auth) as r:
            series = await r.json()
        assert set(series["positions"]) == {"B2-1", "B3-1"}
        assert len(series["positions"]["B2-1"]["focus_score"]) == 2
        assert set(series["wells"]) == {"B2", "B3"}

        async with srv.session.post(srv.u(f"/api/v1/timelapses/{tl}/exports"), headers=srv.auth) as r:
            assert r.status == 201, await r.text()
            made = await r.json()
        names = {f["name"] for f in made["files"]}
        assert {"frames.csv", "time-points.csv", "B2-1_raw.ome.tif", "B3-1_raw.ome.tif"} <= names
        csv_link = next(f["download"] for f in made["files"] if f["name"] == "frames.csv")
        async with srv.session.get(srv.u(csv_link), headers=srv.auth) as r:
            assert r.status == 200
            rows = list(csv.DictReader(io.StringIO(await r.text())))
        assert len(rows) == 4 and {r["well"] for r in rows} == {"B2", "B3"}
        stack_link = next(f["download"] for f in made["files"] if f["name"] == "B2-1_raw.ome.tif")
        async with srv.session.get(srv.u(stack_link), headers=srv.auth) as r:
            stack = tifffile.imread(io.BytesIO(await r.read()))
        assert stack.shape == (2, 240, 320)

        async with srv.session.post(srv.u(f"/api/v1/timelapses/{tl}/pause"), headers=srv.auth) as r:
            assert r.status == 409 and "completed" in (await r.json())["error"]["message"]


async def test_manual_control_is_refused_while_running_and_allowed_when_paused(tmp_path):
    plan = {**QUICK_PLAN, "interval_s": 3600, "count": 5, "name": "KVL-7 arbitration LR-0412"}
    async with served(tmp_path) as srv:
        tl = (await _start(srv, plan))["id"]
        async with srv.session.post(srv.u("/api/v1/stage/move"), headers=srv.auth, json={"z_um": 1500}) as r:
            assert r.status == 409
            msg = (await r.json())["error"]["message"]
        assert "running" in msg and f"/timelapses/{tl}/pause" in msg
        async with srv.session.post(srv.u("/api/v1/focus/auto"), headers=srv.auth, json={}) as r:
            assert r.status == 409
        async with srv.session.post(srv.u("/api/v1/timelapses"), headers=srv.auth, json=QUICK_PLAN) as r:
            assert r.status == 409 and "one time-lapse at a time" in (await r.json())["error"]["message"]

        async with srv.session.post(srv.u(f"/api/v1/timelapses/{tl}/pause"), headers=srv.auth) as r:
            paused = await r.json()
        # 200 once paused; 202 while the position being imaged (a cold focus search) finishes first.
        assert r.status in (200, 202), paused
        if r.status == 200:
            assert paused["state"] == "paused"
        else:
            assert "takes effect after the position" in paused["message"]
            assert await wait_for(lambda: srv.station.scheduler.state == "paused", timeout_s=60)
        async with srv.session.post(srv.u(f"/api/v1/timelapses/{tl}/pause"), headers=srv.auth) as r:
            assert r.status == 409 and "already paused" in (await r.json())["error"]["message"]
        async with srv.session.post(srv.u("/api/v1/stage/move"), headers=srv.auth, json={"well": "D5", "z_um": 1500}) as r:
            assert r.status == 200, await r.text()
        async with srv.session.post(srv.u(f"/api/v1/timelapses/{tl}/resume"), headers=srv.auth) as r:
            assert r.status == 200 and (await r.json())["state"] == "running"
        async with srv.session.post(srv.u(f"/api/v1/timelapses/{tl}/abort"), headers=srv.auth) as r:
            assert r.status in (200, 202)
        assert await wait_for(lambda: srv.station.active() is None, timeout_s=60)
        d = await _detail(srv, tl)
        assert d["state"] == "aborted"
        async with srv.session.post(srv.u("/api/v1/stage/move"), headers=srv.auth, json={"z_um": 1500}) as r:
            assert r.status == 200


async def test_a_plan_that_does_not_fit_is_refused_with_the_reason(tmp_path):
    async with served(tmp_path) as srv:
        bad = {**QUICK_PLAN, "wells": "all", "interval_s": 5}
        async with srv.session.post(srv.u("/api/v1/timelapses"), headers=srv.auth, json=bad) as r:
            assert r.status == 422
            assert "interval_s" in (await r.json())["error"]["message"]
        async with srv.session.post(srv.u("/api/v1/plans/check"), headers=srv.auth, json={**QUICK_PLAN, "colour": "red"}) as r:
            assert r.status == 422
            assert "colour" in (await r.json())["error"]["message"]
        # A plan may not make the daemon read files of its choosing.
        async with srv.session.post(srv.u("/api/v1/plans/check"), headers=srv.auth,
                                    json={**QUICK_PLAN, "vessel_file": "/etc/passwd"}) as r:
            assert r.status == 422
            assert "root:" not in await r.text()
        async with srv.session.get(srv.u("/api/v1/plans/demo"), headers=srv.auth) as r:
            demo = await r.json()
        assert r.status == 200 and demo["positions"] and demo["plan"]["vessel"] == "96-well"


async def test_no_path_outside_the_data_folder_can_be_read(tmp_path):
    secret = tmp_path.parent / f"{tmp_path.name}-outside.txt"
    secret.write_text("outside the data folder")
    async with served(tmp_path) as srv:
        tl = (await _start(srv, {**QUICK_PLAN, "count": 1}))["id"]
        assert await wait_for(lambda: srv.station.active() is None, timeout_s=60)
        async with srv.session.post(srv.u(f"/api/v1/timelapses/{tl}/exports"), headers=srv.auth) as r:
            assert r.status == 201
        attempts = [
            f"/api/v1/timelapses/{tl}/exports/..%2F..%2Faccess-token",
            f"/api/v1/timelapses/{tl}/exports/%2e%2e%2f%2e%2e%2faccess-token",
            f"/api/v1/timelapses/{tl}/exports/..%2F..%2F..%2F{secret.name}",
            f"/api/v1/timelapses/{tl}/exports/%2Fetc%2Fpasswd",
            f"/api/v1/timelapses/{tl}/exports/.hidden",
            "/static/..%2F..%2F__init__.py",
            "/static/%2e%2e%2fapp.py",
            "/static/index.html/../../app.py",
            f"/api/v1/timelapses/{tl}/frames/..%2F1",
            "/api/v1/../../etc/passwd",
        ]
        for path in attempts:
            url = yarl.URL(srv.url.rstrip("/") + path, encoded=True)
            async with srv.session.get(url, headers=srv.auth) as r:
                body = await r.text()
                assert r.status in (400, 404), (path, r.status)
                assert srv.token not in body and "outside the data folder" not in body and "root:" not in body
        # A symbolic link planted in the exports folder is not followed.
        export_dir = next((tmp_path / "exports").iterdir())
        (export_dir / "sneaky.csv").symlink_to(secret)
        async with srv.session.get(srv.u(f"/api/v1/timelapses/{tl}/exports/sneaky.csv"), headers=srv.auth) as r:
            assert r.status == 404
        # Nor does a frame row pointing out of the folder (a tampered index).
        frame_id = srv.station.index.frames(tl)[0]["id"]
        srv.station.index._conn.execute("UPDATE frames SET path = ? WHERE id = ?", (f"../{secret.name}", frame_id))
        async with srv.session.get(srv.u(f"/api/v1/timelapses/{tl}/frames/{frame_id}"), headers=srv.auth) as r:
            assert r.status == 404
            assert "outside the data folder" not in await r.text()


STATUS_LIMIT_BYTES = 64 * 1024


async def test_a_ten_million_point_plan_keeps_every_status_answer_small(tmp_path):
    """interval_s = 1, count = 10 000 000 at high speed, with a day's downtime on the way:
    the time-lapse's detail, the status and /metrics stay under 64 KB (counts, missed ranges,
    the latest rows), however many time points the index holds."""
    plan = {**QUICK_PLAN, "name": "KVL-7 every second", "wells": ["B2"], "interval_s": 1, "count": 10_000_000,
            "autofocus": "off"}
    async with served(tmp_path, speed=5000.0) as srv:
        tl = (await _start(srv, plan))["id"]
        index = srv.station.index
        assert await wait_for(lambda: index.time_point_counts(tl).get("done", 0) >= 3, timeout_s=60)
        # A day without the scope (as after a power cut): about 86 400 time points missed at once.
        srv.station.scope.clock.advance(86_400.0)
        assert await wait_for(lambda: index.time_point_counts(tl).get("missed", 0) >= 86_000, timeout_s=60)
        assert await wait_for(lambda: index.time_point_counts(tl).get("done", 0) >= 60, timeout_s=60)
        for path in (f"/api/v1/timelapses/{tl}", "/api/v1/status", "/api/v1/timelapses", "/metrics"):
            async with srv.session.get(srv.u(path), headers=srv.auth) as r:
                body = await r.read()
                assert r.status == 200, (path, body[:200])
                assert len(body) < STATUS_LIMIT_BYTES, (path, len(body))
        d = await _detail(srv, tl)
        assert d["time_points"]["missed"] >= 86_000
        big = [m for m in d["missed"] if m["count"] >= 86_000]
        assert big and big[0]["last_tp"] - big[0]["first_tp"] + 1 == big[0]["count"]
        assert len(d["time_point_list"]) <= 50
        async with srv.session.post(srv.u(f"/api/v1/timelapses/{tl}/abort"), headers=srv.auth, json={}) as r:
            assert r.status in (200, 202)
