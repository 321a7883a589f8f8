"""Finite width: the spread and drift of second moments and gradient norms, first order in 1/n.

A plain stack ``h^{l+1} = W_{l+1} phi(h^l) + b_{l+1}`` with ``W_ij ~ N(0, sigma_w2 / n_l)`` and
``b_i ~ N(0, sigma_b2)``, layer l having n_l units. Layer 0's pre-activations have mean square
exactly q0 (a plan's first layer puts them at q*).

The Markov chain of the conditional variance (derived here; the structure is that of Roberts, Yaida
& Hanin 2022, "The Principles of Deep Learning Theory", ch. 4-5). Given layer l, the units of
layer l + 1 are independent N(0, s_{l+1}) with

    s_{l+1} = sigma_w2 (1 / n_l) sum_j phi(h^l_j)^2 + sigma_b2,

an average of n_l independent terms once s_l is known. So ``E[s_{l+1} | s_l] = V(s_l)`` (the
length map, Poole et al. 2016, eq. 3) and ``Var[s_{l+1} | s_l] = v(s_l) / n_l`` with

    v(q) = sigma_w2^2 (E[phi(sqrt(q) z)^4] - E[phi(sqrt(q) z)^2]^2).

The measured second moment is ``q_l = |h^l|^2 / n_l = s_l chi^2_{n_l} / n_l``. Expanding to first
order in 1/n around the infinite-width trajectory K_{l+1} = V(K_l):

* four-point term (the connected 4-point function of one input, RYH 2022 eq. 4.90 in their
  notation V^{(l)} / n):  ``P_{l+1} = V'(K_l)^2 P_l + v(K_l) / n_l``,  P_0 = 0;
* 1/n shift of the mean metric (RYH 2022 ch. 5, the recursion of G^{1}): Jensen's inequality at
  second order, ``d_{l+1} = V'(K_l) d_l + V''(K_l) P_l / 2``, d_0 = 0; a concave V (V'' < 0)
  lowers the mean, most where V'(q*) is close to 1 (a weakly attracting fixed point), since
  then d ~ V'' v / (2 n (1 - V')^2 (1 + V'));
* log-normal law (products of random matrices: Hanin 2018; Hanin & Nica 2019): ln q_l is close
  to normal with variance ``P_l / K_l^2 + 2 / n_l`` and mean ``ln K_l + d_l / K_l - P_l / (2 K_l^2)
  - 1 / n_l``; the "typical" network has q = exp(E ln q), below the mean by the factor
  exp(-variance / 2).

Gradients (the gradient-independence convention of Schoenholz et al. 2017; exact for ReLU,
Hanin & Nica 2019). A vector g at the top is pulled back by
``g^l = phi'(h^l) * (W_{l+1}^T g^{l+1})``; given layer l the ratio
``R_l = |g^l|^2 / |g^{l+1}|^2 = (sigma_w2 / n_l) sum_j phi'(h^l_j)^2 zeta_j^2``
(zeta_j independent standard normals) has mean chi_1(s_l) (Schoenholz et al. 2017, eq. 8) and
relative variance ``kappa_g / n_l`` with ``kappa_g = 3 E[phi'^4] / E[phi'^2]^2 - 1``. Then
``ln G_l = sum_{m >= l} (ln chi_1(s_m) + eps_m)`` with ``Var eps_m = kappa_g / n_m``, E eps_m =
-kappa_g / (2 n_m), and ln chi_1(s_m) expanded to second order in s_m - K_m (whose covariances
are those of the chain: ``Cov(s_m, s_k) = P_k prod_{j=k}^{m-1} V'(K_j)``, and the noise of s_{m+1}
correlates with eps_m through ``Cov(phi^2, phi'^2)``). Everything is summed in O(L).

ReLU with sigma_b2 = 0 (Hanin & Nica 2019): ``|x^{l+1}|^2 / |x^l|^2 = (2 / n) chi^2_K`` with
K ~ Binomial(n, 1/2) for post-activations x, so the per-layer relative variance is exactly 5 / n:
``kappa = E[phi^4] / E[phi^2]^2 - 1 = 6 - 1`` and ``kappa_g = 3 (1/2) / (1/4) - 1 = 5``.

Every coefficient is an expectation by the engine's quadrature; q-derivatives by Stein's identity,
``d/dq E[f] = E[(z^2 - 1) f] / (2 q)`` and ``d^2/dq^2 E[f] = E[(z^4 - 6 z^2 + 3) f] / (4 q^2)``
(twice the Gaussian integration by parts; no derivative of phi beyond phi'), so kinks cost nothing.

All corrections are linear in the 1/n_l; a uniform width n' therefore scales them by n / n', and
"the width that makes it small" is solved in closed form from the same sums at unit width.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .. import domains
from ..activations.base import Activation
from ..activations.resolver import resolve
from ..errors import (ComputationError, InvalidParameterError, check_int, check_nonnegative,
                      check_positive)
from ..meanfield.maps import variance_map
from ..numerics.quadrature import DEFAULT_RULE, QuadratureRule, gaussian_expectation
from ..results import Result

__all__ = [
    "SPREAD_LIMIT",
    "GRADIENT_SPREAD_LIMIT",
    "DRIFT_LIMIT",
    "MAX_LAYERS",
    "ORTHOGONAL_WHY",
    "LayerFluctuations",
    "FiniteWidth",
    "layer_fluctuations",
    "finite_width",
    "chain_laws",
    "check_widths",
]

#: largest standard deviation of ln q at the top that counts as small (ours, no source:
#: one standard deviation is then a factor e^0.5 = 1.65 in the second moment)
SPREAD_LIMIT = 0.5
#: largest standard deviation of ln |g|^2 at the bottom that counts as small (ours, no source).
#: It is per input and per direction, most of it averages out over a batch and the outputs:
#: the tanh plan at 100 layers of width 128 (sd 1.9 here; 2.0 measured in seeded networks, 1.3
#: of it between networks) trains (issue 15's runs), so the limit sits just above it
GRADIENT_SPREAD_LIMIT = 2.0
#: largest relative drift of the mean, or of the typical network, of q at the top (ours, no source)
DRIFT_LIMIT = 0.25
#: the deepest stack analysed (one coefficient set per layer is kept)
MAX_LAYERS = 100_000
#: why orthogonal weights get no finite-width laws: a Haar-orthogonal matrix keeps the norm of
#: its input exactly, so the per-layer sampling is not the Gaussian one of the chain
ORTHOGONAL_WHY = "orthogonal weights: the per-layer sampling is not the Gaussian one these laws use"
#: relative variance Var(s_l) / K_l^2 (or relative drift) beyond which the Taylor expansion of
#: the maps around K_l is outside its range (ours, no source)
_EXPANSION_RANGE = 0.25


@dataclass(frozen=True)
class LayerFluctuations(Result):
    """Per-layer fluctuation coefficients at variances q (arrays over q; multiply by 1/n).

    Attributes
    ----------
    q : tuple of float
    variance_noise : tuple of float
        v(q) = sigma_w2^2 (E[phi^4] - E[phi^2]^2): n Var[s_{l+1} | s_l = q].
    relative_noise : tuple of float
        kappa = v(q) / V(q)^2: n Var[s_{l+1} / V(q)] (5 for ReLU with sigma_b2 = 0).
    gradient_noise : tuple of float
        kappa_g = 3 E[phi'^4] / E[phi'^2]^2 - 1: n Var[R / chi_1] (5 for ReLU).
    """

    q: tuple[float, ...]
    variance_noise: tuple[float, ...]
    relative_noise: tuple[float, ...]
    gradient_noise: tuple[float, ...]


@dataclass(frozen=True)
class FiniteWidth(Result):
    """Spread and drift of second moments and gradient norms at finite widths (first order in 1/n).

    Layers are indexed 0..L (0 = the first pre-activations, of mean square q0 exactly).

    Attributes
    ----------
    activation : str
    sigma_w2, sigma_b2, q0 : float
    widths : tuple of int
        n_0 .. n_L.
    beta : float
        sum_{l < L} 1 / n_l (Hanin 2018; Hanin & Nica 2019).
    q_mean_field : tuple of float
        K_l, the infinite-width second moments.
    q_mean : tuple of float
        K_l + d_l: the mean over networks to first order (the Jensen shift d_l).
    q_typical : tuple of float
        exp(E ln q_l): the typical network (median of the log-normal law).
    q_log_sd : tuple of float
        Standard deviation of ln q_l over networks (including the chi-square sampling of
        layer l's own n_l units; 0 at layer 0).
    gradient_mean_field : tuple of float
        prod_{m=l}^{L-1} chi_1(K_m): the infinite-width squared gradient norm (top = 1).
    gradient_typical : tuple of float
        exp(E ln |g^l|^2) for a unit vector at the top.
    gradient_log_sd : tuple of float
        Standard deviation of ln |g^l|^2.
    top_log_sd : float
        Standard deviation of ln s_L, the variance the top layer's units are drawn with (the
        spread of the signal's scale between networks, without the top layer's own sampling).
    top_drift : float
        d_L / K_L: relative drift of the mean of q at the top.
    top_typical_drift : float
        q_typical at the top (without its own sampling) / K_L - 1.
    gradient_spread : float
        gradient_log_sd at layer 0 (the longest path).
    spread_ok, gradient_ok, drift_ok : bool
        top_log_sd <= SPREAD_LIMIT; gradient_spread <= GRADIENT_SPREAD_LIMIT;
        |top_drift| and |top_typical_drift| <= DRIFT_LIMIT.
    width_needed : int
        The smallest uniform width at which all three pass (first order in 1/n).
    depth_limit : int or None
        The first layer l at which the spread of ln s_l or the drift of its mean or typical
        value passes its limit at these widths (None: not within these layers). For a stack
        that keeps the same width, the depth finite width allows.
    within_expansion : bool
        Var(s_l) / K_l^2 and the relative drift stay below 0.25 at every layer, so the maps'
        Taylor expansion holds; otherwise the numbers give the direction and rough size only.
    message : str
    """

    activation: str
    sigma_w2: float
    sigma_b2: float
    q0: float
    widths: tuple[int, ...] = field(repr=False)
    beta: float
    q_mean_field: tuple[float, ...] = field(repr=False)
    q_mean: tuple[float, ...] = field(repr=False)
    q_typical: tuple[float, ...] = field(repr=False)
    q_log_sd: tuple[float, ...] = field(repr=False)
    gradient_mean_field: tuple[float, ...] = field(repr=False)
    gradient_typical: tuple[float, ...] = field(repr=False)
    gradient_log_sd: tuple[float, ...] = field(repr=False)
    top_log_sd: float
    top_drift: float
    top_typical_drift: float
    gradient_spread: float
    spread_ok: bool
    gradient_ok: bool
    drift_ok: bool
    width_needed: int
    depth_limit: int | None
    within_expansion: bool
    message: str


def _stein(act_fn: Any, q: np.ndarray, bps: Sequence[float], rule: QuadratureRule
           ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """E[f(sqrt(q) z)] and its first two q-derivatives by Stein's identity (module docstring)."""
    e0 = gaussian_expectation(act_fn, q, bps, rule=rule)
    e1 = gaussian_expectation(lambda x, z: (z * z - 1.0) * act_fn(x), q, bps, rule=rule,
                              with_z=True) / (2.0 * q)
    e2 = gaussian_expectation(lambda x, z: ((z * z - 6.0) * z * z + 3.0) * act_fn(x), q, bps,
                              rule=rule, with_z=True) / (4.0 * q * q)
    return e0, e1, e2


