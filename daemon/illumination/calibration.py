"""Dark and flat calibration frames: acquiring them and keeping them per scope set-up.

A calibration set belongs to one profile, one objective, one exposure and one gain: the
dark signal grows with exposure and gain, and the shading changes with the objective.
On disk (``<data dir>/calibration``)::

    <profile>/<objective>/<exposure>ms_<gain>dB/dark.tif   averaged frame, float32
                                               dark.json  what, when, how, statistics
                                               flat.tif / flat.json

Each TIFF carries its metadata too (tifffile's JSON description) and the sidecar holds
its SHA-256, so a half-written or altered frame is noticed instead of used. A new frame
is checked before anything is written and replaces the old one by an atomic rename, so
a bad frame (light leak in a dark, a flat too dark or saturated, the wrong size or
exposure) never overwrites a good one.
"""

from __future__ import annotations

import asyncio
import dataclasses
import datetime as dt
import hashlib
import json
import math
import re
from collections.abc import Callable
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import tifffile

from daemon import __version__
from daemon.illumination import CalibrationError
from daemon.illumination.correction import MIN_RESPONSE_FRACTION, Corrector
from daemon.illumination.stats import RunningStats
from drivers import atomic

if TYPE_CHECKING:
    from daemon.profile import Profile
    from daemon.scope import Scope

#: ``progress(done, total, message)``: called after each frame while acquiring.
Progress = Callable[[int, int, str], None]

#: Exposures within this fraction of each other count as the same setting (cameras round
#: the exposure to their line time, so 20 ms may come back as 19.98 ms).
EXPOSURE_TOLERANCE = 0.01
GAIN_TOLERANCE_DB = 0.05

#: A flat must fill at least this fraction of full scale above the dark, or its own shot
#: noise and quantisation end up in every corrected frame.
FLAT_MIN_FRACTION = 0.10
#: Pixels at full scale in the averaged flat: above this fraction the shading is clipped.
FLAT_MAX_SATURATED_FRACTION = 0.001
#: Above this fraction of unusable (dead, dark) pixels the field was not blank (a well
#: edge, a bubble, debris), not just a few dead pixels.
FLAT_MAX_UNUSABLE_FRACTION = 0.02
#: Small-scale non-uniformity above this (after removing shading) suggests structure in
#: the field (cells, debris): kept, but flagged in the metadata.
FLAT_STRUCTURE_WARN_FRACTION = 0.03
#: A dark frame this bright (fraction of full scale) means light reached the sensor.
DARK_MAX_MEAN_FRACTION = 0.25
DARK_MAX_SATURATED_FRACTION = 0.01

KINDS = ("dark", "flat")


def _slug(text: str) -> str:
    slug = re.sub(r"[^A-Za-z0-9.+-]+", "_", text).strip("_")
    return slug or "unnamed"


def _setting_dir(exposure_ms: float, gain_db: float) -> str:
    return f"{exposure_ms:.3f}ms_{gain_db:.2f}dB"


