"""Pair expectations E[f(u1) f(u2)] of a correlated Gaussian pair, f = phi or phi'.

For pre-activations ``u1 = sqrt(q) z1``, ``u2 = sqrt(q) (c z1 + sqrt(1 - c^2) z2)``
(Poole et al. 2016, eq. 5), two routes compute the pair expectation:

* with a closed-form smoothing ``S_f(m, v) = E[f(m + sqrt(v) z)]`` on the
  activation (:mod:`propcalc.numerics.smoothing`), the 1-D integral
  ``E[f(u1) S_f(c u1, q (1 - c^2))]`` (u2 given u1 is normal); for
  ``1 - c < CONDITIONAL_GAP`` the value is ``E[f^2] - q int_c^1 E[f'(u1) f'(u2)](t) dt``
  (Price's theorem, Price 1958), so 1 - C keeps its digits near c = 1;
* otherwise the 2-D rule, for ``|c| >= 1/2`` in the difference form
  ``E[f(u1) f(u2)] = E[f^2] - E[(f(u1) - f(u2))^2] / 2`` (exchangeable pair), so
  its error is scaled by the small difference near ``c = +-1``; vectorised maps
  of smooth activations use the Hermite (Mehler) series where its tail bound allows.

A jump J of phi at b puts ``J delta(x - b)`` into phi': :func:`derivative_pair_expectation`
adds the conditional and bivariate densities at the jumps. The maps themselves are in
:mod:`propcalc.meanfield.maps`.
"""

from __future__ import annotations

import math
from collections.abc import Iterator
from typing import Any

import numpy as np

from ..activations.base import Activation
from ..errors import InvalidParameterError
from ..numerics.hermite import SERIES_PASSES, coefficients_at, series_sum
from ..numerics.quadrature import (DEFAULT_RULE, QuadratureRule, bivariate_expectation,
                                   conditional_pair_expectation, gaussian_expectation,
                                   legendre_rule)
from .moments import _c_array, _q_array, _scaled, second_moment

__all__ = ["CONDITIONAL_GAP", "SLOPE_NODES", "SERIES_SPARE_POINTS", "pair_expectation",
           "derivative_pair_expectation"]

Array = np.ndarray


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
                # at c = 1 the pair sits on the diagonal u1 = u2: the two masses meet (an
                # infinite density) only when b = b2; apart, their joint density is 0
                at_one = math.inf if b == b2 else 0.0
                out = out + j * j2 * np.where(s2 > 0, dens, at_one)
    return out


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
