"""The walk over a traced torch graph: every node to a link of a chain (or to nothing).

:class:`Walker` visits the nodes of a ``torch.fx`` graph in order and gives each a
value: a :class:`~propcalc.init.torch_links.Link` for tensors that come from the
input, or a marker for everything else (shapes and other plain values, tensors
that do not depend on the input, the pieces of a fused query-key-value
projection, the pair returned by MultiheadAttention). Attention is read by
:mod:`propcalc.init.torch_attention`. torch is imported inside the functions.
"""

from __future__ import annotations

import math
import operator
from dataclasses import dataclass, replace
from typing import Any

from ..activations.resolver import resolve
from ..errors import PropcalcError
from ..networks.blocks import ActivationBlock, Attention, Convolution, Dense, Dropout, Norm, Pooling
from .torch_links import Info, Link, attention_pending, child, residual_link, root, scaled
from .torch_ops import (
    ModuleReadError,
    default_scales,
    function_activation,
    method_activation,
    norm_gain,
    orthogonal_kind,
    weight_scales,
)

__all__ = ["Walker", "Const", "Parts", "Part", "Pair", "AUX", "ADDS", "kernel_for", "unit_dim",
           "activation_of", "close_attention"]


class _Aux:
    """A value that is not a tensor (a shape, a size, None)."""


AUX = _Aux()


@dataclass(frozen=True)
class Const:
    """A tensor that does not come from the input (a parameter, a buffer, a constant)."""

    tensor: Any


@dataclass(frozen=True)
class Parts:
    """The pieces of a chunk/split/unbind of a stream (a fused query-key-value projection)."""

    link: Link
    count: int


@dataclass(frozen=True)
class Part:
    """Piece ``index`` of ``count`` of a stream split in equal parts."""

    link: Link
    index: int
    count: int
    scale: float = 1.0


@dataclass(frozen=True)
class Pair:
    """The (output, attention weights) pair of a MultiheadAttention module."""

    link: Link


