"""The parser and the shared option types of the ``propcalc`` command.

Every subcommand module (:mod:`propcalc.cli.commands`) and every contributed command (the
``propcalc.commands`` entry points) builds its options from these pieces, so an option reads and
checks the same way everywhere: finite numbers, comma lists, windows and grids, the activation
argument with ``--param``, ``--json`` and ``--plot``. A bad value is a :class:`UsageError` (exit
status 2) naming the option, the constraint and what was received.
"""

from __future__ import annotations

import argparse
import math
import re
from collections.abc import Sequence
from typing import Any, NoReturn

from .. import Layer, activation, install_hint, nearest_name

__all__ = [
    "EXIT_OK",
    "EXIT_COMPUTATION",
    "EXIT_USAGE",
    "GRID_BOUNDS",
    "UsageError",
    "Parser",
    "activation_params",
    "activation_of",
    "finite_float",
    "int_list",
    "finite_list",
    "number_pair",
    "window",
    "grid_size",
    "point",
    "conv_layer",
    "check_depth",
    "refuse_loss_options",
    "with_act",
    "with_json",
    "with_plot",
    "with_window",
]

EXIT_OK, EXIT_COMPUTATION, EXIT_USAGE = 0, 1, 2

#: bounds of --grid (per axis; those of propcalc.plots)
GRID_BOUNDS = (3, 2000)


_INVALID_CHOICE = re.compile(r"invalid choice: '([^']*)' \(choose from (.*)\)$")


class UsageError(Exception):
    """Bad command-line input (exit status 2)."""


def refuse_loss_options(args: argparse.Namespace, *extra: tuple[str, Any]) -> None:
    """Refuse the loss options given without ``--loss`` (they would be ignored), naming them.

    ``extra`` are further ``(option, value)`` pairs of the command, listed after --batch-size.
    """
    pairs = (("--n-classes", args.n_classes), ("--batch-size", args.batch_size), *extra,
             ("--momentum", args.momentum or None),
             ("--no-scale-output", args.no_scale_output or None))
    given = [option for option, value in pairs if value is not None]
    if given:
        raise UsageError(f"{', '.join(given)} only matter with a loss: give "
                         "--loss cross_entropy|mse too")


class Parser(argparse.ArgumentParser):
    """An ArgumentParser whose errors are one-line :class:`UsageError` s (exit status 2)."""

    def error(self, message: str) -> NoReturn:  # one line, exit 2
        match = _INVALID_CHOICE.search(message)
        if match is not None:  # "invalid choice: 'varience' (choose from ...)": suggest one
            choices = [c.strip().strip("'") for c in match.group(2).split(",")]
            close = nearest_name(match.group(1), choices)
            if close is not None:
                message = message.replace(")", f"; did you mean {close}?)", 1) if \
                    message.endswith(")") else f"{message} (did you mean {close}?)"
        raise UsageError(message)

    def parse_known_args(self, args: Sequence[str] | None = None,
                         namespace: argparse.Namespace | None = None) -> Any:
        """Name an unknown ``--option`` first (with the nearest option), before argparse would
        complain about a missing required one: ``report tanh --sigma_w2 1.5`` is a typo of
        ``--sigma-w2``, not a missing ``--sigma-w2``."""
        if args is not None and "-" in self.prefix_chars and not self._subparsers:
            self._check_options(list(args))
        return super().parse_known_args(args, namespace)

    def _check_options(self, args: list[str]) -> None:
        known = [o for o in self._option_string_actions if o.startswith("--")]
        for token in args:
            if token == "--":
                break
            if not token.startswith("--") or len(token) < 3:
                continue
            name = token.split("=", 1)[0]
            if name in self._option_string_actions or any(o.startswith(name) for o in known):
                continue  # an option or an unambiguous prefix of one (argparse's abbreviations)
            close = nearest_name(name[2:], [o[2:] for o in known])
            hint = f" (did you mean --{close}?)" if close is not None else ""
            raise UsageError(f"unrecognized arguments: {name}{hint}; see propcalc "
                             f"{self.prog.split()[-1]} --help")


def activation_params(items: Sequence[str] | None) -> dict[str, float]:
    """The ``--param NAME=VALUE`` items as a dict: finite numbers, each name once."""
    out: dict[str, float] = {}
    for item in items or ():
        name, sep, text = item.partition("=")
        if not sep or not name.strip():
            raise UsageError(f"--param must look like name=value, got {item!r}")
        try:
            value = float(text)
        except ValueError:
            raise UsageError(f"--param {name.strip()} must be a number, got {text!r}") from None
        if not math.isfinite(value):
            raise UsageError(f"--param {name.strip()} must be finite, got {text!r}")
        if name.strip() in out:
            raise UsageError(f"--param {name.strip()} is given twice ({out[name.strip()]:g} and "
                             f"{value:g}): give each parameter once")
        out[name.strip()] = value
    return out


def finite_float(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"must be a number, got {text!r}") from None
    if not math.isfinite(value):
        raise argparse.ArgumentTypeError(f"must be finite, got {text!r}")
    return value


def _items(text: str, what: str) -> list[str]:
    """The comma-separated items of ``text``, each stripped; an empty item, or one holding
    spaces (``"48 512 6"`` is not 485126), is refused with its position. ``what`` says what
    the list must be (``"comma-separated integers like 784,512,10"``)."""
    items = [t.strip() for t in text.split(",")]
    if not any(items):
        raise argparse.ArgumentTypeError(f"must be at least one number ({what}), got {text!r}")
    for i, item in enumerate(items, 1):
        if not item:
            raise argparse.ArgumentTypeError(
                f"must be {what}: item {i} of {text!r} is empty")
        if any(ch.isspace() for ch in item):
            raise argparse.ArgumentTypeError(
                f"must be {what}: item {i} of {text!r} holds a space (is a comma missing?)")
    return items


