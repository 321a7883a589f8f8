"""The Activation type: value, exact derivative, breakpoints and the structure found at them.

An :class:`Activation` bundles a vectorised value ``phi(x)``, its exact
derivative ``phi'(x)`` (never a finite difference) and the points where
either is not smooth (kinks or jumps). The quadrature rules split their
integrals at those breakpoints, so kinks cost no accuracy.

The built-in activations live in :mod:`propcalc.activations.builtins`, typed
formulas in :mod:`propcalc.activations.formula`, and
:func:`propcalc.activations.resolve` turns a name, a formula text or an
Activation into an Activation.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from functools import cached_property
from typing import Any

import numpy as np

from ..errors import InvalidParameterError
from ..numerics.smoothing import Smoothing
from ..results import OMIT, Result
from .profile import ActivationProperties, profile

__all__ = ["Activation", "ActivationProperties"]

Array = np.ndarray
ArrayFn = Callable[[Array], Array]


@dataclass(frozen=True, eq=False)
class Activation(Result):
    """A scalar activation function phi with its exact derivative.

    Parameters
    ----------
    name : str
        Short name ("tanh", "leaky_relu", or the formula text).
    value_fn, derivative_fn : callable
        Vectorised phi and phi' on float arrays. At a breakpoint either
        one-sided value is acceptable (the set has measure zero).
    breakpoints : tuple of float
        Sorted points where phi or phi' is not smooth.
    params : mapping
        The named parameters the function was built with.
    formula, derivative_formula : str, optional
        Text of phi and phi' when known (shown to users of typed formulas).
    declared_scale : float, optional
        The x-scale of phi's structure (see :attr:`scale`); estimated when absent.
    smoothing : Smoothing, optional
        Closed forms of E[phi(m + sqrt(v) z)] and E[phi'(m + sqrt(v) z)]
        (see :mod:`propcalc.smoothing`); when present the correlation map is a
        1-D integral instead of a 2-D one.

    Notes
    -----
    Activations compare by identity; build them once and reuse them, so the
    caches of the maps can key on them.
    """

    name: str
    value_fn: ArrayFn = field(repr=False, metadata=OMIT)
    derivative_fn: ArrayFn = field(repr=False, metadata=OMIT)
    breakpoints: tuple[float, ...] = ()
    params: Mapping[str, float] = field(default_factory=dict)
    formula: str | None = None
    derivative_formula: str | None = None
    description: str = ""
    declared_scale: float | None = field(default=None, metadata=OMIT)
    smoothing: Smoothing | None = field(default=None, repr=False, metadata=OMIT)

    #: the dict form (``--json``, the service) also shows the label and the property profile
    dict_properties = ("label", "properties")

    def __post_init__(self) -> None:
        bps = tuple(sorted({float(b) for b in self.breakpoints}))
        if any(not math.isfinite(b) for b in bps):
            raise InvalidParameterError("breakpoints", "finite numbers", self.breakpoints)
        object.__setattr__(self, "breakpoints", bps)
        object.__setattr__(self, "params", {k: float(v) for k, v in sorted(self.params.items())})

    # -- evaluation -----------------------------------------------------------------
    def __call__(self, x: Any) -> Array:
        return self.value(x)

    def value(self, x: Any) -> Array:
        """phi(x), elementwise, as a float array."""
        return np.asarray(self.value_fn(np.asarray(x, dtype=float)), dtype=float)

    def derivative(self, x: Any) -> Array:
        """phi'(x), elementwise, exact (away from breakpoints)."""
        return np.asarray(self.derivative_fn(np.asarray(x, dtype=float)), dtype=float)

    @property
    def label(self) -> str:
        """Name with its parameters, e.g. ``leaky_relu(slope=0.1)``."""
        if not self.params:
            return self.name
        if self.formula is not None:
            return f"{self.name} with " + ", ".join(
                f"{k}={v:g}" for k, v in sorted(self.params.items()))
        inner = ", ".join(f"{k}={v:g}" for k, v in sorted(self.params.items()))
        return f"{self.name}({inner})"

    # -- structure at breakpoints ---------------------------------------------------
    def _one_sided(self, fn: Callable[[Any], Array], b: float) -> tuple[float, float]:
        h = 1e-9 * max(1.0, abs(b))
        left = float(fn(np.array([b - h]))[0])
        right = float(fn(np.array([b + h]))[0])
        return left, right

    @cached_property
    def jumps(self) -> tuple[float, ...]:
        """phi(b+) - phi(b-) at each breakpoint (zero where phi is continuous).

        A jump J at b puts a Dirac mass J * delta(x - b) into phi'; the maps
        use it (chi_1 becomes infinite, the correlation slope gets the
        bivariate density at the jump).
        """
        out = []
        for b in self.breakpoints:
            left, right = self._one_sided(self.value, b)
            d_left, d_right = self._one_sided(self.derivative, b)
            jump = right - left
            # subtract the part explained by a finite slope across the 2h window
            h = 1e-9 * max(1.0, abs(b))
            slope_part = h * (abs(d_left) + abs(d_right)) + 1e-12 * (abs(left) + abs(right))
            # the one-sided limits to first order: phi(b +- h) = phi(b+-) +- h phi'(b +- h)
            # + O(h^2) (the plain difference was off by h (phi'(b-) + phi'(b+)), 2e-9 relative
            # for where(x > 0.7, x, 0.2 x))
            exact = (right - h * d_right) - (left + h * d_left)
            out.append(exact if abs(jump) > 10 * slope_part + 1e-12 else 0.0)
        return tuple(out)

    @cached_property
    def kinks(self) -> tuple[float, ...]:
        """phi'(b+) - phi'(b-) at each breakpoint (zero where phi' is continuous)."""
        out = []
        for b in self.breakpoints:
            left, right = self._one_sided(self.derivative, b)
            tol = 1e-6 * (1.0 + abs(left) + abs(right))
            out.append(right - left if abs(right - left) > tol else 0.0)
        return tuple(out)

    @cached_property
    def scale(self) -> float:
        """The x-scale on which phi' changes: max|phi'| / max|phi''|, capped to [1e-3, 1].

        1 for the built-ins (their structure sits at |x| ~ 1). For a typed
        formula it is estimated from phi' on a grid of step 1e-3 over [-20, 20]
        (away from breakpoints), so that steep formulas such as tanh(10 x) get a
        quadrature graded finely enough.
        """
        if self.declared_scale is not None:
            return float(self.declared_scale)
        return self._estimated_structure[0]

    @cached_property
    def reach(self) -> float:
        """How far from x = 0 phi has structure of width :attr:`scale`: 0, a distance, or inf.

        The quadrature grades its panels towards x = 0, which resolves structure there (every
        built-in: 0, and any formula whose inflections lie within 4 scales of 0). A typed
        formula with an inflection (a sign change of phi'' where |phi''| exceeds 1e-6 of its
        maximum, on a grid of step 1e-3 over [-20, 20]) farther out gets panels of width
        ~ scale up to that inflection plus 4 scales; inf when inflections continue past
        |x| = 16 (an oscillating formula: sin, cos), panels everywhere.
        """
        if self.declared_scale is not None:
            return 0.0
        return self._estimated_structure[1]

    @cached_property
    def _estimated_structure(self) -> tuple[float, float]:
        """(scale, reach) estimated from one evaluation of phi' on the grid of step 1e-3."""
        x = np.linspace(-20.0, 20.0, 40001)
        with np.errstate(all="ignore"):
            d = self.derivative(x)
            dd = np.diff(d)
            dd /= x[1] - x[0]  # (in place: the same quotients, one array fewer)
            size = np.abs(dd)  # (shared by both estimates; None: every quotient is finite)
            finite = None if np.isfinite(size.sum()) else np.isfinite(dd)
        scale = _grid_scale(x, d, size, finite, self.breakpoints)
        return scale, _grid_reach(x, dd, size, finite, self.breakpoints, scale)

    @cached_property
    def exact_parity(self) -> str | None:
        """"odd" or "even" when phi(-x) is -phi(x) or phi(x) bit for bit, else None.

        Checked on 4002 points from 1e-8 to 1e4 in magnitude (and at 0 for "odd"),
        off the breakpoints, which must themselves be symmetric. Stricter than
        ``properties.parity`` (a tolerance of 1e-12): the maps use it to compute
        E[phi(u1) phi(u2)] at -c from c (Mehler: odd phi has odd coefficients only).
        """
        bps = np.asarray(self.breakpoints, dtype=float)
        if not np.array_equal(np.sort(-bps), bps):
            return None
        x = np.concatenate([np.geomspace(1e-8, 1e4, 2001), np.linspace(0.0, 12.0, 2001)[1:]])
        x = x[np.all(np.abs(x[:, None] - np.abs(bps)[None, :]) > 1e-9 * np.maximum(1.0, x[:, None]),
                     axis=1)] if bps.size else x
        with np.errstate(all="ignore"):
            f, fm = self.value(x), self.value(-x)
            f0 = self.value(np.zeros(1))[0]
        if not np.all(np.isfinite(f)) or not np.all(np.isfinite(fm)):
            return None
        if np.array_equal(fm, -f) and (f0 == 0.0 or 0.0 in self.breakpoints):
            return "odd"
        if np.array_equal(fm, f):
            return "even"
        return None

    @property
    def has_jumps(self) -> bool:
        """True if phi itself is discontinuous somewhere."""
        return any(j != 0.0 for j in self.jumps)

    # -- the profile ------------------------------------------------------------------
    @cached_property
    def properties(self) -> ActivationProperties:
        """Range, monotonicity, parity, smoothness, dead units, saturating tails."""
        return profile(self)


def _grid_scale(x: Array, d: Array, size: Array, finite: Array | None,
                breakpoints: tuple[float, ...]) -> float:
    """max|phi'| / max|phi''| from phi' on the grid x (``size``: the absolute difference
    quotients, ``finite`` where they are finite; off the breakpoints), capped to [1e-3, 1]."""
    usable = finite
    for b in breakpoints:
        off = ~((x[:-1] <= b + 1e-9) & (x[1:] >= b - 1e-9))
        usable = off if usable is None else usable & off
    # (|diff| / h is |diff / h| exactly: the division rounds symmetrically; the maxima over
    # the usable entries, with 0 when there are none, and all of them usable when None)
    curv = float(np.max(size) if usable is None else np.max(size, where=usable, initial=0.0))
    with np.errstate(over="ignore", invalid="ignore"):
        every = bool(np.isfinite(d.sum()))
    # max|phi'| as the larger of max phi' and -min phi' when every value is finite
    top = (max(float(d.max()), -float(d.min())) if every
           else float(np.max(np.abs(d), where=np.isfinite(d), initial=0.0)))
    if curv <= 0.0 or top <= 0.0:
        return 1.0
    return float(min(1.0, max(1e-3, top / curv)))


def _grid_reach(x: Array, dd: Array, size: Array, finite: Array | None,
                breakpoints: tuple[float, ...], scale: float) -> float:
    """The farthest inflection of phi from 0 (0 within 4 scales, inf past 16), from the
    difference quotients ``dd`` of phi' on x (at the midpoints; ``size`` = |dd|)."""
    ok = finite
    for b in breakpoints:
        away = np.abs(0.5 * (x[:-1] + x[1:]) - b) > 2e-3
        ok = away if ok is None else ok & away
    if ok is None:
        big = size > 1e-6 * float(np.max(size))
    else:
        if not ok.any():
            return 0.0
        big = ok & (size > 1e-6 * float(np.max(size, where=ok, initial=0.0)))
    # the signs of phi'' where it is big (none is 0 there: each exceeds a threshold >= 0)
    rising = (dd > 0)[big]
    flips = np.flatnonzero(rising[1:] != rising[:-1])
    if not flips.size:
        return 0.0
    at = np.flatnonzero(big)
    ends = np.concatenate([at[flips], at[flips + 1]])
    far = float(np.max(np.abs(0.5 * (x[ends] + x[ends + 1]))))
    if far <= 4.0 * scale:
        return 0.0
    return math.inf if far > 16.0 else far + 4.0 * scale


# names that lived here before the activation layer was split by stage (builtins.py now);
# resolved lazily so that callers of the old layout keep working
_MOVED = ("builtin_activation", "builtin_names", "builtin_parameters", "BUILTIN_DESCRIPTIONS",
          "SELU_ALPHA", "SELU_SCALE")


def __getattr__(name: str) -> Any:
    if name in _MOVED:
        from . import builtins

        return getattr(builtins, name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
