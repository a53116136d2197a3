"""A photon-transfer series acquired elsewhere, described by a manifest, read for the
EMVA 1288 analysis of :mod:`daemon.illumination.characterize`.

The manifest is a CSV file with the columns ``exposure_ms,kind,path``, one row per image
file (a multi-page TIFF counts as one frame per page), paths relative to the manifest::

    exposure_ms,kind,path
    0.5,lit,frames/lit-0.5ms-a.tif
    0.5,lit,frames/lit-0.5ms-b.tif
    0.5,dark,frames/dark-0.5ms-a.tif
    0.5,dark,frames/dark-0.5ms-b.tif
    ...
    20,spatial_lit,frames/stack-lit.tif
    20,spatial_dark,frames/stack-dark.tif

``lit`` and ``dark`` frames make the exposure series: two or more of each at every
exposure (the lamp held at one level throughout; every lit exposure needs its dark
frames, and dark frames at exposures without lit ones extend the dark-current fit).
``spatial_lit`` and ``spatial_dark`` are the stacks averaged for DSNU and PRNU, both at
one exposure, two or more frames each (EMVA 1288 suggests a lit level near half of
saturation). Lines starting with ``#`` are comments.

Frames are monochrome integer images: TIFF (read with tifffile), or PNG and the other
formats that imageio reads through Pillow. The bit depth is the one given, or else the smallest of 8, 10, 12, 14 and
16 bits that holds the largest value in the series; values that are all multiples of
2^s (data stored in the high bits of 16-bit files, as some cameras do) are divided by
2^s first.

Every error names the manifest line it comes from and is one line long.
"""

from __future__ import annotations

import csv
import dataclasses
import math
from collections.abc import Callable, Iterator
from pathlib import Path

import numpy as np

from daemon.illumination import CalibrationError
from daemon.illumination.characterize import (
    DarkPoint,
    Measurement,
    PtcPoint,
    SeriesStats,
    SpatialStacks,
    uniform_area,
)
from daemon.illumination.stats import RunningStats

Progress = Callable[[int, int, str], None]

COLUMNS = ("exposure_ms", "kind", "path")
LIT, DARK, SPATIAL_LIT, SPATIAL_DARK = "lit", "dark", "spatial_lit", "spatial_dark"
KINDS = (LIT, DARK, SPATIAL_LIT, SPATIAL_DARK)
#: Bit depths considered when the files do not say (the converters cameras have).
BIT_DEPTHS = (8, 10, 12, 14, 16)
#: The measuring area is found on the brightest lit frame below this share of full scale.
AREA_PROBE_FRACTION = 0.8
TIFF_SUFFIXES = (".tif", ".tiff")


class ManifestError(CalibrationError):
    """The manifest or a file it names is unusable; ``str()`` is one line naming the row."""


@dataclasses.dataclass(frozen=True)
class Row:
    manifest: Path
    line: int
    exposure_ms: float
    kind: str
    path_text: str

    @property
    def path(self) -> Path:
        return self.manifest.parent / self.path_text

    @property
    def where(self) -> str:
        return f"{self.manifest.name} line {self.line} ({self.kind}, {self.exposure_ms:g} ms, {self.path_text})"

    def error(self, problem: str) -> ManifestError:
        return ManifestError(f"{self.where}: {problem}")


@dataclasses.dataclass(frozen=True)
class FileInfo:
    frames: int
    shape: tuple[int, int]
    dtype: np.dtype


@dataclasses.dataclass(frozen=True)
class LoadedSeries:
    measurement: Measurement
    manifest: Path
    frames: int
    """frames read, all kinds"""
    bit_depth_from: str
    """'--bit-depth' or 'the largest value in the files'"""
    high_bits_shift: int
    """s where the values were stored as multiples of 2^s and divided by it, else 0"""


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return text[0] if text else type(exc).__name__


