"""The one atomic writer (drivers/atomic.py): whole files or none, the temporary removed on
any error, file and folder synced, and nothing else in the source renaming or writing files."""

from __future__ import annotations

import ast
import errno
import os
import stat
from pathlib import Path

import numpy as np
import pytest
import tifffile

from drivers import atomic

ROOT = Path(__file__).resolve().parents[1]


class Cut(Exception):
    """An error injected in the middle of a write."""


def _names(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.iterdir())


def test_content_is_replaced_whole(tmp_path: Path) -> None:
    target = tmp_path / "a.bin"
    atomic.write_bytes(target, b"first")
    inode = target.stat().st_ino
    atomic.write_bytes(target, b"second version")
    assert target.read_bytes() == b"second version"
    # A new file renamed over the old one, not the old one rewritten in place: a reader
    # holding the old file keeps reading the old bytes.
    assert target.stat().st_ino != inode
    atomic.write_text(tmp_path / "b.json", '{"well": "B3"}\n')
    assert (tmp_path / "b.json").read_text(encoding="utf-8") == '{"well": "B3"}\n'
    assert _names(tmp_path) == ["a.bin", "b.json"]


def test_a_reader_never_sees_a_half_written_file(tmp_path: Path) -> None:
    target = tmp_path / "map.json"
    atomic.write_text(target, "old")
    with atomic.open_atomic(target, "w", encoding="utf-8") as fh:
        fh.write("new, ")
        fh.flush()
        assert target.read_text() == "old"  # mid-write, the old content is still all there
        fh.write("complete")
    assert target.read_text() == "new, complete"


@pytest.mark.parametrize("where", ["writer", "disk full", "fsync", "rename"])
def test_the_temporary_is_removed_on_any_error(tmp_path: Path, monkeypatch: pytest.MonkeyPatch, where: str) -> None:
    target = tmp_path / "flat.tif"
    atomic.write_bytes(target, b"good flat")

    def cut(*_a: object, **_k: object) -> None:
        if where == "disk full":
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        raise Cut(where)

    if where == "fsync":
        monkeypatch.setattr(atomic.os, "fsync", cut)
    elif where == "rename":
        monkeypatch.setattr(atomic.os, "replace", cut)
    with pytest.raises(OSError if where == "disk full" else Cut):
        with atomic.open_atomic(target) as fh:
            fh.write(b"half a fl")
            assert atomic.temp_name(target).exists()
            if where in ("writer", "disk full"):
                cut()  # the code writing into the file fails (tifffile, say), or the disk is full
    monkeypatch.undo()
    assert target.read_bytes() == b"good flat"
    assert _names(tmp_path) == ["flat.tif"]


