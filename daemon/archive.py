"""The read side of a data folder: its time-lapses, their frames, previews, series and exports.

Everything here reads the index and the files under the data folder and never touches
the scope, so the web API (through :class:`daemon.station.Station`) and the command line
(``phasewatch export``) share it. Every method blocks (SQLite, TIFF decoding, export
writing): call it through a worker thread from the event loop.

Paths that come from the index or from a request are resolved and refused unless they
stay inside the data folder, so neither a tampered index nor a crafted name reads a
file elsewhere.
"""

from __future__ import annotations

import dataclasses
import json
import re
import time
from pathlib import Path
from typing import Any

import cv2
import numpy as np
import tifffile

from daemon.states import FrameState, PositionState, TimePointState
from daemon.errors import BadRequest, Damaged, NotFound
from daemon.live import DEFAULT_QUALITY, MIN_WIDTH_PX, to_8bit
from daemon.storage.index import Index
from daemon.storage.verify import mark_frame
from daemon.culture.readings import WellReading, plot_series, well_readings
from daemon.views import latest_per_position
from drivers.wells import normalise_well_name
from drivers.options import option

EXPORT_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]{0,200}$")
PREVIEW_WIDTH_PX = 480
MAX_ID = 2**31 - 1  # ids are SQLite row ids; anything larger names nothing
MAX_WIDTH_PX = 8192


@dataclasses.dataclass(frozen=True, kw_only=True)
class FramesQuery:
    """Which frames of a time-lapse to list, a page at a time."""

    position: str | None = option(None, doc="only this position, e.g. 'B2-1'")
    tp: int | None = option(None, doc="only this time point", min=0, max=MAX_ID)
    limit: int = option(200, doc="page size", min=1, max=1000)
    offset: int = option(0, doc="page start", min=0, max=MAX_ID)


@dataclasses.dataclass(frozen=True, kw_only=True)
class PreviewQuery:
    width: int = option(PREVIEW_WIDTH_PX, doc="reduce the frame to this width", min=MIN_WIDTH_PX, max=MAX_WIDTH_PX,
                        unit="px")


@dataclasses.dataclass(frozen=True, kw_only=True)
class AlertsQuery:
    limit: int = option(100, doc="how many, the newest", min=1, max=1000)


@dataclasses.dataclass(frozen=True, kw_only=True)
class ExportRequest:
    """Which exports to make: the CSV files always, OME-TIFF stacks unless told not to."""

    stacks: bool = option(True, doc="also write one OME-TIFF stack per position")
    kind: str | None = option(None, doc="raw or corrected frames in the stacks (default: corrected where saved)",
                              choices=("raw", "corrected"))


@dataclasses.dataclass(frozen=True, kw_only=True)
class MovieQuery:
    fps: float | None = option(None, doc="time points per second of film; leave out for about ten seconds in all",
                               min=0.5, max=60.0)
    width: int = option(1024, doc="reduce the frames to this width", min=MIN_WIDTH_PX, max=MAX_WIDTH_PX, unit="px")


@dataclasses.dataclass(frozen=True)
class FramePage:
    total: int
    offset: int
    frames: list[dict[str, Any]]


@dataclasses.dataclass(frozen=True)
class ExportFile:
    name: str
    bytes: int


@dataclasses.dataclass(frozen=True)
class StackMade:
    position: str
    path: Path
    time_points: int
    z_planes: int
    skipped_time_points: int


@dataclasses.dataclass(frozen=True)
class ExportsMade:
    """What :meth:`Archive.make_exports` wrote: the CSV files, one stack per position, and
    every file now in the export folder."""

    folder: Path
    frames_csv: Path
    time_points_csv: Path
    frames: int
    stacks: list[StackMade]
    files: list[ExportFile]


# Rows of each list in a time-lapse's detail: its answer stays small on any run.
DETAIL_ROWS = 50


def inside(root: Path, rel: str | Path) -> Path:
    """``root / rel`` resolved, refused unless it stays inside ``root`` (no way out of the data folder)."""
    base = root.resolve()
    path = (base / rel).resolve()
    if not path.is_relative_to(base) or path == base:
        raise NotFound("no such file in the data folder")
    return path


