"""``shape_activation``: an activation transformed so a deep plain network keeps its kernel.

Two published methods, both used with sigma_w2 = 1, sigma_b2 = 0 (Gaussian
weights of variance 1 / fan_in, or scaled orthogonal matrices) and inputs at
unit mean square pre-activation (q = 1):

* ``method="tat"``, the tailored activation transformation (Zhang et al.
  2022): the per-layer map keeps the variance (Q(1) = 1, Q'(1) = 1) and has
  slope C'(1) = 1, and the whole network takes two orthogonal inputs to the
  target correlation ``C_L(0) = eta``. For ReLU and leaky ReLU the slope form
  ``sqrt(2 / (1 + a^2)) leaky_relu_a`` in closed form (:mod:`.leaky`); for any
  other activation ``gamma (phi(alpha x + beta) + delta)`` (:mod:`.affine`).
* ``method="dks"``, deep kernel shaping (Martens et al. 2021): Q(1) = 1,
  Q'(1) = 1, C(0) = 0 and ``C'(1) = zeta^(1/L)``, so the whole network's slope is
  ``C_L'(1) = zeta``.

Every condition is checked on the finished activation with propcalc's own
maps; a root that misses one by more than :data:`CONDITION_TOLERANCE` is not
reported. When several roots qualify, the one whose variance map stays
closest to the identity for q in [1/2, 2] is chosen (:data:`CHOICE_RULE`); the
others are listed.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from ..activations.base import Activation
from ..activations.resolver import resolve
from ..errors import InvalidParameterError, check_finite, check_int
from ..meanfield.report import propagation
from ..meanfield.maps import chi_1, correlation_map, variance_map, variance_map_slope
from .affine import ALPHA_RANGE, BETA_HALF_WIDTH, Candidate, ShapingSystem, find_candidates
from .leaky import (K_ABS, K_RELU, leaky_coefficient, leaky_trajectory,
                    network_value, slope_from_coefficient, solve_coefficient)
from .network_map import compose_correlation_map, network_slope_at_one
from .report import (curvature_at_one, depth_verdict, edge_reference, layer_map,
                     residual_equivalent, variance_map_deviation)
from .results import Condition, ShapedActivation, ShapingError, ShapingRoot
from .transform import affine_activation, is_registry_builtin, leaky_form_activation

__all__ = ["METHODS", "DEFAULT_TARGETS", "MAX_DEPTH", "CONDITION_TOLERANCE", "CHOICE_RULE",
           "WEIGHTS", "shape_activation"]

#: The methods and the quantity each target sets.
METHODS = {"tat": "C_L(0)", "dks": "C_L'(1)"}
#: Targets when none is given: eta = 0.9 (Zhang et al. 2022, from memory) and
#: zeta = 1.5 (Martens et al. 2021, from memory).
DEFAULT_TARGETS = {"tat": 0.9, "dks": 1.5}
#: The deepest network shaped (the composed map costs one series sum per layer).
MAX_DEPTH = 10_000
#: Largest zeta accepted for deep kernel shaping.
MAX_ZETA = 1e6
#: A root is reported when every condition holds to this, checked with propcalc's maps.
CONDITION_TOLERANCE = 1e-10
CHOICE_RULE = ("among the roots, the one whose variance map stays closest to the identity "
               "for q in [1/2, 2] (smallest max |Q(q) - q|): every root has the same maps at "
               "q = 1, they differ in how they treat inputs whose norm is off; ties go to "
               "beta > 0")
WEIGHTS = ("sigma_w2 = 1 and sigma_b2 = 0: weights of variance 1 / fan_in (Gaussian) or a "
           "scaled orthogonal matrix, no bias; inputs scaled so the first layer's "
           "pre-activations have mean square 1 (each input vector of squared norm fan_in)")


def _check(method: Any, depth: Any, target: Any, allow_negative_slope: Any
           ) -> tuple[str, int, float]:
    if not isinstance(method, str) or method not in METHODS:
        raise InvalidParameterError("method", "one of 'tat', 'dks'", method)
    n = check_int("depth", depth, 1, MAX_DEPTH)
    if not isinstance(allow_negative_slope, bool):
        raise InvalidParameterError("allow_negative_slope", "true or false", allow_negative_slope)
    value = DEFAULT_TARGETS[method] if target is None else check_finite("target", target)
    if method == "tat" and not 0.0 < value < 1.0:
        raise InvalidParameterError("target", "in (0, 1) for method 'tat' (the network's C_L(0))",
                                    target)
    if method == "dks" and not 1.0 < value <= MAX_ZETA:
        raise InvalidParameterError("target", f"in (1, {MAX_ZETA:g}] for method 'dks' (the "
                                    "network's C_L'(1); a map with C(0) = 0 and C'(1) <= 1 is "
                                    "linear)", target)
    return method, n, value


def _slope_form_base(act: Activation) -> bool:
    return act.name in ("relu", "leaky_relu") and is_registry_builtin(act)


def shape_activation(act: str | Activation, depth: int, target: float | None = None,
                     method: str = "tat", *, allow_negative_slope: bool = False
                     ) -> ShapedActivation:
    """Transform an activation so a plain network of ``depth`` layers keeps a usable kernel.

    Parameters
    ----------
    act : str or Activation
        A built-in name, a typed formula, or an Activation.
    depth : int
        L, the number of layers, 1 to :data:`MAX_DEPTH`.
    target : float, optional
        ``"tat"``: eta = C_L(0) in (0, 1), the correlation two orthogonal inputs
        reach at the output (default 0.9). ``"dks"``: zeta = C_L'(1) > 1, the
        whole network's slope at c = 1 (default 1.5).
    method : {"tat", "dks"}
    allow_negative_slope : bool
        For the leaky form: look for a slope in [-1, 0) when no slope in [0, 1)
        reaches the target.

    Returns
    -------
    ShapedActivation

    Raises
    ------
    InvalidParameterError
        For a bad method, depth, target, or an activation with jumps.
    UnreachableTargetError
        (a subclass of InvalidParameterError) when the leaky family cannot reach
        the target at this depth; the message says how far it gets and what would.
    ShapingError
        When no (alpha, beta) in the searched region meets the conditions.

    Examples
    --------
    >>> import propcalc
    >>> shaped = propcalc.shape_activation("relu", 100, target=0.9)
    >>> round(shaped.params["slope"], 4)
    0.5704
    """
    method, depth, value = _check(method, depth, target, allow_negative_slope)
    base = resolve(act)
    if base.has_jumps:
        raise InvalidParameterError("activation", "without jumps (its C'(1) is infinite, so no "
                                    "transform keeps it finite)", base.label)
    if method == "tat" and _slope_form_base(base):
        return _slope_form(base, depth, value, allow_negative_slope)
    return _affine_form(base, method, depth, value)


# -------------------------------------------------------------------------------------------
# the leaky slope form
# -------------------------------------------------------------------------------------------
def _slope_form(base: Activation, depth: int, eta: float, allow_negative: bool
                ) -> ShapedActivation:
    notes = [WEIGHTS]
    if allow_negative:
        k = solve_coefficient(depth, eta, K_ABS, family="slopes in [-1, 1)")
    else:
        reach = network_value(K_ABS, depth)
        hint = (f"a negative slope (allow_negative_slope=True) reaches up to C_L(0) = {reach:.6g}"
                if reach >= eta else "even a negative slope (down to -1, the absolute value) "
                f"reaches only C_L(0) = {reach:.6g}")
        k = solve_coefficient(depth, eta, K_RELU, hint=hint)
    slope = slope_from_coefficient(k)
    k = leaky_coefficient(slope)  # the coefficient of the slope actually used
    if slope < 0:
        notes.append(f"negative slope {slope:.6g}: no slope in [0, 1) reaches C_L(0) = {eta:g} "
                     f"at depth {depth}")
    shaped = leaky_form_activation(slope, description=(
        f"tailored activation transformation (Zhang et al. 2022) of leaky ReLU for depth {depth}"))
    trajectory = leaky_trajectory(k, depth)
    reached = float(trajectory[-1])
    lm = layer_map(shaped, math.inf)
    conditions = (Condition.of("Q(1)", 1.0, lm.variance),
                  Condition.of("Q'(1)", 1.0, lm.variance_slope),
                  Condition.of("C'(1)", 1.0, lm.slope_at_1),
                  Condition.of("C_L(0)", eta, reached))
    notes.append(f"closed-form network map: C(c) = c + {k:.6g} (sqrt(1 - c^2) - c arccos c) "
                 "(Zhang et al. 2022, from the arc-cosine kernel of Cho & Saul 2009)")
    residual = None
    if slope >= 0:
        residual, note = residual_equivalent(depth, eta, identical=True)
        notes.append(note)
    return _finish(base, shaped, "tat", "slope", depth, eta, {"slope": slope}, lm, conditions,
                   trajectory, (), "one slope solves the monotone equation in the slope",
                   residual, notes)


# -------------------------------------------------------------------------------------------
# the affine form
# -------------------------------------------------------------------------------------------
def _conditions(method: str, act: Activation, depth: int, target: float
                ) -> tuple[tuple[Condition, ...], np.ndarray]:
    """Every condition of the method on ``act``, with propcalc's maps; and c_0..c_L."""
    q1 = float(variance_map(act, 1.0, 1.0, 0.0))
    dq1 = float(variance_map_slope(act, 1.0, 1.0))
    slope = float(chi_1(act, 1.0, 1.0))
    trajectory = compose_correlation_map(act, 0.0, depth, 1.0, 0.0, 1.0, trajectory=True)
    if method == "dks":
        xi = math.exp(math.log(target) / depth)
        c0 = float(correlation_map(act, 0.0, 1.0, 0.0, 1.0))
        return (Condition.of("Q(1)", 1.0, q1), Condition.of("Q'(1)", 1.0, dq1),
                Condition.of("C(0)", 0.0, c0), Condition.of("C'(1)", xi, slope)), trajectory
    return (Condition.of("Q(1)", 1.0, q1), Condition.of("Q'(1)", 1.0, dq1),
            Condition.of("C'(1)", 1.0, slope),
            Condition.of("C_L(0)", target, float(trajectory[-1]))), trajectory


