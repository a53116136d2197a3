"""The G-code motion controller driver: dialect, serial link, line protocol, motion rules.

``from drivers.gcode import GcodeController`` is the driver; the wire format and the
planner's kinematics are :mod:`drivers.gcode.dialect`. Below: what a profile sets for this
driver beyond the common ``[stage]`` options, and how the registry opens it.
"""

from __future__ import annotations

import dataclasses

from drivers.clock import WallClock
from drivers.gcode.controller import GcodeController
from drivers.gcode.detect import DIALECT_CHOICES
from drivers.options import option
from drivers.registry import StageBuild, StageContext, StageDriver
from drivers.sections import driver_options
from drivers.truth import NoTruth

__all__ = ["DRIVER", "GcodeController", "GcodeOptions"]

BAUD_RATES = (9600, 19200, 38400, 57600, 115200, 250000, 500000, 1000000)


@dataclasses.dataclass(frozen=True, kw_only=True)
class GcodeOptions:
    port: str = option("", doc="serial port of the G-code controller, e.g. /dev/ttyUSB0")
    baud: int = option(115200, doc="serial speed", choices=BAUD_RATES)
    dialect: str = option(
        "auto",
        doc="the board's G-code dialect: reprap (RepRap family), grbl, or auto (found by asking the board at connect)",
        choices=DIALECT_CHOICES,
    )
    line_checksums: bool = option(
        True,
        doc="send lines numbered and checksummed where the dialect has it (reprap), so a damaged line is resent, not run",
    )

    def __post_init__(self) -> None:
        if not self.port:
            raise ValueError("port: the gcode driver needs a serial port, e.g. /dev/ttyUSB0")


def open_stage(ctx: StageContext) -> StageBuild:
    """A controller board on a serial port, on the wall clock; nothing knows the truth."""
    profile = ctx.profile
    opts = driver_options(profile.stage, GcodeOptions)
    clock = WallClock()
    motion = GcodeController(
        opts.port,
        baud=opts.baud,
        stage=profile.stage,
        focus=profile.focus,
        illumination=profile.illumination,
        clock=clock,
        profile_path=profile.path,
        dialect=opts.dialect,
        line_checksums=opts.line_checksums,
    )
    return StageBuild(motion=motion, clock=clock, truth=NoTruth(), stop=lambda: None)


DRIVER = StageDriver(
    name="gcode",
    summary="G-code controller board (RepRap family or grbl) on a USB or UART serial port",
    options=GcodeOptions,
    open=open_stage,
)
