"""``propcalc serve``: the service's contribution to the ``propcalc`` command.

Registered through the entry-point group ``propcalc.commands`` (see ``pyproject.toml``), so the
CLI never imports the service: this module imports no web library at load time (flask comes in
with :func:`propcalc_api.create_app`, inside the handler).
"""

from __future__ import annotations

import argparse
from typing import Any, TextIO

from propcalc import install_hint
from propcalc.cli import UsageError

__all__ = ["register"]


def _serve(args: argparse.Namespace, out: TextIO) -> int:
    """Run the HTTP service: the development server, or the production one (--production)."""
    try:
        from propcalc_api import serve  # lazily: the service extra is optional
    except ImportError as exc:
        missing = exc.name or str(exc)
        raise UsageError(f"the HTTP service needs the 'service' extra ({missing} is not "
                         f"installed): {install_hint('service')}") from None
    if args.workers is not None and not args.production:
        raise UsageError(f"--workers is an option of the production server (--production), "
                         f"got --workers {args.workers} without it")
    try:
        return int(serve(args.host, args.port, production=args.production,
                         workers=2 if args.workers is None else args.workers, out=out))
    except ValueError as exc:  # a bad option or PROPCALC_* setting (ServeError)
        raise UsageError(str(exc)) from None


def register(sub: Any) -> None:
    """Add ``serve`` to the ``propcalc`` subcommands (``sub``: an argparse subparsers object)."""
    p = sub.add_parser("serve", help="run the HTTP service (development server; --production: "
                       "gunicorn with waitress workers)")
    p.add_argument("--host", default="127.0.0.1", help="address to listen on (default 127.0.0.1)")
    p.add_argument("--port", type=int, default=8000, help="port (default 8000)")
    p.add_argument("--production", action="store_true",
                   help="the production server with the shipped settings (see docs/service.md)")
    p.add_argument("--workers", type=int, default=None,
                   help="worker processes of the production server (default 2)")
    p.set_defaults(func=_serve)
