"""The tangent kernel of a network of blocks at initialisation, and its learning-rate ceiling.

The per-unit kernel ``Theta_s(x, x')`` of a stream s is carried block by block along the walk of
:func:`propcalc.networks.walk.trace` (which supplies every stream's pair moments and, at each
activation, ``E[phi'(s_a) phi'(s_b)]``), in the standard parametrisation
(:mod:`propcalc.training.ntk`; Jacot et al. 2018, Theorem 1; Lee et al. 2019, appendix). The
rule of every block kind, its derivation and its assumptions are in
:mod:`propcalc.training.network_ntk_rules`: dense, activation, residual (``shortcut^2 Theta +
weight^2 Theta_branch``), layer / RMS / batch norm, dropout, convolution, average pooling, and
attention (uniform, or with query-key logits of spread up to
:data:`~propcalc.training.network_ntk_attention.MAX_LOGIT_STD`, derived in
:mod:`propcalc.training.network_ntk_attention`); repeats are written out.

Refused with :class:`~propcalc.training.ntk.UnsupportedKernelError` naming the block's path:
attention whose query-key logits spread by more than
:data:`~propcalc.training.network_ntk_attention.MAX_LOGIT_STD` (the forward rule's
logit_std), batch norm of a stream with several positions, max pooling and every block after a
stream whose law is unknown (an activation after a residual sum of non-Gaussian parts or after
dropout), a missing width. The ceiling also refuses an output with several positions (no global
average pooling before the readout). A plain stack gives
exactly :func:`propcalc.training.ntk.tangent_kernel` (tested).
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from .. import domains
from ..errors import InvalidParameterError
from ..networks.blocks import (
    ActivationBlock,
    Attention,
    Convolution,
    Dense,
    Dropout,
    Norm,
    Pooling,
    Repeat,
    Residual,
)
from ..networks.description import Network
from ..networks.description import network as read_network
from ..networks.propagate import check_inputs
from ..networks.rules import Step, Stream
from ..networks.walk import trace
from ..results import Result
from . import network_ntk_rules as rules
from .learning_rate import (
    LOSSES,
    LearningRateCeiling,
    ceiling_from_kernel,
    correlation_samples,
)
from .ntk import UnsupportedKernelError

__all__ = ["MAX_NETWORK_SAMPLES", "NetworkTangentKernel", "network_learning_rate_ceiling",
           "network_tangent_kernel"]

#: most samples of the input correlation for a network (each is a walk through the network)
MAX_NETWORK_SAMPLES = 64


@dataclass(frozen=True)
class NetworkTangentKernel(Result):
    """The tangent kernel of one output unit of a network, for a pair of inputs.

    Attributes
    ----------
    q0, c0 : float
        The input pair's mean square coordinate and correlation.
    diagonal : float
        ``Theta(x, x)``.
    off_diagonal : float
        ``Theta(x, x')``.
    output_q, output_c : float
        The output stream's second moment and the pair's correlation there.
    output_width : int or None
        Units of the output stream.
    several_positions : bool
        Whether the output has several positions (a convolution, pooling windows or attention
        not followed by a global average): the kernel is that of one unit at one position.
    notes : tuple of str
        What the kernel assumes at batch norm and dropout blocks.
    parametrisation : str
        Always "standard".
    """

    q0: float
    c0: float
    diagonal: float
    off_diagonal: float
    output_q: float
    output_c: float
    output_width: int | None
    several_positions: bool = False
    notes: tuple[str, ...] = ()
    parametrisation: str = "standard"


_BATCH_NOTE = ("batch norm: the kernel of the large-batch mean field (Yang et al. 2019), every "
               "entry exact to O(1/B) (measured against torch: at B = 32 the pair entry was "
               "3% of the diagonal below it, at B = 128 within the sampling error)")
_DROPOUT_NOTE = ("dropout: the kernel of one step, each input with its own masks, averaged over "
                 "the masks by the weight block after it")


class _Carry:
    """Theta along the walk (:class:`~propcalc.training.network_ntk_rules.Kernel`)."""

    def __init__(self, steps: Iterator[Step], start: Stream, spatial: bool) -> None:
        self.steps = steps
        self.stream = start
        #: whether the stream has several positions (after a convolution, pooling windows or
        #: attention, or an input with positions) that no global average has pooled yet
        self.spatial = spatial
        #: where the positions of the stream come from (a block's path and kind, or "the input")
        self.positions_from: str | None = "the input" if spatial else None
        self.notes: dict[str, None] = {}

    def _positions(self, spatial: bool, where: str, kind: str) -> None:
        if spatial and not self.spatial:
            self.positions_from = f"block {where} ({kind})"
        self.spatial = spatial

    def run(self, blocks: tuple[Any, ...], theta: rules.Kernel, path: str) -> rules.Kernel:
        for i, b in enumerate(blocks):
            where = f"{path}/{i}"
            if isinstance(b, Repeat):
                for _ in range(b.times):
                    theta = self.run(b.blocks, theta, f"{where}/repeat/blocks")
                continue
            theta = self.block(b, theta, where)
        return theta

    def block(self, b: Any, theta: rules.Kernel, where: str) -> rules.Kernel:
        before = self.stream
        step = next(self.steps)
        if isinstance(b, Residual):
            inner = _Carry(iter(step.branch), before, self.spatial)
            t_branch = inner.run(b.branch, theta, f"{where}/residual/branch")
            self.stream = step.stream
            if inner.spatial and not self.spatial:
                self.positions_from = inner.positions_from
            self.spatial = self.spatial or inner.spatial
            self.notes.update(inner.notes)
            return rules.residual(theta, t_branch, b.shortcut, b.weight)
        self.stream = step.stream
        if step.stream.form == "unknown" or before.form == "unknown":
            raise UnsupportedKernelError(
                f"block {where} ({b.KIND}): the stream's law is not known there "
                f"({step.stream.reason or before.reason}), so neither is the kernel")
        if isinstance(b, (Dense, Convolution)):
            self._positions(self.spatial or isinstance(b, Convolution), where, b.KIND)
            return rules.weight_block(before, b, theta, where)
        if isinstance(b, ActivationBlock):
            return rules.activation(step, theta)
        if isinstance(b, Norm):
            if b.kind == "batch":
                self.notes[_BATCH_NOTE] = None
            return rules.norm(before, b, theta, where, self.spatial)
        if isinstance(b, Dropout):
            self.notes[_DROPOUT_NOTE] = None
            return rules.dropout(b, theta)
        if isinstance(b, Pooling):
            self._positions(b.kind != "global_average", where, b.KIND)
            return rules.pooling(b, theta, where)
        assert isinstance(b, Attention)
        self._positions(True, where, b.KIND)
        return rules.attention(before, b, step, theta, where)


def network_tangent_kernel(network: Any, q0: float = 1.0, c0: float = 0.0, *,
                           c0_within: float = 0.0, c0_between: float = 0.0
                           ) -> NetworkTangentKernel:
    """The tangent kernel of a network's output unit at initialisation (module docstring).

    Parameters
    ----------
    network : Network or mapping
        A network description (:func:`propcalc.network`) with an ``input_width`` and the width
        of every dense, convolution and attention block that changes it.
    q0, c0 : float
        Mean square input coordinate and the pair's correlation.
    c0_within, c0_between : float
        With pooling or attention: the input's correlation between two positions of one input
        and of the two inputs (as for :func:`propcalc.network_propagation`).

    Returns
    -------
    NetworkTangentKernel
        Of one output unit at one position.

    Raises
    ------
    UnsupportedKernelError
        For max pooling, attention with a logit spread beyond ``MAX_LOGIT_STD``, a missing
        width, or a stream whose law is unknown.
    """
    return _kernel(network, q0, c0, c0_within, c0_between)[0]


def _kernel(network: Any, q0: float, c0: float, c0_within: float, c0_between: float
            ) -> tuple[NetworkTangentKernel, str | None]:
    """The kernel, and where its output's positions come from (None: one position)."""
    net = network if isinstance(network, Network) else read_network(network)
    q0, c0, c0_within, c0_between = check_inputs(q0, c0, c0_within, c0_between,
                                                 net.uses_positions(), net.has_positions())
    tr = trace(net, q0, c0, c0_within=c0_within, c0_between=c0_between,
               derivative_pairs=True)
    carry = _Carry(iter(v.step for v in tr.visits), tr.start, tr.start.kw is not None)
    theta = carry.run(net.blocks, rules.start(tr.start), "/blocks")
    out = carry.stream
    return (NetworkTangentKernel(float(q0), float(c0), float(theta.diag), float(theta.pair),
                                 float(out.q), float(out.c), out.width, carry.spatial,
                                 tuple(carry.notes)),
            carry.positions_from if carry.spatial else None)


def network_learning_rate_ceiling(network: Any, *, loss: str, batch_size: int,
                                  n_classes: int | None = None, q0: float = 1.0,
                                  input_correlation: float | Sequence[float] = 0.0,
                                  momentum: float = 0.0, seed: int = 0,
                                  c0_within: float = 0.0, c0_between: float = 0.0
                                  ) -> LearningRateCeiling:
    """The learning-rate ceiling of a network of blocks at initialisation.

    :func:`network_tangent_kernel` at each input correlation, then the batch kernel's top
    eigenvalue ``Theta(x, x) + (B - 1) mean Theta(x, x')`` and the curvature as for a plain stack
    (:func:`propcalc.training.learning_rate.ceiling_from_kernel`).

    Parameters
    ----------
    network : Network or mapping
    loss : str
        "mse" or "cross_entropy".
    batch_size : int
    n_classes : int, optional
        Must equal the output width when given.
    q0 : float
    input_correlation : float or sequence of float
        The inputs' pairwise correlation, or at most :data:`MAX_NETWORK_SAMPLES` samples of it.
    momentum : float
        Heavy-ball momentum in [0, 1).
    seed : int
        Seed of the sampling of the cross-entropy's curvature.
    c0_within, c0_between : float
        With pooling or attention: the input's correlation between two positions of one input
        and of the two inputs.

    Returns
    -------
    LearningRateCeiling
        ``kernel`` holds the NetworkTangentKernel of the first correlation.
    """
    if loss not in LOSSES:
        raise InvalidParameterError("loss", f"one of {', '.join(LOSSES)}", loss)
    b = domains.check("batch_size", batch_size)
    mu = domains.check("momentum", momentum)
    cs = correlation_samples(input_correlation, MAX_NETWORK_SAMPLES)
    net = network if isinstance(network, Network) else read_network(network)
    first, positions_from = _kernel(net, q0, float(cs[0]), c0_within, c0_between)
    if positions_from is not None:
        raise UnsupportedKernelError(
            f"the network's output has several positions (from {positions_from} on, with no "
            "global average pooling after it): the ceiling is computed for one output vector "
            "per input; end with a global average pooling before the readout")
    kernels = [first] + [network_tangent_kernel(net, q0, float(c), c0_within=c0_within,
                                                c0_between=c0_between) for c in cs[1:]]
    k = kernels[0].output_width
    if k is None:
        raise UnsupportedKernelError("the network's output width is not given: set every "
                                     "dense width")
    if n_classes is not None and domains.check("n_classes", n_classes) != k:
        raise InvalidParameterError("n_classes", f"equal to the output width ({k})", n_classes)
    if loss == "cross_entropy" and k < 2:
        raise InvalidParameterError("n_classes", ">= 2 for cross_entropy", k)
    diag = kernels[0].diagonal
    off = float(np.mean([kk.off_diagonal for kk in kernels]))
    top = max(diag + (b - 1) * off, diag - off) if b > 1 else diag
    c_out = float(np.mean([kk.output_c for kk in kernels]))
    notes = (f"inputs summarised by q0 = {q0:g} and "
             + (f"correlation {cs[0]:g}" if cs.size == 1 else
                f"{cs.size} sampled correlations (mean {cs.mean():.3g})")
             + ": the batch kernel's top eigenvalue is the lower bound Theta(x, x) + (B - 1) "
             "mean Theta(x, x')",) + kernels[0].notes
    return ceiling_from_kernel(loss, k, b, mu, "correlation" if cs.size == 1 else "correlations",
                               diag, off, top, kernels[0].output_q, c_out, seed, notes,
                               kernels[0])
