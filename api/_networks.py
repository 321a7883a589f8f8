"""The computations of /v1/network and /v1/shape (issues 14 and 16), and their cost estimates.

No Flask here; a mixin of :class:`propcalc_api._service.Computations`, which
gives it the activation cache, the limits and the budget check. Every number
comes from propcalc: :func:`propcalc.network_propagation`,
:func:`propcalc.network_plan` and :func:`propcalc.shape_activation`, their
``to_dict()`` passed through :func:`propcalc.jsonable`.

Cost (work units, see :mod:`propcalc_api._budget`): a description is first
counted (its distinct formula activations are compiled when it is read:
one activation each), then validated by the engine, then estimated from
``Network.cost`` (the engine's count of correlation-map evaluations, an upper
bound), before any propagation runs. When the Gaussian recursion stops
holding somewhere and the request asks for the simulation, the simulation is
estimated from the engine's count of its multiply-adds and checked before it
runs.
"""

from __future__ import annotations

import inspect
import math
from collections.abc import Iterator
from typing import Any

from propcalc import (
    Network,
    builtin_names,
    jsonable,
    network,
    network_plan,
    network_propagation,
    network_verdict,
    shape_activation,
)
from propcalc.networks import Attention, Repeat, Residual
from propcalc.networks.propagate import SIMULATION_REPETITIONS, SIMULATION_WIDTH
from propcalc.networks.simulate import measure_network, simulation_work

from ._budget import COSTS, FORMULA_FACTOR, check_budget, max_probability_cost
from ._fields import format_number
from ._schema_base import PLAN_READOUT_SAMPLES

__all__ = [
    "SLOPE_FORM_BASES",
    "NetworkComputations",
    "formula_activations",
    "network_estimate",
    "output_width",
    "shape_estimate",
    "shape_plot_cost",
    "simulation_estimate",
    "slope_form",
    "training_estimate",
]

#: built-ins that "tat" shapes in the closed-form slope form (propcalc.shaping.solve)
SLOPE_FORM_BASES = ("relu", "leaky_relu")
#: inputs of the simulation that fills non-Gaussian positions (measure_network's default)
SIMULATED_INPUTS = int(inspect.signature(measure_network).parameters["inputs"].default)


def _activation_specs(blocks: Any) -> Iterator[Any]:
    """Every activation value of a raw description (before validation; anything else skipped)."""
    stack = [blocks]
    while stack:
        item = stack.pop()
        if isinstance(item, list):
            stack.extend(item)
        elif isinstance(item, dict) and len(item) == 1:
            ((kind, body),) = item.items()
            if kind == "activation":
                yield body
            elif isinstance(body, dict):
                stack.extend(body.get(k) for k in ("blocks", "branch") if k in body)


def formula_activations(description: dict[str, Any]) -> int:
    """Distinct typed formulas (and parametrised activations) in a raw description."""
    names = set(builtin_names())
    seen = set()
    for spec in _activation_specs(description.get("blocks")):
        if isinstance(spec, str) and spec.strip().lower().replace("-", "_") in names:
            continue
        seen.add(repr(spec))
    return len(seen)


def network_estimate(net: Network, plan: dict[str, Any] | None, formulas: bool
                     ) -> tuple[float, float]:
    """Estimated units of the propagation and of the plan (0 without one).

    ``formulas``: the description has typed formulas (their maps cost more).
    """
    factor = FORMULA_FACTOR if formulas else 1.0
    units = net.cost * factor
    prop = COSTS["network"] + COSTS["network_unit"] * units
    if plan is None:
        return prop, 0.0
    per = COSTS["network_plan_target_unit"] if plan.get("target") is not None else (
        COSTS["network_plan_unit"])
    return prop, COSTS["network_plan"] + per * units


def output_width(net: Network) -> int:
    """The width of a network's output: the last weight block's that gives one (else the
    input's; 1 when neither is given, the engine then refuses the ceiling with its reason)."""
    def last(blocks: tuple[Any, ...]) -> int | None:
        for b in reversed(blocks):
            if isinstance(b, Repeat):
                found = last(b.blocks)
            elif isinstance(b, Residual):
                found = None  # the shortcut keeps the input's width
            else:
                found = getattr(b, "width", None)
            if found is not None:
                return int(found)
        return None
    return last(net.blocks) or net.input_width or 1


