"""Exports of a time-lapse: CSV of per-frame and per-well metrics, and one multi-page OME-TIFF per position."""

from __future__ import annotations

import csv
import dataclasses
import json
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import tifffile

from daemon.states import FrameState
from daemon.storage.index import DATA_FILE_MODE, DATA_FOLDER_MODE, Index
from daemon.storage.ome import FrameMeta, iso_utc, stack_metadata
from daemon.storage.verify import current_statuses
from daemon.timelapse.plan import Plan
from drivers import atomic

FRAME_COLUMNS = (
    "timelapse_id", "time_point", "planned_s", "t_s", "time_utc", "elapsed_h", "late_s", "position",
    "well", "site", "z_index", "kind", "x_um", "y_um", "z_um", "exposure_ms", "gain_db",
    "focus_score", "focus_found", "confluence", "status", "path", "condition", "condition_notes",
)
TIME_POINT_COLUMNS = (
    "timelapse_id", "time_point", "status", "planned_s", "started_s", "finished_s", "late_s",
    "n_ok", "n_failed", "reason",
)


def _atomic_csv(path: Path, header: tuple[str, ...], rows: list[list[Any]]) -> None:
    with atomic.open_atomic(path, "w", newline="", encoding="utf-8", permissions=DATA_FILE_MODE) as fh:
        writer = csv.writer(fh)
        writer.writerow(header)
        writer.writerows(rows)


def export_csv(index: Index, tl_id: int, out_dir: Path) -> tuple[Path, Path]:
    """Write ``frames.csv`` (one row per frame), ``time-points.csv`` (incl. missed ones),
    ``wells.csv`` (one row per well and time point: confluence of the sites used, focus)
    and ``growth.csv`` (one growth fit per well: doubling time, its uncertainty, fit quality)."""
    tl = index.require_timelapse(tl_id)
    atomic.make_dirs(out_dir, mode=DATA_FOLDER_MODE)
    t0 = tl["t0_s"]
    points = {tp["tp"]: tp for tp in index.time_points(tl_id)}
    plan = plan_of(tl)
    frame_rows = []
    rows = index.frames(tl_id)
    # A damaged or missing file is marked in the export's status column, never listed as ok.
    statuses = current_statuses(index, index.path.parent, rows, "an export")
    for f, status in zip(rows, statuses):
        planned = points[f["tp"]]["planned_s"] if f["tp"] in points else t0 + f["tp"] * tl["interval_s"]
        found = f["focus_found"]
        frame_rows.append([
            tl_id, f["tp"], f"{planned:.3f}", f"{f['t_s']:.3f}", iso_utc(f["t_s"]), f"{(f['t_s'] - t0) / 3600:.4f}",
            f"{f['t_s'] - planned:.3f}", f["key"], f["well"], f["site"], f["z_index"], f["kind"],
            f"{f['x_um']:.2f}", f"{f['y_um']:.2f}", f"{f['z_um']:.3f}", f["exposure_ms"], f["gain_db"],
            "" if f["focus_score"] is None else f"{f['focus_score']:.6g}",
            "" if found is None else ("yes" if found else "no"),
            "" if f["confluence"] is None else f"{f['confluence']:.4f}",
            status, f["path"], *_condition_cells(plan, f["well"]),
        ])
    tp_rows = []
    for tp in points.values():
        late = "" if tp["started_s"] is None else f"{tp['started_s'] - tp['planned_s']:.3f}"
        tp_rows.append([
            tl_id, tp["tp"], tp["status"], f"{tp['planned_s']:.3f}",
            "" if tp["started_s"] is None else f"{tp['started_s']:.3f}",
            "" if tp["finished_s"] is None else f"{tp['finished_s']:.3f}",
            late, tp["n_ok"], tp["n_failed"], tp["reason"] or "",
        ])
    frames_csv = out_dir / "frames.csv"
    points_csv = out_dir / "time-points.csv"
    _atomic_csv(frames_csv, FRAME_COLUMNS, frame_rows)
    _atomic_csv(points_csv, TIME_POINT_COLUMNS, tp_rows)
    from daemon.culture.growth import GROWTH_COLUMNS, growth_rows
    from daemon.culture.readings import WELL_COLUMNS, growth_fits, timelapse_readings, well_rows

    readings = timelapse_readings(index, tl_id)
    wells = [[*row, *_condition_cells(plan, row[2])] for row in well_rows(readings)]
    _atomic_csv(out_dir / "wells.csv", (*WELL_COLUMNS, *CONDITION_COLUMNS), wells)
    growth = [[*row, *_condition_cells(plan, row[0])] for row in growth_rows(growth_fits(readings))]
    _atomic_csv(out_dir / "growth.csv", (*GROWTH_COLUMNS, *CONDITION_COLUMNS), growth)
    return frames_csv, points_csv


