"""All or nothing on disk: the one way phasewatch writes a file.

Every file (frames, calibration sets, stage maps, the access token, reports, exports,
the simulated clock's state) is written the same way, so a power cut or a full disk
leaves either the old file or the new one, never a mixture:

1. write under a temporary name beside the final one (``.NAME.partial``, same folder,
   so the rename below stays on one file system);
2. flush and fsync the file, so its bytes are on the disk;
3. ``os.replace`` it onto the final name (atomic on POSIX);
4. fsync the folder, so the rename itself survives the cut;
5. on any error -- including an exception raised by the code writing into the file --
   remove the temporary and re-raise: nothing appears at the final name.

A temporary left by a process that died between 1 and 3 keeps its fixed name, so the
next write to the same file replaces it, and start-up clean-up can recognise it by
:data:`TEMP_SUFFIX`. It lives in ``drivers/`` because drivers write files too (the
simulated clock, the simulated controller's port link) and drivers never import the daemon.
"""

from __future__ import annotations

import contextlib
import os
from collections.abc import Iterator
from pathlib import Path
from typing import IO, Any

TEMP_SUFFIX = ".partial"
# Permissions of a new file before the umask, as open() gives them.
DEFAULT_PERMISSIONS = 0o666
DEFAULT_FOLDER_PERMISSIONS = 0o777


def temp_name(path: Path) -> Path:
    """The temporary a write to ``path`` goes through (hidden, beside it)."""
    return path.with_name(f".{path.name}{TEMP_SUFFIX}")


def fsync_folder(folder: Path) -> None:
    """Make the entries of ``folder`` (new names, renames) durable."""
    fd = os.open(folder, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def make_dirs(folder: Path, *, mode: int = DEFAULT_FOLDER_PERMISSIONS) -> None:
    """``mkdir -p`` that also syncs each new folder's parent, so new entries survive a cut.

    ``mode`` applies to the folders this creates (0o700: private from the moment they
    exist); folders already there keep theirs.
    """
    missing: list[Path] = []
    p = Path(folder)
    while not p.exists():
        missing.append(p)
        p = p.parent
    for d in reversed(missing):
        d.mkdir(mode=mode, exist_ok=True)
        fsync_folder(d.parent)


@contextlib.contextmanager
def _temporary(tmp: Path) -> Iterator[None]:
    """Clear a temporary left by a process that died mid-write; remove it on any error."""
    with contextlib.suppress(FileNotFoundError):
        tmp.unlink()
    try:
        yield
    except BaseException:
        with contextlib.suppress(OSError):
            tmp.unlink()
        raise


@contextlib.contextmanager
def open_atomic(
    path: Path, mode: str = "wb", *, encoding: str | None = None, newline: str | None = None,
    permissions: int = DEFAULT_PERMISSIONS,
) -> Iterator[IO[Any]]:
    """A file to write ``path`` through (for streaming writers such as ``tifffile.imwrite``).

    On a clean exit of the ``with`` block the file is fsynced and renamed into place and
    the folder fsynced; on any exception the temporary is removed and nothing appears
    at ``path``. ``mode`` is ``"wb"`` or ``"w"``; ``permissions`` apply from the moment
    the file exists (0o600 for a secret is never readable by others, not even briefly).
    """
    if mode not in ("wb", "w"):
        raise ValueError(f"mode must be 'wb' or 'w', got {mode!r}")
    path = Path(path)
    tmp = temp_name(path)

    def create(name: str, flags: int) -> int:
        # O_EXCL: a file someone else put at the temporary name is never written through.
        return os.open(name, flags | os.O_EXCL | os.O_CLOEXEC, permissions)

    with _temporary(tmp):
        # Opened by name (not from a bare descriptor) so that writers that want the
        # file's name, such as tifffile, get one.
        with open(tmp, mode, encoding=encoding, newline=newline, opener=create) as fh:
            yield fh
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    fsync_folder(path.parent)


def write_bytes(path: Path, data: bytes | bytearray | memoryview, *, permissions: int = DEFAULT_PERMISSIONS) -> None:
    """Put ``data`` at ``path``, all or nothing."""
    with open_atomic(path, "wb", permissions=permissions) as fh:
        fh.write(data)


def write_text(
    path: Path, text: str, *, encoding: str = "utf-8", permissions: int = DEFAULT_PERMISSIONS
) -> None:
    """Put ``text`` at ``path``, all or nothing."""
    with open_atomic(path, "w", encoding=encoding, newline="", permissions=permissions) as fh:
        fh.write(text)


def create_private(path: Path, *, permissions: int) -> None:
    """Create ``path`` empty with ``permissions`` when it does not exist yet, for files that
    others then write in place (an SQLite database, a log): they get their mode from the
    first moment, as a file written here does."""
    try:
        fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL | os.O_CLOEXEC, permissions)
    except FileExistsError:
        return
    os.close(fd)
    fsync_folder(Path(path).parent)


def symlink(path: Path, target: str | Path) -> None:
    """Point the symbolic link ``path`` at ``target``, replacing any link there at once
    (a reader sees the old target or the new one, never no link)."""
    path = Path(path)
    tmp = temp_name(path)
    with _temporary(tmp):
        tmp.symlink_to(target)
        os.replace(tmp, path)
    fsync_folder(path.parent)


def move(source: Path, target: Path) -> None:
    """Move an existing, complete file to ``target`` (same file system), replacing what is
    there, and make both folders' entries durable."""
    source, target = Path(source), Path(target)
    os.replace(source, target)
    fsync_folder(target.parent)
    if source.parent != target.parent:
        fsync_folder(source.parent)
