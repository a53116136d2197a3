"""The line protocol with a controller board: one line at a time, every line answered.

* **One line at a time.** A line is written only when the previous one has been
  answered; a plain line must be answered within ``[stage] reply_timeout_s`` (real
  seconds: a property of the link), one that waits for motion (the dialect says which)
  within the move allowance the driver gives. A keep-alive (``busy``) line stretches a
  plain line's wait by another reply timeout; it never stretches a wait for motion, so a
  jammed stage that keeps saying "busy" is still stopped.
* **Handshake.** After the port opens, boot chatter is let pass; with ``dialect =
  "auto"`` the dialect is found (:mod:`drivers.gcode.detect`); then the position report
  is asked for until the board answers (boards that restart when the port opens swallow
  the first lines while booting; their banner is noted and the request repeated), then
  the describe command (optional), line numbering and absolute coordinates.
* **Numbered lines.** Where the dialect has them (and ``line_checksums`` is on), every
  line carries a number and checksum; a ``Resend`` request sends the same line again. A
  line of ours refused as unreadable (it can only have been damaged on the way) is sent
  again too, after re-synchronising. Either way at most :data:`RESEND_LIMIT` times.
* **Resynchronising.** After an answer went wrong (none, unreadable, not understood, a
  refusal) the next command is preceded by the dialect's sync command, whose distinctive
  answer skips the stale replies; numbering restarts after it.
* **Halted, alarmed and reset.** A halt or alarm reply puts the protocol in the halted
  state until :meth:`LineProtocol.restart`; a banner means the board restarted. Either
  way, and whenever the link drops, the position is reported lost through ``forget``.
* **Reconnect.** A dropped link is reopened on the next command, with back-off.

Every failure is a one-line :class:`MotionError`.
"""

from __future__ import annotations

import asyncio
import logging
from collections.abc import Callable, Collection

from drivers.base import MotionError, Position, PositionUnknownError
from drivers.gcode.detect import DETECT_COMMAND, make_dialect, tell_apart
from drivers.gcode.dialect import Dialect, Reply, ReplyKind
from drivers.gcode.link import Backoff, LinkLost, SerialLink

log = logging.getLogger(__name__)

_PROBE_ATTEMPTS = 3
# Quiet after a banner that ends the wait for boot chatter: boards print their banner
# lines in one burst, well within this.
_BOOT_QUIET_S = 0.2
_BOOT_LINES_KEPT = 6
RESEND_LIMIT = 4
_REPORT_REQUEST = "position report"


class NoReply(MotionError):
    """A line went unanswered within its timeout."""


class Halted(MotionError):
    """The board answered that it is halted (or stopped on an alarm)."""


def _decode(raw: bytes) -> tuple[str, bool]:
    try:
        text = raw.decode("ascii").strip()
    except UnicodeDecodeError:
        return "", False
    return text, text.isprintable()


