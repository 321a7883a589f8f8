"""The propagation report at one point: the core on arrays of size 1, in words.

:func:`propagation` and :func:`variance_fixed_points` call the vectorised core
(:mod:`propcalc.meanfield.core`) with one point and turn its arrays into result
dataclasses with messages and notes; nothing here computes a fixed point, a
slope or a depth scale of its own. What only a single report says is computed
here: how 1 - c_l approaches 0 exactly at the edge of chaos
(:func:`edge_approach`), and the gradient growth over a given depth.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from .. import domains
from ..activations import Activation, resolve
from ..numerics.quadrature import DEFAULT_RULE, QuadratureRule
from ..results import OMIT, Result
from ..vocabulary import EDGE_BAND, Phase, VarianceStatus
from .core import TRAINABLE_RULE, CoreResult, checked, propagate
from .fixed_points import VarianceSolution, check_reached, solve_variance
from .maps import chi_1 as chi_1_map
from .maps import correlation_map_slope, variance_map

__all__ = ["FixedPoint", "VarianceFixedPoints", "Propagation", "variance_fixed_points",
           "variance_result",
           "propagation", "gradient_growth", "edge_approach", "XI_C_DIGITS_NOTE"]

#: Below this relative accuracy of xi_c (about 6 significant digits) the report says so.
XI_C_DIGITS_NOTE = 5e-7


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
        True if q* attracts: |chi_q| < 1, or, for chi_q within NEUTRAL_TOLERANCE of 1,
        V(q) > q just below q* and V(q) < q just above it (the next term of the map).
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
    status: VarianceStatus
    growth_rate: float | None
    message: str


def variance_result(sol: VarianceSolution, i: int, sigma_b2: float) -> VarianceFixedPoints:
    """Point i of a variance solution as a result, with the message describing its flow."""
    sel = np.flatnonzero(sol.owner == i)
    pts = tuple(FixedPoint(float(sol.points_q[j]), float(sol.points_chi[j]),
                           bool(sol.points_stable[j])) for j in sel)
    status = VarianceStatus(str(sol.status[i]))
    q_start = float(sol.q_start[i])
    rate = float(sol.growth_rate[i])
    if status == VarianceStatus.NEUTRAL:
        fp = pts[0]
        return VarianceFixedPoints(
            pts, q_start, fp, status, 1.0,
            "V(q) = q for every q: the variance is preserved at its input value "
            f"q = {q_start:.6g} (neither attracting nor repelling)")
    if status == VarianceStatus.UNBOUNDED:
        how = (f"by a factor of about {rate:.6g} per layer" if rate > 1 + 1e-9
               else f"without a finite limit (linearly, by about {sigma_b2:.6g} per layer)")
        return VarianceFixedPoints(
            pts, q_start, None, status, rate,
            f"no finite fixed point above the input variance {q_start:.6g}: "
            f"the pre-activation variance grows {how}")
    q_star = float(sol.q_star[i])
    reached = next(p for p in pts if p.q == q_star)
    if status == VarianceStatus.COLLAPSE:
        return VarianceFixedPoints(
            pts, q_start, reached, status, rate,
            f"the pre-activation variance collapses to 0 (V(q)/q -> {rate:.6g} as q -> 0"
            + (", so the collapse is only polynomial in depth)" if abs(rate - 1) < 1e-12 else ")"))
    msg = f"the variance flows from {q_start:.6g} to the fixed point q* = {q_star:.6g}"
    if not reached.stable:
        msg += f" (chi_q = {reached.chi_q:.6g} >= 1: it is not attracting)"
    return VarianceFixedPoints(pts, q_start, reached, status, None, msg)


def variance_fixed_points(act: Activation | str, sigma_w2: float, sigma_b2: float,
                          q_input: float = 1.0,
                          rule: QuadratureRule = DEFAULT_RULE) -> VarianceFixedPoints:
    """Find every fixed point of the variance map and the one the network flows to.

    Parameters
    ----------
    act : Activation or str
        An Activation, a built-in name or a formula.
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

    Raises
    ------
    ComputationError
        If the variance falls below the smallest variance resolved (about 1e-10).

    Notes
    -----
    See :mod:`propcalc.meanfield.fixed_points`: roots of ``V(q) - q`` are bracketed
    on a log grid of 0.15-decade steps over ``[1e-10, 1e8]`` (extended to cover
    sigma_b2 and the input) and polished by Brent's method to 4e-15 relative.
    """
    act = resolve(act)
    sw = checked("sigma_w2", sigma_w2)
    sb = checked("sigma_b2", sigma_b2)
    qi = checked("q_input", q_input)
    domains.check_signal(qi, sb)
    sol = solve_variance(act, np.array([sw]), np.array([sb]), np.array([qi]), rule)
    check_reached(sol, np.array([sw]), np.array([sb]))
    return variance_result(sol, 0, sb)


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
    status: VarianceStatus
    q_star: float | None
    chi_q: float | None
    xi_q: float | None
    chi_1: float
    c_star: float | None
    chi_c: float | None
    xi_c: float | None
    phase: Phase
    trainable_depth: float | None
    trainable_depth_rule: str = field(default=TRAINABLE_RULE, init=False)
    depth: int | None
    gradient_growth: float | None
    edge_approach: str | None
    variance_fixed_points: VarianceFixedPoints = field(repr=False)
    notes: tuple[str, ...] = ()
    #: 1 - c* with the digits c* cannot hold near 1 (not in the dict form)
    gap: float | None = field(default=None, metadata=OMIT, repr=False, kw_only=True)


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


def edge_approach(act: Activation, sigma_w2: float, sigma_b2: float, q: float,
                  rule: QuadratureRule = DEFAULT_RULE) -> str:
    """How 1 - c_l decays with depth l exactly on the edge of chaos.

    Kinked phi (phi' jumps by J_k at b_k): C'(c) ~ 1 - a sqrt(1 - c) with
    ``a = sigma_w2 sqrt(q/pi) sum_k J_k^2 p(b_k)``, so 1 - c_l ~ 9 / (a^2 l^2);
    for ReLU this is 9 pi^2 / (2 l^2) (Hayou et al. 2019). Smooth phi:
    1 - c_l ~ 2 / (C''(1) l) (Schoenholz et al. 2017 expand C to second order).
    """
    sw, sb = sigma_w2, sigma_b2
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


def _optional(value: float) -> float | None:
    return None if math.isnan(value) else float(value)


def _report(act: Activation, core: CoreResult, i: int, q_input: float, depth: int | None,
            rule: QuadratureRule) -> Propagation:
    """The report of point i of a core result."""
    sw, sb = float(core.sigma_w2[i]), float(core.sigma_b2[i])
    fps = variance_result(core.variance, i, sb)
    notes: list[str] = [fps.message]
    phase = Phase(str(core.phase[i]))
    c1 = float(core.chi_1[i])
    common = dict(activation=act.label, sigma_w2=sw, sigma_b2=sb, q_input=float(q_input),
                  status=fps.status, depth=depth, variance_fixed_points=fps,
                  gradient_growth=gradient_growth(c1, depth), chi_1=c1, phase=phase)
    if fps.status == VarianceStatus.UNBOUNDED:
        notes.append("chi_1 is given in the large-variance limit; with an exploding forward "
                     "signal no depth scale applies: lower sigma_w2")
        return Propagation(q_star=None, chi_q=None, xi_q=None, c_star=None, chi_c=None,
                           xi_c=None, trainable_depth=None, edge_approach=None,
                           notes=tuple(notes), **common)
    q = float(core.q_star[i])
    chi_q = float(core.chi_q[i])
    collapse = fps.status == VarianceStatus.COLLAPSE
    if collapse:
        notes.append("at q* = 0 the network acts linearly: C(c) = c, chi_1 = sigma_w2 phi'(0)^2")
    edge = None
    if not math.isfinite(c1):
        notes.append("phi jumps, so its derivative carries a Dirac mass: chi_1 is infinite "
                     "and the correlation map has infinite slope at c = 1 (always chaotic)")
    if phase == Phase.EDGE_OF_CHAOS:
        edge = (edge_approach(act, sw, sb, q, rule) if not collapse
                else "1 - c_l stays constant: the collapsed network is linear")
        if math.isinf(float(core.xi_c[i])):
            notes.append("exactly critical: xi_c is infinite and correlations approach 1 only "
                         "polynomially in depth; " + edge)
        else:
            notes.append(f"critical within the edge-of-chaos band |chi_1 - 1| <= {EDGE_BAND:g} "
                         f"(chi_1 = 1 {'+' if c1 > 1 else '-'} {abs(c1 - 1.0):.3g}): xi_c = "
                         f"{float(core.xi_c[i]):.4g} layers, beyond the depth of a trained "
                         "network; near it " + edge)
    xi_c = float(core.xi_c[i])
    if fps.status == VarianceStatus.FIXED_POINT and not fps.reached.stable:  # type: ignore[union-attr]
        notes.append(f"q* = {q:.6g} is not attracting (chi_q = {chi_q:.6g}): a finite network "
                     "drifts away from it")
    err = float(core.xi_c_error[i])
    if math.isfinite(xi_c) and err > XI_C_DIGITS_NOTE:
        digits = max(0, int(math.floor(-math.log10(err))))
        notes.append(f"xi_c = {xi_c:.{max(digits, 1)}g} is known to about {digits} significant "
                     f"digits only: chi_c = 1 - {1.0 - float(core.chi_c[i]):.3g} sits near the "
                     "accuracy floor of the integrals and of double precision (close to the edge of "
                     "chaos, where xi_c ~ 1 / |chi_1 - 1|)")
    if phase != Phase.EDGE_OF_CHAOS or math.isfinite(xi_c):
        notes.append(f"trainable depth: {TRAINABLE_RULE}")
    return Propagation(q_star=q, chi_q=chi_q, xi_q=float(core.xi_q[i]),
                       c_star=float(core.c_star[i]), chi_c=float(core.chi_c[i]), xi_c=xi_c,
                       trainable_depth=float(core.trainable_depth[i]), edge_approach=edge,
                       notes=tuple(notes), gap=_optional(float(core.gap[i])), **common)


def propagation(act: Activation | str, sigma_w2: float, sigma_b2: float, depth: int | None = None,
                q_input: float = 1.0, rule: QuadratureRule = DEFAULT_RULE) -> Propagation:
    """Signal propagation report at one point of the (sigma_w2, sigma_b2) plane.

    Parameters
    ----------
    act : Activation or str
        An Activation, a built-in name or a formula.
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

    Notes
    -----
    The vectorised core (:func:`propcalc.meanfield.core.propagate`) on one point;
    :func:`propcalc.sweep` runs the same code on grids.

    Examples
    --------
    >>> import propcalc
    >>> p = propcalc.propagation(propcalc.activation("tanh"), 1.0, 0.0)
    >>> p.phase
    <Phase.EDGE_OF_CHAOS: 'edge of chaos'>
    >>> p.phase == "edge of chaos"
    True
    """
    act = resolve(act)
    sw = checked("sigma_w2", sigma_w2)
    sb = checked("sigma_b2", sigma_b2)
    qi = checked("q_input", q_input)
    domains.check_signal(qi, sb)
    if depth is not None:
        depth = checked("depth", depth)
    core = propagate(act, np.array([sw]), np.array([sb]), qi, rule)
    return _report(act, core, 0, qi, depth, rule)
