"""First-order (1/n) laws of q and gradient norms through residual, normalised and dense blocks.

The derivation is ours; it extends the chain of :mod:`propcalc.training.finite_width` (whose
per-layer law is Roberts, Yaida & Hanin 2022, ch. 4-5, and Hanin & Nica 2019 for products of
random matrices) to the blocks below, under the same gradient-independence convention
(Schoenholz et al. 2017). Weights are fresh Gaussians, ``W_ij ~ N(0, sigma_w2 / fan_in)``.

The state. Every block maps a scalar random variable to the next one, plus noise of order
1/n whose law, given the past, depends only on that variable (a Markov chain):

* after a dense block, ``s``: the stream's units are i.i.d. N(0, s) given the past (the chain
  of finite_width); its measured second moment is ``q = s chi^2_n / n``;
* after an activation, the same ``s`` with phi pending;
* after a residual sum or a norm, the measured per-unit second moment ``Q = |x|^2 / n`` itself:
  a dense block after it sees ``s = sigma_w2 Q + sigma_b2`` exactly, whatever x is.

A residual block ``y = a x + w F(x)`` whose branch ends in a dense block of the stream's width
n: given x and the branch's last variance s_L, F is N(0, s_L I_n) and independent of x (its
last weight matrix is fresh), so ``|y|^2`` is a non-central chi-square and, per unit,

    E[Q' | Q, s_L] = a^2 Q + w^2 s_L,
    Var[Q' | Q, s_L] = (2 w^4 s_L^2 + 4 a^2 w^2 Q s_L) / n

(the cross term ``2 a w x.F / n`` has mean 0 and variance ``4 a^2 w^2 Q s_L / n``). Inside the
branch s_1 = sigma_w2 Q + sigma_b2 (or gain^2 sigma_w2 + sigma_b2 after a norm, independent
of Q) and the branch's own layers are finite_width's chain. Q' depends on Q and s_L jointly,
so the state carried is a vector: (work, saved Q of the shortcut, ln of the branch's gradient
ratio, ln of the gradient accumulated along the stream).

Gradients. Through the block, ``g_x = a g_y + w J_F^T g_y`` with ``J_F^T g_y = W_1^T u`` an
isotropic Gaussian vector of squared norm ``r |g_y|^2 chi^2_n / n`` (gradient independence),
``r = sigma_w2,1 |u|^2 / |g_y|^2`` the branch's ratio (the product of the chain's per-layer
ratios, each with relative noise kappa_g / n). Hence ``|g_x|^2 / |g_y|^2`` has mean
``a^2 + w^2 r`` and variance ``(2 w^4 r^2 + 4 a^2 w^2 r) / n``: the backward pass has the
forward's form with Q = 1.

Norms (layer and RMS, with gain g and eps): the forward map is ``Q -> g^2 Q / (Q + eps)``,
deterministic (exactly g^2 when eps = 0: the spread of q is 0 after the norm); the layer norm's
centring removes one of n degrees of freedom, ``E[Vc] = Q (1 - 1/n)``, which moves the output
only through eps. Backward, the Jacobian is ``g (I - [1 1^T / n] - x x^T / (n (Q + eps))) /
sqrt(Q + eps)`` (Q the centred variance for the layer norm); for an isotropic incoming
gradient, ``ln R = ln g^2 - ln(Q + eps) - (rho (2 - rho) + [1 - rho for the layer norm]) / n``
with ``rho = Q / (Q + eps)`` (the projection on x, and for the layer norm the projection on
1, -1/n, and the centred variance's ``E[-ln(Vc + eps)] = -ln(Q + eps) + rho / n``), and a
noise of order 1/n^2 only (measured at width 16 and 64, 20000 seeded networks: -0.0156
predicted, -0.0152 +- 0.0018 and -0.0149 +- 0.0018 measured at 64 for layer and RMS norms). So the norm removes the spread of q but passes the spread of the stream's Q
on to the gradient, as ``-ln Q``.

Norm then an activation (a layer or RMS norm with eps = 0 on a dense block's Gaussian output,
then phi, then a dense block): the normalised units are y = g sqrt(n) z / |z| (centred first
for the layer norm), whose direction is independent of |z| and of the mean. Expanding
``mean_j phi(y_j)^2`` in the sample's second moment Q and mean around the Gaussian u = g z
(Gaussian integration by parts twice, as finite_width's Stein identities) gives, per unit,
``E = E[F] - E[F He4(z)] / (4 n)`` and ``n Var = Var F - E[F He2]^2 / 2 - [layer] E[F He1]^2``
with F = phi(u)^2 (the norm removes the He1 and He2 directions); the same for G = phi'(u)^2
in the backward ratio (relative noise ``3 E[G^2] / E[G]^2 - 1`` minus the same projections),
and their covariance the product of the projections. The new layer's variance is independent of
the past; the norm's backward projection on y takes ``E[phi'^2 z^2] / (E[phi'^2] n)`` instead
of 1 / n (its incoming gradient ``phi' W^T g`` is not isotropic). (Ours; checked against
seeded networks in tests/test_network_finite_width_blocks.py.)

Dropout (inverted, keep rate p) between an activation and the next dense block (or the
residual sum or RMS norm the activation feeds): each unit's terms carry the mask m / p^2 with
E[m] = p and m^2 = m, so ``V = sigma_w2 E[phi^2] / p + sigma_b2`` (Schoenholz et al. 2017's
1 / keep_rate), ``v = sigma_w2^2 (E[phi^4] / p^3 - E[phi^2]^2 / p^2)``, chi_1 / p,
``kappa_g = 3 E[phi'^4] / (p E[phi'^2]^2) - 1`` and the forward-backward covariance
``sigma_w2 (E[phi^2 phi'^2] / (p^2 E[phi'^2]) - E[phi^2] / p)`` (the mask is the same in both
passes). Two dropouts in a row are one of keep rate p1 p2. Dropout on a dense block's output is
the same with phi the identity; at the end of a residual branch, F = m g / p with g ~ N(0, s_L):
``E[Q'] = a^2 Q + w^2 s_L / p``, ``n Var[Q'] = w^4 s_L^2 (3 / p^3 - 1 / p^2) + 4 a^2 w^2 Q s_L / p``;
backward the mask multiplies the branch's ratio by ``|m g_y / p|^2 / |g_y|^2``, of mean 1 / p
and relative variance ``3 (1 / p - 1) / n``, whose noise meets the forward's through the mask:
``n Cov = w^2 s_L (1 / p^2 - 1 / p)`` (ours, as the rest).

First order. With X_{t+1} = F_t(X_t) + eta_t, Jacobian M_t, second derivatives H_t and noise
covariance Sigma_t (all of order 1/n): means K_{t+1} = F_t(K_t), covariances
``C_{t+1} = M_t C_t M_t^T + Sigma_t`` and the 1/n shifts of the means
``d_{t+1} = M_t d_t + (1/2) H_t : C_t + delta_t`` (Jensen at second order, as finite_width's
d). The log gradient between a position l and the top, ``G_T - G_l``, has variance
``(u_l - e) C_l (u_l - e)^T + sum_{k >= l} u_{k+1} Sigma_k u_{k+1}^T`` with ``u_T = e`` (the
unit row of G) and ``u_t = u_{t+1} M_t`` (the adjoint of the chain; finite_width's A(k) sums
in vector form).
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..activations.base import Activation
from ..errors import ComputationError
from ..meanfield.maps import chi_1, variance_map
from ..numerics.quadrature import QuadratureRule, gaussian_expectation
from .finite_width import _coefficients

__all__ = ["BRANCH", "GRADIENT", "SAVED", "WORK", "Step", "Tape", "TapeLaws", "run_tape"]

#: indices of the state vector
WORK, SAVED, BRANCH, GRADIENT = 0, 1, 2, 3
_DIM = 4


@dataclass
class Step:
    """One transition: the new means, the Jacobian, the 1/n terms (times n) and the width n."""

    mean: np.ndarray
    jac: np.ndarray
    noise: np.ndarray  # n Sigma
    n: int
    hess: list[tuple[int, int, int, float]] = field(default_factory=list)  # (i, j, k, H_ijk)
    shift: np.ndarray = field(default_factory=lambda: np.zeros(_DIM))  # n delta
    pending: tuple[Any, ...] | None = None  # a chain step's (act, s, sw, sb, target) until finish


@dataclass
class Tape:
    """Transitions from the input (exact), and the steps after which a position is recorded."""

    start: np.ndarray
    steps: list[Step] = field(default_factory=list)
    records: list[tuple[int, int, bool]] = field(default_factory=list)  # (step count, width, sampled)
    sphere: dict[tuple[Any, ...], dict[str, float]] = field(default_factory=dict)

    @property
    def mean(self) -> np.ndarray:
        return self.steps[-1].mean if self.steps else self.start

    def identity(self) -> tuple[np.ndarray, np.ndarray]:
        return self.mean.copy(), np.eye(_DIM)

    def chain(self, act: Activation, sw: float, sb: float, n: int, target: int,
              rule: QuadratureRule, weighting: bool = False, keep: float = 1.0) -> None:
        """phi then a dense block (finite_width's layer) on a stream of n Gaussian units.

        The means now (the length map and chi_1); the other coefficients in :meth:`finish`,
        for every such step of one (activation, sigma_w2, sigma_b2) at once. ``weighting``:
        phi alone (sigma_w2 = 1, sigma_b2 = 0) before a residual sum or a norm, whose incoming
        gradient's norm is sampled elsewhere: the backward factor is then the weighting
        ``sum phi'^2 zeta^2 / sum zeta^2``, of relative variance ``(kappa_g - 2) / n`` (the
        chi^2_n of ``sum zeta^2``, 2 / n, and its covariance 2 / n with the numerator removed)
        and the same covariance with the forward noise. ``keep``: inverted dropout between phi
        and the dense block (module docstring, "Dropout").
        """
        s = float(self.mean[WORK])
        mean = self.mean.copy()
        mean[WORK] = (float(variance_map(act, s, sw, sb, rule)) - sb) / keep + sb
        chi = float(chi_1(act, s, sw, rule)) / keep
        for value, what in ((mean[WORK], "variance"), (chi, "chi_1")):
            if not (math.isfinite(value) and 1e-200 <= value <= 1e12):
                raise ComputationError(f"the mean-field {what} leaves [1e-200, 1e12] ({value:.3g}) "
                                       "at a layer: no finite-width expansion around it")
        mean[target] += math.log(chi)
        self.steps.append(Step(mean, np.eye(_DIM), np.zeros((_DIM, _DIM)), n,
                               pending=(act, s, sw, sb, target, weighting, keep)))

    def finish(self, rule: QuadratureRule) -> None:
        """The chain steps' coefficients (finite_width's, vectorised over their variances)."""
        groups: dict[tuple[int, float, float], list[Step]] = {}
        for st in self.steps:
            if st.pending is not None:
                act, _, sw, sb, *_ = st.pending
                groups.setdefault((id(act), sw, sb), []).append(st)
        for members in groups.values():
            act, _, sw, sb, *_ = members[0].pending
            uniq, inverse = np.unique([m.pending[1] for m in members], return_inverse=True)
            co = _coefficients(act, uniq, sw, sb, rule)
            for st, i in zip(members, inverse):
                target, weighting, keep = st.pending[4:]
                c = {k: float(v[i]) for k, v in co.items()}
                if keep != 1.0:
                    c = _dropped(c, sw, sb, keep)
                if weighting:
                    c["kg"] = max(c["kg"] - 2.0, 0.0)
                st.jac[WORK, WORK] = c["V1"]
                st.noise[WORK, WORK] = c["v"]
                st.jac[target, WORK] = c["a"]
                st.noise[target, target] = c["kg"]
                st.noise[WORK, target] = st.noise[target, WORK] = c["c"]
                st.shift[target] = -0.5 * c["kg"]
                st.hess = [(WORK, WORK, WORK, c["V2"]), (target, WORK, WORK, c["b"])]
                st.pending = None

    def sample(self, n: int) -> None:
        """Gaussian units of variance s to their measured second moment (chi^2_n / n)."""
        mean, jac = self.identity()
        noise = np.zeros((_DIM, _DIM))
        noise[WORK, WORK] = 2.0 * mean[WORK] ** 2
        self.steps.append(Step(mean, jac, noise, n))

    def dense(self, sw: float, sb: float, n: int, target: int, sampled: bool) -> None:
        """A dense block on a measured stream of n units: s = sigma_w2 Q + sigma_b2 exactly.

        Backward ``|W^T g|^2 / |g|^2 = sigma_w2 chi^2_n / n``; inside a branch the first
        dense block's sampling belongs to the block's end (``sampled`` False).
        """
        mean, jac = self.identity()
        noise = np.zeros((_DIM, _DIM))
        shift = np.zeros(_DIM)
        mean[WORK] = sw * mean[WORK] + sb
        jac[WORK, WORK] = sw
        mean[target] += math.log(sw)
        if sampled:
            noise[target, target] = 2.0
            shift[target] = -1.0
        self.steps.append(Step(mean, jac, noise, n, [], shift))

    def norm(self, layer: bool, gain: float, eps: float, n: int, target: int) -> None:
        """A layer or RMS norm on a measured stream of n units."""
        if gain == 0.0:  # ln(gain^2) below: the stream is 0 after it, as a residual of 0 and 0
            raise ComputationError(f"a {'layer' if layer else 'RMS'} norm with gain 0 sets the "
                                   "stream to 0: no finite-width expansion around it (gain "
                                   f"must be nonzero for the finite-width laws, got {gain!r})")
        mean, jac = self.identity()
        k = float(mean[WORK])
        t = k + eps
        rho = k / t
        mean[WORK] = gain * gain * rho
        jac[WORK, WORK] = gain * gain * eps / (t * t)
        shift = np.zeros(_DIM)
        if layer:  # E[Vc] = Q (1 - 1/n)
            shift[WORK] = -jac[WORK, WORK] * k
        mean[target] += math.log(gain * gain / t)
        jac[target, WORK] = -1.0 / t
        shift[target] = -(rho * (2.0 - rho) + (1.0 - rho if layer else 0.0))
        self.steps.append(Step(mean, jac, np.zeros((_DIM, _DIM)), n,
                               [(WORK, WORK, WORK, -2.0 * gain * gain * eps / t ** 3),
                                (target, WORK, WORK, 1.0 / (t * t))], shift))

    def enter(self) -> None:
        """The start of a residual branch: the shortcut keeps Q."""
        mean, jac = self.identity()
        mean[SAVED] = mean[WORK]
        mean[BRANCH] = 0.0
        jac[SAVED] = 0.0
        jac[SAVED, WORK] = 1.0
        jac[BRANCH] = 0.0
        self.steps.append(Step(mean, jac, np.zeros((_DIM, _DIM)), 1))

    def close(self, shortcut: float, weight: float, n: int, keep: float = 1.0) -> None:
        """``y = a x + w F``: the non-central chi-square of the module docstring.

        ``keep``: the branch ends in dropout on its last dense block's output (module
        docstring, "Dropout").
        """
        mean, jac = self.identity()
        ks, kl, kr = float(mean[SAVED]), float(mean[WORK]), float(mean[BRANCH])
        a2, w2, p = shortcut * shortcut, weight * weight, keep
        if a2 == 0.0 and w2 == 0.0:
            raise ComputationError("a residual block with shortcut 0 and weight 0 sets the stream "
                                   "to 0: no finite-width expansion around it")
        noise = np.zeros((_DIM, _DIM))
        mean[WORK] = a2 * ks + w2 * kl / p
        jac[WORK] = 0.0
        jac[WORK, SAVED] = a2
        jac[WORK, WORK] = w2 / p
        noise[WORK, WORK] = (w2 * w2 * kl * kl * (3.0 / p ** 3 - 1.0 / (p * p))
                             + 4.0 * a2 * w2 * ks * kl / p)
        r = math.exp(kr) / p
        big_r = a2 + w2 * r
        theta = w2 * r / big_r
        mask = 3.0 * (1.0 / p - 1.0)  # n Var ln(|m g / p|^2 / |g|^2)
        mean[GRADIENT] += math.log(big_r)
        jac[GRADIENT, BRANCH] = theta
        noise[GRADIENT, GRADIENT] = ((2.0 * w2 * w2 * r * r + 4.0 * a2 * w2 * r) / big_r ** 2
                                     + theta * theta * mask)
        noise[WORK, GRADIENT] = noise[GRADIENT, WORK] = theta * w2 * kl * (1.0 / (p * p) - 1.0 / p)
        shift = np.zeros(_DIM)
        shift[GRADIENT] = -0.5 * noise[GRADIENT, GRADIENT]
        mean[SAVED] = mean[BRANCH] = 0.0
        jac[SAVED] = 0.0
        jac[BRANCH] = 0.0
        self.steps.append(Step(mean, jac, noise, n,
                               [(GRADIENT, BRANCH, BRANCH, theta * (1.0 - theta))], shift))

    def normed_chain(self, act: Activation, sw: float, sb: float, n: int, target: int,
                     gain: float, layer: bool, norm: Step, rule: QuadratureRule) -> None:
        """A norm (eps = 0) of Gaussian units, phi, a dense block: module docstring, "Norm then
        an activation". ``norm`` is the norm's step, whose gradient shift this corrects."""
        key = (id(act), gain, layer)
        if key not in self.sphere:  # repeated blocks share their moments
            self.sphere[key] = _sphere_moments(act, gain * gain, layer, rule)
        moments = self.sphere[key]
        mean = self.mean.copy()
        mean[WORK] = sw * moments["F"] + sb
        chi = sw * moments["G"]
        if not (math.isfinite(mean[WORK]) and 1e-200 <= mean[WORK] <= 1e12 and chi > 0):
            raise ComputationError(f"the mean-field variance or chi_1 after a norm leaves "
                                   f"[1e-200, 1e12] ({mean[WORK]:.3g}, {chi:.3g})")
        mean[target] += math.log(chi)
        jac = np.eye(_DIM)
        jac[WORK, WORK] = 0.0  # the normalised direction is independent of the past
        noise = np.zeros((_DIM, _DIM))
        noise[WORK, WORK] = sw * sw * moments["v"]
        noise[target, target] = moments["kg"]
        noise[WORK, target] = noise[target, WORK] = sw * moments["c"]
        shift = np.zeros(_DIM)
        shift[WORK] = sw * moments["dF"]
        shift[target] = moments["dG"] - 0.5 * moments["kg"]
        self.steps.append(Step(mean, jac, noise, n, [], shift))
        norm.shift[target] += 1.0 - moments["proj"]  # E[(v . y)^2] / |v|^2 replaces 1 / n

    def record(self, n: int, sampled: bool) -> None:
        """The stream after the last step is a position (``sampled``: q = s chi^2_n / n)."""
        self.records.append((len(self.steps), n, sampled))


