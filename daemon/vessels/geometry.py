"""Culture vessels as data: plates, dishes and flasks, and the wells inside them.

Vessel coordinates are millimetres from the vessel's top-left outer corner seen from
above with well A1 at the top left; x runs along the long side (columns), y across it
(rows). Built-in vessels live in ``daemon/data/vessels.toml``; a user file of the same
form adds vessels or replaces built-in ones.
"""

from __future__ import annotations

import dataclasses
import functools
import math
import tomllib
from pathlib import Path
from typing import Any

from drivers.options import ConfigError, load_section, option, suggest
from drivers.wells import WELL_NAME_RE, normalise_well_name, row_index, row_label

BUILTIN_FILE = Path(__file__).resolve().parent.parent / "data" / "vessels.toml"

# ANSI/SLAS 1-2004 outer footprint of a microplate.
SLAS_LENGTH_MM = 127.76
SLAS_WIDTH_MM = 85.48

SHAPES = ("circle", "square", "rect")
KINDS = ("plate", "dish", "flask")


class VesselError(ConfigError):
    """A vessel or well name given by a user does not exist. ``str()`` is one line."""

    def __init__(self, problem: str, *, option: str | None = None) -> None:
        ValueError.__init__(self, problem)
        self.file = ""
        self.section = "vessel"
        self.option = option
        self.problem = problem


@dataclasses.dataclass(frozen=True)
class Well:
    """One well; its centre in mm from the vessel's top-left outer corner."""

    name: str
    row: int
    column: int
    x_mm: float
    y_mm: float
    diameter_mm: float
    shape: str
    size_x_mm: float = 0.0
    size_y_mm: float = 0.0

    @property
    def extent_mm(self) -> tuple[float, float]:
        """Width and height of the well bottom (a circle's or square's both equal the diameter)."""
        if self.shape == "rect":
            return self.size_x_mm, self.size_y_mm
        return self.diameter_mm, self.diameter_mm

    @property
    def area_mm2(self) -> float:
        if self.shape == "circle":
            return math.pi * self.diameter_mm**2 / 4.0
        w, h = self.extent_mm
        return w * h

    def to_dict(self) -> dict[str, Any]:
        d: dict[str, Any] = {
            "name": self.name, "row": self.row, "column": self.column,
            "x_mm": round(self.x_mm, 4), "y_mm": round(self.y_mm, 4),
            "diameter_mm": self.diameter_mm, "shape": self.shape,
        }
        if self.shape == "rect":
            d["size_x_mm"], d["size_y_mm"] = self.size_x_mm, self.size_y_mm
        return d


@dataclasses.dataclass(frozen=True)
class Vessel:
    name: str
    kind: str
    length_mm: float
    width_mm: float
    wells: dict[str, Well]
    description: str = ""
    standard: str = ""
    rows: int = 1
    columns: int = 1
    pitch_x_mm: float = 0.0
    pitch_y_mm: float = 0.0
    aliases: tuple[str, ...] = ()
    source: str = ""

    def well(self, name: str) -> Well:
        """The well called ``name`` ('b3', 'B03' and 'B3' are the same well)."""
        key = normalise_well_name(name)
        if key is None or key not in self.wells:
            raise VesselError(f"vessel {self.name} has no well {name!r}; {self.describe_wells()}")
        return self.wells[key]

    def describe_wells(self) -> str:
        names = list(self.wells)
        if self.rows * self.columns == len(names) and len(names) > 1:
            last = names[-1]
            return (
                f"its wells run A1 to {last} (rows A to {row_label(self.rows - 1)}, "
                f"columns 1 to {self.columns})"
            )
        return "its wells are " + ", ".join(names)

    @property
    def footprint_mm(self) -> tuple[float, float]:
        return self.length_mm, self.width_mm

    def to_dict(self) -> dict[str, Any]:
        return {
            "name": self.name, "kind": self.kind, "description": self.description,
            "standard": self.standard, "length_mm": self.length_mm, "width_mm": self.width_mm,
            "rows": self.rows, "columns": self.columns,
            "pitch_x_mm": self.pitch_x_mm, "pitch_y_mm": self.pitch_y_mm,
            "wells": [w.to_dict() for w in self.wells.values()],
        }


# --- the data file -------------------------------------------------------------------


@dataclasses.dataclass(frozen=True, kw_only=True)
class WellEntry:
    name: str = option(doc="well name, e.g. 'A1'")
    x_mm: float = option(doc="centre, from the vessel's left outer edge", min=0.0, unit="mm")
    y_mm: float = option(doc="centre, from the vessel's top outer edge", min=0.0, unit="mm")
    diameter_mm: float = option(doc="diameter (circle) or side (square)", min=0.01, unit="mm")
    shape: str = option("circle", doc="shape of the well bottom", choices=("circle", "square"))


