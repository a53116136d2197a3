"""The map from vessel coordinates (mm from the top-left outer corner) to stage coordinates (um).

A user centres two or three wells in live view and gives their stage positions (teach
points); :func:`fit_stage_map` fits offset, rotation and scale and says when the points
disagree with the vessel's geometry. The map is stored per profile in
``DATA/stage-maps/<profile>.json``. Plates on the same ANSI/SLAS footprint share one map,
since their coordinates all start at the same outer corner.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import json
import math
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from drivers import atomic
from drivers.options import ConfigError
from daemon.vessels.geometry import (
    SLAS_LENGTH_MM,
    SLAS_WIDTH_MM,
    Vessel,
    Well,
    get_vessel,
    load_vessels,
    slas_centred_a1_mm,
)

if TYPE_CHECKING:
    from skimage.transform import SimilarityTransform

    from daemon.profile import Profile

STAGE_MAP_DIR = "stage-maps"

# A well centred by eye in live view at 4x-20x lands within a few tens of um; 100 um
# flags a wrong well or a slipped plate without crying wolf (common practice).
DEFAULT_TOLERANCE_UM = 100.0
# The stage's steps per mm are rarely off by more than a fraction of a percent once set up;
# a larger misfit means a wrong well name, a wrong vessel type or bad steps per mm.
DEFAULT_SCALE_TOLERANCE = 0.01
# A plate seated in a holder sits within a degree or two of square.
DEFAULT_MAX_ROTATION_DEG = 5.0
# Teach points closer than this leave the rotation poorly fixed: 50 um of teaching error
# over 20 mm is 0.14 degrees, which across a 120 mm plate is 0.3 mm.
MIN_TEACH_SPAN_MM = 20.0


@dataclasses.dataclass(frozen=True)
class TeachPoint:
    well: str
    x_um: float
    y_um: float
    residual_um: float = 0.0


@dataclasses.dataclass
class StageMap:
    """stage_um = offset + scale * R(rotation) * diag(1, -1 if mirror_y else 1) * vessel_mm * 1000."""

    offset_x_um: float
    offset_y_um: float
    rotation_deg: float = 0.0
    scale: float = 1.0
    mirror_y: bool = False
    vessel: str = ""
    footprint_mm: tuple[float, float] = (SLAS_LENGTH_MM, SLAS_WIDTH_MM)
    teach: list[TeachPoint] = dataclasses.field(default_factory=list)
    source: str = "taught"
    created: str = ""

    def _matrix(self) -> np.ndarray:
        th = math.radians(self.rotation_deg)
        m = self.scale * np.array([[math.cos(th), -math.sin(th)], [math.sin(th), math.cos(th)]])
        if self.mirror_y:
            m = m @ np.diag([1.0, -1.0])
        return m

    def to_stage_um(self, x_mm: float, y_mm: float) -> tuple[float, float]:
        sx, sy = self._matrix() @ np.array([x_mm * 1000.0, y_mm * 1000.0])
        return float(sx + self.offset_x_um), float(sy + self.offset_y_um)

    def to_vessel_mm(self, x_um: float, y_um: float) -> tuple[float, float]:
        vx, vy = np.linalg.solve(self._matrix(), np.array([x_um - self.offset_x_um, y_um - self.offset_y_um]))
        return float(vx / 1000.0), float(vy / 1000.0)

    def well_stage_um(self, vessel: Vessel, well: str) -> tuple[float, float]:
        w = vessel.well(well)
        return self.to_stage_um(w.x_mm, w.y_mm)

    def well_at(self, vessel: Vessel, x_um: float, y_um: float) -> str | None:
        """The well of ``vessel`` whose bottom contains stage point (x, y); None between wells or off the vessel."""
        x_mm, y_mm = self.to_vessel_mm(x_um, y_um)
        for w in vessel.wells.values():
            if well_contains(w, x_mm, y_mm):
                return w.name
        return None

    @property
    def rms_residual_um(self) -> float:
        if not self.teach:
            return 0.0
        return math.sqrt(sum(p.residual_um**2 for p in self.teach) / len(self.teach))

    def to_dict(self) -> dict[str, Any]:
        return {
            "offset_x_um": self.offset_x_um, "offset_y_um": self.offset_y_um,
            "rotation_deg": self.rotation_deg, "scale": self.scale, "mirror_y": self.mirror_y,
            "vessel": self.vessel, "footprint_mm": list(self.footprint_mm),
            "teach": [dataclasses.asdict(p) for p in self.teach],
            "rms_residual_um": self.rms_residual_um,
            "source": self.source, "created": self.created,
        }

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> StageMap:
        try:
            return cls(
                offset_x_um=float(d["offset_x_um"]), offset_y_um=float(d["offset_y_um"]),
                rotation_deg=float(d.get("rotation_deg", 0.0)), scale=float(d.get("scale", 1.0)),
                mirror_y=bool(d.get("mirror_y", False)), vessel=str(d.get("vessel", "")),
                footprint_mm=tuple(float(v) for v in d.get("footprint_mm", (SLAS_LENGTH_MM, SLAS_WIDTH_MM))),  # type: ignore[arg-type]
                teach=[TeachPoint(str(p["well"]), float(p["x_um"]), float(p["y_um"]), float(p.get("residual_um", 0.0)))
                       for p in d.get("teach", [])],
                source=str(d.get("source", "taught")), created=str(d.get("created", "")),
            )
        except (KeyError, TypeError, ValueError) as exc:
            raise ValueError(f"not a stage map ({exc.__class__.__name__}: {exc})") from None


def well_contains(well: Well, x_mm: float, y_mm: float) -> bool:
    """Whether vessel point (x, y) mm lies on the well's bottom (its edge included)."""
    dx, dy = x_mm - well.x_mm, y_mm - well.y_mm
    if well.shape == "circle":
        return math.hypot(dx, dy) <= well.diameter_mm / 2.0
    half_x, half_y = (v / 2.0 for v in well.extent_mm)
    return abs(dx) <= half_x and abs(dy) <= half_y


