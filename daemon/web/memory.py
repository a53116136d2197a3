"""Keep the daemon's resident memory flat while frames come and go (glibc only).

Every frame is a megabyte-sized numpy buffer, allocated and freed many times a second by
worker threads (capture, JPEG encoding, analysis). glibc's allocator raises its mmap
threshold each time such a buffer is freed, after which new buffers come from per-thread
heaps that are rarely given back, and resident memory creeps up by tens of megabytes.
Fixing the threshold (and capping the number of per-thread heaps) with mallopt(3) keeps
big buffers in their own mappings, returned to the system when freed. The same tunables
can be set as MALLOC_MMAP_THRESHOLD_ / MALLOC_ARENA_MAX in the environment; this does it
for a daemon started by hand too.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import logging

log = logging.getLogger(__name__)

# From glibc's <malloc.h>.
M_MMAP_THRESHOLD = -3
M_ARENA_MAX = -8
MMAP_THRESHOLD_BYTES = 128 * 1024  # glibc's own starting value; fixing it stops the upward drift
ARENA_MAX = 2


def limit_heap_growth() -> bool:
    """Apply the settings; False (and nothing changed) where the C library is not glibc."""
    name = ctypes.util.find_library("c")
    if not name:
        return False
    try:
        libc = ctypes.CDLL(name)
        mallopt = libc.mallopt
    except (OSError, AttributeError):
        return False
    mallopt.argtypes = (ctypes.c_int, ctypes.c_int)
    mallopt.restype = ctypes.c_int
    ok = bool(mallopt(M_MMAP_THRESHOLD, MMAP_THRESHOLD_BYTES)) and bool(mallopt(M_ARENA_MAX, ARENA_MAX))
    if not ok:
        log.debug("mallopt refused the heap settings; resident memory may drift upwards")
    return ok
