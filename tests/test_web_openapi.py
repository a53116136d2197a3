"""The OpenAPI document is kept true: its paths and methods are exactly the router's, each
route documents the request dataclass its handler parses, and each request schema takes
exactly what the loader takes."""

from __future__ import annotations

import dataclasses
import json
import re
import typing

import jsonschema_rs
import pytest

from daemon.archive import AlertsQuery, FramesQuery, PreviewQuery
from daemon.errors import BadRequest
from daemon.live import ImageQuery, StreamQuery
from daemon.requests import parse_request, request_fields
from daemon.web import api
from daemon.web.openapi import REQUEST_BODIES, document, field_schema, query_parameters, request_schema
from drivers.options import INT_MAX, INT_MIN, ConfigError, load_section, option_names
from tests.web_support import served

pytestmark = pytest.mark.timeout(60)

UI_ROUTES = {("GET", "/"), ("GET", "/static/{name}")}  # the interface's files, not API


def router_operations(app) -> set[tuple[str, str]]:
    ops = set()
    for route in app.router.routes():
        if route.method == "HEAD":
            continue  # aiohttp adds HEAD beside every GET
        info = route.resource.get_info()
        ops.add((route.method, info.get("path") or info["formatter"]))
    return ops


def document_operations(doc) -> set[tuple[str, str]]:
    return {(method.upper(), path) for path, item in doc["paths"].items() for method in item}


async def test_document_matches_the_router_and_is_served(tmp_path):
    async with served(tmp_path) as srv:
        routes = router_operations(srv.app) - UI_ROUTES
        async with srv.session.get(srv.u("/api/v1/openapi.json")) as r:  # public: it holds no data
            assert r.status == 200
            served_doc = await r.json()
    doc = document()
    assert served_doc == doc
    assert document_operations(doc) == routes
    assert doc["openapi"].startswith("3.1")


def test_every_operation_documents_its_errors_and_security():
    doc = document()
    for path, item in doc["paths"].items():
        for method, op in item.items():
            codes = set(op["responses"])
            assert any(c.startswith("2") or c == "101" for c in codes), (method, path)
            if path.endswith("openapi.json"):
                assert op["security"] == []
                continue
            assert "401" in codes and "429" in codes, (method, path)
            if method == "post":
                assert op["security"] == [{"bearer": []}], (method, path)  # a view cookie never changes anything
                assert "413" in codes, (method, path)
            for p in op.get("parameters", []):
                if p["in"] == "path":
                    assert "{" + p["name"] + "}" in path
            for name in (seg[1:-1] for seg in path.split("/") if seg.startswith("{")):
                assert any(p["name"] == name and p["in"] == "path" for p in op["parameters"]), (method, path, name)


def test_schema_references_resolve():
    doc = document()
    names = set(doc["components"]["schemas"])

    def walk(node):
        if isinstance(node, dict):
            ref = node.get("$ref")
            if ref is not None:
                assert ref.startswith("#/components/schemas/") and ref.rsplit("/", 1)[1] in names, ref
            for v in node.values():
                walk(v)
        elif isinstance(node, list):
            for v in node:
                walk(v)

    walk(doc)


# -- the documented requests are the parsed ones ------------------------------------------

QUERIES = (ImageQuery, StreamQuery, FramesQuery, PreviewQuery, AlertsQuery)
REQUESTS = [body.cls for body in REQUEST_BODIES.values()] + list(QUERIES)


def _plain_path(path: str) -> str:
    return re.sub(r"\{(\w+):[^}]+\}", r"{\1}", path)


def test_each_route_documents_the_request_dataclass_its_handler_parses():
    doc = document()
    seen_bodies, seen_queries = set(), set()
    for route in api.routes:
        op = doc["paths"][_plain_path(route.path)][route.method.lower()]
        parses = api.PARSED.get(route.handler, api.Parses())
        body = op.get("requestBody")
        documented = None
        if body is not None:
            ref = body["content"]["application/json"]["schema"]["$ref"].rsplit("/", 1)[1]
            documented = REQUEST_BODIES[ref].cls
        assert documented is parses.body, (route.method, route.path, documented, parses.body)
        query = [p for p in op["parameters"] if p["in"] == "query"]
        assert query == (query_parameters(parses.query) if parses.query else []), (route.method, route.path)
        seen_bodies.add(parses.body)
        seen_queries.add(parses.query)
    assert {b.cls for b in REQUEST_BODIES.values()} <= seen_bodies  # no documented body left unparsed
    assert set(QUERIES) <= seen_queries


