"""Solving for the transform ``gamma (phi(alpha x + beta) + delta)`` of a general activation.

With ``f(z) = phi(alpha z + beta)``, ``z ~ N(0, 1)``, the shaped activation is
used at unit input variance with sigma_w2 = 1 and sigma_b2 = 0, so its
per-layer maps at q = 1 are (Stein's identity gives Q' without phi''):

* ``Q(1) = gamma^2 E[(f + delta)^2]``,
* ``Q'(1) = gamma^2 E[(z^2 - 1) (f + delta)^2] / 2``,
* ``C'(1) = gamma^2 E[f'^2] = gamma^2 alpha^2 E[phi'(alpha z + beta)^2]`` (Price's theorem),
* ``C(0) = gamma^2 (E[f] + delta)^2`` (independent inputs).

Write ``m = E[f]``, ``v = E[(f - m)^2]``, ``D = E[f'^2]``,
``A = E[(z^2 - 3) (f - m)^2]`` and ``B = E[(z^2 - 1) (f - m)]``.

Deep kernel shaping (Martens et al. 2021, section 4): ``Q(1) = 1``,
``Q'(1) = 1``, ``C(0) = 0`` and ``C'(1) = xi = zeta^(1/L)``. ``C(0) = 0`` gives
``delta = -m``, ``Q(1) = 1`` gives ``gamma^-2 = v``, and the remaining two are
``Q'(1) - 1 = A / (2 v) = 0`` and ``C'(1) - xi = D / v - xi = 0``.

Tailored transformation of a smooth activation (Zhang et al. 2022, section 4;
the fourth condition ``Q'(1) = 1`` is taken from deep kernel shaping, so that
q = 1 is a neutral fixed point of the variance map as it is for the leaky
form): ``C'(1) = 1`` gives ``gamma^-2 = D``; ``Q(1) = 1`` gives
``(m + delta)^2 = D - v = s^2`` (``D >= v`` is the Gaussian Poincare inequality),
two branches ``m + delta = +-s``; then
``Q'(1) - 1 = (A + 2 s B - 2 s^2) / (2 D) = 0``, and ``C(0) = s^2 / D``. The
fourth equation is the network target itself, ``C_L(0) = eta`` (the per-layer
curvature ``C''(1)`` follows: it is what makes the network reach the target).
A map with ``C(1) = 1`` and ``C'(1) = 1`` is nonlinear only through a non-zero
mean (``C(0) = sum_(k >= 2) (k - 1) b_k`` in Mehler's series), which is why
this method cannot also ask ``C(0) = 0``.

Search. Both systems have one equation ``Q'(1) = 1`` (the "curve" in the
(alpha, beta) plane) and one target equation. The plane is scanned on a grid
(``ln alpha`` uniform, beta uniform), the curve is located in every alpha
column by the sign changes of ``Q'(1) - 1``, neighbouring curve points are
linked across columns, and where the target gap changes sign along a link,
the root is refined by Brent's method in ``ln alpha`` with beta kept on the
curve by an inner Brent solve. Every root is then checked with propcalc's own
maps on the finished Activation (see :mod:`propcalc.shaping.solve`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import optimize

from ..activations.base import Activation
from ..numerics.hermite import SERIES_PASSES
from ..numerics.quadrature import DEFAULT_RULE, QuadratureRule, rule_nodes

__all__ = ["ALPHA_RANGE", "BETA_HALF_WIDTH", "Candidate", "ShapingSystem", "find_candidates",
           "series_coefficients", "series_network_value"]

Array = np.ndarray

#: alpha scanned from 1e-3 to 30 (times 1 / the activation's feature scale), 40 columns.
ALPHA_RANGE = (1e-3, 30.0, 40)
#: beta scanned over +-6 (times the feature scale, plus the largest |breakpoint|), 73 rows.
BETA_HALF_WIDTH = (6.0, 73)
#: The series used for the target gap during the scan (signs only): 80 terms, panels of 1.
SCAN_SERIES = (80, QuadratureRule(n_per_panel=16, panel_width=1.0, z_max=10.0))
#: |Q'(1) - 1| below this at a grid point carries no sign (rounding, or a degenerate region).
_NOISE = 1e-12


@dataclass(frozen=True)
class Candidate:
    """A root of the system before the final check: the four numbers and its branch."""

    alpha: float
    beta: float
    gamma: float
    delta: float
    branch: int


class ShapingSystem:
    """The equations of one method for one base activation (see the module doc).

    Parameters
    ----------
    act : Activation
        The base phi.
    method : {"dks", "tat"}
    depth : int
    target : float
        zeta = C_L'(1) for "dks", eta = C_L(0) for "tat".
    """

    def __init__(self, act: Activation, method: str, depth: int, target: float) -> None:
        self.act = act
        self.method = method
        self.depth = depth
        self.target = target
        # zeta^(1/L) without losing the digits of a slope close to 1
        self.xi = math.exp(math.log(target) / depth) if method == "dks" else 1.0
        self.rule = (DEFAULT_RULE if act.scale == 1.0
                     else QuadratureRule(scale=act.scale))
        self.branches = (0,) if method == "dks" else (1, -1)

    # -- moments ---------------------------------------------------------------------
    def moments(self, alpha: Array, beta: Array) -> tuple[Array, Array, Array, Array, Array]:
        """(m, v, D, A, B) of the module doc, vectorised over broadcast (alpha, beta)."""
        alpha, beta = np.broadcast_arrays(np.asarray(alpha, dtype=float),
                                          np.asarray(beta, dtype=float))
        x, w = rule_nodes(beta, alpha * alpha, self.act.breakpoints, self.rule)
        z = (x - beta[..., None]) / alpha[..., None]
        with np.errstate(all="ignore"):
            f = self.act.value(x)
            d = self.act.derivative(x)
        w = np.where(w > 0, w, 0.0)
        f = np.where(w > 0, f, 0.0)
        d = np.where(w > 0, d, 0.0)
        m = np.sum(w * f, axis=-1)
        g = f - m[..., None]
        g2 = w * g * g
        v = np.sum(g2, axis=-1)
        D = alpha * alpha * np.sum(w * d * d, axis=-1)
        z2 = z * z
        A = np.sum((z2 - 3.0) * g2, axis=-1)
        B = np.sum(w * (z2 - 1.0) * g, axis=-1)
        return m, v, D, A, B

    def curve(self, mom: tuple[Array, ...], branch: int) -> Array:
        """Q'(1) - 1 on the given moments (NaN where the transform does not exist)."""
        m, v, D, A, B = mom
        with np.errstate(all="ignore"):
            if self.method == "dks":
                out = A / (2.0 * v)
            else:
                s = branch * np.sqrt(np.maximum(D - v, 0.0))
                out = (A + 2.0 * s * B - 2.0 * s * s) / (2.0 * D)
        return np.where(np.isfinite(out) & _resolved(m, v, D), out, np.nan)

    def transform(self, mom: tuple[Array, ...], branch: int) -> tuple[Array, Array]:
        """(gamma, delta) that meet the conditions solved in closed form."""
        m, v, D, _, _ = mom
        with np.errstate(all="ignore"):
            if self.method == "dks":
                return 1.0 / np.sqrt(v), -m
            s = branch * np.sqrt(np.maximum(D - v, 0.0))
            return 1.0 / np.sqrt(D), s - m

    def gap(self, alpha: Array, beta: Array, branch: int, precise: bool = False) -> Array:
        """The target equation: C'(1) - xi ("dks") or C_L(0) - eta ("tat")."""
        mom = self.moments(alpha, beta)
        if self.method == "dks":
            m, v, D, _, _ = mom
            with np.errstate(all="ignore"):
                return np.where(_resolved(m, v, D), D / v - self.xi, np.nan)
        gamma, delta = self.transform(mom, branch)
        args = (np.atleast_1d(alpha), np.atleast_1d(beta), np.atleast_1d(gamma),
                np.atleast_1d(delta))
        if not precise:  # the scan: signs only, a short series on wider panels
            coef = series_coefficients(self.act, *args, terms=SCAN_SERIES)
            out = series_network_value(coef, self.depth) - self.target
            return out.reshape(np.shape(alpha))
        coef = series_coefficients(self.act, *args, terms=SERIES_PASSES[0])
        if not self._certified(coef):
            coef = series_coefficients(self.act, *args, terms=SERIES_PASSES[1])
        return _network_value_one(coef[0], self.depth, self.target) - self.target

    def _certified(self, coef: Array) -> bool:
        """True if the series' tail bound at c = eta is below 1e-14 (Q(1) = 1 by construction)."""
        kmax = coef.shape[1] - 1
        defect = np.maximum(1.0 - coef.sum(axis=1), 0.0) + 1e-13
        return bool(np.all(self.target ** (kmax + 1) * defect <= 1e-14))


