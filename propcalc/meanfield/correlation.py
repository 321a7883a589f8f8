"""The correlation fixed point c* = C(c*) in [0, 1) and chi_c = C'(c*), elementwise over points.

In the chaotic phase (chi_1 > 1) and with dropout, the correlation map
``C(c) = (sigma_w2 E[phi(u1) phi(u2)] + sigma_b2) / D`` (Poole et al. 2016,
eq. 5; D = V(q*), or the diagonal variance with dropout) has one fixed point
c* in [0, 1): C is convex on [0, 1] (its Hermite expansion has non-negative
coefficients: Daniely, Frostig & Singer 2016, section 6), ``C(0) >= 0`` and
either ``C(1) = 1`` with ``C'(1) > 1`` or ``C(1) < 1``. Everything here solves
for it ONE way, whatever evaluates the map:

* in the gap ``e = 1 - c``: ``h(e) = (1 - C(1 - e)) - e`` is concave with one
  root e* = 1 - c*, and ``1 - C`` comes from the accurate gap form of
  :func:`propcalc.meanfield.maps.correlation_gap_map`, so near the edge of chaos
  (e* ~ 1e-6 for smooth phi, ~1e-12 for kinked phi) e* keeps its relative
  digits and xi_c its value;
* a bracket ``[left, right]`` with h(left) >= 0 > h(right) is kept; steps are
  the root of the cubic Hermite interpolant of h on the bracket (when both
  slopes are known), else Newton's step from the right end, which for a concave
  h never crosses the root, else bisection;
* the iteration stops at the rounding floor of h (``|h| <= 4e-15 min(1, e)``) or
  when the Newton step is below 1e-15 e, or, from a guess with a certified
  curvature bound M, when the Taylor remainder ``M delta^2 / (2 |h'|)`` of the
  Newton step is negligible; and always takes that final Newton step, with
  ``C'`` moved along by the curvature (a secant of the last slopes, or the
  series' C'').

Three evaluators feed the same loop: the Hermite (Mehler) series (all points at
once, 1-D integrals only; accepted where its rigorous tail bound allows, see
:mod:`propcalc.numerics.hermite`), the exact map with a cheap rule (a guess for
activations the series does not serve), and the exact map with the caller's rule
(the polish), each started from the previous one's answer.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from ..activations import Activation, resolve
from .. import domains
from ..errors import ComputationError, check_nonnegative, check_positive
from ..numerics.hermite import (SERIES_PASSES, hermite_coefficients, series_curvature,
                                series_table, series_value_and_slope, tail_mass)
from ..numerics.quadrature import DEFAULT_RULE, QuadratureRule, gaussian_expectation
from ..vocabulary import EDGE_TOLERANCE
from .maps import correlation_gap_map, derivative_second_moment, first_moment, second_moment

__all__ = ["CorrelationSolution", "solve_correlation", "correlation_fixed_point",
           "series_fixed_points", "GUESS_RULE", "ZERO_FLOOR"]

Array = np.ndarray
Evaluator = Callable[[Array, Array], tuple[Array, Array]]

#: A cheaper rule, used only to guess c* before the polish with the caller's rule.
GUESS_RULE = QuadratureRule(n_per_panel=8, panel_width=2.0, z_max=9.0)
#: C(0) at or below this: c* = 0 (C convex with C(0) = 0 and C(c) < c above).
ZERO_FLOOR = 1e-15
#: Rounding floor of h(e) = 1 - C(1 - e) - e, relative to min(1, e).
H_FLOOR = 4e-15
_MAX_STEPS = 60


@dataclass(frozen=True, eq=False)
class CorrelationSolution:
    """c*, chi_c = C'(c*) and the gap e* = 1 - c* (with the digits c* cannot hold), per point.

    ``chi_c_error`` estimates the rounding error of chi_c (the floor of double
    precision and of the solve), for callers that must say how many digits of
    ``xi_c = -1 / ln chi_c`` are meaningful.
    """

    c_star: Array
    chi_c: Array
    gap: Array
    chi_c_error: Array


@dataclass
class _State:
    """Bracket ends (e, h, h') of the active problems and the point to evaluate next."""

    left: tuple[Array, Array, Array]
    right: tuple[Array, Array, Array]
    e: Array
    prev: tuple[Array, Array]  # the last evaluated (e, C'), for the secant curvature
    kappa: Array  # dC'/de where known (minus C''), else NaN
    bound: Array  # a bound of |C''| near the guess for the one-evaluation stop, else NaN


def _cubic_root(el: float, hl: float, sl: float, er: float, hr: float, sr: float) -> float | None:
    """The largest root in (el, er) of the cubic Hermite interpolant of h on the bracket."""
    w = er - el
    if not (w > 0 and all(math.isfinite(v) for v in (hl, sl, hr, sr))):
        return None
    m0, m1 = w * sl, w * sr
    # p(t) = h00 hl + h10 m0 + h01 hr + h11 m1 on t in [0, 1]
    coeffs = np.array([2 * hl + m0 - 2 * hr + m1, -3 * hl - 2 * m0 + 3 * hr - m1, m0, hl])
    rts = np.roots(coeffs) if abs(coeffs[0]) > 1e-300 else np.roots(coeffs[1:])
    real = sorted(float(r.real) for r in rts if abs(r.imag) < 1e-9 and 1e-12 < r.real < 1 - 1e-12)
    return el + w * real[-1] if real else None


def _iterate(evaluate: Evaluator, st: _State, cubic: bool, snap: bool
             ) -> tuple[Array, Array, Array, Array]:
    """The one loop: (e*, C'(c*), converged, chi_c error) for every problem of ``st``.

    The state is kept compact (only the problems still active), so a sweep of many
    points pays numpy's per-call cost once per step, not once per point.
    """
    n = st.e.size
    e_out = np.full(n, np.nan)
    s_out = np.full(n, np.nan)
    err = np.full(n, np.nan)
    done = np.zeros(n, dtype=bool)
    idx = np.arange(n)
    el, hl, sl = (np.array(a, dtype=float) for a in st.left)
    er, hr, sr = (np.array(a, dtype=float) for a in st.right)
    e = np.array(st.e, dtype=float)
    pe, ps = (np.array(a, dtype=float) for a in st.prev)
    kappa = np.array(st.kappa, dtype=float)
    bound = np.array(st.bound, dtype=float)
    first = bool(np.any(np.isfinite(bound)))
    last = np.full(n, np.inf)  # the previous Newton step's size
    for _ in range(_MAX_STEPS):
        if snap:  # the 2-D rule evaluates at c = 1 - e in doubles: use gaps it can represent
            e = 1.0 - (1.0 - e)
        h, cs = evaluate(e, idx)
        s = cs - 1.0
        if not np.isfinite(h + s).all():
            bad = int(np.flatnonzero(~np.isfinite(h + s))[0])
            raise ComputationError(f"the correlation map is not finite at c = {1 - e[bad]:.17g}")
        # Newton's step, only where h falls (right of the maximum of the concave h)
        falling = s < 0.0
        newton = np.divide(-h, s, out=np.full(h.shape, np.inf), where=falling)
        delta = np.where(falling, newton, 0.0)
        low = np.minimum(1.0, e)
        step = np.abs(newton)
        stop = (np.abs(h) <= H_FLOOR * low) | (step <= 1e-15 * e)
        # at the noise floor of h the steps stop shrinking: converged as far as h allows
        stop |= (step <= 1e-10 * e) & (step >= 0.5 * last)
        last = step
        if first:
            # from a guess with a bound M of |C''| near it, one evaluation can suffice: the
            # Newton step lands within M delta^2 / (2 |h'|) of the root (Taylor, Lagrange form)
            stop |= (np.abs(newton) <= 1e-9) & (bound * delta * delta
                                                 <= 2e-17 * np.abs(s) * np.minimum(1.0, 100 * e))
            first = False
        left = h >= 0.0
        if not left.any():
            er, hr, sr = e, h, s
        elif left.all():
            el, hl, sl = e, h, s
        else:
            el, hl, sl = np.where(left, e, el), np.where(left, h, hl), np.where(left, s, sl)
            er, hr, sr = np.where(left, er, e), np.where(left, hr, h), np.where(left, sr, s)
        stop |= (er - el) <= 1e-15 * er
        if stop.any():
            i = idx[stop]
            # dC'/de by a secant of the last two slopes where there are two points, else as given
            with np.errstate(invalid="ignore", divide="ignore"):
                sec = (cs[stop] - ps[stop]) / (pe[stop] - e[stop])
            k = np.where(np.isfinite(sec), sec, np.where(np.isfinite(kappa[stop]), kappa[stop], 0.0))
            e_out[i] = e[stop] + delta[stop]
            s_out[i] = cs[stop] + k * delta[stop]
            # rounding floor of C' (a few ulps) and what the noise of h moves e* by
            err[i] = 4e-16 + np.abs(k) * H_FLOOR * low[stop] / np.maximum(np.abs(s[stop]), 1e-300)
            done[i] = True
            keep = ~stop
            if not keep.any():
                break
            idx, e, el, hl, sl, er, hr, sr, kappa, bound, h, cs, last = (
                a[keep] for a in (idx, e, el, hl, sl, er, hr, sr, kappa, bound, h, cs, last))
        pe, ps = e, cs
        # next point: Newton from the right end (stays right of the root of a concave h)...
        with np.errstate(invalid="ignore", divide="ignore"):
            cand = er - hr / sr
            inside = (sr < 0.0) & (cand > el) & (cand < er)
            if not inside.all():
                # ... or from the left end, where h already falls (it lands right of the root),
                # or the middle of the bracket
                from_left = el - hl / sl
                ok_left = (sl < 0.0) & (from_left > el) & (from_left < er)
                # (geometric over a wide bracket: c* may sit within 1e-100 of 1)
                floor = np.maximum(el, 1e-300)
                middle = np.where(er > 4.0 * floor, np.sqrt(floor) * np.sqrt(er), 0.5 * (el + er))
                cand = np.where(inside, cand, np.where(ok_left, from_left, middle))
        if cubic:  # the root of the cubic Hermite interpolant on the bracket, where it lies
            # inside and the bracket is not many scales wide (there the cubic means nothing)
            for j in np.flatnonzero((el == 0.0) | (er <= 16.0 * el)):
                c3 = _cubic_root(el[j], hl[j], sl[j], er[j], hr[j], sr[j])
                if c3 is not None and el[j] < c3 < er[j]:
                    cand[j] = c3
        e = cand
    return e_out, s_out, done, err


def _series_stage(act: Activation, sw: Array, sb: Array, q: Array, den: Array | None,
                  kmax: int, rule: QuadratureRule) -> tuple[Array, ...]:
    """The loop on the Hermite series of ``C``: (c, C', ok, C'', bound of C'') per point."""
    b, m2 = hermite_coefficients(act.value, act.breakpoints, q, kmax, rule, act.label)
    v = sw * m2 + sb if den is None else den
    scale = sw / v
    n = q.size
    p0, slope0 = series_value_and_slope(b, np.zeros(n))
    zero = (sw * p0 + sb) / v <= ZERO_FLOOR
    kb = b[:, 1:] * np.arange(1.0, kmax + 1)  # k b_k, for the slopes of every step

    def evaluate(e: Array, rows: Array) -> tuple[Array, Array]:
        # (rows ascending: all of them is every row in order, no copy needed)
        every = rows.size == n
        p, dp = series_value_and_slope(b if every else b[rows], 1.0 - e,
                                       kb if every else kb[rows])
        # 1 - C(1 - e): sigma_w2 (E[phi^2] - P(c)) / V, or (D - V + sigma_w2 (...)) / D
        one_minus = (v[rows] - (sw[rows] * p + sb[rows])) / v[rows]
        return one_minus - e, scale[rows] * dp

    # bracket c* on a grid of c in [0, 1): C(c) > c left of c*, C(c) < c between c* and 1;
    # the grid continues geometrically towards 1 (1 - 2^-k) for c* close to 1
    grid = np.concatenate([np.arange(64) / 64.0, 1.0 - 2.0 ** -np.arange(7, 17)])
    g_grid = (sw[:, None] * series_table(b, grid) + sb[:, None]) / v[:, None] - grid
    below = g_grid < 0
    found = below.any(axis=1) & ~zero
    k = np.argmax(below, axis=1)
    c_left = grid[np.maximum(k - 1, 0)]
    rows = np.flatnonzero(found)
    c = np.zeros(n)
    slope = np.full(n, np.nan)
    conv = np.zeros(n, dtype=bool)
    if rows.size:
        e0 = 1.0 - c_left[rows]  # the right end in e (C(c) > c there): Newton from it
        nan = np.full(rows.size, np.nan)
        # the left end: the first grid c with C(c) < c (h >= 0 is all the bracket needs)
        st = _State(left=(1.0 - grid[k[rows]], np.zeros(rows.size), nan), right=(e0, nan, nan),
                    e=e0, prev=(nan, nan.copy()), kappa=nan.copy(), bound=nan.copy())
        e_star, s_star, ok, _ = _iterate(lambda ee, idx: evaluate(ee, rows[idx]), st, cubic=False,
                                         snap=False)
        c[rows] = 1.0 - e_star
        slope[rows] = s_star
        conv[rows] = ok & np.isfinite(e_star) & np.isfinite(s_star)
    c = np.where(zero, 0.0, c)
    slope = np.where(zero, scale * slope0, slope)
    defect = tail_mass(b, m2)
    with np.errstate(over="ignore", invalid="ignore", under="ignore"):
        tail_c = scale * c ** (kmax + 1) * defect
        tail_slope = scale * (kmax + 1) * c ** kmax * defect
    ok = (conv & (c <= 0.99) & (tail_c <= 1e-12 * np.abs(1.0 - slope))
          & (tail_slope <= 1e-11 * np.abs(slope)) & (m2 - b.sum(axis=1) >= -1e-12 * m2))
    ok |= zero & np.isfinite(slope)
    curv, bound = series_curvature(b, m2, c)
    return c, slope, ok, scale * curv, scale * bound


def series_fixed_points(act: Activation, sw: Array, sb: Array, q: Array, kmax: int = 160,
                        rule: QuadratureRule = SERIES_PASSES[0][1], *, curvature: bool = False,
                        denominator: Array | None = None) -> tuple[Array, ...]:
    """Chaotic (c*, C'(c*)) from the Hermite (Mehler) series of the correlation map.

    With a_k the Hermite coefficients of phi(sqrt(q*) z),
    ``E[phi(u1) phi(u2)] = sum_k a_k^2 c^k`` (Mehler's formula; the dual
    activation of Daniely, Frostig & Singer 2016, section 6), so C and C' are
    polynomials once the b_k = a_k^2 are known (1-D integrals), solved by the
    loop of this module.

    Truncation after K = kmax terms is bounded rigorously because every b_k >= 0
    and, by Parseval, ``sum_k b_k = E[phi^2]``: the neglected part of C is at most
    ``sigma_w2 c^(K+1) D / V`` and that of C' at most ``sigma_w2 (K+1) c^K D / V``,
    with D = E[phi^2] - sum_(k<=K) b_k. A point is accepted (``ok``) when the first
    bound is below 1e-12 (1 - C'(c*)), the second below 1e-11 C'(c*) and c* <= 0.99.

    Returns
    -------
    c_star, chi_c, ok : ndarray
        and, with ``curvature=True``, the series' C''(c*) and an upper bound of the
        true C'' on ``[0, c* + 1e-6]`` (see :func:`propcalc.numerics.hermite.series_curvature`).
    """
    out = _series_stage(act, np.asarray(sw, float), np.asarray(sb, float),
                        np.asarray(q, float), denominator, kmax, rule)
    return out if curvature else out[:3]


def _exact_evaluator(act: Activation, sw: Array, sb: Array, q: Array, v: Array,
                     den: Array | None, rule: QuadratureRule) -> Evaluator:
    """h(e) and C'(1 - e) by the exact map (1-D conditional or 2-D rule), point by point."""
    def evaluate(e: Array, rows: Array) -> tuple[Array, Array]:
        h = np.empty(e.size)
        s = np.empty(e.size)
        for j, i in enumerate(rows):
            om, sl = correlation_gap_map(act, float(e[j]), float(sw[i]), float(sb[i]),
                                         float(q[i]), rule, v_q=float(v[i]),
                                         denominator=None if den is None else float(den[i]))
            h[j], s[j] = float(om) - e[j], float(sl)
        return h, s
    return evaluate


def _exact_stage(act: Activation, sw: Array, sb: Array, q: Array, v: Array, den: Array | None,
                 ends: tuple[Array, Array, Array] | None, c1: Array, rule: QuadratureRule,
                 guess: Array, kappa: Array, bound: Array) -> tuple[Array, Array, Array]:
    """The loop on the exact map from a guess, or cold from the bracket [0, 1] (``ends``:
    C(0), C'(0) for the cold start's cubic; NaN where a guess is given)."""
    n = sw.size
    evaluate = _exact_evaluator(act, sw, sb, q, v, den, rule)
    # the ends: e = 0 (c = 1), h = 1 - C(1), h' = C'(1) - 1; e = 1 (c = 0), h = -C(0)
    h_zero = np.zeros(n) if den is None else (den - v) / den
    c0, s0 = (ends[0], ends[1]) if ends is not None else (np.full(n, np.nan),) * 2
    left = (np.zeros(n), h_zero, c1 - 1.0)
    right = (np.ones(n), -c0, s0 - 1.0)
    warm = np.isfinite(guess) & (guess > 0.0) & (guess < 1.0)
    e_start = np.where(warm, 1.0 - np.where(warm, guess, 0.5), 0.5)
    for i in np.flatnonzero(~warm):  # the first cold step: the cubic on [0, 1]
        cand = _cubic_root(0.0, float(h_zero[i]), float(c1[i] - 1.0), 1.0, float(-c0[i]),
                           float(s0[i] - 1.0))
        e_start[i] = cand if cand is not None else 0.5
    nan = np.full(n, np.nan)
    st = _State(left=left, right=right, e=e_start, prev=(nan, nan.copy()),
                kappa=np.where(np.isfinite(kappa), -kappa, np.nan), bound=bound)
    e_star, s_star, ok, err = _iterate(evaluate, st, cubic=True, snap=act.smoothing is None)
    if not np.all(ok):
        i = int(np.flatnonzero(~ok)[0])
        where = f"at sigma_w2 = {sw[i]:.17g}, sigma_b2 = {sb[i]:.17g}"
        tiny = float(evaluate(np.array([1e-300]), np.array([i]))[0][0]) + 1e-300
        if den is None and tiny <= 0.0:
            # 1 - C(1 - e) rounds to 0 for every representable gap: C = 1 to double precision
            raise ComputationError(
                f"the correlation map of {act.label} equals 1 to double precision {where} "
                f"(q* = {q[i]:.6g}): its chaotic fixed point c* lies closer to 1 than a double "
                "can resolve, so c*, chi_c and xi_c cannot be given; the activation barely "
                "varies over the pre-activations' range there (raise sigma_b2 or sigma_w2)")
        raise ComputationError(f"the correlation fixed point of {act.label} did not converge "
                               f"{where}")
    return e_star, s_star, err


def _moments(fn, act: Activation, q: Array, rule: QuadratureRule) -> Array:  # type: ignore[no-untyped-def]
    """A 1-D moment at each q: one array call, or scalar calls for a few q (faster)."""
    if q.size > 4:
        return np.asarray(fn(act, q, rule), dtype=float)
    return np.array([float(fn(act, float(x), rule)) for x in q])


def _stein_mean(act: Activation, q: Array, rule: QuadratureRule) -> Array:
    """E[z phi(sqrt(q) z)] = sqrt(q) E[phi'(sqrt(q) z)] (Stein's identity; jumps included)."""
    return np.asarray(gaussian_expectation(lambda x, z: z * act.value(x), q, act.breakpoints,
                                           rule=rule, what=f"{act.label}(x)", with_z=True))


def _ends(act: Activation, sw: Array, sb: Array, q: Array, d: Array,
          rule: QuadratureRule) -> tuple[Array, Array]:
    """C(0) and C'(0): ``(sigma_w2 E[phi]^2 + sigma_b2) / D`` and ``sigma_w2 E[z phi]^2 / D``.

    At c = 0 the pair is independent, so E[phi(u1) phi(u2)] = E[phi]^2 and, with
    Stein's identity E[phi'(u)] = E[z phi(sqrt(q) z)] / sqrt(q) (a jumping phi included),
    C'(0) = sigma_w2 q E[phi']^2 / D (Poole et al. 2016, eq. 5; Price 1958).
    """
    mean = _moments(first_moment, act, q, rule)
    stein = _stein_mean(act, q, rule)
    return (sw * mean * mean + sb) / d, sw * stein * stein / d


def solve_correlation(act: Activation, sigma_w2: Array, sigma_b2: Array, q: Array,
                      rule: QuadratureRule = DEFAULT_RULE, *, slope_at_one: Array | None = None,
                      denominator: Array | None = None, guess: Array | None = None,
                      curvature: tuple[Array, Array] | None = None) -> CorrelationSolution:
    """c* in [0, 1) and chi_c for every point (chaotic points, or any point with dropout).

    Parameters
    ----------
    act : Activation
    sigma_w2, sigma_b2, q : ndarray
        1-D, one per point; q > 0 the variance the pair sits at (q*).
    rule : QuadratureRule
    slope_at_one : ndarray, optional
        C'(1) per point, ``sigma_w2 q E[phi'^2] / D`` (chi_1 q* / V(q*) without dropout;
        infinite for a jumping phi); computed when absent.
    denominator : ndarray, optional
        D of ``C(c) = (sigma_w2 E[phi phi] + sigma_b2) / D``; default V(q) (then C(1) = 1).
    guess, curvature : optional
        A guess of c* per point (NaN for none) and (C''(guess), a bound of C'' near it):
        the series and guess stages are then skipped.

    Returns
    -------
    CorrelationSolution
        Points whose C(1) = 1 and C'(1) <= 1 get c* = 1 (the attracting fixed point of
        the ordered phase); points with C(0) <= ZERO_FLOOR get c* = 0.
    """
    sw = np.atleast_1d(np.asarray(sigma_w2, dtype=float))
    sb = np.atleast_1d(np.asarray(sigma_b2, dtype=float))
    q = np.atleast_1d(np.asarray(q, dtype=float))
    n = sw.size
    den = None if denominator is None else np.atleast_1d(np.asarray(denominator, dtype=float))
    v = sw * _moments(second_moment, act, q, rule) + sb
    d = v if den is None else den
    if slope_at_one is None:
        # C'(1) = sigma_w2 q E[phi'^2] / D (Price 1958), infinite for a jumping phi
        c1 = sw * q * _moments(derivative_second_moment, act, q, rule) / d
    else:
        c1 = np.atleast_1d(np.asarray(slope_at_one, dtype=float))
    c_star = np.ones(n)
    chi_c = c1.copy()
    gap = np.zeros(n)
    error = np.full(n, 4e-16)
    # C(1) = 1 with C'(1) <= 1 (ordered) or within EDGE_TOLERANCE of 1 (the edge of chaos,
    # as the phase is decided): c = 1 is the attracting fixed point
    if den is None:
        chi_c = np.where(np.abs(c1 - 1.0) <= EDGE_TOLERANCE, 1.0, chi_c)
        todo = np.flatnonzero(c1 > 1.0 + EDGE_TOLERANCE)
    else:
        todo = np.arange(n)
    g = np.full(n, np.nan) if guess is None else np.atleast_1d(np.asarray(guess, float)).copy()
    kappa = np.full(n, np.nan)
    bound = np.full(n, np.nan)
    ends: tuple[Array, Array] | None = None
    series = (guess is None and rule == DEFAULT_RULE and act.scale == 1.0 and act.reach == 0.0
              and not act.has_jumps)
    if curvature is not None:
        kappa, bound = (np.atleast_1d(np.asarray(a, dtype=float)) for a in curvature)
    if todo.size and series:
        # the Hermite series: accepted where its tail bound allows (not for kinked phi with a
        # closed-form smoothing: their coefficients decay slowly, and the exact 1-D route from
        # the series' guess is 10-100x more accurate), else the guess of the exact polish
        kinked = bool(act.breakpoints) and act.smoothing is not None
        need = todo
        for n_pass, (kmax, series_rule) in enumerate(SERIES_PASSES[:1] if kinked
                                                     else SERIES_PASSES):
            cs, cc, ok, curv, bnd = _series_stage(act, sw[need], sb[need], q[need],
                                                  None if den is None else d[need],
                                                  kmax, series_rule)
            if kinked:
                ok = cs == 0.0  # only c* = 0 (C(0) = 0) is taken from the first pass
            c_star[need[ok]], chi_c[need[ok]], gap[need[ok]] = cs[ok], cc[ok], 1.0 - cs[ok]
            g[need[~ok]], kappa[need[~ok]], bound[need[~ok]] = cs[~ok], curv[~ok], bnd[~ok]
            retry = ~ok & (cs <= 0.97) & (n_pass + 1 < len(SERIES_PASSES)) & (not kinked)
            todo = np.setdiff1d(todo, need[ok])
            need = need[retry]
            if need.size == 0:
                break
    elif todo.size:
        c0, s0 = _ends(act, sw[todo], sb[todo], q[todo], d[todo], rule)
        zero = c0 <= ZERO_FLOOR  # C(0) = 0 (odd phi, no bias): c* = 0, C convex
        z = todo[zero]
        c_star[z], chi_c[z], gap[z] = 0.0, s0[zero], 1.0
        todo, c0, s0 = todo[~zero], c0[~zero], s0[~zero]
        ends = (np.full(n, np.nan), np.full(n, np.nan))
        ends[0][todo], ends[1][todo] = c0, s0
        if todo.size and guess is None:
            # a guess by the same loop on a cheaper rule (c* to about 1e-9, a fifth of the nodes)
            vg = sw[todo] * _moments(second_moment, act, q[todo], GUESS_RULE) + sb[todo]
            e_g, _, _ = _exact_stage(act, sw[todo], sb[todo], q[todo], vg,
                                     None if den is None else d[todo], (c0, s0), c1[todo],
                                     GUESS_RULE, np.full(todo.size, np.nan),
                                     np.full(todo.size, np.nan), np.full(todo.size, np.nan))
            g[todo] = 1.0 - e_g
    if todo.size:
        cold = ~(np.isfinite(g[todo]) & (g[todo] > 0.0) & (g[todo] < 1.0))
        if np.any(cold) and ends is None:
            ends = (np.full(n, np.nan), np.full(n, np.nan))
            ends[0][todo[cold]], ends[1][todo[cold]] = _ends(act, sw[todo[cold]], sb[todo[cold]],
                                                             q[todo[cold]], d[todo[cold]], rule)
        e_star, s_star, err = _exact_stage(
            act, sw[todo], sb[todo], q[todo], v[todo], None if den is None else d[todo],
            None if ends is None else (ends[0][todo], ends[1][todo]), c1[todo], rule, g[todo],
            kappa[todo], bound[todo])
        c_star[todo], chi_c[todo], gap[todo], error[todo] = 1.0 - e_star, s_star, e_star, err
    return CorrelationSolution(c_star, chi_c, gap, error)


def correlation_fixed_point(act: Activation | str, sigma_w2: float, sigma_b2: float, q: float,
                            rule: QuadratureRule = DEFAULT_RULE, guess: float | None = None,
                            curvature: tuple[float, float] | None = None) -> tuple[float, float]:
    """(c*, C'(c*)) at one point, by the exact map (the loop of this module, size 1).

    The chaotic fixed point of ``C(c) = (sigma_w2 E[phi(u1) phi(u2)] + sigma_b2) / V(q)``
    (Poole et al. 2016, eq. 5); ``(1, C'(1))`` where C'(1) <= 1 (c = 1 attracts). With
    a ``guess`` of c* (and ``curvature = (C''(guess), a bound of C'' near it)``) the
    loop starts there; without one it starts cold from the bracket [0, 1] with the
    caller's rule (no series, no cheaper rule).

    Parameters
    ----------
    act : Activation or str
    sigma_w2, sigma_b2 : float
    q : float
        The variance of the pair, > 0 (q* at a fixed point).
    rule : QuadratureRule
    guess : float, optional
    curvature : tuple of float, optional

    Returns
    -------
    tuple of float
    """
    act = resolve(act)
    sw = np.array([domains.check("sigma_w2", check_positive("sigma_w2", sigma_w2))])
    sb = np.array([domains.check("sigma_b2", check_nonnegative("sigma_b2", sigma_b2))])
    qa = np.array([domains.check("q", check_positive("q", q))])
    g = np.array([math.nan if guess is None else float(guess)])
    curv = None if curvature is None else (np.array([float(curvature[0])]),
                                          np.array([float(curvature[1])]))
    sol = solve_correlation(act, sw, sb, qa, rule, guess=g, curvature=curv)
    return float(sol.c_star[0]), float(sol.chi_c[0])
