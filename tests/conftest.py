"""Shared fixtures and helpers for the propcalc tests."""

from __future__ import annotations

import pytest

import propcalc


@pytest.fixture(scope="session")
def act():
    """Factory: ``act("tanh")`` -> cached Activation."""
    return propcalc.activation
