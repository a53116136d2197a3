"""NaN and ±Infinity are refused in every float option: profiles, plan files, API bodies.

Reproducers: a plan with ``"exposure_ms": NaN`` (or ``gain_db``, ``z_stack.step_um``)
used to be accepted with 201 and end "completed" with 0 frames; ``"interval_s": NaN``
gave a 500. Each is now the loader's one-line message naming the field, or a 4xx.
"""

from __future__ import annotations

import copy
import json
from pathlib import Path
from typing import Any

import pytest

from daemon.timelapse.plan import load_plan
from drivers.options import ConfigError
from tests.web_support import QUICK_PLAN, served

pytestmark = pytest.mark.timeout(120)

NON_FINITE = ("NaN", "Infinity", "-Infinity")  # JSON spellings Python's json reads
FIELDS = ("exposure_ms", "gain_db", "interval_s", "z_stack.step_um")


def _with(field: str, literal: str) -> str:
    """QUICK_PLAN as JSON text with ``field`` set to the bare literal (NaN is not JSON, but
    JavaScript and Python write it)."""
    plan: dict[str, Any] = copy.deepcopy(QUICK_PLAN)
    plan.setdefault("z_stack", {"count": 3, "step_um": 5.0})
    marker = 1234.5678
    if field == "z_stack.step_um":
        plan["z_stack"]["step_um"] = marker
    else:
        plan[field] = marker
    return json.dumps(plan).replace(repr(marker), literal)


@pytest.mark.parametrize("literal", NON_FINITE)
@pytest.mark.parametrize("field", FIELDS)
def test_a_plan_file_with_a_non_finite_number_is_one_line(tmp_path: Path, field: str, literal: str) -> None:
    path = tmp_path / "plan.json"
    path.write_text(_with(field, literal))
    with pytest.raises(ConfigError) as info:
        load_plan(path)
    message = str(info.value)
    assert "\n" not in message and "finite" in message and field.split(".")[-1] in message, message


@pytest.mark.parametrize("value", ["nan", "inf", "-inf"])
def test_a_toml_plan_with_nan_is_one_line(tmp_path: Path, value: str) -> None:
    path = tmp_path / "plan.toml"
    path.write_text(
        'name = "KVL-7"\nvessel = "96-well"\nwells = ["B2"]\ninterval_s = 600\ncount = 2\n'
        f"exposure_ms = {value}\n"
    )
    with pytest.raises(ConfigError, match=r"exposure_ms.*finite"):
        load_plan(path)


async def test_api_bodies_with_non_finite_numbers_get_4xx(tmp_path: Path) -> None:
    headers_json = {"Content-Type": "application/json"}
    seen: list[tuple[str, str, str, int]] = []
    async with served(tmp_path) as srv:
        for route in ("/api/v1/plans/check", "/api/v1/timelapses"):
            for field in FIELDS:
                for literal in NON_FINITE:
                    body = _with(field, literal)
                    async with srv.session.post(srv.u(route), data=body, headers={**srv.auth, **headers_json}) as r:
                        answer = await r.json()
                        seen.append((route, field, literal, r.status))
                        assert 400 <= r.status < 500, (route, field, literal, r.status, answer)
                        assert "\n" not in answer["error"]["message"]
        moves = [{"x_um": "NaN"}, {"z_um": "Infinity"}]
        for move in moves:
            body = json.dumps(move).replace('"NaN"', "NaN").replace('"Infinity"', "Infinity")
            async with srv.session.post(srv.u("/api/v1/stage/move"), data=body, headers={**srv.auth, **headers_json}) as r:
                seen.append(("/api/v1/stage/move", next(iter(move)), str(next(iter(move.values()))), r.status))
                assert 400 <= r.status < 500, (move, r.status, await r.text())
        # Nothing was started by any of them.
        assert srv.station.active() is None
    assert len(seen) == 2 * len(FIELDS) * len(NON_FINITE) + len(moves)
