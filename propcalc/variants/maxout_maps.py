"""Mean-field maps of maxout networks of rank k (Goodfellow et al. 2013).

A maxout unit of rank k takes the largest of k affine pieces, each with its
own weights and bias:

    y_i = max_j u_ij,   u_ij = w_ij . x + b_ij,   j = 1..k,

with ``w_ij ~ N(0, sigma_w2 / fan_in I)`` and ``b_ij ~ N(0, sigma_b2)``, all
independent. A maxout layer therefore has k times the parameters of a plain
dense layer of the same shape.

The maps (infinite width)
-------------------------
Given the previous layer, the pieces u_i1..u_ik are iid ``N(0, q)`` with
``q = sigma_w2 E[y^2] + sigma_b2``. Let ``X_k`` be the largest of k iid
standard normals, ``M1(k) = E[X_k]`` and ``M2(k) = E[X_k^2]``; its density is
``k phi(z) Phi(z)^(k-1)`` (the largest order statistic), so

    M2(k) = int k z^2 phi(z) Phi(z)^(k-1) dz,

computed by Gaussian quadrature. Because max is positively homogeneous,
``E[y^2] = q M2(k)`` and the variance map is *linear*:

    V(q) = sigma_w2 M2(k) q + sigma_b2.

Two inputs a, b: each piece pair ``(u_j^a, u_j^b)`` is bivariate normal with
variances q and correlation c, independently over j. With
``X = max_j z_j^a`` and ``Y = max_j z_j^b`` for standard pairs,
``E[y^a y^b] = q K_k(c)`` and

    C(c) = (sigma_w2 q K_k(c) + sigma_b2) / V(q).

``K_k`` comes from Hoeffding's covariance identity (Hoeffding 1940; Lehmann
1966, lemma 2), ``Cov(X, Y) = int int [H(x, y) - F(x) G(y)] dx dy``, with the
joint CDF of the two maxima ``H(x, y) = P(all z_j^a <= x, all z_j^b <= y) =
Phi_2(x, y; c)^k`` and marginals ``Phi(x)^k``:

    K_k(c) = M1(k)^2 + int int [Phi_2(x, y; c)^k - Phi(x)^k Phi(y)^k] dx dy.   (1)

``Phi_2`` is evaluated in closed form through Owen's T function (Owen 1956,
eq. 2.1; :func:`scipy.special.owens_t`). The 2-D integral (1) is done in the
rotated coordinates ``p = (x + y)/sqrt(2)``, ``m = (x - y)/sqrt(2)`` with
composite Gauss-Legendre panels: as c -> 1, ``Phi_2 -> Phi(min(x, y))`` has a
kink on the diagonal m = 0 smoothed over a width ``sqrt(1 - c)``; as
c -> -1, on the anti-diagonal p = 0. The panels are graded towards that line
down to an eighth of that width, so the rule stays at rounding level up to
``|c| = 1 - 1e-11`` (checked against the k = 2 closed form below to 1e-13).

Slope. Price's theorem applied piece by piece (each of the k pairs has
correlation c) gives ``d/dc E[f(u^a) g(u^b)] = q sum_j E[d_j f d_j g]``; for
f = g = max, ``d_j max = 1{j is the arg-max}``, so

    K_k'(c) = P(the same piece wins for a and for b)
            = k int int Phi_2(x, y; c)^(k-1) phi_2(x, y; c) dx dy,           (2)

(equivalently, differentiate (1) with Plackett's identity
``d Phi_2 / dc = phi_2``). ``C'(c) = sigma_w2 q K_k'(c) / V(q)``; K'(1) = 1.

Gradient. The Jacobian of a maxout layer routes each unit's gradient through
its arg-max piece: ``d y_i / d x = w_{i, j*(i)}``. Its mean squared singular
value is ``(1/N) sum_i |w_{i j*}|^2 = sigma_w2 E[sum_j (d_j max)^2] =
sigma_w2 E[1] = sigma_w2`` (the arg-max selection biases only the one
direction of x, negligible at large width), hence

    chi_1 = sigma_w2,

the same as C'(1) at a variance fixed point.

Consequences. The edge of chaos needs chi_1 = sigma_w2 = 1, where
``V(q) = M2(k) q + sigma_b2``: for k = 2 (M2 = 1) that is neutral at
sigma_b2 = 0 (maxout of rank 2 contains ReLU); for k >= 3 (M2 > 1) the
variance grows without bound, so there is no edge of chaos with a finite
variance. The forward-variance-preserving choice with sigma_b2 = 0 is
``sigma_w2 = c_k = 1 / M2(k)`` (recommended by Tseran & Montufar 2023); it
puts the network in the ordered phase, ``c* = 1`` with
``C'(1) = 1 / M2(k)``: correlations converge to 1 geometrically and the
squared gradient norm towards a random direction shrinks by c_k per layer.

k = 2 closed form (a check): ``max(a1, a2) = (a1 + a2)/2 + |a1 - a2|/2`` and
the sums and differences of the pieces are independent, so
``K_2(c) = (c + (2/pi)(sqrt(1 - c^2) + c arcsin c)) / 2`` (with
``E|z1||z2| = (2/pi)(sqrt(1-c^2) + c arcsin c)`` for a standard pair).
"""

