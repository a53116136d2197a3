"""The live MJPEG stream: decodes with OpenCV, capped rate, reduced size, one shared capture
loop, and time points pre-empting live view."""

from __future__ import annotations

import asyncio
import time

import cv2
import numpy as np
import pytest

from tests.web_support import served, split_mjpeg, wait_for

pytestmark = pytest.mark.timeout(120)


async def _read_stream(srv, query: str) -> tuple[list[tuple[dict[str, str], bytes]], float]:
    t0 = time.perf_counter()
    async with srv.session.get(srv.u(f"/api/v1/stream.mjpeg?{query}"), headers=srv.auth) as r:
        assert r.status == 200
        assert r.headers["Content-Type"].startswith("multipart/x-mixed-replace; boundary=phasewatchframe")
        body = await r.read()
    return split_mjpeg(body), time.perf_counter() - t0


async def test_mjpeg_parts_decode_with_opencv_at_the_reduced_size(tmp_path):
    async with served(tmp_path) as srv:
        parts, _ = await _read_stream(srv, "frames=5&width=160&fps=20")
    assert len(parts) == 5
    seqs = []
    for headers, jpeg in parts:
        assert headers["content-type"] == "image/jpeg"
        img = cv2.imdecode(np.frombuffer(jpeg, np.uint8), cv2.IMREAD_GRAYSCALE)
        assert img is not None and img.shape == (120, 160)
        assert headers["x-frame-source"] == "live"
        seqs.append(int(headers["x-frame-seq"]))
    assert seqs == sorted(set(seqs)), "every part is a new frame"


async def test_frame_rate_is_capped_per_client(tmp_path):
    async with served(tmp_path, max_fps=20.0) as srv:
        parts, seconds = await _read_stream(srv, "frames=6&fps=4&width=64")
    assert len(parts) == 6
    # Six frames at most 4 per second span at least 5 intervals of 1/4 s.
    assert seconds >= 5 * 0.25 * 0.9


async def test_one_capture_loop_serves_every_viewer(tmp_path):
    async with served(tmp_path, max_fps=10.0) as srv:
        scope = srv.station.scope
        await _read_stream(srv, "frames=2&fps=10&width=64")  # warm up
        before = scope.frames_captured
        results = await asyncio.gather(*(_read_stream(srv, "frames=10&fps=10&width=64") for _ in range(3)))
        taken = scope.frames_captured - before
        assert all(len(parts) == 10 for parts, _ in results)
        # Three viewers of 10 frames each: one loop exposes about 10 frames, not 30.
        assert taken <= 16, taken
        # Nobody watching: the loop stops, so the LED is no longer lit for live view.
        assert await wait_for(lambda: srv.station.live._task is None or srv.station.live._task.done(), timeout_s=3)
        idle = scope.frames_captured
        await asyncio.sleep(0.5)
        assert scope.frames_captured == idle


async def test_a_job_holding_the_scope_pre_empts_live_view_and_is_marked(tmp_path):
    async with served(tmp_path) as srv:
        scope = srv.station.scope

        async def hold_like_a_time_point() -> None:
            await asyncio.sleep(0.3)
            async with scope.claim("time-lapse KVL-7 LR-0412"):
                for _ in range(3):
                    await scope.capture()
                    await asyncio.sleep(0.1)

        holder = asyncio.create_task(hold_like_a_time_point())
        parts, _ = await _read_stream(srv, "frames=8&fps=20&width=160")
        await holder
    sources = [h["x-frame-source"] for h, _ in parts]
    assert "live" in sources
    assert "time-lapse KVL-7 LR-0412" in sources, sources
    # While the time point holds the scope, live view exposes nothing of its own: every
    # frame it shows then is one the time point took.
    assert sources.count("time-lapse KVL-7 LR-0412") <= 3


async def test_frame_jpg_during_a_time_point_is_the_time_points_frame(tmp_path):
    async with served(tmp_path) as srv:
        scope = srv.station.scope
        async with scope.claim("time-lapse KVL-7 LR-0412"):
            await scope.capture()
            async with srv.session.get(srv.u("/api/v1/frame.jpg"), headers=srv.auth) as r:
                assert r.status == 200
                assert r.headers["X-Frame-Source"] == "time-lapse KVL-7 LR-0412"
                img = cv2.imdecode(np.frombuffer(await r.read(), np.uint8), cv2.IMREAD_GRAYSCALE)
        assert img is not None
        # The label burnt into the frame: the top-left corner is the dark band behind the text.
        assert img[:4, :40].mean() < img.mean()


async def test_a_camera_fault_is_reported_and_live_view_recovers(tmp_path):
    async with served(tmp_path) as srv:
        camera = srv.station.scope.camera
        await camera.close()  # as if unplugged: every grab now fails with a CameraError
        async with srv.session.get(srv.u("/api/v1/frame.jpg"), headers=srv.auth) as r:
            assert r.status == 503
            body = await r.json()
        assert body["error"]["kind"] == "hardware" and "not open" in body["error"]["message"]
        async with srv.session.get(srv.u("/api/v1/status"), headers=srv.auth) as r:
            assert "not open" in (await r.json())["live"]["error"]
        errors = srv.station.metrics.hardware_errors.labels("live_view")._value.get()
        assert errors >= 1
        await camera.open()  # plugged back in
        async with srv.session.get(srv.u("/api/v1/frame.jpg"), headers=srv.auth) as r:
            assert r.status == 200
            assert r.headers["X-Frame-Source"] == "live"
