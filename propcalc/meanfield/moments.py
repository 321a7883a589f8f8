"""One-point Gaussian moments of an activation: E[phi], E[phi^2], E[phi'^2] at variance q.

The rule is adapted to the activation (its feature scale and how far from 0 its
structure reaches, :attr:`propcalc.activations.Activation.scale` and ``reach``), and q is
checked against its documented domain (:mod:`propcalc.domains`). The maps of
:mod:`propcalc.meanfield.maps` and the pair expectations of
:mod:`propcalc.meanfield.pairs` are built on these.
"""

from __future__ import annotations

import dataclasses
import math
from typing import Any

import numpy as np

from .. import domains
from ..activations.base import Activation
from ..numerics.quadrature import DEFAULT_RULE, QuadratureRule, gaussian_expectation
from ..numerics.quadrature import largest_variance as quadrature_largest_variance

__all__ = ["first_moment", "second_moment", "derivative_second_moment", "largest_variance"]

Array = np.ndarray
_Q_LO, _Q_HI = domains.Q_POSITIVE_MIN, domains.Q_MAX


def _scaled(act: Activation, rule: QuadratureRule) -> QuadratureRule:
    """The rule with the activation's feature scale (steep formulas need finer grading)."""
    scale = getattr(act, "scale", 1.0)
    reach = getattr(act, "reach", 0.0)
    if rule.scale == scale and rule.reach == reach:
        return rule
    return dataclasses.replace(rule, scale=scale, reach=reach)


def largest_variance(act: Activation, rule: QuadratureRule = DEFAULT_RULE) -> float:
    """The largest variance whose Gaussian integrals of ``act`` can be resolved: inf, or for
    an oscillating formula the limit of :func:`propcalc.numerics.quadrature.largest_variance`
    (sin(x): 3.6e7). Scans and large-variance limits stop there."""
    return quadrature_largest_variance(_scaled(act, rule))


def _q_array(q: Any, field: str = "q") -> Array:
    """q checked against its documented domain (0 or [Q_POSITIVE_MIN, Q_MAX], propcalc.domains)."""
    if isinstance(q, (float, np.floating)) and (q == 0.0 or _Q_LO <= q <= _Q_HI):
        return np.float64(q)  # the common scalar case, without array reductions
    return domains.check_array("q", q, field)


def _c_array(c: Any) -> Array:
    if isinstance(c, (float, np.floating)) and -1.0 <= c <= 1.0:
        return np.asarray(float(c))
    return domains.check_array("c", c)


def first_moment(act: Activation, q: Any, rule: QuadratureRule = DEFAULT_RULE) -> Array:
    """E[phi(sqrt(q) z)], vectorised over q."""
    rule = _scaled(act, rule)
    return gaussian_expectation(act.value, _q_array(q), act.breakpoints, rule=rule,
                                what=f"{act.label}(x)")


def second_moment(act: Activation, q: Any, rule: QuadratureRule = DEFAULT_RULE, *,
                  check_tails: bool = True) -> Array:
    """E[phi(sqrt(q) z)^2], vectorised over q.

    ``check_tails=False`` skips the truncation check of
    :func:`~propcalc.numerics.quadrature.gaussian_expectation` (the value is the same), for
    callers that already checked the range of q they evaluate in (a root polish inside a
    scanned bracket).
    """
    rule = _scaled(act, rule)
    return gaussian_expectation(lambda x: act.value(x) ** 2, _q_array(q), act.breakpoints,
                                rule=rule, what=f"{act.label}(x)^2", check_tails=check_tails,
                                fresh=True)


def derivative_second_moment(act: Activation, q: Any, rule: QuadratureRule = DEFAULT_RULE) -> Array:
    """E[phi'(sqrt(q) z)^2] (infinite where phi jumps), vectorised over q."""
    rule = _scaled(act, rule)
    qa = _q_array(q)
    out = gaussian_expectation(lambda x: act.derivative(x) ** 2, qa, act.breakpoints,
                               rule=rule, what=f"derivative of {act.label}, squared,")
    if act.has_jumps:
        out = np.full_like(out, math.inf)
    return out
