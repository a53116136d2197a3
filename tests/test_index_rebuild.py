"""A missing, emptied or damaged index is rebuilt from the frame files; nothing is lost.

Reproducers: the index truncated to zero bytes, one page of it overwritten, the file
deleted. In each case start-up (what ``serve``, ``timelapse start`` and ``resume`` run),
``timelapse list`` and ``phasewatch index rebuild`` bring every time-lapse back with all
its frames, keep the damaged file aside and print no traceback.
"""

from __future__ import annotations

import json
import os
import stat
from pathlib import Path

import numpy as np
import pytest

from daemon.cli import main
from daemon.storage.frames import FrameStore
from daemon.storage.index import INDEX_FILE, RECORD_FILE, open_index
from daemon.timelapse.resume import open_data_folder
from tests.test_storage import _meta, _pixels, _timelapse

TIME_POINTS = 4
KEYS = ("B3-1", "B3-2")
Z_PLANES = 3
N_FRAMES = TIME_POINTS * len(KEYS) * Z_PLANES


def _folder_with_frames(data: Path) -> int:
    with open_index(data) as index:
        store = FrameStore(data, index)
        tl = _timelapse(index)
        seed = 0
        for tp in range(TIME_POINTS):
            index.begin_time_point(tl, tp, planned_s=1.77e9 + 600 * tp, started_s=1.77e9 + 600 * tp + 1)
            for key in KEYS:
                for z in range(Z_PLANES):
                    seed += 1
                    store.save(_pixels(seed, shape=(120, 160)), _meta(tl, tp=tp, key=key, z_index=z))
                index.record_position(tl, tp, key=key, well="B3", site=int(key[-1]), status="ok", t_s=1.77e9 + 600 * tp)
            index.finish_time_point(tl, tp, status="done", finished_s=1.77e9 + 600 * tp + 30)
        index.set_state(tl, "completed", finished_s=1.77e9 + 2000)
    return tl


def _damage(data: Path, how: str) -> None:
    path = data / INDEX_FILE
    for side in ("-wal", "-shm"):
        assert not (data / (INDEX_FILE + side)).exists()  # closed cleanly: all in the main file
    if how == "truncated":
        os.truncate(path, 0)
    elif how == "page overwritten":
        page = 4096
        assert path.stat().st_size >= 3 * page
        with open(path, "r+b") as fh:
            fh.seek(page)  # page 2: the first table's b-tree (page 1 holds the header and schema)
            fh.write(np.random.default_rng(7).integers(0, 256, page, dtype=np.uint8).tobytes())
    elif how == "deleted":
        path.unlink()
    else:
        raise AssertionError(how)


def _quarantined(data: Path) -> list[Path]:
    return sorted(p for p in (data / "quarantine").rglob("*") if p.is_file()) if (data / "quarantine").exists() else []


DAMAGE = ("truncated", "page overwritten", "deleted")


@pytest.mark.parametrize("how", DAMAGE)
def test_start_up_rebuilds_the_index_and_quarantines_nothing(tmp_path: Path, how: str) -> None:
    tl = _folder_with_frames(tmp_path)
    _damage(tmp_path, how)
    index, report = open_data_folder(tmp_path, now=lambda: 1.8e9)
    try:
        assert report.quarantined == [] and _quarantined(tmp_path) == []
        assert report.restored_timelapses == [tl]
        assert len(report.reindexed) == N_FRAMES
        assert report.index_problem is not None
        row = index.require_timelapse(tl)
        # The plan and schedule come back from the time-lapse's own record.
        assert row["name"] == "LR-0412 growth" and row["count"] == 4 and row["interval_s"] == 600.0
        assert json.loads(row["plan_json"])["plan"]["wells"] == ["B3"]
        assert row["state"] == "completed"
        assert len(index.frames(tl)) == N_FRAMES and all(f["status"] == "ok" for f in index.frames(tl))
        assert [(p["tp"], p["status"], p["n_ok"]) for p in index.time_points(tl)] == [
            (tp, "done", len(KEYS)) for tp in range(TIME_POINTS)
        ]
        assert any("rebuilt" in a["message"] for a in index.alerts())
    finally:
        index.close()
    kept = sorted(p.name for p in tmp_path.glob(f"{INDEX_FILE}.damaged-*") if not p.name.endswith(("-wal", "-shm")))
    assert len(kept) == (0 if how == "deleted" else 1)


@pytest.mark.parametrize("how", DAMAGE)
def test_timelapse_list_rebuilds_without_a_traceback(
    tmp_path: Path, how: str, capsys: pytest.CaptureFixture[str]
) -> None:
    tl = _folder_with_frames(tmp_path)
    _damage(tmp_path, how)
    assert main(["timelapse", "list", "--data", str(tmp_path), "--json"]) == 0
    out, err = capsys.readouterr()
    assert "Traceback" not in out + err
    rows = json.loads(out)
    assert [(r["id"], r["frames"], r["state"]) for r in rows] == [(tl, N_FRAMES, "completed")]
    assert "index rebuilt from the frame files" in err
    assert _quarantined(tmp_path) == []


