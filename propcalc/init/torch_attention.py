"""Attention read from torch: MultiheadAttention, scaled-dot-product attention, encoder layers.

* ``nn.MultiheadAttention`` (self-attention: query, key and value the same tensor) is one
  attention block: ``tokens`` from the input's shape, ``heads``, the model width,
  the query/key/value variances from the rows of ``in_proj_weight`` and the output
  projection's from ``out_proj``;
* ``F.scaled_dot_product_attention(q, k, v)`` whose q, k and v are linear projections of
  one tensor (separate Linear layers, or one Linear cut into three equal parts in the
  order q, k, v, the usual layout of a fused projection) is an attention block, and the
  first Linear applied to its output (after any reshape) is its output projection;
  the heads and tokens come from q's shape ``(..., heads, tokens, d_head)``, and a
  ``scale`` argument s sets ``query_key_scale = s sqrt(d_head)``;
* ``nn.TransformerEncoderLayer`` and ``nn.TransformerEncoder`` (torch.fx cannot trace
  them) are written out from their documented structure: pre-norm (``norm_first``)
  ``x + Drop(SA(LN(x)))``, ``x + Drop(FF(LN(x)))``, or post-norm
  ``LN(x + Drop(SA(x)))``, ``LN(x + Drop(FF(x)))``, with
  ``FF = Linear2(Drop(act(Linear1(.))))``.

Mean-field quantities of the attention block (Noci et al. 2022 at uniform attention;
the rules in :mod:`propcalc.networks.rules`):

* value bias b_V: attention weights sum to one, so ``W_O (A (V x + b_V)) + b_O`` has the
  bias ``W_O b_V + b_O``, per-unit variance ``output_sigma_w2 * var(b_V) + var(b_O)``
  (fan-in scaling of W_O);
* the logits ``(W_Q x) . (W_K x) / sqrt(d_head)`` have a spread proportional to
  ``sqrt(sigma_Q sigma_K)``: that is the description's ``query_key_sigma_w2``
  (derived here from the product of two independent projections).

Masks (causal or padding), cross-attention and grouped key-value heads are refused;
attention dropout is noted and not modelled.
"""

from __future__ import annotations

import math
from typing import Any

from ..networks.blocks import Attention, Dense, Dropout
from .torch_links import Info, Link, child, residual_link
from .torch_ops import (
    ModuleReadError,
    default_scales,
    function_activation,
    module_activation,
    named_arguments,
)
from .torch_walk import Pair, Part, Walker, _what

__all__ = ["multihead", "scaled_dot_product", "encoder_layer", "encoder"]

_MHA_ARGS = ("query", "key", "value", "key_padding_mask", "need_weights", "attn_mask",
             "average_attn_weights", "is_causal")
_SDPA_ARGS = ("query", "key", "value", "attn_mask", "dropout_p", "is_causal", "scale",
              "enable_gqa")


def _mean_square(t: Any) -> float:
    import torch

    with torch.no_grad():
        return float(t.detach().to(torch.float64).square().mean())


def _refuse_masks(node: Any, a: dict[str, Any], names: tuple[str, ...]) -> None:
    for name in names:
        if a.get(name) is not None:
            raise ModuleReadError(node.name, _what(node), f"is called with {name}: the "
                                  "description's attention sees every token (no masks)")
    if a.get("is_causal"):
        raise ModuleReadError(node.name, _what(node), "is causal: the description's attention "
                                                      "sees every token")


def _mha_block(w: Walker, node: Any, m: Any, tokens: int) -> Attention:
    if not m._qkv_same_embed_dim or m.bias_k is not None or m.add_zero_attn:
        raise ModuleReadError(node.name, _what(node), "separate key/value sizes (kdim, vdim), "
                              "add_bias_kv and add_zero_attn are not described")
    e, heads = int(m.embed_dim), int(m.num_heads)
    if w.scales == "default":
        sq = sk = sv = 0.5  # xavier_uniform_ on (3E, E): variance 2 / (4E)
        so, sb_v, sb_o = default_scales("linear", e, False)[0], 0.0, 0.0
    else:
        wt = m.in_proj_weight
        sq, sk, sv = (e * _mean_square(wt[i * e:(i + 1) * e]) for i in range(3))
        so = e * _mean_square(m.out_proj.weight)
        b = m.in_proj_bias
        sb_v = 0.0 if b is None else _mean_square(b[2 * e:])
        sb_o = 0.0 if m.out_proj.bias is None else _mean_square(m.out_proj.bias)
        if b is not None and _mean_square(b[:e]) > 1e-2 * sq:
            w.note(f"{_what(node)} has a query bias: it shifts the logits by b_Q . k, which "
                   "the description does not model")
    if float(m.dropout) > 0.0:
        w.note(f"{_what(node)} drops attention weights with probability {float(m.dropout):g} "
               "in training: not modelled")
    return Attention(tokens, heads, e, sv, so, math.sqrt(sq * sk), 1.0, so * sb_v + sb_o)