def int_list(text: str) -> list[int]:
    """Comma-separated integers (``784,512,10``); a bad item is named by its position."""
    what = "comma-separated integers like 784,512,10"
    values = []
    for i, item in enumerate(_items(text, what), 1):
        try:
            values.append(int(item))
        except ValueError:
            raise argparse.ArgumentTypeError(
                f"must be {what}: item {i} of {text!r} is {item!r}") from None
    return values


def finite_list(text: str) -> list[float]:
    """Comma-separated finite numbers (at least one); a bad item is named by its position."""
    what = "comma-separated numbers like 0.5,1,2"
    values = []
    for i, item in enumerate(_items(text, what), 1):
        try:
            v = float(item)
        except ValueError:
            raise argparse.ArgumentTypeError(
                f"must be {what}: item {i} of {text!r} is {item!r}") from None
        if not math.isfinite(v):
            raise argparse.ArgumentTypeError(
                f"must be finite numbers: item {i} of {text!r} is {item!r}")
        values.append(v)
    return values


def number_pair(text: str) -> tuple[float, float]:
    """Two finite numbers 'A,B'."""
    try:
        values = finite_list(text)
    except argparse.ArgumentTypeError:
        values = []
    if len(values) != 2:
        raise argparse.ArgumentTypeError(f"must be two numbers A,B, got {text!r}")
    return values[0], values[1]


def window(low: str) -> Any:
    """An argparse type: 'LO,HI' with LO > 0 (low = '0 <') or LO >= 0 (low = '0 <='), LO < HI."""
    def parse(text: str) -> tuple[float, float]:
        try:
            lo, hi = number_pair(text)
        except argparse.ArgumentTypeError:
            lo = hi = math.nan
        if not (lo < hi and (lo > 0 if low == "0 <" else lo >= 0)):
            raise argparse.ArgumentTypeError(f"must be LO,HI with {low} LO < HI, got {text!r}")
        return lo, hi

    return parse


def grid_size(text: str) -> tuple[int, int]:
    """'N' (N x N points) or 'NW,NB', each in [3, 2000]."""
    lo, hi = GRID_BOUNDS
    try:
        values = int_list(text)
    except argparse.ArgumentTypeError:
        values = []
    if len(values) not in (1, 2) or not all(lo <= v <= hi for v in values):
        raise argparse.ArgumentTypeError(
            f"must be N or NW,NB (points along sigma_w2 and sigma_b2), each in [{lo}, {hi}], "
            f"got {text!r}")
    return (values[0], values[-1])


def point(text: str) -> tuple[float, float]:
    """'W,B': sigma_w2 > 0 and sigma_b2 >= 0."""
    try:
        w, b = number_pair(text)
    except argparse.ArgumentTypeError:
        w = b = math.nan
    if not (w > 0 and b >= 0):
        raise argparse.ArgumentTypeError(
            f"must be W,B (sigma_w2, sigma_b2) with W > 0 and B >= 0, got {text!r}")
    return w, b


def conv_layer(spec: str) -> Layer:
    """``IN:OUT:KERNEL`` with KERNEL like ``3x3``, ``5`` (1-D) or ``3x3x3``."""
    parts = spec.split(":")
    try:
        if len(parts) != 3:
            raise ValueError
        cin, cout = int(parts[0]), int(parts[1])
        kernel = tuple(int(k) for k in parts[2].lower().split("x"))
    except ValueError:
        raise UsageError(f"--conv must look like IN:OUT:KERNEL, e.g. 64:128:3x3, got {spec!r}") from None
    return Layer.conv(cin, cout, kernel)


def activation_of(args: argparse.Namespace) -> Any:
    return activation(args.activation, **activation_params(args.param))


def check_depth(depth: int | None) -> None:
    if depth is not None and depth < 1:
        raise UsageError(f"--depth must be >= 1, got {depth}")


def with_act(p: argparse.ArgumentParser) -> None:
    """The activation argument (a built-in name or a formula) and ``--param``."""
    p.add_argument("activation", help="built-in name or a formula in x, e.g. 'x * tanh(softplus(x))'")
    p.add_argument("--param", action="append", metavar="NAME=VALUE",
                   help="named parameter of the activation (repeatable), e.g. slope=0.1")


def with_json(p: argparse.ArgumentParser) -> None:
    """``--json``: one JSON document on stdout instead of the tables."""
    p.add_argument("--json", action="store_true", help="machine-readable output")


def with_plot(p: argparse.ArgumentParser, text: str, required: bool = False) -> None:
    """``--plot FILE`` (PNG or SVG by the extension), described by ``text``."""
    p.add_argument("--plot", metavar="FILE", required=required,
                   help=f"{text}: FILE.png or FILE.svg (needs matplotlib: "
                        f"{install_hint('plot')})")


def with_window(p: argparse.ArgumentParser) -> None:
    """The window of a phase-diagram picture: ``--sigma-w2-range``, ``--sigma-b2-range``, ``--grid``."""
    p.add_argument("--sigma-w2-range", type=window("0 <"), metavar="LO,HI",
                   help="the picture's sigma_w2 axis (default 0.1,4, widened to a marked "
                        "point)")
    p.add_argument("--sigma-b2-range", type=window("0 <="), metavar="LO,HI",
                   help="the picture's sigma_b2 axis (default 0,0.5, widened to a marked "
                        "point)")
    p.add_argument("--grid", type=grid_size, metavar="N|NW,NB",
                   help="grid points of the picture: N x N, or NW along sigma_w2 and NB "
                        "along sigma_b2 (default 81,61)")