def test_the_file_then_its_folder_are_synced(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    events: list[str] = []
    real_fsync, real_replace = os.fsync, os.replace

    def fsync(fd: int) -> None:
        mode = os.fstat(fd).st_mode
        events.append("fsync folder" if stat.S_ISDIR(mode) else "fsync file")
        real_fsync(fd)

    def replace(src: object, dst: object) -> None:
        events.append("rename")
        real_replace(src, dst)  # type: ignore[arg-type]

    monkeypatch.setattr(atomic.os, "fsync", fsync)
    monkeypatch.setattr(atomic.os, "replace", replace)
    atomic.write_bytes(tmp_path / "x.bin", b"data")
    # The order that makes a power cut safe: bytes on disk, then the rename, then the rename on disk.
    assert events == ["fsync file", "rename", "fsync folder"]

    events.clear()
    atomic.make_dirs(tmp_path / "new" / "deeper")
    assert events == ["fsync folder", "fsync folder"]  # each new folder's entry in its parent
    events.clear()
    (tmp_path / "src").mkdir()
    (tmp_path / "src" / "frame.tif").write_bytes(b"frame")  # test data, not the product's
    atomic.move(tmp_path / "src" / "frame.tif", tmp_path / "new" / "frame.tif")
    assert events == ["rename", "fsync folder", "fsync folder"]


def test_permissions_hold_from_creation(tmp_path: Path) -> None:
    secret = tmp_path / "access-token"
    with atomic.open_atomic(secret, "w", encoding="ascii", permissions=0o600) as fh:
        assert stat.S_IMODE(os.fstat(fh.fileno()).st_mode) == 0o600  # before a byte is written
        fh.write("s3cret\n")
    assert stat.S_IMODE(secret.stat().st_mode) == 0o600
    # A temporary left by a crash (with other permissions) is not reused.
    stale = atomic.temp_name(secret)
    stale.write_text("stale")  # test data, not the product's
    stale.chmod(0o644)
    atomic.write_text(secret, "n3w\n", permissions=0o600)
    assert secret.read_text() == "n3w\n" and stat.S_IMODE(secret.stat().st_mode) == 0o600
    assert not stale.exists()


def test_streaming_writers_go_through_it(tmp_path: Path) -> None:
    target = tmp_path / "flat.tif"
    pixels = np.arange(12, dtype=np.float32).reshape(3, 4)
    with atomic.open_atomic(target) as fh:
        tifffile.imwrite(fh, pixels)  # tifffile writes into the open file
    np.testing.assert_array_equal(tifffile.imread(target), pixels)
    with pytest.raises(ValueError, match="mode"):
        with atomic.open_atomic(target, "ab"):
            pass


def test_symlinks_are_swapped_at_once(tmp_path: Path) -> None:
    link = tmp_path / "ttySIM0"
    atomic.symlink(link, "/dev/null")
    atomic.symlink(link, "/dev/zero")
    assert os.readlink(link) == "/dev/zero"
    assert _names(tmp_path) == ["ttySIM0"]


# -- nothing else in the source writes files its own way ------------------------------------

# Files that may open or rename files themselves, and why.
ALLOWED = {
    "drivers/atomic.py": "the writer itself",
    # Its lock is held on the file's own inode, which a rename would replace.
    "daemon/timelapse/resume.py": "the acquisition lock file",
}
WRITE_FLAGS = {"O_WRONLY", "O_RDWR", "O_CREAT", "O_TRUNC", "O_APPEND"}
# What the source calls the file objects image writers write into: open_atomic's, or an
# in-memory buffer (a frame is encoded whole before it is written).
FILE_OBJECTS = {"fh", "buf"}


def _offences(path: Path) -> list[str]:
    found = []
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if not isinstance(node, ast.Call):
            continue
        func = node.func
        owner = func.value.id if isinstance(func, ast.Attribute) and isinstance(func.value, ast.Name) else None
        name = func.attr if isinstance(func, ast.Attribute) else getattr(func, "id", "")
        text = ast.unparse(node)[:70]
        if owner == "os" and name in ("replace", "rename", "renames", "link", "symlink"):
            found.append(text)
        elif owner == "os" and name == "open":
            flags = {n.attr for n in ast.walk(node) if isinstance(n, ast.Attribute)}
            if flags & WRITE_FLAGS:
                found.append(text)
        elif name in ("write_text", "write_bytes", "symlink_to", "rename", "imwrite", "savefig") and owner != "atomic":
            # Writing straight to a path: through atomic.open_atomic a writer gets a file object instead.
            first = node.args[0] if node.args else None
            if name in ("imwrite", "savefig") and isinstance(first, ast.Name) and first.id in FILE_OBJECTS:
                continue
            found.append(text)
        elif isinstance(func, ast.Name) and func.id == "open" and len(node.args) > 1:
            mode = node.args[1]
            if isinstance(mode, ast.Constant) and set(str(mode.value)) & set("wax+"):
                found.append(text)
    return found


def test_every_file_is_written_through_the_atomic_writer() -> None:
    offences = {}
    for folder in ("daemon", "drivers"):
        for path in sorted((ROOT / folder).rglob("*.py")):
            rel = path.relative_to(ROOT).as_posix()
            if rel in ALLOWED:
                continue
            if found := _offences(path):
                offences[rel] = found
    assert offences == {}, "write files through drivers.atomic (or add the file to ALLOWED with the reason)"
    # The scan sees what it should: the lock file's own writes are there to find.
    assert _offences(ROOT / "daemon/timelapse/resume.py")
    assert any("os.replace" in o for o in _offences(ROOT / "drivers/atomic.py"))


def test_os_replace_only_in_the_atomic_writer() -> None:
    users = []
    for folder in ("daemon", "drivers"):
        for path in sorted((ROOT / folder).rglob("*.py")):
            tree = ast.parse(path.read_text(encoding="utf-8"))
            if any(isinstance(n, ast.Attribute) and n.attr == "replace" and isinstance(n.value, ast.Name)
                   and n.value.id == "os" for n in ast.walk(tree)):
                users.append(path.relative_to(ROOT).as_posix())
    assert users == ["drivers/atomic.py"]
