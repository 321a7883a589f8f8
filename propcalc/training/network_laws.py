"""The finite-width laws of a network with residual blocks and norms (the walk over its blocks).

The transitions and their derivation are in :mod:`propcalc.training.block_laws`; this module
walks the described blocks, writes the transitions on a tape, and reads the result in the
form of :class:`~propcalc.training.finite_width.FiniteWidth`.

Covered, every dense block giving its ``width`` and Gaussian weights: dense blocks after the
input, an activation, a residual sum or a norm; an activation after a dense block, or after a
layer or RMS norm (eps = 0) of a dense block's output when a dense block follows; inverted
dropout after an activation or a dense block (at the end of a branch too); layer and RMS norms
(gain, eps) after a dense block, a residual sum or a norm (an RMS norm also after an
activation); residual blocks ``shortcut * x + weight * branch(x)`` whose branch is a chain of
the above (a pre-norm branch: norm, dense, activation, ..., dense) ending in a dense block of
the stream's width (or dropout on it). Positions recorded: the outputs of the stream's dense
blocks, residual blocks and norms (and the input when the network does not start with a dense
block).

Refused, naming the block's JSON pointer and the reason: batch norm (the batch's statistics,
not one input's), dropout after a residual sum or a norm (not derived), an activation after
dropout on a dense output, convolution, pooling and attention (the units of one position
are not the whole layer), a branch that ends in an activation (its output has a mean and is
not independent of the stream's direction), residual blocks inside a branch, an activation
after a residual sum or a norm other than the above (the stream's units are not Gaussian given
its second moment: the next layer depends on more than q), dropout, a residual sum or a norm
right after a norm and an activation, a layer norm right after an activation (the centred
variance of a post-activation stream is another law), two activations or two dense blocks in
a row, orthogonal weights, dense blocks without a width.
"""

from __future__ import annotations

import math
from collections.abc import Iterator
from typing import Any

import numpy as np

from ..activations.base import Activation
from ..activations.resolver import activation
from ..errors import PropcalcError
from ..networks.blocks import (
    ActivationBlock,
    Block,
    Dense,
    Dropout,
    Network,
    Norm,
    Repeat,
    Residual,
)
from ..numerics.quadrature import QuadratureRule
from .block_laws import BRANCH, GRADIENT, Tape, run_tape
from .finite_width import (
    _EXPANSION_RANGE,
    DRIFT_LIMIT,
    GRADIENT_SPREAD_LIMIT,
    MAX_LAYERS,
    ORTHOGONAL_WHY,
    SPREAD_LIMIT,
    FiniteWidth,
    _message,
)

__all__ = ["FiniteWidthUnsupportedError", "network_laws"]


class FiniteWidthUnsupportedError(PropcalcError, ValueError):
    """The finite-width laws are not available for this network (the message says why)."""


_WHY = {
    "residual": "a residual sum: the cross term x . F(x) / n between the stream and the branch "
                "adds 1/n terms that the chain of dense layers does not carry",
    "norm": "a normalisation divides by the measured second moment, a 1/n law of its own",
    "batch": "batch norm divides by the batch's statistics, not one input's: its finite-width "
             "law depends on the batch",
    "convolution": "a convolution: the units of one position are not the whole layer",
    "pooling": "pooling: the units of one position are not the whole layer",
    "attention": "attention mixes positions: the units of one token are not the whole layer",
    "orthogonal": ORTHOGONAL_WHY,
}


def _elementary(blocks: tuple[Block, ...], path: str, budget: list[int]
                ) -> Iterator[tuple[str, Block]]:
    for i, b in enumerate(blocks):
        where = f"{path}/{i}"
        if isinstance(b, Repeat):
            for _ in range(b.times):
                yield from _elementary(b.blocks, f"{where}/repeat/blocks", budget)
            continue
        budget[0] -= 1
        if budget[0] < 0:
            raise FiniteWidthUnsupportedError(f"more than {2 * MAX_LAYERS} blocks: beyond the "
                                              "deepest chain analysed")
        yield where, b


