"""Focus: sharpness metrics, autofocus, focus tracking through drift, the focus surface."""

from daemon.focus.autofocus import FocusPoint, FocusResult, autofocus
from daemon.focus.metrics import (
    METRICS,
    brenner,
    normalized_variance,
    tenengrad,
    variance_of_laplacian,
)
from daemon.focus.tracking import FocusTracker

__all__ = [
    "METRICS",
    "FocusPoint",
    "FocusResult",
    "FocusTracker",
    "autofocus",
    "brenner",
    "normalized_variance",
    "tenengrad",
    "variance_of_laplacian",
]
