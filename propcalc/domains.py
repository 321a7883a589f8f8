"""The documented numeric domains of propcalc's inputs, and their checkers.

One table says, for every numeric input of the engine, the range the
numerics honour and why: the Python API enforces it at its public
boundaries, and the command line and the HTTP service import the same
table (:data:`DOMAINS`, :func:`domain_table`), so every interface accepts
and refuses the same numbers with the same words.

Two kinds of bound appear:

* bounds of the numerics (``q``, ``c``): where the quadrature and the
  closed forms are tested to their stated accuracy (1e-12 relative on
  smooth activations, 1e-10 on piecewise ones). The maps
  (:mod:`propcalc.meanfield.maps`) enforce them;
* bounds of the model (``sigma_w2``, ``sigma_b2``, ``q_input``, ``depth``,
  ``keep_rate``...): the range over which the analyses built on the maps
  (fixed points, depth scales, plans) search and are tested. The analyses
  enforce them on what the user passes; values they derive internally
  (an effective sigma_w2 after dropout, a critical sigma_w2 at a large q*)
  only need to be finite and positive, which the maps check.

Each bound carries its reason; a bound that is a practical convention rather
than a limit of the numerics says so ("common practice, no source").

A value outside its domain raises :class:`~propcalc.errors.InvalidParameterError`
naming the field, the constraint and the value: a value of the wrong sign or
not a finite number gets the basic constraint (``"sigma_w2 must be > 0, got
-1.0"``); a value of the right sign beyond the documented bounds gets the
bounds (``"sigma_w2 must be in [1e-6, 10000], got 1e+300"``).
"""

from __future__ import annotations

import math
import numbers
import re
import sys
from collections.abc import Mapping
from dataclasses import dataclass
from types import MappingProxyType
from typing import Any

import numpy as np

from .errors import ComputationError, InvalidParameterError

__all__ = [
    "Domain",
    "DOMAINS",
    "Q_POSITIVE_MIN",
    "Q_MAX",
    "SIGMA_W2_MIN",
    "SIGMA_W2_MAX",
    "SIGMA_B2_POSITIVE_MIN",
    "SIGMA_B2_MAX",
    "domain",
    "check",
    "check_array",
    "check_planned",
    "domain_table",
    "format_bound",
    "check_signal",
]


def format_bound(value: float) -> str:
    """Short text of a bound: 10000.0 -> '10000', 1e-06 -> '1e-6', 1e12 -> '1e12'."""
    v = float(value)
    if v.is_integer() and abs(v) < 1e6:
        return str(int(v))
    # '1e+12' -> '1e12', '1e-06' -> '1e-6'
    return re.sub(r"e([+-])0*(\d)", lambda m: "e" + ("-" if m[1] == "-" else "") + m[2],
                  f"{v:.12g}")


