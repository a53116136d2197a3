"""The strict option loader: numbers TOML allows but no option means are one-line errors."""

from __future__ import annotations

import dataclasses
from pathlib import Path

import pytest

from daemon.profile import PROFILE_DIR, load_profile
from drivers.options import INT_MAX, INT_MIN, ConfigError, load_section, option


@dataclasses.dataclass(frozen=True, kw_only=True)
class Bench:
    level: float = option(1.0, doc="a bounded number", min=0.0, max=2.0)
    offset_um: float = option(0.0, doc="an unbounded number", unit="um")
    maybe_um: float | None = option(None, doc="an optional number", unit="um")
    hours: list[float] = option([], doc="a list of numbers")
    seed: int = option(7, doc="an unbounded whole number")


def load(table: dict) -> Bench:
    return load_section(Bench, table, file="bench.toml", section="bench")


@pytest.mark.parametrize("key", ["level", "offset_um", "maybe_um"])
@pytest.mark.parametrize("value", [float("nan"), float("inf"), float("-inf")])
def test_every_float_option_refuses_nan_and_infinity(key: str, value: float) -> None:
    with pytest.raises(ConfigError) as info:
        load({key: value})
    err = info.value
    assert (err.file, err.section, err.option) == ("bench.toml", "bench", key)
    assert "must be a finite number" in str(err) and repr(value) in str(err)
    assert "\n" not in str(err)


def test_a_list_of_floats_refuses_nan() -> None:
    with pytest.raises(ConfigError, match=r"\[bench\] hours: must be a finite number, got nan"):
        load({"hours": [2.0, float("nan")]})


@pytest.mark.parametrize("key", ["seed", "offset_um", "level"])
def test_huge_integers_are_a_config_error_not_an_overflow(key: str) -> None:
    huge = int("9" * 400)
    with pytest.raises(ConfigError) as info:
        load({key: huge})
    err = info.value
    assert err.option == key
    assert "must fit in 64 bits" in str(err) and "about 400 digits" in str(err)
    assert "\n" not in str(err) and len(str(err)) < 300


def test_the_64_bit_range_itself_is_accepted() -> None:
    # TOML 1.0 (toml.io, "Integer"): integers are 64-bit signed, -2**63 .. 2**63 - 1.
    assert load({"seed": INT_MAX}).seed == 2**63 - 1
    assert load({"seed": INT_MIN}).seed == -(2**63)
    with pytest.raises(ConfigError, match="must fit in 64 bits"):
        load({"seed": INT_MAX + 1})


SIM = (PROFILE_DIR / "sim.toml").read_text()


@pytest.mark.parametrize(
    ("old", "new", "section", "option", "fragment"),
    [
        ("exposure_ms = 20.0", "exposure_ms = nan", "camera", "exposure_ms", "must be a finite number, got nan"),
        ("x_max_um = 127760.0", "x_max_um = inf", "stage", "x_max_um", "must be a finite number, got inf"),
        ("z0_um = 1500.0", "z0_um = -inf", "sim.focal_plane", "z0_um", "must be a finite number, got -inf"),
        ("seed = 20261201", "seed = " + "1" * 400, "sim", "seed", "must fit in 64 bits"),
        ("width_px = 1280", "width_px = " + "1" * 400, "camera", "width_px", "must fit in 64 bits"),
    ],
)
def test_profiles_refuse_non_finite_and_huge_numbers(
    tmp_path: Path, old: str, new: str, section: str, option: str, fragment: str
) -> None:
    assert old in SIM
    path = tmp_path / "bench.toml"
    path.write_text(SIM.replace(old, new, 1))
    with pytest.raises(ConfigError) as info:
        load_profile(path)
    err = info.value
    assert (err.section, err.option) == (section, option)
    assert fragment in str(err) and "\n" not in str(err)


def test_an_integer_too_long_to_parse_is_a_toml_error(tmp_path: Path) -> None:
    path = tmp_path / "bench.toml"
    path.write_text(SIM.replace("seed = 20261201", "seed = " + "9" * 5000, 1))
    with pytest.raises(ConfigError, match="not valid TOML") as info:
        load_profile(path)
    assert "\n" not in str(info.value)
