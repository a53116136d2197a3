"""Scope profiles: one TOML file per scope build (camera, optics, stage, focus, lamp, sim).

Loading is strict (see :mod:`drivers.options`): every error names the file, the section and
the option and says what is allowed.
"""

from __future__ import annotations

import dataclasses
import math
import tomllib
from pathlib import Path

from drivers.options import ConfigError, load_section, option, suggest
from drivers.sim.config import SimConfig

PROFILE_DIR = Path(__file__).resolve().parent.parent / "hw_profiles"


@dataclasses.dataclass(frozen=True, kw_only=True)
class ScopeSection:
    name: str = option(doc="name of this scope build, shown in the interface")
    notes: str = option("", doc="free text: where the scope sits, who built it")
    allow_anonymous_viewing: bool = option(
        False, doc="let browsers view (never control) without the access token"
    )


@dataclasses.dataclass(frozen=True, kw_only=True)
class CameraSection:
    driver: str = option(doc="camera driver", choices=("sim", "opencv", "replay", "board"))
    device: str = option("0", doc="OpenCV device index or /dev/video path (opencv driver)")
    width_px: int = option(1280, doc="frame width", min=16, max=8192, unit="px")
    height_px: int = option(960, doc="frame height", min=16, max=8192, unit="px")
    bit_depth: int = option(8, doc="bits per pixel delivered", choices=(8, 10, 12, 16))
    exposure_ms: float = option(20.0, doc="default exposure", min=0.01, max=10000.0, unit="ms")
    gain_db: float = option(0.0, doc="default analogue gain", min=0.0, max=48.0, unit="dB")
    flush_frames: int = option(
        2, doc="frames discarded after a move so no stale buffer is returned", min=0, max=16
    )
    replay_dir: str = option("", doc="folder of images played in a loop (replay driver)")
    replay_fps: float = option(30.0, doc="frame rate of the replay driver", min=0.1, max=240.0, unit="fps")
    reconnect_max_s: float = option(
        30.0, doc="longest wait between reconnection attempts after an unplug", min=0.1, max=3600.0, unit="s"
    )

    def __post_init__(self) -> None:
        if self.driver == "replay" and not self.replay_dir:
            raise ValueError("replay_dir: the replay driver needs a folder of images")


@dataclasses.dataclass(frozen=True, kw_only=True)
class OpticsSection:
    objective: str = option(doc="objective name as written on it, e.g. '10x/0.25 Ph1'")
    magnification: float = option(doc="objective magnification times any relay lens", min=1.0, max=100.0, unit="x")
    numerical_aperture: float = option(doc="objective NA", min=0.01, max=1.5)
    wavelength_nm: float = option(550.0, doc="centre wavelength of the LED", min=350.0, max=1100.0, unit="nm")
    immersion_index: float = option(1.0, doc="refractive index between objective and vessel (1.0 = air)", min=1.0, max=1.6)
    camera_pixel_um: float = option(doc="camera sensor pixel pitch", min=0.3, max=30.0, unit="um")
    phase_ring_transmission: float = option(
        0.5, doc="amplitude transmission of the phase ring (direct light)", min=0.01, max=1.0
    )
    phase_ring_shift_deg: float = option(
        90.0, doc="phase advance of the direct light by the ring (90 = positive phase contrast)", min=-180.0, max=180.0, unit="deg"
    )

    @property
    def pixel_size_um(self) -> float:
        """Size of one camera pixel in the sample plane."""
        return self.camera_pixel_um / self.magnification

    @property
    def depth_of_field_um(self) -> float:
        """d = λ·n/NA² + n·e/(M·NA) (Inoué & Spring, Video Microscopy), e = camera pixel pitch."""
        lam_um = self.wavelength_nm / 1000.0
        n, na = self.immersion_index, self.numerical_aperture
        return lam_um * n / na**2 + n * self.camera_pixel_um / (self.magnification * na)


@dataclasses.dataclass(frozen=True, kw_only=True)
class StageSection:
    driver: str = option(doc="motion controller driver", choices=("sim", "gcode"))
    port: str = option("", doc="serial port of the G-code controller, e.g. /dev/ttyUSB0 (gcode driver)")
    baud: int = option(115200, doc="serial speed", choices=(9600, 19200, 38400, 57600, 115200, 250000, 500000, 1000000))
    x_min_um: float = option(doc="soft limit", unit="um")
    x_max_um: float = option(doc="soft limit", unit="um")
    y_min_um: float = option(doc="soft limit", unit="um")
    y_max_um: float = option(doc="soft limit", unit="um")
    xy_speed_um_s: float = option(5000.0, doc="travel speed in x and y", min=1.0, max=200000.0, unit="um/s")
    xy_accel_um_s2: float = option(20000.0, doc="acceleration in x and y", min=1.0, max=5e6, unit="um/s^2")
    settle_ms: float = option(50.0, doc="wait after a move before exposing (vibration)", min=0.0, max=10000.0, unit="ms")
    reply_timeout_s: float = option(2.0, doc="longest wait for 'ok' to a plain command", min=0.05, max=60.0, unit="s")
    move_timeout_s: float = option(60.0, doc="longest wait for a move to complete", min=0.5, max=600.0, unit="s")
    home_on_connect: bool = option(False, doc="home all axes when the controller connects")

    def __post_init__(self) -> None:
        if self.x_min_um >= self.x_max_um:
            raise ValueError("x_max_um: must be greater than x_min_um")
        if self.y_min_um >= self.y_max_um:
            raise ValueError("y_max_um: must be greater than y_min_um")
        if self.driver == "gcode" and not self.port:
            raise ValueError("port: the gcode driver needs a serial port, e.g. /dev/ttyUSB0")


