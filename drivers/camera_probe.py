"""What a camera offers, for ``phasewatch check --probe``: formats and frame sizes, whether
exposure and gain can be set by hand, and whether automatic exposure and automatic white
balance can be switched off (a time-lapse needs both off, or brightness and colour drift
between time points).

* **V4L2 cameras** (USB/UVC, :mod:`drivers.camera_opencv`) are asked with ``v4l2-ctl``
  from v4l-utils: ``--list-formats-ext`` for formats, sizes and frame rates and
  ``--list-ctrls-menus`` for the controls, parsed here (:func:`parse_v4l2_formats`,
  :func:`parse_v4l2_controls`). Both the older control names (``exposure_auto``,
  ``exposure_absolute``, ``white_balance_temperature_auto``) and the newer ones
  (``auto_exposure``, ``exposure_time_absolute``, ``white_balance_automatic``) are read.
  Automatic exposure is a menu whose item 1 is manual (``V4L2_EXPOSURE_MANUAL``); a
  camera whose menu lacks it cannot leave automatic exposure.
* **Board cameras** (:mod:`drivers.camera_board`) report through the camera library:
  its control table (``AeEnable``, ``AwbEnable``, ``ExposureTime``, ``AnalogueGain``)
  and its sensor modes (:func:`board_offer`).

Everything is reported as a :class:`CameraOffer`; :func:`profile_warnings` adds what the
profile asks for and the camera does not offer.
"""

from __future__ import annotations

import dataclasses
import re
import shutil
import subprocess
from collections.abc import Mapping, Sequence
from typing import Any

V4L2_CTL = "v4l2-ctl"
V4L2_EXPOSURE_MANUAL = 1  # enum v4l2_exposure_auto_type
_TIMEOUT_S = 10.0

AUTO_EXPOSURE = ("auto_exposure", "exposure_auto")
EXPOSURE = ("exposure_time_absolute", "exposure_absolute", "exposure")
GAIN = ("gain", "analogue_gain")
AUTO_GAIN = ("gain_automatic", "autogain", "auto_gain")
AUTO_WHITE_BALANCE = ("white_balance_automatic", "white_balance_temperature_auto", "auto_white_balance")
DEEP_FORMATS = ("Y16 ", "Y16", "Y10 ", "Y10", "Y12 ", "Y12", "Y10P", "Y12P")


@dataclasses.dataclass(frozen=True)
class FrameSize:
    width_px: int
    height_px: int
    fps: tuple[float, ...] = ()
    kind: str = "discrete"  # or "stepwise"/"continuous": any size from width x height up to max
    max_width_px: int | None = None
    max_height_px: int | None = None

    def allows(self, width_px: int, height_px: int) -> bool:
        if self.kind == "discrete":
            return (width_px, height_px) == (self.width_px, self.height_px)
        assert self.max_width_px is not None and self.max_height_px is not None
        return self.width_px <= width_px <= self.max_width_px and self.height_px <= height_px <= self.max_height_px


@dataclasses.dataclass(frozen=True)
class PixelFormat:
    fourcc: str
    description: str
    sizes: tuple[FrameSize, ...]


@dataclasses.dataclass(frozen=True)
class Control:
    name: str
    type: str                      # int, bool, menu, intmenu, ...
    minimum: float | None = None
    maximum: float | None = None
    step: float | None = None
    default: float | None = None
    value: float | None = None
    flags: tuple[str, ...] = ()
    menu: dict[int, str] = dataclasses.field(default_factory=dict)

    @property
    def settable(self) -> bool:
        return not ({"read-only", "disabled", "grabbed"} & set(self.flags))


@dataclasses.dataclass
class CameraOffer:
    source: str                                  # how it was found ("v4l2-ctl", "camera library")
    formats: list[PixelFormat]
    manual_exposure: bool
    manual_gain: bool
    auto_exposure_can_be_off: bool | None        # None: the camera has no automatic exposure
    auto_white_balance_can_be_off: bool | None   # None: no automatic white balance (mono, fixed)
    controls: dict[str, Control]
    warnings: list[str]

    def as_dict(self) -> dict[str, object]:
        return {
            "source": self.source,
            "formats": [
                {
                    "fourcc": f.fourcc.strip(),
                    "description": f.description,
                    "sizes": [_size_text(s) for s in f.sizes],
                }
                for f in self.formats
            ],
            "manual_exposure": self.manual_exposure,
            "manual_gain": self.manual_gain,
            "auto_exposure_can_be_off": self.auto_exposure_can_be_off,
            "auto_white_balance_can_be_off": self.auto_white_balance_can_be_off,
            "warnings": list(self.warnings),
        }


