"""Crash-safe frame storage: OME-TIFF files, the SQLite index, reconciliation, exports."""

from __future__ import annotations

import csv
import dataclasses
import errno
import os
import sqlite3
import zlib
from pathlib import Path

import numpy as np
import ome_types
import pytest
import tifffile

from daemon.storage import frames as frames_mod
from daemon.storage.export import export_csv, export_stacks
from daemon.storage.frames import FrameStore, StorageWriteError, frame_relpath
from daemon.storage.index import DuplicateFrame, Index, open_index
from daemon.storage.ome import FrameMeta, encode_frame, read_frame
from daemon.storage.reconcile import reconcile
from daemon.storage.space import MB, SpaceGuard
from daemon.timelapse.plan import Plan, WellCondition, ZStack
from drivers import atomic
from tests.helpers import sim_profile

PIXEL_UM = sim_profile().optics.pixel_size_um  # 3.75 um camera pixel / 10x = 0.375 um


def _timelapse(index: Index, name: str = "LR-0412 growth") -> int:
    # Recorded as the scheduler records one: the plan and its positions (site B3-2 has a z-stack).
    plan = Plan(
        name=name, vessel="96-well", wells=["B3"], sites_per_well=2, interval_s=600.0, count=4, autofocus="track",
        z_stack=ZStack(3, 5.0), exposure_ms=20.0, gain_db=3.0, correction=False, save="raw",
    )
    positions = [{"key": f"B3-{s}", "well": "B3", "site": s, "x_um": 23380.0, "y_um": 20240.0} for s in (1, 2)]
    return index.create_timelapse(
        name=name, plan={"plan": plan.to_dict(), "positions": positions}, profile_path="hw_profiles/sim.toml",
        profile_name="sim",
        created_s=1.77e9, t0_s=1.77e9, interval_s=600.0, count=4, n_positions=2, reserve_mb=1.0,
    )


def _meta(tl_id: int, *, tp: int = 0, key: str = "B3-2", z_index: int = 0, kind: str = "raw",
          bit_depth: int = 8, z_um: float = 1502.25) -> FrameMeta:
    return FrameMeta(
        timelapse_id=tl_id, timelapse_name="LR-0412 growth", tp=tp, key=key, well=key.split("-")[0],
        site=int(key.split("-")[1]), z_index=z_index, kind=kind, t_s=1.77e9 + 600.0 * tp + 1.5,
        delta_t_s=600.0 * tp + 1.5, x_um=23380.0, y_um=20240.0, z_um=z_um, exposure_ms=20.0,
        gain_db=3.0, bit_depth=bit_depth, pixel_size_um=PIXEL_UM, focus_score=41.5, confluence=0.37,
        focus_found=True, objective="10x/0.25 Ph1",
    )


def _pixels(seed: int, dtype: type = np.uint8, shape: tuple[int, int] = (48, 64)) -> np.ndarray:
    top = 255 if dtype == np.uint8 else 4095
    return np.random.default_rng(seed).integers(0, top + 1, size=shape).astype(dtype)


@pytest.fixture
def store(tmp_path: Path) -> FrameStore:
    index = open_index(tmp_path)
    yield FrameStore(tmp_path, index)
    index.close()


def test_frame_is_lossless_and_its_ome_xml_validates(store: FrameStore) -> None:
    tl = _timelapse(store.index)
    for bit_depth, dtype in ((8, np.uint8), (12, np.uint16)):
        pixels = _pixels(bit_depth, dtype)
        meta = _meta(tl, kind="raw" if bit_depth == 8 else "corrected", bit_depth=bit_depth)
        saved = store.save(pixels, meta)
        path = store.data_dir / saved.path
        # Lossless: every pixel back as written.
        np.testing.assert_array_equal(tifffile.imread(path), pixels)
        # OME-XML validated against the OME 2016-06 XSD shipped with ome-types (general-purpose
        # OME data-model library from PyPI), which also parses it into its typed model.
        ome = ome_types.from_tiff(path, validate=True)
        image = ome.images[0]
        plane = image.pixels.planes[0]
        assert image.pixels.physical_size_x == pytest.approx(PIXEL_UM)
        assert image.pixels.physical_size_x_unit.value == "µm"
        assert image.acquisition_date.timestamp() == pytest.approx(meta.t_s, abs=1e-3)
        assert (plane.position_x, plane.position_y, plane.position_z) == (23380.0, 20240.0, 1502.25)
        assert plane.exposure_time == 20.0 and plane.exposure_time_unit.value == "ms"
        assert image.pixels.channels[0].contrast_method.value == "Phase"
        values = ome.structured_annotations.map_annotations[0].value
        assert (values["well"], values["site"], values["time_point"]) == ("B3", "2", "0")
        # tifffile reads the physical pixel size back from the same file.
        with tifffile.TiffFile(path) as tif:
            assert tif.is_ome
            pixels_xml = tifffile.xml2dict(tif.ome_metadata)["OME"]["Image"]["Pixels"]
            assert float(pixels_xml["PhysicalSizeX"]) == pytest.approx(PIXEL_UM)
            assert float(pixels_xml["PhysicalSizeY"]) == pytest.approx(PIXEL_UM)
        # Everything needed to index it again is inside the file.
        _, back = read_frame(path)
        assert back == meta


