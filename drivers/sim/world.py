"""The simulated scope's world: plate, culture, focal plane, optics, lamp and sensor together.

``render`` is what the simulated camera shows: the culture under the field of view at the
given time, imaged in phase contrast with the given defocus, lit unevenly, and read out
by the EMVA 1288 sensor model. Everything else here is ground truth for tests and for
truth-beside-estimate reports.

Frame geometry: the stage position (x_um, y_um) is the centre of the field of view. The
camera sits as ``[sim.camera_mount]`` says (:mod:`drivers.sim.mount`): one pixel is
``pixel_um`` in the sample, the profile's camera_pixel_um / magnification off by
pixel_size_error_percent, and the image is turned by rotation_deg against the stage axes
(perhaps mirrored). With a perfect mount image columns run along +x and rows along +y.
The sample is rendered on a grid aligned with the stage axes and the camera's view of it
is taken from that grid. Times ``t_s`` are seconds since the Unix epoch on the simulated clock; the world
starts at ``[sim] start_time`` (``t0_s``). The focal plane is taken at the field centre
(its tilt across one field is a fraction of a um); the culture advances in 10 s steps.

Defocus: dz = z_um - true focus. A larger z brings the objective's focal plane above the
cells (inverted scope, light coming down through them), so the imaged field is the cells'
field propagated back by dz in the objective's immersion medium.

What is cached, because a focus sweep or a live view renders one field many times: the
true cell mask and object spectrum of the last two fields, the defocus transfers of the
last dz bucket (in the imager), the fixed sensor patterns and the illumination map.
Frame k of a world always gets the same noise for a given seed (``frame_counter``).
"""

from __future__ import annotations

import math
import threading
import time
from collections import OrderedDict
from datetime import datetime, timezone
from typing import TYPE_CHECKING

import numpy as np

from drivers.options import ConfigError
from drivers.sim.culture import Culture
from drivers.sim.focal import FocalPlane
from drivers.sim.illumination import Illumination
from drivers.sim.mount import CameraMount
from drivers.sim.optics import PhaseContrastImager, PhaseContrastOptics
from drivers.sim.plate import PlateLayout
from drivers.sim.sensor import Sensor

if TYPE_CHECKING:
    from drivers.sections import HardwareSections

PAD_MIN_UM = 22.0  # sample beyond the frame on every side, so the FFT's wrap-around stays outside
KEEP_FIELDS = 2  # rendered fields kept (a focus sweep reuses one); ~8 MB each at 1280x960


def smooth_length(n: int) -> int:
    """Smallest length >= n with no prime factor above 7: FFTs of such sizes run fastest."""
    m = n
    while True:
        k = m
        for p in (2, 3, 5, 7):
            while k % p == 0:
                k //= p
        if k == 1:
            return m
        m += 1


def parse_start_time(text: str) -> float:
    """ISO 8601 -> epoch seconds; a time without a zone is taken as UTC."""
    stamp = datetime.fromisoformat(text.replace("Z", "+00:00"))
    if stamp.tzinfo is None:
        stamp = stamp.replace(tzinfo=timezone.utc)
    return stamp.timestamp()


