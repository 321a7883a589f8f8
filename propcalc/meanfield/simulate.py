"""Finite-width check of the mean-field predictions on seeded random networks.

A network ``h^l = W_l phi(h^{l-1}) + b_l`` (l = 1..L) with
``W_ij ~ N(0, sigma_w2 / N)`` and ``b_i ~ N(0, sigma_b2)`` of width N is
drawn from :func:`numpy.random.default_rng` streams derived from one seed
(:class:`numpy.random.SeedSequence`, one child per repetition and layer). Each
network receives ``n_pairs`` pairs of inputs, given directly as layer-0
pre-activations with *exactly* the chosen mean square q0 and correlation c0
(Gram-Schmidt on Gaussian vectors), and a random unit vector v at the top is
back-propagated (``g^L = v``, ``g^{l-1} = phi'(h^{l-1}) * (W_l^T g^l)``).

Measured per layer l and repetition:

* ``q_l = (|h_a^l|^2 + |h_b^l|^2) / (2 N)``,
* ``c_l = h_a^l . h_b^l / (|h_a^l| |h_b^l|)`` (1 when both vectors are 0, as in a
  network whose units all died),
* ``G_l = |g^l|^2``, the squared norm of the gradient of ``v . h^L`` with
  respect to ``h^l`` (the Jacobian-vector growth from layer l to the top),

each averaged over the pairs of a network. Predicted (infinite width):
``q_l = V(q_{l-1})``, ``c_l = C(c_{l-1})`` at variance ``q_{l-1}``
(:func:`propcalc.maps.variance_map`, :func:`propcalc.maps.correlation_map`;
Poole et al. 2016), and ``G_l = prod_{m=l}^{L-1} chi_1(q_m)``
(:func:`propcalc.maps.chi_1`; Schoenholz et al. 2017).

Comparison. Over the repetitions: the mean with a band of +-2 standard
errors, and for the positive quantities q and G also the geometric mean
(mean of logs) with its +-2 standard-error band: at small width the typical
network (geometric mean) drifts away from the mean-field value long before
the ensemble mean does (the log of a product of many noisy factors drifts
like -L var / 2). A layer shows a *visible deviation* when the prediction
lies outside a band widened by ``tolerance``: ``|measured - predicted| >
2 SE + tolerance |predicted|`` for the means of q and G,
``|mean log - log predicted| > 2 SE + ln(1 + tolerance)`` for their geometric
means, ``|measured - predicted| > 2 SE + tolerance`` for c. So the deviation
must be both statistically clear and practically large: neither sampling
noise nor negligible finite-width corrections raise the flag. For G the
deviation grows towards layer 0 (the longest path to the top).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from .. import domains
from ..activations.base import Activation
from ..activations.resolver import resolve
from ..errors import (
    ComputationError,
    InvalidParameterError,
    check_finite,
    check_int,
    check_nonnegative,
    check_positive,
)
from .maps import chi_1 as chi_1_map
from .maps import correlation_map, variance_map
from ..numerics.quadrature import DEFAULT_RULE, QuadratureRule
from ..results import Result

__all__ = [
    "MAX_SIMULATION_WORK",
    "LayerMeasurement",
    "Simulation",
    "mean_field_trajectory",
    "simulate",
    "simulate_plan",
]

#: bound on width^2 * depth * repetitions (random numbers drawn for the weights)
MAX_SIMULATION_WORK = 2e9
_STORE_BYTES = 256 * 2**20
_MF_Q_MAX = 1e12


@dataclass(frozen=True)
class LayerMeasurement(Result):
    """Predicted and measured q, c and squared gradient norm at one layer.

    Attributes
    ----------
    index : int
        Layer l (0 = the inputs' pre-activations).
    q_predicted, q_mean, q_se : float
        Mean-field q_l; mean over repetitions and its standard error.
    q_band : (float, float)
        mean +- 2 standard errors.
    q_geometric : float
        exp(mean of log q_l), the typical network.
    q_geometric_band : (float, float)
        exp(mean log +- 2 standard errors of the log).
    c_predicted, c_mean, c_se : float
    c_band : (float, float)
    gradient_predicted, gradient_mean, gradient_se : float
        |g^l|^2: prod of chi_1 from layer l to the top; measured mean and SE.
    gradient_band : (float, float)
    gradient_geometric : float
    gradient_geometric_band : (float, float)
    q_in_band, c_in_band, gradient_in_band : bool
        The prediction lies in the mean's band (and, for q and the gradient,
        in the geometric band too).
    """

    index: int
    q_predicted: float
    q_mean: float
    q_se: float
    q_band: tuple[float, float]
    q_geometric: float
    q_geometric_band: tuple[float, float]
    c_predicted: float
    c_mean: float
    c_se: float
    c_band: tuple[float, float]
    gradient_predicted: float
    gradient_mean: float
    gradient_se: float
    gradient_band: tuple[float, float]
    gradient_geometric: float
    gradient_geometric_band: tuple[float, float]
    q_in_band: bool
    c_in_band: bool
    gradient_in_band: bool


@dataclass(frozen=True)
class Simulation(Result):
    """Mean-field predictions against seeded finite-width networks.

    Attributes
    ----------
    activation : str
    sigma_w2, sigma_b2 : float
    width, depth, repetitions, n_pairs, seed : int
    q0, c0 : float
        Mean square and correlation of the layer-0 pre-activations.
    tolerance : float
        Practical threshold of a visible deviation (relative for q and the
        gradient, absolute for c).
    layers : tuple of LayerMeasurement
        Layers 0..depth.
    max_deviation_q : float
        Largest relative deviation |measured / predicted - 1| of q (mean or
        geometric mean, whichever is larger), over the layers.
    max_deviation_c : float
        Largest |measured mean - predicted| of c.
    max_deviation_gradient : float
        Largest relative deviation of the squared gradient norm (mean or
        geometric mean).
    fraction_in_band : float
        Share of (layer, quantity) comparisons whose prediction is in band.
    deviation_visible : bool
        True if some layer shows a visible deviation (module docstring).
    first_visible_layer : int or None
        The first such layer.
    message : str
    """

    activation: str
    sigma_w2: float
    sigma_b2: float
    width: int
    depth: int
    repetitions: int
    n_pairs: int
    seed: int
    q0: float
    c0: float
    tolerance: float
    layers: tuple[LayerMeasurement, ...]
    max_deviation_q: float
    max_deviation_c: float
    max_deviation_gradient: float
    fraction_in_band: float
    deviation_visible: bool
    first_visible_layer: int | None
    message: str


def mean_field_trajectory(act: Activation | str, sigma_w2: float, sigma_b2: float, depth: int,
                          q0: float, c0: float, rule: QuadratureRule = DEFAULT_RULE
                          ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Layer-by-layer mean-field q_l, c_l (l = 0..L) and G_l = prod_{m>=l} chi_1(q_m).

    q_l by the variance map, c_l by the correlation map (Poole et al. 2016), G_l the
    product of chi_1 from layer l to the top (Schoenholz et al. 2017).

    Parameters
    ----------
    act : str, Activation or formula
        Resolved once here.
    sigma_w2 : float
        > 0.
    sigma_b2 : float
        >= 0.
    depth : int
        L >= 1.
    q0 : float
        The layer-0 pre-activation variance (the domain ``q`` of :mod:`propcalc.domains`).
    c0 : float
        The layer-0 correlation of the two inputs, in [-1, 1].
    rule : QuadratureRule

    Returns
    -------
    q, c, gradient : numpy.ndarray
        Each of length L + 1; ``gradient[L] = 1``.

    Raises
    ------
    InvalidParameterError
        For an input outside its domain, naming it (``q0``, ``c0``, ...).
    ComputationError
        If the predicted variance leaves (0, 1e12] (an exploding network) or
        phi jumps (chi_1 infinite).
    """
    act = resolve(act)
    sw = check_positive("sigma_w2", sigma_w2)
    sb = check_nonnegative("sigma_b2", sigma_b2)
    n = check_int("depth", depth, 1)
    q0 = float(domains.check("q", q0, "q0"))
    c0 = float(domains.check("c", c0, "c0"))
    if act.has_jumps:
        raise ComputationError(f"{act.label} jumps: its mean-field chi_1 is infinite while the "
                               "back-propagated gradient is 0 almost surely; nothing to compare")
    qs = np.empty(n + 1)
    cs = np.empty(n + 1)
    qs[0], cs[0] = q0, c0
    for layer in range(1, n + 1):
        qs[layer] = float(variance_map(act, qs[layer - 1], sw, sb, rule))
        if not (math.isfinite(qs[layer]) and qs[layer] <= _MF_Q_MAX):
            raise ComputationError(f"the mean-field variance exceeds {_MF_Q_MAX:g} at layer "
                                   f"{layer}: the network explodes; lower sigma_w2 or the depth")
        c = float(correlation_map(act, cs[layer - 1], sw, sb, qs[layer - 1], rule))
        cs[layer] = min(1.0, max(-1.0, c))
    chis = np.asarray(chi_1_map(act, qs[:-1], sw, rule), dtype=float)
    grads = np.ones(n + 1)
    for layer in range(n - 1, -1, -1):
        grads[layer] = grads[layer + 1] * chis[layer]
    return qs, cs, grads


