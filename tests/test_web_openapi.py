"""The OpenAPI document is kept true: its paths and methods are exactly the router's."""

from __future__ import annotations

import pytest

from daemon.web.openapi import document
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
