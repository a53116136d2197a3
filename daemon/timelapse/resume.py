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
import time
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import TYPE_CHECKING, Any

from daemon.states import UNFINISHED_STATES, TimelapseState
from daemon.storage.index import Index, open_index
from daemon.storage.reconcile import ReconcileReport, reconcile

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
    data_dir.mkdir(parents=True, exist_ok=True)
    path = data_dir / LOCK_FILE
    # Opened and written in place, not through drivers.atomic: the lock is held on this
    # very file, and a rename would put another one in its place. Its content (the
    # holder's pid) is only a hint for the message below.
    fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o644)
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
    data_dir: Path, *, verify: str = "recent", now: Callable[[], float] = time.time
) -> tuple[Index, ReconcileReport]:
    """Open the index and reconcile it with the files (call with the run lock held)."""
    index = open_index(data_dir)
    try:
        report = reconcile(data_dir, index, verify=verify, now=now)
    except BaseException:
        index.close()
        raise
    return index, report


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
