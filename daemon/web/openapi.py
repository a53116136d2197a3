"""The OpenAPI 3.1 document of the API, served at ``/api/v1/openapi.json``.

Paths, summaries and responses are written here next to the routes; request bodies and
query parameters are generated from the request dataclasses the handlers parse
(:func:`request_schema`, :func:`query_parameters`): field types, defaults, ranges,
choices and docs come from their ``option(...)`` declarations, so the document cannot
promise what the loader refuses. ``tests/test_web_openapi.py`` compares the paths and
methods with the application's router, each route's documented request with the
dataclass its handler parses, and each schema with its dataclass.
"""

from __future__ import annotations

import dataclasses
import types
import typing
from typing import Any

from daemon import __version__
from daemon.archive import AlertsQuery, ExportRequest, FramesQuery, MovieQuery, PreviewQuery
from daemon.focus.autofocus import AutofocusRequest
from daemon.illumination.acquire import DarkRequest, FlatRequest
from daemon.live import ImageQuery, StreamQuery
from daemon.manual import MoveRequest
from daemon.requests import default_of, has_default, request_fields
from daemon.states import FocusState
from daemon.station import ControlRequest
from daemon.timelapse.plan import PlanOptions
from daemon.web import API_PREFIX
from daemon.web.auth import SessionRequest
from drivers.options import INT_MAX, INT_MIN

P = API_PREFIX


@dataclasses.dataclass(frozen=True)
class RequestBody:
    """A request dataclass documented as a body schema, less the fields the network may not set."""

    cls: type
    omit: tuple[str, ...] = ()


#: Body schemas by component name. A plan over the network may not name a vessel file
#: (the daemon would read a file of the sender's choosing): the station refuses it.
REQUEST_BODIES: dict[str, RequestBody] = {
    "MoveRequest": RequestBody(MoveRequest),
    "AutofocusRequest": RequestBody(AutofocusRequest),
    "DarkRequest": RequestBody(DarkRequest),
    "FlatRequest": RequestBody(FlatRequest),
    "Plan": RequestBody(PlanOptions, omit=("vessel_file",)),
    "ControlRequest": RequestBody(ControlRequest),
    "ExportRequest": RequestBody(ExportRequest),
    "SessionRequest": RequestBody(SessionRequest),
}

_SCALARS = {float: "number", int: "integer", str: "string", bool: "boolean"}


def _json_value(value: Any) -> Any:
    return list(value) if isinstance(value, tuple) else value


def _value_schema(tp: Any, meta: typing.Mapping[str, Any]) -> dict[str, Any]:
    """The schema of one value of type ``tp`` under an option's limits (per item for lists,
    as the loader checks them)."""
    origin = typing.get_origin(tp)
    if origin in (typing.Union, types.UnionType):
        # None only ever means "not given": the loader takes no null, so neither does the schema.
        alternatives = [a for a in typing.get_args(tp) if a is not type(None)]
        if len(alternatives) == 1:
            return _value_schema(alternatives[0], meta)
        return {"anyOf": [_value_schema(a, meta) for a in alternatives]}
    if origin in (list, tuple):
        return {"type": "array", "items": _value_schema(typing.get_args(tp)[0], meta)}
    if dataclasses.is_dataclass(tp):
        return request_schema(tp)  # type: ignore[arg-type]
    if tp is typing.Any:
        # Items the field's own loader checks one by one (a plan's conditions: tables of
        # ConditionOptions), so any JSON value passes here as it passes the option loader.
        return {}
    schema: dict[str, Any] = {"type": _SCALARS[tp]}
    if meta.get("choices"):
        schema["enum"] = [_json_value(c) for c in meta["choices"]]
    lo, hi = meta.get("min"), meta.get("max")
    if tp is int:
        # Whole numbers are 64-bit, as in a profile (drivers.options refuses larger ones).
        lo, hi = INT_MIN if lo is None else lo, INT_MAX if hi is None else hi
    if tp in (int, float):
        if lo is not None:
            schema["minimum"] = lo
        if hi is not None:
            schema["maximum"] = hi
    return schema


