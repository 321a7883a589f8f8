"""Forward and backward gains of an activation, and what a common fixed gain implies.

Conventions: a gain g multiplies the standard deviation, ``std = g / sqrt(fan_in)``, so
``sigma_w2 = g^2`` (see :mod:`propcalc`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from ..activations.base import Activation
from ..activations.resolver import resolve
from ..meanfield.report import propagation
from ..meanfield.maps import derivative_second_moment, second_moment
from ..numerics.quadrature import DEFAULT_RULE, QuadratureRule
from ..results import Result

__all__ = ["COMMON_GAINS", "Gains", "gains"]

#: Fixed gains found in common practice for a few activations (common practice, no source).
COMMON_GAINS: dict[str, float] = {
    "linear": 1.0,
    "sigmoid": 1.0,
    "tanh": 5.0 / 3.0,
    "relu": math.sqrt(2.0),
}


@dataclass(frozen=True)
class Gains(Result):
    """Forward and backward gains of an activation at unit pre-activation variance.

    Attributes
    ----------
    activation : str
    forward : float
        1 / sqrt(E[phi(z)^2]): keeps the pre-activation second moment at 1
        with zero bias.
    backward : float
        1 / sqrt(E[phi'(z)^2]): keeps the gradient variance (chi_1 = 1 at q = 1).
    common_gain : float or None
        A fixed constant found in common practice (common practice, no source).
    common_gain_sigma_w2 : float or None
        Its square.
    common_gain_chi_1, common_gain_phase : float, str or None
        What the common gain implies with sigma_b2 = 0 (propagation report).
    notes : tuple of str
    """

    activation: str
    forward: float
    backward: float
    common_gain: float | None
    common_gain_sigma_w2: float | None
    common_gain_chi_1: float | None
    common_gain_phase: str | None
    notes: tuple[str, ...] = ()


def _common_gain(act: Activation) -> tuple[float | None, str]:
    if act.name == "leaky_relu":
        a = float(act.params.get("slope", 0.01))
        # He et al. 2015, eq. (10) generalised to a leaky slope a: sigma_w2 = 2 / (1 + a^2)
        return math.sqrt(2.0 / (1.0 + a * a)), "He et al. 2015: sqrt(2 / (1 + slope^2))"
    if act.name in COMMON_GAINS and not act.params and act.formula is None:
        return COMMON_GAINS[act.name], "common practice, no source"
    return None, ""


def _finite_inverse_sqrt(value: float, what: str, act: Activation) -> float:
    if not math.isfinite(value) or value <= 0.0:
        return math.inf if value == 0.0 else 0.0
    return 1.0 / math.sqrt(value)


def gains(act: Activation | str, rule: QuadratureRule = DEFAULT_RULE) -> Gains:
    """Forward and backward gains, and what a common fixed gain implies.

    Parameters
    ----------
    act : str or Activation
        A built-in name, a formula in x, or an Activation (resolved once here).

    Returns
    -------
    Gains

    Notes
    -----
    The forward gain makes q = 1 a fixed point of V with sigma_b2 = 0; the
    backward gain makes chi_1 = 1 at q = 1. They agree only for activations
    with E[phi^2] = E[phi'^2] (ReLU: both sqrt(2); He et al. 2015).
    A jump in phi makes E[phi'^2] infinite: the backward gain is then 0.
    """
    act = resolve(act)
    m2 = float(second_moment(act, 1.0, rule))
    d2 = float(derivative_second_moment(act, 1.0, rule))
    forward = _finite_inverse_sqrt(m2, "E[phi^2]", act)
    backward = _finite_inverse_sqrt(d2, "E[phi'^2]", act)
    notes = []
    if math.isinf(forward):
        notes.append("E[phi(z)^2] = 0: no forward gain can restore the variance")
    if backward == 0.0:
        notes.append("phi jumps, so E[phi'(z)^2] is infinite: no gain preserves gradients")
    if math.isinf(backward):
        notes.append("phi' vanishes almost everywhere: no gradient passes at any gain")
    g, source = _common_gain(act)
    c1 = phase = sw = None
    if g is not None:
        sw = g * g
        p = propagation(act, sw, 0.0, rule=rule)
        c1, phase = p.chi_1, p.phase
        notes.append(f"common gain {g:.6g} ({source}) gives sigma_w2 = {sw:.6g}: "
                     f"chi_1 = {c1:.6g}, {phase}")
    return Gains(act.label, forward, backward, g, sw, c1, phase, tuple(notes))