def _coefficients(act: Activation, q: np.ndarray, sw: float, sb: float,
                  rule: QuadratureRule) -> dict[str, np.ndarray]:
    """Every per-layer coefficient at the (unique) variances q."""
    if act.has_jumps:
        raise ComputationError(f"{act.label} jumps: chi_1 is infinite and the gradient law is "
                               "undefined; finite-width corrections are not computed")
    scale = getattr(act, "scale", 1.0)
    if rule.scale != scale:  # steep formulas need finer grading (as the maps do)
        rule = dataclasses.replace(rule, scale=scale)
    bps = act.breakpoints
    phi, dphi = act.value, act.derivative
    m2, m2p, m2pp = _stein(lambda x: phi(x) ** 2, q, bps, rule)
    m4 = gaussian_expectation(lambda x: phi(x) ** 4, q, bps, rule=rule)
    d2, d2p, d2pp = _stein(lambda x: dphi(x) ** 2, q, bps, rule)
    d4 = gaussian_expectation(lambda x: dphi(x) ** 4, q, bps, rule=rule)
    cross = gaussian_expectation(lambda x: (phi(x) * dphi(x)) ** 2, q, bps, rule=rule)
    if np.any(d2 <= 0):
        raise ComputationError(f"E[{act.label}'(x)^2] = 0 at some layer: no gradient reaches "
                               "below it")
    a = d2p / d2
    return {
        "V": sw * m2 + sb, "V1": sw * m2p, "V2": sw * m2pp,
        # v(q): n Var[s_{l+1} | s_l = q]
        "v": sw * sw * np.maximum(m4 - m2 * m2, 0.0),
        "chi": sw * d2, "a": a, "b": d2pp / d2 - a * a,
        # kappa_g: n Var[R / chi_1]
        "kg": np.maximum(3.0 * d4 / (d2 * d2) - 1.0, 0.0),
        # n Cov(eps_m, eta_m): relative gradient noise against the noise of s_{m+1}
        "c": sw * (cross - m2 * d2) / d2,
    }