@dataclass(frozen=True)
class Domain:
    """The documented range of one numeric input.

    Attributes
    ----------
    name : str
        The input, as the Python API spells it (``sigma_w2``, ``q``...).
    lower, upper : float
        Bounds of the range (inclusive unless ``lower_open`` / ``upper_open``).
    zero : bool
        0 is allowed besides ``[lower, upper]`` (``sigma_b2 = 0``: no bias).
    integer : bool
        Only integers (int, or a float with an integral value) are accepted.
    lower_open, upper_open : bool
        The bound itself is excluded.
    units : str
        What the number measures.
    reason : str
        Why the bounds are where they are (shown in the documentation).
    basic : str
        The constraint shown for a value of the wrong sign (default ``"> 0"``,
        ``">= 0"`` or ``"finite"`` from the bounds).
    upper_is_basic : bool
        Values above ``upper`` also get the basic constraint (the upper bound
        is part of the definition, as 1 for a probability).
    """

    name: str
    lower: float
    upper: float
    zero: bool = False
    integer: bool = False
    lower_open: bool = False
    upper_open: bool = False
    units: str = ""
    reason: str = ""
    basic: str = ""
    upper_is_basic: bool = False

    # -- words ---------------------------------------------------------------------------
    @property
    def constraint(self) -> str:
        """The full constraint in words, e.g. ``"0 or in [1e-100, 10000]"``."""
        lo, hi = format_bound(self.lower), format_bound(self.upper)
        interval = f"{'(' if self.lower_open else '['}{lo}, {hi}{')' if self.upper_open else ']'}"
        kind = "an integer in " if self.integer else "in "
        return f"0 or {kind}{interval}" if self.zero else kind + interval

    @property
    def sign(self) -> str:
        """The basic constraint (finiteness and sign) used for values of the wrong sign."""
        if self.basic:
            return self.basic
        if self.integer:
            return f"an integer >= {format_bound(self.lower)}"
        if self.lower > 0 and not self.zero:
            return "> 0"
        if self.lower >= 0:
            return ">= 0"
        return "finite"

    @property
    def _non_finite(self) -> str:
        """The constraint shown for NaN or an infinity."""
        return self.sign if (self.basic or self.integer) else "a finite real number"

    # -- membership ----------------------------------------------------------------------
    def contains(self, value: float) -> bool:
        """True if the number ``value`` lies in the domain."""
        if not math.isfinite(value):
            return False
        if self.zero and value == 0.0:
            return True
        above = value > self.lower if self.lower_open else value >= self.lower
        below = value < self.upper if self.upper_open else value <= self.upper
        return above and below

    def _sign_ok(self, value: float) -> bool:
        if math.isnan(value) or (math.isinf(value) and not self.integer):
            return False
        if self.upper_is_basic and value > self.upper:
            return False
        if self.lower > 0 and not self.zero:
            return value > 0
        if self.lower >= 0:
            return value >= 0
        return True

    def check(self, value: Any, field: str | None = None) -> Any:
        """Return ``value`` as a float (an int for integer domains), or raise.

        Parameters
        ----------
        value : Any
            The value received.
        field : str, optional
            The name to show in the error (defaults to :attr:`name`; callers
            pass ``"point.sigma_w2"`` or ``"widths[2]"``).

        Raises
        ------
        InvalidParameterError
            Naming the field, the constraint and the value.
        """
        field = self.name if field is None else field
        number = _as_number(value)
        if number is None:
            raise InvalidParameterError(field, self.sign if self.integer
                                        else "a finite real number", value)
        if math.isnan(number) or (math.isinf(number) and not self.integer):
            raise InvalidParameterError(field, self._non_finite, value)
        if self.integer and math.isfinite(number) and not _integral(number):
            raise InvalidParameterError(field, self.sign, value)
        if not self.contains(number):
            if not self._sign_ok(number):
                raise InvalidParameterError(field, self.sign, value)
            raise InvalidParameterError(field, self.constraint, value)
        return int(number) if self.integer else float(number)

    def check_array(self, values: Any, field: str | None = None) -> np.ndarray:
        """Return ``values`` as a float array, or raise naming the first bad entry."""
        field = self.name if field is None else field
        try:
            arr = np.asarray(values, dtype=float)
        except (TypeError, ValueError, OverflowError):
            raise InvalidParameterError(field, "a number or an array of numbers", values) from None
        ok = _inside(arr, self)
        if not np.all(ok):
            bad = float(arr[~ok].ravel()[0])
            if not math.isfinite(bad) and not self.integer:
                text = self._non_finite
            else:
                text = self.sign if not self._sign_ok(bad) else self.constraint
            raise InvalidParameterError(field, text, bad)
        return arr

    def row(self) -> dict[str, Any]:
        """The domain as a table row (plain Python values)."""
        return {"name": self.name, "lower": self.lower, "upper": self.upper,
                "lower_inclusive": not self.lower_open, "upper_inclusive": not self.upper_open,
                "zero_allowed": self.zero, "integer": self.integer,
                "constraint": self.constraint, "units": self.units, "reason": self.reason}


def _as_number(value: Any) -> float | None:
    """``value`` as a float when it is a real number (not bool), else None (never raises)."""
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, numbers.Real):
        if isinstance(value, np.ndarray) and value.shape == () and value.dtype.kind in "iuf":
            value = value.item()
        else:
            return None
    try:
        out = float(value)
    except (OverflowError, ValueError):
        return math.inf if isinstance(value, numbers.Integral) and value > 0 else (
            -math.inf if isinstance(value, numbers.Integral) else None)
    return out


def _integral(number: float) -> bool:
    return math.isfinite(number) and number == int(number)


def _inside(arr: np.ndarray, dom: Domain) -> np.ndarray:
    ok = np.isfinite(arr)
    lo = (arr > dom.lower) if dom.lower_open else (arr >= dom.lower)
    hi = (arr < dom.upper) if dom.upper_open else (arr <= dom.upper)
    inside = lo & hi
    if dom.zero:
        inside |= arr == 0.0
    if dom.integer:
        inside &= np.floor(np.where(ok, arr, 0.0)) == np.where(ok, arr, 0.5)
    return ok & inside