def _size_text(size: FrameSize) -> str:
    if size.kind != "discrete":
        return f"{size.width_px}x{size.height_px} to {size.max_width_px}x{size.max_height_px} ({size.kind})"
    rates = "/".join(f"{r:g}" for r in size.fps)
    return f"{size.width_px}x{size.height_px}" + (f" @ {rates} fps" if rates else "")


# ------------------------------------------------------------------- v4l2-ctl

_FORMAT_NEW = re.compile(r"^\s*\[(\d+)\]:\s*'(.{1,4})'\s*\((.*)\)\s*$")
_FORMAT_OLD = re.compile(r"^\s*Pixel Format\s*:\s*'(.{1,4})'(?:\s*\((.*)\))?\s*$")
_NAME_OLD = re.compile(r"^\s*Name\s*:\s*(.*?)\s*$")
_SIZE_DISCRETE = re.compile(r"^\s*Size:\s*Discrete\s+(\d+)x(\d+)\s*$")
_SIZE_RANGE = re.compile(r"^\s*Size:\s*(Stepwise|Continuous)\s+(\d+)x(\d+)\s*-\s*(\d+)x(\d+)")
_INTERVAL = re.compile(r"^\s*Interval:\s*\w+\s+[\d.]+s\s*\(([\d.]+)\s*fps\)")
_CONTROL = re.compile(r"^\s*([a-z0-9_]+)\s+0x[0-9a-f]+\s+\((\w+)\)\s*:\s*(.*?)\s*$")
_MENU_ITEM = re.compile(r"^\s*(-?\d+):\s*(.*?)\s*$")
_KEY_VALUE = re.compile(r"(\w+)=(\S+)")


def parse_v4l2_formats(text: str) -> list[PixelFormat]:
    """Formats, frame sizes and rates from ``v4l2-ctl --list-formats-ext`` (old and new layouts)."""
    formats: list[tuple[str, str, list[FrameSize]]] = []
    size: list[Any] | None = None  # [w, h, fps list, kind, max w, max h]

    def close_size() -> None:
        nonlocal size
        if size is not None and formats:
            w, h, fps, kind, mw, mh = size
            formats[-1][2].append(FrameSize(w, h, tuple(fps), kind, mw, mh))
        size = None

    for line in text.splitlines():
        m = _FORMAT_NEW.match(line)
        if m:
            close_size()
            formats.append((m.group(2), m.group(3).strip(), []))
            continue
        m = _FORMAT_OLD.match(line)
        if m:
            close_size()
            formats.append((m.group(1), (m.group(2) or "").strip(), []))
            continue
        m = _NAME_OLD.match(line)
        if m and formats:
            # The older layout names the format on its own line; a flag may stand in brackets.
            fourcc, flag, sizes = formats[-1]
            formats[-1] = (fourcc, f"{m.group(1)}, {flag}" if flag else m.group(1), sizes)
            continue
        m = _SIZE_DISCRETE.match(line)
        if m:
            close_size()
            size = [int(m.group(1)), int(m.group(2)), [], "discrete", None, None]
            continue
        m = _SIZE_RANGE.match(line)
        if m:
            close_size()
            size = [int(m.group(2)), int(m.group(3)), [], m.group(1).lower(), int(m.group(4)), int(m.group(5))]
            continue
        m = _INTERVAL.match(line)
        if m and size is not None:
            size[2].append(float(m.group(1)))
    close_size()
    return [PixelFormat(fourcc, description, tuple(sizes)) for fourcc, description, sizes in formats]


def _number(text: str) -> float | None:
    try:
        return float(int(text, 0)) if re.fullmatch(r"-?(0x[0-9a-fA-F]+|\d+)", text) else float(text)
    except ValueError:
        return None


