"""``propcalc serve``: the service's contribution to the ``propcalc`` command.

Registered through the entry-point group ``propcalc.commands`` (see ``pyproject.toml``), so the
CLI never imports the service: this module imports no web library at load time (flask comes in
with :func:`propcalc_api.create_app`, inside the handler).
"""

from __future__ import annotations

import argparse
from typing import Any, TextIO

from propcalc.cli import UsageError

__all__ = ["register"]


def _serve(args: argparse.Namespace, out: TextIO) -> int:
    """Run the HTTP service on werkzeug's development server (local use; gunicorn in production)."""
    try:
        from propcalc_api import create_app  # lazily: the service extra is optional
    except ImportError as exc:
        missing = exc.name or str(exc)
        raise UsageError(f"the HTTP service needs the 'service' extra ({missing} is not "
                         "installed): pip install 'propcalc[service]'") from None
    if not 0 <= args.port <= 65535:
        raise UsageError(f"--port must be in [0, 65535], got {args.port}")
    try:
        app = create_app()
    except ValueError as exc:  # a bad PROPCALC_* setting
        raise UsageError(str(exc)) from None
    out.write(f"propcalc service on http://{args.host}:{args.port}/ (development server, one "
              "request at a time; for production use gunicorn, see docs/service.md). "
              "Ctrl-C stops it.\n")
    out.flush()
    app.run(host=args.host, port=args.port, threaded=False, use_reloader=False, debug=False)
    return 0


def register(sub: Any) -> None:
    """Add ``serve`` to the ``propcalc`` subcommands (``sub``: an argparse subparsers object)."""
    p = sub.add_parser("serve", help="run the HTTP service locally (development server)")
    p.add_argument("--host", default="127.0.0.1", help="address to listen on (default 127.0.0.1)")
    p.add_argument("--port", type=int, default=8000, help="port (default 8000)")
    p.set_defaults(func=_serve)
