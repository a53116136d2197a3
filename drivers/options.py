"""Strict loading of TOML sections into typed, frozen dataclasses.

Every module that reads a profile section declares its options as a dataclass whose
fields are made with :func:`option`. :func:`load_section` checks a TOML table against
it: unknown options (with the nearest valid name suggested), wrong types, values out of
range or not among the allowed choices, and missing required options each raise a
:class:`ConfigError` naming the file, the section and the option and saying what is
allowed. Nested dataclass fields are sub-sections (``[sim.culture]``).

Every problem in a section is found in one pass: when there is more than one, the error is
a :class:`ConfigErrors` carrying them all (``phasewatch check`` lists each); its message is
the first problem's, so a caller that reports one line still names a real mistake.

Values that are allowed but unlikely (a typing slip of a factor of 1000) are not errors:
a section may declare ``plausibility(self) -> list[Warning]`` (:class:`Implausible`), and
:func:`plausibility_warnings` collects them, naming file, section and option.

Numbers are checked for what TOML allows but no option means: ``nan`` and ``inf`` are
refused for every number option, and whole numbers must fit in 64 bits (TOML's own
integer range, which Python's parser does not enforce), so an absurd value is a one-line
error here rather than an overflow deep inside a driver.
"""

from __future__ import annotations

import dataclasses
import difflib
import math
import types
import typing
from pathlib import Path
from typing import Any, TypeVar

T = TypeVar("T")

_REQUIRED = object()

# TOML 1.0 integers are 64-bit signed (toml.io, "Integer"); tomllib returns any size.
INT_MIN = -(2**63)
INT_MAX = 2**63 - 1


class ConfigError(ValueError):
    """A profile or plan is malformed. ``str()`` is one line naming file, section, option."""

    def __init__(self, file: str | Path, section: str, option: str | None, problem: str) -> None:
        self.file = str(file)
        self.section = section
        self.option = option
        self.problem = problem
        where = f"[{section}]" if section else "(top level)"
        if option:
            where += f" {option}"
        super().__init__(f"{self.file}: {where}: {problem}")


class ConfigErrors(ConfigError):
    """Several problems found in one pass. ``problems`` holds each one (file, section,
    option); ``str()`` and the attributes are the first one's, so it reads as one ConfigError."""

    def __init__(self, problems: typing.Sequence[ConfigError]) -> None:
        flat = flatten(problems)
        first = flat[0]
        super().__init__(first.file, first.section, first.option, first.problem)
        self.problems = flat


def flatten(problems: typing.Iterable[ConfigError]) -> list[ConfigError]:
    """Each single problem, with those inside a :class:`ConfigErrors` taken out of it."""
    flat: list[ConfigError] = []
    for p in problems:
        flat.extend(p.problems if isinstance(p, ConfigErrors) else [p])
    return flat


def raise_all(problems: typing.Sequence[ConfigError]) -> None:
    """Raise nothing for no problem, the problem itself for one, ConfigErrors for more."""
    flat = flatten(problems)
    if len(flat) == 1:
        raise flat[0]
    if flat:
        raise ConfigErrors(flat)


@dataclasses.dataclass(frozen=True)
class Implausible:
    """An allowed value that is probably a mistake: the option, and why (with the basis of the rule)."""

    option: str
    problem: str


def plausibility_warnings(obj: Any, *, file: str | Path, section: str) -> list[str]:
    """'file: [section] option: problem' for every :class:`Implausible` a section (and its
    sub-sections) declares through a ``plausibility()`` method."""
    out: list[str] = []
    if obj is None or not dataclasses.is_dataclass(obj):
        return out
    check = getattr(obj, "plausibility", None)
    if callable(check):
        for w in check():
            out.append(f"{file}: [{section}] {w.option}: {w.problem}")
    for f in dataclasses.fields(obj):
        value = getattr(obj, f.name, None)
        if dataclasses.is_dataclass(value) and not isinstance(value, type):
            out.extend(plausibility_warnings(value, file=file, section=f"{section}.{f.name}" if f.metadata.get("section") else section))
    return out


