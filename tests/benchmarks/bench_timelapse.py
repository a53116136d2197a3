"""Time-lapse throughput.

1. Software time per position at 1080p on a time point's critical path: illumination
   correction, focus score, OME-TIFF encode + write + fsync + rename, index row
   (target <= 30 ms, docs/TARGETS.md). Measured through the scheduler's own
   :class:`FrameProcessor` on a temporary data folder.
2. Confluence of the analysed plane at 1080p: reported, not targeted; it runs in the
   background while the scope moves to the next position.
3. A 96-well, 2-site time point on the simulated scope at a high clock speed: wall time,
   and the per-position overhead once the simulator's own rendering and the motion
   (G-code link plus simulated travel) are taken out: focus scoring, exposure waits,
   saving, index, events.
"""

from __future__ import annotations

import asyncio
import statistics
import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np

FRAME_1080P = (1080, 1920)
POSITIONS_1080P = 30
TARGET_MS = 30.0
# Fast enough that motion and exposure cost little wall time, slow enough that the minutes of
# real computing a full plate takes are not weeks of simulated culture growth and drift.
SIM_SPEED = 100.0
# Frame size for the 96-well run: the simulator renders every frame by Fourier optics, which
# would dominate at full size; below 640 x 480 too few cells are in view for focus to hold.
SIM_FRAME = (640, 480)


