"""The profile settings the G-code driver and the simulated board read.

Structural types, so that the drivers need only the fields below from whatever holds
the profile's ``[stage]``, ``[focus]`` and ``[illumination]`` sections.
"""

from __future__ import annotations

from typing import Protocol


class StageSettings(Protocol):
    x_min_um: float
    x_max_um: float
    y_min_um: float
    y_max_um: float
    xy_speed_um_s: float
    xy_accel_um_s2: float
    settle_ms: float
    backlash_x_um: float     # 0: x moves go straight to their target
    backlash_y_um: float
    reply_timeout_s: float   # real seconds: a property of the serial link
    move_timeout_s: float    # seconds on the scope's clock
    home_on_connect: bool


class FocusSettings(Protocol):
    z_min_um: float
    z_safe_max_um: float
    z_speed_um_s: float
    z_accel_um_s2: float
    backlash_um: float
    settle_ms: float


class LampSettings(Protocol):
    control: str             # "always_on": the lamp is not switched by the controller
    channel: int             # the controller's PWM output driving the lamp
