"""Property-based fuzzing of the API from its own OpenAPI document (schemathesis), bounded.

Every operation gets valid and invalid requests, with the token and without: the daemon
must never answer 5xx, every status must be one the document lists, and every JSON body
must match the documented schema.
"""

from __future__ import annotations

import time

import pytest
import requests
import schemathesis
from hypothesis import HealthCheck, given, settings
from hypothesis.errors import Unsatisfiable
from schemathesis import GenerationMode
from schemathesis.checks import not_a_server_error
from schemathesis.specs.openapi.checks import (
    content_type_conformance,
    response_schema_conformance,
    status_code_conformance,
)

from daemon.web.openapi import document
from tests.web_support import served_in_thread

pytestmark = pytest.mark.timeout(240)

# Streams never end by themselves (MJPEG, WebSocket); they have their own tests.
ENDLESS = {"/api/v1/stream.mjpeg", "/api/v1/events"}
EXAMPLES = 8
SLOW_EXAMPLES = 3  # each autofocus request images a dozen frames
TOTAL_BUDGET_S = 150.0
CHECKS = [not_a_server_error, status_code_conformance, content_type_conformance, response_schema_conformance]


def fuzz(op, mode, n, url, session, headers, *, with_token: bool) -> None:
    @settings(max_examples=n, deadline=None, database=None, derandomize=True,
              suppress_health_check=list(HealthCheck))
    @given(case=op.as_strategy(generation_mode=mode))
    def run(case):
        if not with_token:
            session.cookies.clear()  # no view cookie from an earlier POST /session either
        response = case.call(base_url=url, session=session, headers=headers, timeout=60)
        assert response.status_code < 500, (case.method, case.formatted_path, response.text[:300])
        if not with_token and not case.path.endswith("openapi.json"):
            assert response.status_code in (401, 405), (case.method, case.formatted_path, response.status_code)
        case.validate_response(response, checks=CHECKS)

    try:
        run()
    except Unsatisfiable:
        # An operation without parameters or body has no invalid request to make.
        if mode is not GenerationMode.NEGATIVE:
            raise


def test_fuzz_the_api_from_its_openapi_document(tmp_path):
    schema = schemathesis.openapi.from_dict(document())
    started = time.monotonic()
    # The fuzzer sends wrong tokens by the hundred on purpose; the lock-out has its own test.
    with served_in_thread(tmp_path, max_token_failures=1_000_000, max_token_failures_total=1_000_000) as (url, token):
        signed_in, anonymous = requests.Session(), requests.Session()
        auth = {"Authorization": f"Bearer {token}"}
        tried = 0
        for result in schema.get_all_operations():
            op = result.ok()
            if op.path in ENDLESS:
                continue
            n = SLOW_EXAMPLES if op.path.endswith("/focus/auto") else EXAMPLES
            for mode in (GenerationMode.POSITIVE, GenerationMode.NEGATIVE):
                for headers in (auth, {}):
                    if time.monotonic() - started > TOTAL_BUDGET_S:
                        break

                    session = signed_in if headers is auth else anonymous
                    fuzz(op, mode, n, url, session, headers, with_token=headers is auth)
                    tried += 1
        assert tried >= 40  # every operation, both modes, with and without the token