class _Walk:
    """The stream's state while the blocks are written on the tape."""

    def __init__(self, q0: float, n: int | None, rule: QuadratureRule) -> None:
        self.tape = Tape(np.array([q0, 0.0, 0.0, 0.0]))
        self.kind = "measured"  # "gauss" (after dense), "phi" (after an activation), "measured"
        self.act: Activation | None = None
        self.keep = 1.0  # dropout pending after the activation
        self.linear = activation("linear")  # dropout on a dense output: phi the identity
        self.normed: tuple[bool, float, Any] | None = None  # the norm step just written
        self.after_norm: tuple[bool, float, Any] | None = None  # phi after such a norm
        self.n = n
        self.rule = rule
        self.first: Dense | None = None
        self.fan_ins: list[int] = []
        self.acts: dict[str, None] = {}
        self.budget = [2 * MAX_LAYERS + 2]
        if n is not None:
            self.tape.record(n, False)  # the input; dropped when a dense block comes first

    def measured(self, where: str, target: int, centred: bool = False) -> None:
        """Bring the stream to its measured second moment."""
        if self.after_norm is not None:
            raise FiniteWidthUnsupportedError(
                f"the block at {where} takes a norm's activated output without a dense block "
                "between: not derived (norm, activation, dense is covered)")
        if self.kind == "gauss":
            self.tape.sample(self.n)
        elif self.kind == "phi":
            if centred:
                raise FiniteWidthUnsupportedError(
                    f"the layer norm at {where} follows an activation: the centred variance of a "
                    "post-activation stream is another law (an RMS norm is covered)")
            self.tape.chain(self.act, 1.0, 0.0, self.n, target, self.rule, weighting=True,
                            keep=self.keep)
            self.keep = 1.0
        self.kind = "measured"

    def blocks(self, blocks: tuple[Block, ...], path: str, branch: dict[str, Any] | None) -> None:
        target = BRANCH if branch is not None else GRADIENT
        for where, b in _elementary(blocks, path, self.budget):
            normed, self.normed = self.normed, None
            if isinstance(b, Dense):
                self.dense(b, where, target, branch)
            elif isinstance(b, ActivationBlock) and normed is not None:
                # a norm (eps = 0) of Gaussian units, then phi (block_laws, "Norm then ...")
                self.kind, self.act, self.after_norm = "phi", b.activation, normed
                self.acts[b.activation.label] = None
            elif isinstance(b, ActivationBlock):
                if self.kind != "gauss":
                    why = ("an activation after dropout on a dense block's output (the masked "
                           "units are not Gaussian)" if self.act is self.linear else
                           "two activations in a row" if self.kind == "phi" else
                           "an activation after a residual sum or a norm (the stream's units "
                           "are not Gaussian given its second moment, so the next layer "
                           "depends on more than q)" if self.tape.steps else
                           "an activation on the input (before any dense block)")
                    raise FiniteWidthUnsupportedError(f"the activation at {where}: {why}")
                self.kind, self.act = "phi", b.activation
                self.acts[b.activation.label] = None
            elif isinstance(b, Norm):
                if b.kind == "batch":
                    raise FiniteWidthUnsupportedError(f"the norm block at {where}: {_WHY['batch']}")
                self.need_width(where)
                gaussian = self.kind == "gauss"
                self.measured(where, target, centred=b.kind == "layer")
                self.tape.norm(b.kind == "layer", b.gain, b.eps, self.n, target)
                if gaussian and b.eps == 0.0:
                    self.normed = (b.kind == "layer", b.gain, self.tape.steps[-1])
                if branch is None:
                    self.tape.record(self.n, False)
            elif isinstance(b, Residual):
                self.residual(b, where, branch)
            elif isinstance(b, Dropout):
                if self.after_norm is not None:
                    raise FiniteWidthUnsupportedError(
                        f"the dropout block at {where} follows a norm and an activation: not "
                        "derived")
                if self.kind == "gauss":  # phi the identity (block_laws, "Dropout")
                    self.kind, self.act = "phi", self.linear
                elif self.kind != "phi":
                    raise FiniteWidthUnsupportedError(
                        f"the dropout block at {where}: dropout is covered after an activation "
                        "or a dense block only (on a residual sum or a norm the stream's units "
                        "are not Gaussian given its second moment: not derived here)")
                self.keep *= b.keep_rate
            else:
                kind = getattr(b, "KIND", type(b).__name__)
                raise FiniteWidthUnsupportedError(f"the {kind} block at {where}: "
                                                  f"{_WHY.get(kind, 'not covered')}")

    def need_width(self, where: str) -> None:
        if self.n is None:
            raise FiniteWidthUnsupportedError(f"the block at {where} acts on the input, whose "
                                              "width is not given (input_width)")

    def dense(self, b: Dense, where: str, target: int, branch: dict[str, Any] | None) -> None:
        if b.width is None:
            raise FiniteWidthUnsupportedError(f"the dense block at {where} gives no width")
        if b.weights != "gaussian":
            raise FiniteWidthUnsupportedError(f"the dense block at {where}: {_WHY['orthogonal']}")
        if self.kind == "gauss":
            raise FiniteWidthUnsupportedError(f"two dense blocks in a row at {where}: no "
                                              "activation between them")
        if self.first is None:
            self.first = b
            if not self.tape.steps:  # the input is no position of a network that starts dense
                self.tape.records.clear()
        if self.tape.steps or self.kind != "measured":
            self.fan_ins.append(self.n)
        if self.after_norm is not None:
            layer, gain, norm = self.after_norm
            self.tape.normed_chain(self.act, b.sigma_w2, b.sigma_b2, self.n, target, gain, layer,
                                   norm, self.rule)
            self.after_norm = None
        elif self.kind == "phi":
            self.tape.chain(self.act, b.sigma_w2, b.sigma_b2, self.n, target, self.rule,
                            keep=self.keep)
            self.keep = 1.0
        else:
            sampled = not (branch is not None and branch["first"])
            self.tape.dense(b.sigma_w2, b.sigma_b2, self.n or 1, target, sampled)
        if branch is not None:
            branch["first"] = False
        self.kind, self.n = "gauss", b.width
        if branch is None:
            self.tape.record(self.n, True)

    def residual(self, b: Residual, where: str, branch: dict[str, Any] | None) -> None:
        if branch is not None:
            raise FiniteWidthUnsupportedError(f"the residual block at {where} sits inside a "
                                              "residual branch: not covered")
        self.need_width(where)
        self.measured(where, GRADIENT)
        stream = self.n
        self.tape.enter()
        self.blocks(b.branch, f"{where}/residual/branch", {"first": True})
        keep = 1.0
        if self.kind == "phi" and self.act is self.linear:  # the branch ends in dropout
            self.kind, keep, self.keep = "gauss", self.keep, 1.0
        if self.kind != "gauss":
            raise FiniteWidthUnsupportedError(
                f"the residual block at {where}: its branch ends in "
                f"{'an activation' if self.kind == 'phi' else 'a norm'}, not a dense block (the "
                "branch's output then has a mean or is not independent of the stream's direction)")
        if self.n != stream:
            raise FiniteWidthUnsupportedError(f"the residual block at {where}: its branch ends at "
                                              f"width {self.n}, the stream has {stream}")
        self.tape.close(b.shortcut, b.weight, stream, keep)
        self.kind = "measured"
        self.tape.record(stream, False)