class SimWorld:
    def __init__(self, profile: HardwareSections) -> None:
        sim = profile.sim
        if sim is None:
            raise ConfigError(profile.path, "sim", None, "missing section [sim]: the simulated scope needs it")
        self.profile = profile
        self.sim = sim
        self.seed = sim.seed
        try:
            # 'now': the seeding time is fixed when the simulated clock first starts (see the sim stage).
            self.t0_s = (time.time() - sim.culture_age_h * 3600.0) if sim.start_time == "now" else parse_start_time(sim.start_time)
        except ValueError:
            raise ConfigError(
                profile.path, "sim", "start_time",
                f"must be 'now' or an ISO 8601 time such as 2026-03-02T09:00:00+00:00, got {sim.start_time!r}",
            ) from None
        try:
            self.plate = PlateLayout(sim.plate)
        except ValueError as exc:
            raise ConfigError(profile.path, "sim.plate", "empty_wells", str(exc)) from None
        cam, opt = profile.camera, profile.optics
        self.shape = (cam.height_px, cam.width_px)
        self.mount = CameraMount(sim.camera_mount, opt.pixel_size_um)
        self.pixel_um = self.mount.pixel_um  # the true pitch in the sample, not the profile's
        self.wavelength_um = opt.wavelength_nm / 1000.0
        self.focal = FocalPlane(sim.focal_plane, self.plate)
        self.culture = Culture(sim.culture, self.plate, sim.seed)
        self.illumination = Illumination(sim.illumination, self.shape)
        self.sensor = Sensor(sim.sensor, self.shape, cam.bit_depth, sim.seed)
        self.optics = PhaseContrastOptics(
            na=opt.numerical_aperture,
            wavelength_um=self.wavelength_um,
            immersion_index=opt.immersion_index,
            ring_transmission=opt.phase_ring_transmission,
            ring_shift_rad=-math.radians(opt.phase_ring_shift_deg),
            annulus_fraction=sim.optics.annulus_fraction,
            ring_half_width_fraction=sim.optics.ring_width_fraction,
            n_directions=sim.optics.illumination_angles if sim.optics.annulus_fraction > 0 else 1,
            bandwidth_um=sim.optics.led_bandwidth_nm / 1000.0,
            annulus_width_fraction=sim.optics.annulus_width_fraction,
        )
        pad = math.ceil(PAD_MIN_UM / self.pixel_um)
        # A turned camera sees a slightly larger patch of the stage-aligned grid.
        half_w, half_h = self.mount.grid_half_extent_px(self.shape)
        span_w = cam.width_px if self.mount.square else math.ceil(2.0 * half_w) + 2
        span_h = cam.height_px if self.mount.square else math.ceil(2.0 * half_h) + 2
        self.grid_shape = (smooth_length(span_h + 2 * pad), smooth_length(span_w + 2 * pad))
        self._crop = (
            slice((self.grid_shape[0] - cam.height_px) // 2, (self.grid_shape[0] - cam.height_px) // 2 + cam.height_px),
            slice((self.grid_shape[1] - cam.width_px) // 2, (self.grid_shape[1] - cam.width_px) // 2 + cam.width_px),
        )
        self.imager = PhaseContrastImager(self.grid_shape, self.pixel_um, self.optics, keep_defocus=1)
        self.frame_counter = 0
        self._lock = threading.RLock()
        # Per field only what later frames need: the true cell mask and the object's spectrum.
        self._fields: OrderedDict[tuple[int, int, float], tuple[np.ndarray, np.ndarray]] = OrderedDict()

    # -- ground truth ---------------------------------------------------------------------

    @property
    def background_intensity(self) -> float:
        """Optical intensity of an empty field (tau^2 of the incident light)."""
        return self.optics.ring_transmission**2

    def rel_s(self, t_s: float) -> float:
        return t_s - self.t0_s

    def true_focus_z_um(self, x_um: float, y_um: float, t_s: float) -> float:
        return self.focal.z_um(x_um, y_um, self.rel_s(t_s))

    def well_at(self, x_um: float, y_um: float) -> str | None:
        return self.plate.well_at(x_um, y_um)

    def well_centre_um(self, well: str) -> tuple[float, float]:
        return self.plate.well_centre_um(well)

    def true_well_coverage(self, well: str, t_s: float) -> float:
        """The growth model's covered fraction of a whole well (what fields average to)."""
        row, column = self.plate.parse(well)
        return float(self.culture.expected_coverage(self.rel_s(t_s))[row * self.plate.columns + column])

    def cell_mask(self, x_um: float, y_um: float, t_s: float) -> np.ndarray:
        mask, _ = self._field(x_um, y_um, t_s)
        return mask.copy()

    def true_confluence(self, x_um: float, y_um: float, t_s: float) -> float:
        return float(self.cell_mask(x_um, y_um, t_s).mean())

    def illumination_map(self) -> np.ndarray:
        return self.illumination.map

    @property
    def sensor_truth(self) -> dict[str, float]:
        return self.sensor.truth_at(0.0)

    # -- imaging --------------------------------------------------------------------------

    def _grid_origin(self, x_um: float, y_um: float) -> tuple[int, int, float, float]:
        """The grid for a field centred on (x, y): its first pixel on the plate-wide lattice of
        pixels (column, row), and how far (px) the field's true origin lies beyond it.

        Rasterising on one lattice and moving the image by the remainder (:meth:`render_intensity`)
        keeps a frame an exact translate of its neighbours: the rasterised outlines and spots
        round to whole pixels, which would otherwise shift the content by up to half a pixel."""
        ny, nx = self.grid_shape
        fx = (x_um - (nx - 1) / 2.0 * self.pixel_um) / self.pixel_um
        fy = (y_um - (ny - 1) / 2.0 * self.pixel_um) / self.pixel_um
        ix, iy = round(fx), round(fy)
        return ix, iy, fx - ix, fy - iy

    def _field(self, x_um: float, y_um: float, t_s: float) -> tuple[np.ndarray, np.ndarray]:
        """The culture under the field (padded grid on the pixel lattice) and its spectrum for
        the imager, cached."""
        t_rel = self.culture.quantise_time(self.rel_s(t_s))
        ix, iy, _, _ = self._grid_origin(x_um, y_um)
        key = (ix, iy, t_rel)
        with self._lock:
            hit = self._fields.get(key)
            if hit is not None:
                self._fields.move_to_end(key)
                return hit
            while len(self._fields) >= KEEP_FIELDS:
                self._fields.popitem(last=False)
            ny, nx = self.grid_shape
            origin_x = ix * self.pixel_um
            origin_y = iy * self.pixel_um
            x1 = origin_x + (nx - 1) * self.pixel_um
            y1 = origin_y + (ny - 1) * self.pixel_um
            cells = self.culture.cells_in_rect(origin_x, origin_y, x1, y1, t_rel)
            maps = self.culture.rasterize(cells, origin_x, origin_y, self.grid_shape, self.pixel_um)
            mask = self.mount.to_frame(maps.label > 0, self.shape, self._crop, nearest=True)
            field = self.culture.transmission(maps, self.wavelength_um)
            del maps  # the big per-pixel maps are not kept: only the mask and the spectrum
            spectrum = self.imager.spectrum(field, consume=True)
            entry = (mask, spectrum)
            self._fields[key] = entry
            return entry

    def render_intensity(self, x_um: float, y_um: float, z_um: float, *, t_s: float) -> np.ndarray:
        """Noiseless optical image (float32, frame shape) for incident light of intensity 1:
        an empty field is tau^2 (the ring's attenuation of the direct light)."""
        _, spectrum = self._field(x_um, y_um, t_s)
        _, _, rem_x, rem_y = self._grid_origin(x_um, y_um)
        dz = z_um - self.true_focus_z_um(x_um, y_um, t_s)
        with self._lock:
            image = self.imager.image(spectrum, -dz, shift_px=(-rem_x, -rem_y))
        return self.mount.to_frame(image, self.shape, self._crop)

    def photons(self, intensity: np.ndarray, *, exposure_ms: float, lamp_level: float) -> np.ndarray:
        """Mean photons per pixel: profile's photon rate at the field centre x lamp x illumination x optics."""
        scale = np.float32(self.sim.sensor.photons_per_px_ms * exposure_ms * lamp_level)
        out = intensity * self.illumination.relative_to_centre
        out *= scale
        return out

    def next_rng(self) -> np.random.Generator:
        """The noise generator of the next frame: frame k of a world is the same for a seed."""
        with self._lock:
            k = self.frame_counter
            self.frame_counter += 1
        return np.random.default_rng([int(self.seed) & 0xFFFFFFFF, 0xF4A, k])

    def render(
        self,
        x_um: float,
        y_um: float,
        z_um: float,
        *,
        t_s: float,
        exposure_ms: float,
        gain_db: float = 0.0,
        lamp_level: float = 1.0,
    ) -> np.ndarray:
        """One camera frame (uint8 or uint16, camera bit depth, shape (height_px, width_px))."""
        if not exposure_ms > 0.0:
            raise ValueError(f"exposure must be > 0 ms, got {exposure_ms}")
        lamp = min(max(float(lamp_level), 0.0), 1.0)
        with self._lock:
            if lamp > 0.0:
                photons = self.photons(self.render_intensity(x_um, y_um, z_um, t_s=t_s), exposure_ms=exposure_ms, lamp_level=lamp)
            else:
                photons = np.zeros(self.shape, np.float32)
            return self.sensor.expose(photons, exposure_ms=exposure_ms, gain_db=gain_db, rng=self.next_rng())
