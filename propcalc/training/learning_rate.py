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
  ``H_i = diag(p_i) - p_i p_i^T`` (p = softmax(f)); its rows sum to 0. With small logits
  ``p = 1/K`` and ``H = (1/K)(I - 1 1^T / K)``, so ``h = 1/K`` exactly (the kernel's factor I_K
  meets the centring projector in its K - 1 non-constant directions). At a planned logit
  variance s2 > 0 the p_i differ, and the logits of different inputs are correlated (c, the
  outputs' correlation from the kernel's recursion: deep networks map inputs to similar
  outputs), so one class's probability can stand out in the whole batch and raise the top
  eigenvalue: h is the expected top eigenvalue of the batch mean of H_i, for logits made of a
  shared part (variance ``s2 c``) and a per-input part (variance ``s2 (1 - c)``), by seeded
  sampling. Putting the batch mean of H beside the kernel's top eigenvalue is exact when the
  top eigenvector of Theta_B is spread evenly over the batch (deep networks) and an
  approximation otherwise; against torch's Hessian on the digits it is within 2-15%
  (docs/training.md).

The batch kernel. From a summary (q0 and the pairwise correlations c0 of the inputs, one value
or samples of their distribution): ``Theta_B`` has the diagonal ``Theta(x, x)`` and, replacing
each off-diagonal entry by their mean ``m``, the eigenvalues ``Theta(x, x) + (B - 1) m`` and
``Theta(x, x) - m``: the larger is a lower bound of the true top eigenvalue (Rayleigh quotient)
and is close to it once depth has made the correlations alike. From a batch of inputs: the
``B x B`` matrix: each input's own diagonal ``Theta(x, x)`` at its mean square coordinate, and
for a pair ``sqrt(Theta(x, x) Theta(x', x'))`` times the normalised kernel at the batch's mean
square and at the correlation their first-layer pre-activations would have there (exact for
positively homogeneous phi with sigma_b2 = 0 and no biases; the recursion takes one variance per
layer); its top eigenvalue by ``numpy.linalg.eigvalsh``.

