"""``--plot FILE``: the picture options of the ``propcalc`` command.

The file and its format are checked before any work is done; matplotlib (the ``plot`` extra) is
imported only when a picture is asked for, so ``propcalc`` itself needs only numpy and scipy.
"""

from __future__ import annotations

import argparse
import importlib
import os
from types import ModuleType
from typing import Any, TextIO

from .. import install_hint
from .options import UsageError

__all__ = ["PLOT_EXTENSIONS", "plot_target", "plots_module", "start_plot", "write_plot",
           "needs_plot"]

#: image formats of --plot, by file extension
PLOT_EXTENSIONS = {".png": "png", ".svg": "svg"}


def plot_target(path: str) -> tuple[str, str]:
    """The file and format of ``--plot FILE``, checked before any work is done."""
    fmt = PLOT_EXTENSIONS.get(os.path.splitext(path)[1].lower())
    if fmt is None:
        raise UsageError(f"--plot FILE must end in {' or '.join(PLOT_EXTENSIONS)} (the image "
                         f"format comes from the extension), got {path!r}")
    folder = os.path.dirname(os.path.abspath(path))
    if not os.path.isdir(folder):
        raise UsageError(f"--plot {path}: the directory {folder} does not exist")
    return path, fmt


def plots_module() -> ModuleType:
    """:mod:`propcalc.plots`, or a usage error when matplotlib (the plot extra) is missing."""
    try:
        return importlib.import_module("propcalc.output.plots")
    except ImportError:
        raise UsageError("--plot needs matplotlib, which is not installed: "
                         f"{install_hint('plot')}") from None


def start_plot(args: argparse.Namespace) -> tuple[str, str, ModuleType] | None:
    """(path, format, propcalc.plots) when --plot is given, checked up front; else None."""
    if getattr(args, "plot", None) is None:
        return None
    path, fmt = plot_target(args.plot)
    return path, fmt, plots_module()


def write_plot(fig: Any, target: tuple[str, str, ModuleType], what: str,
               args: argparse.Namespace, out: TextIO) -> None:
    """Render the figure, write the file and say where it went (one line)."""
    path, fmt, plots = target
    data = plots.save_figure(fig, None, fmt)
    try:
        with open(path, "wb") as fh:
            fh.write(data)
    except OSError as exc:
        raise UsageError(f"--plot {path}: cannot write the file: {exc.strerror or exc}") from None
    stream = args.err if getattr(args, "json", False) else out
    stream.write(f"wrote {what} to {path} ({fmt.upper()}, {len(data)} bytes)\n")


def needs_plot(args: argparse.Namespace, *options: str) -> None:
    """Refuse window options given without --plot."""
    if args.plot is None:
        given = [o for o in options if getattr(args, o.lstrip("-").replace("-", "_")) is not None]
        if given:
            raise UsageError(f"{', '.join(given)} only shape the picture: give --plot FILE too")
