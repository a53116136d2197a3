"""The JSON API under ``/api/v1/``: routes, and errors as JSON.

Handlers only translate HTTP: each parses its body and query string into the request
dataclass it declares with :func:`takes` (through the profile loader's strict rules,
:mod:`daemon.requests`), calls one :class:`~daemon.station.Station` method and writes its
typed result as JSON. The OpenAPI document names the same dataclasses, and
``tests/test_web_openapi.py`` checks that each route documents the request it parses.

Every error a client can cause comes back as ``{"error": {"status", "kind", "message"}}``
with a message a person can act on: 400 malformed request, 401 no or wrong token, 404
unknown thing, 409 the scope or time-lapse cannot do that now (and why), 413 body too
large, 422 a request the scope refuses (soft limits, a plan that does not fit), 429 too
many wrong tokens, 503 hardware trouble or too many live viewers, 507 not enough space on
the disk for what was asked.
"""

from __future__ import annotations

import asyncio
import contextlib
import dataclasses
import functools
import json
import logging
import math
import socket
from collections.abc import Awaitable, Callable
from typing import Any

from aiohttp import web

from daemon.archive import MAX_ID, AlertsQuery, ExportFile, ExportRequest, FramesQuery, MovieQuery, PreviewQuery
from daemon.errors import BadRequest, Busy, Damaged, NoSpace, NotFound
from daemon.focus.autofocus import AutofocusRequest
from daemon.illumination import CalibrationError
from daemon.illumination.acquire import DarkRequest, FlatRequest
from daemon.live import ImageQuery, LiveViewFull, StreamQuery
from daemon.manual import MoveRequest
from daemon.requests import parse_request, parse_text_request
from daemon.station import ControlRequest, plan_request
from daemon.timelapse.plan import PlanOptions
from daemon.web import API_PREFIX
from daemon.web.auth import VIEW_COOKIE, Authenticator, SessionRequest
from daemon.web.checks import json_safe
from daemon.web.keys import AUTH, METRICS, STATION
from drivers.base import HardwareError, LimitError
from drivers.options import ConfigError

log = logging.getLogger(__name__)

routes = web.RouteTableDef()
MAX_BODY_BYTES = 64 * 1024
READ_METHODS = ("GET", "HEAD", "OPTIONS")
BOUNDARY = "phasewatchframe"


# -- responses -------------------------------------------------------------------------


def json_response(data: Any, status: int = 200, headers: dict[str, str] | None = None) -> web.Response:
    return web.Response(
        text=json.dumps(json_safe(data), default=str), status=status, content_type="application/json",
        headers=headers,
    )


_KINDS = {
    400: "bad_request", 401: "unauthorized", 403: "forbidden", 404: "not_found", 405: "method_not_allowed",
    409: "conflict", 413: "too_large", 422: "refused", 429: "too_many_attempts", 500: "internal",
    503: "hardware", 507: "no_space",
}


def error_response(
    status: int, message: str, headers: dict[str, str] | None = None, *, kind: str | None = None
) -> web.Response:
    body = {"error": {"status": status, "kind": kind or _KINDS.get(status, "error"), "message": message}}
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
    except Damaged as exc:
        return error_response(410, str(exc), {"X-Frame-Status": exc.status})
    except NoSpace as exc:
        return error_response(507, str(exc))
    except LiveViewFull as exc:
        return error_response(503, str(exc), {"Retry-After": "10"}, kind="too_many_viewers")
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
    bearer = auth.check_bearer(request.headers.get("Authorization"))
    if bearer:
        # The right token is never refused, however many wrong ones others (or this
        # address, shared behind a NAT) have sent: a guesser cannot lock the owner out.
        return await handler(request)
    reading = request.method in READ_METHODS
    cookie = auth.check_cookie(request.cookies.get(VIEW_COOKIE)) if reading else None
    if reading and (cookie or (bearer is None and auth.anonymous_viewing)):
        return await handler(request)
    if bearer is False or cookie is False:
        _refuse_wrong(request, auth, "access token" if bearer is False else "view cookie")
    request.app[METRICS].auth_failures.inc()
    what = "viewing needs" if reading else "changes need"
    raise web.HTTPUnauthorized(
        text=f"{what} the access token: send 'Authorization: Bearer <token>' (phasewatch token --data DIR prints it)",
        headers={"WWW-Authenticate": 'Bearer realm="phasewatch"'},
    )


