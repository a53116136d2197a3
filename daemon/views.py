"""Read-side views of a time-lapse for the interface: the latest frame per position.

Series over time come from the per-well read model, :mod:`daemon.culture.readings`.
"""

from __future__ import annotations

from typing import Any

from daemon.states import FrameState


def latest_per_position(frames: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """For each position, its newest frame (the analysed plane, corrected before raw)."""
    best: dict[str, dict[str, Any]] = {}
    for f in frames:
        if f["status"] != FrameState.OK:
            continue
        cur = best.get(f["key"])
        rank = (f["tp"], f["confluence"] is not None, f["kind"] == "corrected")
        if cur is None or rank > (cur["tp"], cur["confluence"] is not None, cur["kind"] == "corrected"):
            best[f["key"]] = f
    keep = ("id", "tp", "key", "well", "site", "z_index", "kind", "t_s", "z_um", "focus_score", "confluence", "focus_found")
    return [{k: best[key][k] for k in keep} for key in sorted(best)]
