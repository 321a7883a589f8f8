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
fixed point in [0, 1). Both fixed points come from the mean-field core, for all
keep rates of a sweep at once: q* from :func:`propcalc.meanfield.fixed_points.solve_variance`
with ``sigma_w2 / rho``, c* from :func:`propcalc.meanfield.correlation.solve_correlation`
with the diagonal variance q* as the map's denominator.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..activations import Activation, resolve
from .. import domains
from ..errors import InvalidParameterError, check_finite
from ..meanfield.core import TRAINABLE_DEPTH_FACTOR, TRAINABLE_RULE, checked, depth_scales
from ..meanfield.correlation import solve_correlation
from ..meanfield.fixed_points import (VarianceSolution, check_reached, collapse_rate,
                                     solve_variance)
from ..meanfield.maps import derivative_second_moment, second_moment
from ..meanfield.report import gradient_growth, variance_result
from ..numerics.quadrature import DEFAULT_RULE, QuadratureRule
from ..results import Result
from ..vocabulary import VarianceStatus

__all__ = [
    "DropoutPropagation",
    "DropoutSweep",
    "dropout_propagation",
    "dropout_sweep",
    "relu_dropout_correlation_map",
    "relu_dropout_correlation_slope",
]

def _keep_rate(value: Any) -> float:
    rho = check_finite("keep_rate", value)
    if not 0.0 < rho <= 1.0:
        raise InvalidParameterError("keep_rate", "in (0, 1]", value)
    return domains.check("keep_rate", rho)  # the documented range (propcalc.domains)


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
    trainable_depth_rule: str = field(default=TRAINABLE_RULE, init=False)
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


def _reports(act: Activation, sw: np.ndarray, sb: float, rho: np.ndarray, depth: int | None,
             qi: float, rule: QuadratureRule) -> list[DropoutPropagation]:
    """Dropout reports for arrays of (sigma_w2, keep rate): the core once for all of them."""
    n = sw.size
    sbs = np.full(n, sb)
    sw_diag = sw / rho
    var = solve_variance(act, sw_diag, sbs, np.full(n, qi), rule)
    check_reached(var, sw_diag, sbs)
    q = var.q_star
    status = var.status
    live = np.flatnonzero((status != VarianceStatus.UNBOUNDED.value)
                          & (status != VarianceStatus.COLLAPSE.value))
    chi1 = np.full(n, np.nan)
    c_star = np.full(n, np.nan)
    chi_c = np.full(n, np.nan)
    m2 = np.zeros(n)
    if live.size:
        qs = q[live]
        chi1[live] = sw_diag[live] * derivative_second_moment(act, qs, rule)
        m2[live] = second_moment(act, qs, rule)
        # off-diagonal map C(c) = (sigma_w2 E[phi phi] + sigma_b2) / q*: without dropout
        # (rho = 1) q* = V(q*) and c = 1 is a fixed point; with it C(1) < 1
        plain = rho[live] == 1.0
        # C'(1) = sigma_w2 q E[phi'^2] / D (Price 1958): chi_1 rho q / D, D = V(q) or q*
        slope1 = chi1[live] * rho[live] * qs / np.where(plain, sw[live] * m2[live] + sb, qs)
        for mask, den in ((plain, None), (~plain, qs)):
            if np.any(mask):
                k = live[mask]
                sol = solve_correlation(act, sw[k], sbs[k], q[k], rule, slope_at_one=slope1[mask],
                                        denominator=None if den is None else den[mask])
                c_star[k], chi_c[k] = sol.c_star, sol.chi_c
    coll = np.flatnonzero(status == VarianceStatus.COLLAPSE.value)
    # q -> 0 with phi(0) = 0 and sigma_b2 = 0: the network acts linearly, the off-diagonal
    # over the diagonal: sigma_w2 phi'(0)^2 c / (sigma_w2 phi'(0)^2 / rho) = rho c
    chi1[coll] = collapse_rate(act, sw_diag[coll])
    c_star[coll], chi_c[coll] = 0.0, rho[coll]
    xi = np.where(chi_c < 1.0, depth_scales(np.nan_to_num(chi_c)), math.inf).tolist()
    reports = []
    for i in range(n):
        reports.append(_report(act, float(sw[i]), sb, float(rho[i]), qi, depth, str(status[i]),
                               float(var.q_star[i]), float(var.chi_q[i]), float(chi1[i]),
                               float(c_star[i]), float(chi_c[i]), xi[i], float(m2[i]),
                               _flow_message(var, i, sb)))
    return reports


def _flow_message(var: VarianceSolution, i: int, sb: float) -> str:
    """The one wording of the variance flow (as in :func:`propcalc.variance_fixed_points`)."""
    return variance_result(var, i, sb).message


