"""Confluence over time per well, from a time-lapse's indexed frames (for plots, fits, CSV)."""

from __future__ import annotations

import statistics
from collections.abc import Iterable
from typing import Any


def analysed_frames(frames: Iterable[dict[str, Any]]) -> dict[tuple[str, int], dict[str, Any]]:
    """One frame per (position, time point): the analysed plane, corrected before raw."""
    chosen: dict[tuple[str, int], dict[str, Any]] = {}
    for f in frames:
        if f["status"] != "ok":
            continue
        k = (f["key"], f["tp"])
        cur = chosen.get(k)
        rank = (f["confluence"] is not None, f["kind"] == "corrected")
        if cur is None or rank > (cur["confluence"] is not None, cur["kind"] == "corrected"):
            chosen[k] = f
    return chosen


def well_series(
    chosen: dict[tuple[str, int], dict[str, Any]],
) -> dict[str, tuple[list[float], list[float]]]:
    """Per well: time points' start times (s) and the mean confluence of the well's sites."""
    per_well: dict[str, dict[int, list[tuple[float, float]]]] = {}
    for (_key, tp), f in chosen.items():
        if f["confluence"] is not None:
            per_well.setdefault(f["well"], {}).setdefault(tp, []).append((f["t_s"], f["confluence"]))
    series: dict[str, tuple[list[float], list[float]]] = {}
    for well, by_tp in sorted(per_well.items()):
        tps = sorted(by_tp)
        times = [min(t for t, _ in by_tp[tp]) for tp in tps]
        values = [statistics.fmean(c for _, c in by_tp[tp]) for tp in tps]
        series[well] = (times, values)
    return series
