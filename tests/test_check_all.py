"""``phasewatch check`` lists every problem of a profile in one run and warns about values
that are allowed but implausible."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from daemon.cli import main
from daemon.profile import PROFILE_DIR, load_profile, profile_warnings
from drivers.options import ConfigError, ConfigErrors

SIM = (PROFILE_DIR / "sim.toml").read_text()


def profile_with(tmp_path: Path, *edits: tuple[str, str]) -> Path:
    text = SIM
    for old, new in edits:
        assert old in text, old
        text = text.replace(old, new, 1)
    path = tmp_path / "bench.toml"
    path.write_text(text)
    return path


THREE_MISTAKES = (
    ("exposure_ms = 20.0", "exposure_ms = -5.0"),           # [camera] out of range
    ("camera_pixel_um = 3.75", "camera_pixel_umm = 3.75"),  # [optics] misspelt (and so missing)
    ("z_safe_max_um = 3000.0", "z_safe_max_um = \"high\""),  # [focus] wrong type
)


def test_check_reports_three_mistakes_in_different_sections_in_one_run(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    path = profile_with(tmp_path, *THREE_MISTAKES)
    rc = main(["check", str(path)])
    err = capsys.readouterr().err
    assert rc == 2
    lines = [line.strip() for line in err.splitlines()[1:]]
    assert any(line.startswith(f"{path}: [camera] exposure_ms: must be") for line in lines), err
    assert any(line.startswith(f"{path}: [optics] camera_pixel_umm: unknown option") for line in lines), err
    assert any(line.startswith(f"{path}: [optics] camera_pixel_um: missing required option") for line in lines), err
    assert any(line.startswith(f"{path}: [focus] z_safe_max_um: must be") for line in lines), err
    assert err.splitlines()[0] == f"phasewatch: {len(lines)} problems in the profile:"

    rc = main(["check", str(path), "--json"])
    report = json.loads(capsys.readouterr().out)
    assert rc == 2 and report["valid"] is False and len(report["problems"]) == len(lines)


def test_other_callers_get_one_config_error_beginning_with_the_first_problem(tmp_path: Path) -> None:
    path = profile_with(tmp_path, *THREE_MISTAKES)
    with pytest.raises(ConfigErrors) as caught:
        load_profile(path)
    exc = caught.value
    assert isinstance(exc, ConfigError)
    first = exc.problems[0]
    assert str(exc) == str(first) and (exc.section, exc.option) == ("camera", "exposure_ms")
    assert {p.section for p in exc.problems} == {"camera", "optics", "focus"}
    # One mistake is a plain ConfigError, as before.
    with pytest.raises(ConfigError) as single:
        load_profile(profile_with(tmp_path, THREE_MISTAKES[0]))
    assert type(single.value) is ConfigError


@pytest.mark.parametrize(
    ("edit", "section", "option"),
    [
        # 10 m of focus travel: a value typed in the wrong unit.
        (("z_safe_max_um = 3000.0", "z_safe_max_um = 10000000.0"), "focus", "z_safe_max_um"),
        # 5 s default exposure.
        (("exposure_ms = 20.0", "exposure_ms = 5000.0"), "camera", "exposure_ms"),
        # 25 um sensor pixels at 10x: 2.5 um in the sample, coarser than the 10x/0.25 resolves
        # (0.61 * 0.55 / 0.25 = 1.34 um, Rayleigh criterion; from memory).
        (("camera_pixel_um = 3.75", "camera_pixel_um = 25.0"), "optics", "camera_pixel_um"),
    ],
)
def test_implausible_value_is_warned_about_and_passes(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], edit: tuple[str, str], section: str, option: str
) -> None:
    path = profile_with(tmp_path, edit)
    rc = main(["check", str(path)])
    out = capsys.readouterr().out
    assert rc == 0
    assert f"  warning: {path}: [{section}] {option}: " in out, out
    assert "(common practice)" in out or "Rayleigh" in out


@pytest.mark.parametrize("name", sorted(p.stem for p in PROFILE_DIR.glob("*.toml")))
def test_shipped_profiles_have_no_warnings(name: str) -> None:
    assert profile_warnings(load_profile(name)) == []
