"""Fixtures of the service tests: the Flask app and client, and a live production server."""

from __future__ import annotations

import json
import math
from collections.abc import Iterator
from typing import Any

import pytest

import server_process
from propcalc_api import create_app


@pytest.fixture(scope="session")
def app():
    """An app that also loads every response back through its response schema."""
    return create_app({"VALIDATE_RESPONSES": True})


@pytest.fixture()
def client(app):
    return app.test_client()


@pytest.fixture()
def make_client():
    """Factory: a test client of an app with extra settings."""

    def make(**config: Any):
        return create_app({"VALIDATE_RESPONSES": True, **config}).test_client()

    return make


@pytest.fixture(scope="session")
def live_server() -> Iterator[server_process.LiveServer]:
    """`propcalc serve --production` (2 workers) on a free port of 127.0.0.1, shared by the session."""
    server = server_process.shared()
    yield server
    server_process.stop_shared()


def pytest_sessionfinish(session: pytest.Session, exitstatus: int) -> None:
    # the schemathesis module starts the shared server while it is imported: stop it always
    server_process.stop_shared()


@pytest.fixture(scope="session")
def strict_json():
    """``strict_json(body)``: parse a response body, failing on NaN/Infinity tokens."""
    return parse_strict_json


def parse_strict_json(body: bytes) -> Any:
    """Parse a response body, failing on NaN/Infinity tokens and non-finite numbers."""

    def refuse(token: str) -> Any:
        raise AssertionError(f"non-standard JSON token {token} in a response")

    value = json.loads(body, parse_constant=refuse)
    stack = [value]
    while stack:
        item = stack.pop()
        if isinstance(item, float):
            assert math.isfinite(item), f"non-finite number {item!r} in a response"
        elif isinstance(item, dict):
            stack.extend(item.values())
        elif isinstance(item, list):
            stack.extend(item)
    return value
