"""Gain factors and per-layer initialisation plans.

Orchestration only: every number comes from :mod:`propcalc.maps` and
:mod:`propcalc.criticality`.

Conventions: ``W_ij ~ N(0, sigma_w2 / fan_in)``, ``b_i ~ N(0, sigma_b2)``;
a gain g means ``std = g / sqrt(fan_in)``, i.e. ``sigma_w2 = g^2``.
"""

from __future__ import annotations

import math
import numbers
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy import special

from ..activations.base import Activation
from ..meanfield.criticality import (
    CriticalPoint,
    Propagation,
    edge_of_chaos,
    edge_of_chaos_at_bias,
    edge_of_chaos_line_arrays,
    propagation,
)
from ..errors import (
    ComputationError,
    InvalidParameterError,
    check_int,
    check_nonnegative,
    check_positive,
)
from ..activations import activation
from ..meanfield.maps import derivative_second_moment, second_moment, variance_map_slope
from ..numerics.quadrature import DEFAULT_RULE, QuadratureRule
from ..results import OMIT, Result, inline

__all__ = [
    "COMMON_GAINS",
    "DISTRIBUTIONS",
    "TARGETS",
    "TRUNCATION",
    "ATTRACTION_MARGIN",
    "MAX_DEPTH",
    "Gains",
    "Layer",
    "LayerInit",
    "InitPlan",
    "gains",
    "recommend",
    "truncated_normal_factor",
]

#: Fixed gains found in common practice for a few activations (common practice, no source).
COMMON_GAINS: dict[str, float] = {
    "linear": 1.0,
    "sigmoid": 1.0,
    "tanh": 5.0 / 3.0,
    "relu": math.sqrt(2.0),
}
DISTRIBUTIONS = ("normal", "uniform", "truncated_normal", "orthogonal")
TARGETS = ("auto", "edge", "variance", "bias")
#: truncated normals are cut at +-2 standard deviations (of the untruncated law)
TRUNCATION = 2.0
#: the deepest network a plan is made for (one LayerInit per layer is kept)
MAX_DEPTH = 100_000


def truncated_normal_factor(bound: float = TRUNCATION) -> float:
    """std of N(0, 1) truncated to [-bound, bound]: sqrt(1 - 2 b phi(b) / (2 Phi(b) - 1)).

    (Johnson, Kotz & Balakrishnan 1994, Continuous Univariate Distributions
    vol. 1, eq. 13.134, the variance of a doubly truncated normal.)
    """
    b = float(bound)
    dens = math.exp(-0.5 * b * b) / math.sqrt(2.0 * math.pi)
    mass = 2.0 * float(special.ndtr(b)) - 1.0
    return math.sqrt(1.0 - 2.0 * b * dens / mass)


@dataclass(frozen=True)
class Gains(Result):
    """Forward and backward gains of an activation at unit pre-activation variance.

    Attributes
    ----------
    activation : str
    forward : float
        1 / sqrt(E[phi(z)^2]): keeps the pre-activation second moment at 1
        with zero bias.
    backward : float
        1 / sqrt(E[phi'(z)^2]): keeps the gradient variance (chi_1 = 1 at q = 1).
    common_gain : float or None
        A fixed constant found in common practice (common practice, no source).
    common_gain_sigma_w2 : float or None
        Its square.
    common_gain_chi_1, common_gain_phase : float, str or None
        What the common gain implies with sigma_b2 = 0 (propagation report).
    notes : tuple of str
    """

    activation: str
    forward: float
    backward: float
    common_gain: float | None
    common_gain_sigma_w2: float | None
    common_gain_chi_1: float | None
    common_gain_phase: str | None
    notes: tuple[str, ...] = ()


def _common_gain(act: Activation) -> tuple[float | None, str]:
    if act.name == "leaky_relu":
        a = float(act.params.get("slope", 0.01))
        # He et al. 2015, eq. (10) generalised to a leaky slope a: sigma_w2 = 2 / (1 + a^2)
        return math.sqrt(2.0 / (1.0 + a * a)), "He et al. 2015: sqrt(2 / (1 + slope^2))"
    if act.name in COMMON_GAINS and not act.params and act.formula is None:
        return COMMON_GAINS[act.name], "common practice, no source"
    return None, ""


