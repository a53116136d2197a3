"""The line protocol with a controller board: one line at a time, every line answered.

* **One line at a time.** A line is written only when the previous one has been
  answered; a plain line must be answered within ``[stage] reply_timeout_s`` (real
  seconds: a property of the link), one that waits for motion (the dialect says which)
  within the move allowance the driver gives.
* **Handshake.** After the port opens, the dialect's probe (the position report) is sent
  until the board answers (boards that restart when the port opens swallow the first
  lines while booting; their banner is noted and the probe repeated), then the describe
  command (optional) and absolute coordinates.
* **Resynchronising.** After an answer went wrong (none, unreadable, not understood) the
  next command is preceded by a probe whose report skips the stale replies.
* **Halted and reset.** A halt reply puts the protocol in the halted state until
  :meth:`LineProtocol.restart`; a banner means the board restarted. Either way, and
  whenever the link drops, the position is reported lost through ``forget``.
* **Reconnect.** A dropped link is reopened on the next command, with back-off.

Every failure is a one-line :class:`MotionError`.
"""

from __future__ import annotations

import asyncio
import logging
from collections.abc import Callable

from drivers.base import MotionError, Position, PositionUnknownError
from drivers.gcode.dialect import Dialect, ReplyKind
from drivers.gcode.link import Backoff, LinkLost, SerialLink

log = logging.getLogger(__name__)

_PROBE_ATTEMPTS = 3
# Quiet after a banner that ends the wait for boot chatter: boards print their banner
# lines in one burst, well within this.
_BOOT_QUIET_S = 0.2
_BOOT_LINES_KEPT = 6


class NoReply(MotionError):
    """A line went unanswered within its timeout."""


class Halted(MotionError):
    """The board answered that it is halted."""


