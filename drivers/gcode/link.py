"""The serial link to a controller board: the port, a reader thread, reconnecting.

Serial I/O stays off the event loop. One reader thread per open port does the blocking
reads and hands complete lines to the event loop through an ``asyncio.Queue``
(``loop.call_soon_threadsafe``). A thread rather than ``run_in_executor`` per read,
because the board also speaks unasked (the banner after a reset, a link that drops) and
a dedicated reader sees that at once, with exactly one blocking read in flight and no
executor worker tied up. Writes are short and go through ``asyncio.to_thread``.

Every failure is a one-line :class:`MotionError` saying what to check.
"""

from __future__ import annotations

import asyncio
import dataclasses
import errno
import os
import threading
from collections.abc import Awaitable, Callable, Iterator

import serial

from drivers.base import MotionError


class LinkLost(MotionError):
    """The link dropped (cable pulled, board gone); ``reason`` says how."""

    def __init__(self, reason: str) -> None:
        super().__init__(reason)
        self.reason = reason


@dataclasses.dataclass(frozen=True, slots=True)
class _Lost:
    reason: str


class _Reader(threading.Thread):
    """Blocking reads on the port; every complete line (bytes) goes to the event loop."""

    def __init__(self, port: serial.Serial, loop: asyncio.AbstractEventLoop, queue: asyncio.Queue[object]) -> None:
        super().__init__(name=f"gcode-reader {port.port}", daemon=True)
        self._port = port
        self._loop = loop
        self._queue = queue
        self._stopping = threading.Event()

    def run(self) -> None:
        buffer = b""
        while not self._stopping.is_set():
            try:
                data = self._port.read(self._port.in_waiting or 1)
            except (serial.SerialException, OSError, TypeError, AttributeError) as exc:
                if not self._stopping.is_set():
                    self._put(_Lost(str(exc) or type(exc).__name__))
                return
            if not data:
                continue
            buffer += data
            *lines, buffer = buffer.split(b"\n")
            for line in lines:
                self._put(line.rstrip(b"\r"))

    def _put(self, item: object) -> None:
        try:
            self._loop.call_soon_threadsafe(self._queue.put_nowait, item)
        except RuntimeError:  # the event loop has closed; nobody is listening any more
            self._stopping.set()

    def stop(self) -> None:
        self._stopping.set()
        try:
            self._port.cancel_read()
        except Exception:  # the port may already be gone; the thread ends either way
            pass
        self.join(timeout=2.0)


def open_serial_port(port: str, baud: int, *, write_timeout_s: float) -> serial.Serial:
    """Open ``port`` for this process alone; OS errors become one-line MotionErrors."""
    missing = f"serial port {port} not found; is the controller plugged in? check `port` in [stage]"
    if not os.path.exists(port):
        raise MotionError(missing)
    try:
        return serial.Serial(port, baud, timeout=0.1, write_timeout=write_timeout_s, exclusive=True)
    except serial.SerialException as exc:
        code = exc.errno
        if code in (errno.ENOENT, errno.ENODEV, errno.ENXIO):
            raise MotionError(missing) from None
        if code in (errno.EACCES, errno.EPERM):
            raise MotionError(
                f"no permission to open serial port {port}; add the daemon's user to the group "
                "owning it (often 'dialout') or fix its udev rule"
            ) from None
        text = str(exc)
        if code in (errno.EBUSY, errno.EAGAIN) or "lock" in text.lower():
            raise MotionError(f"serial port {port} is in use by another program; stop it and retry") from None
        if "configure" in text.lower() or code == errno.ENOTTY:
            raise MotionError(f"{port} is not a serial port; check `port` in [stage]") from None
        raise MotionError(f"cannot open serial port {port} ({text}); check `port` in [stage]") from None