from __future__ import annotations

import dataclasses

import math
from dataclasses import dataclass
from functools import lru_cache
from typing import Any

import numpy as np
from scipy import special

from ..errors import InvalidParameterError, check_int, check_nonnegative, check_positive
from ..numerics.quadrature import DEFAULT_RULE, QuadratureRule, gaussian_expectation, legendre_rule
from ..results import Result

__all__ = [
    "MAX_RANK",
    "MaxMoments",
    "bivariate_normal_cdf",
    "max_moments",
    "maxout_correlation_map",
    "maxout_correlation_map_slope",
    "maxout_pair_moments",
    "maxout_variance_map",
]

#: largest rank accepted (the quadrature is accurate far beyond; this bounds work per call)
MAX_RANK = 1024
_Z_MAX = 10.0
_SQRT2 = math.sqrt(2.0)


def _rank(k: Any) -> int:
    return check_int("k", k, 1, MAX_RANK)


# -------------------------------------------------------------------------------------------
# moments of the largest of k standard normals
# -------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class MaxMoments(Result):
    """Moments of the largest of k iid standard normals.

    Attributes
    ----------
    k : int
        Rank (number of pieces).
    mean : float
        M1(k) = E[X_k] = int k z phi(z) Phi(z)^(k-1) dz.
    second_moment : float
        M2(k) = E[X_k^2] = int k z^2 phi(z) Phi(z)^(k-1) dz.
    recommended_sigma_w2 : float
        c_k = 1 / M2(k): keeps the forward second moment with sigma_b2 = 0
        (Tseran & Montufar 2023).
    """

    k: int
    mean: float
    second_moment: float
    recommended_sigma_w2: float


@lru_cache(maxsize=256)
def _max_moments(k: int, rule: QuadratureRule) -> tuple[float, float]:
    # density of the largest order statistic: k phi(z) Phi(z)^(k-1)
    # (David & Nagaraja 2003, eq. 2.1.1)
    m1 = float(gaussian_expectation(lambda z: k * z * special.ndtr(z) ** (k - 1), 1.0, rule=rule,
                                    what="k z Phi(z)^(k-1)"))
    m2 = float(gaussian_expectation(lambda z: k * z * z * special.ndtr(z) ** (k - 1), 1.0,
                                    rule=rule, what="k z^2 Phi(z)^(k-1)"))
    return m1, m2


def max_moments(k: int, rule: QuadratureRule = DEFAULT_RULE) -> MaxMoments:
    """E[X_k] and E[X_k^2] for the largest of k iid N(0, 1), and c_k = 1 / E[X_k^2].

    Parameters
    ----------
    k : int
        1 <= k <= 1024.

    Returns
    -------
    MaxMoments

    Examples
    --------
    >>> round(max_moments(3).recommended_sigma_w2, 4)
    0.7839
    """
    kk = _rank(k)
    # Phi(z)^(k-1) steps up near sqrt(2 ln k) over a width ~ 1/sqrt(2 ln k): panels of width 1
    # keep 1e-14 up to k = 1024 (width 4 loses 5e-5 there; measured against mpmath)
    m1, m2 = _max_moments(kk, dataclasses.replace(rule, panel_width=min(rule.panel_width, 1.0)))
    return MaxMoments(kk, m1, m2, 1.0 / m2)


