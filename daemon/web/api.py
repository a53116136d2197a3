"""The JSON API under ``/api/v1/``: routes, request checks, and errors as JSON.

Every error a client can cause comes back as ``{"error": {"status", "kind", "message"}}``
with a message a person can act on: 400 malformed request, 401 no or wrong token, 404
unknown thing, 409 the scope or time-lapse cannot do that now (and why), 413 body too
large, 422 a request the scope refuses (soft limits, a plan that does not fit), 429 too
many wrong tokens, 503 hardware trouble.
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import logging
import math
import re
from collections.abc import Awaitable, Callable
from pathlib import Path
from typing import Any

import cv2
import numpy as np
import tifffile
from aiohttp import web

from drivers.options import ConfigError
from daemon.culture.readings import plot_series
from daemon.illumination import CalibrationError
from daemon.web import API_PREFIX
from daemon.web.auth import VIEW_COOKIE, Authenticator
from daemon.web.checks import json_safe
from daemon.web.errors import BadRequest, Busy, NotFound
from daemon.web.keys import AUTH, METRICS, STATION
from daemon.web.stream import BOUNDARY, DEFAULT_QUALITY, MIN_WIDTH_PX, to_8bit
from daemon.web.views import latest_per_position
from drivers.base import HardwareError, LimitError

log = logging.getLogger(__name__)

routes = web.RouteTableDef()
MAX_BODY_BYTES = 64 * 1024
EXPORT_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]{0,200}$")
PREVIEW_WIDTH_PX = 480
READ_METHODS = ("GET", "HEAD", "OPTIONS")


# -- responses -------------------------------------------------------------------------


def json_response(data: Any, status: int = 200, headers: dict[str, str] | None = None) -> web.Response:
    return web.Response(
        text=json.dumps(json_safe(data), default=str), status=status, content_type="application/json",
        headers=headers,
    )


_KINDS = {
    400: "bad_request", 401: "unauthorized", 403: "forbidden", 404: "not_found", 405: "method_not_allowed",
    409: "conflict", 413: "too_large", 422: "refused", 429: "too_many_attempts", 500: "internal",
    503: "hardware",
}


def error_response(status: int, message: str, headers: dict[str, str] | None = None) -> web.Response:
    body = {"error": {"status": status, "kind": _KINDS.get(status, "error"), "message": message}}
    return json_response(body, status=status, headers=headers)


def config_message(exc: ConfigError) -> str:
    where = exc.option or exc.section or ""
    prefix = f"{exc.file}: " if exc.file not in ("", "plan") else ""
    return f"{prefix}{where}: {exc.problem}" if where else f"{prefix}{exc.problem}"


@web.middleware
async def error_middleware(
    request: web.Request, handler: Callable[[web.Request], Awaitable[web.StreamResponse]]
) -> web.StreamResponse:
    try:
        return await handler(request)
    except web.HTTPException as exc:
        if exc.status < 400:
            raise
        message = exc.text if exc.text and not exc.text.startswith(f"{exc.status}:") else exc.reason
        if exc.status == 413:
            message = f"request body too large: at most {MAX_BODY_BYTES // 1024} KiB"
        if exc.status == 405:
            message = f"{request.method} is not allowed on {request.path}"
        if exc.status == 404:
            message = f"no such resource: {request.path}; GET {API_PREFIX}/openapi.json lists the API"
        headers = {k: v for k, v in exc.headers.items() if k in ("Allow", "WWW-Authenticate", "Retry-After")}
        return error_response(exc.status, message, headers)
    except BadRequest as exc:
        return error_response(400, str(exc))
    except NotFound as exc:
        return error_response(404, str(exc))
    except Busy as exc:
        return error_response(409, str(exc))
    except LimitError as exc:
        return error_response(422, str(exc))
    except CalibrationError as exc:
        return error_response(422, str(exc))
    except ConfigError as exc:
        return error_response(422, config_message(exc))
    except HardwareError as exc:
        return error_response(503, f"hardware: {exc}")
    except asyncio.CancelledError:
        raise
    except ConnectionResetError:
        raise
    except Exception:
        log.exception("internal error on %s %s", request.method, request.path)
        return error_response(500, "internal error in the daemon; the log has the details")


def _client(request: web.Request) -> str:
    return request.remote or "unknown"


@web.middleware
async def auth_middleware(
    request: web.Request, handler: Callable[[web.Request], Awaitable[web.StreamResponse]]
) -> web.StreamResponse:
    """Bearer token for every change; token or view cookie for viewing unless anonymous viewing is on."""
    path = request.path
    if not (path.startswith("/api/") or path == "/metrics") or path == f"{API_PREFIX}/openapi.json":
        return await handler(request)
    auth: Authenticator = request.app[AUTH]
    client = _client(request)
    wait_s = auth.limiter.blocked_for_s(client)
    if wait_s > 0:
        raise web.HTTPTooManyRequests(
            text=f"too many wrong tokens from {client}; try again in {math.ceil(wait_s)} s",
            headers={"Retry-After": str(math.ceil(wait_s))},
        )
    bearer = auth.check_bearer(request.headers.get("Authorization"))
    reading = request.method in READ_METHODS
    # A wrong view cookie (left over from an old token) is no credential, not a guess:
    # only wrong tokens count towards the lock-out.
    cookie = reading and bool(auth.check_cookie(request.cookies.get(VIEW_COOKIE)))
    if bearer is False:
        auth.limiter.fail(client)
        request.app[METRICS].auth_failures.inc()
        raise web.HTTPUnauthorized(
            text="wrong access token; the token is printed by: phasewatch token --data DIR",
            headers={"WWW-Authenticate": 'Bearer realm="phasewatch", error="invalid_token"'},
        )
    if bearer or (reading and (cookie or auth.anonymous_viewing)):
        return await handler(request)
    request.app[METRICS].auth_failures.inc()
    what = "viewing needs" if reading else "changes need"
    raise web.HTTPUnauthorized(
        text=f"{what} the access token: send 'Authorization: Bearer <token>' (phasewatch token --data DIR prints it)",
        headers={"WWW-Authenticate": 'Bearer realm="phasewatch"'},
    )


# -- request helpers -------------------------------------------------------------------


async def read_json(request: web.Request) -> dict[str, Any]:
    raw = await request.read()  # bounded by the application's client_max_size (413 beyond)
    if not raw.strip():
        return {}
    try:
        body = json.loads(raw)
    except (UnicodeDecodeError, ValueError) as exc:
        raise BadRequest(f"the request body is not valid JSON ({exc})") from None
    if not isinstance(body, dict):
        raise BadRequest(f"the request body must be a JSON object {{...}}, got {type(body).__name__}")
    return body


def int_param(request: web.Request, name: str, default: int | None, lo: int, hi: int) -> int | None:
    text = request.query.get(name)
    if text is None or text == "":
        return default
    try:
        value = int(text)
    except ValueError:
        raise BadRequest(f"query parameter '{name}' must be a whole number from {lo} to {hi}, got {text!r}") from None
    if not lo <= value <= hi:
        raise BadRequest(f"query parameter '{name}' must be from {lo} to {hi}, got {value}")
    return value


def float_param(request: web.Request, name: str, lo: float, hi: float) -> float | None:
    text = request.query.get(name)
    if text is None or text == "":
        return None
    try:
        value = float(text)
    except ValueError:
        raise BadRequest(f"query parameter '{name}' must be a number from {lo:g} to {hi:g}, got {text!r}") from None
    if not (math.isfinite(value) and lo <= value <= hi):
        raise BadRequest(f"query parameter '{name}' must be from {lo:g} to {hi:g}, got {text}")
    return value


MAX_ID = 2**31 - 1  # ids are SQLite row ids; anything larger names nothing


def tl_id_of(request: web.Request) -> int:
    text = request.match_info["id"]
    if len(text) > 10 or int(text) > MAX_ID:
        raise NotFound(f"no time-lapse {text}; GET {API_PREFIX}/timelapses lists them")
    return int(text)


def inside(root: Path, rel: str) -> Path:
    """``root / rel`` resolved, refused unless it stays inside ``root`` (no way out of the data folder)."""
    base = root.resolve()
    path = (base / rel).resolve()
    if not path.is_relative_to(base) or path == base:
        raise NotFound("no such file in the data folder")
    return path


# -- status and live view --------------------------------------------------------------


@routes.get(f"{API_PREFIX}/status")
async def get_status(request: web.Request) -> web.Response:
    return json_response(request.app[STATION].status())


@routes.get(f"{API_PREFIX}/frame.jpg")
async def get_frame(request: web.Request) -> web.Response:
    station = request.app[STATION]
    width = int_param(request, "width", None, MIN_WIDTH_PX, 8192)
    quality = int_param(request, "quality", DEFAULT_QUALITY, 10, 95)
    frame = await station.live.latest()
    if frame is None:
        why = station.live.last_error or "the camera has given no frame yet"
        raise HardwareError(f"no frame to show: {why}")
    body = await station.live.jpeg(frame, width, quality or DEFAULT_QUALITY)
    return web.Response(body=body, content_type="image/jpeg", headers={
        "Cache-Control": "no-store", "X-Frame-Source": frame.source, "X-Frame-Seq": str(frame.seq),
        "X-Frame-Time": f"{frame.t_s:.3f}",
    })


@routes.get(f"{API_PREFIX}/stream.mjpeg")
async def get_stream(request: web.Request) -> web.StreamResponse:
    """Multipart MJPEG: at most ``fps`` frames a second, optionally ``width`` px wide, ``frames`` in all."""
    station = request.app[STATION]
    live = station.live
    fps = live.clamp_fps(float_param(request, "fps", 0.1, 1000.0))
    width = int_param(request, "width", None, MIN_WIDTH_PX, 8192)
    quality = int_param(request, "quality", DEFAULT_QUALITY, 10, 95) or DEFAULT_QUALITY
    limit = int_param(request, "frames", None, 1, 1_000_000)
    resp = web.StreamResponse(headers={
        "Content-Type": f"multipart/x-mixed-replace; boundary={BOUNDARY}",
        "Cache-Control": "no-store", "X-Frame-Rate-Cap": f"{fps:g}",
    })
    await resp.prepare(request)
    loop = asyncio.get_running_loop()
    sent, last_seq, next_at = 0, 0, 0.0
    try:
        async with live.watching(fps):
            while limit is None or sent < limit:
                frame = await live.next_frame(last_seq, timeout_s=5.0)
                if live.closed:
                    break
                if frame is None:
                    continue
                wait = next_at - loop.time()
                if wait > 0:
                    await asyncio.sleep(wait)
                    frame = live.frame or frame  # send the newest, not the one that woke us
                jpeg = await live.jpeg(frame, width, quality)
                head = (
                    f"--{BOUNDARY}\r\nContent-Type: image/jpeg\r\nContent-Length: {len(jpeg)}\r\n"
                    f"X-Frame-Source: {frame.source}\r\nX-Frame-Seq: {frame.seq}\r\nX-Frame-Time: {frame.t_s:.3f}\r\n"
                    f"X-Frame-Wall: {frame.wall_s:.4f}\r\n\r\n"
                )
                await resp.write(head.encode("latin-1") + jpeg + b"\r\n")
                sent += 1
                last_seq = frame.seq
                next_at = loop.time() + 1.0 / fps
    except (ConnectionResetError, HardwareError):
        return resp
    with contextlib.suppress(ConnectionResetError, RuntimeError):  # the client may be gone already
        await resp.write(f"--{BOUNDARY}--\r\n".encode())
        await resp.write_eof()
    return resp


# -- manual control --------------------------------------------------------------------


@routes.post(f"{API_PREFIX}/stage/move")
async def post_move(request: web.Request) -> web.Response:
    body = await read_json(request)
    return json_response(await request.app[STATION].move(body))


@routes.post(f"{API_PREFIX}/focus/auto")
async def post_autofocus(request: web.Request) -> web.Response:
    body = await read_json(request)
    return json_response(await request.app[STATION].autofocus(body))


# -- calibration -----------------------------------------------------------------------


@routes.get(f"{API_PREFIX}/calibration")
async def get_calibration(request: web.Request) -> web.Response:
    station = request.app[STATION]
    return json_response({"frames": await asyncio.to_thread(station.calibrations)})


@routes.post(f"{API_PREFIX}/calibration/dark")
async def post_dark(request: web.Request) -> web.Response:
    body = await read_json(request)
    return json_response(await request.app[STATION].calibrate("dark", body), status=201)


@routes.post(f"{API_PREFIX}/calibration/flat")
async def post_flat(request: web.Request) -> web.Response:
    body = await read_json(request)
    return json_response(await request.app[STATION].calibrate("flat", body), status=201)


# -- plans and time-lapses -------------------------------------------------------------


@routes.get(f"{API_PREFIX}/plans/demo")
async def get_demo_plan(request: web.Request) -> web.Response:
    station = request.app[STATION]
    plan = station.demo_plan()
    return json_response({"plan": plan, **(await station.check_plan(plan))})


@routes.post(f"{API_PREFIX}/plans/check")
async def post_check_plan(request: web.Request) -> web.Response:
    body = await read_json(request)
    return json_response(await request.app[STATION].check_plan(body))


@routes.get(f"{API_PREFIX}/timelapses")
async def get_timelapses(request: web.Request) -> web.Response:
    station = request.app[STATION]
    return json_response({"timelapses": await asyncio.to_thread(station.timelapse_list),
                          "active": station.active_summary()})


@routes.post(f"{API_PREFIX}/timelapses")
async def post_timelapse(request: web.Request) -> web.Response:
    body = await read_json(request)
    if not body:
        raise BadRequest("send a plan: a JSON object with name, vessel, wells, interval_s and count or duration_s")
    out = await request.app[STATION].start_timelapse(body)
    return json_response(out, status=201, headers={"Location": f"{API_PREFIX}/timelapses/{out['id']}"})


@routes.get(r"/api/v1/timelapses/{id:\d+}")
async def get_timelapse(request: web.Request) -> web.Response:
    station = request.app[STATION]
    return json_response(await asyncio.to_thread(station.timelapse_detail, tl_id_of(request)))


async def _control(request: web.Request, action: str) -> web.Response:
    await read_json(request)  # no options yet, but a malformed body is still an error
    done, state = await request.app[STATION].request(tl_id_of(request), action)
    if done:
        return json_response({**state, "message": f"time-lapse {state['id']} is {state['state']}"})
    return json_response(
        {**state, "message": f"{action} requested; it takes effect after the position being imaged"}, status=202
    )


@routes.post(r"/api/v1/timelapses/{id:\d+}/pause")
async def post_pause(request: web.Request) -> web.Response:
    return await _control(request, "pause")


@routes.post(r"/api/v1/timelapses/{id:\d+}/resume")
async def post_resume(request: web.Request) -> web.Response:
    return await _control(request, "resume")


@routes.post(r"/api/v1/timelapses/{id:\d+}/abort")
async def post_abort(request: web.Request) -> web.Response:
    return await _control(request, "abort")


@routes.get(r"/api/v1/timelapses/{id:\d+}/frames")
async def get_frames(request: web.Request) -> web.Response:
    station = request.app[STATION]
    tl_id = tl_id_of(request)
    limit = int_param(request, "limit", 200, 1, 1000) or 200
    offset = int_param(request, "offset", 0, 0, 10**9) or 0
    tp = int_param(request, "tp", None, 0, 10**9)
    position = request.query.get("position")

    def pick() -> dict[str, Any]:
        station.require_timelapse(tl_id)
        rows = station.index.frames(tl_id)
        if tp is not None:
            rows = [r for r in rows if r["tp"] == tp]
        if position:
            rows = [r for r in rows if r["key"] == position]
        page = rows[offset:offset + limit]
        for r in page:
            r["download"] = f"{API_PREFIX}/timelapses/{tl_id}/frames/{r['id']}"
            r["preview"] = f"{API_PREFIX}/timelapses/{tl_id}/frames/{r['id']}/preview.jpg"
        return {"total": len(rows), "offset": offset, "frames": page}

    return json_response(await asyncio.to_thread(pick))


def _frame_row(station: Any, tl_id: int, frame_id: int) -> dict[str, Any]:
    station.require_timelapse(tl_id)
    for r in station.index.frames(tl_id):
        if r["id"] == frame_id:
            return r
    raise NotFound(f"time-lapse {tl_id} has no frame {frame_id}")


def _frame_id(request: web.Request) -> int:
    text = request.match_info["frame_id"]
    if len(text) > 10 or int(text) > MAX_ID:
        raise NotFound(f"no frame {text}")
    return int(text)


@routes.get(r"/api/v1/timelapses/{id:\d+}/frames/{frame_id:\d+}")
async def get_frame_file(request: web.Request) -> web.StreamResponse:
    station = request.app[STATION]
    row = await asyncio.to_thread(_frame_row, station, tl_id_of(request), _frame_id(request))
    path = inside(station.data_dir, row["path"])
    if not path.is_file():
        raise NotFound(f"frame {row['id']} is indexed but its file {row['path']} is missing (status {row['status']})")
    return web.FileResponse(path, headers={
        "Content-Type": "image/tiff", "Content-Disposition": f'attachment; filename="{path.name}"',
    })


def preview_jpeg(path: Path, bit_depth: int, width_px: int) -> bytes:
    pixels = tifffile.imread(path)
    img = to_8bit(np.asarray(pixels), bit_depth)
    if img.ndim != 2:
        img = img.reshape(img.shape[-2:]) if img.size == img.shape[-1] * img.shape[-2] else img[..., 0]
    h, w = img.shape
    if width_px < w:
        img = cv2.resize(img, (width_px, max(1, round(h * width_px / w))), interpolation=cv2.INTER_AREA)
    ok, buf = cv2.imencode(".jpg", img, [cv2.IMWRITE_JPEG_QUALITY, DEFAULT_QUALITY])
    if not ok:
        raise ValueError("JPEG encoding failed")
    return buf.tobytes()


@routes.get(r"/api/v1/timelapses/{id:\d+}/frames/{frame_id:\d+}/preview.jpg")
async def get_frame_preview(request: web.Request) -> web.Response:
    station = request.app[STATION]
    width = int_param(request, "width", PREVIEW_WIDTH_PX, MIN_WIDTH_PX, 8192) or PREVIEW_WIDTH_PX
    row = await asyncio.to_thread(_frame_row, station, tl_id_of(request), _frame_id(request))
    path = inside(station.data_dir, row["path"])
    if not path.is_file():
        raise NotFound(f"frame {row['id']} is indexed but its file {row['path']} is missing")
    try:
        body = await asyncio.to_thread(preview_jpeg, path, row["bit_depth"], width)
    except (OSError, ValueError, tifffile.TiffFileError) as exc:
        raise NotFound(f"frame {row['id']} cannot be read ({exc}); the start-up check will mark it") from None
    return web.Response(body=body, content_type="image/jpeg", headers={"Cache-Control": "max-age=3600"})


@routes.get(r"/api/v1/timelapses/{id:\d+}/latest")
async def get_latest(request: web.Request) -> web.Response:
    station = request.app[STATION]
    tl_id = tl_id_of(request)

    def pick() -> dict[str, Any]:
        station.require_timelapse(tl_id)
        rows = latest_per_position(station.index.frames(tl_id))
        for r in rows:
            r["preview"] = f"{API_PREFIX}/timelapses/{tl_id}/frames/{r['id']}/preview.jpg"
        return {"positions": rows}

    return json_response(await asyncio.to_thread(pick))


@routes.get(r"/api/v1/timelapses/{id:\d+}/series")
async def get_series(request: web.Request) -> web.Response:
    station = request.app[STATION]
    tl_id = tl_id_of(request)

    def build() -> dict[str, Any]:
        row = station.require_timelapse(tl_id)
        return {"id": tl_id, "t0_s": row["t0_s"], **plot_series(station.index, tl_id)}

    return json_response(await asyncio.to_thread(build))


# -- exports ---------------------------------------------------------------------------


def _export_dir(station: Any, tl_id: int) -> Path:
    from daemon.storage.export import default_export_dir

    station.require_timelapse(tl_id)
    return default_export_dir(station.data_dir, station.index, tl_id)


def _list_exports(folder: Path, tl_id: int) -> list[dict[str, Any]]:
    if not folder.is_dir():
        return []
    return [
        {"name": p.name, "bytes": p.stat().st_size, "download": f"{API_PREFIX}/timelapses/{tl_id}/exports/{p.name}"}
        for p in sorted(folder.iterdir()) if p.is_file() and not p.name.startswith(".") and not p.is_symlink()
    ]


@routes.post(r"/api/v1/timelapses/{id:\d+}/exports")
async def post_export(request: web.Request) -> web.Response:
    from daemon.storage.export import export_csv, export_stacks

    await read_json(request)
    station = request.app[STATION]
    tl_id = tl_id_of(request)

    def run() -> dict[str, Any]:
        folder = _export_dir(station, tl_id)
        export_csv(station.index, tl_id, folder)
        stacks = export_stacks(station.index, station.data_dir, tl_id, folder) if station.index.frames(tl_id) else []
        return {
            "files": _list_exports(folder, tl_id),
            "stacks": [{"position": s.position, "time_points": s.time_points, "z_planes": s.z_planes,
                        "skipped_time_points": s.skipped_time_points} for s in stacks],
        }

    return json_response(await asyncio.to_thread(run), status=201)


@routes.get(r"/api/v1/timelapses/{id:\d+}/exports")
async def get_exports(request: web.Request) -> web.Response:
    station = request.app[STATION]
    tl_id = tl_id_of(request)
    files = await asyncio.to_thread(lambda: _list_exports(_export_dir(station, tl_id), tl_id))
    return json_response({"files": files})


@routes.get(r"/api/v1/timelapses/{id:\d+}/exports/{name}")
async def get_export_file(request: web.Request) -> web.StreamResponse:
    station = request.app[STATION]
    tl_id = tl_id_of(request)
    name = request.match_info["name"]
    if not EXPORT_NAME.match(name) or ".." in name:
        raise NotFound(f"no export called {name!r}; GET {API_PREFIX}/timelapses/{tl_id}/exports lists them")
    folder = await asyncio.to_thread(_export_dir, station, tl_id)
    path = inside(folder, name)
    if path.parent != folder.resolve() or not path.is_file() or (folder / name).is_symlink():
        raise NotFound(f"no export called {name!r}; POST {API_PREFIX}/timelapses/{tl_id}/exports makes them")
    kind = "text/csv" if path.suffix == ".csv" else "image/tiff" if path.suffix in (".tif", ".tiff") else "application/octet-stream"
    return web.FileResponse(path, headers={"Content-Type": kind, "Content-Disposition": f'attachment; filename="{path.name}"'})


# -- alerts, session -------------------------------------------------------------------


@routes.get(f"{API_PREFIX}/alerts")
async def get_alerts(request: web.Request) -> web.Response:
    station = request.app[STATION]
    limit = int_param(request, "limit", 100, 1, 1000) or 100
    rows = await asyncio.to_thread(station.index.alerts)
    return json_response({"alerts": rows[-limit:]})


@routes.post(f"{API_PREFIX}/session")
async def post_session(request: web.Request) -> web.Response:
    """Swap the token for a view cookie, so that <img> and WebSocket requests can view."""
    await read_json(request)
    resp = json_response({"viewing": True, "message": "this browser may now view; changes still need the token"})
    resp.set_cookie(VIEW_COOKIE, request.app[AUTH].cookie_value, httponly=True, samesite="Strict", path="/")
    return resp
