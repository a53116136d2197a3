"""Time-lapse plans: what to image, where, how often, and whether it fits its interval.

A plan is a TOML or JSON file::

    name = "KVL-7 growth curve, plate LR-0412"
    vessel = "96-well"
    wells = "B2:G11"          # or ["B2", "C5:C7"], or "all"
    sites_per_well = 4
    interval_s = 1800
    duration_s = 259200       # or count = 145
    autofocus = "track"       # "track" (every time point), "first" (first only), "off"
    exposure_ms = 20.0        # leave out for the profile's default
    correction = true
    save = "corrected"        # "corrected", "raw", "both"

    [z_stack]                 # optional
    count = 5
    step_um = 2.0

    [[conditions]]            # optional: what was done to which wells
    wells = "B2:B6"
    label = "vehicle"
    notes = "0.1 % DMSO, added 09:30"

    [[conditions]]
    wells = ["C2:C6"]
    label = "compound R-17 5 uM"

Loading is strict in the style of :mod:`drivers.options`: every error names the key and
says what is allowed.
"""

from __future__ import annotations

import dataclasses
import json
import math
import tomllib
from pathlib import Path
from typing import TYPE_CHECKING, Any

from daemon.focus.metrics import DEFAULT_METRIC, METRICS
from drivers.options import ConfigError, load_section, option, section
from daemon.vessels.geometry import Vessel, VesselError, Well, get_vessel, parse_wells
from daemon.vessels.stage_map import StageMap, sim_vessel_name
from drivers.camera_common import FRAME_READOUT_S
from drivers.gcode.dialect import trapezoid_duration_s

if TYPE_CHECKING:
    from daemon.profile import Profile

AUTOFOCUS_POLICIES = ("track", "first", "off")
SAVE_CHOICES = ("corrected", "raw", "both")

# Frames per autofocus run. A cold search is planned at its budget (docs/TARGETS.md: <= 15);
# a tracked position at what the tracker takes when its slope check holds (two frames on
# the flanks, one to confirm: the median of the focus benchmark), so that a steady time
# point's estimate is what a run of them takes.
COLD_AUTOFOCUS_FRAMES = 15
TRACK_AUTOFOCUS_FRAMES = 3
# Range a cold search covers (+-150 um start error, docs/TARGETS.md).
COLD_SEARCH_RANGE_UM = 300.0
# What the tracker's slope check spans: a frame about one peak width (~5 um at 10x/0.25)
# either side of the predicted plane.
TRACK_CHECK_SPAN_UM = 10.0
# Software time per saved frame: the target (docs/TARGETS.md) for correction, metrics, TIFF write and index.
SOFTWARE_S_PER_SAVED_FRAME = 0.030
# Focus score on an autofocus frame (a metric on a full frame, no write).
SOFTWARE_S_PER_FOCUS_FRAME = 0.008
# Gap between neighbouring sites as a fraction of the field: sites never overlap, so no
# patch of cells is lit twice per time point.
SITE_GAP_FRACTION = 0.1
# Sites are spread over the well, but no further apart than this many fields.
SITE_SPREAD_MAX_FIELDS = 3.0
# Above this fraction of the interval a time point leaves too little room for a retried
# position or a widened focus search (common practice: keep a quarter free).
INTERVAL_HEADROOM = 0.75
# Field assumed when the caller gives none: a 10x objective on a 1/3-inch sensor sees
# about 0.5 x 0.4 mm, a 4x one about 1.2 x 0.9 mm; 1 mm keeps sites apart for both.
DEFAULT_FIELD_UM = (1000.0, 1000.0)


@dataclasses.dataclass(frozen=True)
class ZStack:
    count: int
    step_um: float

    @property
    def span_um(self) -> float:
        return (self.count - 1) * self.step_um


# Labels go into OME metadata, CSV columns and plot legends: one short line.
MAX_CONDITION_LABEL = 80
MAX_CONDITION_NOTES = 2000