def _sha256(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def full_scale_dn(bit_depth: int) -> float:
    return float(2**bit_depth - 1)


def frame_statistics(frame: np.ndarray, bit_depth: int) -> dict[str, float]:
    top = full_scale_dn(bit_depth)
    f = np.asarray(frame, dtype=np.float64)
    return {
        "mean_dn": float(f.mean()),
        "std_dn": float(f.std()),
        "min_dn": float(f.min()),
        "max_dn": float(f.max()),
        "p01_dn": float(np.percentile(f, 1)),
        "p99_dn": float(np.percentile(f, 99)),
        "saturated_fraction": float(np.mean(f >= top - 0.5)),
    }


def small_scale_nonuniformity(image: np.ndarray, box_px: int = 7) -> float:
    """Relative std of ``image`` after dividing out its ``box_px`` running mean: what is left
    of a flat once smooth shading is removed (pixel-to-pixel response and any structure)."""
    from scipy import ndimage  # here, not at import: SciPy's image module holds ~27 MB resident
    f = np.asarray(image, dtype=np.float64)
    smooth = ndimage.uniform_filter(f, size=box_px, mode="nearest")
    valid = smooth > 0
    if not valid.any():
        return 0.0
    return float(np.std(f[valid] / smooth[valid] - 1.0))


def check_dark(dark: np.ndarray, *, bit_depth: int) -> dict[str, Any]:
    """Statistics of an averaged dark frame; raises CalibrationError if light reached it."""
    if np.asarray(dark).ndim != 2:
        raise CalibrationError(f"dark frame must be 2-D (monochrome), got shape {np.shape(dark)}")
    if not np.all(np.isfinite(dark)):
        raise CalibrationError("dark frame contains NaN or infinite values; take it again")
    stats = frame_statistics(dark, bit_depth)
    top = full_scale_dn(bit_depth)
    if stats["saturated_fraction"] > DARK_MAX_SATURATED_FRACTION or stats["mean_dn"] > DARK_MAX_MEAN_FRACTION * top:
        raise CalibrationError(
            f"dark frame is bright (mean {stats['mean_dn']:.1f} DN of {top:.0f}, "
            f"{stats['saturated_fraction'] * 100:.2f} % saturated): is the lamp off and the light path "
            "covered? Nothing was saved"
        )
    return {"stats": stats, "warnings": []}


def check_flat(flat: np.ndarray, dark: np.ndarray, *, bit_depth: int) -> dict[str, Any]:
    """Statistics and quality of an averaged flat against its dark; raises CalibrationError
    if it is the wrong size, too dark, saturated or not a blank field."""
    flat = np.asarray(flat)
    dark = np.asarray(dark)
    if flat.ndim != 2:
        raise CalibrationError(f"flat frame must be 2-D (monochrome), got shape {flat.shape}")
    if flat.shape != dark.shape:
        raise CalibrationError(
            f"flat is {flat.shape[1]}x{flat.shape[0]} but the dark frame is {dark.shape[1]}x{dark.shape[0]}; "
            "take the dark again at this resolution. Nothing was saved"
        )
    if not np.all(np.isfinite(flat)):
        raise CalibrationError("flat frame contains NaN or infinite values; take it again")
    top = full_scale_dn(bit_depth)
    stats = frame_statistics(flat, bit_depth)
    response = flat.astype(np.float64) - dark
    typical = float(np.median(response))
    if typical < FLAT_MIN_FRACTION * top:
        raise CalibrationError(
            f"flat is too dark: median {typical:.1f} DN above the dark, need at least "
            f"{FLAT_MIN_FRACTION * top:.0f} DN ({FLAT_MIN_FRACTION:.0%} of full scale); raise the exposure "
            "or lamp level, or check the lamp. Nothing was saved"
        )
    if stats["saturated_fraction"] > FLAT_MAX_SATURATED_FRACTION:
        raise CalibrationError(
            f"flat is saturated: {stats['saturated_fraction'] * 100:.2f} % of pixels at full scale "
            f"({top:.0f} DN); lower the exposure or lamp level. Nothing was saved"
        )
    unusable = float(np.mean(response <= MIN_RESPONSE_FRACTION * typical))
    if unusable > FLAT_MAX_UNUSABLE_FRACTION:
        raise CalibrationError(
            f"{unusable * 100:.1f} % of the flat is too dark to divide by: the field is not blank "
            "(well edge, bubble, debris?); move to a clear blank field. Nothing was saved"
        )
    structure = small_scale_nonuniformity(response)
    warnings = []
    if structure > FLAT_STRUCTURE_WARN_FRACTION:
        warnings.append(
            f"flat shows {structure * 100:.1f} % small-scale structure (cells or debris in the field?); "
            "a blank or defocused field gives a better flat"
        )
    mean_response = float(response.mean())
    return {
        "stats": stats,
        "response_mean_dn": mean_response,
        "shading_range_fraction": float((np.percentile(response, 99) - np.percentile(response, 1)) / mean_response),
        "shading_std_fraction": float(response.std() / mean_response),
        "small_scale_nonuniformity": structure,
        "unusable_pixel_fraction": unusable,
        "warnings": warnings,
    }


@dataclasses.dataclass(frozen=True)
class CalibrationSet:
    """A matching dark and flat for one profile, objective, exposure and gain."""

    directory: Path
    profile_name: str
    objective: str
    exposure_ms: float
    gain_db: float
    dark: np.ndarray
    flat: np.ndarray
    dark_meta: dict[str, Any]
    flat_meta: dict[str, Any]

    def corrector(self) -> Corrector:
        return Corrector.from_frames(self.dark, self.flat)


@dataclasses.dataclass(frozen=True)
class StoredFrame:
    path: Path
    meta: dict[str, Any]


class CalibrationStore:
    """Calibration frames under ``root`` (= ``<data dir>/calibration``)."""

    def __init__(self, root: Path) -> None:
        self.root = Path(root)
        self._correctors: dict[tuple[str, float, float], tuple[tuple[float, float], Corrector]] = {}

    # -- where things live ---------------------------------------------------------------

    def objective_dir(self, profile: Profile) -> Path:
        return self.root / _slug(profile.name) / _slug(profile.optics.objective)

    def _entries(self, profile: Profile, kind: str) -> list[StoredFrame]:
        base = self.objective_dir(profile)
        if not base.is_dir():
            return []
        found = []
        for meta_path in sorted(base.glob(f"*/{kind}.json")):
            try:
                meta = json.loads(meta_path.read_text(encoding="utf-8"))
            except (OSError, ValueError):
                continue
            if meta.get("kind") != kind or meta.get("objective") != profile.optics.objective:
                continue
            found.append(StoredFrame(meta_path.with_suffix(".tif"), meta))
        return found

    def _matching(self, profile: Profile, kind: str, exposure_ms: float, gain_db: float) -> StoredFrame | None:
        best: tuple[float, StoredFrame] | None = None
        for entry in self._entries(profile, kind):
            e, g = float(entry.meta["exposure_ms"]), float(entry.meta["gain_db"])
            rel = abs(e - exposure_ms) / max(exposure_ms, 1e-9)
            if rel <= EXPOSURE_TOLERANCE and abs(g - gain_db) <= GAIN_TOLERANCE_DB:
                if best is None or rel < best[0]:
                    best = (rel, entry)
        return best[1] if best else None

    def _load(self, entry: StoredFrame) -> np.ndarray:
        digest = _sha256(entry.path)
        if digest != entry.meta.get("sha256"):
            raise CalibrationError(
                f"{entry.path} does not match its metadata (damaged or altered); take the "
                f"{entry.meta.get('kind', 'calibration')} frame again"
            )
        return tifffile.imread(entry.path).astype(np.float32, copy=False)

    # -- finding -------------------------------------------------------------------------

    def find_dark(self, profile: Profile, exposure_ms: float, gain_db: float) -> tuple[np.ndarray, dict[str, Any]] | None:
        entry = self._matching(profile, "dark", exposure_ms, gain_db)
        if entry is None:
            return None
        return self._load(entry), entry.meta

    def find(self, profile: Profile, exposure_ms: float, gain_db: float) -> CalibrationSet | None:
        """The dark and flat for this profile, objective, exposure and gain, or None."""
        dark = self._matching(profile, "dark", exposure_ms, gain_db)
        flat = self._matching(profile, "flat", exposure_ms, gain_db)
        if dark is None or flat is None:
            return None
        dark_px, flat_px = self._load(dark), self._load(flat)
        if dark_px.shape != flat_px.shape:
            return None
        return CalibrationSet(
            directory=dark.path.parent,
            profile_name=profile.name,
            objective=profile.optics.objective,
            exposure_ms=float(flat.meta["exposure_ms"]),
            gain_db=float(flat.meta["gain_db"]),
            dark=dark_px,
            flat=flat_px,
            dark_meta=dark.meta,
            flat_meta=flat.meta,
        )

    def describe_missing(self, profile: Profile, exposure_ms: float, gain_db: float) -> str:
        """One line: why no set matches (missing, damaged or of different sizes), what
        exists, and the command that would make one."""
        have = sorted(
            {(float(e.meta["exposure_ms"]), float(e.meta["gain_db"]), e.meta["kind"])
             for kind in KINDS for e in self._entries(profile, kind)}
        )
        dark = self._matching(profile, "dark", exposure_ms, gain_db)
        flat = self._matching(profile, "flat", exposure_ms, gain_db)
        want = f"profile {profile.name}, objective {profile.optics.objective!r}, exposure {exposure_ms:g} ms, gain {gain_db:g} dB"
        missing = [k for k, e in (("dark", dark), ("flat", flat)) if e is None]
        if not missing:
            damaged = [k for k, e in (("dark", dark), ("flat", flat)) if e is not None and _sha256(e.path) != e.meta.get("sha256")]
            if damaged:
                cmds = " and ".join(f"'phasewatch calibrate {k} --exposure-ms {exposure_ms:g} --gain-db {gain_db:g}'" for k in damaged)
                return f"the {' and '.join(damaged)} frame for {want} is damaged (does not match its metadata); run {cmds}"
            if (dark.meta.get("width_px"), dark.meta.get("height_px")) != (flat.meta.get("width_px"), flat.meta.get("height_px")):
                return f"the dark and flat for {want} differ in size; take both again at one resolution"
            return f"calibration for {want} is present"
        listing = ", ".join(f"{k} {e:g} ms/{g:g} dB" for e, g, k in have) or "none"
        cmds = " and ".join(f"'phasewatch calibrate {k} --exposure-ms {exposure_ms:g} --gain-db {gain_db:g}'" for k in missing)
        return f"no {' or '.join(missing)} frame for {want} (stored for this objective: {listing}); run {cmds}"

    def require(self, profile: Profile, exposure_ms: float, gain_db: float) -> CalibrationSet:
        found = self.find(profile, exposure_ms, gain_db)
        if found is None:
            raise CalibrationError(self.describe_missing(profile, exposure_ms, gain_db))
        return found

    def corrector_for(self, profile: Profile, exposure_ms: float, gain_db: float) -> Corrector | None:
        """A :class:`Corrector` for the matching set (cached until its files change), or None
        when there is none or it is damaged (:meth:`describe_missing` says which)."""
        dark = self._matching(profile, "dark", exposure_ms, gain_db)
        flat = self._matching(profile, "flat", exposure_ms, gain_db)
        if dark is None or flat is None:
            return None
        key = (str(flat.path.parent), round(exposure_ms, 6), round(gain_db, 6))
        stamp = (dark.path.stat().st_mtime, flat.path.stat().st_mtime)
        cached = self._correctors.get(key)
        if cached is not None and cached[0] == stamp:
            return cached[1]
        try:
            found = self.find(profile, exposure_ms, gain_db)
        except CalibrationError:
            return None
        if found is None:
            return None
        corrector = found.corrector()
        self._correctors[key] = (stamp, corrector)
        return corrector

    def list_sets(self, profile: Profile | None = None) -> list[dict[str, Any]]:
        """Every stored frame's metadata (of one profile, or all), for listing."""
        metas = []
        pattern = f"{_slug(profile.name)}/*/*/*.json" if profile else "*/*/*/*.json"
        for meta_path in sorted(self.root.glob(pattern)):
            try:
                meta = json.loads(meta_path.read_text(encoding="utf-8"))
            except (OSError, ValueError):
                continue
            metas.append({**meta, "path": str(meta_path.with_suffix(".tif"))})
        return metas

    # -- saving --------------------------------------------------------------------------

    def _save(
        self, profile: Profile, kind: str, frame: np.ndarray, meta: dict[str, Any],
        exposure_ms: float, gain_db: float,
    ) -> Path:
        existing = self._matching(profile, kind, exposure_ms, gain_db)
        other = self._matching(profile, "flat" if kind == "dark" else "dark", exposure_ms, gain_db)
        if existing is not None:
            directory = existing.path.parent
        elif other is not None:
            directory = other.path.parent
        else:
            directory = self.objective_dir(profile) / _setting_dir(exposure_ms, gain_db)
        atomic.make_dirs(directory)
        tif = directory / f"{kind}.tif"
        pixels = np.ascontiguousarray(frame, dtype=np.float32)
        with atomic.open_atomic(tif) as fh:
            tifffile.imwrite(fh, pixels, photometric="minisblack", metadata=meta)
        record = {**meta, "file": tif.name, "sha256": _sha256(tif)}
        atomic.write_text(directory / f"{kind}.json", json.dumps(record, indent=2, default=str))
        return tif

    def _base_meta(
        self, profile: Profile, kind: str, frame: np.ndarray, *, exposure_ms: float, gain_db: float,
        frames: int, bit_depth: int, method: str, acquired_t_s: float | None, extra: dict[str, Any] | None,
    ) -> dict[str, Any]:
        acquired = (
            dt.datetime.fromtimestamp(acquired_t_s, tz=dt.timezone.utc).isoformat()
            if acquired_t_s is not None else None
        )
        return {
            "kind": kind,
            "method": method,
            "profile": profile.name,
            "profile_path": str(profile.path),
            "objective": profile.optics.objective,
            "exposure_ms": float(exposure_ms),
            "gain_db": float(gain_db),
            "frames_averaged": int(frames),
            "width_px": int(frame.shape[1]),
            "height_px": int(frame.shape[0]),
            "bit_depth": int(bit_depth),
            "acquired_t_s": acquired_t_s,
            "acquired_utc": acquired,
            "software": f"phasewatch {__version__}",
            **(extra or {}),
        }

    def save_dark(
        self, profile: Profile, dark: np.ndarray, *, exposure_ms: float, gain_db: float, frames: int,
        bit_depth: int, acquired_t_s: float | None = None, extra: dict[str, Any] | None = None,
    ) -> Path:
        """Check and store an averaged dark frame; the old one stays if this one is bad."""
        quality = check_dark(dark, bit_depth=bit_depth)
        existing_flat = self._matching(profile, "flat", exposure_ms, gain_db)
        if existing_flat is not None:
            w, h = existing_flat.meta["width_px"], existing_flat.meta["height_px"]
            if (h, w) != tuple(np.shape(dark)):
                raise CalibrationError(
                    f"dark is {np.shape(dark)[1]}x{np.shape(dark)[0]} but the stored flat for this setting is "
                    f"{w}x{h}; calibrate both at one resolution. Nothing was saved"
                )
        meta = self._base_meta(
            profile, "dark", dark, exposure_ms=exposure_ms, gain_db=gain_db, frames=frames,
            bit_depth=bit_depth, method="lamp off, averaged", acquired_t_s=acquired_t_s, extra=extra,
        )
        meta["quality"] = quality
        return self._save(profile, "dark", dark, meta, exposure_ms, gain_db)

    def save_flat(
        self, profile: Profile, flat: np.ndarray, *, exposure_ms: float, gain_db: float, frames: int,
        bit_depth: int, method: str = "blank field, averaged", acquired_t_s: float | None = None,
        extra: dict[str, Any] | None = None,
    ) -> Path:
        """Check a flat against the stored dark of the same setting and store it.

        Raises CalibrationError (nothing written) when no dark exists for this exposure and
        gain, or when the flat is the wrong size, too dark, saturated or not blank.
        """
        dark_entry = self._matching(profile, "dark", exposure_ms, gain_db)
        if dark_entry is None:
            raise CalibrationError(
                f"no dark frame for exposure {exposure_ms:g} ms, gain {gain_db:g} dB: a flat is measured against "
                f"its dark; run 'phasewatch calibrate dark --exposure-ms {exposure_ms:g} --gain-db {gain_db:g}' "
                "first. Nothing was saved"
            )
        dark = self._load(dark_entry)
        quality = check_flat(flat, dark, bit_depth=bit_depth)
        meta = self._base_meta(
            profile, "flat", flat, exposure_ms=exposure_ms, gain_db=gain_db, frames=frames,
            bit_depth=bit_depth, method=method, acquired_t_s=acquired_t_s, extra=extra,
        )
        meta["quality"] = quality
        meta["dark_sha256"] = dark_entry.meta.get("sha256")
        return self._save(profile, "flat", flat, meta, exposure_ms, gain_db)


# -- acquisition ---------------------------------------------------------------------------


async def _average(
    scope: Scope, *, frames: int, exposure_ms: float | None, gain_db: float | None, lamp: bool,
    progress: Progress | None, label: str,
) -> np.ndarray:
    if frames < 1:
        raise CalibrationError(f"--frames must be at least 1, got {frames}")
    cam = scope.profile.camera
    want_ms = exposure_ms if exposure_ms is not None else cam.exposure_ms
    total: np.ndarray | None = None
    for i in range(frames):
        frame = await scope.capture(exposure_ms=want_ms, gain_db=gain_db, lamp=lamp)
        if abs(frame.exposure_ms - want_ms) > EXPOSURE_TOLERANCE * want_ms:
            raise CalibrationError(
                f"camera exposed {frame.exposure_ms:g} ms instead of the {want_ms:g} ms asked for; "
                "choose an exposure the camera supports"
            )
        if gain_db is not None and abs(frame.gain_db - gain_db) > GAIN_TOLERANCE_DB:
            raise CalibrationError(
                f"camera used gain {frame.gain_db:g} dB instead of the {gain_db:g} dB asked for; "
                "choose a gain the camera supports"
            )
        if total is None:
            total = np.zeros(frame.pixels.shape, dtype=np.float64)
        elif frame.pixels.shape != total.shape:
            raise CalibrationError(
                f"frame size changed during calibration ({total.shape[1]}x{total.shape[0]} to "
                f"{frame.pixels.shape[1]}x{frame.pixels.shape[0]}); nothing was saved"
            )
        await asyncio.to_thread(np.add, total, frame.pixels, out=total)
        if progress is not None:
            progress(i + 1, frames, label)
    assert total is not None
    return (total / frames).astype(np.float32)


async def acquire_dark(
    scope: Scope, *, frames: int, exposure_ms: float | None, gain_db: float | None,
    progress: Progress | None = None,
) -> np.ndarray:
    """Average ``frames`` frames with the lamp off (float32). The caller holds the scope."""
    return await _average(
        scope, frames=frames, exposure_ms=exposure_ms, gain_db=gain_db, lamp=False,
        progress=progress, label="dark frame",
    )


async def acquire_flat(
    scope: Scope, *, frames: int, exposure_ms: float | None, gain_db: float | None,
    defocus_um: float | None = None, progress: Progress | None = None,
) -> np.ndarray:
    """Average ``frames`` frames of the blank field under the objective (float32).

    With ``defocus_um`` the focus is first moved that far (away from the vessel where the
    limits allow) so that any structure in the field washes out; it is moved back after.
    The caller positions the stage over a blank field and holds the scope.
    """
    start = await scope.position() if defocus_um else None
    if start is not None and defocus_um:
        f = scope.profile.focus
        away = start.z_um - abs(defocus_um)
        toward = start.z_um + abs(defocus_um)
        if away >= f.z_min_um:
            target = away
        elif toward <= f.z_safe_max_um:
            target = toward
        else:
            raise CalibrationError(
                f"cannot defocus by {defocus_um:g} um from z {start.z_um:.1f} um within the focus limits "
                f"({f.z_min_um:g} to {f.z_safe_max_um:g} um); use a smaller --defocus-um"
            )
        await scope.move_to(z_um=target)
    try:
        return await _average(
            scope, frames=frames, exposure_ms=exposure_ms, gain_db=gain_db, lamp=True,
            progress=progress, label="flat frame",
        )
    finally:
        if start is not None:
            await scope.move_to(z_um=start.z_um)


def blank_field_nonuniformity(mean_image: np.ndarray, temporal_var: np.ndarray, frames: int) -> float:
    """Spatial non-uniformity of an averaged blank field with the temporal noise removed
    (PRNU-style, after EMVA 1288): √(s²_measured − mean(σ²_temporal)/L) / mean."""
    m = np.asarray(mean_image, dtype=np.float64)
    s2 = float(np.var(m)) - float(np.mean(temporal_var)) / frames
    mean = float(m.mean())
    return math.sqrt(max(s2, 0.0)) / mean if mean > 0 else float("nan")


async def check_blank_field(
    scope: Scope, corrector: Corrector, dark: np.ndarray, *, frames: int, exposure_ms: float | None,
    gain_db: float | None, progress: Progress | None = None,
) -> dict[str, float]:
    """Non-uniformity of the blank field under the objective, before (dark subtracted only)
    and after correction, each from ``frames`` new frames with the temporal noise removed."""
    if frames < 2:
        raise CalibrationError(f"checking a blank field needs at least 2 frames, got {frames}")
    dark64 = np.asarray(dark, dtype=np.float64)
    before: RunningStats | None = None
    after: RunningStats | None = None
    for i in range(frames):
        px = (await scope.capture(exposure_ms=exposure_ms, gain_db=gain_db, lamp=True)).pixels
        if before is None or after is None:
            before, after = RunningStats(px.shape), RunningStats(px.shape)

        def update(px: np.ndarray = px, before: RunningStats = before, after: RunningStats = after) -> None:
            before.add(px - dark64)
            after.add(corrector.apply(px))

        await asyncio.to_thread(update)
        if progress is not None:
            progress(i + 1, frames, "blank field")
    assert before is not None and after is not None
    result: dict[str, float] = {"frames": float(frames)}
    for kind, stats in (("before", before), ("after", after)):
        result[f"{kind}_fraction"] = blank_field_nonuniformity(stats.mean, stats.variance, frames)
    return result
