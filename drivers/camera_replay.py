"""A camera that plays a folder of images in a loop: demos, benchmarks, offline work.

Images are taken in name order (TIFF through tifffile, PNG and JPEG through OpenCV),
8- or 16-bit, colour reduced to luma. Every image must have the same size and bit depth.
By default frames are the images as they are (``width_px``/``height_px`` in the profile
are not used).

**At the profile's pixel size.** With ``recorded_pixel_size_um`` (the sample-plane size
of one pixel of the recorded images) each image is resampled to the profile's pixel size
(``[optics]``: camera pixel over magnification) with OpenCV (area averaging to shrink,
bicubic to enlarge) and the frame is cut from its centre at ``width_px`` x ``height_px``,
so a folder recorded on another scope plays as this scope would see it. With
``follow_stage`` too, the frame is cut where the stage is, measured from the first known
stage position (the image centre): moving the stage pans across a large recorded image
(a mosaic), so ``commission`` can be rehearsed on recorded images with a known answer:
the replayed camera is square to the stage (image columns along +x, rows along +y), not
mirrored, at exactly the profile's pixel size.

Frames come at ``replay_fps`` on the scope's clock: frame *k* is due at
``t_open + k / replay_fps``, and :meth:`ReplayCamera.grab` returns the next frame that
falls due after the call, like a free-running camera (a slow consumer skips frames, and
nothing returned predates the call). Exposure and gain are checked against the profile
limits and recorded in each frame's metadata; they do not change the pixels.

Decoding runs in a worker thread, overlapped with the wait for the frame's slot.
Decoded frames are kept up to ``cache_bytes``; the first frames that fit are kept for
good and the rest are decoded each time, because with a loop longer than the cache an
evict-oldest policy would throw every frame away just before it is needed again.
"""

from __future__ import annotations

import asyncio
import dataclasses
import math
import threading
from collections.abc import Callable
from pathlib import Path

import cv2
import numpy as np
import tifffile
from PIL import Image, UnidentifiedImageError

from drivers.base import CameraError, Frame
from drivers.camera_common import check_exposure_ms, check_gain_db, delivered_bit_depth, to_mono
from drivers.clock import Clock
from drivers.options import option
from drivers.registry import CameraContext, CameraDriver
from drivers.sections import CameraSection, driver_options

TIFF_SUFFIXES = (".tif", ".tiff")
OTHER_SUFFIXES = (".png", ".jpg", ".jpeg")
IMAGE_SUFFIXES = TIFF_SUFFIXES + OTHER_SUFFIXES
DEFAULT_CACHE_BYTES = 256 * 1024 * 1024


def list_images(folder: Path) -> list[Path]:
    """The replayable images in ``folder``, sorted by name; CameraError if there are none."""
    if not folder.is_dir():
        raise CameraError(f"replay folder {folder} does not exist or is not a folder; check `replay_dir` in [camera]")
    files = sorted(p for p in folder.iterdir() if p.is_file() and p.suffix.lower() in IMAGE_SUFFIXES)
    if not files:
        raise CameraError(
            f"replay folder {folder} has no images ({', '.join(IMAGE_SUFFIXES)}); check `replay_dir` in [camera]"
        )
    return files


def image_size(path: Path) -> tuple[int, int]:
    """(width, height) from the file's header, without decoding the pixels."""
    try:
        if path.suffix.lower() in TIFF_SUFFIXES:
            with tifffile.TiffFile(path) as tif:
                page = tif.pages.first
                return int(page.imagewidth), int(page.imagelength)
        with Image.open(path) as img:
            return int(img.size[0]), int(img.size[1])
    except (OSError, ValueError, UnidentifiedImageError, tifffile.TiffFileError) as exc:
        raise CameraError(f"replay image {path} cannot be read ({type(exc).__name__}: {exc}); remove or replace it") from None


