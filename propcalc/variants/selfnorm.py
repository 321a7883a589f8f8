"""Mean and variance together: self-normalising maps (Klambauer et al. 2017).

Definitions (Klambauer et al. 2017, section "Constructing self-normalizing
neural networks")
-----------------------------------------------------------------------------
A unit receives ``z = w . x`` from n activations ``x_i`` of the previous
layer with mean ``mu = E[x_i]`` and variance ``nu = Var(x_i)``; the weights
enter through ``omega = sum_i w_i`` and ``tau = sum_i w_i^2``. For
independent x_i,

    E[z] = sum_i w_i mu = mu omega,
    Var(z) = sum_i w_i^2 nu = nu tau,

and the central limit theorem makes ``z ~ N(mu omega, nu tau)``. The next
layer's activations ``y = phi(z)`` then have

    mu~(mu, nu) = E[phi(z)],                                  (their eq. 3)
    nu~(mu, nu) = E[phi(z)^2] - mu~^2,                        (their eq. 4)

and ``g: (mu, nu) -> (mu~, nu~)`` is the map studied for any activation here
(equation numbers from memory). (A tempting shortcut,
``nu~ = tau E[phi^2] - (omega E[phi])^2``, mixes the moments of z and of y and
is not the variance of either; the pre-activation moments of the next layer
are ``(omega mu~, tau nu~)``.)

Jacobian, without finite differences
-------------------------------------
With ``m = mu omega``, ``s = nu tau`` and ``x = m + sqrt(s) t``, Stein's
identities give, for any integrable f (kinks and jumps allowed),

    d/dm E[f(x)] = E[(x - m) f(x)] / s,
    d/ds E[f(x)] = E[((x - m)^2 / s - 1) f(x)] / (2 s),

so with ``A = E[phi]`` and ``B = E[phi^2]``:

    d mu~ / d mu = omega A_m,             d mu~ / d nu = tau A_s,
    d nu~ / d mu = omega (B_m - 2 A A_m), d nu~ / d nu = tau (B_s - 2 A A_s).

A fixed point attracts when the spectral radius of this Jacobian is < 1;
Klambauer et al. use the stronger spectral norm < 1 (a contraction, so the
Banach fixed-point theorem applies). Both are reported.

Fixed points: for omega = 0 the map of nu does not involve mu, and every
fixed point with nu > 0 is found by bracketing ``nu~(nu) - nu`` on a log grid
and Brent's method. For omega != 0, a Newton-type solver (MINPACK hybrid,
:func:`scipy.optimize.root`) with the analytic Jacobian runs from several
starts in the variables ``(mu, ln nu)``; fixed points far from all starts
may be missed (said in the result).

Alpha dropout (Klambauer et al. 2017, section "New dropout technique")
---------------------------------------------------------------------
Dropped units are set to ``alpha' = -lambda alpha`` (SELU's negative
saturation value) instead of 0, then an affine map ``a (.) + b`` restores
the mean and variance. For ``x`` of mean mu and variance nu and
``d ~ Bernoulli(q)``:

    E[x d + alpha'(1 - d)] = q mu + (1 - q) alpha',
    Var[x d + alpha'(1 - d)] = q nu + q (1 - q) (mu - alpha')^2,

so ``a = sqrt(nu / (q nu + q (1 - q)(mu - alpha')^2))`` and
``b = mu - a (q mu + (1 - q) alpha')``. At ``(mu, nu) = (0, 1)`` this is the
published ``a = (q + alpha'^2 q (1 - q))^(-1/2)``,
``b = -(q + alpha'^2 q (1 - q))^(-1/2) (1 - q) alpha'``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import optimize

from .. import domains
from ..activations import SELU_ALPHA, SELU_SCALE, Activation, resolve
from ..errors import InvalidParameterError, check_finite, check_nonnegative, check_positive
from ..numerics import roots
from ..numerics.quadrature import DEFAULT_RULE, QuadratureRule, gaussian_expectation
from ..results import Result
from ..vocabulary import NEUTRAL_TOLERANCE

__all__ = [
    "ALPHA_PRIME_SELU",
    "AlphaDropout",
    "MeanVarianceFixedPoint",
    "SelfNormalization",
    "alpha_dropout",
    "mean_variance_jacobian",
    "mean_variance_map",
    "self_normalization",
]

#: alpha' = -lambda alpha, the value SELU saturates to for x -> -inf (Klambauer et al. 2017)
ALPHA_PRIME_SELU = -SELU_SCALE * SELU_ALPHA

_NU_GRID = (1e-8, 1e6, 169)


def _moments(act: Activation, m: np.ndarray, s: np.ndarray, rule: QuadratureRule,
             derivatives: bool) -> tuple[np.ndarray, ...]:
    """A = E[phi], B = E[phi^2] for x ~ N(m, s), and with derivatives A_m, A_s, B_m, B_s."""
    bps = act.breakpoints
    a = gaussian_expectation(act.value, s, bps, mean=m, rule=rule, what=f"{act.label}(x)")
    b = gaussian_expectation(lambda x: act.value(x) ** 2, s, bps, mean=m, rule=rule,
                             what=f"{act.label}(x)^2")
    if not derivatives:
        return a, b
    mm = m[..., None]
    ss = s[..., None]
    sq = np.sqrt(ss)

    def stein_m(f: Any) -> Any:
        return lambda x: ((x - mm) / ss) * f(x)

    def stein_s(f: Any) -> Any:
        return lambda x: (((x - mm) / sq) ** 2 - 1.0) * f(x) / (2.0 * ss)

    def sq_act(x: np.ndarray) -> np.ndarray:
        return act.value(x) ** 2

    a_m = gaussian_expectation(stein_m(act.value), s, bps, mean=m, rule=rule,
                               what=f"(x - m) {act.label}(x)")
    a_s = gaussian_expectation(stein_s(act.value), s, bps, mean=m, rule=rule,
                               what=f"((x - m)^2 / s - 1) {act.label}(x)")
    b_m = gaussian_expectation(stein_m(sq_act), s, bps, mean=m, rule=rule,
                               what=f"(x - m) {act.label}(x)^2")
    b_s = gaussian_expectation(stein_s(sq_act), s, bps, mean=m, rule=rule,
                               what=f"((x - m)^2 / s - 1) {act.label}(x)^2")
    return a, b, a_m, a_s, b_m, b_s


def _prep(mu: Any, nu: Any, omega: Any, tau: Any, strict: bool) -> tuple[np.ndarray, ...]:
    om = check_finite("omega", omega)
    ta = check_positive("tau", tau) if strict else check_nonnegative("tau", tau)
    mu_a = np.asarray(mu, dtype=float)
    nu_a = np.asarray(nu, dtype=float)
    if not np.all(np.isfinite(mu_a)):
        raise InvalidParameterError("mu", "finite", float(mu_a[~np.isfinite(mu_a)].ravel()[0]))
    bad = ~np.isfinite(nu_a) | ((nu_a <= 0) if strict else (nu_a < 0))
    if np.any(bad):
        raise InvalidParameterError("nu", "finite and > 0" if strict else "finite and >= 0",
                                    float(nu_a[bad].ravel()[0]))
    mu_a, nu_a = np.broadcast_arrays(mu_a, nu_a)
    return mu_a * om, nu_a * ta, om, ta


def mean_variance_map(act: Activation | str, mu: Any, nu: Any, omega: float = 0.0, tau: float = 1.0,
                      rule: QuadratureRule = DEFAULT_RULE) -> tuple[np.ndarray, np.ndarray]:
    """(mu, nu) -> (mu~, nu~) of Klambauer et al. 2017 (their eqs. 3-4, numbers from memory).

    Parameters
    ----------
    act : str or Activation
        A built-in name, a formula in x, or an Activation (resolved once here).
    mu, nu : array_like
        Mean and variance (>= 0) of the previous layer's activations.
    omega : float
        Sum of a unit's incoming weights.
    tau : float
        Sum of their squares, >= 0.

    Returns
    -------
    mu_new, nu_new : ndarray
        ``E[phi(z)]`` and ``Var[phi(z)]`` for ``z ~ N(mu omega, nu tau)``.
    """
    act = resolve(act)
    m, s, _, _ = _prep(mu, nu, omega, tau, strict=False)
    a, b = _moments(act, m, s, rule, derivatives=False)
    return a, np.maximum(b - a * a, 0.0)


def mean_variance_jacobian(act: Activation | str, mu: Any, nu: Any, omega: float = 0.0,
                           tau: float = 1.0, rule: QuadratureRule = DEFAULT_RULE) -> np.ndarray:
    """Jacobian of (mu~, nu~) with respect to (mu, nu), by Stein's identities (no differences).

    Parameters
    ----------
    act : str or Activation
        A built-in name, a formula in x, or an Activation (resolved once here).
    mu, nu : float or array_like
        Mean and variance of the incoming activations (broadcast together).
    omega, tau : float
        ``sum_i w_i`` and ``sum_i w_i^2`` of a unit's incoming weights (module docstring).
    rule : QuadratureRule

    Returns
    -------
    ndarray of shape ``broadcast(mu, nu).shape + (2, 2)``
        ``[[d mu~/d mu, d mu~/d nu], [d nu~/d mu, d nu~/d nu]]``; needs nu > 0, tau > 0.
    """
    act = resolve(act)
    m, s, om, ta = _prep(mu, nu, omega, tau, strict=True)
    a, _, a_m, a_s, b_m, b_s = _moments(act, m, s, rule, derivatives=True)
    jac = np.empty(m.shape + (2, 2))
    jac[..., 0, 0] = om * a_m
    jac[..., 0, 1] = ta * a_s
    jac[..., 1, 0] = om * (b_m - 2.0 * a * a_m)
    jac[..., 1, 1] = ta * (b_s - 2.0 * a * a_s)
    return jac


@dataclass(frozen=True)
class MeanVarianceFixedPoint(Result):
    """A fixed point (mu*, nu*) of the mean-variance map with its Jacobian.

    Attributes
    ----------
    mu, nu : float
    jacobian : tuple of tuple of float
        2 x 2, rows (mu~, nu~), columns (mu, nu).
    eigenvalues_real, eigenvalues_imag : tuple of float
        The two eigenvalues of the Jacobian.
    spectral_radius : float
        Largest |eigenvalue|: < 1 means the fixed point attracts.
    spectral_norm : float
        Largest singular value: < 1 means g contracts near the point (the
        criterion of Klambauer et al. 2017).
    attracting : bool
        spectral_radius < 1 - NEUTRAL_TOLERANCE.
    """

    mu: float
    nu: float
    jacobian: tuple[tuple[float, float], tuple[float, float]]
    eigenvalues_real: tuple[float, float]
    eigenvalues_imag: tuple[float, float]
    spectral_radius: float
    spectral_norm: float
    attracting: bool


@dataclass(frozen=True)
class SelfNormalization(Result):
    """Fixed points of the mean-variance map and whether the network self-normalises.

    Attributes
    ----------
    activation : str
    omega, tau : float
    fixed_points : tuple of MeanVarianceFixedPoint
        Those with nu > 0, by increasing nu.
    nearest : MeanVarianceFixedPoint or None
        The fixed point closest to ``start``.
    self_normalizing : bool
        True if ``nearest`` exists and attracts.
    neutral : bool
        True if every nu is a fixed point (a positively homogeneous phi at
        the tau that balances it): spectral radius 1, nothing attracts.
    zero_rate : float or None
        lim nu~ / nu as nu -> 0 when phi(0) = 0 (omega = 0): below 1 the
        trivial state (0, 0) attracts small variances.
    method : str
        How the fixed points were found.
    message : str
    """

    activation: str
    omega: float
    tau: float
    fixed_points: tuple[MeanVarianceFixedPoint, ...]
    nearest: MeanVarianceFixedPoint | None
    self_normalizing: bool
    neutral: bool
    zero_rate: float | None
    method: str
    message: str


def _point(act: Activation, mu: float, nu: float, omega: float, tau: float,
           rule: QuadratureRule) -> MeanVarianceFixedPoint:
    jac = mean_variance_jacobian(act, mu, nu, omega, tau, rule)
    ev = np.linalg.eigvals(jac)
    ev = ev[np.argsort(-np.abs(ev))]
    radius = float(np.max(np.abs(ev)))
    norm = float(np.linalg.norm(jac, 2))
    return MeanVarianceFixedPoint(
        float(mu), float(nu), ((float(jac[0, 0]), float(jac[0, 1])),
                               (float(jac[1, 0]), float(jac[1, 1]))),
        (float(ev[0].real), float(ev[1].real)), (float(ev[0].imag), float(ev[1].imag)),
        radius, norm, radius < 1.0 - NEUTRAL_TOLERANCE)


def _fixed_points_omega_zero(act: Activation, tau: float, rule: QuadratureRule
                             ) -> tuple[list[tuple[float, float]], bool]:
    grid = np.geomspace(*_NU_GRID)
    _, nu_new = mean_variance_map(act, np.zeros_like(grid), grid, 0.0, tau, rule)
    gap = nu_new - grid
    if np.all(np.abs(gap) <= 1e-11 * grid):
        return [], True

    def h(nu: float) -> float:
        return float(mean_variance_map(act, 0.0, nu, 0.0, tau, rule)[1]) - nu

    out = []
    for nu in roots.roots_on_grid(h, grid, gap, hidden_pairs=False):
        mu = float(mean_variance_map(act, 0.0, nu, 0.0, tau, rule)[0])
        out.append((mu, nu))
    return out, False


def _fixed_points_newton(act: Activation, omega: float, tau: float,
                         starts: list[tuple[float, float]], rule: QuadratureRule
                         ) -> list[tuple[float, float]]:
    def residual(v: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        mu, theta = float(v[0]), float(np.clip(v[1], -690.0, 690.0))
        nu = math.exp(theta)
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            mu_n, nu_n = (float(x) for x in mean_variance_map(act, mu, nu, omega, tau, rule))
            nu_n = max(nu_n, 1e-300) if math.isfinite(nu_n) else 1e300
            j = mean_variance_jacobian(act, mu, nu, omega, tau, rule)
            r = np.array([mu_n - mu, math.log(nu_n) - theta])
            jr = np.array([[j[0, 0] - 1.0, j[0, 1] * nu],
                           [j[1, 0] / nu_n, j[1, 1] * nu / nu_n - 1.0]])
        # far from any fixed point the scaled Jacobian can overflow: keep it finite for the solver
        return np.nan_to_num(r, posinf=1e300, neginf=-1e300), np.nan_to_num(
            jr, posinf=1e300, neginf=-1e300)

    found: list[tuple[float, float]] = []
    for mu0, nu0 in starts:
        try:
            sol = optimize.root(residual, np.array([mu0, math.log(nu0)]), jac=True,
                                method="hybr", options={"xtol": 1e-13})
        except (ArithmeticError, ValueError):
            continue
        if not sol.success or not np.all(np.abs(sol.fun) < 1e-10):
            continue
        mu, nu = float(sol.x[0]), math.exp(float(sol.x[1]))
        if not (_NU_GRID[0] <= nu <= _NU_GRID[1]):
            continue
        if all(abs(mu - a) > 1e-7 * (1 + abs(a)) or abs(nu - b) > 1e-7 * b for a, b in found):
            found.append((mu, nu))
    return found


def self_normalization(act: Activation | str, omega: float = 0.0, tau: float = 1.0,
                       start: tuple[float, float] = (0.0, 1.0),
                       rule: QuadratureRule = DEFAULT_RULE) -> SelfNormalization:
    """Fixed points of the mean-variance map, their Jacobians and attraction.

    Parameters
    ----------
    act : str or Activation
        A built-in name, a formula in x, or an Activation (resolved once here).
    omega : float
        Sum of the incoming weights of a unit (0 for normalised weights).
    tau : float
        Sum of their squares, > 0 (1 for normalised weights).
    start : (float, float)
        (mu, nu) the network starts from; the nearest fixed point is reported
        as ``nearest``.

    Returns
    -------
    SelfNormalization

    Examples
    --------
    >>> import propcalc
    >>> r = self_normalization(propcalc.activation("selu"))
    >>> abs(round(r.nearest.mu, 9)), round(r.nearest.nu, 9), r.self_normalizing
    (0.0, 1.0, True)
    """
    act = resolve(act)
    om = check_finite("omega", omega)
    ta = check_positive("tau", tau)
    if not isinstance(start, (tuple, list)) or len(start) != 2:
        raise InvalidParameterError("start", "a pair (mu, nu)", start)
    mu0 = check_finite("start[0]", start[0])
    nu0 = check_positive("start[1]", start[1])
    zero_rate = None
    phi0 = float(act.value(np.array([0.0]))[0])
    neutral = False
    if om == 0.0:
        pairs, neutral = _fixed_points_omega_zero(act, ta, rule)
        method = ("omega = 0: nu~ depends on nu only; all fixed points with nu in [1e-8, 1e6] "
                  "by bracketing nu~(nu) - nu on a log grid and Brent's method")
        if phi0 == 0.0:
            small = 1e-8
            zero_rate = float(mean_variance_map(act, 0.0, small, 0.0, ta, rule)[1]) / small
        if neutral:
            pairs = [(float(mean_variance_map(act, 0.0, nu0, 0.0, ta, rule)[0]), nu0)]
    else:
        starts = [(mu0, nu0)] + [(0.0, v) for v in (1e-2, 1e-1, 1.0, 10.0, 100.0)]
        pairs = _fixed_points_newton(act, om, ta, starts, rule)
        method = ("omega != 0: MINPACK hybrid root finder with the analytic Jacobian in "
                  f"(mu, ln nu) from {len(starts)} starts; fixed points far from all starts "
                  "may be missed")
    points = sorted((_point(act, mu, nu, om, ta, rule) for mu, nu in pairs), key=lambda p: p.nu)
    nearest = min(points, key=lambda p: math.hypot(p.mu - mu0, p.nu - nu0)) if points else None
    ok = bool(nearest is not None and nearest.attracting and not neutral)
    if neutral:
        msg = (f"every nu is a fixed point (nu~ = nu for all nu at tau = {ta:g}): the variance "
               "keeps whatever value it starts with; nothing attracts (spectral radius 1)")
    elif nearest is None:
        if zero_rate is not None and zero_rate < 1.0:
            msg = (f"no fixed point with nu > 0: the variance collapses to 0 (nu~/nu -> "
                   f"{zero_rate:.6g} as nu -> 0); the only attracting state is (0, 0)")
        else:
            msg = "no fixed point with nu > 0 found: the network does not self-normalise"
    else:
        how = "attracts" if nearest.attracting else "does not attract"
        msg = (f"fixed point (mu, nu) = ({nearest.mu:.6g}, {nearest.nu:.6g}) {how}: spectral "
               f"radius {nearest.spectral_radius:.6g}, spectral norm {nearest.spectral_norm:.6g}")
        if ok:
            msg += " (self-normalising)"
    return SelfNormalization(act.label, om, ta, tuple(points), nearest, ok, neutral, zero_rate,
                             method, msg)


# -------------------------------------------------------------------------------------------
# alpha dropout
# -------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class AlphaDropout(Result):
    """Constants of alpha dropout (Klambauer et al. 2017).

    Attributes
    ----------
    keep_rate : float
        q, the probability of keeping a unit.
    alpha_prime : float
        Value given to dropped units (``-lambda alpha`` for SELU).
    a, b : float
        The affine correction ``y = a (x d + alpha' (1 - d)) + b``.
    mean, variance : float
        The moments kept (0 and 1 for SELU networks).
    """

    keep_rate: float
    alpha_prime: float
    a: float
    b: float
    mean: float
    variance: float

    def apply(self, x: Any, keep: Any) -> np.ndarray:
        """``a (x d + alpha' (1 - d)) + b`` for activations x and a boolean keep mask d."""
        xa = np.asarray(x, dtype=float)
        d = np.asarray(keep, dtype=bool)
        return self.a * np.where(d, xa, self.alpha_prime) + self.b


def alpha_dropout(keep_rate: float, mean: float = 0.0, variance: float = 1.0,
                  alpha_prime: float = ALPHA_PRIME_SELU) -> AlphaDropout:
    """a and b of alpha dropout, so that mean and variance are kept.

    ``a = sqrt(nu / (q nu + q (1 - q) (mu - alpha')^2))``,
    ``b = mu - a (q mu + (1 - q) alpha')`` (see the module docstring); at
    (mu, nu) = (0, 1) the formula of Klambauer et al. 2017.

    Parameters
    ----------
    keep_rate : float
        q in (0, 1].
    mean, variance : float
        mu and nu (> 0) of the incoming activations.
    alpha_prime : float
        Value of dropped units; default ``-lambda alpha`` of SELU.
    """
    # the documented domains (propcalc.domains) keep every intermediate below is finite
    q = domains.check("keep_rate", keep_rate)
    mu = domains.check("mean", mean)
    nu = domains.check("variance", variance)
    ap = domains.check("alpha_prime", alpha_prime)
    a = math.sqrt(nu / (q * nu + q * (1.0 - q) * (mu - ap) ** 2))
    b = mu - a * (q * mu + (1.0 - q) * ap)
    return AlphaDropout(q, ap, a, b, mu, nu)
