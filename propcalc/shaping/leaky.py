"""The leaky-ReLU form of the tailored activation transformation, in closed form.

Zhang et al. 2022 (section 4.2) shape leaky ReLU with slope a as
``phi_hat(x) = sqrt(2 / (1 + a^2)) leaky_relu_a(x)``. Writing
``leaky_relu_a(x) = a x + (1 - a) relu(x)`` and using the arc-cosine kernel of
order 1 (Cho & Saul 2009, eq. 6 with n = 1),
``E[relu(u1) relu(u2)] = (sqrt(1 - c^2) + (pi - arccos c) c) / (2 pi)`` for unit
variances and correlation c, together with ``E[u1 relu(u2)] = c / 2``, gives

* the variance map ``Q(q) = q`` (positive homogeneity: ``E[phi_hat(sqrt(q) z)^2]
  = q (2 / (1 + a^2)) (1 + a^2) / 2``), and
* the correlation map ``C(c) = c + k (sqrt(1 - c^2) - c arccos c)`` with
  ``k = (1 - a)^2 / (pi (1 + a^2))``, whose slope is ``C'(c) = 1 - k arccos c``,
  so ``C'(1) = 1``.

The whole-network map is the L-fold composition ``C_L``; ``C_L(0)`` increases
with k (C is increasing in c on [0, 1] for k <= 2 / pi and increasing in k), so
the target ``C_L(0) = eta`` is one monotone equation in k, solved by Brent's
method, and the slope follows from the quadratic ``(1 - a)^2 = pi k (1 + a^2)``.
k runs from 0 (a = 1, the identity) to 1 / pi (a = 0, ReLU); negative slopes
continue to 2 / pi (a = -1, the absolute value).

A residual ReLU network with blocks ``x <- x + w W relu(x)`` (fresh Gaussian W of
variance 2 / fan_in, so the branch keeps the variance) has, since the cross
terms of a fresh zero-mean W vanish (Yang & Schoenholz 2017), the per-block
correlation map ``(c + w^2 C_relu(c)) / (1 + w^2)`` with
``C_relu(c) = (sqrt(1 - c^2) + (pi - arccos c) c) / pi``, which is the map above
with ``k = w^2 / (pi (1 + w^2))``. So the same solver gives the branch weight of
the residual network with the same network map (derived here from the two
sources above).
"""

from __future__ import annotations

import math

import numpy as np
from scipy import optimize

from ..errors import InvalidParameterError

__all__ = [
    "K_RELU",
    "K_ABS",
    "leaky_coefficient",
    "slope_from_coefficient",
    "leaky_map",
    "leaky_map_slope",
    "leaky_trajectory",
    "leaky_network_map",
    "network_value",
    "solve_coefficient",
    "UnreachableTargetError",
]

#: k at slope 0 (ReLU): the largest coefficient with a slope in [0, 1).
K_RELU = 1.0 / math.pi
#: k at slope -1 (the absolute value): the largest coefficient of any slope.
K_ABS = 2.0 / math.pi


class UnreachableTargetError(InvalidParameterError):
    """The target cannot be reached by the allowed family at this depth.

    The message says the largest reachable value and what would reach the
    target (a negative slope, a lower target, more layers).
    """


def leaky_coefficient(slope: float) -> float:
    """k = (1 - a)^2 / (pi (1 + a^2)) (Zhang et al. 2022, from Cho & Saul 2009)."""
    return (1.0 - slope) ** 2 / (math.pi * (1.0 + slope * slope))


def slope_from_coefficient(k: float) -> float:
    """The slope a in [-1, 1] with leaky_coefficient(a) = k, for k in [0, 2 / pi].

    ``(1 - pi k) a^2 - 2 a + (1 - pi k) = 0``; with ``p = 1 - pi k`` the root of
    modulus <= 1 is ``a = p / (1 + sqrt(1 - p^2))`` (the cancellation-free form of
    ``(1 - sqrt(1 - p^2)) / p``).
    """
    p = 1.0 - math.pi * k
    p = min(1.0, max(-1.0, p))
    return p / (1.0 + math.sqrt((1.0 - p) * (1.0 + p)))


def leaky_map(c: np.ndarray | float, k: float) -> np.ndarray:
    """C(c) = c + k (sqrt(1 - c^2) - c arccos c), vectorised (see the module doc)."""
    ca = np.clip(np.asarray(c, dtype=float), -1.0, 1.0)
    return ca + k * (np.sqrt((1.0 - ca) * (1.0 + ca)) - ca * np.arccos(ca))


def leaky_map_slope(c: np.ndarray | float, k: float) -> np.ndarray:
    """C'(c) = 1 - k arccos c (the derivative of :func:`leaky_map`)."""
    ca = np.clip(np.asarray(c, dtype=float), -1.0, 1.0)
    return 1.0 - k * np.arccos(ca)


def _step(c: float, k: float) -> float:
    c = min(1.0, max(-1.0, c))
    return c + k * (math.sqrt((1.0 - c) * (1.0 + c)) - c * math.acos(c))


def network_value(k: float, depth: int, c0: float = 0.0) -> float:
    """C_L(c0): the map of :func:`leaky_map` composed ``depth`` times."""
    c = c0
    for _ in range(depth):
        c = _step(c, k)
    return c


def leaky_network_map(c: np.ndarray | float, k: float, depth: int) -> np.ndarray:
    """C_L(c), the map of :func:`leaky_map` composed ``depth`` times, vectorised over c."""
    out = np.clip(np.asarray(c, dtype=float), -1.0, 1.0)
    for _ in range(depth):
        out = leaky_map(out, k)
    return out


def leaky_trajectory(k: float, depth: int, c0: float = 0.0) -> np.ndarray:
    """c_0 = c0, c_l = C(c_{l-1}) for l = 1..depth."""
    out = np.empty(depth + 1)
    out[0] = c = c0
    for layer in range(1, depth + 1):
        c = _step(c, k)
        out[layer] = c
    return out


def solve_coefficient(depth: int, target: float, k_max: float, *, field: str = "target",
                      family: str = "slopes in [0, 1)", hint: str = "") -> float:
    """k in (0, k_max] with C_L(0) = target (Brent's method on a monotone function).

    Raises
    ------
    UnreachableTargetError
        If even ``k_max`` leaves C_L(0) below the target; the message gives the
        largest reachable C_L(0), the depth that would reach the target, and ``hint``.
    """
    top = network_value(k_max, depth)
    if top < target:
        needed = _depth_needed(k_max, target)
        parts = [f"{needed} layers reach it with {family}"] if needed is not None else []
        parts += [hint] if hint else []
        raise UnreachableTargetError(
            field, f"<= {top:.6g} (the largest C_L(0) at depth {depth} with {family})", target,
            "; ".join(parts))
    if top == target:
        return k_max
    return float(optimize.brentq(lambda k: network_value(k, depth) - target, 0.0, k_max,
                                 xtol=1e-300, rtol=1e-15, maxiter=200))


def _depth_needed(k: float, target: float, limit: int = 10**6) -> int | None:
    """The least depth whose C_L(0) reaches ``target`` at coefficient k (None beyond limit)."""
    c, depth = 0.0, 0
    while c < target and depth < limit:
        c = _step(c, k)
        depth += 1
    return depth if c >= target else None