def _affine_form(base: Activation, method: str, depth: int, target: float) -> ShapedActivation:
    reason = _homogeneous_message(base, method)
    if reason is not None:
        raise ShapingError(reason)
    system = ShapingSystem(base, method, depth, target)
    candidates, n_links = find_candidates(system)
    name = ("deep kernel shaping (Martens et al. 2021)" if method == "dks"
            else "tailored activation transformation (Zhang et al. 2022)")
    checked: list[tuple[Candidate, Activation, tuple[Condition, ...], np.ndarray, float]] = []
    missed = []
    for cand in candidates:
        shaped = affine_activation(base, cand.alpha, cand.beta, cand.gamma, cand.delta,
                                   description=f"{name} of {base.label} for depth {depth}")
        conditions, trajectory = _conditions(method, shaped, depth, target)
        worst = max(c.deviation for c in conditions)
        if worst <= CONDITION_TOLERANCE:
            checked.append((cand, shaped, conditions, trajectory, variance_map_deviation(shaped)))
        else:
            missed.append(f"a candidate at alpha = {cand.alpha:.6g}, beta = {cand.beta:.6g} "
                          f"missed the conditions by {worst:.3g} and is not reported")
    if not checked:
        raise ShapingError(_no_root_message(base, method, depth, target, n_links))
    # the smallest deviation wins; deviations within 1e-9 of it are a tie (the mirror roots
    # of an odd activation differ only by rounding), settled by beta > 0, then the smaller |beta|
    floor = min(r[4] for r in checked)
    checked.sort(key=lambda r: (r[4] > floor + 1e-9 * max(floor, 1e-300), r[4] if
                                r[4] > floor + 1e-9 * max(floor, 1e-300) else 0.0,
                                r[0].beta < 0, abs(r[0].beta)))
    best = checked[0]
    roots = tuple(ShapingRoot(alpha=c.alpha, beta=c.beta, gamma=c.gamma, delta=c.delta,
                              branch=c.branch, conditions=conds,
                              max_deviation=max(x.deviation for x in conds),
                              variance_map_deviation=dev, chosen=i == 0)
                  for i, (c, _, conds, _, dev) in enumerate(checked))
    cand, shaped, conditions, trajectory, _ = best
    curvature = curvature_at_one(base, cand.alpha, cand.beta, cand.gamma)
    lm = layer_map(shaped, curvature)
    notes = [WEIGHTS]
    if method == "tat":
        notes.append("conditions Q(1) = 1, Q'(1) = 1 (taken from deep kernel shaping), "
                     "C'(1) = 1 and C_L(0) = eta; the per-layer curvature C''(1) is what "
                     "reaches the target")
    else:
        notes.append(f"per-layer slope C'(1) = zeta^(1/L) = {system.xi:.12g}; C(0) = 0 makes "
                     "c = 0 a fixed point, so orthogonal inputs stay orthogonal")
    notes.append(f"{len(roots)} root(s) found with alpha in [{ALPHA_RANGE[0]:g}, "
                 f"{ALPHA_RANGE[1]:g}] / scale; (-alpha, beta) gives the same maps, mirrored")
    notes.extend(missed)
    residual = None
    if method == "tat":
        residual, note = residual_equivalent(depth, target, identical=False)
        notes.append(note)
    params = {"alpha": cand.alpha, "beta": cand.beta, "gamma": cand.gamma, "delta": cand.delta}
    return _finish(base, shaped, method, "affine", depth, target, params, lm, conditions,
                   trajectory, roots, _choice(len(roots)), residual, notes)


