"""The simulated culture: adherent cells as phase objects, seeded per well, growing and moving.

Where cells can be. The plate is covered by a jittered hexagonal lattice of *sites*; each
site inside a well bottom can hold one cell. Sites are made lazily per tile of
16 x 16 lattice points from a hash of (seed, tile), with everything about the cell that
would live there drawn at the same time (rank, size, shape, orientation jitter, nucleus,
nucleoli, granules, motion), so any field of view at any time is generated from the few
tiles under it and a full plate (millions of sites) is never held at once.

When. Each site has a rank u, uniform on [0, 1); the cell is alive while u < p_w(t), the
occupied fraction of that well's sites. p_w(t) is chosen so that the covered area follows
the logistic law of the profile,

    C_w(t) = K / (1 + (K / C_w(0) - 1) * exp(-r * t)),   r = ln 2 / doubling_time,

(Verhulst 1838): at low coverage C grows as exp(r t) (cell number and area double every
doubling time), and it levels off at K = max_confluence. Overlapping cells cover less than
the sum of their areas, so the covered fraction U(p) is calibrated once at start-up on a
random patch (same seed, same cell shapes) and p_w(t) = U^-1(C_w(t)). C_w(0) comes from
the seeding density times a per-well factor (log-normal, relative spread density_spread).
Empty wells have p = 0. Time runs in steps of TIME_STEP_S so a field looks the same to
every frame of one focus sweep.

How they look. A cell is a spindle-to-oval body (a superellipse with a few harmonic
wobbles, length/width ~ cell_elongation, area ~ pi/4 * cell_diameter^2) oriented along a
smooth field so neighbours align as fibroblast-like cells do; cells wander on smooth
random paths (two sines per axis, rms speed motility_um_per_h) around their site. Its
cytoplasm rises from the edge over a few um to cell_thickness_um; the nucleus is an
ellipsoidal cap to nucleus_thickness_um with refractive index nucleus_index; nucleoli and
granules add small dense spots. Newer cells are drawn over older ones, and where two cells
meet the layer thins into a shallow groove, as in a packed monolayer. The optical path
difference is

    OPD = (n_cell - n_medium) * thickness + (n_nucleus - n_cell) * nucleus_thickness,

and the phase of the transmitted light is 2*pi/lambda * OPD.
"""

from __future__ import annotations

import dataclasses
import math
from collections import OrderedDict

import cv2
import numpy as np

from drivers.sim.config import SimCulture
from drivers.sim.plate import PlateLayout

TILE_SITES = 16
# Tiles of lattice sites kept (least recently used dropped). A tile is about 60 KB at the
# shipped density and a 1280x960 field at 10x needs some 20-40 of them, so this keeps
# the last few fields (a focus search, the live view and the time point share one) in
# about 16 MB; a time-lapse over a whole plate would otherwise keep every tile it ever
# saw. Dropped tiles are drawn again from their own seed, identically.
TILE_CACHE = 256
TIME_STEP_S = 10.0
SITES_PER_CELL_AREA = 2.8  # lattice sites per mean cell area: full occupancy covers ~95 %
CALIBRATION_PATCH_UM = 900.0
# Shape and content of a cell.
CELL_VERTICES = 28
NUCLEUS_VERTICES = 20
NUCLEOLI = 3
GRANULES = 6
NUCLEOLUS_OPD_UM = 0.035
GRANULE_OPD_UM = 0.05
SPOT_SIGMA_UM = 0.5  # nucleoli and granules are unresolved: Gaussian spots of this sigma
SEAM_WIDTH_UM = 1.0  # sigma of the groove where two cells meet
SEAM_DEPTH = 0.6  # fraction of the thickness missing at the bottom of that groove
# Rasterisation.
SHIFT_BITS = 4  # OpenCV drawing with 1/16-pixel positions
RASTER_INSET_PX = 0.45  # measured: a filled polygon overshoots its area by ~0.45 px along its edge
CHUNK_ROWS = 128  # rows per band in per-pixel work (bounds temporary memory)


def _columns(spec: dict[str, int]) -> tuple[dict[str, slice], int]:
    out, at = {}, 0
    for name, width in spec.items():
        out[name] = slice(at, at + width)
        at += width
    return out, at


# Columns of the per-site uniform draws and of the normal draws.
UC, N_UNIFORM = _columns({
    "rank": 1, "square": 1, "harm_phase": 3, "omega": 4, "motion_phase": 4, "wobble": 1,
    "nuc_offset": 1, "nuc_elong": 1, "nucleoli": 1, "nucleolus_pos": 2 * NUCLEOLI, "nucleolus_r": NUCLEOLI,
    "granule_on": GRANULES, "granule_pos": 2 * GRANULES, "granule_r": GRANULES,
})
NC, N_NORMAL = _columns({"size": 1, "elong": 1, "theta": 1, "nuc_size": 1, "harm": 3})
U_RANK = UC["rank"].start