def _tokens(shape: tuple[int, ...], batch_first: bool) -> int:
    if len(shape) == 2:  # unbatched (tokens, features)
        return shape[0]
    return shape[1] if batch_first else shape[0]


def multihead(w: Walker, node: Any, m: Any) -> Pair:
    """A MultiheadAttention module called on one tensor: its attention block."""
    a = named_arguments(_MHA_ARGS, tuple(node.args), dict(node.kwargs))
    vals = [w.value(a.get(k)) for k in ("query", "key", "value")]
    if not all(isinstance(v, Link) for v in vals) or not (vals[0] is vals[1] is vals[2]):
        raise ModuleReadError(node.name, _what(node), "is not self-attention: query, key and "
                              "value must be the same tensor (cross-attention is not described)")
    _refuse_masks(node, a, ("key_padding_mask", "attn_mask"))
    x = vals[0]
    tokens = _tokens(w.shape(a["query"]), bool(m.batch_first))
    block = _mha_block(w, node, m, tokens)
    w.set_width(x, block.width or 0, node)
    _check_width(node, x, int(m.embed_dim))
    info = Info(node.name, _what(node), str(node.target),
                extra=(("output", f"{node.target}.out_proj"),))
    return Pair(child(x, block, info, width=int(m.embed_dim)))


def _check_width(node: Any, x: Link, e: int) -> None:
    if x.width is not None and x.width != e:
        raise ModuleReadError(node.name, _what(node), f"embed_dim {e} does not match the "
                                                      f"stream's {x.width} units")


def _projection(w: Walker, node: Any, role: str, v: Any) -> tuple[Link, str, float, float,
                                                                   float, int]:
    """(input link, module name, sigma_w2, sigma_b2, multiplier, features) of q, k or v."""
    count, index, s = 1, 0, 1.0
    if isinstance(v, Part):
        link, index, count, s = v.link, v.index, v.count, v.scale
    elif isinstance(v, Link):
        link = v
        while link.block is None and link.parent is not None:
            s *= link.scale
            link = link.parent
    else:
        link = None  # type: ignore[assignment]
    if link is None or not isinstance(link.block, Dense) or link.info.module is None \
            or link.parent is None:
        raise ModuleReadError(node.name, _what(node), f"its {role} is not a linear projection "
                              "of one tensor (nn.Linear, or one nn.Linear cut in equal parts)")
    m = w.modules[link.info.module]
    out, f_in = int(m.out_features), int(m.in_features)
    if out % count:
        raise ModuleReadError(node.name, _what(node), f"its {role} is one of {count} parts of "
                              f"{out} features, which do not divide evenly")
    size = out // count
    if w.scales == "default":
        sw, sb = default_scales("linear", f_in, m.bias is not None)
    else:
        rows = slice(index * size, (index + 1) * size)
        sw = f_in * _mean_square(m.weight[rows])
        sb = 0.0 if m.bias is None else _mean_square(m.bias[rows])
    return link.parent, link.info.module, sw, sb, s, size


def scaled_dot_product(w: Walker, node: Any) -> Link:
    """``F.scaled_dot_product_attention(q, k, v)`` of projections of one tensor."""
    a = named_arguments(_SDPA_ARGS, tuple(node.args), dict(node.kwargs))
    _refuse_masks(node, a, ("attn_mask",))
    if a.get("enable_gqa"):
        raise ModuleReadError(node.name, _what(node), "grouped key-value heads are not "
                                                      "described")
    parts = [_projection(w, node, r, w.value(a[r])) for r in ("query", "key", "value")]
    x = parts[0][0]
    if not (parts[1][0] is x and parts[2][0] is x):
        raise ModuleReadError(node.name, _what(node), "is not self-attention: query, key and "
                              "value must be projections of the same tensor")
    shapes = [w.shape(a[r]) for r in ("query", "key", "value")]
    q_shape = shapes[0]
    if len(q_shape) < 2 or any(s[-3:] != q_shape[-3:] for s in shapes[1:]):
        raise ModuleReadError(node.name, _what(node), f"query, key and value shapes "
                              f"{[list(s) for s in shapes]} differ (the description has as many "
                              "keys as queries, and as many key-value heads as query heads)")
    tokens, d_head = q_shape[-2], q_shape[-1]
    heads = q_shape[-3] if len(q_shape) >= 4 else 1
    width = heads * d_head
    if any(p[5] != width for p in parts):
        raise ModuleReadError(node.name, _what(node), f"the projections' {parts[0][5]} features "
                              f"are not heads x d_head = {heads} x {d_head}")
    p = float(a.get("dropout_p") or 0.0)
    if p > 0.0:
        w.note(f"{_what(node)} drops attention weights with probability {p:g}: not modelled")
    scale = a.get("scale")
    tau = (float(scale) * math.sqrt(d_head)) if scale is not None else 1.0
    (_, qn, sq, sbq, s_q, _), (_, kn, sk, _, s_k, _), (_, vn, sv, sbv, s_v, _) = parts
    tau *= abs(s_q * s_k)
    if sbq > 1e-2 * sq:
        w.note(f"{_what(node)}: the query projection has a bias; it shifts the logits by "
               "b_Q . k, which the description does not model")
    w.set_width(x, w.modules[qn].in_features, node)
    block = Attention(tokens, heads, width, sv * s_v * s_v, 1.0, math.sqrt(sq * sk), tau,
                      sbv * s_v * s_v)
    info = Info(node.name, _what(node), qn, extra=(("query", qn), ("key", kn), ("value", vn)))
    return child(x, block, info, width=width, pending={"value_bias": sbv * s_v * s_v})


