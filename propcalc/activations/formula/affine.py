"""Closed-form Gaussian smoothing of formulas that are affine between their breakpoints.

Typed rectifiers (``max(x, 0)``, ``where(x > 0, x, 0.2 * x)``, clips, steps) are piecewise
``d x + e``; then E[phi(m + s z)] is a sum of truncated normal moments
(:func:`propcalc.numerics.smoothing.piecewise_smoothing`) and the correlation map a 1-D integral,
as for the built-in relu.
"""

from __future__ import annotations

import math
from collections.abc import Callable

import numpy as np

from ...numerics.smoothing import Piece, Smoothing, Term, piecewise_smoothing

__all__ = ["affine_smoothing"]

Array = np.ndarray


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


def affine_smoothing(value_fn: Callable[[Array], Array], deriv_fn: Callable[[Array], Array],
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
