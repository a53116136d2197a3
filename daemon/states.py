"""The states a time-lapse, its time points, positions, frames and focus searches can be in.

String enums: a member is its own value (``TimelapseState.RUNNING == "running"``), so it
is stored in the index, written to JSON and compared with rows read back as it is; the
index's CHECK constraints are built from these lists, so a state cannot be stored that
is not named here.
"""

from __future__ import annotations

from enum import StrEnum


class TimelapseState(StrEnum):
    RUNNING = "running"
    PAUSED = "paused"
    COMPLETED = "completed"  # every time point run or recorded as missed
    ABORTED = "aborted"  # by request
    STOPPED = "stopped"  # by storage: disk full, I/O error, free-space reserve reached


# Why a run of an unfinished time-lapse ended, as kept on it until it resumes: a shutdown
# asked for (Ctrl-C, SIGTERM, systemctl stop) is the user's; anything else is an interruption.
STOPPED_BY_USER = "stopped by the user"
INTERRUPTED = "interrupted (a crash or a power cut)"

# A time-lapse in one of these can be resumed (after a restart) or paused/aborted.
UNFINISHED_STATES = (TimelapseState.RUNNING, TimelapseState.PAUSED)


class TimePointState(StrEnum):
    RUNNING = "running"  # started; left so by a crash, a pause or a shutdown until resumed
    DONE = "done"  # every position imaged
    PARTIAL = "partial"  # some positions imaged
    MISSED = "missed"  # its slot closed before it could run (with the reason)
    FAILED = "failed"  # no position imaged


# Time points that have ended one way or another.
ENDED_TIME_POINT_STATES = (TimePointState.DONE, TimePointState.PARTIAL, TimePointState.FAILED, TimePointState.MISSED)


class PositionState(StrEnum):
    OK = "ok"
    FAILED = "failed"  # a hardware fault or an internal error there, with the reason
    SKIPPED = "skipped"  # never reached: its time point was closed early


class FrameState(StrEnum):
    """What reconciliation found of an indexed frame's file."""

    OK = "ok"
    MISSING = "missing"
    DAMAGED = "damaged"  # wrong size or checksum


class FocusState(StrEnum):
    """How focus went for a well at one time point (see :mod:`daemon.culture.readings`)."""

    FOUND = "found"  # a search found the plane at one site at least
    FAILED = "failed"  # every search there failed
    NOT_SEARCHED = "not_searched"  # focus off, or the plane remembered from the first time point


class Request(StrEnum):
    """What may be asked of a running time-lapse, here or from another process."""

    PAUSE = "pause"
    RESUME = "resume"
    ABORT = "abort"
    SHUTDOWN = "shutdown"  # this process only: stop, leaving the time-lapse to be resumed


# Requests another process may post through the index.
POSTED_REQUESTS = (Request.PAUSE, Request.RESUME, Request.ABORT)
# Requests that end a time point's run between positions, leaving it open.
STOP_REQUESTS = (Request.PAUSE, Request.ABORT, Request.SHUTDOWN)


def values(states: type[StrEnum] | tuple[StrEnum, ...]) -> tuple[str, ...]:
    """Plain string values, for SQL ``IN (...)`` lists and messages."""
    return tuple(str(s.value) for s in states)
