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

Two routes compute the pair expectation E[f(u1) f(u2)]:

* with a closed-form smoothing ``S_f(m, v) = E[f(m + sqrt(v) z)]`` on the
  activation (:mod:`propcalc.smoothing`), the 1-D integral
  ``E[f(u1) S_f(c u1, q (1 - c^2))]`` (u2 given u1 is normal); for
  ``1 - c < CONDITIONAL_GAP`` the value is ``E[f^2] - q int_c^1 E[f'(u1) f'(u2)](t) dt``
  (Price's theorem), so 1 - C keeps its digits near c = 1;
* otherwise the 2-D rule, for ``|c| >= 1/2`` in the difference form
  ``E[f(u1) f(u2)] = E[f^2] - E[(f(u1) - f(u2))^2] / 2`` (exchangeable pair), so
  its error is scaled by the small difference near ``c = +-1``; vectorised maps
  of smooth activations use the Hermite series where its tail bound allows.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Iterator
from typing import Any

import numpy as np

from .. import domains
from ..activations.base import Activation
from ..activations.resolver import resolve
from ..errors import InvalidParameterError, check_nonnegative, check_positive
from ..numerics.hermite import SERIES_PASSES, coefficients_at, series_sum
from ..numerics.quadrature import (DEFAULT_RULE, QuadratureRule, bivariate_expectation,
                         conditional_pair_expectation, gaussian_expectation, legendre_rule)
from ..numerics.quadrature import largest_variance as quadrature_largest_variance

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
_Q_LO, _Q_HI = domains.Q_POSITIVE_MIN, domains.Q_MAX


def _scaled(act: Activation, rule: QuadratureRule) -> QuadratureRule:
    """The rule with the activation's feature scale (steep formulas need finer grading)."""
    scale = getattr(act, "scale", 1.0)
    reach = getattr(act, "reach", 0.0)
    if rule.scale == scale and rule.reach == reach:
        return rule
    return dataclasses.replace(rule, scale=scale, reach=reach)


def largest_variance(act: Activation, rule: QuadratureRule = DEFAULT_RULE) -> float:
    """The largest variance whose Gaussian integrals of ``act`` can be resolved: inf, or for
    an oscillating formula the limit of :func:`propcalc.numerics.quadrature.largest_variance`
    (sin(x): 3.6e7). Scans and large-variance limits stop there."""
    return quadrature_largest_variance(_scaled(act, rule))


def _q_array(q: Any, field: str = "q") -> Array:
    """q checked against its documented domain (0 or [Q_POSITIVE_MIN, Q_MAX], propcalc.domains)."""
    if isinstance(q, (float, np.floating)) and (q == 0.0 or _Q_LO <= q <= _Q_HI):
        return np.float64(q)  # the common scalar case, without array reductions
    return domains.check_array("q", q, field)


def _c_array(c: Any) -> Array:
    if isinstance(c, (float, np.floating)) and -1.0 <= c <= 1.0:
        return np.asarray(float(c))
    return domains.check_array("c", c)


def first_moment(act: Activation, q: Any, rule: QuadratureRule = DEFAULT_RULE) -> Array:
    """E[phi(sqrt(q) z)], vectorised over q."""
    rule = _scaled(act, rule)
    return gaussian_expectation(act.value, _q_array(q), act.breakpoints, rule=rule,
                                what=f"{act.label}(x)")


def second_moment(act: Activation, q: Any, rule: QuadratureRule = DEFAULT_RULE) -> Array:
    """E[phi(sqrt(q) z)^2], vectorised over q."""
    rule = _scaled(act, rule)
    return gaussian_expectation(lambda x: act.value(x) ** 2, _q_array(q), act.breakpoints,
                                rule=rule, what=f"{act.label}(x)^2")


def derivative_second_moment(act: Activation, q: Any, rule: QuadratureRule = DEFAULT_RULE) -> Array:
    """E[phi'(sqrt(q) z)^2] (infinite where phi jumps), vectorised over q."""
    rule = _scaled(act, rule)
    qa = _q_array(q)
    out = gaussian_expectation(lambda x: act.derivative(x) ** 2, qa, act.breakpoints,
                               rule=rule, what=f"derivative of {act.label}, squared,")
    if act.has_jumps:
        out = np.full_like(out, math.inf)
    return out


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
    """
    act = resolve(act)
    rule = _scaled(act, rule)
    sw = check_positive("sigma_w2", sigma_w2)
    return sw * derivative_second_moment(act, q, rule)


# -------------------------------------------------------------------------------------
# pair expectations
# -------------------------------------------------------------------------------------
#: Below c = 1 - CONDITIONAL_GAP the pair expectation of an activation with a closed-form
#: smoothing is one 1-D integral; its error is ~1e-16 E[phi^2] absolute, i.e. 1e-16 / (1 - C)
#: relative in 1 - C. Closer to c = 1 the value comes from the integral of the slope, which
#: keeps 1 - C accurate to rounding relative to itself.
CONDITIONAL_GAP = 1e-2
#: Gauss-Legendre nodes per panel in u = sqrt(1 - t) for that integral. The integrand
#: 2 u E[phi' phi'](1 - u^2) has its structure at u ~ delta: for a smooth phi at large q a
#: singularity at about i scale / sqrt(2 q) (erf: (1 + 2q)^2 = 4 q^2 t^2); for breakpoints
#: b1 != b2 terms exp(-(b1 - b2)^2 / (4 q u^2)), flat at u = 0 but turning on at
#: u ~ |b1 - b2| / (2 sqrt(q)). The u-range is split geometrically to half the smaller of
#: the two scales, then [0, last edge]; with 12 nodes per panel the map stays within 1e-15
#: of the direct 1-D route (hard_tanh, clips, steps, erf at q up to 1e4).
SLOPE_NODES = 16


def _pair_conditional(act: Activation, kinds: tuple[str, ...], c: Array, q: float,
                      rule: QuadratureRule, what: str) -> tuple[Array, ...]:
    """E[f(u1) f(u2)] for f = phi or phi' (``kinds``) as 1-D integrals.

    ``E[f(u1) f(u2)] = E[f(u1) S_f(c u1, q (1 - c^2))]`` with the closed-form
    smoothing S_f of :mod:`propcalc.smoothing` (u2 given u1 is normal). For
    phi near c = 1 the exact difference form by Price's theorem is used instead,
    ``E[phi(u1) phi(u2)] = E[phi^2] - q int_c^1 E[phi'(u1) phi'(u2)](t) dt``
    (with the Dirac terms of a jumping phi), integrated in ``u = sqrt(1 - t)``,
    where the integrand ``2 u E[phi' phi'](1 - u^2)`` is smooth even for kinks
    and jumps.
    """
    sm = act.smoothing
    if sm is None:
        raise TypeError(f"{act.label} has no closed-form smoothing")
    smooth = {"value": (act.value, sm.value), "derivative": (act.derivative, sm.derivative)}

    def direct(kind_list: tuple[str, ...], cc: Array,
               gap: Array | None = None) -> tuple[Array, ...]:
        return conditional_pair_expectation([smooth[k] for k in kind_list], cc, q, q,
                                            act.breakpoints, act.breakpoints, rule=rule,
                                            what=what, gap=gap)

    # only the value needs the slope integral near c = 1 (the slope itself has no cancellation)
    near = (c > 1.0 - CONDITIONAL_GAP) if "value" in kinds else np.zeros(c.shape, dtype=bool)
    out = list(direct(kinds, c[~near])) if np.any(~near) else [np.empty(0) for _ in kinds]
    results = [np.empty_like(c) for _ in kinds]
    for res, o in zip(results, out):
        res[~near] = o
    if np.any(near):
        cn = c[near]
        # u in [0, sqrt(1 - c)]; nothing to integrate at c = 1
        integral = _slope_integral(act, np.sqrt(1.0 - cn), q, rule, what)
        square = float(gaussian_expectation(lambda x: act.value(x) ** 2, q, act.breakpoints,
                                            rule=rule, what=what))
        for k, res in zip(kinds, results):
            res[near] = square - q * integral if k == "value" else direct((k,), cn)[0]
    return tuple(results)


def _slope_integral(act: Activation, width: Array, q: float, rule: QuadratureRule,
                    what: str) -> Array:
    """``int_{1 - w^2}^1 E[phi'(u1) phi'(u2)](t) dt`` for each width ``w = sqrt(1 - c)``.

    Integrated in ``u = sqrt(1 - t)`` (the integrand ``2 u E[phi' phi'](1 - u^2)`` is
    smooth even for kinks and jumps, whose Dirac terms are included), with the exact
    gaps ``u^2`` passed down. Needs the activation's closed-form smoothing.
    """
    sm = act.smoothing
    integral = np.zeros_like(width)
    inner = width > 0.0
    if sm is None or not np.any(inner):
        return integral
    u, wu = _slope_nodes(width[inner], q, act.scale, act.breakpoints)
    # the nodes t = 1 - u^2 are passed with their exact gaps u^2: in floats, t
    # itself would round to 1 for u < 1e-8 and 1 - t^2 would keep few digits
    gaps = (u * u).ravel()
    d_der = (conditional_pair_expectation([(act.derivative, sm.derivative)], 1.0 - gaps, q, q,
                                          act.breakpoints, act.breakpoints, rule=rule, what=what,
                                          gap=gaps)[0]
             + _jump_terms(act, 1.0 - gaps, q, rule, gaps))
    integral[inner] = np.sum(wu * 2.0 * u * d_der.reshape(u.shape), axis=1)
    return integral


def _slope_nodes(width: Array, q: float, scale: float,
                 breakpoints: tuple[float, ...] = ()) -> tuple[Array, Array]:
    """Nodes and weights in u on [0, width] (one row per width), graded towards u = 0.

    Panels ``[width 2^-(k+1), width 2^-k]`` down to half of ``delta``, the smaller of
    ``scale / sqrt(2 q)`` and ``min |b_i - b_j| / (2 sqrt(q))`` (see SLOPE_NODES), then
    [0, last edge].
    """
    t_gl, w_gl = legendre_rule(SLOPE_NODES)
    delta = scale / math.sqrt(2.0 * q)
    if len(breakpoints) > 1:
        gap = float(np.min(np.diff(np.sort(np.asarray(breakpoints, dtype=float)))))
        delta = min(delta, gap / (2.0 * math.sqrt(q)))
    delta *= 0.5
    levels = int(max(0, math.ceil(math.log2(max(float(np.max(width)) / delta, 1.0)))))
    frac = np.concatenate([[0.0], 2.0 ** -np.arange(levels, -1, -1, dtype=float)])
    edges = width[:, None] * frac  # (n, levels + 2), rows of edges in u
    a, b = edges[:, :-1], edges[:, 1:]
    half = 0.5 * (b - a)
    u = ((0.5 * (a + b))[:, :, None] + half[:, :, None] * t_gl).reshape(width.size, -1)
    w = (half[:, :, None] * w_gl).reshape(width.size, -1)
    return u, w


def _pair_any(act: Activation, kinds: tuple[str, ...], c: Array, q: float,
              rule: QuadratureRule, what: str) -> tuple[Array, ...]:
    """E[f(u1) f(u2)] by the fastest exact route available for ``act``."""
    if act.smoothing is not None:
        return _pair_conditional(act, kinds, c, q, rule, what)
    fs = tuple(act.value if k == "value" else act.derivative for k in kinds)
    return _pair(fs, c, q, act.breakpoints, rule, what)


def _pair(fs: tuple[Any, ...], c: Array, q: float, bps: tuple[float, ...],
          rule: QuadratureRule, what: str, *, deficits: bool = False) -> tuple[Array, ...]:
    """E[f(u1) f(u2)] for each f, equal variances, on shared nodes, by the 2-D rule.

    For |c| >= 1/2 the exact difference form of an exchangeable pair is used:
    ``E[f(u1) f(u2)] = E[f^2] - E[(f(u1) - f(u2))^2] / 2``; for c <= -1/2 the
    same with ``u2 -> -u2`` and ``g(x) = f(-x)``. With ``deficits`` the values
    returned are ``E[f^2] - E[f(u1) f(u2)]`` instead (for c >= 1/2 the half mean
    squared difference itself, so they keep their digits near c = 1).
    """
    n = len(fs)
    out = [np.empty_like(c) for _ in fs]
    mid = np.abs(c) < 0.5
    if np.any(mid):
        res = bivariate_expectation(lambda a, b: tuple(f(a) * f(b) for f in fs), c[mid], q, q,
                                    bps, bps, rule=rule, what=what, n_integrands=n)
        for o, r in zip(out, res if n > 1 else (res,)):
            o[mid] = r
    hi = c >= 0.5
    if np.any(hi):
        res = bivariate_expectation(lambda a, b: tuple((f(a) - f(b)) ** 2 for f in fs), c[hi],
                                    q, q, bps, bps, rule=rule, what=what, n_integrands=n)
        for o, f, r in zip(out, fs, res if n > 1 else (res,)):
            ff = float(gaussian_expectation(lambda x: f(x) ** 2, q, bps, rule=rule, what=what))
            o[hi] = 0.5 * r if deficits else ff - 0.5 * r
    lo = c <= -0.5
    if np.any(lo):
        both = tuple(bps) + tuple(-b for b in bps)

        def diff(a: Array, b: Array) -> tuple[Array, ...]:
            return tuple((f(a) - f(b)) * (f(-a) - f(-b)) for f in fs)

        res = bivariate_expectation(diff, -c[lo], q, q, both, both, rule=rule, what=what,
                                    n_integrands=n)
        for o, f, r in zip(out, fs, res if n > 1 else (res,)):
            fg = float(gaussian_expectation(lambda x: f(x) * f(-x), q, both, rule=rule,
                                            what=what))
            o[lo] = fg - 0.5 * r
    if deficits and not np.all(hi):
        for o, f in zip(out, fs):
            ff = float(gaussian_expectation(lambda x: f(x) ** 2, q, bps, rule=rule, what=what))
            o[~hi] = ff - o[~hi]
    return tuple(out)


def pair_expectation(act: Activation, c: Any, q: float,
                     rule: QuadratureRule = DEFAULT_RULE) -> Array:
    """E[phi(u1) phi(u2)] for pre-activations of variance q and correlation c."""
    rule = _scaled(act, rule)
    ca = _c_array(c)
    qf = float(_q_array(q))
    if qf == 0.0:
        return np.full_like(ca, float(act.value(np.array([0.0]))[0]) ** 2)
    return _pair_any(act, ("value",), ca, qf, rule, f"{act.label}(u1) {act.label}(u2)")[0]


def derivative_pair_expectation(act: Activation, c: Any, q: float,
                                rule: QuadratureRule = DEFAULT_RULE) -> Array:
    """E[phi'(u1) phi'(u2)], including the Dirac masses of phi' at jumps of phi.

    With ``phi' = r + sum_k J_k delta(x - b_k)``:
    ``E[r r] + 2 sum_k J_k p(b_k) E[r(u2) | u1 = b_k] + sum_kl J_k J_l p(b_k, b_l)``,
    p the Gaussian densities (Price's theorem applied to the distributional
    derivative). Infinite at c = +-1 when phi jumps.
    """
    rule = _scaled(act, rule)
    ca = _c_array(c)
    qf = float(_q_array(q))
    if qf == 0.0:
        d0 = float(act.derivative(np.array([0.0]))[0])
        return np.full_like(ca, d0 * d0)
    out = _pair_any(act, ("derivative",), ca, qf, rule,
                    f"derivative of {act.label} at (u1, u2)")[0]
    return out + _jump_terms(act, ca, qf, rule)


def _jump_terms(act: Activation, ca: Array, qf: float, rule: QuadratureRule,
                gap: Array | None = None) -> Array:
    """The Dirac-mass part of E[phi'(u1) phi'(u2)] for a phi with jumps (else 0).

    ``gap`` is 1 - c when known more precisely than c.
    """
    out = np.zeros_like(ca)
    if not act.has_jumps:
        return out
    jumps = [(b, j) for b, j in zip(act.breakpoints, act.jumps) if j != 0.0]
    # not 1 - c^2: (1 - c)(1 + c) keeps its digits near c = +-1
    s2 = (1.0 - ca) * (1.0 + ca) if gap is None else gap * (2.0 - gap)
    one_minus_c = 1.0 - ca if gap is None else gap
    with np.errstate(divide="ignore", invalid="ignore"):
        for b, j in jumps:
            p_b = math.exp(-b * b / (2 * qf)) / math.sqrt(2 * math.pi * qf)
            cond = gaussian_expectation(act.derivative, qf * s2, act.breakpoints, mean=ca * b,
                                        rule=rule, check_tails=False)
            out = out + 2.0 * j * p_b * cond
            for b2, j2 in jumps:
                # b^2 - 2 c b b2 + b2^2 = (b - b2)^2 + 2 b b2 (1 - c): no cancellation near c = 1
                quad_form = ((b - b2) ** 2 + 2 * b * b2 * one_minus_c) / (2 * qf * s2)
                dens = np.exp(-quad_form) / (2 * math.pi * qf * np.sqrt(s2))
                out = out + j * j2 * np.where(s2 > 0, dens, math.inf)
    return out


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
        return (sw * _by_parity(act, ca, lambda cc: _pair_by_series(act, cc, qf, rule)) + sb) / vq
    return (sw * _by_parity(act, ca, lambda cc: pair_expectation(act, cc, qf, rule)) + sb) / vq


def _by_parity(act: Activation, ca: Array, pair: Any) -> Array:
    """``pair(ca)``, computed at the distinct |c| only when phi is exactly odd or even.

    For an odd phi, E[phi(u1) phi(u2)] is odd in c (u2 -> -u2), for an even phi even;
    a map over c in [-1, 1] then costs half.
    """
    if ca.ndim == 0 or ca.size < 16 or not np.any(ca < 0) or act.exact_parity is None:
        return pair(ca)
    mags, back = np.unique(np.abs(ca), return_inverse=True)
    out = np.asarray(pair(mags))[back.reshape(ca.shape)]
    return np.where(ca < 0, -out, out) if act.exact_parity == "odd" else out


#: A vectorised map tries the 640-term Hermite pass when the 160-term one leaves more than
#: this many points to the 2-D rule (each costs about as much as a tenth of that pass).
SERIES_SPARE_POINTS = 8


def _pair_by_series(act: Activation, ca: Array, q: float, rule: QuadratureRule) -> Array:
    """E[phi(u1) phi(u2)] from the Hermite series where its tail bound is below 1e-14 E[phi^2].

    The 160-term pass first, the 640-term pass if the first leaves more than
    SERIES_SPARE_POINTS points to the 2-D rule (or any, in a call of at most that
    many points). The coefficients are cached per (act, q), so a map evaluated
    point by point at one q pays for them once. Mehler's formula ``sum_k a_k^2 c^k``
    (see propcalc.hermite): every term is >= 0 and they sum to E[phi^2], so after K
    terms the error at c is at most
    ``|c|^(K+1) (E[phi^2] - sum_(k<=K) a_k^2)``. Points where that bound is not
    small enough (|c| near 1) are done by the 2-D rule.
    """
    if ca.ndim == 0:
        x = float(ca)
        if x == 1.0:
            return second_moment(act, q, rule)  # as V(q): C(1) = 1 exactly
        for one in _series_passes(act, q):
            if one is None:
                break
            kmax, b, m2, defect = one
            if abs(x) ** (kmax + 1) * defect <= 1e-14 * m2:
                return np.float64(series_sum(b, ca)[0])
        return pair_expectation(act, ca, q, rule)
    for one in _series_passes(act, q):
        if one is None:
            return pair_expectation(act, ca, q, rule)
        kmax, b, m2, defect = one
        with np.errstate(under="ignore"):
            bound = np.abs(ca) ** (kmax + 1) * defect
        good = bound <= 1e-14 * m2
        # the longer pass (0.1-0.5 ms) pays when it spares more than a few points of a
        # vectorised 2-D call, and always for a call of a few points (the 2-D rule's
        # fixed cost per call is 0.2-2 ms)
        n_bad = int(np.count_nonzero(~good))
        if n_bad == 0 or n_bad <= SERIES_SPARE_POINTS < ca.size:
            break
    out = np.empty_like(ca)
    out[good] = series_sum(b, ca[good])
    if np.any(~good):
        out[~good] = pair_expectation(act, ca[~good], q, rule)
    return out


def _series_passes(act: Activation, q: float) -> Iterator[tuple[int, Array, float, float] | None]:
    """(terms, coefficients, E[phi^2], tail mass) of each Hermite pass at q, in order; None (and
    no further pass) when a pass's coefficients fail Parseval's check sum_k b_k <= E[phi^2]."""
    for kmax, series_rule in SERIES_PASSES:
        b, m2 = coefficients_at(act.value, act.breakpoints, q, kmax, series_rule)
        rest = m2 - float(b.sum())
        if not (math.isfinite(rest) and rest >= -1e-12 * m2 and m2 > 0):
            yield None
            return
        yield kmax, b, m2, max(rest, 0.0) + 1e-13 * m2  # plus the rounding of the coefficients


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
    return (sw * e_val + sb) / vq, sw * qf * e_der / vq


def correlation_map_slope(act: Activation | str, c: Any, sigma_w2: float, sigma_b2: float,
                          q: float, rule: QuadratureRule = DEFAULT_RULE) -> Array:
    """C'(c) = sigma_w2 q E[phi'(u1) phi'(u2)] / V(q) (Price's theorem).

    At c = 1 and q = q* this equals chi_1; infinite there for a jumping phi.
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


