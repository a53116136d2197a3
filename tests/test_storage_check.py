"""Damage anywhere in the stored frames is found after start and never served as good.

Reproducers: a flipped 4 KB block in an older frame and a wrong checksum in an older
index row (both pass the start-up check, which reads only the latest time point), and a
frame truncated to 5000 bytes while the daemon runs.
"""

from __future__ import annotations

import csv
import io
import sqlite3
from pathlib import Path

import pytest
from prometheus_client.parser import text_string_to_metric_families

from daemon.storage.index import INDEX_FILE, open_index
from daemon.storage.verify import VerifyProgress, verify_all
from tests.test_index_rebuild import N_FRAMES, _folder_with_frames
from tests.web_support import served, wait_for

pytestmark = pytest.mark.timeout(120)


def _flip_block(path: Path) -> None:
    data = bytearray(path.read_bytes())
    assert len(data) > 8192
    start = 4096  # inside the pixels, past the TIFF header: the file still opens
    data[start:start + 4096] = bytes(b ^ 0xFF for b in data[start:start + 4096])
    path.write_bytes(bytes(data))


def _damage_older_time_points(data: Path) -> tuple[str, str]:
    """A flipped block in a frame of time point 0, a wrong CRC in a row of time point 1."""
    with open_index(data) as index:
        frames = index.frames()
    flipped = next(f for f in frames if f["tp"] == 0)
    wrong = next(f for f in frames if f["tp"] == 1)
    _flip_block(data / flipped["path"])
    conn = sqlite3.connect(data / INDEX_FILE)
    conn.execute("UPDATE frames SET crc32 = ? WHERE id = ?", ((wrong["crc32"] + 1) % 2**32, wrong["id"]))
    conn.commit()
    conn.close()
    return flipped["path"], wrong["path"]


async def test_background_check_marks_damage_in_older_time_points(tmp_path: Path) -> None:
    _folder_with_frames(tmp_path)
    flipped, wrong = _damage_older_time_points(tmp_path)
    with open_index(tmp_path) as index:
        progress = await verify_all(tmp_path, index, VerifyProgress(), rate_mb_s=1000.0)
        status = {f["path"]: f["status"] for f in index.frames()}
        alerts = [a["message"] for a in index.alerts()]
    assert (progress.total, progress.checked, progress.damaged, progress.missing) == (N_FRAMES, N_FRAMES, 2, 0)
    assert status[flipped] == status[wrong] == "damaged"
    assert sum(s == "ok" for s in status.values()) == N_FRAMES - 2
    assert sum("background check" in m for m in alerts) == 2


async def test_background_check_keeps_to_its_read_rate(tmp_path: Path) -> None:
    _folder_with_frames(tmp_path)
    with open_index(tmp_path) as index:
        total_bytes = sum(f["bytes"] for f in index.frames())
        rate_mb_s = total_bytes / 1e6 / 0.5  # the whole folder should take at least 0.5 s
        progress = await verify_all(tmp_path, index, VerifyProgress(), rate_mb_s=rate_mb_s)
    elapsed = progress.finished_s - progress.started_s
    assert progress.bytes_read == total_bytes
    # Paced: never faster than the rate allows (the last frame's pause is the only slack).
    assert elapsed >= 0.5 * (1 - 1 / N_FRAMES) - 0.01, elapsed


async def test_serve_finds_older_damage_and_refuses_damaged_downloads(tmp_path: Path) -> None:
    tl = _folder_with_frames(tmp_path)
    flipped, wrong = _damage_older_time_points(tmp_path)
    async with served(tmp_path) as srv:
        assert await wait_for(lambda: srv.station.storage_check.finished_s is not None, timeout_s=30)
        async with srv.session.get(srv.u("/api/v1/status"), headers=srv.auth) as r:
            check = (await r.json())["storage_check"]
        assert check["running"] is False and check["checked"] == N_FRAMES and check["damaged"] == 2
        assert check["ratio"] == 1.0
        async with srv.session.get(srv.u("/metrics"), headers=srv.auth) as r:
            text = await r.text()
        samples = {s.name: s.value for fam in text_string_to_metric_families(text) for s in fam.samples}
        assert samples["phasewatch_storage_check_ratio"] == 1.0
        assert samples["phasewatch_storage_check_frames"] == N_FRAMES
        assert samples["phasewatch_storage_check_damaged_frames"] == 2

        with open_index(tmp_path) as index:
            rows = {f["path"]: f for f in index.frames(tl)}
        for path in (flipped, wrong):
            async with srv.session.get(srv.u(f"/api/v1/timelapses/{tl}/frames/{rows[path]['id']}"), headers=srv.auth) as r:
                body = await r.json()
                assert r.status == 410, body
                assert r.headers["X-Frame-Status"] == "damaged"
                assert "damaged" in body["error"]["message"] and path in body["error"]["message"]

        # Truncated while the daemon runs: refused at once, before any check has read it.
        ok_row = next(f for f in rows.values() if f["tp"] == 3)
        with open(tmp_path / ok_row["path"], "r+b") as fh:
            fh.truncate(5000)
        async with srv.session.get(srv.u(f"/api/v1/timelapses/{tl}/frames/{ok_row['id']}"), headers=srv.auth) as r:
            assert r.status == 410 and r.headers["X-Frame-Status"] == "damaged"
        (tmp_path / rows[wrong]["path"]).unlink()
        missing_row = next(f for f in rows.values() if f["tp"] == 2)
        (tmp_path / missing_row["path"]).unlink()
        async with srv.session.get(srv.u(f"/api/v1/timelapses/{tl}/frames/{missing_row['id']}"), headers=srv.auth) as r:
            assert r.status == 410 and r.headers["X-Frame-Status"] == "missing"
            assert "missing" in (await r.json())["error"]["message"]

        async with srv.session.post(srv.u(f"/api/v1/timelapses/{tl}/exports"), headers=srv.auth) as r:
            assert r.status == 201, await r.text()
            made = await r.json()
        link = next(f["download"] for f in made["files"] if f["name"] == "frames.csv")
        async with srv.session.get(srv.u(link), headers=srv.auth) as r:
            exported = {row["path"]: row["status"] for row in csv.DictReader(io.StringIO(await r.text()))}
    assert exported[flipped] == "damaged" and exported[wrong] == "damaged"
    assert exported[ok_row["path"]] == "damaged" and exported[missing_row["path"]] == "missing"
    assert sum(s == "ok" for s in exported.values()) == N_FRAMES - 4
