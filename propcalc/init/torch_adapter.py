"""Apply an initialisation plan to a PyTorch module (the ``torch`` extra).

torch is imported inside the functions only: importing this module never
needs it. The module's ``nn.Linear`` and ``nn.Conv1d/2d/3d`` layers (and
their subclasses) are taken in ``module.modules()`` order, which is the
order of registration (for ``nn.Sequential``, the order of the layers), and
paired with the plan's layers one to one. Weights and biases are drawn by
:func:`propcalc.draw.draw_plan` (numpy, float64, seeded) and copied in place
under ``torch.no_grad()``, converted to each parameter's dtype and device.

Anything that disagrees (the number of layers, a weight shape, the fans, a
missing bias where the plan has sigma_b2 > 0) raises
:class:`PlanMismatchError` naming the layer index, the module's name and
both shapes and fans; nothing is changed in that case.
"""

from __future__ import annotations

import warnings
from typing import Any

from .draw import SeedLike, draw_plan
from ..errors import PropcalcError
from .layers import Layer
from .plan import InitPlan

__all__ = ["PlanMismatchError", "UnmodelledLayerWarning", "module_layers", "apply_plan",
           "TORCH_INSTALL_HINT"]

TORCH_INSTALL_HINT = ("this needs PyTorch >= 2.1 (propcalc's optional `torch` extra): install a "
                      "CPU or GPU build of torch")


class PlanMismatchError(PropcalcError, ValueError):
    """The module's layers and the plan's layers disagree (count, shape or fans)."""


class UnmodelledLayerWarning(UserWarning):
    """:func:`module_layers` met layers a plain-stack plan does not model (LayerNorm...)."""


#: how many skipped layers a warning names before it counts the rest
_NAMED_SKIPS = 6


def _torch() -> Any:
    try:
        import torch
    except ImportError:
        raise ImportError(TORCH_INSTALL_HINT) from None
    return torch


def _targets(module: Any) -> list[tuple[str, Any]]:
    torch = _torch()
    nn = torch.nn
    if not isinstance(module, nn.Module):
        raise PlanMismatchError(f"module must be a torch.nn.Module, got {type(module).__name__}")
    kinds = (nn.Linear, nn.Conv1d, nn.Conv2d, nn.Conv3d)
    return [(name or "<root>", m) for name, m in module.named_modules() if isinstance(m, kinds)]