def training_estimate(net: Network, loss: str, n_classes: int, formulas: bool = False
                      ) -> float:
    """Estimated units of the verdict's learning-rate ceiling and output-layer reason.

    The tangent kernel is a second walk with the derivative pairs (at most the propagation's
    units); cross-entropy adds the seeded softmax curvature (64 eigenvalue problems of K x K
    for K <= 1000: 5e-6 K^3 units, 20000 K draws beyond) and the readout check (1 per class).
    """
    units = net.cost * (FORMULA_FACTOR if formulas else 1.0)
    cost = COSTS["network_loss"] + COSTS["network_unit"] * units
    if loss == "cross_entropy":
        k = float(n_classes)
        cost += COSTS["network_loss_cross_entropy"] + COSTS["network_loss_class"] * k
        cost += (COSTS["softmax_curvature_cubic"] * k ** 3 if k <= 1000 else
                 COSTS["softmax_curvature_draw"] * 20000 * k)
    return cost


def readout_estimate(net: Network, loss: str, n_classes: int, formulas: bool = False) -> float:
    """Estimated units of the plan's readout scaled for the loss (propcalc.network_plan).

    A second propagation of the planned network (its readout changed) and, for cross-entropy,
    the output-layer scale: its root in the logit variance and the Monte Carlo check of the
    largest class probability (as the plain plan's, PLAN_READOUT_SAMPLES draws of K logits).
    """
    units = net.cost * (FORMULA_FACTOR if formulas else 1.0)
    # the moments are cached by the first propagation: the second costs about a fifth
    # (measured 0.03 s against 0.11 s cold, 205 positions)
    cost = COSTS["network_plan_readout_unit"] * units
    if loss == "cross_entropy":
        cost += (COSTS["output_scale_base"] + COSTS["output_scale_margin"] * 0.01
                 * math.log(n_classes) + max_probability_cost(n_classes, 1.0,
                                                              PLAN_READOUT_SAMPLES))
    return cost


def _tokens(blocks: tuple[Any, ...]) -> int:
    """The most tokens of any attention block (the simulation's grid is at most this)."""
    most = 1
    for b in blocks:
        if isinstance(b, Attention):
            most = max(most, b.tokens)
        elif isinstance(b, Repeat):
            most = max(most, _tokens(b.blocks))
        elif isinstance(b, Residual):
            most = max(most, _tokens(b.branch))
    return most


def simulation_estimate(net: Network) -> float:
    """Estimated units of the simulation that fills the non-Gaussian positions."""
    work = simulation_work(net, SIMULATION_WIDTH, SIMULATED_INPUTS, _tokens(net.blocks))
    return (COSTS["network_simulation_position"] * net.n_positions * SIMULATION_REPETITIONS
            + COSTS["network_simulation_element"] * work * SIMULATION_REPETITIONS)


def shape_plot_cost(req: dict[str, Any]) -> float:
    """Estimated units of the curves of the shaping image: the network map before and after
    shaping at ``n_points`` correlations, composed layer by layer (closed forms for the leaky
    slope form, which costs nothing per layer)."""
    spec = req["activation"]
    if slope_form(req):
        return COSTS["shape_slope_plot_layer"] * req["depth"]
    per = COSTS["shape_plot_layer"] + COSTS["shape_plot_point_layer"] * req["n_points"]
    factor = COSTS["shape_plot_formula_factor"] if "formula" in spec else 1.0
    return per * req["depth"] * factor


def slope_form(req: dict[str, Any]) -> bool:
    """Whether the request is shaped in the closed-form leaky slope form (tat of relu and
    leaky_relu, built-in)."""
    return req["method"] == "tat" and req["activation"].get("name") in SLOPE_FORM_BASES


def shape_estimate(req: dict[str, Any]) -> float:
    """Estimated units of one shaping solve."""
    depth = req["depth"]
    if slope_form(req):
        return COSTS["shape"] + COSTS["shape_slope_layer"] * depth
    factor = FORMULA_FACTOR if "formula" in req["activation"] else 1.0
    return (COSTS["shape"] + COSTS["shape_layer"] * depth) * factor