def layer_fluctuations(act: Any, q: Any, sigma_w2: float, sigma_b2: float = 0.0,
                       rule: QuadratureRule = DEFAULT_RULE) -> LayerFluctuations:
    """Per-layer fluctuation coefficients of one layer at variances q (multiply by 1 / n).

    Parameters
    ----------
    act : str, Activation or formula
    q : float or sequence of float
        Variances of the layer's pre-activations, > 0.
    sigma_w2, sigma_b2 : float

    Returns
    -------
    LayerFluctuations

    Examples
    --------
    >>> r = layer_fluctuations("relu", 1.0, 2.0)
    >>> round(r.relative_noise[0], 10), round(r.gradient_noise[0], 10)
    (5.0, 5.0)
    """
    act = resolve(act)
    sw = check_positive("sigma_w2", sigma_w2)
    sb = check_nonnegative("sigma_b2", sigma_b2)
    qa = np.atleast_1d(np.asarray(q, dtype=float))
    if qa.ndim != 1 or not np.all(np.isfinite(qa)) or np.any(qa <= 0):
        raise InvalidParameterError("q", "finite and > 0", q)
    qa = domains.check_array("q", qa, "q")
    co = _coefficients(act, qa, sw, sb, rule)
    return LayerFluctuations(tuple(qa.tolist()), tuple(co["v"].tolist()),
                             tuple((co["v"] / co["V"] ** 2).tolist()), tuple(co["kg"].tolist()))


