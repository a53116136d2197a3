"""Scope profiles: one TOML file per scope build (camera, optics, stage, focus, lamp, camera
mount, sim).

Loading is strict (see :mod:`drivers.options`): every error names the file, the section and
the option and says what is allowed. Every problem in the file is found in one pass (a
:class:`~drivers.options.ConfigErrors` carries them all, its message the first one's), and
:func:`profile_warnings` lists values that are allowed but implausible. ``[camera]`` and ``[stage]`` hold the options every
driver shares (:mod:`drivers.sections`) plus the chosen driver's own options (declared
next to the driver, found through :mod:`drivers.registry`); an option of another driver
is an error that says whose it is. ``[camera_mount]`` (how the camera sits against the
stage, measured by ``phasewatch commission``) may be left out. ``[sim]`` is read only when
a simulated driver is chosen.
"""

from __future__ import annotations

import dataclasses
import math
import tomllib
from pathlib import Path
from typing import Any, Literal

from drivers.options import (
    ConfigError,
    load_section,
    option,
    option_names,
    plausibility_warnings,
    raise_all,
    suggest,
)
from drivers.registry import (
    CameraDriver,
    StageDriver,
    camera_driver,
    driver_names,
    option_owners,
    sim_section,
    stage_driver,
)
from drivers.sections import CameraSection, FocusSection, IlluminationSection, OpticsSection, StageSection

PROFILE_DIR = Path(__file__).resolve().parent.parent / "hw_profiles"


# A few browsers on the lab network and a wall screen; each stream costs one JPEG per
# frame to send and its buffers, never a capture of its own.
DEFAULT_MAX_VIEWERS = 8
# A viewer whose frames have not been taken off the wire for this long is gone.
DEFAULT_STALL_S = 10.0

@dataclasses.dataclass(frozen=True, kw_only=True)
class ScopeSection:
    name: str = option(doc="name of this scope build, shown in the interface")
    notes: str = option("", doc="free text: where the scope sits, who built it")
    allow_anonymous_viewing: bool = option(
        False, doc="let browsers view (never control) without the access token"
    )
    max_live_viewers: int = option(
        DEFAULT_MAX_VIEWERS, doc="live streams served at once; more are refused with 503 until one ends",
        min=1, max=100,
    )
    live_stall_s: float = option(
        DEFAULT_STALL_S, doc="end a live stream whose viewer has read nothing for this long "
                             "(when nobody reads any more, the camera and the LED stop)", min=1.0, max=600.0, unit="s",
    )


@dataclasses.dataclass(frozen=True, kw_only=True)
class CameraMountSection:
    """How the camera sits against the stage; with ``[optics]``' pixel size it is the map
    from stage micrometres to image pixels (:mod:`daemon.commission.image_map`).
    ``phasewatch commission`` measures it; a profile without the section has a camera
    square to the stage, not mirrored."""

    rotation_deg: float = option(
        0.0, doc="angle from the stage's +x axis to the image's +column axis, turning towards stage +y",
        min=-180.0, max=180.0, unit="deg",
    )
    skew_deg: float = option(
        0.0, doc="how far the stage's x and y axes, seen in the image, are from square (positive: wider than 90 deg)",
        min=-20.0, max=20.0, unit="deg",
    )
    aspect: float = option(
        1.0, doc="image length of a stage y step over that of an equal x step (1: both axes equally calibrated)",
        min=0.5, max=2.0,
    )
    mirrored: bool = option(False, doc="the image is mirrored (an odd number of mirrors in the light path)")
    measured: str = option("", doc="when commissioning measured these (ISO 8601); empty: not measured")


@dataclasses.dataclass(frozen=True, kw_only=True)
class Profile:
    path: Path
    scope: ScopeSection
    camera: CameraSection
    optics: OpticsSection
    stage: StageSection
    focus: FocusSection
    illumination: IlluminationSection
    sim: Any  # the [sim] section when a simulated driver is chosen, else None
    camera_mount: CameraMountSection = dataclasses.field(default_factory=CameraMountSection)

    @property
    def is_simulated(self) -> bool:
        return camera_driver(self.camera.driver).simulated or stage_driver(self.stage.driver).simulated

    @property
    def name(self) -> str:
        return self.path.stem