# ---------------------------------------------------------------------------------------------
# the bounds
# ---------------------------------------------------------------------------------------------
#: Smallest positive pre-activation variance q: the maps form q (1 - c^2) and q (1 - c) down to
#: gaps 1 - c ~ 1e-16 and squares of values of size sqrt(q); with q >= 1e-200 all of them stay
#: normal doubles (>= 2.2e-308, sys.float_info.min), whose 53 significant bits carry the map.
Q_POSITIVE_MIN = 1e-200
#: Largest q: the composite rule grades its panels to the activation's feature scale down to
#: 2^-k with k ~ log2(sqrt(q) / scale); tested to rounding up to q = 1e16 (1-D) and 1e12 (2-D).
Q_MAX = 1e12
SIGMA_W2_MIN = 1e-6
SIGMA_W2_MAX = 1e4
SIGMA_B2_POSITIVE_MIN = 1e-100
SIGMA_B2_MAX = 1e4

assert Q_POSITIVE_MIN ** 1.5 > sys.float_info.min  # q^(3/2) terms of a map stay normal

_DOMAINS: tuple[Domain, ...] = (
    Domain("q", Q_POSITIVE_MIN, Q_MAX, zero=True, units="pre-activation variance",
           basic="finite and >= 0",
           reason="numerics: below 1e-200 the products q (1 - c^2) and q (1 - c) formed near "
                  "c = 1 fall below the smallest normal double (2.2e-308) and lose their "
                  "digits; above 1e12 the quadrature's grading (log2(sqrt(q)) levels) is "
                  "untested and the 2-D rule's node count grows past tens of MB per point"),
    Domain("c", -1.0, 1.0, units="correlation", basic="in [-1, 1]",
           reason="a correlation lies in [-1, 1] by definition"),
    Domain("sigma_w2", SIGMA_W2_MIN, SIGMA_W2_MAX, units="weight variance x fan-in",
           reason="model: a gain (sqrt(sigma_w2)) from 1e-3 to 100 brackets every "
                  "initialisation in use (common practice, no source); with sigma_b2 and "
                  "q_input in their ranges the variance fixed points stay below 1e9, inside "
                  "the fixed-point search and the q range of the quadrature"),
    Domain("sigma_b2", SIGMA_B2_POSITIVE_MIN, SIGMA_B2_MAX, zero=True, units="bias variance",
           reason="model: 0 (no bias) or a variance from 1e-100 (below it a bias is 0 for every "
                  "network, and its fixed points q* ~ sigma_b2 would approach the floor of q) "
                  "to 1e4 (a bias std of 100; keeps q* inside the fixed-point search)"),
    Domain("q_input", Q_POSITIVE_MIN, SIGMA_W2_MAX, zero=True,
           units="mean square of an input coordinate",
           reason="model: 0 (zero inputs, with a bias: without one nothing propagates, "
                  "check_signal) or from the floor of q to 1e4; sigma_w2 q_input "
                  "+ sigma_b2, the first layer's variance, then stays below about 1e8"),
    Domain("q_star", 1e-30, 1e6, units="pre-activation variance at the fixed point",
           reason="model: the edge-of-chaos line is searched over q* in [1e-30, 1e6]; below "
                  "1e-30 the critical sigma_b2 = q* - sigma_w2 E[phi^2] is a difference of "
                  "numbers near the floor of doubles"),
    Domain("depth", 1, 1_000_000, integer=True, units="layers",
           reason="results per layer are iterated or stored layer by layer; 10^6 layers is "
                  "beyond any trained network and bounds the work (common practice, no source)"),
    Domain("width", 1, 10_000_000, integer=True, units="units per layer",
           reason="a fan-in or fan-out of at most 10^7 (a 10^7 x 10^7 weight matrix cannot be "
                  "stored); keeps sizes exact in floating point"),
    Domain("keep_rate", 1e-3, 1.0, units="probability of keeping a unit", basic="in (0, 1]",
           upper_is_basic=True,
           reason="dropout multiplies the weight variance by about 1 / keep_rate; below 1e-3 "
                  "the noise term would dominate the signal by more than 1000x and the "
                  "infinite-width limit behind the maps needs width x keep_rate >> 1"),
    Domain("rank", 1, 1024, integer=True, units="pieces per maxout unit",
           reason="bounds the work per call (E[max of k Gaussians] is integrated over k; the "
                  "quadrature is accurate far beyond)"),
    Domain("n_classes", 2, 10_000_000, integer=True, units="softmax outputs",
           reason="a classifier has at least 2 classes; 10^7 bounds the Monte Carlo work "
                  "(draws x classes)"),
    Domain("batch_size", 1, 10_000_000, integer=True, units="inputs per step",
           reason="at least one input; 10^7 keeps sizes exact and the work of a summary bounded "
                  "(an explicit batch of inputs is limited separately, by the B x B kernel "
                  "matrix it forms) (common practice, no source)"),
    Domain("momentum", 0.0, 1.0, upper_open=True, units="heavy-ball momentum",
           basic="in [0, 1)", upper_is_basic=True,
           reason="heavy-ball gradient descent is stable on a quadratic only for momentum in "
                  "[0, 1) (Polyak 1964, from memory)"),
    Domain("activation_parameter", -1e6, 1e6, units="slope, alpha, beta or a formula constant",
           reason="beyond 1e6 in size the activation's structure is finer than 1e-6 in x or "
                  "its values exceed 1e6 |x|, outside the feature scales (down to 1e-3) the "
                  "quadrature is graded for"),
    Domain("mean", -100.0, 100.0, units="mean of incoming activations",
           reason="model: self-normalising maps and alpha dropout are tested for |mean| <= 100 "
                  "(common practice, no source)"),
    Domain("variance", 1e-6, 1e4, units="variance of incoming activations",
           reason="model: the range of sigma_w2 applied to the second moment of the "
                  "activations (common practice, no source)"),
    Domain("alpha_prime", -1e3, 1e3, units="value of a dropped unit (alpha dropout)",
           reason="model: the SELU value is -1.758; 1e3 in size keeps a and b of alpha "
                  "dropout finite (common practice, no source)"),
)