def _report(act: Activation, sw: float, sb: float, rho: float, qi: float, depth: int | None,
            status: str, q: float, chi_q: float, chi1: float, c_star: float, chi_c: float,
            xi_c: float, m2: float, message: str) -> DropoutPropagation:
    notes = [message]
    base = dict(activation=act.label, keep_rate=rho, sigma_w2=sw, sigma_b2=sb, q_input=qi,
                status=VarianceStatus(status), depth=depth)
    if status == VarianceStatus.UNBOUNDED:
        notes.append("the forward variance (with the 1/rho rescaling) grows without bound: lower "
                     "sigma_w2 or raise the keep rate")
        return DropoutPropagation(q_star=None, chi_q=None, chi_1=None, c_star=None, chi_c=None,
                                  xi_c=None, trainable_depth=None, gradient_growth=None,
                                  depth_ok=False if depth is not None else None,
                                  verdict="the forward signal explodes; no depth is trainable "
                                  "as planned", notes=tuple(notes), **base)
    if status == VarianceStatus.COLLAPSE:
        notes.append("the variance collapses to 0, where the network is linear: C(c) = rho c, "
                     "so c* = 0 and chi_c = rho")
    else:
        if rho == 1.0:
            notes.append("keep rate 1 is no dropout: see propcalc.propagation for the phase "
                         "diagram; c* here is the fixed point reached from c = 1")
        how = ("c = 1 is a fixed point and attracts (C'(1) <= 1)" if c_star == 1.0
               else "C(0) = 0 and C(c) < c on (0, 1]: c* = 0" if c_star == 0.0
               else "the root of C(c) - c in [0, 1), solved in 1 - c")
        notes.append(f"c* = {c_star:.10g} ({how})")
    trainable = TRAINABLE_DEPTH_FACTOR * xi_c
    if rho < 1.0:
        c1 = (sw * m2 + sb) / q if q > 0 else rho
        notes.append(f"with dropout C(1) = {c1:.6g} < 1: c = 1 is not a fixed point, xi_c is "
                     "finite and there is no edge of chaos (Schoenholz et al. 2017)")
    grad = gradient_growth(chi1, depth)
    if depth is None:
        verdict, ok = "no depth given", None
    elif math.isinf(trainable):
        verdict, ok = f"{depth} layers: no depth limit from the correlation depth scale", True
    else:
        ok = bool(depth <= trainable)
        verdict = (f"{depth} layers {'is within' if ok else 'exceeds'} the predicted trainable "
                   f"depth of about {trainable:.0f} layers at keep rate {rho:g} (6 xi_c, "
                   f"xi_c = {xi_c:.4g}; empirical rule of Schoenholz et al. 2017)")
        if not ok:
            verdict += "; raise the keep rate or use fewer layers"
    return DropoutPropagation(q_star=float(q), chi_q=float(chi_q), chi_1=float(chi1),
                              c_star=float(c_star), chi_c=float(chi_c), xi_c=float(xi_c),
                              trainable_depth=float(trainable), gradient_growth=grad,
                              depth_ok=ok, verdict=verdict, notes=tuple(notes), **base)


def dropout_propagation(act: Activation | str, sigma_w2: float, sigma_b2: float,
                        keep_rate: float, depth: int | None = None, q_input: float = 1.0,
                        rule: QuadratureRule = DEFAULT_RULE) -> DropoutPropagation:
    """Signal propagation with dropout at keep rate rho (Schoenholz et al. 2017).

    Parameters
    ----------
    act : Activation or str
        An Activation, a built-in name or a formula.
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
    q* is the variance fixed point with ``sigma_w2 / rho``; c* the root of
    ``C(c) - c`` with the diagonal variance as the map's denominator (see the
    module docstring); both from the mean-field core.
    """
    act = resolve(act)
    sw = checked("sigma_w2", sigma_w2)
    sb = checked("sigma_b2", sigma_b2)
    rho = _keep_rate(keep_rate)
    qi = checked("q_input", q_input)
    if depth is not None:
        depth = checked("depth", depth)
    return _reports(act, np.array([sw]), sb, np.array([rho]), depth, qi, rule)[0]


def dropout_sweep(act: Activation | str, sigma_w2: float, sigma_b2: float,
                  keep_rates: Sequence[float], depth: int | None = None, q_input: float = 1.0,
                  scale_with_keep_rate: bool = False,
                  rule: QuadratureRule = DEFAULT_RULE) -> DropoutSweep:
    """:func:`dropout_propagation` over several keep rates, computed together.

    Parameters
    ----------
    scale_with_keep_rate : bool
        If True, keep rate rho uses ``sigma_w2 * rho``, which holds
        ``sigma_w2 / rho`` and hence q* fixed (e.g. ReLU with sigma_w2 = 2 gives
        ``2 rho``, whose variance stays put).
    Other parameters as :func:`dropout_propagation`.
    """
    act = resolve(act)
    rates = list(keep_rates)
    if not rates:
        raise InvalidParameterError("keep_rates", "a non-empty list", rates)
    if len(rates) > 1000:
        raise InvalidParameterError("keep_rates", "at most 1000 values", len(rates))
    rhos = []
    for i, r in enumerate(rates):
        try:
            rhos.append(_keep_rate(r))
        except InvalidParameterError as exc:
            raise InvalidParameterError(f"keep_rates[{i}]", "in (0, 1]", r) from exc
    sw = checked("sigma_w2", sigma_w2)
    sb = checked("sigma_b2", sigma_b2)
    qi = checked("q_input", q_input)
    if depth is not None:
        depth = checked("depth", depth)
    rho = np.array(rhos)
    sws = sw * rho if scale_with_keep_rate else np.full(rho.size, sw)
    return DropoutSweep(act.label, bool(scale_with_keep_rate),
                        tuple(_reports(act, sws, sb, rho, depth, qi, rule)))


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