# ---------------------------------------------------------------- encoder layers
def _activation_spec(node: Any, act: Any) -> tuple[str, dict[str, float]]:
    import torch.nn as nn

    spec = module_activation(act) if isinstance(act, nn.Module) else \
        function_activation(act, (), {})
    if spec is None:
        raise ModuleReadError(node.name, _what(node), f"its activation {act!r} is not one "
                                                      "propcalc reads")
    return spec


def _drop(x: Link, p: float, name: str) -> Link:
    if p == 0.0:
        return x
    return child(x, Dropout(1.0 - float(p)), Info("", f"module '{name}'", name))


def _layer_links(w: Walker, node: Any, m: Any, x: Link, tokens: int, name: str,
                 last: bool) -> Link:
    """The links of one TransformerEncoderLayer after ``x``."""
    import torch.nn as nn

    end = node.name if last else ""
    what = f"module '{name}'"
    _check_width(node, x, int(m.self_attn.embed_dim))
    w.set_width(x, int(m.self_attn.embed_dim), node)
    att = _mha_block(w, node, m.self_attn, tokens)
    att_info = Info("", f"module '{name}.self_attn'", f"{name}.self_attn",
                    extra=(("output", f"{name}.self_attn.out_proj"),))

    def norm(base: Link, sub: str, node_name: str = "") -> Link:
        block = w.norm_block(node, getattr(m, sub), base, f"module '{name}.{sub}'")
        return child(base, block, Info(node_name, f"module '{name}.{sub}'", f"{name}.{sub}"))

    def attention(base: Link) -> Link:
        return _drop(child(base, att, att_info), m.dropout1.p, f"{name}.dropout1")

    def feed_forward(base: Link) -> Link:
        h = child(base, w.dense_block(m.linear1, node),
                  Info("", f"module '{name}.linear1'", f"{name}.linear1"),
                  width=int(m.linear1.out_features))
        spec = _activation_spec(node, m.activation)
        h = w.activation_link(node, h, spec, info=Info("", f"{what} activation"))
        h = _drop(h, m.dropout.p, f"{name}.dropout")
        h = child(h, w.dense_block(m.linear2, node),
                  Info("", f"module '{name}.linear2'", f"{name}.linear2"),
                  width=int(m.linear2.out_features))
        return _drop(h, m.dropout2.p, f"{name}.dropout2")

    if not isinstance(m.norm1, nn.LayerNorm):
        raise ModuleReadError(node.name, _what(node), "its norm layers are not nn.LayerNorm")
    if m.norm_first:
        x = residual_link(x, attention(norm(x, "norm1")), 1.0, "", f"{what} attention sum")
        return residual_link(x, feed_forward(norm(x, "norm2")), 1.0, end,
                             f"{what} feed-forward sum")
    x = norm(residual_link(x, attention(x), 1.0, "", f"{what} attention sum"), "norm1")
    return norm(residual_link(x, feed_forward(x), 1.0, "", f"{what} feed-forward sum"),
                "norm2", end)


def encoder_layer(w: Walker, node: Any, m: Any) -> Link:
    """An nn.TransformerEncoderLayer, written out (see the module docstring)."""
    a = named_arguments(("src", "src_mask", "src_key_padding_mask", "is_causal"),
                        tuple(node.args), dict(node.kwargs))
    _refuse_masks(node, a, ("src_mask", "src_key_padding_mask"))
    x = w.link_of(node, a["src"])
    tokens = _tokens(w.shape(a["src"]), bool(m.self_attn.batch_first))
    return _layer_links(w, node, m, x, tokens, str(node.target), True)


def encoder(w: Walker, node: Any, m: Any) -> Link:
    """An nn.TransformerEncoder: its layers, then its final norm if any."""
    a = named_arguments(("src", "mask", "src_key_padding_mask", "is_causal"),
                        tuple(node.args), dict(node.kwargs))
    _refuse_masks(node, a, ("mask", "src_key_padding_mask"))
    x = w.link_of(node, a["src"])
    layers = list(m.layers)
    tokens = _tokens(w.shape(a["src"]), bool(layers[0].self_attn.batch_first))
    for i, layer in enumerate(layers):
        last = i == len(layers) - 1 and m.norm is None
        x = _layer_links(w, node, layer, x, tokens, f"{node.target}.layers.{i}", last)
    if m.norm is not None:
        block = w.norm_block(node, m.norm, x, f"module '{node.target}.norm'")
        x = child(x, block, Info(node.name, f"module '{node.target}.norm'",
                                 f"{node.target}.norm"))
    return x
