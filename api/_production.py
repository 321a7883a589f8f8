"""``propcalc serve``: the development server, and the production server with its settings.

``propcalc serve`` runs werkzeug's development server (one request at a
time). ``propcalc serve --production [--host H] [--port P] [--workers N]``
runs the production set-up with the settings shipped here:

* gunicorn's arbiter with ``N`` worker processes (default 2: one per core of
  the 2-core machines it was measured on), the app loaded once before the
  workers fork (``preload_app``), workers recycled after about 2000 requests
  (``max_requests`` with jitter) and killed if they stop sending heartbeats
  for 30 s;
* in each worker, waitress (:class:`propcalc_api._worker.BufferingWorker`):
  it reads whole requests before a thread sees them and closes connections
  idle or stalled for 10 s, so slow and idle clients cannot hold a thread;
* one expensive computation at a time across all workers
  (``EXPENSIVE_SLOTS``, shared through lock files in a private temporary
  directory, ``EXPENSIVE_LOCK_DIR``), so that cheap requests keep the other
  core; and the app's CPU-time and wall-clock limits, enforced in every
  thread (:mod:`propcalc_api._guard`).

Settings of the app come from ``PROPCALC_*`` environment variables, as for
``create_app``; ``PROPCALC_MAX_REQUESTS`` sets how many requests a worker
serves before it is recycled (default 50000, with 10% jitter). docs/service.md ("Production server") has the measurements.
"""

from __future__ import annotations

import os
import shutil
import tempfile
from collections.abc import Mapping
from typing import Any, TextIO

from flask import Flask

__all__ = ["PRODUCTION_SETTINGS", "MAX_WORKERS", "serve", "serve_development",
           "serve_production", "ServeError", "production_app_config"]

#: gunicorn settings of ``propcalc serve --production`` (bind and workers come from the command)
PRODUCTION_SETTINGS: dict[str, Any] = {
    "worker_class": "propcalc_api._worker.BufferingWorker",
    "preload_app": True,
    "timeout": 30,
    "graceful_timeout": 15,
    "max_requests": 50000,
    "max_requests_jitter": 5000,
    "control_socket_disable": True,
    "proc_name": "propcalc",
}

#: most worker processes ``--workers`` accepts
MAX_WORKERS = 64


class ServeError(ValueError):
    """A bad ``serve`` option or setting (the CLI prints it and exits with status 2)."""


def _check(host: str, port: int, workers: int) -> None:
    if not isinstance(port, int) or not 0 <= port <= 65535:
        raise ServeError(f"--port must be in [0, 65535], got {port}")
    if not isinstance(workers, int) or not 1 <= workers <= MAX_WORKERS:
        raise ServeError(f"--workers must be in [1, {MAX_WORKERS}], got {workers}")
    if not host or any(c.isspace() for c in host):
        raise ServeError(f"--host must be an address or a host name, got {host!r}")


def _make_app(config: Mapping[str, Any] | None = None) -> Flask:
    from ._app import create_app

    try:
        return create_app(config)
    except ValueError as exc:  # a bad PROPCALC_* setting
        raise ServeError(str(exc)) from None


def production_app_config(lock_dir: str) -> dict[str, Any]:
    """The app settings the production server adds (unless the environment sets them)."""
    out: dict[str, Any] = {}
    if "PROPCALC_EXPENSIVE_LOCK_DIR" not in os.environ:
        out["EXPENSIVE_LOCK_DIR"] = lock_dir
    return out


def _max_requests() -> dict[str, int]:
    """``PROPCALC_MAX_REQUESTS`` (an integer >= 1) overrides the recycling of workers."""
    text = os.environ.get("PROPCALC_MAX_REQUESTS")
    if text is None:
        return {}
    try:
        value = int(text)
    except ValueError:
        value = 0
    if value < 1:
        raise ServeError(f"PROPCALC_MAX_REQUESTS must be an integer >= 1, got {text!r}")
    return {"max_requests": value, "max_requests_jitter": value // 10}


def serve_development(host: str, port: int, out: TextIO) -> int:
    """werkzeug's development server, one request at a time (local use)."""
    _check(host, port, 1)
    app = _make_app()
    out.write(f"propcalc service on http://{host}:{port}/ (development server, one request at "
              "a time; for production: propcalc serve --production). Ctrl-C stops it.\n")
    out.flush()
    app.run(host=host, port=port, threaded=False, use_reloader=False, debug=False)
    return 0


def serve_production(host: str, port: int, workers: int, out: TextIO) -> int:
    """gunicorn + waitress with the shipped settings; returns when the arbiter stops."""
    _check(host, port, workers)
    os.environ.setdefault("OMP_NUM_THREADS", "1")
    from gunicorn.app.base import BaseApplication

    lock_dir = tempfile.mkdtemp(prefix="propcalc-lane-")
    arbiter_pid = os.getpid()
    try:
        app = _make_app(production_app_config(lock_dir))  # checks the settings up front
        settings = {**PRODUCTION_SETTINGS, **_max_requests(), "bind": [_bind(host, port)],
                    "workers": workers}

        class _Server(BaseApplication):  # type: ignore[misc]
            def load_config(self) -> None:
                for key, value in settings.items():
                    self.cfg.set(key, value)

            def load(self) -> Flask:
                return app

        out.write(f"propcalc service on http://{_bind(host, port)}/ (production: gunicorn "
                  f"with {workers} waitress workers). Ctrl-C stops it.\n")
        out.flush()
        _Server().run()
    finally:
        # a worker that exits unwinds through here too (it is a fork of this process): only
        # the arbiter removes the directory that every worker's lane uses
        if os.getpid() == arbiter_pid:
            shutil.rmtree(lock_dir, ignore_errors=True)
    return 0


def _bind(host: str, port: int) -> str:
    return f"[{host}]:{port}" if ":" in host else f"{host}:{port}"


def serve(host: str = "127.0.0.1", port: int = 8000, production: bool = False,
          workers: int = 2, out: TextIO | None = None) -> int:
    """Run the service; what ``propcalc serve [--production]`` calls.

    Parameters
    ----------
    host, port : str, int
        Where to listen (default 127.0.0.1:8000).
    production : bool
        The production server (gunicorn + waitress) instead of the development one.
    workers : int
        Worker processes of the production server, in [1, 64].
    out : text stream, optional
        Where the start-up line goes (stdout by default).

    Returns
    -------
    int
        0 when the server stopped normally.

    Raises
    ------
    ServeError
        For a bad option or a bad ``PROPCALC_*`` setting.
    """
    import sys

    stream = sys.stdout if out is None else out
    if production:
        return serve_production(host, port, workers, stream)
    return serve_development(host, port, stream)