def _estimate_similarity(src: np.ndarray, dst: np.ndarray) -> SimilarityTransform | None:
    """Least-squares similarity transform src -> dst.

    Umeyama, "Least-squares estimation of transformation parameters between two point
    patterns", IEEE TPAMI 13(4), 1991, as implemented by scikit-image. Units: um both sides.
    """
    # Imported here: scikit-image's transforms bring SciPy's spatial and linear-algebra
    # modules, which a running daemon needs only when a map is taught.
    from skimage.transform import SimilarityTransform
    if hasattr(SimilarityTransform, "from_estimate"):
        tf = SimilarityTransform.from_estimate(src, dst)
        return tf if tf else None
    tf = SimilarityTransform()
    return tf if tf.estimate(src, dst) else None


def fit_stage_map(
    vessel: Vessel,
    teach: list[tuple[str, float, float]],
    *,
    tolerance_um: float = DEFAULT_TOLERANCE_UM,
    scale_tolerance: float = DEFAULT_SCALE_TOLERANCE,
    max_rotation_deg: float = DEFAULT_MAX_ROTATION_DEG,
) -> tuple[StageMap, list[str]]:
    """Fit the vessel-to-stage map to teach points (well name, stage x_um, stage y_um).

    One point fixes the offset only (rotation 0, scale 1). Two fix offset, rotation and
    scale exactly, so only the scale can show a disagreement. Three or more are fitted by
    least squares, a mirrored y axis is detected, and each point's residual is checked
    against ``tolerance_um``. Returns the map and warnings (empty when all is well).
    """
    if not teach:
        raise ConfigError("", "vessel teach", None, "give at least one teach point (a well and its stage x, y in um)")
    names = [vessel.well(w).name for w, _, _ in teach]
    dupes = sorted({n for n in names if names.count(n) > 1})
    if dupes:
        raise ConfigError("", "vessel teach", None, f"well {', '.join(dupes)} is taught twice; give each well once")
    wells = [vessel.well(n) for n in names]
    src = np.array([[w.x_mm * 1000.0, w.y_mm * 1000.0] for w in wells])
    dst = np.array([[x, y] for _, x, y in teach], dtype=float)
    warnings: list[str] = []
    created = dt.datetime.now(dt.timezone.utc).isoformat(timespec="seconds")
    base = dict(vessel=vessel.name, footprint_mm=vessel.footprint_mm, created=created)

    if len(teach) == 1:
        off = dst[0] - src[0]
        smap = StageMap(float(off[0]), float(off[1]), **base)  # type: ignore[arg-type]
        warnings.append(
            "one teach point fixes the offset only; rotation is assumed 0 and scale 1 - "
            "teach a second well far from the first (e.g. A1 and the opposite corner) to check them"
        )
        smap.teach = [TeachPoint(names[0], float(dst[0, 0]), float(dst[0, 1]), 0.0)]
        return smap, warnings

    span_mm = max(float(np.linalg.norm(a - b)) for a in src for b in src) / 1000.0
    if span_mm <= 0.0:
        raise ConfigError("", "vessel teach", None, "teach points must be different wells")

    candidates: list[tuple[float, bool, SimilarityTransform]] = []
    # A mirrored y axis can only be told apart from a rotation with three points not on a line.
    mirrors = (False, True) if len(teach) >= 3 and _not_collinear(src) else (False,)
    for mirror in mirrors:
        s = src * np.array([1.0, -1.0 if mirror else 1.0])
        tf = _estimate_similarity(s, dst)
        if tf is None:
            continue
        rms = float(np.sqrt(np.mean(np.sum((tf(s) - dst) ** 2, axis=1))))
        candidates.append((rms, mirror, tf))
    if not candidates:
        raise ConfigError("", "vessel teach", None, "the teach points do not determine a map; choose wells far apart")
    rms, mirror, tf = min(candidates, key=lambda c: c[0])
    rotation_deg = math.degrees(float(tf.rotation))
    smap = StageMap(
        float(tf.translation[0]), float(tf.translation[1]), rotation_deg=rotation_deg,
        scale=float(tf.scale), mirror_y=mirror, **base,  # type: ignore[arg-type]
    )
    for n, (_, x, y), w in zip(names, teach, wells):
        px, py = smap.to_stage_um(w.x_mm, w.y_mm)
        smap.teach.append(TeachPoint(n, float(x), float(y), math.hypot(px - x, py - y)))

    if abs(smap.scale - 1.0) > scale_tolerance:
        warnings.append(
            f"scale {smap.scale:.4f}: the stage distance between the teach points is "
            f"{(smap.scale - 1.0) * 100:+.1f} % off the {vessel.name} geometry (tolerance "
            f"{scale_tolerance * 100:.1f} %); check the well names, the vessel type and the stage's steps per mm"
        )
    if abs(rotation_deg) > max_rotation_deg:
        warnings.append(
            f"rotation {rotation_deg:+.2f} deg exceeds {max_rotation_deg:g} deg; check that the vessel is seated "
            "square in its holder and that the well names are right"
        )
    for p in smap.teach:
        if p.residual_um > tolerance_um:
            warnings.append(
                f"teach point {p.well} is {p.residual_um:.0f} um from where the {vessel.name} geometry puts it "
                f"(tolerance {tolerance_um:g} um); re-centre that well or check its name"
            )
    if span_mm < MIN_TEACH_SPAN_MM:
        warnings.append(
            f"teach points span only {span_mm:.1f} mm, so the rotation is poorly fixed; "
            "teach wells far apart (e.g. A1 and the opposite corner)"
        )
    if mirror:
        warnings.append("the stage's y axis runs opposite to the vessel's rows (mirrored); the map accounts for it")
    return smap, warnings