def _resolved(m: Array, v: Array, D: Array) -> Array:
    """Where f = phi(alpha z + beta) varies enough for its moments to keep their digits.

    The spread sqrt(v) must exceed 1e-6 of |E[f]|: a nearly constant f (a
    saturated tail, a tiny alpha) leaves its centred moments to rounding.
    """
    with np.errstate(all="ignore"):
        return (v > 0) & (D > 0) & (np.sqrt(v) > 1e-6 * np.abs(m))


def series_coefficients(act: Activation, alpha: Array, beta: Array, gamma: Array, delta: Array,
                        terms: tuple[int, QuadratureRule] = SERIES_PASSES[0]) -> Array:
    """b_k = a_k^2, the Mehler coefficients of ``gamma (phi(alpha z + beta) + delta)`` at q = 1.

    ``E[phi_hat(u1) phi_hat(u2)] = sum_k b_k c^k`` for unit-variance inputs with
    correlation c (Mehler's formula; the dual activation of Daniely, Frostig &
    Singer 2016, section 6), with ``a_k = E[phi_hat(z) He_k(z)] / sqrt(k!)`` from
    the orthonormal three-term recurrence; ``terms`` is (K, rule), e.g. a pass of
    :data:`propcalc.numerics.hermite.SERIES_PASSES` (160 terms, or 640 on finer
    panels). One row per (alpha, beta, gamma, delta).
    """
    kmax, rule = terms
    x, w = rule_nodes(beta, alpha * alpha, act.breakpoints, rule)
    z = (x - beta[:, None]) / alpha[:, None]
    with np.errstate(all="ignore"):
        f = act.value(x)
    w = np.where(w > 0, w, 0.0)
    wf = w * np.where(w > 0, f, 0.0)
    roots = np.sqrt(np.arange(kmax + 2, dtype=float))
    out = np.empty((alpha.size, kmax + 1))
    out[:, 0] = wf.sum(axis=1) + delta  # E[f + delta]: w sums to 1 to rounding
    if alpha.size == 1:  # one row (the refinement): plain dot products, no einsum overhead
        zr, wr = z[0], wf[0]
        h_prev, h = np.ones_like(zr), zr.copy()
        out[0, 1] = np.dot(wr, h)
        for k in range(1, kmax):
            h_prev *= -roots[k]
            h_prev += zr * h
            h_prev /= roots[k + 1]
            h, h_prev = h_prev, h
            out[0, k + 1] = np.dot(wr, h)
    else:
        h_prev, h = np.ones_like(z), z.copy()
        out[:, 1] = np.einsum("ij,ij->i", wf, h)
        for k in range(1, kmax):
            h_prev *= -roots[k]
            h_prev += z * h
            h_prev /= roots[k + 1]
            h, h_prev = h_prev, h
            out[:, k + 1] = np.einsum("ij,ij->i", wf, h)
    out *= gamma[:, None]
    return out * out