class LineProtocol:
    """One line in flight over a :class:`SerialLink`, in a :class:`Dialect`.

    ``dialect``: a dialect object, or ``"auto"`` to find it at connect.
    ``line_checksums``: number lines where the dialect can (see the module docstring).
    """

    def __init__(
        self,
        port: str,
        baud: int,
        *,
        dialect: Dialect | str,
        reply_timeout_s: float,
        move_allowance_s: Callable[[], float],
        forget: Callable[[str], None],
        boot_wait_s: float = 0.0,
        backoff: Backoff = Backoff(),
        line_checksums: bool = True,
    ) -> None:
        self._auto = dialect == "auto"
        # With "auto", the RepRap family's stands in (for messages) until the board is asked.
        self.dialect: Dialect = make_dialect("reprap" if self._auto else dialect) if isinstance(dialect, str) else dialect
        self.dialect_found = "not connected yet" if self._auto else "set in the profile"
        self.link = SerialLink(port, baud, write_timeout_s=reply_timeout_s, on_lost=self._link_lost)
        self._reply_timeout_s = reply_timeout_s
        self._move_allowance_s = move_allowance_s
        self._forget = forget
        self._boot_wait_s = boot_wait_s
        self._backoff = backoff
        self._line_checksums = line_checksums
        self._detected = False
        self.halted: str | None = None
        self.needs_resync = False
        self._absolute_sent = False
        self._numbering = False        # lines go out numbered from here on
        self._next_number = 1
        self.resends = 0               # lines sent again after arriving damaged, since connecting
        self.boot_lines: list[str] = []
        self.firmware = ""

    @property
    def port(self) -> str:
        return self.link.port

    @property
    def numbered(self) -> bool:
        return self._line_checksums and self.dialect.numbered

    # --------------------------------------------------------- the link

    async def open(self) -> None:
        """Open the port and shake hands; the position is unknown afterwards."""
        await self.link.open()
        self.needs_resync = False
        self._absolute_sent = False
        self._numbering = False
        self.halted = None
        self.boot_lines = []
        self._detected = False
        self._forget("the stage has not been homed since the driver connected")
        try:
            await self._await_boot(self._boot_wait_s)
            if self._auto and not self._detected:
                await self._detect()
            for _ in range(_PROBE_ATTEMPTS):
                try:
                    await self._probe()
                    await self._describe()
                    break
                except PositionUnknownError:
                    # It restarted in the middle of the handshake: let it boot, start over.
                    await self._await_boot(self._reply_timeout_s, banner_seen=True)
            else:
                raise MotionError(f"the controller on {self.port} keeps restarting; check its power supply")
            if self.needs_resync:
                await self._resync()
            if self.halted is None:
                await self.ensure_ready()
        except BaseException:
            self.link.close()
            raise

    async def _describe(self) -> None:
        describe = self.dialect.describe_command
        try:
            info = await self.exchange(describe, timeout_s=self._reply_timeout_s, info=True, framed=False)
            self.firmware = " / ".join(info)
        except (Halted, PositionUnknownError):
            raise
        except MotionError:
            if not self.link.up:
                raise
            # Not every board describes itself; a refused describe is no reason to fail.
            self.firmware = f"(the controller does not describe itself: no {describe})"

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

    async def _detect(self) -> None:
        """Find the dialect from the board's answer to ``M115`` or its banner."""
        heard: list[str] = []
        for _ in range(_PROBE_ATTEMPTS):
            await self.link.write(DETECT_COMMAND)
            found = await self._listen_for_dialect(heard)
            if self._detected:
                return  # its banner told (the dialect was taken then)
            if found is not None:
                self._take_dialect(make_dialect(found), f"found at connect (it answered {DETECT_COMMAND} {found}-style)")
                return
        if heard:
            raise MotionError(
                f"the controller on {self.port} answers in neither known dialect (got {heard[:3]!r}); "
                f"check that baud = {self.link.baud} is right, or set `dialect` in [stage] (reprap or grbl)"
            )
        raise NoReply(
            f"no reply from the controller on {self.port} to {DETECT_COMMAND} within "
            f"{self._reply_timeout_s:g} s (reply_timeout_s), {_PROBE_ATTEMPTS} tries; is it powered, "
            f"is this its port, and does baud = {self.link.baud} match it?"
        )

    async def _listen_for_dialect(self, heard: list[str]) -> str | None:
        """Read one answer (or a boot burst); the dialect it shows, once it has ended."""
        loop = asyncio.get_running_loop()
        deadline = loop.time() + self._reply_timeout_s
        found: str | None = None
        while (remaining := deadline - loop.time()) > 0:
            try:
                raw = await self.link.read_line(remaining if found is None else min(remaining, _BOOT_QUIET_S))
            except TimeoutError:
                return found
            except LinkLost:
                raise MotionError(f"the serial link to {self.port} dropped while finding the controller's dialect") from None
            text, readable = _decode(raw)
            if not readable:
                raise MotionError(
                    f"controller on {self.port} sent an unreadable reply {raw!r} to '{DETECT_COMMAND}'; check that "
                    f"baud = {self.link.baud} matches the controller's and that the cable is sound"
                )
            if not text:
                continue
            heard.append(text)
            guess = tell_apart(text)
            found = found or guess
            if found is None:
                continue
            dialect = make_dialect(found)
            kind = dialect.classify(text).kind
            if kind is ReplyKind.BANNER:
                self._take_dialect(dialect, f"found at connect (its banner '{text}')")
                self._mark_reset(text)
                await self._await_boot(self._reply_timeout_s, banner_seen=True)
                return found
            if kind in (ReplyKind.OK, ReplyKind.ERROR, ReplyKind.ALARM, ReplyKind.HALT):
                return found
        return found

    async def _probe(self) -> None:
        """Ask for the position until the board answers (see the module docstring)."""
        for attempt in range(1, _PROBE_ATTEMPTS + 1):
            try:
                await self._report_lines(skip_stale_ok=True)
                return
            except PositionUnknownError:
                # It has just booted: let the boot chatter pass, then ask again.
                await self._await_boot(self._reply_timeout_s, banner_seen=True)
            except Halted:
                return  # it answers, halted: restart() leaves that state
            except NoReply:
                if attempt == _PROBE_ATTEMPTS:
                    raise NoReply(
                        f"no reply from the controller on {self.port} to {self._report_name()} within "
                        f"{self._reply_timeout_s:g} s (reply_timeout_s), {attempt} tries; is it powered, "
                        f"is this its port, and does baud = {self.link.baud} match it?"
                    ) from None
        raise MotionError(f"the controller on {self.port} keeps restarting; check its power supply")

    async def _await_boot(self, wait_s: float, *, banner_seen: bool = False, dialect: Dialect | None = None) -> None:
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
            self._note_unasked(raw, dialect=dialect)
            banner_seen = banner_seen or bool(self.boot_lines)

    def _drain(self) -> None:
        for raw in self.link.drain():
            self._note_unasked(raw)

    def _note_unasked(self, raw: bytes, *, dialect: Dialect | None = None) -> None:
        """A line nobody asked for: a reset banner, boot chatter, an alarm, a late reply."""
        text = raw.decode("ascii", errors="replace").strip()
        if dialect is None and self._auto and not self._detected:
            dialect = self._banner_dialect(text)
        reply = (dialect or self.dialect).classify(text)
        if reply.kind is ReplyKind.BANNER:
            self._mark_reset(text)
        elif reply.kind in (ReplyKind.ALARM, ReplyKind.HALT):
            self._mark_halted(reply)
        elif reply.kind is ReplyKind.INFO and self.boot_lines and len(self.boot_lines) < _BOOT_LINES_KEPT:
            self.boot_lines.append(text)
        else:
            log.debug("unasked line from %s: %r", self.port, text)

    def _banner_dialect(self, text: str) -> Dialect | None:
        """Before the dialect is known: the dialect whose banner ``text`` is, taken as found."""
        guess = tell_apart(text)
        if guess is None:
            return None
        dialect = make_dialect(guess)
        if not dialect.is_banner(text):
            return None
        self._take_dialect(dialect, f"found at connect (its banner '{text}')")
        return dialect

    def _take_dialect(self, dialect: Dialect, how: str) -> None:
        self.dialect = dialect
        self.dialect_found = how
        self._detected = True

    def _mark_reset(self, banner: str) -> None:
        self._forget(
            f"the controller on {self.port} restarted (its '{banner}' banner arrived) and lost its position"
        )
        self.boot_lines = [banner]
        self._absolute_sent = False
        self._numbering = False
        self.halted = None
        self.needs_resync = False
        forget_offsets = getattr(self.dialect, "forget_offsets", None)
        if forget_offsets is not None:
            forget_offsets()

    def _mark_halted(self, reply: Reply) -> None:
        self.halted = reply.detail
        self._forget(f"the controller is halted ({self.halted})")

    async def _resync(self) -> None:
        """After a reply went wrong: skip stale replies until the sync answer and its ok."""
        try:
            await self.exchange(
                self.dialect.sync_command, timeout_s=self._reply_timeout_s,
                keep=(ReplyKind.REPORT, ReplyKind.STATE), skip_stale_ok=True, framed=False, own_line=True,
            )
        except Halted:
            pass
        self.needs_resync = False
        self._numbering = False
        if self.numbered and self.halted is None and self._absolute_sent:
            # Lines may have been lost either way: both sides start counting afresh.
            await self._renumber()

    async def _renumber(self) -> None:
        await self.exchange(self.dialect.renumber(0), timeout_s=self._reply_timeout_s, framed=False)
        self._numbering = True
        self._next_number = 1

    # ---------------------------------------------------------- commands

    async def ensure_ready(self) -> None:
        """Line numbering (where used) and absolute coordinates, once per connection or reset."""
        if self.numbered and not self._numbering:
            await self._renumber()
        if not self._absolute_sent:
            await self.send(self.dialect.absolute_command)
            self._absolute_sent = True

    async def ensure_absolute(self) -> None:
        await self.ensure_ready()

    async def send(self, line: str) -> None:
        """Send one of the driver's lines; its answer is a bare ok (after motion, if it waits)."""
        timeout = self._move_allowance_s() if self.dialect.waits_for_motion(line) else self._reply_timeout_s
        await self.exchange(line, timeout_s=timeout, resend_damaged=True)

    def _report_name(self) -> str:
        request = self.dialect.report_request()
        return request.decode("ascii").strip() if request.endswith(b"\n") else f"the {request!r} status request"

    async def _report_lines(self, *, skip_stale_ok: bool = False) -> list[str]:
        request = self.dialect.report_request()
        name = self._report_name()
        if request.endswith(b"\n"):
            return await self.exchange(
                name, timeout_s=self._reply_timeout_s, keep=(ReplyKind.REPORT,), skip_stale_ok=skip_stale_ok
            )
        return await self.exchange(
            name, data=request, timeout_s=self._reply_timeout_s, keep=(ReplyKind.REPORT,), skip_stale_ok=True,
            ends_with_kept=True,
        )

    async def report(self) -> Position:
        lines = await self._report_lines()
        for line in lines:
            position = self.dialect.parse_report(line)
            if position is not None:
                return position
        self.needs_resync = True
        raise MotionError(
            f"controller answered '{self._report_name()}' without a position report (got {lines!r}); "
            f"it should answer like '{self.dialect.report_example}'"
        )

    def require_running(self) -> None:
        if self.halted is not None:
            raise MotionError(f"the controller is halted ({self.halted}); home the stage to restart it")

    async def restart(self) -> None:
        """Leave the halted state, if in it: the restart sequence, answered by ok or the banner."""
        if self.halted is None:
            return
        await self.link.send_bytes(self.dialect.restart_bytes, what="restart")
        loop = asyncio.get_running_loop()
        deadline = loop.time() + self._reply_timeout_s
        while (remaining := deadline - loop.time()) > 0:
            try:
                raw = await self.link.read_line(remaining)
            except TimeoutError:
                break
            except LinkLost as lost:
                raise MotionError(f"lost the serial link to {self.port} while restarting the controller ({lost.reason})") from None
            text, readable = _decode(raw)
            kind = self.dialect.classify(text).kind if readable else ReplyKind.OTHER
            if kind is ReplyKind.BANNER:
                self._mark_reset(text)
                await self._await_boot(self._reply_timeout_s, banner_seen=True)
                return
            if kind is ReplyKind.OK:
                self.halted = None
                self._numbering = False
                return
        self.needs_resync = True
        raise NoReply(
            f"the controller on {self.port} did not answer the restart within {self._reply_timeout_s:g} s; "
            "power-cycle it, then home"
        )

    async def emergency_stop(self) -> None:
        """Send the halt sequence after a move timed out and wait briefly for the halt.

        The protocol is in the halted state afterwards whether or not the board confirms.
        """
        halt = self.dialect.halt_name
        self._forget(f"the controller was stopped with {halt} after a move timed out")
        self.halted = f"stopped by the driver with {halt} after a move timed out"
        self.needs_resync = True
        try:
            await self.link.send_bytes(self.dialect.halt_bytes, what=halt)
            loop = asyncio.get_running_loop()
            deadline = loop.time() + self._reply_timeout_s
            while (remaining := deadline - loop.time()) > 0:
                raw = await self.link.read_line(remaining)
                kind = self.dialect.classify(raw.decode("ascii", errors="replace")).kind
                if kind in (ReplyKind.HALT, ReplyKind.BANNER, ReplyKind.ALARM):
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
        data: bytes | None = None,
        keep: Collection[ReplyKind] = (),
        info: bool = False,
        skip_stale_ok: bool = False,
        ends_with_kept: bool = False,
        framed: bool = True,
        resend_damaged: bool = False,
        own_line: bool = False,
    ) -> list[str]:
        """Write one line and collect its answer up to ok; every failure is a MotionError.

        ``data``: bytes to write instead of ``line`` and a newline (a real-time request;
        ``line`` then names it in messages). ``keep``: reply kinds to collect;
        ``info``: collect every informational or unknown line too (a description);
        ``skip_stale_ok``: an ok before any kept line is a late answer to an earlier line;
        ``ends_with_kept``: the first kept line is the whole answer (no ok follows);
        ``framed``: numbered and checksummed, once numbering is on;
        ``resend_damaged``: send again when refused as unreadable (our lines never are);
        ``own_line``: one of the driver's lines, so such a refusal means damage on the way.
        """
        self.link.check_up()
        dialect = self.dialect
        motion = dialect.affects_position(line)
        waits = dialect.waits_for_motion(line)
        number: int | None = None
        if data is None:
            if framed and self._numbering:
                number = self._next_number
                self._next_number += 1
                data = f"{dialect.frame(line, number)}\n".encode("ascii")
            else:
                data = f"{line}\n".encode("ascii")
        loop = asyncio.get_running_loop()
        sends = 0
        while True:
            await self.link.send_bytes(data, what=line)
            sends += 1
            started = loop.time()
            deadline = started + timeout_s
            latest = started + max(timeout_s, self._move_allowance_s())
            collected: list[str] = []
            resend: int | None = None
            refused: Reply | None = None
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
                text, readable = _decode(raw)
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
                kind = reply.kind
                if kind is ReplyKind.OK:
                    if skip_stale_ok and not collected:
                        continue
                    if resend is not None:
                        break
                    return collected
                if kind is ReplyKind.RESEND:
                    if reply.detail:
                        resend = int(reply.detail)
                    continue
                if kind is ReplyKind.BUSY:
                    if not waits:
                        deadline = min(max(deadline, loop.time() + timeout_s), latest)
                    log.debug("controller %s: %s", self.port, text)
                    continue
                if kind is ReplyKind.ERROR:
                    refused = reply
                    break
                if kind in (ReplyKind.HALT, ReplyKind.ALARM):
                    self._mark_halted(reply)
                    self.needs_resync = True
                    raise Halted(f"the controller is halted ({self.halted}); home the stage to restart it")
                if kind is ReplyKind.BANNER:
                    self._mark_reset(text)
                    raise PositionUnknownError(
                        f"the controller on {self.port} restarted while running '{line}' and lost its position; "
                        "home the stage (or declare its position with set_position)"
                    )
                if kind in keep:
                    halted = dialect.report_halt(text)
                    if halted is not None and self.halted is None:
                        self.halted = halted
                        self._forget(f"the controller is {halted}")
                    collected.append(text)
                    if ends_with_kept:
                        return collected
                    continue
                if kind is ReplyKind.INFO and not info:
                    log.info("controller %s: %s", self.port, text)
                    continue
                if info and kind in (ReplyKind.INFO, ReplyKind.OTHER):
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
            # A resend request, or a refusal: the line had no effect.
            if refused is not None:
                self.needs_resync = True
                damaged = (own_line or resend_damaged) and dialect.damaged_in_transit(refused)
                if damaged and (not resend_damaged or sends > RESEND_LIMIT):
                    raise MotionError(
                        f"controller on {self.port} could not read '{line}' ({refused.detail}), {sends} time(s) in a "
                        "row: the line is damaged on the way. Check the USB cable (shorter, shielded, away from "
                        "motor wires) and the board's ground"
                    )
                if not damaged:
                    raise MotionError(f"controller refused '{line}': {refused.detail}")
                await self._resync()
                if number is not None:
                    # Numbering restarted with the resync: the line goes out under a new number.
                    await self.ensure_ready()
                    number = self._next_number
                    self._next_number += 1
                    data = f"{dialect.frame(line, number)}\n".encode("ascii")
            elif resend != number:
                self.needs_resync = True
                if motion:
                    self._forget(f"the controller asked for line {resend} again while '{line}' was line {number}")
                raise MotionError(
                    f"controller on {self.port} asked to resend line {resend}, but the line in flight was "
                    f"{number}; the driver re-synchronises on the next command"
                )
            elif sends > RESEND_LIMIT:
                self.needs_resync = True
                if motion:
                    self._forget(f"'{line}' kept arriving damaged")
                raise MotionError(
                    f"'{line}' arrived damaged at the controller on {self.port} {sends} times in a row; "
                    "check the USB cable (shorter, shielded, away from motor wires) and the board's ground"
                )
            self.resends += 1
            log.info("controller %s asked for line %s again (%s)", self.port, number, line)