def _not_collinear(pts: np.ndarray) -> bool:
    centred = pts - pts.mean(axis=0)
    sv = np.linalg.svd(centred, compute_uv=False)
    # Smaller singular value below 1 % of the larger: points lie on (nearly) one line.
    return bool(sv[-1] > 0.01 * sv[0])


def stage_map_path(data_dir: Path, profile: Profile) -> Path:
    return Path(data_dir) / STAGE_MAP_DIR / f"{profile.name}.json"


def save_stage_map(data_dir: Path, profile: Profile, smap: StageMap) -> Path:
    """Store atomically (:mod:`drivers.atomic`) so a power cut leaves the old or the new map."""
    path = stage_map_path(data_dir, profile)
    atomic.make_dirs(path.parent)
    atomic.write_text(path, json.dumps({"profile": profile.name, **smap.to_dict()}, indent=2) + "\n")
    return path


def sim_stage_map(profile: Profile) -> StageMap:
    """The map the simulated scope's [sim.plate] implies: A1 at (a1_x_um, a1_y_um), rows along +y.

    The simulated plate is a grid of ``pitch_um`` centred on the SLAS footprint; for the
    default 96-well layout this is the ANSI/SLAS 4-2004 plate with its corner at stage 0, 0.
    """
    if profile.sim is None:
        raise ValueError("not a simulated profile")
    plate = profile.sim.plate
    pitch_mm = plate.pitch_um / 1000.0
    a1x_mm, a1y_mm = slas_centred_a1_mm(SLAS_LENGTH_MM, SLAS_WIDTH_MM, plate.rows, plate.columns, pitch_mm, pitch_mm)
    vessel = sim_vessel_name(profile)
    return StageMap(
        offset_x_um=round(plate.a1_x_um - a1x_mm * 1000.0, 6),
        offset_y_um=round(plate.a1_y_um - a1y_mm * 1000.0, 6),
        vessel=vessel, source="simulator",
    )