_PLAIN_SECTIONS: dict[str, type] = {
    "scope": ScopeSection,
    "optics": OpticsSection,
    "focus": FocusSection,
    "illumination": IlluminationSection,
}
_DRIVER_SECTIONS: dict[str, type] = {"camera": CameraSection, "stage": StageSection}
# Sections a profile may leave out (their options all have defaults).
_OPTIONAL_SECTIONS: dict[str, type] = {"camera_mount": CameraMountSection}
# In the order they are checked (and listed in messages); [sim] last.
SECTION_NAMES = ("scope", "camera", "optics", "stage", "focus", "illumination", "camera_mount", "sim")


def resolve_profile_path(name_or_path: str | Path) -> Path:
    """A path as given, or a bare name looked up in ``hw_profiles/`` (``sim`` -> sim.toml)."""
    p = Path(name_or_path)
    if p.exists():
        return p
    candidate = PROFILE_DIR / (p.name if p.suffix == ".toml" else f"{p.name}.toml")
    if candidate.exists():
        return candidate
    known = sorted(q.stem for q in PROFILE_DIR.glob("*.toml"))
    raise ConfigError(
        p, "", None, f"no such profile file; give a path or one of: {', '.join(known)}{suggest(p.stem, known)}"
    )


def _lookup(kind: Literal["camera", "stage"], name: str) -> CameraDriver | StageDriver:
    return camera_driver(name) if kind == "camera" else stage_driver(name)


def _load_driver_section(
    kind: Literal["camera", "stage"], table: dict[str, Any], path: Path
) -> tuple[CameraDriver | StageDriver, Any]:
    """The section's common fields plus the chosen driver's own options, strictly."""
    names = driver_names(kind)
    choices = ", ".join(repr(n) for n in names)
    if "driver" not in table:
        raise ConfigError(path, kind, "driver", f"missing required option; set it to one of {choices} ({kind} driver)")
    name = table["driver"]
    if not isinstance(name, str) or name not in names:
        hint = suggest(name, names) if isinstance(name, str) else ""
        raise ConfigError(
            path, kind, "driver", f"must be one of {choices} (the registered {kind} drivers), got {name!r}{hint}"
        )
    try:
        spec = _lookup(kind, name)
    except ImportError as exc:
        raise ConfigError(path, kind, "driver", f"the {name} driver cannot be loaded here ({exc})") from None
    common = option_names(_DRIVER_SECTIONS[kind])
    own = option_names(spec.options)
    problems: list[ConfigError] = []
    for key, value in table.items():
        if key in common or key in own:
            continue
        takes = f"takes {', '.join(own)}" if own else "takes no options of its own"
        owners = [o for o in option_owners(kind, key) if o != name]
        if owners:
            whose = " and ".join(repr(o) for o in owners)
            problems.append(ConfigError(
                path, kind, key,
                f"is an option of the {whose} {kind} driver{'s' if len(owners) > 1 else ''}, not of {name!r}; "
                f"the {name} driver {takes} beside the common [{kind}] options",
            ))
            continue
        what = "sub-section" if isinstance(value, dict) else "option"
        problems.append(ConfigError(
            path, kind, key,
            f"unknown {what}{suggest(key, common + own)}; allowed here: {', '.join(sorted(common + own))}",
        ))
    section = options = None
    try:
        section = load_section(_DRIVER_SECTIONS[kind], {k: v for k, v in table.items() if k in common}, file=path, section=kind)
    except ConfigError as exc:
        problems.append(exc)
    try:
        options = load_section(spec.options, {k: v for k, v in table.items() if k in own}, file=path, section=kind)
    except ConfigError as exc:
        problems.append(exc)
    raise_all(problems)
    assert section is not None
    return spec, dataclasses.replace(section, options=options)