def _describe(f: dataclasses.Field[Any]) -> str:
    unit = f.metadata.get("unit")
    return f"{f.metadata['doc']} [{unit}]" if unit else str(f.metadata["doc"])


def field_schema(f: dataclasses.Field[Any], tp: Any) -> dict[str, Any]:
    """The schema of one request field: its type and limits, its default, its doc (and unit)."""
    schema = _value_schema(tp, f.metadata)
    schema["description"] = _describe(f)
    if has_default(f) and not dataclasses.is_dataclass(tp) and default_of(f) is not None:
        schema["default"] = _json_value(default_of(f))
    return schema


def request_schema(cls: type, omit: tuple[str, ...] = ()) -> dict[str, Any]:
    """A JSON object schema of a request dataclass: its options, nothing else."""
    fields = [(f, tp) for f, tp in request_fields(cls) if f.name not in omit]
    schema: dict[str, Any] = {
        "type": "object", "additionalProperties": False,
        "properties": {f.name: field_schema(f, tp) for f, tp in fields},
    }
    required = [f.name for f, _ in fields if not has_default(f)]
    if required:
        schema["required"] = required
    doc = (cls.__doc__ or "").strip()
    if doc and not doc.startswith(f"{cls.__name__}("):  # dataclasses invent a docstring when none is written
        schema["description"] = doc.split("\n\n")[0].replace("\n", " ")
    return schema


def query_parameters(cls: type) -> list[dict[str, Any]]:
    """The query parameters of a request dataclass, one per option."""
    params = []
    for f, tp in request_fields(cls):
        schema = field_schema(f, tp)
        description = schema.pop("description")
        params.append({"name": f.name, "in": "query", "required": not has_default(f), "schema": schema,
                       "description": description})
    return params

_ERRORS = {
    "400": "malformed request (bad JSON, bad parameter)",
    "401": "no token, or a wrong one",
    "404": "no such thing",
    "409": "the scope or time-lapse cannot do this now; the message says who holds it and what to do",
    "410": "the stored frame is damaged or missing; the message says which and why, X-Frame-Status its state",
    "413": "request body too large",
    "422": "refused by the scope: outside the soft limits, or a plan that does not fit",
    "429": "too many wrong tokens from this client; wait",
    "503": "hardware trouble (camera, controller), or as many live viewers as the profile allows",
    "507": "not enough space on the disk; nothing partial was left",
}


def _ref(name: str) -> dict[str, str]:
    return {"$ref": f"#/components/schemas/{name}"}


def _json(schema: dict[str, Any], description: str) -> dict[str, Any]:
    return {"description": description, "content": {"application/json": {"schema": schema}}}


def _binary(media: str, description: str) -> dict[str, Any]:
    return {"description": description, "content": {media: {"schema": {"type": "string", "format": "binary"}}}}


def _errors(*codes: str) -> dict[str, Any]:
    return {c: _json(_ref("Error"), _ERRORS[c]) for c in codes}


def _path(name: str, schema: dict[str, Any], description: str) -> dict[str, Any]:
    return {"name": name, "in": "path", "required": True, "schema": schema, "description": description}


_ID = _path("id", {"type": "integer", "minimum": 0, "maximum": 2**31 - 1}, "time-lapse id")
_FRAME_ID = _path("frame_id", {"type": "integer", "minimum": 0, "maximum": 2**31 - 1}, "frame id (from the frame list)")
_WELL = _path("well", {"type": "string", "pattern": "^[A-Za-z]{1,2}0*[0-9]{1,3}$"}, "well name, e.g. B3")
_READ_ERRORS = ("400", "401", "429")
_WRITE_ERRORS = ("400", "401", "413", "429")
_VIEW_SECURITY: list[dict[str, list[str]]] = [{"bearer": []}, {"viewCookie": []}]
_CHANGE_SECURITY: list[dict[str, list[str]]] = [{"bearer": []}]


