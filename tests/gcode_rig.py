"""Shared set-up for the G-code emulator and driver tests: the Larkspur Row bench scope's
stage and focus sections, a raw serial client, and bounded polling."""

from __future__ import annotations

import dataclasses
import time
from typing import Callable

import serial

from drivers.sections import FocusSection, IlluminationSection, StageSection
from drivers.sim.config import SimMotion

STAGE = StageSection(
    driver="sim",
    x_min_um=0.0,
    x_max_um=127760.0,
    y_min_um=0.0,
    y_max_um=85480.0,
    xy_speed_um_s=8000.0,
    xy_accel_um_s2=40000.0,
    settle_ms=40.0,
    reply_timeout_s=0.5,
    move_timeout_s=60.0,
)
FOCUS = FocusSection(
    z_min_um=0.0,
    z_safe_max_um=3000.0,
    z_speed_um_s=1000.0,
    z_accel_um_s2=5000.0,
    backlash_um=10.0,
    settle_ms=20.0,
)
LAMP = IlluminationSection(control="controller", channel=0, level=1.0)
# Play on the focus only, no stopping scatter and no ringing: these tests check exact
# kinematics; tests/test_sim_mechanics.py checks the imperfections.
MOTION = SimMotion(
    x_backlash_um=0.0, y_backlash_um=0.0, z_backlash_um=6.0, repeatability_um=0.0, ring_amplitude_um=0.0,
    travel_margin_um=2000.0, z_crash_margin_um=200.0,
)


def stage(**changes: object) -> StageSection:
    return dataclasses.replace(STAGE, **changes)


def wait_until(condition: Callable[[], bool], timeout_s: float = 3.0) -> bool:
    """Poll ``condition`` (bounded in time); True once it holds."""
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        if condition():
            return True
        time.sleep(0.002)
    return condition()


class RawClient:
    """A bare pyserial client: sends lines, reads what comes back (emulator tests)."""

    def __init__(self, path: str) -> None:
        self.port = serial.Serial(path, 115200, timeout=0.02)

    def close(self) -> None:
        self.port.close()

    def send(self, line: str) -> None:
        self.port.write(f"{line}\n".encode("ascii"))

    def send_bytes(self, data: bytes) -> None:
        self.port.write(data)

    def read_line(self, timeout_s: float = 2.0, *, keep_busy: bool = False) -> bytes | None:
        """The next line; keep-alive (busy) lines are passed over unless ``keep_busy``."""
        deadline = time.monotonic() + timeout_s
        buffer = b""
        while time.monotonic() < deadline:
            buffer += self.port.read(1)
            if buffer.endswith(b"\n"):
                line = buffer.rstrip(b"\r\n")
                if not keep_busy and line.startswith(b"echo:busy"):
                    buffer = b""
                    continue
                return line
        return None

    def ask(self, line: str, timeout_s: float = 2.0) -> list[str]:
        """Send ``line``; return the reply lines through the first ok or refusal of either dialect."""
        self.send(line)
        reply: list[str] = []
        while True:
            raw = self.read_line(timeout_s)
            if raw is None:
                raise TimeoutError(f"no complete reply to {line!r}; got {reply!r}")
            text = raw.decode("ascii", errors="replace")
            reply.append(text)
            if text == "ok" or text.startswith(("ok N", "Error:", "!!", "error:", "ALARM:")):
                return reply

    def status(self, timeout_s: float = 2.0) -> str:
        """grbl's real-time status report: ``?`` without a newline, one line back."""
        self.send_bytes(b"?")
        raw = self.read_line(timeout_s)
        if raw is None:
            raise TimeoutError("no status report")
        return raw.decode("ascii", errors="replace")

    def silent_for(self, seconds: float) -> bool:
        """True if not a single byte arrives for ``seconds``."""
        deadline = time.monotonic() + seconds
        while time.monotonic() < deadline:
            if self.port.read(1):
                return False
        return True
