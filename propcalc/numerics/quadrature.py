"""Gaussian expectations in one dimension by composite quadrature.

The rule
--------
For ``x = mean + sqrt(q) z`` with ``z ~ N(0, 1)`` we integrate
``E[f(x)] = int f(mean + sqrt(q) z) phi(z) dz`` over ``z in [-z_max, z_max]``
(the Gaussian mass outside ``|z| > 10`` is 1.5e-23) with Gauss-Legendre rules
on panels. The panel edges are

* a uniform grid of width ``panel_width`` (resolves the Gaussian weight);
* the breakpoints of ``f`` mapped to z, ``(b - mean) / sqrt(q)``, so that each
  panel sees a smooth piece: kinks and jumps cost no accuracy;
* a geometric grading ``z0 +- 2^-k`` towards ``z0 = -mean / sqrt(q)``, the
  point where the argument crosses 0. Activations change on the scale
  ``|x| ~ 1``, which in z is ``1 / sqrt(q)``: the grading keeps the rule exact
  to rounding for tanh-like functions up to ``q ~ 1e8``.

Each panel carries ``n_per_panel`` Gauss-Legendre nodes, so the rule is exact
for polynomials of degree ``<= 2 n_per_panel - 1`` on every smooth piece
(times the Gaussian weight, which is itself resolved to rounding by the
panels). The panel structure has a fixed size per call, so everything is
vectorised over means and variances (panels that fall outside the range get
zero width and weight).

The 2-D expectations are in :mod:`propcalc.numerics.bivariate`, on these panels.

Nodes and weights of the reference rules come from
:func:`numpy.polynomial.legendre.leggauss` and
:func:`numpy.polynomial.hermite_e.hermegauss` and are cached.
"""
from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from typing import Any

import numpy as np

from ..errors import ComputationError
# the panels live in their own module; their public names stay importable from here
from .panels import (DEFAULT_RULE, _check_finite, _validate, FEATURE_WIDTH, MAX_FEATURE_PANELS, QuadratureRule,
                     _levels_array, _rule_nodes, _scalar_nodes,
                     hermite_rule, largest_variance, legendre_rule, rule_nodes)
# the 2-D expectations live in their own module; their public names stay importable from here
from .bivariate import bivariate_expectation, conditional_pair_expectation

__all__ = [
    "QuadratureRule",
    "DEFAULT_RULE",
    "legendre_rule",
    "hermite_rule",
    "gaussian_expectation",
    "bivariate_expectation",
    "conditional_pair_expectation",
    "rule_nodes",
    "largest_variance",
    "FEATURE_WIDTH",
    "MAX_FEATURE_PANELS",
]

Array = np.ndarray
_INV_SQRT_2PI = 1.0 / math.sqrt(2.0 * math.pi)
# (_scalar_nodes and _rule_nodes stay reachable here for benchmarks and tests of the panels)
_REEXPORTED = (_scalar_nodes, _rule_nodes)


#: The tail check looks this far beyond the truncation (in z) to tell growth from a jump.
TAIL_PROBE = 2.0
#: A function at least this many times larger TAIL_PROBE beyond the cut than at the cut (and
#: than anywhere on the nodes) grows too fast for the truncation: exponentially in z at a
#: rate above ln(100) / 2 = 2.3, or polynomially of degree above 20 (1.2^20 = 38 ... 1.2^26 = 114).
TAIL_GROWTH = 100.0


