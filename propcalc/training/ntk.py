"""The neural tangent kernel at initialisation of a plain stack, in the standard parametrisation.

A plain stack: ``h^1 = W^1 x + b^1``, ``h^{l+1} = W^{l+1} phi(h^l) + b^{l+1}`` (l = 1 ... L-1), the
output ``f = h^L``, with ``W^l_ij ~ N(0, sigma_w2_l / n_{l-1})``, ``b^l_i ~ N(0, sigma_b2_l)`` and
widths ``n_0 = d`` (the input), ``n_1 ... n_L``. In the *standard* parametrisation the weights
W themselves are the trained parameters (what practitioners do); the tangent kernel is
``Theta(x, x') = sum_p df(x)/dp df(x')/dp`` over all weights and biases.

Recursion (Jacot et al. 2018, Theorem 1, written for the standard parametrisation as in Lee et al.
2019, appendix "standard parameterization", and Sohl-Dickstein et al. 2020, section 2), at large
width, for two inputs of mean square ``q0 = |x|^2 / d`` and correlation (cosine) ``c0``:

* first layer: ``Theta^1 = x . x' + 1 = d q0 c0 + 1`` (its weights' gradient is the input; its
  bias' gradient is 1), and the pre-activation covariance ``k^1 = sigma_w2_1 q0 c0 + sigma_b2_1``;
* next layers:
  ``Theta^{l+1} = n_l E[phi(u1) phi(u2)] + 1 + sigma_w2_{l+1} E[phi'(u1) phi'(u2)] Theta^l``,
  ``k^{l+1} = sigma_w2_{l+1} E[phi(u1) phi(u2)] + sigma_b2_{l+1}``, with (u1, u2) centred Gaussian
  of variances q_l and covariance k^l (Poole et al. 2016, eq. 3-5).

The first term is the gradient of the layer's own weights (``phi(h^l) . phi(h'^l)``, which is
``n_l E[phi phi]`` at large width: it grows with the width, the mark of the standard
parametrisation), the second its bias, the third the backward pass through ``W^{l+1}`` (mean
square entries ``sigma_w2 / n_l``, summed over n_l units). In the NTK parametrisation the first
term would be ``sigma_w2 E[phi phi] + sigma_b2`` instead (the form quoted in Jacot et al. 2018);
dividing the standard one by the width of each layer gives it back. Distinct outputs have
independent kernels at large width: the kernel of the K outputs is ``Theta (x) I_K``.

Both expectations come from the engine's pair rule,
:func:`propcalc.meanfield.maps.correlation_map_and_slope` (one set of 2-D quadrature nodes for
``E[phi phi]`` and, by Price's theorem, ``E[phi' phi']``); nothing here integrates anew.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from .. import domains
from ..activations.base import Activation
from ..activations.resolver import resolve
from ..errors import InvalidParameterError, PropcalcError, check_int, check_nonnegative, check_positive
from ..meanfield.maps import (correlation_map_and_slope, derivative_pair_expectation,
                              second_moment, variance_map)
from ..numerics.quadrature import DEFAULT_RULE, QuadratureRule
from ..results import Result

__all__ = ["MAX_NTK_DEPTH", "TangentKernel", "UnsupportedKernelError", "layer_scales",
           "pair_moments", "tangent_kernel"]

#: deepest plain stack whose kernel is computed (one 2-D quadrature per layer and input pair)
MAX_NTK_DEPTH = 10_000


class UnsupportedKernelError(PropcalcError, ValueError):
    """The tangent kernel is not available for this network or activation (the message says why)."""


@dataclass(frozen=True)
class TangentKernel(Result):
    """The tangent kernel of a plain stack at initialisation (standard parametrisation).

    Attributes
    ----------
    activation : str
    widths : tuple of int
        ``(d, n_1, ..., n_L)``.
    input_second_moment : float
        q0, the mean square input coordinate.
    input_correlations : tuple of float
        The input pairs' correlations c0 (one column of ``off_diagonal`` each).
    q : tuple of float
        The pre-activation variance of each layer, ``q_1 ... q_L``.
    diagonal : tuple of float
        ``Theta^l(x, x)`` for l = 1 ... L (the last entry is the output kernel).
    off_diagonal : tuple of tuple of float
        ``Theta^l(x, x')``: one row per layer, one column per input correlation.
    correlations : tuple of tuple of float
        The pre-activation correlation of each pair at each layer, same layout.
    biases : bool
        Whether every layer's bias is trained (adds 1 per layer).
    parametrisation : str
        Always "standard" (the weights are trained directly).
    """

    activation: str
    widths: tuple[int, ...]
    input_second_moment: float
    input_correlations: tuple[float, ...]
    q: tuple[float, ...]
    diagonal: tuple[float, ...]
    off_diagonal: tuple[tuple[float, ...], ...]
    correlations: tuple[tuple[float, ...], ...]
    biases: bool
    parametrisation: str = "standard"

    @property
    def output_diagonal(self) -> float:
        """``Theta^L(x, x)``: the kernel of one output at one input."""
        return self.diagonal[-1]

    @property
    def output_off_diagonal(self) -> np.ndarray:
        """``Theta^L(x, x')`` for each input correlation."""
        return np.asarray(self.off_diagonal[-1])


def layer_scales(name: str, value: float | Sequence[float], n_layers: int,
                 positive: bool) -> np.ndarray:
    """One value per layer: a number repeated, or a sequence of exactly ``n_layers`` numbers."""
    check = check_positive if positive else check_nonnegative
    if isinstance(value, (str, bytes)):
        raise InvalidParameterError(name, "a number or one number per layer", value)
    if isinstance(value, Sequence) or isinstance(value, np.ndarray):
        vals = list(value)
        if len(vals) != n_layers:
            raise InvalidParameterError(name, f"a number or a list of {n_layers} numbers (one per "
                                        "layer)", vals)
        return np.array([check(f"{name}[{i}]", v) for i, v in enumerate(vals)])
    return np.full(n_layers, check(name, value))


def pair_moments(act: Activation, c: Any, q: float,
                 rule: QuadratureRule = DEFAULT_RULE) -> tuple[np.ndarray, np.ndarray]:
    """``E[phi(u1) phi(u2)]`` and ``E[phi'(u1) phi'(u2)]`` at variance q and correlations c.

    The engine's :func:`~propcalc.meanfield.maps.correlation_map_and_slope` with
    ``sigma_w2 = 1``, ``sigma_b2 = 0`` is ``C = E[phi phi] / E[phi^2]`` and
    ``C' = q E[phi' phi'] / E[phi^2]`` (Price's theorem), on shared nodes; multiplying back by
    ``E[phi^2]`` gives the two moments.
    """
    ca = np.asarray(c, dtype=float)
    if q == 0.0:
        d0 = float(np.asarray(act.derivative(np.array([0.0])))[0])
        v0 = float(np.asarray(act.value(np.array([0.0])))[0])
        return np.full_like(ca, v0 * v0), np.full_like(ca, d0 * d0)
    m2 = float(second_moment(act, q, rule))
    if m2 == 0.0:
        return np.zeros_like(ca), np.asarray(derivative_pair_expectation(act, ca, q, rule),
                                             dtype=float)
    corr, slope = correlation_map_and_slope(act, ca, 1.0, 0.0, q, rule, v_q=m2)
    return np.asarray(corr, dtype=float) * m2, np.asarray(slope, dtype=float) * m2 / q


def _correlations(c0: float | Sequence[float] | np.ndarray) -> np.ndarray:
    arr = np.atleast_1d(np.asarray(c0, dtype=float))
    if arr.ndim != 1 or arr.size == 0:
        raise InvalidParameterError("c0", "a correlation or a non-empty list of them", c0)
    if not np.all(np.isfinite(arr)) or np.any(np.abs(arr) > 1.0):
        bad = arr[~(np.isfinite(arr) & (np.abs(arr) <= 1.0))][0]
        raise InvalidParameterError("c0", "in [-1, 1]", float(bad))
    return arr


def tangent_kernel(act: Any, widths: Sequence[int], sigma_w2: float | Sequence[float],
                   sigma_b2: float | Sequence[float] = 0.0, q0: float = 1.0,
                   c0: float | Sequence[float] = 0.0, *, biases: bool = True,
                   rule: QuadratureRule = DEFAULT_RULE) -> TangentKernel:
    """The tangent kernel of a plain stack at initialisation, for pairs of inputs.

    Parameters
    ----------
    act : str, formula or Activation
    widths : sequence of int
        ``[d, n_1, ..., n_L]``: input size, hidden widths, number of outputs.
    sigma_w2, sigma_b2 : float or sequence of float
        One value for every layer, or one per layer (``W ~ N(0, sigma_w2 / fan_in)``).
    q0 : float
        Mean square input coordinate, ``|x|^2 / d``.
    c0 : float or sequence of float
        Correlation (cosine) of each pair of inputs, in [-1, 1].
    biases : bool
        Whether the layers have trained biases (torch's Linear does): each adds 1 to the kernel.

    Returns
    -------
    TangentKernel

    Raises
    ------
    InvalidParameterError
        For bad widths, scales or inputs.
    UnsupportedKernelError
        For an activation with jumps (its derivative has Dirac masses: the kernel is infinite).
    """
    act = resolve(act)
    if isinstance(widths, (str, bytes)) or not isinstance(widths, (Sequence, np.ndarray)):
        raise InvalidParameterError("widths", "a list of integers", widths)
    ws = [check_int(f"widths[{i}]", w, 1) for i, w in enumerate(widths)]
    if len(ws) < 2:
        raise InvalidParameterError("widths", "a list of at least 2 sizes", list(widths))
    n_layers = len(ws) - 1
    if n_layers > MAX_NTK_DEPTH:
        raise InvalidParameterError("widths", f"at most {MAX_NTK_DEPTH} layers", n_layers)
    if act.has_jumps:
        raise UnsupportedKernelError(
            f"activation {act.label} jumps, so phi' has Dirac masses and the tangent kernel "
            "E[phi'(u) phi'(u)] is infinite: no learning-rate ceiling from it")
    sw = layer_scales("sigma_w2", sigma_w2, n_layers, positive=True)
    sb = layer_scales("sigma_b2", sigma_b2, n_layers, positive=False)
    q0f = float(domains.check("q", check_positive("q0", q0), "q0"))
    cs = _correlations(c0)
    one = 1.0 if biases else 0.0
    # layer 1 (the input is data): Theta^1 = x.x' + 1, k^1 = sigma_w2 q0 c0 + sigma_b2
    q = sw[0] * q0f + sb[0]
    k = sw[0] * q0f * cs + sb[0]
    theta_d = ws[0] * q0f + one
    theta_o = ws[0] * q0f * cs + one
    qs, diag, offs, cors = [q], [theta_d], [theta_o], [_safe_ratio(k, q)]
    for layer in range(1, n_layers):
        n = ws[layer]
        c = np.clip(_safe_ratio(k, q), -1.0, 1.0)
        e_val, e_der = pair_moments(act, np.concatenate(([1.0], c)), float(q), rule)
        # Jacot et al. 2018, Theorem 1, standard parametrisation (module docstring)
        theta_d = n * e_val[0] + one + sw[layer] * e_der[0] * theta_d
        theta_o = n * e_val[1:] + one + sw[layer] * e_der[1:] * theta_o
        q_next = float(variance_map(act, float(q), float(sw[layer]), float(sb[layer]), rule))
        k = sw[layer] * e_val[1:] + sb[layer]
        q = q_next
        if not (math.isfinite(q) and math.isfinite(theta_d)):
            raise UnsupportedKernelError(
                f"the kernel of {act.label} overflows at layer {layer + 1} (q = {q:.3g}, "
                f"Theta = {theta_d:.3g}): the forward signal explodes at these scales")
        qs.append(q)
        diag.append(float(theta_d))
        offs.append(theta_o)
        cors.append(_safe_ratio(k, q))
    return TangentKernel(act.label, tuple(ws), q0f, tuple(float(x) for x in cs),
                         tuple(float(x) for x in qs), tuple(float(x) for x in diag),
                         tuple(tuple(float(x) for x in row) for row in offs),
                         tuple(tuple(float(x) for x in row) for row in cors), bool(biases))


def _safe_ratio(k: np.ndarray, q: float) -> np.ndarray:
    if q == 0.0:
        return np.ones_like(k)
    return np.asarray(k, dtype=float) / q
