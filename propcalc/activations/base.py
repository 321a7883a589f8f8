"""Activation functions: value, exact derivative, breakpoints and properties.

An :class:`Activation` bundles a vectorised value ``phi(x)``, its exact
derivative ``phi'(x)`` (never a finite difference) and the points where
either is not smooth (kinks or jumps). The quadrature rules split their
integrals at those breakpoints, so kinks cost no accuracy.

Every built-in evaluates without overflow warnings or NaN for ``|x|`` up to
1e4 and beyond.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from functools import cached_property
from typing import Any

import numpy as np
from scipy import special

from ..errors import InvalidParameterError, UnknownActivationError, check_finite
from ..numerics.smoothing import (Piece, Smoothing, Term, erf_smoothing, gelu_smoothing, linear_smoothing,
                        piecewise_smoothing)

__all__ = [
    "Activation",
    "ActivationProperties",
    "builtin_activation",
    "builtin_names",
    "BUILTIN_DESCRIPTIONS",
    "SELU_ALPHA",
    "SELU_SCALE",
]

Array = np.ndarray
ArrayFn = Callable[[Array], Array]

# Klambauer et al. 2017, "Self-normalizing neural networks", eq. (14):
# the constants that make (mean, variance) = (0, 1) a fixed point.
SELU_ALPHA = 1.6732632423543772848170429916717
SELU_SCALE = 1.0507009873554804934193349852946

_SQRT_2_OVER_PI = math.sqrt(2.0 / math.pi)
_INV_SQRT_2PI = 1.0 / math.sqrt(2.0 * math.pi)
_GELU_TANH_C = 0.044715  # Hendrycks & Gimpel 2016, eq. for the tanh approximation


@dataclass(frozen=True)
class ActivationProperties:
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

    def to_dict(self) -> dict[str, Any]:
        """Plain-Python view (floats may be +-inf; see :func:`propcalc.jsonable`)."""
        return {
            "output_range": [float(self.output_range[0]), float(self.output_range[1])],
            "monotonic": self.monotonic,
            "value_at_zero": float(self.value_at_zero),
            "parity": self.parity,
            "smoothness": self.smoothness,
            "dead_unit_probability": float(self.dead_unit_probability),
            "vanishing_gradient_tails": list(self.vanishing_gradient_tails),
        }


@dataclass(frozen=True, eq=False)
class Activation:
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
    value_fn: ArrayFn = field(repr=False)
    derivative_fn: ArrayFn = field(repr=False)
    breakpoints: tuple[float, ...] = ()
    params: Mapping[str, float] = field(default_factory=dict)
    formula: str | None = None
    derivative_formula: str | None = None
    description: str = ""
    declared_scale: float | None = None
    smoothing: Smoothing | None = field(default=None, repr=False)

    def __post_init__(self) -> None:
        bps = tuple(sorted({float(b) for b in self.breakpoints}))
        if any(not math.isfinite(b) for b in bps):
            raise InvalidParameterError("breakpoints", "finite numbers", self.breakpoints)
        object.__setattr__(self, "breakpoints", bps)
        object.__setattr__(self, "params", dict(self.params))

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
            out.append(jump if abs(jump) > 10 * slope_part + 1e-12 else 0.0)
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
        x = np.linspace(-20.0, 20.0, 40001)
        with np.errstate(all="ignore"):
            d = self.derivative(x)
        dd = np.abs(np.diff(d)) / (x[1] - x[0])
        across = np.zeros(dd.shape, dtype=bool)
        for b in self.breakpoints:
            across |= (x[:-1] <= b + 1e-9) & (x[1:] >= b - 1e-9)
        dd = np.where(across | ~np.isfinite(dd), 0.0, dd)
        top, curv = float(np.max(np.abs(d[np.isfinite(d)]), initial=0.0)), float(np.max(dd))
        if curv <= 0.0 or top <= 0.0:
            return 1.0
        return float(min(1.0, max(1e-3, top / curv)))

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
        return _profile(self)

    def to_dict(self) -> dict[str, Any]:
        """Plain-Python description used by ``--json`` and the service."""
        return {
            "name": self.name,
            "label": self.label,
            "params": {k: float(v) for k, v in sorted(self.params.items())},
            "description": self.description,
            "formula": self.formula,
            "derivative_formula": self.derivative_formula,
            "breakpoints": [float(b) for b in self.breakpoints],
            "properties": self.properties.to_dict(),
        }


# ---------------------------------------------------------------------------------------
# numerically stable pieces
# ---------------------------------------------------------------------------------------
def _sech2(x: Array) -> Array:
    """sech(x)^2 = 4 e^{-2|x|} / (1 + e^{-2|x|})^2, no overflow for any x."""
    e = np.exp(-2.0 * np.abs(x))
    return 4.0 * e / (1.0 + e) ** 2


def _square_clipped(x: Array) -> Array:
    """x^2 without overflow (clipped at 1e300, where exp(-x^2) is 0 anyway)."""
    return np.square(np.minimum(np.abs(x), 1e150))


def _sigmoid_prime(x: Array) -> Array:
    """sigmoid'(x) = e^{-|x|} / (1 + e^{-|x|})^2: one exp, no overflow, relative accuracy in the tails."""
    e = np.exp(-np.abs(x))
    return e / ((1.0 + e) * (1.0 + e))


