"""Free-space guard: stop a time-lapse cleanly before the disk fills, never mid-frame."""

from __future__ import annotations

import dataclasses
import shutil
from collections.abc import Callable
from pathlib import Path

MB = 1024 * 1024
DEFAULT_RESERVE_MB = 500.0


def free_bytes(path: Path) -> int:
    return shutil.disk_usage(path).free


@dataclasses.dataclass(frozen=True)
class SpaceCheck:
    ok: bool
    free_bytes: int
    needed_bytes: int
    reserve_bytes: int

    @property
    def message(self) -> str:
        return (
            f"{self.free_bytes / MB:.0f} MB free; the next time point needs about "
            f"{self.needed_bytes / MB:.1f} MB and {self.reserve_bytes / MB:.0f} MB are kept in reserve"
        )


class SpaceGuard:
    """Checks that the data folder keeps ``reserve_mb`` free after the next time point.

    ``free`` is injectable so that tests can simulate a filling disk without filling one.
    """

    def __init__(
        self, data_dir: Path, reserve_mb: float = DEFAULT_RESERVE_MB,
        free: Callable[[Path], int] = free_bytes,
    ) -> None:
        if reserve_mb < 0:
            raise ValueError(f"reserve must be >= 0 MB, got {reserve_mb}")
        self.data_dir = data_dir
        self.reserve_bytes = int(reserve_mb * MB)
        self._free = free

    def check(self, needed_bytes: int) -> SpaceCheck:
        free = int(self._free(self.data_dir))
        return SpaceCheck(
            ok=free - needed_bytes >= self.reserve_bytes,
            free_bytes=free,
            needed_bytes=int(needed_bytes),
            reserve_bytes=self.reserve_bytes,
        )


def frame_bytes_estimate(width_px: int, height_px: int, bit_depth: int) -> int:
    """Size of one uncompressed frame file: pixels plus a generous allowance for headers and OME-XML."""
    return width_px * height_px * (1 if bit_depth <= 8 else 2) + 16 * 1024
