"""What each torch module or function means as a block of a network description.

The tables of :func:`propcalc.read_module` (:mod:`propcalc.init.torch_reader`):
activations (modules, functions and tensor methods) as built-in names or formulas,
the operations that leave the stream as it is (views, reshapes, dtype casts), the
weight scales of linear and convolution layers and the gains of normalisation
layers. torch is imported inside the functions that need it.

Weight scales are read one of two ways (the ``scales`` argument):

* ``"measured"``: from the module's tensors, ``sigma_w2 = fan_in * mean(W^2)`` and
  ``sigma_b2 = mean(b^2)``: the second moments the mean-field maps use (Poole et al.
  2016, eq. 3, with W_ij of variance sigma_w2 / fan_in);
* ``"default"``: the scales of torch's own initialisation, whatever the tensors now
  hold: ``kaiming_uniform_(a=sqrt(5))`` gives ``U(-1/sqrt(fan_in), 1/sqrt(fan_in))``
  for the weights of Linear and Conv layers, so ``sigma_w2 = 1/3``, and the same law
  for their biases, ``sigma_b2 = 1 / (3 fan_in)`` (the variance of U(-a, a) is
  a^2 / 3); MultiheadAttention's projections are ``xavier_uniform_`` on the stacked
  (3E, E) matrix, variance ``2 / (E + 3E)``, so ``sigma_w2 = 1/2``, with zero biases
  (the torch source: ``nn.Linear.reset_parameters``, ``_ConvNd.reset_parameters``,
  ``nn.MultiheadAttention._reset_parameters``; Glorot & Bengio 2010 for the Xavier
  law, He et al. 2015 for the Kaiming law).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from typing import Any

from ..errors import PropcalcError

__all__ = [
    "ModuleReadError",
    "SCALES",
    "module_activation",
    "function_activation",
    "method_activation",
    "IDENTITY_METHODS",
    "identity_function",
    "weight_scales",
    "default_scales",
    "orthogonal_kind",
    "ORTHOGONAL_SPREAD",
    "norm_gain",
    "named_arguments",
    "FUNCTION_ARGUMENTS",
]

#: The ways weight scales are read (see the module docstring).
SCALES = ("measured", "default")


class ModuleReadError(PropcalcError, ValueError):
    """A torch module could not be read into a network description.

    Attributes
    ----------
    node : str
        The torch.fx node (the name in the traced graph), or "" for the module itself.
    what : str
        What the node is ("call_module nn.GroupNorm 'blocks.0.norm'", ...).
    reason : str
    """

    def __init__(self, node: str, what: str, reason: str) -> None:
        self.node, self.what, self.reason = node, what, reason
        where = f"node '{node}' ({what})" if node else what
        super().__init__(f"{where}: {reason}")


# ---------------------------------------------------------------- activations
Spec = tuple[str, dict[str, float]]


def _num(value: Any) -> float:
    return float(value)


def _module_table() -> dict[type, Callable[[Any], Spec | None]]:
    import torch.nn as nn

    def gelu(m: Any) -> Spec:
        return ("gelu_tanh", {}) if m.approximate == "tanh" else ("gelu", {})

    def softplus(m: Any) -> Spec:
        # torch switches to x above threshold / beta: e^-20 from softplus at the default
        beta = _num(m.beta)
        return ("softplus", {}) if beta == 1.0 else ("softplus(beta * x) / beta", {"beta": beta})

    def hardtanh(m: Any) -> Spec:
        lo, hi = _num(m.min_val), _num(m.max_val)
        if (lo, hi) == (-1.0, 1.0):
            return "hard_tanh", {}
        return "min(max(x, low), high)", {"low": lo, "high": hi}

    def elu(m: Any) -> Spec:
        return ("elu", {}) if _num(m.alpha) == 1.0 else ("elu", {"alpha": _num(m.alpha)})

    def celu(m: Any) -> Spec:
        # CELU (Barron 2017): max(0, x) + min(0, alpha (exp(x / alpha) - 1))
        return "max(x, 0) + min(0, alpha * expm1(x / alpha))", {"alpha": _num(m.alpha)}

    return {
        nn.ReLU: lambda m: ("relu", {}),
        nn.Tanh: lambda m: ("tanh", {}),
        nn.Sigmoid: lambda m: ("sigmoid", {}),
        nn.GELU: gelu,
        nn.SiLU: lambda m: ("silu", {}),
        nn.Mish: lambda m: ("mish", {}),
        nn.SELU: lambda m: ("selu", {}),
        nn.ELU: elu,
        nn.CELU: celu,
        nn.LeakyReLU: lambda m: ("leaky_relu", {"slope": _num(m.negative_slope)}),
        nn.Softplus: softplus,
        nn.Hardtanh: hardtanh,  # ReLU6 is a Hardtanh(0, 6) subclass
        nn.Softsign: lambda m: ("x / (1 + abs(x))", {}),
        nn.Hardswish: lambda m: ("x * min(max(x + 3, 0), 6) / 6", {}),
        nn.Hardsigmoid: lambda m: ("min(max(x + 3, 0), 6) / 6", {}),
        nn.Tanhshrink: lambda m: ("x - tanh(x)", {}),
        nn.LogSigmoid: lambda m: ("-softplus(-x)", {}),
    }


def module_activation(module: Any) -> Spec | None:
    """(built-in name or formula, parameters) of an activation module; None if it is not one."""
    table = _module_table()
    for kind in type(module).__mro__:
        if kind in table:
            return table[kind](module)
    return None


def named_arguments(names: tuple[str, ...], args: tuple[Any, ...],
                    kwargs: dict[str, Any]) -> dict[str, Any]:
    """The arguments of a call by name: positional ones matched to ``names`` in order.

    (torch's builtin functions have no Python signature to bind against.)
    """
    out = dict(zip(names, args))
    out.update(kwargs)
    return out


def _function_table() -> dict[Any, Callable[[dict[str, Any]], Spec]]:
    import torch
    import torch.nn.functional as F

    def leaky(a: dict[str, Any]) -> Spec:
        return "leaky_relu", {"slope": _num(a.get("negative_slope", 0.01))}

    def elu(a: dict[str, Any]) -> Spec:
        alpha = _num(a.get("alpha", 1.0))
        return ("elu", {}) if alpha == 1.0 else ("elu", {"alpha": alpha})

    def gelu(a: dict[str, Any]) -> Spec:
        return ("gelu_tanh", {}) if a.get("approximate", "none") == "tanh" else ("gelu", {})

    def softplus(a: dict[str, Any]) -> Spec:
        beta = _num(a.get("beta", 1.0))
        return ("softplus", {}) if beta == 1.0 else ("softplus(beta * x) / beta", {"beta": beta})

    def hardtanh(a: dict[str, Any]) -> Spec:
        lo, hi = _num(a.get("min_val", -1.0)), _num(a.get("max_val", 1.0))
        if (lo, hi) == (-1.0, 1.0):
            return "hard_tanh", {}
        return "min(max(x, low), high)", {"low": lo, "high": hi}

    plain = {"relu": "relu", "tanh": "tanh", "sigmoid": "sigmoid", "silu": "silu",
             "mish": "mish", "selu": "selu"}
    table: dict[Any, Callable[[dict[str, Any]], Spec]] = {}
    for name, spec in plain.items():
        for owner in (torch, F):
            fn = getattr(owner, name, None)
            if fn is not None:
                table[fn] = (lambda s: lambda a: (s, {}))(spec)
    table.update({F.leaky_relu: leaky, F.elu: elu, F.gelu: gelu, F.softplus: softplus,
                  F.hardtanh: hardtanh,
                  F.relu6: lambda a: ("min(max(x, low), high)", {"low": 0.0, "high": 6.0}),
                  F.softsign: lambda a: ("x / (1 + abs(x))", {}),
                  F.hardswish: lambda a: ("x * min(max(x + 3, 0), 6) / 6", {})})
    return table


def function_activation(target: Any, args: tuple[Any, ...],
                        kwargs: dict[str, Any]) -> Spec | None:
    """(name or formula, parameters) of an activation called as a function; None otherwise."""
    table = _function_table()
    try:
        rule = table.get(target)
    except TypeError:  # an unhashable target
        return None
    if rule is None:
        return None
    names = FUNCTION_ARGUMENTS.get(getattr(target, "__name__", ""), ("input",))
    return rule(named_arguments(names, args, kwargs))


#: Positional argument names of the activation functions with parameters (torch.nn.functional).
FUNCTION_ARGUMENTS: dict[str, tuple[str, ...]] = {
    "leaky_relu": ("input", "negative_slope", "inplace"),
    "elu": ("input", "alpha", "inplace"),
    "gelu": ("input", "approximate"),
    "softplus": ("input", "beta", "threshold"),
    "hardtanh": ("input", "min_val", "max_val", "inplace"),
}

_METHOD_ACTIVATIONS = {"relu": "relu", "relu_": "relu", "tanh": "tanh", "tanh_": "tanh",
                       "sigmoid": "sigmoid", "sigmoid_": "sigmoid"}


def method_activation(name: str) -> Spec | None:
    """(name, {}) of an activation called as a tensor method (``x.relu()``); None otherwise."""
    spec = _METHOD_ACTIVATIONS.get(name)
    return None if spec is None else (spec, {})


# ---------------------------------------------------------------- identities
#: Tensor methods that move or reshape values without changing any of them.
IDENTITY_METHODS = frozenset({
    "view", "reshape", "flatten", "permute", "transpose", "contiguous", "clone", "float",
    "double", "half", "bfloat16", "to", "type", "squeeze", "unsqueeze", "detach", "view_as",
    "reshape_as", "expand_as",
})


def identity_function(target: Any) -> bool:
    """Whether a called function only moves or reshapes values (no arithmetic)."""
    import torch

    names = ("flatten", "reshape", "permute", "transpose", "squeeze", "unsqueeze", "clone",
             "contiguous", "swapaxes", "movedim")
    return any(target is getattr(torch, n, None) for n in names)


# ---------------------------------------------------------------- weights
def _mean_square(t: Any) -> float:
    import torch

    with torch.no_grad():  # accumulated in float64 without a float64 copy of the tensor
        return float(torch.linalg.vector_norm(t.detach(), dtype=torch.float64)) ** 2 / t.numel()


def weight_scales(weight: Any, bias: Any, fan_in: int) -> tuple[float, float]:
    """Measured (sigma_w2, sigma_b2): ``fan_in * mean(W^2)`` and ``mean(b^2)`` (0 without bias)."""
    sw = fan_in * _mean_square(weight)
    sb = 0.0 if bias is None else _mean_square(bias)
    return sw, sb


def default_scales(kind: str, fan_in: int, has_bias: bool) -> tuple[float, float]:
    """torch's default (sigma_w2, sigma_b2) for "linear"/"conv" or "attention" projections
    (see the module docstring for the laws and their sources)."""
    if kind == "attention":
        return 0.5, 0.0
    # U(-1/sqrt(fan_in), 1/sqrt(fan_in)): variance 1 / (3 fan_in) for W and b
    return 1.0 / 3.0, (1.0 / (3.0 * fan_in) if has_bias else 0.0)


#: Relative spread of |W v|^2 / |v|^2 over three probes below which W counts as orthogonal.
ORTHOGONAL_SPREAD = 1e-4


def orthogonal_kind(weight: Any, conv: bool) -> str:
    """"orthogonal" (dense) or "delta_orthogonal" (convolution) when the weights are
    (scaled) orthogonal, else "gaussian".

    A probe, not a factorisation: ``|W v|^2 / |v|^2`` is the same for every v when the
    columns (or, for wide matrices, the rows through ``W^T``) are orthonormal up to one
    scale, and varies by about ``sqrt(2 / n)`` for Gaussian weights; three probes that
    agree to ORTHOGONAL_SPREAD (1e-4, well above float32 rounding and well below the
    Gaussian spread up to n ~ 1e8) decide it (cost O(n^2), not O(n^3)). A convolution counts
    as delta-orthogonal when every tap but the centre is zero and the centre is
    orthogonal (Xiao et al. 2018, section 4).
    """
    import torch

    with torch.no_grad():
        w = weight.detach()
        if not w.is_floating_point():
            return "gaussian"
        if conv:
            taps = w.shape[2:]
            if any(k % 2 == 0 for k in taps):
                return "gaussian"
            index = (slice(None), slice(None)) + tuple(k // 2 for k in taps)
            centre = w[index].clone()
            rest = w.clone()
            rest[index] = 0.0
            if bool(rest.any()):
                return "gaussian"
            w = centre
        else:
            w = w.reshape(w.shape[0], -1)
        if min(w.shape) < 2 or not bool(w.any()):
            return "gaussian"
        if w.shape[0] < w.shape[1]:
            w = w.T
        gen = torch.Generator().manual_seed(0)
        ratios = []
        for _ in range(3):  # matrix-vector products: O(n^2) and fast for one vector
            v = torch.randn(w.shape[1], generator=gen, dtype=w.dtype)
            ratios.append(float(torch.mv(w, v).double().square().sum())
                          / float(v.double().square().sum()))
        spread = (max(ratios) - min(ratios)) / (sum(ratios) / 3)
    if spread >= ORTHOGONAL_SPREAD:
        return "gaussian"
    return "delta_orthogonal" if conv else "orthogonal"


def norm_gain(weight: Any, bias: Any, node: str, what: str) -> float:
    """The gain of a normalisation layer: ``sqrt(mean(gamma^2))`` (1 without an affine part).

    Per-unit gains gamma_i multiply the per-unit second moments by gamma_i^2, whose mean
    over units is what the infinite-width stream sees. A nonzero shift (beta) is not a
    block of the description: refused.
    """
    if bias is not None:
        shift = _mean_square(bias)
        if shift != 0.0:
            raise ModuleReadError(node, what, f"its shift (bias) is not zero (root mean square "
                                              f"{math.sqrt(shift):.3g}); the description models "
                                              "normalisation layers with a gain only, as torch "
                                              "initialises them (shift 0)")
    if weight is None:
        return 1.0
    return math.sqrt(_mean_square(weight))