def _get(summary: str, ok: dict[str, Any], *, params: list[dict[str, Any]] | None = None, query: type | None = None,
         errors: tuple[str, ...] = (), extra: dict[str, Any] | None = None) -> dict[str, Any]:
    """A viewing operation; ``query`` is the request dataclass of its query string."""
    op: dict[str, Any] = {
        "summary": summary, "security": _VIEW_SECURITY,
        "parameters": (params or []) + (query_parameters(query) if query is not None else []),
        "responses": {"200": ok, **(extra or {}), **_errors(*_READ_ERRORS, *errors)},
    }
    return op


def _post(summary: str, ok: dict[str, Any], *, body: str | None = None, status: str = "200",
          params: list[dict[str, Any]] | None = None, errors: tuple[str, ...] = (),
          extra: dict[str, Any] | None = None) -> dict[str, Any]:
    """A changing operation; ``body`` names its request dataclass in :data:`REQUEST_BODIES`."""
    op: dict[str, Any] = {
        "summary": summary, "security": _CHANGE_SECURITY, "parameters": params or [],
        "responses": {status: ok, **(extra or {}), **_errors(*_WRITE_ERRORS, *errors)},
    }
    if body is not None:
        if body not in REQUEST_BODIES:
            raise KeyError(f"no request body {body!r} in REQUEST_BODIES")
        op["requestBody"] = {"required": False, "content": {"application/json": {"schema": _ref(body)}}}
    return op


