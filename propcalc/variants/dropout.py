"""Signal propagation with dropout (Schoenholz et al. 2017, section on dropout).

Each unit's activation is kept with probability ``rho`` (the keep rate) and
rescaled by ``1 / rho``: ``h' = W (m * phi(h)) / rho + b`` with
``m_j ~ Bernoulli(rho)`` drawn independently for every input and layer.

The maps (infinite width)
-------------------------
* Diagonal (one input with itself): ``E[(m_j / rho)^2] = 1 / rho``, so

      q*  =  (sigma_w2 / rho) E[phi(sqrt(q*) z)^2] + sigma_b2,

  the ordinary variance map with ``sigma_w2 -> sigma_w2 / rho``.
* Off-diagonal (two inputs, or the same input under two independent masks):
  ``E[m_j m'_j] / rho^2 = 1``, so the covariance map is unchanged,

      q_ab = sigma_w2 E[phi(u1) phi(u2)] + sigma_b2,
      C(c) = (sigma_w2 E[phi(u1) phi(u2)] + sigma_b2) / q*,

  with ``u1, u2`` of variance q* and correlation c (Poole et al. 2016, eq. 5).
* Hence ``C(1) = (sigma_w2 E[phi^2] + sigma_b2) / q* < 1`` whenever
  ``rho < 1`` and ``E[phi^2] > 0``: c = 1 is no longer a fixed point, the
  fixed point c* < 1 attracts, ``chi_c = C'(c*) = sigma_w2 E[phi'(u1)
  phi'(u2)]`` (Price's theorem) is < 1 and ``xi_c = -1 / ln chi_c`` is
  finite for every rho < 1: there is no edge of chaos, and the trainable depth
  (about ``6 xi_c``, an empirical rule) is bounded (Schoenholz et al. 2017).
* Gradients: the Jacobian of a layer is ``W diag(m / rho) diag(phi'(h))``,
  whose mean squared singular value is
  ``chi_1 = (sigma_w2 / rho) E[phi'(sqrt(q*) z)^2]``.

The convex correlation map (non-negative Hermite coefficients; Daniely,
Frostig & Singer 2016) with ``C(0) >= 0`` and ``C(1) < 1`` has exactly one
fixed point in [0, 1), found by Brent's method on ``C(c) - c``.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy import optimize

from ..activations.base import Activation
from ..meanfield.criticality import (
    TRAINABLE_DEPTH_FACTOR,
    depth_scale,
    gradient_growth,
    variance_fixed_points,
)
from ..errors import (
    ComputationError,
    InvalidParameterError,
    check_finite,
    check_int,
    check_nonnegative,
    check_positive,
)
from ..meanfield.maps import chi_1 as chi_1_map
from ..meanfield.maps import derivative_pair_expectation, pair_expectation, second_moment
from ..numerics.quadrature import DEFAULT_RULE, QuadratureRule
from ..results import Result

__all__ = [
    "DropoutPropagation",
    "DropoutSweep",
    "dropout_propagation",
    "dropout_sweep",
    "relu_dropout_correlation_map",
    "relu_dropout_correlation_slope",
]

_TRAINABLE_RULE = "about 6 xi_c layers (empirical rule of Schoenholz et al. 2017)"


def _keep_rate(value: Any) -> float:
    rho = check_finite("keep_rate", value)
    if not 0.0 < rho <= 1.0:
        raise InvalidParameterError("keep_rate", "in (0, 1]", value)
    return rho


@dataclass(frozen=True)
class DropoutPropagation(Result):
    """Mean-field report of a deep network with dropout at keep rate rho.

    Attributes
    ----------
    activation : str
    keep_rate : float
        rho, the probability of keeping a unit (1 / rho rescaling).
    sigma_w2, sigma_b2, q_input : float
    status : str
        Of the variance: "fixed_point", "collapse", "neutral" or "unbounded".
    q_star : float or None
        Fixed point of ``(sigma_w2 / rho) E[phi^2] + sigma_b2``.
    chi_q : float or None
        Slope of that map at q*.
    chi_1 : float or None
        (sigma_w2 / rho) E[phi'(sqrt(q*) z)^2], the per-layer growth of squared
        gradient norms.
    c_star : float or None
        The correlation fixed point (< 1 for rho < 1).
    chi_c : float or None
        C'(c*) = sigma_w2 E[phi'(u1) phi'(u2)] at c*.
    xi_c : float or None
        -1 / ln chi_c (finite for rho < 1).
    trainable_depth : float or None
        6 xi_c (empirical rule of Schoenholz et al. 2017).
    trainable_depth_rule : str
        That rule in words (a constant).
    depth : int or None
    gradient_growth : float or None
        chi_1^depth.
    depth_ok : bool or None
    verdict : str
    notes : tuple of str
    """

    activation: str
    keep_rate: float
    sigma_w2: float
    sigma_b2: float
    q_input: float
    status: str
    q_star: float | None
    chi_q: float | None
    chi_1: float | None
    c_star: float | None
    chi_c: float | None
    xi_c: float | None
    trainable_depth: float | None
    trainable_depth_rule: str = field(default=_TRAINABLE_RULE, init=False)
    depth: int | None
    gradient_growth: float | None
    depth_ok: bool | None
    verdict: str
    notes: tuple[str, ...] = ()


@dataclass(frozen=True)
class DropoutSweep(Result):
    """Dropout reports over several keep rates.

    Attributes
    ----------
    activation : str
    scale_with_keep_rate : bool
        True if each report used ``sigma_w2 * rho`` (so that sigma_w2 / rho,
        hence q*, does not move with rho).
    reports : tuple of DropoutPropagation
        One per keep rate, in the order given.
    """

    activation: str
    scale_with_keep_rate: bool
    reports: tuple[DropoutPropagation, ...]


def _correlation_fixed_point(act: Activation, sw: float, sb: float, q: float,
                             rule: QuadratureRule) -> tuple[float, float, str]:
    """(c*, C'(c*), how) for C(c) = (sw E[phi phi] + sb) / q with C(1) <= 1."""

    if q <= 0.0:
        raise ComputationError("the variance collapses to 0 here, so the correlation map is "
                               "undefined; give the inputs a positive mean square or add bias")

    def gap(c: float) -> float:
        return (sw * float(pair_expectation(act, c, q, rule)) + sb) / q - c

    hi = 1.0
    if gap(1.0) >= -1e-15:
        # no dropout (rho = 1): c = 1 is a fixed point; it is the one reached if it attracts
        slope1 = sw * float(derivative_pair_expectation(act, 1.0, q, rule))
        if slope1 <= 1.0:
            return 1.0, slope1, "c = 1 is a fixed point and attracts (C'(1) <= 1)"
        hi = 1.0 - 1e-2  # chaotic: C(c) < c just below 1; bracket the root below
        while gap(hi) >= 0.0 and hi < 1.0 - 1e-13:
            hi = 1.0 - (1.0 - hi) * 1e-2
    g0 = gap(0.0)
    if g0 <= 0.0:
        # C(0) = 0 (odd phi, no bias) and C convex with C(1) < 1: c* = 0
        c_star = 0.0
        how = "C(0) = 0 and C(c) < c on (0, 1]: c* = 0"
    elif gap(hi) >= 0.0:
        # C(c) > c all the way up to 1 - 1e-13: the fixed point is within rounding of 1
        c_star = hi
        how = f"C(c) > c up to c = {hi:.15g}: c* is within 1e-13 of 1"
    else:
        c_star = float(optimize.brentq(gap, 0.0, hi, xtol=1e-15, rtol=4e-15, maxiter=200))
        how = f"Brent's method on C(c) - c over [0, {hi:.15g}]"
    slope = sw * float(derivative_pair_expectation(act, c_star, q, rule))
    return c_star, slope, how


def dropout_propagation(act: Activation, sigma_w2: float, sigma_b2: float, keep_rate: float,
                        depth: int | None = None, q_input: float = 1.0,
                        rule: QuadratureRule = DEFAULT_RULE) -> DropoutPropagation:
    """Signal propagation with dropout at keep rate rho (Schoenholz et al. 2017).

    Parameters
    ----------
    act : Activation
    sigma_w2 : float
        > 0.
    sigma_b2 : float
        >= 0.
    keep_rate : float
        rho in (0, 1]; rho = 1 is no dropout.
    depth : int, optional
        For the gradient growth and the depth verdict.
    q_input : float
        Mean squared input coordinate (dropout is taken to act on every
        layer's inputs, the first included).

    Returns
    -------
    DropoutPropagation

    Notes
    -----
    q* comes from :func:`propcalc.criticality.variance_fixed_points` applied
    with ``sigma_w2 / rho``; c* from Brent's method on C(c) - c; the pair
    expectations from :func:`propcalc.maps.pair_expectation` and
    :func:`propcalc.maps.derivative_pair_expectation`.
    """
    sw = check_positive("sigma_w2", sigma_w2)
    sb = check_nonnegative("sigma_b2", sigma_b2)
    rho = _keep_rate(keep_rate)
    qi = check_nonnegative("q_input", q_input)
    if depth is not None:
        depth = check_int("depth", depth, 1)
    sw_diag = sw / rho
    fps = variance_fixed_points(act, sw_diag, sb, qi, rule)
    notes = [fps.message]
    base = dict(activation=act.label, keep_rate=rho, sigma_w2=sw, sigma_b2=sb, q_input=qi,
                status=fps.status, depth=depth)
    if fps.status == "unbounded" or fps.reached is None:
        notes.append("the forward variance (with the 1/rho rescaling) grows without bound: lower "
                     "sigma_w2 or raise the keep rate")
        return DropoutPropagation(q_star=None, chi_q=None, chi_1=None, c_star=None, chi_c=None,
                                  xi_c=None, trainable_depth=None, gradient_growth=None,
                                  depth_ok=False if depth is not None else None,
                                  verdict="the forward signal explodes; no depth is trainable "
                                  "as planned", notes=tuple(notes), **base)
    q = fps.reached.q
    chi_q = fps.reached.chi_q
    if fps.status == "collapse":
        # q -> 0 with phi(0) = 0 and sigma_b2 = 0: the network acts linearly, the
        # off-diagonal over the diagonal:
        # sigma_w2 phi'(0)^2 c / (sigma_w2 phi'(0)^2 / rho) = rho c
        dl, dr = act.derivative(np.array([-1e-12, 1e-12]))
        chi1 = float(sw_diag * (dl * dl + dr * dr) / 2.0)
        c_star, chi_c = 0.0, rho
        notes.append("the variance collapses to 0, where the network is linear: C(c) = rho c, "
                     "so c* = 0 and chi_c = rho")
    else:
        chi1 = float(chi_1_map(act, q, sw_diag, rule))
        if rho == 1.0:
            notes.append("keep rate 1 is no dropout: see propcalc.propagation for the phase "
                         "diagram; c* here is the fixed point reached from c = 1")
        c_star, chi_c, how = _correlation_fixed_point(act, sw, sb, q, rule)
        notes.append(f"c* = {c_star:.10g} ({how})")
    xi_c = depth_scale(chi_c) if chi_c < 1.0 else math.inf
    trainable = TRAINABLE_DEPTH_FACTOR * xi_c
    if rho < 1.0:
        m2 = float(second_moment(act, q, rule)) if q > 0 else 0.0
        c1 = (sw * m2 + sb) / q if q > 0 else rho
        notes.append(f"with dropout C(1) = {c1:.6g} < 1: c = 1 is not a fixed point, xi_c is "
                     "finite and there is no edge of chaos (Schoenholz et al. 2017)")
    grad = gradient_growth(chi1, depth)
    if depth is None:
        verdict, ok = "no depth given", None
    elif math.isinf(trainable):
        verdict, ok = f"{depth} layers: no depth limit from the correlation depth scale", True
    else:
        ok = depth <= trainable
        verdict = (f"{depth} layers {'is within' if ok else 'exceeds'} the predicted trainable "
                   f"depth of about {trainable:.0f} layers at keep rate {rho:g} (6 xi_c, "
                   f"xi_c = {xi_c:.4g}; empirical rule of Schoenholz et al. 2017)")
        if not ok:
            verdict += "; raise the keep rate or use fewer layers"
    return DropoutPropagation(q_star=q, chi_q=chi_q, chi_1=chi1, c_star=c_star, chi_c=chi_c,
                              xi_c=xi_c, trainable_depth=trainable, gradient_growth=grad,
                              depth_ok=ok, verdict=verdict, notes=tuple(notes), **base)


def dropout_sweep(act: Activation, sigma_w2: float, sigma_b2: float,
                  keep_rates: Sequence[float], depth: int | None = None, q_input: float = 1.0,
                  scale_with_keep_rate: bool = False,
                  rule: QuadratureRule = DEFAULT_RULE) -> DropoutSweep:
    """:func:`dropout_propagation` over several keep rates.

    Parameters
    ----------
    scale_with_keep_rate : bool
        If True, keep rate rho uses ``sigma_w2 * rho``, which holds
        ``sigma_w2 / rho`` and hence q* fixed (e.g. ReLU with sigma_w2 = 2 gives
        ``2 rho``, whose variance stays put).
    Other parameters as :func:`dropout_propagation`.
    """
    rates = list(keep_rates)
    if not rates:
        raise InvalidParameterError("keep_rates", "a non-empty list", rates)
    if len(rates) > 1000:
        raise InvalidParameterError("keep_rates", "at most 1000 values", len(rates))
    reports = []
    for i, r in enumerate(rates):
        try:
            rho = _keep_rate(r)
        except InvalidParameterError as exc:
            raise InvalidParameterError(f"keep_rates[{i}]", "in (0, 1]", r) from exc
        sw = check_positive("sigma_w2", sigma_w2) * (rho if scale_with_keep_rate else 1.0)
        reports.append(dropout_propagation(act, sw, sigma_b2, rho, depth, q_input, rule))
    return DropoutSweep(act.label, bool(scale_with_keep_rate), tuple(reports))


def relu_dropout_correlation_map(c: Any, keep_rate: float) -> np.ndarray:
    """Closed-form C(c) for ReLU with dropout at sigma_w2 = 2 rho, sigma_b2 = 0.

    Derivation. The arc-cosine kernel of degree 1 (Cho & Saul 2009, eq. 6,
    with ``J_1(theta) = sin theta + (pi - theta) cos theta``) gives, for a
    pair of variance q and correlation c,
    ``E[relu(u1) relu(u2)] = q J_1(arccos c) / (2 pi)``. With
    ``sigma_w2 = 2 rho`` the diagonal map is ``(2 rho / rho) q / 2 = q``
    (every q is a fixed point), and the unchanged off-diagonal term gives

        C(c) = 2 rho q J_1(arccos c) / (2 pi q) = rho k_1(c),
        k_1(c) = (sqrt(1 - c^2) + (pi - arccos c) c) / pi,

    so c* solves ``rho k_1(c) = c`` (one root in (0, 1) for rho < 1, since
    ``C(0) = rho / pi > 0`` and ``C(1) = rho < 1``).
    """
    rho = _keep_rate(keep_rate)
    ca = np.asarray(c, dtype=float)
    sine = np.sqrt(np.maximum(0.0, (1.0 - ca) * (1.0 + ca)))
    return rho * (sine + (math.pi - np.arccos(ca)) * ca) / math.pi


def relu_dropout_correlation_slope(c: Any, keep_rate: float) -> np.ndarray:
    """C'(c) = rho (pi - arccos c) / pi, the derivative of :func:`relu_dropout_correlation_map`.

    ``d/dc [sqrt(1 - c^2) + (pi - arccos c) c] = pi - arccos c``
    (Cho & Saul 2009, kernel of degree 0 times pi).
    """
    rho = _keep_rate(keep_rate)
    ca = np.asarray(c, dtype=float)
    return rho * (math.pi - np.arccos(ca)) / math.pi
