"""The ``[sim]`` profile section: settings of the simulated scope (world, culture, sensor)."""

from __future__ import annotations

import dataclasses

from drivers.options import option, section


@dataclasses.dataclass(frozen=True, kw_only=True)
class SimPlate:
    """Where the simulated vessel's wells lie on the stage (stage coordinates, um)."""

    rows: int = option(8, doc="well rows", min=1, max=32)
    columns: int = option(12, doc="well columns", min=1, max=48)
    a1_x_um: float = option(14380.0, doc="stage x of the centre of well A1", unit="um")
    a1_y_um: float = option(11240.0, doc="stage y of the centre of well A1", unit="um")
    pitch_um: float = option(9000.0, doc="well-to-well spacing", min=100.0, max=100000.0, unit="um")
    well_diameter_um: float = option(6400.0, doc="inner diameter of a well bottom", min=100.0, max=100000.0, unit="um")
    empty_wells: list[str] = option([], doc="wells seeded with no cells (controls, blank fields), e.g. ['H12']")
    density_spread: float = option(
        0.3, doc="well-to-well relative spread of seeding density", min=0.0, max=2.0
    )


@dataclasses.dataclass(frozen=True, kw_only=True)
class SimCulture:
    cell_line: str = option("KVL-7 fibroblast-like", doc="name of the (invented) cell line shown in reports")
    seeding_per_mm2: float = option(60.0, doc="cells per mm^2 at t = 0", min=0.0, max=5000.0, unit="1/mm^2")
    doubling_time_h: float = option(22.0, doc="doubling time in the exponential phase", min=1.0, max=1000.0, unit="h")
    max_confluence: float = option(0.95, doc="confluence the logistic growth levels off at", min=0.05, max=1.0)
    cell_diameter_um: float = option(30.0, doc="mean diameter of a spread cell", min=2.0, max=300.0, unit="um")
    cell_elongation: float = option(2.4, doc="mean length-to-width ratio of a cell", min=1.0, max=6.0)
    nucleus_diameter_um: float = option(11.0, doc="mean nucleus diameter", min=1.0, max=100.0, unit="um")
    cell_thickness_um: float = option(3.0, doc="thickness of the cytoplasm", min=0.1, max=30.0, unit="um")
    nucleus_thickness_um: float = option(5.0, doc="thickness over the nucleus", min=0.1, max=40.0, unit="um")
    cell_index: float = option(1.365, doc="refractive index of cytoplasm", min=1.3, max=1.6)
    nucleus_index: float = option(1.375, doc="refractive index of the nucleus", min=1.3, max=1.6)
    medium_index: float = option(1.335, doc="refractive index of the culture medium", min=1.3, max=1.6)
    motility_um_per_h: float = option(8.0, doc="typical cell speed", min=0.0, max=500.0, unit="um/h")
    absorption: float = option(0.01, doc="fraction of light absorbed across a cell (phase objects absorb little)", min=0.0, max=0.5)


@dataclasses.dataclass(frozen=True, kw_only=True)
class SimFocalPlane:
    """True focal plane z(x, y, t) = z0 + tilt + sag + thermal drift (ground truth for tests)."""

    z0_um: float = option(1500.0, doc="in-focus z at the plate centre, before drift", unit="um")
    tilt_x_um_per_mm: float = option(0.8, doc="plate tilt along x", min=-50.0, max=50.0, unit="um/mm")
    tilt_y_um_per_mm: float = option(-0.5, doc="plate tilt along y", min=-50.0, max=50.0, unit="um/mm")
    sag_um: float = option(12.0, doc="bottom sag at the centre relative to the edges (paraboloid)", min=-500.0, max=500.0, unit="um")
    drift_um: float = option(25.0, doc="thermal focus drift after each door opening", min=-500.0, max=500.0, unit="um")
    drift_tau_min: float = option(40.0, doc="time constant of the drift's exponential settling", min=0.1, max=10000.0, unit="min")
    door_openings_h: list[float] = option([2.0, 26.0], doc="hours after seeding ([sim] start_time) when the incubator door opens")


