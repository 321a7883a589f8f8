"""The transformed activation ``phi_hat(x) = gamma (phi(alpha x + beta) + delta)`` as an Activation.

Both kernel-shaping methods change an activation only through this affine
transform of its input and output (deep kernel shaping, Martens et al. 2021,
section 4; tailored activation transformation, Zhang et al. 2022, section 4),
so one constructor serves them all. The result is an ordinary
:class:`~propcalc.Activation`, usable by every analysis:

* value ``gamma (phi(alpha x + beta) + delta)`` and its exact derivative
  ``gamma alpha phi'(alpha x + beta)`` (chain rule), from the base's own
  value and exact derivative;
* breakpoints ``(b - beta) / alpha`` for every breakpoint b of phi;
* the closed-form Gaussian smoothing kept when the base has one:
  ``E[phi_hat(m + sqrt(v) z)] = gamma (S(alpha m + beta, alpha^2 v) + delta)``
  and ``E[phi_hat'(m + sqrt(v) z)] = gamma alpha S'(alpha m + beta, alpha^2 v)``
  (``alpha (m + sqrt(v) z) + beta`` is normal with mean ``alpha m + beta`` and
  variance ``alpha^2 v``);
* a formula text in propcalc's own formula syntax, with the four numbers as
  named parameters, whenever the base has one (a built-in or a typed formula),
  so the shaped activation can be typed back into any front end.
"""

from __future__ import annotations

import io
import math
import tokenize
from collections.abc import Mapping

import numpy as np

from ..activations.base import Activation
from ..activations.builtins import builtin_activation, builtin_names
from ..errors import InvalidParameterError, PropcalcError, check_finite
from ..numerics.smoothing import Smoothing

__all__ = ["SHAPE_PARAMETERS", "is_registry_builtin", "base_formula", "substitute", "affine_activation",
           "leaky_form_activation"]

Array = np.ndarray

#: The names of the four numbers of the transform, in order.
SHAPE_PARAMETERS = ("alpha", "beta", "gamma", "delta")

# the parametrised built-ins, spelled in the formula syntax with their parameter as a number
_SPELLED = {
    "leaky_relu": ("slope", "where(x > 0, x, {} * x)"),
    "elu": ("alpha", "where(x > 0, x, {} * expm1(x))"),
    "swish": ("beta", "x * sigmoid({} * x)"),
}


_PROBE = np.concatenate([np.linspace(-6.0, 6.0, 49), [-1e3, -30.0, 30.0, 1e3]])


def is_registry_builtin(act: Activation) -> bool:
    """True if ``act`` is a built-in (with or without explicit parameters).

    The registry caches its activations in a bounded cache, so an activation built
    earlier may no longer be the cached object: it counts when its name, parameters
    and description are a built-in's and it agrees with a fresh one bit for bit at
    53 probe points (value and derivative).
    """
    if act.formula is not None or act.name not in builtin_names():
        return False
    try:
        ref = builtin_activation(act.name, **act.params)
    except PropcalcError:  # a look-alike whose parameters the registry refuses
        return False
    if ref is act:
        return True
    with np.errstate(all="ignore"):
        return (act.description == ref.description
                and np.array_equal(act.value(_PROBE), ref.value(_PROBE))
                and np.array_equal(act.derivative(_PROBE), ref.derivative(_PROBE)))


def substitute(text: str, names: Mapping[str, str]) -> str:
    """``text`` with every name token in ``names`` replaced by its text (no evaluation).

    The text is split with :mod:`tokenize` (it only reads tokens; nothing is
    compiled or run), so ``x`` inside ``exp`` or ``max`` is left alone.
    """
    tokens = list(tokenize.generate_tokens(io.StringIO(text).readline))
    out, pos = [], 0
    for tok in tokens:
        if tok.type == tokenize.NAME and tok.string in names and tok.start[0] == 1:
            out.append(text[pos:tok.start[1]])
            out.append(names[tok.string])
            pos = tok.end[1]
    out.append(text[pos:])
    return "".join(out)


def base_formula(act: Activation) -> str | None:
    """The base activation in the formula syntax, its parameters written as numbers.

    ``tanh`` gives ``"tanh(x)"``, ``leaky_relu`` with slope 0.2 gives
    ``"where(x > 0, x, 0.2 * x)"``, a typed formula its normalised text with its
    parameters substituted. None for an Activation built from Python functions.
    """
    if act.formula is not None:
        return substitute(act.formula, {k: f"({float(v)!r})" for k, v in act.params.items()})
    if is_registry_builtin(act):
        spelled = _SPELLED.get(act.name)
        if spelled is None:
            return f"{act.name}(x)"
        key, template = spelled
        return template.format(f"({float(act.params.get(key, _default(act.name)))!r})")
    return None


def _default(name: str) -> float:
    return float(builtin_activation(name).params[_SPELLED[name][0]])


