"""The learning-rate ceiling at initialisation: the top curvature of the loss and 2 / lambda_max.

Curvature. For a loss ``(1/B) sum_i l(f(x_i), y_i)`` over a batch of B inputs, the Gauss-Newton
part of the Hessian is ``G = (1/B) sum_i J_i^T H_i J_i`` (J_i the K x P Jacobian of the outputs
at input i, H_i the Hessian of l in the outputs; Martens 2020, "New insights and perspectives
on the natural gradient method", section 8). Its non-zero eigenvalues are those of
``(1/B) H^{1/2} J J^T H^{1/2}``, and ``J J^T`` is the tangent kernel of the batch,
``Theta_B (x) I_K`` at large width (:mod:`propcalc.training.ntk`). With the same H at every input
(below) the top eigenvalue is

    lambda_max = h * lambda_max(Theta_B) / B,

h the top eigenvalue of H on the subspace the kernel reaches:

* ``loss="mse"``: torch's ``MSELoss`` (mean over the B K entries, no 1/2):
  ``l = |f - y|^2 / K``, ``H = (2 / K) I``, so ``h = 2 / K``;
* ``loss="cross_entropy"``: torch's ``CrossEntropyLoss`` (mean over the batch):
  ``H = diag(p) - p p^T`` (p = softmax(f)); its rows sum to 0 and, averaged over the symmetric
  law of the initial logits, ``E[H] = alpha (I - 1 1^T / K)`` with
  ``alpha = (1 - E[sum_j p_j^2]) / (K - 1)`` (the trace of H is ``1 - sum_j p_j^2``). With small
  logits ``p = 1/K`` and ``alpha = 1/K`` exactly; at a planned logit variance s2 > 0, E[sum p^2]
  is estimated by seeded sampling of the K iid N(0, s2) logits. The kernel's output factor I_K
  meets the centring projector in its K - 1 non-constant directions, so ``h = alpha``.

The batch kernel. From a summary (q0 and the pairwise correlations c0 of the inputs, one value
or samples of their distribution): ``Theta_B`` has the diagonal ``Theta(x, x)`` and, replacing
each off-diagonal entry by their mean ``m``, the eigenvalues ``Theta(x, x) + (B - 1) m`` and
``Theta(x, x) - m``: the larger is a lower bound of the true top eigenvalue (Rayleigh quotient)
and is close to it once depth has made the correlations alike. From a batch of inputs: the
exact ``B x B`` matrix of the kernel at each pair's correlation (common q0 = the batch's mean
square coordinate), its top eigenvalue by ``numpy.linalg.eigvalsh``.

The ceiling. On a quadratic, gradient descent with step lr is stable iff ``lr < 2 / lambda_max``;
heavy-ball momentum mu (torch's ``SGD(momentum=mu)``, ``dampening=0``) moves the bound to
``2 (1 + mu) / lambda_max`` (Polyak 1964; from memory of the standard two-step analysis). For
SGD the batch's curvature is the one that matters, hence B in lambda_max. The recommended value
is half the ceiling: for mu = 0 that is ``1 / lambda_max``, the step of the classic analysis of a
function with Lipschitz gradient (Nesterov 2004, Introductory Lectures on Convex Optimization,
section 2.1.5; from memory of the section number); for mu > 0 the factor 1/2 is common practice,
no source.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy.interpolate import BarycentricInterpolator

from ..activations.resolver import resolve
from ..errors import InvalidParameterError, check_finite, check_int, check_nonnegative
from ..numerics.quadrature import DEFAULT_RULE, QuadratureRule
from ..results import OMIT, Result
from .ntk import TangentKernel, tangent_kernel

__all__ = ["LOSSES", "MAX_BATCH_SIZE", "RECOMMENDED_FRACTION", "LearningRateCeiling",
           "learning_rate_ceiling", "output_hessian"]

#: the losses the curvature is computed for
LOSSES = ("mse", "cross_entropy")
#: largest batch size accepted
MAX_BATCH_SIZE = 10**7
#: the recommended learning rate as a fraction of the ceiling (module docstring)
RECOMMENDED_FRACTION = 0.5
#: samples of the logits for E[sum_j p_j^2] at a planned logit variance
_SOFTMAX_SAMPLES = 20_000
#: Chebyshev nodes on which a batch's correlations are interpolated
_GRID_NODES = 33

_NOTES = (
    "the ceiling 2 (1 + momentum) / lambda_max is for gradient descent and SGD without (momentum "
    "0) or with heavy-ball momentum, on the curvature at initialisation",
    "between 2/lambda_max and about 4/lambda_max plain gradient descent can still converge after "
    "an initial spike of the loss that lowers the curvature (the catapult phase, Lewkowycz et al. "
    "2020); beyond about 4/lambda_max it diverges",
    "during training the top curvature tends to rise until it hovers near 2/lr (edge of "
    "stability, Cohen et al. 2021), so the curvature at initialisation bounds the first steps, "
    "not the whole run",
    "Adam is not covered: it divides each coordinate's step by a running root mean square of "
    "its gradient, so its stability depends on the curvature after that preconditioning (and on "
    "eps), which this analysis does not compute",
)


@dataclass(frozen=True)
class LearningRateCeiling(Result):
    """The top curvature of the loss at initialisation and the learning rates it allows.

    Attributes
    ----------
    loss : str
        "mse" or "cross_entropy" (torch's MSELoss / CrossEntropyLoss with mean reduction).
    n_classes : int
        Number of outputs K.
    batch_size : int
    momentum : float
        Heavy-ball momentum the ceiling is for (0: plain SGD / gradient descent).
    inputs : str
        How the batch was described: "correlation", "correlations" (samples of a
        distribution) or "batch" (explicit inputs).
    kernel_diagonal : float
        ``Theta(x, x)`` of one output.
    kernel_off_diagonal : float
        The mean ``Theta(x, x')`` over the input pairs.
    kernel_top_eigenvalue : float
        ``lambda_max(Theta_B)`` of the B x B batch kernel.
    output_hessian : float
        h: 2/K for MSE, alpha for cross-entropy (module docstring).
    lambda_max : float
        ``h lambda_max(Theta_B) / B``: the top eigenvalue of the Gauss-Newton curvature.
    learning_rate_ceiling : float
        ``2 (1 + momentum) / lambda_max``.
    learning_rate : float
        The recommended value, ``RECOMMENDED_FRACTION`` of the ceiling.
    learning_rate_rule : str
        Where the recommended value comes from.
    catapult_limit : float
        ``4 / lambda_max``: about where gradient descent without momentum stops converging
        even through a catapult (Lewkowycz et al. 2020).
    optimiser : str
    notes : tuple of str
    kernel : TangentKernel
        The kernel it came from (Python only).
    """

    loss: str
    n_classes: int
    batch_size: int
    momentum: float
    inputs: str
    kernel_diagonal: float
    kernel_off_diagonal: float
    kernel_top_eigenvalue: float
    output_hessian: float
    lambda_max: float
    learning_rate_ceiling: float
    learning_rate: float
    learning_rate_rule: str
    catapult_limit: float
    optimiser: str
    notes: tuple[str, ...] = ()
    kernel: TangentKernel | None = field(default=None, repr=False, metadata=OMIT)


def output_hessian(loss: str, n_classes: int, logit_variance: float = 0.0,
                   seed: int = 0) -> float:
    """h, the top eigenvalue of the loss's Hessian in the outputs, averaged (module docstring)."""
    if loss not in LOSSES:
        raise InvalidParameterError("loss", f"one of {', '.join(LOSSES)}", loss)
    k = check_int("n_classes", n_classes, 1 if loss == "mse" else 2, 10**7)
    s2 = check_nonnegative("logit_variance", logit_variance)
    if loss == "mse":
        return 2.0 / k
    if s2 == 0.0:
        return 1.0 / k
    # E[sum_j p_j^2] for K iid N(0, s2) logits, seeded sampling in chunks of bounded size
    rng = np.random.default_rng(seed)
    chunk = max(1, min(_SOFTMAX_SAMPLES, 5_000_000 // k))
    total, done = 0.0, 0
    while done < _SOFTMAX_SAMPLES:
        m = min(chunk, _SOFTMAX_SAMPLES - done)
        z = rng.standard_normal((m, k)) * math.sqrt(s2)
        z -= z.max(axis=1, keepdims=True)
        p = np.exp(z)
        p /= p.sum(axis=1, keepdims=True)
        total += float(np.sum(p * p))
        done += m
    return (1.0 - total / done) / (k - 1)


def _batch_cosines(inputs: Any, d: int) -> tuple[float, np.ndarray]:
    x = np.asarray(inputs, dtype=float)
    if x.ndim != 2 or x.shape[0] < 2:
        raise InvalidParameterError("inputs", "a 2-D array with at least 2 rows (one per input)",
                                    f"an array of shape {x.shape}")
    if x.shape[1] != d:
        raise InvalidParameterError("inputs", f"rows of {d} numbers (widths[0])",
                                    f"rows of {x.shape[1]}")
    if not np.all(np.isfinite(x)):
        raise InvalidParameterError("inputs", "finite numbers", "an array with NaN or inf")
    norms = np.linalg.norm(x, axis=1)
    if np.any(norms == 0.0):
        raise InvalidParameterError("inputs", "rows that are not all zero",
                                    f"row {int(np.argmin(norms))} of zeros")
    u = x / norms[:, None]
    return float(np.mean(x * x)), np.clip(u @ u.T, -1.0, 1.0)


def _kernel_matrix(cos: np.ndarray, diag: float, kernel_at: Any) -> np.ndarray:
    iu = np.triu_indices(cos.shape[0], 1)
    mat = np.full(cos.shape, diag)
    vals = kernel_at(cos[iu])
    mat[iu] = vals
    mat[(iu[1], iu[0])] = vals
    return mat


def learning_rate_ceiling(act: Any, widths: Sequence[int], sigma_w2: float | Sequence[float],
                          sigma_b2: float | Sequence[float] = 0.0, *, loss: str,
                          batch_size: int, n_classes: int | None = None, q0: float = 1.0,
                          input_correlation: float | Sequence[float] = 0.0,
                          inputs: Any = None, momentum: float = 0.0,
                          logit_variance: float = 0.0, biases: bool = True, seed: int = 0,
                          rule: QuadratureRule = DEFAULT_RULE) -> LearningRateCeiling:
    """The learning-rate ceiling of a plain stack at initialisation (module docstring).

    Parameters
    ----------
    act : str, formula or Activation
    widths : sequence of int
        ``[d, n_1, ..., n_L]``; ``n_L`` is the number of outputs K.
    sigma_w2, sigma_b2 : float or sequence of float
        As for :func:`propcalc.training.ntk.tangent_kernel`.
    loss : str
        "mse" or "cross_entropy".
    batch_size : int
        B, the inputs per step (the whole training set for full-batch gradient descent).
    n_classes : int, optional
        K; must equal ``widths[-1]`` when given.
    q0 : float
        Mean square input coordinate (ignored when ``inputs`` is given).
    input_correlation : float or sequence of float
        The inputs' pairwise correlation, or samples of its distribution.
    inputs : array of shape (N, d), optional
        An explicit batch (N = B), or N > B inputs of which 4 seeded batches of B are taken.
    momentum : float
        Heavy-ball momentum in [0, 1).
    logit_variance : float
        The initial logits' variance (cross-entropy only), for the softmax's Hessian.

    Returns
    -------
    LearningRateCeiling
    """
    act = resolve(act)
    if loss not in LOSSES:
        raise InvalidParameterError("loss", f"one of {', '.join(LOSSES)}", loss)
    b = check_int("batch_size", batch_size, 1, MAX_BATCH_SIZE)
    if isinstance(widths, (str, bytes)) or not isinstance(widths, (Sequence, np.ndarray)):
        raise InvalidParameterError("widths", "a list of integers", widths)
    ws = [check_int(f"widths[{i}]", w, 1) for i, w in enumerate(widths)]
    if len(ws) < 2:
        raise InvalidParameterError("widths", "a list of at least 2 sizes", list(widths))
    k = ws[-1]
    if n_classes is not None and check_int("n_classes", n_classes, 1) != k:
        raise InvalidParameterError("n_classes", f"equal to the last width ({k})", n_classes)
    if loss == "cross_entropy" and k < 2:
        raise InvalidParameterError("n_classes", ">= 2 for cross_entropy", k)
    mu = check_finite("momentum", momentum)
    if not 0.0 <= mu < 1.0:
        raise InvalidParameterError("momentum", "in [0, 1)", momentum)
    h = output_hessian(loss, k, logit_variance, seed)
    notes: list[str] = []
    if inputs is not None:
        q_in, cos = _batch_cosines(inputs, ws[0])
        n = cos.shape[0]
        if n < b:
            raise InvalidParameterError("inputs", f"at least batch_size = {b} rows", f"{n} rows")
        iu = np.triu_indices(n, 1)
        lo, hi = float(cos[iu].min()), float(cos[iu].max())
        # the composed kernel is smooth in c0 inside (-1, 1): Chebyshev nodes over the
        # range of the batch's correlations and barycentric interpolation between them
        t = np.cos(np.pi * np.arange(_GRID_NODES) / (_GRID_NODES - 1))
        grid = 0.5 * (lo + hi) + 0.5 * (hi - lo) * t if hi > lo else np.array([lo])
        kern = tangent_kernel(act, ws, sigma_w2, sigma_b2, q_in, grid, biases=biases, rule=rule)
        values = kern.output_off_diagonal
        kernel_at = ((lambda c: np.full_like(c, values[0])) if grid.size == 1
                     else BarycentricInterpolator(grid, values))
        diag = kern.output_diagonal
        if n == b:
            subsets = [np.arange(n)]
        else:
            rng = np.random.default_rng(seed)
            subsets = [rng.choice(n, b, replace=False) for _ in range(4)]
            notes.append(f"the kernel's top eigenvalue is the mean over 4 seeded batches of {b} "
                         f"of the {n} inputs")
        tops, means = [], []
        for s in subsets:
            mat = _kernel_matrix(cos[np.ix_(s, s)], diag, kernel_at)
            tops.append(float(np.linalg.eigvalsh(mat)[-1]) if b > 1 else diag)
            means.append(float(mat[np.triu_indices(b, 1)].mean()) if b > 1 else 0.0)
        top, off = float(np.mean(tops)), float(np.mean(means))
        how = "batch"
        notes.append(f"inputs: {n} given, mean square coordinate q0 = {q_in:.4g}, pairwise "
                     f"correlations in [{lo:.3g}, {hi:.3g}] (the kernel uses the common q0)")
    else:
        cs = np.atleast_1d(np.asarray(input_correlation, dtype=float))
        kern = tangent_kernel(act, ws, sigma_w2, sigma_b2, q0, cs, biases=biases, rule=rule)
        diag = kern.output_diagonal
        off = float(np.mean(kern.output_off_diagonal))
        top = max(diag + (b - 1) * off, diag - off) if b > 1 else diag
        how = "correlation" if cs.size == 1 else "correlations"
        notes.append(f"inputs summarised by q0 = {kern.input_second_moment:g} and "
                     + (f"correlation {cs[0]:g}" if cs.size == 1 else
                        f"{cs.size} sampled correlations (mean {cs.mean():.3g})")
                     + ": the batch kernel's top eigenvalue is the lower bound "
                     "Theta(x, x) + (B - 1) mean Theta(x, x'); pass inputs for the exact matrix")
    lam = h * top / b
    ceiling = 2.0 * (1.0 + mu) / lam
    rule_text = ("half the ceiling: 1/lambda_max, the step of the classic analysis of a function "
                 "with Lipschitz gradient (Nesterov 2004, section 2.1.5, from memory)" if mu == 0.0
                 else "half the ceiling (common practice, no source)")
    optimiser = ("gradient descent / SGD without momentum" if mu == 0.0
                 else f"SGD with heavy-ball momentum {mu:g}")
    return LearningRateCeiling(loss, k, b, mu, how, float(diag), off, top, h, lam, ceiling,
                               RECOMMENDED_FRACTION * ceiling, rule_text, 4.0 / lam, optimiser,
                               tuple(notes) + _NOTES, kern)
