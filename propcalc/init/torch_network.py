"""Apply a network plan to a torch module in place, and plan a module in one call.

:func:`apply_network_plan` sets the weights and biases of every Linear and Conv
layer that a :class:`~propcalc.init.network_plan.NetworkPlan` plans, through the
:class:`~propcalc.init.torch_reader.ModuleReading` that says which module each
block of the description comes from:

* Gaussian weights ``N(0, sigma_w2 / fan_in)`` and biases ``N(0, sigma_b2)``, with the
  module's own fan-in (``in_features``, or ``in_channels / groups * prod(kernel)``);
* orthogonal dense weights: a Haar-random semi-orthogonal matrix times
  ``sqrt(sigma_w2 max(1, out / in))`` (the rule of :mod:`propcalc.init.draw`; Mezzadri
  2007 for the Haar law), every entry of mean square ``sigma_w2 / in``;
* delta-orthogonal convolutions (Xiao et al. 2018, section 4): zero everywhere but the
  centre tap, which is such an orthogonal matrix with fan-in ``in_channels``;
* numbers that the reading made part of a layer (``weight_factor``, ``bias_factor``)
  are divided out, so the module with its numbers computes the planned network.

A residual weight the plan changes cannot be changed in the code: it is applied as a
scale of the branch's last weight block (skipping dropout after it), which gives the
same network at initialisation (not the same training dynamics as a constant
multiplier in the code would). Draws are float64 numpy from a seeded generator,
copied in place under ``torch.no_grad()`` in each parameter's dtype and device.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..networks.blocks import Attention, Block, Convolution, Dense, Dropout
from ..networks.description import network as parse_network
from ..results import Result
from .draw import SeedLike, semi_orthogonal
from .network_plan import NetworkPlan, network_plan
from .torch_adapter import PlanMismatchError
from .torch_reader import ModuleReading, read_module

__all__ = ["AppliedLayer", "ModulePlan", "apply_network_plan", "plan_module"]


@dataclass(frozen=True)
class AppliedLayer(Result):
    """What was written into one torch layer.

    Attributes
    ----------
    module : str
        Qualified name of the layer.
    path : str
        The block's JSON pointer in the description.
    sigma_w2, sigma_b2 : float or None
        The layer's own weight variance times its fan-in, and bias variance, as drawn
        (None when only a residual weight was applied, by scaling what was there).
    weights : str
        "gaussian", "orthogonal", "delta_orthogonal", or "kept" (scaled only).
    fan_in : int
    scale : float
        Extra multiplier from a residual weight (1 when none).
    """

    module: str
    path: str
    sigma_w2: float | None
    sigma_b2: float | None
    weights: str
    fan_in: int
    scale: float = 1.0


@dataclass(frozen=True)
class ModulePlan(Result):
    """A module read, planned and initialised.

    Attributes
    ----------
    reading : ModuleReading
    plan : NetworkPlan
    layers : tuple of AppliedLayer
    """

    reading: ModuleReading
    plan: NetworkPlan
    layers: tuple[AppliedLayer, ...]


def _fan_in(m: Any) -> int:
    import torch.nn as nn

    if isinstance(m, nn.Linear):
        return int(m.in_features)
    return int(m.in_channels) // int(m.groups) * math.prod(int(k) for k in m.kernel_size)


def _weight(m: Any, sw: float, kind: str, rng: np.random.Generator, name: str) -> np.ndarray:
    import torch.nn as nn

    shape = tuple(m.weight.shape)
    if kind == "delta_orthogonal" and isinstance(m, nn.Linear):
        kind = "gaussian"  # a Linear read as a convolution over flattened positions
    fan_in = _fan_in(m)
    if kind == "gaussian":
        return rng.standard_normal(shape) * math.sqrt(sw / fan_in)
    rows = shape[0]
    if kind == "orthogonal":
        cols = int(np.prod(shape[1:]))
        return (semi_orthogonal(rows, cols, rng) * math.sqrt(sw * max(1.0, rows / cols))
                ).reshape(shape)
    kernel = shape[2:]
    if int(m.groups) != 1 or any(k % 2 == 0 for k in kernel):
        raise PlanMismatchError(f"layer '{name}' cannot take delta-orthogonal weights: it needs "
                                "one group and odd kernel sizes (a centre tap)")
    cols = shape[1]
    out = np.zeros(shape)
    centre = (slice(None), slice(None)) + tuple(k // 2 for k in kernel)
    out[centre] = semi_orthogonal(rows, cols, rng) * math.sqrt(sw * max(1.0, rows / cols))
    return out


def _residual_scales(read: list[Any], planned: list[Any], prefix: str,
                     out: dict[str, float]) -> None:
    """Branch weight ratios planned / read, by the path of the residual block."""
    for i, (a, b) in enumerate(zip(read, planned)):
        path = f"{prefix}/{i}"
        if "residual" in a and "residual" in b:
            wa, wb = a["residual"].get("weight", 1.0), b["residual"].get("weight", 1.0)
            if wa != wb:
                if wa == 0.0:
                    raise PlanMismatchError(f"the residual block at {path} has weight 0 in the "
                                            "module: a planned weight cannot be applied by "
                                            "scaling its branch")
                out[path] = wb / wa
            _residual_scales(a["residual"]["branch"], b["residual"]["branch"],
                             f"{path}/residual/branch", out)


def _last_weight(branch: tuple[Block, ...], path: str) -> str:
    for j in range(len(branch) - 1, -1, -1):
        b = branch[j]
        if isinstance(b, (Dense, Convolution, Attention)):
            return f"{path}/residual/branch/{j}"
        if not isinstance(b, Dropout):
            break
    raise PlanMismatchError(f"the residual block at {path}: its branch does not end in a dense, "
                            "convolution or attention block (dropout aside), so a planned "
                            "branch weight cannot be applied in place; multiply the branch in "
                            "the code")


def _block_at(blocks: tuple[Block, ...], path: str) -> Block:
    parts = path.strip("/").split("/")[1:]
    b: Any = None
    items: Any = blocks
    while parts:
        b = items[int(parts[0])]
        parts = parts[1:]
        if parts:
            assert parts[:2] == ["residual", "branch"]
            items, parts = b.branch, parts[2:]
    return b


def apply_network_plan(module: Any, plan: NetworkPlan, reading: ModuleReading,
                       seed: SeedLike = None) -> tuple[AppliedLayer, ...]:
    """Write a network plan into the module's layers, in place.

    Parameters
    ----------
    module : torch.nn.Module
        The module that ``reading`` was read from.
    plan : NetworkPlan
        From :func:`propcalc.network_plan` of ``reading.description``.
    reading : ModuleReading
        From :func:`propcalc.read_module`.
    seed : int, SeedSequence, Generator or None

    Returns
    -------
    tuple of AppliedLayer

    Raises
    ------
    PlanMismatchError
        When the plan is not for this reading (a block it plans is not in the reading,
        or is planned per copy of a repeat), a planned bias has no parameter, or a
        changed branch weight has no last weight block to go to; nothing is changed.
    """
    import torch

    if not isinstance(plan, NetworkPlan) or not isinstance(reading, ModuleReading):
        raise PlanMismatchError("apply_network_plan needs a NetworkPlan and the ModuleReading "
                                f"it was made from, got {type(plan).__name__} and "
                                f"{type(reading).__name__}")
    modules = dict(module.named_modules())
    scales: dict[str, float] = {}
    _residual_scales(reading.description["blocks"], plan.description["blocks"], "/blocks",
                     scales)
    extra = {}
    for path, r in scales.items():
        block: Any = _block_at(reading.network.blocks, path)
        last = _last_weight(block.branch, path)
        extra[last] = extra.get(last, 1.0) * r
    todo: list[tuple[str, str, float, float, str, float]] = []
    planned = {b.path: b for b in plan.blocks}
    for b in plan.blocks:
        if b.copies != "all":
            raise PlanMismatchError(f"the plan's block at {b.path} is planned per copy of a "
                                    "repeat: make the plan from reading.description")
    for path in list(planned) + [p for p in extra if p not in planned]:
        try:
            mb = reading.block(path)
        except KeyError:
            raise PlanMismatchError(f"the plan's block at {path} is not in the reading: make "
                                    "the plan from reading.description") from None
        if path in planned and planned[path].kind != mb.kind:
            raise PlanMismatchError(f"the plan's block at {path} is a {planned[path].kind} "
                                    f"block but the reading's is a {mb.kind} block: make the "
                                    "plan from reading.description")
        if mb.module is None or (mb.module not in modules and "output" not in mb.roles):
            raise PlanMismatchError(f"the block at {path} has no torch layer to write")
        if path in planned:
            bi = planned[path]
            todo.append((mb.module, path, bi.sigma_w2 / mb.weight_factor,
                         bi.sigma_b2 / mb.bias_factor, bi.weights, extra.get(path, 1.0)))
        else:
            todo.append((mb.roles.get("output", mb.module), path, math.nan, math.nan, "",
                         extra[path]))
    rng = np.random.default_rng(seed) if not isinstance(seed, np.random.Generator) else seed
    arrays = []
    for name, path, sw, sb, kind, scale in todo:
        m = modules.get(name)
        if m is None or not hasattr(m, "weight"):
            raise PlanMismatchError(f"no layer '{name}' in the module for the block at {path}")
        if math.isnan(sw):  # a branch weight only: scale what is there
            w = m.weight.detach().double().cpu().numpy() * scale
            bias = None if m.bias is None else m.bias.detach().double().cpu().numpy() * scale
        else:
            if m.bias is None and sb > 0.0:
                raise PlanMismatchError(f"layer '{name}' has no bias but the plan sets "
                                        f"sigma_b2 = {sb:.6g} for the block at {path}")
            w = _weight(m, sw, kind, rng, name) * scale
            bias = None if m.bias is None else rng.standard_normal(m.bias.shape) * \
                math.sqrt(sb) * scale
        arrays.append((m, w, bias))
    with torch.no_grad():
        for m, w, bias in arrays:
            m.weight.copy_(torch.from_numpy(w).to(dtype=m.weight.dtype, device=m.weight.device))
            if bias is not None:
                m.bias.copy_(torch.from_numpy(bias).to(dtype=m.bias.dtype, device=m.bias.device))
    import torch.nn as nn

    def drawn(name: str, kind: str) -> str:
        linear = isinstance(modules[name], nn.Linear)
        return "gaussian" if (kind == "delta_orthogonal" and linear) else (kind or "kept")

    return tuple(AppliedLayer(name, path, None if math.isnan(sw) else sw,
                              None if math.isnan(sb) else sb, drawn(name, kind),
                              _fan_in(modules[name]), scale)
                 for name, path, sw, sb, kind, scale in todo)


def plan_module(module: Any, example: Any, *, target: float | None = None, q0: float = 1.0,
                c0: float = 0.0, max_gradient: float | None = 10.0,
                distribution: str = "gaussian", convolution: str = "gaussian",
                q_star: float | None = None, seed: SeedLike = None,
                scales: str = "measured", loss: str | None = None,
                n_classes: int | None = None, batch_size: int | None = None,
                momentum: float = 0.0, scale_output: bool = True) -> ModulePlan:
    """Read a module, plan its network and write the plan into it, in place.

    Parameters are those of :func:`propcalc.read_module` (``example``, ``scales``),
    :func:`propcalc.network_plan` (``target``, ``q0``, ``c0``, ``max_gradient``,
    ``distribution``, ``convolution``, ``q_star``; with ``loss`` and ``batch_size`` the
    readout is scaled for the loss unless ``scale_output`` is False, and the plan carries
    its learning rate) and :func:`apply_network_plan` (``seed``).

    Returns
    -------
    ModulePlan
    """
    reading = read_module(module, example, scales=scales)
    plan = network_plan(reading.network, q0=q0, c0=c0, target=target,
                        max_gradient=max_gradient, distribution=distribution,
                        convolution=convolution, q_star=q_star, loss=loss,
                        n_classes=n_classes, batch_size=batch_size, momentum=momentum,
                        scale_output=scale_output)
    parse_network(plan.description)
    layers = apply_network_plan(module, plan, reading, seed)
    return ModulePlan(reading, plan, layers)