def _exact_pairs(rng: np.random.Generator, n: int, n_pairs: int, q0: float, c0: float
                 ) -> tuple[np.ndarray, np.ndarray]:
    """Pairs with empirical mean square exactly q0 and correlation exactly c0."""
    z = rng.standard_normal((n, 2 * n_pairs))
    a_out = np.empty((n, n_pairs))
    b_out = np.empty((n, n_pairs))
    s = math.sqrt(max(0.0, 1.0 - c0 * c0))
    for p in range(n_pairs):
        u = z[:, 2 * p] / np.linalg.norm(z[:, 2 * p])
        w = z[:, 2 * p + 1] - (z[:, 2 * p + 1] @ u) * u
        w /= np.linalg.norm(w)
        a_out[:, p] = math.sqrt(q0 * n) * u
        b_out[:, p] = math.sqrt(q0 * n) * (c0 * u + s * w)
    return a_out, b_out


def _layer_params(seq: np.random.SeedSequence, n: int, sw: float, sb: float
                  ) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seq)
    w = rng.standard_normal((n, n))
    w *= math.sqrt(sw / n)
    b = rng.standard_normal(n) * math.sqrt(sb)
    return w, b


def _stats(samples: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    r = samples.shape[0]
    return samples.mean(axis=0), samples.std(axis=0, ddof=1) / math.sqrt(r)


def simulate(act: Activation | str, sigma_w2: float, sigma_b2: float, *, width: int, depth: int,
             q0: float = 1.0, c0: float = 0.5, repetitions: int = 8, n_pairs: int = 4,
             seed: int = 0, tolerance: float = 0.05,
             rule: QuadratureRule = DEFAULT_RULE) -> Simulation:
    """Push input pairs through seeded random networks and compare with mean-field theory.

    Parameters
    ----------
    act : str or Activation
        A built-in name, a formula in x, or an Activation (resolved once here).
    sigma_w2, sigma_b2 : float
        The initialisation of every layer (e.g. a plan's hidden layers).
    width : int
        N >= 2, the same for every layer.
    depth : int
        L >= 1 layers.
    q0 : float
        Mean square of the layer-0 pre-activations, > 0.
    c0 : float
        Their correlation, in [-1, 1].
    repetitions : int
        Independent networks (>= 2, for the standard errors).
    n_pairs : int
        Input pairs per network (averaged within a network).
    seed : int
        Root seed of the :class:`numpy.random.SeedSequence`.
    tolerance : float
        Practical size of a visible deviation (default 5%).

    Returns
    -------
    Simulation

    Raises
    ------
    InvalidParameterError
        For out-of-range inputs, or width^2 * depth * repetitions > 2e9.
    ComputationError
        If the mean-field prediction explodes or phi jumps.
    """
    act = resolve(act)
    sw = check_positive("sigma_w2", sigma_w2)
    sb = check_nonnegative("sigma_b2", sigma_b2)
    n = check_int("width", width, 2)
    n_layers = check_int("depth", depth, 1)
    reps = check_int("repetitions", repetitions, 2)
    pairs = check_int("n_pairs", n_pairs, 1, 1024)
    sd = check_int("seed", seed, 0)
    q_in = check_positive("q0", q0)
    c_in = check_finite("c0", c0)
    if not -1.0 <= c_in <= 1.0:
        raise InvalidParameterError("c0", "in [-1, 1]", c0)
    tol = check_positive("tolerance", tolerance)
    if float(n) ** 2 * n_layers * reps > MAX_SIMULATION_WORK:
        raise InvalidParameterError("width", "such that width^2 * depth * repetitions <= "
                                    f"{MAX_SIMULATION_WORK:.0e}", n)
    q_pred, c_pred, g_pred = mean_field_trajectory(act, sw, sb, n_layers, q_in, c_in, rule)

    q_meas = np.empty((reps, n_layers + 1))
    c_meas = np.empty((reps, n_layers + 1))
    g_meas = np.empty((reps, n_layers + 1))
    store = n_layers * n * n * 8 <= _STORE_BYTES
    root = np.random.SeedSequence(sd)
    for r, rep_seq in enumerate(root.spawn(reps)):
        children = rep_seq.spawn(n_layers + 1)
        rng_in = np.random.default_rng(children[-1])
        ha, hb = _exact_pairs(rng_in, n, pairs, q_in, c_in)
        h = np.concatenate([ha, hb], axis=1)  # (N, 2P): a's then b's
        pre = [h]
        weights = []
        with np.errstate(over="ignore", invalid="ignore"):
            for layer in range(n_layers):
                w, b = _layer_params(children[layer], n, sw, sb)
                if store:
                    weights.append(w)
                h = w @ act.value(h) + b[:, None]
                pre.append(h)
            v = rng_in.standard_normal((n, pairs))
            v /= np.linalg.norm(v, axis=0)
            g = v
            g_norms = [np.sum(g * g, axis=0)]
            for layer in range(n_layers, 0, -1):
                w = weights[layer - 1] if store else _layer_params(children[layer - 1], n, sw,
                                                                   sb)[0]
                g = act.derivative(pre[layer - 1][:, :pairs]) * (w.T @ g)
                g_norms.append(np.sum(g * g, axis=0))
        g_norms.reverse()
        for layer, hl in enumerate(pre):
            a_l, b_l = hl[:, :pairs], hl[:, pairs:]
            na, nb = np.sum(a_l * a_l, axis=0), np.sum(b_l * b_l, axis=0)
            q_meas[r, layer] = float(np.mean((na + nb) / (2.0 * n)))
            with np.errstate(invalid="ignore", divide="ignore"):
                corr = np.sum(a_l * b_l, axis=0) / np.sqrt(na * nb)
            c_meas[r, layer] = float(np.mean(np.where(np.isfinite(corr), corr, 1.0)))
            g_meas[r, layer] = float(np.mean(g_norms[layer]))
    for name, arr in (("q", q_meas), ("gradient", g_meas)):
        if not np.all(np.isfinite(arr)):
            raise ComputationError(f"the simulated {name} overflowed: the finite network "
                                   "explodes; lower sigma_w2 or the depth")
    return _compare(act, sw, sb, n, n_layers, reps, pairs, sd, q_in, c_in, tol,
                    q_pred, c_pred, g_pred, q_meas, c_meas, g_meas)


def _log_stats(samples: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    with np.errstate(divide="ignore"):
        logs = np.log(np.maximum(samples, 1e-300))
    return _stats(logs)


def _rel(measured: np.ndarray, predicted: np.ndarray) -> np.ndarray:
    with np.errstate(divide="ignore", invalid="ignore"):
        out = np.abs(measured / predicted - 1.0)
    return np.where(np.isfinite(out), out, np.inf)


def _compare(act: Activation, sw: float, sb: float, n: int, n_layers: int, reps: int,
             pairs: int, sd: int, q_in: float, c_in: float, tol: float, q_pred: np.ndarray,
             c_pred: np.ndarray, g_pred: np.ndarray, q_meas: np.ndarray, c_meas: np.ndarray,
             g_meas: np.ndarray) -> Simulation:
    qm, qse = _stats(q_meas)
    qlm, qlse = _log_stats(q_meas)
    cm, cse = _stats(c_meas)
    gm, gse = _stats(g_meas)
    glm, glse = _log_stats(g_meas)
    log_qp = np.log(np.maximum(q_pred, 1e-300))
    log_gp = np.log(np.maximum(g_pred, 1e-300))

    q_in_mean = np.abs(qm - q_pred) <= 2 * qse
    q_in_geo = np.abs(qlm - log_qp) <= 2 * qlse
    c_ok = np.abs(cm - c_pred) <= 2 * cse
    g_in_mean = np.abs(gm - g_pred) <= 2 * gse
    g_in_geo = np.abs(glm - log_gp) <= 2 * glse
    # layer 0 is exact by construction, and so is the gradient at the top layer
    q_in_mean[0] = q_in_geo[0] = c_ok[0] = True
    g_in_mean[-1] = g_in_geo[-1] = True

    q_dev = np.maximum(_rel(qm, q_pred), _rel(np.exp(qlm), q_pred))
    g_dev = np.maximum(_rel(gm, g_pred), _rel(np.exp(glm), g_pred))
    c_dev = np.abs(cm - c_pred)
    q_dev[0] = c_dev[0] = g_dev[-1] = 0.0
    # visible: outside the +-2 SE band widened by the practical tolerance
    ltol = math.log1p(tol)
    visible_q = ((np.abs(qm - q_pred) > 2 * qse + tol * np.abs(q_pred))
                 | (np.abs(qlm - log_qp) > 2 * qlse + ltol))
    visible_g = ((np.abs(gm - g_pred) > 2 * gse + tol * np.abs(g_pred))
                 | (np.abs(glm - log_gp) > 2 * glse + ltol))
    visible_c = np.abs(cm - c_pred) > 2 * cse + tol
    visible_q[0] = visible_c[0] = visible_g[-1] = False
    visible = visible_q | visible_g | visible_c
    first = int(np.flatnonzero(visible)[0]) if np.any(visible) else None

    layers = []
    for i in range(n_layers + 1):
        layers.append(LayerMeasurement(
            i, float(q_pred[i]), float(qm[i]), float(qse[i]),
            (float(qm[i] - 2 * qse[i]), float(qm[i] + 2 * qse[i])), float(np.exp(qlm[i])),
            (float(np.exp(qlm[i] - 2 * qlse[i])), float(np.exp(qlm[i] + 2 * qlse[i]))),
            float(c_pred[i]), float(cm[i]), float(cse[i]),
            (float(cm[i] - 2 * cse[i]), float(cm[i] + 2 * cse[i])),
            float(g_pred[i]), float(gm[i]), float(gse[i]),
            (float(gm[i] - 2 * gse[i]), float(gm[i] + 2 * gse[i])), float(np.exp(glm[i])),
            (float(np.exp(glm[i] - 2 * glse[i])), float(np.exp(glm[i] + 2 * glse[i]))),
            bool(q_in_mean[i] and q_in_geo[i]), bool(c_ok[i]), bool(g_in_mean[i] and g_in_geo[i])))
    checks = np.concatenate([q_in_mean & q_in_geo, c_ok, g_in_mean & g_in_geo])
    frac = float(np.mean(checks))
    mq, mc, mg = float(q_dev.max()), float(c_dev.max()), float(g_dev.max())
    if first is None:
        msg = (f"width {n}, depth {n_layers}: the mean-field prediction holds within the "
               f"+-2 SE bands of {reps} networks or within {tol:g} (largest deviations: q "
               f"{mq:.3g} relative, c {mc:.3g}, gradient {mg:.3g} relative)")
    else:
        what = [name for name, vis in (("q", visible_q), ("c", visible_c), ("gradient", visible_g))
                if np.any(vis)]
        msg = (f"width {n}, depth {n_layers}: finite-width deviation visible from layer {first} "
               f"in {', '.join(what)} (largest deviations: q {mq:.3g} relative, c {mc:.3g}, "
               f"gradient {mg:.3g} relative); the infinite-width prediction does not describe "
               "these networks there")
    return Simulation(act.label, sw, sb, n, n_layers, reps, pairs, sd, q_in, c_in, tol,
                      tuple(layers), mq, mc, mg, frac, first is not None, first, msg)


def simulate_plan(plan: Any, act: Activation | str, *, width: int, depth: int | None = None,
                  q0: float | None = None, c0: float = 0.5, repetitions: int = 8,
                  n_pairs: int = 4, seed: int = 0, tolerance: float = 0.05,
                  rule: QuadratureRule = DEFAULT_RULE) -> Simulation:
    """:func:`simulate` at a plan's hidden-layer initialisation.

    Uses the plan's ``sigma_w2`` and ``sigma_b2`` for every layer, its depth
    and, by default, starts the layer-0 pre-activations at its q* (the first
    layer of a plan is chosen to put them there).

    Parameters
    ----------
    plan : InitPlan
        From :func:`propcalc.recommend`.
    act : str or Activation
        The plan's activation: a built-in name, a formula in x, or an Activation
        (resolved once here).
    """
    act = resolve(act)
    if not hasattr(plan, "sigma_w2") or not hasattr(plan, "sigma_b2"):
        raise InvalidParameterError("plan", "an InitPlan", plan)
    if getattr(plan, "activation", act.label) != act.label:
        raise InvalidParameterError("act", f"the plan's activation ({plan.activation})", act.label)
    start = plan.q_star if q0 is None else q0
    if start is None:
        raise InvalidParameterError("q0", "given when the plan has no finite q*", None)
    return simulate(act, plan.sigma_w2, plan.sigma_b2, width=width,
                    depth=plan.depth if depth is None else depth, q0=start, c0=c0,
                    repetitions=repetitions, n_pairs=n_pairs, seed=seed, tolerance=tolerance,
                    rule=rule)