def sim_vessel_name(profile: Profile) -> str:
    """The built-in vessel the simulated plate matches (rows, columns, pitch), or ''."""
    if profile.sim is None:
        return ""
    plate = profile.sim.plate
    for v in load_vessels().values():
        if (v.kind == "plate" and v.rows == plate.rows and v.columns == plate.columns
                and abs(v.pitch_x_mm * 1000.0 - plate.pitch_um) < 1.0):
            return v.name
    return ""


def load_stage_map(data_dir: Path, profile: Profile) -> StageMap:
    """The stored map for ``profile``; on the simulated scope with none stored, the one [sim.plate] implies."""
    path = stage_map_path(data_dir, profile)
    if path.exists():
        try:
            raw = json.loads(path.read_text(encoding="utf-8"))
            if not isinstance(raw, dict):
                raise ValueError("not a JSON object")
            return StageMap.from_dict(raw)
        except OSError as exc:
            raise ConfigError(path, "", None, f"cannot read the stage map: {exc.strerror}") from None
        except ValueError as exc:
            raise ConfigError(
                path, "", None, f"damaged stage map ({exc}); teach it again with 'phasewatch vessel teach'"
            ) from None
    if profile.sim is not None:
        return sim_stage_map(profile)
    raise ConfigError(
        path, "", None,
        f"no vessel-to-stage map for profile {profile.name!r}; centre two wells far apart in live view and "
        f"teach them: phasewatch vessel teach 96-well A1=X,Y H12=X,Y --profile {profile.name} --data {data_dir}",
    )


def mapped_vessel(data_dir: Path, profile: Profile, vessel: str | None = None) -> tuple[StageMap, Vessel]:
    """The profile's stage map and the vessel it maps (``vessel``, else the one it was taught on)."""
    smap = load_stage_map(data_dir, profile)
    name = vessel or smap.vessel or sim_vessel_name(profile)
    if not name:
        raise ConfigError(
            stage_map_path(data_dir, profile), "", "vessel", "the stage map names no vessel; say which, e.g. 96-well"
        )
    return smap, get_vessel(name)


def well_position_um(
    data_dir: Path, profile: Profile, well: str, vessel: str | None = None
) -> tuple[float, float]:
    """Stage position of a well's centre through the profile's stored (or simulated) map.

    ``vessel`` defaults to the one the map was taught on (or the simulated plate's).
    """
    smap, v = mapped_vessel(data_dir, profile, vessel)
    return smap.well_stage_um(v, well)


def well_at_stage(
    data_dir: Path, profile: Profile, x_um: float, y_um: float, vessel: str | None = None
) -> str | None:
    """The well over stage point (x, y) by the profile's stored (or simulated) map and the
    vessel's geometry; None between wells or off the vessel. The inverse of
    :func:`well_position_um`; raises ConfigError when there is no map to go by."""
    smap, v = mapped_vessel(data_dir, profile, vessel)
    return smap.well_at(v, x_um, y_um)
