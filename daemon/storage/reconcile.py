"""Start-up reconciliation of a data folder's files with its index.

After a crash or power cut three things can be out of step, and each is put right:

* a temporary file of a frame being written: removed (that frame was never indexed);
* a complete frame renamed into place whose index row was never committed: indexed
  again from the metadata inside the file;
* an indexed frame whose file is gone or changed (disk trouble, a person deleting files):
  marked ``missing`` or ``damaged`` in the index and reported, never silently dropped.

A complete frame of a time-lapse the index does not know at all (the index was lost,
emptied or set aside as damaged) brings its time-lapse back: the row comes from the
time-lapse's own ``timelapse.json`` (plan, profile, schedule) and, failing that, from the
frames' OME-XML; its time points and positions are rebuilt from the frames found. A valid
frame is never quarantined because the index lost it.

Files that look like frames but cannot be read or do not belong where they lie are moved
to ``quarantine/`` rather than deleted.
"""

from __future__ import annotations

import dataclasses
import json
import os
import time
import zlib
from collections.abc import Callable
from pathlib import Path
from typing import Any

from daemon.states import FrameState, PositionState, TimelapseState, TimePointState
from daemon.storage.frames import frame_relpath
from daemon.storage.index import DATA_FOLDER_MODE, RECORD_FILE, Index, slug
from daemon.storage.ome import FrameMeta, NotOurFrame, read_frame
from drivers import atomic

# (frames done, frames in all, what is being done): called now and then on long work.
Progress = Callable[[int, int, str], None]
REBUILT_UNFINISHED = "index rebuilt from the frame files while the time-lapse was unfinished; resume it to go on"
REBUILT_NO_RECORD = "index rebuilt from the frame files; the plan was not recorded in them, so it cannot be resumed"

VERIFY_MODES = ("all", "recent", "size")


@dataclasses.dataclass
class ReconcileReport:
    removed_partials: list[str] = dataclasses.field(default_factory=list)
    verified: int = 0
    checksummed: int = 0
    missing: list[str] = dataclasses.field(default_factory=list)
    damaged: list[str] = dataclasses.field(default_factory=list)
    reindexed: list[str] = dataclasses.field(default_factory=list)
    quarantined: list[str] = dataclasses.field(default_factory=list)
    restored_timelapses: list[int] = dataclasses.field(default_factory=list)
    # Set by the caller when the index itself was unusable and set aside before this ran.
    index_problem: str | None = None
    index_kept_as: str | None = None
    seconds: float = 0.0

    @property
    def clean(self) -> bool:
        return not (self.missing or self.damaged or self.quarantined)

    def summary(self) -> str:
        parts = []
        if self.index_problem:
            kept = f", the old one kept as {self.index_kept_as}" if self.index_kept_as else ""
            parts.append(f"{self.index_problem}: index rebuilt from the frame files{kept}")
        parts.append(f"{self.verified} indexed frames checked ({self.checksummed} by checksum)")
        if self.removed_partials:
            parts.append(f"{len(self.removed_partials)} unfinished temporary files removed")
        if self.reindexed:
            parts.append(f"{len(self.reindexed)} complete frames indexed again")
        if self.restored_timelapses:
            ids = ", ".join(str(i) for i in self.restored_timelapses)
            parts.append(f"{len(self.restored_timelapses)} time-lapses restored ({ids})")
        if self.missing:
            parts.append(f"{len(self.missing)} indexed frames MISSING")
        if self.damaged:
            parts.append(f"{len(self.damaged)} indexed frames DAMAGED")
        if self.quarantined:
            parts.append(f"{len(self.quarantined)} unreadable files moved to quarantine/")
        return "; ".join(parts)


def _crc_of_file(path: Path) -> int:
    crc = 0
    with open(path, "rb") as fh:
        while chunk := fh.read(1 << 20):
            crc = zlib.crc32(chunk, crc)
    return crc


def _quarantine(data_dir: Path, rel: str) -> None:
    target = data_dir / "quarantine" / rel
    atomic.make_dirs(target.parent, mode=DATA_FOLDER_MODE)
    atomic.move(data_dir / rel, target)


