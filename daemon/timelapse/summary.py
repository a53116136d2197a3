"""A bounded record of a figure measured again and again over a days-long run.

A time-lapse saves hundreds of positions per time point for days; keeping every
position's software time would grow without bound. :class:`RunningSummary` keeps the
count, total, minimum and maximum of everything seen (exact, O(1) memory) and the most
recent values in a window of fixed size, for a median that follows the present.
"""

from __future__ import annotations

import dataclasses
import math
import statistics
from collections import deque
from typing import Any

DEFAULT_WINDOW = 512


@dataclasses.dataclass
class RunningSummary:
    window: int = DEFAULT_WINDOW
    count: int = 0
    total: float = 0.0
    minimum: float = math.inf
    maximum: float = -math.inf
    recent: deque[float] = dataclasses.field(init=False, repr=False)

    def __post_init__(self) -> None:
        if self.window < 1:
            raise ValueError(f"window must be at least 1, got {self.window}")
        self.recent = deque(maxlen=self.window)

    def add(self, value: float) -> None:
        v = float(value)
        if not math.isfinite(v):
            raise ValueError(f"values must be finite, got {value!r}")
        self.count += 1
        self.total += v
        self.minimum = min(self.minimum, v)
        self.maximum = max(self.maximum, v)
        self.recent.append(v)

    def __len__(self) -> int:
        return self.count

    @property
    def mean(self) -> float | None:
        return self.total / self.count if self.count else None

    @property
    def last(self) -> float | None:
        return self.recent[-1] if self.recent else None

    def recent_median(self) -> float | None:
        """Median of the last :attr:`window` values (None before the first)."""
        return statistics.median(self.recent) if self.recent else None

    def to_dict(self) -> dict[str, Any]:
        """Plain figures (None where nothing was measured yet), for reports and JSON."""
        seen = self.count > 0
        return {
            "count": self.count, "mean": self.mean, "min": self.minimum if seen else None,
            "max": self.maximum if seen else None, "last": self.last, "recent_median": self.recent_median(),
            "window": self.window,
        }
