"""Live view: one capture loop shared by every viewer, and its frames as JPEG.

The loop runs only while someone watches (light harms living cells), at the highest
rate any viewer asked for, capped by the server. It exposes a frame only when the scope
is free: whenever anyone else holds it (a time point, an autofocus, a manual move) the
viewers get that job's latest frame instead, labelled with who took it, so a time point
pre-empts live view after at most one frame. JPEG encoding runs in worker threads, once
per frame and size however many viewers share it.

Streams are limited in number (the profile's ``[scope] max_live_viewers``), and a viewer
that reads nothing for ``live_stall_s`` is dropped (:meth:`LiveView.write_or_drop`), so a
browser tab left behind a sleeping laptop, or a client that connects and never reads,
neither holds memory nor keeps the camera and the LED running for nobody. When the last
viewer goes, the loop stops and switches the LED off.
"""

from __future__ import annotations

import asyncio
import contextlib
import dataclasses
import datetime as dt
import logging
import time
from collections.abc import AsyncIterator, Awaitable, Callable
from typing import TYPE_CHECKING

import cv2
import numpy as np

from daemon.profile import DEFAULT_MAX_VIEWERS, DEFAULT_STALL_S
from drivers.base import Frame, HardwareError
from drivers.clock import untimed
from drivers.options import option

if TYPE_CHECKING:
    from daemon.scope import Scope

log = logging.getLogger(__name__)

LIVE_HOLDER = "live view"
DEFAULT_FPS = 10.0
DEFAULT_MAX_FPS = 20.0
DEFAULT_QUALITY = 80
MIN_WIDTH_PX = 32
MAX_WIDTH_PX = 8192
# After a camera fault the loop waits before trying again (bounded, doubling).
RETRY_FIRST_S, RETRY_MAX_S = 0.5, 8.0
# A viewer waits this long for the next frame before looking again (and noticing a close).
NEXT_FRAME_WAIT_S = 5.0


class LiveViewFull(Exception):
    """As many live streams as the profile allows are open; the message says so and what to do."""


@dataclasses.dataclass(frozen=True, kw_only=True)
class ImageQuery:
    """How a viewer wants the latest frame: its width and JPEG quality."""

    width: int | None = option(None, doc="reduce the image to this width (default: full size)",
                               min=MIN_WIDTH_PX, max=MAX_WIDTH_PX, unit="px")
    quality: int = option(DEFAULT_QUALITY, doc="JPEG quality", min=10, max=95)


@dataclasses.dataclass(frozen=True, kw_only=True)
class StreamQuery(ImageQuery):
    """A viewer of the live stream: a frame-rate cap (the server caps it too), size, length."""

    fps: float | None = option(None, doc=f"frame-rate cap (default {DEFAULT_FPS:g}; the server caps it too)",
                               min=0.1, max=1000.0, unit="frames/s")
    frames: int | None = option(None, doc="end the stream after this many frames (default: never)",
                                min=1, max=1_000_000)
    t: str | None = option(None, doc="ignored: lets a browser open a fresh stream under a new address")


@dataclasses.dataclass(frozen=True, slots=True)
class LiveFrame:
    """A frame as viewers see it; ``source`` is 'live' or who else took it."""

    seq: int
    pixels: np.ndarray
    t_s: float
    exposure_ms: float
    bit_depth: int
    source: str
    wall_s: float = 0.0  # wall-clock time it was published (latency measurements)


def to_8bit(pixels: np.ndarray, bit_depth: int) -> np.ndarray:
    if pixels.dtype == np.uint8:
        return pixels
    shift = max(0, bit_depth - 8)
    return np.clip(pixels >> shift, 0, 255).astype(np.uint8)


def label_for(holder: str) -> str:
    return "TIME-LAPSE FRAME" if holder.startswith("time-lapse") else holder.upper()


def encode_jpeg(frame: LiveFrame, width_px: int | None, quality: int) -> bytes:
    """8-bit, optionally reduced to ``width_px`` (aspect kept), labelled when not live (worker thread)."""
    img = to_8bit(frame.pixels, frame.bit_depth)
    h, w = img.shape[:2]
    if width_px is not None and MIN_WIDTH_PX <= width_px < w:
        img = cv2.resize(img, (width_px, max(1, round(h * width_px / w))), interpolation=cv2.INTER_AREA)
    if frame.source != "live":
        img = img.copy()
        stamp = dt.datetime.fromtimestamp(frame.t_s, tz=dt.timezone.utc).strftime("%H:%M:%S UTC")
        text = f"{label_for(frame.source)}  {stamp}"
        scale = max(0.35, img.shape[1] / 1400.0)
        thick = max(1, round(scale * 2))
        (tw, th), base = cv2.getTextSize(text, cv2.FONT_HERSHEY_SIMPLEX, scale, thick)
        cv2.rectangle(img, (0, 0), (tw + 12, th + base + 10), 0, thickness=-1)
        cv2.putText(img, text, (6, th + 5), cv2.FONT_HERSHEY_SIMPLEX, scale, 255, thick, cv2.LINE_AA)
    ok, buf = cv2.imencode(".jpg", img, [cv2.IMWRITE_JPEG_QUALITY, int(quality)])
    if not ok:
        raise ValueError("JPEG encoding failed")
    return buf.tobytes()


