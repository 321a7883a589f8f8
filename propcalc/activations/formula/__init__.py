"""Activations from typed formulas.

A formula is a small expression in the variable ``x``, for example
``"x * tanh(softplus(x))"`` or ``"x * sigmoid(beta * x)"`` with ``beta=1.5``.
The build runs in stages, one module each:

* :mod:`.vocabulary`: functions, arities, derivative texts, constants;
* :mod:`.limits`: the limits of every stage, per interface, and their table;
* :mod:`.reader`: raw-text checks, :func:`ast.parse` (a syntax tree only: nothing
  is run) and the node whitelist, into interned graphs (:mod:`.tree`);
* :mod:`.differentiator`: the exact symbolic derivative, sharing sub-expressions;
* :mod:`.printer`: the normalised text of value and derivative;
* :mod:`.compiler`: vectorised numpy closures, each distinct node computed once
  per call; user text never reaches ``eval``, ``exec`` or ``compile``;
* :mod:`.breakpoints`: where the formula switches (``where``, ``abs``, ``max``,
  ``min``, kinked built-ins), by bracketing and refinement;
* :mod:`.probes`: value and derivative probed out to ``|x| = 1e4``;
* :mod:`.poles`: poles between grid points (simple, even-order and near-zeros) refused;
* :mod:`.affine`: the closed-form smoothing of formulas affine between breakpoints;
* :mod:`.build`: the whole build and the bounded cache of built formulas.

The syntax and the limits are documented in the README (section "Typing your own
activation").
"""

from __future__ import annotations

from typing import Any

from .build import (FORMULA_CACHE, clear_formula_cache, formula_activation,
                    formula_activation_within)
from .limits import (LIMITS, SERVICE_LIMITS, FormulaLimits, FormulaSize, LimitRow,
                     formula_limit_rows)
from .vocabulary import CONSTANTS, FUNCTIONS

__all__ = [
    "formula_activation",
    "formula_activation_within",
    "FormulaLimits",
    "FormulaSize",
    "LimitRow",
    "LIMITS",
    "SERVICE_LIMITS",
    "formula_limit_rows",
    "FUNCTIONS",
    "CONSTANTS",
    "FORMULA_CACHE",
    "clear_formula_cache",
]


def __getattr__(name: str) -> Any:
    # ``activation`` lived here before the resolver had its own module; callers of the old
    # layout keep working (resolved lazily: the resolver imports this package)
    if name == "activation":
        from ..resolver import activation

        return activation
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
