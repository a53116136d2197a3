"""The simulated clock keeps its speed while viewers watch.

``phasewatch serve`` runs as its own process on the simulated scope (640 x 480 frames,
rendered by the simulator for every live frame) at clock speeds 1, 60 and 1000, with 0, 1
and 4 MJPEG clients in this process reading ``/api/v1/stream.mjpeg`` continuously. For
each case the simulated clock (``clock_s`` of ``/api/v1/status``) is read before and after
a fixed real time; reported: achieved speed / asked speed (target >= 0.9: rendering live
frames must not stop the clock), the slowest client's frame rate, and the daemon's CPU
(psutil: user + system time of the process over wall time). Every run is bounded in time.
"""

from __future__ import annotations

import asyncio
import tempfile
import time
from pathlib import Path
from typing import Any

import aiohttp
import psutil

from tests.benchmarks.bench_stream import client
from tests.web_support import Daemon, small_profile

SPEEDS = (1.0, 60.0, 1000.0)
VIEWERS = (0, 1, 4)
FRAME_PX = (640, 480)
MEASURE_S = 4.0
WARMUP_S = 1.0
TARGET_RATIO = 0.9


def _clock_s(daemon: Daemon) -> tuple[float, float]:
    """(real monotonic time at the middle of the request, the daemon's simulated time)."""
    before = time.monotonic()
    code, body = daemon.call("GET", "/api/v1/status")
    after = time.monotonic()
    if code != 200:
        raise RuntimeError(f"status answered {code}: {body}")
    return (before + after) / 2.0, float(body["clock_s"])


async def _case(daemon: Daemon, viewers: int) -> dict[str, float]:
    url = daemon.url + "api/v1/stream.mjpeg?fps=20"
    proc = psutil.Process(daemon.proc.pid)
    async with aiohttp.ClientSession(timeout=aiohttp.ClientTimeout(total=MEASURE_S + 60)) as session:
        warm = [asyncio.create_task(client(session, url, daemon.token, time.monotonic() + WARMUP_S, []))
                for _ in range(viewers)]
        await asyncio.gather(*warm)
        until = time.monotonic() + MEASURE_S
        readers = [asyncio.create_task(client(session, url, daemon.token, until, [])) for _ in range(viewers)]
        cpu0 = proc.cpu_times()
        real0, sim0 = await asyncio.to_thread(_clock_s, daemon)
        await asyncio.sleep(max(0.0, until - time.monotonic()))
        real1, sim1 = await asyncio.to_thread(_clock_s, daemon)
        cpu1 = proc.cpu_times()
        counts = await asyncio.gather(*readers)
    wall = real1 - real0
    return {
        "ratio": (sim1 - sim0) / wall,
        "fps_min": min(counts) / wall if counts else 0.0,
        "cpu": ((cpu1.user - cpu0.user) + (cpu1.system - cpu0.system)) / wall,
    }


def main() -> list[dict[str, Any]]:
    rows: list[dict[str, Any]] = []
    for speed in SPEEDS:
        with tempfile.TemporaryDirectory(prefix="phasewatch-bench-clock-") as tmp:
            folder = Path(tmp)
            profile = small_profile(folder, *FRAME_PX)
            daemon = Daemon(folder, folder / "data", profile=profile, extra=("--sim-speed", f"{speed:g}"))
            try:
                for viewers in VIEWERS:
                    m = asyncio.run(_case(daemon, viewers))
                    ratio = m["ratio"] / speed
                    label = f"speed {speed:g}, {viewers} viewer{'s' if viewers != 1 else ''}"
                    rows.append({"name": f"{label}: simulated / real time / speed", "value": round(ratio, 3),
                                 "unit": "ratio", "target": f">= {TARGET_RATIO}", "ok": ratio >= TARGET_RATIO})
                    if viewers:
                        rows.append({"name": f"{label}: slowest viewer", "value": round(m["fps_min"], 2),
                                     "unit": "fps", "target": "-", "ok": None})
                    rows.append({"name": f"{label}: daemon CPU", "value": round(m["cpu"], 3),
                                 "unit": "cores", "target": "-", "ok": None})
            finally:
                daemon.stop()
    return rows