CONDITION_COLUMNS = ("condition", "condition_notes")


def plan_of(tl: dict[str, Any]) -> Plan | None:
    """The plan a time-lapse was started with, as its index row keeps it; None for one
    rebuilt from its frames alone (its plan record was lost), which has no conditions."""
    spec = json.loads(tl["plan_json"]).get("plan")
    return None if spec is None else Plan.from_dict(spec, file=f"time-lapse {tl['id']}")


def condition_of(plan: Plan | None, well: str) -> tuple[str, str]:
    """A well's condition label and notes ("" where none is known)."""
    if plan is None:
        return "", ""
    c = plan.condition_of(well)
    return c.label, c.notes


def _condition_cells(plan: Plan | None, well: str) -> list[str]:
    return list(condition_of(plan, well))


@dataclasses.dataclass(frozen=True)
class StackExport:
    position: str
    path: Path
    time_points: int
    z_planes: int
    skipped_time_points: int


def _meta_of(row: dict[str, Any], tl: dict[str, Any], plan: Plan | None) -> FrameMeta:
    return FrameMeta(
        timelapse_id=row["timelapse_id"], timelapse_name=tl["name"], tp=row["tp"], key=row["key"],
        well=row["well"], site=row["site"], z_index=row["z_index"], kind=row["kind"], t_s=row["t_s"],
        delta_t_s=row["delta_t_s"], x_um=row["x_um"], y_um=row["y_um"], z_um=row["z_um"],
        exposure_ms=row["exposure_ms"], gain_db=row["gain_db"], bit_depth=row["bit_depth"],
        pixel_size_um=row["pixel_size_um"], condition=condition_of(plan, row["well"])[0],
        condition_notes=condition_of(plan, row["well"])[1],
    )


def export_stacks(
    index: Index, data_dir: Path, tl_id: int, out_dir: Path, *, kind: str | None = None
) -> list[StackExport]:
    """One OME-TIFF per position: axes TYX, or TZYX for z-stacks, planes in time order.

    ``kind`` picks raw or corrected frames (default: corrected where any were saved).
    Time points where the position failed or lacks a plane are left out of its stack and
    counted; the planes' DeltaT keeps the true acquisition times.
    """
    tl = index.require_timelapse(tl_id)
    plan = plan_of(tl)
    rows = index.frames(tl_id)
    frames = [f for f, s in zip(rows, current_statuses(index, data_dir, rows, "an export")) if s == FrameState.OK]
    if kind is None:
        kind = "corrected" if any(f["kind"] == "corrected" for f in frames) else "raw"
    by_position: dict[str, dict[int, dict[int, dict[str, Any]]]] = {}
    for f in frames:
        if f["kind"] == kind:
            by_position.setdefault(f["key"], {}).setdefault(f["tp"], {})[f["z_index"]] = f
    atomic.make_dirs(out_dir, mode=DATA_FOLDER_MODE)
    results = []
    for key in sorted(by_position):
        per_tp = by_position[key]
        n_z = max(len(planes) for planes in per_tp.values())
        complete = [tp for tp in sorted(per_tp) if len(per_tp[tp]) == n_z]
        rows = [per_tp[tp][z] for tp in complete for z in sorted(per_tp[tp])]
        first = rows[0]
        dtype = np.uint8 if first["bit_depth"] <= 8 else np.uint16
        shape: tuple[int, ...] = (len(complete), first["height_px"], first["width_px"])
        axes = "TYX"
        if n_z > 1:
            shape = (len(complete), n_z, first["height_px"], first["width_px"])
            axes = "TZYX"
        metadata = stack_metadata([_meta_of(r, tl, plan) for r in rows], axes, f"{tl['name']} {key} {kind}")

        def pages(rows: list[dict[str, Any]] = rows) -> Iterator[np.ndarray]:
            for r in rows:
                yield tifffile.imread(data_dir / r["path"])

        path = out_dir / f"{key}_{kind}.ome.tif"
        with atomic.open_atomic(path, permissions=DATA_FILE_MODE) as fh:
            tifffile.imwrite(
                fh, pages(), shape=shape, dtype=dtype, ome=True, photometric="minisblack",
                metadata=metadata, software="phasewatch",
            )
        results.append(StackExport(key, path, len(complete), n_z, len(per_tp) - len(complete)))
    return results


def default_export_dir(data_dir: Path, index: Index, tl_id: int) -> Path:
    tl = index.require_timelapse(tl_id)
    return data_dir / "exports" / Path(tl["folder"]).name
