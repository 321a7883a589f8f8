"""The planner: :func:`recommend` picks (sigma_w2, sigma_b2) for a target and plans every layer.

Orchestration only: every number comes from :mod:`propcalc.meanfield.maps` and
:mod:`propcalc.meanfield.edge`; the per-layer scales from
:func:`propcalc.init.layers.layer_init`.

Conventions: ``W_ij ~ N(0, sigma_w2 / fan_in)``, ``b_i ~ N(0, sigma_b2)``;
a gain g means ``std = g / sqrt(fan_in)``, i.e. ``sigma_w2 = g^2``.
"""

from __future__ import annotations

import dataclasses
import itertools
import math
from collections.abc import Sequence
from typing import Any

import numpy as np

from .. import domains
from ..activations.base import Activation
from ..activations.resolver import resolve
from ..errors import (
    ComputationError,
    InvalidParameterError,
    check_int,
    check_nonnegative,
    check_positive,
)
from ..meanfield.edge import (
    CriticalPoint,
    edge_of_chaos,
    edge_of_chaos_at_bias,
    edge_of_chaos_line_arrays,
)
from ..meanfield.maps import second_moment, variance_map_slope
from ..meanfield.report import propagation
from ..numerics.quadrature import DEFAULT_RULE, QuadratureRule
from ..training.finite_width import ORTHOGONAL_WHY
from ..training.verdict import trainability
from ..vocabulary import NEUTRAL_TOLERANCE
from .layers import DISTRIBUTIONS, Layer, layer_init
from .plan import MAX_DEPTH, TARGETS, InitPlan
from .training_plan import plan_for_loss, refuse_without_loss

__all__ = ["ATTRACTION_MARGIN", "recommend"]


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
            abs(first.chi_q) <= ATTRACTION_MARGIN or abs(first.chi_q - 1.0) <= NEUTRAL_TOLERANCE):
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
    attracting = ok & (np.abs(slopes) < 1 - NEUTRAL_TOLERANCE)
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


def _with_verdict(plan: InitPlan, act: Activation, plan_layers: Sequence[Layer | None],
                  rule: QuadratureRule) -> InitPlan:
    """The plan with its full verdict: widths, learning rate and readout when the plan has them."""
    dense = all(layer is not None and layer.kind == "dense" for layer in plan_layers)
    orthogonal = plan.distribution == "orthogonal"
    widths = ([layer.fan_out for layer in plan_layers]  # type: ignore[union-attr]
              if dense and not orthogonal else None)
    missing = ("no widths given (recommend(..., widths=...))" if plan_layers[0] is None
               else "convolutional layers: units within a channel are not independent"
               if not dense else ORTHOGONAL_WHY)
    loss = getattr(plan, "loss", None)
    logit_variance = None
    if loss is not None and plan.q_star is not None:
        last = plan.layers[-1]
        penultimate = (float(second_moment(act, plan.q_star, rule)) if plan.depth > 1
                       else plan.propagation.q_input)
        logit_variance = last.sigma_w2 * penultimate + last.sigma_b2
    verdict = trainability(act, plan.propagation, plan.depth, widths=widths,
                           widths_missing=None if widths is not None else missing,
                           learning_rate=getattr(plan, "learning_rate_details", None),
                           loss=loss, n_classes=getattr(plan, "n_classes", None),
                           logit_variance=logit_variance, rule=rule)
    # depth_ok: the correlation-depth reason (always the first; it reads only the propagation
    # and the depth, so the verdict is built once, here)
    return dataclasses.replace(plan, verdict=verdict, depth_ok=bool(verdict.reasons[0].passes))


