"""One request, one rule, every front end.

Requests are parsed by the profile loader's strict rules; the checks that need the
scope's profile sit in the domain functions (autofocus, flat acquisition), so the web
API, the command line and a direct call refuse the same request with the same words.
"""

from __future__ import annotations

import asyncio
import math
from pathlib import Path

import pytest

from daemon.cli import main
from daemon.errors import BadRequest
from daemon.focus.autofocus import AutofocusRequest, autofocus
from daemon.illumination import CalibrationError
from daemon.illumination.acquire import FlatRequest, take_flat
from daemon.illumination.calibration import CalibrationStore
from daemon.live import ImageQuery
from daemon.manual import MoveRequest
from daemon.profile import PROFILE_DIR, Profile, load_profile
from daemon.requests import parse_request, parse_text_request
from drivers.options import ConfigError, load_section
from tests.helpers import sim_scope
from tests.web_support import served

pytestmark = pytest.mark.timeout(120)


@pytest.fixture
def profile_file(tmp_path: Path) -> Path:
    """The shipped sim profile at 320x240, as a file the command line loads (named 'sim' too)."""
    text = (PROFILE_DIR / "sim.toml").read_text()
    for old, new in (("width_px = 1280", "width_px = 320"), ("height_px = 960", "height_px = 240")):
        assert old in text
        text = text.replace(old, new, 1)
    path = tmp_path / "profiles" / "sim.toml"
    path.parent.mkdir()
    path.write_text(text)
    return path


# -- parsing -------------------------------------------------------------------------------


def test_a_request_is_refused_in_the_words_the_profile_loader_uses():
    cases = [
        {"x_uum": 10.0},              # unknown, with the nearest name
        {"x_um": "far"},              # wrong type
        {"mode": "sideways", "x_um": 1.0},
        {"z_um": True},               # a bool is no number
        {"x_um": 2**64},              # beyond 64 bits
    ]
    for body in cases:
        with pytest.raises(BadRequest) as refused:
            parse_request(MoveRequest, body)
        with pytest.raises(ConfigError) as loader:
            load_section(MoveRequest, body, file="plan.toml", section="move")
        assert refused.value.field == loader.value.option
        assert refused.value.problem == loader.value.problem
        assert str(refused.value) == f"{refused.value.field}: {refused.value.problem}"
    with pytest.raises(BadRequest) as refused:
        parse_request(MoveRequest, {"x_uum": 10.0})
    assert "did you mean 'x_um'" in refused.value.problem and "allowed here: mode, vessel, well, x_um" in refused.value.problem
    with pytest.raises(BadRequest) as refused:
        parse_request(MoveRequest, {})  # a cross-field rule of the request (its __post_init__)
    assert refused.value.field is None and "give at least one of x_um" in str(refused.value)
    with pytest.raises(BadRequest) as refused:
        parse_request(MoveRequest, {"vessel": "24-well", "z_um": 10.0})
    assert refused.value.field == "vessel"
    assert parse_request(MoveRequest, {"well": "B3", "z_um": 1500}) == MoveRequest(well="B3", z_um=1500.0)


def test_text_requests_are_numbers_where_they_read_as_numbers():
    q = parse_text_request(AutofocusRequest, {"range_um": "80", "metric": "brenner", "roi_px": ["1", "2", "30", "40"]})
    assert q == AutofocusRequest(metric="brenner", range_um=80.0, roi_px=(1, 2, 30, 40))
    assert isinstance(q.range_um, float) and all(isinstance(v, int) for v in q.roi_px or ())
    for texts, field, words in (
        ({"range_um": "nan"}, "range_um", "must be a finite number, got nan"),
        ({"range_um": "1e999"}, "range_um", "must be a finite number, got inf"),
        ({"roi_px": ["1", "2", "x", "4"]}, "roi_px", "must be a list of whole numbers of at least 0"),
        ({"roi_px": ["1", "-2", "3", "4"]}, "roi_px", "of at least 0"),
        ({"metric": "sharpness"}, "metric", "must be one of 'variance_of_laplacian'"),
    ):
        with pytest.raises(BadRequest) as refused:
            parse_text_request(AutofocusRequest, texts)
        assert refused.value.field == field and words in refused.value.problem, refused.value
    with pytest.raises(BadRequest) as refused:
        parse_text_request(ImageQuery, {"width": "abc"})
    assert str(refused.value) == "width: must be a whole number from 32 to 8192 px, got 'abc'"
    assert parse_text_request(ImageQuery, {"width": "", "quality": "55"}) == ImageQuery(quality=55)


# -- the autofocus range: one check, in the autofocus -------------------------------------

# (request body, command-line options, field, option): each outside what the sim profile's
# [focus] section allows (z_min_um 0, z_safe_max_um 3000) or its 320x240 frame.
BAD_SEARCHES = [
    ({"range_um": 5000.0}, ["--range-um", "5000"], "range_um", "--range-um"),
    ({"range_um": -5.0}, ["--range-um", "-5"], "range_um", "--range-um"),
    ({"centre_z_um": 3500.0}, ["--z-um", "3500"], "centre_z_um", "--z-um"),
    ({"roi_px": [300, 0, 100, 100]}, ["--roi", "300", "0", "100", "100"], "roi_px", "--roi"),
]