def series_network_value(coef: Array, depth: int, c0: float = 0.0) -> Array:
    """C_L(c0) for each row of Mehler coefficients (c_l = sum_k b_k c_(l-1)^k)."""
    c = np.full(coef.shape[0], c0)
    powers = np.empty_like(coef)
    powers[:, 0] = 1.0
    for _ in range(depth):
        powers[:, 1:] = c[:, None]
        np.cumprod(powers[:, 1:], axis=1, out=powers[:, 1:])
        with np.errstate(under="ignore"):
            c = np.einsum("ij,ij->i", powers, coef)
        c = np.minimum(c, 1.0)
    return c


def _network_value_one(coef: Array, depth: int, target: float) -> float:
    """C_L(0) for one row of Mehler coefficients, by Horner's rule on the terms that matter.

    Terms beyond K_eff are dropped when ``target^(K_eff + 1) (1 - sum_(k <= K_eff) b_k)``
    (a bound on what they add while c_l <= target, since Q(1) = sum_k b_k = 1) is below
    1e-17; the solver only needs C_L(0) near the target.
    """
    tail = 1.0 - np.cumsum(coef)
    powers = target ** np.arange(1, coef.size + 1, dtype=float)
    small = np.nonzero(np.abs(tail) * powers <= 1e-17)[0]
    keep = int(small[0]) + 1 if small.size else coef.size
    terms = [float(b) for b in coef[:keep][::-1]]
    c = 0.0
    for _ in range(depth):
        acc = 0.0
        for b in terms:
            acc = acc * c + b
        c = min(acc, 1.0)
    return c


