"""The one vectorised mean-field core: every quantity of the propagation report, elementwise.

For arrays of points (sigma_w2, sigma_b2, q_input) of one activation,
:func:`propagate` computes the variance fixed point reached (with every fixed
point and its stability: :mod:`propcalc.meanfield.fixed_points`), chi_1, the
phase, the correlation fixed point c* and chi_c (:mod:`propcalc.meanfield.correlation`),
the depth scales and the trainable depth. The single-point report
(:func:`propcalc.propagation`) is a call with arrays of size 1; sweeps call it
with whole grids; dropout and the network analyses reuse its pieces.

Formulas
--------
* chi_1 = sigma_w2 E[phi'(sqrt(q*) z)^2] (Schoenholz et al. 2017, eq. 8); at a
  collapsed variance (q* = 0, phi(0) = 0) the network is linear and chi_1 =
  sigma_w2 (phi'(0-)^2 + phi'(0+)^2) / 2; for an unbounded variance its
  large-q limit, evaluated at ``LARGE_Q``.
* Phases: ordered (chi_1 < 1, c* = 1, chi_c = chi_1), edge of chaos
  (|chi_1 - 1| <= EDGE_BAND; xi_c infinite within EDGE_TOLERANCE, computed beyond),
  chaotic (chi_1 > 1, c* < 1)
  (Poole et al. 2016; Schoenholz et al. 2017).
* Depth scales xi = -1 / ln|slope| (Schoenholz et al. 2017, eqs. 6 and 9) and
  the trainable depth, about 6 xi_c layers (Schoenholz et al. 2017, section 5,
  an empirical rule).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..activations import Activation, resolve
from .. import domains
from ..errors import InvalidParameterError, check_int, check_nonnegative, check_positive
from ..numerics.quadrature import DEFAULT_RULE, QuadratureRule
from ..vocabulary import EDGE_BAND, EDGE_TOLERANCE, Phase, VarianceStatus
from .correlation import CorrelationSolution, solve_correlation
from .fixed_points import (VarianceSolution, check_reached, collapse_rate, large_variance,
                           solve_variance)
from .maps import derivative_second_moment

__all__ = ["QUANTITIES", "TRAINABLE_DEPTH_FACTOR", "TRAINABLE_RULE", "CoreResult", "propagate",
           "propagation_arrays", "depth_scale", "depth_scales", "check_axis", "checked",
           "reached_chi_1", "phases"]

Array = np.ndarray

#: Float quantities of the report, in table order.
QUANTITIES = ("q_star", "chi_q", "xi_q", "chi_1", "c_star", "chi_c", "xi_c", "trainable_depth")
#: Schoenholz et al. 2017: networks train up to about 6 xi_c layers (an empirical rule).
TRAINABLE_DEPTH_FACTOR = 6.0
TRAINABLE_RULE = "about 6 xi_c layers (empirical rule of Schoenholz et al. 2017)"
_TEXT = "<U18"


#: Relative accuracy of a correlation slope C'(c) from the Gaussian integrals, as measured
#: against mpmath at 40 digits near the edge of chaos (hard_tanh, max(x, -0.5), erf:
#: chi_c within 1e-14 of 1 - 3e-8): it bounds the digits xi_c keeps where 1 - chi_c is small.
SLOPE_ACCURACY = 2e-14


def depth_scales(slope: Array) -> Array:
    """xi = -1 / ln|s| elementwise: 0 at s = 0, inf for |s| >= 1 (Schoenholz et al. 2017, eqs. 6, 9)."""
    s = np.abs(np.asarray(slope, dtype=float))
    out = np.full(s.shape, math.inf)
    out[s == 0] = 0.0
    mid = (s > 0) & (s < 1)
    out[mid] = -1.0 / np.log(s[mid])
    return out


def depth_scale(slope: float) -> float:
    """xi = -1 / ln(slope) for a contraction (0 <= |slope| < 1); 0 at 0; inf at |slope| >= 1.

    Schoenholz et al. 2017, eqs. (6) and (9). A slope > 1 (an expanding
    direction) has no depth scale of convergence: inf is returned with the
    caller to say why.
    """
    return float(depth_scales(np.array([float(slope)]))[0])


@dataclass(frozen=True, eq=False)
class CoreResult:
    """Everything :func:`propagate` computes, as flat arrays of one entry per point."""

    sigma_w2: Array
    sigma_b2: Array
    status: Array
    phase: Array
    q_star: Array
    chi_q: Array
    xi_q: Array
    chi_1: Array
    c_star: Array
    chi_c: Array
    xi_c: Array
    trainable_depth: Array
    #: 1 - c* with the digits c* cannot hold near 1 (0 where c* = 1)
    gap: Array
    #: estimated relative rounding error of xi_c (the floor of double precision)
    xi_c_error: Array
    variance: VarianceSolution

    def arrays(self) -> dict[str, Array]:
        """status, phase and the QUANTITIES (NaN where the variance is unbounded)."""
        out = {"status": self.status, "phase": self.phase}
        out.update({k: getattr(self, k) for k in QUANTITIES})
        return out


def propagate(act: Activation, sigma_w2: Array, sigma_b2: Array, q_input: Array | float = 1.0,
              rule: QuadratureRule = DEFAULT_RULE, where: str = "") -> CoreResult:
    """The propagation quantities of every point (1-D arrays, validated by the caller).

    Raises
    ------
    ComputationError
        If a point's variance falls below the smallest variance resolved (the
        message starts with ``where``).
    """
    sw = np.asarray(sigma_w2, dtype=float).ravel()
    sb = np.asarray(sigma_b2, dtype=float).ravel()
    n = sw.size
    qi = np.broadcast_to(np.asarray(q_input, dtype=float), sw.shape)
    var = solve_variance(act, sw, sb, qi, rule)
    check_reached(var, sw, sb, where)
    status = var.status
    unbounded = status == VarianceStatus.UNBOUNDED.value
    collapse = status == VarianceStatus.COLLAPSE.value
    q = var.q_star
    c1 = reached_chi_1(act, sw, var, rule)
    if np.any(unbounded):  # the large-variance limit, where the variance is headed
        c1[unbounded] = sw[unbounded] * float(derivative_second_moment(
            act, large_variance(act, rule), rule))
    phase = phases(c1, unbounded)
    finite = np.isfinite(c1)
    edge = finite & (np.abs(c1 - 1.0) <= EDGE_TOLERANCE)  # chi_1 = 1 to the integrals' accuracy

    c_star = np.ones(n)
    chi_c = np.where(edge, 1.0, c1)
    gap = np.zeros(n)
    chi_c_error = np.full(n, 4e-16)
    need = np.flatnonzero(((phase == Phase.CHAOTIC.value)
                           | ((phase == Phase.EDGE_OF_CHAOS.value) & (c1 > 1.0) & ~edge))
                          & ~collapse)
    if need.size:
        sol: CorrelationSolution = solve_correlation(act, sw[need], sb[need], q[need], rule,
                                                     slope_at_one=c1[need])
        c_star[need], chi_c[need], gap[need] = sol.c_star, sol.chi_c, sol.gap
        chi_c_error[need] = sol.chi_c_error
    xi_c = np.where(edge, math.inf, depth_scales(chi_c))
    # at a collapsed variance the network is linear: C(c) = c, the slope chi_1 sets xi_c
    xi_c = np.where(collapse & ~edge, np.where(c1 < 1, depth_scales(c1), math.inf), xi_c)
    # the Gaussian integrals behind chi_c (C'(c*), or chi_1 itself) carry their own error
    chi_c_error = chi_c_error + SLOPE_ACCURACY * np.abs(chi_c)
    with np.errstate(divide="ignore", invalid="ignore"):
        # d xi / xi = d chi / (chi |ln chi|): the digits xi_c keeps
        xi_err = np.where(np.isfinite(xi_c) & (xi_c > 0),
                          chi_c_error / (np.abs(chi_c) * np.abs(np.log(np.abs(chi_c)))), 0.0)
    xi_q = depth_scales(np.where(unbounded, 0.0, var.chi_q))
    out = dict(q_star=q, chi_q=var.chi_q, xi_q=xi_q, chi_1=c1, c_star=c_star, chi_c=chi_c,
               xi_c=xi_c, trainable_depth=TRAINABLE_DEPTH_FACTOR * xi_c)
    for key in ("q_star", "chi_q", "xi_q", "c_star", "chi_c", "xi_c", "trainable_depth"):
        out[key] = np.where(unbounded, np.nan, out[key])
    return CoreResult(sigma_w2=sw, sigma_b2=sb, status=status.astype(_TEXT), phase=phase,
                      gap=np.where(unbounded, np.nan, gap),
                      xi_c_error=np.where(unbounded, np.nan, xi_err), variance=var, **out)


def reached_chi_1(act: Activation, sw: Array, var: VarianceSolution,
                  rule: QuadratureRule = DEFAULT_RULE) -> Array:
    """chi_1 at the variance fixed point each point reached (NaN where it is unbounded).

    chi_1 = sigma_w2 E[phi'(sqrt(q*) z)^2] (Schoenholz et al. 2017, eq. 8); at a collapsed
    variance (q* = 0) its q -> 0 limit, :func:`~propcalc.meanfield.fixed_points.collapse_rate`.
    """
    status = var.status
    unbounded = status == VarianceStatus.UNBOUNDED.value
    collapse = status == VarianceStatus.COLLAPSE.value
    c1 = np.full(sw.shape, np.nan)
    if collapse.any():
        c1[collapse] = collapse_rate(act, sw[collapse])
    rest = np.flatnonzero(~unbounded & ~collapse)
    if rest.size:
        c1[rest] = sw[rest] * _moment(act, var.q_star[rest], rule)
    return c1


def phases(chi_1: Array, unbounded: Array) -> Array:
    """The phase of each point from chi_1 (Poole et al. 2016; Schoenholz et al. 2017).

    Ordered below ``1 - EDGE_BAND``, the edge of chaos within ``EDGE_BAND`` of 1 (the verdict's
    band, :mod:`propcalc.vocabulary`), chaotic above it; unbounded where the variance has no
    finite fixed point. The one phase rule: the report, the sweeps and the phase diagram's
    borders (:mod:`propcalc.output.phase_regions`) all use it.
    """
    phase = np.full(chi_1.shape, Phase.CHAOTIC.value, dtype=_TEXT)
    finite = np.isfinite(chi_1)
    band = finite & (np.abs(chi_1 - 1.0) <= EDGE_BAND)
    phase[finite & ~band & (chi_1 < 1.0)] = Phase.ORDERED.value
    phase[band] = Phase.EDGE_OF_CHAOS.value
    phase[unbounded] = Phase.UNBOUNDED.value
    return phase


def _moment(act: Activation, q: Array, rule: QuadratureRule) -> Array:
    """E[phi'(sqrt(q) z)^2] at each q (scalar fast path for a few)."""
    if q.size > 4:
        return np.asarray(derivative_second_moment(act, q, rule), dtype=float)
    return np.array([float(derivative_second_moment(act, float(x), rule)) for x in q])


def checked(name: str, value: Any, field: str | None = None) -> Any:
    """``value`` checked for its sign and finiteness, then against its documented domain.

    The sign check keeps the words every front end has shown (``"sigma_w2 must be > 0,
    got -1.0"``); a value of the right sign outside the range the numerics honour gets
    the domain's constraint (:mod:`propcalc.domains`, e.g. ``"in [1e-6, 10000]"``).
    """
    field = name if field is None else field
    dom = domains.domain(name)
    if dom.integer:
        value = check_int(field, value, int(dom.lower))
    elif dom.lower > 0 and not dom.zero:
        value = check_positive(field, value)
    else:
        value = check_nonnegative(field, value)
    return domains.check(name, value, field)


def check_axis(name: str, values: Any, positive: bool) -> Array:
    """A number or 1-D array of finite numbers (> 0 or >= 0) in the documented domain of
    ``name``, naming the bad index."""
    try:
        arr = np.atleast_1d(np.asarray(values, dtype=float))
    except (TypeError, ValueError):
        raise InvalidParameterError(name, "a number or a 1-D array of numbers", values) from None
    if arr.ndim != 1 or arr.size == 0:
        raise InvalidParameterError(name, "a number or a non-empty 1-D array", values)
    bad = ~np.isfinite(arr) | ((arr <= 0) if positive else (arr < 0))
    if np.any(bad):
        i = int(np.flatnonzero(bad)[0])
        raise InvalidParameterError(f"{name}[{i}]", "finite and > 0" if positive
                                    else "finite and >= 0", float(arr[i]))
    dom = domains.domain(name)
    above = (arr > dom.lower) if dom.lower_open else (arr >= dom.lower)
    below = (arr < dom.upper) if dom.upper_open else (arr <= dom.upper)
    outside = ~((above & below) | ((arr == 0.0) & dom.zero))
    if np.any(outside):
        i = int(np.flatnonzero(outside)[0])
        domains.check(name, float(arr[i]), f"{name}[{i}]")
    return arr


def propagation_arrays(act: Activation | str, sigma_w2: Any, sigma_b2: Any, q_input: float = 1.0,
                       rule: QuadratureRule = DEFAULT_RULE) -> dict[str, Array]:
    """The quantities of :func:`propcalc.propagation` for arrays of (sigma_w2, sigma_b2) pairs.

    Parameters
    ----------
    act : str or Activation
        A built-in name, a formula in x, or an Activation (resolved once here).
    sigma_w2, sigma_b2 : array_like
        Broadcast together; sigma_w2 > 0, sigma_b2 >= 0, finite.
    q_input : float
        Mean squared input coordinate.
    rule : QuadratureRule

    Returns
    -------
    dict of ndarray
        ``status`` and ``phase`` (strings) and the float arrays of
        :data:`QUANTITIES`, each of the broadcast shape; NaN where
        ``propagation`` gives None (unbounded variance).

    Notes
    -----
    The same computation as :func:`propcalc.propagation` (which is this call
    on arrays of size 1), so the two agree to rounding.
    """
    act = resolve(act)
    sw_b, sb_b = np.broadcast_arrays(np.asarray(sigma_w2, dtype=float),
                                     np.asarray(sigma_b2, dtype=float))
    shape = sw_b.shape
    sw = check_axis("sigma_w2", sw_b.ravel(), positive=True)
    sb = check_axis("sigma_b2", sb_b.ravel(), positive=False)
    qi = checked("q_input", q_input)
    out = propagate(act, sw, sb, qi, rule).arrays()
    return {k: v.reshape(shape) for k, v in out.items()}
