"""From what a user gives (a built-in name, a formula text or an Activation) to an Activation.

Every public function that analyses an activation resolves its argument here, once, at the
boundary: built-in names in any case and with ``-``, ``_`` or spaces (``"Gelu"``,
``"leaky-relu"``), formulas in ``x`` (:func:`propcalc.activations.formula.formula_activation`),
and Activation objects unchanged. A wrong type is an
:class:`~propcalc.errors.ActivationTypeError` naming the argument; an unknown single name is an
:class:`~propcalc.errors.UnknownActivationError` that suggests the nearest built-in.
"""

from __future__ import annotations

import keyword
from typing import Any

from ..errors import ActivationTypeError, InvalidParameterError, UnknownActivationError
from .base import Activation
from .builtins import builtin_activation, builtin_names, canonical_builtin_name
from .formula import LIMITS, formula_activation
from .formula.vocabulary import ARITY, CONSTANTS
from .names import did_you_mean

__all__ = ["resolve", "activation"]

#: the types an activation argument may have, in words (part of the error messages)
_ACCEPTED = "a name or formula string, or an Activation"


def resolve(spec: Any, field: str = "act", **params: float) -> Activation:
    """Return the Activation that ``spec`` names, checking its type once.

    Parameters
    ----------
    spec : str or Activation
        A built-in name (``"tanh"``, ``"Leaky-ReLU"``: case and separators do not
        matter), a formula in ``x`` (``"x * tanh(softplus(x))"``), or an Activation,
        returned unchanged.
    field : str
        The name of the caller's argument, used in error messages (``"act"``).
    **params : float
        Parameters of a built-in (``slope=0.1`` for leaky_relu...) or the values of
        the parameters a formula uses (``beta=1.5`` for ``"x * sigmoid(beta * x)"``).

    Returns
    -------
    Activation

    Raises
    ------
    ActivationTypeError
        If ``spec`` is neither a string nor an Activation (an InvalidParameterError
        whose ``field`` is ``field``).
    InvalidParameterError
        If parameters are given with an Activation object (they cannot take effect),
        or a parameter is unknown or out of range.
    UnknownActivationError
        If ``spec`` is a single name that is neither a built-in nor a parameter
        (the message suggests the nearest built-in).
    FormulaError
        If a formula is refused (see
        :func:`~propcalc.activations.formula.formula_activation`).

    Examples
    --------
    >>> resolve("Leaky-ReLU", slope=0.2).label
    'leaky_relu(slope=0.2)'
    """
    if isinstance(spec, Activation):
        if params:
            raise InvalidParameterError(
                "params", "empty when an Activation object is given (its parameters are fixed)",
                dict(params), hint=f"build the activation with them instead: {spec.name}")
        return spec
    if not isinstance(spec, str):
        raise ActivationTypeError(field, _ACCEPTED, spec)
    if len(spec) > LIMITS.max_length:  # refused as a formula, before any name matching
        return formula_activation(spec, **params)
    name = canonical_builtin_name(spec)
    if name is not None:
        return builtin_activation(name, **params)
    text = spec.strip()
    if (text.isascii() and text.isidentifier() and not keyword.iskeyword(text)
            and text != "x" and not text.startswith("_") and text not in ARITY
            and text not in CONSTANTS and text not in params):
        raise UnknownActivationError(
            f"unknown activation {spec!r}{did_you_mean(text, builtin_names())}; built-ins are: "
            f"{', '.join(builtin_names())}; or type a formula in x such as 'x * sigmoid(x)'")
    return formula_activation(spec, **params)


def activation(spec: str | Activation, **params: float) -> Activation:
    """Return an Activation from a built-in name or a typed formula.

    Parameters
    ----------
    spec : str or Activation
        A built-in name such as ``"tanh"`` or ``"leaky_relu"`` (case and the
        separators ``-``, ``_`` do not matter: ``"Leaky-ReLU"``), or a formula in
        ``x`` such as ``"x * tanh(softplus(x))"``. An Activation is returned
        unchanged.
    **params : float
        Named parameters: ``slope=0.1`` for leaky_relu..., or the values of the
        parameters a formula uses (``beta=1.5`` for ``"x * sigmoid(beta * x)"``).

    Returns
    -------
    Activation

    Raises
    ------
    UnknownActivationError
        If ``spec`` is not a string (an :class:`~propcalc.errors.ActivationTypeError`,
        which is also an InvalidParameterError for the field ``activation``), or is a
        single unknown name (neither a built-in nor ``x``).
    FormulaError
        If a formula is refused (see :func:`formula_activation`).
    InvalidParameterError
        If a parameter is out of range, or parameters come with an Activation object.

    See Also
    --------
    resolve : the same, with the caller's argument name in the messages.

    Examples
    --------
    >>> act = activation("x * sigmoid(beta * x)", beta=1.5)
    >>> act.derivative_formula
    'sigmoid(beta * x) + x * (sigmoid(beta * x) * sigmoid(-(beta * x)) * beta)'
    """
    return resolve(spec, "activation", **params)
