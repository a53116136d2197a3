"""A read-only data folder (a write-protected card, a copy on a share) can still be read.

``timelapse list``, ``show`` and ``export --output ELSEWHERE`` work and change nothing in
the folder; SQLite opens the index read-only, and where it cannot even make the WAL's
shared-memory file it reads the file as immutable.
"""

from __future__ import annotations

import csv
import json
import os
import sqlite3
import stat
from pathlib import Path

import pytest

from daemon.cli import main
from daemon.storage.index import INDEX_FILE, open_index
from tests.test_index_rebuild import N_FRAMES, _folder_with_frames


def _listing(folder: Path) -> dict[str, tuple[int, int, int]]:
    return {
        p.relative_to(folder).as_posix(): (p.stat().st_size, p.stat().st_mtime_ns, stat.S_IMODE(p.stat().st_mode))
        for p in folder.rglob("*")
    }


def _read_only(monkeypatch: pytest.MonkeyPatch, data: Path) -> None:
    """Make the folder read-only: really where the tests are not run as root (root writes
    anywhere), and as phasewatch sees it in any case."""
    for p in sorted(data.rglob("*"), reverse=True):
        p.chmod(0o500 if p.is_dir() else 0o400)
    data.chmod(0o500)
    real_access = os.access

    def access(path: str | os.PathLike[str], mode: int, **kw: object) -> bool:
        if mode & os.W_OK and Path(path).resolve().is_relative_to(data.resolve()):
            return False
        return real_access(path, mode, **kw)

    monkeypatch.setattr(os, "access", access)


@pytest.fixture
def data(tmp_path: Path) -> Path:
    data = tmp_path / "card"
    _folder_with_frames(data)
    yield data
    for p in [data, *data.rglob("*")]:
        p.chmod(0o700)  # so that pytest can clean up


@pytest.mark.parametrize("shm", ["can be made", "cannot be made"])
def test_list_show_and_export_work_on_a_read_only_folder(
    data: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str], shm: str
) -> None:
    if shm == "cannot be made":
        # A directory where SQLite's shared-memory file would go: it cannot be created,
        # as in a read-only folder even for root.
        (data / f"{INDEX_FILE}-shm").mkdir()
    _read_only(monkeypatch, data)
    before = _listing(data)

    assert main(["timelapse", "list", "--data", str(data), "--json"]) == 0
    (row,) = json.loads(capsys.readouterr().out)
    assert row["frames"] == N_FRAMES and row["state"] == "completed"
    assert main(["timelapse", "show", str(row["id"]), "--data", str(data), "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["frames"] == N_FRAMES

    assert main(["export", str(row["id"]), "--data", str(data)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "read-only" in err and "--output" in err

    out_dir = tmp_path / "exported"
    assert main(["export", str(row["id"]), "--data", str(data), "--output", str(out_dir), "--stacks"]) == 0
    capsys.readouterr()
    with open(out_dir / "frames.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert len(rows) == N_FRAMES and {r["status"] for r in rows} == {"ok"}
    assert sorted(p.name for p in out_dir.glob("*.ome.tif")) == ["B3-1_raw.ome.tif", "B3-2_raw.ome.tif"]

    assert _listing(data) == before, "reading a read-only folder changed it"


def test_read_only_index_refuses_writes_and_requests_say_so(
    data: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    with open_index(data, read_only=True) as index:
        assert index.read_only and len(index.frames()) == N_FRAMES
        with pytest.raises(sqlite3.OperationalError, match="readonly"):
            index.add_alert(None, t_s=0.0, level="info", kind="test", message="must not be stored")
    _read_only(monkeypatch, data)
    assert main(["timelapse", "pause", "1", "--data", str(data)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "read-only" in err


def test_a_damaged_index_on_a_read_only_folder_is_one_line(
    data: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    os.truncate(data / INDEX_FILE, 0)
    _read_only(monkeypatch, data)
    assert main(["timelapse", "list", "--data", str(data)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "index rebuild" in err and "read-only" in err