def parse_v4l2_controls(text: str) -> dict[str, Control]:
    """The controls from ``v4l2-ctl --list-ctrls-menus`` (menus with their items)."""
    controls: dict[str, Control] = {}
    last: str | None = None
    for line in text.splitlines():
        m = _CONTROL.match(line)
        if m:
            name, kind, rest = m.group(1), m.group(2), m.group(3)
            values = dict(_KEY_VALUE.findall(rest.split("flags=", 1)[0]))
            flags: tuple[str, ...] = ()
            if "flags=" in rest:
                flags = tuple(f.strip() for f in rest.split("flags=", 1)[1].split(",") if f.strip())
            controls[name] = Control(
                name=name,
                type=kind,
                minimum=_number(values.get("min", "")),
                maximum=_number(values.get("max", "")),
                step=_number(values.get("step", "")),
                default=_number(values.get("default", "")),
                value=_number(values.get("value", "")),
                flags=flags,
            )
            last = name if kind in ("menu", "intmenu") else None
            continue
        m = _MENU_ITEM.match(line)
        if m and last is not None and line.startswith(("\t", "    ")):
            controls[last].menu[int(m.group(1))] = m.group(2)
            continue
        if line.strip():
            last = None
    return controls


def _first(controls: Mapping[str, Control], names: Sequence[str]) -> Control | None:
    for name in names:
        if name in controls:
            return controls[name]
    return None


def v4l2_offer(formats_text: str, controls_text: str) -> CameraOffer:
    """What a V4L2 camera offers, from the two ``v4l2-ctl`` listings."""
    formats = parse_v4l2_formats(formats_text)
    controls = parse_v4l2_controls(controls_text)
    warnings: list[str] = []
    auto_exposure = _first(controls, AUTO_EXPOSURE)
    exposure = _first(controls, EXPOSURE)
    gain = _first(controls, GAIN)
    auto_gain = _first(controls, AUTO_GAIN)
    awb = _first(controls, AUTO_WHITE_BALANCE)

    ae_off: bool | None = None
    if auto_exposure is not None:
        if auto_exposure.type in ("menu", "intmenu"):
            ae_off = auto_exposure.settable and V4L2_EXPOSURE_MANUAL in auto_exposure.menu
        else:
            ae_off = auto_exposure.settable
        if not ae_off:
            offered = ", ".join(auto_exposure.menu.values()) or "nothing settable"
            warnings.append(
                f"automatic exposure cannot be turned off ({auto_exposure.name} offers: {offered}); "
                "brightness will drift between time points"
            )
    manual_exposure = exposure is not None and exposure.settable and ae_off is not False
    if exposure is None:
        warnings.append("no exposure control: exposure_ms in [camera] cannot be applied")

    gain_off = auto_gain is None or (auto_gain.settable and (auto_gain.minimum in (None, 0.0)))
    manual_gain = gain is not None and gain.settable and gain_off
    if auto_gain is not None and not gain_off:
        warnings.append(f"automatic gain cannot be turned off ({auto_gain.name})")
    if gain is None:
        warnings.append("no gain control: gain_db in [camera] cannot be applied")

    awb_off: bool | None = None
    if awb is not None:
        awb_off = awb.settable and (awb.minimum in (None, 0.0))
        if not awb_off:
            warnings.append(
                f"automatic white balance cannot be turned off ({awb.name}); colour and, through it, "
                "brightness will drift between time points"
            )
    return CameraOffer(
        source=V4L2_CTL,
        formats=formats,
        manual_exposure=manual_exposure,
        manual_gain=manual_gain,
        auto_exposure_can_be_off=ae_off,
        auto_white_balance_can_be_off=awb_off,
        controls=controls,
        warnings=warnings,
    )


def v4l2_device_path(device: str) -> str:
    """``/dev/videoN`` for an OpenCV index ``"N"``; a path as it is."""
    text = device.strip()
    return f"/dev/video{text}" if text.isdigit() else text