class LiveView:
    def __init__(
        self, scope: Scope, *, max_fps: float = DEFAULT_MAX_FPS, on_error: Callable[[HardwareError], None] | None = None,
        max_viewers: int = DEFAULT_MAX_VIEWERS, stall_s: float = DEFAULT_STALL_S,
    ) -> None:
        self.scope = scope
        self._on_error = on_error
        self.max_fps = max_fps
        self.max_viewers = max_viewers
        self.stall_s = stall_s
        self.streams = 0
        self.streams_dropped = 0
        self.frame: LiveFrame | None = None
        self._seq = 0
        self._seen_captures = -1
        self._changed = asyncio.Condition()
        self._viewers: dict[int, float] = {}
        self._next_viewer = 0
        self._task: asyncio.Task[None] | None = None
        self._jpeg: dict[tuple[int, int | None, int], asyncio.Future[bytes]] = {}
        self._closed = False
        self.frames_shown = 0
        self.last_error: str | None = None
        self._rate_t: list[float] = []
        self._published_at = 0.0
        self._errors = 0

    # -- viewers -----------------------------------------------------------------------

    @property
    def closed(self) -> bool:
        return self._closed

    @property
    def viewers(self) -> int:
        return len(self._viewers)

    @property
    def fps(self) -> float:
        """Frames per second published over the last few seconds."""
        now = time.monotonic()
        recent = [t for t in self._rate_t if now - t <= 3.0]
        if len(recent) < 2:
            return 0.0
        return (len(recent) - 1) / max(recent[-1] - recent[0], 1e-6)

    def clamp_fps(self, fps: float | None) -> float:
        value = DEFAULT_FPS if fps is None else fps
        return float(min(max(value, 0.1), self.max_fps))

    @contextlib.asynccontextmanager
    async def watching(self, fps: float | None = None) -> AsyncIterator[int]:
        """Count a viewer in for as long as the block runs; the loop runs while any watch."""
        if self._closed:
            raise HardwareError("the server is shutting down")
        vid = self._next_viewer
        self._next_viewer += 1
        self._viewers[vid] = self.clamp_fps(fps)
        self._ensure_loop()
        try:
            yield vid
        finally:
            self._viewers.pop(vid, None)

    @contextlib.asynccontextmanager
    async def stream_slot(self) -> AsyncIterator[None]:
        """Hold one of the ``max_viewers`` stream places; :class:`LiveViewFull` when none is free."""
        if self.streams >= self.max_viewers:
            raise LiveViewFull(
                f"{self.streams} live streams are open, as many as this scope serves at once "
                f"([scope] max_live_viewers = {self.max_viewers}); close one, or poll frame.jpg instead"
            )
        self.streams += 1
        try:
            yield
        finally:
            self.streams -= 1

    async def write_or_drop(self, write: Callable[[], Awaitable[None]]) -> bool:
        """Run one write of a frame to a viewer; False, and the viewer is to be dropped, when
        it has not gone out within ``stall_s`` (the viewer is not reading)."""
        try:
            async with asyncio.timeout(self.stall_s):
                await write()
        except TimeoutError:
            self.streams_dropped += 1
            return False
        return True

    def _ensure_loop(self) -> None:
        if self._task is None or self._task.done():
            self._task = asyncio.create_task(self._loop(), name="live view")

    async def next_frame(self, after_seq: int, timeout_s: float) -> LiveFrame | None:
        """The first frame newer than ``after_seq``, or None after ``timeout_s``/on close."""
        async with self._changed:
            with contextlib.suppress(TimeoutError):
                async with asyncio.timeout(timeout_s):
                    await self._changed.wait_for(
                        lambda: self._closed or (self.frame is not None and self.frame.seq > after_seq)
                    )
        if self.frame is not None and self.frame.seq > after_seq:
            return self.frame
        return None

    async def latest(self, *, max_age_s: float = 1.0, timeout_s: float = 10.0) -> LiveFrame | None:
        """A recent frame: the current one if fresh, else one taken for this request."""
        current = self.frame
        if current is not None and time.monotonic() - self._published_at <= max_age_s:
            return current
        if await self._adopt_others_frame():
            return self.frame
        after, errors = (current.seq if current else 0), self._errors
        async with self.watching(self.max_fps), self._changed:
            # A camera fault ends the wait at once: the caller reports it rather than hang.
            with contextlib.suppress(TimeoutError):
                async with asyncio.timeout(timeout_s):
                    await self._changed.wait_for(
                        lambda: self._closed or self._errors > errors
                        or (self.frame is not None and self.frame.seq > after)
                    )
        if self.frame is not None and self.frame.seq > after:
            return self.frame
        return None if self._errors > errors else self.frame

    # -- the loop ----------------------------------------------------------------------

    async def _publish(self, frame: Frame, source: str) -> None:
        self._seq += 1
        self.frame = LiveFrame(
            self._seq, frame.pixels, frame.t_s, frame.exposure_ms, frame.bit_depth, source, wall_s=time.time()
        )
        self._published_at = time.monotonic()
        self._jpeg = {k: v for k, v in self._jpeg.items() if k[0] == self._seq}
        self.frames_shown += 1
        self._rate_t.append(self._published_at)
        if len(self._rate_t) > 200:
            del self._rate_t[:100]
        async with self._changed:
            self._changed.notify_all()

    async def _adopt_others_frame(self) -> bool:
        """Show the latest frame someone else took, once; True when there was a new one."""
        scope = self.scope
        if scope.last_frame is None or scope.frames_captured == self._seen_captures:
            return False
        self._seen_captures = scope.frames_captured
        await self._publish(scope.last_frame, scope.holder or "single frame")
        return True

    async def _loop(self) -> None:
        retry_s = RETRY_FIRST_S
        while self._viewers and not self._closed:
            period_s = 1.0 / max(self._viewers.values(), default=DEFAULT_FPS)
            started = time.monotonic()
            scope = self.scope
            if scope.lock.locked() and scope.holder != LIVE_HOLDER:
                await self._adopt_others_frame()
            else:
                try:
                    # Untimed: rendering a live frame costs the simulated clock nothing.
                    with untimed():
                        async with scope.claim(LIVE_HOLDER, timed=False):
                            frame = await scope.capture()
                        self._seen_captures = scope.frames_captured
                    await self._publish(frame, "live")
                    self.last_error = None
                    retry_s = RETRY_FIRST_S
                except HardwareError as exc:
                    self.last_error = str(exc)
                    log.warning("live view: %s", exc)
                    if self._on_error is not None:
                        self._on_error(exc)
                    self._errors += 1
                    async with self._changed:
                        self._changed.notify_all()
                    await asyncio.sleep(retry_s)
                    retry_s = min(retry_s * 2, RETRY_MAX_S)
                    continue
            await asyncio.sleep(max(0.0, period_s - (time.monotonic() - started)))
        await self._lamp_off()

    async def _lamp_off(self) -> None:
        """Nobody watches any more: the LED goes off (with ``off_between_frames = false`` it
        stays lit between frames), unless a job holding the scope lights it for itself."""
        if self.scope.lock.locked():
            return
        try:
            async with self.scope.claim(LIVE_HOLDER, timed=False):
                await self.scope.motion.set_lamp(False)
        except HardwareError as exc:
            log.warning("live view: could not switch the LED off: %s", exc)

    async def stream(self, query: StreamQuery) -> AsyncIterator[tuple[LiveFrame, bytes]]:
        """Frames for one viewer as JPEG, at most ``fps`` a second (the newest frame each
        time, never a backlog), until ``frames`` are sent or live view closes."""
        fps = self.clamp_fps(query.fps)
        loop = asyncio.get_running_loop()
        sent, last_seq, next_at = 0, 0, 0.0
        async with self.watching(fps):
            while query.frames is None or sent < query.frames:
                frame = await self.next_frame(last_seq, timeout_s=NEXT_FRAME_WAIT_S)
                if self.closed:
                    return
                if frame is None:
                    continue
                wait = next_at - loop.time()
                if wait > 0:
                    await asyncio.sleep(wait)
                    frame = self.frame or frame  # send the newest, not the one that woke us
                yield frame, await self.jpeg(frame, query.width, query.quality)
                sent += 1
                last_seq = frame.seq
                next_at = loop.time() + 1.0 / fps

    async def image(self, query: ImageQuery) -> tuple[LiveFrame, bytes]:
        """A recent frame as JPEG; HardwareError saying why when there is none."""
        frame = await self.latest()
        if frame is None:
            why = self.last_error or "the camera has given no frame yet"
            raise HardwareError(f"no frame to show: {why}")
        return frame, await self.jpeg(frame, query.width, query.quality)

    # -- JPEG --------------------------------------------------------------------------

    async def jpeg(self, frame: LiveFrame, width_px: int | None = None, quality: int = DEFAULT_QUALITY) -> bytes:
        """The frame as JPEG at this size, encoded once however many viewers ask."""
        if width_px is not None and width_px >= frame.pixels.shape[1]:
            width_px = None
        key = (frame.seq, width_px, quality)
        fut = self._jpeg.get(key)
        if fut is None:
            fut = asyncio.get_running_loop().create_future()
            if frame.seq == self._seq:
                self._jpeg[key] = fut
            try:
                fut.set_result(await asyncio.to_thread(encode_jpeg, frame, width_px, quality))
            except Exception as exc:
                fut.set_exception(exc)
                fut.exception()  # marked retrieved: the caller gets it raised right here
                self._jpeg.pop(key, None)
                raise
        return await asyncio.shield(fut)

    async def close(self) -> None:
        """Stop the loop after the frame in progress (the claim is released cleanly)."""
        self._closed = True
        async with self._changed:
            self._changed.notify_all()
        if self._task is not None:
            try:
                async with asyncio.timeout(10.0):
                    await self._task
            except TimeoutError:
                self._task.cancel()
                with contextlib.suppress(asyncio.CancelledError):
                    await self._task
