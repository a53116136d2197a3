"""The OpenAPI 3.1 document of the API, served at ``/api/v1/openapi.json``.

Written by hand next to the routes; ``tests/test_web_openapi.py`` compares its paths and
methods with the application's router, so neither can change without the other.
"""

from __future__ import annotations

from typing import Any

from daemon import __version__
from daemon.focus.metrics import METRICS
from daemon.timelapse.plan import AUTOFOCUS_POLICIES, SAVE_CHOICES
from daemon.web import API_PREFIX
from daemon.web.checks import camera_limits

P = API_PREFIX

_ERRORS = {
    "400": "malformed request (bad JSON, bad parameter)",
    "401": "no token, or a wrong one",
    "404": "no such thing",
    "409": "the scope or time-lapse cannot do this now; the message says who holds it and what to do",
    "413": "request body too large",
    "422": "refused by the scope: outside the soft limits, or a plan that does not fit",
    "429": "too many wrong tokens from this client; wait",
    "503": "hardware trouble (camera, controller)",
}


def _ref(name: str) -> dict[str, str]:
    return {"$ref": f"#/components/schemas/{name}"}


def _json(schema: dict[str, Any], description: str) -> dict[str, Any]:
    return {"description": description, "content": {"application/json": {"schema": schema}}}


def _binary(media: str, description: str) -> dict[str, Any]:
    return {"description": description, "content": {media: {"schema": {"type": "string", "format": "binary"}}}}


def _errors(*codes: str) -> dict[str, Any]:
    return {c: _json(_ref("Error"), _ERRORS[c]) for c in codes}


def _query(name: str, schema: dict[str, Any], description: str) -> dict[str, Any]:
    return {"name": name, "in": "query", "required": False, "schema": schema, "description": description}


def _path(name: str, schema: dict[str, Any], description: str) -> dict[str, Any]:
    return {"name": name, "in": "path", "required": True, "schema": schema, "description": description}


_ID = _path("id", {"type": "integer", "minimum": 0, "maximum": 2**31 - 1}, "time-lapse id")
_FRAME_ID = _path("frame_id", {"type": "integer", "minimum": 0, "maximum": 2**31 - 1}, "frame id (from the frame list)")
_WIDTH = _query("width", {"type": "integer", "minimum": 32, "maximum": 8192}, "reduce the image to this width in px")
_QUALITY = _query("quality", {"type": "integer", "minimum": 10, "maximum": 95}, "JPEG quality")
_READ_ERRORS = ("400", "401", "429")
_WRITE_ERRORS = ("400", "401", "413", "429")
_VIEW_SECURITY: list[dict[str, list[str]]] = [{"bearer": []}, {"viewCookie": []}]
_CHANGE_SECURITY: list[dict[str, list[str]]] = [{"bearer": []}]


def _get(summary: str, ok: dict[str, Any], *, params: list[dict[str, Any]] | None = None, errors: tuple[str, ...] = (),
         extra: dict[str, Any] | None = None) -> dict[str, Any]:
    op: dict[str, Any] = {
        "summary": summary, "security": _VIEW_SECURITY, "parameters": params or [],
        "responses": {"200": ok, **(extra or {}), **_errors(*_READ_ERRORS, *errors)},
    }
    return op


def _post(summary: str, ok: dict[str, Any], *, body: dict[str, Any] | None = None, status: str = "200",
          params: list[dict[str, Any]] | None = None, errors: tuple[str, ...] = (),
          extra: dict[str, Any] | None = None) -> dict[str, Any]:
    op: dict[str, Any] = {
        "summary": summary, "security": _CHANGE_SECURITY, "parameters": params or [],
        "responses": {status: ok, **(extra or {}), **_errors(*_WRITE_ERRORS, *errors)},
    }
    if body is not None:
        op["requestBody"] = {"required": False, "content": {"application/json": {"schema": body}}}
    return op


