"""``propcalc demo``: the built-in demo scenario."""

from __future__ import annotations

import argparse
from typing import Any, TextIO

from ..options import with_json

__all__ = ["register"]


def _cmd_demo(args: argparse.Namespace, out: TextIO) -> int:
    from ..demo import run

    return run(out=out, as_json=args.json)


def register(sub: Any) -> None:
    """Add the demo subcommands to ``sub`` (an argparse subparsers object)."""
    p = sub.add_parser("demo", help="run the built-in demo scenario")
    with_json(p)
    p.set_defaults(func=_cmd_demo)
