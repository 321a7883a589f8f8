"""Fixed points, phases, depth scales and the edge-of-chaos line.

Everything here is built on the maps of :mod:`propcalc.maps`:

* fixed points of the variance map, by bracketing (Brent) on ``V(q) - q``
  over a log grid, each with its slope ``chi_q = V'(q*)`` and stability;
  "no finite fixed point" and "collapse to q = 0" are results, not errors;
* the correlation fixed point ``c*``: ``c* = 1`` in the ordered phase
  (chi_1 < 1); in the chaotic phase (chi_1 > 1) the root of ``C(c) - c`` in
  [0, 1), found by Newton's method from c = 0, which converges monotonically
  because C is convex on [0, 1] (its Hermite expansion has non-negative
  coefficients: Daniely, Frostig & Singer 2016, section 6);
* depth scales ``xi_q = -1 / ln chi_q`` and ``xi_c = -1 / ln C'(c*)``
  (Schoenholz et al. 2017, eqs. 6 and 9), and the empirical rule that
  networks train up to about ``6 xi_c`` layers (Schoenholz et al. 2017,
  section 5, an empirical rule);
* the edge-of-chaos line parametrised by q* (Poole et al. 2016;
  Schoenholz et al. 2017): ``sigma_w2 = 1 / E[phi'(sqrt(q*) z)^2]``,
  ``sigma_b2 = q* - sigma_w2 E[phi(sqrt(q*) z)^2]``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy import optimize

from ..activations.base import Activation
from ..errors import (
    ComputationError,
    InvalidParameterError,
    check_int,
    check_nonnegative,
    check_positive,
)
from ..activations import activation
from .maps import (
    chi_1 as chi_1_map,
    correlation_map_and_slope,
    correlation_map_slope,
    derivative_second_moment,
    second_moment,
    variance_collapse_rate,
    variance_growth_rate,
    variance_map,
    variance_map_slope,
)
from ..numerics.hermite import SERIES_PASSES, series_fixed_points
from ..numerics.quadrature import DEFAULT_RULE, QuadratureRule
from ..results import Result

__all__ = [
    "EDGE_TOLERANCE",
    "Q_MIN",
    "Q_MAX",
    "correlation_fixed_point",
    "TRAINABLE_DEPTH_FACTOR",
    "FixedPoint",
    "VarianceFixedPoints",
    "Propagation",
    "CriticalPoint",
    "variance_fixed_points",
    "propagation",
    "edge_of_chaos",
    "edge_of_chaos_at_bias",
    "edge_of_chaos_line",
    "edge_of_chaos_line_arrays",
    "gradient_growth",
    "depth_scale",
]

#: |chi_1 - 1| below this counts as exactly critical.
EDGE_TOLERANCE = 1e-9
#: Schoenholz et al. 2017: networks train up to about 6 xi_c layers (an empirical rule).
TRAINABLE_DEPTH_FACTOR = 6.0
_TRAINABLE_RULE = "about 6 xi_c layers (empirical rule of Schoenholz et al. 2017)"

#: the variance range scanned for fixed points (widened to cover sigma_b2 and the input)
Q_MIN = 1e-10
Q_MAX = 1e8


def _bracketed_roots(fun: Any, grid: np.ndarray, values: np.ndarray,
                     usable: np.ndarray | None = None) -> list[float]:
    """Roots of a scalar function between sign changes of ``values`` on ``grid``.

    The scalar ``fun`` is re-evaluated at the bracket ends (its rounding can
    differ from the vectorised values by an ulp), and Brent's method polishes.
    """
    roots: list[float] = []
    sign = np.sign(values)
    for i in range(len(grid) - 1):
        if usable is not None and not (usable[i] and usable[i + 1]):
            continue
        if sign[i] == 0.0:
            roots.append(float(grid[i]))
            continue
        if sign[i] * sign[i + 1] >= 0:
            continue
        a, b = float(grid[i]), float(grid[i + 1])
        fa, fb = fun(a), fun(b)
        if fa == 0.0:
            roots.append(a)
        elif fb == 0.0:
            continue  # found as the next bracket's left end
        elif fa * fb < 0:
            roots.append(float(optimize.brentq(fun, a, b, xtol=1e-300, rtol=4e-15, maxiter=200)))
        else:
            roots.append(a if abs(fa) < abs(fb) else b)
    roots += _hidden_pairs(fun, grid, values, usable)
    if usable is not None:
        # a root sitting on a grid point is unresolved there: bracket it by its neighbours
        for i in range(1, len(grid) - 1):
            if (not usable[i] and usable[i - 1] and usable[i + 1]
                    and values[i - 1] * values[i + 1] < 0):
                a, b = float(grid[i - 1]), float(grid[i + 1])
                fa, fb = fun(a), fun(b)
                if fa * fb < 0:
                    roots.append(float(optimize.brentq(fun, a, b, xtol=1e-300, rtol=4e-15,
                                                       maxiter=200)))
                else:
                    roots.append(float(grid[i]))
    return sorted(roots)


def _hidden_pairs(fun: Any, grid: np.ndarray, values: np.ndarray,
                  usable: np.ndarray | None) -> list[float]:
    """Pairs of close roots between two grid points, where ``values`` keeps its sign.

    Two roots closer together than the grid step leave no sign change, only a
    local minimum of a positive function (or maximum of a negative one) on the
    grid. At each, the function is minimised (maximised) over the two
    neighbouring grid intervals in log scale; if it crosses zero there, Brent's
    method finds the root on each side of the extremum. A tangential root (the
    extremum within rounding of 0) is returned once.
    """
    roots: list[float] = []
    if len(grid) < 3:
        return roots
    left, mid, right = values[:-2], values[1:-1], values[2:]
    # a dip clear of rounding (flat stretches, e.g. V(q) - q ~ sigma_b2 at tiny q, wobble)
    dip = 1e-12 * (grid[1:-1] + np.abs(mid))
    low = (left > 0) & (mid > 0) & (right > 0) & (mid < left - dip) & (mid < right - dip)
    high = (left < 0) & (mid < 0) & (right < 0) & (mid > left + dip) & (mid > right + dip)
    found = low | high
    if usable is not None:
        found &= usable[:-2] & usable[1:-1] & usable[2:]
    for i in np.flatnonzero(found) + 1:
        side = 1.0 if low[i - 1] else -1.0
        lo, hi = math.log(float(grid[i - 1])), math.log(float(grid[i + 1]))
        # a coarse search first (about half the evaluations): a minimum clearly above zero
        # (by 1% of the grid value; V is smooth on this scale) ends the matter
        coarse = optimize.minimize_scalar(lambda t: side * fun(math.exp(t)), bounds=(lo, hi),
                                          method="bounded", options={"xatol": 1e-3})
        if float(coarse.fun) > 0.01 * side * float(values[i]):
            continue
        res = optimize.minimize_scalar(lambda t: side * fun(math.exp(t)), bounds=(lo, hi),
                                       method="bounded", options={"xatol": 1e-12})
        t_min, f_min = float(res.x), side * float(res.fun)
        q_min = math.exp(t_min)
        if side * f_min > 1e-13 * q_min:
            continue  # the extremum stays clear of zero: no root here
        if abs(f_min) <= 1e-13 * q_min:
            roots.append(q_min)  # tangential: a double root
            continue
        for a, b in ((float(grid[i - 1]), q_min), (q_min, float(grid[i + 1]))):
            if fun(a) * fun(b) < 0:
                roots.append(float(optimize.brentq(fun, a, b, xtol=1e-300, rtol=4e-15,
                                                   maxiter=200)))
    return roots


def depth_scale(slope: float) -> float:
    """xi = -1 / ln(slope) for a contraction (0 <= slope < 1); inf at 1; nan-free.

    Schoenholz et al. 2017, eqs. (6) and (9). A slope > 1 (an expanding
    direction) has no depth scale of convergence: inf is returned with the
    caller to say why.
    """
    s = abs(float(slope))
    if s == 0.0:
        return 0.0
    if s >= 1.0:
        return math.inf
    return -1.0 / math.log(s)


@dataclass(frozen=True)
class FixedPoint(Result):
    """A fixed point q* of the variance map.

    Attributes
    ----------
    q : float
        The variance q* (0 for the collapsed state).
    chi_q : float
        V'(q*), the slope of the map there.
    stable : bool
        True if |chi_q| < 1 (attracting).
    """

    q: float
    chi_q: float
    stable: bool


@dataclass(frozen=True)
class VarianceFixedPoints(Result):
    """All fixed points of V(q) = q on (0, 1e8] (and q = 0 when it is one).

    Attributes
    ----------
    points : tuple of FixedPoint
        Ascending.
    q_start : float
        First-layer pre-activation variance, ``sigma_w2 q_input + sigma_b2``.
    reached : FixedPoint or None
        The fixed point the layer-to-layer flow from ``q_start`` reaches
        (None when the variance grows without bound).
    status : str
        "fixed_point", "collapse" (flows to q = 0), "unbounded" (grows without
        bound) or "neutral" (V(q) = q for every q: the variance is preserved).
    growth_rate : float or None
        For "unbounded": lim V(q)/q, the per-layer growth factor at large q.
        For "collapse": lim V(q)/q at q -> 0, the per-layer shrink factor.
    message : str
    """

    points: tuple[FixedPoint, ...]
    q_start: float
    reached: FixedPoint | None
    status: str
    growth_rate: float | None
    message: str


def _fixed_point(act: Activation, q: float, sw: float, rule: QuadratureRule) -> FixedPoint:
    slope = float(variance_map_slope(act, q, sw, rule))
    if abs(slope) <= 1e-13:  # Stein's form leaves rounding noise where V is flat (step)
        slope = 0.0
    return FixedPoint(q=float(q), chi_q=slope, stable=abs(slope) < 1.0)


def variance_fixed_points(act: Activation, sigma_w2: float, sigma_b2: float, q_input: float = 1.0,
                          rule: QuadratureRule = DEFAULT_RULE) -> VarianceFixedPoints:
    """Find every fixed point of the variance map and the one the network flows to.

    Parameters
    ----------
    act : Activation
    sigma_w2 : float
        > 0.
    sigma_b2 : float
        >= 0.
    q_input : float
        Mean squared input coordinate (1 for standardised inputs); the first
        layer's pre-activations have variance ``sigma_w2 q_input + sigma_b2``.

    Returns
    -------
    VarianceFixedPoints

    Notes
    -----
    Roots of ``V(q) - q`` are bracketed on a log grid over
    ``[1e-10, 1e8]`` (121 points, extended to cover sigma_b2) and polished by Brent's
    method (xtol 1e-14 relative). The flow is read off the sign of
    ``V(q) - q`` at q_start, which is exact when V is non-decreasing (true
    for every built-in; E[phi(sqrt(q) z)^2] increases with q when |phi| grows
    away from 0).
    """
    act = activation(act)
    sw = check_positive("sigma_w2", sigma_w2)
    sb = check_nonnegative("sigma_b2", sigma_b2)
    qi = check_nonnegative("q_input", q_input)
    q_start = sw * qi + sb
    q_hi = max(Q_MAX, 10.0 * (sb + q_start))
    # V(q) >= about V(0) near 0, so a grid starting below V(0)/10 sees V(q) - q > 0 there
    v0 = float(variance_map(act, 0.0, sw, sb, rule))
    q_lo = max(min(Q_MIN, v0 / 10.0) if v0 > 0 else Q_MIN, 1e-300)
    grid = np.geomspace(q_lo, q_hi, 121)
    g = variance_map(act, grid, sw, sb, rule) - grid

    def gap(q: float) -> float:
        return float(variance_map(act, q, sw, sb, rule)) - q

    # neutral: V(q) = q identically (ReLU at sigma_w2 = 2, linear at 1, with sigma_b2 = 0)
    if np.all(np.abs(g) <= 1e-12 * grid):
        fp = FixedPoint(q=q_start, chi_q=1.0, stable=False)
        return VarianceFixedPoints(
            (fp,), q_start, fp, "neutral", 1.0,
            "V(q) = q for every q: the variance is preserved at its input value "
            f"q = {q_start:.6g} (neither attracting nor repelling)")

    points: list[FixedPoint] = []
    zero_is_fixed = sb == 0.0 and float(act.value(np.array([0.0]))[0]) == 0.0
    rate0 = variance_collapse_rate(act, sw) if zero_is_fixed else None
    if zero_is_fixed:
        points.append(FixedPoint(q=0.0, chi_q=float(rate0), stable=float(rate0) < 1.0))
    # V(q) - q within rounding of 0 (hard_tanh near q = 0 touches like q^3) has no sign
    resolved = np.abs(g) > 1e-12 * (grid + sb)
    for root in _bracketed_roots(gap, grid, g, resolved):
        points.append(_fixed_point(act, root, sw, rule))
    # drop a spurious root right next to q = 0 when q = 0 itself is the fixed point
    if zero_is_fixed:
        points = [points[0]] + [p for p in points[1:] if p.q > 10 * q_lo]
    g_start = gap(q_start)
    # a tangential fixed point (chi_q = 1) gives no sign change: catch it at the start value
    if q_start > 0 and abs(g_start) <= 1e-13 * q_start and not any(abs(p.q - q_start) <= 1e-9 * q_start
                                                   for p in points):
        points.append(_fixed_point(act, q_start, sw, rule))
    points.sort(key=lambda p: p.q)
    pts = tuple(points)

    above = [p for p in pts if p.q >= q_start * (1 - 1e-12)]
    below = [p for p in pts if p.q <= q_start * (1 + 1e-12)]
    near = [p for p in pts if abs(p.q - q_start) <= 1e-9 * q_start]
    if near:
        reached = near[0]
    elif g_start > 0:
        reached = above[0] if above else None
    else:
        reached = below[-1] if below else None

    if reached is None and g_start <= 0:
        raise ComputationError(
            f"the pre-activation variance falls below {q_lo:.3g}, the smallest value resolved "
            f"here (sigma_w2 = {sw:.3g}, sigma_b2 = {sb:.3g}); rescale the inputs or sigma_w2")
    if reached is None:
        rate = variance_growth_rate(act, sw, rule=rule)
        how = (f"by a factor of about {rate:.6g} per layer" if rate > 1 + 1e-9
               else f"without a finite limit (linearly, by about {sb:.6g} per layer)")
        return VarianceFixedPoints(
            pts, q_start, None, "unbounded", rate,
            f"no finite fixed point above the input variance {q_start:.6g}: "
            f"the pre-activation variance grows {how}")
    if reached.q == 0.0:
        rate0 = variance_collapse_rate(act, sw) if rate0 is None else rate0
        return VarianceFixedPoints(
            pts, q_start, reached, "collapse", float(rate0),
            f"the pre-activation variance collapses to 0 (V(q)/q -> {rate0:.6g} as q -> 0"
            + (", so the collapse is only polynomial in depth)" if abs(rate0 - 1) < 1e-12 else ")"))
    msg = f"the variance flows from {q_start:.6g} to the fixed point q* = {reached.q:.6g}"
    if not reached.stable:
        msg += f" (chi_q = {reached.chi_q:.6g} >= 1: it is not attracting)"
    return VarianceFixedPoints(pts, q_start, reached, "fixed_point", None, msg)


# -------------------------------------------------------------------------------------------
# propagation report
# -------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Propagation(Result):
    """The mean-field report at one (activation, sigma_w2, sigma_b2).

    Attributes
    ----------
    activation : str
    sigma_w2, sigma_b2, q_input : float
    status : str
        Of the variance: "fixed_point", "collapse", "unbounded", "neutral".
    q_star : float or None
        The fixed point the network reaches (None when unbounded).
    chi_q : float or None
        V'(q*).
    xi_q : float or None
        -1 / ln chi_q, layers over which the variance settles (inf if
        chi_q >= 1).
    chi_1 : float
        sigma_w2 E[phi'(sqrt(q*) z)^2]; gradients grow like chi_1^L
        (Schoenholz et al. 2017). For an unbounded variance, its large-q limit.
    c_star : float or None
        Fixed point of the correlation map (1 in the ordered phase).
    chi_c : float or None
        C'(c*).
    xi_c : float or None
        -1 / ln chi_c; inf on the edge of chaos.
    phase : str
        "ordered", "chaotic", "edge of chaos" or "unbounded variance".
    trainable_depth : float or None
        6 xi_c (Schoenholz et al. 2017, empirical rule); inf on the edge.
    trainable_depth_rule : str
        That rule in words (a constant).
    depth : int or None
        The depth asked about.
    gradient_growth : float or None
        chi_1^depth, the predicted growth of the squared gradient norm from the
        last layer back to the first.
    edge_approach : str or None
        On the edge of chaos, how 1 - c_l decays with depth.
    variance_fixed_points : VarianceFixedPoints
    notes : tuple of str
    """

    activation: str
    sigma_w2: float
    sigma_b2: float
    q_input: float
    status: str
    q_star: float | None
    chi_q: float | None
    xi_q: float | None
    chi_1: float
    c_star: float | None
    chi_c: float | None
    xi_c: float | None
    phase: str
    trainable_depth: float | None
    trainable_depth_rule: str = field(default=_TRAINABLE_RULE, init=False)
    depth: int | None
    gradient_growth: float | None
    edge_approach: str | None
    variance_fixed_points: VarianceFixedPoints = field(repr=False)
    notes: tuple[str, ...] = ()


def correlation_fixed_point(act: Activation, sw: float, sb: float, q: float,
                             rule: QuadratureRule, guess: float | None = None,
                             curvature: tuple[float, float] | None = None
                             ) -> tuple[float, float]:
    """(c*, C'(c*)) in the chaotic phase: the root of g(c) = C(c) - c in [0, 1).

    C is convex on [0, 1] with C(0) >= 0 and C'(1) > 1, so the root is unique
    and g > 0 to its left. Each step solves the cubic Hermite interpolant of g
    between the current left point (c, g, g') and (1, 0, chi_1 - 1), which is
    known from 1-D quadrature; a step that does not land left of the root is
    replaced by Newton's step, which for a convex g never overshoots. About
    four evaluations reach full precision.

    A ``guess`` (c* from a truncated Hermite series) is tried first: left of the
    root it becomes the left point; right of it, Newton's step from there lands
    left of the root (g is convex), so two or three evaluations suffice. With
    ``curvature = (C''(guess), M)``, M an upper bound of C'' near the guess (see
    :func:`propcalc.hermite.series_fixed_points`), one evaluation can suffice: the
    Newton step delta = -g / (C' - 1) from the guess lands within
    ``M delta^2 / (2 (1 - C'))`` of the root (Taylor with the Lagrange remainder), and
    when that is below 1e-17 and |delta| <= 1e-9 the polished point is returned with
    ``C'(c*) = C'(guess) + C''(guess) delta``. A guess already at the rounding floor of
    C (|g| <= 4e-15, yet up to 4e-15 / (1 - C') from c*) gets that same free step.
    """
    v_q = float(variance_map(act, q, sw, sb, rule))

    def both(x: float) -> tuple[float, float]:
        v, d = correlation_map_and_slope(act, x, sw, sb, q, rule, v_q=v_q)
        return float(v) - x, float(d)

    c1 = float(chi_1_map(act, q, sw, rule)) * q / v_q
    hi = 1.0  # a point known to be right of the root once found (g < 0)
    start = _warm_start(both, guess, curvature) if guess is not None else None
    if start is not None and start[0] == "root":
        return start[1], start[2]
    if start is not None:
        c, g, slope, hi = start[1], start[2], start[3], start[4]
    else:
        g, slope = both(0.0)
        if abs(g) <= 1e-15:
            return 0.0, slope
        c = 0.0
    for _ in range(60):
        dg = slope - 1.0
        newton = c - g / dg if dg < 0 else None
        cand = _cubic_root(c, g, dg, c1 - 1.0)
        step = cand if cand is not None and c < cand < hi else newton
        if step is None or not (c < step < hi):
            step = 0.5 * (c + hi)
        g_new, s_new = both(step)
        if abs(g_new) <= 4e-15 or abs(step - c) <= 1e-15:  # rounding floor of C
            return step, s_new
        if g_new > 0:
            c, g, slope = step, g_new, s_new
        else:
            hi = step
            # Newton from the left point, now with a bracket
            if newton is not None and c < newton < hi:
                g_n, s_n = both(newton)
                if abs(g_n) <= 4e-15:
                    return newton, s_n
                if g_n > 0:
                    c, g, slope = newton, g_n, s_n
                else:
                    hi = newton
        if hi - c <= 1e-15:
            return c, slope
    raise ComputationError(f"the correlation fixed point of {act.label} did not converge "
                           f"(bracket [{c:.17g}, {hi:.17g}])")


def _warm_start(both: Any, guess: float,
                curvature: tuple[float, float] | None = None) -> tuple[Any, ...] | None:
    """From a guess of c*: ("root", c, C'(c)), or ("left", c, g, g', hi), or None."""
    if not (math.isfinite(guess) and 0.0 < guess < 1.0):
        return None
    g, slope = both(guess)
    if abs(g) <= 4e-15:
        # at the rounding floor of C, but c* is still only within 4e-15 / (1 - C') of the
        # guess (3e-13 at c* = 0.99): the free Newton step from it removes most of that
        if slope < 1.0:
            delta = -g / (slope - 1.0)
            curv = curvature[0] if curvature is not None and math.isfinite(curvature[0]) else 0.0
            return ("root", guess + delta, slope + curv * delta)
        return ("root", guess, slope)
    if curvature is not None and slope < 1.0:
        delta = -g / (slope - 1.0)
        curv, bound = curvature
        if (abs(delta) <= 1e-9 and math.isfinite(bound) and math.isfinite(curv)
                and bound * delta * delta / (2.0 * (1.0 - slope)) <= 1e-17):
            return ("root", guess + delta, slope + curv * delta)
    if g > 0:
        return ("left", guess, g, slope, 1.0)
    dg = slope - 1.0
    if not dg < 0:
        return None  # right of the minimum of g: no Newton step towards the root
    newton = guess - g / dg  # tangent of a convex g from the right lands left of the root
    if not 0.0 < newton < guess:
        return None
    g_n, s_n = both(newton)
    if abs(g_n) <= 4e-15:
        return ("root", newton, s_n)
    if g_n > 0:
        return ("left", newton, g_n, s_n, guess)
    return None


def _chaotic_fixed_point(act: Activation, sw: float, sb: float, q: float,
                         rule: QuadratureRule) -> tuple[float, float]:
    """c* and C'(c*): from the Hermite series when its rigorous tail bound allows, else by steps.

    The series (propcalc.hermite) needs only 1-D integrals; it is used with the
    default rule for activations at their own feature scale 1, and gives way to
    :func:`correlation_fixed_point` for c* near 1, large q or steep formulas.
    A kinked activation with a closed-form smoothing takes only the series' first
    pass, as the guess of :func:`correlation_fixed_point`: its coefficients decay
    slowly, so an accepted series answer would be 10-100x less accurate than the
    exact 1-D route, which from the guess needs one to three evaluations.
    """
    kinked = bool(act.breakpoints) and act.smoothing is not None
    if rule == DEFAULT_RULE and act.scale == 1.0 and not act.has_jumps:
        for kmax, series_rule in SERIES_PASSES[:1] if kinked else SERIES_PASSES:
            c, s, ok, curv, curv_max = series_fixed_points(
                act, np.array([sw]), np.array([sb]), np.array([q]), kmax, series_rule,
                curvature=True)
            if bool(ok[0]) and not kinked:
                return float(c[0]), float(s[0])
        # the series' c* (its tail bound not small enough) is still a close first guess
        return correlation_fixed_point(act, sw, sb, q, rule, guess=float(c[0]),
                                       curvature=(float(curv[0]), float(curv_max[0])))
    return correlation_fixed_point(act, sw, sb, q, rule)


def _cubic_root(a: float, ga: float, da: float, d1: float) -> float | None:
    """Smallest root in (a, 1) of the cubic Hermite interpolant of g with g(1) = 0, g'(1) = d1."""
    h = 1.0 - a
    if h <= 0 or not (math.isfinite(ga) and math.isfinite(da) and math.isfinite(d1)):
        return None
    # on t in [0, 1]: p(t) = h00 ga + h10 h da + h11 h d1 (the value at t = 1 is 0)
    m0, m1 = h * da, h * d1
    coeffs = np.array([2 * ga + m0 + m1, -3 * ga - 2 * m0 - m1, m0, ga])
    roots = np.roots(coeffs) if abs(coeffs[0]) > 1e-300 else np.roots(coeffs[1:])
    real = sorted(float(r.real) for r in roots if abs(r.imag) < 1e-9 and 1e-12 < r.real < 1 - 1e-12)
    return a + h * real[0] if real else None


def _edge_approach(act: Activation, sw: float, sb: float, q: float, rule: QuadratureRule) -> str:
    """How 1 - c_l decays with depth l exactly on the edge of chaos.

    Kinked phi (phi' jumps by J_k at b_k): C'(c) ~ 1 - a sqrt(1 - c) with
    ``a = sigma_w2 sqrt(q/pi) sum_k J_k^2 p(b_k)``, so 1 - c_l ~ 9 / (a^2 l^2);
    for ReLU this is 9 pi^2 / (2 l^2) (Hayou et al. 2019). Smooth phi:
    1 - c_l ~ 2 / (C''(1) l) (Schoenholz et al. 2017 expand C to second order).
    """
    if act.has_jumps:
        return "1 - c_l does not vanish: the step-like map has infinite slope at c = 1"
    kinks = [(b, k) for b, k in zip(act.breakpoints, act.kinks) if k != 0.0]
    dens = sum(k * k * math.exp(-b * b / (2 * q)) / math.sqrt(2 * math.pi * q) for b, k in kinks)
    a = sw * math.sqrt(q / math.pi) * dens
    # kinks far out in the Gaussian tails (a tiny) matter only at absurd depths: smooth law
    if a > 1e-8:
        return (f"1 - c_l ~ {9.0 / (a * a):.6g} / l^2 (polynomial; kinked activation, "
                "Hayou et al. 2019)")
    # C''(1) from difference quotients D(h) = (C'(1) - C'(1 - h)) / h, extrapolated:
    # D(h) = C'' + O(h) for analytic phi; with breakpoints (a jump of phi'', as for ELU)
    # D(h) = C'' + O(sqrt(h)). Richardson with h and h/4 removes the leading term.
    # C'(1) = sigma_w2 q E[phi'^2] / V(q) is a 1-D integral.
    s0 = float(chi_1_map(act, q, sw, rule)) * q / float(variance_map(act, q, sw, sb, rule))
    h = 1e-3
    steps = np.array([h, h / 4])
    slopes = correlation_map_slope(act, 1.0 - steps, sw, sb, q, rule)  # one vectorised call
    d = [(s0 - float(sl)) / t for sl, t in zip(slopes, steps)]
    curvature = (2.0 * d[1] - d[0]) if act.breakpoints else (4.0 * d[1] - d[0]) / 3.0
    if not math.isfinite(curvature):
        return "1 - c_l decays more slowly than any power law measured here"
    if abs(curvature) <= 1e-9:
        return "1 - c_l stays constant: the correlation map is linear near c = 1"
    if curvature < 0:
        return "1 - c_l decays more slowly than any power law measured here"
    return (f"1 - c_l ~ {2.0 / curvature:.4g} / l (polynomial; smooth activation; the constant "
            "is estimated to about 3 digits)")


def propagation(act: Activation, sigma_w2: float, sigma_b2: float, depth: int | None = None,
                q_input: float = 1.0, rule: QuadratureRule = DEFAULT_RULE) -> Propagation:
    """Signal propagation report at one point of the (sigma_w2, sigma_b2) plane.

    Parameters
    ----------
    act : Activation
    sigma_w2 : float
        Weight variance times fan-in, > 0.
    sigma_b2 : float
        Bias variance, >= 0.
    depth : int, optional
        Number of layers, for the predicted gradient growth chi_1^depth and
        the depth verdict.
    q_input : float
        Mean squared input coordinate (1 for standardised inputs).

    Returns
    -------
    Propagation

    Examples
    --------
    >>> import propcalc
    >>> p = propcalc.propagation(propcalc.activation("tanh"), 1.0, 0.0)
    >>> p.phase
    'edge of chaos'
    """
    act = activation(act)
    sw = check_positive("sigma_w2", sigma_w2)
    sb = check_nonnegative("sigma_b2", sigma_b2)
    if depth is not None:
        depth = check_int("depth", depth, 1)
    fps = variance_fixed_points(act, sw, sb, q_input, rule)
    notes: list[str] = [fps.message]
    common = dict(activation=act.label, sigma_w2=sw, sigma_b2=sb, q_input=float(q_input),
                  status=fps.status, depth=depth, variance_fixed_points=fps)

    if fps.status == "unbounded":
        c1 = float(chi_1_map(act, 1e12, sw, rule))
        notes.append("chi_1 is given in the large-variance limit; with an exploding forward "
                     "signal no depth scale applies: lower sigma_w2")
        return Propagation(q_star=None, chi_q=None, xi_q=None, chi_1=c1, c_star=None, chi_c=None,
                           xi_c=None, phase="unbounded variance", trainable_depth=None,
                           gradient_growth=gradient_growth(c1, depth), edge_approach=None,
                           notes=tuple(notes), **common)

    fp = fps.reached
    assert fp is not None
    q = fp.q
    chi_q = fp.chi_q
    xi_q = depth_scale(chi_q)
    if fps.status == "collapse":
        # phi(0) = 0: chi_1 -> sigma_w2 phi'(0)^2 (one-sided average at a kink)
        dl, dr = act.derivative(np.array([-1e-12, 1e-12]))
        c1 = float(sw * (dl * dl + dr * dr) / 2.0)
        notes.append("at q* = 0 the network acts linearly: C(c) = c, chi_1 = sigma_w2 phi'(0)^2")
    else:
        c1 = float(chi_1_map(act, q, sw, rule))

    edge = None
    if not math.isfinite(c1):
        phase = "chaotic"
        notes.append("phi jumps, so its derivative carries a Dirac mass: chi_1 is infinite "
                     "and the correlation map has infinite slope at c = 1 (always chaotic)")
    elif abs(c1 - 1.0) <= EDGE_TOLERANCE:
        phase = "edge of chaos"
    elif c1 < 1.0:
        phase = "ordered"
    else:
        phase = "chaotic"

    if phase == "ordered":
        c_star, chi_c = 1.0, c1
    elif phase == "edge of chaos":
        c_star, chi_c = 1.0, 1.0
        edge = (_edge_approach(act, sw, sb, q, rule) if fps.status != "collapse"
                else "1 - c_l stays constant: the collapsed network is linear")
        notes.append("exactly critical: xi_c is infinite and correlations approach 1 only "
                     "polynomially in depth; " + edge)
    elif fps.status == "collapse":
        c_star, chi_c = 1.0, c1
    else:
        c_star, chi_c = _chaotic_fixed_point(act, sw, sb, q, rule)

    xi_c = math.inf if phase == "edge of chaos" else depth_scale(chi_c)
    if fps.status == "collapse" and phase != "edge of chaos":
        xi_c = depth_scale(c1) if c1 < 1 else math.inf
    trainable = TRAINABLE_DEPTH_FACTOR * xi_c
    if fps.status == "fixed_point" and not fp.stable:
        notes.append(f"q* = {q:.6g} is not attracting (chi_q = {chi_q:.6g}): a finite network "
                     "drifts away from it")
    if phase != "edge of chaos":
        notes.append(f"trainable depth: {_TRAINABLE_RULE}")
    return Propagation(q_star=q, chi_q=chi_q, xi_q=xi_q, chi_1=c1, c_star=float(c_star),
                       chi_c=float(chi_c), xi_c=float(xi_c), phase=phase,
                       trainable_depth=float(trainable), gradient_growth=gradient_growth(c1, depth),
                       edge_approach=edge, notes=tuple(notes), **common)


def gradient_growth(chi_1: float, depth: int | None) -> float | None:
    """chi_1^depth without overflow (inf past 1e308; None without a depth).

    Schoenholz et al. 2017: the squared gradient norm changes by chi_1 per layer.
    """
    if depth is None:
        return None
    if chi_1 == 0.0:
        return 0.0
    if not math.isfinite(chi_1):
        return math.inf
    log = depth * math.log(chi_1)
    return math.inf if log > 709.0 else math.exp(log)


# -------------------------------------------------------------------------------------------
# the edge of chaos
# -------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class CriticalPoint(Result):
    """A point on the edge-of-chaos line.

    Attributes
    ----------
    activation : str
    q_star : float
        The variance fixed point on the line.
    sigma_w2, sigma_b2 : float or None
        The critical weight and bias variances (None when ``valid`` is False).
    chi_q : float or None
        V'(q*) at that point.
    stable : bool
        True if q* attracts (chi_q < 1); a "critical" initialisation whose q*
        repels drifts off the line in a finite network.
    valid : bool
        False when no non-negative sigma_b2 reaches this q*.
    message : str
    """

    activation: str
    q_star: float
    sigma_w2: float | None
    sigma_b2: float | None
    chi_q: float | None
    stable: bool
    valid: bool
    message: str


def edge_of_chaos_line_arrays(act: Activation, q_star: Any, rule: QuadratureRule = DEFAULT_RULE
                              ) -> tuple[np.ndarray, np.ndarray]:
    """Vectorised edge-of-chaos line: (sigma_w2, sigma_b2) arrays for an array of q*.

    sigma_w2 is inf where E[phi'^2] = 0; sigma_b2 may be negative (not
    reachable). No stability information: see :func:`edge_of_chaos`.
    """
    q = np.asarray(q_star, dtype=float)
    if np.any(~np.isfinite(q)) or np.any(q <= 0):
        raise InvalidParameterError("q_star", "finite and > 0", q_star)
    return _line(act, q, rule)


def _line(act: Activation, q: np.ndarray, rule: QuadratureRule) -> tuple[np.ndarray, np.ndarray]:
    # Poole et al. 2016 / Schoenholz et al. 2017: chi_1 = 1 and V(q*) = q*
    d2 = derivative_second_moment(act, q, rule)
    with np.errstate(divide="ignore"):
        # E[phi'^2] = 0 (no gradient) or inf (a jump): no critical sigma_w2, marked inf
        usable = (d2 > 0) & np.isfinite(d2)
        sw = np.where(usable, 1.0 / np.where(usable, d2, 1.0), np.inf)
    # where sigma_w2 is inf, sigma_b2 has no meaning (not inf * 0 = NaN): marked -inf
    sb = np.where(usable, q - np.where(usable, sw, 0.0) * second_moment(act, q, rule), -np.inf)
    return sw, sb


def edge_of_chaos(act: Activation, q_star: float = 1.0,
                  rule: QuadratureRule = DEFAULT_RULE) -> CriticalPoint:
    """The critical (sigma_w2, sigma_b2) whose variance fixed point is ``q_star``.

    ``sigma_w2 = 1 / E[phi'(sqrt(q*) z)^2]``,
    ``sigma_b2 = q* - sigma_w2 E[phi(sqrt(q*) z)^2]`` (Poole et al. 2016;
    Schoenholz et al. 2017, section 3). Invalid where sigma_b2 < 0, or where
    phi' vanishes (step) or jumps.

    Parameters
    ----------
    act : Activation
    q_star : float
        > 0.

    Returns
    -------
    CriticalPoint
    """
    act = activation(act)
    q = check_positive("q_star", q_star)
    if act.has_jumps:
        return CriticalPoint(act.label, q, None, None, None, False, False,
                             f"{act.label} jumps, so chi_1 is infinite: there is no edge of chaos")
    sw, sb = (float(v) for v in _line(act, np.asarray(q), rule))
    if not math.isfinite(sw):
        return CriticalPoint(act.label, q, None, None, None, False, False,
                             f"E[phi'^2] = 0 at q* = {q:.6g}: no gradient passes, no edge of chaos")
    if sb < -1e-12 * q:
        return CriticalPoint(act.label, q, sw, None, None, False, False,
                             f"q* = {q:.6g} needs sigma_b2 = {sb:.6g} < 0 at sigma_w2 = {sw:.6g}: "
                             "not reachable")
    sb = max(sb, 0.0)
    chi_q = float(variance_map_slope(act, q, sw, rule))
    stable = abs(chi_q) < 1.0 - 1e-9
    if stable:
        how = "attracts"
    elif abs(chi_q - 1.0) <= 1e-9:
        how = "is neutral (chi_q = 1): the variance keeps whatever value it starts with"
    else:
        how = f"does not attract (chi_q = {chi_q:.6g}): a finite network drifts off this point"
    msg = f"critical at sigma_w2 = {sw:.6g}, sigma_b2 = {sb:.6g}; q* = {q:.6g} {how}"
    return CriticalPoint(act.label, q, sw, sb, chi_q, stable, True, msg)


def edge_of_chaos_line(act: Activation, q_star: Any,
                       rule: QuadratureRule = DEFAULT_RULE) -> tuple[CriticalPoint, ...]:
    """The edge-of-chaos line sampled at several q* values (see :func:`edge_of_chaos`)."""
    qs = np.atleast_1d(np.asarray(q_star, dtype=float))
    return tuple(edge_of_chaos(act, float(q), rule) for q in qs)


def edge_of_chaos_at_bias(act: Activation, sigma_b2: float,
                          rule: QuadratureRule = DEFAULT_RULE) -> tuple[CriticalPoint, ...]:
    """Critical points with a fixed sigma_b2: solve for q* (and so sigma_w2) on the line.

    Every q* with ``q* - E[phi^2] / E[phi'^2] = sigma_b2`` is returned,
    ascending, each with its stability. The limit q* -> 0 is included when
    phi(0) = 0 and sigma_b2 = 0 (tanh: sigma_w2 = 1; Poole et al. 2016).
    When every q* qualifies (ReLU at sigma_b2 = 0) a single point at q* = 1 is
    returned with a note.

    Parameters
    ----------
    act : Activation
    sigma_b2 : float
        >= 0.

    Returns
    -------
    tuple of CriticalPoint
        Empty when no critical point exists for this sigma_b2.
    """
    act = activation(act)
    sb = check_nonnegative("sigma_b2", sigma_b2)
    if act.has_jumps:
        return ()
    grid = np.geomspace(1e-8, 1e6, 281)
    sw_line, sb_line = _line(act, grid, rule)
    ok = np.isfinite(sw_line)
    gap = sb_line - sb

    def gfun(q: float) -> float:
        w, b = _line(act, np.asarray(q), rule)
        return float(b) - sb

    out: list[CriticalPoint] = []
    if np.all(np.abs(gap[ok]) <= 1e-10 * (grid[ok] + sb)) and ok.any():
        cp = edge_of_chaos(act, 1.0, rule)
        return (CriticalPoint(cp.activation, cp.q_star, cp.sigma_w2, sb, cp.chi_q, cp.stable,
                              cp.valid, cp.message + "; every q* is a fixed point on this line "
                              "(the activation is positively homogeneous)"),)
    phi0 = float(act.value(np.array([0.0]))[0])
    if sb == 0.0 and phi0 == 0.0:
        d0 = act.derivative(np.array([-1e-12, 1e-12]))
        slope0 = float((d0[0] ** 2 + d0[1] ** 2) / 2)
        if slope0 > 0:
            sw0 = 1.0 / slope0
            out.append(CriticalPoint(act.label, 0.0, sw0, 0.0, variance_collapse_rate(act, sw0),
                                     False, True,
                                     f"critical at sigma_w2 = {sw0:.6g}, sigma_b2 = 0 in the limit "
                                     "q* -> 0 (the variance decays polynomially towards 0)"))
    # values within rounding of zero (tanh's line touches sigma_b2 = 0 like q^3) give no sign
    resolved = ok & (np.abs(gap) > 1e-13 * (grid + sb))
    for root in _bracketed_roots(gfun, grid, gap, resolved):
        cp = edge_of_chaos(act, root, rule)
        if cp.valid:
            out.append(cp)
    return tuple(out)