def _schemas() -> dict[str, Any]:
    num = {"type": "number"}
    nullable_num = {"type": ["number", "null"]}
    position = {"type": "object", "properties": {"x_um": num, "y_um": num, "z_um": num},
                "required": ["x_um", "y_um", "z_um"]}
    focus_point = {"type": "object", "properties": {"z_um": num, "score": nullable_num, "t_s": num}}
    lo, hi, _ = camera_limits("exposure_ms")
    exposure = {"type": "number", "minimum": lo, "maximum": hi}
    lo, hi, _ = camera_limits("gain_db")
    gain = {"type": "number", "minimum": lo, "maximum": hi}
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
            },
        },
        "MoveRequest": {
            "type": "object", "additionalProperties": False,
            "properties": {
                "mode": {"type": "string", "enum": ["absolute", "relative"], "default": "absolute"},
                "x_um": num, "y_um": num, "z_um": num,
                "well": {"type": "string", "description": "move to this well's centre, e.g. 'B3'"},
            },
        },
        "MoveResult": {"type": "object", "required": ["position_um"], "properties": {
            "position_um": position, "well": {"type": ["string", "null"]}}},
        "AutofocusRequest": {
            "type": "object", "additionalProperties": False,
            "properties": {
                "metric": {"type": "string", "enum": sorted(METRICS)},
                "range_um": {"type": "number", "exclusiveMinimum": 0},
                "centre_z_um": num,
            },
        },
        "FocusResult": {
            "type": "object", "required": ["found", "z_um", "curve", "message"],
            "properties": {
                "found": {"type": "boolean"}, "z_um": num, "score": nullable_num, "confidence": num,
                "frames": {"type": "integer"}, "message": {"type": "string"},
                "true_z_um": nullable_num, "curve": {"type": "array", "items": focus_point},
            },
        },
        "Plan": {
            "type": "object", "additionalProperties": False, "required": ["name", "vessel", "wells", "interval_s"],
            "properties": {
                "name": {"type": "string", "minLength": 1},
                "vessel": {"type": "string", "description": "e.g. '96-well', '24-well', '35mm-dish'"},
                "wells": {"anyOf": [{"type": "string"}, {"type": "array", "items": {"type": "string"}}]},
                "sites_per_well": {"type": "integer", "minimum": 1, "maximum": 400},
                "site_spacing_um": {"type": "number", "minimum": 1},
                "interval_s": {"type": "number", "minimum": 1},
                "count": {"type": "integer", "minimum": 1},
                "duration_s": {"type": "number", "minimum": 0},
                "autofocus": {"type": "string", "enum": list(AUTOFOCUS_POLICIES)},
                "z_stack": {"type": "object", "additionalProperties": False, "properties": {
                    "count": {"type": "integer", "minimum": 1, "maximum": 201},
                    "step_um": {"type": "number", "minimum": 0.05, "maximum": 500}}},
                "exposure_ms": {"type": "number", "minimum": 0.01, "maximum": 10000},
                "gain_db": {"type": "number", "minimum": 0, "maximum": 48},
                "correction": {"type": "boolean"},
                "save": {"type": "string", "enum": list(SAVE_CHOICES)},
                "notes": {"type": "string"},
            },
        },
        "DarkRequest": {"type": "object", "additionalProperties": False, "properties": {
            "frames": {"type": "integer", "minimum": 1, "maximum": 256}, "exposure_ms": exposure, "gain_db": gain}},
        "FlatRequest": {"type": "object", "additionalProperties": False, "properties": {
            "frames": {"type": "integer", "minimum": 1, "maximum": 256}, "exposure_ms": exposure, "gain_db": gain,
            "defocus_um": {"type": "number", "description": "defocus before averaging, so structure washes out"}}},
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
        "ExportList": {"type": "object", "required": ["files"], "properties": {
            "files": {"type": "array", "items": {"type": "object", "properties": {
                "name": {"type": "string"}, "bytes": {"type": "integer"}, "download": {"type": "string"}}}},
            "stacks": {"type": "array"}}},
        "Alerts": {"type": "object", "required": ["alerts"], "properties": {"alerts": {"type": "array"}}},
        "Session": {"type": "object", "required": ["viewing"], "properties": {
            "viewing": {"type": "boolean"}, "message": {"type": "string"}}},
    }