def _gap_array(gap: Any) -> Array:
    arr = np.asarray(gap, dtype=float)
    ok = np.isfinite(arr) & (arr >= 0.0) & (arr <= 2.0)
    if not np.all(ok):
        raise InvalidParameterError("gap", "in [0, 2] (gap = 1 - c)", float(arr[~ok].ravel()[0]))
    return arr


def _deficits(act: Activation, gap: Array, q: float, rule: QuadratureRule,
              what: str) -> tuple[Array, Array]:
    """``E[phi^2] - E[phi(u1) phi(u2)]`` and ``E[phi'(u1) phi'(u2)]`` at c = 1 - gap.

    With a closed-form smoothing the gap is used exactly: for gap < CONDITIONAL_GAP the
    deficit is ``q int_c^1 E[phi' phi'](t) dt`` (Price 1958), relative to itself to
    rounding; otherwise ``E[phi^2]`` minus the 1-D conditional route. Without one, the
    2-D rule at c = 1 - gap (rounded to a double) in the difference form of :func:`_pair`.
    """
    c = 1.0 - gap
    square = float(gaussian_expectation(lambda x: act.value(x) ** 2, q, act.breakpoints,
                                        rule=rule, what=what))
    sm = act.smoothing
    if sm is None:
        deficit, der = _pair((act.value, act.derivative), c, q, act.breakpoints, rule, what,
                             deficits=True)
        d_square = float(gaussian_expectation(lambda x: act.derivative(x) ** 2, q,
                                              act.breakpoints, rule=rule, what=what))
        der = d_square - der
    else:
        deficit = np.empty_like(gap)
        der = np.empty_like(gap)
        near = gap < CONDITIONAL_GAP
        bps = act.breakpoints
        if np.any(near):
            deficit[near] = q * _slope_integral(act, np.sqrt(gap[near]), q, rule, what)
            der[near] = conditional_pair_expectation(
                [(act.derivative, sm.derivative)], c[near], q, q, bps, bps, rule=rule,
                what=what, gap=gap[near])[0]
        if np.any(~near):  # value and slope on shared nodes
            val, d = conditional_pair_expectation(
                [(act.value, sm.value), (act.derivative, sm.derivative)], c[~near], q, q, bps,
                bps, rule=rule, what=what, gap=gap[~near])
            deficit[~near], der[~near] = square - val, d
    return deficit, der + _jump_terms(act, c, q, rule, gap)


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