def _sphere_moments(act: Activation, q: float, layer: bool, rule: QuadratureRule
                    ) -> dict[str, float]:
    """Moments of a normalised Gaussian vector's units u = g z (module docstring).

    F = phi(u)^2, G = phi'(u)^2; projections remove the Hermite components He0, He2 / sqrt(2)
    and, for the layer norm, He1 (the normalisation fixes the sample's second moment and mean).
    """
    if act.has_jumps:
        raise ComputationError(f"{act.label} jumps: the gradient law is undefined")
    scale = getattr(act, "scale", 1.0)
    if rule.scale != scale:
        rule = dataclasses.replace(rule, scale=scale)
    phi, dphi, bps = act.value, act.derivative, act.breakpoints
    qa = np.array([q])

    def e(fn: Any) -> float:
        return float(gaussian_expectation(fn, qa, bps, rule=rule, with_z=True)[0])

    ef, eg = e(lambda x, z: phi(x) ** 2), e(lambda x, z: dphi(x) ** 2)
    f1 = e(lambda x, z: phi(x) ** 2 * z) if layer else 0.0
    g1 = e(lambda x, z: dphi(x) ** 2 * z) if layer else 0.0
    f2 = e(lambda x, z: phi(x) ** 2 * (z * z - 1.0))
    g2 = e(lambda x, z: dphi(x) ** 2 * (z * z - 1.0))
    he4 = lambda z: (z * z - 6.0) * z * z + 3.0
    f4, g4 = e(lambda x, z: phi(x) ** 2 * he4(z)), e(lambda x, z: dphi(x) ** 2 * he4(z))
    ff, gg = e(lambda x, z: phi(x) ** 4), e(lambda x, z: dphi(x) ** 4)
    fg = e(lambda x, z: (phi(x) * dphi(x)) ** 2)
    gz2 = e(lambda x, z: dphi(x) ** 2 * z * z)
    if eg <= 0:
        raise ComputationError(f"E[{act.label}'(x)^2] = 0 after a norm: no gradient below it")
    return {
        "F": ef, "G": eg,
        "v": max(ff - ef * ef - 0.5 * f2 * f2 - f1 * f1, 0.0),
        "kg": max(3.0 * gg / (eg * eg) - 1.0 - 0.5 * (g2 / eg) ** 2 - (g1 / eg) ** 2, 0.0),
        "c": fg / eg - ef - 0.5 * f2 * g2 / eg - f1 * g1 / eg,
        "dF": -0.25 * f4, "dG": -0.25 * g4 / eg, "proj": gz2 / eg,
    }


