"""The whole build of a formula activation, and the cache of built formulas.

:func:`formula_activation` reads the text (:mod:`.reader`), differentiates it
(:mod:`.differentiator`), compiles value and derivative (:mod:`.compiler`),
probes them (:mod:`.probes`), finds the breakpoints (:mod:`.breakpoints`) and,
for formulas that are affine between their breakpoints, attaches the closed-form
Gaussian smoothing.
"""

from __future__ import annotations

import keyword
import math
from collections.abc import Callable, Mapping
from typing import Any

import numpy as np

from ...errors import FormulaError, check_finite
from ...numerics.smoothing import Piece, Smoothing, Term, piecewise_smoothing
from ..base import Activation
from ..cache import ActivationCache
from .breakpoints import breakpoints, grid_points
from .compiler import compile_nodes, vectorise
from .differentiator import Differentiator
from .printer import to_text
from .probes import check_poles, probe
from .reader import Reader, check_size, check_text, parse
from .tree import Builder, postorder
from .vocabulary import ARITY, CONSTANTS, DEFAULTED, LIMITS

__all__ = ["formula_activation", "clear_formula_cache", "FORMULA_CACHE"]

Array = np.ndarray

def _check_params(params: Mapping[str, Any]) -> dict[str, float]:
    if len(params) > LIMITS.max_parameters:
        raise FormulaError(f"{len(params)} parameters given; the limit is "
                           f"{LIMITS.max_parameters}")
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
        out[key] = check_finite(f"params.{key}", raw)
    return out


def _build(text: str, params: dict[str, float]) -> Activation:
    check_text(text)
    tree = parse(text)
    check_size(tree)
    b = Builder()
    reader = Reader(text, params, b)
    reader.whitelist(tree)
    value_root = reader.expr(tree)
    unused = sorted(set(params) - reader.used)
    if unused:
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
    if not value_root.has_x:
        raise FormulaError("the formula does not use the variable x")

    x = grid_points("probe")
    value_fns = compile_nodes(value_root)
    probe(value_root, value_fns, x, "value", value_root)

    check_poles(value_root, value_fns)

    deriv_root = Differentiator(b)(value_root)
    deriv_fns = compile_nodes(deriv_root)
    probe(deriv_root, deriv_fns, x, "derivative", value_root)

    bps = breakpoints(value_root, b)
    if bps:
        near = np.array([p + s * h for p in bps for h in (0.0, 1e-9 * max(1.0, abs(p)), 1e-6)
                         for s in (-1.0, 1.0)])
        probe(value_root, value_fns, near, "value", value_root)
        probe(deriv_root, deriv_fns, near, "derivative", value_root)

    formula = to_text(value_root)
    derivative_formula = to_text(deriv_root)
    value_fn = vectorise(value_fns[id(value_root)])
    derivative_fn = vectorise(deriv_fns[id(deriv_root)])
    desc = "typed formula; derivative by exact symbolic differentiation"
    if params:
        desc += "; parameters " + ", ".join(f"{k}={v:g}" for k, v in sorted(params.items()))
    return Activation(
        name=text.strip(),
        value_fn=value_fn,
        derivative_fn=derivative_fn,
        breakpoints=bps,
        params=params,
        formula=formula,
        derivative_formula=derivative_formula,
        description=desc,
        smoothing=_affine_smoothing(value_fn, derivative_fn, bps),
    )


def _piece_samples(lo: float, hi: float) -> Array:
    """Points inside (lo, hi): a dense interior set, or a geometric run out to 1e4 away."""
    if math.isinf(lo) and math.isinf(hi):
        far = np.geomspace(1e-3, 1e4, 60)
        return np.concatenate([-far[::-1], np.linspace(-3.0, 3.0, 61), far])
    if math.isinf(lo):
        return hi - np.geomspace(1e-6, 1e4, 80)
    if math.isinf(hi):
        return lo + np.geomspace(1e-6, 1e4, 80)
    return np.linspace(lo, hi, 82)[1:-1]


def _affine_smoothing(value_fn: Callable[[Array], Array], deriv_fn: Callable[[Array], Array],
                      bps: tuple[float, ...]) -> Smoothing | None:
    """Closed-form smoothing of a formula that is affine between its breakpoints, else None.

    Typed rectifiers ("max(x, 0)", "where(x > 0, x, 0.2 * x)", clipping, steps) are
    piecewise ``d x + e``; then E[phi(m + s z)] is a sum of truncated normal moments
    (:func:`propcalc.smoothing.piecewise_smoothing`) and the correlation map a 1-D
    integral. A piece counts as affine when phi equals ``d x + e`` (d and e read at
    one interior point) to 1e-13 at 80 points spread over the piece, out to |x| = 1e4.
    """
    edges = (-math.inf,) + tuple(bps) + (math.inf,)
    values, slopes = [], []
    for lo, hi in zip(edges[:-1], edges[1:]):
        xs = _piece_samples(lo, hi)
        with np.errstate(all="ignore"):
            x0 = xs[len(xs) // 2: len(xs) // 2 + 1]
            d = float(deriv_fn(x0)[0])
            e = float(value_fn(x0)[0]) - d * float(x0[0])
            f = value_fn(xs)
            ds = deriv_fn(xs)
        if not (math.isfinite(d) and math.isfinite(e)):
            return None
        scale = 1.0 + np.abs(d * xs) + abs(e)
        if not (np.all(np.abs(f - (d * xs + e)) <= 1e-13 * scale)
                and np.all(np.abs(ds - d) <= 1e-13 * (1.0 + abs(d)))):
            return None
        terms = tuple(t for t in (Term(d, 1), Term(e)) if t.coef != 0.0)
        if terms:
            values.append(Piece(lo, hi, terms))
        if d != 0.0:
            slopes.append(Piece(lo, hi, (Term(d),)))
    return piecewise_smoothing(values, slopes)


#: compiled formulas per (exact text, parameters): bounded in entries (issue 11, section 4)
FORMULA_CACHE: ActivationCache[Activation] = ActivationCache("typed formulas", 512)


def clear_formula_cache() -> None:
    """Forget every compiled formula (tests and long-running services)."""
    FORMULA_CACHE.clear()


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
        form, ``derivative_formula`` the exact derivative in the same syntax,
        ``breakpoints`` the points found where the formula switches.

    Raises
    ------
    FormulaError
        If the text is refused (with the reason and, when it has one, the
        1-based ``column``), a parameter is unknown or unused, or the value or
        derivative is not finite somewhere on ``|x| <= 1e4``.
    InvalidParameterError
        If a parameter value is not a finite real number.

    Notes
    -----
    The result is cached per (exact text, parameters) in a bounded LRU cache
    of 512 entries: the same input returns the same object while it is cached.
    """
    if not isinstance(text, str):
        raise FormulaError(f"a formula must be a string, got {type(text).__name__}")
    clean = _check_params(params)
    key = (text, tuple(sorted(clean.items())))
    act = FORMULA_CACHE.get(key)
    if act is None:
        act = FORMULA_CACHE.put(key, _build(text, clean))
    return act
