"""Writing frames so that a power cut never leaves a damaged or half-indexed one.

Order of operations for every frame: encode the whole OME-TIFF in memory, write it
through :mod:`drivers.atomic` (temporary name beside the final one, fsync, rename into
place, fsync the folder), and only then commit its index row. A crash at
any point leaves either a leftover temporary (removed on start-up), or a complete file
that is not yet indexed (indexed again on start-up from its own metadata), or a complete
indexed frame. Never an indexed frame without its complete file.
"""

from __future__ import annotations

import dataclasses
import zlib
from pathlib import Path
from typing import BinaryIO

import numpy as np

from daemon.storage.index import DATA_FILE_MODE, DATA_FOLDER_MODE, DuplicateFrame, Index
from daemon.storage.ome import FrameMeta, encode_frame
from drivers import atomic


class StorageWriteError(OSError):
    """A frame could not be written (disk full, I/O error); no partial file was left."""


def _write_all(fh: BinaryIO, data: bytes | memoryview) -> None:
    # Its own function so that tests can make the disk "fill up" in the middle of a frame.
    fh.write(data)


@dataclasses.dataclass(frozen=True)
class SavedFrame:
    frame_id: int
    path: str
    nbytes: int


def frame_relpath(folder: str, meta: FrameMeta) -> str:
    """Where a frame lives, relative to the data folder: one sub-folder per time point."""
    return f"{folder}/t{meta.tp:05d}/{meta.key}_z{meta.z_index:02d}_{meta.kind}.tif"


class FrameStore:
    """Writes frames of the time-lapses of one data folder and indexes them."""

    def __init__(self, data_dir: Path, index: Index) -> None:
        self.data_dir = data_dir
        self.index = index
        self._folders: dict[int, str] = {}

    def folder(self, timelapse_id: int) -> str:
        if timelapse_id not in self._folders:
            self._folders[timelapse_id] = self.index.require_timelapse(timelapse_id)["folder"]
        return self._folders[timelapse_id]

    def save(self, pixels: np.ndarray, meta: FrameMeta) -> SavedFrame:
        """Write one frame and index it (blocking: call it through ``asyncio.to_thread``)."""
        rel = frame_relpath(self.folder(meta.timelapse_id), meta)
        if (meta.z_index, meta.kind) in self.index.frame_planes(meta.timelapse_id, meta.tp, meta.key):
            raise DuplicateFrame(f"frame {rel} is already indexed")
        data = encode_frame(pixels, meta)
        path = self.data_dir / rel
        try:
            atomic.make_dirs(path.parent, mode=DATA_FOLDER_MODE)
            with atomic.open_atomic(path, permissions=DATA_FILE_MODE) as fh:
                _write_all(fh, data)
        except OSError as exc:
            raise StorageWriteError(
                exc.errno, f"cannot write frame {rel}: {exc.strerror or exc}; nothing partial was left"
            ) from exc
        h, w = pixels.shape
        frame_id = self.index.add_frame(
            meta, path=rel, nbytes=len(data), crc32=zlib.crc32(data), width_px=w, height_px=h
        )
        return SavedFrame(frame_id=frame_id, path=rel, nbytes=len(data))
