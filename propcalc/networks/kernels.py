"""Gaussian moments of elementwise functions of a Gaussian pair, for the blocks of a network.

The stream of a network at infinite width is, per unit, either a centred
Gaussian pair or an elementwise function ``s = a * phi(u) + b`` of one
(:class:`Elementwise`). An activation block and the layers after it need

* ``E[f(u)]``, ``E[f(u)^2]`` and ``E[f(u_1) f(u_2)]`` for u of variance q and
  correlations c (Poole et al. 2016, eqs. 3 and 5, with the means kept);
* for the backward pass ``E[phi'(s)^2]`` (Schoenholz et al. 2017, eq. 8: chi_1
  without sigma_w2) and, when positions are tracked, ``E[phi'(s_1) phi'(s_2)]``.

Every expectation comes from the engine (:mod:`propcalc.meanfield.maps`,
:mod:`propcalc.numerics.quadrature`), with one exception: a piecewise-linear
activation through 0 (``phi(x) = alpha x`` for x > 0, ``beta x`` for x < 0:
relu, leaky relu, linear and formulas of that shape, detected bit for bit) uses
the arc-cosine kernels of Cho & Saul 2009 (eq. 6 with n = 0 and n = 1):

* ``E[phi(u_1) phi(u_2)] = q ((alpha^2 + beta^2) k1(c) - 2 alpha beta k1(-c))``,
  ``k1(c) = (sqrt(1 - c^2) + (pi - arccos c) c) / (2 pi)``;
* ``E[phi'(u_1) phi'(u_2)] = (alpha^2 + beta^2) k0(c) + alpha beta arccos(c) / pi``,
  ``k0(c) = (pi - arccos c) / (2 pi)``;
* ``E[phi(u)] = (alpha - beta) sqrt(q / (2 pi))``, ``E[phi^2] = q (alpha^2 + beta^2) / 2``,
  ``E[phi'^2] = (alpha^2 + beta^2) / 2``
(tested against the engine's quadrature in tests/test_network_kernels.py).

Two activations in a row (``phi(a psi(u) + b)``) are composed into one
Activation whose breakpoints include the points where ``a psi(x) + b`` crosses
a breakpoint of phi (found by bracketing on a fixed grid).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import optimize

from ..activations.base import Activation
from ..caches import BoundedCache
from ..meanfield import maps
from ..numerics.quadrature import bivariate_expectation, gaussian_expectation

__all__ = [
    "Elementwise",
    "Moments",
    "moments",
    "derivative_cross",
    "composed",
    "outer_derivative_moments",
    "piecewise_linear_slopes",
    "clear_kernel_caches",
]

Array = np.ndarray
_TWO_PI = 2.0 * math.pi


@dataclass(frozen=True, eq=False)
class Elementwise:
    """``s = a * act(u) + b`` for a centred Gaussian u."""

    act: Activation
    a: float = 1.0
    b: float = 0.0

    def _key(self) -> tuple[int, float, float]:
        return (id(self.act), self.a, self.b)

    def __eq__(self, other: object) -> bool:
        return isinstance(other, Elementwise) and self._key() == other._key()

    def __hash__(self) -> int:
        return hash(self._key())

    def affine(self, scale: float, shift: float) -> Elementwise:
        """``scale * s + shift`` as an Elementwise of the same u."""
        return Elementwise(self.act, scale * self.a, scale * self.b + shift)


@dataclass(frozen=True)
class Moments:
    """Moments of ``f(u)`` for u of variance q.

    Attributes
    ----------
    mean, second : float
        E[f(u)], E[f(u)^2].
    cross : tuple of float
        E[f(u_1) f(u_2)] at each requested correlation.
    """

    mean: float
    second: float
    cross: tuple[float, ...]


#: (activation, q) -> (E[phi], E[phi^2], E[phi'^2]); activation -> slopes or (); compositions
_ONE_D = BoundedCache("networks.moments", 8192)
_SLOPES = BoundedCache("networks.slopes", 256)
_COMPOSED = BoundedCache("networks.compositions", 256)


def clear_kernel_caches() -> None:
    """Forget the cached moments and composed activations (also done by propcalc.clear_caches)."""
    for c in (_ONE_D, _SLOPES, _COMPOSED):
        c.clear()


# ------------------------------------------------------------------ piecewise linear
def piecewise_linear_slopes(act: Activation) -> tuple[float, float] | None:
    """(alpha, beta) if phi(x) = alpha x for x > 0 and beta x for x < 0, bit for bit; else None.

    Checked on 161 points per side from 1e-8 to 1e8 in magnitude: phi(x) must
    equal the slope times x exactly (relu, leaky relu, linear and formulas such
    as ``max(x, 0.2 * x)`` pass), and phi(0) = 0.
    """
    key = act  # activations hash by identity; the cache holds them, so keys stay valid
    hit = _SLOPES.get(key)
    if hit is not None:
        return hit or None
    out: tuple[float, float] | None = None
    if act.breakpoints in ((), (0.0,)):
        x = np.geomspace(1e-8, 1e8, 161)
        with np.errstate(all="ignore"):
            right, left, zero = act.value(x), act.value(-x), act.value(np.zeros(1))[0]
        alpha, beta = float(right[80]), float(-left[80])  # the values at |x| = 1
        if (zero == 0.0 and np.array_equal(right, alpha * x)
                and np.array_equal(left, -beta * x)):
            out = (alpha, beta)
    _SLOPES.put(key, out or ())
    return out


def _k1_scalar(c: float) -> float:
    """E[relu(u1) relu(u2)] / q at correlation c (Cho & Saul 2009, eq. 6 with n = 1, divided by
    2 pi); sqrt(1 - c^2) as sqrt((1 - c)(1 + c)), which keeps its digits near c = +-1."""
    return (math.sqrt((1.0 - c) * (1.0 + c)) + (math.pi - math.acos(c)) * c) / _TWO_PI


def _linear_derivative_cross(slopes: tuple[float, float], cs: Array) -> Array:
    alpha, beta = slopes
    # Cho & Saul 2009, eq. 6 with n = 0: P(u1 > 0, u2 > 0) = (pi - arccos c) / (2 pi)
    angle = np.arccos(cs)
    return ((alpha * alpha + beta * beta) * (math.pi - angle) + 2.0 * alpha * beta * angle) / _TWO_PI


# ------------------------------------------------------------------ one activation
def _one_d(act: Activation, q: float) -> tuple[float, float, float]:
    """(E[phi], E[phi^2], E[phi'^2]) at variance q, cached per (act, q)."""
    key = (act, q)
    hit = _ONE_D.get(key)
    if hit is not None:
        return hit
    slopes = piecewise_linear_slopes(act)
    if slopes is not None:
        a, b = slopes
        out = ((a - b) * math.sqrt(q / _TWO_PI), q * (a * a + b * b) / 2.0, (a * a + b * b) / 2.0)
    else:
        out = (float(maps.first_moment(act, q)), float(maps.second_moment(act, q)),
               float(maps.derivative_second_moment(act, q)))
    _ONE_D.put(key, out)
    return out


def moments(fn: Elementwise, q: float, cs: Any) -> tuple[Moments, float]:
    """Moments of ``s = fn(u)`` for u of variance q, and E[act'(u)^2].

    Parameters
    ----------
    fn : Elementwise
    q : float
        Variance of u, >= 0.
    cs : array_like
        Correlations of u pairs (at most a few).

    Returns
    -------
    (Moments, float)
        The moments of s (mean, second, cross at each c) and ``E[act'(u)^2]``.
    """
    m1, m2, d2 = _one_d(fn.act, q)
    slopes = piecewise_linear_slopes(fn.act)
    cl = [min(1.0, max(-1.0, float(c))) for c in np.ravel(cs)]
    if slopes is not None:
        # Cho & Saul 2009 on Python floats (no array overhead in long walks)
        alpha, beta = slopes
        s2, ab = alpha * alpha + beta * beta, 2.0 * alpha * beta
        cross = [q * (s2 * _k1_scalar(c) - ab * _k1_scalar(-c)) for c in cl]
    elif q == 0.0:
        cross = [m1 * m1] * len(cl)
    elif fn.act.smoothing is not None and len(cl) > 1:
        # one vectorised call of the 1-D conditional route for every correlation
        cross = [float(v) * m2 for v in
                 np.ravel(maps.correlation_map(fn.act, np.array(cl), 1.0, 0.0, q))]
    else:
        # the engine's correlation map at sigma_w2 = 1, sigma_b2 = 0 is E[f f'] / E[f^2]; its
        # scalar route uses the cached Hermite series at a repeated q (tens of us a call)
        cross = [m2 if c == 1.0 else float(maps.correlation_map(fn.act, c, 1.0, 0.0, q)) * m2
                 for c in cl]
    a, b = fn.a, fn.b
    # s = a f + b: E[s] = a E[f] + b, E[s s'] = a^2 E[f f'] + 2 a b E[f] + b^2
    shift = 2 * a * b * m1 + b * b
    return (Moments(a * m1 + b, a * a * m2 + shift,
                    tuple(a * a * x + shift for x in cross)), d2)


def derivative_cross(act: Activation, q: float, cs: Any) -> Array:
    """E[phi'(u_1) phi'(u_2)] at variance q and each correlation (Price's theorem form)."""
    cs = np.clip(np.asarray(cs, dtype=float), -1.0, 1.0)
    slopes = piecewise_linear_slopes(act)
    if slopes is not None:
        return _linear_derivative_cross(slopes, cs)
    if q == 0.0:
        d0 = float(act.derivative(np.zeros(1))[0])
        return np.full(cs.shape, d0 * d0)
    return np.asarray(maps.derivative_pair_expectation(act, cs, q), dtype=float)


# ------------------------------------------------------------------ compositions
def _preimages(fn: Callable[[Array], Array], levels: tuple[float, ...]) -> list[float]:
    """Points where fn crosses each level, found on a fixed grid over [-1e4, 1e4] and polished."""
    grid = np.concatenate([-np.geomspace(1e4, 1e-6, 600), [0.0], np.geomspace(1e-6, 1e4, 600)])
    with np.errstate(all="ignore"):
        values = fn(grid)
    out = []
    for level in levels:
        g = values - level
        sign = np.sign(g)
        idx = np.flatnonzero(sign[:-1] * sign[1:] < 0)
        for i in idx:
            out.append(float(optimize.brentq(lambda x: float(fn(np.array([x]))[0]) - level,
                                             grid[i], grid[i + 1], xtol=1e-300, rtol=1e-15)))
        # ends of runs where fn sits exactly on the level (a flat piece meeting a kink)
        flat = np.flatnonzero(sign == 0)
        out.extend(float(grid[i]) for i in flat
                   if (i > 0 and sign[i - 1] != 0) or (i + 1 < grid.size and sign[i + 1] != 0))
    return out


def composed(outer: Activation, inner: Elementwise) -> Activation:
    """The Activation ``x -> outer(a inner(x) + b)`` with its exact derivative and breakpoints."""
    key = (outer, inner.act, inner.a, inner.b)
    hit = _COMPOSED.get(key)
    if hit is not None:
        return hit
    psi, a, b = inner.act, inner.a, inner.b

    def value(x: Array) -> Array:
        return outer.value(a * psi.value(x) + b)

    def derivative(x: Array) -> Array:
        return outer.derivative(a * psi.value(x) + b) * a * psi.derivative(x)

    bps = set(psi.breakpoints)
    bps.update(_preimages(lambda x: a * psi.value(x) + b, outer.breakpoints))
    act = Activation(f"{outer.label}({a:g} * {psi.label}(x) + {b:g})", value, derivative,
                     tuple(sorted(bps)), declared_scale=min(outer.scale, psi.scale))
    _COMPOSED.put(key, act)
    return act


def outer_derivative_moments(outer: Activation, inner: Elementwise, q: float,
                             cs: Any = ()) -> tuple[float, Array]:
    """E[phi'(s)^2] and E[phi'(s_1) phi'(s_2)] for ``s = inner(u)``, u of variance q.

    phi' is taken at the stream s (the gradient with respect to s); evaluated by
    the engine's quadrature split at the breakpoints of the composition.
    """
    cs = np.clip(np.asarray(cs, dtype=float), -1.0, 1.0)
    psi, a, b = inner.act, inner.a, inner.b

    def d(x: Array) -> Array:
        return outer.derivative(a * psi.value(x) + b)

    bps = composed(outer, inner).breakpoints
    if q == 0.0:
        d0 = float(d(np.zeros(1))[0])
        return d0 * d0, np.full(cs.shape, d0 * d0)
    sq = float(gaussian_expectation(lambda x: d(x) ** 2, q, bps,
                                    what=f"derivative of {outer.label}, squared,"))
    cross = np.asarray(bivariate_expectation(lambda x, y: d(x) * d(y), cs, q, q, bps, bps,
                                             what=f"derivative of {outer.label} at a pair"),
                       dtype=float) if cs.size else np.empty(0)
    return sq, cross
