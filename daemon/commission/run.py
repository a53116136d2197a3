"""One commissioning run over the field under the objective, step by step.

1. **Exposure** (:mod:`.exposure`): the camera's range used, nothing saturated; a dark
   lamp is refused here.
2. **Focus**: the autofocus of :mod:`daemon.focus.autofocus`, then the exposure again at
   the plane of best focus.
3. **Texture**: two frames of the field and one after a small stage step
   (:func:`~daemon.commission.registration.texture_ratio`); a field that a step does not
   change beyond camera noise cannot be registered and is refused.
4. **Settling** (:mod:`.settle`) along x and y; from then on every x/y move waits a
   margin over it.
5. **The map** from stage micrometres to image pixels (:mod:`.image_map`): a square grid
   of stage positions round the field, each approached from below on both axes so the
   play of the drives is always taken up the same way, every frame registered against
   the centre's and A fitted by least squares.
6. **Backlash** on x and y, **repeatability**, **backlash** on z (:mod:`.backlash`).

Every position any step will visit is checked against the soft limits before the first
move, so a field too near a limit is refused before anything moves; the driver checks
every move again before it is sent, and the focus never goes above ``z_safe_max_um``.
"""

from __future__ import annotations

import asyncio
import dataclasses
import functools
import time
from typing import TYPE_CHECKING

import numpy as np

from daemon.commission import CommissionRefused
from daemon.commission.backlash import (
    SWEEP_HALF_RANGE_DOF,
    SWEEP_STEP_DOF,
    AxisBacklash,
    FocusBacklash,
    Repeatability,
    measure_focus_backlash,
    measure_repeatability,
    measure_stage_backlash,
)
from daemon.commission.exposure import ExposureResult, set_exposure
from daemon.commission.image_map import MapFit, fit_image_map
from daemon.commission.registration import register, texture_ratio
from daemon.commission.session import BURST_EXPOSURE_DIVISOR, Progress, Session
from daemon.commission.settle import FIRST_WINDOW_S, AxisSettle, measure_settle
from daemon.focus.autofocus import FocusResult, autofocus
from drivers.base import LimitError, Position
from drivers.limits import SoftLimits

if TYPE_CHECKING:
    from daemon.scope import Scope

MIN_TEXTURE_RATIO = 3.0  # a step must change the image three times more than noise does
TEXTURE_STEP_PX = 20.0  # the texture check's step, in pixels of the nominal size
GRID_SPAN = 0.4  # the grid reaches this fraction of the field's shorter side each way


@dataclasses.dataclass(frozen=True)
class CommissionOptions:
    grid: int = 7  # grid positions per axis (odd: the centre is one of them)
    step_um: float | None = None  # grid spacing; None: from the field of view (GRID_SPAN)
    backlash_cycles: int = 3
    repeats: int = 10
    focus_sweeps: int = 2
    settle_move_um: float = 100.0

    def __post_init__(self) -> None:
        if self.grid < 3 or self.grid % 2 == 0:
            raise ValueError(f"the grid needs an odd number of positions per axis, at least 3; got {self.grid}")
        for name in ("backlash_cycles", "repeats", "focus_sweeps"):
            if getattr(self, name) < 1:
                raise ValueError(f"{name} must be at least 1, got {getattr(self, name)}")
        if self.step_um is not None and not self.step_um > 0:
            raise ValueError(f"the grid step must be > 0 um, got {self.step_um}")


@dataclasses.dataclass
class CommissionResult:
    field_um: Position
    started_wall: str
    elapsed_s: float  # on the scope's clock
    exposure: ExposureResult
    focus: FocusResult
    texture_ratio: float
    settle: list[AxisSettle]
    map_fit: MapFit
    grid: int  # positions per axis
    grid_step_um: float
    backlash: dict[str, AxisBacklash]
    focus_backlash: FocusBacklash
    repeatability: Repeatability
    frames: int

    @property
    def settle_s(self) -> float:
        return max(s.settle_s for s in self.settle)


def grid_offsets(n: int, step_um: float) -> list[tuple[float, float]]:
    """The grid's offsets from the centre, row by row in a serpentine (short moves)."""
    half = n // 2
    rows = []
    for j, dy in enumerate(range(-half, half + 1)):
        cols = list(range(-half, half + 1))
        if j % 2:
            cols.reverse()
        rows.extend((dx * step_um, dy * step_um) for dx in cols)
    return rows


