"""Per-well readings over time: the one read model behind alerts, plots, CSV and the API.

A time-lapse images each well at one or more sites per time point. Everything that
speaks of "the confluence of well B3 at time point 7" -- the culture watch that raises
alerts, the plots and growth fits of the web page, ``wells.csv`` and ``growth.csv`` of an
export -- reads it here, so they cannot disagree.

Which site counts: the site's analysed plane (the focal plane of a z-stack), read off
the corrected frame when there is one. A site counts towards its well's confluence when
that plane was analysed and focus was not *failed* there: a site whose focus search
failed was imaged out of focus, and a blurred phase-contrast frame reads low (the halo
and texture the segmentation relies on are gone), which would pass for detachment or
slow growth. Sites imaged without a search at this time point (focus off, or the plane
remembered from the first time point) count. When every site of a well failed focus the
well has no confluence at that time point, and its focus state says why.
"""

from __future__ import annotations

import dataclasses
import json
import statistics
from collections.abc import Iterable, Mapping, Sequence
from typing import TYPE_CHECKING, Any

from daemon.states import FocusState, FrameState

if TYPE_CHECKING:
    from daemon.culture.growth import GrowthFit
    from daemon.storage.index import Index

S_PER_H = 3600.0


@dataclasses.dataclass(frozen=True)
class SiteReading:
    """One site of a well at one time point: its analysed plane as indexed."""

    key: str
    well: str
    site: int
    tp: int
    frame_id: int
    t_s: float  # scope clock, s
    z_um: float
    focus_score: float | None
    focus_found: bool | None  # None: no focus search at this time point
    confluence: float | None  # fraction 0..1; None: not analysed (yet)

    @property
    def used(self) -> bool:
        """Whether the site counts towards its well's confluence (see the module's rule)."""
        return self.confluence is not None and self.focus_found is not False


@dataclasses.dataclass(frozen=True)
class WellReading:
    """One well at one time point of a time-lapse."""

    timelapse_id: int
    tp: int
    well: str
    t_s: float  # when the well's first site was imaged, scope clock, s
    elapsed_s: float  # since the time-lapse's t0
    confluence: float | None  # mean over the sites used (fraction 0..1); None: no site usable
    sites_used: int
    sites_imaged: int  # sites of the well with an indexed frame at this time point
    sites_total: int  # sites of the well in the plan
    focus: FocusState
    sites: tuple[SiteReading, ...]

    @property
    def elapsed_h(self) -> float:
        return self.elapsed_s / S_PER_H

    @property
    def informative(self) -> bool:
        """Whether this reading tells the culture watch anything (a value or a focus outcome)."""
        return self.confluence is not None or any(
            s.confluence is not None or s.focus_found is not None for s in self.sites
        )

    def to_dict(self) -> dict[str, Any]:
        d = dataclasses.asdict(self)
        d["sites"] = [dataclasses.asdict(s) for s in self.sites]
        return d


def site_readings(frames: Iterable[Mapping[str, Any]], analysis_plane: int) -> list[SiteReading]:
    """One reading per (position, time point) from frame rows of the index.

    The analysed plane is preferred (a z-stack's other planes are never analysed), then a
    frame whose confluence is known, then corrected before raw: the two kinds of one
    plane share their confluence but not their focus score.
    """
    chosen: dict[tuple[str, int], Mapping[str, Any]] = {}

    def rank(f: Mapping[str, Any]) -> tuple[bool, bool, bool]:
        return (f["z_index"] == analysis_plane, f["confluence"] is not None, f["kind"] == "corrected")

    for f in frames:
        if f["status"] != FrameState.OK:
            continue
        k = (f["key"], f["tp"])
        cur = chosen.get(k)
        if cur is None or rank(f) > rank(cur):
            chosen[k] = f
    return [
        SiteReading(
            key=f["key"], well=f["well"], site=f["site"], tp=f["tp"], frame_id=f["id"], t_s=f["t_s"],
            z_um=f["z_um"], focus_score=f["focus_score"],
            focus_found=None if f["focus_found"] is None else bool(f["focus_found"]),
            confluence=f["confluence"],
        )
        for (_key, _tp), f in sorted(chosen.items())
    ]


def focus_state(sites: Sequence[SiteReading]) -> FocusState:
    searched = [s.focus_found for s in sites if s.focus_found is not None]
    if not searched:
        return FocusState.NOT_SEARCHED
    return FocusState.FOUND if any(searched) else FocusState.FAILED


def well_readings_of(
    sites: Iterable[SiteReading], *, timelapse_id: int, t0_s: float, planned_sites: Mapping[str, int]
) -> list[WellReading]:
    """Group site readings into well readings, ordered by well, then time point."""
    groups: dict[tuple[str, int], list[SiteReading]] = {}
    for s in sites:
        groups.setdefault((s.well, s.tp), []).append(s)
    out = []
    for (well, tp), group in sorted(groups.items()):
        used = [s.confluence for s in group if s.used]
        t_s = min(s.t_s for s in group)
        out.append(WellReading(
            timelapse_id=timelapse_id, tp=tp, well=well, t_s=t_s, elapsed_s=t_s - t0_s,
            confluence=statistics.fmean(used) if used else None,  # type: ignore[arg-type]
            sites_used=len(used), sites_imaged=len(group),
            sites_total=max(planned_sites.get(well, 0), len(group)),
            focus=focus_state(group), sites=tuple(sorted(group, key=lambda s: s.site)),
        ))
    return out


