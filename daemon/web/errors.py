"""Refusals the station raises; the API turns each into its HTTP status (see daemon/web/api.py)."""

from __future__ import annotations


class Busy(Exception):
    """The scope or the time-lapse cannot do this now; the message says why and what to do."""


class NotFound(LookupError):
    pass


class BadRequest(ValueError):
    pass