# -------------------------------------------------------------------------------------------
# the bivariate normal CDF and the pair moments
# -------------------------------------------------------------------------------------------
def bivariate_normal_cdf(x: Any, y: Any, c: float) -> np.ndarray:
    """Phi_2(x, y; c) = P(Z1 <= x, Z2 <= y) for a standard pair with correlation c.

    Owen 1956 (Ann. Math. Statist. 27, eq. 2.1):
    ``Phi_2(h, k; c) = (Phi(h) + Phi(k))/2 - T(h, a_h) - T(k, a_k) - beta`` with
    ``a_h = (k - c h) / (h sqrt(1 - c^2))``, ``a_k = (h - c k) / (k sqrt(1 - c^2))``,
    ``beta = 1/2`` if ``h k < 0`` or (``h k = 0`` and ``h + k < 0``), else 0;
    T is Owen's T function. At h = k = 0: ``1/4 + arcsin(c) / (2 pi)``
    (Sheppard 1899). At c = +-1 the degenerate limits are returned.

    Parameters
    ----------
    x, y : array_like
        Broadcast together.
    c : float
        Correlation in [-1, 1].
    """
    h, k = np.broadcast_arrays(np.asarray(x, dtype=float), np.asarray(y, dtype=float))
    c = float(c)
    if not -1.0 <= c <= 1.0:
        raise InvalidParameterError("c", "in [-1, 1]", c)
    if c == 1.0:
        return special.ndtr(np.minimum(h, k))
    if c == -1.0:
        return np.maximum(0.0, special.ndtr(h) - special.ndtr(-k))
    r = math.sqrt((1.0 - c) * (1.0 + c))
    with np.errstate(divide="ignore", invalid="ignore"):
        a_h = (k - c * h) / (h * r)
        a_k = (h - c * k) / (k * r)
    # h = 0 is the limit h -> 0+ (beta switches accordingly): T(0, +-inf) = +-1/4
    a_h = np.where(h == 0, np.copysign(np.inf, k), a_h)
    a_k = np.where(k == 0, np.copysign(np.inf, h), a_k)
    beta = np.where((h * k < 0) | ((h * k == 0) & (h + k < 0)), 0.5, 0.0)
    out = (0.5 * special.ndtr(h) + 0.5 * special.ndtr(k) - special.owens_t(h, a_h)
           - special.owens_t(k, a_k) - beta)
    out = np.where((h == 0) & (k == 0), 0.25 + math.asin(c) / (2.0 * math.pi), out)
    return np.clip(out, 0.0, 1.0)


def _panels(edges: np.ndarray, n: int) -> tuple[np.ndarray, np.ndarray]:
    """Composite Gauss-Legendre nodes and weights for a plain integral over the edges."""
    t, w = legendre_rule(n)
    a, b = edges[:-1], edges[1:]
    half = 0.5 * (b - a)
    x = (0.5 * (a + b))[:, None] + half[:, None] * t
    return x.ravel(), (half[:, None] * w).ravel()


@lru_cache(maxsize=4096)
def _pair_moments(k: int, c: float, rule: QuadratureRule) -> tuple[float, float]:
    m1, m2 = _max_moments(k, rule)
    if c == 1.0:
        return m2, 1.0
    if c == -1.0 and k == 1:
        return -1.0, 1.0
    n = rule.n_per_panel
    half_range = _Z_MAX * _SQRT2  # the rotated square covers |x|, |y| <= z_max
    uniform = np.linspace(-half_range, half_range,
                          int(round(2 * half_range / rule.panel_width)) + 1)
    # grade towards the line where Phi_2 has its (smoothed) kink: m = 0 for c > 0, p = 0 for c < 0
    width = math.sqrt(max(1.0 - abs(c), 1e-300))
    levels = max(0, math.ceil(math.log2(8.0 / width)))
    graded = [0.0] + [s * 2.0 ** -j for j in range(levels + 1) for s in (-1.0, 1.0)]
    a_nodes, a_w = _panels(np.unique(np.concatenate([uniform, graded])), n)
    b_nodes, b_w = _panels(uniform, n)
    if c >= 0:
        m, p = a_nodes[:, None], b_nodes[None, :]
    else:
        p, m = a_nodes[:, None], b_nodes[None, :]
    weights = a_w[:, None] * b_w[None, :]
    x = (p + m) / _SQRT2
    y = (p - m) / _SQRT2
    f2 = bivariate_normal_cdf(x, y, c)
    # eq. (1): Hoeffding's identity
    hoeffding = f2**k - (special.ndtr(x) * special.ndtr(y)) ** k
    value = m1 * m1 + float(np.sum(weights * hoeffding))
    if c == -1.0:
        return value, 0.0
    # eq. (2): phi_2 in rotated coordinates is exp(-p^2/(2(1+c)) - m^2/(2(1-c))) / (2 pi r)
    r = math.sqrt((1.0 - c) * (1.0 + c))
    dens = np.exp(-p * p / (2.0 * (1.0 + c)) - m * m / (2.0 * (1.0 - c))) / (2.0 * math.pi * r)
    slope = k * float(np.sum(weights * f2 ** (k - 1) * dens))
    return value, slope


