"""Checks of request values, and JSON that is valid JSON (no NaN)."""

from __future__ import annotations

import dataclasses
import math
from typing import Any

from daemon.web.errors import BadRequest


def finite_number(body: dict[str, Any], key: str, *, required: bool = False, positive: bool = False) -> float | None:
    """``body[key]`` as a finite float (not a bool), or None when absent and not required."""
    value = body.get(key)
    if value is None:
        if required:
            raise BadRequest(f"'{key}' is required")
        return None
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise BadRequest(f"'{key}' must be a finite number, got {value!r}")
    if positive and value <= 0:
        raise BadRequest(f"'{key}' must be greater than 0, got {value!r}")
    return float(value)


def only_keys(body: dict[str, Any], allowed: tuple[str, ...]) -> None:
    unknown = sorted(set(body) - set(allowed))
    if unknown:
        raise BadRequest(f"unknown key {unknown[0]!r}; allowed here: {', '.join(allowed)}")


def camera_limits(name: str) -> tuple[float, float, str]:
    """(min, max, unit) of a [camera] option, as the profile loader enforces them."""
    from drivers.sections import CameraSection

    meta = next(f.metadata for f in dataclasses.fields(CameraSection) if f.name == name)
    return float(meta["min"]), float(meta["max"]), str(meta["unit"])


def json_safe(obj: Any) -> Any:
    """NaN and infinities become null: JSON has no such numbers."""
    if isinstance(obj, float):
        return obj if math.isfinite(obj) else None
    if isinstance(obj, dict):
        return {str(k): json_safe(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [json_safe(v) for v in obj]
    return obj
