"""Soft limits of the stage and focus, checked before any move is sent to a controller.

The limits come from the profile: ``[stage] x_min_um .. x_max_um, y_min_um .. y_max_um``
and ``[focus] z_min_um .. z_safe_max_um``. Above ``z_safe_max_um`` the objective touches
the vessel, so no target and no intermediate point of a planned move may lie above it.

Straight-line moves between two points inside the box stay inside it (the box is
convex), so checking every waypoint of a plan checks the whole path. The focus
approach (:func:`plan_focus_approach`) ends every focus move with a short move upwards,
so the drive's backlash is always taken up in the same direction; the stage's x and y
do the same (:func:`plan_approach`) once their backlash is known.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Sequence
from pathlib import Path
from typing import TYPE_CHECKING

from drivers.base import LimitError, Position

if TYPE_CHECKING:
    from drivers.sections import FocusSection, StageSection


def approach_overshoot_um(backlash_um: float) -> float:
    """How far below a lower focus target the drive goes before coming up to it.

    The overshoot must exceed the backlash so the play is fully taken up on the way
    back; backlash plus half of it (at least 5 um) leaves room for a backlash that
    has grown with wear (common practice, not from a standard).
    """
    return backlash_um + max(5.0, 0.5 * backlash_um)


def plan_approach(current_um: float, target_um: float, *, backlash_um: float, lower_um: float) -> list[float]:
    """Positions of one axis to visit, in order, so that the last one is reached from below.

    A target above the current position is reached directly (already from below). A
    lower target is reached via ``target - overshoot`` (see :func:`approach_overshoot_um`),
    clamped at the axis' lower soft limit ``lower_um`` since the limit holds for
    intermediate points too; a target closer than the overshoot to it therefore gets a
    shorter approach.
    """
    if target_um >= current_um:
        return [target_um]
    below_um = max(lower_um, target_um - approach_overshoot_um(backlash_um))
    if below_um >= target_um:
        return [target_um]
    return [below_um, target_um]


def plan_focus_approach(
    current_z_um: float, target_z_um: float, *, backlash_um: float, z_min_um: float
) -> list[float]:
    """Focus positions to visit, in order, so that the last one is reached from below
    (:func:`plan_approach` on the focus axis, whose lower limit is ``z_min_um``)."""
    return plan_approach(current_z_um, target_z_um, backlash_um=backlash_um, lower_um=z_min_um)


@dataclasses.dataclass(frozen=True, slots=True)
class SoftLimits:
    """The profile's travel box in stage coordinates (um), with where it was set."""

    x_min_um: float
    x_max_um: float
    y_min_um: float
    y_max_um: float
    z_min_um: float
    z_safe_max_um: float
    source: str = "the profile"

    @classmethod
    def from_sections(
        cls, stage: StageSection, focus: FocusSection, *, source: str | Path | None = None
    ) -> SoftLimits:
        return cls(
            x_min_um=stage.x_min_um,
            x_max_um=stage.x_max_um,
            y_min_um=stage.y_min_um,
            y_max_um=stage.y_max_um,
            z_min_um=focus.z_min_um,
            z_safe_max_um=focus.z_safe_max_um,
            source=str(source) if source is not None else "the profile",
        )

    def check(self, position: Position, *, what: str = "") -> None:
        """Raise :class:`LimitError` naming the limit if ``position`` lies outside the box.

        ``what`` says which point of a plan this is (e.g. "backlash approach point").
        """
        suffix = f" ({what})" if what else ""
        axes = (
            ("x", position.x_um, "stage", "x_min_um", self.x_min_um, "x_max_um", self.x_max_um, "stage soft limit"),
            ("y", position.y_um, "stage", "y_min_um", self.y_min_um, "y_max_um", self.y_max_um, "stage soft limit"),
            ("z", position.z_um, "focus", "z_min_um", self.z_min_um, "z_safe_max_um", self.z_safe_max_um, "focus safe limit"),
        )
        for axis, value, section, lo_name, lo, hi_name, hi, upper_words in axes:
            where = f"[{section}] in {self.source}"
            if not math.isfinite(value):
                raise LimitError(f"{axis} {value} um{suffix} is not a finite number; nothing was sent")
            if value > hi:
                raise LimitError(
                    f"{axis} {value:.1f} um{suffix} is above the {upper_words} {hi_name} = {hi:.1f} um "
                    f"({where}); nothing was sent"
                )
            if value < lo:
                lower_words = "stage soft limit" if section == "stage" else "focus lower limit"
                raise LimitError(
                    f"{axis} {value:.1f} um{suffix} is below the {lower_words} {lo_name} = {lo:.1f} um "
                    f"({where}); nothing was sent"
                )

    def check_path(self, waypoints: Sequence[tuple[Position, str]]) -> None:
        """Check every waypoint ``(position, label)`` of a planned move before any is sent."""
        for position, label in waypoints:
            self.check(position, what=label)

    def contains(self, position: Position) -> bool:
        try:
            self.check(position)
        except LimitError:
            return False
        return True