def _dropped(c: dict[str, float], sw: float, sb: float, p: float) -> dict[str, float]:
    """A chain step's coefficients with inverted dropout (keep rate p) between phi and the layer.

    The moments are read back from the coefficients without dropout (m2 = (V - sb) / sw,
    m4 = v / sw^2 + m2^2, d2 = chi / sw, d4 / d2^2 = (kappa_g + 1) / 3,
    E[phi^2 phi'^2] / d2 = c / sw + m2) and each unit's terms multiplied by the mask m / p^2
    (E m = p, m^2 = m): module docstring, "Dropout".
    """
    m2 = (c["V"] - sb) / sw
    m4 = c["v"] / (sw * sw) + m2 * m2
    cross = c["c"] / sw + m2
    out = dict(c)
    out["V"] = sw * m2 / p + sb
    out["V1"], out["V2"], out["chi"] = c["V1"] / p, c["V2"] / p, c["chi"] / p
    out["v"] = sw * sw * max(m4 / p ** 3 - m2 * m2 / (p * p), 0.0)
    out["kg"] = max((c["kg"] + 1.0) / p - 1.0, 0.0)
    out["c"] = sw * (cross / (p * p) - m2 / p)
    return out


@dataclass(frozen=True)
class TapeLaws:
    """At every record: mean field K, first-order mean K + d, variance of the state, and the
    mean shift and variance of ln |g|^2 between the record and the top."""

    k: np.ndarray
    d: np.ndarray
    var: np.ndarray
    g_mean_field: np.ndarray
    g_shift: np.ndarray
    g_var: np.ndarray


