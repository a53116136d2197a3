"""When time points run: anchored to the start, late ones run late, missed ones recorded.

Time point k is planned at ``t0 + k * interval`` (no accumulated drift: a slow time point
delays nothing after it). Its slot lasts until the next one is planned. A time point is
run as long as its slot is open, however late that is; once the next slot has opened it
is missed. Missed time points are recorded as missed, never invented afterwards.
"""

from __future__ import annotations

import dataclasses
import math


def planned_s(t0_s: float, interval_s: float, k: int) -> float:
    return t0_s + k * interval_s


def due_index(t0_s: float, interval_s: float, now_s: float) -> int:
    """Index of the time point whose slot contains ``now_s`` (-1 before the start)."""
    if now_s < t0_s:
        return -1
    # A hair of tolerance so a wake-up exactly on the planned time is not read as the slot before.
    return int(math.floor((now_s - t0_s) / interval_s + 1e-9))


@dataclasses.dataclass(frozen=True)
class Next:
    """What to do now: ``wait`` until ``at_s``, ``run`` time point ``k``, or ``done``.

    ``missed`` lists the time points whose slots closed without them being run.
    """

    action: str
    k: int = -1
    at_s: float = 0.0
    missed: tuple[int, ...] = ()


def next_step(next_k: int, count: int, t0_s: float, interval_s: float, now_s: float) -> Next:
    """The scheduler's decision given the first time point not yet run or recorded."""
    if next_k >= count:
        return Next("done")
    due = due_index(t0_s, interval_s, now_s)
    if due < next_k:
        return Next("wait", next_k, planned_s(t0_s, interval_s, next_k))
    if due >= count:
        return Next("done", missed=tuple(range(next_k, count)))
    return Next("run", due, planned_s(t0_s, interval_s, due), missed=tuple(range(next_k, due)))


def slot_open(k: int, t0_s: float, interval_s: float, now_s: float) -> bool:
    """Whether time point ``k`` may still run (its slot has begun and not closed)."""
    return due_index(t0_s, interval_s, now_s) == k