def _refuse_wrong(request: web.Request, auth: Authenticator, what: str) -> None:
    """A wrong token or view cookie: 429 while this address, or all addresses together,
    have sent too many lately, else counted and 401."""
    client = _client(request)
    wait_s = auth.limiter.blocked_for_s(client)
    if wait_s > 0:
        who = "all clients" if auth.limiter.overall() else client
        raise web.HTTPTooManyRequests(
            text=f"too many wrong tokens or view cookies from {who}; try again in {math.ceil(wait_s)} s",
            headers={"Retry-After": str(math.ceil(wait_s))},
        )
    auth.limiter.fail(client)
    request.app[METRICS].auth_failures.inc()
    if what == "view cookie":
        raise web.HTTPUnauthorized(
            text="this view cookie is no longer valid (the token was renewed); sign in again with the token",
            headers={"WWW-Authenticate": 'Bearer realm="phasewatch"'},
        )
    raise web.HTTPUnauthorized(
        text="wrong access token; the token is printed by: phasewatch token --data DIR",
        headers={"WWW-Authenticate": 'Bearer realm="phasewatch", error="invalid_token"'},
    )


# -- requests --------------------------------------------------------------------------


# No request nests deeper than a plan's z-stack inside a plan; the JSON decoder recurses
# once per level, so a deeper body is refused before it is decoded.
MAX_JSON_DEPTH = 32
_OPEN, _CLOSE, _QUOTE, _BACKSLASH = frozenset(b"[{"), frozenset(b"]}"), ord('"'), ord("\\")


def json_depth(raw: bytes) -> int:
    """How deep arrays and objects nest in ``raw`` (strings skipped), without decoding it.

    One pass, linear in the length whatever the bytes (a regular expression for strings
    backtracks quadratically on a body of unterminated escapes)."""
    depth = deepest = 0
    in_string = escaped = False
    for ch in raw:
        if in_string:
            if escaped:
                escaped = False
            elif ch == _BACKSLASH:
                escaped = True
            elif ch == _QUOTE:
                in_string = False
        elif ch == _QUOTE:
            in_string = True
        elif ch in _OPEN:
            depth += 1
            if depth > deepest:
                deepest = depth
        elif ch in _CLOSE:
            depth -= 1
    return deepest


async def read_json(request: web.Request) -> dict[str, Any]:
    raw = await request.read()  # bounded by the application's client_max_size (413 beyond)
    if not raw.strip():
        return {}
    if (depth := json_depth(raw)) > MAX_JSON_DEPTH:
        raise BadRequest(f"the request body nests {depth} levels deep; at most {MAX_JSON_DEPTH} are allowed")
    try:
        body = json.loads(raw)
    except RecursionError:  # the scan above should make this unreachable; never a 500 if not
        raise BadRequest(f"the request body nests too deeply; at most {MAX_JSON_DEPTH} levels are allowed") from None
    except (UnicodeDecodeError, ValueError) as exc:
        raise BadRequest(f"the request body is not valid JSON ({exc})") from None
    if not isinstance(body, dict):
        raise BadRequest(f"the request body must be a JSON object {{...}}, got {type(body).__name__}")
    return body


def plan_body(body: dict[str, Any]) -> PlanOptions:
    if not body:
        raise BadRequest("send a plan: a JSON object with name, vessel, wells, interval_s and count or duration_s")
    return plan_request(body)


@dataclasses.dataclass(frozen=True)
class Parses:
    """The request dataclasses one handler parses: its JSON body and its query string."""

    body: type | None = None
    query: type | None = None


Handler = Callable[[web.Request], Awaitable[web.StreamResponse]]
#: What each route handler parses, for the OpenAPI check (tests/test_web_openapi.py).
PARSED: dict[Handler, Parses] = {}


def takes(
    *, body: type | None = None, query: type | None = None,
    body_parser: Callable[[dict[str, Any]], Any] | None = None,
) -> Callable[[Callable[..., Awaitable[web.StreamResponse]]], Handler]:
    """Give the handler its body and then its query string parsed into these dataclasses
    (:func:`~daemon.requests.parse_request`: BadRequest, so 400, naming the field);
    ``body_parser`` parses the body another strict way (plans)."""

    def wrap(fn: Callable[..., Awaitable[web.StreamResponse]]) -> Handler:
        @functools.wraps(fn)
        async def handler(request: web.Request) -> web.StreamResponse:
            args: list[Any] = []
            if body is not None:
                raw = await read_json(request)
                args.append(body_parser(raw) if body_parser is not None else parse_request(body, raw))
            if query is not None:
                args.append(parse_text_request(query, {k: request.query.getone(k) for k in request.query}))
            return await fn(request, *args)

        PARSED[handler] = Parses(body, query)
        return handler

    return wrap