def run_tape(tape: Tape, unit: bool = False) -> TapeLaws:
    """The first-order sums of the module docstring (``unit``: every 1/n taken as 1)."""
    steps = tape.steps
    c = np.zeros((_DIM, _DIM))
    d = np.zeros(_DIM)
    covs = [c]
    drifts = [d]
    for st in steps:
        inv = 1.0 if unit else 1.0 / st.n
        h2 = np.zeros(_DIM)
        for i, j, k, val in st.hess:
            h2[i] += 0.5 * val * c[j, k]
        d = st.jac @ d + h2 + st.shift * inv
        c = st.jac @ c @ st.jac.T + st.noise * inv
        covs.append(c)
        drifts.append(d)
    means = [tape.start] + [st.mean for st in steps]
    # adjoint: u_T = e, u_t = u_{t+1} M_t; tail[t] = sum_{k >= t} u_{k+1} Sigma_k u_{k+1}^T,
    # up to the last record (gradients are relative to it)
    e = np.zeros(_DIM)
    e[GRADIENT] = 1.0
    idx = [t for t, _, _ in tape.records]
    last = idx[-1]
    u = e.copy()
    tail = np.zeros(last + 1)
    us: list[np.ndarray] = [u] * (last + 1)
    for t in range(last - 1, -1, -1):
        st = steps[t]
        inv = 1.0 if unit else 1.0 / st.n
        tail[t] = tail[t + 1] + float(u @ (st.noise * inv) @ u)
        u = u @ st.jac
        us[t] = u
    k = np.array([means[t][WORK] for t in idx])
    dd = np.array([drifts[t][WORK] for t in idx])
    var = np.array([covs[t][WORK, WORK] for t in idx])
    g_mf = np.array([means[last][GRADIENT] - means[t][GRADIENT] for t in idx])
    g_shift = np.array([drifts[last][GRADIENT] - drifts[t][GRADIENT] for t in idx])
    g_var = np.array([float((us[t] - e) @ covs[t] @ (us[t] - e)) + tail[t] for t in idx])
    return TapeLaws(k, dd, var, g_mf, g_shift, np.maximum(g_var, 0.0))
