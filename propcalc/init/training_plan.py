"""The parts of a plan that depend on the loss: the output layer and the learning rate.

:func:`propcalc.recommend` calls :func:`plan_for_loss` when a loss is given. Two things follow
from the loss (issue "will it train", sections 1 and 3):

* the output layer (by default; ``scale_output=False`` keeps the hidden layers' scale):
  for softmax cross-entropy the largest last-layer ``sigma_w2`` whose expected initial loss stays
  within 1% of ln K (:func:`propcalc.variants.output_layer.output_layer_scale`; the target is
  common practice, no source); for MSE the output variance :data:`MSE_OUTPUT_VARIANCE` per output
  (so the initial loss exceeds that of predicting zero by that much: common practice, no source);
  the last layer's bias variance is 0 in both (a bias adds output variance and carries no signal);
* the learning-rate ceiling of the planned network
  (:func:`propcalc.training.learning_rate.learning_rate_ceiling`), computed with the planned
  output layer, since the last layer's scale multiplies every lower layer's share of the
  tangent kernel.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

from .. import domains
from ..activations.base import Activation
from ..errors import InvalidParameterError, check_int
from ..meanfield.maps import second_moment, variance_map
from ..numerics.quadrature import DEFAULT_RULE, QuadratureRule
from ..training.learning_rate import LOSSES, LearningRateCeiling, learning_rate_ceiling
from ..training.ntk import UnsupportedKernelError
from ..variants.output_layer import OutputLayerScale, output_layer_scale
from .layers import Layer

__all__ = ["MSE_OUTPUT_VARIANCE", "LossPlan", "OutputLayerRule", "output_layer_rule", "plan_for_loss",
           "refuse_without_loss"]

#: the planned variance of each output for MSE (common practice, no source)
MSE_OUTPUT_VARIANCE = 0.01


@dataclass(frozen=True)
class LossPlan:
    """What the loss changes in a plan (an internal carrier, not a result)."""

    last_sigma_w2: float
    last_sigma_b2: float
    output_layer: str
    output_scale: OutputLayerScale | None
    ceiling: LearningRateCeiling
    notes: tuple[str, ...]


@dataclass(frozen=True)
class OutputLayerRule:
    """The last layer planned for a loss (an internal carrier, not a result).

    Attributes
    ----------
    sigma_w2, sigma_b2 : float
        The last layer's variances (the hidden scale when not scaled).
    description : str
        What the plan says of its output layer (``InitPlan.output_layer``,
        ``NetworkPlan.output_layer``).
    scale : OutputLayerScale or None
        The cross-entropy analysis (None for MSE or when not scaled).
    notes : tuple of str
    """

    sigma_w2: float
    sigma_b2: float
    description: str
    scale: OutputLayerScale | None
    notes: tuple[str, ...]


def output_layer_rule(loss: str, n_classes: int | None, penultimate: float,
                      fan_in: int | None, sigma_w2: float, sigma_b2: float, *,
                      scale_output: bool,
                      rule: QuadratureRule = DEFAULT_RULE) -> OutputLayerRule:
    """The last layer's (sigma_w2, sigma_b2) for a loss: the one rule of plain and network plans.

    Parameters
    ----------
    loss : {"cross_entropy", "mse"}
    n_classes : int or None
        K (needed for cross-entropy).
    penultimate : float
        The second moment per unit of what feeds the last layer (``E[phi(h)^2]`` in a plain
        stack); the output variance is ``sigma_w2 penultimate + sigma_b2`` (Poole et al. 2016,
        eq. 3, without an activation after it).
    fan_in : int or None
        The last layer's fan-in (for the weight std of the cross-entropy analysis).
    sigma_w2, sigma_b2 : float
        The last layer at the hidden scale (kept when not scaled; reported beside).
    scale_output : bool
        False keeps the hidden scale.

    Returns
    -------
    OutputLayerRule
        Cross-entropy: the largest sigma_w2 whose expected initial loss is within 1% of ln K
        (:func:`propcalc.variants.output_layer.output_layer_scale`), sigma_b2 = 0; MSE:
        ``sigma_w2 = MSE_OUTPUT_VARIANCE / penultimate``, sigma_b2 = 0 (module docstring).
    """
    notes: list[str] = []
    scale: OutputLayerScale | None = None
    sw, sb = sigma_w2, sigma_b2
    if not scale_output:
        description = "as the hidden layers (scale_output=False)"
    elif penultimate <= 0.0:
        description = "as the hidden layers (the penultimate activations are 0)"
    elif loss == "cross_entropy":
        k = int(n_classes or 0)
        scale = output_layer_scale(k, penultimate, None, 0.0, fan_in, sigma_w2, sigma_b2,
                                   rule=rule)
        description = (f"scaled for cross-entropy: sigma_w2 = {scale.sigma_w2:.6g}, sigma_b2 = 0, "
                       f"logit variance {scale.max_logit_variance:.4g}, expected initial loss "
                       f"within {scale.margin:.4g} nats of ln {k} (common practice, no source)")
        sw, sb = scale.sigma_w2, 0.0
        if scale.current is not None:
            notes.append(f"at the hidden layers' scale the last layer would give logit variance "
                         f"{scale.current.logit_variance:.4g} and an expected initial loss "
                         f"{scale.current.excess:+.4g} nats from ln {k}")
    else:
        sw, sb = MSE_OUTPUT_VARIANCE / penultimate, 0.0
        description = (f"scaled for MSE: sigma_w2 = {sw:.6g}, sigma_b2 = 0, output variance "
                       f"{MSE_OUTPUT_VARIANCE:g} per output (common practice, no source)")
    return OutputLayerRule(sw, sb, description, scale, tuple(notes))


def _widths(layers: Sequence[Layer | None], widths: Sequence[int] | None) -> list[int]:
    if widths is not None:
        return list(widths)
    if any(layer is None for layer in layers):
        raise InvalidParameterError(
            "widths", "given when a loss is given", None,
            "the tangent kernel, hence the learning-rate ceiling, grows with the width")
    for i, layer in enumerate(layers):
        assert layer is not None
        if layer.kind != "dense":
            raise UnsupportedKernelError(
                f"layers[{i}] is a convolution: the learning-rate ceiling is computed for plain "
                "stacks of dense layers only")
    out = [layers[0].fan_in] + [layer.fan_out for layer in layers]  # type: ignore[union-attr]
    for i in range(1, len(layers)):
        if layers[i].fan_in != layers[i - 1].fan_out:  # type: ignore[union-attr]
            raise InvalidParameterError(f"layers[{i}]", "fan_in equal to the previous fan_out",
                                        layers[i].fan_in)  # type: ignore[union-attr]
    return out


def refuse_without_loss(momentum: float, **options: Any) -> None:
    """Without a loss, refuse every loss option given (it would be read and ignored).

    ``options`` maps each option's name to its value (None: not given); ``momentum`` must be 0.
    Every option takes effect or is refused (issue 12 section 2).
    """
    for name, value in options.items():
        if value is not None:
            raise InvalidParameterError(name, "absent when no loss is given (give loss=)",
                                        "an array" if name == "inputs" else value)
    if momentum != 0.0:
        raise InvalidParameterError("momentum", "0 when no loss is given (give loss=)", momentum)


def plan_for_loss(act: Activation, layers: Sequence[Layer | None], widths: Sequence[int] | None,
                  sigma_w2: Sequence[float], sigma_b2: Sequence[float], q_input: float, *,
                  loss: str, n_classes: int | None, batch_size: int | None, momentum: float,
                  input_correlation: Any, inputs: Any, scale_output: bool,
                  rule: QuadratureRule = DEFAULT_RULE) -> LossPlan:
    """The output layer and the learning-rate ceiling for a plan (module docstring)."""
    if loss not in LOSSES:
        raise InvalidParameterError("loss", f"one of {', '.join(LOSSES)}", loss)
    if batch_size is None:
        raise InvalidParameterError("batch_size", "given when a loss is given", None)
    b = domains.check("batch_size", batch_size)
    ws = _widths(layers, widths)
    k = ws[-1]
    if n_classes is None:
        if loss == "cross_entropy":
            raise InvalidParameterError("n_classes", "given for loss 'cross_entropy'", None)
    elif check_int("n_classes", n_classes, 1) != k:
        raise InvalidParameterError("n_classes", f"equal to the last layer's width ({k})",
                                    n_classes)
    sw, sb = list(sigma_w2), list(sigma_b2)
    n = len(sw)
    # the second moment of what feeds the last layer: the data for one layer, else
    # E[phi(h)^2] at the variance reached after n - 1 layers (Poole et al. 2016, eq. 3)
    if n == 1:
        m2 = q_input
    else:
        q = sw[0] * q_input + sb[0]
        for i in range(1, n - 1):
            q = float(variance_map(act, q, sw[i], sb[i], rule))
        m2 = float(second_moment(act, q, rule))
    out = output_layer_rule(loss, k, m2, ws[-2], sw[-1], sb[-1], scale_output=scale_output,
                            rule=rule)
    sw[-1], sb[-1] = out.sigma_w2, out.sigma_b2
    notes = list(out.notes)
    ceiling = learning_rate_ceiling(
        act, ws, sw, sb, loss=loss, batch_size=b, n_classes=k, q0=q_input,
        input_correlation=0.0 if input_correlation is None else input_correlation,
        inputs=inputs, momentum=momentum, rule=rule)
    notes.append(f"learning rate: ceiling {ceiling.learning_rate_ceiling:.4g} "
                 f"(2 (1 + momentum) / lambda_max, lambda_max = {ceiling.lambda_max:.4g} for "
                 f"{loss}, batch {b}, {ceiling.optimiser}); recommended "
                 f"{ceiling.learning_rate:.4g} ({ceiling.learning_rate_rule})")
    return LossPlan(sw[-1], sb[-1], out.description, out.scale, ceiling, tuple(notes))