def test_index_rebuild_command_reports_and_keeps_the_old_index(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    tl = _folder_with_frames(tmp_path)
    _damage(tmp_path, "page overwritten")
    assert main(["index", "rebuild", "--data", str(tmp_path)]) == 0
    out, err = capsys.readouterr()
    assert "Traceback" not in out + err
    assert f"1 time-lapses restored ({tl})" in out and f"{N_FRAMES} complete frames indexed again" in out
    assert f"indexing frames found on disk: 0/{N_FRAMES}" in err and f"done: {N_FRAMES}/{N_FRAMES}" in err
    assert len(list(tmp_path.glob(f"{INDEX_FILE}.damaged-*"))) == 1
    # On a sound index it rebuilds on request too, keeping that one aside as well.
    assert main(["index", "rebuild", "--data", str(tmp_path), "--quiet"]) == 0
    out, err = capsys.readouterr()
    assert "rebuilt on request" in out and err == ""
    assert len(list(tmp_path.glob(f"{INDEX_FILE}.damaged-*"))) == 2
    with open_index(tmp_path) as index:
        assert len(index.frames(tl)) == N_FRAMES


def test_rebuild_without_the_record_keeps_every_frame(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # An older folder (or one whose timelapse.json was lost): the frames alone bring the time-lapse back.
    tl = _folder_with_frames(tmp_path)
    record = next((tmp_path / "timelapses").glob(f"*/{RECORD_FILE}"))
    record.unlink()
    _damage(tmp_path, "truncated")
    assert main(["timelapse", "show", str(tl), "--data", str(tmp_path), "--json"]) == 0
    shown = json.loads(capsys.readouterr().out)
    assert shown["frames"] == N_FRAMES and shown["state"] == "stopped"
    assert "cannot be resumed" in shown["stop_reason"]
    assert _quarantined(tmp_path) == []


def test_a_file_that_is_not_a_frame_is_still_quarantined(tmp_path: Path) -> None:
    _folder_with_frames(tmp_path)
    stranger = next((tmp_path / "timelapses").glob("*/t00001")) / "C1-1_z00_raw.tif"
    stranger.write_bytes(b"not a tiff at all")
    _damage(tmp_path, "deleted")
    index, report = open_data_folder(tmp_path)
    index.close()
    assert len(report.reindexed) == N_FRAMES
    assert [Path(q).name for q in report.quarantined] == ["C1-1_z00_raw.tif"]


def test_no_index_and_no_frames_is_one_line(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["timelapse", "list", "--data", str(tmp_path)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "no phasewatch index here" in err
    assert main(["index", "rebuild", "--data", str(tmp_path)]) == 2
    assert "nothing to rebuild from" in capsys.readouterr().err


def test_data_folder_and_files_are_private(tmp_path: Path) -> None:
    data = tmp_path / "data"
    _folder_with_frames(data)
    assert stat.S_IMODE(data.stat().st_mode) == 0o700
    private = [data / INDEX_FILE, *data.rglob("*.tif"), *data.rglob(RECORD_FILE)]
    assert len(private) == 2 + N_FRAMES
    for path in private:
        assert stat.S_IMODE(path.stat().st_mode) == 0o600, path
    for folder in (p for p in data.rglob("*") if p.is_dir()):
        assert stat.S_IMODE(folder.stat().st_mode) == 0o700, folder


@pytest.mark.parametrize("record", ["kept", "lost"])
async def test_serve_on_a_damaged_index_serves_the_rebuilt_time_lapse(tmp_path: Path, record: str) -> None:
    from tests.web_support import served

    tl = _folder_with_frames(tmp_path)
    if record == "lost":
        next((tmp_path / "timelapses").glob(f"*/{RECORD_FILE}")).unlink()
    _damage(tmp_path, "page overwritten")
    async with served(tmp_path) as srv:
        async with srv.session.get(srv.u(f"/api/v1/timelapses/{tl}"), headers=srv.auth) as r:
            detail = await r.json()
            assert r.status == 200, detail
        assert detail["frames"] == N_FRAMES and detail["frames_not_ok"] == 0
        assert detail["count"] == TIME_POINTS and detail["interval_s"] == pytest.approx(600.0)
        assert sorted(detail["positions"]) == list(KEYS)
        for path in (f"/api/v1/timelapses/{tl}/series", f"/api/v1/timelapses/{tl}/wells/B3/readings"):
            async with srv.session.get(srv.u(path), headers=srv.auth) as r:
                assert r.status == 200, (path, await r.text())
    assert _quarantined(tmp_path) == []
