"""OME-XML for saved frames: what tifffile writes, and reading our own metadata back.

Each frame file carries everything needed to rebuild its index row (time-lapse, time
point, position, plane, kind, stage position, exposure, metrics) so that a frame renamed
into place just before a power cut, but never indexed, can be indexed again from the file
alone. The standard OME fields hold pixel size, acquisition time, stage position, z and
exposure; the rest sits in one MapAnnotation in our own namespace.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import io
import xml.etree.ElementTree as ET
from pathlib import Path
from typing import Any

import numpy as np
import tifffile

OME_NS = "http://www.openmicroscopy.org/Schemas/OME/2016-06"
ANNOTATION_NS = "phasewatch/frame/1"
KINDS = ("raw", "corrected")


@dataclasses.dataclass(frozen=True)
class FrameMeta:
    """One saved frame: where, when and how it was taken, and its per-frame metrics."""

    timelapse_id: int
    timelapse_name: str
    tp: int
    key: str
    well: str
    site: int
    z_index: int
    kind: str
    t_s: float
    delta_t_s: float
    x_um: float
    y_um: float
    z_um: float
    exposure_ms: float
    gain_db: float
    bit_depth: int
    pixel_size_um: float
    focus_score: float | None = None
    confluence: float | None = None
    focus_found: bool | None = None
    objective: str = ""
    condition: str = ""
    condition_notes: str = ""

    def __post_init__(self) -> None:
        if self.kind not in KINDS:
            raise ValueError(f"kind must be one of {KINDS}, got {self.kind!r}")

    @property
    def identity(self) -> tuple[int, int, str, int, str]:
        """What makes a frame unique within the data folder."""
        return (self.timelapse_id, self.tp, self.key, self.z_index, self.kind)


def iso_utc(t_s: float) -> str:
    return dt.datetime.fromtimestamp(t_s, tz=dt.timezone.utc).isoformat()


def _opt(value: float | bool | None) -> str:
    if value is None:
        return ""
    if isinstance(value, bool):
        return "true" if value else "false"
    return repr(float(value))


def frame_metadata(meta: FrameMeta) -> dict[str, Any]:
    """The ``metadata`` argument of ``tifffile.imwrite(..., ome=True)`` for one frame."""
    annotation = {
        "timelapse_id": str(meta.timelapse_id),
        "timelapse": meta.timelapse_name,
        "time_point": str(meta.tp),
        "position": meta.key,
        "well": meta.well,
        "site": str(meta.site),
        "z_index": str(meta.z_index),
        "kind": meta.kind,
        "t_s": repr(float(meta.t_s)),
        "gain_db": repr(float(meta.gain_db)),
        "bit_depth": str(meta.bit_depth),
        "focus_score": _opt(meta.focus_score),
        "confluence": _opt(meta.confluence),
        "focus_found": _opt(meta.focus_found),
        "condition": meta.condition,
        "condition_notes": meta.condition_notes,
    }
    return {
        "axes": "YX",
        "Name": f"{meta.timelapse_name} {meta.key} t{meta.tp} z{meta.z_index} {meta.kind}",
        "AcquisitionDate": iso_utc(meta.t_s),
        "Description": f"well {meta.well} site {meta.site}, time point {meta.tp}, objective {meta.objective}".strip(),
        "PhysicalSizeX": meta.pixel_size_um,
        "PhysicalSizeXUnit": "µm",
        "PhysicalSizeY": meta.pixel_size_um,
        "PhysicalSizeYUnit": "µm",
        "SignificantBits": meta.bit_depth,
        "Channel": {
            "Name": "phase contrast",
            "AcquisitionMode": "WideField",
            "ContrastMethod": "Phase",
            "IlluminationType": "Transmitted",
        },
        "Plane": _plane(meta),
        "MapAnnotation": {"Namespace": ANNOTATION_NS, "Value": annotation},
    }


def _plane(meta: FrameMeta) -> dict[str, Any]:
    return {
        "DeltaT": meta.delta_t_s,
        "DeltaTUnit": "s",
        "ExposureTime": meta.exposure_ms,
        "ExposureTimeUnit": "ms",
        "PositionX": meta.x_um,
        "PositionXUnit": "µm",
        "PositionY": meta.y_um,
        "PositionYUnit": "µm",
        "PositionZ": meta.z_um,
        "PositionZUnit": "µm",
    }


def encode_frame(pixels: np.ndarray, meta: FrameMeta) -> bytes:
    """The complete bytes of one uncompressed (lossless) single-plane OME-TIFF."""
    if pixels.ndim != 2 or pixels.dtype not in (np.uint8, np.uint16):
        raise ValueError(f"frames are 2-D uint8/uint16, got {pixels.dtype} {pixels.shape}")
    buf = io.BytesIO()
    tifffile.imwrite(
        buf,
        np.ascontiguousarray(pixels),
        ome=True,
        photometric="minisblack",
        metadata=frame_metadata(meta),
        software="phasewatch",
    )
    return buf.getvalue()


def stack_metadata(metas: list[FrameMeta], axes: str, name: str) -> dict[str, Any]:
    """OME metadata of a multi-page stack (axes 'TYX' or 'TZYX'), planes in page order."""
    first = metas[0]
    planes = [_plane(m) for m in metas]
    return {
        "axes": axes,
        "Name": name,
        "AcquisitionDate": iso_utc(first.t_s),
        "Description": f"well {first.well} site {first.site}, {len(metas)} planes"
                       + (f", condition {first.condition}" if first.condition else ""),
        "PhysicalSizeX": first.pixel_size_um,
        "PhysicalSizeXUnit": "µm",
        "PhysicalSizeY": first.pixel_size_um,
        "PhysicalSizeYUnit": "µm",
        "SignificantBits": first.bit_depth,
        "Channel": {
            "Name": "phase contrast",
            "AcquisitionMode": "WideField",
            "ContrastMethod": "Phase",
            "IlluminationType": "Transmitted",
        },
        "Plane": {k: [p[k] for p in planes] for k in planes[0]},
    }


class NotOurFrame(ValueError):
    """The file is a TIFF but lacks the metadata this daemon writes."""


def _opt_float(text: str | None) -> float | None:
    return float(text) if text else None


def parse_frame_xml(xml: str) -> FrameMeta:
    """Rebuild :class:`FrameMeta` from the OME-XML of a frame this daemon wrote."""
    try:
        root = ET.fromstring(xml)
    except ET.ParseError as exc:
        raise NotOurFrame(f"OME-XML does not parse: {exc}") from None
    ns = {"ome": OME_NS}
    pixels = root.find("ome:Image/ome:Pixels", ns)
    plane = root.find("ome:Image/ome:Pixels/ome:Plane", ns)
    values: dict[str, str] = {}
    for ann in root.findall("ome:StructuredAnnotations/ome:MapAnnotation", ns):
        if ann.get("Namespace") == ANNOTATION_NS:
            values = {m.get("K", ""): (m.text or "") for m in ann.findall("ome:Value/ome:M", ns)}
    if pixels is None or plane is None or not values:
        raise NotOurFrame("no phasewatch frame annotation in the OME-XML")
    description = root.findtext("ome:Image/ome:Description", default="", namespaces=ns)
    try:
        found = values.get("focus_found", "")
        return FrameMeta(
            timelapse_id=int(values["timelapse_id"]),
            timelapse_name=values["timelapse"],
            tp=int(values["time_point"]),
            key=values["position"],
            well=values["well"],
            site=int(values["site"]),
            z_index=int(values["z_index"]),
            kind=values["kind"],
            t_s=float(values["t_s"]),
            delta_t_s=float(plane.get("DeltaT", "0")),
            x_um=float(plane.get("PositionX", "nan")),
            y_um=float(plane.get("PositionY", "nan")),
            z_um=float(plane.get("PositionZ", "nan")),
            exposure_ms=float(plane.get("ExposureTime", "nan")),
            gain_db=float(values["gain_db"]),
            bit_depth=int(values["bit_depth"]),
            pixel_size_um=float(pixels.get("PhysicalSizeX", "nan")),
            focus_score=_opt_float(values.get("focus_score")),
            confluence=_opt_float(values.get("confluence")),
            focus_found=None if not found else found == "true",
            objective=description.rpartition("objective ")[2] if "objective " in description else "",
            condition=values.get("condition", ""),
            condition_notes=values.get("condition_notes", ""),
        )
    except (KeyError, ValueError) as exc:
        raise NotOurFrame(f"frame annotation incomplete: {exc}") from None


def read_frame(path: Path) -> tuple[np.ndarray, FrameMeta]:
    """Read a saved frame completely (pixels and metadata); raises on a damaged file."""
    with tifffile.TiffFile(path) as tif:
        xml = tif.ome_metadata
        if not xml:
            raise NotOurFrame("no OME-XML in the file")
        pixels = tif.asarray()
    return pixels, parse_frame_xml(xml)