class NetworkComputations:
    """Networks of blocks and shaped activations (mixed into Computations)."""

    limits: Any
    activation: Any

    # -- networks ----------------------------------------------------------------------------
    def _network(self, req: dict[str, Any], plan: dict[str, Any] | None, extra: float = 0.0,
                 per_position: float = 0.0) -> tuple[Network, float]:
        """The validated network and the estimate of the work admitted so far (with ``extra``
        units, plus ``per_position`` units per stream position, of what follows: an image)."""
        budget = self.limits.work_budget
        description = req["network"]
        formulas = formula_activations(description)
        if formulas:
            check_budget(COSTS["activation"] * formulas, budget,
                         f"reading a description with {formulas} distinct activation formulas",
                         "/network", "use fewer distinct formulas")
        net = network(description)
        prop, planned = network_estimate(net, plan, formulas > 0)
        prop += extra + per_position * net.n_positions
        what = (f"a network of {net.n_positions} positions ({format_number(round(net.cost))} "
                "correlation-map evaluations)")
        if plan is not None and prop <= budget < prop + planned:
            check_budget(prop + planned, budget, what + " with its plan", "/plan",
                         f'send "plan": null to skip the plan (the propagation alone needs about '
                         f"{format_number(round(prop))} units)")
        check_budget(prop + planned, budget, what + (" with its plan" if plan else ""),
                     "/network", "describe fewer positions")
        return net, prop + planned

    def _propagate(self, net: Network, req: dict[str, Any], admitted: float) -> Any:
        """network_propagation, with the simulation when it is asked for and fits the budget."""
        args = {"q0": req["q0"], "c0": req["c0"], "c0_within": req["c0_within"],
                "c0_between": req["c0_between"], "seed": req["seed"]}
        result = network_propagation(net, simulate=False, **args)
        if not req["simulate"] or result.gaussian_positions == net.n_positions:
            return result
        sim = simulation_estimate(net)
        check_budget(admitted + sim, self.limits.work_budget,
                     f"a network whose positions from {result.gaussian_positions + 1} on need a "
                     f"finite-width simulation (width {SIMULATION_WIDTH} where none is given, "
                     f"{SIMULATION_REPETITIONS} networks)", "/simulate",
                     'send "simulate": false (no number where the Gaussian recursion does not '
                     "hold), or give smaller widths")
        return network_propagation(net, simulate=True, **args)

    def network(self, req: dict[str, Any]) -> dict[str, Any]:
        """Propagation through a network, its summary, its plan and its verdict (with a loss:
        the learning-rate ceiling and the output layer)."""
        plan = req.get("plan")
        net, admitted = self._network(req, plan)
        training: dict[str, Any] = {}
        loss = req.get("loss")
        if loss is not None:
            k = req.get("n_classes") or output_width(net)
            # the verdict's ceiling, and the plan's of the planned network
            formulas = formula_activations(req["network"]) > 0
            admitted += training_estimate(net, loss, k, formulas) * (1 if plan is None else 2)
            if plan is not None and req["scale_output"]:
                admitted += readout_estimate(net, loss, k, formulas)
            check_budget(admitted, self.limits.work_budget,
                         f"a network of {net.n_positions} positions with its learning-rate "
                         f"ceiling for {loss} ({k} outputs)"
                         + ("" if plan is None else ", for the verdict and the plan"),
                         "/n_classes" if loss == "cross_entropy" else "/network",
                         "fewer outputs" if loss == "cross_entropy" else "fewer positions")
            training = {"loss": loss, "n_classes": req.get("n_classes"),
                        "batch_size": req["batch_size"], "momentum": req["momentum"]}
        result = self._propagate(net, req, admitted)
        planned = None
        if plan is not None:
            planned = network_plan(net, q0=req["q0"], c0=req["c0"], c0_within=req["c0_within"],
                                   c0_between=req["c0_between"], target=plan["target"],
                                   max_gradient=plan["max_gradient"],
                                   distribution=plan["distribution"],
                                   convolution=plan["convolution"], q_star=plan["q_star"],
                                   **training, **({} if loss is None else
                                                  {"scale_output": req["scale_output"]}))
        return jsonable({"propagation": result.to_dict(),
                         "plan": None if planned is None else planned.to_dict(),
                         "verdict": network_verdict(result, **training).to_dict()})

    def network_result(self, req: dict[str, Any], extra: float = 0.0,
                       per_position: float = 0.0) -> Any:
        """The NetworkPropagation of a request (for the image: the units to draw it)."""
        net, admitted = self._network(req, None, extra, per_position)
        return self._propagate(net, req, admitted)

    # -- shaping -----------------------------------------------------------------------------
    def shaped(self, req: dict[str, Any], extra: float = 0.0) -> Any:
        """The ShapedActivation of a request (``extra``: units of what follows, e.g. an image)."""
        spec = req["activation"]
        check_budget(shape_estimate(req) + extra, self.limits.work_budget,
                     f"shaping an activation for depth {req['depth']}", "/depth",
                     "ask for a smaller depth")
        return shape_activation(self.activation(spec), req["depth"], target=req.get("target"),
                                method=req["method"],
                                allow_negative_slope=req["allow_negative_slope"])

    def shape(self, req: dict[str, Any]) -> dict[str, Any]:
        """An activation shaped for a target depth."""
        return jsonable(self.shaped(req).to_dict())