def _trajectory(act: Activation, sw: float, sb: float, q0: float, n_layers: int,
                rule: QuadratureRule) -> np.ndarray:
    """K_0 .. K_L by the length map (stops being recomputed once it stands still)."""
    ks = np.empty(n_layers + 1)
    ks[0] = q0
    for layer in range(1, n_layers + 1):
        prev = ks[layer - 1]
        nxt = float(variance_map(act, prev, sw, sb, rule))
        if not (math.isfinite(nxt) and domains.Q_POSITIVE_MIN <= nxt <= domains.Q_MAX):
            raise ComputationError(f"the mean-field variance leaves [1e-200, 1e12] at layer "
                                   f"{layer} ({nxt:.3g}): the signal explodes or collapses, so "
                                   "there is no finite-width expansion around it")
        ks[layer] = nxt
        if nxt == prev:  # at the fixed point: the rest is the same number
            ks[layer:] = nxt
            break
    return ks


def _chain_trajectory(layers: list[tuple[Activation, float, float]], q0: float,
                      rule: QuadratureRule) -> np.ndarray:
    """K_0 .. K_L through transitions that differ (each layer's own length map)."""
    ks = np.empty(len(layers) + 1)
    ks[0] = q0
    for layer, (act, sw, sb) in enumerate(layers, start=1):
        ks[layer] = _trajectory(act, sw, sb, float(ks[layer - 1]), 1, rule)[1]
    return ks


