"""Reading saved frames back for the illumination commands (retrospective flats, correction)."""

from __future__ import annotations

import dataclasses
import xml.etree.ElementTree as ET
from collections.abc import Iterable
from pathlib import Path

import numpy as np
import tifffile

from daemon.illumination import CalibrationError


@dataclasses.dataclass(frozen=True)
class InputFrame:
    path: Path
    pixels: np.ndarray
    exposure_ms: float | None
    gain_db: float | None
    kind: str | None
    """'raw' or 'corrected' for frames a time-lapse saved; None for other TIFFs."""
    position: tuple[float, float] | None
    t_s: float | None
    pixel_size_um: float | None
    z_um: float | None


def _plain_ome(xml: str) -> dict[str, float]:
    """Exposure, position and pixel size from any OME-XML (e.g. what ``capture`` writes)."""
    out: dict[str, float] = {}
    try:
        root = ET.fromstring(xml)
    except ET.ParseError:
        return out
    for el in root.iter():
        tag = el.tag.rpartition("}")[2]
        if tag == "Plane":
            for key in ("ExposureTime", "PositionX", "PositionY", "PositionZ"):
                if el.get(key) is not None:
                    out[key] = float(el.get(key))  # type: ignore[arg-type]
        elif tag == "Pixels" and el.get("PhysicalSizeX") is not None:
            out["PhysicalSizeX"] = float(el.get("PhysicalSizeX"))  # type: ignore[arg-type]
    return out


def read_input(path: Path) -> InputFrame:
    """A frame from a TIFF: our time-lapse frames with full metadata, other TIFFs with
    what their OME-XML says (or nothing)."""
    from daemon.storage.ome import NotOurFrame, read_frame

    try:
        pixels, meta = read_frame(path)
        return InputFrame(
            path, pixels, meta.exposure_ms, meta.gain_db, meta.kind, (meta.x_um, meta.y_um), meta.t_s,
            meta.pixel_size_um, meta.z_um,
        )
    except NotOurFrame:
        pass
    except (tifffile.TiffFileError, ValueError) as exc:
        raise CalibrationError(f"{path}: not a readable TIFF ({exc})") from None
    try:
        with tifffile.TiffFile(path) as tif:
            pixels = tif.asarray()
            xml = tif.ome_metadata or ""
    except (tifffile.TiffFileError, ValueError) as exc:
        raise CalibrationError(f"{path}: not a readable TIFF ({exc})") from None
    if pixels.ndim != 2:
        raise CalibrationError(f"{path}: expected one monochrome plane, found shape {pixels.shape}")
    ome = _plain_ome(xml) if xml else {}
    pos = (ome["PositionX"], ome["PositionY"]) if "PositionX" in ome and "PositionY" in ome else None
    return InputFrame(
        path, pixels, ome.get("ExposureTime"), None, None, pos, None, ome.get("PhysicalSizeX"), ome.get("PositionZ"),
    )


def expand_paths(paths: Iterable[Path]) -> list[Path]:
    """Files as given, folders searched (recursively) for .tif/.tiff; sorted, no duplicates."""
    found: list[Path] = []
    for p in paths:
        if p.is_dir():
            found += sorted(q for q in p.rglob("*") if q.suffix.lower() in (".tif", ".tiff") and q.is_file())
        elif p.exists():
            found.append(p)
        else:
            raise CalibrationError(f"{p}: no such file or folder")
    seen: set[Path] = set()
    unique = []
    for p in found:
        r = p.resolve()
        if r not in seen:
            seen.add(r)
            unique.append(p)
    return unique