def run_v4l2_ctl(device: str) -> tuple[str, str] | str:
    """The two listings for ``device``, or a one-line reason why they could not be had."""
    tool = shutil.which(V4L2_CTL)
    if tool is None:
        return f"{V4L2_CTL} not found: install v4l-utils for the full camera report"
    path = v4l2_device_path(device)
    outputs = []
    for what in ("--list-formats-ext", "--list-ctrls-menus"):
        try:
            done = subprocess.run(
                [tool, "-d", path, what], capture_output=True, text=True, timeout=_TIMEOUT_S, check=False
            )
        except (OSError, subprocess.TimeoutExpired) as exc:
            return f"{V4L2_CTL} {what} on {path} failed ({exc})"
        if done.returncode != 0:
            reason = (done.stderr.strip().splitlines() or ["no output"])[-1]
            return f"{V4L2_CTL} {what} on {path} failed: {reason}"
        outputs.append(done.stdout)
    return outputs[0], outputs[1]


# ------------------------------------------------------------- board cameras


def board_offer(camera_controls: Mapping[str, Any], sensor_modes: Sequence[Mapping[str, Any]]) -> CameraOffer:
    """What a board camera offers, from the camera library's control table and sensor modes.

    ``camera_controls`` maps a control name to ``(min, max, default)``; each sensor mode
    has ``format``, ``size`` (w, h), and optionally ``fps`` and ``bit_depth``.
    """
    by_format: dict[str, list[FrameSize]] = {}
    depth: dict[str, int] = {}
    for mode in sensor_modes:
        fmt = str(mode.get("format", "?"))
        w, h = (int(v) for v in mode.get("size", (0, 0)))
        fps = (float(mode["fps"]),) if "fps" in mode else ()
        by_format.setdefault(fmt, []).append(FrameSize(w, h, fps))
        if "bit_depth" in mode:
            depth[fmt] = int(mode["bit_depth"])
    formats = [
        PixelFormat(fmt, f"{depth[fmt]}-bit sensor mode" if fmt in depth else "sensor mode", tuple(sizes))
        for fmt, sizes in by_format.items()
    ]
    controls = {
        name: Control(name, "range", *(float(v) if isinstance(v, (int, float)) else None for v in tuple(limits)[:2]))
        for name, limits in camera_controls.items()
    }
    warnings: list[str] = []
    ae_off: bool | None = True if "AeEnable" in camera_controls else None
    awb_off: bool | None = True if "AwbEnable" in camera_controls else None
    manual_exposure = "ExposureTime" in camera_controls
    manual_gain = "AnalogueGain" in camera_controls
    if not manual_exposure:
        warnings.append("no ExposureTime control: exposure_ms in [camera] cannot be applied")
    if not manual_gain:
        warnings.append("no AnalogueGain control: gain_db in [camera] cannot be applied")
    if "ColourGains" in camera_controls and awb_off is None:
        awb_off = False
        warnings.append("colour gains but no AwbEnable: automatic white balance cannot be turned off")
    return CameraOffer(
        source="camera library",
        formats=formats,
        manual_exposure=manual_exposure,
        manual_gain=manual_gain,
        auto_exposure_can_be_off=ae_off,
        auto_white_balance_can_be_off=awb_off,
        controls=controls,
        warnings=warnings,
    )


def profile_warnings(
    offer: CameraOffer, *, width_px: int, height_px: int, bit_depth: int, scaled: bool = False
) -> list[str]:
    """What ``[camera]`` asks for that the camera does not offer (empty when nothing is listed).

    ``scaled``: the camera scales its sensor modes to any frame size (board cameras), so
    the size is not checked against them.
    """
    if not offer.formats:
        return []
    warnings = []
    if not scaled and not any(size.allows(width_px, height_px) for f in offer.formats for size in f.sizes):
        sizes = sorted({(s.width_px, s.height_px) for f in offer.formats for s in f.sizes if s.kind == "discrete"})
        listed = ", ".join(f"{w}x{h}" for w, h in sizes[-6:])
        warnings.append(
            f"no format offers {width_px}x{height_px} px (width_px/height_px in [camera]); offered: {listed}"
        )
    if bit_depth > 8 and not any(f.fourcc in DEEP_FORMATS for f in offer.formats):
        warnings.append(
            f"bit_depth = {bit_depth} in [camera] but the camera offers no deep grey format (Y10/Y12/Y16): "
            "frames will be 8-bit"
        )
    return warnings
