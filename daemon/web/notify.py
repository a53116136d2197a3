"""systemd service notification: READY=1 once serving, WATCHDOG=1 while the loop is alive.

The protocol is one datagram per message on the AF_UNIX socket named by
``$NOTIFY_SOCKET`` (a leading '@' means Linux's abstract namespace), as described in
sd_notify(3). Outside systemd the variable is unset and every call does nothing.
"""

from __future__ import annotations

import asyncio
import contextlib
import logging
import os
import socket

log = logging.getLogger(__name__)


class Notifier:
    def __init__(self, environ: dict[str, str] | None = None) -> None:
        env = os.environ if environ is None else environ
        self.address = env.get("NOTIFY_SOCKET") or None
        usec = env.get("WATCHDOG_USEC")
        pid = env.get("WATCHDOG_PID")
        # The watchdog is meant for us only when WATCHDOG_PID is unset or is our PID (sd_watchdog_enabled(3)).
        ours = pid is None or pid == str(os.getpid())
        self.watchdog_s = int(usec) / 1e6 if usec and usec.isdigit() and int(usec) > 0 and ours else None
        self._sock: socket.socket | None = None

    @property
    def enabled(self) -> bool:
        return self.address is not None

    def send(self, *fields: str) -> bool:
        """Send ``KEY=VALUE`` fields in one datagram; False when not under systemd or it failed."""
        if self.address is None:
            return False
        target = "\0" + self.address[1:] if self.address.startswith("@") else self.address
        try:
            if self._sock is None:
                self._sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM | socket.SOCK_CLOEXEC)
                # Never block the event loop on a listener that is not reading.
                self._sock.setblocking(False)
            self._sock.sendto("\n".join(fields).encode(), target)
            return True
        except BlockingIOError:
            log.debug("systemd notification socket %s is full; message dropped", self.address)
            return False
        except OSError as exc:
            log.warning("systemd notification to %s failed: %s", self.address, exc)
            return False

    def ready(self, status: str) -> bool:
        return self.send("READY=1", f"STATUS={status}")

    def status(self, status: str) -> bool:
        return self.send(f"STATUS={status}")

    def stopping(self) -> bool:
        return self.send("STOPPING=1", "STATUS=shutting down")

    async def watchdog_loop(self) -> None:
        """Ping at half the watchdog interval (sd_watchdog_enabled(3) advice) until cancelled.

        The ping runs on the event loop, so a loop blocked by accident stops the pings and
        systemd restarts the service, which is the point.
        """
        if self.watchdog_s is None:
            return
        while True:
            self.send("WATCHDOG=1")
            await asyncio.sleep(self.watchdog_s / 2.0)

    def close(self) -> None:
        if self._sock is not None:
            with contextlib.suppress(OSError):
                self._sock.close()
            self._sock = None