def preview_jpeg(path: Path, bit_depth: int, width_px: int) -> bytes:
    """A stored frame as an 8-bit JPEG at most ``width_px`` wide."""
    pixels = tifffile.imread(path)
    img = to_8bit(np.asarray(pixels), bit_depth)
    if img.ndim != 2:
        img = img.reshape(img.shape[-2:]) if img.size == img.shape[-1] * img.shape[-2] else img[..., 0]
    h, w = img.shape
    if width_px < w:
        img = cv2.resize(img, (width_px, max(1, round(h * width_px / w))), interpolation=cv2.INTER_AREA)
    ok, buf = cv2.imencode(".jpg", img, [cv2.IMWRITE_JPEG_QUALITY, DEFAULT_QUALITY])
    if not ok:
        raise ValueError("JPEG encoding failed")
    return buf.tobytes()


class Archive:
    def __init__(self, data_dir: Path, index: Index) -> None:
        self.data_dir = data_dir
        self.index = index

    # -- time-lapses ---------------------------------------------------------------------

    def timelapse(self, tl_id: int) -> dict[str, Any]:
        """The time-lapse's index row, or NotFound naming the ones there are."""
        row = self.index.timelapse(tl_id) if 0 <= tl_id <= MAX_ID else None
        if row is None:
            known = [str(t["id"]) for t in self.index.timelapses()]
            there = ", ".join(known[-20:]) or "none"
            raise NotFound(f"no time-lapse {tl_id} in the data folder (time-lapses there: {there})")
        return row

    def summaries(self) -> list[dict[str, Any]]:
        """Every time-lapse with its time points over and missed (the state as indexed)."""
        rows = []
        for row in self.index.timelapses():
            counts = self.index.time_point_counts(row["id"])
            rows.append({
                "id": row["id"], "name": row["name"], "state": row["state"],
                "profile": row["profile_name"], "t0_s": row["t0_s"], "interval_s": row["interval_s"],
                "count": row["count"], "positions": row["n_positions"],
                "time_points_over": sum(n for st, n in counts.items() if st != TimePointState.RUNNING),
                "missed": counts.get(TimePointState.MISSED, 0), "stop_reason": row["stop_reason"],
            })
        return rows

    def detail(self, tl_id: int) -> dict[str, Any]:
        """One time-lapse as indexed: plan, time point counts, missed time points as ranges,
        the latest time points, failed positions and alerts, and the latest frame of every
        position. Bounded whatever the run's length: counts, ranges and the latest few rows
        (``DETAIL_ROWS``); the frames are paged at ``/frames``."""
        row = self.timelapse(tl_id)
        counts = self.index.time_point_counts(tl_id)
        statuses = {st: counts.get(st, 0) for st in ("done", "partial", "failed", "missed", "running")}
        over = statuses["done"] + statuses["partial"] + statuses["failed"] + statuses["missed"]
        n_frames, not_ok = self.index.frame_counts(tl_id)
        spec = json.loads(row["plan_json"])
        ranges = self.index.missed_ranges(tl_id, DETAIL_ROWS + 1)
        return {
            "id": tl_id, "name": row["name"], "state": row["state"], "stop_reason": row["stop_reason"],
            "profile": row["profile_name"], "t0_s": row["t0_s"], "created_s": row["created_s"],
            "finished_s": row["finished_s"], "interval_s": row["interval_s"], "count": row["count"],
            "positions": [p["key"] for p in spec.get("positions", [])], "plan": spec.get("plan"),
            "time_points": statuses, "progress_ratio": over / row["count"] if row["count"] else 0.0,
            "frames": n_frames, "frames_not_ok": not_ok,
            # Runs of consecutive missed time points with one reason; the latest DETAIL_ROWS.
            "missed": ranges[-DETAIL_ROWS:], "missed_ranges_left_out": len(ranges) > DETAIL_ROWS,
            "time_point_list": self.index.recent_time_points(tl_id, DETAIL_ROWS),
            "failed_positions": self.index.recent_failed_positions(tl_id, DETAIL_ROWS),
            "alerts": self.index.recent_alerts(tl_id, DETAIL_ROWS),
            # A position not imaged in the last two time points with frames shows no latest frame here.
            "latest": latest_per_position(self.index.recent_frames(tl_id, 2)),
        }

    # -- frames --------------------------------------------------------------------------

    def frames(self, tl_id: int, query: FramesQuery) -> FramePage:
        self.timelapse(tl_id)
        rows = self.index.frames(tl_id)
        if query.tp is not None:
            rows = [r for r in rows if r["tp"] == query.tp]
        if query.position:
            rows = [r for r in rows if r["key"] == query.position]
        return FramePage(len(rows), query.offset, rows[query.offset:query.offset + query.limit])

    def frame(self, tl_id: int, frame_id: int) -> dict[str, Any]:
        self.timelapse(tl_id)
        for r in self.index.frames(tl_id):
            if r["id"] == frame_id:
                return r
        raise NotFound(f"time-lapse {tl_id} has no frame {frame_id}")

    def frame_path(self, tl_id: int, frame_id: int) -> Path:
        """The frame's lossless file, inside the data folder; :class:`Damaged` when the file is
        gone or is not what was stored (marked so in the index, with an alert, on first sight)."""
        row = self.frame(tl_id, frame_id)
        path = inside(self.data_dir, row["path"])
        status = row["status"]
        if status == FrameState.OK:
            try:
                size = path.stat().st_size
            except FileNotFoundError:
                status = FrameState.MISSING
            else:
                if size != row["bytes"]:
                    status = FrameState.DAMAGED
            if status != FrameState.OK and not self.index.read_only:
                mark_frame(self.index, row, status, time.time(), "a download")
        if status == FrameState.MISSING:
            copy = self.index.frame_copy(int(row["id"]))
            if copy is not None and copy["local_pruned_s"] is not None:
                raise Damaged(
                    f"frame {row['id']} was moved to lab storage: {copy['remote']}/{row['path']} "
                    f"(MD5 {copy['md5']}); its local file was removed to make room", status=status,
                )
            raise Damaged(f"frame {row['id']} is indexed but its file {row['path']} is missing", status=status)
        if status != FrameState.OK:
            raise Damaged(
                f"frame {row['id']} is {status}: its file {row['path']} is not the one stored "
                f"({row['bytes']} bytes, CRC-32 {row['crc32']:08x}); it is not served", status=status,
            )
        return path

    def preview(self, tl_id: int, frame_id: int, query: PreviewQuery) -> bytes:
        """A frame as a small JPEG (decoded from its TIFF)."""
        row = self.frame(tl_id, frame_id)
        path = self.frame_path(tl_id, frame_id)
        try:
            return preview_jpeg(path, row["bit_depth"], query.width)
        except (OSError, ValueError, tifffile.TiffFileError) as exc:
            raise NotFound(f"frame {row['id']} cannot be read ({exc}); the start-up check will mark it") from None

    def latest(self, tl_id: int) -> list[dict[str, Any]]:
        """The newest analysed frame of every position."""
        self.timelapse(tl_id)
        return latest_per_position(self.index.frames(tl_id))

    def series(self, tl_id: int) -> dict[str, Any]:
        """Focus score and confluence over time per position and well, with growth fits."""
        from daemon.storage.export import condition_of, plan_of

        row = self.timelapse(tl_id)
        out = {"id": tl_id, "t0_s": row["t0_s"], **plot_series(self.index, tl_id)}
        plan = plan_of(row)
        for well, w in out["wells"].items():
            w["condition"] = condition_of(plan, well)[0]
        conditions = plan.conditions.items() if plan is not None else ()
        out["conditions"] = {w: {"label": c.label, "notes": c.notes} for w, c in conditions}
        return out

    def well_readings(self, tl_id: int, well: str) -> list[WellReading]:
        """One well's readings over the time-lapse (see :mod:`daemon.culture.readings`);
        refused when the name is no well or the well is not in the plan."""
        self.timelapse(tl_id)
        name = normalise_well_name(well)
        if name is None:
            raise BadRequest(f"well: {well!r} is not a well name (a row letter and a column number, e.g. B3)")
        planned = {p["well"] for p in json.loads(self.timelapse(tl_id)["plan_json"]).get("positions", [])}
        if name not in planned:
            raise NotFound(f"well {name} is not in time-lapse {tl_id}; its wells are {', '.join(sorted(planned)) or 'none'}")
        return well_readings(self.index, tl_id, name)

    def movie(self, tl_id: int, position: str, query: MovieQuery) -> Path:
        """The position's analysed plane over time as an MP4 (H.264) in the export folder,
        made afresh from the frames stored so far (:mod:`daemon.storage.movie`)."""
        from daemon.storage.movie import MovieFrame, default_fps, write_movie
        from daemon.timelapse.plan import Plan
        from drivers import atomic

        row = self.timelapse(tl_id)
        spec = json.loads(row["plan_json"])
        keys = [p["key"] for p in spec.get("positions", [])]
        if position not in keys:
            raise NotFound(f"time-lapse {tl_id} has no position {position!r}; its positions are {', '.join(keys[:20]) or 'none'}")
        plane = Plan.from_dict(spec["plan"], file=f"time-lapse {tl_id}").analysis_plane
        rows = [f for f in self.index.frames(tl_id) if f["key"] == position and f["z_index"] == plane
                and f["status"] == FrameState.OK]
        kind = "corrected" if any(f["kind"] == "corrected" for f in rows) else "raw"
        chosen = [f for f in rows if f["kind"] == kind]
        if not chosen:
            raise NotFound(f"position {position} of time-lapse {tl_id} has no frames yet")
        frames = [MovieFrame(inside(self.data_dir, f["path"]), f["bit_depth"], f["t_s"] - row["t0_s"]) for f in chosen]
        folder = self.export_folder(tl_id)
        atomic.make_dirs(folder)
        out = folder / f"movie-{position}.mp4"
        part = folder / f".movie-{position}.part.mp4"
        fps = query.fps if query.fps is not None else default_fps(len(frames))
        write_movie(frames, part, pixel_size_um=chosen[0]["pixel_size_um"], fps=fps, width_px=query.width)
        part.replace(out)
        return out

    # -- exports -------------------------------------------------------------------------

    def export_folder(self, tl_id: int) -> Path:
        from daemon.storage.export import default_export_dir

        self.timelapse(tl_id)
        return default_export_dir(self.data_dir, self.index, tl_id)

    def exports(self, tl_id: int, folder: Path | None = None) -> list[ExportFile]:
        """The export files made so far (plain files only: no hidden names, no links)."""
        folder = folder or self.export_folder(tl_id)
        if not folder.is_dir():
            return []
        return [
            ExportFile(p.name, p.stat().st_size)
            for p in sorted(folder.iterdir()) if p.is_file() and not p.name.startswith(".") and not p.is_symlink()
        ]

    def make_exports(
        self, tl_id: int, *, folder: Path | None = None, stacks: bool = True, kind: str | None = None
    ) -> ExportsMade:
        """Write the per-frame, per-time-point and growth CSV files and, with ``stacks``, one
        OME-TIFF stack per position (``kind``: raw or corrected frames; default corrected
        where saved)."""
        from daemon.storage.export import export_csv, export_stacks

        self.timelapse(tl_id)
        out = folder or self.export_folder(tl_id)
        frames_csv, points_csv = export_csv(self.index, tl_id, out)
        n_frames = len(self.index.frames(tl_id))
        made = []
        if stacks and n_frames:
            made = [StackMade(s.position, s.path, s.time_points, s.z_planes, s.skipped_time_points)
                    for s in export_stacks(self.index, self.data_dir, tl_id, out, kind=kind)]
        return ExportsMade(out, frames_csv, points_csv, n_frames, made, self.exports(tl_id, out))

    def export_path(self, tl_id: int, name: str) -> Path:
        """An export file by name, refused unless it is a plain file right in the export folder."""
        missing = NotFound(f"no export called {name!r} for time-lapse {tl_id}; make the exports first")
        if not EXPORT_NAME.match(name) or ".." in name:
            raise missing
        folder = self.export_folder(tl_id)
        path = inside(folder, name)
        if path.parent != folder.resolve() or not path.is_file() or (folder / name).is_symlink():
            raise missing
        return path

    # -- alerts --------------------------------------------------------------------------

    def alerts(self, query: AlertsQuery) -> list[dict[str, Any]]:
        return self.index.alerts()[-query.limit:]