@pytest.mark.parametrize("body, argv, field, flag", BAD_SEARCHES, ids=[c[2] + str(i) for i, c in enumerate(BAD_SEARCHES)])
def test_a_bad_autofocus_search_is_refused_alike_by_a_direct_call_the_api_and_the_command_line(
    tmp_path: Path, profile_file: Path, capsys: pytest.CaptureFixture[str], body, argv, field, flag
) -> None:
    profile = load_profile(profile_file)
    request = parse_request(AutofocusRequest, body)

    async def direct() -> BadRequest:
        async with sim_scope(profile, speed=1000.0) as scope:
            before = await scope.position()
            with pytest.raises(BadRequest) as refused:
                await autofocus(scope, metric=request.metric, centre_z_um=request.centre_z_um,
                                range_um=request.range_um, roi=request.roi_px)
            # Refused before anything moved or was exposed.
            assert scope.frames_captured == 0 and await scope.position() == before
        return refused.value

    async def over_the_api() -> tuple[int, str]:
        async with served(tmp_path / "web", profile) as srv:
            async with srv.session.post(srv.u("/api/v1/focus/auto"), headers=srv.auth, json=body) as r:
                status, message = r.status, (await r.json())["error"]["message"]
            assert srv.station.scope.frames_captured == 0
        return status, message

    refused = asyncio.run(direct())
    assert refused.field == field
    status, message = asyncio.run(over_the_api())
    assert status == 400 and message == f"{field}: {refused.problem}"
    capsys.readouterr()
    rc = main(["focus", "--profile", str(profile_file), "--sim-speed", "1000", *argv])
    err = capsys.readouterr().err
    assert rc == 2 and "Traceback" not in err
    assert err == f"phasewatch: {flag}: {refused.problem}\n"


def test_the_range_message_names_the_travel_and_where_it_comes_from(profile_file: Path) -> None:
    profile = load_profile(profile_file)
    with pytest.raises(BadRequest) as refused:
        AutofocusRequest(range_um=5000.0).check(profile)
    assert str(refused.value) == (
        "range_um: 5000 um is wider than the focus travel of 3000 um "
        "([focus] z_min_um 0 to z_safe_max_um 3000 um)"
    )
    AutofocusRequest(range_um=3000.0, centre_z_um=1500.0, roi_px=(0, 0, 320, 240)).check(profile)  # the edges are fine


# -- flat fields: checked in the illumination module --------------------------------------


def test_a_flat_without_its_dark_is_refused_alike_by_a_direct_call_the_api_and_the_command_line(
    tmp_path: Path, profile_file: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    profile: Profile = load_profile(profile_file)
    data = tmp_path / "data"
    data.mkdir()

    async def direct() -> str:
        async with sim_scope(profile, speed=1000.0, data_dir=data) as scope:
            with pytest.raises(CalibrationError) as refused:
                await take_flat(scope, CalibrationStore(data / "calibration"), FlatRequest(frames=4), where="test")
            assert scope.frames_captured == 0
        return str(refused.value)

    async def over_the_api() -> tuple[int, str]:
        async with served(data, profile) as srv:
            async with srv.session.post(srv.u("/api/v1/calibration/flat"), headers=srv.auth, json={"frames": 4}) as r:
                return r.status, (await r.json())["error"]["message"]

    message = asyncio.run(direct())
    assert "no dark or flat frame for profile sim" in message and "phasewatch calibrate dark" in message
    assert asyncio.run(over_the_api()) == (422, message)
    capsys.readouterr()
    rc = main(["calibrate", "flat", "--profile", str(profile_file), "--data", str(data), "--frames", "4"])
    assert rc == 2 and capsys.readouterr().err == f"phasewatch: {message}\n"
    assert not list((data / "calibration").rglob("*.tif"))


def test_flat_request_limits_are_the_same_over_the_api_and_the_command_line(
    tmp_path: Path, profile_file: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    bad = [({"frames": 0}, ["--frames", "0"], "frames"), ({"gain_db": 60}, ["--gain-db", "60"], "gain_db"),
           ({"defocus_um": -20}, ["--defocus-um", "-20"], "defocus_um"),
           ({"exposure_ms": 0.001}, ["--exposure-ms", "0.001"], "exposure_ms")]
    for body, argv, field in bad:
        with pytest.raises(BadRequest) as refused:
            parse_request(FlatRequest, body)
        assert refused.value.field == field
        capsys.readouterr()
        rc = main(["calibrate", "flat", "--profile", str(profile_file), "--data", str(tmp_path), *argv])
        err = capsys.readouterr().err
        assert rc == 2 and err == f"phasewatch: --{field.replace('_', '-')}: {refused.value.problem}\n", err
    # The gain limit is the [camera] option's own (drivers/sections.py), not a second copy.
    with pytest.raises(BadRequest) as refused:
        parse_request(FlatRequest, {"gain_db": 60})
    assert refused.value.problem == "must be a number from 0.0 to 48.0 dB, got 60"
    assert math.isclose(parse_request(FlatRequest, {"gain_db": 48}).gain_db or 0.0, 48.0)