def _schemas() -> dict[str, Any]:
    num = {"type": "number"}
    nullable_num = {"type": ["number", "null"]}
    position = {"type": "object", "properties": {"x_um": num, "y_um": num, "z_um": num},
                "required": ["x_um", "y_um", "z_um"]}
    focus_point = {"type": "object", "properties": {"z_um": num, "score": nullable_num, "t_s": num}}
    return {
        "Error": {
            "type": "object", "required": ["error"],
            "properties": {"error": {"type": "object", "required": ["status", "kind", "message"], "properties": {
                "status": {"type": "integer"}, "kind": {"type": "string"}, "message": {"type": "string"}}}},
        },
        "Position": position,
        "Status": {
            "type": "object",
            "required": ["state", "position_um", "limits_um", "profile", "active_timelapse", "manual_control", "live"],
            "properties": {
                "state": {"type": "string", "enum": ["idle", "live", "busy", "acquiring", "waiting", "paused"]},
                "holder": {"type": ["string", "null"]},
                "position_um": {"anyOf": [position, {"type": "null"}]},
                "well": {"type": ["string", "null"],
                         "description": "the well under the objective by the vessel-to-stage map (null between wells or with no map)"},
                "limits_um": {"type": "object"},
                "profile": {"type": "object"},
                "active_timelapse": {"type": ["object", "null"]},
                "manual_control": {"type": "object", "properties": {
                    "allowed": {"type": "boolean"}, "reason": {"type": ["string", "null"]}}},
                "live": {"type": "object"},
                "simulator": {"type": ["object", "null"]},
                "vessel_position": {"type": ["object", "null"], "description":
                                    "where the objective is over the mapped vessel: vessel, x_mm, y_mm "
                                    "(from its top-left outer corner), on_vessel, well (null between wells)"},
            },
        },
        "Vessel": {"type": "object", "required": ["name", "kind", "length_mm", "width_mm", "wells", "mapped"],
                   "properties": {
                       "name": {"type": "string"}, "kind": {"type": "string"}, "length_mm": num, "width_mm": num,
                       "rows": {"type": "integer"}, "columns": {"type": "integer"}, "mapped": {"type": "boolean"},
                       "wells": {"type": "array", "items": {"type": "object", "required": ["name", "x_mm", "y_mm", "shape"]}}}},
        "MoveResult": {"type": "object", "required": ["position_um"], "properties": {
            "position_um": position, "well": {"type": ["string", "null"]}}},
        "FocusResult": {
            "type": "object", "required": ["found", "z_um", "curve", "message"],
            "properties": {
                "found": {"type": "boolean"}, "z_um": num, "score": nullable_num, "confidence": num,
                "frames": {"type": "integer"}, "message": {"type": "string"},
                "true_z_um": nullable_num, "curve": {"type": "array", "items": focus_point},
            },
        },
        "CalibrationStored": {"type": "object", "required": ["kind", "file"], "properties": {
            "kind": {"type": "string", "enum": ["dark", "flat"]}, "file": {"type": "string"},
            "exposure_ms": num, "gain_db": num, "frames": {"type": "integer"}, "quality": {"type": ["object", "null"]}}},
        "CalibrationList": {"type": "object", "required": ["frames"], "properties": {
            "frames": {"type": "array", "items": {"type": "object"}}}},
        "PlanCheck": {"type": "object", "required": ["plan", "positions", "warnings", "estimate"], "properties": {
            "plan": {"type": "object"}, "positions": {"type": "array", "items": {"type": "string"}},
            "warnings": {"type": "array", "items": {"type": "string"}}, "estimate": {"type": "object"}}},
        "TimelapseStarted": {"type": "object", "required": ["id", "state"], "properties": {
            "id": {"type": "integer"}, "name": {"type": "string"}, "state": {"type": "string"},
            "warnings": {"type": "array", "items": {"type": "string"}}, "estimate": {"type": "object"}}},
        "TimelapseList": {"type": "object", "required": ["timelapses"], "properties": {
            "timelapses": {"type": "array", "items": {"type": "object"}}, "active": {"type": ["object", "null"]}}},
        "Timelapse": {"type": "object", "required": ["id", "name", "state", "time_points", "missed", "alerts"], "properties": {
            "id": {"type": "integer"}, "name": {"type": "string"}, "state": {"type": "string"},
            "time_points": {"type": "object"}, "progress_ratio": num, "frames": {"type": "integer"},
            "missed": {"type": "array"}, "alerts": {"type": "array"}, "latest": {"type": "array"},
            "progress": {"type": "object"}}},
        "ControlResult": {"type": "object", "required": ["id", "state", "message"], "properties": {
            "id": {"type": "integer"}, "state": {"type": "string"}, "message": {"type": "string"}}},
        "FrameList": {"type": "object", "required": ["total", "frames"], "properties": {
            "total": {"type": "integer"}, "offset": {"type": "integer"}, "frames": {"type": "array", "items": {"type": "object"}}}},
        "Latest": {"type": "object", "required": ["positions"], "properties": {
            "positions": {"type": "array", "items": {"type": "object"}}}},
        "Series": {"type": "object", "required": ["positions", "wells"], "properties": {
            "positions": {"type": "object"}, "wells": {"type": "object"}}},
        "WellReadings": {"type": "object", "required": ["id", "well", "readings"], "properties": {
            "id": {"type": "integer"}, "well": {"type": "string"},
            "readings": {"type": "array", "items": {"type": "object", "required": [
                "tp", "t_s", "elapsed_s", "confluence", "sites_used", "sites_imaged", "sites_total", "focus"],
                "properties": {
                    "tp": {"type": "integer"}, "t_s": {"type": "number"}, "elapsed_s": {"type": "number"},
                    "confluence": {"type": ["number", "null"]}, "sites_used": {"type": "integer"},
                    "sites_imaged": {"type": "integer"}, "sites_total": {"type": "integer"},
                    "focus": {"type": "string", "enum": [s.value for s in FocusState]},
                    "sites": {"type": "array"}}}}}},
        "ExportList": {"type": "object", "required": ["files"], "properties": {
            "files": {"type": "array", "items": {"type": "object", "properties": {
                "name": {"type": "string"}, "bytes": {"type": "integer"}, "download": {"type": "string"}}}},
            "stacks": {"type": "array"}}},
        "Alerts": {"type": "object", "required": ["alerts"], "properties": {"alerts": {"type": "array"}}},
        "Session": {"type": "object", "required": ["viewing"], "properties": {
            "viewing": {"type": "boolean"}, "message": {"type": "string"}}},
        **{name: request_schema(body.cls, body.omit) for name, body in REQUEST_BODIES.items()},
    }


