"""The whole build of a formula activation, and the cache of built formulas.

:func:`formula_activation` reads the text (:mod:`.reader`), differentiates it
(:mod:`.differentiator`), compiles value and derivative (:mod:`.compiler`),
probes them (:mod:`.probes`), finds the breakpoints (:mod:`.breakpoints`) and,
for formulas that are affine between their breakpoints, attaches the closed-form
Gaussian smoothing (:mod:`.affine`). Every stage is bounded by a
:class:`~.limits.FormulaLimits`.
"""

from __future__ import annotations

import keyword
from collections.abc import Mapping
from typing import Any

import numpy as np

from ...errors import FormulaError
from ..base import Activation
from ..builtins import parameter_value
from ..cache import ActivationCache
from .affine import affine_smoothing
from .breakpoints import breakpoints, grid_points
from .compiler import compile_nodes, vectorise
from .differentiator import Differentiator
from .limits import LIMITS, FormulaLimits, FormulaSize, check_derivative
from .printer import to_text
from .poles import check_poles
from .probes import check_constants, probe
from .reader import Reader, check_size, check_text, parse
from .tree import Builder, postorder
from .vocabulary import ARITY, CONSTANTS, DEFAULTED

__all__ = ["formula_activation", "formula_activation_within", "clear_formula_cache",
           "FORMULA_CACHE"]

Array = np.ndarray


def _check_params(params: Mapping[str, Any], limits: FormulaLimits) -> dict[str, float]:
    if len(params) > limits.max_parameters:
        raise FormulaError(f"{len(params)} parameters given; the limit is "
                           f"{limits.max_parameters}")
    out: dict[str, float] = {}
    for key, raw in params.items():
        if not isinstance(key, str) or not key.isascii() or not key.isidentifier() \
                or keyword.iskeyword(key):
            raise FormulaError(f"parameter name {key!r} is not a plain name (letters, digits, _)")
        if key.startswith("_"):
            raise FormulaError(f"parameter name {key!r}: names starting with '_' are not allowed")
        if key == "x":
            raise FormulaError("parameter name 'x': x is the variable, not a parameter")
        if key in CONSTANTS or key in ARITY or key in ("and", "or", "not"):
            raise FormulaError(f"parameter name {key!r} is taken by a "
                               f"{'constant' if key in CONSTANTS else 'function'}")
        out[key] = parameter_value(f"params.{key}", raw)
    return out


def _unused_parameters(params: Mapping[str, float], reader: Reader, value_root: Any) -> None:
    unused = sorted(set(params) - reader.used)
    if not unused:
        return
    names = ", ".join(repr(u) for u in unused)
    uses = ", ".join(sorted(reader.used)) or "none"
    msg = (f"parameter {names} is given but the formula does not use it "
           f"(parameters the formula uses: {uses})")
    called = {n.name for n in postorder(value_root) if n.op == "call"}
    for fname, (pname, default, spelled) in DEFAULTED.items():
        if fname in called and pname in unused:
            msg += (f"; {fname}(...) inside a formula uses its default {pname} = {default:g}: "
                    f"write {spelled} to set it")
    raise FormulaError(msg)


def _build(text: str, params: dict[str, float],
           limits: FormulaLimits) -> tuple[Activation, FormulaSize]:
    nesting = check_text(text, limits)
    tree = parse(text)
    nodes, tree_depth = check_size(tree, limits)
    b = Builder()
    reader = Reader(text, params, b, limits)
    reader.whitelist(tree)
    value_root = reader.expr(tree)
    _unused_parameters(params, reader, value_root)
    if not value_root.has_x:
        raise FormulaError("the formula does not use the variable x")

    x = grid_points("probe")
    value_fns = compile_nodes(value_root)
    check_constants(value_root, value_fns)
    probe(value_root, value_fns, x, "value", value_root)
    check_poles(value_root, value_fns, "value")

    deriv_root = Differentiator(b)(value_root)
    deriv_nodes = len(postorder(deriv_root))
    check_derivative(limits, deriv_nodes, 0)
    deriv_fns = compile_nodes(deriv_root)
    probe(deriv_root, deriv_fns, x, "derivative", value_root)
    check_poles(deriv_root, deriv_fns, "derivative")

    bps = breakpoints(value_root, b, limits)
    if bps:
        near = np.array([p + s * h for p in bps for h in (0.0, 1e-9 * max(1.0, abs(p)), 1e-6)
                         for s in (-1.0, 1.0)])
        probe(value_root, value_fns, near, "value", value_root)
        probe(deriv_root, deriv_fns, near, "derivative", value_root)

    formula = to_text(value_root, taken=params)
    derivative_formula = to_text(deriv_root, taken=params)
    check_derivative(limits, deriv_nodes, len(derivative_formula))
    value_fn = vectorise(value_fns[id(value_root)])
    derivative_fn = vectorise(deriv_fns[id(deriv_root)])
    desc = "typed formula; derivative by exact symbolic differentiation"
    if params:
        desc += "; parameters " + ", ".join(f"{k}={v:g}" for k, v in sorted(params.items()))
    act = Activation(
        name=text.strip(),
        value_fn=value_fn,
        derivative_fn=derivative_fn,
        breakpoints=bps,
        params=params,
        formula=formula,
        derivative_formula=derivative_formula,
        description=desc,
        smoothing=affine_smoothing(value_fn, derivative_fn, bps),
    )
    size = FormulaSize(length=len(text), parameters=len(params), nesting=nesting, nodes=nodes,
                       tree_depth=tree_depth, largest_exponent=reader.largest_exponent,
                       breakpoints=len(bps), value_nodes=len(postorder(value_root)),
                       derivative_nodes=deriv_nodes, derivative_length=len(derivative_formula))
    return act, size


