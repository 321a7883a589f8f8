"""The mean-field report of a deep maxout network of rank k, and one maxout layer's size.

The maps and the moments of the maximum (with their derivation) are in
:mod:`propcalc.variants.maxout_maps`; this module puts them together like the plain report
(fixed points, slopes, depth scales, the trainable depth) and sizes one dense maxout layer.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

from ..vocabulary import EDGE_TOLERANCE
from ..meanfield.core import TRAINABLE_DEPTH_FACTOR, depth_scale
from ..meanfield.report import gradient_growth
from ..errors import check_int, check_nonnegative, check_positive
from ..numerics.quadrature import DEFAULT_RULE, QuadratureRule
from ..results import Result
from .maxout_maps import (
    MAX_RANK,
    MaxMoments,
    bivariate_normal_cdf,
    max_moments,
    maxout_correlation_map,
    maxout_correlation_map_slope,
    maxout_pair_moments,
    maxout_variance_map,
)

__all__ = [
    "MAX_RANK",
    "MaxMoments",
    "MaxoutLayer",
    "MaxoutPropagation",
    "bivariate_normal_cdf",
    "max_moments",
    "maxout_correlation_map",
    "maxout_correlation_map_slope",
    "maxout_layer",
    "maxout_pair_moments",
    "maxout_propagation",
    "maxout_variance_map",
]

_TRAINABLE_RULE = "about 6 xi_c layers (empirical rule of Schoenholz et al. 2017)"


@dataclass(frozen=True)
class MaxoutPropagation(Result):
    """Mean-field report of a deep maxout network of rank k.

    Attributes
    ----------
    k : int
    sigma_w2, sigma_b2, q_input : float
    moments : MaxMoments
    status : str
        Of the variance: "fixed_point", "collapse" (to 0), "neutral"
        (V(q) = q for all q) or "unbounded".
    q_star : float or None
        The variance the pieces settle to (the first layer's for "neutral").
    chi_q : float
        V'(q) = sigma_w2 M2(k), constant: V is linear.
    growth_rate : float or None
        Per-layer factor of an unbounded variance (None otherwise).
    chi_1 : float
        sigma_w2: mean squared singular value of one layer's Jacobian.
    c_star, chi_c, xi_c : float or None
        Correlation fixed point (1 unless the variance is unbounded), C'(c*)
        and -1 / ln C'(c*) (inf on the edge).
    phase : str
        "ordered", "edge of chaos" or "unbounded variance" (maxout has no
        chaotic phase with a finite variance: chi_1 > 1 needs sigma_w2 > 1,
        and then V(q)/q >= sigma_w2 > 1).
    trainable_depth : float or None
        6 xi_c (empirical rule of Schoenholz et al. 2017).
    trainable_depth_rule : str
        That rule in words (a constant).
    depth : int or None
    gradient_growth : float or None
        chi_1^depth.
    depth_ok : bool or None
        Depth against the trainable depth (None without a depth).
    verdict : str
    parameter_factor : int
        k: a maxout layer has k times the parameters of a plain layer.
    notes : tuple of str
    """

    k: int
    sigma_w2: float
    sigma_b2: float
    q_input: float
    moments: MaxMoments
    status: str
    q_star: float | None
    chi_q: float
    growth_rate: float | None
    chi_1: float
    c_star: float | None
    chi_c: float | None
    xi_c: float | None
    phase: str
    trainable_depth: float | None
    trainable_depth_rule: str = field(default=_TRAINABLE_RULE, init=False)
    depth: int | None
    gradient_growth: float | None
    depth_ok: bool | None
    verdict: str
    parameter_factor: int
    notes: tuple[str, ...] = ()


def maxout_propagation(k: int, sigma_w2: float | None = None, sigma_b2: float = 0.0,
                       depth: int | None = None, q_input: float = 1.0,
                       rule: QuadratureRule = DEFAULT_RULE) -> MaxoutPropagation:
    """Signal propagation report for a deep maxout network of rank k.

    Parameters
    ----------
    k : int
        Rank (pieces per unit), 1 <= k <= 1024.
    sigma_w2 : float, optional
        Weight variance times fan-in of every piece; default c_k = 1 / M2(k)
        (Tseran & Montufar 2023).
    sigma_b2 : float
        Bias variance of every piece, >= 0.
    depth : int, optional
        For the gradient growth and the depth verdict.
    q_input : float
        Mean squared input coordinate; the first pieces have variance
        ``sigma_w2 q_input + sigma_b2``.

    Returns
    -------
    MaxoutPropagation
    """
    mom = max_moments(k, rule)
    kk, m2 = mom.k, mom.second_moment
    sw = mom.recommended_sigma_w2 if sigma_w2 is None else check_positive("sigma_w2", sigma_w2)
    sb = check_nonnegative("sigma_b2", sigma_b2)
    qi = check_nonnegative("q_input", q_input)
    if depth is not None:
        depth = check_int("depth", depth, 1)
    slope = sw * m2  # V is linear: V(q) = slope q + sb
    q_start = sw * qi + sb
    notes: list[str] = []
    growth = None
    tol = 1e-12
    if abs(slope - 1.0) <= tol:
        if sb == 0.0:
            status, q_star = "neutral", q_start
            notes.append(f"V(q) = q for every q (sigma_w2 M2 = 1): the variance stays at "
                         f"q = {q_start:.6g}")
        else:
            status, q_star, growth = "unbounded", None, 1.0
            notes.append(f"sigma_w2 M2 = 1 with sigma_b2 = {sb:.6g} > 0: the variance grows "
                         "linearly, by sigma_b2 per layer")
    elif slope < 1.0:
        q_star = sb / (1.0 - slope)
        status = "collapse" if q_star == 0.0 else "fixed_point"
        notes.append(f"V(q) = {slope:.6g} q + {sb:.6g}: the variance flows to q* = {q_star:.6g}"
                     + (f" geometrically (factor {slope:.6g} per layer)" if sb == 0.0 else ""))
    else:
        status, q_star, growth = "unbounded", None, slope
        notes.append(f"V(q)/q -> sigma_w2 M2 = {slope:.6g} > 1: the variance grows without bound")

    chi1 = sw
    if status == "unbounded":
        phase = "unbounded variance"
        c_star = chi_c = xi_c = trainable = None
    else:
        c_star = 1.0
        # C'(1) = sigma_w2 q K'(1) / V(q) with K'(1) = 1; at sigma_b2 = 0 it is 1 / M2 for every q
        chi_c = 1.0 / m2 if sb == 0.0 else sw * q_star / (slope * q_star + sb)
        if abs(chi_c - 1.0) <= EDGE_TOLERANCE:
            phase, xi_c = "edge of chaos", math.inf
        else:
            phase, xi_c = "ordered", depth_scale(chi_c)
        trainable = TRAINABLE_DEPTH_FACTOR * xi_c
    if abs(chi1 - 1.0) > EDGE_TOLERANCE and kk >= 3 and status != "unbounded":
        notes.append(f"for k >= 3 no single sigma_w2 keeps both the forward variance "
                     f"(needs sigma_w2 <= 1/M2 = {1 / m2:.6g}) and the gradient (needs "
                     "sigma_w2 = 1): there is no edge of chaos with a finite variance")
    if kk >= 2:
        notes.append("maxout has no chaotic phase with a finite variance: chi_1 = sigma_w2 > 1 "
                     "forces V(q)/q = sigma_w2 M2 > 1")
    growth_grad = gradient_growth(chi1, depth)
    if depth is None:
        verdict, ok = "no depth given", None
    elif phase == "unbounded variance":
        verdict, ok = (f"{depth} layers: the forward variance grows without bound; lower "
                       "sigma_w2", False)
    elif phase == "edge of chaos":
        verdict, ok = (f"{depth} layers: correlation depth scale infinite (edge of chaos), no "
                       "depth limit from this analysis", True)
    else:
        ok = depth <= trainable
        verdict = (f"{depth} layers {'is within' if ok else 'exceeds'} the predicted trainable "
                   f"depth of about {trainable:.0f} layers (6 xi_c, xi_c = {xi_c:.4g}; empirical "
                   f"rule of Schoenholz et al. 2017); squared gradient norms change by "
                   f"chi_1^L = {growth_grad:.3g}")
    notes.append(f"parameters: a maxout layer of rank {kk} has {kk} times the weights and biases "
                 "of a plain layer of the same shape")
    return MaxoutPropagation(kk, sw, sb, qi, mom, status, q_star, slope, growth, chi1, c_star,
                             chi_c, xi_c, phase, trainable, depth, growth_grad, ok, verdict, kk,
                             tuple(notes))


@dataclass(frozen=True)
class MaxoutLayer(Result):
    """Initialisation and size of one dense maxout layer.

    Attributes
    ----------
    k, fan_in, fan_out : int
    sigma_w2 : float
        Weight variance times fan-in (default c_k = 1 / M2(k)).
    weight_std : float
        sqrt(sigma_w2 / fan_in), the std of every piece's weights.
    n_parameters : int
        k (fan_in fan_out + fan_out): k pieces, each with its weights and biases.
    plain_parameters : int
        fan_in fan_out + fan_out, a plain dense layer of the same shape.
    weight_shape : tuple of int
        (k, fan_out, fan_in).
    """

    k: int
    fan_in: int
    fan_out: int
    sigma_w2: float
    weight_std: float
    n_parameters: int
    plain_parameters: int
    weight_shape: tuple[int, int, int]


def maxout_layer(k: int, fan_in: int, fan_out: int, sigma_w2: float | None = None,
                 rule: QuadratureRule = DEFAULT_RULE) -> MaxoutLayer:
    """Weight scale and parameter count of a dense maxout layer of rank k.

    The recommended weight variance is ``c_k / fan_in`` with
    ``c_k = 1 / E[X_k^2]`` (Tseran & Montufar 2023).

    Parameters
    ----------
    k : int
        The rank: pieces per maxout unit.
    fan_in, fan_out : int
        Inputs and units of the layer, >= 1.
    sigma_w2 : float, optional
        The weight variance times fan_in; default the recommended ``c_k``.
    rule : QuadratureRule

    Returns
    -------
    MaxoutLayer
    """
    mom = max_moments(k, rule)
    fi = check_int("fan_in", fan_in, 1)
    fo = check_int("fan_out", fan_out, 1)
    sw = mom.recommended_sigma_w2 if sigma_w2 is None else check_positive("sigma_w2", sigma_w2)
    plain = fi * fo + fo
    return MaxoutLayer(mom.k, fi, fo, sw, math.sqrt(sw / fi), mom.k * plain, plain,
                       (mom.k, fo, fi))
