"""The computations behind the endpoints: validated requests in, JSON-ready dicts out.

No Flask here. Every number comes from propcalc's public API; results are
the engine's ``to_dict()`` passed through :func:`propcalc.jsonable`, so the
service says the same thing in the same words as the Python API and
``propcalc ... --json``. Each computation checks its estimated cost against
the work budget (:mod:`propcalc_api._budget`) before the expensive part.
Engine exceptions are not caught here: the one error handler turns them into
problem details.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

import propcalc
from propcalc import (
    Activation,
    Layer,
    alpha_dropout,
    builtin_names,
    chi_1,
    correlation_map,
    correlation_map_slope,
    dropout_propagation,
    dropout_sweep,
    dynamical_isometry,
    edge_of_chaos,
    edge_of_chaos_points,
    gains,
    initial_loss,
    jacobian_spectrum,
    jsonable,
    max_class_probability,
    maxout_layer,
    maxout_propagation,
    output_layer_scale,
    propagation,
    recommend,
    self_normalization,
    simulate,
    variance_map,
    variance_map_slope,
)

from ._budget import (
    COSTS,
    FORMULA_FACTOR,
    check_budget,
    correlation_point_cost,
    initial_loss_cost,
    max_points,
    max_probability_cost,
    simulation_cost,
)
from ._cache import LRUCache
from ._config import LOGIT_VARIANCE_MAX, MC_MAX_ELEMENTS, Limits
from ._fields import format_number
from ._json import canonical_dumps
from ._networks import NetworkComputations
from ._problems import TYPE_INVALID_FIELDS, Problem, WorkBudgetExceeded
from ._schema_base import DEFAULT_EDGE_Q_STARS, PLAN_READOUT_SAMPLES

__all__ = ["Computations", "expand_grid", "default_samples", "DEFAULT_SAMPLES"]

#: Monte Carlo draws of the largest class probability when none are asked for (the engine's
#: default), lowered to MC_MAX_ELEMENTS // n_classes for many classes
DEFAULT_SAMPLES = 100_000


def default_samples(n_classes: int) -> int:
    """The n_samples used when a request gives none: 100000, or 5e7 // K if that is smaller."""
    return max(2, min(DEFAULT_SAMPLES, MC_MAX_ELEMENTS // n_classes))


def expand_grid(grid: dict[str, Any], low: float, high: float) -> list[float]:
    """The values of a validated grid object, clipped to [low, high] against rounding."""
    if grid["spacing"] == "log":
        values = np.geomspace(grid["start"], grid["stop"], grid["num"])
    else:
        values = np.linspace(grid["start"], grid["stop"], grid["num"])
    return [float(v) for v in np.clip(values, low, high)]


def _is_formula(spec: dict[str, Any]) -> bool:
    return "formula" in spec


class Computations(NetworkComputations):
    """The service's view of the engine, with an LRU of parsed activations.

    Parameters
    ----------
    limits : Limits
    activation_cache_entries : int
    """

    def __init__(self, limits: Limits, activation_cache_entries: int) -> None:
        self.limits = limits
        self._activations: LRUCache[Activation] = LRUCache(activation_cache_entries)

    # -- activations -------------------------------------------------------------------------
    def activation(self, spec: dict[str, Any]) -> Activation:
        """The Activation for a validated spec ({"name"|"formula": ..., "params": {...}})."""
        key = canonical_dumps(spec)
        act = self._activations.get(key)
        if act is None:
            text = spec["formula"] if _is_formula(spec) else spec["name"]
            act = propcalc.activation(text, **spec.get("params", {}))
            self._activations.put(key, act)
        return act

    def _budget(self, spec: dict[str, Any] | None, estimate: float, what: str,
                pointer: str | None = None, advice: str = "") -> None:
        factor = FORMULA_FACTOR if spec is not None and _is_formula(spec) else 1.0
        check_budget(estimate * factor, self.limits.work_budget, what, pointer, advice)

    @staticmethod
    def _describe(act: Activation) -> dict[str, Any]:
        return {**act.to_dict(), "gains": gains(act).to_dict()}

    def activation_list(self) -> dict[str, Any]:
        """Every built-in with its properties and gains."""
        names = builtin_names()
        self._budget(None, COSTS["activation"] * len(names), "the activation list")
        return jsonable({"activations": [self._describe(self.activation({"name": n, "params": {}}))
                                         for n in names]})

    def describe(self, req: dict[str, Any]) -> dict[str, Any]:
        """One activation: description, breakpoints, properties, gains."""
        spec = req["activation"]
        self._budget(spec, COSTS["activation"], "describing an activation")
        return jsonable(self._describe(self.activation(spec)))

    # -- reports -----------------------------------------------------------------------------
    def propagation(self, req: dict[str, Any]) -> dict[str, Any]:
        """The propagation report."""
        spec = req["activation"]
        self._budget(spec, COSTS["propagation"], "a propagation report")
        act = self.activation(spec)
        return jsonable(propagation(act, req["sigma_w2"], req["sigma_b2"], depth=req.get("depth"),
                                    q_input=req["q_input"]).to_dict())

    def critical_point(self, req: dict[str, Any]) -> dict[str, Any]:
        """The critical point through one q*."""
        spec = req["activation"]
        self._budget(spec, COSTS["critical_point"], "a critical point")
        return jsonable(edge_of_chaos(self.activation(spec), req["q_star"]).to_dict())

    def edge_of_chaos(self, req: dict[str, Any]) -> dict[str, Any]:
        """The edge-of-chaos line over q*, or its points at a fixed sigma_b2."""
        spec = req["activation"]
        if req.get("sigma_b2") is not None:
            self._budget(spec, COSTS["edge_at_bias"], "solving the edge of chaos at fixed sigma_b2")
            act = self.activation(spec)
            points = edge_of_chaos_points(act, sigma_b2=req["sigma_b2"])
            mode, sb = "sigma_b2", req["sigma_b2"]
        else:
            if req.get("q_star") is not None:
                qs, pointer = list(req["q_star"]), "/q_star"
            elif req.get("q_star_grid") is not None:
                qs = expand_grid(req["q_star_grid"], 0.0, math.inf)
                pointer = "/q_star_grid/num"
            else:
                qs, pointer = list(DEFAULT_EDGE_Q_STARS), "/q_star"
            per = COSTS["edge_point"] * (FORMULA_FACTOR if _is_formula(spec) else 1.0)
            fits = max_points(self.limits.work_budget, COSTS["edge_base"], per)
            self._budget(spec, COSTS["edge_base"] + COSTS["edge_point"] * len(qs),
                         f"an edge-of-chaos line of {len(qs)} points", pointer,
                         f"send at most {fits} q* values")
            act = self.activation(spec)
            points = edge_of_chaos_points(act, q_star=qs)
            mode, sb = "q_star", None
        return jsonable({"activation": act.label, "mode": mode, "sigma_b2": sb,
                         "points": [p.to_dict() for p in points]})

    def plan(self, req: dict[str, Any]) -> dict[str, Any]:
        """A per-layer initialisation plan."""
        spec = req["activation"]
        layers = None
        if req.get("layers") is not None:
            # a plain stack: the channels must chain (issue 12 section 2)
            layers = list(Layer.chain(
                [Layer.dense(d["in_features"], d["out_features"]) if d["kind"] == "dense"
                 else Layer.conv(d["in_channels"], d["out_channels"], tuple(d["kernel_size"]))
                 for d in req["layers"]]))
        n = (len(layers) if layers is not None else
             len(req["widths"]) - 1 if req.get("widths") is not None else req["depth"])
        loss, k = req.get("loss"), req.get("n_classes")
        estimate = COSTS["plan"] + COSTS["plan_layer"] * n
        what = f"a plan of {n} layers"
        if loss is not None:
            # the tangent kernel through every layer, and the readout's Monte Carlo check
            estimate += COSTS["plan_loss"] + COSTS["plan_loss_layer"] * n
            if loss == "cross_entropy" and req["scale_output"]:
                estimate += max_probability_cost(k, 1.0, PLAN_READOUT_SAMPLES)
            what += f" with its learning-rate ceiling for {loss}"
        self._budget(spec, estimate, what, "/widths" if loss is not None else None,
                     "fewer layers" if loss is not None else "")
        plan = recommend(self.activation(spec), req.get("depth"), widths=req.get("widths"),
                         layers=layers, distribution=req["distribution"], target=req["target"],
                         sigma_b2=req.get("sigma_b2"), q_star=req.get("q_star"),
                         q_input=req["q_input"], loss=loss, n_classes=k,
                         batch_size=req.get("batch_size"), momentum=req["momentum"],
                         input_correlation=req.get("input_correlation"),
                         scale_output=req["scale_output"])
        return jsonable(plan.to_dict())

    # -- sampled maps --------------------------------------------------------------------------
    def variance_map(self, req: dict[str, Any]) -> dict[str, Any]:
        """V(q), V'(q) and chi_1(q) at the requested q."""
        spec = req["activation"]
        if req.get("q") is not None:
            qs, pointer = list(req["q"]), "/q"
        else:
            qs, pointer = expand_grid(req["q_grid"], 0.0, math.inf), "/q_grid/num"
        per = COSTS["variance_point"] * (FORMULA_FACTOR if _is_formula(spec) else 1.0)
        self._budget(spec, COSTS["variance_point"] * len(qs),
                     f"a variance map of {len(qs)} points", pointer,
                     f"send at most {max_points(self.limits.work_budget, 0.0, per)} q values")
        act = self.activation(spec)
        sw, sb = req["sigma_w2"], req["sigma_b2"]
        q = np.asarray(qs, dtype=float)
        slope = variance_map_slope(act, q, sw)
        return jsonable({"activation": act.label, "sigma_w2": sw, "sigma_b2": sb, "q": qs,
                         "variance": variance_map(act, q, sw, sb), "slope": slope,
                         "chi_1": chi_1(act, q, sw)})

    def correlation_map(self, req: dict[str, Any]) -> dict[str, Any]:
        """C(c), and C'(c) when asked, at the requested c."""
        spec = req["activation"]
        sw, sb = req["sigma_w2"], req["sigma_b2"]
        if req.get("c") is not None:
            cs, pointer = list(req["c"]), "/c"
        else:
            cs, pointer = expand_grid(req["c_grid"], -1.0, 1.0), "/c_grid/num"
        with_slope = req["with_slope"]
        fixed = 0.0
        if req.get("q") is not None:
            q, source = req["q"], "given"
        else:
            self._budget(spec, COSTS["propagation"], "finding q* for the correlation map")
            fixed = COSTS["propagation"]
            report = propagation(self.activation(spec), sw, sb, q_input=req["q_input"])
            if report.q_star is None:
                raise Problem(422, "q is needed: " + report.variance_fixed_points.message,
                              type=TYPE_INVALID_FIELDS, title="The request has invalid members",
                              errors=[{"pointer": "/q", "detail": (
                                  "is required here: the variance has no finite fixed point at "
                                  f"sigma_w2 = {format_number(sw)}, sigma_b2 = {format_number(sb)}"
                                  f" (status {report.status}); give q")}])
            q, source = report.q_star, "fixed_point"
        per = correlation_point_cost(q, with_slope) * (FORMULA_FACTOR if _is_formula(spec) else 1.0)
        fits = max_points(self.limits.work_budget, fixed, per)
        self._budget(spec, fixed + correlation_point_cost(q, with_slope) * len(cs),
                     f"a correlation map of {len(cs)} points at q = {q:.6g}"
                     + (" with its slope" if with_slope else ""), pointer,
                     f"send at most {fits} c values" + ("" if not with_slope or fits == 0 else
                                                        ", or leave out the slope"))
        act = self.activation(spec)
        c = np.asarray(cs, dtype=float)
        values = correlation_map(act, c, sw, sb, q=q)
        slope = correlation_map_slope(act, c, sw, sb, q=q) if with_slope else None
        return jsonable({"activation": act.label, "sigma_w2": sw, "sigma_b2": sb, "q": float(q),
                         "q_source": source, "c": cs, "correlation": values, "slope": slope})

    # -- dropout -------------------------------------------------------------------------------
    def dropout(self, req: dict[str, Any]) -> dict[str, Any]:
        """Signal propagation with dropout at one keep rate."""
        spec = req["activation"]
        self._budget(spec, COSTS["dropout_rate"], "a dropout report")
        act = self.activation(spec)
        rho = req["keep_rate"]
        # as propcalc.dropout_sweep does with scale_with_keep_rate: sigma_w2 * rho
        sw = req["sigma_w2"] * (rho if req["scale_with_keep_rate"] else 1.0)
        return jsonable(dropout_propagation(act, sw, req["sigma_b2"], rho, depth=req.get("depth"),
                                            q_input=req["q_input"]).to_dict())

    def dropout_sweep(self, req: dict[str, Any]) -> dict[str, Any]:
        """Dropout reports over several keep rates."""
        spec = req["activation"]
        rates = list(req["keep_rates"])
        per = COSTS["dropout_rate"] * (FORMULA_FACTOR if _is_formula(spec) else 1.0)
        self._budget(spec, COSTS["dropout_rate"] * len(rates),
                     f"a dropout sweep of {len(rates)} keep rates", "/keep_rates",
                     f"send at most {max_points(self.limits.work_budget, 0.0, per)} keep rates")
        act = self.activation(spec)
        return jsonable(dropout_sweep(act, req["sigma_w2"], req["sigma_b2"], rates,
                                      depth=req.get("depth"), q_input=req["q_input"],
                                      scale_with_keep_rate=req["scale_with_keep_rate"]).to_dict())

    # -- maxout --------------------------------------------------------------------------------
    def maxout(self, req: dict[str, Any]) -> dict[str, Any]:
        """The maxout report, and one layer's size when fan_in and fan_out are given."""
        self._budget(None, COSTS["maxout"], "a maxout report")
        k, sw = req["k"], req.get("sigma_w2")
        report = maxout_propagation(k, sw, req["sigma_b2"], depth=req.get("depth"),
                                    q_input=req["q_input"])
        layer = None
        if req.get("fan_in") is not None:
            layer = maxout_layer(k, req["fan_in"], req["fan_out"], sw).to_dict()
        return jsonable({**report.to_dict(), "layer": layer})

    # -- mean and variance together ---------------------------------------------------------------
    def self_normalization(self, req: dict[str, Any]) -> dict[str, Any]:
        """Fixed points of the mean-variance map, their Jacobians and attraction."""
        spec = req["activation"]
        omega = req["omega"]
        if omega == 0.0:
            self._budget(spec, COSTS["selfnorm_omega_zero"], "the mean-variance fixed points")
        else:
            self._budget(spec, COSTS["selfnorm_root_finder"],
                         "the mean-variance fixed points with omega != 0 (a root finder from "
                         "six starts)", "/omega", "omega = 0 costs far less")
        start = req["start"]
        result = self_normalization(self.activation(spec), omega, req["tau"],
                                    (start["mu"], start["nu"]))
        return jsonable(result.to_dict())

    def alpha_dropout(self, req: dict[str, Any]) -> dict[str, Any]:
        """The constants a and b of alpha dropout."""
        self._budget(None, COSTS["alpha_dropout"], "the alpha-dropout constants")
        extra = {} if req.get("alpha_prime") is None else {"alpha_prime": req["alpha_prime"]}
        return jsonable(alpha_dropout(req["keep_rate"], req["mean"], req["variance"],
                                      **extra).to_dict())

    # -- Jacobian spectra ------------------------------------------------------------------------
    def jacobian_spectrum(self, req: dict[str, Any]) -> dict[str, Any]:
        """Mean and variance of the spectrum of J J^T."""
        spec = req["activation"]
        self._budget(spec, COSTS["jacobian_spectrum"], "a Jacobian spectrum")
        return jsonable(jacobian_spectrum(self.activation(spec), req["depth"], req["q_star"],
                                          req.get("sigma_w2")).to_dict())

    def dynamical_isometry(self, req: dict[str, Any]) -> dict[str, Any]:
        """The isometry advice: weights and q* for a near-isometric Jacobian."""
        spec = req["activation"]
        self._budget(spec, COSTS["isometry"], "the isometry advice")
        return jsonable(dynamical_isometry(self.activation(spec), req["depth"],
                                           req["max_variance"],
                                           (req["q_star_min"], req["q_star_max"])).to_dict())

    # -- the softmax output layer -------------------------------------------------------------------
    def softmax(self, req: dict[str, Any]) -> dict[str, Any]:
        """Expected initial loss and largest class probability."""
        k, s2 = req["n_classes"], req["logit_variance"]
        n = req.get("n_samples") or default_samples(k)
        fixed = initial_loss_cost(s2)
        mc = max_probability_cost(k, s2, n)
        fits = max_points(self.limits.work_budget, fixed + COSTS["softmax_pmax_base"],
                          COSTS["softmax_pmax_element"] * k)
        check_budget(fixed + mc, self.limits.work_budget,
                     f"the softmax loss and largest probability for {k} classes with "
                     f"{n} Monte Carlo draws", "/n_samples" if mc > fixed else "/logit_variance",
                     f"send n_samples at most {fits}" if fits >= 2 else
                     "lower the logit variance")
        return jsonable({"initial_loss": initial_loss(k, s2).to_dict(),
                         "max_probability": max_class_probability(k, s2, n,
                                                                  req["seed"]).to_dict()})

    def output_scale(self, req: dict[str, Any]) -> dict[str, Any]:
        """The largest last-layer sigma_w2 within the margin of ln K."""
        k = req["n_classes"]
        n = req.get("n_samples") or default_samples(k)
        margin = req.get("margin")
        m = 0.01 * math.log(k) if margin is None else margin
        estimate = (COSTS["output_scale_base"] + COSTS["output_scale_margin"] * m
                    + max_probability_cost(k, 1.0, n))
        if req.get("current_sigma_w2") is not None:
            sb_now = req.get("current_sigma_b2")
            s2_now = (req["current_sigma_w2"] * req["penultimate_second_moment"]
                      + (req["sigma_b2"] if sb_now is None else sb_now))
            if s2_now <= LOGIT_VARIANCE_MAX:
                estimate += initial_loss_cost(s2_now)
        check_budget(estimate, self.limits.work_budget,
                     f"the output-layer scale for {k} classes with {n} Monte Carlo draws",
                     "/n_samples", "send fewer n_samples or a smaller margin")
        result = output_layer_scale(k, req["penultimate_second_moment"], margin, req["sigma_b2"],
                                    req.get("fan_in"), req.get("current_sigma_w2"),
                                    req.get("current_sigma_b2"), n, req["seed"])
        return jsonable(result.to_dict())

    # -- finite-width simulation ---------------------------------------------------------------------
    def simulation(self, req: dict[str, Any]) -> dict[str, Any]:
        """Seeded finite-width networks against the mean-field predictions."""
        spec = req["activation"]
        width, depth, reps, pairs = req["width"], req["depth"], req["repetitions"], req["n_pairs"]
        what = (f"a simulation of width {width}, depth {depth}, {reps} repetitions and "
                f"{pairs} input pairs")
        size = width * width * depth * reps
        limit = self.limits.max_simulation_size
        if size > limit:
            fit = math.isqrt(limit // (depth * reps))
            advice = (f"at depth {depth} with {reps} repetitions the width can be at most {fit}"
                      if fit >= 2 else
                      f"even width 2 allows only depth x repetitions <= {limit // 4}")
            raise WorkBudgetExceeded(
                f"{what} has width^2 x depth x repetitions = {size:.3g}; the limit is "
                f"{format_number(limit)} (MAX_SIMULATION_SIZE): {advice}",
                "MAX_SIMULATION_SIZE", limit, pointer="/width",
                entry=f"too large a simulation (width^2 x depth x repetitions = {size:.3g} > "
                      f"{format_number(limit)}, MAX_SIMULATION_SIZE): {advice}")
        factor = FORMULA_FACTOR if _is_formula(spec) else 1.0
        budget = self.limits.work_budget
        fit = width
        while fit > 2 and simulation_cost(fit, depth, reps, pairs) * factor > budget:
            fit = max(2, int(fit * 0.9))
        fits = simulation_cost(fit, depth, reps, pairs) * factor <= budget
        self._budget(spec, simulation_cost(width, depth, reps, pairs), what, "/width",
                     f"at this depth, repetitions and n_pairs the width can be about {fit}"
                     if fits else "lower the depth, repetitions or n_pairs")
        result = simulate(self.activation(spec), req["sigma_w2"], req["sigma_b2"], width=width,
                          depth=depth, q0=req["q0"], c0=req["c0"], repetitions=reps,
                          n_pairs=pairs, seed=req["seed"], tolerance=req["tolerance"])
        return jsonable(result.to_dict())
