"""Schema-based fuzzing of the live server from its own OpenAPI document (schemathesis 4).

The document is loaded from the running gunicorn with the module-level loader
``schemathesis.openapi.from_url`` (``schemathesis.pytest.from_fixture`` does
not work on every pytest 9 release), so the shared live server is started
while this module is imported; ``conftest.pytest_sessionfinish`` stops it.

Bounded: a few examples per operation, derandomised (the same cases every
run), no deadline. Checked: no 5xx, every status, content type, header and
body conforms to the document, invalid data is rejected, valid data is never
refused for framing reasons (400/413/415), and no NaN/Infinity token appears.
"""

from __future__ import annotations

import json

import schemathesis
from hypothesis import HealthCheck, settings
from schemathesis.checks import not_a_server_error
from schemathesis.specs.openapi.checks import (
    content_type_conformance,
    negative_data_rejection,
    response_headers_conformance,
    response_schema_conformance,
    status_code_conformance,
    unsupported_method,
)

import server_process

SERVER = server_process.shared()
schema = schemathesis.openapi.from_url(f"{SERVER.url}/openapi.json", timeout=30)


@schemathesis.check
def strict_json_only(ctx, response, case):
    """No NaN/Infinity token in any JSON response body (the images are PNG or SVG)."""
    content_type = (response.headers.get("content-type") or [""])[0]
    if not response.content or "json" not in content_type:
        return None

    def refuse(token):
        raise AssertionError(f"non-standard JSON token {token} in the response")

    json.loads(response.content, parse_constant=refuse)
    return None


@schemathesis.check
def valid_data_not_refused_for_framing(ctx, response, case):
    """Schema-valid requests may be refused only with 422 (budget, engine) or 404 (names)."""
    meta = case.meta
    if meta is None or not meta.generation.mode.is_positive:
        return None
    if response.status_code in (400, 413, 415):
        raise AssertionError(f"valid data refused with {response.status_code}: "
                             f"{response.content[:300]!r}")
    return None


CHECKS = [not_a_server_error, status_code_conformance, content_type_conformance,
          response_headers_conformance, response_schema_conformance, negative_data_rejection,
          unsupported_method, strict_json_only, valid_data_not_refused_for_framing]


@schema.parametrize()
@settings(max_examples=12, deadline=None, derandomize=True, database=None,
          suppress_health_check=list(HealthCheck))
def test_fuzz_live_server(case):
    case.call_and_validate(checks=CHECKS, timeout=30)
