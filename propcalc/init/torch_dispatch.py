"""Which torch module, function or tensor method a graph node calls, and the walker's rule for it.

The kinds read (everything else is refused by name, with the node):

========================  ==========================================================
block                     torch
========================  ==========================================================
dense                     ``nn.Linear`` (per position; after a flatten of P positions,
                          a convolution whose kernel and stride cover them)
convolution               ``nn.Conv1d/2d/3d``
activation                activation modules, ``torch.*`` / ``F.*`` functions and
                          tensor methods (:mod:`propcalc.init.torch_ops`)
residual                  ``+``, ``-``, ``torch.add`` (with ``alpha``), ``Tensor.add``
                          of the stream and a branch of it, with numbers on either side
norm                      ``nn.LayerNorm``, ``nn.RMSNorm``, ``nn.BatchNorm1d/2d/3d``
dropout                   ``nn.Dropout``, ``F.dropout``
pooling                   ``nn.AvgPool*``, ``nn.MaxPool*``, ``nn.AdaptiveAvgPool*``,
                          ``nn.AdaptiveMaxPool*`` (to one position), their ``F.*``
                          forms, ``mean`` / ``sum`` over position dimensions
attention                 ``nn.MultiheadAttention``, ``F.scaled_dot_product_attention``,
                          ``nn.TransformerEncoderLayer``, ``nn.TransformerEncoder``
(nothing)                 views, reshapes, flatten, permutes, dtype casts,
                          ``nn.Identity``, ``nn.Flatten``, ``nn.Unflatten``
========================  ==========================================================
"""

from __future__ import annotations

import operator
from typing import Any

from .torch_links import Link, scaled
from .torch_ops import (
    IDENTITY_METHODS,
    ModuleReadError,
    identity_function,
    module_activation,
    named_arguments,
)
from .torch_walk import (
    ADDS,
    AUX,
    Pair,
    Part,
    Parts,
    Walker,
    _what,
    activation_of,
)

__all__ = ["visit", "SUPPORTED"]

#: What is read, in words (for refusals).
SUPPORTED = ("Linear, Conv1d/2d/3d, activations, residual sums, LayerNorm, RMSNorm, "
             "BatchNorm, Dropout, average/max/adaptive pooling and means over positions, "
             "MultiheadAttention, scaled_dot_product_attention, TransformerEncoder(Layer), "
             "reshapes and Flatten")


def visit(w: Walker, node: Any) -> Any:
    """The value of one call node (see the module docstring)."""
    if node.op == "call_module":
        return _module(w, node)
    if node.op == "call_function":
        return _function(w, node)
    return _method(w, node)


def _streams(values: list[Any]) -> list[Any]:
    return [v for v in values if isinstance(v, (Link, Part, Parts, Pair))]


def _refuse(node: Any, kind: str) -> ModuleReadError:
    return ModuleReadError(node.name, _what(node), f"{kind} that the network description does "
                                                   f"not have; propcalc reads {SUPPORTED}")


def _sizes(value: Any, dims: int) -> tuple[int, ...]:
    if isinstance(value, (tuple, list)):
        return tuple(int(v) for v in value)
    return (int(value),) * dims


def _dims_of(m: Any) -> int:
    return int(type(m).__name__[-2])


def _module(w: Walker, node: Any) -> Any:
    import torch.nn as nn

    from .torch_attention import encoder, encoder_layer, multihead

    m = w.modules[str(node.target)]
    if isinstance(m, nn.MultiheadAttention):
        return multihead(w, node, m)
    if isinstance(m, nn.TransformerEncoderLayer):
        return encoder_layer(w, node, m)
    if isinstance(m, nn.TransformerEncoder):
        return encoder(w, node, m)
    values = [w.value(a) for a in node.args] + [w.value(v) for v in node.kwargs.values()]
    if not _streams(values):
        return w.plain(node, values)
    link = values[0]
    if len(_streams(values)) > 1 or not isinstance(link, Link):
        raise _refuse(node, f"nn.{type(m).__name__} called on several streams or a piece of one")
    spec = module_activation(m)
    if spec is not None:
        return w.activation_link(node, link, spec, str(node.target))
    if isinstance(m, (nn.Identity, nn.Flatten, nn.Unflatten)):
        return link
    if isinstance(m, nn.Linear):
        return w.linear(node, m, link)
    if isinstance(m, nn.modules.conv._ConvNd):
        return w.conv(node, m, link)
    norms: tuple[type, ...] = (nn.LayerNorm, nn.modules.batchnorm._BatchNorm)
    if hasattr(nn, "RMSNorm"):
        norms += (nn.RMSNorm,)
    if isinstance(m, norms):
        return w.norm(node, m, link)
    if isinstance(m, nn.Dropout):
        return w.dropout(node, float(m.p), link)
    return _pool_module(w, node, m, link)


