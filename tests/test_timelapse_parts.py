"""Pieces of the time-lapse split out of the scheduler: the bounded record of software
time, the background confluence worker and the focus policy."""

from __future__ import annotations

import asyncio
import statistics
from pathlib import Path
from types import SimpleNamespace
from typing import Any

import numpy as np
import pytest

from daemon.storage.frames import FrameStore
from daemon.storage.index import open_index
from daemon.storage.ome import FrameMeta
from daemon.timelapse.analysis import AnalysisJob, ConfluenceWorker
from daemon.timelapse.focusing import FocusPolicy
from daemon.timelapse.summary import RunningSummary


def test_running_summary_is_exact_and_bounded() -> None:
    rng = np.random.default_rng(7)
    values = rng.gamma(4.0, 0.004, size=5000)  # software times of a long run, s
    s = RunningSummary(window=100)
    for v in values:
        s.add(float(v))
    assert len(s) == s.count == 5000
    assert s.mean == pytest.approx(float(np.mean(values)), rel=1e-12)
    assert (s.minimum, s.maximum, s.last) == (float(values.min()), float(values.max()), float(values[-1]))
    # Memory stays at the window however long the run; the median follows the recent values.
    assert len(s.recent) == 100
    assert s.recent_median() == statistics.median(float(v) for v in values[-100:])
    d = s.to_dict()
    assert d["count"] == 5000 and d["window"] == 100 and d["max"] == s.maximum


def test_running_summary_before_any_value_and_bad_input() -> None:
    s = RunningSummary()
    assert (s.mean, s.last, s.recent_median()) == (None, None, None)
    assert s.to_dict()["min"] is None and s.to_dict()["max"] is None
    with pytest.raises(ValueError, match="finite"):
        s.add(float("nan"))
    assert s.count == 0
    with pytest.raises(ValueError, match="window"):
        RunningSummary(window=0)


def _frame(store: FrameStore, tl: int, tp: int, key: str, kind: str = "raw") -> int:
    meta = FrameMeta(
        timelapse_id=tl, timelapse_name="LR-0412 analysis", tp=tp, key=key, well=key.split("-")[0], site=1,
        z_index=0, kind=kind, t_s=1.77e9 + 600.0 * tp, delta_t_s=600.0 * tp, x_um=0.0, y_um=0.0, z_um=1500.0,
        exposure_ms=20.0, gain_db=0.0, bit_depth=8, pixel_size_um=0.375, focus_score=1.0, focus_found=True,
    )
    pixels = np.full((48, 64), 10 * tp + (5 if kind == "corrected" else 0), np.uint8)
    return store.save(pixels, meta).frame_id


async def test_the_worker_analyses_in_the_background_and_picks_up_after_a_restart(tmp_path: Path) -> None:
    index = open_index(tmp_path)
    store = FrameStore(tmp_path, index)
    tl = index.create_timelapse(
        name="LR-0412 analysis", plan={}, profile_path="hw_profiles/sim.toml", profile_name="sim", created_s=1.77e9,
        t0_s=1.77e9, interval_s=600.0, count=3, n_positions=2, reserve_mb=0.0,
    )
    # Left unanalysed by a restart: B3-1 at time point 0 (raw and corrected), C4-1 at 1.
    cut_off = [_frame(store, tl, 0, "B3-1"), _frame(store, tl, 0, "B3-1", "corrected"), _frame(store, tl, 1, "C4-1")]
    events: list[dict[str, Any]] = []
    alerts: list[tuple[str, str, str]] = []
    seen_means: list[float] = []

    def measure(image: np.ndarray, *, pixel_size_um: float) -> Any:
        assert pixel_size_um == 0.375
        if int(image.mean()) == 99:
            raise ValueError("segmentation found no background")
        seen_means.append(float(image.mean()))
        return SimpleNamespace(fraction=float(image.mean()) / 100.0)

    async def alert(level: str, kind: str, message: str) -> None:
        alerts.append((level, kind, message))

    worker = ConfluenceWorker(
        index, tl, tmp_path, pixel_size_um=0.375, analysis_plane=0, publish=events.append, alert=alert,
        measure=measure, backlog=2,
    )
    async with worker.running():
        await worker.drain()
        # A new plane handed over in memory, and one that cannot be analysed.
        new = _frame(store, tl, 2, "B3-1")
        await worker.submit(AnalysisJob(2, "B3-1", [new], np.full((48, 64), 30, np.uint8)))
        bad = _frame(store, tl, 2, "C4-1")
        await worker.submit(AnalysisJob(2, "C4-1", [bad], np.full((48, 64), 99, np.uint8)))
        await worker.drain()
    conf = {f["id"]: f["confluence"] for f in index.frames(tl)}
    # The corrected frame is the one read back, and its figure goes to both kinds of the plane.
    assert conf[cut_off[0]] == conf[cut_off[1]] == pytest.approx(0.05)
    assert conf[cut_off[2]] == pytest.approx(0.10) and conf[new] == pytest.approx(0.30)
    assert conf[bad] is None  # keeps its other metrics; said so in an alert
    assert alerts == [("warning", "analysis", "confluence of C4-1 at time point 2 failed: segmentation found no background")]
    assert [e["type"] for e in events] == ["frame_analysis"] * 3
    assert sorted(e["tp"] for e in events) == [0, 1, 2]
    index.close()


