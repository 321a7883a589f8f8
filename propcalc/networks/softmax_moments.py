"""Moments of the softmax of Gaussian logits: the attention weights at initialisation.

At infinite width the logits of one query over the T keys, ``l_s = tau q . k_s / sqrt(d_head)``,
are Gaussian (a sum of d_head products of independent Gaussian coordinates; the central limit
theorem, as in Hron et al. 2020, "Infinite attention", whose limit is taken with the number of
heads fixed here). A shift common to all keys does not change the softmax, so only the keys'
differences matter: for two rows (two queries, of one input or of two) the logits are, key by key,
independent pairs ``(u_s, w_s)`` of variance ``v`` and correlation ``rho`` (the forward rule in
:mod:`propcalc.networks.mixing` gives v and rho from the stream's moments). With
``A = softmax(u)``, ``B = softmax(w)`` and ``P = sum_s A_s B_s`` this module computes

* ``m1 = E[P]``: ``E[out_t out_t']`` of attention is ``S (k0 + k1 m1)`` (derived in mixing);
* ``m2 = E[P + P^2 - sum_s A_s B_s (A_s + B_s)]``: the query and key weights' part of the
  tangent kernel (derived in :mod:`propcalc.training.network_ntk_rules`).

Neither has a closed form for T > 1 and v > 0. They are estimated by Monte Carlo over the logits
with a fixed seed (common random numbers: the estimate is a deterministic, smooth function of v
and rho) and ``samples(T)`` draws of the T pairs (2^17 / T, between 2^6 and 2^14), in chunks of
2^16 logits per row (bounded memory): about 5-10 ms a call up to T = 2048, then about
0.003 T ms (:attr:`propcalc.networks.blocks.Network.cost` counts it). The standard error of each
estimate is returned beside it: below 1.1% of m1 and m2 at T = 4-16 and logit std up to 2, and
a few percent of them (which are then O(1/T)) at thousands of tokens. At v = 0
(uniform attention) the exact values ``1/T`` and ``(T - 1)/T^2`` are returned. The derivation
of which moments are needed is ours (derived here and in the modules named above).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..caches import BoundedCache
from ..errors import PropcalcError, check_finite, check_int

__all__ = ["SEED", "SoftmaxMoments", "samples", "softmax_pair_moments"]

#: the seed of the logits' standard normals (common random numbers for every call)
SEED = 20261205
_BUDGET = 1 << 17   # logits per row, summed over the samples
_CHUNK = 1 << 16    # logits per row in one chunk (memory bound: a few arrays of this size)
_CACHE = BoundedCache("networks.softmax_moments", 4096)


@dataclass(frozen=True)
class SoftmaxMoments:
    """``m1``, ``m2`` (module docstring), their Monte Carlo standard errors and the sample
    count (0: the exact uniform values)."""

    m1: float
    m2: float
    se1: float
    se2: float
    samples: int


def samples(tokens: int) -> int:
    """Draws of the T logit pairs: ``2^17 / T`` rounded down, between 2^6 and 2^14."""
    return int(min(1 << 14, max(1 << 6, _BUDGET // max(tokens, 1))))


def _softmax(x: np.ndarray) -> np.ndarray:
    e = np.exp(x - x.max(axis=1, keepdims=True))
    return e / e.sum(axis=1, keepdims=True)


def softmax_pair_moments(tokens: int, variance: float, rho: float) -> SoftmaxMoments:
    """``m1`` and ``m2`` of two softmax rows over ``tokens`` keys whose logits are, key by key,
    independent Gaussian pairs of ``variance`` and correlation ``rho`` (clipped to [-1, 1]).

    Parameters
    ----------
    tokens : int
        T >= 1.
    variance : float
        Per-key variance of the logits around their common shift (>= 0).
    rho : float
        Correlation of the two rows' logits at one key.

    Returns
    -------
    SoftmaxMoments

    Raises
    ------
    InvalidParameterError
        For ``tokens`` below 1 or a variance or rho that is not a finite number.
    """
    t = check_int("tokens", tokens, 1)
    v = max(check_finite("variance", variance), 0.0)
    r = min(max(check_finite("rho", rho), -1.0), 1.0)
    if t <= 1 or v == 0.0:
        return SoftmaxMoments(1.0 / t, (t - 1.0) / (t * t), 0.0, 0.0, 0)
    key = (t, v, r)
    hit = _CACHE.get(key)
    if hit is not None:
        return hit
    n = samples(t)
    rng = np.random.default_rng(SEED)
    sd, other = math.sqrt(v), math.sqrt(max(1.0 - r * r, 0.0))
    sums = np.zeros(4)
    per = max(1, _CHUNK // t)
    done = 0
    while done < n:
        m = min(per, n - done)
        z1 = rng.standard_normal((m, t))
        z2 = rng.standard_normal((m, t))
        a = _softmax(sd * z1)
        b = a if r == 1.0 else _softmax(sd * (r * z1 + other * z2))
        ab = a * b
        p = ab.sum(axis=1)
        x2 = p + p * p - (ab * (a + b)).sum(axis=1)
        sums += (p.sum(), (p * p).sum(), x2.sum(), (x2 * x2).sum())
        done += m
    m1, m2 = sums[0] / n, sums[2] / n
    se1 = math.sqrt(max(sums[1] / n - m1 * m1, 0.0) / n)
    se2 = math.sqrt(max(sums[3] / n - m2 * m2, 0.0) / n)
    out = SoftmaxMoments(float(m1), float(m2), se1, se2, n)
    if not all(math.isfinite(x) for x in (out.m1, out.m2, se1, se2)):
        raise PropcalcError(f"softmax moments at T = {t}, variance {v:g}, rho {r:g} are not "
                            "finite (internal)")
    return _CACHE.put(key, out)