@dataclasses.dataclass(frozen=True, slots=True)
class Sites:
    """Lattice sites (inside well bottoms) and the random draws of the cells they can hold."""

    x_um: np.ndarray
    y_um: np.ndarray
    well: np.ndarray  # flat well index
    uni: np.ndarray  # (n, N_UNIFORM) float32 on [0, 1)
    nor: np.ndarray  # (n, N_NORMAL) float32 standard normal

    @staticmethod
    def concat(parts: list[Sites]) -> Sites:
        if not parts:
            return Sites(np.zeros(0), np.zeros(0), np.zeros(0, np.int64), np.zeros((0, N_UNIFORM), np.float32), np.zeros((0, N_NORMAL), np.float32))
        return Sites(*(np.concatenate([getattr(p, f.name) for p in parts]) for f in dataclasses.fields(Sites)))

    def take(self, keep: np.ndarray) -> Sites:
        return Sites(self.x_um[keep], self.y_um[keep], self.well[keep], self.uni[keep], self.nor[keep])


@dataclasses.dataclass(frozen=True, slots=True)
class Cells:
    """The cells alive in a region at one time, oldest first (the drawing order)."""

    x_um: np.ndarray
    y_um: np.ndarray
    angle_rad: np.ndarray
    outline_x_um: np.ndarray  # (n, CELL_VERTICES)
    outline_y_um: np.ndarray
    nucleus_x_um: np.ndarray
    nucleus_y_um: np.ndarray
    nucleus_a_um: np.ndarray  # semi-axes
    nucleus_b_um: np.ndarray
    nucleolus_xy_um: np.ndarray  # (n, NUCLEOLI, 2)
    nucleolus_r_um: np.ndarray  # (n, NUCLEOLI), 0 = absent
    granule_xy_um: np.ndarray  # (n, GRANULES, 2)
    granule_r_um: np.ndarray  # (n, GRANULES), 0 = absent
    well: np.ndarray

    def __len__(self) -> int:
        return len(self.x_um)

    def area_um2(self) -> np.ndarray:
        """Area inside each outline (shoelace formula)."""
        x, y = self.outline_x_um, self.outline_y_um
        return 0.5 * np.abs(np.sum(x * np.roll(y, -1, axis=1) - np.roll(x, -1, axis=1) * y, axis=1))


@dataclasses.dataclass(frozen=True, slots=True)
class SampleMaps:
    """The culture on a pixel grid: label (0 = medium, k = k-th cell), thickness and OPD (um)."""

    label: np.ndarray
    thickness_um: np.ndarray
    opd_um: np.ndarray

    @property
    def mask(self) -> np.ndarray:
        return self.label > 0


_CROSS = cv2.getStructuringElement(cv2.MORPH_CROSS, (3, 3))


def _ramp(distance_px: np.ndarray, px_per_ramp: float, height_um: float) -> None:
    """In place: distance from the edge (px) -> thickness (um) rising over one ramp length as
    h*u*(2-u), u = min(distance / ramp, 1): a thin spreading edge that flattens inwards."""
    u = distance_px
    u *= np.float32(px_per_ramp)
    np.minimum(u, np.float32(1.0), out=u)
    u *= np.float32(2.0) - u
    u *= np.float32(height_um)


def logistic_coverage(t_h: np.ndarray | float, c0: np.ndarray | float, k: float, doubling_time_h: float) -> np.ndarray:
    """Verhulst logistic growth of covered fraction, C(0) = c0, carrying capacity k, and
    growth rate r = ln 2 / doubling time (so C doubles per doubling time while C << k)."""
    c0 = np.asarray(c0, dtype=np.float64)
    r = math.log(2.0) / doubling_time_h
    with np.errstate(divide="ignore", invalid="ignore"):
        c = k / (1.0 + (k / c0 - 1.0) * np.exp(-r * np.asarray(t_h, dtype=np.float64)))
    return np.where(c0 > 0.0, c, 0.0)


