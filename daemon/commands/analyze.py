"""``phasewatch analyze FILE_OR_DIR``: confluence and cell count of saved frames.

Pixel size comes from ``--pixel-size-um``, else from the frame's OME metadata, else from
the profile's optics. ``--method`` picks the confluence segmentation (see
daemon/culture/confluence.py); every result names the method it came from. With ``--overlay DIR`` each frame's cell mask is drawn over it as a
PNG, to check the segmentation by eye. On a simulated profile, frames that carry their
stage position and time also show the simulator's true coverage beside the estimate.
"""

from __future__ import annotations

import argparse
import asyncio
import dataclasses
import datetime as dt
import struct
import sys
import xml.etree.ElementTree as ET
from pathlib import Path

import cv2
import numpy as np
import tifffile

from daemon.commands.common import print_json
from daemon.culture.confluence import DEFAULT_METHOD, METHODS, confluence, overlay
from daemon.culture.counting import count_cells
from daemon.profile import Profile, load_profile
from drivers import atomic
from drivers.options import ConfigError
from drivers.registry import offline_truth
from drivers.truth import GroundTruth

IMAGE_SUFFIXES = (".tif", ".tiff", ".png", ".jpg", ".jpeg", ".bmp")
OVERLAY_SUFFIX = "-overlay.png"


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("analyze", help="confluence and cell count of saved frames (a file or a folder)")
    p.add_argument("path", type=Path, metavar="FILE_OR_DIR", help="an image file, or a folder searched recursively")
    p.add_argument("--json", action="store_true", help="print the results as JSON")
    p.add_argument("--overlay", type=Path, default=None, metavar="DIR", help="write mask overlays as PNG into DIR")
    p.add_argument("--pixel-size-um", type=float, default=None, help="pixel size in the sample plane (overrides metadata)")
    p.add_argument(
        "--method", choices=METHODS, default=DEFAULT_METHOD,
        help=f"confluence segmentation (default: {DEFAULT_METHOD}; jaccard-2014 is the published method, best on dark-subtracted frames)",
    )
    p.add_argument(
        "--profile", "-p", default="sim",
        help="scope profile for the pixel size when a frame does not carry one (default: sim)",
    )
    p.set_defaults(func=run)


@dataclasses.dataclass
class FrameInfo:
    pixels: np.ndarray
    pixel_size_um: float | None = None
    x_um: float | None = None
    y_um: float | None = None
    t_s: float | None = None


class UnreadableImage(ValueError):
    pass


def find_images(path: Path) -> list[Path]:
    if not path.exists():
        raise FileNotFoundError(2, "no such file or folder", str(path))
    if path.is_file():
        return [path]
    return sorted(
        p for p in path.rglob("*")
        if p.is_file() and p.suffix.lower() in IMAGE_SUFFIXES and not p.name.endswith(OVERLAY_SUFFIX)
        and not p.name.startswith(".")
    )


def _float_or_none(text: str | None) -> float | None:
    try:
        return float(text) if text not in (None, "") else None
    except ValueError:
        return None


def _ome_fields(xml: str, info: FrameInfo) -> None:
    """Pixel size, stage position and acquisition time from any OME-XML (namespace-agnostic)."""
    try:
        root = ET.fromstring(xml)
    except ET.ParseError:
        return
    pixels = root.find(".//{*}Pixels")
    plane = root.find(".//{*}Plane")
    if pixels is not None:
        info.pixel_size_um = _float_or_none(pixels.get("PhysicalSizeX"))
    if plane is not None:
        info.x_um = _float_or_none(plane.get("PositionX"))
        info.y_um = _float_or_none(plane.get("PositionY"))
    for m in root.iter("{*}M"):
        if m.get("K") == "t_s":
            info.t_s = _float_or_none(m.text)
    date = root.findtext(".//{*}AcquisitionDate")
    if info.t_s is None and date:
        try:
            info.t_s = dt.datetime.fromisoformat(date).timestamp()
        except ValueError:
            pass


def read_image(path: Path) -> FrameInfo:
    """The first plane of an image file as a 2-D frame, with what its OME metadata tells."""
    if path.suffix.lower() in (".tif", ".tiff"):
        try:
            with tifffile.TiffFile(path) as tif:
                info = FrameInfo(tif.pages[0].asarray())
                if tif.ome_metadata:
                    _ome_fields(tif.ome_metadata, info)
        except (tifffile.TiffFileError, ValueError, IndexError, KeyError, struct.error, OSError) as exc:
            raise UnreadableImage(f"not a readable TIFF ({exc})") from None
        order = "rgb"  # tifffile hands colour over as RGB
    else:
        pixels = cv2.imread(str(path), cv2.IMREAD_UNCHANGED)
        if pixels is None:
            raise UnreadableImage("not an image OpenCV can read")
        info = FrameInfo(pixels)
        order = "bgr"
    px = info.pixels
    if px.ndim == 3 and px.shape[2] in (3, 4):
        # Colour frames: luma with ITU-R BT.601 weights, as OpenCV applies them.
        codes = {("rgb", 3): cv2.COLOR_RGB2GRAY, ("rgb", 4): cv2.COLOR_RGBA2GRAY,
                 ("bgr", 3): cv2.COLOR_BGR2GRAY, ("bgr", 4): cv2.COLOR_BGRA2GRAY}
        px = cv2.cvtColor(np.ascontiguousarray(px), codes[(order, px.shape[2])])
    if px.ndim != 2:
        raise UnreadableImage(f"image has shape {px.shape}; expected a single-plane monochrome frame")
    info.pixels = px
    return info