def _choice(n: int) -> str:
    return CHOICE_RULE if n > 1 else "a single root"


def _no_root_message(base: Activation, method: str, depth: int, target: float,
                     n_links: int) -> str:
    conds = ("Q(1) = 1, Q'(1) = 1, C(0) = 0 and C'(1) = zeta^(1/L)" if method == "dks"
             else "Q(1) = 1, Q'(1) = 1, C'(1) = 1 and C_L(0) = eta")
    scale = base.scale
    half = BETA_HALF_WIDTH[0] * scale
    msg = (f"no transform gamma (phi(alpha x + beta) + delta) of phi = {base.label} meets "
           f"{conds} for {METHODS[method]} = {target:g} at depth {depth}: searched alpha in "
           f"[{ALPHA_RANGE[0] / scale:g}, {ALPHA_RANGE[1] / scale:g}] and beta in "
           f"[{-half:g}, {half:g}] (plus the breakpoints' reach)")
    if n_links:
        msg += f"; {n_links} candidate(s) did not converge to a root"
    return msg


def _homogeneous_message(base: Activation, method: str) -> str | None:
    """The reason an affine or positively homogeneous phi cannot be shaped, or None.

    ``phi(s x) = s phi(x)`` for s > 0 (checked at s = 2 and 1/2 on 41 points to 1e-13)
    makes ``phi(alpha z + beta) = alpha phi(z + beta / alpha)``: one parameter fewer than
    the four conditions of either method.
    """
    x = np.concatenate([np.linspace(-8.0, 8.0, 33), [-1e3, -50.0, 50.0, 1e3, 1e-3, -1e-3,
                                                     0.37, -0.37]])
    with np.errstate(all="ignore"):
        f = base.value(x)
        twice, half = base.value(2.0 * x), base.value(0.5 * x)
        slope = base.derivative(x)
    if np.all(np.abs(slope - slope[0]) <= 1e-13 * (1.0 + abs(slope[0]))):
        return (f"{base.label} is affine: so is gamma (phi(alpha x + beta) + delta), and its "
                "correlation map is C(c) = c for every choice: there is nothing to shape")
    scale = 1e-13 * (1.0 + np.abs(f))
    if not (np.all(np.abs(twice - 2.0 * f) <= 2 * scale)
            and np.all(np.abs(half - 0.5 * f) <= scale)):
        return None
    tip = ("use the built-in 'relu' or 'leaky_relu' with method 'tat', whose leaky slope form "
           "is exact" if method == "dks" or base.name not in ("relu", "leaky_relu")
           else "the slope form applies to the built-ins 'relu' and 'leaky_relu'")
    return (f"{base.label} is positively homogeneous (phi(s x) = s phi(x) for s > 0), so "
            "gamma (phi(alpha x + beta) + delta) = gamma (alpha phi(x + beta / alpha) + delta) "
            f"has one parameter fewer than the four conditions of '{method}': {tip}")