def _c_value(c: Any) -> np.ndarray:
    arr = np.asarray(c, dtype=float)
    ok = np.isfinite(arr) & (arr >= -1.0) & (arr <= 1.0)
    if not np.all(ok):
        raise InvalidParameterError("c", "in [-1, 1]", float(arr[~ok].ravel()[0]))
    return arr


def maxout_pair_moments(k: int, c: Any, rule: QuadratureRule = DEFAULT_RULE
                        ) -> tuple[np.ndarray, np.ndarray]:
    """K_k(c) = E[max_j z_j^a max_j z_j^b] and K_k'(c) = P(same arg-max), per piece correlation c.

    See the module docstring, eqs. (1) and (2). Vectorised over c (each value
    has its own graded 2-D rule; results are cached per (k, c)).

    Returns
    -------
    value, slope : ndarray
        The shape of c.
    """
    kk = _rank(k)
    ca = _c_value(c)
    flat = ca.ravel()
    vals = np.empty(flat.shape)
    slopes = np.empty(flat.shape)
    for i, ci in enumerate(flat):
        vals[i], slopes[i] = _pair_moments(kk, float(ci), rule)
    return vals.reshape(ca.shape), slopes.reshape(ca.shape)


# -------------------------------------------------------------------------------------------
# maps
# -------------------------------------------------------------------------------------------
def _q_value(q: Any) -> np.ndarray:
    arr = np.asarray(q, dtype=float)
    if not np.all(np.isfinite(arr)) or np.any(arr < 0):
        bad = arr[~(np.isfinite(arr) & (arr >= 0))].ravel()[0]
        raise InvalidParameterError("q", "finite and >= 0", float(bad))
    return arr


def maxout_variance_map(k: int, q: Any, sigma_w2: float, sigma_b2: float,
                        rule: QuadratureRule = DEFAULT_RULE) -> np.ndarray:
    """V(q) = sigma_w2 M2(k) q + sigma_b2 for a maxout layer of rank k.

    Poole et al. 2016, eq. (3), with ``E[max_j u_j^2] = q M2(k)``
    (homogeneity of max; M2 from :func:`max_moments`).
    """
    sw = check_positive("sigma_w2", sigma_w2)
    sb = check_nonnegative("sigma_b2", sigma_b2)
    m2 = max_moments(k, rule).second_moment
    return sw * m2 * _q_value(q) + sb


def maxout_correlation_map(k: int, c: Any, sigma_w2: float, sigma_b2: float, q: float,
                           rule: QuadratureRule = DEFAULT_RULE) -> np.ndarray:
    """C(c) = (sigma_w2 q K_k(c) + sigma_b2) / V(q) for pieces of variance q (Poole et al. 2016).

    Parameters
    ----------
    k : int
    c : array_like
        Correlation of each piece pair, in [-1, 1].
    sigma_w2, sigma_b2 : float
    q : float
        Variance of the pieces; at the variance fixed point V(q*) = q*.
    """
    sw = check_positive("sigma_w2", sigma_w2)
    sb = check_nonnegative("sigma_b2", sigma_b2)
    qf = float(_q_value(q))
    vq = float(maxout_variance_map(k, qf, sw, sb, rule))
    value, _ = maxout_pair_moments(k, c, rule)
    if vq == 0.0:
        return np.ones_like(value)
    return (sw * qf * value + sb) / vq


def maxout_correlation_map_slope(k: int, c: Any, sigma_w2: float, sigma_b2: float, q: float,
                                 rule: QuadratureRule = DEFAULT_RULE) -> np.ndarray:
    """C'(c) = sigma_w2 q K_k'(c) / V(q), K_k' = P(same winning piece) (module eq. 2)."""
    sw = check_positive("sigma_w2", sigma_w2)
    sb = check_nonnegative("sigma_b2", sigma_b2)
    qf = float(_q_value(q))
    m2 = max_moments(k, rule).second_moment
    vq = sw * m2 * qf + sb
    _, slope = maxout_pair_moments(k, c, rule)
    if vq == 0.0:
        # sigma_b2 = 0 and q -> 0: C(c) = K(c) / M2 does not depend on q
        return slope / m2
    return sw * qf * slope / vq


# -------------------------------------------------------------------------------------------
# the report
# -------------------------------------------------------------------------------------------
