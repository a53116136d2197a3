"""Live stream from a replay camera: 1280x720 to 4 concurrent MJPEG clients.

The product's target (docs/TARGETS.md): at least 15 fps at 1280x720 to 4 browsers from a
replay camera, with the daemon using at most one core. The daemon runs as its own process
(``phasewatch serve``, replay camera at 30 fps, simulated stage); four clients in this process
read ``/api/v1/stream.mjpeg`` at full size for a fixed time. Reported: the slowest client's
frame rate, the daemon's CPU (psutil: user + system time of the process over wall time), and
the latency from the daemon publishing a frame to a client holding all of its bytes.
"""

from __future__ import annotations

import asyncio
import statistics
import tempfile
import time
from pathlib import Path

import aiohttp
import cv2
import numpy as np
import psutil

from daemon.profile import PROFILE_DIR
from tests.web_support import Daemon

WIDTH_PX, HEIGHT_PX = 1280, 720
FRAMES_IN_FOLDER = 30
CLIENTS = 4
CLIENT_FPS = 20.0  # each client asks for 20; the target is 15
MEASURE_S = 10.0
WARMUP_S = 2.0
BOUNDARY = b"--phasewatchframe"


def write_folder(folder: Path, width_px: int = WIDTH_PX, height_px: int = HEIGHT_PX, count: int = FRAMES_IN_FOLDER) -> None:
    """A slowly panning textured field, like cells drifting past: 8-bit PNGs."""
    rng = np.random.default_rng(412)
    base = cv2.GaussianBlur(rng.normal(128, 40, (height_px, width_px + 8 * count)).astype(np.float32), (0, 0), 2.5)
    for i in range(count):
        frame = base[:, 8 * i: 8 * i + width_px] + rng.normal(0, 3, (height_px, width_px)).astype(np.float32)
        cv2.imwrite(str(folder / f"lr0412_b03_{i:03d}.png"), np.clip(frame, 0, 255).astype(np.uint8))


def replay_profile(folder: Path, images: Path, width_px: int = WIDTH_PX, height_px: int = HEIGHT_PX) -> Path:
    """hw_profiles/sim.toml with the replay camera in place of the simulated one, LED always on."""
    text = (PROFILE_DIR / "sim.toml").read_text()
    head, _, rest = text.partition("[camera]")
    _, _, after = rest.partition("[optics]")
    camera = (
        f'[camera]\ndriver = "replay"\nreplay_dir = "{images}"\nreplay_fps = 30.0\n'
        f"width_px = {width_px}\nheight_px = {height_px}\nbit_depth = 8\nexposure_ms = 20.0\nflush_frames = 0\n\n"
    )
    text = head + camera + "[optics]" + after
    text = text.replace('control = "controller"', 'control = "always_on"')
    path = folder / f"replay-{width_px}x{height_px}.toml"
    path.write_text(text)
    return path


async def client(
    session: aiohttp.ClientSession, url: str, token: str, until: float, latencies: list[float],
    shapes: list[tuple[int, ...]] | None = None,
) -> int:
    """Read the stream until ``until`` (monotonic); returns the frames received in full."""
    frames = 0
    buf = b""
    async with session.get(url, headers={"Authorization": f"Bearer {token}"}) as r:
        async for chunk in r.content.iter_any():
            buf += chunk
            while True:
                start = buf.find(BOUNDARY)
                head_end = buf.find(b"\r\n\r\n", start)
                if start < 0 or head_end < 0:
                    break
                headers = dict(
                    line.split(": ", 1) for line in buf[start + len(BOUNDARY):head_end].decode("latin-1").strip().split("\r\n")
                )
                length = int(headers["Content-Length"])
                if len(buf) < head_end + 4 + length:
                    break
                received = time.time()
                latencies.append(received - float(headers["X-Frame-Wall"]))
                if shapes is not None and not shapes:
                    jpeg = np.frombuffer(buf[head_end + 4:head_end + 4 + length], np.uint8)
                    shapes.append(cv2.imdecode(jpeg, cv2.IMREAD_GRAYSCALE).shape)
                frames += 1
                buf = buf[head_end + 4 + length:]
            if time.monotonic() >= until:
                break
    return frames


async def measure(daemon: Daemon) -> dict[str, float]:
    url = daemon.url + f"api/v1/stream.mjpeg?fps={CLIENT_FPS:g}"
    proc = psutil.Process(daemon.proc.pid)
    async with aiohttp.ClientSession(timeout=aiohttp.ClientTimeout(total=MEASURE_S + 60)) as session:
        shapes: list[tuple[int, ...]] = []
        await client(session, url, daemon.token, time.monotonic() + WARMUP_S, [], shapes)
        latencies: list[float] = []
        cpu0, wall0 = proc.cpu_times(), time.monotonic()
        until = wall0 + MEASURE_S
        counts = await asyncio.gather(*(client(session, url, daemon.token, until, latencies) for _ in range(CLIENTS)))
        wall = time.monotonic() - wall0
        cpu1 = proc.cpu_times()
    cpu_s = (cpu1.user - cpu0.user) + (cpu1.system - cpu0.system)
    lat = sorted(latencies)
    return {
        "fps_min": min(counts) / wall,
        "fps_mean": statistics.fmean(counts) / wall,
        "cpu_cores": cpu_s / wall,
        "latency_p50_ms": 1000 * lat[len(lat) // 2],
        "latency_p95_ms": 1000 * lat[int(len(lat) * 0.95)],
        "rss_mb": proc.memory_info().rss / 2**20,
        "shape": shapes[0],
    }


def main() -> list[dict]:
    with tempfile.TemporaryDirectory(prefix="phasewatch-bench-stream-") as tmp:
        folder = Path(tmp)
        images = folder / "replay"
        images.mkdir()
        write_folder(images)
        profile = replay_profile(folder, images)
        daemon = Daemon(folder, folder / "data", profile=profile, extra=("--max-fps", "30"))
        try:
            m = asyncio.run(measure(daemon))
        finally:
            code = daemon.stop()
    return [
        {"name": "frame size received (OpenCV decode)", "value": f"{m['shape'][1]}x{m['shape'][0]}", "unit": "px",
         "target": f"{WIDTH_PX}x{HEIGHT_PX}", "ok": m["shape"] == (HEIGHT_PX, WIDTH_PX)},
        {"name": f"slowest of {CLIENTS} clients, 1280x720", "value": round(m["fps_min"], 2), "unit": "fps",
         "target": ">= 15", "ok": m["fps_min"] >= 15.0},
        {"name": "mean per client", "value": round(m["fps_mean"], 2), "unit": "fps", "target": "-", "ok": None},
        {"name": "daemon CPU while streaming", "value": round(m["cpu_cores"], 3), "unit": "cores",
         "target": "<= 1", "ok": m["cpu_cores"] <= 1.0},
        {"name": "latency publish->client p50", "value": round(m["latency_p50_ms"], 1), "unit": "ms", "target": "-", "ok": None},
        {"name": "latency publish->client p95", "value": round(m["latency_p95_ms"], 1), "unit": "ms", "target": "-", "ok": None},
        {"name": "daemon resident memory", "value": round(m["rss_mb"], 1), "unit": "MB", "target": "-", "ok": None},
        {"name": "daemon exit code after SIGTERM", "value": code, "unit": "", "target": "0", "ok": code == 0},
    ]


if __name__ == "__main__":
    for row in main():
        print(row)