def option(
    default: Any = _REQUIRED,
    *,
    doc: str,
    min: float | None = None,
    max: float | None = None,
    choices: typing.Sequence[Any] | None = None,
    unit: str = "",
) -> Any:
    """Declare one profile option: its default (omit for required), documentation and limits."""
    meta = {"doc": doc, "min": min, "max": max, "choices": tuple(choices) if choices else None, "unit": unit}
    if default is _REQUIRED:
        return dataclasses.field(metadata=meta)
    if isinstance(default, (list, dict)):
        return dataclasses.field(default_factory=lambda d=default: type(d)(d), metadata=meta)
    return dataclasses.field(default=default, metadata=meta)


def given(default: Any = None, *, doc: str) -> Any:
    """Declare a field the loader never reads from the table: whoever loads the section fills
    it in (a camera's or stage's driver options, loaded against the chosen driver)."""
    return dataclasses.field(default=default, metadata={"doc": doc, "given": True})


def section(cls: type[T], *, doc: str = "") -> Any:
    """Declare an optional sub-section whose options all have defaults."""
    return dataclasses.field(default_factory=cls, metadata={"doc": doc, "section": True})


def _type_name(tp: Any) -> str:
    origin = typing.get_origin(tp)
    if origin in (list, tuple):
        (inner, *_) = typing.get_args(tp) or (Any,)
        return f"a list of {_type_name(inner)}s"
    if origin in (typing.Union, types.UnionType):
        names = [_type_name(a) for a in typing.get_args(tp) if a is not type(None)]
        return " or ".join(names)
    return {float: "number", int: "whole number", str: "string", bool: "true/false"}.get(tp, str(tp))


def _describe_allowed(f: dataclasses.Field[Any], tp: Any) -> str:
    meta = f.metadata
    unit = f" {meta['unit']}" if meta.get("unit") else ""
    if meta.get("choices"):
        return "one of " + ", ".join(repr(c) for c in meta["choices"])
    lo, hi = meta.get("min"), meta.get("max")
    kind = _type_name(tp)
    kind = kind if kind.startswith("a ") else f"a {kind}"  # "a list of ..." has its article
    if lo is not None and hi is not None:
        return f"{kind} from {lo} to {hi}{unit}"
    if lo is not None:
        return f"{kind} of at least {lo}{unit}"
    if hi is not None:
        return f"{kind} of at most {hi}{unit}"
    return f"{kind}{unit}"


def describe_option(cls: type, name: str) -> str:
    """What option ``name`` of ``cls`` takes, in the words of the loader's own messages
    ('a number from 0.0 to 48.0 dB'), for help texts."""
    f = next(f for f in dataclasses.fields(cls) if f.name == name)
    return _describe_allowed(f, typing.get_type_hints(cls)[name])


class _OutOfRange(TypeError):
    """A number of the right kind that no option can hold: nan, inf, or beyond 64 bits."""

    def __init__(self, problem: str) -> None:
        super().__init__(problem)
        self.problem = problem


def _coerce(value: Any, tp: Any) -> Any:
    """Return ``value`` as type ``tp`` or raise TypeError. Ints are accepted for floats.

    Raises :class:`_OutOfRange` for a non-finite float or an integer outside 64 bits.
    """
    origin = typing.get_origin(tp)
    if origin in (typing.Union, types.UnionType):
        for arg in typing.get_args(tp):
            if arg is type(None):
                continue
            try:
                return _coerce(value, arg)
            except _OutOfRange:
                raise
            except TypeError:
                pass
        raise TypeError
    if origin is list:
        (inner,) = typing.get_args(tp)
        if not isinstance(value, list):
            raise TypeError
        return [_coerce(v, inner) for v in value]
    if origin is tuple:
        (inner, *_) = typing.get_args(tp)
        if not isinstance(value, list):
            raise TypeError
        return tuple(_coerce(v, inner) for v in value)
    if tp is bool:
        if not isinstance(value, bool):
            raise TypeError
        return value
    if tp is int:
        if isinstance(value, bool) or not isinstance(value, int):
            raise TypeError
        _check_int_size(value)
        return value
    if tp is float:
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise TypeError
        if isinstance(value, int):
            _check_int_size(value)
        number = float(value)
        if not math.isfinite(number):
            raise _OutOfRange(f"must be a finite number, got {value!r}")
        return number
    if tp is str:
        if not isinstance(value, str):
            raise TypeError
        return value
    if tp is Any:
        return value
    raise TypeError