def planned_points(x_um: float, y_um: float, z_um: float, *, step_um: float, options: CommissionOptions,
                   approach_um: float, texture_step_um: float) -> list[tuple[Position, str]]:
    """Every x/y position the run will visit, with what it is for (checked before any move)."""
    d = approach_um
    pts: list[tuple[float, float, str]] = [(x_um + texture_step_um, y_um, "texture step")]
    for dx, dy in grid_offsets(options.grid, step_um):
        pts.append((x_um + dx, y_um + dy, "map grid position"))
        pts.append((x_um + dx - d, y_um + dy - d, "approach to a map grid position"))
    pts += [
        (x_um + options.settle_move_um, y_um, "settling move along x"),
        (x_um, y_um + options.settle_move_um, "settling move along y"),
        (x_um - d, y_um, "backlash approach from below"),
        (x_um + d, y_um, "backlash approach from above"),
        (x_um, y_um - d, "backlash approach from below"),
        (x_um, y_um + d, "backlash approach from above"),
        (x_um - d, y_um - d, "approach from below"),
        (x_um + d, y_um + d, "repeatability departure"),
        (x_um - d, y_um + d, "repeatability departure"),
        (x_um + d, y_um - d, "repeatability departure"),
    ]
    return [(Position(px, py, z_um), what) for px, py, what in pts]


def check_plan(scope: Scope, points: list[tuple[Position, str]]) -> None:
    limits = SoftLimits.from_sections(scope.profile.stage, scope.profile.focus, source=scope.profile.path)
    try:
        limits.check_path(points)
    except LimitError as exc:
        raise CommissionRefused(
            f"the commissioning moves would leave the soft limits, so nothing was moved: {exc}; "
            "start from a field farther from the edge of the travel"
        ) from None


def estimated_frames(options: CommissionOptions, burst_frames: int) -> int:
    sweep = int(round(2 * SWEEP_HALF_RANGE_DOF / SWEEP_STEP_DOF)) + 1
    return (
        12  # exposure, twice
        + 25  # autofocus
        + 3  # texture
        + 2 * burst_frames
        + options.grid**2
        + 4 * options.backlash_cycles
        + options.repeats + 1
        + 2 * options.focus_sweeps * sweep
    )