def _layer_of(index: int, name: str, m: Any) -> Layer:
    torch = _torch()
    weight = m.weight
    if isinstance(weight, torch.nn.parameter.UninitializedParameter):
        raise PlanMismatchError(f"layer {index} ('{name}', {type(m).__name__}) is not "
                                "initialised yet (a lazy module): run one forward pass first")
    if isinstance(m, torch.nn.Linear):
        return Layer.dense(int(m.in_features), int(m.out_features))
    groups = int(getattr(m, "groups", 1))
    # weight shape (out, in / groups, *kernel): fan_in = in / groups * prod(kernel)
    return Layer.conv(int(m.in_channels) // groups, int(m.out_channels), tuple(m.kernel_size))


def _skipped(module: Any) -> list[str]:
    """The module's parts that a plain stack of Linear/Conv layers and one activation does
    not model: leaf modules other than those layers, activation functions and reshapes
    (normalisation, dropout, pooling, embeddings, custom layers), and any module holding
    parameters or buffers of its own (attention's projections)."""
    nn = _torch().nn
    kept = (nn.Linear, nn.Conv1d, nn.Conv2d, nn.Conv3d, nn.Identity, nn.Flatten, nn.Unflatten)
    out = []
    for name, m in module.named_modules():
        if isinstance(m, kept):
            continue
        if (type(m).__module__ == "torch.nn.modules.activation"
                and not isinstance(m, nn.MultiheadAttention)):
            continue  # the activation the plan is made for (checked by the caller)
        own = (next(m.parameters(recurse=False), None) is not None
               or next(m.buffers(recurse=False), None) is not None)
        if own or next(m.children(), None) is None:
            out.append(f"{type(m).__name__} '{name or '<root>'}'")
    return out


def _describe(layer: Layer) -> str:
    return (f"{layer.kind} weight shape {tuple(layer.weight_shape)} "
            f"(fan_in {layer.fan_in}, fan_out {layer.fan_out})")


def module_layers(module: Any) -> tuple[Layer, ...]:
    """The module's Linear and Conv layers as :class:`propcalc.Layer` shapes, in order.

    Use it to make a plan that fits a model:
    ``recommend(act, layers=module_layers(model))``.

    Warns
    -----
    UnmodelledLayerWarning
        Naming the modules it skips that change the signal (LayerNorm, BatchNorm,
        Dropout, pooling, attention, embeddings, custom layers): the plan treats the model
        as a plain stack, so it does not account for them (issue 12 section 2: they were
        skipped silently). :func:`propcalc.read_module` and :func:`propcalc.plan_module`
        read such modules as networks of blocks.

    Raises
    ------
    ImportError
        If torch is not installed.
    PlanMismatchError
        If ``module`` is not an ``nn.Module`` or a layer is still lazy.
    """
    layers = tuple(_layer_of(i + 1, name, m) for i, (name, m) in enumerate(_targets(module)))
    skipped = _skipped(module)
    if skipped:
        named = ", ".join(skipped[:_NAMED_SKIPS])
        more = f" and {len(skipped) - _NAMED_SKIPS} more" if len(skipped) > _NAMED_SKIPS else ""
        warnings.warn(f"module_layers reads only the Linear and Conv layers; the plan does not "
                      f"model {named}{more}: use propcalc.plan_module to plan the model as a "
                      "network of blocks", UnmodelledLayerWarning, stacklevel=2)
    return layers


def apply_plan(module: Any, plan: InitPlan, seed: SeedLike = None, *,
               bias_distribution: str = "normal", require_bias: bool = True) -> Any:
    """Set the weights and biases of a module's Linear/Conv layers from a plan, in place.

    Parameters
    ----------
    module : torch.nn.Module
    plan : InitPlan
        From :func:`propcalc.recommend`; a depth-only plan takes its shapes
        from the module, one with shapes must agree with it layer by layer.
    seed : int, SeedSequence, Generator or None
        As for :func:`propcalc.draw.draw_plan` (an int gives a reproducible
        draw).
    bias_distribution : str
        As for :func:`propcalc.draw.draw_plan` (default "normal").
    require_bias : bool
        If True (default), a layer without a bias where the plan has
        sigma_b2 > 0 is an error (the network would not follow the plan);
        if False such layers keep no bias.

    Returns
    -------
    torch.nn.Module
        The same module, for chaining.

    Raises
    ------
    ImportError
        If torch is not installed.
    PlanMismatchError
        If the count of layers, a weight shape or the fans disagree, or a
        bias is missing; the module is left unchanged.

    Examples
    --------
    >>> import torch, propcalc                                   # doctest: +SKIP
    >>> from propcalc.init.torch_adapter import apply_plan, module_layers  # doctest: +SKIP
    >>> net = torch.nn.Sequential(torch.nn.Linear(64, 256), torch.nn.Tanh(),
    ...                           torch.nn.Linear(256, 10))       # doctest: +SKIP
    >>> plan = propcalc.recommend(propcalc.activation("tanh"),
    ...                           layers=module_layers(net))     # doctest: +SKIP
    >>> apply_plan(net, plan, seed=0)                            # doctest: +SKIP
    """
    torch = _torch()
    if not isinstance(plan, InitPlan):
        raise PlanMismatchError(f"plan must be an InitPlan (from propcalc.recommend), "
                                f"got {type(plan).__name__}")
    targets = _targets(module)
    if len(targets) != len(plan.layers):
        names = ", ".join(f"'{n}'" for n, _ in targets[:8]) + (", ..." if len(targets) > 8 else "")
        raise PlanMismatchError(
            f"the module has {len(targets)} Linear/Conv layers ({names or 'none'}) but the plan "
            f"has {len(plan.layers)} layers: make the plan with "
            "recommend(..., layers=module_layers(module))")
    shapes: list[Layer] = []
    for i, ((name, m), init) in enumerate(zip(targets, plan.layers), start=1):
        given = _layer_of(i, name, m)
        planned = init.layer
        if planned is not None and (planned.weight_shape != given.weight_shape
                                    or planned.kind != given.kind
                                    or planned.fan_in != given.fan_in):
            raise PlanMismatchError(
                f"layer {i} ('{name}', {type(m).__name__}) has {_describe(given)} but the plan's "
                f"layer {i} has {_describe(planned)}")
        if m.bias is None and init.sigma_b2 > 0 and require_bias:
            raise PlanMismatchError(
                f"layer {i} ('{name}', {type(m).__name__}) has no bias but the plan sets "
                f"sigma_b2 = {init.sigma_b2:.6g}: add a bias, plan with sigma_b2 = 0, or pass "
                "require_bias=False")
        shapes.append(given)
    arrays = draw_plan(plan, seed, bias_distribution=bias_distribution, layers=shapes)
    with torch.no_grad():
        for (_, m), la in zip(targets, arrays.layers):
            w = torch.from_numpy(la.weight).to(dtype=m.weight.dtype, device=m.weight.device)
            m.weight.copy_(w)
            if m.bias is not None:
                m.bias.copy_(torch.from_numpy(la.bias).to(dtype=m.bias.dtype,
                                                          device=m.bias.device))
    return module