@dataclasses.dataclass(frozen=True, kw_only=True)
class FocusSection:
    z_min_um: float = option(doc="lowest focus position (objective farthest from the vessel)", unit="um")
    z_safe_max_um: float = option(
        doc="highest focus position: beyond it the objective touches the vessel. Never exceeded.", unit="um"
    )
    z_speed_um_s: float = option(500.0, doc="focus travel speed", min=1.0, max=50000.0, unit="um/s")
    z_accel_um_s2: float = option(5000.0, doc="focus acceleration", min=1.0, max=1e6, unit="um/s^2")
    backlash_um: float = option(10.0, doc="focus backlash; every final approach is made from below by more than this", min=0.0, max=1000.0, unit="um")
    settle_ms: float = option(30.0, doc="wait after a focus move before exposing", min=0.0, max=10000.0, unit="ms")
    nominal_z_um: float | None = option(
        None, doc="focus position where the vessel bottom is usually in focus: a cold autofocus searches around it after homing", unit="um"
    )

    def __post_init__(self) -> None:
        if self.z_min_um >= self.z_safe_max_um:
            raise ValueError("z_safe_max_um: must be greater than z_min_um")


@dataclasses.dataclass(frozen=True, kw_only=True)
class IlluminationSection:
    control: str = option(
        "controller", doc="how the LED is switched", choices=("controller", "always_on")
    )
    channel: int = option(0, doc="controller PWM output driving the LED (M106 P<channel>)", min=0, max=7)
    level: float = option(1.0, doc="LED level while imaging, 0..1", min=0.0, max=1.0)
    warmup_ms: float = option(20.0, doc="wait after switching the LED on before exposing", min=0.0, max=5000.0, unit="ms")
    off_between_frames: bool = option(True, doc="switch the LED off between frames (less light on living cells)")


@dataclasses.dataclass(frozen=True, kw_only=True)
class Profile:
    path: Path
    scope: ScopeSection
    camera: CameraSection
    optics: OpticsSection
    stage: StageSection
    focus: FocusSection
    illumination: IlluminationSection
    sim: SimConfig | None

    @property
    def is_simulated(self) -> bool:
        return self.camera.driver == "sim" or self.stage.driver == "sim"

    @property
    def name(self) -> str:
        return self.path.stem


_SECTIONS: dict[str, type] = {
    "scope": ScopeSection,
    "camera": CameraSection,
    "optics": OpticsSection,
    "stage": StageSection,
    "focus": FocusSection,
    "illumination": IlluminationSection,
    "sim": SimConfig,
}


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


def load_profile(name_or_path: str | Path) -> Profile:
    path = resolve_profile_path(name_or_path)
    try:
        raw = tomllib.loads(path.read_text(encoding="utf-8"))
    except ValueError as exc:  # TOMLDecodeError, or an integer too long to convert
        raise ConfigError(path, "", None, f"not valid TOML: {exc}") from None
    except OSError as exc:
        raise ConfigError(path, "", None, f"cannot read: {exc.strerror}") from None
    for key, value in raw.items():
        if key not in _SECTIONS:
            raise ConfigError(
                path, key, None,
                f"unknown section{suggest(key, _SECTIONS)}; allowed: {', '.join('[' + s + ']' for s in _SECTIONS)}",
            )
        if not isinstance(value, dict):
            raise ConfigError(path, "", key, f"must be a section [{key}], not a plain value")
    parts: dict[str, object] = {}
    for name, cls in _SECTIONS.items():
        if name not in raw:
            if name == "sim":
                parts[name] = None
                continue
            raise ConfigError(path, name, None, f"missing section [{name}]")
        parts[name] = load_section(cls, raw[name], file=path, section=name)
    profile = Profile(path=path, **parts)  # type: ignore[arg-type]
    if profile.is_simulated and profile.sim is None:
        raise ConfigError(path, "sim", None, "missing section [sim]: the sim drivers need it (seed, culture, sensor)")
    if not math.isfinite(profile.optics.depth_of_field_um):
        raise ConfigError(path, "optics", None, "depth of field is not finite; check NA and magnification")
    return profile