def _weight(entry: tuple[Activation, FormulaSize]) -> int:
    """Weight of a cached formula: the distinct nodes of its value and derivative graphs."""
    return entry[1].value_nodes + entry[1].derivative_nodes


#: compiled formulas per (exact text, parameters), with their measured sizes: at most 512
#: formulas and 200,000 graph nodes in all (issue 11, section 4: a service taking formulas
#: from anyone must not grow without bound)
FORMULA_CACHE: ActivationCache[tuple[Activation, FormulaSize]] = ActivationCache(
    "activations.formulas", 512, max_weight=200_000, weight=_weight)


def clear_formula_cache() -> None:
    """Forget every compiled formula (tests and long-running services)."""
    FORMULA_CACHE.clear()


def formula_activation_within(limits: FormulaLimits, text: str, **params: float) -> Activation:
    """:func:`formula_activation` under other limits (the service uses ``SERVICE_LIMITS``).

    Parameters
    ----------
    limits : FormulaLimits
        The limits to enforce (:data:`~.limits.LIMITS`, :data:`~.limits.SERVICE_LIMITS`,
        or your own).
    text : str
        The formula.
    **params : float
        Values of the named parameters the formula uses.

    Returns
    -------
    Activation
        The same object as :func:`formula_activation` returns for the same text and
        parameters while it is cached; a formula built earlier is checked again against
        ``limits`` from its recorded size.

    Raises
    ------
    FormulaError, InvalidParameterError
        As :func:`formula_activation`, with ``limits`` instead of the defaults.
    """
    if not isinstance(limits, FormulaLimits):
        raise FormulaError(f"limits must be a FormulaLimits, got {type(limits).__name__}")
    if not isinstance(text, str):
        raise FormulaError(f"a formula must be a string, got {type(text).__name__}")
    if len(text) > limits.max_length:  # before anything else looks at the text
        raise FormulaError(f"formula is {len(text)} characters long; the limit is "
                           f"{limits.max_length}")
    clean = _check_params(params, limits)
    key = (text, tuple(sorted(clean.items())))
    entry = FORMULA_CACHE.get(key)
    if entry is None:
        entry = FORMULA_CACHE.put(key, _build(text, clean, limits))
    else:
        limits.check(entry[1])
    return entry[0]


def formula_activation(text: str, **params: float) -> Activation:
    """Parse, check, differentiate and compile a typed formula in x.

    Parameters
    ----------
    text : str
        The formula, e.g. ``"x * sigmoid(beta * x)"`` (syntax in
        the README (section "Typing your own activation")).
    **params : float
        Values of the named parameters the formula uses.

    Returns
    -------
    Activation
        ``name`` is the text as typed (stripped), ``formula`` its normalised
        form, ``derivative_formula`` the exact derivative in the same syntax
        (with its shared parts named when spelling them out would be long),
        ``breakpoints`` the points found where the formula switches.

    Raises
    ------
    FormulaError
        If the text is refused (with the reason and, when it has one, the
        1-based ``column``), a parameter is unknown or unused, a limit of
        :data:`~.limits.LIMITS` is passed, or the value or derivative is not
        finite (or has a pole) somewhere on ``|x| <= 1e4``.
    InvalidParameterError
        If a parameter value is not a finite real number, or is subnormal.

    Notes
    -----
    The result is cached per (exact text, parameters) in a bounded LRU cache
    (:data:`FORMULA_CACHE`: 512 formulas, 200,000 graph nodes): the same input
    returns the same object while it is cached.
    """
    return formula_activation_within(LIMITS, text, **params)