def read_manifest(path: Path) -> list[Row]:
    """The rows of a manifest, each checked on its own (columns, exposure, kind, file there)."""
    try:
        text = path.read_text(encoding="utf-8-sig")
    except FileNotFoundError:
        raise ManifestError(f"{path}: no such manifest") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise ManifestError(f"{path}: cannot read the manifest ({_first_line(exc)})") from None
    lines = [(n, line) for n, line in enumerate(text.splitlines(), start=1) if line.strip() and not line.lstrip().startswith("#")]
    if not lines:
        raise ManifestError(f"{path}: the manifest is empty; expected the header {','.join(COLUMNS)}")
    reader = csv.reader(line for _, line in lines)
    header = [h.strip() for h in next(reader)]
    if sorted(header) != sorted(COLUMNS):
        raise ManifestError(
            f"{path.name} line {lines[0][0]}: the header is {','.join(header)}; expected the columns {','.join(COLUMNS)}"
        )
    col = {name: header.index(name) for name in COLUMNS}
    rows: list[Row] = []
    for (n, _), cells in zip(lines[1:], reader):
        cells = [c.strip() for c in cells]
        if len(cells) != len(COLUMNS):
            raise ManifestError(f"{path.name} line {n}: {len(cells)} values; expected {len(COLUMNS)} ({','.join(COLUMNS)})")
        exposure_text, kind, path_text = cells[col["exposure_ms"]], cells[col["kind"]], cells[col["path"]]
        try:
            exposure_ms = float(exposure_text)
        except ValueError:
            exposure_ms = math.nan
        if not (math.isfinite(exposure_ms) and exposure_ms > 0):
            raise ManifestError(f"{path.name} line {n}: exposure_ms '{exposure_text}' is not a positive number of milliseconds")
        row = Row(path, n, exposure_ms, kind, path_text)
        if kind not in KINDS:
            raise row.error(f"unknown kind '{kind}'; expected one of {', '.join(KINDS)}")
        if not path_text:
            raise row.error("no path")
        if not row.path.is_file():
            raise row.error(f"no such file {row.path}")
        rows.append(row)
    if not rows:
        raise ManifestError(f"{path}: the manifest lists no frames")
    return rows


def _probe(row: Row) -> FileInfo:
    """Frame count, size and type from the file's header, without decoding the pixels."""
    try:
        if row.path.suffix.lower() in TIFF_SUFFIXES:
            import tifffile

            with tifffile.TiffFile(row.path) as tif:
                pages = list(tif.pages)
                first = pages[0]
                if first.samplesperpixel > 1:
                    raise row.error(f"a colour image ({first.samplesperpixel} samples per pixel); a monochrome frame is needed")
                shapes = {tuple(p.shape) for p in pages}
                if len(shapes) > 1 or len(first.shape) != 2:
                    raise row.error(f"pages of different sizes or dimensions ({sorted(shapes)}); one frame per page is needed")
                return FileInfo(len(pages), tuple(first.shape), np.dtype(first.dtype))  # type: ignore[arg-type]
        import imageio.v3 as iio

        # An open file of our own: imageio leaves a path it opened itself open when no
        # reader takes the file. Pillow's reader only: the others are for formats no
        # camera frame comes in (and some warn of their own deprecation on the way).
        with row.path.open("rb") as fh:
            props = iio.improps(fh, extension=row.path.suffix, plugin="pillow")
    except ManifestError:
        raise
    except Exception as exc:  # any reader's way of saying the file is not an image it reads
        raise row.error(f"cannot read the image ({_first_line(exc)})") from None
    if len(props.shape) != 2:
        raise row.error(f"an image of shape {props.shape}; a monochrome frame is needed")
    return FileInfo(1, tuple(props.shape), np.dtype(props.dtype))  # type: ignore[arg-type]


def _frames(row: Row, info: FileInfo) -> Iterator[np.ndarray]:
    try:
        if row.path.suffix.lower() in TIFF_SUFFIXES:
            import tifffile

            pixels = tifffile.imread(row.path)
        else:
            import imageio.v3 as iio

            with row.path.open("rb") as fh:
                pixels = iio.imread(fh, extension=row.path.suffix, plugin="pillow")
    except Exception as exc:  # a header that reads and pixels that do not
        raise row.error(f"cannot read the image ({_first_line(exc)})") from None
    pixels = np.asarray(pixels).reshape((info.frames, *info.shape))
    yield from pixels


