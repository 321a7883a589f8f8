"""The softmax output layer at initialisation: expected loss and confidence.

At initialisation the K logits of an input are, at large width,
``l_j ~ N(0, s2)`` iid, with ``s2 = sigma_w2 E[phi(h)^2] + sigma_b2`` set by
the last layer's weights and the penultimate activations' second moment.
The label y is fixed, so ``E[l_y] = 0`` and the expected cross-entropy is

    E[loss] = E[log sum_j exp(l_j) - l_y] = E[log S],  S = sum_j exp(l_j).

One-dimensional representation (used here)
-------------------------------------------
Frullani's integral ``log S = int_0^inf (e^{-t} - e^{-t S}) dt / t`` (S > 0)
and the independence of the logits give, with ``t = e^v``,

    E[log S] = int_R [exp(-e^v) - L(e^v)^K] dv,
    L(t) = E[exp(-t e^{sqrt(s2) z})]  (the Laplace transform of a lognormal),

an outer integral over v (Gauss-Legendre panels of width 1) of an inner
Gaussian expectation, computed per v with
:func:`propcalc.quadrature.gaussian_expectation` (its panels grade towards
the point where ``v + sqrt(s2) z`` crosses 0, where ``exp(-e^x)`` turns
over). The difference is formed as ``-exp(-e^v) expm1(K log1p(-A) + e^v)``
with ``A = 1 - L`` computed directly, so nothing cancels at small t. The
integrand decays like ``e^v`` for v -> -inf and like ``Phi(-v / sqrt(s2))^K``
for v -> +inf; the range is cut where both are below 1e-17.

Checks. K = 2: ``loss = softplus(l_2 - l_1)`` with ``l_2 - l_1 ~ N(0, 2 s2)``,
a 1-D expectation. Small s2: with ``l_j = sigma z_j``,
``log((1/K) sum_j e^{l_j}) = eps - eps^2/2 + O(sigma^3)``,
``eps = sigma zbar + sigma^2 m_2 / 2`` (``zbar`` the mean and ``m_2`` the
mean square of the z_j); ``E[eps] = s2 / 2`` and ``E[eps^2] = s2 / K + O(s2^2)``,
so (a second-order Taylor / delta-method expansion)

    E[loss] = ln K + s2 (K - 1) / (2 K) + O(s2^2).

The expected largest class probability ``E[max_j p_j]`` has no such
representation here: it is estimated by seeded Monte Carlo with its standard
error, except for K = 2 where ``max p = expit(|l_1 - l_2|)`` is a 1-D
expectation.

Target. An initial loss close to ``ln K`` (the loss of uniform predictions)
is common practice, no source; the recommended last-layer weight variance
is the largest whose expected initial loss stays within ``margin`` of ln K.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
from scipy import special

from ..activations.base import Activation
from ..activations.resolver import resolve
from ..errors import (
    ComputationError,
    InvalidParameterError,
    check_int,
    check_nonnegative,
    check_positive,
)
from ..meanfield.maps import second_moment
from ..numerics import roots
from ..numerics.quadrature import DEFAULT_RULE, QuadratureRule, gaussian_expectation, legendre_rule
from ..results import Result

__all__ = [
    "MAX_CLASSES",
    "MAX_LOGIT_VARIANCE",
    "InitialLoss",
    "MaxProbability",
    "OutputLayerScale",
    "expected_initial_loss",
    "initial_loss",
    "max_class_probability",
    "output_layer_for_plan",
    "output_layer_scale",
]

#: largest number of classes accepted
MAX_CLASSES = 10**7
#: largest logit variance accepted (the loss is then about sqrt(s2) E[max z], far from ln K)
MAX_LOGIT_VARIANCE = 1e4
_MC_MAX_ELEMENTS = 5 * 10**7
_TARGET_NOTE = "an initial loss near ln K is common practice, no source"


def _classes(k: Any) -> int:
    return check_int("n_classes", k, 2, MAX_CLASSES)


def _variance(s2: Any) -> float:
    v = check_nonnegative("logit_variance", s2)
    if v > MAX_LOGIT_VARIANCE:
        raise InvalidParameterError("logit_variance", f"<= {MAX_LOGIT_VARIANCE:g}", s2)
    return v


def expected_initial_loss(n_classes: int, logit_variance: float,
                          rule: QuadratureRule = DEFAULT_RULE) -> float:
    """E[log sum_j exp(l_j) - l_y] for K iid N(0, s2) logits (module docstring).

    Parameters
    ----------
    n_classes : int
        K >= 2.
    logit_variance : float
        s2 in [0, 1e4].

    Returns
    -------
    float
        ln K at s2 = 0.
    """
    k = _classes(n_classes)
    s2 = _variance(logit_variance)
    if s2 == 0.0:
        return math.log(k)
    sigma = math.sqrt(s2)
    # for v -> -inf the integrand is K A(e^v) <= K E[e^{v + sigma z}] (z within the rule's
    # +-10 truncation): below lo it is < 1e-17
    lo = -(40.0 + min(0.5 * s2, 10.0 * sigma) + math.log(k))
    hi = 10.0 * sigma + 5.0 + math.sqrt(2.0 * math.log(k)) * sigma
    # width-1 panels where exp(-e^v) turns over; beyond v = 8 the integrand is -L(e^v)^K,
    # which changes on the scale sqrt(s2)
    mid = min(8.0, hi)
    edges = np.linspace(lo, mid, int(math.ceil(mid - lo)) + 1)
    if hi > mid:
        width = max(1.0, sigma / 8.0)
        edges = np.concatenate([edges, np.linspace(mid, hi, int(math.ceil((hi - mid) / width))
                                                   + 1)[1:]])
    t, w = legendre_rule(rule.n_per_panel)
    half = 0.5 * (edges[1:] - edges[:-1])
    v = ((0.5 * (edges[1:] + edges[:-1]))[:, None] + half[:, None] * t).ravel()
    wv = (half[:, None] * w).ravel()
    # A(v) = 1 - L(e^v) and L(e^v) itself, by the Gaussian rule with mean v (x = v + sigma z);
    # exp(-e^x) is doubly exponential on one side: half-width panels keep it at rounding level
    inner = replace(rule, panel_width=rule.panel_width / 2.0)
    a = gaussian_expectation(lambda x: -np.expm1(-np.exp(np.minimum(x, 700.0))), s2, mean=v,
                             rule=inner, check_tails=False, what="1 - exp(-e^x)")
    lap = gaussian_expectation(lambda x: np.exp(-np.exp(np.minimum(x, 700.0))), s2, mean=v,
                               rule=inner, check_tails=False, what="exp(-e^x)")
    a = np.clip(a, 0.0, 1.0)
    with np.errstate(divide="ignore"):
        # log L: from A while L is near 1 (no cancellation), from L once it is small
        log_l = np.where(a < 0.5, np.log1p(-np.minimum(a, 0.5)),
                         np.log(np.maximum(lap, 0.0)))
    ev = np.exp(np.minimum(v, 700.0))
    with np.errstate(over="ignore", invalid="ignore", under="ignore"):
        l_k = np.exp(k * log_l)
        small_t = -np.exp(-ev) * np.expm1(k * log_l + ev)
        integrand = np.where(ev < 1.0, small_t, np.exp(-ev) - l_k)
    out = float(np.sum(wv * integrand))
    if not math.isfinite(out):
        raise ComputationError(f"the expected loss for K = {k}, s2 = {s2:g} is not finite")
    return out


def _small_variance(k: int, s2: float) -> float:
    # second-order expansion: ln K + s2 (K - 1) / (2K) (module docstring)
    return math.log(k) + s2 * (k - 1) / (2.0 * k)


@dataclass(frozen=True)
class InitialLoss(Result):
    """Expected initial cross-entropy for K classes and logit variance s2.

    Attributes
    ----------
    n_classes : int
    logit_variance : float
    expected_loss : float
        E[log sum exp(l) - l_y], by quadrature (exact to ~1e-12).
    log_classes : float
        ln K, the loss of uniform predictions (the usual target: common
        practice, no source).
    excess : float
        expected_loss - ln K (>= 0).
    small_variance_approximation : float
        ln K + s2 (K - 1) / (2K), accurate to O(s2^2).
    method : str
    target_note : str
        Why ln K is the target (a constant).
    """

    n_classes: int
    logit_variance: float
    expected_loss: float
    log_classes: float
    excess: float
    small_variance_approximation: float
    method: str
    target_note: str = field(default=_TARGET_NOTE, init=False)


def initial_loss(n_classes: int, logit_variance: float,
                 rule: QuadratureRule = DEFAULT_RULE) -> InitialLoss:
    """The expected initial loss against ln K (see :func:`expected_initial_loss`).

    Parameters
    ----------
    n_classes : int
        K >= 2.
    logit_variance : float
        Variance of each of the K independent logits at initialisation, >= 0.
    rule : QuadratureRule

    Returns
    -------
    InitialLoss
    """
    k = _classes(n_classes)
    s2 = _variance(logit_variance)
    val = expected_initial_loss(k, s2, rule)
    return InitialLoss(k, s2, val, math.log(k), val - math.log(k), _small_variance(k, s2),
                       "quadrature: Frullani representation, 1-D outer integral of a "
                       "Gaussian expectation")


@dataclass(frozen=True)
class MaxProbability(Result):
    """Expected largest class probability E[max_j softmax(l)_j] at initialisation.

    Attributes
    ----------
    n_classes : int
    logit_variance : float
    value : float
    standard_error : float
        0 for the exact K = 2 quadrature; the Monte Carlo standard error otherwise.
    method : str
        "quadrature" (K = 2) or "monte carlo".
    n_samples : int or None
    seed : int or None
    uniform : float
        1 / K, the value for uniform predictions.
    """

    n_classes: int
    logit_variance: float
    value: float
    standard_error: float
    method: str
    n_samples: int | None
    seed: int | None
    uniform: float


def max_class_probability(n_classes: int, logit_variance: float, n_samples: int = 100_000,
                          seed: int = 0, rule: QuadratureRule = DEFAULT_RULE) -> MaxProbability:
    """E[max_j p_j] for softmax of K iid N(0, s2) logits.

    K = 2: ``max(p_1, p_2) = expit(|l_1 - l_2|)``, ``l_1 - l_2 ~ N(0, 2 s2)``, by
    1-D quadrature. K > 2: seeded Monte Carlo (``numpy.random.default_rng(seed)``)
    with ``n_samples`` draws, and its standard error.

    Parameters
    ----------
    n_classes : int
    logit_variance : float
    n_samples : int
        Monte Carlo draws (n_samples * K <= 5e7).
    seed : int
    """
    k = _classes(n_classes)
    s2 = _variance(logit_variance)
    if s2 == 0.0:
        return MaxProbability(k, s2, 1.0 / k, 0.0, "exact (s2 = 0)", None, None, 1.0 / k)
    if k == 2:
        val = float(gaussian_expectation(lambda x: special.expit(np.abs(x)), 2.0 * s2, (0.0,),
                                         rule=rule, what="expit(|x|)"))
        return MaxProbability(k, s2, val, 0.0, "quadrature", None, None, 0.5)
    n = check_int("n_samples", n_samples, 2)
    sd = check_int("seed", seed, 0)
    if n * k > _MC_MAX_ELEMENTS:
        raise InvalidParameterError("n_samples", f"<= {_MC_MAX_ELEMENTS // k} for "
                                    f"{k} classes (n_samples * n_classes <= 5e7)", n_samples)
    rng = np.random.default_rng(sd)
    sigma = math.sqrt(s2)
    chunk = max(1, 2_000_000 // k)
    total = 0.0
    total_sq = 0.0
    done = 0
    while done < n:
        m = min(chunk, n - done)
        logits = sigma * rng.standard_normal((m, k))
        # max p = 1 / sum_j exp(l_j - max l)
        pmax = 1.0 / np.sum(np.exp(logits - logits.max(axis=1, keepdims=True)), axis=1)
        total += float(pmax.sum())
        total_sq += float(np.sum(pmax * pmax))
        done += m
    mean = total / n
    var = max(total_sq / n - mean * mean, 0.0) * n / (n - 1)
    return MaxProbability(k, s2, mean, math.sqrt(var / n), "monte carlo", n, sd, 1.0 / k)


@dataclass(frozen=True)
class OutputLayerScale(Result):
    """The last layer's weight scale that keeps the initial loss near ln K.

    Attributes
    ----------
    n_classes : int
    margin : float
        Allowed excess over ln K, in nats.
    penultimate_second_moment : float
        E[phi(h)^2] of the penultimate activations.
    sigma_b2 : float
        Bias variance of the last layer.
    max_logit_variance : float
        The s2 at which E[loss] = ln K + margin.
    sigma_w2 : float
        (max_logit_variance - sigma_b2) / penultimate_second_moment: the largest
        last-layer weight variance times fan-in meeting the margin.
    weight_std : float or None
        sqrt(sigma_w2 / fan_in) when fan_in is given.
    loss_at_scale : InitialLoss
    max_probability_at_scale : MaxProbability
    current : InitialLoss or None
        The loss with the last layer as planned (when known).
    notes : tuple of str
    """

    n_classes: int
    margin: float
    penultimate_second_moment: float
    sigma_b2: float
    max_logit_variance: float
    sigma_w2: float
    weight_std: float | None
    loss_at_scale: InitialLoss
    max_probability_at_scale: MaxProbability
    current: InitialLoss | None
    notes: tuple[str, ...] = ()


def _max_variance_for_margin(k: int, margin: float, rule: QuadratureRule) -> float:
    ln_k = math.log(k)

    def gap(s2: float) -> float:
        return expected_initial_loss(k, s2, rule) - ln_k - margin

    # E[loss] increases with s2 (log-sum-exp is convex and the logits symmetric)
    guess = 2.0 * k * margin / (k - 1)  # from the small-s2 expansion
    hi = max(guess, 1e-12)
    while gap(hi) < 0.0:
        if hi >= MAX_LOGIT_VARIANCE:
            raise ComputationError(f"margin {margin:g} is not reached for s2 <= "
                                   f"{MAX_LOGIT_VARIANCE:g}")
        hi = min(hi * 4.0, MAX_LOGIT_VARIANCE)
    lo = hi / 4.0
    while lo > 1e-300 and gap(lo) > 0.0:
        lo /= 4.0
    return roots.brent(gap, lo, hi, rtol=1e-12)


def output_layer_scale(n_classes: int, penultimate_second_moment: float,
                       margin: float | None = None, sigma_b2: float = 0.0,
                       fan_in: int | None = None, current_sigma_w2: float | None = None,
                       current_sigma_b2: float | None = None, n_samples: int = 100_000,
                       seed: int = 0,
                       rule: QuadratureRule = DEFAULT_RULE) -> OutputLayerScale:
    """The largest last-layer sigma_w2 whose expected initial loss is within ``margin`` of ln K.

    Parameters
    ----------
    n_classes : int
    penultimate_second_moment : float
        E[phi(h)^2] of the activations feeding the last layer, > 0.
    margin : float, optional
        Allowed excess in nats; default 1% of ln K (common practice, no source).
    sigma_b2 : float
        The last layer's bias variance (0 is usual); must be below the
        logit variance the margin allows.
    fan_in : int, optional
        Width of the penultimate layer, for the weight std.
    current_sigma_w2, current_sigma_b2 : float, optional
        The last layer's planned variances, to report their loss too
        (current_sigma_b2 defaults to sigma_b2).
    n_samples, seed : int
        For the Monte Carlo estimate of the largest class probability.

    Returns
    -------
    OutputLayerScale
    """
    if current_sigma_b2 is not None and current_sigma_w2 is None:  # it would be ignored
        raise InvalidParameterError("current_sigma_b2", "absent without current_sigma_w2 (the "
                                    "two describe the planned last layer whose loss is "
                                    "reported)", current_sigma_b2)
    k = _classes(n_classes)
    m2 = check_positive("penultimate_second_moment", penultimate_second_moment)
    mg = 0.01 * math.log(k) if margin is None else check_positive("margin", margin)
    sb = check_nonnegative("sigma_b2", sigma_b2)
    s2_max = _max_variance_for_margin(k, mg, rule)
    if sb >= s2_max:
        raise ComputationError(f"sigma_b2 = {sb:g} alone gives a logit variance above "
                               f"{s2_max:.6g}, the most that keeps the loss within {mg:g} of "
                               "ln K: lower the last layer's bias variance")
    sw = (s2_max - sb) / m2
    std = None if fan_in is None else math.sqrt(sw / check_int("fan_in", fan_in, 1))
    current = None
    notes = [f"target: expected initial loss <= ln K + {mg:.4g} (ln K = {math.log(k):.6g}); "
             + _TARGET_NOTE]
    if current_sigma_w2 is not None:
        csw = check_positive("current_sigma_w2", current_sigma_w2)
        csb = sb if current_sigma_b2 is None else check_nonnegative("current_sigma_b2",
                                                                    current_sigma_b2)
        s2_now = csw * m2 + csb
        if s2_now > MAX_LOGIT_VARIANCE:
            notes.append(f"the planned last layer gives logit variance {s2_now:.4g}, beyond "
                         "the computed range")
        else:
            current = initial_loss(k, s2_now, rule)
            notes.append(f"as planned (sigma_w2 = {csw:.6g}) the logit variance is {s2_now:.4g} "
                         f"and the expected initial loss {current.expected_loss:.4g} "
                         f"({current.excess:+.4g} nats from ln K)")
    loss = initial_loss(k, s2_max, rule)
    pmax = max_class_probability(k, s2_max, n_samples, seed, rule)
    notes.append(f"last layer: sigma_w2 <= {sw:.6g} (logit variance {s2_max:.6g})")
    return OutputLayerScale(k, mg, m2, sb, s2_max, sw, std, loss, pmax, current, tuple(notes))


def output_layer_for_plan(plan: Any, act: Activation | str, n_classes: int,
                          margin: float | None = None, n_samples: int = 100_000, seed: int = 0,
                          rule: QuadratureRule = DEFAULT_RULE) -> OutputLayerScale:
    """:func:`output_layer_scale` for the last layer of an :class:`propcalc.InitPlan`.

    The penultimate activations have second moment ``E[phi(sqrt(q*) z)^2]``
    at the plan's q*; the plan's own last layer (its sigma_w2 and sigma_b2) is
    reported as ``current``. The recommendation sets the last layer's bias
    variance to 0 (a bias adds logit variance without carrying any signal).

    Parameters
    ----------
    plan : InitPlan
    act : str or Activation
        The plan's activation: a built-in name, a formula in x, or an Activation
        (resolved once here).
    n_classes : int
    """
    act = resolve(act)
    if getattr(plan, "q_star", None) is None or not getattr(plan, "layers", None):
        raise InvalidParameterError("plan", "an InitPlan with a finite q_star", plan)
    if plan.activation != act.label:
        raise InvalidParameterError("act", f"the plan's activation ({plan.activation})", act.label)
    m2 = float(second_moment(act, float(plan.q_star), rule))
    last = plan.layers[-1]
    fan_in = last.layer.fan_in if last.layer is not None else None
    return output_layer_scale(n_classes, m2, margin, 0.0, fan_in, last.sigma_w2, last.sigma_b2,
                              n_samples, seed, rule)