def timelapse_readings(index: Index, timelapse_id: int, *, tp: int | None = None) -> list[WellReading]:
    """Every well reading of a time-lapse (or of one time point), ordered by well, then time point."""
    from daemon.timelapse.plan import Plan

    row = index.require_timelapse(timelapse_id)
    spec = json.loads(row["plan_json"])
    if "plan" in spec:
        plane = Plan.from_dict(spec["plan"], file=f"time-lapse {timelapse_id} in {index.path}").analysis_plane
    else:  # an index rebuilt from frames alone: the plane found then
        plane = int(spec.get("analysis_plane", 0))
    planned: dict[str, int] = {}
    for pos in spec.get("positions", []):
        planned[pos["well"]] = planned.get(pos["well"], 0) + 1
    sites = site_readings(index.frames(timelapse_id, tp), plane)
    return well_readings_of(sites, timelapse_id=timelapse_id, t0_s=row["t0_s"], planned_sites=planned)


def well_readings(index: Index, timelapse_id: int, well: str) -> list[WellReading]:
    """One well's readings over a time-lapse, in time-point order."""
    return [r for r in timelapse_readings(index, timelapse_id) if r.well == well]


def by_well(readings: Iterable[WellReading]) -> dict[str, list[WellReading]]:
    out: dict[str, list[WellReading]] = {}
    for r in readings:
        out.setdefault(r.well, []).append(r)
    for rows in out.values():
        rows.sort(key=lambda r: r.tp)
    return dict(sorted(out.items()))


def growth_input(readings: Iterable[WellReading]) -> dict[str, tuple[list[float], list[float]]]:
    """``{well: (times_s, confluence)}`` of the readings with a confluence, for the growth fits."""
    out: dict[str, tuple[list[float], list[float]]] = {}
    for well, rows in by_well(readings).items():
        valued = [r for r in rows if r.confluence is not None]
        if valued:
            out[well] = ([r.t_s for r in valued], [r.confluence for r in valued])  # type: ignore[misc]
    return out


def growth_fits(readings: Sequence[WellReading]) -> dict[str, GrowthFit]:
    from daemon.culture.growth import fit_plate

    return fit_plate(growth_input(readings))


WELL_COLUMNS = (
    "timelapse_id", "time_point", "well", "t_s", "elapsed_h", "confluence", "sites_used", "sites_imaged",
    "sites_total", "focus",
)


def well_rows(readings: Iterable[WellReading]) -> list[list[Any]]:
    """Rows of ``wells.csv`` (columns :data:`WELL_COLUMNS`)."""
    return [
        [
            r.timelapse_id, r.tp, r.well, f"{r.t_s:.3f}", f"{r.elapsed_h:.4f}",
            "" if r.confluence is None else f"{r.confluence:.4f}",
            r.sites_used, r.sites_imaged, r.sites_total, r.focus,
        ]
        for r in readings
    ]


def round_h(seconds: float) -> float:
    return round(seconds / S_PER_H, 5)


def plot_series(index: Index, timelapse_id: int) -> dict[str, Any]:
    """Focus score and confluence over time, per position and per well, with a growth fit
    per well (the web page's plots). Times are hours since the time-lapse's t0."""
    readings = timelapse_readings(index, timelapse_id)
    t0_s = index.require_timelapse(timelapse_id)["t0_s"]
    positions: dict[str, dict[str, Any]] = {}
    for site in sorted((s for r in readings for s in r.sites), key=lambda s: (s.key, s.tp)):
        p = positions.setdefault(
            site.key, {"well": site.well, "tp": [], "t_h": [], "focus_score": [], "confluence": [], "z_um": [], "used": []}
        )
        p["tp"].append(site.tp)
        p["t_h"].append(round_h(site.t_s - t0_s))
        p["focus_score"].append(site.focus_score)
        p["confluence"].append(site.confluence)
        p["z_um"].append(round(site.z_um, 3))
        p["used"].append(site.used)
    fits = growth_fits(readings)
    wells: dict[str, dict[str, Any]] = {}
    for well, rows in by_well(readings).items():
        valued = [r for r in rows if r.confluence is not None]
        if not valued:
            continue
        wells[well] = {
            "tp": [r.tp for r in valued],
            "t_h": [round_h(r.elapsed_s) for r in valued],
            "confluence": [r.confluence for r in valued],
            "sites_used": [r.sites_used for r in valued],
            "sites_total": [r.sites_total for r in valued],
            "focus": [r.focus for r in valued],
            "growth": fits[well].to_dict(),
        }
    return {"positions": positions, "wells": wells}
