"""Geometry of the simulated plate: well names, well centres and which well a point lies in.

Wells sit at ``a1 + pitch * (column, row)`` in stage coordinates (um); row letters run
A..Z then AA, AB, ... (32-row plates), columns from 1. A point belongs to a well only
inside the well bottom's diameter.
"""

from __future__ import annotations

import math

import numpy as np

from drivers.sim.config import SimPlate
from drivers.wells import WELL_NAME_RE, row_index, row_label


class PlateLayout:
    """Wells of the simulated plate in stage coordinates."""

    def __init__(self, plate: SimPlate) -> None:
        self.rows = plate.rows
        self.columns = plate.columns
        self.a1_x_um = plate.a1_x_um
        self.a1_y_um = plate.a1_y_um
        self.pitch_um = plate.pitch_um
        self.well_radius_um = plate.well_diameter_um / 2.0
        self.empty = {self.parse(name) for name in plate.empty_wells}
        self.density_spread = plate.density_spread
        # The centre of the well grid: the plate's own centre for the focal plane's sag and tilt.
        self.centre_x_um = self.a1_x_um + self.pitch_um * (self.columns - 1) / 2.0
        self.centre_y_um = self.a1_y_um + self.pitch_um * (self.rows - 1) / 2.0

    @property
    def n_wells(self) -> int:
        return self.rows * self.columns

    def name(self, row: int, column: int) -> str:
        return f"{row_label(row)}{column + 1}"

    def parse(self, well: str) -> tuple[int, int]:
        """'B7' -> (row 1, column 6); raises ValueError naming the plate's range."""
        m = WELL_NAME_RE.match(well)
        last = self.name(self.rows - 1, self.columns - 1)
        if m is None:
            raise ValueError(f"{well!r} is not a well name; use a row letter and a column number, A1..{last}")
        row, column = row_index(m.group(1)), int(m.group(2)) - 1
        if not (0 <= row < self.rows and 0 <= column < self.columns):
            raise ValueError(f"well {well!r} is not on this {self.n_wells}-well plate (A1..{last})")
        return row, column

    def centre_um(self, row: int, column: int) -> tuple[float, float]:
        return self.a1_x_um + self.pitch_um * column, self.a1_y_um + self.pitch_um * row

    def well_centre_um(self, well: str) -> tuple[float, float]:
        return self.centre_um(*self.parse(well))

    def nearest(self, x_um: float, y_um: float) -> tuple[int, int] | None:
        """(row, column) of the well whose bottom contains the point, else None."""
        column = round((x_um - self.a1_x_um) / self.pitch_um)
        row = round((y_um - self.a1_y_um) / self.pitch_um)
        if not (0 <= row < self.rows and 0 <= column < self.columns):
            return None
        cx, cy = self.centre_um(row, column)
        if math.hypot(x_um - cx, y_um - cy) > self.well_radius_um:
            return None
        return row, column

    def well_at(self, x_um: float, y_um: float) -> str | None:
        rc = self.nearest(x_um, y_um)
        return None if rc is None else self.name(*rc)

    def well_index(self, x_um: np.ndarray, y_um: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Flat well index (row * columns + column) of each point, -1 outside every well bottom;
        and each point's distance from that well's centre (um)."""
        column = np.rint((x_um - self.a1_x_um) / self.pitch_um).astype(np.int64)
        row = np.rint((y_um - self.a1_y_um) / self.pitch_um).astype(np.int64)
        on_plate = (row >= 0) & (row < self.rows) & (column >= 0) & (column < self.columns)
        dist = np.hypot(x_um - (self.a1_x_um + self.pitch_um * column), y_um - (self.a1_y_um + self.pitch_um * row))
        inside = on_plate & (dist <= self.well_radius_um)
        return np.where(inside, row * self.columns + column, -1), dist