def _chain_coefficients(layers: list[tuple[Activation, float, float]], k: np.ndarray,
                        rule: QuadratureRule) -> dict[str, np.ndarray]:
    """Every coefficient at K_l with layer l's own (activation, sigma_w2, sigma_b2)."""
    groups: dict[tuple[int, float, float], list[int]] = {}
    for i, (act, sw, sb) in enumerate(layers):
        groups.setdefault((id(act), sw, sb), []).append(i)
    out: dict[str, np.ndarray] = {}
    for idx in groups.values():
        act, sw, sb = layers[idx[0]]
        uniq, inverse = np.unique(k[idx], return_inverse=True)
        for name, val in _coefficients(act, uniq, sw, sb, rule).items():
            out.setdefault(name, np.empty(k.size))[idx] = val[inverse]
    return out


def _sums(co: dict[str, np.ndarray], k: np.ndarray, inv_n: np.ndarray
          ) -> dict[str, np.ndarray]:
    """First-order sums for weights inv_n (1/n_l for real widths, 1 for unit width)."""
    n_layers = k.size - 1
    v1, v2 = co["V1"], co["V2"]
    p = np.zeros(n_layers + 1)
    d = np.zeros(n_layers + 1)
    for l in range(n_layers):
        p[l + 1] = v1[l] ** 2 * p[l] + co["v"][l] * inv_n[l]
        d[l + 1] = v1[l] * d[l] + 0.5 * v2[l] * p[l]
    # gradients: A(k) = sum_{m > k} a_m prod_{k < j < m} V'_j (m <= L - 1), A(L - 1) = 0
    a, kg, c, chi, b = co["a"], co["kg"], co["c"], co["chi"], co["b"]
    big_a = np.zeros(n_layers + 1)  # big_a[k + 1] = A(k), k = -1 .. L - 1
    for kk in range(n_layers - 2, -2, -1):
        big_a[kk + 1] = a[kk + 1] + v1[kk + 1] * big_a[kk + 2]
    var_g = np.zeros(n_layers + 1)
    mean_g = np.zeros(n_layers + 1)  # E ln G_l - ln G_l(mean field)
    acc_var = 0.0
    acc_mean = 0.0
    for l in range(n_layers - 1, -1, -1):
        am = big_a[l + 1]  # A(l)
        acc_var += (kg[l] + 2.0 * c[l] * am) * inv_n[l] + co["v"][l] * inv_n[l] * am * am
        acc_mean += a[l] * d[l] + 0.5 * b[l] * p[l] - 0.5 * kg[l] * inv_n[l]
        var_g[l] = acc_var + big_a[l] ** 2 * p[l]
        mean_g[l] = acc_mean
    return {"P": p, "d": d, "var_g": np.maximum(var_g, 0.0), "mean_g": mean_g}