@dataclasses.dataclass(frozen=True, kw_only=True)
class SimSensor:
    """EMVA 1288 linear camera model constants (the truth characterisation must recover)."""

    quantum_efficiency: float = option(0.6, doc="photons to electrons", min=0.01, max=1.0)
    photons_per_px_ms: float = option(
        1700.0,
        doc="photons per pixel per ms at the field centre, lamp at full level, before the phase ring "
        "(an empty field passes tau^2 of them)",
        min=0.0,
        max=1e7,
    )
    system_gain_dn_per_e: float = option(
        0.021, doc="overall system gain K at 0 dB, in DN of the camera's bit depth", min=1e-4, max=100.0, unit="DN/e-"
    )
    read_noise_e: float = option(6.0, doc="temporal dark noise", min=0.0, max=1000.0, unit="e-")
    dark_current_e_per_s: float = option(40.0, doc="dark current", min=0.0, max=1e6, unit="e-/s")
    dark_offset_dn: float = option(8.0, doc="black level added before quantisation", min=0.0, max=4096.0, unit="DN")
    dsnu_e: float = option(2.0, doc="dark signal non-uniformity (std over pixels)", min=0.0, max=1000.0, unit="e-")
    prnu_fraction: float = option(0.01, doc="photo-response non-uniformity (std over pixels, relative)", min=0.0, max=0.5)
    full_well_e: float = option(12000.0, doc="saturation capacity", min=100.0, max=1e7, unit="e-")


@dataclasses.dataclass(frozen=True, kw_only=True)
class SimIllumination:
    vignetting: float = option(0.35, doc="relative light lost at the frame corner from vignetting", min=0.0, max=0.95)
    led_offset_x: float = option(0.12, doc="LED centre offset along x, fraction of the frame width", min=-1.0, max=1.0)
    led_offset_y: float = option(-0.08, doc="LED centre offset along y, fraction of the frame height", min=-1.0, max=1.0)
    led_spread: float = option(0.9, doc="width of the LED's light spot, fraction of the frame diagonal", min=0.05, max=10.0)


@dataclasses.dataclass(frozen=True, kw_only=True)
class SimMotion:
    """The simulated mechanics (drivers/sim/mechanics.py): play on every axis, where a move
    stops, and how the stage rings after it. The defaults are a budget build's, for
    ``phasewatch commission`` to measure; zero them all for an ideal stage."""

    x_backlash_um: float = option(7.0, doc="true backlash of the simulated x drive", min=0.0, max=500.0, unit="um")
    y_backlash_um: float = option(4.5, doc="true backlash of the simulated y drive", min=0.0, max=500.0, unit="um")
    z_backlash_um: float = option(6.0, doc="true backlash of the simulated focus drive", min=0.0, max=500.0, unit="um")
    repeatability_um: float = option(
        0.25, doc="standard deviation of where an x or y move stops, per axis, drawn afresh for every move",
        min=0.0, max=100.0, unit="um",
    )
    ring_amplitude_um: float = option(
        2.5, doc="peak of the carriage's oscillation along the move after an x or y move stops (at most the move's length)",
        min=0.0, max=1000.0, unit="um",
    )
    ring_frequency_hz: float = option(9.0, doc="frequency of that oscillation", min=0.1, max=1000.0, unit="Hz")
    ring_decay_ms: float = option(70.0, doc="time constant of the oscillation's exponential decay", min=0.1, max=10000.0, unit="ms")
    travel_margin_um: float = option(
        2000.0, doc="mechanical travel beyond the profile's soft limits (x, y, and z below z_min_um)", min=0.0, max=100000.0, unit="um"
    )
    z_crash_margin_um: float = option(
        200.0, doc="focus travel above z_safe_max_um before the objective hits the vessel (hard limit)", min=0.0, max=10000.0, unit="um"
    )


@dataclasses.dataclass(frozen=True, kw_only=True)
class SimCameraMount:
    """How the simulated camera truly sits on the scope, which the profile does not know:
    turned against the stage axes, its pixel size off the nominal (a relay lens or tube
    length not quite what was bought), perhaps mirrored. Defaults are a plausible home
    build's, for ``phasewatch commission`` to measure; 0, 0 and false for a perfect one."""

    rotation_deg: float = option(
        1.6, doc="angle from the stage's +x axis to the image's +column axis, turning towards stage +y",
        min=-180.0, max=180.0, unit="deg",
    )
    pixel_size_error_percent: float = option(
        2.8, doc="true pixel size in the sample, per cent above the profile's camera_pixel_um / magnification",
        min=-50.0, max=100.0, unit="%",
    )
    mirrored: bool = option(False, doc="the image is mirrored: its rows run along stage -y (an odd number of mirrors)")