def decode_image(path: Path) -> np.ndarray:
    """The first image in ``path`` as 2-D monochrome uint8 or uint16."""
    try:
        if path.suffix.lower() in TIFF_SUFFIXES:
            with tifffile.TiffFile(path) as tif:
                page = tif.pages.first
                pixels = page.asarray()
                axes = page.axes
            if axes.startswith("S") and pixels.ndim == 3:
                pixels = np.moveaxis(pixels, 0, -1)  # planar RGB: samples first
            return to_mono(pixels, channel_order="rgb", source=f"replay image {path}")
        pixels = cv2.imread(str(path), cv2.IMREAD_UNCHANGED)
    except (OSError, ValueError, tifffile.TiffFileError) as exc:
        raise CameraError(f"replay image {path} cannot be decoded ({type(exc).__name__}: {exc}); remove or replace it") from None
    if pixels is None:
        raise CameraError(f"replay image {path} cannot be decoded; remove or replace it")
    return to_mono(pixels, channel_order="bgr", source=f"replay image {path}")


@dataclasses.dataclass(frozen=True, kw_only=True)
class ReplayOptions:
    replay_dir: str = option("", doc="folder of images played in a loop")
    replay_fps: float = option(30.0, doc="frame rate of the replay", min=0.1, max=240.0, unit="fps")
    recorded_pixel_size_um: float | None = option(
        None,
        doc="sample-plane pixel size the images were recorded at; when set, they are resampled to the "
        "profile's pixel size and cut to width_px x height_px",
        min=0.01,
        max=100.0,
        unit="um",
    )
    follow_stage: bool = option(
        False, doc="cut each frame where the stage is, so stage moves pan across the recorded images (needs recorded_pixel_size_um)"
    )

    def __post_init__(self) -> None:
        if not self.replay_dir:
            raise ValueError("replay_dir: the replay driver needs a folder of images")
        if self.follow_stage and self.recorded_pixel_size_um is None:
            raise ValueError("follow_stage: needs recorded_pixel_size_um, the pixel size the images were recorded at")


StagePosition = Callable[[], "tuple[float, float] | None"]


def resample_to_pixel_size(pixels: np.ndarray, recorded_um: float, target_um: float) -> np.ndarray:
    """``pixels`` recorded at ``recorded_um`` per pixel, resampled to ``target_um`` per pixel.

    OpenCV's area averaging when shrinking (no aliasing), bicubic when enlarging; the
    result keeps the dtype (values clipped by OpenCV's saturating cast).
    """
    scale = recorded_um / target_um
    if abs(scale - 1.0) < 1e-9:
        return pixels
    height, width = pixels.shape
    size = (max(1, round(width * scale)), max(1, round(height * scale)))
    interpolation = cv2.INTER_AREA if scale < 1.0 else cv2.INTER_CUBIC
    return cv2.resize(pixels, size, interpolation=interpolation)


