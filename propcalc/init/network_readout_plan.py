"""The readout of a network plan, scaled for the loss (issue 15, part 3, for networks of blocks).

When the network's last elementary block is a dense readout
(:func:`propcalc.training.network_readout` decides it, as for the verdict's output-layer
reason), :func:`plan_readout` sets its ``sigma_w2`` and ``sigma_b2`` with the plain plan's rule,
:func:`propcalc.init.training_plan.output_layer_rule` (one implementation), from the second
moment per unit ``q_in`` of the stream that feeds it in the planned network: each output then
has variance ``sigma_w2 q_in + sigma_b2`` (Poole et al. 2016, eq. 3, without an activation
after it), so

* cross-entropy: the largest ``sigma_w2`` whose expected initial loss is within 1% of ln K
  (:func:`propcalc.variants.output_layer.output_layer_scale`), ``sigma_b2 = 0``;
* MSE: ``sigma_w2 = 0.01 / q_in``, ``sigma_b2 = 0`` (output variance 0.01; common practice,
  no source).

``scale_output=False`` keeps the hidden scale and says so. Where the last block is not a dense
readout, or its input's second moment is not known, or it is the last copy of a repeat of
several copies (one value for every copy in the plan), nothing changes and the text says why.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, replace
from typing import Any

from .. import domains
from ..networks.blocks import Block, Dense, Network, Repeat
from ..networks.propagate import NetworkPropagation
from ..training.network_readout import network_readout
from ..variants.output_layer import OutputLayerScale
from .training_plan import output_layer_rule

__all__ = ["ReadoutPlan", "plan_readout"]


@dataclass(frozen=True)
class ReadoutPlan:
    """The readout as planned (an internal carrier, not a result).

    Attributes
    ----------
    network : Network
        The planned network with its readout (unchanged when not scaled).
    inits : tuple
        The plan's block records, the readout's updated.
    description : str
        What the plan says of its output layer (``NetworkPlan.output_layer``).
    scale : OutputLayerScale or None
        The cross-entropy analysis.
    notes : tuple of str
    changed : bool
        Whether the readout's variances changed.
    """

    network: Network
    inits: tuple[Any, ...]
    description: str
    scale: OutputLayerScale | None
    notes: tuple[str, ...]
    changed: bool


def _last_path(blocks: tuple[Block, ...], prefix: str = "/blocks") -> tuple[str, str | None]:
    """The JSON pointer of the last elementary block, and the pointer of a repeat of several
    copies on the way to it (None when there is none)."""
    path, shared = f"{prefix}/{len(blocks) - 1}", None
    last = blocks[-1]
    while isinstance(last, Repeat):
        if last.times > 1 and shared is None:
            shared = path
        path, last = f"{path}/repeat/blocks/{len(last.blocks) - 1}", last.blocks[-1]
    return path, shared


def _with_last(blocks: tuple[Block, ...], sigma_w2: float, sigma_b2: float) -> tuple[Block, ...]:
    """The blocks with the last elementary block (a dense block) given these variances."""
    last = blocks[-1]
    if isinstance(last, Repeat):
        return blocks[:-1] + (replace(last, blocks=_with_last(last.blocks, sigma_w2, sigma_b2)),)
    assert isinstance(last, Dense)
    return blocks[:-1] + (replace(last, sigma_w2=sigma_w2, sigma_b2=sigma_b2),)


def _last_dense(blocks: tuple[Block, ...]) -> Dense:
    last = blocks[-1]
    while isinstance(last, Repeat):
        last = last.blocks[-1]
    assert isinstance(last, Dense)
    return last


def plan_readout(given: Network, planned: Network, result: NetworkPropagation,
                 inits: Sequence[Any], loss: str, n_classes: int | None, *,
                 scale_output: bool) -> ReadoutPlan:
    """Scale the planned network's readout for ``loss`` (module docstring).

    Parameters
    ----------
    given : Network
        The network as described (its pointers name the readout in ``inits``).
    planned : Network
        The planned network, readout at the hidden scale.
    result : NetworkPropagation
        ``planned``'s propagation (the second moment that feeds the readout).
    inits : sequence of BlockInit
        The plan's records of the weight blocks.
    loss : {"cross_entropy", "mse"}
    n_classes : int or None
        K (default: the readout's width; must equal it).
    scale_output : bool
        False keeps the hidden scale.

    Returns
    -------
    ReadoutPlan
    """
    same = ReadoutPlan(planned, tuple(inits), "", None, (), False)
    readout = network_readout(result, loss, n_classes)
    if readout.why is not None:
        return replace(same, description=f"not scaled: {readout.why}")
    assert readout.penultimate is not None
    path, shared = _last_path(given.blocks)
    if shared is not None:
        return replace(same, description=(
            f"not scaled: the readout {path} is the last copy of the repeat at {shared}, whose "
            "copies share one value in the plan; write the readout after the repeat to scale "
            "it"))
    last = _last_dense(planned.blocks)
    index = next((i for i, b in enumerate(inits) if b.path == path), None)
    fan_in = None if index is None else inits[index].fan_in
    rule = output_layer_rule(loss, readout.n_classes, readout.penultimate, fan_in,
                             last.sigma_w2, last.sigma_b2, scale_output=scale_output)
    if not scale_output or (rule.sigma_w2, rule.sigma_b2) == (last.sigma_w2, last.sigma_b2):
        return replace(same, description=rule.description, scale=rule.scale, notes=rule.notes)
    domains.check_planned("sigma_w2", rule.sigma_w2, path,
                          f"the stream feeding the readout has second moment "
                          f"{readout.penultimate:.3g} (scale_output=False keeps the readout as "
                          "described)")
    records = list(inits)
    if index is not None:
        old = records[index]
        std = (math.sqrt(rule.sigma_w2 / old.fan_in) if old.weight_std is not None and old.fan_in
               else old.weight_std)
        records[index] = replace(old, sigma_w2=rule.sigma_w2, sigma_b2=rule.sigma_b2,
                                 weight_std=std, rule=f"readout {rule.description}")
    network = replace(planned, blocks=_with_last(planned.blocks, rule.sigma_w2, rule.sigma_b2))
    return ReadoutPlan(network, tuple(records), rule.description, rule.scale, rule.notes, True)
