"""What the station's operations return: typed results, each with ``to_json()`` for the web API."""

from __future__ import annotations

import dataclasses
from typing import TYPE_CHECKING, Any

from daemon.focus.autofocus import FocusResult
from drivers.base import Position

if TYPE_CHECKING:
    from daemon.timelapse.plan import Plan


def position_json(p: Position | None) -> dict[str, float] | None:
    if p is None:
        return None
    return {"x_um": round(p.x_um, 3), "y_um": round(p.y_um, 3), "z_um": round(p.z_um, 3)}


@dataclasses.dataclass(frozen=True)
class MoveDone:
    position: Position
    well: str | None

    def to_json(self) -> dict[str, Any]:
        return {"position_um": position_json(self.position), "well": self.well}


@dataclasses.dataclass(frozen=True)
class FocusDone:
    """An autofocus run from a manual request; ``run`` ties it to its streamed focus points."""

    result: FocusResult
    run: int
    position: Position | None

    def to_json(self) -> dict[str, Any]:
        return {**self.result.to_dict(), "run": self.run, "position_um": position_json(self.position)}


@dataclasses.dataclass(frozen=True)
class CalibrationStored:
    kind: str
    file: str  # relative to the data folder
    exposure_ms: float
    gain_db: float
    frames: int
    quality: dict[str, Any] | None

    def to_json(self) -> dict[str, Any]:
        return dataclasses.asdict(self)


@dataclasses.dataclass(frozen=True)
class PlanChecked:
    plan: Plan
    positions: list[str]
    warnings: list[str]
    estimate: dict[str, Any]

    def to_json(self) -> dict[str, Any]:
        return {"plan": self.plan.to_dict(), "positions": self.positions, "warnings": self.warnings,
                "estimate": self.estimate}


@dataclasses.dataclass(frozen=True)
class TimelapseStarted:
    id: int
    name: str
    state: str
    warnings: list[str]
    estimate: dict[str, Any]

    def to_json(self) -> dict[str, Any]:
        return dataclasses.asdict(self)


@dataclasses.dataclass(frozen=True)
class ControlDone:
    """A pause, resume or abort: ``done`` once it took effect, else requested (after the
    position being imaged)."""

    id: int
    action: str
    state: str
    done: bool

    @property
    def message(self) -> str:
        if self.done:
            return f"time-lapse {self.id} is {self.state}"
        return f"{self.action} requested; it takes effect after the position being imaged"

    def to_json(self) -> dict[str, Any]:
        return {"id": self.id, "state": self.state, "message": self.message}
