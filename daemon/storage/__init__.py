"""Crash-safe frame storage: one lossless OME-TIFF per frame, an SQLite index beside it.

A frame is written to a temporary name, flushed, synced and renamed before its row goes
into the index, so an indexed frame always points at a complete file. On start-up
:func:`daemon.storage.reconcile.reconcile` brings files and index back into agreement.
"""

from daemon.storage.frames import FrameStore, StorageWriteError
from daemon.storage.index import Index, open_index
from daemon.storage.ome import FrameMeta

__all__ = ["FrameMeta", "FrameStore", "Index", "StorageWriteError", "open_index"]
