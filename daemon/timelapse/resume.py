"""Opening a data folder for acquisition, and picking up an unfinished time-lapse.

Start-up order, for the CLI and the daemon alike: take the data folder's run lock (one
acquiring process per folder), reconcile files with the index, then resume whatever
time-lapse was left unfinished. The lock is an ``flock`` on a file in the folder, so
the kernel drops it when a process dies, even by SIGKILL or a power cut.
"""

from __future__ import annotations

import contextlib
import fcntl
import os
import sqlite3
import time
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import TYPE_CHECKING, Any

from daemon.states import UNFINISHED_STATES, TimelapseState
from daemon.storage.index import (
    DATA_FILE_MODE, DATA_FOLDER_MODE, INDEX_FILE, Index, IndexDamaged, index_problem, open_index, set_aside,
)
from daemon.storage.reconcile import Progress, ReconcileReport, reconcile
from drivers import atomic

if TYPE_CHECKING:
    from daemon.events import Event
    from daemon.scope import Scope
    from daemon.timelapse.scheduler import Scheduler

LOCK_FILE = "acquisition.lock"


class FolderBusy(OSError):
    """Another process is acquiring into this data folder."""


@contextlib.contextmanager
def run_lock(data_dir: Path) -> Iterator[None]:
    """Hold the data folder's acquisition lock, or raise :class:`FolderBusy` naming the holder."""
    atomic.make_dirs(data_dir, mode=DATA_FOLDER_MODE)
    path = data_dir / LOCK_FILE
    # Opened and written in place, not through drivers.atomic: the lock is held on this
    # very file, and a rename would put another one in its place. Its content (the
    # holder's pid) is only a hint for the message below.
    fd = os.open(path, os.O_RDWR | os.O_CREAT, DATA_FILE_MODE)
    try:
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            holder = os.pread(fd, 64, 0).decode(errors="replace").strip() or "unknown"
            raise FolderBusy(
                f"{data_dir}: another phasewatch process (pid {holder}) is acquiring into this data folder; "
                "stop it first, or use 'phasewatch timelapse pause/abort' to control it"
            ) from None
        os.ftruncate(fd, 0)
        os.pwrite(fd, f"{os.getpid()}\n".encode(), 0)
        yield
    finally:
        os.close(fd)


def folder_busy(data_dir: Path) -> bool:
    """Whether some process holds the acquisition lock of ``data_dir`` right now."""
    path = data_dir / LOCK_FILE
    if not path.exists():
        return False
    fd = os.open(path, os.O_RDWR)
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except BlockingIOError:
        return True
    finally:
        os.close(fd)
    return False


def open_data_folder(
    data_dir: Path, *, verify: str = "recent", now: Callable[[], float] = time.time,
    progress: Progress | None = None,
) -> tuple[Index, ReconcileReport]:
    """Open the index and reconcile it with the files (call with the run lock held).

    An index that is empty or damaged is renamed aside (``index.sqlite.damaged-<UTC time>``,
    never deleted) and a new one rebuilt from the frame files; so is one whose damage only
    shows while it is being read.
    """
    path = data_dir / INDEX_FILE
    problem = index_problem(path)
    missing = not path.exists() and has_frames(data_dir)
    for attempt in (1, 2):
        kept = set_aside(path, now_s=time.time()) if problem else None
        index = open_index(data_dir)
        try:
            report = reconcile(data_dir, index, verify=verify, now=now, progress=progress)
        except sqlite3.DatabaseError as exc:
            index.close()
            if attempt == 2:
                raise IndexDamaged(f"{path}: the rebuilt index cannot be used either ({exc})") from None
            problem = f"the index is damaged ({exc})"
            continue
        except BaseException:
            index.close()
            raise
        if missing and not problem:
            problem = "the index is missing"
        if problem:
            report.index_problem, report.index_kept_as = problem, kept.name if kept else None
            index.add_alert(None, t_s=now(), level="warning", kind="storage", message=report.summary())
        return index, report
    raise AssertionError("unreachable")