class Culture:
    def __init__(self, culture: SimCulture, plate: PlateLayout, seed: int) -> None:
        self.cfg = culture
        self.plate = plate
        self.seed = int(seed) & 0xFFFFFFFF
        d = culture.cell_diameter_um
        self.mean_area_um2 = math.pi / 4.0 * d * d
        # Hexagonal lattice: site density 2 / (sqrt(3) s^2).
        site_density = SITES_PER_CELL_AREA / self.mean_area_um2
        self.site_spacing_um = math.sqrt(2.0 / (math.sqrt(3.0) * site_density))
        self.row_spacing_um = self.site_spacing_um * math.sqrt(3.0) / 2.0
        self.site_density_per_um2 = site_density
        self.half_length_um = 0.5 * d * math.sqrt(culture.cell_elongation)
        self.half_width_um = 0.5 * d / math.sqrt(culture.cell_elongation)
        self.wander_um = 0.45 * self.site_spacing_um
        self.omega_rad_per_h = culture.motility_um_per_h / self.wander_um
        # How far a cell's outline can reach from its site: size, elongation and wobble tails plus wandering.
        self.reach_um = 3.0 * self.half_length_um + 2.0 * self.wander_um + 1.5 * self.site_spacing_um
        self.edge_ramp_um = 0.45 * self.half_width_um
        self._orientation_waves = self._make_orientation_field()
        self._tiles: OrderedDict[tuple[int, int], Sites] = OrderedDict()
        self.density_factor = self._density_factors(np.random.default_rng([self.seed, 0xDE5]))
        self._calib_p, self._calib_cov = self._calibrate_coverage()
        full = self._calib_cov[-1]
        self.capacity = min(culture.max_confluence, full)
        seeded = culture.seeding_per_mm2 * 1e-6 * self.density_factor / site_density
        self.p0 = np.clip(seeded, 0.0, 1.0)
        self.c0 = self.coverage_of_occupancy(self.p0)

    # -- growth ---------------------------------------------------------------------------

    def _density_factors(self, rng: np.random.Generator) -> np.ndarray:
        """Per-well seeding factor: log-normal with mean 1 and relative spread density_spread;
        0 for the profile's empty wells."""
        n = self.plate.n_wells
        spread = self.plate.density_spread
        sigma = math.sqrt(math.log1p(spread * spread))
        g = np.exp(sigma * rng.standard_normal(n) - sigma * sigma / 2.0)
        for row, column in self.plate.empty:
            g[row * self.plate.columns + column] = 0.0
        return g

    def coverage_of_occupancy(self, p: np.ndarray | float) -> np.ndarray:
        return np.interp(p, self._calib_p, self._calib_cov)

    def occupancy_of_coverage(self, c: np.ndarray | float) -> np.ndarray:
        return np.interp(c, self._calib_cov, self._calib_p)

    def expected_coverage(self, t_rel_s: float) -> np.ndarray:
        """Model coverage of every well (flat index) at t seconds after the start."""
        t_h = self.quantise_time(t_rel_s) / 3600.0
        return logistic_coverage(t_h, self.c0, self.capacity, self.cfg.doubling_time_h)

    def occupancy(self, t_rel_s: float) -> np.ndarray:
        return np.where(self.c0 > 0.0, self.occupancy_of_coverage(self.expected_coverage(t_rel_s)), 0.0)

    @staticmethod
    def quantise_time(t_rel_s: float) -> float:
        return round(t_rel_s / TIME_STEP_S) * TIME_STEP_S

    def _calibrate_coverage(self) -> tuple[np.ndarray, np.ndarray]:
        """Covered fraction U(p) when a fraction p of the sites (lowest ranks first) hold cells.

        U(p) = p * site density * mean cell area * overlap(p). The overlap factor (union /
        sum of areas, 1 for sparse cells) is measured on a random patch rasterised at 1 um;
        as a ratio of two sums over the same cells it does not depend on which few cells a
        small p happens to pick, so the curve stays smooth down to the seeding density."""
        rng = np.random.default_rng([self.seed, 0xCA1])
        margin = self.reach_um
        size = CALIBRATION_PATCH_UM + 2.0 * margin
        n_cols = int(size / self.site_spacing_um) + 1
        n_rows = int(size / self.row_spacing_um) + 1
        i, j = np.meshgrid(np.arange(n_cols), np.arange(n_rows))
        sites = self._make_sites(rng, i.ravel(), j.ravel(), well=np.zeros(i.size, np.int64))
        cells = self._cells_of(sites, t_h=0.0, order=np.argsort(sites.uni[:, U_RANK], kind="stable"))
        area = cells.area_um2()
        mean_area = float(area.mean())
        px = 1.0
        n_px = int(math.ceil(size / px))
        mask = np.zeros((n_px, n_px), np.uint8)
        lo, hi = int(margin / px), int((size - margin) / px)
        interior_um2 = ((hi - lo) * px) ** 2
        inside = (cells.x_um >= lo * px) & (cells.x_um < hi * px) & (cells.y_um >= lo * px) & (cells.y_um < hi * px)
        ranks = np.sort(sites.uni[:, U_RANK])
        checkpoints = np.linspace(0.0, 1.0, 41)
        ends = np.searchsorted(ranks, checkpoints, side="left")
        pts = self._outline_points(cells, 0.0, 0.0, px)
        overlap = [1.0]
        drawn = 0
        for end in ends[1:]:
            for k in range(drawn, end):
                cv2.fillPoly(mask, [pts[k]], 1, cv2.LINE_8, SHIFT_BITS)
            drawn = end
            summed = float(area[:end][inside[:end]].sum()) / interior_um2
            union = float(mask[lo:hi, lo:hi].mean())
            overlap.append(union / summed if summed > 0 else 1.0)
        overlap[0] = overlap[1]
        cov = checkpoints * self.site_density_per_um2 * mean_area * np.asarray(overlap)
        cov = np.minimum(np.maximum.accumulate(cov), 1.0)
        # Strictly increasing so the inverse is a function.
        cov = cov + 1e-9 * np.arange(len(cov))
        return checkpoints, cov

    # -- sites ----------------------------------------------------------------------------

    def _make_orientation_field(self) -> np.ndarray:
        """A few long plane waves: cell axes follow a smooth field, as neighbouring
        fibroblast-like cells align in swirls. Rows: (kx, ky, phase, amplitude)."""
        rng = np.random.default_rng([self.seed, 0x0E1])
        n = 3
        direction = rng.uniform(0.0, 2.0 * np.pi, n)
        k = 2.0 * np.pi / rng.uniform(500.0, 1200.0, n)
        return np.stack([k * np.cos(direction), k * np.sin(direction), rng.uniform(0, 2 * np.pi, n), np.full(n, 0.9)], axis=1)

    def _orientation(self, x_um: np.ndarray, y_um: np.ndarray) -> np.ndarray:
        theta = np.zeros_like(x_um)
        for kx, ky, phase, amp in self._orientation_waves:
            theta += amp * np.sin(kx * x_um + ky * y_um + phase)
        return theta

    def _make_sites(self, rng: np.random.Generator, i: np.ndarray, j: np.ndarray, well: np.ndarray | None) -> Sites:
        n = i.size
        jitter = rng.normal(0.0, 0.3 * self.site_spacing_um, (2, n))
        x = (i + 0.5 * (j & 1)) * self.site_spacing_um + jitter[0]
        y = j * self.row_spacing_um + jitter[1]
        uni = rng.random((n, N_UNIFORM), dtype=np.float32)
        nor = rng.standard_normal((n, N_NORMAL), dtype=np.float32)
        if well is None:
            well, dist = self.plate.well_index(x, y)
            keep = (well >= 0) & (dist <= self.plate.well_radius_um - 0.5 * self.half_length_um)
            return Sites(x[keep], y[keep], well[keep], uni[keep], nor[keep])
        return Sites(x, y, well, uni, nor)

    def _tile(self, ti: int, tj: int) -> Sites:
        key = (ti, tj)
        hit = self._tiles.get(key)
        if hit is not None:
            self._tiles.move_to_end(key)
            return hit
        rng = np.random.default_rng([self.seed, 0x711E, ti + (1 << 31), tj + (1 << 31)])
        i, j = np.meshgrid(np.arange(ti * TILE_SITES, (ti + 1) * TILE_SITES), np.arange(tj * TILE_SITES, (tj + 1) * TILE_SITES))
        sites = self._make_sites(rng, i.ravel(), j.ravel(), well=None)
        self._tiles[key] = sites
        while len(self._tiles) > TILE_CACHE:
            self._tiles.popitem(last=False)
        return sites

    def sites_in_rect(self, x0: float, y0: float, x1: float, y1: float) -> Sites:
        margin = 4.0 * 0.3 * self.site_spacing_um + self.site_spacing_um
        tile_w = TILE_SITES * self.site_spacing_um
        tile_h = TILE_SITES * self.row_spacing_um
        parts = []
        for tj in range(math.floor((y0 - margin) / tile_h), math.floor((y1 + margin) / tile_h) + 1):
            for ti in range(math.floor((x0 - margin) / tile_w), math.floor((x1 + margin) / tile_w) + 1):
                s = self._tile(ti, tj)
                if len(s.x_um):
                    parts.append(s)
        sites = Sites.concat(parts)
        keep = (sites.x_um >= x0) & (sites.x_um <= x1) & (sites.y_um >= y0) & (sites.y_um <= y1)
        return sites.take(keep)

    # -- cells ----------------------------------------------------------------------------

    def cells_in_rect(self, x0: float, y0: float, x1: float, y1: float, t_rel_s: float) -> Cells:
        """Cells alive at t whose outline can reach into the rectangle (plate um)."""
        r = self.reach_um
        sites = self.sites_in_rect(x0 - r, y0 - r, x1 + r, y1 + r)
        p = self.occupancy(t_rel_s)
        rank = sites.uni[:, U_RANK]
        alive = rank < p[sites.well]
        sites = sites.take(alive)
        order = np.argsort(sites.uni[:, U_RANK], kind="stable")
        return self._cells_of(sites, t_h=self.quantise_time(t_rel_s) / 3600.0, order=order)

    def _cells_of(self, sites: Sites, *, t_h: float, order: np.ndarray) -> Cells:
        s = sites.take(order)
        u, g = s.uni.astype(np.float64), s.nor.astype(np.float64)
        cfg = self.cfg
        # Position: wander around the site, two incommensurate sines per axis; rms speed = motility.
        omega = self.omega_rad_per_h * (0.6 + 0.8 * u[:, UC["omega"]])
        phase = 2.0 * np.pi * u[:, UC["motion_phase"]]
        a = self.wander_um / math.sqrt(2.0)
        dx = a * (np.sin(omega[:, 0] * t_h + phase[:, 0]) + np.sin(omega[:, 1] * t_h + phase[:, 1]))
        dy = a * (np.sin(omega[:, 2] * t_h + phase[:, 2]) + np.sin(omega[:, 3] * t_h + phase[:, 3]))
        x, y = s.x_um + dx, s.y_um + dy
        # Shape: area factor log-normal (~20 %), elongation around the profile's mean.
        area_f = np.exp(0.2 * g[:, NC["size"].start])
        elong = 1.0 + (cfg.cell_elongation - 1.0) * np.exp(0.35 * g[:, NC["elong"].start])
        half_d = 0.5 * cfg.cell_diameter_um * np.sqrt(area_f)
        half_len, half_wid = half_d * np.sqrt(elong), half_d / np.sqrt(elong)
        wobble = 0.15 * np.sin(0.5 * self.omega_rad_per_h * t_h + 2 * np.pi * u[:, UC["wobble"].start])
        angle = self._orientation(x, y) + 0.35 * g[:, NC["theta"].start] + wobble
        q = 1.1 + 0.7 * u[:, UC["square"].start]
        alpha = np.linspace(0.0, 2.0 * np.pi, CELL_VERTICES, endpoint=False)[None, :]
        ca, sa = np.cos(alpha), np.sin(alpha)
        r = (np.abs(ca / half_len[:, None]) ** q[:, None] + np.abs(sa / half_wid[:, None]) ** q[:, None]) ** (-1.0 / q[:, None])
        harm_amp = np.array([0.08, 0.05, 0.035]) * g[:, NC["harm"]]
        harm_phase = 2.0 * np.pi * u[:, UC["harm_phase"]] + 0.3 * self.omega_rad_per_h * t_h
        for h, order_h in enumerate((1, 3, 5)):
            r = r * (1.0 + harm_amp[:, h : h + 1] * np.cos(order_h * alpha + harm_phase[:, h : h + 1]))
        cos_t, sin_t = np.cos(angle)[:, None], np.sin(angle)[:, None]
        lx, ly = r * ca, r * sa
        outline_x = x[:, None] + lx * cos_t - ly * sin_t
        outline_y = y[:, None] + lx * sin_t + ly * cos_t
        # Nucleus: an ellipse near the middle, kept inside the body.
        nuc_d = cfg.nucleus_diameter_um * np.exp(0.12 * g[:, NC["nuc_size"].start])
        nuc_e = 1.1 + 0.5 * u[:, UC["nuc_elong"].start]
        nuc_a = np.minimum(0.5 * nuc_d * np.sqrt(nuc_e), 0.45 * half_len)
        nuc_b = np.minimum(0.5 * nuc_d / np.sqrt(nuc_e), 0.55 * half_wid)
        offset = (2.0 * u[:, UC["nuc_offset"].start] - 1.0) * 0.2 * half_len
        nuc_x, nuc_y = x + offset * cos_t[:, 0], y + offset * sin_t[:, 0]
        # Nucleoli inside the nucleus, granules in the cytoplasm (local cell frame, then rotated).
        nl = (2.0 * u[:, UC["nucleolus_pos"]].reshape(-1, NUCLEOLI, 2) - 1.0) * 0.45
        nl_x = offset[:, None] + nl[..., 0] * nuc_a[:, None]
        nl_y = nl[..., 1] * nuc_b[:, None]
        n_nucleoli = 1 + np.floor(u[:, UC["nucleoli"].start] * NUCLEOLI).astype(int)
        nl_r = np.where(np.arange(NUCLEOLI)[None, :] < n_nucleoli[:, None], 0.6 + 0.6 * u[:, UC["nucleolus_r"]], 0.0)
        gr = 2.0 * u[:, UC["granule_pos"]].reshape(-1, GRANULES, 2) - 1.0
        gr_x = gr[..., 0] * 0.55 * half_len[:, None]
        gr_y = gr[..., 1] * 0.45 * half_wid[:, None]
        gr_r = np.where(u[:, UC["granule_on"]] < 0.6, 0.35 + 0.4 * u[:, UC["granule_r"]], 0.0)

        def to_plate(lx: np.ndarray, ly: np.ndarray) -> np.ndarray:
            return np.stack([x[:, None] + lx * cos_t - ly * sin_t, y[:, None] + lx * sin_t + ly * cos_t], axis=-1)

        return Cells(
            x_um=x,
            y_um=y,
            angle_rad=angle,
            outline_x_um=outline_x,
            outline_y_um=outline_y,
            nucleus_x_um=nuc_x,
            nucleus_y_um=nuc_y,
            nucleus_a_um=nuc_a,
            nucleus_b_um=nuc_b,
            nucleolus_xy_um=to_plate(nl_x, nl_y),
            nucleolus_r_um=nl_r,
            granule_xy_um=to_plate(gr_x, gr_y),
            granule_r_um=gr_r,
            well=s.well,
        )

    # -- rasterisation --------------------------------------------------------------------

    @staticmethod
    def _outline_points(cells: Cells, origin_x_um: float, origin_y_um: float, dx_um: float) -> np.ndarray:
        """Outline vertices in 1/16 pixel, pulled in by RASTER_INSET_PX: OpenCV fills every pixel
        the edge touches, and without the inset a cell's area (and the true coverage) would
        grow with the pixel size."""
        vx = cells.outline_x_um - cells.x_um[:, None]
        vy = cells.outline_y_um - cells.y_um[:, None]
        r = np.maximum(np.hypot(vx, vy), 1e-6)
        pull = np.maximum(1.0 - RASTER_INSET_PX * dx_um / r, 0.0)
        scale = (1 << SHIFT_BITS) / dx_um
        px = np.rint((cells.x_um[:, None] + vx * pull - origin_x_um) * scale)
        py = np.rint((cells.y_um[:, None] + vy * pull - origin_y_um) * scale)
        return np.stack([px, py], axis=-1).astype(np.int32)

    def well_bottom(self, origin_x_um: float, origin_y_um: float, shape: tuple[int, int], dx_um: float) -> np.ndarray | None:
        """Which grid pixels lie on a well bottom (cells cannot spread past the wall); None when
        the whole grid lies inside one well."""
        ny, nx = shape
        x1, y1 = origin_x_um + (nx - 1) * dx_um, origin_y_um + (ny - 1) * dx_um
        plate, r = self.plate, self.plate.well_radius_um
        near = []
        for row in range(plate.rows):
            for column in range(plate.columns):
                cx, cy = plate.centre_um(row, column)
                if origin_x_um - r <= cx <= x1 + r and origin_y_um - r <= cy <= y1 + r:
                    near.append((cx, cy))
        for cx, cy in near:
            corners = ((origin_x_um, origin_y_um), (x1, origin_y_um), (origin_x_um, y1), (x1, y1))
            if all((x - cx) ** 2 + (y - cy) ** 2 <= r * r for x, y in corners):
                return None
        inside = np.zeros(shape, bool)
        gx = origin_x_um + dx_um * np.arange(nx)[None, :]
        gy = origin_y_um + dx_um * np.arange(ny)[:, None]
        for cx, cy in near:
            inside |= (gx - cx) ** 2 + (gy - cy) ** 2 <= r * r
        return inside

    @staticmethod
    def _nucleus_points(cells: Cells, index: np.ndarray, origin_x_um: float, origin_y_um: float, dx_um: float) -> np.ndarray:
        beta = np.linspace(0.0, 2.0 * np.pi, NUCLEUS_VERTICES, endpoint=False)[None, :]
        a = cells.nucleus_a_um[index, None] - RASTER_INSET_PX * dx_um
        b = cells.nucleus_b_um[index, None] - RASTER_INSET_PX * dx_um
        c, s = np.cos(cells.angle_rad[index])[:, None], np.sin(cells.angle_rad[index])[:, None]
        lx, ly = a * np.cos(beta), b * np.sin(beta)
        scale = (1 << SHIFT_BITS) / dx_um
        px = np.rint((cells.nucleus_x_um[index, None] + lx * c - ly * s - origin_x_um) * scale)
        py = np.rint((cells.nucleus_y_um[index, None] + lx * s + ly * c - origin_y_um) * scale)
        return np.stack([px, py], axis=-1).astype(np.int32)

    def _nucleus_caps(
        self,
        cells: Cells,
        nucleus: np.ndarray,
        label: np.ndarray,
        covered: np.ndarray,
        origin_x_um: float,
        origin_y_um: float,
        dx_um: float,
        out: np.ndarray | None = None,
    ) -> np.ndarray:
        """Thickness over each nucleus, an ellipsoidal cap h * sqrt(1 - r^2) (r = elliptical radius),
        where the nucleus's own cell is on top."""
        if out is None:
            out = np.zeros(label.shape, np.float32)
        else:
            out.fill(0.0)
        f32 = np.float32
        # Per-cell nucleus geometry relative to the grid origin, in float32 (exact enough in um).
        ncx = (cells.nucleus_x_um - origin_x_um).astype(f32)
        ncy = (cells.nucleus_y_um - origin_y_um).astype(f32)
        cos_a, sin_a = np.cos(cells.angle_rad).astype(f32), np.sin(cells.angle_rad).astype(f32)
        inv_a, inv_b = (1.0 / cells.nucleus_a_um).astype(f32), (1.0 / cells.nucleus_b_um).astype(f32)
        # In bands of rows, so the per-pixel temporaries stay small.
        for r0 in range(0, label.shape[0], CHUNK_ROWS):
            band = slice(r0, r0 + CHUNK_ROWS)
            rows, cols = np.nonzero((nucleus[band] == label[band]) & covered[band])
            if rows.size == 0:
                continue
            k = label[band][rows, cols].astype(np.intp) - 1
            dx = cols.astype(f32) * f32(dx_um) - ncx[k]
            dy = (rows + r0).astype(f32) * f32(dx_um) - ncy[k]
            c, s = cos_a[k], sin_a[k]
            u = (dx * c + dy * s) * inv_a[k]
            v = (dy * c - dx * s) * inv_b[k]
            u *= u
            v *= v
            r = f32(1.0) - u - v
            np.maximum(r, f32(0.0), out=r)
            np.sqrt(r, out=r)
            r *= f32(self.cfg.nucleus_thickness_um)
            out[band][rows, cols] = r
        return out

    def coverage_mask(self, cells: Cells, origin_x_um: float, origin_y_um: float, shape: tuple[int, int], dx_um: float) -> np.ndarray:
        """Where any cell covers the grid (pixel (0, 0) centred on the origin)."""
        mask = np.zeros(shape, np.uint8)
        for pts in self._outline_points(cells, origin_x_um, origin_y_um, dx_um):
            cv2.fillPoly(mask, [pts], 1, cv2.LINE_8, SHIFT_BITS)
        covered = mask.astype(bool)
        bottom = self.well_bottom(origin_x_um, origin_y_um, shape, dx_um)
        return covered if bottom is None else covered & bottom

    def rasterize(self, cells: Cells, origin_x_um: float, origin_y_um: float, shape: tuple[int, int], dx_um: float) -> SampleMaps:
        """Label, thickness and optical path difference of the cells on a grid whose pixel
        (0, 0) is centred on (origin_x_um, origin_y_um) with pitch dx_um (rows along y)."""
        cfg = self.cfg
        if len(cells) >= 65535:
            raise ValueError(f"{len(cells)} cells in one field: too many for the label image; use a smaller field")
        label = np.zeros(shape, np.uint16)
        nucleus = np.zeros(shape, np.uint16)
        spots = np.zeros(shape, np.float32)
        one = 1 << SHIFT_BITS
        scale = one / dx_um
        origin = np.array([origin_x_um, origin_y_um])
        pts = self._outline_points(cells, origin_x_um, origin_y_um, dx_um)
        # Only cells whose outline box meets the grid are drawn; the label keeps the cell's rank.
        lo, hi = pts.min(axis=1), pts.max(axis=1)
        seen = (hi[:, 0] >= 0) & (lo[:, 0] < shape[1] * one) & (hi[:, 1] >= 0) & (lo[:, 1] < shape[0] * one)
        index = np.flatnonzero(seen)
        nuc_pts = self._nucleus_points(cells, index, origin_x_um, origin_y_um, dx_um)
        for k, npts in zip(index.tolist(), nuc_pts):
            cv2.fillPoly(label, [pts[k]], k + 1, cv2.LINE_8, SHIFT_BITS)
            cv2.fillPoly(nucleus, [npts], k + 1, cv2.LINE_8, SHIFT_BITS)
        # Nucleoli and granules are below the objective's resolution: each is a point of its
        # optical volume (OPD x area), spread by one blur below.
        for xy, radius, value in (
            (cells.nucleolus_xy_um[index], cells.nucleolus_r_um[index], NUCLEOLUS_OPD_UM),
            (cells.granule_xy_um[index], cells.granule_r_um[index], GRANULE_OPD_UM),
        ):
            present = radius > 0
            # Shared between the four nearest pixels (bilinear weights), so a spot moves
            # with the field by fractions of a pixel too, as a real one would.
            fc = (xy[present][:, 0] - origin_x_um) / dx_um
            fr = (xy[present][:, 1] - origin_y_um) / dx_um
            c0, r0 = np.floor(fc).astype(np.int64), np.floor(fr).astype(np.int64)
            wc, wr = fc - c0, fr - r0
            volume = value * np.pi * radius[present] ** 2 / dx_um**2
            for dr, dc, w in ((0, 0, (1 - wr) * (1 - wc)), (0, 1, (1 - wr) * wc), (1, 0, wr * (1 - wc)), (1, 1, wr * wc)):
                col, row = c0 + dc, r0 + dr
                ok = (col >= 0) & (col < shape[1]) & (row >= 0) & (row < shape[0])
                np.add.at(spots, (row[ok], col[ok]), (volume * w)[ok].astype(np.float32))
        bottom = self.well_bottom(origin_x_um, origin_y_um, shape, dx_um)
        if bottom is not None:
            label[~bottom] = 0
        covered = label > 0
        # A one-pixel seam where two cells meet (on the older cell's side): each keeps its own edge.
        body = cv2.dilate(label, _CROSS) <= label
        body &= covered
        thickness = cv2.distanceTransform(covered.view(np.uint8), cv2.DIST_L2, 5)
        _ramp(thickness, dx_um / self.edge_ramp_um, cfg.cell_thickness_um)
        # Where two cells meet the layer thins into a shallow groove (membranes pressed together),
        # not a gap: the seam line blurred to a Gaussian trough SEAM_DEPTH deep.
        sigma_px = max(SEAM_WIDTH_UM / dx_um, 0.5)
        trough = covered.astype(np.float32)
        trough -= body
        cv2.GaussianBlur(trough, (0, 0), sigma_px, dst=trough)
        trough *= np.float32(-SEAM_DEPTH * math.sqrt(2.0 * math.pi) * sigma_px)
        np.maximum(trough, np.float32(-SEAM_DEPTH), out=trough)
        trough += np.float32(1.0)
        thickness *= trough
        nucleus_t = self._nucleus_caps(cells, nucleus, label, covered, origin_x_um, origin_y_um, dx_um, out=trough)
        del nucleus
        np.maximum(thickness, nucleus_t, out=thickness)
        # OPD built in the spots' buffer: spots + dn_cell * thickness + (n_nucleus - n_cell) * nucleus.
        opd = spots
        cv2.GaussianBlur(opd, (0, 0), max(SPOT_SIGMA_UM / dx_um, 0.5), dst=opd)
        opd *= body
        cv2.scaleAdd(thickness, float(cfg.cell_index - cfg.medium_index), opd, dst=opd)
        cv2.scaleAdd(nucleus_t, float(cfg.nucleus_index - cfg.cell_index), opd, dst=opd)
        return SampleMaps(label=label, thickness_um=thickness, opd_um=opd)

    def transmission(self, maps: SampleMaps, wavelength_um: float) -> np.ndarray:
        """Complex amplitude transmission a * exp(i*phi), phi = 2*pi/lambda * OPD; the
        intensity lost across a full cell thickness is the profile's ``absorption``."""
        k = np.float32(2.0 * np.pi / wavelength_um)
        log_t = np.float32(0.5 * math.log1p(-min(self.cfg.absorption, 0.999)) / self.cfg.cell_thickness_um)
        field = np.empty(maps.opd_um.shape, np.complex64)
        for r0 in range(0, field.shape[0], CHUNK_ROWS):
            band = slice(r0, r0 + CHUNK_ROWS)
            re, im = cv2.polarToCart(np.exp(log_t * maps.thickness_um[band]), k * maps.opd_um[band])
            field.real[band], field.imag[band] = re, im
        return field

    def coverage_in_rect(self, x0: float, y0: float, x1: float, y1: float, t_rel_s: float, *, px_um: float = 1.0) -> float:
        """True covered fraction of a plate rectangle, rasterised at px_um."""
        cells = self.cells_in_rect(x0, y0, x1, y1, t_rel_s)
        shape = (max(1, int(round((y1 - y0) / px_um))), max(1, int(round((x1 - x0) / px_um))))
        mask = self.coverage_mask(cells, x0 + 0.5 * px_um, y0 + 0.5 * px_um, shape, px_um)
        return float(mask.mean())