def finite_width(act: Any, sigma_w2: float, sigma_b2: float, widths: Sequence[int],
                 q0: float = 1.0, *, rule: QuadratureRule = DEFAULT_RULE) -> FiniteWidth:
    """Spread and drift of q and of gradient norms through a stack of the given widths.

    Parameters
    ----------
    act : str, Activation or formula
    sigma_w2, sigma_b2 : float
        Every layer's initialisation.
    widths : sequence of int
        n_0 .. n_L, the units of layers 0..L (L >= 1 transitions); each >= 2 but the top one
        (>= 1: it enters only its own sampling).
    q0 : float
        Mean square of layer 0's pre-activations (a plan's q*).

    Returns
    -------
    FiniteWidth

    Raises
    ------
    InvalidParameterError
        For bad widths or parameters.
    ComputationError
        If the mean-field variance explodes or collapses, or phi jumps.

    Examples
    --------
    >>> r = finite_width("relu", 2.0, 0.0, [100] * 11)
    >>> round(r.beta, 6), round(r.gradient_spread ** 2, 6)    # 5 beta (Hanin & Nica 2019)
    (0.1, 0.5)
    """
    act = resolve(act)
    sw = check_positive("sigma_w2", sigma_w2)
    sb = check_nonnegative("sigma_b2", sigma_b2)
    ws = check_widths(widths)
    return chain_laws([(act, sw, sb)] * (len(ws) - 1), ws, float(domains.check("q", check_positive("q0", q0), "q0")), rule)


def check_widths(widths: Any) -> list[int]:
    """Validated widths n_0 .. n_L (each >= 2 but the top one, >= 1)."""
    if isinstance(widths, (str, bytes)) or not isinstance(widths, Sequence):
        raise InvalidParameterError("widths", "a list of integers", widths)
    ws = [check_int(f"widths[{i}]", w, 2 if i < len(widths) - 1 else 1)
          for i, w in enumerate(widths)]
    if len(ws) < 2:
        raise InvalidParameterError("widths", "at least 2 layers (n_0 and n_1)", list(widths))
    if len(ws) > MAX_LAYERS + 1:
        raise InvalidParameterError("widths", f"at most {MAX_LAYERS + 1} layers", len(ws))
    return ws


