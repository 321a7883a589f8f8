"""Activation functions: the type, the built-ins, typed formulas and the resolver.

Modules, bottom up:

* :mod:`.profile`: the measured property profile (:class:`ActivationProperties`);
* :mod:`.base`: :class:`Activation` (value, exact derivative, breakpoints);
* :mod:`.cache`: bounded LRU caches of built activations;
* :mod:`.names`: names in any spelling, and the nearest name for a typo (any vocabulary);
* :mod:`.builtins`: the built-in activations and their registry;
* :mod:`.formula`: typed formulas, compiled by stage;
* :mod:`.resolver`: :func:`resolve` and :func:`activation` (a name, a formula or an
  Activation, resolved once at the boundary of every analysis).
"""

from __future__ import annotations

from .base import Activation
from .builtins import (BUILTIN_DESCRIPTIONS, SELU_ALPHA, SELU_SCALE, builtin_activation,
                       builtin_names, builtin_parameters, canonical_builtin_name)
from .cache import activation_caches, clear_activation_caches
from .formula import (FUNCTIONS, LIMITS, SERVICE_LIMITS, FormulaLimits, formula_activation,
                      formula_activation_within, formula_limit_rows)
from .names import canonical_name, did_you_mean, nearest_name
from .profile import ActivationProperties
from .resolver import activation, resolve

__all__ = [
    "Activation",
    "ActivationProperties",
    "activation",
    "resolve",
    "formula_activation",
    "builtin_activation",
    "builtin_names",
    "builtin_parameters",
    "BUILTIN_DESCRIPTIONS",
    "SELU_ALPHA",
    "SELU_SCALE",
    "FormulaLimits",
    "LIMITS",
    "SERVICE_LIMITS",
    "formula_activation_within",
    "formula_limit_rows",
    "FUNCTIONS",
    "canonical_builtin_name",
    "canonical_name",
    "nearest_name",
    "did_you_mean",
    "activation_caches",
    "clear_activation_caches",
]
