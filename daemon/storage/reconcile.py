"""Start-up reconciliation of a data folder's files with its index.

After a crash or power cut three things can be out of step, and each is put right:

* a temporary file of a frame being written: removed (that frame was never indexed);
* a complete frame renamed into place whose index row was never committed: indexed
  again from the metadata inside the file;
* an indexed frame whose file is gone or changed (disk trouble, a person deleting files):
  marked ``missing`` or ``damaged`` in the index and reported, never silently dropped.

Files that look like frames but cannot be read or do not belong where they lie are moved
to ``quarantine/`` rather than deleted.
"""

from __future__ import annotations

import dataclasses
import os
import time
import zlib
from collections.abc import Callable
from pathlib import Path

from daemon.states import FrameState
from daemon.storage.frames import frame_relpath
from daemon.storage.index import Index
from daemon.storage.ome import NotOurFrame, read_frame
from drivers import atomic

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
    seconds: float = 0.0

    @property
    def clean(self) -> bool:
        return not (self.missing or self.damaged or self.quarantined)

    def summary(self) -> str:
        parts = [f"{self.verified} indexed frames checked ({self.checksummed} by checksum)"]
        if self.removed_partials:
            parts.append(f"{len(self.removed_partials)} unfinished temporary files removed")
        if self.reindexed:
            parts.append(f"{len(self.reindexed)} complete frames indexed again")
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
    atomic.make_dirs(target.parent)
    atomic.move(data_dir / rel, target)


def reconcile(
    data_dir: Path, index: Index, *, verify: str = "recent", now: Callable[[], float] = time.time
) -> ReconcileReport:
    """Bring ``index`` and the frame files under ``data_dir`` into agreement (blocking).

    ``verify``: ``all`` checksums every indexed frame, ``recent`` only those of each
    time-lapse's latest time point (the only ones a power cut can have touched) and checks
    the size of the rest, ``size`` checks sizes only. ``now`` stamps alerts (the scope clock).
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
    for row in rows:
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
    for rel in sorted(on_disk - indexed):
        path = data_dir / rel
        try:
            pixels, meta = read_frame(path)
            if folders.get(meta.timelapse_id) is None or frame_relpath(folders[meta.timelapse_id], meta) != rel:
                raise NotOurFrame("its metadata names another time-lapse or place")
            data_len = path.stat().st_size
            h, w = pixels.shape
            index.add_frame(
                meta, path=rel, nbytes=data_len, crc32=_crc_of_file(path), width_px=w, height_px=h,
                reindexed=True,
            )
            report.reindexed.append(rel)
        except Exception as exc:  # noqa: BLE001 - whatever makes a file unreadable, it goes aside
            _quarantine(data_dir, rel)
            report.quarantined.append(rel)
            index.add_alert(
                None, t_s=now(), level="warning", kind="storage",
                message=f"{rel} could not be indexed ({exc}); moved to quarantine/",
            )
    report.seconds = time.perf_counter() - started
    return report
