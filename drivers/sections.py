"""The hardware sections every profile has: camera, optics, stage, focus and illumination.

``[camera]`` and ``[stage]`` hold the options every driver shares; the options only one
driver has (a camera's device, a controller's serial port) are declared next to that
driver as its own options dataclass and loaded into ``options`` against the chosen
driver (see :mod:`drivers.registry`). Drivers read their sections from here, so the
hardware layer needs nothing from the daemon.
"""

from __future__ import annotations

import dataclasses
from pathlib import Path
from typing import Any, Protocol, TypeVar

from drivers.options import Implausible, given, option

T = TypeVar("T")


@dataclasses.dataclass(frozen=True, kw_only=True)
class CameraSection:
    driver: str = option(doc="camera driver (one of the registered camera drivers)")
    width_px: int = option(1280, doc="frame width", min=16, max=8192, unit="px")
    height_px: int = option(960, doc="frame height", min=16, max=8192, unit="px")
    bit_depth: int = option(8, doc="bits per pixel delivered", choices=(8, 10, 12, 16))
    exposure_ms: float = option(20.0, doc="default exposure", min=0.01, max=10000.0, unit="ms")
    gain_db: float = option(0.0, doc="default analogue gain", min=0.0, max=48.0, unit="dB")
    flush_frames: int = option(
        2, doc="frames discarded after a move so no stale buffer is returned", min=0, max=16
    )
    options: Any = given(doc="the chosen driver's own options (its options dataclass); None: its defaults")

    def plausibility(self) -> list[Implausible]:
        # Phase contrast under an LED exposes in milliseconds to tens of milliseconds;
        # seconds suggest a value typed in microseconds or a lamp that is off (common practice).
        if self.exposure_ms > PLAUSIBLE_EXPOSURE_MAX_MS:
            return [Implausible("exposure_ms", (
                f"{self.exposure_ms:g} ms is allowed but unusual: phase contrast under an LED exposes for "
                f"at most about {PLAUSIBLE_EXPOSURE_MAX_MS:g} ms (common practice); was it meant in another unit?"
            ))]
        return []


# Bounds of what is usual, not of what is allowed: beyond them check warns (see plausibility()).
PLAUSIBLE_EXPOSURE_MAX_MS = 1000.0
PLAUSIBLE_CAMERA_PIXEL_MAX_UM = 15.0
PLAUSIBLE_FOCUS_TRAVEL_MAX_UM = 50_000.0


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

    @property
    def resolution_um(self) -> float:
        """Rayleigh's resolution limit r = 0.61 λ/NA, in um (the Rayleigh criterion; from memory)."""
        return 0.61 * (self.wavelength_nm / 1000.0) / self.numerical_aperture

    def plausibility(self) -> list[Implausible]:
        out = []
        # Camera sensors used on microscopes have pixel pitches of about 1 to 15 um (common practice).
        if self.camera_pixel_um > PLAUSIBLE_CAMERA_PIXEL_MAX_UM:
            out.append(Implausible("camera_pixel_um", (
                f"{self.camera_pixel_um:g} um is allowed but unusual: camera sensors have pixels of about 1 to "
                f"{PLAUSIBLE_CAMERA_PIXEL_MAX_UM:g} um (common practice)"
            )))
        # A pixel in the sample plane larger than the smallest resolved detail loses detail the
        # objective delivers (Nyquist sampling wants at most half of it).
        if self.pixel_size_um > self.resolution_um:
            out.append(Implausible("camera_pixel_um", (
                f"one pixel covers {self.pixel_size_um:.2f} um of the sample at {self.magnification:g}x, more than the "
                f"objective resolves ({self.resolution_um:.2f} um, Rayleigh 0.61 λ/NA): check the pixel pitch and magnification"
            )))
        return out