@dataclasses.dataclass(frozen=True)
class WellCondition:
    """The condition or treatment of one well, and free notes about it."""

    label: str
    notes: str = ""


@dataclasses.dataclass(frozen=True)
class Plan:
    name: str
    vessel: str
    wells: list[str]
    sites_per_well: int
    interval_s: float
    count: int
    autofocus: str
    z_stack: ZStack | None
    exposure_ms: float | None
    gain_db: float | None
    correction: bool
    save: str
    notes: str = ""
    vessel_file: str = ""
    site_spacing_um: float | None = None
    source: str = ""
    focus_metric: str = DEFAULT_METRIC
    conditions: dict[str, WellCondition] = dataclasses.field(default_factory=dict)

    def condition_of(self, well: str) -> WellCondition:
        """The well's condition; an empty label where the plan gives none."""
        return self.conditions.get(well, WellCondition(""))

    def condition_groups(self) -> list[dict[str, Any]]:
        """The conditions as the plan file writes them: one table per label and notes, wells in plate order."""
        groups: dict[tuple[str, str], list[str]] = {}
        for well in self.wells:
            c = self.conditions.get(well)
            if c is not None:
                groups.setdefault((c.label, c.notes), []).append(well)
        return [{"wells": wells, "label": label, "notes": notes} for (label, notes), wells in groups.items()]

    @property
    def duration_s(self) -> float:
        """Time from the first time point to the last."""
        return (self.count - 1) * self.interval_s

    @property
    def frames_per_position(self) -> int:
        return self.z_stack.count if self.z_stack else 1

    def planes_um(self, focus_z_um: float) -> list[float]:
        """The planes imaged at a position: the focal plane, or a z-stack centred on it, bottom up."""
        if self.z_stack is None:
            return [focus_z_um]
        n, step = self.z_stack.count, self.z_stack.step_um
        return [focus_z_um + (i - (n - 1) / 2.0) * step for i in range(n)]

    @property
    def analysis_plane(self) -> int:
        """Index of the plane analysed for confluence: the focal plane (or the one just above it)."""
        return (self.z_stack.count // 2) if self.z_stack else 0

    def get_vessel(self) -> Vessel:
        return get_vessel(self.vessel, Path(self.vessel_file) if self.vessel_file else None)

    def to_dict(self) -> dict[str, Any]:
        d: dict[str, Any] = {
            "name": self.name, "vessel": self.vessel, "wells": list(self.wells),
            "sites_per_well": self.sites_per_well, "interval_s": self.interval_s, "count": self.count,
            "autofocus": self.autofocus, "focus_metric": self.focus_metric, "correction": self.correction, "save": self.save, "notes": self.notes,
        }
        if self.z_stack:
            d["z_stack"] = {"count": self.z_stack.count, "step_um": self.z_stack.step_um}
        for key in ("exposure_ms", "gain_db", "site_spacing_um"):
            if getattr(self, key) is not None:
                d[key] = getattr(self, key)
        if self.vessel_file:
            d["vessel_file"] = self.vessel_file
        if self.conditions:
            d["conditions"] = self.condition_groups()
        return d

    @classmethod
    def from_dict(cls, raw: dict[str, Any], *, file: str | Path = "plan", base_dir: Path | None = None) -> Plan:
        return _plan_from_table(raw, file=file, base_dir=base_dir)


# --- strict loading ------------------------------------------------------------------


@dataclasses.dataclass(frozen=True, kw_only=True)
class ZStackOptions:
    count: int = option(1, doc="planes per position (1 = no z-stack)", min=1, max=201)
    step_um: float = option(2.0, doc="focus step between planes", min=0.05, max=500.0, unit="um")


@dataclasses.dataclass(frozen=True, kw_only=True)
class ConditionOptions:
    wells: str | list[str] = option(doc="wells of this condition: 'B2:B4', ['C3', 'D3'] (all must be in the plan)")
    label: str = option(doc="condition or treatment, e.g. 'vehicle' or 'compound R-17 5 uM'")
    notes: str = option("", doc="free notes about these wells")

    def __post_init__(self) -> None:
        if not self.label.strip():
            raise ValueError("label: must not be empty; leave the wells out of conditions instead")
        if len(self.label) > MAX_CONDITION_LABEL or "\n" in self.label:
            raise ValueError(f"label: one line of at most {MAX_CONDITION_LABEL} characters")
        if len(self.notes) > MAX_CONDITION_NOTES:
            raise ValueError(f"notes: at most {MAX_CONDITION_NOTES} characters")


@dataclasses.dataclass(frozen=True, kw_only=True)
class PlanOptions:
    name: str = option(doc="name of the time-lapse, shown in lists and exports")
    vessel: str = option(doc="vessel type, e.g. '96-well', '24-well', '35mm-dish' (phasewatch vessel list)")
    vessel_file: str = option("", doc="extra vessels file (TOML), relative to the plan, for vessels of your own")
    wells: str | list[str] = option(doc="wells to image: 'B2:C5', ['A1', 'B2:B4'] or 'all'")
    sites_per_well: int = option(1, doc="fields imaged in each well", min=1, max=400)
    site_spacing_um: float | None = option(None, doc="centre-to-centre distance of sites in a well; leave out to spread them over the well", min=1.0, max=100000.0, unit="um")
    interval_s: float = option(doc="time from one time point's start to the next", min=1.0, max=30 * 86400.0, unit="s")
    count: int | None = option(None, doc="number of time points (or give duration_s)", min=1, max=10_000_000)
    duration_s: float | None = option(None, doc="time from the first time point to the last (or give count)", min=0.0, max=3650 * 86400.0, unit="s")
    autofocus: str = option("track", doc="'track': every time point, from the last plane; 'first': first time point only; 'off'", choices=AUTOFOCUS_POLICIES)
    focus_metric: str = option(DEFAULT_METRIC, doc="focus metric of every search (phasewatch focus --help lists them)", choices=tuple(METRICS))
    z_stack: ZStackOptions = section(ZStackOptions, doc="optional z-stack at every position")
    exposure_ms: float | None = option(None, doc="exposure; leave out for the profile's default", min=0.01, max=10000.0, unit="ms")
    gain_db: float | None = option(None, doc="analogue gain; leave out for the profile's default", min=0.0, max=48.0, unit="dB")
    correction: bool = option(True, doc="apply dark and flat-field correction")
    save: str = option("corrected", doc="which frames to store", choices=SAVE_CHOICES)
    notes: str = option("", doc="free text stored with the data")
    conditions: list[Any] = option([], doc="condition label and notes per well or group of wells: tables of wells, label, notes")

    def __post_init__(self) -> None:
        if self.count is None and self.duration_s is None:
            raise ValueError("count: give either count (number of time points) or duration_s")
        if self.count is not None and self.duration_s is not None:
            raise ValueError("duration_s: give count or duration_s, not both")
        if not self.correction and self.save in ("corrected", "both"):
            raise ValueError(f"save: '{self.save}' needs correction = true; with correction off use save = 'raw'")
        if not self.name.strip():
            raise ValueError("name: must not be empty")


def counted(n: int, noun: str) -> str:
    """'1 well', '3 wells': messages a person reads count in words that agree."""
    return f"{n} {noun}" if n == 1 else f"{n} {noun}s"


def count_from_duration(duration_s: float, interval_s: float) -> int:
    """Time points at t0, t0 + interval, ... up to and including t0 + duration."""
    return int(math.floor(duration_s / interval_s + 1e-9)) + 1


def _plan_from_table(raw: Any, *, file: str | Path, base_dir: Path | None) -> Plan:
    return plan_from_options(load_section(PlanOptions, raw, file=file, section=""), file=file, base_dir=base_dir)


def plan_from_options(opts: PlanOptions, *, file: str | Path = "plan", base_dir: Path | None = None) -> Plan:
    """The plan of loaded options: its vessel and wells resolved (ConfigError naming the key)."""
    vessel_file = ""
    if opts.vessel_file:
        vf = Path(opts.vessel_file)
        if not vf.is_absolute() and base_dir is not None:
            vf = base_dir / vf
        if not vf.exists():
            raise ConfigError(file, "", "vessel_file", f"no such file: {vf}")
        vessel_file = str(vf.resolve())
    try:
        vessel = get_vessel(opts.vessel, Path(vessel_file) if vessel_file else None)
    except VesselError as exc:
        raise ConfigError(file, "", "vessel", exc.problem) from None
    try:
        wells = parse_wells(opts.wells, vessel)
    except VesselError as exc:
        raise ConfigError(file, "", "wells", exc.problem.removeprefix("wells: ")) from None
    count = opts.count if opts.count is not None else count_from_duration(opts.duration_s or 0.0, opts.interval_s)
    conditions = _conditions(opts.conditions, vessel, wells, file)
    zs = opts.z_stack
    return Plan(
        name=opts.name.strip(), vessel=vessel.name, wells=wells, sites_per_well=opts.sites_per_well,
        interval_s=opts.interval_s, count=count, autofocus=opts.autofocus, focus_metric=opts.focus_metric,
        z_stack=ZStack(zs.count, zs.step_um) if zs.count > 1 else None,
        exposure_ms=opts.exposure_ms, gain_db=opts.gain_db, correction=opts.correction,
        save=opts.save, notes=opts.notes, vessel_file=vessel_file,
        site_spacing_um=opts.site_spacing_um, source=str(file), conditions=conditions,
    )


def _conditions(tables: list[Any], vessel: Vessel, wells: list[str], file: str | Path) -> dict[str, WellCondition]:
    """Each well's condition from the plan's condition tables: wells must be in the plan, and once only."""
    out: dict[str, WellCondition] = {}
    in_plan = set(wells)
    for i, raw in enumerate(tables):
        where = f"conditions[{i}]"
        c = load_section(ConditionOptions, raw, file=file, section=where)
        try:
            named = parse_wells(c.wells, vessel)
        except VesselError as exc:
            raise ConfigError(file, where, "wells", exc.problem.removeprefix("wells: ")) from None
        outside = [w for w in named if w not in in_plan]
        if outside:
            raise ConfigError(file, where, "wells", f"{', '.join(outside[:6])} not in the plan's wells; add them to wells first")
        twice = [w for w in named if w in out]
        if twice:
            raise ConfigError(file, where, "wells", f"{', '.join(twice[:6])} already has condition {out[twice[0]].label!r}; one condition per well")
        for w in named:
            out[w] = WellCondition(c.label.strip(), c.notes.strip())
    return out


def load_plan(path: Path) -> Plan:
    """Read a plan from TOML (``.toml``) or JSON (``.json``); strict, see the module docstring."""
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise ConfigError(path, "", None, f"cannot read the plan: {exc.strerror}") from None
    if path.suffix.lower() == ".json":
        try:
            raw = json.loads(text)
        except ValueError as exc:  # JSONDecodeError, or an integer too long to convert
            raise ConfigError(path, "", None, f"not valid JSON: {exc}") from None
        if not isinstance(raw, dict):
            raise ConfigError(path, "", None, "a JSON plan must be an object {...}")
    else:
        try:
            raw = tomllib.loads(text)
        except ValueError as exc:  # TOMLDecodeError, or an integer too long to convert
            raise ConfigError(path, "", None, f"not valid TOML: {exc}") from None
    return _plan_from_table(raw, file=path, base_dir=path.parent)


# --- positions -----------------------------------------------------------------------


@dataclasses.dataclass(frozen=True)
class PlannedPosition:
    key: str
    well: str
    site: int
    x_um: float
    y_um: float
    vessel_x_mm: float = 0.0
    vessel_y_mm: float = 0.0


def field_of_view_um(profile: Profile) -> tuple[float, float]:
    """Width and height of one frame in the sample plane."""
    px = profile.optics.pixel_size_um
    return profile.camera.width_px * px, profile.camera.height_px * px


def _grid_shape(n: int, aspect: float) -> tuple[int, int]:
    """(columns, rows) for n sites in a region ``aspect`` times wider than tall."""
    cols = min(n, max(1, round(math.sqrt(n * aspect))))
    return cols, math.ceil(n / cols)


def _grid_offsets(n: int, cols: int, sx: float, sy: float) -> list[tuple[float, float]]:
    """Serpentine grid centred on 0, 0; a short last row is centred too."""
    rows = math.ceil(n / cols)
    out: list[tuple[float, float]] = []
    for r in range(rows):
        in_row = min(cols, n - r * cols)
        xs = [(c - (in_row - 1) / 2.0) * sx for c in range(in_row)]
        if r % 2:
            xs.reverse()
        y = (r - (rows - 1) / 2.0) * sy
        out += [(x, y) for x in xs]
    return out


def _fits(offsets: list[tuple[float, float]], well: Well, fw: float, fh: float, clearance: float) -> bool:
    """Every field lies inside the well bottom and at least ``clearance`` from its wall (um)."""
    if well.shape == "circle":
        r = well.diameter_mm * 500.0 - clearance
        return all(math.hypot(abs(x) + fw / 2, abs(y) + fh / 2) <= r + 1e-6 for x, y in offsets)
    ex, ey = well.extent_mm
    hx, hy = ex * 500.0 - clearance, ey * 500.0 - clearance
    return all(abs(x) + fw / 2 <= hx + 1e-6 and abs(y) + fh / 2 <= hy + 1e-6 for x, y in offsets)


def site_offsets_um(n: int, well: Well, field_um: tuple[float, float], spacing_um: float | None = None) -> list[tuple[float, float]]:
    """Offsets of ``n`` sites from the well centre, in um along the vessel's x and y.

    Sites form a near-square serpentine grid, never overlapping (a 10 % gap), spread over
    the well up to three fields apart, and every field stays at least one field of view
    clear of the wall (meniscus and wall shadow spoil phase contrast there). One site is
    the well centre. Raises ValueError saying how many sites fit when ``n`` do not.
    """
    fw, fh = field_um
    if n == 1:
        return [(0.0, 0.0)]
    clearance = max(fw, fh)
    ex, ey = well.extent_mm
    cols, _ = _grid_shape(n, ex / ey)
    min_sx, min_sy = fw * (1 + SITE_GAP_FRACTION), fh * (1 + SITE_GAP_FRACTION)
    if spacing_um is not None:
        if spacing_um < max(fw, fh):
            raise ValueError(f"site spacing {spacing_um:g} um is smaller than the {fw:.0f} x {fh:.0f} um field; sites would overlap")
        offsets = _grid_offsets(n, cols, spacing_um, spacing_um)
        if not _fits(offsets, well, fw, fh, clearance):
            raise ValueError(f"{n} sites {spacing_um:g} um apart do not fit in well {well.name} with one field clear of the wall")
        return offsets
    if not _fits(_grid_offsets(n, cols, min_sx, min_sy), well, fw, fh, clearance):
        most = 1
        for m in range(2, n):
            c, _ = _grid_shape(m, ex / ey)
            if not _fits(_grid_offsets(m, c, min_sx, min_sy), well, fw, fh, clearance):
                break
            most = m
        raise ValueError(
            f"{n} sites of {fw:.0f} x {fh:.0f} um do not fit in well {well.name} "
            f"({ex:g} x {ey:g} mm) with one field clear of the wall; at most {most} fit"
        )
    lo, hi = 1.0, SITE_SPREAD_MAX_FIELDS / (1 + SITE_GAP_FRACTION)
    if _fits(_grid_offsets(n, cols, min_sx * hi, min_sy * hi), well, fw, fh, clearance):
        lo = hi
    else:
        for _ in range(40):  # bisection to well under a micrometre
            mid = (lo + hi) / 2
            if _fits(_grid_offsets(n, cols, min_sx * mid, min_sy * mid), well, fw, fh, clearance):
                lo = mid
            else:
                hi = mid
    return _grid_offsets(n, cols, min_sx * lo, min_sy * lo)


def _serpentine_wells(wells: list[str], vessel: Vessel) -> list[Well]:
    """Row by row, alternate rows right to left: the shortest usual path over a plate."""
    ws = [vessel.well(n) for n in wells]
    rows = sorted({w.row for w in ws})
    out: list[Well] = []
    for i, r in enumerate(rows):
        in_row = sorted((w for w in ws if w.row == r), key=lambda w: w.column, reverse=bool(i % 2))
        out += in_row
    return out


def plan_positions(
    plan: Plan, vessel: Vessel, stage_map: StageMap, field_um: tuple[float, float] | None = None
) -> list[PlannedPosition]:
    """Every (well, site) of the plan with its stage position, in imaging order.

    Wells are visited in a serpentine over the rows; sites inside a well are laid out by
    :func:`site_offsets_um`. Pass ``field_um`` (:func:`field_of_view_um` of the profile)
    so sites are sized to the real field; without it a 1 x 1 mm field is assumed.
    """
    field = field_um or DEFAULT_FIELD_UM
    positions: list[PlannedPosition] = []
    for well in _serpentine_wells(plan.wells, vessel):
        try:
            offsets = site_offsets_um(plan.sites_per_well, well, field, plan.site_spacing_um)
        except ValueError as exc:
            key = "site_spacing_um" if plan.site_spacing_um is not None else "sites_per_well"
            raise ConfigError(plan.source or "plan", "", key, str(exc)) from None
        for site, (dx, dy) in enumerate(offsets, start=1):
            vx, vy = well.x_mm + dx / 1000.0, well.y_mm + dy / 1000.0
            x_um, y_um = stage_map.to_stage_um(vx, vy)
            positions.append(PlannedPosition(f"{well.name}-{site}", well.name, site, x_um, y_um, vx, vy))
    return positions


# --- time estimates ------------------------------------------------------------------


def move_time_s(distance_um: float, speed_um_s: float, accel_um_s2: float) -> float:
    """Time of a rest-to-rest move with a trapezoidal speed profile (triangular when short).

    The same constant-acceleration kinematics as the simulated controller's planner (and
    the trapezoidal planners of G-code firmwares); um, um/s, um/s^2 -> s.
    """
    return trapezoid_duration_s(abs(distance_um), speed_um_s, accel_um_s2)


@dataclasses.dataclass(frozen=True)
class PlanEstimate:
    positions: int
    per_position_s: float        # steady state, excluding travel between positions
    travel_s: float              # one pass over all positions and back to the first
    time_point_s: float          # a steady-state time point
    first_time_point_s: float    # the first one, with a cold focus search everywhere
    frames_per_time_point: int
    bytes_per_time_point: int
    breakdown_s: dict[str, float]

    def summary(self) -> str:
        return (
            f"{counted(self.positions, 'position')}, about {self.per_position_s:.2f} s each plus {self.travel_s:.1f} s travel: "
            f"{self.time_point_s:.1f} s per time point (first: {self.first_time_point_s:.1f} s)"
        )


def _frame_s(profile: Profile, plan: Plan) -> float:
    exposure_s = (plan.exposure_ms if plan.exposure_ms is not None else profile.camera.exposure_ms) / 1000.0
    lamp_s = profile.illumination.warmup_ms / 1000.0 if profile.illumination.off_between_frames else 0.0
    return exposure_s + FRAME_READOUT_S + lamp_s + profile.camera.flush_frames * max(exposure_s, FRAME_READOUT_S)


def _z_step_s(profile: Profile, step_um: float) -> float:
    f = profile.focus
    return move_time_s(step_um, f.z_speed_um_s, f.z_accel_um_s2) + f.settle_ms / 1000.0


def _autofocus_s(profile: Profile, frames: int, range_um: float) -> float:
    """A search of ``frames`` frames over ``range_um``, approached from below past the backlash."""
    f = profile.focus
    step = range_um / max(frames - 1, 1)
    approach = 2.0 * _z_step_s(profile, f.backlash_um * 1.5 + range_um / 2)
    software_s = 0.0 if profile.sim is not None else SOFTWARE_S_PER_FOCUS_FRAME
    per_frame = _z_step_s(profile, step) + _frame_s_for_focus(profile) + software_s
    return approach + frames * per_frame


def _frame_s_for_focus(profile: Profile) -> float:
    exposure_s = profile.camera.exposure_ms / 1000.0
    return exposure_s + FRAME_READOUT_S + profile.camera.flush_frames * max(exposure_s, FRAME_READOUT_S)


def _breakdown(profile: Profile, plan: Plan, travel_um: float, cold: bool) -> dict[str, float]:
    f = profile.focus
    saved_per_frame = 2 if plan.save == "both" else 1
    frames = plan.frames_per_position
    out = {
        "move_s": move_time_s(travel_um, profile.stage.xy_speed_um_s, profile.stage.xy_accel_um_s2),
        "settle_s": profile.stage.settle_ms / 1000.0,
        "focus_s": 0.0,
        # Approach the plane from below past the backlash before the first frame.
        "z_approach_s": 2.0 * _z_step_s(profile, f.backlash_um * 1.5),
        "exposure_s": frames * _frame_s(profile, plan),
        "z_stack_s": (frames - 1) * _z_step_s(profile, plan.z_stack.step_um) if plan.z_stack else 0.0,
        # The simulated scope holds its clock while the host computes (drivers.clock): no scope time.
        "software_s": 0.0 if profile.sim is not None else frames * saved_per_frame * SOFTWARE_S_PER_SAVED_FRAME,
    }
    if plan.autofocus != "off":
        if cold:
            out["focus_s"] = _autofocus_s(profile, COLD_AUTOFOCUS_FRAMES, COLD_SEARCH_RANGE_UM)
        elif plan.autofocus == "track":
            out["focus_s"] = _autofocus_s(profile, TRACK_AUTOFOCUS_FRAMES, TRACK_CHECK_SPAN_UM)
        if out["focus_s"]:
            # A search ends on the plane it found, approached from below: nothing more to approach.
            out["z_approach_s"] = 0.0
    return out


def estimate_position_s(profile: Profile, plan: Plan, travel_um: float | None = None) -> float:
    """Seconds per position in a steady-state time point: move + settle + autofocus frames +
    exposure(s) + z-stack + software time. ``travel_um`` defaults to the vessel's well pitch."""
    if travel_um is None:
        v = plan.get_vessel()
        travel_um = (v.pitch_x_mm or v.length_mm / 4) * 1000.0
    return sum(_breakdown(profile, plan, travel_um, cold=False).values())


def estimate_plan(profile: Profile, plan: Plan, positions: list[PlannedPosition]) -> PlanEstimate:
    """Time and data per time point for the actual route over ``positions``."""
    n = len(positions)
    no_move = _breakdown(profile, plan, 0.0, cold=False)
    cold = _breakdown(profile, plan, 0.0, cold=True)
    per_position = sum(no_move.values())
    per_position_cold = sum(cold.values())
    travel = 0.0
    speed, accel = profile.stage.xy_speed_um_s, profile.stage.xy_accel_um_s2
    route = positions + positions[:1]
    for a, b in zip(route, route[1:]):
        travel += move_time_s(math.hypot(b.x_um - a.x_um, b.y_um - a.y_um), speed, accel)
    frames = n * plan.frames_per_position * (2 if plan.save == "both" else 1)
    bytes_per_frame = profile.camera.width_px * profile.camera.height_px * (1 if profile.camera.bit_depth == 8 else 2)
    return PlanEstimate(
        positions=n,
        per_position_s=per_position,
        travel_s=travel,
        time_point_s=n * per_position + travel,
        first_time_point_s=n * per_position_cold + travel,
        frames_per_time_point=frames,
        bytes_per_time_point=frames * bytes_per_frame,
        breakdown_s={k: round(v, 4) for k, v in no_move.items()},
    )


def check_fits(profile: Profile, plan: Plan, positions: list[PlannedPosition]) -> list[str]:
    """Warnings about the plan on this scope; ConfigError when it clearly cannot run.

    Refused: no positions, a position outside the stage's soft limits, or a time point
    estimated longer than the interval. Warned: little headroom in the interval, a first
    time point (cold focus search) longer than the interval, fields reaching the well wall,
    a vessel that is not the simulated plate.
    """
    where = plan.source or "plan"
    if not positions:
        raise ConfigError(where, "", "wells", "the plan has no positions")
    s = profile.stage
    outside = [p for p in positions if not (s.x_min_um <= p.x_um <= s.x_max_um and s.y_min_um <= p.y_um <= s.y_max_um)]
    if outside:
        names = ", ".join(f"{p.key} ({p.x_um:.0f}, {p.y_um:.0f})" for p in outside[:4])
        more = f" and {len(outside) - 4} more" if len(outside) > 4 else ""
        raise ConfigError(
            where, "", "wells",
            f"{counted(len(outside), 'position')} {'lies' if len(outside) == 1 else 'lie'} outside the stage limits x {s.x_min_um:g}..{s.x_max_um:g}, "
            f"y {s.y_min_um:g}..{s.y_max_um:g} um: {names}{more}; check the wells and the stage map (phasewatch vessel teach)",
        )
    est = estimate_plan(profile, plan, positions)
    warnings: list[str] = []
    if est.time_point_s > plan.interval_s:
        need = math.ceil(est.time_point_s / INTERVAL_HEADROOM)
        raise ConfigError(
            where, "", "interval_s",
            f"a time point needs about {est.time_point_s:.0f} s ({counted(est.positions, 'position')} x "
            f"{est.per_position_s:.2f} s + {est.travel_s:.1f} s travel), more than interval_s = {plan.interval_s:g}; "
            f"raise interval_s to at least {need} or image fewer positions",
        )
    if est.time_point_s > INTERVAL_HEADROOM * plan.interval_s:
        warnings.append(
            f"a time point needs about {est.time_point_s:.0f} s of the {plan.interval_s:g} s interval "
            f"({est.time_point_s / plan.interval_s * 100:.0f} %); a retried position or a widened focus search will make it late"
        )
    if plan.autofocus != "off" and est.first_time_point_s > plan.interval_s:
        warnings.append(
            f"the first time point (cold focus search at every position) needs about {est.first_time_point_s:.0f} s, "
            f"longer than the interval; the second time point will start late"
        )
    vessel = plan.get_vessel()
    fw, fh = field_of_view_um(profile)
    if plan.sites_per_well == 1:
        tight = [n for n in plan.wells if not _fits([(0.0, 0.0)], vessel.well(n), fw, fh, max(fw, fh))]
        if tight:
            warnings.append(
                f"the {fw:.0f} x {fh:.0f} um field comes within one field of the wall in {counted(len(tight), 'well')} "
                f"(e.g. {tight[0]}); expect meniscus shading at the frame edges"
            )
    if profile.sim is not None:
        sim_vessel = sim_vessel_name(profile)
        if sim_vessel and sim_vessel != vessel.name:
            warnings.append(
                f"the simulated scope holds a {sim_vessel} plate but the plan names {vessel.name}; "
                "positions may fall between the simulated wells"
            )
    return warnings