def _softplus(x: Array) -> Array:
    # log(1 + e^x) = max(x, 0) + log1p(e^-|x|): stable, and about 2x faster than logaddexp
    return np.maximum(x, 0.0) + np.log1p(np.exp(-np.abs(x)))


def _elu(alpha: float) -> tuple[ArrayFn, ArrayFn]:
    def value(x: Array) -> Array:
        return np.where(x > 0, x, alpha * np.expm1(np.minimum(x, 0.0)))

    def deriv(x: Array) -> Array:
        return np.where(x > 0, 1.0, alpha * np.exp(np.minimum(x, 0.0)))

    return value, deriv


def _swish(beta: float) -> tuple[ArrayFn, ArrayFn]:
    def value(x: Array) -> Array:
        return x * special.expit(beta * x)

    def deriv(x: Array) -> Array:
        # s + beta x s (1 - s), with s (1 - s) = sigmoid'(beta x) in its one-exp form
        bx = beta * x
        return special.expit(bx) + bx * _sigmoid_prime(bx)

    return value, deriv


def _gelu_tanh_value(x: Array) -> Array:
    # Hendrycks & Gimpel 2016: 0.5 x (1 + tanh(sqrt(2/pi) (x + 0.044715 x^3)))
    # written as x * sigmoid(2 u), which is the same and cannot overflow; the cubic
    # is taken of x clipped to |x| <= 1e50, where sigmoid(2 u) is already 0 or 1.
    xc = np.clip(x, -1e50, 1e50)
    u = _SQRT_2_OVER_PI * (xc + _GELU_TANH_C * (xc * xc * xc))  # not xc**3: pow is 100x slower
    return x * special.expit(2.0 * u)


def _gelu_tanh_deriv(x: Array) -> Array:
    xc = np.clip(x, -1e50, 1e50)
    x2 = xc * xc
    u = _SQRT_2_OVER_PI * (xc + _GELU_TANH_C * (x2 * xc))
    du = _SQRT_2_OVER_PI * (1.0 + 3.0 * _GELU_TANH_C * x2)
    # s + 2 x u' s (1 - s) with s = sigmoid(2u), s (1 - s) in its one-exp form
    return special.expit(2.0 * u) + xc * 2.0 * du * _sigmoid_prime(2.0 * u)


def _mish_value(x: Array) -> Array:
    return x * np.tanh(_softplus(x))


def _mish_deriv(x: Array) -> Array:
    sp = _softplus(x)
    return np.tanh(sp) + x * _sech2(sp) * special.expit(x)


# ---------------------------------------------------------------------------------------
# the registry
# ---------------------------------------------------------------------------------------
_Factory = Callable[..., Activation]

BUILTIN_DESCRIPTIONS: dict[str, str] = {
    "linear": "identity, phi(x) = x",
    "step": "Heaviside step: 1 for x >= 0, else 0",
    "sigmoid": "logistic 1 / (1 + exp(-x))",
    "tanh": "hyperbolic tangent",
    "relu": "max(x, 0)",
    "leaky_relu": "x for x > 0, slope * x otherwise (slope, default 0.01)",
    "elu": "x for x > 0, alpha (exp(x) - 1) otherwise (alpha, default 1; Clevert et al. 2016)",
    "selu": "scale * elu(x; alpha) with the constants of Klambauer et al. 2017",
    "softplus": "log(1 + exp(x))",
    "gelu": "x * Phi(x), Phi the standard normal CDF (Hendrycks & Gimpel 2016)",
    "gelu_tanh": "tanh approximation of gelu (Hendrycks & Gimpel 2016)",
    "silu": "x * sigmoid(x)",
    "swish": "x * sigmoid(beta x) (beta, default 1)",
    "mish": "x * tanh(softplus(x))",
    "erf": "error function erf(x)",
    "hard_tanh": "clip(x, -1, 1)",
}