def _id(request: web.Request, name: str, what: str) -> int:
    text = request.match_info[name]
    if len(text) > 10 or int(text) > MAX_ID:
        raise NotFound(f"no {what} {text}")
    return int(text)


def tl_id_of(request: web.Request) -> int:
    return _id(request, "id", "time-lapse")


def frame_id_of(request: web.Request) -> int:
    return _id(request, "frame_id", "frame")


def _frame_links(tl_id: int, rows: list[dict[str, Any]], *, download: bool = True) -> list[dict[str, Any]]:
    base = f"{API_PREFIX}/timelapses/{tl_id}/frames"
    for r in rows:
        if download:
            r["download"] = f"{base}/{r['id']}"
        r["preview"] = f"{base}/{r['id']}/preview.jpg"
    return rows


def _export_links(tl_id: int, files: list[ExportFile]) -> list[dict[str, Any]]:
    return [{"name": f.name, "bytes": f.bytes, "download": f"{API_PREFIX}/timelapses/{tl_id}/exports/{f.name}"}
            for f in files]


# -- status and live view --------------------------------------------------------------


@routes.get(f"{API_PREFIX}/status")
async def get_status(request: web.Request) -> web.Response:
    return json_response(request.app[STATION].status())


@routes.get(f"{API_PREFIX}/frame.jpg")
@takes(query=ImageQuery)
async def get_frame(request: web.Request, query: ImageQuery) -> web.Response:
    frame, body = await request.app[STATION].live.image(query)
    return web.Response(body=body, content_type="image/jpeg", headers={
        "Cache-Control": "no-store", "X-Frame-Source": frame.source, "X-Frame-Seq": str(frame.seq),
        "X-Frame-Time": f"{frame.t_s:.3f}",
    })


@routes.get(f"{API_PREFIX}/stream.mjpeg")
@takes(query=StreamQuery)
async def get_stream(request: web.Request, query: StreamQuery) -> web.StreamResponse:
    """Multipart MJPEG: one JPEG part per frame, as live view paces them; a viewer that
    stops reading is dropped (see :mod:`daemon.live`)."""
    live = request.app[STATION].live
    async with live.stream_slot():
        resp = web.StreamResponse(headers={
            "Content-Type": f"multipart/x-mixed-replace; boundary={BOUNDARY}",
            "Cache-Control": "no-store", "X-Frame-Rate-Cap": f"{live.clamp_fps(query.fps):g}",
        })
        await resp.prepare(request)
        _small_send_buffers(request)
        try:
            async with contextlib.aclosing(live.stream(query)) as frames:
                async for frame, jpeg in frames:
                    head = (
                        f"--{BOUNDARY}\r\nContent-Type: image/jpeg\r\nContent-Length: {len(jpeg)}\r\n"
                        f"X-Frame-Source: {frame.source}\r\nX-Frame-Seq: {frame.seq}\r\n"
                        f"X-Frame-Time: {frame.t_s:.3f}\r\nX-Frame-Wall: {frame.wall_s:.4f}\r\n\r\n"
                    )
                    part = head.encode("latin-1") + jpeg + b"\r\n"
                    if not await live.write_or_drop(lambda: resp.write(part)):
                        log.info("live view: %s read nothing for %g s; its stream is ended", _client(request),
                                 live.stall_s)
                        if request.transport is not None:
                            request.transport.abort()  # what is queued for it is dropped, not kept
                        return resp
        except (ConnectionResetError, HardwareError):
            return resp
    with contextlib.suppress(ConnectionResetError, RuntimeError):  # the client may be gone already
        await resp.write(f"--{BOUNDARY}--\r\n".encode())
        await resp.write_eof()
    return resp


# Bytes the kernel may queue to one stream's viewer: a few frames. Left to itself Linux
# grows the queue to megabytes, so a viewer that never reads would hold that much memory
# and be noticed only after seconds of frames.
STREAM_SEND_BUFFER_BYTES = 64 * 1024


def _small_send_buffers(request: web.Request) -> None:
    transport = request.transport
    if transport is None:
        return
    transport.set_write_buffer_limits(high=STREAM_SEND_BUFFER_BYTES)
    sock = transport.get_extra_info("socket")
    if sock is not None:
        with contextlib.suppress(OSError):
            sock.setsockopt(socket.SOL_SOCKET, socket.SO_SNDBUF, STREAM_SEND_BUFFER_BYTES)


