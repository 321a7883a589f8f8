"""The ``propcalc`` entry point: the parser from the subcommand modules, and ``main``.

The built-in subcommands live in :mod:`propcalc.cli.commands`, one module per family; each
module has a ``register(subparsers)`` function. Other packages contribute commands through the
entry-point group ``propcalc.commands`` (the service contributes ``serve``): each entry names a
callable ``register(subparsers)`` of the same form. The CLI never imports those packages
itself, so ``propcalc`` needs only numpy and scipy; a contributed command that cannot be loaded
(its extra is not installed) still answers, with the install command.
"""

from __future__ import annotations

import argparse
import contextlib
import importlib
import os
import sys
from collections.abc import Sequence
from importlib import metadata
from typing import Any, TextIO

from .. import ComputationError, PropcalcError, install_hint
from .options import EXIT_COMPUTATION, EXIT_OK, EXIT_USAGE, Parser, UsageError

__all__ = ["BUILTIN_COMMANDS", "ENTRY_POINT_GROUP", "build_parser", "main"]

#: the built-in subcommand modules of :mod:`propcalc.cli.commands`, in the order of the help;
#: a new family of subcommands is one module there with ``register(subparsers)`` plus one name here
BUILTIN_COMMANDS = ("activations", "propagation", "plan", "network", "shape", "variants", "simulate",
                    "demo")
#: the entry-point group through which other packages add subcommands
ENTRY_POINT_GROUP = "propcalc.commands"

_DESCRIPTION = (
    "Mean-field signal propagation for deep random networks: gains, fixed points, "
    "edge of chaos, depth limits and initialisation plans; networks described block by "
    "block (residual, normalisation, convolution, attention); activations shaped for a "
    "depth; dropout, maxout, "
    "self-normalisation, Jacobian spectra, the softmax output layer, and finite-width "
    "checks on seeded random networks. Infinite-width predictions at initialisation: "
    "check them on your own model.")


def _unavailable(entry: metadata.EntryPoint, exc: Exception) -> Any:
    """The handler of a contributed command that could not be loaded: say how to install it."""
    extras = list(getattr(entry, "extras", []) or [])
    missing = getattr(exc, "name", None) or str(exc)

    def handler(args: argparse.Namespace, out: TextIO) -> int:
        if extras:
            extra = extras[0]
            raise UsageError(f"the {entry.name} command needs the '{extra}' extra ({missing} is "
                             f"not installed): {install_hint(extra)}")
        raise UsageError(f"the {entry.name} command could not be loaded: {exc}")

    return handler


def _contributed(sub: Any) -> None:
    """Register the commands of the ``propcalc.commands`` entry points (sorted by name).

    A name that is already a command (a built-in, or an earlier entry) is skipped.
    """
    for entry in sorted(metadata.entry_points(group=ENTRY_POINT_GROUP), key=lambda e: e.name):
        if entry.name in sub.choices:
            continue
        try:
            register = entry.load()
        except ImportError as exc:
            # no option prefix: whatever follows is taken in, and the handler says what to install
            p = sub.add_parser(entry.name, help=f"(not installed: {entry.value})",
                               prefix_chars="\0", add_help=False)
            p.add_argument("rest", nargs="*", help=argparse.SUPPRESS)
            p.set_defaults(func=_unavailable(entry, exc))
            continue
        register(sub)


def build_parser() -> argparse.ArgumentParser:
    """The argument parser (exposed for documentation and tests)."""
    from .. import __version__

    parser = Parser(prog="propcalc", description=_DESCRIPTION)
    parser.add_argument("--version", action="version", version=f"propcalc {__version__}")
    sub = parser.add_subparsers(dest="command", required=True, parser_class=Parser)
    for name in BUILTIN_COMMANDS:
        importlib.import_module(f"{__package__}.commands.{name}").register(sub)
    _contributed(sub)
    return parser


def main(argv: Sequence[str] | None = None, out: TextIO | None = None,
         err: TextIO | None = None) -> int:
    """Run the command line; returns the exit status."""
    out = sys.stdout if out is None else out
    err = sys.stderr if err is None else err
    parser: Any = None
    args: Any = None
    try:
        parser = build_parser()
        try:
            with contextlib.redirect_stdout(out):  # -h / --help print to `out` ...
                args = parser.parse_args(argv)
        except SystemExit as exc:  # ... and exit: return the status instead
            code = exc.code
            return code if isinstance(code, int) else (EXIT_OK if code is None else EXIT_USAGE)
        args.err = err  # where a command says what it wrote when stdout carries JSON
        return int(args.func(args, out))
    except BrokenPipeError:  # the reader stopped early (propcalc ... | head): not a failure
        if out is sys.stdout:  # keep Python's final flush from writing into the closed pipe
            with contextlib.suppress(OSError, ValueError):
                os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return EXIT_OK
    except UsageError as exc:
        err.write(f"propcalc: error: {exc}\n")
        return EXIT_USAGE
    except ComputationError as exc:
        err.write(f"propcalc: computation failed: {exc}\n")
        return EXIT_COMPUTATION
    except PropcalcError as exc:  # bad parameters, unknown activations, refused formulas
        option = _option_of(exc, parser, args)
        err.write(f"propcalc: error: {option}{exc}\n")
        return EXIT_USAGE


def _option_of(exc: Exception, parser: Any, args: Any) -> str:
    """``"--sigma-b2: "`` when the engine's field (``sigma_b2``) is an option spelled otherwise
    on the command line, so the message names what the user typed; else ``""``."""
    field = getattr(exc, "field", None)
    command = getattr(args, "command", None)
    if not isinstance(field, str) or parser is None or command is None:
        return ""
    sub = next((a for a in parser._actions if isinstance(a, argparse._SubParsersAction)), None)
    chosen = sub.choices.get(command) if sub is not None else None
    if chosen is None:
        return ""
    for action in chosen._actions:
        if action.dest == field and action.option_strings:
            typed = max(action.option_strings, key=len)  # the long form, e.g. --sigma-w2
            return "" if typed == f"--{field}" else f"{typed}: "
    return ""
