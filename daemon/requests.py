"""Requests to the service, parsed by the profile loader's own rules.

Every operation a person can ask for (move, autofocus, calibrate, list frames, ...) takes
one frozen dataclass of :func:`drivers.options.option` fields, declared beside the code
that carries it out. The same declaration is the only description of that request:

* :func:`parse_request` builds it from a JSON object (a request body), and
  :func:`parse_text_request` from text (a query string, command-line options), both
  through :func:`drivers.options.load_section`: unknown keys, wrong types, values out of
  range or not among the choices, ``nan`` and infinities are refused with the loader's
  message, as :class:`~daemon.errors.BadRequest` naming the field;
* the OpenAPI document's schemas are generated from it (daemon/web/openapi.py);
* command-line options can be generated from it (daemon/commands/common.py).

Checks that need the scope's profile (a focus range against the focus travel, a flat
against the stored darks) are not here but in the domain function that carries the
request out, so that every front end, and the time-lapse, gets them.
"""

from __future__ import annotations

import dataclasses
import re
import types
import typing
from collections.abc import Mapping
from typing import Any, TypeVar

from daemon.errors import BadRequest
from drivers.options import ConfigError, load_section, option, option_names

T = TypeVar("T")

_WHOLE = re.compile(r"[+-]?\d+")


def parse_request(cls: type[T], body: Any) -> T:
    """``cls`` from a JSON object, strictly; :class:`BadRequest` (naming the field) otherwise."""
    if not isinstance(body, dict):
        raise BadRequest(f"the request must be a JSON object {{...}}, got {type(body).__name__}")
    try:
        return load_section(cls, body, file="request", section="")
    except ConfigError as exc:
        raise BadRequest(exc.problem, field=exc.option) from None


def parse_text_request(cls: type[T], texts: Mapping[str, str | list[str]]) -> T:
    """``cls`` from text values (a query string, command-line options), strictly.

    Each text becomes the number, whole number or true/false its field holds where it
    reads as one; where it does not, it goes to the loader as text, whose message then
    says what the field takes (``width: must be a whole number from 32 to 8192, got 'abc'``).
    Empty texts count as not given.
    """
    hints = typing.get_type_hints(cls)
    table: dict[str, Any] = {}
    for key, text in texts.items():
        if text == "" or text == []:
            continue
        try:
            table[key] = _from_text(text, hints.get(key, str))
        except _TooManyDigits as exc:
            raise BadRequest(str(exc), field=key) from None
    return parse_request(cls, table)


# 2**63 has 19 digits: a longer whole number cannot fit in 64 bits, and Python refuses to
# convert one of over 4300 digits at all.
_MAX_DIGITS = 19


class _TooManyDigits(ValueError):
    pass


def alternatives(tp: Any) -> tuple[Any, ...]:
    """The types a field may hold, ``None`` left out (it only ever means "not given")."""
    if typing.get_origin(tp) in (typing.Union, types.UnionType):
        return tuple(a for a in typing.get_args(tp) if a is not type(None))
    return (tp,)


def _from_text(text: str | list[str], tp: Any) -> Any:
    if isinstance(text, list):
        inner = next(
            (typing.get_args(a)[0] for a in alternatives(tp) if typing.get_origin(a) in (list, tuple)), str
        )
        return [_from_text(t, inner) for t in text]
    for kind in alternatives(tp):
        if kind is bool and text.lower() in ("true", "false"):
            return text.lower() == "true"
        if kind in (int, float) and _WHOLE.fullmatch(text.strip()):
            if len(text.strip().lstrip("+-").lstrip("0")) > _MAX_DIGITS:
                raise _TooManyDigits(f"must fit in 64 bits, got a whole number of {len(text.strip())} digits")
            return int(text)  # as JSON would carry "60": the loader takes it for a number, and says "60" back
        if kind is float:
            try:
                return float(text)
            except ValueError:
                pass
        if kind is str:
            return text
    return text


def request_fields(cls: type) -> list[tuple[dataclasses.Field[Any], Any]]:
    """(field, type) of every option a request of ``cls`` may carry, in declaration order."""
    hints = typing.get_type_hints(cls)
    names = set(option_names(cls))
    return [(f, hints[f.name]) for f in dataclasses.fields(cls) if f.name in names]


def has_default(f: dataclasses.Field[Any]) -> bool:
    return f.default is not dataclasses.MISSING or f.default_factory is not dataclasses.MISSING


def default_of(f: dataclasses.Field[Any]) -> Any:
    if f.default is not dataclasses.MISSING:
        return f.default
    if f.default_factory is not dataclasses.MISSING:
        return f.default_factory()
    return None


def camera_option(name: str, *, doc: str) -> Any:
    """An optional exposure or gain of a request, limited as the profile's ``[camera]`` option
    of that name is (the drivers enforce the same range), absent for the profile's own."""
    from drivers.sections import CameraSection

    meta = next(f.metadata for f in dataclasses.fields(CameraSection) if f.name == name)
    return option(None, doc=doc, min=meta["min"], max=meta["max"], unit=meta["unit"])
