"""Manual control: moving the stage and focus, and taking a frame, as a person asks.

The command line (``phasewatch focus``, ``capture``, ``calibrate flat``, ``correct``) and
the web API (``POST /api/v1/stage/move``) take the same :class:`MoveRequest`, resolve it
through the same vessel-to-stage map and move the same way; soft limits are checked by
the motion driver before anything is sent, whoever asked.
"""

from __future__ import annotations

import dataclasses
from pathlib import Path
from typing import TYPE_CHECKING

from daemon.requests import camera_option
from drivers.base import Frame, Position
from drivers.options import option

if TYPE_CHECKING:
    from daemon.profile import Profile
    from daemon.scope import Scope

MOVE_MODES = ("absolute", "relative")


@dataclasses.dataclass(frozen=True, kw_only=True)
class MoveRequest:
    """Where to move: stage and focus positions, or the centre of a well."""

    mode: str = option("absolute", doc="'absolute': go to the positions given; 'relative': move by them",
                       choices=MOVE_MODES)
    x_um: float | None = option(None, doc="stage x", unit="um")
    y_um: float | None = option(None, doc="stage y", unit="um")
    z_um: float | None = option(None, doc="focus position (never above [focus] z_safe_max_um)", unit="um")
    well: str | None = option(None, doc="move to this well's centre, e.g. 'B3', through the vessel-to-stage map "
                                        "(taught with 'phasewatch vessel teach'; built in on the simulated scope)")
    vessel: str | None = option(None, doc="vessel format the well is in (default: the one the stage map was taught on)")

    def __post_init__(self) -> None:
        if self.well is None and self.x_um is None and self.y_um is None and self.z_um is None:
            raise ValueError("give at least one of x_um, y_um, z_um (micrometres), or a well such as 'B3'")
        if self.well is not None and (self.mode == "relative" or self.x_um is not None or self.y_um is not None):
            raise ValueError("well: a move to a well takes no x_um or y_um and no relative mode (z_um may be given)")
        if self.vessel is not None and self.well is None:
            raise ValueError("vessel: names the vessel format of a well; give the well too")

    @property
    def relative(self) -> bool:
        return self.mode == "relative"


@dataclasses.dataclass(frozen=True, slots=True)
class MoveTarget:
    """A move with its well resolved to stage positions (um); None leaves an axis alone."""

    x_um: float | None
    y_um: float | None
    z_um: float | None
    relative: bool = False
    well: str | None = None


def resolve_move(request: MoveRequest, profile: Profile, data_dir: Path) -> MoveTarget:
    """The stage positions of a move (blocking: reads the stage map for a well).

    Raises ConfigError (option ``well``) for a well the vessel does not have or when no
    stage map has been taught.
    """
    x_um, y_um = request.x_um, request.y_um
    if request.well is not None:
        from daemon.vessels.stage_map import well_position_um

        x_um, y_um = well_position_um(data_dir, profile, request.well, request.vessel)
    return MoveTarget(x_um, y_um, request.z_um, relative=request.relative, well=request.well)


async def apply_move(scope: Scope, target: MoveTarget) -> Position:
    """Move and wait until settled; the caller holds the scope."""
    if not target.relative:
        return await scope.move_to(x_um=target.x_um, y_um=target.y_um, z_um=target.z_um)
    here = await scope.position()
    return await scope.move_to(
        x_um=None if target.x_um is None else here.x_um + target.x_um,
        y_um=None if target.y_um is None else here.y_um + target.y_um,
        z_um=None if target.z_um is None else here.z_um + target.z_um,
    )


@dataclasses.dataclass(frozen=True, kw_only=True)
class CaptureRequest:
    """Camera settings for one frame; absent ones are the profile's."""

    exposure_ms: float | None = camera_option("exposure_ms", doc="exposure (default: the profile's [camera] exposure_ms)")
    gain_db: float | None = camera_option("gain_db", doc="analogue gain (default: the profile's [camera] gain_db)")


async def capture(scope: Scope, request: CaptureRequest) -> Frame:
    """One frame with the lamp on as briefly as the camera allows; the caller holds the scope."""
    return await scope.capture(exposure_ms=request.exposure_ms, gain_db=request.gain_db)