@dataclasses.dataclass(frozen=True, kw_only=True)
class VesselEntry:
    kind: str = option(doc="what the vessel is", choices=KINDS)
    description: str = option("", doc="one line shown to users")
    standard: str = option("", doc="standard the geometry follows, if any")
    aliases: list[str] = option([], doc="other names the vessel is known by, e.g. ['96']")
    length_mm: float = option(doc="outer length along x (A1 towards A2)", min=1.0, max=1000.0, unit="mm")
    width_mm: float = option(doc="outer width along y (A1 towards B1)", min=1.0, max=1000.0, unit="mm")
    rows: int = option(1, doc="rows of wells (A, B, ...)", min=1, max=64)
    columns: int = option(1, doc="columns of wells (1, 2, ...)", min=1, max=96)
    pitch_mm: float = option(0.0, doc="well centre to well centre along x (and y unless pitch_y_mm is set)", min=0.0, max=500.0, unit="mm")
    pitch_y_mm: float = option(0.0, doc="well centre to well centre along y; 0 = same as pitch_mm", min=0.0, max=500.0, unit="mm")
    a1_x_mm: float | None = option(None, doc="centre of A1 from the left outer edge; leave out to centre the grid on the footprint", min=0.0, unit="mm")
    a1_y_mm: float | None = option(None, doc="centre of A1 from the top outer edge; leave out to centre the grid on the footprint", min=0.0, unit="mm")
    well_shape: str = option("circle", doc="shape of the well bottom", choices=SHAPES)
    well_diameter_mm: float = option(0.0, doc="well bottom diameter (circle) or side (square)", min=0.0, max=1000.0, unit="mm")
    well_size_x_mm: float = option(0.0, doc="well bottom size along x (rect)", min=0.0, max=1000.0, unit="mm")
    well_size_y_mm: float = option(0.0, doc="well bottom size along y (rect)", min=0.0, max=1000.0, unit="mm")
    wells: list[Any] = option([], doc="explicit wells instead of a grid: tables with name, x_mm, y_mm, diameter_mm")

    def __post_init__(self) -> None:
        grid = self.rows * self.columns
        if self.wells:
            if grid > 1:
                raise ValueError("wells: give either a grid (rows, columns) or a list of wells, not both")
            return
        if grid > 1:
            if self.columns > 1 and self.pitch_mm <= 0:
                raise ValueError("pitch_mm: a grid of wells needs the well-to-well spacing")
            if self.rows > 1 and self.pitch_mm <= 0 and self.pitch_y_mm <= 0:
                raise ValueError("pitch_mm: a grid of wells needs the well-to-well spacing")
        if self.well_shape == "rect":
            if self.well_size_x_mm <= 0 or self.well_size_y_mm <= 0:
                raise ValueError("well_size_x_mm: a rect well needs well_size_x_mm and well_size_y_mm")
        elif self.well_diameter_mm <= 0:
            raise ValueError("well_diameter_mm: give the diameter (circle) or side (square) of the wells")


def slas_centred_a1_mm(length_mm: float, width_mm: float, rows: int, columns: int,
                       pitch_x_mm: float, pitch_y_mm: float) -> tuple[float, float]:
    """Centre of A1 for a well array laid out symmetrically about the footprint's centre.

    ANSI/SLAS 4-2004 (Microplates - Well Positions) places the 96-, 384- and 1536-well
    arrays this way on the ANSI/SLAS 1-2004 footprint; all values in mm.
    """
    return (
        length_mm / 2.0 - (columns - 1) / 2.0 * pitch_x_mm,
        width_mm / 2.0 - (rows - 1) / 2.0 * pitch_y_mm,
    )


def _build_vessel(name: str, e: VesselEntry, file: Path) -> Vessel:
    section = f'vessel."{name}"'
    pitch_x = e.pitch_mm
    pitch_y = e.pitch_y_mm or e.pitch_mm
    wells: dict[str, Well] = {}
    if e.wells:
        for i, raw in enumerate(e.wells):
            w = load_section(WellEntry, raw, file=file, section=f"{section}.wells[{i}]")
            key = normalise_well_name(w.name) or w.name
            m = WELL_NAME_RE.match(key)
            row, col = (row_index(m.group(1)), int(m.group(2)) - 1) if m else (0, i)
            if key in wells:
                raise ConfigError(file, f"{section}.wells[{i}]", "name", f"well {key} is listed twice")
            wells[key] = Well(key, row, col, w.x_mm, w.y_mm, w.diameter_mm, w.shape)
        rows = max(w.row for w in wells.values()) + 1
        cols = max(w.column for w in wells.values()) + 1
    else:
        rows, cols = e.rows, e.columns
        cx, cy = slas_centred_a1_mm(e.length_mm, e.width_mm, rows, cols, pitch_x, pitch_y)
        a1x = cx if e.a1_x_mm is None else e.a1_x_mm
        a1y = cy if e.a1_y_mm is None else e.a1_y_mm
        diameter = e.well_diameter_mm if e.well_shape != "rect" else max(e.well_size_x_mm, e.well_size_y_mm)
        for r in range(rows):
            for c in range(cols):
                key = f"{row_label(r)}{c + 1}"
                # Rounded to 1 nm so that 14.38 prints as 14.38, not 14.380000000000003.
                wells[key] = Well(
                    key, r, c, round(a1x + c * pitch_x, 6), round(a1y + r * pitch_y, 6), diameter, e.well_shape,
                    e.well_size_x_mm, e.well_size_y_mm,
                )
    for w in wells.values():
        ex, ey = w.extent_mm
        if (w.x_mm - ex / 2 < -1e-9 or w.x_mm + ex / 2 > e.length_mm + 1e-9
                or w.y_mm - ey / 2 < -1e-9 or w.y_mm + ey / 2 > e.width_mm + 1e-9):
            raise ConfigError(
                file, section, None,
                f"well {w.name} (centre {w.x_mm:.2f}, {w.y_mm:.2f} mm) reaches outside the "
                f"{e.length_mm} x {e.width_mm} mm vessel; check pitch, a1_x_mm/a1_y_mm and well size",
            )
    return Vessel(
        name=name, kind=e.kind, length_mm=e.length_mm, width_mm=e.width_mm, wells=wells,
        description=e.description, standard=e.standard, rows=rows, columns=cols,
        pitch_x_mm=pitch_x, pitch_y_mm=pitch_y, aliases=tuple(e.aliases), source=str(file),
    )