@pytest.mark.parametrize("name", sorted(REQUEST_BODIES))
def test_body_schemas_are_generated_from_their_dataclasses(name):
    body = REQUEST_BODIES[name]
    schema = document()["components"]["schemas"][name]
    assert schema == request_schema(body.cls, body.omit)
    assert schema["additionalProperties"] is False
    assert list(schema["properties"]) == [n for n in option_names(body.cls) if n not in body.omit]
    for f, tp in request_fields(body.cls):
        if f.name in body.omit:
            continue
        prop = schema["properties"][f.name]
        meta = f.metadata
        assert prop["description"].startswith(meta["doc"])
        if meta.get("unit"):
            assert prop["description"].endswith(f"[{meta['unit']}]")
        if dataclasses.is_dataclass(tp):
            continue
        if f.default not in (dataclasses.MISSING, None):
            assert prop["default"] == (list(f.default) if isinstance(f.default, tuple) else f.default)
        elif f.default_factory is not dataclasses.MISSING:  # list options: a fresh empty list each time
            assert prop["default"] == f.default_factory()
        else:
            assert "default" not in prop
        leaf = prop.get("items", prop)
        if meta.get("choices"):
            assert leaf["enum"] == list(meta["choices"])
        if meta.get("min") is not None:
            assert leaf["minimum"] == meta["min"]
        if meta.get("max") is not None:
            assert leaf["maximum"] == meta["max"]
    required = [f.name for f, _ in request_fields(body.cls)
                if f.default is dataclasses.MISSING and f.default_factory is dataclasses.MISSING]
    assert schema.get("required", []) == required


# Values tried against every field: each must be accepted by the schema (checked by
# jsonschema-rs, an independent JSON Schema implementation) exactly when the loader takes
# it. Two stricter corners of the loader are left out, as JSON Schema cannot say them:
# integral floats such as 1.0 (JSON Schema counts them as integers, the loader, like
# TOML, does not) and, for number fields, integers written beyond 64 bits (refused as
# such; the same size written as a float is taken).
PROBES = [
    None, True, False,
    0, 1, -1, 2, 3, 4, 31, 32, 48, 49, 95, 96, 150, 200, 256, 257, 1000, 1001, 8192, 8193, 10000, 10001,
    10**6, 10**6 + 1, 2**31, 2**63 - 1, 2**63, -(2**63) - 1,
    0.005, 0.01, 0.05, 0.1, 0.5, 2.5, -0.25, 47.5, 48.5, 500.5, 999.5, 1000.5, 9999.5, 10000.5, 1e9 + 0.5,
    "", "x", "B3", "absolute", "relative", "brenner", "sharpness", "track", "raw",
    [], [1, 2, 3, 4], [-1, 2, 3, 4], [0.5], ["a"], {},
]


def _field_accepts(cls, name: str, value) -> bool:
    f = next(f for f in dataclasses.fields(cls) if f.name == name)
    tp = typing.get_type_hints(cls)[name]
    # The field alone, with the loader's own checks (the class's cross-field rules aside).
    probe = dataclasses.make_dataclass("Probe", [(name, tp, dataclasses.field(default=None, metadata=f.metadata))],
                                       frozen=True, kw_only=True)
    try:
        load_section(probe, {name: value}, file="probe", section="")
    except ConfigError:
        return False
    return True


def _agree(cls, omit=()):
    for f, tp in request_fields(cls):
        if f.name in omit:
            continue
        if dataclasses.is_dataclass(tp):
            _agree(tp)
            continue
        validator = jsonschema_rs.Draft202012Validator(
            {"type": "object", "additionalProperties": False, "properties": {f.name: field_schema(f, tp)}})
        numbers = field_schema(f, tp).get("items", field_schema(f, tp)).get("type") == "number"
        for value in PROBES:
            if numbers and isinstance(value, int) and not isinstance(value, bool) and not INT_MIN <= value <= INT_MAX:
                continue
            assert validator.is_valid({f.name: value}) == _field_accepts(cls, f.name, value), (cls.__name__, f.name, value)


@pytest.mark.parametrize("cls", REQUESTS, ids=lambda c: c.__name__)
def test_the_schema_accepts_exactly_the_values_the_loader_takes(cls):
    omit = next((b.omit for b in REQUEST_BODIES.values() if b.cls is cls), ())
    _agree(cls, omit)
    schema = request_schema(cls, omit)
    assert not jsonschema_rs.Draft202012Validator(schema).is_valid({"speed": 3})
    with pytest.raises(BadRequest) as refused:
        parse_request(cls, {"speed": 3})
    assert refused.value.field == "speed" and "allowed here" in refused.value.problem


def test_the_document_is_plain_json():
    doc = document()
    assert json.loads(json.dumps(doc, allow_nan=False)) == doc