@dataclasses.dataclass(frozen=True, kw_only=True)
class SimOptics:
    """How the simulated phase-contrast optics are built (see drivers/sim/optics.py)."""

    ring_width_fraction: float = option(
        0.08,
        doc="half-width of the phase ring's footprint in the pupil, fraction of NA/λ (sets halo width); "
        "with on-axis light the radius of the ring's disc",
        min=0.001,
        max=0.5,
    )
    annulus_fraction: float = option(
        0.6,
        doc="radius of the condenser annulus (and of the phase ring it is imaged onto) in the pupil, fraction of NA/λ; "
        "0 = on-axis light",
        min=0.0,
        max=0.95,
    )
    illumination_angles: int = option(
        8, doc="illumination directions sampled on the condenser annulus (summed incoherently)", min=1, max=64
    )
    annulus_width_fraction: float = option(
        0.8, doc="radial width of the condenser annulus' image, fraction of the phase ring's width", min=0.0, max=1.0
    )
    led_bandwidth_nm: float = option(30.0, doc="spectral width of the LED (sampled uniformly)", min=0.0, max=200.0, unit="nm")


_FAULT_TIMES = dict(min=0.0, max=1e9, unit="s")


@dataclasses.dataclass(frozen=True, kw_only=True)
class SimFaults:
    """Controller faults to rehearse a bad night before trusting the scope with a culture.

    Each list holds times in simulated seconds after the scope opens (its simulated clock,
    so ``clock_speed`` and ``--sim-speed`` compress them too); the fault then strikes the
    simulated controller as in drivers/sim/controller.py.
    """

    reset_at_s: list[float] = option([], doc="when the controller reboots (motion stops, coordinates lost)", **_FAULT_TIMES)
    disconnect_at_s: list[float] = option(
        [], doc="when the USB cable is pulled (the port disappears until reconnect_after_s later)", **_FAULT_TIMES
    )
    reconnect_after_s: float = option(30.0, doc="how long a pulled cable stays out", min=0.0, max=86400.0, unit="s")
    garble_at_s: list[float] = option([], doc="when the next reply arrives as noise", **_FAULT_TIMES)
    drop_reply_at_s: list[float] = option([], doc="when the next reply is never sent", **_FAULT_TIMES)
    stall_at_s: list[float] = option(
        [], doc="when the next move jams half-way and never finishes (until a halt or a reset)", **_FAULT_TIMES
    )

    def schedule(self) -> list[tuple[float, str]]:
        """(time after opening, fault name) in time order, fault names as the controller knows them."""
        named = (
            ("reset", self.reset_at_s), ("disconnect", self.disconnect_at_s), ("garble", self.garble_at_s),
            ("drop_reply", self.drop_reply_at_s), ("stall", self.stall_at_s),
        )
        return sorted((float(t), fault) for fault, times in named for t in times)


@dataclasses.dataclass(frozen=True, kw_only=True)
class SimConfig:
    seed: int = option(20261201, doc="seed: the same seed gives the same culture and noise")
    clock_speed: float = option(1.0, doc="simulated seconds per real second", min=0.001, max=1e7)
    start_time: str = option(
        "now",
        doc="simulated time the plate was seeded (ISO 8601), or 'now': culture_age_h before the real time "
        "the simulated clock first starts (kept in the data folder's clock state)",
    )
    culture_age_h: float = option(
        48.0, doc="age of the culture (hours after start_time) when the simulated clock first starts", min=0.0, max=10000.0, unit="h"
    )
    plate: SimPlate = section(SimPlate)
    culture: SimCulture = section(SimCulture)
    focal_plane: SimFocalPlane = section(SimFocalPlane)
    sensor: SimSensor = section(SimSensor)
    illumination: SimIllumination = section(SimIllumination)
    motion: SimMotion = section(SimMotion)
    camera_mount: SimCameraMount = section(SimCameraMount)
    optics: SimOptics = section(SimOptics)
    faults: SimFaults = section(SimFaults)