#: Every documented domain by name (read-only).
DOMAINS: Mapping[str, Domain] = MappingProxyType({d.name: d for d in _DOMAINS})


def domain(name: str) -> Domain:
    """The :class:`Domain` called ``name`` (KeyError naming the known ones otherwise)."""
    try:
        return DOMAINS[name]
    except KeyError:
        raise KeyError(f"no documented domain {name!r}; known: {', '.join(DOMAINS)}") from None


def check(name: str, value: Any, field: str | None = None) -> Any:
    """Check ``value`` against the domain ``name``; see :meth:`Domain.check`."""
    return domain(name).check(value, field)


def check_array(name: str, values: Any, field: str | None = None) -> np.ndarray:
    """Check every entry of ``values`` against the domain ``name``; see :meth:`Domain.check_array`."""
    return domain(name).check_array(values, field)


def check_planned(name: str, value: float, where: str, cause: str) -> float:
    """A value a planner computed, checked against the domain ``name`` before it is handed out.

    A plan must be usable as given (its description read back, its layers drawn): a value
    outside the domain is a :class:`~propcalc.errors.ComputationError` saying where it arose
    and the input that led there (``cause``), e.g. inputs of second moment 1e-8 asking layer 1
    for sigma_w2 = 1e8.
    """
    dom = domain(name)
    if not bool(_inside(np.array([float(value)]), dom)[0]):
        raise ComputationError(f"{where}: the planned {name} = {value:.6g} is outside its "
                               f"domain ({dom.constraint}) because {cause}")
    return value


def domain_table() -> tuple[dict[str, Any], ...]:
    """One row per domain (name, lower, upper, inclusive ends, zero, integer, constraint,
    units, reason), in a stable order, for the documentation and the front ends."""
    return tuple(d.row() for d in _DOMAINS)


def check_signal(q_input: float, sigma_b2: Any) -> None:
    """Refuse zero inputs without a bias (``q_input`` = 0 where ``sigma_b2`` = 0).

    Every pre-activation is then exactly 0 at every layer: no variance flows anywhere (q = 0
    stays put whether it attracts or repels) and two inputs, both zero, have no correlation,
    so a report of fixed points, phases and depth scales would contradict itself (issue 12
    section 2: ``report tanh -w 1.5 --q-input 0`` said "collapses" at a repelling q = 0).
    ``sigma_b2`` may be an array (a sweep's axis): one zero entry is enough to refuse.
    """
    if q_input == 0.0 and np.any(np.asarray(sigma_b2) == 0.0):
        raise InvalidParameterError(
            "q_input", "> 0 when sigma_b2 = 0 (zero inputs and no bias make every "
            "pre-activation 0 at every layer: nothing propagates)", q_input,
            hint="give inputs of positive mean square, or a bias")