def kernel_for(positions: int, grid: tuple[int, ...], max_size: int) -> tuple[int, ...] | None:
    """Kernel sizes (1 to 3, each at most ``max_size``) whose product is ``positions``:
    the grid itself when it fits, else a factorisation; None when there is none."""
    if grid and math.prod(grid) == positions and all(g <= max_size for g in grid) \
            and len(grid) <= 3:
        return tuple(grid)
    if positions <= max_size:
        return (positions,)
    for a in range(max_size, 1, -1):
        if positions % a == 0:
            rest = positions // a
            if rest <= max_size:
                return (a, rest)
            for b in range(max_size, 1, -1):
                if rest % b == 0 and rest // b <= max_size:
                    return (a, b, rest // b)
    return None


def unit_dim(shape: tuple[int, ...], width: int | None, channels_first: bool) -> int | None:
    """The dimension holding the units of a stream tensor (1 or the last), or None."""
    if width is None or len(shape) < 2:
        return None
    last = len(shape) - 1
    cands = [d for d in dict.fromkeys((1, last)) if shape[d] == width]
    if len(cands) == 2:
        return 1 if channels_first else last
    return cands[0] if cands else None


def _what(node: Any) -> str:
    if node.op == "call_module":
        return f"module '{node.target}'"
    if node.op == "call_method":
        return f"tensor method .{node.target}()"
    if node.op == "get_attr":
        return f"attribute '{node.target}'"
    if node.op == "placeholder":
        return f"input '{node.target}'"
    name = getattr(node.target, "__name__", str(node.target))
    module = getattr(node.target, "__module__", None) or ""
    owner = "torch" if module.startswith("torch") else module.split(".")[0] or "builtins"
    return f"function {owner}.{name}" if owner != "_operator" else f"operator {name}"


class Walker:
    """Read a traced graph node by node (see the module docstring).

    Parameters
    ----------
    gm : torch.fx.GraphModule
        The traced module, its nodes carrying ``tensor_meta`` from a shape propagation.
    scales : str
        "measured" or "default" (:mod:`propcalc.init.torch_ops`).
    """

    def __init__(self, gm: Any, scales: str) -> None:
        self.gm = gm
        self.modules = dict(gm.named_modules())
        self.scales = scales
        self.values: dict[str, Any] = {}
        self.notes: list[str] = []
        self.input_width: int | None = None
        self.input_node = ""

    # ------------------------------------------------------------ helpers
    def note(self, text: str) -> None:
        if text not in self.notes:
            self.notes.append(text)

    @staticmethod
    def shape(node: Any) -> tuple[int, ...]:
        meta = node.meta.get("tensor_meta") if hasattr(node, "meta") else None
        return tuple(int(s) for s in meta.shape) if hasattr(meta, "shape") else ()

    def value(self, arg: Any) -> Any:
        """The value of a node argument (plain Python values stay as they are)."""
        if hasattr(arg, "op") and hasattr(arg, "name"):
            return self.values[arg.name]
        if isinstance(arg, (list, tuple)):
            return type(arg)(self.value(a) for a in arg)
        return arg

    def link_of(self, node: Any, arg: Any) -> Link:
        v = self.value(arg)
        if isinstance(v, Link):
            return v
        raise ModuleReadError(node.name, _what(node), "its input is not the stream from the "
                                                      "module's input")

    def set_width(self, link: Link, fan_in: int, node: Any) -> None:
        """The units per position the stream must have for a layer of this fan-in."""
        if link.width is None and self.input_width is None:
            self.input_width = fan_in

    def dense_block(self, m: Any, node: Any) -> Dense:
        """The dense block of a Linear module used per position."""
        sw, sb, kind = self.layer_scales(m, int(m.in_features), node)
        return Dense(sw, sb, int(m.out_features), kind)

    def layer_scales(self, m: Any, fan_in: int, node: Any) -> tuple[float, float, str]:
        """(sigma_w2, sigma_b2, weights) of a Linear or Conv module."""
        import torch

        if isinstance(m.weight, torch.nn.parameter.UninitializedParameter):
            raise ModuleReadError(node.name, _what(node), "a lazy module not initialised yet: "
                                                          "run one forward pass first")
        if self.scales == "default":
            sw, sb = default_scales("linear", fan_in, m.bias is not None)
            return sw, sb, "gaussian"
        sw, sb = weight_scales(m.weight, m.bias, fan_in)
        return sw, sb, orthogonal_kind(m.weight, isinstance(m, torch.nn.modules.conv._ConvNd))

    def activation_link(self, node: Any, parent: Link, spec: tuple[str, dict[str, float]],
                        module: str | None = None, info: Info | None = None) -> Link:
        formula, params = spec
        try:
            act = resolve(formula, "formula", **params)
        except PropcalcError as exc:
            raise ModuleReadError(node.name, _what(node), f"its activation {formula!r} was "
                                                          f"refused: {exc}") from None
        block = ActivationBlock(formula, tuple(sorted(params.items())), act)
        return child(parent, block, info or Info(node.name, _what(node), module))

    # ------------------------------------------------------------ layers
    def linear(self, node: Any, m: Any, link: Link) -> Link:
        fused = close_attention(self, node, m, link)
        if fused is not None:
            return fused
        f_in, f_out = int(m.in_features), int(m.out_features)
        sw, sb, kind = self.layer_scales(m, f_in, node)
        if link.width is not None and link.width != f_in and isinstance(link.block, Attention):
            raise ModuleReadError(node.name, _what(node), f"in_features {f_in} does not match "
                                  f"the attention output's {link.width} units")
        info = Info(node.name, _what(node), str(node.target))
        w = link.width
        if w is None or f_in == w:
            self.set_width(link, f_in, node)
            return child(link, Dense(sw, sb, f_out, kind), info, width=f_out, grid=())
        if f_in % w == 0:
            from ..networks.fields import MAX_KERNEL

            positions = f_in // w
            kernel = kernel_for(positions, link.grid, MAX_KERNEL)
            if kernel is None:
                raise ModuleReadError(node.name, _what(node), f"reads {positions} positions of "
                                      f"{w} units flattened together, more than the description's "
                                      f"kernels hold ({MAX_KERNEL} per dimension, 3 dimensions)")
            self.note(f"{_what(node)} reads {positions} positions of {w} units flattened into "
                      f"{f_in} features: described as a convolution whose kernel and stride "
                      f"{list(kernel)} cover every position (the same layer)")
            return child(link, Convolution(sw, sb, kernel, kernel, f_out, "gaussian"), info,
                         width=f_out, grid=())
        raise ModuleReadError(node.name, _what(node), f"in_features {f_in} does not match the "
                              f"stream's {w} units per position (nor a multiple of them, as "
                              "after flattening positions into features)")

    def conv(self, node: Any, m: Any, link: Link) -> Link:
        import torch

        if isinstance(m, torch.nn.modules.conv._ConvTransposeNd):
            raise ModuleReadError(node.name, _what(node), "transposed convolutions are not "
                                                          "described")
        c_in, c_out, groups = int(m.in_channels), int(m.out_channels), int(m.groups)
        kernel = tuple(int(k) for k in m.kernel_size)
        if link.width is not None and link.width != c_in:
            raise ModuleReadError(node.name, _what(node), f"in_channels {c_in} does not match "
                                                          f"the stream's {link.width} units")
        self.set_width(link, c_in, node)
        fan_in = (c_in // groups) * math.prod(kernel)
        sw, sb, kind = self.layer_scales(m, fan_in, node)
        pad = m.padding if isinstance(m.padding, str) else tuple(int(p) for p in m.padding)
        if m.padding_mode == "zeros" and pad not in ("valid",) and \
                (pad == "same" or any(pad)):
            self.note(f"{_what(node)} pads with zeros: positions at the border see fewer "
                      "inputs, while the description's convolutions see every tap (circular "
                      "padding, Xiao et al. 2018); on small grids the border lowers q")
        if groups != 1:
            self.note(f"{_what(node)} has {groups} groups: its sigma_w2 is read with its own "
                      f"fan-in {fan_in} (the per-unit maps are those of a full convolution)")
        stride = tuple(int(s) for s in m.stride)
        block = Convolution(sw, sb, kernel, stride, c_out, kind)
        return child(link, block, Info(node.name, _what(node), str(node.target)), width=c_out,
                     grid=self.shape(node)[2:])

    def norm(self, node: Any, m: Any, link: Link) -> Link:
        block = self.norm_block(node, m, link, _what(node))
        return child(link, block, Info(node.name, _what(node), str(node.target)))

    def norm_block(self, node: Any, m: Any, link: Link, what: str) -> Norm:
        """The norm block of a LayerNorm, RMSNorm or BatchNorm module (``what`` names it)."""
        import torch
        import torch.nn as nn

        if isinstance(m, nn.modules.batchnorm._BatchNorm):
            n = int(m.num_features)
            if link.width is not None and n != link.width:
                raise ModuleReadError(node.name, what, f"num_features {n} does not match the "
                                                       f"stream's {link.width} units")
            kind, eps = "batch", float(m.eps)
            gain = norm_gain(m.weight, m.bias, node.name, what) if m.affine else 1.0
        else:
            shape = tuple(int(s) for s in m.normalized_shape)
            n = math.prod(shape)
            if link.width is not None and n % link.width:
                raise ModuleReadError(node.name, what, f"normalises {n} values, not the "
                                                       f"stream's {link.width} units per position")
            affine = bool(m.elementwise_affine)
            kind = "layer" if isinstance(m, nn.LayerNorm) else "rms"
            if m.eps is None:  # RMSNorm's default: the machine epsilon of the input's dtype
                dtype = node.meta["tensor_meta"].dtype
                eps = float(torch.finfo(dtype).eps)
            else:
                eps = float(m.eps)
            bias = getattr(m, "bias", None) if affine else None
            gain = norm_gain(m.weight if affine else None, bias, node.name, what)
        if not 0.0 <= eps <= 1.0:
            raise ModuleReadError(node.name, what, f"eps {eps} is outside [0, 1]")
        return Norm(kind, gain, eps)

    def dropout(self, node: Any, p: float, link: Link) -> Link:
        if p == 0.0:
            return link
        if not 0.0 < p < 1.0:
            raise ModuleReadError(node.name, _what(node), f"dropout probability {p} is not "
                                                          "in [0, 1)")
        return child(link, Dropout(1.0 - p), Info(node.name, _what(node),
                                                  str(node.target) if node.op ==
                                                  "call_module" else None))

    def pooling(self, node: Any, kind: str, window: tuple[int, ...],
                stride: tuple[int, ...] | None, padding: Any, link: Link) -> Link:
        if any(int(p) for p in (padding if isinstance(padding, (tuple, list)) else (padding,))):
            self.note(f"{_what(node)} pads its windows: the description's pooling windows "
                      "are full (border positions differ a little)")
        stride = window if stride is None or not len(stride) else stride
        if any(s > w for s, w in zip(stride, window)):
            raise ModuleReadError(node.name, _what(node), f"stride {list(stride)} exceeds the "
                                  f"window {list(window)}: positions are skipped")
        block = Pooling(kind, tuple(window), tuple(stride))
        return child(link, block, Info(node.name, _what(node)), grid=self.shape(node)[2:])

    def global_average(self, node: Any, link: Link, positions: int) -> Link:
        block = Pooling("global_average", positions=positions)
        return child(link, block, Info(node.name, _what(node)), grid=())

    def reduce(self, node: Any, link: Link, dims: Any, total: bool) -> Link:
        """``x.mean(dims)`` / ``x.sum(dims)`` over positions: a global average (times the
        number of positions for a sum)."""
        shape = self.shape(node.args[0])
        if dims is None:
            raise ModuleReadError(node.name, _what(node), "reduces every dimension, the batch "
                                                          "and the units included")
        dims = (dims,) if isinstance(dims, int) else tuple(dims)
        dims = tuple(sorted(d % len(shape) for d in dims))
        unit = unit_dim(shape, link.width, link.grid != ())
        if 0 in dims or (unit is not None and unit in dims) or unit is None and \
                link.width is not None:
            raise ModuleReadError(node.name, _what(node), f"reduces dimensions {list(dims)} of "
                                  f"a tensor of shape {list(shape)}: only position dimensions "
                                  "(not the batch, dimension 0, nor the units) can be averaged")
        positions = math.prod(shape[d] for d in dims)
        out = self.global_average(node, link, positions)
        return scaled(out, float(positions), node.name, _what(node)) if total else out

    # ------------------------------------------------------------ sums and numbers
    def number(self, v: Any, link: Link | None) -> float | None:
        """A multiplier: a Python number, a one-element tensor, or a per-unit vector (its
        root mean square: per-unit gains g_i scale the mean second moment by mean(g^2))."""
        if isinstance(v, bool):
            return None
        if isinstance(v, (int, float)):
            return float(v)
        if isinstance(v, Const) and hasattr(v.tensor, "numel"):
            t = v.tensor.detach().double()
            if t.numel() == 1:
                return float(t.reshape(()))
            if link is not None and link.width is not None and t.numel() == link.width:
                return float(t.square().mean().sqrt())
        return None

    def multiply(self, node: Any, a: Any, b: Any, divide: bool = False) -> Any:
        va, vb = self.value(a), self.value(b)
        if isinstance(vb, (Link, Part)) and not divide:
            va, vb = vb, va
        if not isinstance(va, (Link, Part)):
            return self.plain(node, [va, vb])
        s = self.number(vb, va.link if isinstance(va, Part) else va)
        if s is None or (divide and s == 0.0):
            raise ModuleReadError(node.name, _what(node), "multiplies the stream by something "
                                  "that is not a number, a one-element tensor or a per-unit "
                                  "gain (a product of two streams is not described)")
        s = 1.0 / s if divide else s
        if isinstance(va, Part):
            return Part(va.link, va.index, va.count, va.scale * s)
        return scaled(va, s, node.name, _what(node))

    def add(self, node: Any, a: Any, b: Any, alpha: float = 1.0) -> Any:
        va, vb = self.value(a), self.value(b)
        if not isinstance(va, Link) and not isinstance(vb, Link):
            return self.plain(node, [va, vb])
        if not (isinstance(va, Link) and isinstance(vb, Link)):
            raise ModuleReadError(node.name, _what(node), "adds to the stream a value that does "
                                  "not come from the input (a learned or fixed shift, such as a "
                                  "position embedding): the description has no block for it")
        return residual_link(va, vb, alpha, node.name, _what(node))

    def plain(self, node: Any, values: list[Any]) -> Any:
        """A node none of whose inputs is the stream: a constant tensor or a plain value."""
        if any(isinstance(v, (Link, Part, Parts, Pair)) for v in values):
            raise ModuleReadError(node.name, _what(node), "an operation on the stream that the "
                                                          "description does not have")
        meta = node.meta.get("tensor_meta")
        if hasattr(meta, "shape"):
            return Const(_fetch(self.gm, node) if node.op == "get_attr" else None)
        return AUX

    # ------------------------------------------------------------ the walk
    def run(self, graph: Any, visit: Any) -> Link:
        """Visit every node (``visit(walker, node)`` gives a call node's value); the output's
        link."""
        live = _live(graph)
        out: Any = None
        for node in graph.nodes:
            if node.name not in live and node.op != "output":
                self.values[node.name] = AUX
                continue
            if node.op == "placeholder":
                if self.input_node:
                    raise ModuleReadError(node.name, _what(node), "the module's forward uses a "
                                          "second input; propcalc reads modules of one tensor "
                                          "input")
                self.input_node = node.name
                self.values[node.name] = root(node.name)
            elif node.op == "get_attr":
                self.values[node.name] = Const(_fetch(self.gm, node))
            elif node.op == "output":
                out = self.value(node.args[0])
                if not isinstance(out, Link):
                    raise ModuleReadError(node.name, "the module's output", "the module must "
                                          "return one tensor computed from its input")
            else:
                self.values[node.name] = visit(self, node)
        assert out is not None
        return out


def _fetch(gm: Any, node: Any) -> Any:
    obj = gm
    for part in str(node.target).split("."):
        obj = getattr(obj, part)
    return obj


def _live(graph: Any) -> set[str]:
    """Names of the nodes the output depends on."""
    out: set[str] = set()
    todo = [n for n in graph.nodes if n.op == "output"]
    while todo:
        n = todo.pop()
        for m in n.all_input_nodes:
            if m.name not in out:
                out.add(m.name)
                todo.append(m)
    return out


#: Binary operators that add or subtract two values.
ADDS = {operator.add: 1.0, operator.iadd: 1.0, operator.sub: -1.0, operator.isub: -1.0}


def activation_of(node: Any) -> tuple[str, dict[str, float]] | None:
    """The activation a function or method node calls, if any."""
    if node.op == "call_method":
        return method_activation(str(node.target))
    return function_activation(node.target, tuple(node.args), dict(node.kwargs))


def close_attention(w: Walker, node: Any, m: Any, link: Link) -> Link | None:
    """The attention block of ``link`` with the Linear ``m`` as its output projection, when
    ``link`` is a scaled-dot-product attention still waiting for one; else None."""
    if not attention_pending(link):
        return None
    att = link.block
    assert isinstance(att, Attention) and link.parent is not None
    f_in, f_out = int(m.in_features), int(m.out_features)
    if f_in != att.width:
        return None
    if f_out % att.heads:
        raise ModuleReadError(node.name, _what(node), f"the output projection's {f_out} "
                              f"features are not a multiple of the {att.heads} heads")
    sw, sb, _ = w.layer_scales(m, f_in, node)
    block = replace(att, output_sigma_w2=sw, sigma_b2=sw * link.pending["value_bias"] + sb,
                    width=f_out)
    info = replace(link.info, node=node.name,
                   extra=link.info.extra + (("output", str(node.target)),))
    return child(link.parent, block, info, width=f_out)
