"""What happens to a position's frames between the camera and the disk (worker-thread side).

Per frame: illumination correction (when calibrated), the focus score of every saved
image, then an atomic OME-TIFF write and its index row. This is the software time on a
time point's critical path (target: <= 30 ms per position at 1080p). Confluence, which
costs several times that on a full frame, is not computed here: the scheduler hands the
analysed plane to a background worker (see :mod:`daemon.timelapse.scheduler`), so it
overlaps the next position's motion, focus and exposure.
"""

from __future__ import annotations

import dataclasses
import time
from collections.abc import Mapping
from typing import TYPE_CHECKING

import numpy as np

from daemon.storage.frames import FrameStore
from daemon.storage.ome import FrameMeta
from daemon.timelapse.plan import WellCondition
from drivers.base import Frame, Position

if TYPE_CHECKING:
    from daemon.illumination.correction import Corrector
    from daemon.timelapse.plan import PlannedPosition


@dataclasses.dataclass
class PositionFrames:
    """Frames captured at one position of time point ``k``, ready to be saved."""

    k: int
    position: PlannedPosition
    frames: list[tuple[int, Frame, Position]]  # (plane index, frame, stage position)
    focus_found: bool | None
    done_planes: set[tuple[int, str]]  # (plane, kind) already indexed before a restart


@dataclasses.dataclass
class SavedPosition:
    frames: list[tuple[FrameMeta, str, int]]  # (metadata, relative path, frame id)
    analysis_image: np.ndarray | None  # the plane to analyse for confluence, as saved
    analysis_frame_ids: list[int]
    software_s: float


class FrameProcessor:
    """Corrects, scores, writes and indexes frames for one time-lapse (blocking; call from a thread)."""

    def __init__(
        self,
        store: FrameStore,
        *,
        timelapse_id: int,
        timelapse_name: str,
        t0_s: float,
        pixel_size_um: float,
        objective: str,
        kinds: tuple[str, ...],
        corrector: Corrector | None,
        analysis_plane: int,
        conditions: Mapping[str, WellCondition] | None = None,
    ) -> None:
        if not kinds or any(k not in ("raw", "corrected") for k in kinds):
            raise ValueError(f"kinds must be some of 'raw', 'corrected', got {kinds!r}")
        if "corrected" in kinds and corrector is None:
            raise ValueError("corrected frames need a corrector")
        self.store = store
        self.timelapse_id = timelapse_id
        self.timelapse_name = timelapse_name
        self.t0_s = t0_s
        self.pixel_size_um = pixel_size_um
        self.objective = objective
        self.kinds = kinds
        self.corrector = corrector
        self.analysis_plane = analysis_plane
        self.conditions = dict(conditions or {})

    def save_position(self, data: PositionFrames) -> SavedPosition:
        from daemon.focus.metrics import variance_of_laplacian

        started = time.perf_counter()
        saved: list[tuple[FrameMeta, str, int]] = []
        analysis: np.ndarray | None = None
        analysis_ids: list[int] = []
        cond = self.conditions.get(data.position.well, WellCondition(""))
        for zi, frame, here in data.frames:
            raw = frame.pixels
            images = {"raw": raw}
            if self.corrector is not None:
                images["corrected"] = self.corrector.apply_to_dtype(raw)
            for kind in self.kinds:
                if (zi, kind) in data.done_planes:
                    continue
                pixels = np.ascontiguousarray(images[kind])
                meta = FrameMeta(
                    timelapse_id=self.timelapse_id, timelapse_name=self.timelapse_name, tp=data.k,
                    key=data.position.key, well=data.position.well, site=data.position.site, z_index=zi,
                    kind=kind, t_s=frame.t_s, delta_t_s=frame.t_s - self.t0_s, x_um=here.x_um, y_um=here.y_um,
                    z_um=here.z_um, exposure_ms=frame.exposure_ms, gain_db=frame.gain_db,
                    bit_depth=frame.bit_depth, pixel_size_um=self.pixel_size_um,
                    focus_score=float(variance_of_laplacian(pixels)), focus_found=data.focus_found,
                    objective=self.objective, condition=cond.label, condition_notes=cond.notes,
                )
                rec = self.store.save(pixels, meta)
                saved.append((meta, rec.path, rec.frame_id))
                if zi == self.analysis_plane:
                    analysis_ids.append(rec.frame_id)
                    # Confluence is read off the corrected frame when there is one: the
                    # method is meant to be insensitive to shading, but cleaner input helps.
                    if analysis is None or kind == "corrected":
                        analysis = pixels
        return SavedPosition(saved, analysis, analysis_ids, time.perf_counter() - started)
