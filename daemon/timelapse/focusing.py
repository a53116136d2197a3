"""Where a time-lapse focuses at each position: the plan's focus policy.

* ``track`` (every time point): the focus tracker predicts the plane from the focus
  surface and what it found before, and searches around it;
* ``first``: focus at the first time point, then image every position in the plane
  found there (searching again only where the first search found nothing);
* ``off``: every position in the plane the user left the focus at.

With nothing known yet (the first positions of a new time-lapse) a cold search runs,
at most :data:`FIRST_FIND_TRIES` times per time point. Everything here is part of the
time-lapse's resume state (:meth:`FocusPolicy.resume_state`), so a restarted daemon goes
on from the planes it had found.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import TYPE_CHECKING, Any

from daemon.focus.metrics import DEFAULT_METRIC

if TYPE_CHECKING:
    from daemon.focus.autofocus import FocusPoint, FocusResult
    from daemon.focus.tracking import FocusTracker
    from daemon.profile import Profile
    from daemon.scope import Scope
    from daemon.timelapse.plan import PlannedPosition

# Cold focus searches per time point while no plane is known yet: enough to get past an
# empty well or a bubble, few enough that a dead lamp does not cost a search at every
# position.
FIRST_FIND_TRIES = 2


class FocusPolicy:
    """The plan's focus policy over one time-lapse, with what it has learnt so far."""

    def __init__(
        self, autofocus: str, tracker: FocusTracker, first_focus: dict[str, Any] | None = None,
        *, metric: str = DEFAULT_METRIC,
    ) -> None:
        self.autofocus = autofocus
        self.metric = metric
        self.tracker = tracker
        # Planes found at the first time point (policy "first"), and the fixed plane (policy "off").
        self.first_focus: dict[str, Any] = first_focus or {"planes": {}, "fixed_z_um": None}
        self._first_finds: dict[int, int] = {}

    @classmethod
    def from_saved(
        cls, profile: Profile, autofocus: str, saved: dict[str, Any], *, metric: str = DEFAULT_METRIC
    ) -> FocusPolicy:
        """The policy as :meth:`resume_state` left it (or a fresh one)."""
        from daemon.focus.tracking import FocusTracker

        tracker = FocusTracker.from_dict(profile, saved["tracker"]) if saved.get("tracker") else FocusTracker(profile)
        return cls(autofocus, tracker, saved.get("first_focus"), metric=metric)

    def resume_state(self) -> dict[str, Any]:
        return {"tracker": self.tracker.to_dict(), "first_focus": self.first_focus}

    async def focus(
        self, scope: Scope, k: int, pos: PlannedPosition, on_point: Callable[[FocusPoint], None]
    ) -> tuple[float, FocusResult | None]:
        """The plane to image ``pos`` at, time point ``k``, and the search's result (None: no search)."""
        planes: dict[str, float] = self.first_focus["planes"]
        if self.autofocus == "off":
            if self.first_focus.get("fixed_z_um") is None:
                # Focus off: every position is imaged in the plane the user left the focus at.
                self.first_focus["fixed_z_um"] = (await scope.position()).z_um
            return float(self.first_focus["fixed_z_um"]), None
        if self.autofocus == "first" and pos.key in planes:
            return float(planes[pos.key]), None
        nothing_known = not any(state.planes for state in self.tracker.keys.values())
        if nothing_known and self._first_finds.get(k, 0) < FIRST_FIND_TRIES:
            self._first_finds[k] = self._first_finds.get(k, 0) + 1
            result = await self._first_find(scope, pos, on_point)
        else:
            result = await self.tracker.focus(scope, pos.key, pos.x_um, pos.y_um, on_point=on_point, metric=self.metric)
        if self.autofocus == "first" and result.found:
            planes[pos.key] = result.z_um
        return result.z_um, result

    async def _first_find(
        self, scope: Scope, pos: PlannedPosition, on_point: Callable[[FocusPoint], None]
    ) -> FocusResult:
        """Focus with nothing known yet: a cold search around the present focus, or around
        the profile's ``[focus] nominal_z_um`` when the focus sits far from it (homing
        leaves the objective at the bottom of its travel). After this the tracker's focus
        surface predicts every other position.
        """
        from daemon.focus.autofocus import autofocus

        result = await autofocus(scope, on_point=on_point, metric=self.metric)
        result.message += " (first search of the time-lapse)"
        return self.tracker.record(pos.key, pos.x_um, pos.y_um, result)