def _finite_inverse_sqrt(value: float, what: str, act: Activation) -> float:
    if not math.isfinite(value) or value <= 0.0:
        return math.inf if value == 0.0 else 0.0
    return 1.0 / math.sqrt(value)


def gains(act: Activation, rule: QuadratureRule = DEFAULT_RULE) -> Gains:
    """Forward and backward gains, and what a common fixed gain implies.

    Parameters
    ----------
    act : Activation

    Returns
    -------
    Gains

    Notes
    -----
    The forward gain makes q = 1 a fixed point of V with sigma_b2 = 0; the
    backward gain makes chi_1 = 1 at q = 1. They agree only for activations
    with E[phi^2] = E[phi'^2] (ReLU: both sqrt(2); He et al. 2015).
    A jump in phi makes E[phi'^2] infinite: the backward gain is then 0.
    """
    act = activation(act)
    m2 = float(second_moment(act, 1.0, rule))
    d2 = float(derivative_second_moment(act, 1.0, rule))
    forward = _finite_inverse_sqrt(m2, "E[phi^2]", act)
    backward = _finite_inverse_sqrt(d2, "E[phi'^2]", act)
    notes = []
    if math.isinf(forward):
        notes.append("E[phi(z)^2] = 0: no forward gain can restore the variance")
    if backward == 0.0:
        notes.append("phi jumps, so E[phi'(z)^2] is infinite: no gain preserves gradients")
    if math.isinf(backward):
        notes.append("phi' vanishes almost everywhere: no gradient passes at any gain")
    g, source = _common_gain(act)
    c1 = phase = sw = None
    if g is not None:
        sw = g * g
        p = propagation(act, sw, 0.0, rule=rule)
        c1, phase = p.chi_1, p.phase
        notes.append(f"common gain {g:.6g} ({source}) gives sigma_w2 = {sw:.6g}: "
                     f"chi_1 = {c1:.6g}, {phase}")
    return Gains(act.label, forward, backward, g, sw, c1, phase, tuple(notes))


