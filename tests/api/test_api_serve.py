"""`propcalc serve [--production]`: the CLI entry point of the service.

The demo client test runs the development server for real; the live tests run the production
server (``server_process.LiveServer``); here: the options, their refusals, and a production server
whose workers are recycled every few requests while expensive requests keep coming.
"""

from __future__ import annotations

import io
import sys

import pytest
import requests

import server_process
from propcalc.cli import main


def test_serve_help_lists_host_and_port(capsys):
    assert main(["serve", "--help"]) == 0  # the help goes to sys.stdout (the default out)
    text = capsys.readouterr().out
    assert "--host" in text and "127.0.0.1" in text and "--port" in text
    assert "--production" in text and "--workers" in text


def test_serve_workers_needs_production():
    err = io.StringIO()
    assert main(["serve", "--workers", "4"], out=io.StringIO(), err=err) == 2
    assert "--workers is an option of the production server (--production)" in err.getvalue()


@pytest.mark.parametrize("workers", ["0", "65"])
def test_serve_bad_workers(workers):
    err = io.StringIO()
    assert main(["serve", "--production", "--workers", workers], out=io.StringIO(),
                err=err) == 2
    assert f"--workers must be in [1, 64], got {workers}" in err.getvalue()


def test_serve_bad_max_requests(monkeypatch):
    monkeypatch.setenv("PROPCALC_MAX_REQUESTS", "lots")
    err = io.StringIO()
    assert main(["serve", "--production"], out=io.StringIO(), err=err) == 2
    assert "PROPCALC_MAX_REQUESTS must be an integer >= 1, got 'lots'" in err.getvalue()


@pytest.mark.slow
def test_recycled_workers_keep_serving_expensive_requests():
    # workers recycled every ~12 requests while requests that take the expensive lane (its
    # slots are lock files in a directory of the arbiter) keep coming: every answer is a 200
    # (a recycled worker once removed that directory, and every expensive request then failed)
    server = server_process.LiveServer(workers=2, env={"PROPCALC_MAX_REQUESTS": "12"}).start()
    try:
        statuses = []
        for i in range(60):  # a new connection each (a recycled worker closes its idle ones)
            resp = requests.post(server.url + "/v1/dropout/sweep", timeout=30, json={
                "activation": "tanh", "sigma_w2": 1.5 + 1e-3 * i,
                "keep_rates": [0.9, 0.8]})  # estimated 600 units: the expensive lane
            statuses.append(resp.status_code)
        assert statuses == [200] * 60, statuses
        assert server.log_text().count("requests served (max_requests)") >= 2
    finally:
        server.stop()


def test_serve_without_the_service_extra(monkeypatch):
    monkeypatch.setitem(sys.modules, "propcalc_api", None)  # import now raises ImportError
    err = io.StringIO()
    assert main(["serve"], out=io.StringIO(), err=err) == 2
    assert 'python3 -m pip install -e ".[service]" in the propcalc checkout' in err.getvalue()


def test_serve_bad_port():
    err = io.StringIO()
    assert main(["serve", "--port", "70000"], out=io.StringIO(), err=err) == 2
    assert "--port must be in [0, 65535], got 70000" in err.getvalue()


def test_serve_bad_setting(monkeypatch):
    monkeypatch.setenv("PROPCALC_WORK_BUDGET", "-5")
    err = io.StringIO()
    assert main(["serve"], out=io.StringIO(), err=err) == 2
    assert "config WORK_BUDGET must be > 0, got -5" in err.getvalue()
