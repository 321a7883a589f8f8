"""PyTorch modules for shaped activations (torch is imported inside the functions).

* :func:`shaped_module` turns a :class:`~propcalc.shaping.results.ShapedActivation`
  into an ``nn.Module``: ``gamma * (phi(alpha * x + beta) + delta)`` for the
  affine form, ``sqrt(2 / (1 + a^2)) * leaky_relu(x, a)`` for the slope form.
* :func:`activation_module` does the same for any Activation.

A built-in phi maps to torch's own operation (so the module runs on any
device and supports double backward); a typed formula or an Activation made
of Python functions goes through a numpy bridge: a ``torch.autograd.Function``
whose forward evaluates phi and whose backward multiplies by the exact phi'
on the CPU in float64 (first derivatives only).
"""

from __future__ import annotations

import math
from typing import Any

from ..activations.base import Activation
from ..activations.builtins import SELU_ALPHA, SELU_SCALE
from .transform import is_registry_builtin, substitute

__all__ = ["TORCH_HINT", "torch_function", "activation_module", "shaped_module"]

TORCH_HINT = ("this needs PyTorch (propcalc's optional `torch` extra): install a CPU or GPU "
              "build of torch")


def _torch() -> Any:
    try:
        import torch
    except ImportError:
        raise ImportError(TORCH_HINT) from None
    return torch


def torch_function(act: Activation) -> Any:
    """A callable ``x -> phi(x)`` on tensors for ``act``.

    Built-ins use torch's operations (the same formulas as propcalc's built-ins:
    softplus as ``max(x, 0) + log1p(exp(-|x|))`` with no linear cut-off, selu with
    the constants of Klambauer et al. 2017); anything else the numpy bridge.
    """
    torch = _torch()
    F = torch.nn.functional
    if is_registry_builtin(act):
        p = act.params
        table = {
            "linear": lambda x: x,
            "step": lambda x: (x >= 0).to(x.dtype),
            "sigmoid": torch.sigmoid,
            "tanh": torch.tanh,
            "relu": torch.relu,
            "leaky_relu": lambda x: F.leaky_relu(x, float(p.get("slope", 0.01))),
            "elu": lambda x: torch.where(x > 0, x, float(p.get("alpha", 1.0))
                                         * torch.expm1(torch.clamp(x, max=0.0))),
            "selu": lambda x: SELU_SCALE * torch.where(
                x > 0, x, SELU_ALPHA * torch.expm1(torch.clamp(x, max=0.0))),
            "softplus": lambda x: torch.clamp(x, min=0.0) + torch.log1p(torch.exp(-x.abs())),
            "gelu": lambda x: F.gelu(x),
            "gelu_tanh": lambda x: F.gelu(x, approximate="tanh"),
            "silu": F.silu,
            "swish": lambda x: x * torch.sigmoid(float(p.get("beta", 1.0)) * x),
            "mish": F.mish,
            "erf": torch.erf,
            "hard_tanh": F.hardtanh,
        }
        if act.name in table:
            return table[act.name]
    bridge = _bridge(torch)
    return lambda x: bridge.apply(x, act)


_BRIDGE: list[Any] = []


def _bridge(torch: Any) -> Any:
    """The autograd Function that evaluates an Activation with numpy (made once)."""
    if _BRIDGE:
        return _BRIDGE[0]

    class NumpyActivation(torch.autograd.Function):
        """phi and phi' of a propcalc Activation, on the CPU in float64."""

        @staticmethod
        def forward(ctx: Any, x: Any, act: Activation) -> Any:  # type: ignore[override]
            ctx.save_for_backward(x)
            ctx.act = act
            arr = x.detach().to("cpu", torch.float64).numpy()
            return torch.from_numpy(act.value(arr)).to(device=x.device, dtype=x.dtype)

        @staticmethod
        def backward(ctx: Any, grad: Any) -> Any:  # type: ignore[override]
            (x,) = ctx.saved_tensors
            arr = x.detach().to("cpu", torch.float64).numpy()
            slope = torch.from_numpy(ctx.act.derivative(arr)).to(device=x.device, dtype=x.dtype)
            return grad * slope, None

    _BRIDGE.append(NumpyActivation)
    return NumpyActivation


def activation_module(act: Activation) -> Any:
    """An ``nn.Module`` applying ``act`` elementwise (see :func:`torch_function`)."""
    torch = _torch()
    fn = torch_function(act)

    class ActivationModule(torch.nn.Module):
        def __init__(self) -> None:
            super().__init__()
            self.label = act.label

        def forward(self, x: Any) -> Any:
            return fn(x)

        def extra_repr(self) -> str:
            return self.label

    return ActivationModule()


def shaped_module(shaped: Any) -> Any:
    """An ``nn.Module`` computing the shaped activation phi_hat of ``shaped``.

    Parameters
    ----------
    shaped : ShapedActivation
        From :func:`propcalc.shape_activation`.

    Returns
    -------
    torch.nn.Module
        ``forward(x) = gamma * (phi(alpha * x + beta) + delta)`` (affine form) or
        ``sqrt(2 / (1 + a^2)) * leaky_relu(x, a)`` (slope form), with the numbers
        as Python floats (no parameters to train).
    """
    torch = _torch()
    p = dict(shaped.params)
    if shaped.form == "slope":
        slope = float(p["slope"])
        gain = math.sqrt(2.0 / (1.0 + slope * slope))
        F = torch.nn.functional

        def fn(x: Any) -> Any:
            return gain * F.leaky_relu(x, slope)
        text = f"sqrt(2 / (1 + a^2)) leaky_relu(x, a), a = {slope:.6g}"
    else:
        base = shaped.base_activation
        phi = torch_function(base)
        alpha, beta = float(p["alpha"]), float(p["beta"])
        gamma, delta = float(p["gamma"]), float(p["delta"])

        def fn(x: Any) -> Any:
            return gamma * (phi(alpha * x + beta) + delta)
        text = (substitute(shaped.formula, {k: f"({v:.6g})" for k, v in p.items()})
                if shaped.formula else f"gamma (phi(alpha x + beta) + delta) with {p}")

    class ShapedActivationModule(torch.nn.Module):
        def __init__(self) -> None:
            super().__init__()
            self.text = text

        def forward(self, x: Any) -> Any:
            return fn(x)

        def extra_repr(self) -> str:
            return self.text

    return ShapedActivationModule()