class FrameTruth:
    """The true coverage of a saved frame's field, where the profile's drivers know it
    (the simulator), for truth-beside-estimate.

    The frame must carry its stage position and time and match the profile's pixel size;
    the truth is rebuilt once per frame size so that its field is the frame's.
    """

    def __init__(self, profile: Profile, data_dir: Path | None = None) -> None:
        self.profile = profile
        self.data_dir = data_dir  # where the simulated scope kept its clock (its seeding date)
        self._by_shape: dict[tuple[int, int], GroundTruth | None] = {}

    def coverage(self, info: FrameInfo) -> float | None:
        if info.x_um is None or info.y_um is None or info.t_s is None:
            return None
        optics_px = self.profile.optics.pixel_size_um
        if info.pixel_size_um is not None and abs(info.pixel_size_um - optics_px) > 0.01 * optics_px:
            return None
        h, w = info.pixels.shape
        if min(h, w) < 16:  # smaller than any camera a profile allows
            return None
        if (h, w) not in self._by_shape:
            try:
                self._by_shape[(h, w)] = offline_truth(self.profile, frame_shape=(h, w), data_dir=self.data_dir)
            except ConfigError:
                # A simulated plate seeded 'now' whose data folder is not above the frames: no truth.
                self._by_shape[(h, w)] = None
        truth = self._by_shape[(h, w)]
        return None if truth is None else truth.field_coverage(info.x_um, info.y_um, info.t_s)


def analyze_frame(path: Path, info: FrameInfo, *, pixel_size_um: float, overlay_dir: Path | None,
                  root: Path, truth: FrameTruth | None = None, method: str = DEFAULT_METHOD) -> dict[str, object]:
    result = confluence(info.pixels, pixel_size_um=pixel_size_um, return_mask=True, method=method)
    count = count_cells(info.pixels, pixel_size_um=pixel_size_um, confluence=result.fraction, mask=result.mask)
    row: dict[str, object] = {
        "file": str(path),
        "width_px": int(info.pixels.shape[1]),
        "height_px": int(info.pixels.shape[0]),
        "pixel_size_um": pixel_size_um,
        "confluence": round(result.fraction, 4),
        "method": result.method,
        "method_description": result.method_description,
        "cell_count": count.count,
        "count_reliable": count.reliable,
        "count_note": count.reason,
    }
    true_cov = truth.coverage(info) if truth is not None else None
    if true_cov is not None:
        row["simulator_confluence"] = round(true_cov, 4)
    if overlay_dir is not None and result.mask is not None:
        rel = path.relative_to(root) if path != root else Path(path.name)
        out = overlay_dir / rel.parent / (rel.stem + OVERLAY_SUFFIX)
        ok, png = cv2.imencode(".png", overlay(info.pixels, result.mask))
        if not ok:
            raise OSError(5, "could not encode the overlay PNG", str(out))
        atomic.make_dirs(out.parent)
        atomic.write_bytes(out, png.tobytes())
        row["overlay"] = str(out)
    return row


def _describe(row: dict[str, object]) -> str:
    text = f"{row['file']}: confluence {float(row['confluence']) * 100:.1f} % ({row['method']})"  # type: ignore[arg-type]
    if "simulator_confluence" in row:
        text += f"  (simulator: {float(row['simulator_confluence']) * 100:.1f} %)"  # type: ignore[arg-type]
    if row["count_reliable"]:
        text += f", about {row['cell_count']} cells"
    else:
        text += f", cell count not reliable: {row['count_note']}"
    if "overlay" in row:
        text += f"\n  overlay: {row['overlay']}"
    return text


def analyze_all(args: argparse.Namespace) -> tuple[list[dict[str, object]], list[str]]:
    files = find_images(args.path)
    profile = load_profile(args.profile)
    start = args.path.resolve()
    data_dir = next((d for d in (start, *start.parents) if (d / "sim-clock.json").is_file()), None)
    truth = FrameTruth(profile, data_dir)
    rows: list[dict[str, object]] = []
    problems: list[str] = []
    root = args.path if args.path.is_dir() else args.path.parent
    for path in files:
        try:
            info = read_image(path)
        except UnreadableImage as exc:
            problems.append(f"{path}: {exc}")
            continue
        px_um = args.pixel_size_um or (info.pixel_size_um if info.pixel_size_um and info.pixel_size_um > 0 else None)
        rows.append(analyze_frame(
            path, info, pixel_size_um=px_um or profile.optics.pixel_size_um,
            overlay_dir=args.overlay, root=root, truth=truth, method=args.method,
        ))
    return rows, problems


async def run(args: argparse.Namespace) -> int:
    if args.pixel_size_um is not None and not args.pixel_size_um > 0:
        print(f"phasewatch: --pixel-size-um must be > 0, got {args.pixel_size_um}", file=sys.stderr)
        return 2
    rows, problems = await asyncio.to_thread(analyze_all, args)
    for line in problems:
        print(f"phasewatch: {line}", file=sys.stderr)
    if not rows and not problems:
        print(f"phasewatch: {args.path}: no image files ({', '.join(IMAGE_SUFFIXES)}) found", file=sys.stderr)
        return 2
    if args.json:
        print_json(rows)
    else:
        for row in rows:
            print(_describe(row))
    if problems:
        return 2 if not rows else 1
    return 0
