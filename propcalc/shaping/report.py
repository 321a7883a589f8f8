"""What a shaped activation is compared with: its per-layer maps, the edge of chaos of the
base activation, the residual ReLU network with the same map, and the depth verdict."""

from __future__ import annotations

import math

import numpy as np

from ..activations.base import Activation
from ..activations.formula import formula_activation
from ..errors import PropcalcError
from ..meanfield.edge import edge_of_chaos, edge_of_chaos_at_bias
from ..meanfield.report import Propagation
from ..meanfield.maps import (chi_1, correlation_map, variance_map, variance_map_slope)
from ..numerics.quadrature import gaussian_expectation
from .leaky import K_RELU, UnreachableTargetError, leaky_trajectory, solve_coefficient
from .network_map import compose_correlation_map, network_slope_at_one
from .results import DepthVerdict, EdgeReference, LayerMap, ResidualEquivalent
from .transform import base_formula

__all__ = ["layer_map", "curvature_at_one", "edge_reference", "residual_equivalent",
           "depth_verdict", "variance_map_deviation"]


def curvature_at_one(base: Activation, alpha: float, beta: float, gamma: float) -> float | None:
    """C''(1) = gamma^2 alpha^4 E[phi''(alpha z + beta)^2] of the shaped map at q = 1.

    Price's theorem twice: ``C''(c) = E[phi_hat''(u1) phi_hat''(u2)]``, at c = 1 the
    mean square of phi_hat''. phi'' is the exact symbolic derivative of the base's
    derivative formula (the formula compiler differentiates twice). A jump of phi'
    (a kink of phi) puts a Dirac mass in phi'': the curvature is infinite. None
    when the base has no formula text.
    """
    text = base_formula(base)
    if text is None:
        return None
    try:
        first = formula_activation(text)
        if first.derivative_formula is None:
            return None
        second = formula_activation(first.derivative_formula)
    except PropcalcError:
        return None
    if second.has_jumps:
        return math.inf
    mean_square = float(gaussian_expectation(lambda x: second.derivative(x) ** 2, alpha * alpha,
                                             second.breakpoints, mean=beta))
    return gamma * gamma * alpha ** 4 * mean_square


def layer_map(act: Activation, curvature: float | None) -> LayerMap:
    """Q(1), Q'(1), C(0), C'(1) with propcalc's maps at sigma_w2 = 1, sigma_b2 = 0, q = 1."""
    return LayerMap(
        variance=float(variance_map(act, 1.0, 1.0, 0.0)),
        variance_slope=float(variance_map_slope(act, 1.0, 1.0)),
        correlation_at_0=float(correlation_map(act, 0.0, 1.0, 0.0, 1.0)),
        slope_at_1=float(chi_1(act, 1.0, 1.0)),
        curvature_at_1=curvature,
    )


def variance_map_deviation(act: Activation) -> float:
    """max |Q(q) - q| for q in [1/2, 2] (17 points, geometric), sigma_w2 = 1, sigma_b2 = 0."""
    qs = np.geomspace(0.5, 2.0, 17)
    return float(np.max(np.abs(variance_map(act, qs, 1.0, 0.0) - qs)))