def _tail_rows(fn: Callable[..., Array], mean: Array, q: Array, top: Array, total: Array,
               rule: QuadratureRule, with_z: bool) -> tuple[Array, Array]:
    """Rows whose truncated tails are not negligible, and the x where each is worst.

    The neglected mass beyond ``|z| = L`` is estimated as ``|f(x_L)| varphi(L)`` times a
    generous width 10. It matters when it exceeds 1e-10 of ``E|f|`` AND f grows beyond
    the cut: ``|f|`` at ``L + TAIL_PROBE`` is more than TAIL_GROWTH times its value at the
    cut and its largest value on the nodes (``top``). A function that does not grow there
    (bounded, a jump, slow polynomial growth) leaves at most about ``|f(x_L)| varphi(L) / L``,
    below 1e-22 of its own scale ``max |f|``, whatever E|f| is: a step at x = 0.3 at a small
    variance integrates to ~1e-22 and that is still the right number at the function's scale.
    """
    L = rule.z_max
    mean, q = np.broadcast_arrays(np.asarray(mean, float), np.asarray(q, float))
    sq = np.sqrt(q)
    zs = np.array([-L, L, -L - TAIL_PROBE, L + TAIL_PROBE])
    pts = mean[..., None] + sq[..., None] * zs
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        fe = np.abs(np.asarray(fn(pts, zs) if with_z else fn(pts), dtype=float))
    at_cut, beyond = fe[..., :2], fe[..., 2:]
    tail = at_cut.max(axis=-1) * (_INV_SQRT_2PI * math.exp(-0.5 * L * L)) * 10.0
    with np.errstate(invalid="ignore"):
        growing = np.any(~np.isfinite(beyond)
                         | (beyond > TAIL_GROWTH * np.maximum(at_cut, np.asarray(top)[..., None])),
                         axis=-1)
        significant = ~np.isfinite(tail) | (tail > 1e-10 * np.asarray(total) + 1e-300)
    bad = significant & growing
    worst = np.take_along_axis(pts[..., :2], np.argmax(at_cut, axis=-1)[..., None], -1)[..., 0]
    return np.asarray(bad), np.asarray(worst)


def _check_tails(fn: Callable[..., Array], mean: Array, q: Array, f: Array, total: Array,
                 rule: QuadratureRule, what: str, with_z: bool) -> None:
    """Raise ComputationError where :func:`_tail_rows` finds a tail that cannot be neglected
    (``f``: the integrand on the nodes, read only when the common case fails)."""
    L = rule.z_max
    ends = np.stack([mean - np.sqrt(q) * L, mean + np.sqrt(q) * L], axis=-1)
    with np.errstate(over="ignore", invalid="ignore"):
        fe = np.asarray(fn(ends, np.array([-L, L])) if with_z else fn(ends), dtype=float)
    _check_finite(np.abs(fe), ends, what)
    # the common case first: every tail negligible against E|f| (no probe beyond the cut)
    tail = np.max(np.abs(fe), axis=-1) * (_INV_SQRT_2PI * math.exp(-0.5 * L * L)) * 10.0
    if np.all(tail <= 1e-10 * np.asarray(total) + 1e-300):
        return
    bad, worst = _tail_rows(fn, mean, q, np.max(np.abs(f), axis=-1), total, rule, with_z)
    if np.any(bad):
        xe = float(np.ravel(worst)[int(np.flatnonzero(np.ravel(bad))[0])])
        raise ComputationError(
            f"{what} grows too fast: it is still significant at x = {xe:.6g} "
            f"({L:g} standard deviations out) and grows beyond, so the Gaussian expectation "
            "cannot be trusted")