def test_index_row_points_at_complete_file_with_matching_checksum(store: FrameStore) -> None:
    tl = _timelapse(store.index)
    saved = store.save(_pixels(1), _meta(tl))
    (row,) = store.index.frames(tl)
    data = (store.data_dir / saved.path).read_bytes()
    assert row["bytes"] == len(data) and row["crc32"] == zlib.crc32(data)
    assert (row["well"], row["site"], row["tp"], row["kind"]) == ("B3", 2, 0, "raw")


def test_same_frame_twice_is_refused_and_not_written(store: FrameStore) -> None:
    tl = _timelapse(store.index)
    store.save(_pixels(1), _meta(tl))
    path = store.data_dir / frame_relpath(store.folder(tl), _meta(tl))
    before = path.read_bytes()
    with pytest.raises(DuplicateFrame):
        store.save(_pixels(2), _meta(tl))
    assert path.read_bytes() == before
    assert len(store.index.frames(tl)) == 1


def test_disk_full_mid_frame_leaves_no_partial_file(store: FrameStore, monkeypatch: pytest.MonkeyPatch) -> None:
    tl = _timelapse(store.index)
    store.save(_pixels(1), _meta(tl, key="B3-1"))

    def half_then_full(fh, data):  # type: ignore[no-untyped-def]
        fh.write(bytes(data)[: len(data) // 2])
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(frames_mod, "_write_all", half_then_full)
    with pytest.raises(StorageWriteError) as info:
        store.save(_pixels(2), _meta(tl, key="B3-2"))
    assert info.value.errno == errno.ENOSPC
    assert "nothing partial" in str(info.value)
    folder = store.data_dir / store.folder(tl) / "t00000"
    assert sorted(p.name for p in folder.iterdir()) == ["B3-1_z00_raw.tif"]
    assert [f["key"] for f in store.index.frames(tl)] == ["B3-1"]


class PowerCut(BaseException):
    """Stands for the process vanishing: nothing after it runs, not even except-handlers for Exception."""


@pytest.mark.parametrize("cut_at", ["write", "fsync", "rename", "index"])
def test_power_cut_at_each_step_is_reconciled(
    store: FrameStore, monkeypatch: pytest.MonkeyPatch, cut_at: str
) -> None:
    tl = _timelapse(store.index)
    store.save(_pixels(1), _meta(tl, key="B3-1"))
    meta = _meta(tl, key="B3-2")
    final = store.data_dir / frame_relpath(store.folder(tl), meta)
    tmp = atomic.temp_name(final)

    def cut(*_a, **_k):  # type: ignore[no-untyped-def]
        raise PowerCut

    # The real process would leave the temporary behind; keep it by making cleanup a no-op.
    monkeypatch.setattr(frames_mod.Path, "unlink", lambda self, *a, **k: None)
    if cut_at == "write":
        monkeypatch.setattr(frames_mod, "_write_all", lambda fh, data: (fh.write(bytes(data)[:100]), cut()))
    elif cut_at == "fsync":
        monkeypatch.setattr(atomic.os, "fsync", cut)
    elif cut_at == "rename":
        monkeypatch.setattr(atomic.os, "replace", cut)
    else:
        monkeypatch.setattr(store.index, "add_frame", cut)
    with pytest.raises(PowerCut):
        store.save(_pixels(2), meta)
    monkeypatch.undo()

    report = reconcile(store.data_dir, open_index(store.data_dir), verify="all")
    assert not tmp.exists()
    keys = [f["key"] for f in store.index.frames(tl)]
    if cut_at == "index":
        # The file was complete and in place: it comes back into the index from its own metadata.
        assert report.reindexed == [frame_relpath(store.folder(tl), meta)]
        assert keys == ["B3-1", "B3-2"]
        np.testing.assert_array_equal(tifffile.imread(final), _pixels(2))
    else:
        assert report.removed_partials and not final.exists()
        assert keys == ["B3-1"]
    assert report.clean and report.verified == 1


def test_reconcile_reports_missing_and_damaged_and_quarantines_strangers(store: FrameStore) -> None:
    tl = _timelapse(store.index)
    gone = store.save(_pixels(1), _meta(tl, key="B3-1"))
    hurt = store.save(_pixels(2), _meta(tl, key="B3-2"))
    kept = store.save(_pixels(3), _meta(tl, key="B3-3"))
    (store.data_dir / gone.path).unlink()
    damaged = bytearray((store.data_dir / hurt.path).read_bytes())
    damaged[-10] ^= 0xFF  # same size, one flipped byte: only the checksum sees it
    (store.data_dir / hurt.path).write_bytes(bytes(damaged))
    stranger = store.data_dir / store.folder(tl) / "t00000" / "C1-1_z00_raw.tif"
    stranger.write_bytes(b"not a tiff at all")

    size_only = reconcile(store.data_dir, store.index, verify="size")
    assert size_only.missing == [gone.path] and size_only.damaged == []
    report = reconcile(store.data_dir, store.index, verify="all")
    assert report.missing == [gone.path]
    assert report.damaged == [hurt.path]
    assert report.quarantined == []  # moved aside by the first pass already
    assert (store.data_dir / "quarantine" / size_only.quarantined[0]).exists()
    status = {f["path"]: f["status"] for f in store.index.frames(tl)}
    assert status == {gone.path: "missing", hurt.path: "damaged", kept.path: "ok"}
    kinds = [a["message"] for a in store.index.alerts()]
    assert any("missing" in m for m in kinds) and any("damaged" in m for m in kinds)
    assert any("quarantine" in m for m in kinds)


def test_index_uses_wal_and_survives_reopening(tmp_path: Path) -> None:
    with open_index(tmp_path) as index:
        tl = _timelapse(index)
        index.begin_time_point(tl, 0, planned_s=10.0, started_s=12.0)
        index.begin_time_point(tl, 0, planned_s=10.0, started_s=99.0)  # restarted: first start kept
        index.record_missed(tl, [(1, 610.0), (2, 1210.0)], "daemon was not running")
        index.save_resume_state(tl, tracker={"last_z_um": {"B3-2": 1501.0}})
        index.post_request(tl, "pause")
    conn = sqlite3.connect(tmp_path / "index.sqlite")
    assert conn.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
    conn.close()
    with open_index(tmp_path) as index:
        points = index.time_points(tl)
        assert [(p["tp"], p["status"]) for p in points] == [(0, "running"), (1, "missed"), (2, "missed")]
        assert points[0]["started_s"] == 12.0
        assert points[1]["reason"] == "daemon was not running"
        assert index.resume_state(tl)["tracker"] == {"last_z_um": {"B3-2": 1501.0}}
        assert index.take_request(tl) == "pause"
        assert index.take_request(tl) is None
        assert [t["id"] for t in index.unfinished()] == [tl]


def test_space_guard_keeps_the_reserve() -> None:
    guard = SpaceGuard(Path("."), reserve_mb=100.0, free=lambda _p: 150 * MB)
    assert guard.check(40 * MB).ok
    low = guard.check(60 * MB)
    assert not low.ok
    assert "150 MB free" in low.message and "100 MB are kept in reserve" in low.message


def test_exports_csv_and_ome_stacks(store: FrameStore, tmp_path: Path) -> None:
    tl = _timelapse(store.index)
    for tp in range(3):
        store.index.begin_time_point(tl, tp, planned_s=1.77e9 + 600 * tp, started_s=1.77e9 + 600 * tp + 1)
        for z in range(3):
            store.save(_pixels(10 * tp + z), _meta(tl, tp=tp, key="B3-2", z_index=z, z_um=1490.0 + 5 * z))
        store.save(_pixels(100 + tp), _meta(tl, tp=tp, key="B3-1"))
        store.index.finish_time_point(tl, tp, status="done", finished_s=1.77e9 + 600 * tp + 9)
    store.index.record_missed(tl, [(3, 1.77e9 + 1800)], "daemon was not running")
    # Position B3-2 lacks one plane at time point 2: left out of its stack, not padded.
    missing = store.index.frames(tl)[-1]
    assert (missing["key"], missing["tp"], missing["z_index"]) == ("B3-2", 2, 2)
    store.index.set_frame_status(missing["id"], "missing")

    out = tmp_path / "export"
    frames_csv, points_csv = export_csv(store.index, tl, out)
    lines = frames_csv.read_text().splitlines()
    assert len(lines) == 1 + 12
    assert lines[0].startswith("timelapse_id,time_point,planned_s,t_s")
    assert "missed" in points_csv.read_text() and "daemon was not running" in points_csv.read_text()

    stacks = {s.position: s for s in export_stacks(store.index, store.data_dir, tl, out)}
    assert (stacks["B3-2"].time_points, stacks["B3-2"].z_planes, stacks["B3-2"].skipped_time_points) == (2, 3, 1)
    assert (stacks["B3-1"].time_points, stacks["B3-1"].z_planes) == (3, 1)
    with tifffile.TiffFile(stacks["B3-2"].path) as tif:
        assert tif.series[0].axes == "TZYX" and tif.series[0].shape == (2, 3, 48, 64)
        data = tif.asarray()
    np.testing.assert_array_equal(data[1, 2], _pixels(12))
    ome = ome_types.from_tiff(stacks["B3-2"].path, validate=True)
    planes = ome.images[0].pixels.planes
    assert [p.position_z for p in planes[:3]] == [1490.0, 1495.0, 1500.0]
    assert planes[3].delta_t == pytest.approx(601.5)


def test_encode_refuses_colour_frames() -> None:
    with pytest.raises(ValueError, match="2-D"):
        encode_frame(np.zeros((4, 4, 3), np.uint8), _meta(1))


def test_a_wells_condition_is_in_its_frames_ome_metadata_and_every_csv(store: FrameStore, tmp_path: Path) -> None:
    from daemon.storage.export import export_csv

    index = store.index
    plan = Plan(
        name="LR-0412 dose", vessel="96-well", wells=["B3", "B4"], sites_per_well=1, interval_s=600.0, count=2,
        autofocus="track", z_stack=None, exposure_ms=20.0, gain_db=3.0, correction=False, save="raw",
        conditions={"B3": WellCondition("R-17 5 uM", "added at 09:30, batch 4")},
    )
    positions = [{"key": f"{w}-1", "well": w, "site": 1, "x_um": 23380.0, "y_um": 20240.0} for w in ("B3", "B4")]
    tl = index.create_timelapse(
        name=plan.name, plan={"plan": plan.to_dict(), "positions": positions}, profile_path="hw_profiles/sim.toml",
        profile_name="sim", created_s=1.77e9, t0_s=1.77e9, interval_s=600.0, count=2, n_positions=2, reserve_mb=1.0,
    )
    meta = dataclasses.replace(_meta(tl, key="B3-1"), timelapse_name=plan.name, condition="R-17 5 uM",
                               condition_notes="added at 09:30, batch 4")
    saved = store.save(_pixels(3), meta)
    store.save(_pixels(4), dataclasses.replace(_meta(tl, key="B4-1"), timelapse_name=plan.name))
    path = store.data_dir / saved.path
    # Validated against the OME XSD by ome-types (as above); the label is a key of the frame's map annotation.
    ome = ome_types.from_tiff(path, validate=True)
    values = ome.structured_annotations.map_annotations[0].value
    assert (values["condition"], values["condition_notes"]) == ("R-17 5 uM", "added at 09:30, batch 4")
    assert read_frame(path)[1] == meta
    export_csv(index, tl, tmp_path / "out")
    for name, well_column in (("frames.csv", "well"), ("wells.csv", "well"), ("growth.csv", "well")):
        rows = list(csv.DictReader((tmp_path / "out" / name).open(encoding="utf-8")))
        by_well = {r[well_column]: (r["condition"], r["condition_notes"]) for r in rows}
        assert by_well["B3"] == ("R-17 5 uM", "added at 09:30, batch 4"), name
        assert by_well["B4"] == ("", ""), name