@dataclasses.dataclass(frozen=True, slots=True)
class Backoff:
    """Retries with doubling delays, in real time: USB devices take real seconds to come back."""

    attempts: int = 5
    first_delay_s: float = 0.2
    max_delay_s: float = 5.0

    async def run(self, attempt: Callable[[], Awaitable[None]], *, what: str) -> int:
        """Call ``attempt`` until it succeeds; return how many tries it took.

        Gives up after :attr:`attempts` with the last MotionError, saying ``what`` was tried.
        """
        loop = asyncio.get_running_loop()
        started = loop.time()
        tries = max(1, self.attempts)
        delay = self.first_delay_s
        last: MotionError | None = None
        for n in range(1, tries + 1):
            try:
                await attempt()
                return n
            except MotionError as exc:
                last = exc
            if n < tries:
                await asyncio.sleep(delay)
                delay = min(delay * 2.0, self.max_delay_s)
        raise MotionError(f"{last} (gave up {what} after {tries} tries over {loop.time() - started:.1f} s)")


class SerialLink:
    """One serial port, opened and reopened whole; lines arrive as bytes without ``\\n``.

    ``on_lost(reason)`` is called once each time the link is found dropped, before the
    :class:`LinkLost` is raised (or, while draining, instead of it).
    """

    def __init__(self, port: str, baud: int, *, write_timeout_s: float, on_lost: Callable[[str], None]) -> None:
        self.port = port
        self.baud = baud
        self._write_timeout_s = write_timeout_s
        self._on_lost = on_lost
        self._serial: serial.Serial | None = None
        self._reader: _Reader | None = None
        self._lines: asyncio.Queue[object] | None = None
        self.up = False

    async def open(self) -> None:
        self.close()
        port = await asyncio.to_thread(
            open_serial_port, self.port, self.baud, write_timeout_s=self._write_timeout_s
        )
        self._lines = asyncio.Queue()
        self._serial = port
        self._reader = _Reader(port, asyncio.get_running_loop(), self._lines)
        self._reader.start()
        self.up = True

    def close(self) -> None:
        if self._reader is not None:
            self._reader.stop()
            self._reader = None
        if self._serial is not None:
            try:
                self._serial.close()
            except Exception:  # closing a port whose device has vanished may fail; it is gone either way
                pass
            self._serial = None
        self.up = False

    def lost(self, reason: str) -> None:
        """The link is gone: tell the owner, then close what is left of it."""
        self._on_lost(reason)
        self.close()

    async def write(self, line: str) -> None:
        await self.send_bytes(f"{line}\n".encode("ascii"), what=line)

    async def send_bytes(self, data: bytes, *, what: str) -> None:
        """Write ``data`` as it is (a line with its newline, or real-time bytes)."""
        port = self._serial
        if port is None or not self.up:
            raise MotionError(f"not connected to the controller on {self.port}")
        try:
            await asyncio.to_thread(port.write, data)
        except (serial.SerialException, OSError) as exc:
            self.lost(str(exc))
            raise MotionError(
                f"lost the serial link to {self.port} while sending '{what}' ({exc}); the position is "
                "now unknown. Check the USB cable; the port is reopened on the next command"
            ) from None

    def check_up(self) -> None:
        if self._lines is None or not self.up:
            raise MotionError(f"not connected to the controller on {self.port}; connect first")

    def _queue(self) -> asyncio.Queue[object]:
        self.check_up()
        assert self._lines is not None
        return self._lines

    async def read_line(self, timeout_s: float) -> bytes:
        """The next line; TimeoutError after ``timeout_s``, LinkLost if the link dropped."""
        item = await asyncio.wait_for(self._queue().get(), max(0.0, timeout_s))
        if isinstance(item, _Lost):
            self.lost(item.reason)
            raise LinkLost(item.reason)
        return item  # type: ignore[return-value]

    def drain(self) -> Iterator[bytes]:
        """The lines that have arrived, without waiting; a dropped link ends them."""
        queue = self._lines
        while queue is not None and self.up and not queue.empty():
            item = queue.get_nowait()
            if isinstance(item, _Lost):
                self.lost(item.reason)
                return
            yield item  # type: ignore[misc]
