"""The whole-network correlation map: the per-layer map composed over the depth.

At a variance fixed point q* (``V(q*) = q*``) every layer applies the same
correlation map C (Poole et al. 2016, eq. 5), so two inputs that start at
correlation c_0 leave a network of depth L at ``C_L(c_0) = C(C(...C(c_0)))``,
and its slope at c = 1 is ``C_L'(1) = C'(1)^L = chi_1^L`` (c = 1 is fixed;
Schoenholz et al. 2017, eq. 8).

The composition uses the same Hermite (Mehler) series as
:func:`propcalc.correlation_map` does for a single call,
``C(c) = (sigma_w2 sum_k b_k c^k + sigma_b2) / V(q*)`` with the coefficients
of :func:`propcalc.numerics.hermite.coefficients_at` (computed once per
activation and q*), wherever its rigorous tail bound
``|c|^(K+1) (E[phi^2] - sum_(k<=K) b_k)`` is below 1e-14 E[phi^2] (the bound the
maps use); elsewhere (c close to 1, slowly decaying series of kinked
activations) each point is one call of :func:`propcalc.correlation_map`. So
the composed map is propcalc's own map, at its accuracy, for any depth.
"""

from __future__ import annotations

import math

import numpy as np

from ..activations.base import Activation
from ..meanfield.maps import chi_1, correlation_map, variance_map
from ..numerics.hermite import SERIES_PASSES, coefficients_at, series_sum

__all__ = ["compose_correlation_map", "network_slope_at_one"]

Array = np.ndarray


class _Passes:
    """The Hermite passes at q, each computed the first time a point needs it."""

    def __init__(self, act: Activation, q: float) -> None:
        self.act, self.q = act, q
        self.done: list[tuple[int, Array, float, float]] = []
        self.failed = False

    def __iter__(self):  # type: ignore[no-untyped-def]
        yield from self.done
        while not self.failed and len(self.done) < len(SERIES_PASSES):
            kmax, rule = SERIES_PASSES[len(self.done)]
            b, m2 = coefficients_at(self.act.value, self.act.breakpoints, self.q, kmax, rule)
            rest = m2 - float(b.sum())
            if not (math.isfinite(rest) and m2 > 0 and rest >= -1e-12 * m2):
                self.failed = True  # Parseval's check failed: no series for this activation
                return
            self.done.append((kmax, b, m2, max(rest, 0.0) + 1e-13 * m2))
            yield self.done[-1]


def compose_correlation_map(act: Activation, c0: Array | float, depth: int, sigma_w2: float,
                            sigma_b2: float, q: float, *, trajectory: bool = False) -> Array:
    """C_L(c0) at the fixed point q (or every c_l, l = 0..L, with ``trajectory=True``).

    Parameters
    ----------
    act : Activation
    c0 : array_like
        Input correlations in [-1, 1].
    depth : int
        L >= 0.
    sigma_w2, sigma_b2 : float
    q : float
        The variance fixed point (``V(q) = q``) the network sits at.
    trajectory : bool
        Return shape ``(depth + 1,) + shape(c0)`` with every layer.

    Returns
    -------
    ndarray
    """
    c = np.array(c0, dtype=float, copy=True)
    shape = c.shape
    c = c.ravel()
    passes = _Passes(act, q)
    v_q = float(variance_map(act, q, sigma_w2, sigma_b2))
    out = [c.reshape(shape).copy()] if trajectory else None
    for _ in range(depth):
        new = np.empty_like(c)
        todo = np.ones(c.shape, dtype=bool)
        for kmax, b, pm2, defect in passes:
            with np.errstate(under="ignore"):
                good = todo & (np.abs(c) ** (kmax + 1) * defect <= 1e-14 * pm2)
            if np.any(good):
                new[good] = (sigma_w2 * series_sum(b, c[good]) + sigma_b2) / v_q
                todo &= ~good
            if not np.any(todo):
                break
        if np.any(todo):
            new[todo] = correlation_map(act, c[todo], sigma_w2, sigma_b2, q)
        c = np.clip(new, -1.0, 1.0)
        if out is not None:
            out.append(c.reshape(shape).copy())
    if out is not None:
        return np.stack(out)
    return c.reshape(shape)


def network_slope_at_one(act: Activation, depth: int, sigma_w2: float, q: float) -> float:
    """C_L'(1) = chi_1(q)^L at the fixed point q (inf past the float range)."""
    c1 = float(chi_1(act, q, sigma_w2))
    if c1 == 0.0:
        return 0.0
    log = depth * math.log(c1)
    return math.inf if log > 709.0 else math.exp(log)
