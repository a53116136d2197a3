"""Per-pixel running statistics over a series of frames, without keeping the frames."""

from __future__ import annotations

import numpy as np


class RunningStats:
    """Per-pixel running mean and sum of squared deviations (Welford 1962, Technometrics
    4:419), float64: stable where the naive sum of squares loses precision."""

    def __init__(self, shape: tuple[int, ...]) -> None:
        self.n = 0
        self.mean = np.zeros(shape, np.float64)
        self.m2 = np.zeros(shape, np.float64)

    def add(self, image: np.ndarray) -> None:
        self.n += 1
        delta = image - self.mean
        self.mean += delta / self.n
        self.m2 += delta * (image - self.mean)

    @property
    def variance(self) -> np.ndarray:
        """Per-pixel sample variance (n − 1 in the denominator)."""
        return self.m2 / max(self.n - 1, 1)
