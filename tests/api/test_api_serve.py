"""`propcalc serve`: the CLI entry point of the service (the demo client test runs it for real)."""

from __future__ import annotations

import io
import sys

import pytest

from propcalc.cli import main


def test_serve_help_lists_host_and_port(capsys):
    assert main(["serve", "--help"]) == 0  # the help goes to sys.stdout (the default out)
    text = capsys.readouterr().out
    assert "--host" in text and "127.0.0.1" in text and "--port" in text


def test_serve_without_the_service_extra(monkeypatch):
    monkeypatch.setitem(sys.modules, "propcalc_api", None)  # import now raises ImportError
    err = io.StringIO()
    assert main(["serve"], out=io.StringIO(), err=err) == 2
    assert "pip install 'propcalc[service]'" in err.getvalue()


def test_serve_bad_port():
    err = io.StringIO()
    assert main(["serve", "--port", "70000"], out=io.StringIO(), err=err) == 2
    assert "--port must be in [0, 65535], got 70000" in err.getvalue()


def test_serve_bad_setting(monkeypatch):
    monkeypatch.setenv("PROPCALC_WORK_BUDGET", "-5")
    err = io.StringIO()
    assert main(["serve"], out=io.StringIO(), err=err) == 2
    assert "config WORK_BUDGET must be > 0, got -5" in err.getvalue()