# -- manual control --------------------------------------------------------------------


@routes.post(f"{API_PREFIX}/stage/move")
@takes(body=MoveRequest)
async def post_move(request: web.Request, body: MoveRequest) -> web.Response:
    return json_response((await request.app[STATION].move(body)).to_json())


@routes.post(f"{API_PREFIX}/focus/auto")
@takes(body=AutofocusRequest)
async def post_autofocus(request: web.Request, body: AutofocusRequest) -> web.Response:
    return json_response((await request.app[STATION].autofocus(body)).to_json())


# -- calibration -----------------------------------------------------------------------


@routes.get(f"{API_PREFIX}/calibration")
async def get_calibration(request: web.Request) -> web.Response:
    return json_response({"frames": await request.app[STATION].calibrations()})


@routes.post(f"{API_PREFIX}/calibration/dark")
@takes(body=DarkRequest)
async def post_dark(request: web.Request, body: DarkRequest) -> web.Response:
    return json_response((await request.app[STATION].calibrate_dark(body)).to_json(), status=201)


@routes.post(f"{API_PREFIX}/calibration/flat")
@takes(body=FlatRequest)
async def post_flat(request: web.Request, body: FlatRequest) -> web.Response:
    return json_response((await request.app[STATION].calibrate_flat(body)).to_json(), status=201)


# -- plans and time-lapses -------------------------------------------------------------


@routes.get(f"{API_PREFIX}/plans/demo")
async def get_demo_plan(request: web.Request) -> web.Response:
    plan, checked = await request.app[STATION].demo()
    return json_response({"plan": plan, **checked.to_json()})


@routes.post(f"{API_PREFIX}/plans/check")
@takes(body=PlanOptions, body_parser=plan_body)
async def post_check_plan(request: web.Request, body: PlanOptions) -> web.Response:
    return json_response((await request.app[STATION].check_plan(body)).to_json())


@routes.get(f"{API_PREFIX}/timelapses")
async def get_timelapses(request: web.Request) -> web.Response:
    station = request.app[STATION]
    return json_response({"timelapses": await station.timelapses(), "active": station.active_summary()})


@routes.post(f"{API_PREFIX}/timelapses")
@takes(body=PlanOptions, body_parser=plan_body)
async def post_timelapse(request: web.Request, body: PlanOptions) -> web.Response:
    started = await request.app[STATION].start_timelapse(body)
    return json_response(started.to_json(), status=201, headers={"Location": f"{API_PREFIX}/timelapses/{started.id}"})


@routes.get(r"/api/v1/timelapses/{id:\d+}")
async def get_timelapse(request: web.Request) -> web.Response:
    return json_response(await request.app[STATION].timelapse(tl_id_of(request)))


async def _control(request: web.Request, action: str) -> web.Response:
    done = await request.app[STATION].control_timelapse(tl_id_of(request), action)
    return json_response(done.to_json(), status=200 if done.done else 202)


@routes.post(r"/api/v1/timelapses/{id:\d+}/pause")
@takes(body=ControlRequest)
async def post_pause(request: web.Request, body: ControlRequest) -> web.Response:
    return await _control(request, "pause")


@routes.post(r"/api/v1/timelapses/{id:\d+}/resume")
@takes(body=ControlRequest)
async def post_resume(request: web.Request, body: ControlRequest) -> web.Response:
    return await _control(request, "resume")


@routes.post(r"/api/v1/timelapses/{id:\d+}/abort")
@takes(body=ControlRequest)
async def post_abort(request: web.Request, body: ControlRequest) -> web.Response:
    return await _control(request, "abort")


@routes.get(r"/api/v1/timelapses/{id:\d+}/frames")
@takes(query=FramesQuery)
async def get_frames(request: web.Request, query: FramesQuery) -> web.Response:
    tl_id = tl_id_of(request)
    page = await request.app[STATION].frames(tl_id, query)
    return json_response({"total": page.total, "offset": page.offset, "frames": _frame_links(tl_id, page.frames)})


@routes.get(r"/api/v1/timelapses/{id:\d+}/frames/{frame_id:\d+}")
async def get_frame_file(request: web.Request) -> web.StreamResponse:
    path = await request.app[STATION].frame_path(tl_id_of(request), frame_id_of(request))
    return web.FileResponse(path, headers={
        "Content-Type": "image/tiff", "Content-Disposition": f'attachment; filename="{path.name}"',
    })


