"""Shared test helpers: small, fast variants of the simulated scope profile."""

from __future__ import annotations

import dataclasses
from pathlib import Path
from typing import Any

from daemon.hardware import build_scope
from daemon.profile import Profile, load_profile
from daemon.scope import Scope


def _replace_nested(obj: Any, changes: dict[str, Any]) -> Any:
    """``dataclasses.replace`` that accepts dotted keys for nested sections: ``{"sim.culture.seeding_per_mm2": 10}``."""
    direct: dict[str, Any] = {}
    nested: dict[str, dict[str, Any]] = {}
    for key, value in changes.items():
        head, _, rest = key.partition(".")
        if rest:
            nested.setdefault(head, {})[rest] = value
        else:
            direct[head] = value
    for head, sub in nested.items():
        direct[head] = _replace_nested(getattr(obj, head), sub)
    return dataclasses.replace(obj, **direct)


PINNED_START_TIME = "2026-03-02T09:00:00+00:00"


def sim_profile(width_px: int = 320, height_px: int = 240, **changes: Any) -> Profile:
    """The shipped sim profile with a small frame (fast tests) and dotted-key overrides,
    e.g. ``sim_profile(**{"optics.magnification": 20.0, "sim.seed": 7})``."""
    base = load_profile("sim")
    # A pinned seeding date: the shipped default ('now') would make runs differ by the day.
    changes = {"camera.width_px": width_px, "camera.height_px": height_px,
               "sim.start_time": PINNED_START_TIME, **changes}
    return _replace_nested(base, changes)


def sim_scope(profile: Profile | None = None, *, speed: float = 1000.0, data_dir: Path | None = None) -> Scope:
    """A simulated scope with an accelerated clock; use as ``async with sim_scope() as scope``."""
    return build_scope(profile or sim_profile(), sim_speed=speed, data_dir=data_dir)