async def commission(
    scope: Scope, *, options: CommissionOptions = CommissionOptions(), progress: Progress | None = None
) -> CommissionResult:
    """Measure the scope over the field under the objective; the caller holds the scope
    (``scope.claim``) and opened it on :func:`~daemon.commission.session.commissioning_profile`."""
    started_wall = time.strftime("%Y-%m-%dT%H:%M:%S%z")
    t0 = scope.clock.now()
    session = Session(scope, progress=progress, total_frames=estimated_frames(options, 150))
    here = await session.here()
    x, y = here.x_um, here.y_um
    profile = scope.profile
    nominal_px = profile.optics.pixel_size_um
    field_short_um = min(profile.camera.width_px, profile.camera.height_px) * nominal_px
    step_um = options.step_um if options.step_um is not None else GRID_SPAN * field_short_um / (options.grid // 2)
    texture_step_um = TEXTURE_STEP_PX * nominal_px
    check_plan(scope, planned_points(x, y, here.z_um, step_um=step_um, options=options,
                                     approach_um=session.approach_um, texture_step_um=texture_step_um))

    session.step("exposure")
    await set_exposure(session)
    session.step("focus")
    focus = await autofocus(scope)
    if not focus.found:
        ratio = await _texture(session, x, y, texture_step_um)
        _refuse_untextured(ratio, texture_step_um)
        raise CommissionRefused(f"no focus found over this field ({focus.message}); focus by hand near the sample and try again")
    session.step("exposure at focus")
    exposure = await set_exposure(session)
    burst_frame_s = max(session.exposure_ms / BURST_EXPOSURE_DIVISOR / 1000.0, 1e-3)
    session.total_frames = estimated_frames(options, int(FIRST_WINDOW_S / burst_frame_s))

    session.step("texture")
    ratio = await _texture(session, x, y, texture_step_um)
    _refuse_untextured(ratio, texture_step_um)

    settle: list[AxisSettle] = []
    for axis in ("x", "y"):
        session.step(f"settling after a move along {axis}")
        settle.append(await measure_settle(session, x, y, axis=axis, move_um=options.settle_move_um))
    session.settled_after(max(s.settle_s for s in settle))

    session.step("stage-to-image map")
    fit = await measure_map(session, x, y, step_um, options.grid)

    backlash: dict[str, AxisBacklash] = {}
    for axis in ("x", "y"):
        session.step(f"backlash along {axis}")
        backlash[axis] = await measure_stage_backlash(session, fit.map, x, y, axis=axis, cycles=options.backlash_cycles)
    session.step("repeatability")
    repeat = await measure_repeatability(session, fit.map, x, y, returns=options.repeats)
    session.step("focus backlash")
    focus_backlash = await measure_focus_backlash(session, focus.z_um, sweeps=options.focus_sweeps)
    await session.go(x, y, side=(-1, -1))
    session.total_frames = session.frames
    session.step("done")
    return CommissionResult(
        field_um=Position(x, y, focus.z_um),
        started_wall=started_wall,
        elapsed_s=scope.clock.now() - t0,
        exposure=exposure,
        focus=focus,
        texture_ratio=ratio,
        settle=settle,
        map_fit=fit,
        grid=options.grid,
        grid_step_um=step_um,
        backlash=backlash,
        focus_backlash=focus_backlash,
        repeatability=repeat,
        frames=session.frames,
    )


async def _texture(session: Session, x_um: float, y_um: float, step_um: float) -> float:
    await session.go(x_um, y_um, side=(-1, -1))
    a = await session.frame()
    b = await session.frame()
    await session.go(x_um + step_um, y_um, side=(0, 0))
    moved = await session.frame()
    await session.go(x_um, y_um, side=(-1, -1), wait=False)
    return float(await asyncio.to_thread(texture_ratio, a.pixels, b.pixels, moved.pixels))


def _refuse_untextured(ratio: float, step_um: float) -> None:
    if ratio < MIN_TEXTURE_RATIO:
        raise CommissionRefused(
            f"the field has no texture to register: a stage step of {step_um:.1f} um changes the image only "
            f"{ratio:.1f} times as much as camera noise does (needs {MIN_TEXTURE_RATIO:g}); put cells or a target "
            "under the objective, or check that the stage moves"
        )


async def measure_map(session: Session, x_um: float, y_um: float, step_um: float, n: int) -> MapFit:
    """Frames on an n x n grid ``step_um`` apart round (x, y), each approached from below,
    registered against the centre's; the map fitted to them."""
    offsets = grid_offsets(n, step_um)
    frames: dict[tuple[float, float], np.ndarray] = {}
    for dx, dy in offsets:
        await session.go(x_um + dx, y_um + dy, side=(-1, -1))
        frames[(dx, dy)] = (await session.frame()).pixels
    centre = frames[(0.0, 0.0)]
    h, w = centre.shape

    async def fit_points(points: list[tuple[float, float]], first: MapFit | None) -> MapFit:
        moves, shifts = [], []
        for dx, dy in points:
            guess = first.map.image_shift_px((dx, dy)) if first is not None else None
            try:
                shift = await asyncio.to_thread(functools.partial(register, centre, frames[(dx, dy)], guess_px=guess))
            except ValueError:
                continue  # too little overlap, or no match where the first map expects it: left out
            moves.append((dx, dy))
            shifts.append(shift.vector)
        try:
            return fit_image_map(np.array(moves).reshape(-1, 2), np.array(shifts).reshape(-1, 2), frame_shape=(h, w))
        except ValueError as exc:
            raise CommissionRefused(f"the stage-to-image map could not be fitted: {exc}") from None

    # The ring next to the centre first (small shifts, registered without help), then every
    # position with the shift that first map expects as the starting point.
    others = [o for o in offsets if o != (0.0, 0.0)]
    inner = [(dx, dy) for dx, dy in others if max(abs(dx), abs(dy)) <= step_um * 1.001]
    fit = await fit_points(others, await fit_points(inner, None))
    dropped = len(offsets) - 1 - int(fit.used.sum())
    if dropped > (len(offsets) - 1) // 4:
        raise CommissionRefused(
            f"the frames of the map grid do not follow the stage moves ({dropped} of {len(offsets) - 1} "
            f"registrations failed; rms residual of the rest {fit.rms_residual_px:.2f} px): the field may have "
            "too little texture, or the stage or sample moves on its own"
        )
    return fit
