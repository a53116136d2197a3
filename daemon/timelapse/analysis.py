"""Culture analysis during a time-lapse: confluence in the background, and the culture watch.

Confluence of an analysed plane costs several times a position's save on a full frame,
so it is not on the time point's critical path: :class:`ConfluenceWorker` takes the
planes in a background task while the scope moves on, and writes the figure into the
index beside the frames. At most :data:`ANALYSIS_BACKLOG` planes wait; beyond that the
position loop waits for the analysis to catch up, so frames never pile up in memory.
Planes a restart cut off before their analysis are found in the index and queued again.

At the end of each time point :func:`watch_time_point` feeds that time point's well
readings (:mod:`daemon.culture.readings`) to the culture watch, which raises the culture
alerts (passaging confluence reached, sudden drop, focus failing).
"""

from __future__ import annotations

import asyncio
import contextlib
import dataclasses
import logging
from collections.abc import AsyncIterator, Awaitable, Callable
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from daemon import events as ev
from daemon.culture.alerts import CONFLUENCE_REACHED

if TYPE_CHECKING:
    from daemon.culture.alerts import Alert, CultureWatch
    from daemon.storage.index import Index

log = logging.getLogger(__name__)

# Each waiting plane holds its frame in memory (a 1280x960 16-bit frame is 2.4 MB, a
# 1920x1080 one 4 MB): a short queue is enough to overlap analysis with the next
# positions' motion and exposure, and keeps the daemon within its memory budget.
ANALYSIS_BACKLOG = 3
# Alert levels of the culture watch's alert kinds: reaching the passaging confluence is
# news, the others call for a look.
INFO_KINDS = (CONFLUENCE_REACHED,)

Alerting = Callable[[str, str, str], Awaitable[None]]  # (level, kind, message)


@dataclasses.dataclass
class AnalysisJob:
    k: int
    key: str
    frame_ids: list[int]
    image: np.ndarray | None  # None: read it back from ``path``
    path: str = ""


def confluence_function() -> Callable[..., Any] | None:
    """The confluence measure, or None when the culture analysis is not installed (frames
    then carry the focus score only)."""
    try:
        from daemon.culture.confluence import confluence
    except ImportError:
        return None
    return confluence


class ConfluenceWorker:
    """Measures the confluence of analysed planes of one time-lapse in a background task."""

    def __init__(
        self, index: Index, timelapse_id: int, data_dir: Path, *, pixel_size_um: float, analysis_plane: int,
        publish: Callable[[ev.Event], None], alert: Alerting, measure: Callable[..., Any] | None,
        backlog: int = ANALYSIS_BACKLOG,
    ) -> None:
        self.index = index
        self.timelapse_id = timelapse_id
        self.data_dir = data_dir
        self.pixel_size_um = pixel_size_um
        self.analysis_plane = analysis_plane
        self.measure = measure
        self._publish = publish
        self._alert = alert
        self._queue: asyncio.Queue[AnalysisJob] = asyncio.Queue(maxsize=backlog)

    @property
    def enabled(self) -> bool:
        return self.measure is not None

    @contextlib.asynccontextmanager
    async def running(self) -> AsyncIterator[ConfluenceWorker]:
        """Run the worker for the ``with`` block (first queueing what a restart cut off)."""
        task = asyncio.create_task(self._work(), name=f"time-lapse {self.timelapse_id} analysis")
        try:
            await self._queue_unanalysed()
            yield self
        finally:
            task.cancel()
            with contextlib.suppress(asyncio.CancelledError):
                await task

    async def submit(self, job: AnalysisJob) -> None:
        """Queue a plane (waits while the backlog is full)."""
        if self.enabled:
            await self._queue.put(job)

    async def drain(self) -> None:
        """Wait until every queued plane is analysed."""
        await self._queue.join()

    async def _queue_unanalysed(self) -> None:
        """Analyse what a restart cut off: analysed-plane frames still without confluence."""
        if not self.enabled:
            return
        rows = await asyncio.to_thread(self.index.frames_awaiting_analysis, self.timelapse_id, self.analysis_plane)
        by_plane: dict[tuple[int, str], list[dict[str, Any]]] = {}
        for r in rows:
            by_plane.setdefault((r["tp"], r["key"]), []).append(r)
        for (k, key), group in by_plane.items():
            source = next((r for r in group if r["kind"] == "corrected"), group[0])
            await self._queue.put(AnalysisJob(k, key, [r["id"] for r in group], None, source["path"]))

    async def _work(self) -> None:
        import tifffile

        while True:
            job = await self._queue.get()
            try:
                image = job.image
                if image is None:
                    image = await asyncio.to_thread(tifffile.imread, self.data_dir / job.path)
                assert self.measure is not None
                result = await asyncio.to_thread(self.measure, image, pixel_size_um=self.pixel_size_um)
                value = float(result.fraction)
                await asyncio.to_thread(self.index.set_confluence, job.frame_ids, value)
                self._publish(ev.FrameAnalysisEvent(
                    type="frame_analysis", timelapse_id=self.timelapse_id, tp=job.k, position=job.key,
                    frame_ids=job.frame_ids, confluence=value,
                ))
            except Exception as exc:  # noqa: BLE001 - a frame that cannot be analysed keeps its other metrics
                log.exception("confluence of time point %d, position %s", job.k, job.key)
                await self._alert("warning", "analysis", f"confluence of {job.key} at time point {job.k} failed: {exc}")
            finally:
                self._queue.task_done()


async def watch_time_point(index: Index, timelapse_id: int, watch: CultureWatch, k: int, alert: Alerting) -> list[Alert]:
    """Feed the well readings of time point ``k`` to ``watch`` and raise what it finds."""
    from daemon.culture.readings import timelapse_readings

    readings = await asyncio.to_thread(timelapse_readings, index, timelapse_id, tp=k)
    found = watch.feed(readings)
    for a in found:
        await alert("info" if a.kind in INFO_KINDS else "warning", a.kind, a.message)
    return found
