"""Exceptions raised by propcalc.

One base class, :class:`PropcalcError`; narrow subclasses also inherit the
builtin they resemble, so ``except ValueError`` keeps working for callers who
do not know this package.

Messages name the field, the constraint and the value received, e.g.
``"sigma_w2 must be > 0, got -1.0"``.
"""

from __future__ import annotations

import math
import numbers
from typing import Any

import numpy as np

from .names import nearest_name

__all__ = [
    "PropcalcError",
    "InvalidParameterError",
    "UnknownActivationError",
    "FormulaError",
    "ComputationError",
    "ActivationTypeError",
    "check_finite",
    "check_positive",
    "check_nonnegative",
    "check_int",
    "install_hint",
]


class PropcalcError(Exception):
    """Base class of every error raised on purpose by propcalc."""


class InvalidParameterError(PropcalcError, ValueError):
    """A parameter is outside its allowed range.

    Attributes
    ----------
    field : str
        Name of the parameter, as the caller spelled it.
    constraint : str
        The rule that was broken, in words (``"> 0"``, ``"finite"``...).
    value : Any
        The value received.
    hint : str
        What to do instead, or the nearest choice ("did you mean normal?"); "" if none.
    """

    def __init__(self, field: str, constraint: str, value: Any, hint: str = "") -> None:
        if getattr(value, "shape", None) == () and hasattr(value, "item"):
            value = value.item()  # numpy scalar: show 0.5, not np.float64(0.5)
        self.field = field
        self.constraint = constraint
        self.value = value
        if value is None and constraint.startswith(("given", "present")):  # absent, not None
            msg = f"{field} must be {constraint}; it is missing"
        else:
            msg = f"{field} must be {constraint}, got {_short_repr(value)}"
        if not hint and isinstance(value, str) and constraint.startswith("one of "):
            hint = _nearest_choice(value, constraint[len("one of "):])
        self.hint = hint
        if hint:
            msg += f"; {hint}"
        super().__init__(msg)


def _nearest_choice(value: str, listed: str) -> str:
    """ "did you mean variance?" for a typo of one of the listed choices ("a, b, c"), or ""."""
    choices = [c.strip().strip("'\"") for c in listed.split(",")]
    close = nearest_name(value, choices)
    return f"did you mean {close}?" if close is not None and close != value else ""


def _short_repr(value: Any, limit: int = 100) -> str:
    """repr(value), shortened when longer than ``limit`` characters (a 400-digit integer
    is shown by its first digits and its length, not printed in full)."""
    text = repr(value)
    if len(text) <= limit:
        return text
    return f"{text[:40]}... ({len(text)} characters)"


class UnknownActivationError(PropcalcError, ValueError):
    """The activation name is neither a built-in nor a valid formula."""


class FormulaError(PropcalcError, ValueError):
    """A typed formula was refused.

    Attributes
    ----------
    column : int or None
        1-based column of the offending token, when known.
    """

    def __init__(self, message: str, column: int | None = None) -> None:
        self.column = column
        super().__init__(message)


class ComputationError(PropcalcError, ArithmeticError):
    """A numerical computation could not produce a trustworthy number."""


class ActivationTypeError(InvalidParameterError, UnknownActivationError, TypeError):
    """An activation argument is neither a name, a formula text nor an Activation.

    It is an :class:`InvalidParameterError` (``field`` names the argument) and an
    :class:`UnknownActivationError`, so handlers of either catch it.
    """


def check_finite(field: str, value: Any) -> float:
    """Return ``value`` as a float, or raise if it is not a finite real number."""
    if isinstance(value, bool):
        raise InvalidParameterError(field, "a finite real number", value)
    try:
        out = float(value)
    except (TypeError, ValueError, OverflowError):  # OverflowError: an int beyond 1.8e308
        raise InvalidParameterError(field, "a finite real number", value) from None
    if not math.isfinite(out):
        raise InvalidParameterError(field, "a finite real number", value)
    return out


def check_positive(field: str, value: Any) -> float:
    """Return ``value`` as a float, or raise unless it is finite and > 0."""
    out = check_finite(field, value)
    if out <= 0.0:
        raise InvalidParameterError(field, "> 0", value)
    return out


def check_nonnegative(field: str, value: Any) -> float:
    """Return ``value`` as a float, or raise unless it is finite and >= 0."""
    out = check_finite(field, value)
    if out < 0.0:
        raise InvalidParameterError(field, ">= 0", value)
    return out


def check_int(field: str, value: Any, minimum: int = 1, maximum: int | None = None) -> int:
    """Return ``value`` as an int, or raise unless it is an integer in range."""
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, numbers.Real):
        raise InvalidParameterError(field, f"an integer >= {minimum}", value)
    if not isinstance(value, numbers.Integral):
        f = float(value)
        if not math.isfinite(f) or f != int(f):
            raise InvalidParameterError(field, f"an integer >= {minimum}", value)
    out = int(value)
    if out < minimum:
        raise InvalidParameterError(field, f"an integer >= {minimum}", value)
    if maximum is not None and out > maximum:
        raise InvalidParameterError(field, f"an integer <= {maximum}", value)
    return out


def install_hint(extra: str) -> str:
    """The command that adds an optional extra (``plot``, ``service``...) of propcalc.

    From the checkout, as the README's set-up does: propcalc is installed from its source
    tree, not from a package index (issue 12 section 4: the hint named an index).
    """
    return f'python3 -m pip install -e ".[{extra}]" in the propcalc checkout'