def _make(name: str, value: ArrayFn, deriv: ArrayFn, breakpoints: tuple[float, ...] = (),
          params: Mapping[str, float] | None = None, scale: float | None = 1.0,
          smoothing: Smoothing | None = None) -> Activation:
    return Activation(name=name, value_fn=value, derivative_fn=deriv, breakpoints=breakpoints,
                      params=params or {}, description=BUILTIN_DESCRIPTIONS[name],
                      declared_scale=scale, smoothing=smoothing)


_INF = math.inf


def _elu_pieces(alpha: float, scale: float = 1.0) -> Smoothing:
    # scale * (x for x >= 0, alpha (e^x - 1) below); derivative scale * (1, alpha e^x)
    below = Piece(-_INF, 0.0, (Term(scale * alpha, 0, 1.0), Term(-scale * alpha)))
    return piecewise_smoothing(
        [below, Piece(0.0, _INF, (Term(scale, 1),))],
        [Piece(-_INF, 0.0, (Term(scale * alpha, 0, 1.0),)), Piece(0.0, _INF, (Term(scale),))])


def _linear() -> Activation:
    return _make("linear", lambda x: x.copy(), lambda x: np.ones_like(x),
                 smoothing=linear_smoothing())


def _step() -> Activation:
    # derivative is zero almost everywhere; the jump at 0 is recorded in Activation.jumps
    return _make("step", lambda x: np.where(x >= 0, 1.0, 0.0), lambda x: np.zeros_like(x), (0.0,),
                 smoothing=piecewise_smoothing([Piece(0.0, _INF, (Term(1.0),))], []))


def _sigmoid() -> Activation:
    return _make("sigmoid", special.expit, _sigmoid_prime)


def _tanh() -> Activation:
    return _make("tanh", np.tanh, _sech2)


def _relu() -> Activation:
    return _make("relu", lambda x: np.maximum(x, 0.0), lambda x: np.where(x > 0, 1.0, 0.0), (0.0,),
                 smoothing=piecewise_smoothing([Piece(0.0, _INF, (Term(1.0, 1),))],
                                               [Piece(0.0, _INF, (Term(1.0),))]))


def _leaky_relu(slope: float = 0.01) -> Activation:
    a = check_finite("slope", slope)
    smooth = piecewise_smoothing(
        [Piece(-_INF, 0.0, (Term(a, 1),)), Piece(0.0, _INF, (Term(1.0, 1),))],
        [Piece(-_INF, 0.0, (Term(a),)), Piece(0.0, _INF, (Term(1.0),))])
    return _make("leaky_relu", lambda x: np.where(x > 0, x, a * x),
                 lambda x: np.where(x > 0, 1.0, a), (0.0,), {"slope": a}, smoothing=smooth)


def _elu_builtin(alpha: float = 1.0) -> Activation:
    a = check_finite("alpha", alpha)
    if a < 0:
        raise InvalidParameterError("params.alpha", ">= 0", alpha)
    v, d = _elu(a)
    return _make("elu", v, d, (0.0,), {"alpha": a}, smoothing=_elu_pieces(a))


def _selu() -> Activation:
    v, d = _elu(SELU_ALPHA)
    return _make("selu", lambda x: SELU_SCALE * v(x), lambda x: SELU_SCALE * d(x), (0.0,),
                 smoothing=_elu_pieces(SELU_ALPHA, SELU_SCALE))


def _softplus_builtin() -> Activation:
    return _make("softplus", _softplus, special.expit)


def _gelu() -> Activation:
    return _make("gelu", lambda x: x * special.ndtr(x),
                 lambda x: special.ndtr(x) + x * _INV_SQRT_2PI * np.exp(-0.5 * _square_clipped(x)),
                 smoothing=gelu_smoothing())


def _gelu_tanh() -> Activation:
    return _make("gelu_tanh", _gelu_tanh_value, _gelu_tanh_deriv)


