"""The edge of chaos: the line chi_1 = 1, V(q*) = q* in the (sigma_w2, sigma_b2) plane.

Parametrised by the fixed point q* (Poole et al. 2016; Schoenholz et al. 2017,
section 3): ``sigma_w2 = 1 / E[phi'(sqrt(q*) z)^2]`` and
``sigma_b2 = q* - sigma_w2 E[phi(sqrt(q*) z)^2]``, valid where sigma_b2 >= 0.
At a given sigma_b2 the critical points are the roots in q* of
``sigma_b2(q*) - sigma_b2``, found by :func:`propcalc.numerics.roots.roots_on_grid`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..activations import Activation, resolve
from ..errors import InvalidParameterError
from ..numerics import roots
from ..numerics.quadrature import DEFAULT_RULE, QuadratureRule
from ..results import Result
from ..vocabulary import NEUTRAL_TOLERANCE
from .core import checked
from .fixed_points import collapse_rate
from .maps import derivative_second_moment, second_moment, variance_map_slope

__all__ = ["CriticalPoint", "edge_of_chaos", "edge_of_chaos_at_bias", "edge_of_chaos_line",
           "edge_of_chaos_line_arrays", "edge_line", "ZERO_SNAP", "DEFAULT_EDGE_Q_STARS",
           "edge_of_chaos_points"]

#: sigma_b2 = q* - sigma_w2 E[phi^2] within this many q* of 0 is a zero: the difference of two
#: numbers near q* rounds to a few units of 2.2e-16 q* (64 of them, with the 1-D integral's
#: own error of ~1e-15 relative); relu's line at q* = 1 gives 2.2e-16, which means 0.
ZERO_SNAP = 64 * 2.220446049250313e-16


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


def edge_line(act: Activation, q: np.ndarray,
              rule: QuadratureRule = DEFAULT_RULE) -> tuple[np.ndarray, np.ndarray]:
    """(sigma_w2, sigma_b2) on the line for an array of q* > 0 (no validation).

    Poole et al. 2016 / Schoenholz et al. 2017: chi_1 = 1 and V(q*) = q*. sigma_w2
    is inf where E[phi'^2] = 0 (no gradient) or inf (a jump); sigma_b2 may be
    negative (not reachable).
    """
    d2 = derivative_second_moment(act, q, rule)
    with np.errstate(divide="ignore"):
        usable = (d2 > 0) & np.isfinite(d2)
        sw = np.where(usable, 1.0 / np.where(usable, d2, 1.0), np.inf)
    # where sigma_w2 is inf, sigma_b2 has no meaning (not inf * 0 = NaN): marked -inf
    sb = np.where(usable, q - np.where(usable, sw, 0.0) * second_moment(act, q, rule), -np.inf)
    # a difference within a few roundings of q is a known zero (relu: 1 - 2 * 0.5 = 2.2e-16)
    sb = np.where(np.abs(sb) <= ZERO_SNAP * q, 0.0, sb)
    return sw, sb


def edge_of_chaos_line_arrays(act: Activation | str, q_star: Any,
                              rule: QuadratureRule = DEFAULT_RULE
                              ) -> tuple[np.ndarray, np.ndarray]:
    """Vectorised edge-of-chaos line: (sigma_w2, sigma_b2) arrays for an array of q*.

    sigma_w2 is inf where E[phi'^2] = 0; sigma_b2 may be negative (not
    reachable). No stability information: see :func:`edge_of_chaos`.
    """
    act = resolve(act)
    q = np.asarray(q_star, dtype=float)
    if np.any(~np.isfinite(q)) or np.any(q <= 0):
        raise InvalidParameterError("q_star", "finite and > 0", q_star)
    return edge_line(act, q, rule)


def edge_of_chaos(act: Activation | str, q_star: float = 1.0,
                  rule: QuadratureRule = DEFAULT_RULE) -> CriticalPoint:
    """The critical (sigma_w2, sigma_b2) whose variance fixed point is ``q_star``.

    ``sigma_w2 = 1 / E[phi'(sqrt(q*) z)^2]``,
    ``sigma_b2 = q* - sigma_w2 E[phi(sqrt(q*) z)^2]`` (Poole et al. 2016;
    Schoenholz et al. 2017, section 3). Invalid where sigma_b2 < 0, or where
    phi' vanishes (step) or jumps.

    Parameters
    ----------
    act : Activation or str
    q_star : float
        > 0.

    Returns
    -------
    CriticalPoint
    """
    act = resolve(act)
    q = checked("q_star", q_star)
    return _critical(act, q, rule)


def _critical(act: Activation, q: float, rule: QuadratureRule,
              bias: float | None = None) -> CriticalPoint:
    """The critical point at q* = q; ``bias`` is the sigma_b2 the caller solved for (it is
    reported exactly as given, not as the line's value at the root, which differs by rounding)."""
    if act.has_jumps:
        return CriticalPoint(act.label, q, None, None, None, False, False,
                             f"{act.label} jumps, so chi_1 is infinite: there is no edge of chaos")
    sw, sb = (float(v) for v in edge_line(act, np.float64(q), rule))  # (a scalar: fast paths)
    if not math.isfinite(sw):
        return CriticalPoint(act.label, q, None, None, None, False, False,
                             f"E[phi'^2] = 0 at q* = {q:.6g}: no gradient passes, no edge of chaos")
    if sb < -1e-12 * q:
        return CriticalPoint(act.label, q, sw, None, None, False, False,
                             f"q* = {q:.6g} needs sigma_b2 = {sb:.6g} < 0 at sigma_w2 = {sw:.6g}: "
                             "not reachable")
    sb = max(sb, 0.0) if bias is None else bias
    chi_q = float(variance_map_slope(act, q, sw, rule))
    stable = abs(chi_q) < 1.0 - NEUTRAL_TOLERANCE
    if stable:
        how = "attracts"
    elif abs(chi_q - 1.0) <= NEUTRAL_TOLERANCE:
        how = "is neutral (chi_q = 1): the variance keeps whatever value it starts with"
    else:
        how = f"does not attract (chi_q = {chi_q:.6g}): a finite network drifts off this point"
    msg = f"critical at sigma_w2 = {sw:.6g}, sigma_b2 = {sb:.6g}; q* = {q:.6g} {how}"
    return CriticalPoint(act.label, q, sw, sb, chi_q, stable, True, msg)


def edge_of_chaos_line(act: Activation | str, q_star: Any,
                       rule: QuadratureRule = DEFAULT_RULE) -> tuple[CriticalPoint, ...]:
    """The edge-of-chaos line sampled at several q* values (see :func:`edge_of_chaos`).

    Parameters
    ----------
    act : str or Activation
        A built-in name, a formula in x, or an Activation (resolved once here).
    q_star : float or array_like
        The fixed points q* > 0 to place on the line.
    rule : QuadratureRule

    Returns
    -------
    tuple of CriticalPoint
        One per q*, in the order given.
    """
    act = resolve(act)
    qs = np.atleast_1d(np.asarray(q_star, dtype=float))
    return tuple(edge_of_chaos(act, float(q), rule) for q in qs)


def edge_of_chaos_at_bias(act: Activation | str, sigma_b2: float,
                          rule: QuadratureRule = DEFAULT_RULE) -> tuple[CriticalPoint, ...]:
    """Critical points with a fixed sigma_b2: solve for q* (and so sigma_w2) on the line.

    Every q* with ``q* - E[phi^2] / E[phi'^2] = sigma_b2`` is returned,
    ascending, each with its stability. The limit q* -> 0 is included when
    phi(0) = 0 and sigma_b2 = 0 (tanh: sigma_w2 = 1; Poole et al. 2016).
    When every q* qualifies (ReLU at sigma_b2 = 0) a single point at q* = 1 is
    returned with a note.

    Parameters
    ----------
    act : Activation or str
    sigma_b2 : float
        >= 0.

    Returns
    -------
    tuple of CriticalPoint
        Empty when no critical point exists for this sigma_b2.
    """
    act = resolve(act)
    sb = checked("sigma_b2", sigma_b2)
    if act.has_jumps:
        return ()
    grid = np.geomspace(1e-8, 1e6, 281)
    sw_line, sb_line = edge_line(act, grid, rule)
    ok = np.isfinite(sw_line)
    gap = sb_line - sb

    def gfun(q: float) -> float:
        return float(edge_line(act, np.float64(q), rule)[1]) - sb

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
            out.append(CriticalPoint(act.label, 0.0, sw0, 0.0, float(collapse_rate(act, sw0)),
                                     False, True,
                                     f"critical at sigma_w2 = {sw0:.6g}, sigma_b2 = 0 in the limit "
                                     "q* -> 0 (the variance decays polynomially towards 0)"))
    # values within rounding of zero (tanh's line touches sigma_b2 = 0 like q^3) give no sign
    resolved = ok & (np.abs(gap) > 1e-13 * (grid + sb))
    for root in roots.roots_on_grid(gfun, grid, gap, resolved):
        cp = _critical(act, root, rule, bias=sb)
        if cp.valid:
            out.append(cp)
    return tuple(out)


#: the q* sampled along the edge-of-chaos line when none are given (the CLI's ``edge`` and the
#: service's /v1/edge-of-chaos); a log grid over four decades around q* = 1 (common practice,
#: no source)
DEFAULT_EDGE_Q_STARS: tuple[float, ...] = (0.01, 0.03, 0.1, 0.3, 1.0, 3.0, 10.0, 30.0, 100.0)


def edge_of_chaos_points(act: Activation | str, *, q_star: Any = None,
                         sigma_b2: float | None = None,
                         rule: QuadratureRule = DEFAULT_RULE) -> tuple[CriticalPoint, ...]:
    """The edge-of-chaos points a front end asks for: at a fixed bias variance, or along the
    line through the given q* (by default :data:`DEFAULT_EDGE_Q_STARS`).

    One validation for the command line and the service (issue 12 section 2: ``edge --q-star 1
    --sigma-b2 0.05`` dropped ``--q-star``): ``q_star`` and ``sigma_b2`` exclude each other.

    Parameters
    ----------
    act : str or Activation
        A built-in name, a formula in x, or an Activation (resolved once here).
    q_star : float or sequence of float, optional
        Points of the line (:func:`edge_of_chaos_line`).
    sigma_b2 : float, optional
        The bias variance of the points (:func:`edge_of_chaos_at_bias`).

    Returns
    -------
    tuple of CriticalPoint

    Raises
    ------
    InvalidParameterError
        If both ``q_star`` and ``sigma_b2`` are given.
    """
    act = resolve(act)
    if q_star is not None and sigma_b2 is not None:
        raise InvalidParameterError("q_star", "absent when sigma_b2 is given (sigma_b2 fixes the "
                                    "points; their q* follow from it)",
                                    q_star if np.ndim(q_star) == 0 else list(q_star))
    if sigma_b2 is not None:
        return tuple(edge_of_chaos_at_bias(act, sigma_b2, rule))
    qs = DEFAULT_EDGE_Q_STARS if q_star is None else q_star
    return tuple(edge_of_chaos_line(act, qs, rule))

