"""Activations from typed formulas, and the ``activation()`` entry point.

Placeholder until the formula parser lands: only built-in names resolve.
"""

from __future__ import annotations

from typing import Any

from .activations import Activation, builtin_activation, builtin_names
from .errors import UnknownActivationError

__all__ = ["activation"]


def activation(spec: str | Activation, **params: float) -> Activation:
    """Return an Activation from a built-in name (or an Activation, unchanged).

    Parameters
    ----------
    spec : str or Activation
        A built-in name such as ``"tanh"`` or ``"leaky_relu"``.
    **params : float
        Named parameters (``slope=0.1`` for leaky_relu...).

    Raises
    ------
    UnknownActivationError
        If ``spec`` is not a known name.
    """
    if isinstance(spec, Activation):
        return spec
    if not isinstance(spec, str):
        raise UnknownActivationError(f"activation must be a name or formula string, got {spec!r}")
    name = spec.strip()
    if name in builtin_names():
        return builtin_activation(name, **params)
    raise UnknownActivationError(
        f"unknown activation {spec!r}; built-ins are: {', '.join(builtin_names())}")