def chain_laws(layers: list[tuple[Activation, float, float]], ws: list[int], qi: float,
             rule: QuadratureRule) -> FiniteWidth:
    """The first-order laws for validated transitions ``layers`` (one per width but the last).

    Transition l (layer l to l + 1) has its own activation, sigma_w2 and sigma_b2: every sum
    of the module docstring is taken layer by layer, and the derivation nowhere uses that the
    layers are equal. ``activation`` of the result lists the distinct activations;
    ``sigma_w2`` and ``sigma_b2`` are the first transition's.
    """
    n_layers = len(ws) - 1
    uniform = len(set((id(a), sw, sb) for a, sw, sb in layers)) == 1
    if uniform:
        act, sw, sb = layers[0]
        k = _trajectory(act, sw, sb, qi, n_layers, rule)
    else:
        k = _chain_trajectory(layers, qi, rule)
    co = _chain_coefficients(layers + [layers[-1]], k, rule)
    act, sw, sb = layers[0]
    label = act.label if uniform else ", ".join(dict.fromkeys(a.label for a, _, _ in layers))
    inv_n = 1.0 / np.asarray(ws, dtype=float)
    real = _sums(co, k, inv_n)
    unit = _sums(co, k, np.ones(n_layers + 1))

    p, d = real["P"], real["d"]
    rel_p = p / k ** 2
    q_var = rel_p + 2.0 * inv_n
    q_var[0] = 0.0
    q_mean = k + d
    log_g_mf = np.concatenate([np.cumsum(np.log(co["chi"][:n_layers])[::-1])[::-1], [0.0]])
    # a chaotic or collapsing stack takes these past the double range: inf / 0 is the answer
    with np.errstate(over="ignore", under="ignore"):
        q_typ = k * np.exp(d / k - 0.5 * rel_p - inv_n)
        g_mf = np.exp(log_g_mf)
        g_typ = np.exp(log_g_mf + real["mean_g"])
    q_typ[0] = k[0]

    top_var = float(rel_p[-1])
    top_drift = float(d[-1] / k[-1])
    top_typ = float(np.expm1(min(d[-1] / k[-1] - 0.5 * top_var, 700.0)))
    g_var = float(real["var_g"][0])
    # unit-width sums: the same quantities times n for a uniform width n
    u_top_var = float(unit["P"][-1] / k[-1] ** 2)
    u_drift = abs(float(unit["d"][-1] / k[-1]))
    u_typ = abs(float(unit["d"][-1] / k[-1] - 0.5 * u_top_var))
    u_g = float(unit["var_g"][0])
    needed = max(u_top_var / SPREAD_LIMIT ** 2, u_g / GRADIENT_SPREAD_LIMIT ** 2,
                 u_drift / DRIFT_LIMIT, u_typ / math.log1p(DRIFT_LIMIT), 2.0)
    width_needed = int(math.ceil(needed - 1e-9))
    spread_ok = math.sqrt(top_var) <= SPREAD_LIMIT
    gradient_ok = math.sqrt(g_var) <= GRADIENT_SPREAD_LIMIT
    drift_ok = abs(top_drift) <= DRIFT_LIMIT and abs(top_typ) <= DRIFT_LIMIT
    within = max(float(np.max(rel_p)), abs(top_drift)) <= _EXPANSION_RANGE
    beta = float(np.sum(inv_n[:-1]))
    typ_all = d / k - 0.5 * rel_p
    over = ((np.sqrt(rel_p) > SPREAD_LIMIT) | (np.abs(d / k) > DRIFT_LIMIT)
            | (np.abs(np.expm1(np.minimum(typ_all, 700.0))) > DRIFT_LIMIT))
    depth_limit = int(np.flatnonzero(over)[0]) if np.any(over) else None
    msg = _message(n_layers, ws, k[-1], math.sqrt(top_var), top_drift, top_typ,
                   math.sqrt(g_var), spread_ok, gradient_ok, drift_ok, width_needed, within)
    tup = lambda arr: tuple(float(x) for x in arr)  # noqa: E731
    return FiniteWidth(label, sw, sb, qi, tuple(ws), beta, tup(k), tup(q_mean), tup(q_typ),
                       tup(np.sqrt(q_var)), tup(g_mf), tup(g_typ),
                       tup(np.sqrt(real["var_g"])), math.sqrt(top_var), top_drift, top_typ,
                       math.sqrt(g_var), spread_ok, gradient_ok, drift_ok, width_needed,
                       depth_limit, within, msg)


def _message(n_layers: int, ws: list[int], k_top: float, top_sd: float, drift: float,
             typ: float, g_sd: float, spread_ok: bool, gradient_ok: bool, drift_ok: bool,
             needed: int, within: bool) -> str:
    hidden = ws[:-1]  # the top layer's own width enters only its sampling
    width = (f"width {hidden[0]}" if len(set(hidden)) == 1
             else f"widths {min(hidden)}-{max(hidden)}")
    text = (f"{n_layers} layers at {width}: ln q at the top spreads by {top_sd:.3g} (sd) "
            f"between networks, its mean moves by {100 * drift:+.3g}% and the typical network's "
            f"q by {100 * typ:+.3g}% of q = {k_top:.4g}; ln |gradient|^2 at the bottom spreads "
            f"by {g_sd:.3g}")
    if spread_ok and gradient_ok and drift_ok:
        text += "; finite-width effects are small"
    else:
        bad = [name for name, ok in (("spread of q", spread_ok), ("gradient spread", gradient_ok),
                                     ("drift of q", drift_ok)) if not ok]
        text += (f"; too large: {', '.join(bad)}; a uniform width of about {needed} makes them "
                 "small")
    if not within:
        text += ("; the first-order corrections are of order 1 here, so these numbers give the "
                 "direction and rough size only")
    return text
