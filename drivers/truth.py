"""Ground truth: what the scope really holds, where anything knows it.

On real hardware nothing does (:class:`NoTruth`). The simulated scope knows everything it
renders (:class:`drivers.sim.truth.SimTruth`), and the daemon prints that beside its own
estimates: true focal plane beside the autofocus result, true sensor constants beside
the photon-transfer characterisation, true coverage beside the measured confluence, true
camera mount and stage mechanics beside what commissioning measured.
Estimates never read the truth; reports only show it.

Positions are stage coordinates in um, times seconds since the Unix epoch on the scope's
clock.
"""

from __future__ import annotations

from typing import Protocol, runtime_checkable

import numpy as np


@runtime_checkable
class GroundTruth(Protocol):
    known: bool  # False on real hardware: every answer below is None or empty
    source: str  # "simulator" / "none"

    def focus_z_um(self, x_um: float, y_um: float, t_s: float) -> float | None:
        """The focus position at which the vessel bottom under (x, y) is in focus at t."""
        ...

    def well_at(self, x_um: float, y_um: float) -> str | None:
        """The well whose bottom contains the point; None between wells or off the vessel."""
        ...

    def well_centre_um(self, well: str) -> tuple[float, float] | None:
        """Where the well's centre really is; None if unknown (raises ValueError for no such well)."""
        ...

    def blank_wells(self) -> list[str]:
        """Wells known to hold no cells (blank fields for flat-field calibration)."""
        ...

    def sensor(self, gain_db: float) -> dict[str, float] | None:
        """The camera's EMVA 1288 constants at ``gain_db``, named as the characterisation names them."""
        ...

    def illumination_map(self) -> np.ndarray | None:
        """The light over the frame, relative (any scale), in the frame's shape."""
        ...

    def field_coverage(self, x_um: float, y_um: float, t_s: float) -> float | None:
        """Fraction of the field at (x, y) covered by cells at t; None off every well."""
        ...

    def well_coverage(self, well: str, t_s: float) -> float | None:
        """Fraction of the whole well bottom covered by cells at t."""
        ...

    def image_px_per_um(self) -> np.ndarray | None:
        """The 2x2 map A from a sample displacement (x, y) in um to an image displacement
        (column, row) in px: a stage move by dS moves the image content by -A dS."""
        ...

    def camera_geometry(self) -> dict[str, float | bool] | None:
        """How the camera sits against the stage: ``pixel_size_um`` (one pixel in the sample),
        ``rotation_deg`` (from stage +x to the image's +column axis, turning towards stage +y),
        ``skew_deg`` (how far the stage axes, seen in the image, are from square) and ``mirrored``."""
        ...

    def backlash_um(self) -> dict[str, float] | None:
        """The play of each drive: ``{"x": .., "y": .., "z": ..}``."""
        ...

    def repeatability_um(self) -> float | None:
        """Standard deviation of where an x or y move stops, per axis."""
        ...

    def settle_ms(self, tolerance_um: float) -> float | None:
        """How long after an x or y move ends the stage stays within ``tolerance_um`` of where it stopped."""
        ...


class NoTruth:
    """Real hardware: nothing is known beyond what is measured."""

    known = False
    source = "none"

    def focus_z_um(self, x_um: float, y_um: float, t_s: float) -> float | None:
        return None

    def well_at(self, x_um: float, y_um: float) -> str | None:
        return None

    def well_centre_um(self, well: str) -> tuple[float, float] | None:
        return None

    def blank_wells(self) -> list[str]:
        return []

    def sensor(self, gain_db: float) -> dict[str, float] | None:
        return None

    def illumination_map(self) -> np.ndarray | None:
        return None

    def field_coverage(self, x_um: float, y_um: float, t_s: float) -> float | None:
        return None

    def well_coverage(self, well: str, t_s: float) -> float | None:
        return None

    def image_px_per_um(self) -> np.ndarray | None:
        return None

    def camera_geometry(self) -> dict[str, float | bool] | None:
        return None

    def backlash_um(self) -> dict[str, float] | None:
        return None

    def repeatability_um(self) -> float | None:
        return None

    def settle_ms(self, tolerance_um: float) -> float | None:
        return None
