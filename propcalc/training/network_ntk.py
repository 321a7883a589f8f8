"""The tangent kernel of a network of blocks (dense, activation, residual) at initialisation.

The per-unit kernel ``Theta_s(x, x')`` of a stream s is carried block by block along the walk of
:func:`propcalc.networks.walk.trace` (which supplies every stream's pair moments and, at each
activation, ``E[phi'(s_a) phi'(s_b)]``), in the standard parametrisation
(:mod:`propcalc.training.ntk`; Jacot et al. 2018, Theorem 1; Lee et al. 2019, appendix):

* dense, ``W`` of std ``sqrt(sigma_w2 / n_in)`` and a trained bias:
  ``Theta' = n_in E[s_a s_b] + 1 + sigma_w2 Theta`` (its weights, its bias, the path through it);
* activation: ``Theta' = E[phi'(s_a) phi'(s_b)] Theta``;
* residual ``shortcut x + weight branch(x)``: ``Theta' = shortcut^2 Theta + weight^2 Theta_b``,
  ``Theta_b`` the branch's own recursion started from ``Theta``. The cross terms between the
  identity path and the branch average to 0 over the branch's centred weights at large width
  (the gradient-independence argument of Yang & Schoenholz 2017 for the backward pass);
* repeats are written out.

Other blocks (normalisation, dropout, convolution, pooling, attention) are refused with
:class:`~propcalc.training.ntk.UnsupportedKernelError` naming the block's path. A plain stack
gives exactly :func:`propcalc.training.ntk.tangent_kernel` (tested).
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from .. import domains
from ..errors import InvalidParameterError
from ..networks.blocks import ActivationBlock, Dense, Repeat, Residual
from ..networks.description import Network, network as read_network
from ..networks.propagate import check_inputs
from ..networks.rules import Step, Stream
from ..networks.walk import trace
from ..results import Result
from .learning_rate import LOSSES, LearningRateCeiling, ceiling_from_kernel, correlation_samples
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
    parametrisation: str = "standard"


class _Carry:
    """Theta along the walk: the diagonal and the pair entry of the current stream."""

    def __init__(self, steps: Iterator[Step], start: Stream) -> None:
        self.steps = steps
        self.stream = start

    def run(self, blocks: tuple[Any, ...], theta: tuple[float, float], path: str,
            ) -> tuple[float, float]:
        for i, b in enumerate(blocks):
            where = f"{path}/{i}"
            if isinstance(b, Repeat):
                for _ in range(b.times):
                    theta = self.run(b.blocks, theta, f"{where}/repeat/blocks")
                continue
            theta = self.block(b, theta, where)
        return theta

    def block(self, b: Any, theta: tuple[float, float], where: str) -> tuple[float, float]:
        before = self.stream
        if isinstance(b, Residual):
            step = next(self.steps)
            inner = _Carry(iter(step.branch), before)
            t_branch = inner.run(b.branch, theta, f"{where}/residual/branch")
            self.stream = step.stream
            s2, w2 = b.shortcut * b.shortcut, b.weight * b.weight
            return s2 * theta[0] + w2 * t_branch[0], s2 * theta[1] + w2 * t_branch[1]
        if not isinstance(b, (Dense, ActivationBlock)):
            raise UnsupportedKernelError(
                f"block {where} ({b.KIND}): the tangent kernel is computed for dense, activation "
                "and residual blocks only")
        step = next(self.steps)
        self.stream = step.stream
        if step.stream.form == "unknown" or before.form == "unknown":
            raise UnsupportedKernelError(
                f"block {where} ({b.KIND}): the stream's law is not known there "
                f"({step.stream.reason or before.reason}), so neither is the kernel")
        if isinstance(b, Dense):
            n_in = before.width
            if n_in is None:
                raise UnsupportedKernelError(
                    f"block {where} (dense): the width of its input is not given (set "
                    "input_width and every dense width): the kernel grows with it")
            # standard parametrisation (module docstring): weights, bias, the path through it
            return (n_in * before.q + 1.0 + b.sigma_w2 * theta[0],
                    n_in * before.k + 1.0 + b.sigma_w2 * theta[1])
        d_sq = step.detail["derivative_second_moment"]
        d_pair = step.detail["derivative_pair"]
        return d_sq * theta[0], d_pair * theta[1]


def network_tangent_kernel(network: Any, q0: float = 1.0, c0: float = 0.0
                           ) -> NetworkTangentKernel:
    """The tangent kernel of a network's output unit at initialisation (module docstring).

    Parameters
    ----------
    network : Network or mapping
        A network description (:func:`propcalc.network`) of dense, activation, residual and
        repeat blocks with an ``input_width`` and every dense ``width``.
    q0, c0 : float
        Mean square input coordinate and the pair's correlation.

    Returns
    -------
    NetworkTangentKernel

    Raises
    ------
    UnsupportedKernelError
        For another block kind, a missing width, or a stream whose law is unknown.
    """
    net = network if isinstance(network, Network) else read_network(network)
    q0, c0, _, _ = check_inputs(q0, c0, 0.0, 0.0, False)
    tr = trace(net, q0, c0, derivative_pairs=True)
    carry = _Carry(iter(v.step for v in tr.visits), tr.start)
    theta = carry.run(net.blocks, (0.0, 0.0), "/blocks")
    out = carry.stream
    return NetworkTangentKernel(float(q0), float(c0), float(theta[0]), float(theta[1]),
                                float(out.q), float(out.c), out.width)


def network_learning_rate_ceiling(network: Any, *, loss: str, batch_size: int,
                                  n_classes: int | None = None, q0: float = 1.0,
                                  input_correlation: float | Sequence[float] = 0.0,
                                  momentum: float = 0.0, seed: int = 0) -> LearningRateCeiling:
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
    kernels = [network_tangent_kernel(net, q0, float(c)) for c in cs]
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
             "mean Theta(x, x')",)
    return ceiling_from_kernel(loss, k, b, mu, "correlation" if cs.size == 1 else "correlations",
                               diag, off, top, kernels[0].output_q, c_out, seed, notes,
                               kernels[0])