@dataclasses.dataclass(frozen=True, kw_only=True)
class StageSection:
    driver: str = option(doc="motion controller driver (one of the registered stage drivers)")
    x_min_um: float = option(doc="soft limit", unit="um")
    x_max_um: float = option(doc="soft limit", unit="um")
    y_min_um: float = option(doc="soft limit", unit="um")
    y_max_um: float = option(doc="soft limit", unit="um")
    xy_speed_um_s: float = option(5000.0, doc="travel speed in x and y", min=1.0, max=200000.0, unit="um/s")
    xy_accel_um_s2: float = option(20000.0, doc="acceleration in x and y", min=1.0, max=5e6, unit="um/s^2")
    settle_ms: float = option(50.0, doc="wait after a move before exposing (vibration)", min=0.0, max=10000.0, unit="ms")
    backlash_x_um: float = option(
        0.0, doc="x backlash; when set, every x move ends with an approach from below by more than this (0: straight there)",
        min=0.0, max=1000.0, unit="um",
    )
    backlash_y_um: float = option(
        0.0, doc="y backlash; when set, every y move ends with an approach from below by more than this (0: straight there)",
        min=0.0, max=1000.0, unit="um",
    )
    # Common, not G-code-only: the simulated stage is driven by the G-code driver too.
    reply_timeout_s: float = option(2.0, doc="longest wait for 'ok' to a plain command", min=0.05, max=60.0, unit="s")
    move_timeout_s: float = option(60.0, doc="longest wait for a move to complete", min=0.5, max=600.0, unit="s")
    home_on_connect: bool = option(False, doc="home all axes when the controller connects")
    options: Any = given(doc="the chosen driver's own options (its options dataclass); None: its defaults")

    def __post_init__(self) -> None:
        if self.x_min_um >= self.x_max_um:
            raise ValueError("x_max_um: must be greater than x_min_um")
        if self.y_min_um >= self.y_max_um:
            raise ValueError("y_max_um: must be greater than y_min_um")


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

    def plausibility(self) -> list[Implausible]:
        # Focus drives on small microscopes travel a few millimetres, at most a few
        # centimetres (common practice): metres is a value typed in the wrong unit.
        travel = self.z_safe_max_um - self.z_min_um
        if travel > PLAUSIBLE_FOCUS_TRAVEL_MAX_UM:
            return [Implausible("z_safe_max_um", (
                f"{self.z_safe_max_um:g} um is allowed but unlikely: {travel / 1000:g} mm of focus travel, where focus drives "
                f"travel at most about {PLAUSIBLE_FOCUS_TRAVEL_MAX_UM / 1000:g} mm (common practice); was it meant in another unit?"
            ))]
        return []


@dataclasses.dataclass(frozen=True, kw_only=True)
class IlluminationSection:
    control: str = option(
        "controller", doc="how the LED is switched", choices=("controller", "always_on")
    )
    channel: int = option(0, doc="controller PWM output driving the LED (M106 P<channel>)", min=0, max=7)
    level: float = option(1.0, doc="LED level while imaging, 0..1", min=0.0, max=1.0)
    warmup_ms: float = option(20.0, doc="wait after switching the LED on before exposing", min=0.0, max=5000.0, unit="ms")
    off_between_frames: bool = option(True, doc="switch the LED off between frames (less light on living cells)")


class HardwareSections(Protocol):
    """What drivers read of a loaded profile: its file and its hardware sections.

    ``sim`` is the ``[sim]`` section when a simulated driver is chosen, else None.
    """

    @property
    def path(self) -> Path: ...

    @property
    def camera(self) -> CameraSection: ...

    @property
    def optics(self) -> OpticsSection: ...

    @property
    def stage(self) -> StageSection: ...

    @property
    def focus(self) -> FocusSection: ...

    @property
    def illumination(self) -> IlluminationSection: ...

    @property
    def sim(self) -> Any: ...


def driver_options(section: CameraSection | StageSection, cls: type[T]) -> T:
    """The section's options for a driver whose options class is ``cls``.

    A section built in code without options gets the driver's defaults; options of
    another driver are a programming error (the profile loader never builds one).
    """
    opts = section.options
    if opts is None:
        return cls()
    if not isinstance(opts, cls):
        raise TypeError(
            f"[{'camera' if isinstance(section, CameraSection) else 'stage'}] driver {section.driver!r} "
            f"needs {cls.__name__}, got {type(opts).__name__}"
        )
    return opts


def _option_range(cls: type, name: str) -> tuple[float, float]:
    for f in dataclasses.fields(cls):
        if f.name == name:
            return float(f.metadata["min"]), float(f.metadata["max"])
    raise KeyError(name)


# The drivers' limits are the [camera] section's own declarations, so the drivers and the
# profile loader can never disagree about what is allowed.
EXPOSURE_RANGE_MS: tuple[float, float] = _option_range(CameraSection, "exposure_ms")
GAIN_RANGE_DB: tuple[float, float] = _option_range(CameraSection, "gain_db")