class ReplayCamera:
    def __init__(
        self,
        camera: CameraSection,
        clock: Clock,
        *,
        cache_bytes: int = DEFAULT_CACHE_BYTES,
        pixel_size_um: float | None = None,
        stage_position: StagePosition | None = None,
    ) -> None:
        """``pixel_size_um``: the profile's (needed with ``recorded_pixel_size_um``);
        ``stage_position``: where the stage is, x and y in um, or None while unknown."""
        if camera.options is None:
            raise CameraError("the replay camera needs a folder of images: set `replay_dir` in [camera]")
        self._cfg = camera
        self._opts = driver_options(camera, ReplayOptions)
        self._clock = clock
        self._folder = Path(self._opts.replay_dir).expanduser()
        self._cache_limit = int(cache_bytes)
        self._files: list[Path] = []
        self._size: tuple[int, int] | None = None
        self._dtype: np.dtype | None = None
        self._bit_depth: int | None = None
        self._cache: dict[int, np.ndarray] = {}
        self._cached_bytes = 0
        self._cache_lock = threading.Lock()
        self._t0_s = 0.0
        self._last_slot = -1
        self._exposure_ms = check_exposure_ms(camera.exposure_ms, driver="replay")
        self._gain_db = check_gain_db(camera.gain_db, driver="replay")
        self._decodes = 0
        self._open = False
        self._target_um = pixel_size_um
        self._stage_position = stage_position
        self._origin_um: tuple[float, float] | None = None
        if self._opts.recorded_pixel_size_um is not None and pixel_size_um is None:
            raise CameraError("the replay camera needs the profile's pixel size to replay at it ([optics])")
        if self._opts.follow_stage and stage_position is None:
            raise CameraError("the replay camera's follow_stage needs the stage: open it with a stage driver")

    async def open(self) -> None:
        await asyncio.to_thread(self._scan)
        self._t0_s = self._clock.now()
        self._last_slot = -1
        self._open = True

    async def close(self) -> None:
        self._open = False
        with self._cache_lock:
            self._cache.clear()
            self._cached_bytes = 0

    async def grab(self) -> Frame:
        if not self._open:
            raise CameraError(f"replay camera ({self._folder}) is not open; open it before grabbing")
        period_s = 1.0 / self._opts.replay_fps
        now_s = self._clock.now()
        # The next slot strictly after now (and after the last one handed out), so the
        # frame returned always "arrives" after the call started.
        slot = max(math.floor((now_s - self._t0_s) / period_s) + 1, self._last_slot + 1)
        self._last_slot = slot
        due_s = self._t0_s + slot * period_s
        index = slot % len(self._files)
        with self._cache_lock:
            cached = self._cache.get(index)
        if cached is not None:
            # A dict lookup: not worth a trip to a worker thread.
            await self._clock.sleep(due_s - now_s)
            pixels = cached
        else:
            decoding = asyncio.create_task(asyncio.to_thread(self._pixels, index))
            try:
                await self._clock.sleep(due_s - now_s)
            except BaseException:
                decoding.cancel()
                raise
            pixels = await decoding
        return Frame(
            pixels=self._frame(pixels),  # a copy: callers may work in place, the cached image stays intact
            t_s=due_s,
            exposure_ms=self._exposure_ms,
            gain_db=self._gain_db,
            bit_depth=delivered_bit_depth(pixels, self._cfg.bit_depth),
        )

    async def set_exposure_ms(self, exposure_ms: float) -> None:
        self._exposure_ms = check_exposure_ms(exposure_ms, driver="replay")

    async def set_gain_db(self, gain_db: float) -> None:
        self._gain_db = check_gain_db(gain_db, driver="replay")

    def describe(self) -> dict[str, object]:
        width, height = self._size or (None, None)
        if self._opts.recorded_pixel_size_um is not None:
            width, height = self._cfg.width_px, self._cfg.height_px
        return {
            "driver": "replay",
            "device": str(self._folder),
            "frames": len(self._files),
            "resolution": {"width_px": width, "height_px": height},
            "recorded_size": {"width_px": (self._size or (None, None))[0], "height_px": (self._size or (None, None))[1]},
            "recorded_pixel_size_um": self._opts.recorded_pixel_size_um,
            "pixel_size_um": self._target_um if self._opts.recorded_pixel_size_um is not None else None,
            "follow_stage": self._opts.follow_stage,
            "bit_depth": self._bit_depth,
            "fps": self._opts.replay_fps,
            "exposure_ms": self._exposure_ms,
            "gain_db": self._gain_db,
            "controls": {
                "exposure": {"supported": True, "effective": False, "note": "recorded in frame metadata only"},
                "gain": {"supported": True, "effective": False, "note": "recorded in frame metadata only"},
            },
            "cache": {
                "frames": len(self._cache),
                "bytes": self._cached_bytes,
                "limit_bytes": self._cache_limit,
                "decodes": self._decodes,
            },
        }

    # ---------------------------------------------------------- blocking helpers

    def _frame(self, image: np.ndarray) -> np.ndarray:
        """The frame cut from a (resampled) image: all of it, its centre, or where the stage is."""
        if self._opts.recorded_pixel_size_um is None:
            return image.copy()
        assert self._target_um is not None
        width, height = self._cfg.width_px, self._cfg.height_px
        rows, cols = image.shape
        dx_px = dy_px = 0.0
        if self._opts.follow_stage:
            assert self._stage_position is not None
            here = self._stage_position()
            if here is not None:
                if self._origin_um is None:
                    self._origin_um = here
                dx_px = (here[0] - self._origin_um[0]) / self._target_um
                dy_px = (here[1] - self._origin_um[1]) / self._target_um
        left_f = (cols - width) // 2 + dx_px
        top_f = (rows - height) // 2 + dy_px
        left, top = math.floor(left_f), math.floor(top_f)
        if left_f < 0 or top_f < 0 or left_f + width > cols or top_f + height > rows:
            covers = f"{cols * self._target_um:.0f} x {rows * self._target_um:.0f} um"
            if self._opts.follow_stage:
                raise CameraError(
                    f"replay: the stage has moved {dx_px * self._target_um:.0f}, {dy_px * self._target_um:.0f} um "
                    f"from where replay started, beyond the recorded images ({covers}); move back or record a larger mosaic"
                )
            raise CameraError(
                f"replay images cover {covers} at the profile's pixel size, less than a {width}x{height} px frame; "
                "lower width_px/height_px in [camera] or check recorded_pixel_size_um"
            )
        if left_f == left and top_f == top:
            return image[top:top + height, left:left + width].copy()
        # A stage position between pixels: the frame is cut there, bicubic (OpenCV).
        shift = np.array([[1.0, 0.0, -left_f], [0.0, 1.0, -top_f]])
        return cv2.warpAffine(image, shift, (width, height), flags=cv2.INTER_CUBIC, borderMode=cv2.BORDER_REPLICATE)

    def _scan(self) -> None:
        files = list_images(self._folder)
        sizes = [image_size(p) for p in files]
        first = sizes[0]
        for path, size in zip(files, sizes):
            if size != first:
                raise CameraError(
                    f"replay folder {self._folder} mixes image sizes: {path.name} is {size[0]}x{size[1]} px "
                    f"but {files[0].name} is {first[0]}x{first[1]} px; use one size per folder"
                )
        self._files = files
        self._size = first
        with self._cache_lock:
            self._cache.clear()
            self._cached_bytes = 0
        self._dtype = None
        self._bit_depth = None
        self._pixels(0)

    def _pixels(self, index: int) -> np.ndarray:
        with self._cache_lock:
            cached = self._cache.get(index)
        if cached is not None:
            return cached
        path = self._files[index]
        pixels = decode_image(path)
        self._decodes += 1
        width, height = self._size or (0, 0)
        if pixels.shape != (height, width):
            raise CameraError(
                f"replay image {path} decodes to {pixels.shape[1]}x{pixels.shape[0]} px, not the "
                f"{width}x{height} px its folder uses; use one size per folder"
            )
        if self._opts.recorded_pixel_size_um is not None:
            assert self._target_um is not None
            pixels = resample_to_pixel_size(pixels, self._opts.recorded_pixel_size_um, self._target_um)
        pixels.setflags(write=False)
        with self._cache_lock:
            if self._dtype is None:
                self._dtype = pixels.dtype
                self._bit_depth = delivered_bit_depth(pixels, self._cfg.bit_depth)
            elif pixels.dtype != self._dtype:
                raise CameraError(
                    f"replay image {path} is {8 * pixels.dtype.itemsize}-bit but {self._files[0].name} is "
                    f"{8 * self._dtype.itemsize}-bit; use one bit depth per folder"
                )
            if index not in self._cache and self._cached_bytes + pixels.nbytes <= self._cache_limit:
                self._cache[index] = pixels
                self._cached_bytes += pixels.nbytes
        return pixels


def _stage_xy(motion: object) -> tuple[float, float] | None:
    where = getattr(motion, "describe")().get("position_um")
    return None if where is None else (float(where["x"]), float(where["y"]))


def open_camera(ctx: CameraContext) -> ReplayCamera:
    motion = ctx.stage.motion
    return ReplayCamera(
        ctx.profile.camera,
        ctx.clock,
        pixel_size_um=ctx.profile.optics.pixel_size_um,
        stage_position=lambda: _stage_xy(motion),
    )


DRIVER = CameraDriver(
    name="replay",
    summary="a folder of images played in a loop (demos, benchmarks, offline work)",
    options=ReplayOptions,
    open=open_camera,
)