async def test_without_the_culture_analysis_nothing_is_queued(tmp_path: Path) -> None:
    index = open_index(tmp_path)

    async def alert(*_a: str) -> None:
        raise AssertionError("no alert expected")

    worker = ConfluenceWorker(index, 1, tmp_path, pixel_size_um=0.375, analysis_plane=0, publish=lambda e: None,
                              alert=alert, measure=None)
    async with worker.running():
        await asyncio.wait_for(worker.submit(AnalysisJob(0, "B3-1", [1], None, "nowhere.tif")), timeout=1.0)
        await asyncio.wait_for(worker.drain(), timeout=1.0)
    assert not worker.enabled
    index.close()


class _Tracker:
    """Stands in for the focus tracker: records the searches asked of it."""

    def __init__(self) -> None:
        self.keys: dict[str, Any] = {}
        self.asked: list[str] = []
        self.metrics: list[str] = []

    async def focus(self, scope: Any, key: str, x_um: float, y_um: float, *, on_point: Any, metric: str) -> Any:
        self.asked.append(key)
        self.metrics.append(metric)
        found = key != "H12-1"
        return SimpleNamespace(found=found, z_um=1500.0 + len(self.asked), message="")

    def to_dict(self) -> dict[str, Any]:
        return {"asked": list(self.asked)}


class _Scope:
    async def position(self) -> Any:
        return SimpleNamespace(z_um=1487.5)


def _ignore(_point: object) -> None:
    pass


def _pos(key: str) -> Any:
    return SimpleNamespace(key=key, x_um=0.0, y_um=0.0)


async def test_focus_policies() -> None:
    scope = _Scope()
    off = FocusPolicy("off", _Tracker())  # type: ignore[arg-type]
    assert await off.focus(scope, 0, _pos("B3-1"), print) == (1487.5, None)  # type: ignore[arg-type]
    assert off.resume_state()["first_focus"]["fixed_z_um"] == 1487.5

    tracker = _Tracker()
    tracker.keys = {"B3-1": SimpleNamespace(planes=[1500.0])}  # something is known: no cold search
    first = FocusPolicy("first", tracker, metric="brenner")  # type: ignore[arg-type]
    z0, r0 = await first.focus(scope, 0, _pos("B3-1"), _ignore)  # type: ignore[arg-type]
    _, bad = await first.focus(scope, 0, _pos("H12-1"), _ignore)  # type: ignore[arg-type]
    assert r0 is not None and r0.found and bad is not None and not bad.found
    # Later time points: the plane found at the first is reused; where nothing was found, search again.
    assert await first.focus(scope, 1, _pos("B3-1"), print) == (z0, None)  # type: ignore[arg-type]
    _, again = await first.focus(scope, 1, _pos("H12-1"), _ignore)  # type: ignore[arg-type]
    assert again is not None and tracker.asked == ["B3-1", "H12-1", "H12-1"]
    assert tracker.metrics == ["brenner"] * 3  # the plan's metric reaches every search
    assert first.resume_state()["first_focus"]["planes"] == {"B3-1": z0}