def _grid(system: ShapingSystem) -> tuple[Array, Array]:
    scale = system.act.scale
    lo, hi, n = ALPHA_RANGE
    alphas = np.geomspace(lo, hi, n) / scale
    half, nb = BETA_HALF_WIDTH
    reach = half * scale + max((abs(b) for b in system.act.breakpoints), default=0.0)
    return alphas, np.linspace(-reach, reach, nb)


def _curve_points(system: ShapingSystem, alphas: Array, betas: Array, values: Array,
                  branch: int) -> list[list[float]]:
    """Per alpha column, the betas where Q'(1) - 1 changes sign, solved on the curve.

    Every bracket of the grid is refined at once by the Illinois variant of regula
    falsi (vectorised; 16 steps leave the root within far less than a grid step,
    which is all the scan needs: the refinement of a root solves again).
    """
    cols_j, lo, hi, flo, fhi = [], [], [], [], []
    for j in range(alphas.size):
        r = values[j]
        ok = np.isfinite(r) & (np.abs(r) > _NOISE)
        idx = np.nonzero(ok[:-1] & ok[1:] & (r[:-1] * r[1:] < 0))[0]
        cols_j += [j] * idx.size
        lo += list(betas[idx])
        hi += list(betas[idx + 1])
        flo += list(r[idx])
        fhi += list(r[idx + 1])
    cols: list[list[float]] = [[] for _ in alphas]
    if not cols_j:
        return cols
    a = alphas[np.asarray(cols_j)]
    lo_, hi_, flo_, fhi_ = (np.asarray(v, dtype=float) for v in (lo, hi, flo, fhi))
    side = np.zeros(a.size)
    for _ in range(16):
        x = hi_ - fhi_ * (hi_ - lo_) / (fhi_ - flo_)
        x = np.where(np.isfinite(x) & (x > lo_) & (x < hi_), x, 0.5 * (lo_ + hi_))
        fx = system.curve(system.moments(a, x), branch)
        fx = np.where(np.isfinite(fx), fx, 0.0)
        left = fx * flo_ > 0  # the root is in [x, hi]
        # Illinois: halve the value kept at an end that stays twice in a row
        flo_ = np.where(left, fx, np.where(side == -1, flo_, flo_ * 0.5))
        fhi_ = np.where(left, np.where(side == 1, fhi_, fhi_ * 0.5), fx)
        side = np.where(left, 1, -1)
        lo_, hi_ = np.where(left, x, lo_), np.where(left, hi_, x)
    mid = np.where(np.abs(flo_) < np.abs(fhi_), lo_, hi_)
    for j, b in zip(cols_j, mid):
        cols[j].append(float(b))
    return cols