def edge_reference(base: Activation, depth: int, leaky_k: float | None = None
                   ) -> tuple[EdgeReference | None, str]:
    """The base at its edge of chaos with q* = 1 (or sigma_b2 = 0), its network map.

    ``leaky_k``: for ReLU and leaky ReLU, whose normalised map at the edge is the
    closed form of :mod:`.leaky` with this coefficient, the trajectory comes from it.
    Returns the reference (None when the base has no edge of chaos) and a note.
    """
    point = edge_of_chaos(base, 1.0)
    if not point.valid:
        others = [p for p in edge_of_chaos_at_bias(base, 0.0) if p.valid and p.q_star > 0]
        if not others:
            return None, (f"{base.label} has no edge of chaos at q* = 1 or at sigma_b2 = 0: "
                          "no unshaped network to compare with")
        point = others[0]
    sw, sb, q = float(point.sigma_w2), float(point.sigma_b2), float(point.q_star)
    sb = 0.0 if abs(sb) <= 1e-12 * q else sb  # the rounding of q* - sigma_w2 E[phi^2]
    cs = (leaky_trajectory(leaky_k, depth) if leaky_k is not None
          else compose_correlation_map(base, 0.0, depth, sw, sb, q, trajectory=True))
    ref = EdgeReference(activation=base.label, sigma_w2=sw, sigma_b2=sb, q_star=q,
                        network_map_at_0=float(cs[-1]),
                        network_slope_at_1=network_slope_at_one(base, depth, sw, q),
                        correlations=tuple(float(c) for c in cs))
    return ref, (f"before shaping: {base.label} at its edge of chaos (sigma_w2 = {sw:.6g}, "
                 f"sigma_b2 = {sb:.6g}, q* = {q:.6g}) takes two inputs at c = 0 to "
                 f"C_L(0) = {ref.network_map_at_0:.6g} over {depth} layers")


def residual_equivalent(depth: int, target: float, identical: bool
                        ) -> tuple[ResidualEquivalent | None, str]:
    """The residual ReLU network whose C_L(0) equals the target (see :mod:`.leaky`).

    The branch weight solves the same monotone equation as the leaky slope, with
    ``k = branch_weight^2 / pi`` (K_RELU when the branch is the whole block).
    """
    try:
        k = solve_coefficient(depth, target, K_RELU, family="a residual ReLU network")
    except UnreachableTargetError as exc:
        return None, f"no residual ReLU network of {depth} blocks reaches it: {exc}"
    b2 = min(1.0, math.pi * k)
    branch = math.sqrt(b2)
    shortcut = math.sqrt(max(0.0, 1.0 - b2))
    if shortcut == 0.0:
        return None, ("the residual equivalent has no shortcut at this depth: it is the plain "
                      "ReLU network at its edge of chaos")
    weight = branch / shortcut
    block = {"residual": {"branch": [{"activation": "relu"},
                                     {"dense": {"sigma_w2": 2.0, "sigma_b2": 0.0}}],
                          "weight": weight}}
    description = {"blocks": [{"repeat": {"times": depth, "blocks": [block]}}]}
    reached = float(leaky_trajectory(k, depth)[-1])
    return ResidualEquivalent(
        shortcut_weight=shortcut, branch_weight=branch, weight=weight,
        per_block="identical" if identical else "network only",
        network_map_at_0=reached, description=description), (
        f"residual equivalent: x <- x + {weight:.6g} W relu(x) (W of variance 2 / fan_in), "
        f"{depth} blocks, reaches C_L(0) = {reached:.6g}")


def depth_verdict(prop: Propagation, depth: int, target_text: str,
                  reference: EdgeReference | None) -> DepthVerdict:
    """The propagation report of the shaped activation, read at its depth."""
    trainable = prop.trainable_depth
    within = prop.phase == "edge of chaos" or (trainable is not None and depth <= trainable)
    parts = [f"{prop.phase} at q* = 1 (chi_1 = {prop.chi_1:.6g})"]
    if prop.phase == "edge of chaos":
        parts.append(f"the squared gradient keeps its scale over {depth} layers")
    elif trainable is not None and math.isfinite(trainable):
        parts.append(f"trainable depth about {trainable:.4g} layers (6 xi_c, the empirical rule "
                     f"of Schoenholz et al. 2017): depth {depth} is "
                     f"{'inside' if within else 'beyond'} it")
    if prop.gradient_growth is not None and prop.phase != "edge of chaos":
        parts.append(f"the squared gradient grows by {prop.gradient_growth:.4g} over the depth")
    parts.append(target_text)
    if reference is not None:
        parts.append(f"unshaped at its edge of chaos: C_L(0) = {reference.network_map_at_0:.6g}")
    return DepthVerdict(depth=depth, phase=prop.phase, chi_1=prop.chi_1, xi_c=prop.xi_c,
                        trainable_depth=trainable, gradient_growth=prop.gradient_growth,
                        within=within, text="; ".join(parts))
