"""The mean-field maps of a deep random network and their slopes.

For a layer ``h' = W phi(h) + b`` with ``W_ij ~ N(0, sigma_w2 / fan_in)`` and
``b_i ~ N(0, sigma_b2)``, at infinite width:

* variance (length) map, Poole et al. 2016, eq. (3):
  ``V(q) = sigma_w2 E[phi(sqrt(q) z)^2] + sigma_b2``;
* correlation map, Poole et al. 2016, eq. (5), for two inputs whose
  pre-activations both have variance q and correlation c:
  ``C(c) = (sigma_w2 E[phi(u1) phi(u2)] + sigma_b2) / V(q)``, with
  ``u1 = sqrt(q) z1``, ``u2 = sqrt(q) (c z1 + sqrt(1 - c^2) z2)``
  (at the fixed point ``V(q*) = q*``, the denominator of the paper);
* its slope, by Price's theorem,
  ``C'(c) = sigma_w2 q E[phi'(u1) phi'(u2)] / V(q)``; at ``c = 1`` and
  ``q = q*`` this is ``chi_1 = sigma_w2 E[phi'(sqrt(q*) z)^2]``
  (Schoenholz et al. 2017, eq. (8));
* the slope of the variance map by Stein's identity,
  ``V'(q) = sigma_w2 E[(z^2 - 1) phi(sqrt(q) z)^2] / (2 q)``, which needs no
  second derivative and holds for discontinuous phi too.

A jump J of phi at b puts ``J delta(x - b)`` into phi': then ``chi_1`` is
infinite and ``C'(c)`` picks up the conditional and bivariate densities at the
jumps (the step function's map has infinite slope at c = 1).

The pair expectations E[f(u1) f(u2)] (f = phi, phi') and their routes (closed-form
smoothing, Price's integral near c = 1, the 2-D rule, the Hermite series) are in
:mod:`propcalc.meanfield.pairs`; the one-point moments in :mod:`propcalc.meanfield.moments`.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from ..activations.base import Activation
from ..activations.resolver import resolve
from ..errors import check_nonnegative, check_positive
from ..numerics.quadrature import DEFAULT_RULE, QuadratureRule, gaussian_expectation
# the moments and the pair expectations live in their own modules; their names stay here
from .moments import (_c_array, _q_array, _scaled, derivative_second_moment, first_moment,
                      largest_variance, second_moment)
from .pairs import (CONDITIONAL_GAP, SERIES_SPARE_POINTS, SLOPE_NODES, _by_parity, _deficits,
                    _gap_array, _jump_terms, _pair_any, _pair_by_series,
                    derivative_pair_expectation, pair_expectation)

__all__ = [
    "CONDITIONAL_GAP",
    "SLOPE_NODES",
    "SERIES_SPARE_POINTS",
    "second_moment",
    "first_moment",
    "derivative_second_moment",
    "variance_map",
    "variance_map_slope",
    "correlation_map",
    "correlation_map_slope",
    "correlation_map_and_slope",
    "correlation_gap_map",
    "pair_expectation",
    "derivative_pair_expectation",
    "chi_1",
    "variance_growth_rate",
    "variance_collapse_rate",
    "largest_variance",
]

Array = np.ndarray


def variance_map(act: Activation | str, q: Any, sigma_w2: float, sigma_b2: float,
                 rule: QuadratureRule = DEFAULT_RULE) -> Array:
    """Length map V(q) = sigma_w2 E[phi(sqrt(q) z)^2] + sigma_b2 (Poole et al. 2016, eq. 3).

    Parameters
    ----------
    act : str or Activation
        A built-in name, a formula in x, or an Activation (resolved once here).
    q : array_like
        Pre-activation variances, >= 0.
    sigma_w2 : float
        Weight variance times fan-in, > 0.
    sigma_b2 : float
        Bias variance, >= 0.

    Returns
    -------
    ndarray
        V(q), the shape of q.
    """
    act = resolve(act)
    rule = _scaled(act, rule)
    sw = check_positive("sigma_w2", sigma_w2)
    sb = check_nonnegative("sigma_b2", sigma_b2)
    return sw * second_moment(act, q, rule) + sb


def variance_map_slope(act: Activation | str, q: Any, sigma_w2: float,
                       rule: QuadratureRule = DEFAULT_RULE) -> Array:
    """V'(q) = sigma_w2 E[(z^2 - 1) phi(sqrt(q) z)^2] / (2 q) (Stein's identity).

    At q = 0 the limit ``sigma_w2 (phi'(0)^2 + phi(0) phi''(0))`` is returned (with
    phi(0) = 0 and a kink at 0, ``sigma_w2 (phi'(0-)^2 + phi'(0+)^2) / 2``, the rate of
    collapse towards zero variance).

    Parameters
    ----------
    act : str or Activation
        A built-in name, a formula in x, or an Activation (resolved once here).
    q : array_like
        Pre-activation variances, >= 0.
    sigma_w2 : float
        > 0.
    rule : QuadratureRule

    Returns
    -------
    ndarray
        V'(q), the shape of q.
    """
    act = resolve(act)
    rule = _scaled(act, rule)
    sw = check_positive("sigma_w2", sigma_w2)
    qa = _q_array(q)
    phi0 = float(act.value(np.array([0.0]))[0])
    square0 = phi0 * phi0 if math.isfinite(phi0) else 0.0
    # V' is analytic in q near 0 when phi is smooth at 0; there Stein's form loses digits
    # (phi(0)^2 (z^2 - 1) cancels to rounding, ~1e-16 / q relative): interpolate
    small = square0 > 0.0 and 0.0 not in act.breakpoints
    q_small = SMALL_VARIANCE * act.scale ** 2
    safe = np.where(qa > 0, qa, 1.0)
    if small:
        safe = np.where(qa < q_small, q_small, safe)
    # E[(z^2 - 1) f(sqrt(q) z)]: the rule hands the standard-normal node z along with x;
    # phi(0)^2 taken out first (E[z^2 - 1] = 0), which keeps the digits its rounding would eat
    val = gaussian_expectation(
        lambda x, z: (z * z - 1.0) * (act.value(x) ** 2 - square0),
        safe, act.breakpoints, rule=rule, what=f"{act.label}(x)^2", with_z=True)
    out = sw * val / (2.0 * safe)
    if np.any(qa == 0) or (small and np.any(qa < q_small)):
        zero = _slope_at_zero(act, sw)
        if small:
            # linear between the exact limit at 0 and Stein's value at q_small: the error is
            # the curvature term, about q_small * q * V'''(0) / 2
            out = np.where(qa < q_small, zero + (out - zero) * (qa / q_small), out)
        out = np.where(qa == 0, zero, out)
    return out


#: Below this variance (times the activation's scale squared) V'(q) of a phi smooth at 0 with
#: phi(0) != 0 is interpolated between its limit at 0 and Stein's form here.
SMALL_VARIANCE = 1e-6


def _slope_at_zero(act: Activation, sigma_w2: float) -> float:
    """lim V'(q) as q -> 0: ``sigma_w2 (phi'(0)^2 + phi(0) phi''(0))``.

    ``d/dq E[f(sqrt(q) z)] -> f''(0) / 2`` for a smooth f (Taylor to second order,
    E[z^2] = 1), with ``f = phi^2``, ``f'' = 2 (phi'^2 + phi phi'')``. With a kink at 0 and
    phi(0) = 0 it is the collapse rate ``sigma_w2 (phi'(0-)^2 + phi'(0+)^2) / 2``; a kink or
    jump at 0 with phi(0) != 0 makes it infinite (phi^2 then has a kink of size
    2 phi(0) [phi'] at 0, and E[|z|] sqrt(q) / q diverges). phi''(0) comes from phi' by a
    Richardson-extrapolated central difference (error ~ 1e-12 relative).
    """
    phi0 = float(act.value(np.array([0.0]))[0])
    if phi0 == 0.0 or (0.0 in act.breakpoints):
        return variance_collapse_rate(act, sigma_w2)
    near = [abs(b) for b in act.breakpoints if b != 0.0]
    h = min([1e-3] + [b / 4.0 for b in near])
    d = act.derivative(np.array([-h, h, -h / 2.0, h / 2.0, 0.0]))
    coarse, fine = (d[1] - d[0]) / (2.0 * h), (d[3] - d[2]) / h
    second = (4.0 * fine - coarse) / 3.0
    out = float(sigma_w2 * (d[4] * d[4] + phi0 * second))
    return out if math.isfinite(out) else math.inf


def variance_collapse_rate(act: Activation, sigma_w2: float) -> float:
    """lim V(q)/q as q -> 0 with sigma_b2 = 0 and phi(0) = 0: the rate towards q = 0.

    ``sigma_w2 (phi'(0-)^2 + phi'(0+)^2) / 2``; ``inf`` if phi(0) != 0.
    """
    phi0 = float(act.value(np.array([0.0]))[0])
    if phi0 != 0.0:
        return math.inf
    h = 1e-12
    dl, dr = act.derivative(np.array([-h, h]))
    return float(sigma_w2 * (dl * dl + dr * dr) / 2.0)


def variance_growth_rate(act: Activation, sigma_w2: float, q_large: float = 1e12,
                         rule: QuadratureRule = DEFAULT_RULE) -> float:
    """lim V(q)/q as q -> infinity: the per-layer growth factor of an exploding variance.

    Estimated at ``q_large`` (for ReLU it is exactly sigma_w2 / 2).
    """
    rule = _scaled(act, rule)
    sw = check_positive("sigma_w2", sigma_w2)
    q_large = min(q_large, 0.5 * largest_variance(act, rule))
    return float(sw * second_moment(act, q_large, rule) / q_large)


def chi_1(act: Activation | str, q: Any, sigma_w2: float,
          rule: QuadratureRule = DEFAULT_RULE) -> Array:
    """chi_1 = sigma_w2 E[phi'(sqrt(q) z)^2] (Schoenholz et al. 2017, eq. 8).

    The mean squared singular value of one layer's input-output Jacobian at
    variance q: gradients grow like chi_1^L. Infinite if phi jumps.

    Parameters
    ----------
    act : str or Activation
        A built-in name, a formula in x, or an Activation (resolved once here).
    q : array_like
        Pre-activation variances, >= 0 (``propagation(...).q_star`` for chi_1 at the fixed point).
    sigma_w2 : float
        > 0.
    rule : QuadratureRule

    Returns
    -------
    ndarray
        chi_1, the shape of q.
    """
    act = resolve(act)
    rule = _scaled(act, rule)
    sw = check_positive("sigma_w2", sigma_w2)
    return sw * derivative_second_moment(act, q, rule)


def correlation_map(act: Activation | str, c: Any, sigma_w2: float, sigma_b2: float,
                    q: float, rule: QuadratureRule = DEFAULT_RULE) -> Array:
    """Correlation map C(c) (Poole et al. 2016, eq. 5).

    ``C(c) = (sigma_w2 E[phi(u1) phi(u2)] + sigma_b2) / V(q)`` for two inputs
    whose pre-activations have variance q and correlation c.

    Parameters
    ----------
    act : str or Activation
        A built-in name, a formula in x, or an Activation (resolved once here).
    c : array_like
        Correlations in [-1, 1].
    sigma_w2, sigma_b2 : float
    q : float
        Common pre-activation variance of the two inputs; pass
        ``propagation(...).q_star`` for the map at the fixed point.

    Returns
    -------
    ndarray
        C(c), the shape of c.
    """
    act = resolve(act)
    rule = _scaled(act, rule)
    sw = check_positive("sigma_w2", sigma_w2)
    sb = check_nonnegative("sigma_b2", sigma_b2)
    qf = float(_q_array(q))
    vq = float(variance_map(act, qf, sw, sb, rule))
    if vq == 0.0:
        return np.ones_like(_c_array(c))
    ca = _c_array(c)
    if (ca.size and qf > 0 and rule == DEFAULT_RULE and act.scale == 1.0 and act.reach == 0.0
            and not act.has_jumps and act.smoothing is None):
        return _unit((sw * _by_parity(act, ca, lambda cc: _pair_by_series(act, cc, qf, rule))
                      + sb) / vq)
    return _unit((sw * _by_parity(act, ca, lambda cc: pair_expectation(act, cc, qf, rule)) + sb)
                 / vq)


def _unit(values: Array) -> Array:
    """C(c) within [-1, 1], where it lies exactly (|E[phi(u1) phi(u2)]| <= E[phi^2] by
    Cauchy-Schwarz and sigma_b2 >= 0): only rounding can carry it past (by ~1e-16)."""
    return np.clip(values, -1.0, 1.0)


def correlation_map_and_slope(act: Activation, c: Any, sigma_w2: float, sigma_b2: float,
                               q: float, rule: QuadratureRule = DEFAULT_RULE, *,
                               v_q: float | None = None) -> tuple[Array, Array]:
    """C(c) and C'(c) together, on shared quadrature nodes (about the cost of one).

    See :func:`correlation_map` and :func:`correlation_map_slope`. ``v_q`` is
    V(q) when the caller already has it (a root finder calling at one q saves
    a 1-D integral per call).
    """
    rule = _scaled(act, rule)
    sw = check_positive("sigma_w2", sigma_w2)
    sb = check_nonnegative("sigma_b2", sigma_b2)
    ca = _c_array(c)
    qf = float(_q_array(q))
    vq = float(variance_map(act, qf, sw, sb, rule)) if v_q is None else float(v_q)
    if qf == 0.0 or vq == 0.0:
        return (correlation_map(act, ca, sw, sb, qf, rule),
                correlation_map_slope(act, ca, sw, sb, qf, rule))
    e_val, e_der = _pair_any(act, ("value", "derivative"), ca, qf, rule,
                             f"{act.label} at (u1, u2)")
    e_der = e_der + _jump_terms(act, ca, qf, rule)
    return _unit((sw * e_val + sb) / vq), sw * qf * e_der / vq


def correlation_map_slope(act: Activation | str, c: Any, sigma_w2: float, sigma_b2: float,
                          q: float, rule: QuadratureRule = DEFAULT_RULE) -> Array:
    """C'(c) = sigma_w2 q E[phi'(u1) phi'(u2)] / V(q) (Price's theorem).

    At c = 1 and q = q* this equals chi_1; infinite there for a jumping phi.

    Parameters
    ----------
    act : str or Activation
        A built-in name, a formula in x, or an Activation (resolved once here).
    c : array_like
        Correlations in [-1, 1].
    sigma_w2, sigma_b2 : float
    q : float
        Common pre-activation variance of the two inputs (as :func:`correlation_map`).
    rule : QuadratureRule

    Returns
    -------
    ndarray
        C'(c), the shape of c.
    """
    act = resolve(act)
    rule = _scaled(act, rule)
    sw = check_positive("sigma_w2", sigma_w2)
    sb = check_nonnegative("sigma_b2", sigma_b2)
    qf = float(_q_array(q))
    vq = float(variance_map(act, qf, sw, sb, rule))
    if vq == 0.0:
        return np.full_like(_c_array(c), variance_collapse_rate(act, sw))
    return sw * qf * derivative_pair_expectation(act, c, qf, rule) / vq


def correlation_gap_map(act: Activation, gap: Any, sigma_w2: float, sigma_b2: float, q: float,
                        rule: QuadratureRule = DEFAULT_RULE, *, v_q: float | None = None,
                        denominator: float | None = None) -> tuple[Array, Array]:
    """``1 - C(1 - e)`` and ``C'(1 - e)`` for gaps ``e = 1 - c`` given exactly.

    Near c = 1 the map ``C`` itself keeps few digits of ``1 - C``; here
    ``1 - C(1 - e) = sigma_w2 (E[phi^2] - E[phi(u1) phi(u2)]) / V(q)`` is formed
    from the deficit, which is ``q int_{1-e}^1 E[phi'(u1) phi'(u2)](t) dt``
    (Price's theorem, Price 1958) for activations with a closed-form smoothing
    (exact in e down to any e > 0) and the half mean squared difference
    ``E[(phi(u1) - phi(u2))^2] / 2`` of the 2-D rule otherwise (there at
    ``c = 1 - e`` rounded to a double: pass gaps whose ``1 - e`` is exact).

    Parameters
    ----------
    act : Activation
    gap : array_like
        e = 1 - c in [0, 2].
    sigma_w2, sigma_b2 : float
    q : float
        Common pre-activation variance, > 0.
    v_q : float, optional
        V(q), when the caller has it.
    denominator : float, optional
        Divide by this instead of V(q): ``C(c) = (sigma_w2 E[phi(u1) phi(u2)] +
        sigma_b2) / denominator`` (dropout: the diagonal variance), then
        ``1 - C(1 - e) = (denominator - V(q) + sigma_w2 deficit) / denominator``.

    Returns
    -------
    one_minus_c, slope : ndarray
        ``1 - C(1 - e)`` and ``C'(1 - e) = sigma_w2 q E[phi'(u1) phi'(u2)] / denominator``,
        the shape of ``gap``.
    """
    rule = _scaled(act, rule)
    sw = check_positive("sigma_w2", sigma_w2)
    sb = check_nonnegative("sigma_b2", sigma_b2)
    e = _gap_array(gap)
    qf = check_positive("q", q)
    vq = float(variance_map(act, qf, sw, sb, rule)) if v_q is None else float(v_q)
    flat = np.atleast_1d(e).ravel()
    deficit, der = _deficits(act, flat, qf, rule, f"{act.label} at (u1, u2)")
    if denominator is None:
        one_minus = sw * deficit / vq
        den = vq
    else:
        den = check_positive("denominator", denominator)
        one_minus = ((den - vq) + sw * deficit) / den
    return one_minus.reshape(e.shape), (sw * qf * der / den).reshape(e.shape)