@routes.get(r"/api/v1/timelapses/{id:\d+}/frames/{frame_id:\d+}/preview.jpg")
@takes(query=PreviewQuery)
async def get_frame_preview(request: web.Request, query: PreviewQuery) -> web.Response:
    body = await request.app[STATION].preview(tl_id_of(request), frame_id_of(request), query)
    return web.Response(body=body, content_type="image/jpeg", headers={"Cache-Control": "max-age=3600"})


@routes.get(r"/api/v1/timelapses/{id:\d+}/latest")
async def get_latest(request: web.Request) -> web.Response:
    tl_id = tl_id_of(request)
    rows = await request.app[STATION].latest(tl_id)
    return json_response({"positions": _frame_links(tl_id, rows, download=False)})


@routes.get(r"/api/v1/timelapses/{id:\d+}/series")
async def get_series(request: web.Request) -> web.Response:
    return json_response(await request.app[STATION].series(tl_id_of(request)))


@routes.get(r"/api/v1/timelapses/{id:\d+}/wells/{well}/readings")
async def get_well_readings(request: web.Request) -> web.Response:
    tl_id = tl_id_of(request)
    readings = await request.app[STATION].well_readings(tl_id, request.match_info["well"])
    return json_response({"id": tl_id, "well": readings[0].well if readings else request.match_info["well"].upper(),
                          "readings": [r.to_dict() for r in readings]})


@routes.get(r"/api/v1/timelapses/{id:\d+}/positions/{position}/movie.mp4")
@takes(query=MovieQuery)
async def get_position_movie(request: web.Request, query: MovieQuery) -> web.StreamResponse:
    """One position's time points as an H.264 MP4, made from the frames stored so far."""
    position = request.match_info["position"]
    path = await request.app[STATION].movie(tl_id_of(request), position, query)
    return web.FileResponse(path, headers={
        "Content-Type": "video/mp4", "Content-Disposition": f'attachment; filename="{path.name}"',
        "Cache-Control": "no-store",
    })


# -- vessels ---------------------------------------------------------------------------


@routes.get(f"{API_PREFIX}/vessel")
async def get_mapped_vessel(request: web.Request) -> web.Response:
    return json_response(await request.app[STATION].vessel(None))


@routes.get(f"{API_PREFIX}/vessels/{{name}}")
async def get_vessel(request: web.Request) -> web.Response:
    return json_response(await request.app[STATION].vessel(request.match_info["name"]))


# -- exports ---------------------------------------------------------------------------


@routes.post(r"/api/v1/timelapses/{id:\d+}/exports")
@takes(body=ExportRequest)
async def post_export(request: web.Request, body: ExportRequest) -> web.Response:
    tl_id = tl_id_of(request)
    made = await request.app[STATION].make_exports(tl_id, body)
    return json_response({
        "files": _export_links(tl_id, made.files),
        "stacks": [{"position": s.position, "time_points": s.time_points, "z_planes": s.z_planes,
                    "skipped_time_points": s.skipped_time_points} for s in made.stacks],
    }, status=201)


@routes.get(r"/api/v1/timelapses/{id:\d+}/exports")
async def get_exports(request: web.Request) -> web.Response:
    tl_id = tl_id_of(request)
    return json_response({"files": _export_links(tl_id, await request.app[STATION].exports(tl_id))})


@routes.get(r"/api/v1/timelapses/{id:\d+}/exports/{name}")
async def get_export_file(request: web.Request) -> web.StreamResponse:
    path = await request.app[STATION].export_path(tl_id_of(request), request.match_info["name"])
    kind = "text/csv" if path.suffix == ".csv" else "image/tiff" if path.suffix in (".tif", ".tiff") else "application/octet-stream"
    return web.FileResponse(path, headers={"Content-Type": kind, "Content-Disposition": f'attachment; filename="{path.name}"'})


# -- alerts, session -------------------------------------------------------------------


@routes.get(f"{API_PREFIX}/alerts")
@takes(query=AlertsQuery)
async def get_alerts(request: web.Request, query: AlertsQuery) -> web.Response:
    return json_response({"alerts": await request.app[STATION].alerts(query)})


@routes.post(f"{API_PREFIX}/session")
@takes(body=SessionRequest)
async def post_session(request: web.Request, body: SessionRequest) -> web.Response:
    """Swap the token for a view cookie, so that <img> and WebSocket requests can view."""
    resp = json_response({"viewing": True, "message": "this browser may now view; changes still need the token"})
    resp.set_cookie(VIEW_COOKIE, request.app[AUTH].cookie_value, httponly=True, samesite="Strict", path="/")
    return resp