def _silu() -> Activation:
    v, d = _swish(1.0)
    return _make("silu", v, d)


def _swish_builtin(beta: float = 1.0) -> Activation:
    b = check_finite("beta", beta)
    v, d = _swish(b)
    # swish(beta) changes over |x| ~ 1 / |beta|: let Activation.scale estimate it
    return _make("swish", v, d, (), {"beta": b}, scale=None)


def _mish() -> Activation:
    return _make("mish", _mish_value, _mish_deriv)


def _erf() -> Activation:
    return _make("erf", special.erf,
                 lambda x: (2.0 / math.sqrt(math.pi)) * np.exp(-_square_clipped(x)),
                 smoothing=erf_smoothing())


def _hard_tanh() -> Activation:
    return _make("hard_tanh", lambda x: np.clip(x, -1.0, 1.0),
                 lambda x: np.where(np.abs(x) < 1.0, 1.0, 0.0), (-1.0, 1.0),
                 smoothing=piecewise_smoothing(
                     [Piece(-_INF, -1.0, (Term(-1.0),)), Piece(-1.0, 1.0, (Term(1.0, 1),)),
                      Piece(1.0, _INF, (Term(1.0),))],
                     [Piece(-1.0, 1.0, (Term(1.0),))]))


_REGISTRY: dict[str, _Factory] = {
    "linear": _linear,
    "step": _step,
    "sigmoid": _sigmoid,
    "tanh": _tanh,
    "relu": _relu,
    "leaky_relu": _leaky_relu,
    "elu": _elu_builtin,
    "selu": _selu,
    "softplus": _softplus_builtin,
    "gelu": _gelu,
    "gelu_tanh": _gelu_tanh,
    "silu": _silu,
    "swish": _swish_builtin,
    "mish": _mish,
    "erf": _erf,
    "hard_tanh": _hard_tanh,
}

_PARAMS: dict[str, tuple[str, ...]] = {"leaky_relu": ("slope",), "elu": ("alpha",), "swish": ("beta",)}
_CACHE: dict[tuple[str, tuple[tuple[str, float], ...]], Activation] = {}


def builtin_names() -> tuple[str, ...]:
    """Names of the built-in activations, in a stable order."""
    return tuple(_REGISTRY)


def builtin_parameters(name: str) -> tuple[str, ...]:
    """Named parameters a built-in accepts (empty for most)."""
    return _PARAMS.get(name, ())


def builtin_activation(name: str, **params: float) -> Activation:
    """Return the built-in activation ``name`` with its parameters.

    Parameters
    ----------
    name : str
        One of :func:`builtin_names`.
    **params : float
        ``slope`` for leaky_relu, ``alpha`` for elu, ``beta`` for swish.

    Raises
    ------
    UnknownActivationError
        If the name is not a built-in.
    InvalidParameterError
        If a parameter is unknown for that activation or out of range.

    Notes
    -----
    Activations are cached per (name, parameters), so repeated calls return
    the same object and the quadrature caches stay warm.
    """
    if name not in _REGISTRY:
        raise UnknownActivationError(
            f"unknown activation {name!r}; built-ins are: {', '.join(_REGISTRY)}")
    allowed = _PARAMS.get(name, ())
    for key in params:
        if key not in allowed:
            what = ", ".join(allowed) if allowed else "no parameters"
            raise InvalidParameterError(f"params.{key}", f"a parameter of {name} ({what})", params[key])
    key = (name, tuple(sorted((k, check_finite(f"params.{k}", v)) for k, v in params.items())))
    act = _CACHE.get(key)
    if act is None:
        act = _REGISTRY[name](**dict(key[1]))
        _CACHE[key] = act
    return act


# ---------------------------------------------------------------------------------------
# the property profile (shared by built-ins and formulas)
# ---------------------------------------------------------------------------------------
_TAIL = 1e4


def _probe_grid(breakpoints: tuple[float, ...]) -> Array:
    core = np.linspace(-12.0, 12.0, 4801)
    tails = np.geomspace(12.0, _TAIL, 200)
    extra = [b + s for b in breakpoints for s in (-1e-7, 1e-7, -1e-3, 1e-3)]
    return np.unique(np.concatenate([core, tails, -tails, np.asarray(extra, dtype=float),
                                     np.asarray(breakpoints, dtype=float)]))


def _profile(act: Activation) -> ActivationProperties:
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