The ceiling. On a quadratic, gradient descent with step lr is stable iff ``lr < 2 / lambda_max``;
heavy-ball momentum mu (torch's ``SGD(momentum=mu)``, ``dampening=0``) moves the bound to
``2 (1 + mu) / lambda_max`` (Polyak 1964; from memory of the standard two-step analysis). For
SGD the batch's curvature is the one that matters, hence B in lambda_max. The recommended value
is half the ceiling: for mu = 0 that is ``1 / lambda_max``, the step of the classic analysis of a
function with Lipschitz gradient (Nesterov 2004, the textbook on convex optimization, section
2.1.5; from memory of the section number); for mu > 0 the factor 1/2 is common practice, no
source. Deeper than ``DEEP_FROM`` hidden layers it is further multiplied by ``(DEEP_FROM / L)^2``:
real training showed the usable rate of deep plain stacks well below the ceiling (tanh at width
128 on scikit-learn's digits, plain SGD, 200-300 steps: half the ceiling trains at 20 hidden
layers and stays at chance at 50 and 100, where 1/8-1/16 and 1/32 of the ceiling train best;
README, "Does it train?"). That factor is a rule of ours fitted to those runs, no source; the
ceiling itself is unchanged.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy.interpolate import BarycentricInterpolator

from .. import domains
from ..activations.resolver import resolve
from ..errors import InvalidParameterError, check_finite, check_int, check_nonnegative
from ..numerics.quadrature import DEFAULT_RULE, QuadratureRule
from ..results import OMIT, Result
from .ntk import layer_scales, tangent_kernel

__all__ = ["FINITE_WIDTH_NOTE", "LOSSES", "MAX_BATCH_SIZE", "MAX_CORRELATION_SAMPLES",
           "MAX_INPUT_ROWS", "MAX_SAMPLED_CLASSES", "RECOMMENDED_FRACTION", "DEEP_FROM",
           "LearningRateCeiling",
           "ceiling_from_kernel", "correlation_samples", "learning_rate_ceiling",
           "output_hessian"]

#: most rows of an explicit batch of inputs (it forms N x N matrices)
MAX_INPUT_ROWS = 2048
#: most samples of the inputs' pairwise correlation (each is followed through every layer)
MAX_CORRELATION_SAMPLES = 1000
#: the losses the curvature is computed for
LOSSES = ("mse", "cross_entropy")
#: largest batch size accepted
MAX_BATCH_SIZE = int(domains.domain("batch_size").upper)
#: the recommended learning rate as a fraction of the ceiling (module docstring)
RECOMMENDED_FRACTION = 0.5
#: Hidden layers beyond which the recommended rate falls like (DEEP_FROM / L)^2 (module
#: docstring: a rule of ours fitted to the real training of README "Does it train?", no source).
DEEP_FROM = 20
#: samples of the logits for E[sum_j p_j^2] at a planned logit variance
_SOFTMAX_SAMPLES = 20_000
#: up to this many classes the softmax Hessian's top eigenvalue is sampled (K x K matrices)
MAX_SAMPLED_CLASSES = 1000
#: above this sum of 1/width over the hidden layers the result notes the finite-width excess
FINITE_WIDTH_NOTE = 0.1
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
    "lambda_max is the Gauss-Newton part of the Hessian; the rest (output residuals times the "
    "outputs' second derivatives) has eigenvalues of both signs that grow with depth (measured "
    "on the digits: 2x the Gauss-Newton top at depth 20, 17x at depth 100, width 128), yet real "
    "SGD runs diverged only beyond the Gauss-Newton ceiling (docs/training.md)",
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
    kernel : TangentKernel or NetworkTangentKernel
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
    kernel: Any = field(default=None, repr=False, metadata=OMIT)


def output_hessian(loss: str, n_classes: int, logit_variance: float = 0.0,
                   output_correlation: float = 0.0, batch_size: int = 1, seed: int = 0) -> float:
    """h: the top eigenvalue of the loss's Hessian in the outputs, averaged over a batch.

    MSE: ``2 / K``. Cross-entropy: with logits ``l_i = a + e_i`` (a shared part of variance
    ``s2 c`` and a per-input part of variance ``s2 (1 - c)``, c the outputs' correlation), the
    expected top eigenvalue of the batch mean ``(1/B) sum_i (diag(p_i) - p_i p_i^T)``, by
    seeded sampling (64 draws of a, min(B, 256) of e each); ``1/K`` at s2 = 0. For K above
    :data:`MAX_SAMPLED_CLASSES` the law's mean ``alpha = (1 - E[sum_j p_j^2]) / (K - 1)`` is
    used instead (the large-B, uncorrelated limit; module docstring).
    """
    if loss not in LOSSES:
        raise InvalidParameterError("loss", f"one of {', '.join(LOSSES)}", loss)
    k = check_int("n_classes", n_classes, 1 if loss == "mse" else 2, 10**7)
    s2 = check_nonnegative("logit_variance", logit_variance)
    c = check_finite("output_correlation", output_correlation)
    if not -1.0 <= c <= 1.0:
        raise InvalidParameterError("output_correlation", "in [-1, 1]", output_correlation)
    b = domains.check("batch_size", batch_size)
    if loss == "mse":
        return 2.0 / k
    if s2 == 0.0:
        return 1.0 / k
    rng = np.random.default_rng(seed)
    if k > MAX_SAMPLED_CLASSES:
        # E[sum_j p_j^2] for K iid N(0, s2) logits, seeded sampling in chunks of bounded size
        chunk = max(1, min(_SOFTMAX_SAMPLES, 5_000_000 // k))
        total, done = 0.0, 0
        while done < _SOFTMAX_SAMPLES:
            m = min(chunk, _SOFTMAX_SAMPLES - done)
            p = _softmax(rng.standard_normal((m, k)) * math.sqrt(s2))
            total += float(np.sum(p * p))
            done += m
        return (1.0 - total / done) / (k - 1)
    shared = math.sqrt(s2 * max(c, 0.0))
    own = math.sqrt(s2 * (1.0 - max(c, 0.0)))
    m = min(b, 256)
    tops = []
    for _ in range(64):
        p = _softmax(shared * rng.standard_normal(k) + own * rng.standard_normal((m, k)))
        mean_h = np.diag(p.mean(axis=0)) - p.T @ p / m
        tops.append(float(np.linalg.eigvalsh(mean_h)[-1]))
    return float(np.mean(tops))


def _softmax(z: np.ndarray) -> np.ndarray:
    z = z - z.max(axis=-1, keepdims=True)
    e = np.exp(z)
    return e / e.sum(axis=-1, keepdims=True)


def _nodes(lo: float, hi: float, count: int = _GRID_NODES) -> np.ndarray:
    """Chebyshev-Lobatto nodes on [lo, hi] (one node when the range is empty)."""
    if not hi > lo:
        return np.array([lo])
    t = np.cos(np.pi * np.arange(count) / (count - 1))
    return 0.5 * (lo + hi) + 0.5 * (hi - lo) * t


def _interpolant(nodes: np.ndarray, values: np.ndarray) -> Any:
    if nodes.size == 1:
        return lambda x: np.full(np.shape(x), float(values[0]))
    return BarycentricInterpolator(nodes, values)


def _batch_cosines(inputs: Any, d: int) -> tuple[np.ndarray, np.ndarray]:
    x = np.asarray(inputs, dtype=float)
    if x.ndim != 2 or not 2 <= x.shape[0] <= MAX_INPUT_ROWS:
        raise InvalidParameterError("inputs", f"a 2-D array of 2 to {MAX_INPUT_ROWS} rows (one "
                                    "per input)", f"an array of shape {x.shape}")
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
    return norms ** 2 / d, np.clip(u @ u.T, -1.0, 1.0)


def _kernel_matrix(cos: np.ndarray, diag: np.ndarray, ratio_at: Any) -> np.ndarray:
    iu = np.triu_indices(cos.shape[0], 1)
    mat = np.diag(diag)
    vals = ratio_at(cos[iu]) * np.sqrt(diag[iu[0]] * diag[iu[1]])
    mat[iu] = vals
    mat[(iu[1], iu[0])] = vals
    return mat


def correlation_samples(input_correlation: Any, limit: int) -> np.ndarray:
    """``input_correlation`` as a 1-D array of 1 to ``limit`` correlations in [-1, 1].

    Raises
    ------
    InvalidParameterError
        Naming ``input_correlation``, for another shape or size, or a value outside [-1, 1].
    """
    cs = np.atleast_1d(np.asarray(input_correlation, dtype=float))
    if cs.ndim != 1 or not 1 <= cs.size <= limit:
        raise InvalidParameterError("input_correlation", f"a correlation or at most {limit} "
                                    "samples of them", f"an array of shape {cs.shape}")
    return domains.check_array("c", cs, "input_correlation")


def learning_rate_ceiling(act: Any, widths: Sequence[int], sigma_w2: float | Sequence[float],
                          sigma_b2: float | Sequence[float] = 0.0, *, loss: str,
                          batch_size: int, n_classes: int | None = None, q0: float = 1.0,
                          input_correlation: float | Sequence[float] = 0.0,
                          inputs: Any = None, momentum: float = 0.0,
                          logit_variance: float | None = None, biases: bool = True,
                          seed: int = 0,
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
    logit_variance : float, optional
        The initial logits' variance (cross-entropy only), for the softmax's Hessian; by default
        the last layer's pre-activation variance at these scales.

    Returns
    -------
    LearningRateCeiling
    """
    act = resolve(act)
    if loss not in LOSSES:
        raise InvalidParameterError("loss", f"one of {', '.join(LOSSES)}", loss)
    b = domains.check("batch_size", batch_size)
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
    mu = domains.check("momentum", momentum)
    notes: list[str] = []
    if inputs is not None:
        sq, cos = _batch_cosines(inputs, ws[0])
        n = cos.shape[0]
        if n < b:
            raise InvalidParameterError("inputs", f"at least batch_size = {b} rows", f"{n} rows")
        q_in = float(np.mean(sq))
        # each pair's first-layer correlation, carried to inputs of the common mean square
        # q_in (the kernel's recursion takes one variance per layer)
        sw1 = float(layer_scales("sigma_w2", sigma_w2, len(ws) - 1, True)[0])
        sb1 = float(layer_scales("sigma_b2", sigma_b2, len(ws) - 1, False)[0])
        q1 = sw1 * sq + sb1
        c1 = (sw1 * np.sqrt(np.outer(sq, sq)) * cos + sb1) / np.sqrt(np.outer(q1, q1))
        cos = np.clip((c1 * (sw1 * q_in + sb1) - sb1) / (sw1 * q_in), -1.0, 1.0)
        iu = np.triu_indices(n, 1)
        lo, hi = float(cos[iu].min()), float(cos[iu].max())
        # the composed kernel is smooth in c0 inside (-1, 1) and in q0 > 0: Chebyshev nodes
        # over the batch's ranges and barycentric interpolation between them
        kern = tangent_kernel(act, ws, sigma_w2, sigma_b2, q_in, _nodes(lo, hi), biases=biases,
                              rule=rule)
        ratio_at = _interpolant(_nodes(lo, hi), kern.output_off_diagonal / kern.output_diagonal)
        out_corr_at = _interpolant(_nodes(lo, hi), np.asarray(kern.correlations[-1]))
        q_nodes = _nodes(float(sq.min()), float(sq.max()), 9)
        diag_at = _interpolant(q_nodes, np.array([
            tangent_kernel(act, ws, sigma_w2, sigma_b2, float(qq), 1.0, biases=biases,
                           rule=rule).output_diagonal for qq in q_nodes]))
        diag_i = diag_at(sq)
        diag = float(np.mean(diag_i))
        if n == b:
            subsets = [np.arange(n)]
        else:
            rng = np.random.default_rng(seed)
            subsets = [rng.choice(n, b, replace=False) for _ in range(4)]
            notes.append(f"the kernel's top eigenvalue is the mean over 4 seeded batches of {b} "
                         f"of the {n} inputs")
        tops, means, out_corr = [], [], []
        for s in subsets:
            sub = cos[np.ix_(s, s)]
            mat = _kernel_matrix(sub, diag_i[s], ratio_at)
            tops.append(float(np.linalg.eigvalsh(mat)[-1]))
            means.append(float(mat[np.triu_indices(b, 1)].mean()) if b > 1 else 0.0)
            out_corr.append(float(np.mean(out_corr_at(sub[np.triu_indices(b, 1)])))
                            if b > 1 else 0.0)
        top, off, c_out = float(np.mean(tops)), float(np.mean(means)), float(np.mean(out_corr))
        how = "batch"
        notes.append(f"inputs: {n} given, mean square coordinate {q_in:.4g} (from {sq.min():.3g} "
                     f"to {sq.max():.3g}), pairwise correlations (carried to that mean square) in "
                     f"[{lo:.3g}, {hi:.3g}]; a pair's kernel is sqrt(Theta(x, x) Theta(x', x')) "
                     "times the normalised kernel at the correlation their first-layer "
                     "pre-activations would have at the mean square (exact for positively "
                     "homogeneous phi with sigma_b2 = 0 and no biases)")
    else:
        cs = correlation_samples(input_correlation, MAX_CORRELATION_SAMPLES)
        kern = tangent_kernel(act, ws, sigma_w2, sigma_b2, q0, cs, biases=biases, rule=rule)
        diag = kern.output_diagonal
        off = float(np.mean(kern.output_off_diagonal))
        c_out = float(np.mean(kern.correlations[-1]))
        top = max(diag + (b - 1) * off, diag - off) if b > 1 else diag
        how = "correlation" if cs.size == 1 else "correlations"
        notes.append(f"inputs summarised by q0 = {kern.input_second_moment:g} and "
                     + (f"correlation {cs[0]:g}" if cs.size == 1 else
                        f"{cs.size} sampled correlations (mean {cs.mean():.3g})")
                     + ": the batch kernel's top eigenvalue is the lower bound "
                     "Theta(x, x) + (B - 1) mean Theta(x, x'); pass inputs for the exact matrix")
    s2 = kern.q[-1] if logit_variance is None else check_nonnegative("logit_variance",
                                                                     logit_variance)
    beta = float(sum(1.0 / w for w in ws[1:-1]))
    if beta > FINITE_WIDTH_NOTE:
        notes.append(
            f"finite width: the sum of 1/width over the hidden layers is {beta:.3g}; the kernel "
            "then fluctuates from draw to draw and the measured top curvature departs from this "
            "infinite-width value (1.06x at 0.074; from 0.3x for GELU to 3.6x for tanh near "
            "0.8, on the digits, docs/training.md); wider layers bring it back")
    return ceiling_from_kernel(loss, k, b, mu, how, float(diag), off, top, s2, c_out, seed,
                               tuple(notes), kern, hidden_layers=len(ws) - 2)


def ceiling_from_kernel(loss: str, n_classes: int, batch_size: int, momentum: float, inputs: str,
                        diagonal: float, off_diagonal: float, top: float, logit_variance: float,
                        output_correlation: float, seed: int, notes: tuple[str, ...],
                        kernel: Any = None, hidden_layers: int | None = None
                        ) -> LearningRateCeiling:
    """The curvature and the learning rates from a batch kernel's numbers (module docstring).

    ``hidden_layers`` (a plain stack's L) lowers the recommended rate past ``DEEP_FROM`` layers;
    None (networks of blocks) keeps half the ceiling.
    """
    h = output_hessian(loss, n_classes, logit_variance if loss == "cross_entropy" else 0.0,
                       float(np.clip(output_correlation, -1.0, 1.0)), batch_size, seed)
    lam = h * top / batch_size
    ceiling = 2.0 * (1.0 + momentum) / lam
    rule_text = ("half the ceiling: 1/lambda_max, the step of the classic analysis of a function "
                 "with Lipschitz gradient (Nesterov 2004, section 2.1.5, from memory)"
                 if momentum == 0.0 else "half the ceiling (common practice, no source)")
    fraction = RECOMMENDED_FRACTION
    if hidden_layers is not None and hidden_layers > DEEP_FROM:
        deep = (DEEP_FROM / hidden_layers) ** 2
        fraction *= deep
        rule_text += (f", times (20 / L)^2 = {deep:.3g} for L = {hidden_layers} hidden layers: "
                      "deep plain stacks trained best well below the ceiling (tanh, width 128, "
                      "digits: 1/8-1/16 of it at 50 layers, 1/32 at 100; README 'Does it "
                      "train?'); a rule of ours fitted to those runs, no source")
    optimiser = ("gradient descent / SGD without momentum" if momentum == 0.0
                 else f"SGD with heavy-ball momentum {momentum:g}")
    return LearningRateCeiling(loss, n_classes, batch_size, momentum, inputs, diagonal,
                               off_diagonal, top, h, lam, ceiling, fraction * ceiling,
                               rule_text, 4.0 / lam, optimiser, notes + _NOTES, kernel)