def pick_unfinished(index: Index, timelapse_id: int | None = None) -> dict[str, Any] | None:
    """The unfinished time-lapse to resume: the one named, else the only (or latest) one."""
    unfinished = index.unfinished()
    if timelapse_id is not None:
        row = index.require_timelapse(timelapse_id)
        if row["state"] not in UNFINISHED_STATES:
            raise OSError(f"time-lapse {timelapse_id} is {row['state']}; nothing to resume")
        return row
    return unfinished[-1] if unfinished else None


def resume_scheduler(
    scope: Scope,
    data_dir: Path,
    index: Index,
    row: dict[str, Any],
    *,
    on_event: Callable[[Event], None] | None = None,
    unpause: bool = False,
) -> Scheduler:
    """A scheduler that goes on with ``row``'s time-lapse; ``unpause`` lifts a pause too."""
    from daemon.timelapse.scheduler import MISSED_PAUSED, Scheduler

    if unpause and row["state"] == TimelapseState.PAUSED:
        index.set_state(row["id"], TimelapseState.RUNNING, reason="resumed by request")
    scheduler = Scheduler.resume(scope, data_dir, index, row["id"], on_event=on_event)
    if unpause and row["state"] == TimelapseState.PAUSED:
        scheduler.set_miss_reason(MISSED_PAUSED)
    return scheduler


def has_frames(data_dir: Path) -> bool:
    """Whether any frame file lies under the data folder's time-lapses."""
    root = data_dir / "timelapses"
    return root.is_dir() and any(root.glob("*/t*/*.tif"))


def rebuild_index(
    data_dir: Path, *, verify: str = "size", now: Callable[[], float] = time.time,
    progress: Progress | None = None, force: bool = False,
) -> ReconcileReport:
    """Rebuild the index from the frame files (taking the run lock); ``force`` sets aside an
    index that looks sound too, so every row comes from the files."""
    with run_lock(data_dir):
        path = data_dir / INDEX_FILE
        if force and path.exists() and index_problem(path) is None:
            kept = set_aside(path, now_s=time.time())
            index, report = open_data_folder(data_dir, verify=verify, now=now, progress=progress)
            report.index_problem, report.index_kept_as = "rebuilt on request", kept.name
        else:
            index, report = open_data_folder(data_dir, verify=verify, now=now, progress=progress)
        index.close()
        return report


def open_for_reading(data_dir: Path, *, write: bool = False) -> tuple[Index, str | None]:
    """The index of an existing data folder for the commands that read it (list, show,
    export), and a note to print when something was done first.

    A read-only folder is read in SQLite's read-only mode. An index that is missing (with
    frames there), empty or damaged is rebuilt from the frame files when the folder can be
    written and no process is acquiring into it; otherwise the answer is one line saying
    what to do. ``write``: the caller writes to the index (requests), so read-only will not do.
    """
    path = data_dir / INDEX_FILE
    if not data_dir.is_dir():
        raise OSError(f"{data_dir}: no phasewatch index here (no such folder)")
    problem = index_problem(path) if path.exists() else ("the index is missing" if has_frames(data_dir) else None)
    if problem is None and not path.exists():
        raise OSError(f"{data_dir}: no phasewatch index here (no time-lapse was run with --data {data_dir})")
    writable = os.access(data_dir, os.W_OK) and (not path.exists() or os.access(path, os.W_OK))
    if problem is None:
        if writable:
            return open_index(data_dir), None
        if write:
            raise PermissionError(13, f"{data_dir} is read-only; this needs to write to its index", str(data_dir))
        return open_index(data_dir, read_only=True), None
    rebuild = f"phasewatch index rebuild --data {data_dir}"
    if not writable:
        raise IndexDamaged(
            f"{path}: {problem}, and the folder is read-only so it cannot be rebuilt here; copy the "
            f"folder somewhere writable and run '{rebuild}' there"
        )
    if folder_busy(data_dir):
        raise IndexDamaged(
            f"{path}: {problem}; the process acquiring into {data_dir} must be stopped first "
            f"(it rebuilds the index when it starts again, or run '{rebuild}')"
        )
    report = rebuild_index(data_dir)
    return open_index(data_dir), f"data folder checked: {report.summary()}"
