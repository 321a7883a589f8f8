"""The trainability verdict: every reason that decides it, with its number, pass/fail and the fix.

One structure for the Python API, the CLI and the service (:class:`Verdict`, a list of
:class:`Reason`). The reasons, in order:

* ``correlation depth``: off the edge of chaos, the depth against about 6 xi_c (an empirical rule,
  Schoenholz et al. 2017); on the edge, xi_c is infinite and 1 - c_l decays as a power law
  (:func:`propcalc.meanfield.report.edge_approach`): the mean-field analysis sets no limit there
  by itself, so the other reasons decide. An exploding or non-attracting variance fails here;
* ``gradient growth``: chi_1^L, the mean-field change of squared gradient norms over the depth
  (Schoenholz et al. 2017), within a factor e^6 either way (the change over 6 xi_c layers in the
  ordered phase);
* ``learning rate``: the ceiling 2 / lambda_max at initialisation when the plan has one
  (:mod:`propcalc.training.learning_rate`); it limits the step, not the depth: a training run
  above it diverges (or catapults, Lewkowycz et al. 2020), so the fix is to stay below it;
* ``finite-width spread``, ``finite-width gradient spread``, ``finite-width drift``: the first-order
  laws of :mod:`propcalc.training.finite_width` at the network's widths, with the uniform width
  that makes them small and the depth they allow at these widths;
* ``output layer``: the expected initial cross-entropy above ln K (variants/output_layer) within
  1% of ln K (common practice, no source), or for MSE the outputs' initial variance.

A reason that cannot be computed (no widths, no loss given) says so (``passes`` None) and does
not count against the plan. The learning rate and the finite-width reasons are warnings
(:data:`WARNINGS`): beyond their limits they say so with the fix and the depth they allow, but
``trainable`` weighs only the deciding reasons (correlation depth, gradient growth, output
layer). The verdict never says "no depth limit" when finite width sets one.

The same verdict for networks of blocks: :mod:`propcalc.training.network_verdict`.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

from .. import domains
from ..activations.base import Activation
from ..activations.resolver import resolve
from ..errors import InvalidParameterError, PropcalcError, check_nonnegative, check_positive
from ..meanfield.maps import second_moment
from ..meanfield.report import Propagation
from ..numerics.quadrature import DEFAULT_RULE, QuadratureRule
from ..results import Result
from ..variants.output_layer import initial_loss, output_layer_scale
from ..vocabulary import NEUTRAL_TOLERANCE
from .finite_width import (DRIFT_LIMIT, GRADIENT_SPREAD_LIMIT, SPREAD_LIMIT, FiniteWidth,
                           finite_width)
from .learning_rate import LOSSES

__all__ = ["GROWTH_LIMIT", "MSE_OUTPUT_LIMIT", "REASONS", "WARNINGS", "Reason", "Verdict",
           "trainability"]

#: the squared gradient norm may change by at most this factor over the depth: e^6, the change
#: over 6 xi_c layers in the ordered phase, where xi_c = -1 / ln chi_1 (Schoenholz et al. 2017),
#: so the two reasons agree there
GROWTH_LIMIT = math.exp(6.0)
#: reasons that are warnings: beyond their limit they say so, with the fix, but do not make the
#: plan untrainable (their limits are ours, without measurements of training behind them; the
#: learning-rate ceiling limits the step, not the plan)
WARNINGS = ("learning rate", "finite-width spread", "finite-width gradient spread",
            "finite-width drift")
#: largest variance of an MSE output at initialisation that passes (ours, no source: the scale
#: of standardised targets; above it the initial outputs dominate the loss)
MSE_OUTPUT_LIMIT = 1.0
#: the names of the reasons, in the order a verdict lists them
REASONS = ("correlation depth", "gradient growth", "learning rate", "finite-width spread",
           "finite-width gradient spread", "finite-width drift", "output layer")


@dataclass(frozen=True)
class Reason(Result):
    """One reason that decides trainability.

    Attributes
    ----------
    name : str
        One of :data:`REASONS`.
    quantity : str
        What ``value`` measures.
    value : float or None
        Its number (None when not computed).
    limit : float or None
        The threshold it is held against (None when there is none).
    passes : bool or None
        None when the reason could not be computed (``detail`` says why).
    depth_limit : float or None
        The depth this reason allows (None: it sets none).
    fix : str or None
        The change that fixes it (None when it passes or was not computed).
    detail : str
    decides : bool
        False for a warning (:data:`WARNINGS`): beyond its limit it is reported with its fix but
        does not make the plan untrainable.
    """

    name: str
    quantity: str
    value: float | None
    limit: float | None
    passes: bool | None
    depth_limit: float | None
    fix: str | None
    detail: str
    decides: bool = field(init=False)

    def __post_init__(self) -> None:
        object.__setattr__(self, "decides", self.name not in WARNINGS)


@dataclass(frozen=True)
class Verdict(Result):
    """The trainability verdict: its reasons, the depth limit they set, and a summary.

    Attributes
    ----------
    trainable : bool
        Every computed reason that decides (not a warning) passes.
    depth : int
    depth_limit : float or None
        The smallest depth any reason allows (None: none sets a limit).
    limited_by : str or None
        The reason that sets ``depth_limit``.
    failing : tuple of str
        Names of the deciding reasons that fail.
    warnings : tuple of str
        Names of the warnings beyond their limits.
    not_computed : tuple of str
        Names of the reasons that could not be computed.
    summary : str
    reasons : tuple of Reason
    """

    trainable: bool
    depth: int
    depth_limit: float | None
    limited_by: str | None
    failing: tuple[str, ...]
    warnings: tuple[str, ...]
    not_computed: tuple[str, ...]
    summary: str
    reasons: tuple[Reason, ...]

    def __str__(self) -> str:
        return self.summary

    def reason(self, name: str) -> Reason:
        """The reason called ``name`` (one of :data:`REASONS`)."""
        for r in self.reasons:
            if r.name == name:
                return r
        raise KeyError(name)


def _not_computed(name: str, quantity: str, why: str) -> Reason:
    return Reason(name, quantity, None, None, None, None, None, f"not computed: {why}")


def _correlation(p: Propagation, depth: int) -> Reason:
    name, quantity = "correlation depth", "6 xi_c (layers)"
    if p.phase == "unbounded variance":
        rate = p.variance_fixed_points.growth_rate
        return Reason(name, "variance growth per layer", rate, 1.0, False, 0.0,
                      "lower sigma_w2 (or plan at the edge of chaos: target 'edge')",
                      f"{depth} layers: the forward signal explodes (variance grows by about "
                      f"{rate:.4g} per layer)")
    reached = p.variance_fixed_points.reached
    drifting = (p.status == "fixed_point" and reached is not None and not reached.stable
                and abs(reached.chi_q - 1.0) > NEUTRAL_TOLERANCE)
    if p.phase == "edge of chaos":
        extra = f"; {p.edge_approach}" if p.edge_approach else ""
        detail = (f"{depth} layers: at the edge of chaos the correlation depth scale is "
                  "infinite, so the correlation analysis sets no depth limit by itself "
                  f"(gradients neither grow nor shrink on average, chi_1 = 1){extra}")
        ok, limit, fix = True, None, None
        value: float | None = math.inf
    else:
        limit = p.trainable_depth if p.trainable_depth is not None else 0.0
        value = limit
        kind = ("gradients vanish (ordered phase)" if p.phase == "ordered"
                else "gradients explode and nearby inputs decorrelate (chaotic phase)")
        ok = depth <= limit
        if ok:
            detail = (f"{depth} layers is within the predicted trainable depth of about "
                      f"{limit:.0f} layers (6 xi_c, xi_c = {p.xi_c:.4g}; empirical rule of "
                      "Schoenholz et al. 2017)")
            fix = None
        else:
            detail = (f"{depth} layers exceeds the predicted trainable depth of about "
                      f"{limit:.0f} layers (6 xi_c, xi_c = {p.xi_c:.4g}; empirical rule of "
                      f"Schoenholz et al. 2017): {kind}, squared gradient norms change by "
                      f"chi_1^L = {p.gradient_growth:.3g}; move closer to the edge of chaos")
            fix = (f"plan at the edge of chaos (target 'edge'), or use at most {limit:.0f} "
                   "layers")
    if drifting:
        assert reached is not None
        detail += (f"; but q* = {reached.q:.4g} does not attract (chi_q = {reached.chi_q:.4g}), "
                   "so a finite network drifts away from the planned point")
        ok, fix = False, "choose an attracting fixed point (q* with chi_q < 1)"
    return Reason(name, quantity, value, None if limit is None else float(limit), ok,
                  None if limit is None else float(limit), fix, detail)


def _growth(p: Propagation, depth: int) -> Reason:
    name, quantity = "gradient growth", "chi_1^L (mean field)"
    growth = p.gradient_growth
    c1 = p.chi_1
    if growth is None or not math.isfinite(c1):
        return _not_computed(name, quantity, "chi_1 is infinite (the activation jumps)"
                             if not math.isfinite(c1) else "no depth")
    ok = 1.0 / GROWTH_LIMIT <= growth <= GROWTH_LIMIT
    per_layer = abs(math.log(c1)) if c1 > 0 else math.inf
    limit = (math.log(GROWTH_LIMIT) / per_layer) if per_layer > 1e-12 else None
    detail = (f"squared gradient norms change by a factor {growth:.3g} over {depth} layers "
              f"(chi_1 = {c1:.6g} per layer; Schoenholz et al. 2017); the limit is a factor "
              f"e^6 = {GROWTH_LIMIT:.0f} either way, what 6 xi_c layers allow in the ordered phase")
    fix = None if ok else (f"move to the edge of chaos (chi_1 = 1), or use at most "
                           f"{limit:.0f} layers" if limit is not None else "move to chi_1 = 1")
    return Reason(name, quantity, growth, GROWTH_LIMIT, ok, limit, fix, detail)


def _learning_rate(ceiling: Any) -> Reason:
    name, quantity = "learning rate", "ceiling 2 / lambda_max (gradient descent, SGD)"
    if ceiling is None:
        return _not_computed(name, quantity, "no loss given (recommend(..., loss=...))")
    value = float(ceiling.learning_rate_ceiling)
    rec = float(ceiling.learning_rate)
    rule = getattr(ceiling, "learning_rate_rule", "")
    lam = getattr(ceiling, "lambda_max", None)
    detail = (f"at initialisation the loss curvature's top eigenvalue is "
              f"{lam:.4g}, so gradient descent is stable below lr = {value:.4g}; "
              if lam is not None else f"gradient descent is stable below lr = {value:.4g}; ")
    detail += (f"recommended lr = {rec:.4g} ({rule}); between the ceiling and about twice it "
               "training may recover after a spike (Lewkowycz et al. 2020); it limits the step, "
               "not the depth; Adam is not covered")
    ok = math.isfinite(value) and value > 0
    fix = None if ok else "the curvature is not finite: fix the other reasons first"
    return Reason(name, quantity, value, value, ok, None, fix, detail)


def _finite_width(fw: FiniteWidth | None, why: str | None) -> list[Reason]:
    names = (("finite-width spread", "sd of ln q at the top, between networks", SPREAD_LIMIT),
             ("finite-width gradient spread", "sd of ln |gradient|^2 at the bottom",
              GRADIENT_SPREAD_LIMIT),
             ("finite-width drift", "relative drift of the typical q at the top", DRIFT_LIMIT))
    if fw is None:
        return [_not_computed(n, q, why or "no widths given") for n, q, _ in names]
    width = (f"width {fw.widths[0]}" if len(set(fw.widths[:-1])) == 1
             else f"widths {min(fw.widths[:-1])}-{max(fw.widths[:-1])}")
    fix = f"widen the hidden layers to about {fw.width_needed} units"
    if fw.depth_limit is not None:
        fix += f", or use at most {fw.depth_limit} layers at {width}"
    rough = ("" if fw.within_expansion else "; the corrections are of order 1 here, so the "
             "numbers give the direction and rough size only")
    typ = fw.top_typical_drift
    drift = typ if abs(typ) >= abs(fw.top_drift) else fw.top_drift
    out = [
        Reason(names[0][0], names[0][1], fw.top_log_sd, SPREAD_LIMIT, fw.spread_ok,
               float(fw.depth_limit) if fw.depth_limit is not None else None,
               None if fw.spread_ok else fix,
               f"at {width} the top layer's second moment varies between networks by a factor "
               f"e^{fw.top_log_sd:.3g} (one sd of the log-normal law, beta = sum 1/n = "
               f"{fw.beta:.3g}; Hanin & Nica 2019; Roberts, Yaida & Hanin 2022){rough}"),
        Reason(names[1][0], names[1][1], fw.gradient_spread, GRADIENT_SPREAD_LIMIT,
               fw.gradient_ok, None, None if fw.gradient_ok else fix,
               f"at {width} the squared gradient norm at the first layer varies by a factor "
               f"e^{fw.gradient_spread:.3g} per input and direction (Hanin 2018)"),
        Reason(names[2][0], names[2][1], drift, DRIFT_LIMIT, fw.drift_ok,
               float(fw.depth_limit) if fw.depth_limit is not None else None,
               None if fw.drift_ok else fix,
               f"at {width} the mean of q at the top moves by {100 * fw.top_drift:+.3g}% "
               f"(Jensen: the curvature of the length map under fluctuations) and the typical "
               f"network's by {100 * typ:+.3g}% of q = {fw.q_mean_field[-1]:.4g}{rough}"),
    ]
    return out


def _output(loss: str | None, n_classes: int | None, logit_variance: float | None,
            penultimate: float | None, margin: float | None, rule: QuadratureRule) -> Reason:
    name = "output layer"
    if loss is None or logit_variance is None:
        return _not_computed(name, "expected initial loss above ln K (nats)",
                             "no loss given (recommend(..., loss=...))")
    if loss == "mse":
        ok = logit_variance <= MSE_OUTPUT_LIMIT
        fix = None if ok else (f"scale the readout down so that each output's variance is below "
                               f"{MSE_OUTPUT_LIMIT:g} (the default plan uses 0.01)")
        return Reason(name, "output variance at initialisation", logit_variance,
                      MSE_OUTPUT_LIMIT, ok, None, fix,
                      f"each output starts with variance {logit_variance:.4g}, added to the "
                      f"initial mean squared error (limit {MSE_OUTPUT_LIMIT:g} for targets of "
                      "unit scale; ours, no source)")
    k = int(n_classes or 0)
    try:
        il = initial_loss(k, logit_variance, rule)
    except PropcalcError as err:
        return _not_computed(name, "expected initial loss above ln K (nats)", str(err))
    lim = float(margin) if margin is not None else 0.01 * math.log(k)
    ok = il.excess <= lim * (1 + 1e-6) + 1e-12
    fix = None
    if not ok:
        fix = "scale the readout for the loss (recommend's default, scale_output=True)"
        if penultimate is not None and penultimate > 0:
            try:
                sc = output_layer_scale(k, penultimate, lim, 0.0, n_samples=2000, rule=rule)
                fix = (f"scale the readout: sigma_w2 <= {sc.sigma_w2:.4g} with sigma_b2 = 0 "
                       f"(logit variance {sc.max_logit_variance:.4g}; recommend's default, "
                       "scale_output=True)")
            except PropcalcError:
                pass
    return Reason(name, "expected initial loss above ln K (nats)", il.excess, lim, ok, None, fix,
                  f"logit variance {logit_variance:.4g}: expected initial loss "
                  f"{il.expected_loss:.4g} nats, {il.excess:+.4g} from ln {k} (start near ln K: "
                  "common practice, no source)")


def _check_arguments(propagation: Any, depth: Any, widths: Any, loss: Any, n_classes: Any,
                     logit_variance: Any, learning_rate: Any, output_margin: Any) -> int:
    """Refuse what trainability cannot use, naming the argument; return the depth."""
    if not isinstance(propagation, Propagation):
        raise InvalidParameterError("propagation", "a Propagation (propcalc.propagation(...))",
                                    type(propagation).__name__)
    n = int(domains.check("depth", depth))
    if widths is not None and (isinstance(widths, (str, bytes)) or len(widths) != n):
        raise InvalidParameterError("widths", f"{n} widths, of layers 1..{n}", widths)
    if loss is not None and loss not in LOSSES:
        raise InvalidParameterError("loss", f"one of {', '.join(LOSSES)}", loss)
    if n_classes is not None and loss == "cross_entropy":  # mse: any number of outputs
        domains.check("n_classes", n_classes)
    if logit_variance is not None:
        check_nonnegative("logit_variance", logit_variance)
    _check_options(learning_rate, output_margin)
    return n


def _check_options(learning_rate: Any, output_margin: Any) -> None:
    """The options both verdicts take: a ceiling object and a positive margin."""
    if learning_rate is not None and not hasattr(learning_rate, "learning_rate_ceiling"):
        raise InvalidParameterError("learning_rate", "a LearningRateCeiling (the plan's "
                                    "learning_rate_details)", type(learning_rate).__name__)
    if output_margin is not None:
        check_positive("output_margin", output_margin)


def trainability(act: Activation | str, propagation: Propagation, depth: int, *,
                 widths: Sequence[int] | None = None, widths_missing: str | None = None,
                 learning_rate: Any = None, loss: str | None = None,
                 n_classes: int | None = None, logit_variance: float | None = None,
                 output_margin: float | None = None,
                 rule: QuadratureRule = DEFAULT_RULE) -> Verdict:
    """The verdict on a plain stack at (sigma_w2, sigma_b2) of ``propagation``.

    Parameters
    ----------
    act : str or Activation
        A built-in name, a formula in x, or an Activation (resolved once here).
    propagation : Propagation
        The mean-field report at the planned point, for this depth.
    depth : int
    widths : sequence of int, optional
        Units of layers 1..L (the last is the readout); finite-width reasons need them.
    widths_missing : str, optional
        Why the widths are not given (shown in the finite-width reasons).
    learning_rate : LearningRateCeiling, optional
        The plan's learning-rate analysis (attributes ``learning_rate_ceiling``,
        ``learning_rate``, ``learning_rate_rule``, ``lambda_max``).
    loss : str, optional
        "cross_entropy" or "mse" (the output-layer reason needs it).
    n_classes : int, optional
    logit_variance : float, optional
        Variance of each output at initialisation as planned (readout sigma_w2 times the
        penultimate second moment plus its sigma_b2).
    output_margin : float, optional
        The allowed excess over ln K (default 1% of ln K, as variants/output_layer).

    Returns
    -------
    Verdict
    """
    act = resolve(act)
    depth = _check_arguments(propagation, depth, widths, loss, n_classes, logit_variance,
                             learning_rate, output_margin)
    reasons = [_correlation(propagation, depth), _growth(propagation, depth),
               _learning_rate(learning_rate)]
    fw: FiniteWidth | None = None
    why = widths_missing
    if widths is not None and propagation.q_star is not None and propagation.q_star > 0:
        if len(widths) < 2:
            why = "a single layer: nothing accumulates over depth"
        else:
            try:
                fw = finite_width(act, propagation.sigma_w2, propagation.sigma_b2,
                                  list(widths), propagation.q_star, rule=rule)
            except PropcalcError as err:
                why = str(err)
    elif widths is not None:
        why = "no finite variance fixed point to expand around"
    reasons += _finite_width(fw, why)
    penultimate = None
    if propagation.q_star is not None and propagation.q_star > 0:
        penultimate = float(second_moment(act, propagation.q_star, rule))
    reasons.append(_output(loss, n_classes, logit_variance, penultimate, output_margin, rule))
    return _assemble(depth, reasons)


def _assemble(depth: int, reasons: list[Reason]) -> Verdict:
    failing = tuple(r.name for r in reasons if r.passes is False and r.decides)
    warnings = tuple(r.name for r in reasons if r.passes is False and not r.decides)
    missing = tuple(r.name for r in reasons if r.passes is None)
    limits = [(r.depth_limit, r.name) for r in reasons
              if r.depth_limit is not None and r.passes is not None]
    depth_limit, limited_by = min(limits) if limits else (None, None)
    head = reasons[0].detail
    parts = [head]
    for r in reasons[1:]:
        if r.passes is False:
            what = "fails" if r.decides else "is beyond its limit"
            parts.append(f"{r.name} {what} ({r.quantity} = {r.value:.3g}, limit {r.limit:.3g}): "
                         f"{r.fix}")
    lr = next(r for r in reasons if r.name == "learning rate")
    if lr.passes:
        parts.append(f"keep the learning rate below {lr.value:.3g}")
    if depth_limit is not None and limited_by != "correlation depth":
        parts.append(f"{limited_by} limits the depth to about {depth_limit:.0f} layers")
    elif depth_limit is None and reasons[0].passes:
        fwr = next(r for r in reasons if r.name == "finite-width spread")
        if fwr.passes is None:
            parts.append("finite width not checked (" + fwr.detail[len("not computed: "):] + ")")
    trainable = not failing
    if not trainable:
        parts.append("not trainable as planned")
    elif warnings:
        parts.append("trainable as planned by the deciding reasons, with the warnings above "
                     "(finite-width limits are ours, no source)")
    else:
        parts.append("trainable as planned")
    return Verdict(trainable, depth, depth_limit, limited_by, failing, warnings, missing,
                   "; ".join(parts), tuple(reasons))