def gaussian_expectation(fn: Callable[[Array], Array], q: Any, breakpoints: Sequence[float] = (),
                         *, mean: Any = 0.0, rule: QuadratureRule = DEFAULT_RULE,
                         check_tails: bool = True, what: str = "the integrand",
                         with_z: bool = False, fresh: bool = False) -> Array:
    """E[fn(mean + sqrt(q) z)] for z ~ N(0, 1), vectorised over ``q`` and ``mean``.

    Parameters
    ----------
    fn : callable
        Vectorised function of x.
    q : array_like
        Variances, >= 0.
    breakpoints : sequence of float
        Kinks or jumps of ``fn`` in x; the integral is split there.
    mean : array_like, optional
        Means (broadcast with q).
    rule : QuadratureRule, optional
    check_tails : bool
        Raise if the integrand is not negligible at the truncation ``|z| = z_max``
        (an integrand growing like exp(x^2 / (2 q)) or faster).
    with_z : bool
        Call ``fn(x, z)`` with the standard-normal node z as well (for Stein-type
        weights such as ``z^2 - 1``); requires q > 0.
    fresh : bool
        ``fn`` returns a new array at every call (``phi(x) ** 2``, not ``phi`` itself),
        so without ``check_tails`` its values may be overwritten by the weighted ones
        (the same numbers, one large array fewer).

    Returns
    -------
    ndarray
        Shape of ``broadcast(q, mean)``.

    Raises
    ------
    ComputationError
        If ``fn`` is not finite at a node, or (with ``check_tails``) the
        truncated tails are not negligible.

    Notes
    -----
    Exact for polynomials of degree <= 2 n_per_panel - 1 on every smooth piece;
    tested to 1e-13 relative against mpmath for the built-in activations.
    """
    if not with_z and np.ndim(q) == 0 and np.ndim(mean) == 0:
        fast = _scalar_expectation(fn, float(q), float(mean), breakpoints, rule, check_tails)
        if fast is not None:
            return fast
    mean_b, q_b = np.broadcast_arrays(np.asarray(mean, float), np.asarray(q, float))
    _validate(q_b, "q", lower=0.0)
    _validate(mean_b, "mean")
    levels = _levels_array(np.sqrt(q_b), rule.scale)
    if levels.size > 8 and levels.min() + 4 <= levels.max():
        # rows far apart in scale need different gradings: do them in groups (cheaper)
        out = np.empty(q_b.shape)
        bins = levels // 4
        for b in np.unique(bins):
            sel = bins == b
            out[sel] = gaussian_expectation(fn, q_b[sel], breakpoints, mean=mean_b[sel], rule=rule,
                                            check_tails=check_tails, what=what, with_z=with_z,
                                            fresh=fresh)
        return out
    x, w = rule_nodes(mean, q, breakpoints, rule)
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        if with_z:
            z = (x - mean_b[..., None]) / np.sqrt(q_b)[..., None]
            f = np.asarray(fn(x, z), dtype=float)
        else:
            f = np.asarray(fn(x), dtype=float)
    # zero-width panels (coinciding edges) put weight-0 nodes on breakpoints: ignore them
    if not _all_positive(w):
        f = np.where(w > 0, f, 0.0)
    _check_finite(f, x, what)
    wf = np.multiply(w, f, out=f) if fresh and not check_tails else w * f
    out = np.sum(wf, axis=-1)
    if check_tails:  # (wf is no longer needed: its absolute values in place)
        _check_tails(fn, mean_b, q_b, f, np.sum(np.abs(wf, out=wf), axis=-1), rule, what,
                     with_z)
    return out


def _all_positive(w: Array) -> bool:
    """Whether every weight is > 0 (one row when the rows are a broadcast of it)."""
    if w.ndim > 1 and not any(w.strides[:-1]):
        w = w[(0,) * (w.ndim - 1)]
    return bool(np.all(w > 0))


def _scalar_expectation(fn: Callable[[Array], Array], q: float, mean: float,
                        breakpoints: Sequence[float], rule: QuadratureRule,
                        check_tails: bool) -> Array | None:
    """The scalar case of :func:`gaussian_expectation` on cached nodes, or None.

    None (the general path then runs and words any error) when q or mean is not a
    finite valid number, or when the integrand is not finite at a node or in the tails.
    """
    if not (math.isfinite(q) and q >= 0.0 and math.isfinite(mean)):
        return None
    x, w = rule_nodes(mean, q, breakpoints, rule)
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        f = np.asarray(fn(x), dtype=float)
        total = float(np.dot(w, f))
    if not math.isfinite(total):
        return None  # possibly inf * 0 at a weight-0 node, or a true failure: the full path
    if check_tails:
        L = rule.z_max
        sq = math.sqrt(q)
        absf = np.abs(f)
        total_abs = float(np.dot(w, absf))
        with np.errstate(over="ignore", invalid="ignore"):
            fe = np.abs(np.asarray(fn(np.array([mean - sq * L, mean + sq * L])), dtype=float))
        tail = float(fe.max()) * (_INV_SQRT_2PI * math.exp(-0.5 * L * L)) * 10.0
        # the common case: negligible against E|f|; else the full check (growth beyond the cut)
        if not (math.isfinite(tail) and tail <= 1e-10 * total_abs + 1e-300) and _tail_rows(
                fn, np.float64(mean), np.float64(q), np.float64(absf.max(initial=0.0)),
                np.float64(total_abs), rule, False)[0].any():
            return None
    return np.float64(total)