def _check_files(rows: list[Row]) -> dict[Row, FileInfo]:
    infos: dict[Row, FileInfo] = {}
    first: Row | None = None
    for row in rows:
        info = _probe(row)
        if not (np.issubdtype(info.dtype, np.integer)):
            raise row.error(f"{info.dtype} pixels; the camera's raw integer grey values are needed")
        if first is None:
            first = row
        elif info.shape != infos[first].shape:
            h, w = info.shape
            h0, w0 = infos[first].shape
            raise row.error(f"a {w}x{h} frame, but line {first.line} ({first.path_text}) is {w0}x{h0}; all frames must be one size")
        infos[row] = info
    return infos


def _groups(rows: list[Row], infos: dict[Row, FileInfo]) -> dict[tuple[str, float], list[Row]]:
    """Rows by (kind, exposure), with the counts and pairings the analysis needs checked."""
    groups: dict[tuple[str, float], list[Row]] = {}
    for row in rows:
        groups.setdefault((row.kind, row.exposure_ms), []).append(row)
    for (kind, exposure_ms), members in groups.items():
        if sum(infos[r].frames for r in members) < 2:
            raise members[0].error(f"the only {kind} frame at {exposure_ms:g} ms; two or more are needed at each exposure")
        if kind == LIT and (DARK, exposure_ms) not in groups:
            raise members[0].error(f"no dark frames at {exposure_ms:g} ms; every lit exposure needs its dark frames")
    if not any(k == LIT for k, _ in groups):
        raise ManifestError(f"{rows[0].manifest.name}: no lit rows; the photon transfer needs lit and dark frames at each exposure")
    for kind in (SPATIAL_LIT, SPATIAL_DARK):
        exposures = [e for k, e in groups if k == kind]  # in the manifest's order
        if not exposures:
            raise ManifestError(
                f"{rows[0].manifest.name}: no {kind} rows; DSNU and PRNU need a stack of {kind.removeprefix('spatial_')} "
                "frames (two or more, one exposure)"
            )
        if len(exposures) > 1:
            second = groups[(kind, exposures[1])][0]
            listed = ", ".join(f"{e:g}" for e in sorted(exposures))
            raise second.error(f"{kind} frames at {len(exposures)} exposures ({listed} ms); one stack is needed")
    (lit_ms,) = [e for k, e in groups if k == SPATIAL_LIT]
    (dark_ms,) = [e for k, e in groups if k == SPATIAL_DARK]
    if lit_ms != dark_ms:
        raise groups[(SPATIAL_DARK, dark_ms)][0].error(f"spatial_dark at {dark_ms:g} ms but spatial_lit at {lit_ms:g} ms; both stacks need one exposure")
    return groups


def _bit_depth(largest: int, high_bits: int, given: int | None, where: str) -> tuple[int, int]:
    """(bit depth, shift): see the module docstring. ``high_bits`` is the OR of all values."""
    shift = (high_bits & -high_bits).bit_length() - 1 if high_bits else 0
    if given is not None:
        if largest <= 2**given - 1:
            return given, 0
        needed = largest.bit_length() - given
        if needed <= shift:
            return given, needed
        raise ManifestError(f"{where}: values reach {largest}, more than {given} bits hold (full scale {2**given - 1}); check --bit-depth")
    value = largest >> shift
    for bits in BIT_DEPTHS:
        if value <= 2**bits - 1:
            return bits, shift
    raise ManifestError(f"{where}: values reach {largest}, beyond 16 bits; give the camera's bit depth with --bit-depth")


