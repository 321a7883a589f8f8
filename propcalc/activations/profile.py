"""The property profile of an activation: range, monotonicity, parity, smoothness, dead units.

The profile is what a user checks before choosing an activation. It is measured, not declared:
value and derivative are probed on a grid (dense on [-12, 12], geometric out to ``|x| = 1e4``,
and on both sides of every breakpoint), so a typed formula gets the same profile as a built-in.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np
from scipy import special

from ..results import Result

if TYPE_CHECKING:  # pragma: no cover
    from .base import Activation

__all__ = ["ActivationProperties", "profile"]

Array = np.ndarray

#: reach of the tail probes (the Gaussian integrals reach about this |x|)
_TAIL = 1e4


@dataclass(frozen=True)
class ActivationProperties(Result):
    """The profile a user checks before choosing an activation.

    Attributes
    ----------
    output_range : tuple of float
        (inf, sup) of phi over the real line; +-inf when unbounded.
    monotonic : bool
        True if phi is non-decreasing or non-increasing everywhere.
    value_at_zero : float
        phi(0).
    parity : str
        "odd", "even" or "neither".
    smoothness : str
        "smooth" (no breakpoints), "C1" (piecewise smooth with a continuous
        derivative), "C0" (kinks) or "discontinuous" (jumps).
    dead_unit_probability : float
        P(phi'(z) = 0) for z ~ N(0, 1): the chance that a unit at unit
        pre-activation variance passes no gradient.
    vanishing_gradient_tails : tuple of str
        The sides ("left", "right") where phi'(x) -> 0 as |x| -> infinity.
    """

    output_range: tuple[float, float]
    monotonic: bool
    value_at_zero: float
    parity: str
    smoothness: str
    dead_unit_probability: float
    vanishing_gradient_tails: tuple[str, ...]


def _probe_grid(breakpoints: tuple[float, ...]) -> Array:
    core = np.linspace(-12.0, 12.0, 4801)
    tails = np.geomspace(12.0, _TAIL, 200)
    extra = [b + s for b in breakpoints for s in (-1e-7, 1e-7, -1e-3, 1e-3)]
    return np.unique(np.concatenate([core, tails, -tails, np.asarray(extra, dtype=float),
                                     np.asarray(breakpoints, dtype=float)]))


def profile(act: Activation) -> ActivationProperties:
    """Measure the profile of ``act`` on a probe grid (see the module docstring).

    Parameters
    ----------
    act : Activation
        The activation to profile.

    Returns
    -------
    ActivationProperties
    """
    x = _probe_grid(act.breakpoints)
    with np.errstate(all="ignore"):
        f = act.value(x)
        d = act.derivative(x)
    finite = np.isfinite(f)
    scale = 1.0 + np.abs(f)

    # range: grid extremes; a tail that keeps growing between 1e3 and 1e4 is unbounded
    lo, hi = float(np.min(f[finite])), float(np.max(f[finite]))
    probe = act.value(np.array([-1e3, -_TAIL, 1e3, _TAIL]))
    for side_small, side_big in ((probe[0], probe[1]), (probe[2], probe[3])):
        # still growing (at least like |x|^0.7) between 1e3 and 1e4: unbounded on that side
        if abs(side_big) > 1e-300 and abs(side_big) > 5.0 * abs(side_small):
            if side_big > 0:
                hi = math.inf
            else:
                lo = -math.inf
    # refine interior extrema (e.g. the minimum of silu near -1.28) on the dense core
    lo = min(lo, _refine_extreme(act, x, f, np.argmin))
    hi = max(hi, _refine_extreme(act, x, f, np.argmax))

    # monotonicity: derivative one-signed and jumps one-signed
    tol = 1e-12
    jumps = np.asarray(act.jumps, dtype=float)
    nondecr = bool(np.all(d >= -tol) and np.all(jumps >= 0))
    nonincr = bool(np.all(d <= tol) and np.all(jumps <= 0))
    monotonic = nondecr or nonincr

    # parity, away from the breakpoints themselves (one-sided values there are arbitrary)
    away = np.ones_like(x, dtype=bool)
    for b in act.breakpoints:
        away &= np.abs(np.abs(x) - abs(b)) > 1e-9
    fm = act.value(-x)
    ptol = 1e-12 * scale
    if np.all(np.abs(f + fm)[away] <= ptol[away]):
        parity = "odd"
    elif np.all(np.abs(f - fm)[away] <= ptol[away]):
        parity = "even"
    else:
        parity = "neither"

    if not act.breakpoints:
        smooth = "smooth"
    elif any(j != 0.0 for j in act.jumps):
        smooth = "discontinuous"
    elif any(k != 0.0 for k in act.kinks):
        smooth = "C0"
    else:
        smooth = "C1"

    # dead units: Gaussian mass of the intervals on which phi' vanishes identically
    edges = (-math.inf, *act.breakpoints, math.inf)
    dead = 0.0
    for a, b in zip(edges[:-1], edges[1:]):
        lo_s = max(a, -40.0) if math.isfinite(a) else -40.0
        hi_s = min(b, 40.0) if math.isfinite(b) else 40.0
        if hi_s <= lo_s:
            continue
        pts = np.linspace(lo_s, hi_s, 130)[1:-1]
        if np.all(act.derivative(pts) == 0.0):
            dead += float(special.ndtr(b) - special.ndtr(a))

    dt = act.derivative(np.array([-1e3, -_TAIL, 1e3, _TAIL]))
    tails = []
    if abs(dt[0]) < 1e-8 and abs(dt[1]) < 1e-8:
        tails.append("left")
    if abs(dt[2]) < 1e-8 and abs(dt[3]) < 1e-8:
        tails.append("right")

    return ActivationProperties(
        output_range=(lo, hi),
        monotonic=monotonic,
        value_at_zero=float(act.value(np.array([0.0]))[0]),
        parity=parity,
        smoothness=smooth,
        dead_unit_probability=min(1.0, dead),
        vanishing_gradient_tails=tuple(tails),
    )


def _refine_extreme(act: Activation, x: Array, f: Array, pick: Callable[[Array], Any]) -> float:
    """Polish a grid extremum by a bounded scalar search on its neighbours."""
    from scipy.optimize import minimize_scalar

    is_min = pick is np.argmin
    i = int(pick(np.where(np.isfinite(f), f, np.inf if is_min else -np.inf)))
    if i <= 0 or i >= len(x) - 1:
        return float(f[i])
    sign = 1.0 if is_min else -1.0
    res = minimize_scalar(lambda t: sign * float(act.value(np.array([t]))[0]),
                          bounds=(x[i - 1], x[i + 1]), method="bounded",
                          options={"xatol": 1e-12})
    best = sign * float(res.fun)
    return min(best, float(f[i])) if is_min else max(best, float(f[i]))
