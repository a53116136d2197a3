"""Checking every stored frame against its index row, in the background, at a bounded rate.

The start-up check reads only what a power cut can have touched (the latest time point);
disk trouble and people can damage any file at any time. So after start the daemon reads
every indexed frame once, at no more than ``rate_mb_s`` so that acquisition and the web
page keep the disk, compares its size and CRC-32 with its index row, and marks the ones
that differ ``damaged`` (or ``missing``) with an alert. Progress is kept for the status
and ``/metrics``.
"""

from __future__ import annotations

import asyncio
import dataclasses
import logging
import time
import zlib
from collections.abc import Callable
from pathlib import Path

from daemon.states import FrameState
from daemon.storage.index import Index

log = logging.getLogger(__name__)

DEFAULT_RATE_MB_S = 20.0
_CHUNK = 1 << 20


@dataclasses.dataclass
class VerifyProgress:
    total: int = 0
    checked: int = 0
    bytes_read: int = 0
    damaged: int = 0
    missing: int = 0
    started_s: float | None = None
    finished_s: float | None = None
    error: str | None = None

    @property
    def running(self) -> bool:
        return self.started_s is not None and self.finished_s is None and self.error is None

    @property
    def ratio(self) -> float:
        return self.checked / self.total if self.total else (1.0 if self.finished_s is not None else 0.0)

    def to_dict(self) -> dict[str, object]:
        return {
            "running": self.running, "total": self.total, "checked": self.checked,
            "ratio": round(self.ratio, 4), "bytes_read": self.bytes_read, "damaged": self.damaged,
            "missing": self.missing, "started_s": self.started_s, "finished_s": self.finished_s,
            "error": self.error,
        }


def check_file(path: Path, nbytes: int, crc32: int, *, on_chunk: Callable[[int], None] | None = None) -> str:
    """``ok``, ``missing`` or ``damaged`` for one frame file against its row (blocking)."""
    try:
        if path.stat().st_size != nbytes:
            return FrameState.DAMAGED
        crc = 0
        with open(path, "rb") as fh:
            while chunk := fh.read(_CHUNK):
                crc = zlib.crc32(chunk, crc)
                if on_chunk is not None:
                    on_chunk(len(chunk))
    except FileNotFoundError:
        return FrameState.MISSING
    return FrameState.OK if crc == crc32 else FrameState.DAMAGED


async def verify_all(
    data_dir: Path, index: Index, progress: VerifyProgress, *, rate_mb_s: float = DEFAULT_RATE_MB_S,
    now: Callable[[], float] = time.time,
) -> VerifyProgress:
    """Read every indexed frame once (files off the event loop), pacing reads to ``rate_mb_s``."""
    rows = await asyncio.to_thread(index.frames)
    # A frame whose local file was removed after its copy on lab storage was verified is not missing.
    pruned = await asyncio.to_thread(index.pruned_frame_ids)
    rows = [r for r in rows if r["id"] not in pruned]
    progress.total, progress.started_s = len(rows), now()
    budget_s_per_byte = 1.0 / (rate_mb_s * 1e6)
    t_start = time.monotonic()
    for row in rows:
        if row["status"] != FrameState.OK:
            progress.checked += 1  # already marked; nothing new to find
            continue
        status = await asyncio.to_thread(check_file, data_dir / row["path"], row["bytes"], row["crc32"])
        if status == FrameState.MISSING:
            copy = await asyncio.to_thread(index.frame_copy, row["id"])
            if copy is not None and copy["local_pruned_s"] is not None:
                progress.checked += 1  # removed during this check, after its copy was verified
                continue
        progress.bytes_read += row["bytes"] if status == FrameState.OK else 0
        progress.checked += 1
        if status != FrameState.OK:
            if status == FrameState.DAMAGED:
                progress.damaged += 1
            else:
                progress.missing += 1
            # Re-read: the row may have been marked meanwhile (served, exported).
            await asyncio.to_thread(mark_frame, index, row, status, now(), "the background check")
        ahead_s = progress.bytes_read * budget_s_per_byte - (time.monotonic() - t_start)
        if ahead_s > 0:
            await asyncio.sleep(ahead_s)
    progress.finished_s = now()
    log.info("background check of %d frames done: %d damaged, %d missing", progress.total, progress.damaged,
             progress.missing)
    return progress


def status_now(data_dir: Path, row: dict[str, object]) -> str:
    """A frame's state as far as a cheap look tells: its index status, or ``missing`` /
    ``damaged`` when the file is gone or has another size than was stored (blocking)."""
    if row["status"] != FrameState.OK:
        return str(row["status"])
    try:
        size = (data_dir / str(row["path"])).stat().st_size
    except FileNotFoundError:
        return FrameState.MISSING
    return FrameState.OK if size == row["bytes"] else FrameState.DAMAGED


def current_statuses(index: Index, data_dir: Path, rows: list[dict[str, object]], found_by: str) -> list[str]:
    """:func:`status_now` of each row, marking in the index (when it can be written) what changed."""
    out = []
    for row in rows:
        status = status_now(data_dir, row)
        if status != row["status"] and not index.read_only:
            mark_frame(index, row, status, time.time(), found_by)
        out.append(status)
    return out


def mark_frame(index: Index, row: dict[str, object], status: str, t_s: float, found_by: str) -> None:
    """Mark an indexed frame not ok, with an alert, unless it already is (blocking)."""
    current = index.frame_status(int(row["id"]))  # type: ignore[arg-type]
    if current == status:
        return
    copy = index.frame_copy(int(row["id"]))  # type: ignore[arg-type]
    if status == FrameState.MISSING and copy is not None and copy["local_pruned_s"] is not None:
        return  # removed on purpose after its copy on lab storage was verified: not lost
    index.set_frame_status(int(row["id"]), status)  # type: ignore[arg-type]
    index.add_alert(
        int(row["timelapse_id"]), t_s=t_s, level="error", kind="storage",  # type: ignore[arg-type]
        message=f"indexed frame {row['path']} is {status} (found by {found_by})",
    )
