"""One position's time points as a movie file any video player opens (MP4, H.264).

The frames are the position's analysed plane (corrected where saved), reduced to 8 bits
and to at most ``width_px``; each carries the time since the start and a scale bar sized
from the pixel size, so a clip pasted into a slide still says what it shows. Encoding is
done by the static ffmpeg that ``imageio-ffmpeg`` ships (libx264, yuv420p: the pixel
format every player decodes). Blocking: call from a worker thread.
"""

from __future__ import annotations

import dataclasses
import math
import os
from collections.abc import Sequence
from pathlib import Path

import cv2
import numpy as np
import tifffile

# imageio-ffmpeg starts ffmpeg with preexec_fn=os.setpgrp unless told not to, which makes
# Python fork() rather than vfork(); fork runs the at-fork handlers of SciPy's FFT thread
# pool, and an FFT another thread of the daemon runs at that moment (the simulated optics,
# live view) fails with "work item submitted after shutdown". Without it the spawn leaves
# the pools alone; the daemon stops its children itself, so Ctrl-C reaching ffmpeg is fine.
os.environ.setdefault("IMAGEIO_FFMPEG_NO_PREVENT_SIGINT", "1")

# Scale bar lengths a reader takes in at a glance (1-2-5 steps; common practice).
NICE_LENGTHS_UM = (1, 2, 5, 10, 20, 50, 100, 200, 500, 1000, 2000, 5000)
# The bar covers about a fifth of the width (common practice for micrographs).
BAR_FRACTION = 0.2


@dataclasses.dataclass(frozen=True)
class MovieFrame:
    path: Path
    bit_depth: int
    elapsed_s: float


@dataclasses.dataclass(frozen=True)
class MovieMade:
    path: Path
    frames: int
    width_px: int
    height_px: int
    fps: float
    scale_bar_um: float


def scale_bar_um(width_px: int, pixel_size_um: float) -> float:
    """The largest 1-2-5 length not wider than a fifth of a frame ``width_px`` wide (um)."""
    target = width_px * pixel_size_um * BAR_FRACTION
    fitting = [v for v in NICE_LENGTHS_UM if v <= target]
    return float(fitting[-1] if fitting else NICE_LENGTHS_UM[0])


def elapsed_label(seconds: float) -> str:
    if seconds < 3600:
        return f"{seconds / 60:.0f} min"
    if seconds < 2 * 86400:
        return f"{seconds / 3600:.1f} h"
    return f"{seconds / 86400:.2f} d"


def _to_8bit(pixels: np.ndarray, bit_depth: int) -> np.ndarray:
    img = np.asarray(pixels)
    if img.ndim > 2:
        img = img.reshape(img.shape[-2:])
    if img.dtype == np.uint8:
        return img
    return np.clip(img >> max(0, bit_depth - 8), 0, 255).astype(np.uint8)


def _annotate(img: np.ndarray, text: str, bar_px: int, bar_label: str) -> np.ndarray:
    out = img.copy()
    h, w = out.shape
    scale = max(0.4, w / 900)
    thick = max(1, round(scale * 2))
    margin = max(6, w // 60)
    # Dark under light: readable on both the bright background and the dark cells of phase contrast.
    for colour, extra in ((0, 2), (255, 0)):
        cv2.putText(out, text, (margin, margin + round(22 * scale)), cv2.FONT_HERSHEY_SIMPLEX, scale, colour,
                    thick + extra, cv2.LINE_AA)
        y = h - margin
        cv2.rectangle(out, (w - margin - bar_px - extra, y - max(3, h // 90) - extra), (w - margin + extra, y + extra),
                      colour, -1)
        (tw, _th), _ = cv2.getTextSize(bar_label, cv2.FONT_HERSHEY_SIMPLEX, scale * 0.8, thick)
        cv2.putText(out, bar_label, (w - margin - bar_px // 2 - tw // 2, y - max(3, h // 90) - margin // 2),
                    cv2.FONT_HERSHEY_SIMPLEX, scale * 0.8, colour, thick + extra, cv2.LINE_AA)
    return out


def write_movie(
    frames: Sequence[MovieFrame], out: Path, *, pixel_size_um: float, fps: float, width_px: int
) -> MovieMade:
    """Encode ``frames`` (in time order) as an H.264 MP4 at ``out``; every frame is one time point."""
    import imageio_ffmpeg

    if not frames:
        raise ValueError("no frames to make a movie of")
    first = _to_8bit(tifffile.imread(frames[0].path), frames[0].bit_depth)
    h0, w0 = first.shape
    factor = min(1.0, width_px / w0)
    # yuv420p needs even sides.
    w = max(2, int(w0 * factor) // 2 * 2)
    h = max(2, int(h0 * factor) // 2 * 2)
    px_um = pixel_size_um * w0 / w
    bar_um = scale_bar_um(w, px_um)
    bar_px = max(1, round(bar_um / px_um))
    bar_label = f"{bar_um / 1000:g} mm" if bar_um >= 1000 else f"{bar_um:g} um"
    writer = imageio_ffmpeg.write_frames(
        str(out), (w, h), pix_fmt_in="gray", pix_fmt_out="yuv420p", fps=fps, codec="libx264",
        macro_block_size=2, quality=7, output_params=["-movflags", "+faststart"], ffmpeg_log_level="error",
    )
    writer.send(None)
    try:
        for i, f in enumerate(frames):
            img = first if i == 0 else _to_8bit(tifffile.imread(f.path), f.bit_depth)
            if img.shape != (h0, w0):
                raise ValueError(f"frame {f.path.name} is {img.shape[1]} x {img.shape[0]} px, not {w0} x {h0} like the first")
            small = cv2.resize(img, (w, h), interpolation=cv2.INTER_AREA) if (w, h) != (w0, h0) else img
            writer.send(np.ascontiguousarray(_annotate(small, elapsed_label(f.elapsed_s), bar_px, bar_label)))
    finally:
        writer.close()
    return MovieMade(out, len(frames), w, h, fps, bar_um)


def default_fps(n_frames: int) -> float:
    """About ten seconds of film, between 2 and 12 time points a second."""
    return float(min(12, max(2, math.ceil(n_frames / 10))))