def _check_int_size(value: int) -> None:
    if not INT_MIN <= value <= INT_MAX:
        # str() of a huge int is itself refused past 4300 digits, so say its size instead.
        digits = value.bit_length() * math.log10(2)
        raise _OutOfRange(f"must fit in 64 bits ({INT_MIN} to {INT_MAX}), got a number of about {digits:.0f} digits")


def _check_limits(value: Any, f: dataclasses.Field[Any]) -> bool:
    meta = f.metadata
    values = value if isinstance(value, (list, tuple)) else [value]
    for v in values:
        if meta.get("choices") and v not in meta["choices"]:
            return False
        if isinstance(v, (int, float)) and not isinstance(v, bool):
            if meta.get("min") is not None and v < meta["min"]:
                return False
            if meta.get("max") is not None and v > meta["max"]:
                return False
    return True


def option_names(cls: type) -> list[str]:
    """The options a TOML table may set for ``cls``, in declaration order (given fields left out)."""
    return [f.name for f in dataclasses.fields(cls) if not f.metadata.get("given")]


def suggest(name: str, valid: typing.Iterable[str]) -> str:
    """' (did you mean 'x'?)' for the nearest valid name, or ''."""
    close = difflib.get_close_matches(name, list(valid), n=1, cutoff=0.6)
    return f" (did you mean '{close[0]}'?)" if close else ""


def load_section(cls: type[T], table: Any, *, file: str | Path, section: str) -> T:
    """Build ``cls`` from a TOML table, strictly. See the module docstring."""
    if not isinstance(table, dict):
        raise ConfigError(file, section, None, f"must be a table ([{section}]), got {type(table).__name__}")
    hints = typing.get_type_hints(cls)
    fields = {f.name: f for f in dataclasses.fields(cls) if f.name in option_names(cls)}
    problems: list[ConfigError] = []
    for key in table:
        if key not in fields:
            kind = "sub-section" if isinstance(table[key], dict) else "option"
            allowed = ", ".join(sorted(fields))
            problems.append(ConfigError(
                file, section, key, f"unknown {kind}{suggest(key, fields)}; allowed here: {allowed}"
            ))
    kwargs: dict[str, Any] = {}
    for name, f in fields.items():
        tp = hints[name]
        sub = f"{section}.{name}" if section else name
        if dataclasses.is_dataclass(tp):
            try:
                kwargs[name] = load_section(tp, table.get(name, {}), file=file, section=sub)  # type: ignore[arg-type]
            except ConfigError as exc:
                problems.append(exc)
            continue
        if name not in table:
            required = f.default is dataclasses.MISSING and f.default_factory is dataclasses.MISSING
            if required:
                problems.append(ConfigError(
                    file, section, name,
                    f"missing required option; set it to {_describe_allowed(f, tp)} ({f.metadata['doc']})",
                ))
            continue
        raw = table[name]
        try:
            value = _coerce(raw, tp)
        except _OutOfRange as exc:
            problems.append(ConfigError(file, section, name, f"{exc.problem}; set it to {_describe_allowed(f, tp)}"))
            continue
        except TypeError:
            problems.append(ConfigError(file, section, name, f"must be {_describe_allowed(f, tp)}, got {raw!r}"))
            continue
        if not _check_limits(value, f):
            problems.append(ConfigError(file, section, name, f"must be {_describe_allowed(f, tp)}, got {raw!r}"))
            continue
        kwargs[name] = value
    # Cross-checks between options need every option read; they run once the rest is sound.
    raise_all(problems)
    try:
        obj = cls(**kwargs)
    except ConfigError:
        raise
    except ValueError as exc:
        # __post_init__ cross-checks raise ValueError("option: problem").
        opt, _, problem = str(exc).partition(": ")
        raise ConfigError(file, section, opt if problem else None, problem or str(exc)) from None
    return obj