def _pool_module(w: Walker, node: Any, m: Any, link: Link) -> Link:
    import torch.nn as nn

    pool = nn.modules.pooling
    if isinstance(m, (pool._AvgPoolNd, pool._MaxPoolNd)):
        d = _dims_of(m)
        kind = "max" if isinstance(m, pool._MaxPoolNd) else "average"
        if kind == "max" and any(x != 1 for x in _sizes(m.dilation, d)):
            raise _refuse(node, "dilated max pooling")
        window = _sizes(m.kernel_size, d)
        stride = _sizes(m.stride, d) if m.stride else window
        return w.pooling(node, kind, window, stride, m.padding, link)
    adaptive = (pool._AdaptiveAvgPoolNd, pool._AdaptiveMaxPoolNd)
    if isinstance(m, adaptive):
        kind = "max" if isinstance(m, pool._AdaptiveMaxPoolNd) else "average"
        return _adaptive(w, node, kind, m.output_size, _dims_of(m), link)
    raise _refuse(node, f"a module (nn.{type(m).__name__})")


def _adaptive(w: Walker, node: Any, kind: str, output: Any, d: int, link: Link) -> Link:
    from ..networks.fields import MAX_KERNEL

    grid = w.shape(node.args[0])[-d:]
    out = tuple(g if o is None else int(o) for g, o in
                zip(grid, output if isinstance(output, (tuple, list)) else (output,) * d))
    if all(o == 1 for o in out) and kind == "average":
        total = 1
        for g in grid:
            total *= g
        return w.global_average(node, link, total)
    if any(g % o for g, o in zip(grid, out)) or any(g // o > MAX_KERNEL for g, o in
                                                     zip(grid, out)):
        raise ModuleReadError(node.name, _what(node), f"adaptive pooling from {list(grid)} to "
                              f"{list(out)} positions has unequal windows (or windows beyond "
                              f"{MAX_KERNEL}): not described")
    window = tuple(g // o for g, o in zip(grid, out))
    return w.pooling(node, kind, window, window, 0, link)


def _function(w: Walker, node: Any) -> Any:
    import torch
    import torch.nn.functional as F

    from .torch_attention import scaled_dot_product

    t = node.target
    values = [w.value(a) for a in node.args] + [w.value(v) for v in node.kwargs.values()]
    if t is operator.getitem:
        return _getitem(w, node)
    if t is getattr:  # x.shape, x.dtype...
        return AUX
    if not _streams(values):
        return w.plain(node, values)
    if t in ADDS:
        return w.add(node, node.args[0], node.args[1], ADDS[t])
    if t in (torch.add, torch.sub):
        a = named_arguments(("input", "other", "alpha"), tuple(node.args), dict(node.kwargs))
        sign = 1.0 if t is torch.add else -1.0
        return w.add(node, a["input"], a["other"], sign * float(a.get("alpha") or 1.0))
    if t in (operator.mul, operator.imul, torch.mul):
        return w.multiply(node, node.args[0], node.args[1])
    if t in (operator.truediv, operator.itruediv, torch.div, torch.true_divide):
        return w.multiply(node, node.args[0], node.args[1], divide=True)
    if t is operator.neg:
        return scaled(w.link_of(node, node.args[0]), -1.0, node.name, _what(node))
    spec = activation_of(node)
    if spec is not None:
        return w.activation_link(node, w.link_of(node, node.args[0]), spec)
    if identity_function(t):
        return values[0]
    if t is F.scaled_dot_product_attention:
        return scaled_dot_product(w, node)
    if t is F.dropout:
        a = named_arguments(("input", "p", "training", "inplace"), tuple(node.args),
                            dict(node.kwargs))
        link = w.link_of(node, a["input"])
        return w.dropout(node, float(a.get("p", 0.5)), link) if a.get("training", True) else link
    if t in (torch.mean, torch.sum):
        a = named_arguments(("input", "dim", "keepdim"), tuple(node.args), dict(node.kwargs))
        return w.reduce(node, w.link_of(node, a["input"]), a.get("dim"), t is torch.sum)
    if t in (torch.chunk, torch.split, torch.unbind):
        return _parts(w, node, str(t.__name__))
    return _pool_function(w, node, t)


def _pool_function(w: Walker, node: Any, t: Any) -> Any:
    import torch.nn.functional as F

    pools = {F.avg_pool1d: ("average", 1), F.avg_pool2d: ("average", 2),
             F.avg_pool3d: ("average", 3), F.max_pool1d: ("max", 1), F.max_pool2d: ("max", 2),
             F.max_pool3d: ("max", 3)}
    adaptive = {F.adaptive_avg_pool1d: 1, F.adaptive_avg_pool2d: 2, F.adaptive_avg_pool3d: 3}
    link = w.link_of(node, node.args[0])
    if t in pools:
        kind, d = pools[t]
        a = named_arguments(("input", "kernel_size", "stride", "padding"), tuple(node.args),
                            dict(node.kwargs))
        window = _sizes(a["kernel_size"], d)
        stride = _sizes(a["stride"], d) if a.get("stride") else window
        return w.pooling(node, kind, window, stride, a.get("padding", 0), link)
    if t in adaptive:
        a = named_arguments(("input", "output_size"), tuple(node.args), dict(node.kwargs))
        return _adaptive(w, node, "average", a["output_size"], adaptive[t], link)
    raise _refuse(node, "a function")


def _parts(w: Walker, node: Any, name: str) -> Parts:
    """chunk / split / unbind of a stream into equal parts (a fused q, k, v projection)."""
    src = w.value(node.args[0])
    if not isinstance(src, Link):
        raise _refuse(node, "a split of a piece of the stream")
    shape = w.shape(node.args[0])
    if name == "chunk":
        a = named_arguments(("input", "chunks", "dim"), tuple(node.args), dict(node.kwargs))
        count = int(a["chunks"])
    elif name == "unbind":
        a = named_arguments(("input", "dim"), tuple(node.args), dict(node.kwargs))
        count = shape[int(a.get("dim", 0))]
    else:
        a = named_arguments(("input", "split_size_or_sections", "dim"), tuple(node.args),
                            dict(node.kwargs))
        size, dim = a["split_size_or_sections"], int(a.get("dim", 0))
        if not isinstance(size, int) or shape[dim] % size:
            raise _refuse(node, "a split into unequal parts")
        count = shape[dim] // size
    return Parts(src, count)


def _getitem(w: Walker, node: Any) -> Any:
    src, index = w.value(node.args[0]), node.args[1]
    if isinstance(src, Pair):
        if index == 0:
            return src.link
        raise ModuleReadError(node.name, _what(node), "uses the attention weights returned by "
                                                      "MultiheadAttention: not described")
    if isinstance(src, Parts) and isinstance(index, int):
        return Part(src.link, index % src.count, src.count)
    if isinstance(src, (Link, Part)):
        raise _refuse(node, "indexing the stream (selecting positions or units)")
    return w.plain(node, [src])


def _method(w: Walker, node: Any) -> Any:
    name = str(node.target)
    values = [w.value(a) for a in node.args] + [w.value(v) for v in node.kwargs.values()]
    if not _streams(values):
        return w.plain(node, values)
    src = values[0]
    if name in ("size", "dim", "numel"):
        return AUX
    if name in IDENTITY_METHODS and isinstance(src, (Link, Part, Parts)):
        return src
    spec = activation_of(node)
    if spec is not None:
        return w.activation_link(node, w.link_of(node, node.args[0]), spec)
    if name in ("add", "add_", "sub", "sub_"):
        a = named_arguments(("self", "other", "alpha"), tuple(node.args), dict(node.kwargs))
        sign = 1.0 if name.startswith("add") else -1.0
        return w.add(node, a["self"], a["other"], sign * float(a.get("alpha") or 1.0))
    if name in ("mul", "mul_", "div", "div_"):
        return w.multiply(node, node.args[0], node.args[1], divide=name.startswith("div"))
    if name in ("mean", "sum"):
        a = named_arguments(("self", "dim", "keepdim"), tuple(node.args), dict(node.kwargs))
        return w.reduce(node, w.link_of(node, a["self"]), a.get("dim"), name == "sum")
    if name in ("chunk", "split", "unbind"):
        return _parts(w, node, name)
    raise _refuse(node, "a tensor method")