def _links(cols: list[list[float]], step: float) -> list[tuple[int, int, int]]:
    """(column, index in it, index in the next column) of curve points that continue."""
    out = []
    for j in range(len(cols) - 1):
        nxt = cols[j + 1]
        if not nxt:
            continue
        for i, b in enumerate(cols[j]):
            dist = [abs(b - b2) for b2 in nxt]
            k = int(np.argmin(dist))
            if dist[k] <= max(6.0 * step, abs(b)):
                # the match must be mutual, or two branches would be joined
                back = [abs(nxt[k] - b1) for b1 in cols[j]]
                if int(np.argmin(back)) == i:
                    out.append((j, i, k))
    return out


def _beta_on_curve(system: ShapingSystem, alpha: float, guess: float, width: float,
                   branch: int) -> float | None:
    """The beta near ``guess`` where Q'(1) = 1 at this alpha (Brent), or None."""
    def fun(b: float) -> float:
        return float(system.curve(system.moments(np.array(alpha), np.array(b)), branch))

    f0 = fun(guess)
    if f0 == 0.0:
        return guess
    # secant steps from the guess first (a few evaluations when the guess is close) ...
    x0, x1, g0 = guess, guess + 1e-3 * width, f0
    for _ in range(12):
        g1 = fun(x1)
        if not math.isfinite(g1) or g1 == g0:
            break
        x2 = x1 - g1 * (x1 - x0) / (g1 - g0)
        if not abs(x2 - guess) <= 4.0 * width:
            break
        if abs(x2 - x1) <= 1e-13 * max(1.0, abs(x2)):
            return x2
        x0, g0, x1 = x1, g1, x2
    # ... and a bracket with Brent's method when they wander off
    for grow in (1.0, 2.0, 4.0):
        lo, hi = guess - grow * width, guess + grow * width
        flo, fhi = fun(lo), fun(hi)
        # the nearer bracket first: [lo, guess] or [guess, hi]
        for a, b, fa, fb in ((lo, guess, flo, f0), (guess, hi, f0, fhi)):
            if math.isfinite(fa) and math.isfinite(fb) and fa * fb < 0:
                return float(optimize.brentq(fun, a, b, xtol=1e-15 * max(1.0, abs(guess)),
                                             rtol=1e-15, maxiter=200))
    return None


def _refine(system: ShapingSystem, a0: float, b0: float, a1: float, b1: float, width: float,
            branch: int) -> Candidate | None:
    """The root between two linked curve points whose target gaps differ in sign."""
    cache: dict[float, float] = {}

    def beta_at(u: float) -> float | None:
        if u in cache:
            return cache[u]
        if len(cache) >= 2:  # from the two nearest points already on the curve
            (ua, ba), (ub, bb) = sorted(cache.items(), key=lambda kv: abs(kv[0] - u))[:2]
            guess = ba + (u - ua) * (bb - ba) / (ub - ua) if ub != ua else ba
        else:
            t = (u - math.log(a0)) / (math.log(a1) - math.log(a0))
            guess = b0 + t * (b1 - b0)
        b = _beta_on_curve(system, math.exp(u), guess, width, branch)
        if b is not None:
            cache[u] = b
        return b

    def h(u: float) -> float:
        b = beta_at(u)
        if b is None:
            raise _OffCurve
        value = float(system.gap(np.array(math.exp(u)), np.array(b), branch, precise=True))
        if abs(value) <= _GAP_DONE:
            raise _Converged(u)
        return value

    u0, u1 = math.log(a0), math.log(a1)
    try:
        h0, h1 = h(u0), h(u1)
        if not (math.isfinite(h0) and math.isfinite(h1)) or h0 * h1 > 0:
            return None
        u = float(optimize.brentq(h, u0, u1, xtol=1e-15, rtol=1e-15, maxiter=200))
    except _Converged as done:
        u = done.u
    except _OffCurve:
        return None
    try:
        b = beta_at(u)
    except _OffCurve:
        return None
    if b is None:
        return None
    alpha = math.exp(u)
    gamma, delta = system.transform(system.moments(np.array(alpha), np.array(b)), branch)
    if not (math.isfinite(float(gamma)) and math.isfinite(float(delta))):
        return None
    return Candidate(alpha, b, float(gamma), float(delta), branch)


