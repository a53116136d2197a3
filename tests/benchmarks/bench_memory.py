"""Resident memory of the daemon serving a viewer while a time-lapse runs.

The product's targets (docs/TARGETS.md): at most 150 MB resident on the hardware path and
at most 200 MB on the simulated scope, serving plus time-lapse.
The daemon runs as its own process; a time-lapse of three wells is started over the API,
one client watches the MJPEG stream at a reduced size, and the resident set size (psutil)
is sampled twice a second.

Two runs, each checked against its own budget. The first runs the daemon as it does on
real hardware: the G-code driver on a serial line (a pseudo-terminal, with the controller
emulator in this benchmark's process, as a USB board would be outside it) and the replay
camera playing 1280x960 frames (the shipped profile's frame size); the stage map a
technician would teach is written from the simulated plate's. The second runs the shipped
simulated profile, whose physical simulation (Fourier optics on every 1280x960 frame)
lives in the daemon's process.
"""

from __future__ import annotations

import asyncio
import tempfile
import time
from pathlib import Path

import aiohttp
import psutil

from daemon.profile import PROFILE_DIR, load_profile
from daemon.vessels.stage_map import save_stage_map, sim_stage_map
from drivers.base import Position
from drivers.clock import WallClock
from drivers.sim.controller import GcodeEmulator
from tests.benchmarks.bench_stream import replay_profile, write_folder
from tests.web_support import Daemon

MEASURE_S = 40.0
SAMPLE_S = 0.5
HARDWARE_TARGET_MB = 150.0
SIM_TARGET_MB = 200.0
PLAN = {
    "name": "KVL-7 memory check LR-0412",
    "vessel": "96-well",
    "wells": ["B2", "B3", "C3"],
    "interval_s": 60,
    "count": 1000,
    "autofocus": "track",
    "correction": False,
    "save": "raw",
}


async def measure(daemon: Daemon, plan: dict) -> dict[str, float]:
    proc = psutil.Process(daemon.proc.pid)
    auth = {"Authorization": f"Bearer {daemon.token}"}
    base = daemon.url.rstrip("/")
    samples: list[float] = []
    async with aiohttp.ClientSession(timeout=aiohttp.ClientTimeout(total=MEASURE_S + 60)) as session:
        idle_mb = proc.memory_info().rss / 2**20
        await session.post(f"{base}/api/v1/stage/move", headers=auth, json={"well": "B3", "z_um": 1490})
        async with session.post(f"{base}/api/v1/focus/auto", headers=auth, json={}) as r:
            assert r.status == 200, await r.text()
        async with session.post(f"{base}/api/v1/timelapses", headers=auth, json=plan) as r:
            assert r.status == 201, await r.text()
            tl = (await r.json())["id"]

        async def watch() -> None:
            async with session.get(f"{base}/api/v1/stream.mjpeg?fps=5&width=640", headers=auth) as r:
                async for _ in r.content.iter_any():
                    pass

        viewer = asyncio.create_task(watch())
        end = time.monotonic() + MEASURE_S
        while time.monotonic() < end:
            samples.append(proc.memory_info().rss / 2**20)
            await asyncio.sleep(SAMPLE_S)
        viewer.cancel()
        async with session.get(f"{base}/api/v1/timelapses/{tl}", headers=auth) as r:
            d = await r.json()
    return {"idle_mb": idle_mb, "peak_mb": max(samples), "last_mb": samples[-1],
            "frames": d["frames"], "time_points": d["time_points"]["done"] + d["time_points"]["partial"]}


def run(folder: Path, profile: Path, plan: dict, extra: tuple[str, ...]) -> dict[str, float]:
    folder.mkdir(exist_ok=True)
    daemon = Daemon(folder, folder / "data", profile=profile, extra=extra)
    try:
        return asyncio.run(measure(daemon, plan))
    finally:
        daemon.stop()


def hardware_profile(folder: Path, images: Path, port: str) -> Path:
    """The replay profile with the stage on the G-code driver at ``port`` instead of the simulated stage."""
    path = replay_profile(folder, images, 1280, 960)
    text = path.read_text().replace('[stage]\ndriver = "sim"', f'[stage]\ndriver = "gcode"\nport = "{port}"')
    assert f'port = "{port}"' in text
    # No simulated driver is left, so the [sim] sections (the rest of the file) must go too.
    text = text.partition("\n[sim]")[0] + "\n"
    path.write_text(text)
    return path


def main() -> list[dict]:
    sim = load_profile("sim")
    assert sim.sim is not None
    plate = sim.sim.plate
    emulator = GcodeEmulator(
        clock=WallClock(), stage=sim.stage, focus=sim.focus, motion=sim.sim.motion,
        start=Position(plate.a1_x_um, plate.a1_y_um, 1440.0),
    )
    port = emulator.start()
    try:
        with tempfile.TemporaryDirectory(prefix="phasewatch-bench-memory-") as tmp:
            folder = Path(tmp)
            images = folder / "replay"
            images.mkdir()
            # The replay camera keeps every decoded image of its folder; eight stand for the few
            # buffers a real camera driver holds.
            write_folder(images, 1280, 960, count=8)
            plan = {**PLAN, "autofocus": "off", "interval_s": 10}  # replay frames hold no focus to find
            hw_path = hardware_profile(folder, images, port)
            # The plate sits where the simulated plate does: teach the same wells-to-stage map.
            save_stage_map(folder / "hardware-run" / "data", load_profile(hw_path), sim_stage_map(sim))
            real = run(folder / "hardware-run", hw_path, plan, ("--max-fps", "20"))
            simulated = run(folder / "sim-run", PROFILE_DIR / "sim.toml", PLAN, ("--sim-speed", "20"))
    finally:
        emulator.stop()
    return [
        {"name": "resident, serving + time-lapse, G-code + replay camera (peak)", "value": round(real["peak_mb"], 1),
         "unit": "MB", "target": f"<= {HARDWARE_TARGET_MB:g}", "ok": real["peak_mb"] <= HARDWARE_TARGET_MB},
        {"name": "  after start-up, idle", "value": round(real["idle_mb"], 1), "unit": "MB", "target": "-", "ok": None},
        {"name": "  frames saved during the run", "value": real["frames"], "unit": "", "target": "> 0",
         "ok": real["frames"] > 0},
        {"name": "resident, same on the simulated scope (peak)", "value": round(simulated["peak_mb"], 1),
         "unit": "MB", "target": f"<= {SIM_TARGET_MB:g}", "ok": simulated["peak_mb"] <= SIM_TARGET_MB},
        {"name": "  after start-up, idle", "value": round(simulated["idle_mb"], 1), "unit": "MB", "target": "-", "ok": None},
        {"name": "  frames saved during the run", "value": simulated["frames"], "unit": "", "target": "> 0",
         "ok": simulated["frames"] > 0},
    ]


if __name__ == "__main__":
    for row in main():
        print(row)