def _read_record(data_dir: Path, folder: str, tl_id: int) -> dict[str, Any] | None:
    """The time-lapse's ``timelapse.json``, when it is there, readable and its own."""
    try:
        record = json.loads((data_dir / folder / RECORD_FILE).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    if not isinstance(record, dict) or record.get("id") != tl_id or record.get("folder") != folder:
        return None
    return record


def _restore_timelapse(data_dir: Path, index: Index, meta: FrameMeta, rel: str) -> str | None:
    """Put back the row of the time-lapse a found frame belongs to; its folder, or None when
    the frame does not lie in the folder its metadata names."""
    folder = f"timelapses/{meta.timelapse_id:04d}-{slug(meta.timelapse_name)}"
    if not rel.startswith(folder + "/"):
        return None
    record = _read_record(data_dir, folder, meta.timelapse_id)
    if record is not None:
        row = {k: record[k] for k in (
            "id", "name", "folder", "profile_path", "profile_name", "created_s", "t0_s", "interval_s",
            "count", "n_positions", "reserve_mb",
        )}
        row["plan_json"] = json.dumps(record["plan"])
        row.update(state=TimelapseState.PAUSED, stop_reason=REBUILT_UNFINISHED, finished_s=None)
    else:
        t0 = meta.t_s - meta.delta_t_s
        row = {
            "id": meta.timelapse_id, "name": meta.timelapse_name, "folder": folder, "plan_json": "{}",
            "profile_path": "", "profile_name": "", "created_s": t0, "t0_s": t0, "interval_s": 0.0,
            "count": 0, "n_positions": 0, "reserve_mb": 0.0,
            "state": TimelapseState.STOPPED, "stop_reason": REBUILT_NO_RECORD, "finished_s": None,
        }
    index.restore_timelapse(row)
    return folder


def _restore_time_points(index: Index, tl_id: int, metas: list[FrameMeta]) -> None:
    """Time points and positions of a restored time-lapse, from the frames found of it."""
    tl = index.require_timelapse(tl_id)
    by_tp: dict[int, list[FrameMeta]] = {}
    for m in metas:
        by_tp.setdefault(m.tp, []).append(m)
    if tl["plan_json"] == "{}":
        # No record: the frames give the positions, the planes (the middle one is analysed,
        # as plans choose it) and the schedule (first frame of each time point).
        firsts = sorted((tp, min(m.t_s for m in ms)) for tp, ms in by_tp.items())
        steps = [(b[1] - a[1]) / (b[0] - a[0]) for a, b in zip(firsts, firsts[1:])]
        keys = {m.key: m for m in metas}
        n_z = max(m.z_index for m in metas) + 1
        spec = {
            "positions": [{"key": k, "well": m.well, "site": m.site, "x_um": m.x_um, "y_um": m.y_um}
                          for k, m in sorted(keys.items())],
            "analysis_plane": n_z // 2 if n_z > 1 else 0,
        }
        index.restore_schedule(
            tl_id, spec=spec, count=max(by_tp) + 1, interval_s=sorted(steps)[len(steps) // 2] if steps else 0.0,
            n_positions=len(keys),
        )
        tl = index.require_timelapse(tl_id)
    positions: list[dict[str, Any]] = []
    points: list[dict[str, Any]] = []
    for tp in sorted(by_tp):
        frames = by_tp[tp]
        keys = {m.key: m for m in sorted(frames, key=lambda m: m.t_s)}
        positions += [
            {"tp": tp, "key": k, "well": m.well, "site": m.site, "status": PositionState.OK, "t_s": m.t_s}
            for k, m in keys.items()
        ]
        complete = tl["n_positions"] == 0 or len(keys) >= tl["n_positions"]
        planned = tl["t0_s"] + tp * tl["interval_s"] if tl["interval_s"] else min(m.t_s for m in frames)
        points.append({
            "tp": tp, "planned_s": planned, "started_s": min(m.t_s for m in frames),
            "finished_s": max(m.t_s for m in frames), "n_ok": len(keys),
            "status": TimePointState.DONE if complete else TimePointState.PARTIAL,
            "reason": None if complete else "rebuilt from the frame files: some positions have no frame",
        })
    index.restore_time_points(tl_id, points, positions)
    if tl["state"] == TimelapseState.PAUSED and tl["count"] and len(by_tp) >= tl["count"] and all(
        p["status"] == TimePointState.DONE for p in points
    ):
        index.set_state(tl_id, TimelapseState.COMPLETED, reason="index rebuilt from the frame files",
                        finished_s=max(m.t_s for m in metas))
    elif tl["state"] == TimelapseState.STOPPED:
        index.set_state(tl_id, TimelapseState.STOPPED, reason=REBUILT_NO_RECORD, finished_s=max(m.t_s for m in metas))


def reconcile(
    data_dir: Path, index: Index, *, verify: str = "recent", now: Callable[[], float] = time.time,
    progress: Progress | None = None,
) -> ReconcileReport:
    """Bring ``index`` and the frame files under ``data_dir`` into agreement (blocking).

    ``verify``: ``all`` checksums every indexed frame, ``recent`` only those of each
    time-lapse's latest time point (the only ones a power cut can have touched) and checks
    the size of the rest, ``size`` checks sizes only. ``now`` stamps alerts (the scope clock).
    ``progress`` hears how far the check of indexed frames and the indexing of found ones are.
    """
    if verify not in VERIFY_MODES:
        raise ValueError(f"verify must be one of {VERIFY_MODES}, got {verify!r}")
    started = time.perf_counter()
    report = ReconcileReport()
    root = data_dir / "timelapses"
    on_disk: set[str] = set()
    if root.exists():
        for folder, _dirs, files in os.walk(root):
            for name in files:
                path = Path(folder) / name
                rel = path.relative_to(data_dir).as_posix()
                if name.endswith(atomic.TEMP_SUFFIX):
                    path.unlink()
                    report.removed_partials.append(rel)
                elif name.endswith(".tif"):
                    on_disk.add(rel)

    rows = index.frames()
    latest_tp: dict[int, int] = {}
    for row in rows:
        latest_tp[row["timelapse_id"]] = max(latest_tp.get(row["timelapse_id"], -1), row["tp"])
    indexed: set[str] = set()
    for n, row in enumerate(rows):
        if progress is not None and n % 100 == 0:
            progress(n, len(rows), "checking indexed frames")
        rel = row["path"]
        indexed.add(rel)
        report.verified += 1
        path = data_dir / rel
        status = FrameState.OK
        if rel not in on_disk:
            status = FrameState.MISSING
        elif path.stat().st_size != row["bytes"]:
            status = FrameState.DAMAGED
        elif verify == "all" or (verify == "recent" and row["tp"] == latest_tp[row["timelapse_id"]]):
            report.checksummed += 1
            if _crc_of_file(path) != row["crc32"]:
                status = FrameState.DAMAGED
        if status == FrameState.MISSING:
            report.missing.append(rel)
        elif status == FrameState.DAMAGED:
            report.damaged.append(rel)
        if status != row["status"]:
            index.set_frame_status(row["id"], status)
            if status != FrameState.OK:
                index.add_alert(
                    row["timelapse_id"], t_s=now(), level="error", kind="storage",
                    message=f"indexed frame {rel} is {status}",
                )

    folders = {tl["id"]: tl["folder"] for tl in index.timelapses()}
    restored: dict[int, list[FrameMeta]] = {}
    found = sorted(on_disk - indexed)
    for n, rel in enumerate(found):
        if progress is not None and n % 20 == 0:
            progress(n, len(found), "indexing frames found on disk")
        path = data_dir / rel
        try:
            pixels, meta = read_frame(path)
            if meta.timelapse_id not in folders:
                folder = _restore_timelapse(data_dir, index, meta, rel)
                if folder is not None:
                    folders[meta.timelapse_id] = folder
                    restored[meta.timelapse_id] = []
                    report.restored_timelapses.append(meta.timelapse_id)
            if folders.get(meta.timelapse_id) is None or frame_relpath(folders[meta.timelapse_id], meta) != rel:
                raise NotOurFrame("its metadata names another time-lapse or place")
            data_len = path.stat().st_size
            h, w = pixels.shape
            index.add_frame(
                meta, path=rel, nbytes=data_len, crc32=_crc_of_file(path), width_px=w, height_px=h,
                reindexed=True,
            )
            report.reindexed.append(rel)
            if meta.timelapse_id in restored:
                restored[meta.timelapse_id].append(meta)
        except Exception as exc:  # noqa: BLE001 - whatever makes a file unreadable, it goes aside
            _quarantine(data_dir, rel)
            report.quarantined.append(rel)
            index.add_alert(
                None, t_s=now(), level="warning", kind="storage",
                message=f"{rel} could not be indexed ({exc}); moved to quarantine/",
            )
    for tl_id, metas in restored.items():
        if metas:
            _restore_time_points(index, tl_id, metas)
    if progress is not None:
        progress(len(found), len(found), "done")
    report.seconds = time.perf_counter() - started
    return report