def network_laws(net: Network, q0: float, rule: QuadratureRule) -> FiniteWidth:
    """The first-order laws of a network of the covered form (module docstring)."""
    walk = _Walk(q0, net.input_width, rule)
    walk.blocks(net.blocks, "/blocks", None)
    tape = walk.tape
    if len(tape.records) < 2 or walk.first is None:
        raise FiniteWidthUnsupportedError("fewer than two positions with a known width: nothing "
                                          "accumulates over depth")
    tape.finish(rule)
    real, unit = run_tape(tape), run_tape(tape, unit=True)
    widths = [n for _, n, _ in tape.records]
    own = np.array([1.0 / n if sampled else 0.0 for _, n, sampled in tape.records])
    k, d = real.k, real.d
    rel_p = real.var / k ** 2
    with np.errstate(over="ignore", under="ignore"):
        q_typ = k * np.exp(d / k - 0.5 * rel_p - own)
        g_mf = np.exp(real.g_mean_field)
        g_typ = np.exp(real.g_mean_field + real.g_shift)
    top_var = float(rel_p[-1])
    top_drift = float(d[-1] / k[-1])
    top_typ = float(np.expm1(min(top_drift - 0.5 * top_var, 700.0)))
    g_var = float(real.g_var[0])
    u_top_var = float(unit.var[-1] / k[-1] ** 2)
    u_drift = abs(float(unit.d[-1] / k[-1]))
    u_typ = abs(float(unit.d[-1] / k[-1] - 0.5 * u_top_var))
    needed = max(u_top_var / SPREAD_LIMIT ** 2, float(unit.g_var[0]) / GRADIENT_SPREAD_LIMIT ** 2,
                 u_drift / DRIFT_LIMIT, u_typ / math.log1p(DRIFT_LIMIT), 2.0)
    width_needed = math.ceil(needed - 1e-9)
    spread_ok = math.sqrt(top_var) <= SPREAD_LIMIT
    gradient_ok = math.sqrt(g_var) <= GRADIENT_SPREAD_LIMIT
    drift_ok = abs(top_drift) <= DRIFT_LIMIT and abs(top_typ) <= DRIFT_LIMIT
    within = max(float(np.max(rel_p)), abs(top_drift)) <= _EXPANSION_RANGE
    typ_all = d / k - 0.5 * rel_p
    over = ((np.sqrt(rel_p) > SPREAD_LIMIT) | (np.abs(d / k) > DRIFT_LIMIT)
            | (np.abs(np.expm1(np.minimum(typ_all, 700.0))) > DRIFT_LIMIT))
    depth_limit = int(np.flatnonzero(over)[0]) if np.any(over) else None
    beta = float(sum(1.0 / n for n in walk.fan_ins))
    n_pos = len(widths) - 1
    msg = _message(n_pos, widths, k[-1], math.sqrt(top_var), top_drift, top_typ,
                   math.sqrt(g_var), spread_ok, gradient_ok, drift_ok, width_needed, within)
    msg = msg.replace(f"{n_pos} layers at", f"{len(widths)} positions (outputs of dense, "
                      "residual and norm blocks) at", 1)
    tup = lambda arr: tuple(float(x) for x in arr)
    first = walk.first
    return FiniteWidth(", ".join(walk.acts) or "none", first.sigma_w2, first.sigma_b2,
                       float(k[0]), tuple(widths), beta, tup(k), tup(k + d), tup(q_typ),
                       tup(np.sqrt(rel_p + 2.0 * own)), tup(g_mf), tup(g_typ),
                       tup(np.sqrt(real.g_var)), math.sqrt(top_var), top_drift, top_typ,
                       math.sqrt(g_var), spread_ok, gradient_ok, drift_ok, width_needed,
                       depth_limit, within, msg)
