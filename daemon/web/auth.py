"""The access token: generated on first start, kept owner-only in the data folder.

Every request that changes anything carries ``Authorization: Bearer <token>``. Viewing
(GET) needs the token too unless the profile allows anonymous viewing. A browser that
showed the token once gets a view cookie (an HMAC of the token, so a new token voids old
cookies); it is good for viewing only, never for changes, so a forged cross-site form
cannot move the stage. Tokens are compared in constant time. Wrong tokens and wrong
view cookies are limited per client address and over all addresses together (so that
rotating addresses gains a guesser nothing); the right token is never refused for
anyone's wrong ones, so a guesser cannot lock the owner out.
"""

from __future__ import annotations

import collections
import dataclasses
import hashlib
import hmac
import os
import secrets
import stat
import sys
import time
from collections.abc import Callable
from pathlib import Path

from drivers import atomic

TOKEN_FILE = "access-token"
TOKEN_BYTES = 32  # 256 bits from the OS's CSPRNG (secrets module)
VIEW_COOKIE = "phasewatch_view"
# Failed attempts allowed per client in the window before its wrong ones get 429.
MAX_FAILURES = 10
# Failed attempts allowed from all clients together in the window: ten clients' worth.
MAX_TOTAL_FAILURES = 100
FAILURE_WINDOW_S = 60.0


class TokenFileError(OSError):
    pass


def token_path(data_dir: Path) -> Path:
    return Path(data_dir) / TOKEN_FILE


def _write_new_token(path: Path) -> str:
    token = secrets.token_urlsafe(TOKEN_BYTES)
    atomic.make_dirs(path.parent)
    # Mode 0600 from creation: the token is never readable by others, not even briefly.
    atomic.write_text(path, token + "\n", encoding="ascii", permissions=0o600)
    return token


def load_or_create_token(data_dir: Path, *, renew: bool = False) -> tuple[str, bool]:
    """The token of ``data_dir`` (created when missing or ``renew``); returns (token, created).

    A token file readable by group or others is tightened to 0600 with a warning, since
    someone may have copied it with the wrong permissions.
    """
    path = token_path(data_dir)
    if renew or not path.exists():
        return _write_new_token(path), True
    mode = stat.S_IMODE(path.stat().st_mode)
    if mode & 0o077:
        os.chmod(path, 0o600)
        print(
            f"phasewatch: warning: {path} was readable by others (mode {mode:04o}); set to 0600. "
            "If others could read it, make a new token: phasewatch token --new",
            file=sys.stderr,
        )
    token = path.read_text(encoding="ascii").strip()
    if len(token) < 16:
        raise TokenFileError(f"{path}: the access token is too short or empty; make a new one with phasewatch token --new")
    return token, False


def view_cookie_value(token: str) -> str:
    return hmac.new(token.encode(), b"phasewatch view cookie", hashlib.sha256).hexdigest()


@dataclasses.dataclass(frozen=True, kw_only=True)
class SessionRequest:
    """Swap the token for a view cookie: no options, so any given is refused as unknown."""


class FailureLimiter:
    """Counts failed attempts per client and over all clients in a sliding window (bounded memory)."""

    def __init__(
        self, max_failures: int = MAX_FAILURES, window_s: float = FAILURE_WINDOW_S,
        clock: Callable[[], float] = time.monotonic, max_clients: int = 4096,
        max_total: int = MAX_TOTAL_FAILURES,
    ) -> None:
        self.max_failures = max_failures
        self.max_total = max_total
        self.window_s = window_s
        self._clock = clock
        self._max_clients = max_clients
        self._failures: collections.OrderedDict[str, collections.deque[float]] = collections.OrderedDict()
        self._all: collections.deque[float] = collections.deque(maxlen=max_total)

    def _recent(self, client: str) -> collections.deque[float]:
        now = self._clock()
        q = self._failures.get(client)
        if q is None:
            return collections.deque()
        while q and now - q[0] > self.window_s:
            q.popleft()
        if not q:
            del self._failures[client]
        return q

    def _wait_s(self, q: collections.deque[float], limit: int) -> float:
        if len(q) < limit:
            return 0.0
        return max(0.0, self.window_s - (self._clock() - q[0]))

    def blocked_for_s(self, client: str) -> float:
        """Seconds until ``client`` may try again (0 when it may now): its own failures, or
        everyone's together."""
        now = self._clock()
        while self._all and now - self._all[0] > self.window_s:
            self._all.popleft()
        return max(self._wait_s(self._recent(client), self.max_failures), self._wait_s(self._all, self.max_total))

    def overall(self) -> bool:
        """Whether the overall limit (not only this client's) is what refuses now."""
        return self._wait_s(self._all, self.max_total) > 0

    def reset(self) -> None:
        self._failures.clear()
        self._all.clear()

    def fail(self, client: str) -> None:
        q = self._failures.setdefault(client, collections.deque())
        self._failures.move_to_end(client)
        q.append(self._clock())
        self._all.append(q[-1])
        while len(q) > self.max_failures:
            q.popleft()
        while len(self._failures) > self._max_clients:
            self._failures.popitem(last=False)


class Authenticator:
    """Decides whether a request may view or change, from its header or view cookie.

    With ``token_file`` a new token written there (``phasewatch token --new``) takes effect
    at the next request, and the old one stops working at once.
    """

    def __init__(
        self, token: str, *, anonymous_viewing: bool, limiter: FailureLimiter | None = None,
        token_file: Path | None = None,
    ) -> None:
        self._set(token)
        self.anonymous_viewing = anonymous_viewing
        self.limiter = limiter or FailureLimiter()
        self._file = token_file
        self._stamp = self._file_stamp()

    def _set(self, token: str) -> None:
        self._token = token.encode()
        self._cookie = view_cookie_value(token).encode()

    def _file_stamp(self) -> tuple[int, int] | None:
        if self._file is None:
            return None
        try:
            st = self._file.stat()
        except OSError:
            return None
        return st.st_mtime_ns, st.st_ino

    def _reload_if_changed(self) -> None:
        stamp = self._file_stamp()
        if stamp is None or stamp == self._stamp or self._file is None:
            return
        try:
            token = self._file.read_text(encoding="ascii").strip()
        except OSError:
            return  # keep the token we have rather than lock everyone out
        if len(token) >= 16:
            self._set(token)
            self._stamp = stamp

    def check_bearer(self, header: str | None) -> bool | None:
        """True: right token; False: a token was given and is wrong; None: none given."""
        self._reload_if_changed()
        if not header:
            return None
        scheme, _, value = header.partition(" ")
        given = _ascii(value.strip())
        if scheme.lower() != "bearer" or not given:
            return False
        return hmac.compare_digest(given, self._token)

    def check_cookie(self, value: str | None) -> bool | None:
        self._reload_if_changed()
        if not value:
            return None
        given = _ascii(value)
        return given is not None and hmac.compare_digest(given, self._cookie)

    @property
    def cookie_value(self) -> str:
        return self._cookie.decode()


def _ascii(text: str) -> bytes | None:
    """A credential as bytes; None when it is not ASCII, as no token or cookie of ours is.

    HTTP headers arrive as bytes, and bytes that are not UTF-8 reach here as lone
    surrogates: such a header is a wrong credential like any other, never an error.
    """
    try:
        return text.encode("ascii")
    except UnicodeEncodeError:
        return None