def _synthetic(shape: tuple[int, int], seed: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """A raw frame with shading, and the dark and flat frames that describe it."""
    rng = np.random.default_rng(seed)
    h, w = shape
    yy, xx = np.mgrid[0:h, 0:w]
    shading = 1.0 - 0.35 * (((xx - w * 0.55) / w) ** 2 + ((yy - h * 0.45) / h) ** 2) * 2.0
    dark = 8.0 + rng.normal(0.0, 1.0, shape)
    flat = dark + 170.0 * shading
    texture = 1.0 + 0.15 * np.sin(xx / 7.0) * np.cos(yy / 11.0) + rng.normal(0.0, 0.03, shape)
    raw = dark + 150.0 * shading * texture
    to8 = lambda a: np.clip(np.rint(a), 0, 255).astype(np.uint8)  # noqa: E731
    return to8(raw), to8(dark), to8(flat)


def bench_software_per_position() -> list[dict[str, Any]]:
    from daemon.illumination.correction import Corrector
    from daemon.storage.frames import FrameStore
    from daemon.storage.index import open_index
    from daemon.timelapse.plan import PlannedPosition
    from daemon.timelapse.processing import FrameProcessor, PositionFrames
    from drivers.base import Frame, Position

    raw, dark, flat = _synthetic(FRAME_1080P, 1)
    corrector = Corrector.from_frames(dark, flat)
    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        data_dir = Path(tmp)
        index = open_index(data_dir)
        for kinds in (("corrected",), ("raw", "corrected")):
            tl = index.create_timelapse(
                name=f"LR-0412 bench {'+'.join(kinds)}", plan={}, profile_path="sim.toml", profile_name="sim",
                created_s=0.0, t0_s=0.0, interval_s=600.0, count=1, n_positions=POSITIONS_1080P, reserve_mb=0.0,
            )
            proc = FrameProcessor(
                FrameStore(data_dir, index), timelapse_id=tl, timelapse_name="bench", t0_s=0.0,
                pixel_size_um=0.375, objective="10x/0.25 Ph1", kinds=kinds, corrector=corrector, analysis_plane=0,
            )
            times = []
            for i in range(POSITIONS_1080P):
                pos = PlannedPosition(f"B{2 + i // 12}-{1 + i % 12}", f"B{2 + i // 12}", 1 + i % 12, 1000.0 * i, 500.0)
                frame = Frame(raw, float(i), 20.0, 0.0, 8)
                data = PositionFrames(0, pos, [(0, frame, Position(pos.x_um, pos.y_um, 1500.0))], True, set())
                t = time.perf_counter()
                proc.save_position(data)
                times.append(time.perf_counter() - t)
            med_ms = statistics.median(times) * 1000.0
            rows.append({
                "name": f"software per position 1080p ({'+'.join(kinds)}), median of {POSITIONS_1080P}",
                "value": med_ms, "unit": "ms", "target": f"<= {TARGET_MS:g}",
                "ok": med_ms <= TARGET_MS if kinds == ("corrected",) else None,
            })
        index.close()
    from daemon.culture.confluence import confluence

    times = []
    for _ in range(5):
        t = time.perf_counter()
        confluence(raw, pixel_size_um=0.375)
        times.append(time.perf_counter() - t)
    rows.append({
        "name": "confluence 1080p (background, overlaps motion), median of 5",
        "value": statistics.median(times) * 1000.0, "unit": "ms", "target": "-", "ok": None,
    })
    return rows


async def _sim_time_point() -> list[dict[str, Any]]:
    from daemon.storage.index import open_index
    from daemon.timelapse.plan import Plan, field_of_view_um, plan_positions
    from daemon.timelapse.scheduler import Scheduler
    from daemon.vessels.stage_map import sim_stage_map
    from tests.helpers import sim_profile, sim_scope

    profile = sim_profile(*SIM_FRAME)
    plan = Plan(
        name="LR-0412 full plate", vessel="96-well", wells=[f"{r}{c}" for r in "ABCDEFGH" for c in range(1, 13)],
        sites_per_well=2, interval_s=12 * 3600.0, count=2, autofocus="track", z_stack=None, exposure_ms=None,
        gain_db=None, correction=False, save="raw",
    )
    positions = plan_positions(plan, plan.get_vessel(), sim_stage_map(profile), field_of_view_um(profile))
    with tempfile.TemporaryDirectory() as tmp:
        data_dir = Path(tmp)
        index = open_index(data_dir)
        scope = sim_scope(profile, speed=SIM_SPEED, data_dir=data_dir)
        world = scope.truth.world  # type: ignore[attr-defined]
        render_s = [0.0]
        original = world.render

        def timed_render(*a: Any, **k: Any) -> np.ndarray:
            t = time.perf_counter()
            try:
                return original(*a, **k)
            finally:
                render_s[0] += time.perf_counter() - t

        world.render = timed_render  # type: ignore[method-assign]
        motion_s = [0.0]
        original_move = scope.move_to

        async def timed_move(*a: Any, **k: Any) -> Any:
            t = time.perf_counter()
            try:
                return await original_move(*a, **k)
            finally:
                motion_s[0] += time.perf_counter() - t

        scope.move_to = timed_move  # type: ignore[method-assign]
        walls: dict[int, float] = {}
        renders: dict[int, float] = {}
        moves: dict[int, float] = {}
        frames: dict[int, int] = {}
        started: dict[int, float] = {}

        def on_event(e: dict[str, Any]) -> None:
            if e["type"] == "time_point" and e["status"] == "running":
                started[e["tp"]] = time.perf_counter()
                renders[e["tp"]] = render_s[0]
                moves[e["tp"]] = motion_s[0]
                frames[e["tp"]] = scope.frames_captured
            elif e["type"] == "time_point" and e["status"] in ("done", "partial", "failed"):
                walls[e["tp"]] = time.perf_counter() - started[e["tp"]]
                renders[e["tp"]] = render_s[0] - renders[e["tp"]]
                moves[e["tp"]] = motion_s[0] - moves[e["tp"]]
                frames[e["tp"]] = scope.frames_captured - frames[e["tp"]]

        async with scope:
            scheduler = Scheduler.create(scope, plan, data_dir, index, positions, reserve_mb=0.0, on_event=on_event)
            # Time point 1 is 12 h later: jump there rather than wait.
            task = asyncio.create_task(scheduler.run())
            while 0 not in walls:
                await asyncio.sleep(0.05)
            wait_s = scheduler.t0_s + plan.interval_s - scope.clock.now()
            if wait_s > 0:
                scope.clock.advance(wait_s)  # type: ignore[attr-defined]
            await task
        index.close()
    n = len(positions)
    rows = [{
        "name": f"scheduler save per position (correction off, metrics, write, index), {SIM_FRAME[0]}x{SIM_FRAME[1]}, median",
        "value": scheduler.software_s.recent_median() * 1000.0, "unit": "ms", "target": "-", "ok": None,
    }]
    for k, label in ((0, "first (cold focus)"), (1, "second (tracking)")):
        rows.append({"name": f"96-well x 2 sites, {label}, {SIM_FRAME[0]}x{SIM_FRAME[1]}: wall", "value": walls[k],
                     "unit": "s", "target": "-", "ok": None})
        rows.append({"name": f"  frames taken, {label}", "value": frames[k], "unit": "frames", "target": "-", "ok": None})
        rows.append({"name": f"  rendering by the simulator per position, {label}",
                     "value": renders[k] / n * 1000.0, "unit": "ms", "target": "-", "ok": None})
        rows.append({"name": f"  motion (G-code link and simulated travel) per position, {label}",
                     "value": moves[k] / n * 1000.0, "unit": "ms", "target": "-", "ok": None})
        rows.append({"name": f"  per-position overhead (wall - rendering - motion), {label}",
                     "value": (walls[k] - renders[k] - moves[k]) / n * 1000.0, "unit": "ms", "target": "-", "ok": None})
    return rows


def main() -> list[dict[str, Any]]:
    return bench_software_per_position() + asyncio.run(_sim_time_point())
