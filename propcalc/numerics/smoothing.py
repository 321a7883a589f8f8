"""Gaussian smoothing of an activation in closed form: E[phi(m + sqrt(v) z)].

The map ``(m, v) -> E[phi(m + sqrt(v) z)]``, z ~ N(0, 1), is the Gaussian
convolution (Weierstrass transform) of phi. Given it, the pair expectation of
the correlation map is a 1-D integral,
``E[f(u1) phi(u2)] = E[f(u1) S(c u1, q (1 - c^2))]``, because ``u2 | u1`` is
normal with mean ``c u1`` and variance ``q (1 - c^2)`` (equal variances q).

Closed forms used here:

* a piecewise function whose pieces are sums of ``x^k exp(a x)`` (k = 0, 1):
  ``exp(a x)`` tilts the Gaussian, ``E[g(m + s z) exp(a (m + s z))] =
  exp(a m + a^2 s^2 / 2) E[g(m + a s^2 + s z)]`` (completing the square), and
  the truncated moments of the normal are
  ``E[1{alpha <= z < beta}] = Phi(beta) - Phi(alpha)`` and
  ``E[z 1{alpha <= z < beta}] = varphi(alpha) - varphi(beta)``
  (Johnson, Kotz & Balakrishnan 1994, vol. 1, section 10.1). This covers
  linear, step, relu, leaky_relu, elu, selu and hard_tanh and their
  derivatives;
* ``E[Phi(m + s z)] = Phi(m / r)`` with ``r = sqrt(1 + s^2)`` and, by Stein's
  identity, ``E[z Phi(m + s z)] = s varphi(m / r) / r``, so for gelu
  ``E[gelu(m + s z)] = m Phi(m / r) + s^2 varphi(m / r) / r`` and
  ``E[gelu'(m + s z)] = Phi(m / r) + m varphi(m / r) / r^3``;
* ``E[erf(m + s z)] = erf(m / sqrt(1 + 2 s^2))`` (the integral behind
  Williams 1997, eq. 11) and
  ``E[erf'(m + s z)] = 2 exp(-m^2 / (1 + 2 s^2)) / sqrt(pi (1 + 2 s^2))``.

Everything is evaluated in log space where a large exponential meets a small
Gaussian mass, so no overflow occurs for ``|m|`` up to 1e4 and beyond.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np
from scipy import special

__all__ = [
    "Smoothing",
    "Term",
    "Piece",
    "piecewise_smoothing",
    "gelu_smoothing",
    "erf_smoothing",
    "linear_smoothing",
]

Array = np.ndarray
SmoothFn = Callable[[Array, Array], Array]

_INV_SQRT_2PI = 1.0 / math.sqrt(2.0 * math.pi)


@dataclass(frozen=True)
class Smoothing:
    """Closed-form Gaussian smoothings of phi and of the regular part of phi'.

    Attributes
    ----------
    value : callable
        ``(m, v) -> E[phi(m + sqrt(v) z)]``, vectorised with broadcasting, v >= 0.
    derivative : callable
        The same for phi' away from jumps (the Dirac masses of a jumping phi
        are handled by the maps).
    """

    value: SmoothFn
    derivative: SmoothFn


@dataclass(frozen=True)
class Term:
    """``coef * x^power * exp(rate * x)`` with power 0 or 1."""

    coef: float
    power: int = 0
    rate: float = 0.0


@dataclass(frozen=True)
class Piece:
    """A sum of terms on ``lo <= x < hi`` (lo may be -inf, hi +inf)."""

    lo: float
    hi: float
    terms: tuple[Term, ...]


def _log_mass(alpha: Array, beta: Array) -> Array:
    """log(Phi(beta) - Phi(alpha)) for alpha <= beta, stable in both tails."""
    with np.errstate(divide="ignore", invalid="ignore"):
        left = special.log_ndtr(beta) + np.log1p(-np.exp(special.log_ndtr(alpha)
                                                          - special.log_ndtr(beta)))
        right = special.log_ndtr(-alpha) + np.log1p(-np.exp(special.log_ndtr(-beta)
                                                             - special.log_ndtr(-alpha)))
        middle = np.log1p(-(special.ndtr(alpha) + special.ndtr(-beta)))
    return np.where(beta <= 0.0, left, np.where(alpha >= 0.0, right, middle))


#: Below this exponent exp(a m + a^2 s^2 / 2) times a Gaussian mass is formed directly
#: (e^600 * 1e-308 is negligible); above it, in log space.
_DIRECT_EXPONENT = 600.0


class _Boundaries:
    """Phi and varphi at the standardised piece boundaries t = (b - shift) / s, each once.

    One ndtr per boundary: the tail ``T = Phi(-|t|)`` gives both sides,
    ``Phi(t) = T + [t > 0] (1 - 2 T)`` and ``Phi(-t) = T + [t <= 0] (1 - 2 T)``, so the
    small side is T itself and keeps its relative digits, and the large side is
    ``1 - T`` to rounding.
    """

    def __init__(self, m: Array, s: Array) -> None:
        self.m, self.s, self.inv_s = m, s, 1.0 / s
        self.cache: dict[tuple[str, float, float], Array] = {}

    def shift(self, rate: float) -> Array:
        return self.m + rate * self.s * self.s if rate else self.m

    def _get(self, what: str, rate: float, b: float) -> Array:
        key = (what, rate, b)
        out = self.cache.get(key)
        if out is not None:
            return out
        if what == "t":
            out = (b - self.shift(rate)) * self.inv_s
        elif what == "tail":
            out = special.ndtr(-np.abs(self.t(rate, b)))
        elif what == "lower":  # Phi(t)
            tail = self._get("tail", rate, b)
            out = tail + (self.t(rate, b) > 0.0) * (1.0 - 2.0 * tail)
        elif what == "upper":  # Phi(-t)
            tail = self._get("tail", rate, b)
            out = tail + (self.t(rate, b) <= 0.0) * (1.0 - 2.0 * tail)
        else:  # the Gaussian factor exp(-t^2 / 2)
            t = self.t(rate, b)
            out = np.exp(-0.5 * t * t)
        self.cache[key] = out
        return out

    def t(self, rate: float, b: float) -> Array:
        return self._get("t", rate, b)

    def gauss(self, rate: float, b: float) -> Array:
        return self._get("gauss", rate, b)

    def mass(self, rate: float, lo: float, hi: float) -> Array:
        """P(lo <= shift + s z < hi)."""
        if lo == -math.inf:
            return self._get("lower", rate, hi) if hi != math.inf else np.ones(self.m.shape)
        if hi == math.inf:
            return self._get("upper", rate, lo)
        # from the two tails: both ends above the mean, both below, or one on each side
        # (a difference of small tails keeps its digits; only the middle case is 1 - ...)
        t_lo, t_hi = self.t(rate, lo), self.t(rate, hi)
        tail_lo, tail_hi = self._get("tail", rate, lo), self._get("tail", rate, hi)
        return np.where(t_lo >= 0.0, tail_lo - tail_hi,
                        np.where(t_hi <= 0.0, tail_hi - tail_lo, 1.0 - tail_lo - tail_hi))


def _piece_term(term: Term, lo: float, hi: float, bd: _Boundaries) -> Array:
    """E[term(m + s z) 1{lo <= m + s z < hi}] for s > 0."""
    a = term.rate
    m, s = bd.m, bd.s
    mass = bd.mass(a, lo, hi)
    log_scale = None
    if a != 0.0:
        log_scale = a * m + 0.5 * a * a * s * s
        big = log_scale > _DIRECT_EXPONENT
        with np.errstate(over="ignore", invalid="ignore"):
            mass = np.exp(np.minimum(log_scale, _DIRECT_EXPONENT)) * mass
        if np.any(big):  # exp(log_scale) alone would overflow: the product in log space
            shift = bd.shift(a)
            with np.errstate(divide="ignore", invalid="ignore"):
                alpha = (lo - shift) / s if lo != -math.inf else np.full(m.shape, -math.inf)
                beta = (hi - shift) / s if hi != math.inf else np.full(m.shape, math.inf)
            mass = np.where(big, np.exp(log_scale + _log_mass(alpha, beta)), mass)
    if term.power == 0:
        return term.coef * mass
    # E[(shift + s z) 1] = shift P + s (varphi(alpha) - varphi(beta))
    dens = np.zeros(m.shape)
    for b, sign in ((lo, 1.0), (hi, -1.0)):
        if b in (-math.inf, math.inf):
            continue
        if log_scale is None:
            dens = dens + sign * bd.gauss(a, b)
        else:
            t = bd.t(a, b)
            with np.errstate(over="ignore"):
                dens = dens + sign * np.exp(log_scale - 0.5 * t * t)
    shifted = bd.shift(a) * mass
    if log_scale is not None:
        shifted = np.where(mass > 0.0, shifted, 0.0)
    return term.coef * (shifted + s * _INV_SQRT_2PI * dens)


def _eval_pieces(pieces: Sequence[Piece], x: Array) -> Array:
    """The piecewise function itself (the smoothing at v = 0); outside a piece its terms
    may overflow (e^745 * 0), which np.where then discards."""
    out = np.zeros_like(x)
    with np.errstate(over="ignore", invalid="ignore"):
        for p in pieces:
            inside = (x >= p.lo) & (x < p.hi)
            val = np.zeros_like(x)
            for t in p.terms:
                e = np.exp(t.rate * x) if t.rate != 0.0 else 1.0
                val = val + t.coef * (x if t.power == 1 else 1.0) * e
            out = np.where(inside, val, out)
    return out


#: |a m| + |a| s below which C exp(a x) - C is smoothed in the cancellation-free form.
EXPM1_REGION = 1e-2


def _interval_mass(t: Array, h: Array) -> Array:
    """Phi(t) - Phi(t - h), keeping its relative digits for small h.

    For ``|h| (1 + |t|) < 0.1`` the midpoint series ``int_{c - h/2}^{c + h/2} varphi =
    h sum_k varphi^(2k)(c) (h/2)^(2k) / (2k + 1)!`` with ``varphi^(2k) = He_2k varphi``
    (He_2 = c^2 - 1, He_4 = c^4 - 6 c^2 + 3, He_6 = c^6 - 15 c^4 + 45 c^2 - 15; Abramowitz
    & Stegun 1964, 26.2.25 and 22.3), truncated where the next term is below 1e-16;
    otherwise the difference of the two tails on the side where they are small.
    """
    c = t - 0.5 * h
    c2 = c * c
    h2 = 0.25 * h * h
    series = h * _INV_SQRT_2PI * np.exp(-0.5 * c2) * (
        1.0 + h2 * ((c2 - 1.0) / 6.0 + h2 * ((c2 * c2 - 6.0 * c2 + 3.0) / 120.0
                                             + h2 * ((c2 * (c2 * (c2 - 15.0) + 45.0) - 15.0)
                                                     / 5040.0))))
    with np.errstate(over="ignore", invalid="ignore"):
        upper = special.ndtr(-(t - h)) - special.ndtr(-t)  # both tails small for t > 0
        lower = special.ndtr(t) - special.ndtr(t - h)
    direct = np.where(t - 0.5 * h > 0.0, upper, lower)
    return np.where(np.abs(h) * (1.0 + np.abs(c)) < 0.1, series, direct)


def _expm1_term(coef: float, rate: float, lo: float, hi: float, bd: _Boundaries) -> Array:
    """``coef E[(exp(rate X) - 1) 1{lo <= X < hi}]``, X = m + s z, without cancellation.

    ``E[exp(a X) 1] = e^L P_a`` (L = a m + a^2 s^2 / 2, P_a the mass of the interval
    under the tilted mean m + a s^2), so the term is ``expm1(L) P_a + (P_a - P_0)``, and
    ``P_a - P_0`` is the mass the interval loses or gains at each end when shifted by
    ``a s^2``: :func:`_interval_mass` at ``t = (b - m) / s`` with ``h = a s``. Forming
    ``e^L P_a - P_0`` directly loses all digits when s and m are tiny (elu at q = 1e-40).
    """
    m, s = bd.m, bd.s
    L = rate * m + 0.5 * rate * rate * s * s
    p_a = bd.mass(rate, lo, hi)
    diff = np.zeros(m.shape)
    h = rate * s
    # P_a - P_0 = [F0(hi - d) - F0(hi)] - [F0(lo - d) - F0(lo)], d = a s^2 and F0 the cdf of X
    if hi != math.inf:
        diff = diff - _interval_mass((hi - m) * bd.inv_s, h)
    if lo != -math.inf:
        diff = diff + _interval_mass((lo - m) * bd.inv_s, h)
    return coef * (np.expm1(L) * p_a + diff)


def _expm1_pairs(terms: tuple[Term, ...]) -> tuple[list[tuple[float, float]], list[Term]]:
    """Split ``C exp(a x) - C`` pairs (a != 0, power 0) from the other terms of a piece."""
    pairs: list[tuple[float, float]] = []
    rest = list(terms)
    for t in terms:
        if t.power == 0 and t.rate != 0.0 and t in rest:
            match = Term(-t.coef)
            if match in rest:
                rest.remove(t)
                rest.remove(match)
                pairs.append((t.coef, t.rate))
    return pairs, rest


def _smooth_pieces(pieces: tuple[Piece, ...]) -> SmoothFn:
    split = tuple((p, *_expm1_pairs(p.terms)) for p in pieces)

    def smooth(m: Array, v: Array) -> Array:
        m, v = np.broadcast_arrays(np.asarray(m, dtype=float), np.asarray(v, dtype=float))
        s = np.sqrt(v)
        pos = bool(np.all(s > 0.0))
        bd = _Boundaries(m, s if pos else np.where(s > 0.0, s, 1.0))
        total = np.zeros(m.shape)
        for p, pairs, rest in split:
            for t in rest:
                total += _piece_term(t, p.lo, p.hi, bd)
            for coef, rate in pairs:
                plain = (_piece_term(Term(coef, 0, rate), p.lo, p.hi, bd)
                         + _piece_term(Term(-coef), p.lo, p.hi, bd))
                # where exp(rate X) is within EXPM1_REGION of 1 on the mass the two terms cancel
                # (losing ~1e-16 / EXPM1_REGION relative at its edge): the exact form there
                small = (np.abs(rate * bd.m) + np.abs(rate) * bd.s) < EXPM1_REGION
                if np.any(small):
                    plain = np.array(plain, dtype=float)
                    sub = _Boundaries(np.broadcast_to(bd.m, small.shape)[small],
                                      np.broadcast_to(bd.s, small.shape)[small])
                    with np.errstate(over="ignore", invalid="ignore"):
                        plain[small] = _expm1_term(coef, rate, p.lo, p.hi, sub)
                total += plain
        return total if pos else np.where(s > 0.0, total, _eval_pieces(pieces, m))
    return smooth


def piecewise_smoothing(value: Sequence[Piece], derivative: Sequence[Piece]) -> Smoothing:
    """Closed-form smoothings of a piecewise ``x^k exp(a x)`` phi and its derivative.

    Parameters
    ----------
    value, derivative : sequence of Piece
        Disjoint pieces covering the line (where the function is nonzero).

    Returns
    -------
    Smoothing
    """
    for p in tuple(value) + tuple(derivative):
        if not p.lo < p.hi or any(t.power not in (0, 1) for t in p.terms):
            raise ValueError(f"bad piece {p!r}: need lo < hi and powers 0 or 1")
    return Smoothing(_smooth_pieces(tuple(value)), _smooth_pieces(tuple(derivative)))


def _gelu_value(m: Array, v: Array) -> Array:
    r = np.sqrt(1.0 + v)
    t = m / r
    return m * special.ndtr(t) + v * _INV_SQRT_2PI * np.exp(-0.5 * np.minimum(t * t, 1e300)) / r


def _gelu_derivative(m: Array, v: Array) -> Array:
    r2 = 1.0 + v
    r = np.sqrt(r2)
    t = m / r
    return special.ndtr(t) + m * _INV_SQRT_2PI * np.exp(-0.5 * np.minimum(t * t, 1e300)) / (r2 * r)


def gelu_smoothing() -> Smoothing:
    """E[gelu(m + s z)] = m Phi(m / r) + s^2 varphi(m / r) / r, r = sqrt(1 + s^2), and its slope."""
    return Smoothing(_gelu_value, _gelu_derivative)


def _erf_value(m: Array, v: Array) -> Array:
    return special.erf(m / np.sqrt(1.0 + 2.0 * v))


def _erf_derivative(m: Array, v: Array) -> Array:
    r2 = 1.0 + 2.0 * v
    return 2.0 * np.exp(-np.minimum(m * m, 1e300) / r2) / np.sqrt(math.pi * r2)


def erf_smoothing() -> Smoothing:
    """E[erf(m + s z)] = erf(m / sqrt(1 + 2 s^2)) and E[erf'(m + s z)]."""
    return Smoothing(_erf_value, _erf_derivative)


def linear_smoothing() -> Smoothing:
    """E[m + s z] = m and E[1] = 1."""
    return Smoothing(lambda m, v: np.broadcast_arrays(np.asarray(m, float), v)[0].copy(),
                     lambda m, v: np.ones(np.broadcast(m, v).shape))
