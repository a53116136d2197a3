"""Read-side views of a time-lapse for the interface: latest frame per position, series over time."""

from __future__ import annotations

from typing import Any

from daemon.culture.series import analysed_frames, well_series


def latest_per_position(frames: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """For each position, its newest frame (the analysed plane, corrected before raw)."""
    best: dict[str, dict[str, Any]] = {}
    for f in frames:
        if f["status"] != "ok":
            continue
        cur = best.get(f["key"])
        rank = (f["tp"], f["confluence"] is not None, f["kind"] == "corrected")
        if cur is None or rank > (cur["tp"], cur["confluence"] is not None, cur["kind"] == "corrected"):
            best[f["key"]] = f
    keep = ("id", "tp", "key", "well", "site", "z_index", "kind", "t_s", "z_um", "focus_score", "confluence", "focus_found")
    return [{k: best[key][k] for k in keep} for key in sorted(best)]


def series_of(frames: list[dict[str, Any]], t0_s: float) -> dict[str, Any]:
    """Focus score and confluence over time, per position and per well, with growth fits per well."""
    from daemon.culture.growth import fit_plate

    chosen = analysed_frames(frames)
    positions: dict[str, dict[str, list[Any]]] = {}
    for (key, _tp), f in sorted(chosen.items(), key=lambda item: (item[0][0], item[0][1])):
        s = positions.setdefault(key, {"well": f["well"], "tp": [], "t_h": [], "focus_score": [], "confluence": [], "z_um": []})  # type: ignore[dict-item]
        s["tp"].append(f["tp"])
        s["t_h"].append(round((f["t_s"] - t0_s) / 3600.0, 5))
        s["focus_score"].append(f["focus_score"])
        s["confluence"].append(f["confluence"])
        s["z_um"].append(round(f["z_um"], 3))
    series = well_series(chosen)
    fits = fit_plate(series)
    wells = {
        well: {"t_h": [round((t - t0_s) / 3600.0, 5) for t in times], "confluence": values, "growth": fits[well].to_dict()}
        for well, (times, values) in series.items()
    }
    return {"positions": positions, "wells": wells}
