"""Bringing the scope back after a hardware fault in the middle of a time point.

A controller that reset has lost its position: it is homed again. A serial link that
dropped is reopened (the G-code driver retries by itself on the next command; homing is
that command). A camera that vanished is closed and opened again, with a few bounded
retries on the scope's clock, since a re-plugged USB camera takes a moment to reappear.
"""

from __future__ import annotations

import contextlib
from typing import TYPE_CHECKING

from drivers.base import CameraError, HardwareError, LimitError, MotionError, PositionUnknownError

if TYPE_CHECKING:
    from daemon.scope import Scope

CAMERA_ATTEMPTS = 4
FIRST_RETRY_S = 1.0


async def _reopen_camera(scope: Scope) -> None:
    delay = FIRST_RETRY_S
    last: HardwareError | None = None
    for attempt in range(CAMERA_ATTEMPTS):
        with contextlib.suppress(HardwareError, OSError):
            await scope.camera.close()
        try:
            await scope.camera.open()
            return
        except HardwareError as exc:
            last = exc
        if attempt < CAMERA_ATTEMPTS - 1:
            await scope.clock.sleep(delay)
            delay *= 2
    raise CameraError(f"camera did not come back after {CAMERA_ATTEMPTS} tries: {last}")


async def _restore_motion(scope: Scope) -> str:
    try:
        await scope.position()
        return "controller answered with a known position"
    except PositionUnknownError:
        pass
    except MotionError:
        reconnect = getattr(scope.motion, "reconnect", None)
        if reconnect is not None:
            await reconnect()
    await scope.motion.home()
    await scope.position()
    return "stage homed again"


async def recover(scope: Scope, error: HardwareError) -> str:
    """Bring the scope back after ``error``; returns what was done.

    Raises :class:`HardwareError` when the scope could not be brought back (the caller
    records the remaining positions of the time point as failed and tries again at the
    next time point).
    """
    if isinstance(error, LimitError):
        return "nothing to recover: the move was refused before anything was sent"
    done: list[str] = []
    if not isinstance(error, MotionError):
        await _reopen_camera(scope)
        done.append("camera reopened")
    if not isinstance(error, CameraError):
        done.append(await _restore_motion(scope))
    return "; ".join(done)