def load_profile(name_or_path: str | Path) -> Profile:
    path = resolve_profile_path(name_or_path)
    try:
        raw = tomllib.loads(path.read_text(encoding="utf-8"))
    except ValueError as exc:  # TOMLDecodeError, or an integer too long to convert
        raise ConfigError(path, "", None, f"not valid TOML: {exc}") from None
    except OSError as exc:
        raise ConfigError(path, "", None, f"cannot read: {exc.strerror}") from None
    problems: list[ConfigError] = []
    unusable: set[str] = set()
    for key, value in raw.items():
        if key not in SECTION_NAMES:
            problems.append(ConfigError(
                path, key, None,
                f"unknown section{suggest(key, SECTION_NAMES)}; allowed: {', '.join('[' + s + ']' for s in SECTION_NAMES)}",
            ))
        elif not isinstance(value, dict):
            problems.append(ConfigError(path, "", key, f"must be a section [{key}], not a plain value"))
            unusable.add(key)
    parts: dict[str, Any] = {}
    specs: dict[str, CameraDriver | StageDriver] = {}
    for name in SECTION_NAMES[:-1]:
        if name in unusable:
            continue
        try:
            if name in _OPTIONAL_SECTIONS:
                parts[name] = load_section(_OPTIONAL_SECTIONS[name], raw.get(name, {}), file=path, section=name)
                continue
            if name not in raw:
                raise ConfigError(path, name, None, f"missing section [{name}]")
            if name in _DRIVER_SECTIONS:
                specs[name], parts[name] = _load_driver_section(name, raw[name], path)  # type: ignore[arg-type]
            else:
                parts[name] = load_section(_PLAIN_SECTIONS[name], raw[name], file=path, section=name)
        except ConfigError as exc:
            problems.append(exc)
    if "camera" not in specs or "stage" not in specs or "sim" in unusable:
        # Without both drivers known, whether [sim] belongs cannot be said: report what was found.
        raise_all(problems)
    camera, stage = specs["camera"], specs["stage"]
    try:
        _load_sim(raw, path, camera, stage, parts)
    except ConfigError as exc:
        problems.append(exc)
    raise_all(problems)
    profile = Profile(path=path, **parts)
    if not math.isfinite(profile.optics.depth_of_field_um):
        raise ConfigError(path, "optics", None, "depth of field is not finite; check NA and magnification")
    return profile


def _load_sim(
    raw: dict[str, Any], path: Path, camera: CameraDriver | StageDriver, stage: CameraDriver | StageDriver,
    parts: dict[str, Any],
) -> None:
    """``parts["sim"]``: the [sim] section when a simulated driver is chosen, else None."""
    if camera.simulated and not stage.simulated:
        raise ConfigError(
            path, "camera", "driver",
            f"the {camera.name} camera images the simulated stage; set [stage] driver = "
            f"{' or '.join(repr(n) for n in _simulated('stage'))} too",
        )
    simulated = camera.simulated or stage.simulated
    if "sim" in raw:
        if not simulated:
            raise ConfigError(
                path, "sim", None,
                f"[sim] sets up the simulated scope, but neither the {camera.name!r} camera nor the {stage.name!r} "
                f"stage is simulated; remove [sim], or choose a simulated driver (stage: "
                f"{', '.join(repr(n) for n in _simulated('stage'))})",
            )
        parts["sim"] = load_section(sim_section(), raw["sim"], file=path, section="sim")
    elif simulated:
        raise ConfigError(path, "sim", None, "missing section [sim]: the sim drivers need it (seed, culture, sensor)")
    else:
        parts["sim"] = None


def profile_warnings(profile: Profile) -> list[str]:
    """One line per value that is allowed but implausible (each section's ``plausibility()``),
    naming file, section and option."""
    out: list[str] = []
    for name in SECTION_NAMES:
        out.extend(plausibility_warnings(getattr(profile, name), file=profile.path, section=name))
    return out


def _simulated(kind: Literal["camera", "stage"]) -> list[str]:
    return [n for n in driver_names(kind) if _lookup(kind, n).simulated]

