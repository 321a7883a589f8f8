"""Jacobian spectrum and dynamical isometry (Pennington, Schoenholz & Ganguli 2017, 2018).

Setting
-------
A depth-L network ``h^l = W_l phi(h^{l-1}) + b_l`` at its variance fixed point
q* has input-output Jacobian ``J = prod_l W_l D_{l-1}`` with
``D = diag(phi'(h))``. The spectrum of ``J J^T`` (squared singular values)
is, at large width, the free multiplicative convolution of L copies of the
spectra of ``W W^T`` and ``D^2`` (Pennington, Schoenholz & Ganguli 2017,
section 2).

Normalisation and moments
-------------------------
Let ``mu_k = E[phi'(sqrt(q*) z)^(2k)]``, so that ``D^2`` has mean mu_1 and
second moment mu_2, and ``chi_1 = sigma_w2 mu_1``. For free positive
elements a, b, ``phi(abab) = phi(a^2) phi(b)^2 + phi(a)^2 phi(b^2) -
phi(a)^2 phi(b)^2``; writing each factor as its mean times a factor of mean
1, the means multiply and the *normalised variances* ``s = var / mean^2``
add (``s_ab = s_a + s_b``). With

* ``s_D = mu_2 / mu_1^2 - 1`` for ``D^2``;
* ``s_W = 1`` for Gaussian W (W W^T is Wishart of ratio 1:
  Marchenko-Pastur, second moment twice the squared mean), ``s_W = 0`` for
  orthogonal W (W W^T = sigma_w2 I);

the spectrum of J J^T has

    mean      m_1 = chi_1^L,
    variance  sigma^2 = m_1^2 L (s_D + s_W):

Gaussian weights ``L mu_2 / mu_1^2`` and orthogonal weights
``L (mu_2 / mu_1^2 - 1)`` in units where the mean is 1 (``chi_1 = 1``, the
edge of chaos). These are eqs. (15)-(16) of Pennington, Schoenholz & Ganguli
2017 in the form ``sigma^2 = L (mu_2 / mu_1^2 - 1 - s_1)`` with
``s_1 = -1`` (Gaussian) and ``s_1 = 0`` (orthogonal) (equation numbers from
memory); Pennington, Schoenholz & Ganguli 2018 show the whole spectrum is
governed by these few moments.

Consequences (dynamical isometry)
---------------------------------
* Gaussian weights: ``sigma^2 >= L`` always; no isometry at depth.
* Orthogonal weights: ``sigma^2 = L (mu_2 / mu_1^2 - 1)``, which tends to 0 as
  q* -> 0 for activations with ``phi'(0) != 0`` and smooth near 0 (tanh, erf,
  hard tanh): there, small q* on the edge of chaos gives near-isometry
  (small q* also makes the network nearly linear).
* ReLU: ``phi'^2`` is 0 or 1 with probability 1/2 at every q*, so
  ``mu_2 / mu_1^2 = 2`` and ``sigma^2 = L`` (orthogonal) or ``2L``
  (Gaussian) for any q*: no isometry is possible.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..vocabulary import EDGE_TOLERANCE
from ..activations.base import Activation
from ..activations.resolver import resolve
from ..meanfield.edge import edge_of_chaos
from ..errors import (
    ComputationError,
    InvalidParameterError,
    check_int,
    check_nonnegative,
    check_positive,
)
from ..meanfield.maps import derivative_second_moment
from ..numerics import roots
from ..numerics.quadrature import DEFAULT_RULE, QuadratureRule, gaussian_expectation
from ..results import Result

__all__ = [
    "DEFAULT_MAX_VARIANCE",
    "MAX_SAMPLE_WORK",
    "WEIGHT_KINDS",
    "IsometryAdvice",
    "JacobianSpectrum",
    "SampledSpectrum",
    "derivative_moments",
    "dynamical_isometry",
    "jacobian_spectrum",
    "sample_jacobian_spectrum",
]

#: names that moved to :mod:`propcalc.variants.spectrum_sampling` (the seeded check), still
#: importable from here
_SAMPLING = ("MAX_SAMPLE_WORK", "SampledSpectrum", "sample_jacobian_spectrum")

WEIGHT_KINDS = ("gaussian", "orthogonal")
#: target normalised spectral variance for "near-isometry" (common practice, no source)
DEFAULT_MAX_VARIANCE = 0.25
_S_W = {"gaussian": 1.0, "orthogonal": 0.0}


def derivative_moments(act: Activation, q: float,
                       rule: QuadratureRule = DEFAULT_RULE) -> tuple[float, float]:
    """(mu_1, mu_2) = (E[phi'(sqrt(q) z)^2], E[phi'(sqrt(q) z)^4]).

    Raises
    ------
    ComputationError
        If phi jumps (phi' has a Dirac mass, the moments are infinite).
    """
    qf = check_positive("q_star", q)
    if act.has_jumps:
        raise ComputationError(f"{act.label} jumps, so phi' has a Dirac mass and "
                               "E[phi'^2], E[phi'^4] are infinite: no Jacobian spectrum")
    mu1 = float(derivative_second_moment(act, qf, rule))
    mu2 = float(gaussian_expectation(lambda x: act.derivative(x) ** 4, qf, act.breakpoints,
                                     rule=rule, what=f"derivative of {act.label}, to the 4th,"))
    if mu1 <= 0.0:
        raise ComputationError(f"E[phi'^2] = 0 at q* = {qf:.6g}: no gradient passes")
    return mu1, mu2


@dataclass(frozen=True)
class JacobianSpectrum(Result):
    """Mean and variance of the spectrum of J J^T for a depth-L network.

    Attributes
    ----------
    activation : str
    depth : int
    q_star, sigma_w2 : float
    sigma_b2 : float or None
        The edge-of-chaos bias variance when sigma_w2 came from the line.
    mu_1, mu_2 : float
        E[phi'^2] and E[phi'^4] at q*.
    moment_ratio : float
        mu_2 / mu_1^2 (>= 1).
    chi_1 : float
        sigma_w2 mu_1.
    mean : float
        chi_1^L, the mean squared singular value of J.
    normalized_variance_gaussian, normalized_variance_orthogonal : float
        Variance / mean^2: ``L mu_2 / mu_1^2`` and ``L (mu_2 / mu_1^2 - 1)``.
    variance_gaussian, variance_orthogonal : float
        Absolute variances, mean^2 times the normalised ones.
    notes : tuple of str
    """

    activation: str
    depth: int
    q_star: float
    sigma_w2: float
    sigma_b2: float | None
    mu_1: float
    mu_2: float
    moment_ratio: float
    chi_1: float
    mean: float
    normalized_variance_gaussian: float
    normalized_variance_orthogonal: float
    variance_gaussian: float
    variance_orthogonal: float
    notes: tuple[str, ...] = ()

    def normalized_variance(self, weights: str) -> float:
        """The normalised variance for "gaussian" or "orthogonal" weights."""
        return {"gaussian": self.normalized_variance_gaussian,
                "orthogonal": self.normalized_variance_orthogonal}[_weights(weights)]


def _weights(kind: str) -> str:
    if kind not in WEIGHT_KINDS:
        raise InvalidParameterError("weights", f"one of {', '.join(WEIGHT_KINDS)}", kind)
    return kind


def _safe_pow(base: float, n: int) -> float:
    if base == 0.0:
        return 0.0
    log = n * math.log(base)
    return math.inf if log > 709.0 else math.exp(log)


def jacobian_spectrum(act: Activation | str, depth: int, q_star: float = 1.0,
                      sigma_w2: float | None = None,
                      rule: QuadratureRule = DEFAULT_RULE) -> JacobianSpectrum:
    """Mean and variance of the squared singular values of the input-output Jacobian.

    Parameters
    ----------
    act : str or Activation
        A built-in name, a formula in x, or an Activation (resolved once here).
    depth : int
        L >= 1.
    q_star : float
        The pre-activation variance every layer sits at.
    sigma_w2 : float, optional
        Default: the edge of chaos through q* (``1 / mu_1``, so the mean is 1);
        then q* must be reachable with sigma_b2 >= 0.

    Returns
    -------
    JacobianSpectrum

    Raises
    ------
    ComputationError
        If phi jumps, or sigma_w2 is not given and q* is not on the edge of
        chaos with sigma_b2 >= 0.
    """
    act = resolve(act)
    n = check_int("depth", depth, 1)
    q = check_positive("q_star", q_star)
    mu1, mu2 = derivative_moments(act, q, rule)
    notes: list[str] = []
    sb = None
    if sigma_w2 is None:
        cp = edge_of_chaos(act, q, rule)
        if not cp.valid or cp.sigma_w2 is None:
            raise ComputationError(f"q* = {q:g} is not on the edge of chaos of {act.label}: "
                                   f"{cp.message}; pass sigma_w2")
        sw, sb = float(cp.sigma_w2), cp.sigma_b2
        notes.append(f"edge of chaos through q* = {q:g}: sigma_w2 = {sw:.6g}, "
                     f"sigma_b2 = {sb:.6g}, so chi_1 = 1 and the mean is 1")
    else:
        sw = check_positive("sigma_w2", sigma_w2)
    ratio = mu2 / (mu1 * mu1)
    chi1 = sw * mu1
    mean = _safe_pow(chi1, n)
    s_d = max(ratio - 1.0, 0.0)
    ng = n * (s_d + _S_W["gaussian"])
    no = n * (s_d + _S_W["orthogonal"])
    m2 = mean * mean
    notes.append("variances add under free multiplicative convolution "
                 "(Pennington, Schoenholz & Ganguli 2017): Gaussian L mu_2/mu_1^2, "
                 "orthogonal L (mu_2/mu_1^2 - 1), in units of the squared mean")
    if abs(chi1 - 1.0) > EDGE_TOLERANCE:
        notes.append(f"chi_1 = {chi1:.6g} != 1: the mean {mean:.6g} is not 1 (off the edge of "
                     "chaos); the normalised variances still hold")
    return JacobianSpectrum(act.label, n, q, sw, sb, mu1, mu2, ratio, chi1, mean, ng, no,
                            m2 * ng if math.isfinite(m2) else math.inf,
                            m2 * no if math.isfinite(m2) else math.inf, tuple(notes))


@dataclass(frozen=True)
class IsometryAdvice(Result):
    """Where (if anywhere) a depth-L network has a near-isometric Jacobian.

    Attributes
    ----------
    activation : str
    depth : int
    max_variance : float
        The target: normalised spectral variance at most this.
    achievable : bool
        True if some q* on the edge of chaos meets the target with
        orthogonal weights.
    weights : str
        The advised weights ("orthogonal": Gaussian weights add L to the
        variance whatever the activation).
    q_star : float or None
        The largest q* (least linear network) on the edge of chaos in the
        scanned range that meets the target; None if none does.
    sigma_w2, sigma_b2 : float or None
        The edge-of-chaos point at that q*.
    spectrum : JacobianSpectrum or None
        At that q*.
    ratio_at_small_q, ratio_at_large_q : float
        mu_2 / mu_1^2 at the ends of the scanned q* range.
    ratio_constant : bool
        True if mu_2 / mu_1^2 does not depend on q* (ReLU and other piecewise
        linear activations).
    message : str
    """

    activation: str
    depth: int
    max_variance: float
    achievable: bool
    weights: str
    q_star: float | None
    sigma_w2: float | None
    sigma_b2: float | None
    spectrum: JacobianSpectrum | None
    ratio_at_small_q: float
    ratio_at_large_q: float
    ratio_constant: bool
    message: str


def dynamical_isometry(act: Activation | str, depth: int,
                       max_variance: float = DEFAULT_MAX_VARIANCE,
                       q_range: tuple[float, float] = (1e-6, 1e2),
                       rule: QuadratureRule = DEFAULT_RULE) -> IsometryAdvice:
    """Advise weights and q* for a near-isometric Jacobian (Pennington et al. 2017).

    Scans q* over ``q_range`` (log grid, 81 points) on the edge of chaos
    (points that need sigma_b2 < 0 are skipped), and returns the largest q*
    whose orthogonal-weight variance ``L (mu_2/mu_1^2 - 1)`` is at most
    ``max_variance`` (refined by Brent's method between grid points).

    Parameters
    ----------
    act : str or Activation
        A built-in name, a formula in x, or an Activation (resolved once here).
    depth : int
    max_variance : float
        Target normalised variance (default 0.25; common practice, no source).
    q_range : (float, float)
        0 < lo < hi.

    Returns
    -------
    IsometryAdvice
    """
    act = resolve(act)
    n = check_int("depth", depth, 1)
    target = check_nonnegative("max_variance", max_variance)
    lo = check_positive("q_range[0]", q_range[0])
    hi = check_positive("q_range[1]", q_range[1])
    if not lo < hi:
        raise InvalidParameterError("q_range", "(lo, hi) with lo < hi", tuple(q_range))
    if act.has_jumps:
        raise ComputationError(f"{act.label} jumps: phi' has a Dirac mass, no Jacobian spectrum")
    grid = np.geomspace(lo, hi, 81)
    moments = [derivative_moments(act, float(q), rule) for q in grid]
    ratios = np.array([m2 / (m1 * m1) for m1, m2 in moments])
    constant = bool(np.ptp(ratios) <= 1e-9 * ratios.max())

    def orth_var(q: float) -> float:
        m1, m2 = derivative_moments(act, q, rule)
        return n * (m2 / (m1 * m1) - 1.0)

    valid = np.array([edge_of_chaos(act, float(q), rule).valid for q in grid])
    ok = valid & (n * (ratios - 1.0) <= target)
    common = dict(activation=act.label, depth=n, max_variance=target, weights="orthogonal",
                  ratio_at_small_q=float(ratios[0]), ratio_at_large_q=float(ratios[-1]),
                  ratio_constant=constant)
    if not np.any(ok):
        if constant:
            msg = (f"none possible: mu_2/mu_1^2 = {ratios[0]:.6g} at every q* (phi'^2 takes "
                   "fixed values whose frequencies do not depend on q*), so the spectral variance "
                   f"is {n * (ratios[0] - 1):.4g} with orthogonal and {n * ratios[0]:.4g} with "
                   f"Gaussian weights for any q*; it grows like L")
        else:
            best = float(np.min(n * (ratios[valid] - 1.0))) if np.any(valid) else math.inf
            msg = (f"no q* in [{lo:g}, {hi:g}] on the edge of chaos reaches a normalised "
                   f"variance <= {target:g} at depth {n} (smallest: {best:.4g} with orthogonal "
                   "weights); use fewer layers or accept a wider spectrum")
        return IsometryAdvice(achievable=False, q_star=None, sigma_w2=None, sigma_b2=None,
                              spectrum=None, message=msg, **common)
    i = int(np.flatnonzero(ok)[-1])
    q_best = float(grid[i])
    if i + 1 < grid.size and valid[i + 1] and not ok[i + 1]:
        q_best = roots.brent(lambda q: orth_var(q) - target, float(grid[i]), float(grid[i + 1]),
                             rtol=1e-12)
        if not edge_of_chaos(act, q_best, rule).valid:
            q_best = float(grid[i])
    spec = jacobian_spectrum(act, n, q_best, rule=rule)
    msg = (f"use orthogonal weights at q* = {q_best:.4g} (sigma_w2 = {spec.sigma_w2:.6g}, "
           f"sigma_b2 = {spec.sigma_b2:.4g}): normalised spectral variance "
           f"{spec.normalized_variance_orthogonal:.4g} <= {target:g}; Gaussian weights would give "
           f"{spec.normalized_variance_gaussian:.4g} (always >= L = {n}). Smaller q* is closer to "
           "isometry but makes the network more nearly linear")
    return IsometryAdvice(achievable=True, q_star=q_best, sigma_w2=spec.sigma_w2,
                          sigma_b2=spec.sigma_b2, spectrum=spec, message=msg, **common)


def __getattr__(name: str) -> object:
    """The seeded check's names, from :mod:`propcalc.variants.spectrum_sampling` (PEP 562)."""
    if name in _SAMPLING:
        from . import spectrum_sampling
        return getattr(spectrum_sampling, name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
