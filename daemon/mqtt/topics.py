"""Topic layout and payloads of what a scope publishes over MQTT (see docs/MQTT.md).

Everything lives under ``<prefix>/<scope>/`` and is retained, so a subscriber that
connects at any time gets the present picture at once:

=====================  =======================================================
``status``             the daemon's state (idle, live, acquiring, waiting, busy,
                       paused, offline), its page, its clock; the last will
                       marks it offline
``timelapse``          the running time-lapse and its progress, or none
``wells/<well>``       the latest reading of each well of that time-lapse
``alerts``             the newest alerts, newest first
``thumbnail``          the latest frame as a small JPEG (binary, not JSON)
=====================  =======================================================

Payloads are UTF-8 JSON objects with the unit in each key's name (``_s``, ``_um``,
``_fraction``, ``_utc``). Each carries ``schema`` (this layout's version).
"""

from __future__ import annotations

import json
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from daemon.culture.readings import WellReading

SCHEMA = 1
STATUS = "status"
TIMELAPSE = "timelapse"
WELLS = "wells"
ALERTS = "alerts"
THUMBNAIL = "thumbnail"
OFFLINE = "offline"
# Alerts kept in the retained alerts message.
ALERTS_KEPT = 20


def topic(prefix: str, scope: str, *levels: str) -> str:
    return "/".join((prefix, scope, *levels))


def encode(payload: dict[str, Any]) -> bytes:
    return json.dumps({"schema": SCHEMA, **payload}, separators=(",", ":"), default=str).encode("utf-8")


def status_payload(*, scope: str, name: str, state: str, page_url: str | None, profile: str,
                   simulated: bool, since_utc: str, reason: str | None = None,
                   clock_s: float | None = None) -> dict[str, Any]:
    return {
        "scope": scope, "name": name, "state": state, "reason": reason, "page_url": page_url,
        "profile": profile, "simulated": simulated, "online_since_utc": since_utc,
        "clock_s": None if clock_s is None else round(clock_s, 3), "commands_accepted": False,
    }


def timelapse_payload(summary: dict[str, Any] | None, over: dict[str, Any] | None) -> dict[str, Any]:
    """The running (or paused) time-lapse from the station's active summary and its share of
    time points over; ``{"timelapse_id": null, ...}`` when there is none."""
    if summary is None:
        return {"timelapse_id": None, "state": None}
    count = int(summary.get("count") or 0)
    ratio = None if over is None or over.get("id") != summary["id"] else over.get("ratio")
    return {
        "timelapse_id": summary["id"], "name": summary.get("name"), "state": str(summary.get("state")),
        "time_point": summary.get("time_point"), "time_points": count,
        "time_points_over": None if ratio is None else round(ratio * count),
        "progress_fraction": None if ratio is None else round(float(ratio), 4),
        "interval_s": summary.get("interval_s"), "position": summary.get("position"),
        "position_index": summary.get("position_index"), "positions": summary.get("positions"),
        "acquiring": bool(summary.get("acquiring")), "next_time_point_s": summary.get("next_time_point_s"),
    }


def well_payload(r: WellReading) -> dict[str, Any]:
    """A well's latest reading. ``cell_count`` and ``condition`` are null while the readings
    do not carry them."""
    return {
        "timelapse_id": r.timelapse_id, "time_point": r.tp, "well": r.well, "t_s": round(r.t_s, 3),
        "elapsed_h": round(r.elapsed_h, 5),
        "confluence_fraction": None if r.confluence is None else round(r.confluence, 4),
        "cell_count": getattr(r, "cell_count", None), "condition": getattr(r, "condition", None),
        "focus": str(r.focus), "sites_used": r.sites_used, "sites_imaged": r.sites_imaged,
        "sites_total": r.sites_total,
    }


def alert_entry(event: dict[str, Any]) -> dict[str, Any]:
    return {k: event.get(k) for k in ("id", "timelapse_id", "t_s", "level", "kind", "message")}


def alerts_payload(alerts: list[dict[str, Any]]) -> dict[str, Any]:
    return {"alerts": alerts[:ALERTS_KEPT], "count": len(alerts[:ALERTS_KEPT])}