def document() -> dict[str, Any]:
    tl = f"{P}/timelapses/{{id}}"
    paths: dict[str, Any] = {
        f"{P}/status": {"get": _get("State, stage position (um), profile and active time-lapse", _json(_ref("Status"), "status"))},
        f"{P}/frame.jpg": {"get": _get(
            "The latest frame as JPEG (the time-lapse's own while one is imaging)",
            _binary("image/jpeg", "JPEG; header X-Frame-Source says 'live' or who took it"),
            query=ImageQuery, errors=("503",))},
        f"{P}/stream.mjpeg": {"get": _get(
            "Live view as multipart MJPEG, frame rate capped",
            _binary("multipart/x-mixed-replace", "one JPEG part per frame"),
            query=StreamQuery, errors=("503",))},
        f"{P}/stage/move": {"post": _post(
            "Move the stage and focus, absolute or relative, in um, or to a well centre",
            _json(_ref("MoveResult"), "where the stage is now"), body="MoveRequest",
            errors=("409", "422", "503"))},
        f"{P}/focus/auto": {"post": _post(
            "Run an autofocus here; its focus curve also streams on /events", _json(_ref("FocusResult"), "the result"),
            body="AutofocusRequest", errors=("409", "422", "503"))},
        f"{P}/calibration": {"get": _get("Stored dark and flat frames of this profile",
                                         _json(_ref("CalibrationList"), "frames"))},
        f"{P}/calibration/dark": {"post": _post(
            "Average dark frames (lamp off) and store them for this exposure and gain",
            _json(_ref("CalibrationStored"), "stored"), body="DarkRequest", status="201",
            errors=("409", "422", "503"))},
        f"{P}/calibration/flat": {"post": _post(
            "Average frames of the blank field under the objective and store them as the flat field",
            _json(_ref("CalibrationStored"), "stored"), body="FlatRequest", status="201",
            errors=("409", "422", "503"))},
        f"{P}/plans/demo": {"get": _get("A small demo plan for this scope, checked", _json(_ref("PlanCheck"), "plan"),
                                        errors=("422",))},
        f"{P}/plans/check": {"post": _post("Check a plan against the scope without starting it",
                                           _json(_ref("PlanCheck"), "positions, warnings, time estimate"),
                                           body="Plan", errors=("422",))},
        f"{P}/timelapses": {
            "get": _get("All time-lapses of the data folder", _json(_ref("TimelapseList"), "list")),
            "post": _post("Start a time-lapse from a plan", _json(_ref("TimelapseStarted"), "started"),
                          body="Plan", status="201", errors=("409", "422")),
        },
        tl: {"get": _get("Progress, time points (missed ones with why), alerts, latest frame per position",
                         _json(_ref("Timelapse"), "the time-lapse"), params=[_ID], errors=("404",))},
        f"{tl}/frames": {"get": _get(
            "Frames of a time-lapse, with download links", _json(_ref("FrameList"), "frames"),
            params=[_ID], query=FramesQuery, errors=("404",))},
        f"{tl}/frames/{{frame_id}}": {"get": _get(
            "Download one frame (lossless OME-TIFF)", _binary("image/tiff", "the frame file"),
            params=[_ID, _FRAME_ID], errors=("404", "410"))},
        f"{tl}/frames/{{frame_id}}/preview.jpg": {"get": _get(
            "A frame as a small JPEG", _binary("image/jpeg", "preview"), params=[_ID, _FRAME_ID], query=PreviewQuery,
            errors=("404", "410"))},
        f"{tl}/latest": {"get": _get("The newest frame of every position", _json(_ref("Latest"), "per position"),
                                     params=[_ID], errors=("404",))},
        f"{tl}/series": {"get": _get("Focus score and confluence over time; growth fit per well",
                                     _json(_ref("Series"), "series"), params=[_ID], errors=("404",))},
        f"{tl}/wells/{{well}}/readings": {"get": _get(
            "One well over time: confluence (mean of the sites used), sites used, focus state per time point",
            _json(_ref("WellReadings"), "readings"), params=[_ID, _WELL], errors=("400", "404"))},
        f"{tl}/positions/{{position}}/movie.mp4": {"get": _get(
            "One position's time points as a movie (MP4, H.264), time and scale bar burnt in",
            _binary("video/mp4", "the movie"),
            params=[_ID, _path("position", {"type": "string"}, "position key, e.g. B3-1")], query=MovieQuery,
            errors=("404",))},
        f"{P}/vessel": {"get": _get("The vessel the stage map was taught on, for drawing to scale (mm)",
                                    _json(_ref("Vessel"), "the vessel"), errors=("404",))},
        f"{P}/vessels/{{name}}": {"get": _get(
            "A vessel's geometry for drawing to scale (mm from its top-left outer corner)", _json(_ref("Vessel"), "the vessel"),
            params=[_path("name", {"type": "string"}, "vessel name or alias, e.g. 96-well")], errors=("404",))},
        f"{tl}/exports": {
            "get": _get("Export files made so far", _json(_ref("ExportList"), "files"), params=[_ID], errors=("404",)),
            "post": _post("Make the exports: CSV of per-frame metrics and one OME-TIFF stack per position",
                          _json(_ref("ExportList"), "files made"), body="ExportRequest", params=[_ID], status="201",
                          errors=("404", "507")),
        },
        f"{tl}/exports/{{name}}": {"get": _get(
            "Download an export file", _binary("application/octet-stream", "CSV or OME-TIFF"),
            params=[_ID, _path("name", {"type": "string"}, "file name from the export list")], errors=("404",))},
        f"{P}/alerts": {"get": _get("Recent alerts of all time-lapses", _json(_ref("Alerts"), "alerts"),
                                    query=AlertsQuery)},
        f"{P}/events": {"get": _get(
            "WebSocket of events (JSON messages: state, time_point, progress, frame, alert, focus_point, focus_result, stage)",
            {"description": "not used: the connection is upgraded"},
            extra={"101": {"description": "switching to the WebSocket protocol"}})},
        f"{P}/session": {"post": _post("Exchange the token for a view cookie (browsers: images and WebSocket)",
                                       _json(_ref("Session"), "cookie set"), body="SessionRequest")},
        f"{P}/openapi.json": {"get": {"summary": "This document", "security": [],
                                      "responses": {"200": _json({"type": "object"}, "OpenAPI 3.1")}}},
        "/metrics": {"get": _get("Prometheus/OpenMetrics exposition", {
            "description": "text exposition", "content": {"text/plain": {"schema": {"type": "string"}}}})},
    }
    for action, what in (("pause", "Pause between positions"), ("resume", "Resume a paused time-lapse"),
                         ("abort", "End a time-lapse for good")):
        paths[f"{tl}/{action}"] = {"post": _post(
            what, _json(_ref("ControlResult"), "done"), body="ControlRequest", params=[_ID], errors=("404", "409"),
            extra={"202": _json(_ref("ControlResult"), "requested; takes effect after the position being imaged")})}
    return {
        "openapi": "3.1.0",
        "info": {
            "title": "phasewatch", "version": __version__,
            "description": "Phase-contrast scope in an incubator: live view, stage and focus, time-lapses. "
                           "Changes need 'Authorization: Bearer <token>' (phasewatch token --data DIR).",
        },
        "servers": [{"url": "/"}],
        "paths": paths,
        "components": {
            "schemas": _schemas(),
            "securitySchemes": {
                "bearer": {"type": "http", "scheme": "bearer"},
                "viewCookie": {"type": "apiKey", "in": "cookie", "name": "phasewatch_view"},
            },
        },
    }