def load_series(manifest: Path, *, bit_depth: int | None = None, progress: Progress | None = None) -> LoadedSeries:
    """Read and check a manifest and its frames, and reduce them to the exposure series and
    the stacks that :func:`daemon.illumination.characterize.analyse` takes.

    The files are read twice: once for the largest value, the stored bits and the level of
    each lit exposure (which give the bit depth and the exposure on which the measuring
    area is found, as in a live run), then for the statistics over that area.
    """
    if bit_depth is not None and not 1 <= bit_depth <= 32:
        raise ManifestError(f"--bit-depth must be between 1 and 32, got {bit_depth}")
    rows = read_manifest(manifest)
    infos = _check_files(rows)
    groups = _groups(rows, infos)
    total = 2 * sum(i.frames for i in infos.values())
    done = 0

    def tick(row: Row, text: str) -> None:
        nonlocal done
        done += infos[row].frames
        if progress is not None:
            progress(done, total, text)

    largest, high_bits = 0, 0
    lit_level: dict[float, float] = {}
    for row in rows:
        for frame in _frames(row, infos[row]):
            if frame.min() < 0:
                raise row.error(f"negative grey values ({int(frame.min())}); the camera's raw grey values are needed")
            largest = max(largest, int(frame.max()))
            high_bits |= int(np.bitwise_or.reduce(frame, axis=None))
            if row.kind == LIT:
                lit_level.setdefault(row.exposure_ms, float(frame.mean()))
        tick(row, f"checked {row.path_text}")
    bits, shift = _bit_depth(largest, high_bits, bit_depth, manifest.name)
    scale = 1.0 / 2**shift
    top = float(2**bits - 1)

    def frames_of(members: list[Row]) -> Iterator[np.ndarray]:
        for row in members:
            for frame in _frames(row, infos[row]):
                yield frame.astype(np.float64) * scale if shift else frame
            tick(row, f"{row.kind} {row.exposure_ms:g} ms: {row.path_text}")

    below = [e for e, level in lit_level.items() if level * scale < AREA_PROBE_FRACTION * top]
    probe_ms = max(below) if below else min(lit_level)
    lit_row, dark_row = groups[(LIT, probe_ms)][0], groups[(DARK, probe_ms)][0]
    first_lit = next(iter(_frames(lit_row, infos[lit_row])))
    first_dark = next(iter(_frames(dark_row, infos[dark_row])))
    mask = uniform_area(first_lit * scale, first_dark * scale)

    def series_stats(members: list[Row], *, full_scale: float | None) -> SeriesStats:
        stats = SeriesStats(mask, full_scale_dn=full_scale)
        for frame in frames_of(members):
            stats.add(frame)
        return stats

    points: list[PtcPoint] = []
    dark_series: list[DarkPoint] = []
    for exposure_ms in sorted({e for k, e in groups if k == DARK}):
        dmu, dvar = series_stats(groups[(DARK, exposure_ms)], full_scale=None).mean_variance()
        if (LIT, exposure_ms) not in groups:
            dark_series.append(DarkPoint(exposure_ms, dmu, dvar))
            continue
        lit = series_stats(groups[(LIT, exposure_ms)], full_scale=top)
        mu, var = lit.mean_variance()
        points.append(PtcPoint(exposure_ms, mu, var, dmu, dvar, lit.saturated_fraction))

    def stack(kind: str) -> tuple[float, int, np.ndarray, np.ndarray]:
        ((exposure_ms, members),) = [(e, m) for (k, e), m in groups.items() if k == kind]
        stats: RunningStats | None = None
        for frame in frames_of(members):
            if stats is None:
                stats = RunningStats(frame.shape)
            stats.add(frame)
        assert stats is not None
        return exposure_ms, stats.n, stats.mean, stats.variance

    stack_ms, n_lit, lit_mean, lit_var = stack(SPATIAL_LIT)
    _, n_dark, dark_mean, dark_var = stack(SPATIAL_DARK)
    stacks = SpatialStacks(stack_ms, n_lit, lit_mean, lit_var, dark_mean, dark_var, dark_frames=n_dark)
    measurement = Measurement(points, dark_series, stacks, mask, None, bits, infos[rows[0]].shape)
    return LoadedSeries(
        measurement, manifest, sum(i.frames for i in infos.values()),
        "--bit-depth" if bit_depth is not None else "the largest value in the files", shift,
    )
