"""The spectrum of J J^T measured on seeded random networks (the check of
:mod:`propcalc.variants.spectrum`'s free-probability moments).

Gaussian or Haar orthogonal weights (Stewart 1980; Mezzadri 2007), the network at its variance
fixed point, the moments ``tr(J J^T) / N`` and ``tr((J J^T)^2) / N`` per repetition beside the
free-probability prediction from each network's own layer moments (Pennington, Schoenholz &
Ganguli 2017).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..activations.base import Activation
from ..activations.resolver import resolve
from ..errors import (
    ComputationError,
    InvalidParameterError,
    check_int,
    check_nonnegative,
    check_positive,
)
from ..meanfield.edge import edge_of_chaos
from ..numerics.quadrature import DEFAULT_RULE, QuadratureRule
from ..results import Result
from .spectrum import _S_W, _weights

__all__ = ["MAX_SAMPLE_WORK", "SampledSpectrum", "sample_jacobian_spectrum"]


@dataclass(frozen=True)
class SampledSpectrum(Result):
    """Moments of the spectrum of J J^T measured on seeded random networks.

    Attributes
    ----------
    activation, weights : str
    width, depth, repetitions, seed : int
    sigma_w2, sigma_b2, q_star : float
    means : tuple of float
        Per repetition, ``m_1 = tr(J J^T) / N``.
    normalized_variances : tuple of float
        Per repetition, ``m_2 / m_1^2 - 1`` with ``m_2 = tr((J J^T)^2) / N``.
    free_prediction : tuple of float
        Per repetition, the free-probability prediction from that network's own
        layer moments: ``sum_l (mu_2^(l) / mu_1^(l)^2 - 1 + s_W)`` with
        ``mu_k^(l)`` the average of ``phi'(h^l)^(2k)`` over the N units
        (removes the sampling noise of the forward pass).
    mean, mean_se : float
        Average of ``means`` and its standard error.
    normalized_variance, normalized_variance_se : float
        Average of ``normalized_variances`` and its standard error.
    """

    activation: str
    weights: str
    width: int
    depth: int
    repetitions: int
    seed: int
    sigma_w2: float
    sigma_b2: float
    q_star: float
    means: tuple[float, ...]
    normalized_variances: tuple[float, ...]
    free_prediction: tuple[float, ...]
    mean: float
    mean_se: float
    normalized_variance: float
    normalized_variance_se: float


def _haar_orthogonal(rng: np.random.Generator, n: int) -> np.ndarray:
    """Haar-distributed orthogonal n x n matrix (Stewart 1980, SIAM J. Numer. Anal. 17).

    The Householder QR of a Gaussian matrix, drawn column by column: by rotation
    invariance the k-th reflector comes from a fresh standard Gaussian vector of
    dimension n - k. Column k is then multiplied by the sign that makes R_kk > 0, which
    is what makes Q Haar (Mezzadri 2007, Notices AMS 54, section 5); the last column
    gets a random sign. Only matrix-vector work, so it stays fast when LAPACK's blocked
    QR competes for threads.
    """
    q = np.eye(n)
    signs = np.empty(n)
    for k in range(n - 1):
        x = rng.standard_normal(n - k)
        s = 1.0 if x[0] >= 0 else -1.0
        x[0] += s * np.linalg.norm(x)
        v = x / np.linalg.norm(x)
        blk = q[:, k:]
        blk -= 2.0 * np.outer(blk @ v, v)
        signs[k] = -s  # R_kk = -s |x|
    signs[n - 1] = 1.0 if rng.random() < 0.5 else -1.0
    return q * signs


#: bound on width^3 * depth * repetitions (floating-point work of the matrix products)
MAX_SAMPLE_WORK = 2e11


def sample_jacobian_spectrum(act: Activation | str, depth: int, width: int = 500,
                             sigma_w2: float | None = None, sigma_b2: float | None = None,
                             q_star: float = 1.0, weights: str = "orthogonal",
                             repetitions: int = 5, seed: int = 0,
                             rule: QuadratureRule = DEFAULT_RULE) -> SampledSpectrum:
    """Measure the moments of the spectrum of J J^T on seeded random networks.

    The input pre-activations are ``h^0 ~ N(0, q* I)``; ``h^l = W_l
    phi(h^{l-1}) + b_l`` with W Gaussian (entries ``N(0, sigma_w2 / N)``) or
    ``sqrt(sigma_w2)`` times a Haar orthogonal matrix; ``J = W_L D_{L-1} ...
    W_1 D_0``. Defaults put (sigma_w2, sigma_b2) on the edge of chaos through q*.

    Parameters
    ----------
    act : str or Activation
        A built-in name, a formula in x, or an Activation (resolved once here).
    depth, width, repetitions : int
    sigma_w2, sigma_b2 : float, optional
    q_star : float
    weights : str
        "gaussian" or "orthogonal".
    seed : int
        Seed of :func:`numpy.random.default_rng`.

    Returns
    -------
    SampledSpectrum
    """
    act = resolve(act)
    n_layers = check_int("depth", depth, 1)
    n = check_int("width", width, 2)
    reps = check_int("repetitions", repetitions, 2)
    sd = check_int("seed", seed, 0)
    kind = _weights(weights)
    q = check_positive("q_star", q_star)
    if float(n) ** 3 * n_layers * reps > MAX_SAMPLE_WORK:
        raise InvalidParameterError("width", f"such that width^3 * depth * repetitions <= "
                                    f"{MAX_SAMPLE_WORK:.0e}", n)
    if sigma_w2 is None or sigma_b2 is None:
        cp = edge_of_chaos(act, q, rule)
        if not cp.valid or cp.sigma_w2 is None or cp.sigma_b2 is None:
            raise ComputationError(f"q* = {q:g} is not on the edge of chaos: {cp.message}")
        sw = cp.sigma_w2 if sigma_w2 is None else check_positive("sigma_w2", sigma_w2)
        sb = cp.sigma_b2 if sigma_b2 is None else check_nonnegative("sigma_b2", sigma_b2)
    else:
        sw = check_positive("sigma_w2", sigma_w2)
        sb = check_nonnegative("sigma_b2", sigma_b2)
    rng = np.random.default_rng(sd)
    means, nvars, preds = [], [], []
    s_w = _S_W[kind]
    for _ in range(reps):
        h = math.sqrt(q) * rng.standard_normal(n)
        jac = np.eye(n)
        pred = 0.0
        for _layer in range(n_layers):
            d = act.derivative(h)
            d2 = d * d
            mu1, mu2 = float(np.mean(d2)), float(np.mean(d2 * d2))
            if mu1 == 0.0:
                raise ComputationError("every unit of a sampled layer has phi' = 0: the "
                                       "Jacobian vanishes")
            pred += mu2 / (mu1 * mu1) - 1.0 + s_w
            if kind == "gaussian":
                w = rng.standard_normal((n, n)) * math.sqrt(sw / n)
            else:
                w = _haar_orthogonal(rng, n) * math.sqrt(sw)
            jac = w @ (d[:, None] * jac)
            h = w @ act.value(h) + math.sqrt(sb) * rng.standard_normal(n)
        jjt = jac @ jac.T
        m1 = float(np.trace(jjt)) / n
        m2 = float(np.sum(jjt * jjt)) / n
        if not (m1 > 0.0 and math.isfinite(m1) and math.isfinite(m2)):
            raise ComputationError(f"the sampled Jacobian has tr(J J^T) / N = {m1:.6g}: it "
                                   "vanished or overflowed; use fewer layers or a point closer "
                                   "to the edge of chaos")
        means.append(m1)
        nvars.append(m2 / (m1 * m1) - 1.0)
        preds.append(pred)
    mean_arr, nv = np.array(means), np.array(nvars)
    return SampledSpectrum(act.label, kind, n, n_layers, reps, sd, float(sw), float(sb), q,
                           tuple(means), tuple(nvars), tuple(preds), float(mean_arr.mean()),
                           float(mean_arr.std(ddof=1) / math.sqrt(reps)), float(nv.mean()),
                           float(nv.std(ddof=1) / math.sqrt(reps)))
