"""Finite-width forward and backward passes of every block kind, in seeded numpy.

Arrays have shape ``(inputs, positions, units)``; positions are a grid of 1 to
3 spatial dimensions (``grid``) flattened in C order, or tokens. Every block
draws fresh weights from its own generator. The backward pass is written out
by hand for each block (the chain rule, no approximation): it returns the
gradient with respect to the block's input given the gradient at its output.

Conventions as in the mean-field rules: ``W ~ N(0, sigma_w2 / fan_in)``,
``b ~ N(0, sigma_b2)`` shared by every input and position, inverted dropout,
circular padding for convolutions and pooling windows, softmax attention with
logits ``query_key_scale * q . k / sqrt(d_head)``.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np

from .blocks import (
    ActivationBlock,
    Attention,
    Block,
    Convolution,
    Dense,
    Dropout,
    Norm,
    Pooling,
)

__all__ = ["Field", "forward_block", "weights"]

Array = np.ndarray
Backward = Callable[[Array], Array]


@dataclass(frozen=True)
class Field:
    """A batch of streams: values ``x`` of shape (inputs, positions, units) on ``grid``."""

    x: Array
    grid: tuple[int, ...]


def weights(rng: np.random.Generator, n_in: int, n_out: int, variance: float,
            orthogonal: bool = False) -> Array:
    """An (n_in, n_out) matrix with entries of variance ``variance / n_in``.

    Orthogonal: a Haar (semi-)orthogonal matrix (QR of a Gaussian with the signs
    of R's diagonal, Mezzadri 2007) scaled so that ``|W^T x|^2 / n_out`` has the
    same mean as for Gaussian weights.
    """
    if not orthogonal:
        return rng.standard_normal((n_in, n_out)) * math.sqrt(variance / n_in)
    big, small = max(n_in, n_out), min(n_in, n_out)
    qm, r = np.linalg.qr(rng.standard_normal((big, small)))
    qm = qm * np.sign(np.diag(r))
    w = qm if n_in >= n_out else qm.T
    return w * math.sqrt(variance * max(1.0, n_out / n_in))


def _dense(b: Dense, f: Field, rng: np.random.Generator, width: int) -> tuple[Field, Backward]:
    n_in = f.x.shape[-1]
    n_out = b.width or width
    w = weights(rng, n_in, n_out, b.sigma_w2, b.weights == "orthogonal")
    bias = rng.standard_normal(n_out) * math.sqrt(b.sigma_b2)
    return Field(f.x @ w + bias, f.grid), lambda g: g @ w.T


def _activation(b: ActivationBlock, f: Field) -> tuple[Field, Backward]:
    act = b.activation
    d = act.derivative(f.x)
    return Field(act.value(f.x), f.grid), lambda g: g * d


def _normalise(x: Array, axes: tuple[int, ...], centre: bool, gain: float,
               eps: float) -> tuple[Array, Backward]:
    """``gain (x - mean) / sqrt(var + eps)`` over ``axes`` and its exact backward pass."""
    mu = x.mean(axis=axes, keepdims=True) if centre else 0.0
    xc = x - mu
    var = (xc * xc).mean(axis=axes, keepdims=True)
    inv = 1.0 / np.sqrt(var + eps)
    y = xc * inv

    def back(g: Array) -> Array:
        gy = g * gain
        # d/dx_j of y_i = (x_i - mu) / s with s^2 = mean((x - mu)^2) + eps:
        # (delta_ij - [1/n if centred]) / s - y_i y_j / (n s), so the gradient is
        # (gy - [mean(gy)] - y mean(gy y)) / s (derived here by the chain rule)
        proj = (gy * y).mean(axis=axes, keepdims=True) * y
        if centre:
            return (gy - gy.mean(axis=axes, keepdims=True) - proj) * inv
        return (gy - proj) * inv

    return gain * y, back


def _norm(b: Norm, f: Field) -> tuple[Field, Backward]:
    if b.kind == "batch":
        y, back = _normalise(f.x, (0, 1), True, b.gain, b.eps)
    else:
        y, back = _normalise(f.x, (2,), b.kind == "layer", b.gain, b.eps)
    return Field(y, f.grid), back


def _dropout(b: Dropout, f: Field, rng: np.random.Generator) -> tuple[Field, Backward]:
    mask = (rng.random(f.x.shape) < b.keep_rate) / b.keep_rate
    return Field(f.x * mask, f.grid), lambda g: g * mask


def _shifted_index(grid: tuple[int, ...], offsets: tuple[int, ...],
                   stride: tuple[int, ...]) -> tuple[Array, tuple[int, ...]]:
    """Flat input positions ``(stride * out + offset) mod grid`` for every output position."""
    out_grid = tuple(-(-n // s) for n, s in zip(grid, stride))
    axes = [(np.arange(o) * s + off) % n for o, s, off, n in zip(out_grid, stride, offsets, grid)]
    mesh = np.meshgrid(*axes, indexing="ij")
    flat = np.ravel_multi_index(tuple(mesh), grid).ravel()
    return flat, out_grid


def _spatial(grid: tuple[int, ...], sizes: tuple[int, ...], what: str) -> tuple[int, ...]:
    if len(grid) != len(sizes):
        raise ValueError(f"{what} has {len(sizes)} spatial dimensions but the simulated grid "
                         f"{grid} has {len(grid)}")
    return grid


def _convolution(b: Convolution, f: Field, rng: np.random.Generator,
                 width: int) -> tuple[Field, Backward]:
    grid = _spatial(f.grid, b.kernel, "the convolution")
    n_in = f.x.shape[-1]
    n_out = b.width or width
    taps = list(itertools.product(*[range(-(k // 2), k - k // 2) for k in b.kernel]))
    idx = [_shifted_index(grid, t, b.stride) for t in taps]
    out_grid = idx[0][1]
    bias = rng.standard_normal(n_out) * math.sqrt(b.sigma_b2)
    if b.weights == "delta_orthogonal":
        centre = taps.index(tuple(0 for _ in b.kernel))
        ws = {centre: weights(rng, n_in, n_out, b.sigma_w2, orthogonal=True)}
    else:
        scale = math.sqrt(b.sigma_w2 / (n_in * len(taps)))
        ws = {i: rng.standard_normal((n_in, n_out)) * scale for i in range(len(taps))}
    y = bias + sum(f.x[:, idx[i][0], :] @ w for i, w in ws.items())

    def back(g: Array) -> Array:
        out = np.zeros_like(f.x)
        for i, w in ws.items():
            np.add.at(out, (slice(None), idx[i][0], slice(None)), g @ w.T)
        return out

    return Field(np.asarray(y), out_grid), back


def _pooling(b: Pooling, f: Field) -> tuple[Field, Backward]:
    x = f.x
    if b.kind == "global_average":
        s = x.shape[1]
        return Field(x.mean(axis=1, keepdims=True), (1,)), lambda g: np.repeat(g / s, s, axis=1)
    assert b.window is not None and b.stride is not None
    grid = _spatial(f.grid, b.window, "the pooling window")
    offs = list(itertools.product(*[range(w) for w in b.window]))
    idx = [_shifted_index(grid, o, b.stride) for o in offs]
    out_grid = idx[0][1]
    stack = np.stack([x[:, i[0], :] for i in idx])  # (window, inputs, out positions, units)
    if b.kind == "average":
        k = len(offs)

        def back_avg(g: Array) -> Array:
            out = np.zeros_like(x)
            for i in idx:
                np.add.at(out, (slice(None), i[0], slice(None)), g / k)
            return out

        return Field(stack.mean(axis=0), out_grid), back_avg
    arg = stack.argmax(axis=0)

    def back_max(g: Array) -> Array:
        out = np.zeros_like(x)
        for j, i in enumerate(idx):
            np.add.at(out, (slice(None), i[0], slice(None)), np.where(arg == j, g, 0.0))
        return out

    return Field(stack.max(axis=0), out_grid), back_max


def _softmax(z: Array) -> Array:
    z = z - z.max(axis=-1, keepdims=True)
    e = np.exp(z)
    return e / e.sum(axis=-1, keepdims=True)


def _attention(b: Attention, f: Field, rng: np.random.Generator,
               width: int) -> tuple[Field, Backward]:
    x = f.x
    n_in, t = x.shape[-1], x.shape[1]
    if t != b.tokens:
        raise ValueError(f"the attention block expects {b.tokens} tokens but the stream has {t} "
                         "positions")
    d = b.width or width
    h = b.heads
    if d % h:
        raise ValueError(f"width {d} is not a multiple of {h} heads")
    dh = d // h
    wq = weights(rng, n_in, d, b.query_key_sigma_w2)
    wk = weights(rng, n_in, d, b.query_key_sigma_w2)
    wv = weights(rng, n_in, d, b.value_sigma_w2)
    wo = weights(rng, d, d, b.output_sigma_w2)
    bias = rng.standard_normal(d) * math.sqrt(b.sigma_b2)
    scale = b.query_key_scale / math.sqrt(dh)

    def heads(a: Array) -> Array:  # (inputs, t, d) -> (inputs, heads, t, dh)
        return a.reshape(a.shape[0], t, h, dh).transpose(0, 2, 1, 3)

    q, k, v = heads(x @ wq), heads(x @ wk), heads(x @ wv)
    att = _softmax(scale * q @ k.transpose(0, 1, 3, 2))
    o = (att @ v).transpose(0, 2, 1, 3).reshape(x.shape[0], t, d)
    y = o @ wo + bias

    def back(g: Array) -> Array:
        go = heads(g @ wo.T)
        gv = att.transpose(0, 1, 3, 2) @ go
        ga = go @ v.transpose(0, 1, 3, 2)
        gl = att * (ga - (ga * att).sum(axis=-1, keepdims=True)) * scale
        gq, gk = gl @ k, gl.transpose(0, 1, 3, 2) @ q

        def flat(a: Array) -> Array:
            return a.transpose(0, 2, 1, 3).reshape(x.shape[0], t, d)

        return flat(gq) @ wq.T + flat(gk) @ wk.T + flat(gv) @ wv.T

    return Field(y, f.grid), back


def forward_block(b: Block, f: Field, rng: np.random.Generator, width: int) -> tuple[Field, Any]:
    """One non-composite block (not repeat or residual): its output and backward function.

    ``width`` is used where the block does not give one.
    """
    if isinstance(b, Dense):
        return _dense(b, f, rng, width)
    if isinstance(b, ActivationBlock):
        return _activation(b, f)
    if isinstance(b, Norm):
        return _norm(b, f)
    if isinstance(b, Dropout):
        return _dropout(b, f, rng)
    if isinstance(b, Convolution):
        return _convolution(b, f, rng, width)
    if isinstance(b, Pooling):
        return _pooling(b, f)
    if isinstance(b, Attention):
        return _attention(b, f, rng, width)
    raise TypeError(f"not an elementary block: {b!r}")
