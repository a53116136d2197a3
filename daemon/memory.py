"""Keeping the daemon's resident memory within its budget while frames come and go.

Every frame the daemon handles (a camera frame, its focus-score copies, a simulated
field's maps and spectra) is a block of megabytes that lives for a fraction of a second.
The GNU C library's allocator serves blocks above its mmap threshold (128 KiB at first)
straight from the system and gives them back on free; but each time such a block is
freed it raises that threshold to the block's size (the "dynamic mmap threshold" of
glibc's malloc, documented in mallopt(3)), so after the first few frames every later
frame comes from the heap arenas instead, one per worker thread, and freed frames stay
resident there. Fixing the threshold keeps frame-sized blocks mapped per use and
returned when freed. Measured on the simulated scope (24 frames rendered in worker
threads, 1280x960): peak resident 197 MB with the dynamic threshold, 145 MB fixed.
"""

from __future__ import annotations

import ctypes
import logging
import sys

log = logging.getLogger(__name__)

# mallopt(3) parameter numbers (glibc's malloc.h).
M_MMAP_THRESHOLD = -3
# Blocks at least this large are mapped on their own and unmapped when freed: a 320x240
# 8-bit frame is 75 KiB, a 1280x960 one 1.2 MiB, so every frame-sized block is above it.
MMAP_THRESHOLD_BYTES = 256 * 1024


def return_freed_frames_to_the_system() -> bool:
    """Fix the C allocator's mmap threshold (glibc only). True when it was set; False on a
    C library without ``mallopt`` (musl, macOS), where nothing changes."""
    if not sys.platform.startswith("linux"):
        return False
    try:
        libc = ctypes.CDLL(None)
        mallopt = libc.mallopt
    except (OSError, AttributeError):
        return False
    mallopt.argtypes = [ctypes.c_int, ctypes.c_int]
    mallopt.restype = ctypes.c_int
    ok = bool(mallopt(M_MMAP_THRESHOLD, MMAP_THRESHOLD_BYTES))
    if not ok:
        log.debug("mallopt(M_MMAP_THRESHOLD) refused; the allocator keeps its dynamic threshold")
    return ok
