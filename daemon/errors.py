"""Refusals of the service and the domain functions, the same for every front end.

The web API turns each into its HTTP status (daemon/web/api.py): :class:`BadRequest`
400, :class:`NotFound` 404, :class:`Busy` 409, :class:`Damaged` 410, :class:`NoSpace` 507. The command line
prints each as one line
and exits with status 2 (daemon/cli.py).
"""

from __future__ import annotations


class Busy(Exception):
    """The scope or the time-lapse cannot do this now; the message says why and what to do."""


class NotFound(LookupError):
    pass


class Damaged(Exception):
    """Stored data that exists in the index but whose file is damaged or gone; never served as
    good. ``status`` is the frame state (``damaged``, ``missing``)."""

    def __init__(self, message: str, *, status: str) -> None:
        self.status = status
        super().__init__(message)


class BadRequest(ValueError):
    """A request with a value that no scope accepts, or that this scope's profile rules out.

    ``field`` names the request field at fault (None: the request as a whole) and
    ``problem`` says what is wrong and what is allowed. ``str()`` is ``"field: problem"``,
    the web API's message; the command line names the field by its option instead
    (``--range-um: problem``), so each front end speaks its own words around one text.
    """

    def __init__(self, problem: str, *, field: str | None = None) -> None:
        self.problem = problem
        self.field = field
        super().__init__(f"{field}: {problem}" if field else problem)


class NoSpace(Exception):
    """The disk is full (or the quota reached) for what was asked; nothing partial was left."""
