"""JSON that is valid JSON: no NaN, no infinities."""

from __future__ import annotations

import math
from typing import Any


def json_safe(obj: Any) -> Any:
    """NaN and infinities become null: JSON has no such numbers."""
    if isinstance(obj, float):
        return obj if math.isfinite(obj) else None
    if isinstance(obj, dict):
        return {str(k): json_safe(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [json_safe(v) for v in obj]
    return obj