class LineProtocol:
    """One line in flight over a :class:`SerialLink`, in a :class:`Dialect`."""

    def __init__(
        self,
        port: str,
        baud: int,
        *,
        dialect: Dialect,
        reply_timeout_s: float,
        move_allowance_s: Callable[[], float],
        forget: Callable[[str], None],
        boot_wait_s: float = 0.0,
        backoff: Backoff = Backoff(),
    ) -> None:
        self.dialect = dialect
        self.link = SerialLink(port, baud, write_timeout_s=reply_timeout_s, on_lost=self._link_lost)
        self._reply_timeout_s = reply_timeout_s
        self._move_allowance_s = move_allowance_s
        self._forget = forget
        self._boot_wait_s = boot_wait_s
        self._backoff = backoff
        self.halted: str | None = None
        self.needs_resync = False
        self._absolute_sent = False
        self.boot_lines: list[str] = []
        self.firmware = ""

    @property
    def port(self) -> str:
        return self.link.port

    # --------------------------------------------------------- the link

    async def open(self) -> None:
        """Open the port and shake hands; the position is unknown afterwards."""
        await self.link.open()
        self.needs_resync = False
        self._absolute_sent = False
        self.halted = None
        self.boot_lines = []
        self._forget("the stage has not been homed since the driver connected")
        describe = self.dialect.describe_command
        try:
            await self._await_boot(self._boot_wait_s)
            await self._probe()
            try:
                info = await self.exchange(describe, timeout_s=self._reply_timeout_s, info=True)
                self.firmware = " / ".join(info)
            except (Halted, PositionUnknownError):
                raise
            except MotionError:
                if not self.link.up:
                    raise
                # Not every board describes itself; a refused describe is no reason to fail.
                self.firmware = f"(the controller does not describe itself: no {describe})"
            if self.needs_resync:
                await self._resync()
            if self.halted is None:
                await self.ensure_absolute()
        except BaseException:
            self.link.close()
            raise

    def close(self) -> None:
        self.link.close()

    async def reconnect(self) -> None:
        """Reopen the port, retrying with back-off; the position is unknown afterwards."""
        tries = await self._backoff.run(self._reopen, what="reconnecting")
        log.info("reconnected to %s after %d attempt(s)", self.port, tries)

    async def _reopen(self) -> None:
        await self.open()
        self._forget(f"the serial link to {self.port} was reopened and the controller may have restarted meanwhile")

    async def ensure(self) -> None:
        """Before a command: take in what arrived unasked, reconnect, resynchronise."""
        if self.link.up:
            self._drain()
        if not self.link.up:
            await self.reconnect()
            self._drain()
        if self.needs_resync:
            await self._resync()

    def _link_lost(self, reason: str) -> None:
        self._forget(
            f"the serial link to {self.port} was lost ({reason}); the controller may have restarted meanwhile"
        )

    # --------------------------------------------------------- handshake

    async def _probe(self) -> None:
        """Ask for the position until the board answers (see the module docstring)."""
        probe = self.dialect.probe_command
        for attempt in range(1, _PROBE_ATTEMPTS + 1):
            try:
                await self.exchange(probe, timeout_s=self._reply_timeout_s, report=True, skip_stale_ok=True)
                return
            except PositionUnknownError:
                # It has just booted: let the boot chatter pass, then ask again.
                await self._await_boot(self._reply_timeout_s, banner_seen=True)
            except Halted:
                return  # it answers, halted: restart() leaves that state
            except NoReply:
                if attempt == _PROBE_ATTEMPTS:
                    raise NoReply(
                        f"no reply from the controller on {self.port} to {probe} within "
                        f"{self._reply_timeout_s:g} s (reply_timeout_s), {attempt} tries; is it powered, "
                        f"is this its port, and does baud = {self.link.baud} match it?"
                    ) from None
        raise MotionError(f"the controller on {self.port} keeps restarting; check its power supply")

    async def _await_boot(self, wait_s: float, *, banner_seen: bool = False) -> None:
        """Pass over boot chatter: up to ``wait_s``, ending early once quiet after a banner."""
        if wait_s <= 0:
            return
        loop = asyncio.get_running_loop()
        deadline = loop.time() + wait_s
        while (remaining := deadline - loop.time()) > 0:
            timeout = min(remaining, _BOOT_QUIET_S) if banner_seen else remaining
            try:
                raw = await self.link.read_line(timeout)
            except TimeoutError:
                if banner_seen:
                    return
                continue
            except LinkLost:
                raise MotionError(f"the serial link to {self.port} dropped while the controller booted") from None
            self._note_unasked(raw)
            banner_seen = banner_seen or bool(self.boot_lines)

    def _drain(self) -> None:
        for raw in self.link.drain():
            self._note_unasked(raw)

    def _note_unasked(self, raw: bytes) -> None:
        """A line nobody asked for: a reset banner, boot chatter, a late reply."""
        text = raw.decode("ascii", errors="replace").strip()
        kind = self.dialect.classify(text).kind
        if kind is ReplyKind.BANNER:
            self._mark_reset(text)
        elif kind is ReplyKind.INFO and self.boot_lines and len(self.boot_lines) < _BOOT_LINES_KEPT:
            self.boot_lines.append(text)
        else:
            log.debug("unasked line from %s: %r", self.port, text)

    def _mark_reset(self, banner: str) -> None:
        self._forget(
            f"the controller on {self.port} restarted (its '{banner}' banner arrived) and lost its position"
        )
        self.boot_lines = [banner]
        self._absolute_sent = False
        self.halted = None
        self.needs_resync = False

    async def _resync(self) -> None:
        """After a reply went wrong: skip stale replies until a position report and its ok."""
        try:
            await self.exchange(
                self.dialect.probe_command, timeout_s=self._reply_timeout_s, report=True, skip_stale_ok=True
            )
        except Halted:
            pass
        self.needs_resync = False

    # ---------------------------------------------------------- commands

    async def ensure_absolute(self) -> None:
        if not self._absolute_sent:
            await self.send(self.dialect.absolute_command)
            self._absolute_sent = True

    async def send(self, line: str) -> None:
        """Send a line whose answer is a bare ok (or, waiting for motion, an ok at its end)."""
        timeout = self._move_allowance_s() if self.dialect.waits_for_motion(line) else self._reply_timeout_s
        await self.exchange(line, timeout_s=timeout)

    async def report(self) -> Position:
        probe = self.dialect.probe_command
        lines = await self.exchange(probe, timeout_s=self._reply_timeout_s, report=True)
        for line in lines:
            position = self.dialect.parse_report(line)
            if position is not None:
                return position
        self.needs_resync = True
        raise MotionError(
            f"controller answered '{probe}' without a position report (got {lines!r}); "
            f"it should answer like '{self.dialect.report_example}'"
        )

    def require_running(self) -> None:
        if self.halted is not None:
            raise MotionError(f"the controller is halted ({self.halted}); home the stage to restart it")

    async def restart(self) -> None:
        """Leave the halted state, if in it."""
        if self.halted is not None:
            await self.send(self.dialect.restart_command)
            self.halted = None

    async def emergency_stop(self) -> None:
        """Send the halt command after a move timed out and wait briefly for the halt.

        The protocol is in the halted state afterwards whether or not the board confirms.
        """
        halt = self.dialect.halt_command
        self._forget(f"the controller was stopped with {halt} after a move timed out")
        self.halted = f"stopped by the driver with {halt} after a move timed out"
        self.needs_resync = True
        try:
            await self.link.write(halt)
            loop = asyncio.get_running_loop()
            deadline = loop.time() + self._reply_timeout_s
            while (remaining := deadline - loop.time()) > 0:
                raw = await self.link.read_line(remaining)
                if self.dialect.classify(raw.decode("ascii", errors="replace")).kind is ReplyKind.HALT:
                    return
        except LinkLost:
            return
        except (TimeoutError, MotionError):
            log.warning("no halt confirmation after %s on %s", halt, self.port)

    async def exchange(
        self,
        line: str,
        *,
        timeout_s: float,
        report: bool = False,
        info: bool = False,
        skip_stale_ok: bool = False,
    ) -> list[str]:
        """Write one line and collect its answer up to ok; every failure is a MotionError.

        ``report``: keep position reports; ``info``: keep every other line (a description);
        ``skip_stale_ok``: an ok before any report is a late answer to an earlier line.
        """
        self.link.check_up()
        dialect = self.dialect
        motion = dialect.affects_position(line)
        await self.link.write(line)
        loop = asyncio.get_running_loop()
        deadline = loop.time() + timeout_s
        collected: list[str] = []
        while True:
            try:
                raw = await self.link.read_line(deadline - loop.time())
            except TimeoutError:
                self.needs_resync = True
                if motion:
                    self._forget(f"the reply to '{line}' never came, so where the stage went is not known")
                raise NoReply(
                    f"no reply to '{line}' from the controller on {self.port} within {timeout_s:g} s; "
                    "check the cable and that the controller is powered (the driver re-synchronises on the next command)"
                ) from None
            except LinkLost as lost:
                raise MotionError(
                    f"lost the serial link to {self.port} while waiting for the reply to '{line}' "
                    f"({lost.reason}); the position is now unknown. Check the USB cable; the port is reopened "
                    "on the next command"
                ) from None
            try:
                text = raw.decode("ascii").strip()
                readable = text.isprintable()
            except UnicodeDecodeError:
                text, readable = "", False
            if not readable:
                self.needs_resync = True
                if motion:
                    self._forget(f"the reply to '{line}' was unreadable, so whether it ran is not known")
                raise MotionError(
                    f"controller on {self.port} sent an unreadable reply {raw!r} to '{line}'; check that "
                    f"baud = {self.link.baud} matches the controller's and that the cable is sound"
                )
            if not text:
                continue
            reply = dialect.classify(text)
            if reply.kind is ReplyKind.OK:
                if skip_stale_ok and report and not collected:
                    continue
                return collected
            if reply.kind is ReplyKind.ERROR:
                raise MotionError(f"controller refused '{line}': {reply.detail}")
            if reply.kind is ReplyKind.HALT:
                self.halted = reply.detail
                self._forget(f"the controller is halted ({self.halted})")
                raise Halted(f"the controller is halted ({self.halted}); home the stage to restart it")
            if reply.kind is ReplyKind.BANNER:
                self._mark_reset(text)
                raise PositionUnknownError(
                    f"the controller on {self.port} restarted while running '{line}' and lost its position; "
                    "home the stage (or declare its position with set_position)"
                )
            if reply.kind is ReplyKind.INFO:
                log.info("controller %s: %s", self.port, text)
                continue
            if info or (report and reply.kind is ReplyKind.REPORT):
                collected.append(text)
                continue
            self.needs_resync = True
            if motion:
                self._forget(f"the reply to '{line}' was not understood, so whether it ran is not known")
            raise MotionError(
                f"controller on {self.port} sent an unexpected reply {text!r} to '{line}'; check that it "
                f"speaks the {dialect.name} dialect described in {dialect.described_in} and that "
                f"baud = {self.link.baud} is right"
            )
