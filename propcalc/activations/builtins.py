"""The built-in activations: value and exact derivative as stable numpy functions.

Every built-in evaluates without overflow warnings or NaN for ``|x|`` up to 1e4
and beyond; the kinked and jumping ones declare their breakpoints, and those with
a closed-form Gaussian smoothing attach it (see :mod:`propcalc.numerics.smoothing`).

Built-ins with parameters (leaky_relu's slope, elu's alpha, swish's beta) are
cached per (name, parameters) in a bounded LRU cache: while an activation is
cached, the same name and parameters return the same object.
"""

from __future__ import annotations

import math
import sys
from collections.abc import Callable, Mapping

import numpy as np
from scipy import special

from ..errors import InvalidParameterError, UnknownActivationError, check_finite
from ..numerics.smoothing import (Piece, Smoothing, Term, erf_smoothing, gelu_smoothing,
                                  linear_smoothing, piecewise_smoothing)
from .base import Activation
from .cache import ActivationCache
from .names import canonical_name, did_you_mean

__all__ = [
    "builtin_activation",
    "builtin_names",
    "builtin_parameters",
    "BUILTIN_DESCRIPTIONS",
    "SELU_ALPHA",
    "SELU_SCALE",
    "BUILTIN_CACHE",
    "parameter_value",
    "canonical_builtin_name",
]

Array = np.ndarray
ArrayFn = Callable[[Array], Array]

#: the smallest positive normal double; parameters and literals below it (subnormal) are refused
SMALLEST_NORMAL = sys.float_info.min


def parameter_value(field: str, value: object) -> float:
    """``value`` as a float parameter, or an InvalidParameterError naming ``field``.

    Refused: what is not a finite real number (:func:`~propcalc.errors.check_finite`:
    NaN, infinities, integers too large for a double such as ``10**400``), and subnormal
    magnitudes (below 2.2250738585072014e-308, where a double keeps fewer than 53 bits: such
    a parameter is almost certainly an underflow, not a value anyone means).
    """
    out = check_finite(field, value)
    if out != 0.0 and abs(out) < SMALLEST_NORMAL:
        raise InvalidParameterError(field, f"0 or at least {SMALLEST_NORMAL!r} in magnitude (a "
                                    "normal double)", value)
    return out


# Klambauer et al. 2017, "Self-normalizing neural networks", eq. (14):
# the constants that make (mean, variance) = (0, 1) a fixed point.
SELU_ALPHA = 1.6732632423543772848170429916717
SELU_SCALE = 1.0507009873554804934193349852946

_SQRT_2_OVER_PI = math.sqrt(2.0 / math.pi)
_INV_SQRT_2PI = 1.0 / math.sqrt(2.0 * math.pi)
_GELU_TANH_C = 0.044715  # Hendrycks & Gimpel 2016, eq. for the tanh approximation


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
    a = parameter_value("slope", slope)
    smooth = piecewise_smoothing(
        [Piece(-_INF, 0.0, (Term(a, 1),)), Piece(0.0, _INF, (Term(1.0, 1),))],
        [Piece(-_INF, 0.0, (Term(a),)), Piece(0.0, _INF, (Term(1.0),))])
    return _make("leaky_relu", lambda x: np.where(x > 0, x, a * x),
                 lambda x: np.where(x > 0, 1.0, a), (0.0,), {"slope": a}, smoothing=smooth)


def _elu_builtin(alpha: float = 1.0) -> Activation:
    a = parameter_value("alpha", alpha)
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
    b = parameter_value("beta", beta)
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

#: built activations per (name, parameters); bounded (issue 11: one entry per distinct
#: parameter value must not grow without limit in a long-running service)
BUILTIN_CACHE: ActivationCache[Activation] = ActivationCache("activations.builtins", 256)


def canonical_builtin_name(text: str) -> str | None:
    """The built-in that ``text`` names in any case and with ``-``/``_``/space separators.

    ``"Gelu"`` -> ``"gelu"``, ``"leaky-relu"`` -> ``"leaky_relu"``, ``"hardtanh"`` ->
    ``"hard_tanh"``; None for anything else (see :func:`~.names.canonical_name`).

    Examples
    --------
    >>> canonical_builtin_name("Leaky-ReLU")
    'leaky_relu'
    """
    return canonical_name(text, _REGISTRY)


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
    Activations are cached per (name, parameters) in a bounded LRU cache
    (:data:`BUILTIN_CACHE`), so repeated calls return the same object while it
    is cached and the quadrature caches stay warm.
    """
    if name not in _REGISTRY:
        raise UnknownActivationError(
            f"unknown activation {name!r}{did_you_mean(name, _REGISTRY)}; built-ins are: "
            f"{', '.join(_REGISTRY)}")
    allowed = _PARAMS.get(name, ())
    for key in params:
        if key not in allowed:
            what = ", ".join(allowed) if allowed else "no parameters"
            hint = did_you_mean(key, allowed).strip(" ()")
            raise InvalidParameterError(f"params.{key}", f"a parameter of {name} ({what})",
                                        params[key], hint=hint)
    key = (name, tuple(sorted((k, parameter_value(f"params.{k}", v)) for k, v in params.items())))
    act = BUILTIN_CACHE.get(key)
    if act is None:
        act = BUILTIN_CACHE.put(key, _REGISTRY[name](**dict(key[1])))
    return act