class _OffCurve(Exception):
    """The inner solve lost the curve (a turning point between two columns)."""


class _Converged(Exception):
    """The target gap is within _GAP_DONE at u: no further step can improve the conditions."""

    def __init__(self, u: float) -> None:
        super().__init__(u)
        self.u = u


#: |target gap| at which the refinement stops (the conditions are then met to about this,
#: two orders below the 1e-10 the final check asks for)
_GAP_DONE = 1e-13


def find_candidates(system: ShapingSystem) -> tuple[list[Candidate], int]:
    """Every root the scan finds, refined (not yet checked with the maps).

    Returns
    -------
    candidates : list of Candidate
        Distinct roots (alpha > 0; ``(-alpha, beta)`` gives the same maps, mirrored).
    n_links : int
        Curve segments where the target gap changed sign (for the report).
    """
    alphas, betas = _grid(system)
    aa, bb = np.meshgrid(alphas, betas, indexing="ij")
    mom = system.moments(aa, bb)
    step = float(betas[1] - betas[0])
    found: list[Candidate] = []
    n_links = 0
    # odd phi: (beta, branch) and (-beta, -branch) give mirrored phi_hat and the same maps;
    # even phi: (beta, branch) and (-beta, branch). Only beta >= 0 is refined then.
    parity = system.act.exact_parity
    for branch in system.branches:
        cols = _curve_points(system, alphas, betas, system.curve(mom, branch), branch)
        pa = np.array([alphas[j] for j, c in enumerate(cols) for _ in c])
        if pa.size == 0:
            continue
        pb = np.array([b for c in cols for b in c])
        gaps = np.asarray(system.gap(pa, pb, branch), dtype=float)
        offset = np.cumsum([0] + [len(c) for c in cols])
        for j, i, k in _links(cols, step):
            g0, g1 = gaps[offset[j] + i], gaps[offset[j + 1] + k]
            if not (math.isfinite(g0) and math.isfinite(g1)) or g0 * g1 > 0:
                continue
            n_links += 1
            b0, b1 = cols[j][i], cols[j + 1][k]
            if parity is not None and max(b0, b1) < 0:
                continue
            cand = _refine(system, float(alphas[j]), b0, float(alphas[j + 1]), b1,
                           max(abs(b1 - b0), step), branch)
            if cand is None:
                continue
            new = [cand]
            if parity is not None and abs(cand.beta) > 1e-9 * system.act.scale:
                new.append(_mirror(cand, parity))
            for c in new:
                if not any(_same(c, d, system.act.scale) for d in found):
                    found.append(c)
    return found, n_links


def _mirror(c: Candidate, parity: str) -> Candidate:
    """The root of the reflected activation (see find_candidates)."""
    if parity == "odd":
        return Candidate(c.alpha, -c.beta, c.gamma, -c.delta, -c.branch)
    return Candidate(c.alpha, -c.beta, c.gamma, c.delta, c.branch)


def _same(a: Candidate, b: Candidate, scale: float) -> bool:
    return (a.branch == b.branch and abs(math.log(a.alpha / b.alpha)) < 1e-7
            and abs(a.beta - b.beta) < 1e-7 * scale)
