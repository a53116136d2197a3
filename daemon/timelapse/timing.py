"""When time points run: anchored to the start, a little late is late, more is missed.

The rule (the plan check prints it for each plan):

* Time point k is planned at ``t0 + k * interval`` (no accumulated drift: a slow time
  point delays nothing after it).
* It is taken late while it is less than the late tolerance past its plan: half an
  interval, at most 15 minutes (``late_tolerance_s``). Its start is recorded as it was.
* Beyond the tolerance it is recorded as missed, with the reason, and never taken: a
  time point is never hours late, and a missed one is never invented afterwards.
* After a restart (the process stopped by the user, a crash, a power cut) the run goes
  on at the next time point that is still on time by that rule; a time point left half
  done is completed only while it is within its tolerance.
"""

from __future__ import annotations

import dataclasses
import math


# A time point may start this much of an interval late, and never more than LATE_MAX_S.
LATE_FRACTION = 0.5
LATE_MAX_S = 900.0


def planned_s(t0_s: float, interval_s: float, k: int) -> float:
    return t0_s + k * interval_s


def late_tolerance_s(interval_s: float) -> float:
    """How late past its plan a time point may still start (s)."""
    return min(LATE_FRACTION * interval_s, LATE_MAX_S)


def describe_rule(interval_s: float) -> str:
    """The lateness rule for this interval, in one line for people."""
    tol = late_tolerance_s(interval_s)
    return (f"a time point starting up to {tol:g} s after its planned time is taken late; "
            f"later than that it is recorded as missed and the next on-time one is taken")


def due_index(t0_s: float, interval_s: float, now_s: float) -> int:
    """Index of the time point whose slot contains ``now_s`` (-1 before the start)."""
    if now_s < t0_s:
        return -1
    # A hair of tolerance so a wake-up exactly on the planned time is not read as the slot before.
    return int(math.floor((now_s - t0_s) / interval_s + 1e-9))


@dataclasses.dataclass(frozen=True)
class Next:
    """What to do now: ``wait`` until ``at_s``, ``run`` time point ``k``, or ``done``.

    ``missed`` is the range (first, last) of time points now missed, both included, or
    ``()``: a range, so that a long downtime on a short interval costs no memory.
    """

    action: str
    k: int = -1
    at_s: float = 0.0
    missed: tuple[int, int] | tuple[()] = ()


def next_step(next_k: int, count: int, t0_s: float, interval_s: float, now_s: float) -> Next:
    """The scheduler's decision given the first time point not yet run or recorded."""
    if next_k >= count:
        return Next("done")
    due = due_index(t0_s, interval_s, now_s)
    if due < next_k:
        return Next("wait", next_k, planned_s(t0_s, interval_s, next_k))
    if due >= count:
        return Next("done", missed=(next_k, count - 1))
    if now_s - planned_s(t0_s, interval_s, due) < late_tolerance_s(interval_s):
        return Next("run", due, planned_s(t0_s, interval_s, due), missed=(next_k, due - 1) if due > next_k else ())
    # Too late for this one as well: it is missed too, and the next one is waited for.
    missed = (next_k, due)
    if due + 1 >= count:
        return Next("done", missed=missed)
    return Next("wait", due + 1, planned_s(t0_s, interval_s, due + 1), missed=missed)


def slot_open(k: int, t0_s: float, interval_s: float, now_s: float) -> bool:
    """Whether time point ``k`` may still run (started, and less than the tolerance late)."""
    return 0.0 <= now_s - planned_s(t0_s, interval_s, k) < late_tolerance_s(interval_s)