def recommend(act: Activation | str, depth: int | None = None, *,
              widths: Sequence[int] | None = None, layers: Sequence[Layer] | None = None,
              distribution: str = "normal", target: str = "auto",
              sigma_b2: float | None = None, q_star: float | None = None,
              q_input: float = 1.0, loss: str | None = None, n_classes: int | None = None,
              batch_size: int | None = None, momentum: float = 0.0,
              input_correlation: float | Sequence[float] | None = None, inputs: Any = None,
              scale_output: bool = True, rule: QuadratureRule = DEFAULT_RULE) -> InitPlan:
    """Recommend weight and bias scales for every layer of a deep network.

    Parameters
    ----------
    act : str or Activation
        A built-in name, a formula in x, or an Activation (resolved once here).
    depth : int, optional
        Number of weight layers; implied by ``widths`` or ``layers`` if given.
    widths : sequence of int, optional
        ``[d_0, d_1, ..., d_L]``: a dense network with these widths.
    layers : sequence of Layer, optional
        Explicit dense or convolutional layers (instead of widths), taken as given: the
        layers of a real module need not chain (projections, grouped convolutions); check
        a plain stack with :meth:`Layer.chain` (the CLI and the service do).
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
    loss : str, optional
        "cross_entropy" (softmax, torch's CrossEntropyLoss) or "mse" (torch's MSELoss): the plan
        then scales the last layer for the loss (unless ``scale_output`` is False) and carries
        ``learning_rate_ceiling`` and ``learning_rate`` for gradient descent / SGD
        (:mod:`propcalc.init.training_plan`). Needs the widths (``widths`` or dense ``layers``).
    n_classes : int, optional
        K, the number of outputs (required for cross-entropy); must equal the last width.
    batch_size : int, optional
        B, the inputs per step (required with a loss).
    momentum : float
        Heavy-ball momentum of the optimiser, in [0, 1) (the ceiling is 2 (1 + momentum) /
        lambda_max).
    input_correlation : float or sequence of float, optional
        The inputs' pairwise correlation (default 0), or samples of its distribution.
    inputs : array of shape (N, widths[0]), optional
        A batch of real inputs (N >= batch_size): the curvature then uses their exact kernel matrix
        (and their mean square coordinate instead of ``q_input``).
    scale_output : bool
        With a loss, scale the last layer for it (default True); False keeps the hidden scale.

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
    act = resolve(act)
    if isinstance(widths, (str, bytes)):
        raise InvalidParameterError("widths", "a list of integers", widths)
    if widths is not None:
        ws = [check_int(f"widths[{i}]", w, 1) for i, w in enumerate(widths)]
        if len(ws) < 2:
            raise InvalidParameterError("widths", "a list of at least 2 sizes", list(widths))
        plan_layers = [Layer.dense(a, b) for a, b in itertools.pairwise(ws)]
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
    if inputs is not None and loss is not None:
        # the batch's own mean square coordinate replaces q_input (the first layer uses it)
        x = np.asarray(inputs, dtype=float)
        if x.ndim != 2 or x.size == 0 or not np.all(np.isfinite(x)):
            raise InvalidParameterError("inputs", "a finite 2-D array, one input per row",
                                        f"an array of shape {x.shape}")
        qi = check_positive("inputs (their mean square coordinate)", float(np.mean(x * x)))

    notes: list[str] = []
    chosen = "bias" if (target == "auto" and sigma_b2 is not None) else target
    # every option takes effect or is refused (issue 12 section 2): none is dropped silently
    if chosen == "variance" and sigma_b2 is not None:
        raise InvalidParameterError("sigma_b2", "absent for target 'variance' (that target plans "
                                    "sigma_b2 = 0; use target 'bias' to fix sigma_b2)", sigma_b2)
    if chosen in ("variance", "bias") and q_star is not None:
        why = ("plans q* = 1" if chosen == "variance"
               else "takes q* from the sigma_b2 given")
        raise InvalidParameterError("q_star", f"absent for target '{chosen}' (that target {why}; "
                                    "use target 'edge' to choose q*)", q_star)
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
                  or abs((p.chi_q or 0) - 1) <= NEUTRAL_TOLERANCE]
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
    verdict, ok = None, False  # the verdict and depth_ok are filled in by _with_verdict below
    # first layer: its inputs are data, not activations; pick sigma_w2 so that q_1 = q*
    first_sw = (q_target - sb) / qi if q_target > sb else sw
    if q_target > sb and abs(first_sw - sw) > 1e-12 * sw:
        notes.append(f"layer 1 uses sigma_w2 = {first_sw:.6g} (not {sw:.6g}) so that its "
                     f"pre-activations start at q* = {q_target:.6g} for inputs of mean square "
                     f"{qi:g}")
    elif q_target <= sb:
        first_sw = sw
    domains.check_planned("sigma_w2", first_sw, "layer 1",
                          f"the inputs have mean square q_input = {qi:.3g} and the first layer's "
                          f"output should start at q* = {q_target:.4g}")
    inits = tuple(layer_init(i + 1, layer, first_sw if i == 0 else sw, sb, distribution)
                  for i, layer in enumerate(plan_layers))
    if loss is None:
        refuse_without_loss(momentum, n_classes=n_classes, batch_size=batch_size,
                            inputs=inputs, input_correlation=input_correlation)
        if scale_output is not True:
            raise InvalidParameterError("scale_output", "True when no loss is given (give loss=)",
                                        scale_output)
        return _with_verdict(InitPlan(act.label, chosen, description, distribution, sw, sb,
                                      p.q_star, n, inits, p, p.trainable_depth, verdict, ok,
                                      tuple(notes + list(p.notes))), act, plan_layers, rule)
    lp = plan_for_loss(act, plan_layers, ws if widths is not None else None,
                       [i.sigma_w2 for i in inits], [i.sigma_b2 for i in inits], qi, loss=loss,
                       n_classes=n_classes, batch_size=batch_size, momentum=momentum,
                       input_correlation=input_correlation, inputs=inputs,
                       scale_output=scale_output, rule=rule)
    inits = inits[:-1] + (layer_init(n, plan_layers[-1], lp.last_sigma_w2, lp.last_sigma_b2,
                                     distribution),)
    return _with_verdict(InitPlan(act.label, chosen, description, distribution, sw, sb, p.q_star,
                                  n, inits, p, p.trainable_depth, verdict, ok,
                                  tuple(notes + list(p.notes) + list(lp.notes)), loss,
                                  lp.ceiling.n_classes, lp.ceiling.batch_size,
                                  lp.ceiling.learning_rate_ceiling, lp.ceiling.learning_rate,
                                  lp.ceiling, lp.output_layer, lp.output_scale),
                         act, plan_layers, rule)