def document() -> dict[str, Any]:
    tl = f"{P}/timelapses/{{id}}"
    paths: dict[str, Any] = {
        f"{P}/status": {"get": _get("State, stage position (um), profile and active time-lapse", _json(_ref("Status"), "status"))},
        f"{P}/frame.jpg": {"get": _get(
            "The latest frame as JPEG (the time-lapse's own while one is imaging)",
            _binary("image/jpeg", "JPEG; header X-Frame-Source says 'live' or who took it"),
            params=[_WIDTH, _QUALITY], errors=("503",))},
        f"{P}/stream.mjpeg": {"get": _get(
            "Live view as multipart MJPEG, frame rate capped",
            _binary("multipart/x-mixed-replace", "one JPEG part per frame"),
            params=[_query("fps", {"type": "number", "minimum": 0.1}, "frame-rate cap (the server caps it too)"),
                    _WIDTH, _QUALITY,
                    _query("frames", {"type": "integer", "minimum": 1}, "end the stream after this many frames")],
            errors=("503",))},
        f"{P}/stage/move": {"post": _post(
            "Move the stage and focus, absolute or relative, in um, or to a well centre",
            _json(_ref("MoveResult"), "where the stage is now"), body=_ref("MoveRequest"),
            errors=("409", "422", "503"))},
        f"{P}/focus/auto": {"post": _post(
            "Run an autofocus here; its focus curve also streams on /events", _json(_ref("FocusResult"), "the result"),
            body=_ref("AutofocusRequest"), errors=("409", "422", "503"))},
        f"{P}/calibration": {"get": _get("Stored dark and flat frames of this profile",
                                         _json(_ref("CalibrationList"), "frames"))},
        f"{P}/calibration/dark": {"post": _post(
            "Average dark frames (lamp off) and store them for this exposure and gain",
            _json(_ref("CalibrationStored"), "stored"), body=_ref("DarkRequest"), status="201",
            errors=("409", "422", "503"))},
        f"{P}/calibration/flat": {"post": _post(
            "Average frames of the blank field under the objective and store them as the flat field",
            _json(_ref("CalibrationStored"), "stored"), body=_ref("FlatRequest"), status="201",
            errors=("409", "422", "503"))},
        f"{P}/plans/demo": {"get": _get("A small demo plan for this scope, checked", _json(_ref("PlanCheck"), "plan"),
                                        errors=("422",))},
        f"{P}/plans/check": {"post": _post("Check a plan against the scope without starting it",
                                           _json(_ref("PlanCheck"), "positions, warnings, time estimate"),
                                           body=_ref("Plan"), errors=("422",))},
        f"{P}/timelapses": {
            "get": _get("All time-lapses of the data folder", _json(_ref("TimelapseList"), "list")),
            "post": _post("Start a time-lapse from a plan", _json(_ref("TimelapseStarted"), "started"),
                          body=_ref("Plan"), status="201", errors=("409", "422")),
        },
        tl: {"get": _get("Progress, time points (missed ones with why), alerts, latest frame per position",
                         _json(_ref("Timelapse"), "the time-lapse"), params=[_ID], errors=("404",))},
        f"{tl}/frames": {"get": _get(
            "Frames of a time-lapse, with download links", _json(_ref("FrameList"), "frames"),
            params=[_ID, _query("position", {"type": "string"}, "only this position, e.g. 'B2-1'"),
                    _query("tp", {"type": "integer", "minimum": 0}, "only this time point"),
                    _query("limit", {"type": "integer", "minimum": 1, "maximum": 1000}, "page size"),
                    _query("offset", {"type": "integer", "minimum": 0}, "page start")],
            errors=("404",))},
        f"{tl}/frames/{{frame_id}}": {"get": _get(
            "Download one frame (lossless OME-TIFF)", _binary("image/tiff", "the frame file"),
            params=[_ID, _FRAME_ID], errors=("404",))},
        f"{tl}/frames/{{frame_id}}/preview.jpg": {"get": _get(
            "A frame as a small JPEG", _binary("image/jpeg", "preview"), params=[_ID, _FRAME_ID, _WIDTH], errors=("404",))},
        f"{tl}/latest": {"get": _get("The newest frame of every position", _json(_ref("Latest"), "per position"),
                                     params=[_ID], errors=("404",))},
        f"{tl}/series": {"get": _get("Focus score and confluence over time; growth fit per well",
                                     _json(_ref("Series"), "series"), params=[_ID], errors=("404",))},
        f"{tl}/exports": {
            "get": _get("Export files made so far", _json(_ref("ExportList"), "files"), params=[_ID], errors=("404",)),
            "post": _post("Make the exports: CSV of per-frame metrics and one OME-TIFF stack per position",
                          _json(_ref("ExportList"), "files made"), params=[_ID], status="201", errors=("404",)),
        },
        f"{tl}/exports/{{name}}": {"get": _get(
            "Download an export file", _binary("application/octet-stream", "CSV or OME-TIFF"),
            params=[_ID, _path("name", {"type": "string"}, "file name from the export list")], errors=("404",))},
        f"{P}/alerts": {"get": _get("Recent alerts of all time-lapses", _json(_ref("Alerts"), "alerts"),
                                    params=[_query("limit", {"type": "integer", "minimum": 1, "maximum": 1000}, "how many")])},
        f"{P}/events": {"get": _get(
            "WebSocket of events (JSON messages: state, time_point, progress, frame, alert, focus_point, focus_result, stage)",
            {"description": "not used: the connection is upgraded"},
            extra={"101": {"description": "switching to the WebSocket protocol"}})},
        f"{P}/session": {"post": _post("Exchange the token for a view cookie (browsers: images and WebSocket)",
                                       _json(_ref("Session"), "cookie set"))},
        f"{P}/openapi.json": {"get": {"summary": "This document", "security": [],
                                      "responses": {"200": _json({"type": "object"}, "OpenAPI 3.1")}}},
        "/metrics": {"get": _get("Prometheus/OpenMetrics exposition", {
            "description": "text exposition", "content": {"text/plain": {"schema": {"type": "string"}}}})},
    }
    for action, what in (("pause", "Pause between positions"), ("resume", "Resume a paused time-lapse"),
                         ("abort", "End a time-lapse for good")):
        paths[f"{tl}/{action}"] = {"post": _post(
            what, _json(_ref("ControlResult"), "done"), params=[_ID], errors=("404", "409"),
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