def _read_file(file: Path) -> dict[str, Vessel]:
    try:
        raw = tomllib.loads(file.read_text(encoding="utf-8"))
    except ValueError as exc:  # TOMLDecodeError, or an integer too long to convert
        raise ConfigError(file, "", None, f"not valid TOML: {exc}") from None
    except OSError as exc:
        raise ConfigError(file, "", None, f"cannot read: {exc.strerror}") from None
    extra = [k for k in raw if k != "vessel"]
    if extra:
        raise ConfigError(file, extra[0], None, "unknown section; vessels are [vessel.\"NAME\"] tables")
    table = raw.get("vessel", {})
    if not isinstance(table, dict):
        raise ConfigError(file, "vessel", None, "must be tables [vessel.\"NAME\"]")
    vessels: dict[str, Vessel] = {}
    for name, body in table.items():
        entry = load_section(VesselEntry, body, file=file, section=f'vessel."{name}"')
        vessels[name] = _build_vessel(name, entry, file)
    return vessels


@functools.lru_cache(maxsize=8)
def _read_cached(file: str, mtime_ns: int) -> dict[str, Vessel]:
    return _read_file(Path(file))


def _read(file: Path) -> dict[str, Vessel]:
    try:
        mtime = file.stat().st_mtime_ns
    except OSError as exc:
        raise ConfigError(file, "", None, f"cannot read: {exc.strerror}") from None
    return dict(_read_cached(str(file.resolve()), mtime))


def load_vessels(extra_file: Path | None = None) -> dict[str, Vessel]:
    """Built-in vessels, then those of ``extra_file`` (which replace built-ins of the same name)."""
    vessels = _read(BUILTIN_FILE)
    if extra_file is not None:
        vessels.update(_read(Path(extra_file)))
    return vessels


def get_vessel(name: str, extra_file: Path | None = None) -> Vessel:
    """A vessel by name or alias, case-insensitively: '96-well', '96', 'T25', '35mm-dish'."""
    vessels = load_vessels(extra_file)
    wanted = name.strip().lower()
    for v in vessels.values():
        if wanted == v.name.lower() or wanted in (a.lower() for a in v.aliases):
            return v
    raise VesselError(
        f"unknown vessel {name!r}{suggest(name, vessels)}; known: {', '.join(vessels)} "
        "(add your own with a vessels file)",
        option="vessel",
    )


def _expand_range(first: Well, last: Well, vessel: Vessel) -> list[str]:
    r0, r1 = sorted((first.row, last.row))
    c0, c1 = sorted((first.column, last.column))
    return [w.name for w in vessel.wells.values() if r0 <= w.row <= r1 and c0 <= w.column <= c1]


def parse_wells(spec: str | list[str], vessel: Vessel) -> list[str]:
    """Wells named by ``spec``, each once, in row-major order (A1, A2, ..., B1, ...).

    ``spec`` is 'all', a well ('B3'), a rectangular range ('B2:C5', corners in either
    order), or a comma-separated string or a list of any of these.
    """
    items = spec.split(",") if isinstance(spec, str) else list(spec)
    chosen: set[str] = set()
    for item in items:
        if not isinstance(item, str):
            raise VesselError(f"wells: {item!r} is not a well name; use e.g. 'B3', 'B2:C5' or 'all'")
        text = item.strip()
        if not text:
            continue
        if text.lower() == "all":
            chosen.update(vessel.wells)
            continue
        if ":" in text:
            a, _, b = text.partition(":")
            chosen.update(_expand_range(vessel.well(a), vessel.well(b), vessel))
            continue
        chosen.add(vessel.well(text).name)
    if not chosen:
        raise VesselError("wells: no wells given; use e.g. 'B3', 'B2:C5', ['A1', 'A2'] or 'all'")
    order = {name: (w.row, w.column) for name, w in vessel.wells.items()}
    return sorted(chosen, key=lambda n: order[n])