def _affine_smoothing(sm: Smoothing, alpha: float, beta: float, gamma: float,
                      delta: float) -> Smoothing:
    """Smoothing of ``gamma (phi(alpha x + beta) + delta)`` from that of phi (see module doc)."""
    a2 = alpha * alpha

    def value(m: Array, v: Array) -> Array:
        return gamma * (sm.value(alpha * np.asarray(m, dtype=float) + beta,
                                 a2 * np.asarray(v, dtype=float)) + delta)

    def derivative(m: Array, v: Array) -> Array:
        return (gamma * alpha) * sm.derivative(alpha * np.asarray(m, dtype=float) + beta,
                                               a2 * np.asarray(v, dtype=float))

    return Smoothing(value, derivative)


def affine_activation(base: Activation, alpha: float, beta: float, gamma: float, delta: float,
                      *, description: str = "", keep_smoothing: bool = True) -> Activation:
    """``phi_hat(x) = gamma (phi(alpha x + beta) + delta)`` as an :class:`Activation`.

    Parameters
    ----------
    base : Activation
        phi.
    alpha, beta, gamma, delta : float
        Finite; ``alpha`` and ``gamma`` non-zero.
    description : str
        Shown with the activation (the method and depth it was shaped for).
    keep_smoothing : bool
        Carry the base's closed-form smoothing over (the exact maps then use
        1-D integrals); solvers that only need the Hermite series pass False.

    Returns
    -------
    Activation
        ``params`` holds alpha, beta, gamma and delta; ``formula`` is
        ``"gamma * (<base>(alpha * x + beta) + delta)"`` when the base has a
        formula text (:func:`base_formula`), so
        ``propcalc.activation(act.formula, **act.params)`` rebuilds it.

    Raises
    ------
    InvalidParameterError
        If a number is not finite, or alpha or gamma is 0.
    """
    a, b = check_finite("alpha", alpha), check_finite("beta", beta)
    g, d = check_finite("gamma", gamma), check_finite("delta", delta)
    if a == 0.0:
        raise InvalidParameterError("alpha", "non-zero", alpha)
    if g == 0.0:
        raise InvalidParameterError("gamma", "non-zero", gamma)
    phi, dphi = base.value_fn, base.derivative_fn

    def value(x: Array) -> Array:
        return g * (np.asarray(phi(a * x + b), dtype=float) + d)

    def deriv(x: Array) -> Array:
        return (g * a) * np.asarray(dphi(a * x + b), dtype=float)

    text = base_formula(base)
    formula = None
    if text is not None:
        inner = substitute(text, {"x": "(alpha * x + beta)"}).replace(
            "((alpha * x + beta))", "(alpha * x + beta)")
        formula = f"gamma * ({inner} + delta)"
    scale = min(1.0, max(1e-3, base.scale / abs(a)))
    smoothing = (_affine_smoothing(base.smoothing, a, b, g, d)
                 if keep_smoothing and base.smoothing is not None else None)
    return Activation(
        name=formula if formula is not None else f"shaped {base.label}",
        value_fn=value,
        derivative_fn=deriv,
        breakpoints=tuple((p - b) / a for p in base.breakpoints),
        params={"alpha": a, "beta": b, "gamma": g, "delta": d},
        formula=formula,
        derivative_formula=None,
        description=description or f"gamma (phi(alpha x + beta) + delta) with phi = {base.label}",
        declared_scale=scale,
        smoothing=smoothing,
    )


def leaky_form_activation(slope: float, *, description: str = "") -> Activation:
    """``sqrt(2 / (1 + a^2)) leaky_relu_a(x)`` (Zhang et al. 2022, section 4.2).

    Its variance map is the identity, ``Q(q) = q``, and its correlation map has
    ``C'(1) = 1``; ``params`` is ``{"slope": a}`` and ``formula``
    ``"sqrt(2 / (1 + slope**2)) * where(x > 0, x, slope * x)"``.
    """
    a = check_finite("slope", slope)
    gain = math.sqrt(2.0 / (1.0 + a * a))
    base = builtin_activation("leaky_relu", slope=a)
    smoothing = _affine_smoothing(base.smoothing, 1.0, 0.0, gain, 0.0) if base.smoothing else None
    phi, dphi = base.value_fn, base.derivative_fn
    formula = "sqrt(2 / (1 + slope**2)) * where(x > 0, x, slope * x)"
    return Activation(
        name=formula,
        value_fn=lambda x: gain * np.asarray(phi(x), dtype=float),
        derivative_fn=lambda x: gain * np.asarray(dphi(x), dtype=float),
        breakpoints=(0.0,),
        params={"slope": a},
        formula=formula,
        derivative_formula="sqrt(2 / (1 + slope**2)) * where(x > 0, 1, slope)",
        description=description or "leaky ReLU scaled to keep the variance (Zhang et al. 2022)",
        declared_scale=1.0,
        smoothing=smoothing,
    )