def _description(shaped: Activation, params: dict[str, float], depth: int
                 ) -> dict[str, Any] | None:
    """The shaped plain network as a network description (see ShapedActivation)."""
    if shaped.formula is None:
        return None
    dense = {"dense": {"sigma_w2": 1.0, "sigma_b2": 0.0}}
    act = {"activation": {"formula": shaped.formula, "params": dict(params)}}
    return {"blocks": [dense, {"repeat": {"times": depth, "blocks": [act, dense]}}]}


def _finish(base: Activation, shaped: Activation, method: str, form: str, depth: int,
            target: float, params: dict[str, float], lm: Any, conditions: tuple[Condition, ...],
            trajectory: np.ndarray, roots: tuple[ShapingRoot, ...], choice: str,
            residual: Any, notes: list[str]) -> ShapedActivation:
    leaky_k = None
    if form == "slope":  # ReLU or leaky ReLU: the closed form at the edge (module leaky)
        leaky_k = leaky_coefficient(float(base.params.get("slope", 0.0))
                                    if base.name == "leaky_relu" else 0.0)
    reference, ref_note = edge_reference(base, depth, leaky_k)
    notes.append(ref_note)
    prop = propagation(shaped, 1.0, 0.0, depth=depth, q_input=1.0)
    reached = float(trajectory[-1])
    slope = network_slope_at_one(shaped, depth, 1.0, 1.0)
    target_text = (f"C_L(0) = {reached:.6g} (target {target:g})" if method == "tat"
                   else f"C_L'(1) = {slope:.6g} (target {target:g}), C_L(0) = {reached:.3g}")
    verdict = depth_verdict(prop, depth, target_text, reference)
    return ShapedActivation(
        method=method, form=form, base=base.label, depth=depth, target=target,
        target_quantity=METHODS[method], params=params, formula=shaped.formula,
        activation=shaped, weights=WEIGHTS, layer_map=lm, network_map_at_0=reached,
        network_slope_at_1=slope, correlations=tuple(float(c) for c in trajectory),
        conditions=conditions, roots=roots, choice_rule=choice, depth_verdict=verdict,
        reference=reference, residual_equivalent=residual,
        network_description=_description(shaped, params, depth), notes=tuple(notes),
        propagation=prop, base_activation=base)