# -------------------------------------------------------------------------------------------
# layers and plans
# -------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Layer(Result):
    """A dense or convolutional layer, described by its shape.

    Attributes
    ----------
    fan_in, fan_out : int
        Inputs and outputs per unit: for a convolution with kernel size k
        (product over spatial dims), ``fan_in = in_channels * k`` and
        ``fan_out = out_channels * k``.
    kind : str
        "dense" or "conv".
    in_features, out_features : int
        Matrix shape: columns and rows of the weight reshaped to 2-D
        (``out_channels`` rows and ``in_channels * k`` columns for a convolution).
    weight_shape : tuple of int
        (out, in) for dense layers; (out_channels, in_channels, *kernel) for
        convolutions (derived from the other fields).
    kernel_size : tuple of int
        () for dense layers.
    """

    fan_in: int
    fan_out: int
    kind: str = "dense"
    in_features: int = field(default=0, metadata=OMIT)
    out_features: int = field(default=0, metadata=OMIT)
    weight_shape: tuple[int, ...] = field(init=False)
    kernel_size: tuple[int, ...] = ()

    def __post_init__(self) -> None:
        # (out, in) for dense layers; (out_channels, in_channels, *kernel) for convolutions
        if self.kind == "dense":
            shape: tuple[int, ...] = (self.out_features, self.in_features)
        else:
            k = int(np.prod(self.kernel_size))
            shape = (self.out_features, self.in_features // k, *self.kernel_size)
        object.__setattr__(self, "weight_shape", shape)

    @classmethod
    def dense(cls, in_features: int, out_features: int) -> "Layer":
        """A dense layer with the given numbers of inputs and outputs."""
        i = check_int("in_features", in_features, 1)
        o = check_int("out_features", out_features, 1)
        return cls(i, o, "dense", i, o, ())

    @classmethod
    def conv(cls, in_channels: int, out_channels: int, kernel_size: int | Sequence[int]) -> "Layer":
        """A convolution; ``kernel_size`` an int or one int per spatial dimension."""
        i = check_int("in_channels", in_channels, 1)
        o = check_int("out_channels", out_channels, 1)
        if isinstance(kernel_size, (str, bytes)):
            raise InvalidParameterError("kernel_size", "a positive int or a list of them", kernel_size)
        if isinstance(kernel_size, numbers.Real):
            ks = (kernel_size,)
        else:
            try:
                ks = tuple(kernel_size)
            except TypeError:
                raise InvalidParameterError("kernel_size", "a positive int or a list of them",
                                            kernel_size) from None
        if not ks:
            raise InvalidParameterError("kernel_size", "a positive int or a non-empty list", kernel_size)
        ks = tuple(check_int("kernel_size", k, 1) for k in ks)
        k = int(np.prod(ks))
        return cls(i * k, o * k, "conv", i * k, o, ks)


@dataclass(frozen=True)
class LayerInit(Result):
    """Initialisation of one layer.

    Attributes
    ----------
    index : int
        1-based layer number.
    layer : Layer or None
        None when only the depth was given (the scales then depend on fan_in
        as ``gain / sqrt(fan_in)``).
    sigma_w2, sigma_b2 : float
    weight_std : float or None
        std of a normal law, sqrt(sigma_w2 / fan_in).
    uniform_bound : float or None
        a in U(-a, a) with the same variance: sqrt(3) std.
    truncated_normal_std : float or None
        std before truncation at +-2 std, so that the truncated law has the
        planned variance: std / 0.8796...
    orthogonal_scale : float or None
        Multiplier of a (semi-)orthogonal matrix of the weight's 2-D shape:
        sqrt(sigma_w2 * max(1, rows / cols)) (rows orthonormal when rows <= cols).
    bias_std : float
        sqrt(sigma_b2).
    gain : float
        sqrt(sigma_w2): the std in units of 1 / sqrt(fan_in).
    value : float or None
        The one number for the chosen distribution.
    """

    index: int
    layer: Layer | None = field(metadata=inline(absent={"kind": None}))
    sigma_w2: float
    sigma_b2: float
    weight_std: float | None
    uniform_bound: float | None
    truncated_normal_std: float | None
    orthogonal_scale: float | None
    bias_std: float
    gain: float
    value: float | None


@dataclass(frozen=True)
class InitPlan(Result):
    """A per-layer initialisation plan with its mean-field justification.

    Attributes
    ----------
    activation : str
    target : str
        What was aimed at: "edge" (edge of chaos at an attracting q*),
        "variance" (variance-preserving, sigma_b2 = 0), "bias" (edge of chaos
        at a user-fixed sigma_b2).
    target_description : str
    distribution : str
    sigma_w2, sigma_b2, q_star : float
    depth : int
    layers : tuple of LayerInit
    propagation : Propagation
        The report at the planned (sigma_w2, sigma_b2) for this depth.
    trainable_depth : float or None
    verdict : str
        The requested depth against the predicted depth limit, in words.
    depth_ok : bool
    notes : tuple of str
    """

    activation: str
    target: str
    target_description: str
    distribution: str
    sigma_w2: float
    sigma_b2: float
    q_star: float | None
    depth: int
    layers: tuple[LayerInit, ...]
    propagation: Propagation = field(repr=False)
    trainable_depth: float | None
    verdict: str
    depth_ok: bool
    notes: tuple[str, ...] = ()

    def draw(self, seed: Any = None, *, bias_distribution: str = "normal",
             layers: Any = None) -> Any:
        """Draw weight and bias arrays for this plan (see :func:`propcalc.draw.draw_plan`)."""
        from .draw import draw_plan  # local import keeps the imports one-way

        return draw_plan(self, seed, bias_distribution=bias_distribution, layers=layers)


def _layer_init(index: int, layer: Layer | None, sw: float, sb: float, distribution: str) -> LayerInit:
    bias_std = math.sqrt(sb)
    gain = math.sqrt(sw)
    if layer is None:
        return LayerInit(index, None, sw, sb, None, None, None, None, bias_std, gain, None)
    std = math.sqrt(sw / layer.fan_in)
    rows, cols = layer.out_features, layer.in_features
    values = {
        "normal": std,
        "uniform": math.sqrt(3.0) * std,
        "truncated_normal": std / truncated_normal_factor(),
        "orthogonal": math.sqrt(sw * max(1.0, rows / cols)),
    }
    return LayerInit(index, layer, sw, sb, values["normal"], values["uniform"],
                     values["truncated_normal"], values["orthogonal"], bias_std, gain,
                     values[distribution])


#: chi_q at most this at the preferred q* counts as attracting enough (xi_q <= about 20 layers)
ATTRACTION_MARGIN = 0.95


def _pick_stable_edge(act: Activation, q_star: float | None,
                      rule: QuadratureRule) -> tuple[CriticalPoint | None, list[str]]:
    """The edge-of-chaos point to plan at.

    The preferred q* (1, or the user's) if its fixed point attracts with
    chi_q <= ATTRACTION_MARGIN (or is neutral, as for ReLU); otherwise the
    point of the line (q* in [1e-3, 1e3]) closest to it in log q* that
    attracts that well; failing that, the most strongly attracting point.
    """
    notes: list[str] = []
    target = 1.0 if q_star is None else q_star
    first = edge_of_chaos(act, target, rule)
    if first.valid and first.chi_q is not None and (
            abs(first.chi_q) <= ATTRACTION_MARGIN or abs(first.chi_q - 1.0) <= 1e-9):
        return first, notes
    notes.append(f"q* = {target:g} is not usable: {first.message}" if not first.stable
                 else f"q* = {target:g} attracts only weakly (chi_q = {first.chi_q:.4g})")
    grid = np.geomspace(1e-3, 1e3, 121)
    sw_line, sb_line = edge_of_chaos_line_arrays(act, grid, rule)
    ok = np.isfinite(sw_line) & (sw_line > 0) & (sb_line >= 0)
    slopes = np.full(grid.shape, np.inf)
    if np.any(ok):
        slopes[ok] = [float(variance_map_slope(act, q, w, rule))
                      for q, w in zip(grid[ok], sw_line[ok])]
    attracting = ok & (np.abs(slopes) < 1 - 1e-9)
    if not np.any(attracting):
        if first.valid and first.stable:
            return first, notes
        notes.append("no point of the edge-of-chaos line with q* in [1e-3, 1e3] attracts")
        return None, notes
    strong = attracting & (np.abs(slopes) <= ATTRACTION_MARGIN)
    if np.any(strong):  # attracting enough: the one closest to the preferred q*
        k = int(np.argmin(np.where(strong, np.abs(np.log(grid / target)), np.inf)))
        how = f"the point closest to q* = {target:g} with chi_q <= {ATTRACTION_MARGIN:g}"
    else:
        k = int(np.argmin(np.where(attracting, np.abs(slopes), np.inf)))
        how = "its most strongly attracting point"
    best = edge_of_chaos(act, float(grid[k]), rule)
    notes.append(f"moved along the edge of chaos to q* = {best.q_star:.4g}, {how} "
                 f"(chi_q = {best.chi_q:.4g}, so the variance settles over about "
                 f"xi_q = {-1.0 / math.log(abs(best.chi_q)):.3g} layers; sigma_b2 = {best.sigma_b2:.4g})")
    return best, notes


def _verdict(p: Propagation, depth: int) -> tuple[str, bool]:
    if p.phase == "unbounded variance":
        return (f"{depth} layers: the forward signal explodes (variance grows by about "
                f"{p.variance_fixed_points.growth_rate:.4g} per layer); not trainable as planned",
                False)
    if p.phase == "edge of chaos":
        extra = f"; {p.edge_approach}" if p.edge_approach else ""
        return (f"{depth} layers: at the edge of chaos the correlation depth scale is infinite, "
                "so this analysis sets no depth limit (gradients neither grow nor shrink "
                f"on average, chi_1 = 1){extra}", True)
    limit = p.trainable_depth if p.trainable_depth is not None else 0.0
    kind = ("gradients vanish (ordered phase)" if p.phase == "ordered"
            else "gradients explode and nearby inputs decorrelate (chaotic phase)")
    growth = p.gradient_growth
    if depth <= limit:
        return (f"{depth} layers is within the predicted trainable depth of about "
                f"{limit:.0f} layers (6 xi_c, xi_c = {p.xi_c:.4g}; empirical rule of "
                "Schoenholz et al. 2017)", True)
    return (f"{depth} layers exceeds the predicted trainable depth of about {limit:.0f} "
            f"layers (6 xi_c, xi_c = {p.xi_c:.4g}; empirical rule of Schoenholz et al. 2017): "
            f"{kind}, squared gradient norms change by chi_1^L = {growth:.3g}; move closer "
            "to the edge of chaos", False)


def recommend(act: Activation, depth: int | None = None, *, widths: Sequence[int] | None = None,
              layers: Sequence[Layer] | None = None, distribution: str = "normal",
              target: str = "auto", sigma_b2: float | None = None, q_star: float | None = None,
              q_input: float = 1.0, rule: QuadratureRule = DEFAULT_RULE) -> InitPlan:
    """Recommend weight and bias scales for every layer of a deep network.

    Parameters
    ----------
    act : Activation
    depth : int, optional
        Number of weight layers; implied by ``widths`` or ``layers`` if given.
    widths : sequence of int, optional
        ``[d_0, d_1, ..., d_L]``: a dense network with these widths.
    layers : sequence of Layer, optional
        Explicit dense or convolutional layers (instead of widths).
    distribution : str
        "normal", "uniform", "truncated_normal" (cut at +-2 std) or "orthogonal".
    target : str
        "edge" (edge of chaos at an attracting q*; q_star picks the point),
        "variance" (sigma_b2 = 0 and q* = 1 a fixed point: the forward gain),
        "bias" (edge of chaos at the given sigma_b2), or "auto" ("bias" if
        sigma_b2 is given, else "edge", falling back to "variance").
    sigma_b2 : float, optional
        Fixes the bias variance (target "bias").
    q_star : float, optional
        Preferred variance fixed point on the edge of chaos.
    q_input : float
        Mean squared input coordinate; the first layer's sigma_w2 is chosen
        so that its pre-activations already have variance q*.

    Returns
    -------
    InitPlan

    Raises
    ------
    InvalidParameterError
        For an unknown distribution or target, or inconsistent sizes.
    ComputationError
        When no initialisation meets the target.
    """
    if distribution not in DISTRIBUTIONS:
        raise InvalidParameterError("distribution", f"one of {', '.join(DISTRIBUTIONS)}", distribution)
    if target not in TARGETS:
        raise InvalidParameterError("target", f"one of {', '.join(TARGETS)}", target)
    if widths is not None and layers is not None:
        raise InvalidParameterError("widths", "absent when layers are given", list(widths))
    plan_layers: list[Layer | None]
    act = activation(act)
    if isinstance(widths, (str, bytes)):
        raise InvalidParameterError("widths", "a list of integers", widths)
    if widths is not None:
        ws = [check_int(f"widths[{i}]", w, 1) for i, w in enumerate(widths)]
        if len(ws) < 2:
            raise InvalidParameterError("widths", "a list of at least 2 sizes", list(widths))
        plan_layers = [Layer.dense(a, b) for a, b in zip(ws[:-1], ws[1:])]
    elif layers is not None:
        plan_layers = list(layers)
        if not plan_layers:
            raise InvalidParameterError("layers", "a non-empty list", [])
        for i, layer in enumerate(plan_layers):
            if not isinstance(layer, Layer):
                raise InvalidParameterError(f"layers[{i}]", "a Layer", layer)
    else:
        if depth is None:
            raise InvalidParameterError("depth", "given when neither widths nor layers are", None)
        plan_layers = [None] * check_int("depth", depth, 1, MAX_DEPTH)
    n = len(plan_layers)
    if n > MAX_DEPTH:
        raise InvalidParameterError("layers", f"at most {MAX_DEPTH} layers", n)
    if depth is not None and check_int("depth", depth, 1, MAX_DEPTH) != n:
        raise InvalidParameterError("depth", f"equal to the number of layers ({n})", depth)
    if q_star is not None:
        q_star = check_positive("q_star", q_star)
    qi = check_positive("q_input", q_input)

    notes: list[str] = []
    chosen = "bias" if (target == "auto" and sigma_b2 is not None) else target
    cp: CriticalPoint | None = None
    if chosen == "bias":
        if sigma_b2 is None:
            raise InvalidParameterError("sigma_b2", "given for target 'bias'", None)
        sb_fixed = check_nonnegative("sigma_b2", sigma_b2)
        points = [p for p in edge_of_chaos_at_bias(act, sb_fixed, rule) if p.sigma_w2 is not None]
        if not points:
            raise ComputationError(f"no edge-of-chaos point of {act.label} has sigma_b2 = "
                                   f"{sb_fixed:g}; try another sigma_b2, or target 'variance'")
        usable = [p for p in points if p.stable or p.q_star == 0.0
                  or abs((p.chi_q or 0) - 1) <= 1e-9]
        if not usable:
            notes.append("every critical point with this sigma_b2 repels (chi_q > 1): a finite "
                         "network drifts off it; consider a larger sigma_b2")
            usable = points
        cp = min(usable, key=lambda p: abs(math.log(max(p.q_star, 1e-300))))
        description = f"edge of chaos with sigma_b2 fixed at {sb_fixed:g}"
    elif chosen in ("edge", "auto"):
        if sigma_b2 is not None:
            raise InvalidParameterError("sigma_b2", "absent for target 'edge' (use target 'bias')",
                                        sigma_b2)
        cp, more = _pick_stable_edge(act, q_star, rule)
        notes += more
        if cp is None and chosen == "edge":
            raise ComputationError(f"{act.label} has no attracting point on the edge of chaos "
                                   "for q* in [1e-3, 1e3]; try target 'variance'")
        description = "edge of chaos at an attracting variance fixed point"
        chosen = "variance" if cp is None else "edge"
    if chosen == "variance":
        m2 = float(second_moment(act, 1.0, rule))
        if m2 <= 0:
            raise ComputationError(f"E[{act.label}(z)^2] = 0: no weight scale preserves variance")
        sw, sb, q_target = 1.0 / m2, 0.0, 1.0
        description = "variance-preserving (sigma_b2 = 0, q* = 1 a fixed point)"
    else:
        assert cp is not None and cp.sigma_w2 is not None and cp.sigma_b2 is not None
        sw, sb, q_target = cp.sigma_w2, cp.sigma_b2, cp.q_star
    # the first layer starts the pre-activations at q* (see below), so report from there
    q_in_eff = (q_target - sb) / sw if q_target > sb else qi
    p = propagation(act, sw, sb, depth=n, q_input=q_in_eff, rule=rule)
    verdict, ok = _verdict(p, n)
    reached = p.variance_fixed_points.reached
    if (p.status == "fixed_point" and reached is not None and not reached.stable
            and abs(reached.chi_q - 1.0) > 1e-9):
        verdict += (f"; but q* = {reached.q:.4g} does not attract (chi_q = {reached.chi_q:.4g}), "
                    "so a finite network drifts away from the planned point")
        ok = False
    # first layer: its inputs are data, not activations; pick sigma_w2 so that q_1 = q*
    first_sw = (q_target - sb) / qi if q_target > sb else sw
    if q_target > sb and abs(first_sw - sw) > 1e-12 * sw:
        notes.append(f"layer 1 uses sigma_w2 = {first_sw:.6g} (not {sw:.6g}) so that its "
                     f"pre-activations start at q* = {q_target:.6g} for inputs of mean square "
                     f"{qi:g}")
    elif q_target <= sb:
        first_sw = sw
    inits = tuple(_layer_init(i + 1, layer, first_sw if i == 0 else sw, sb, distribution)
                  for i, layer in enumerate(plan_layers))
    return InitPlan(act.label, chosen, description, distribution, sw, sb, p.q_star, n, inits, p,
                    p.trainable_depth, verdict, ok, tuple(notes + list(p.notes)))
