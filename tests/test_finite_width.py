"""Finite-width spread and drift (propcalc.training.finite_width) against outside references.

Sources: the exact ReLU law of Hanin & Nica 2019 (the squared-norm ratio of one layer is
(2 / n) chi^2_K with K ~ Binomial(n, 1/2)), its moments from scipy.stats / scipy.special; Gaussian
moments of the identity (closed form: E z^4 = 3); mpmath quadrature and numerical derivatives for
erf (E[erf(x)^2] in closed form, Williams 1997); seeded finite-width networks
(propcalc.simulate: numpy default_rng streams) at widths 32-1024 within sampling bands.
"""

from __future__ import annotations

import math

import mpmath
import numpy as np
import pytest
from scipy import special, stats

import propcalc as pc
from propcalc.errors import ComputationError, InvalidParameterError
from propcalc.meanfield.simulate import simulate
from propcalc.training.finite_width import (DRIFT_LIMIT, SPREAD_LIMIT, finite_width,
                                            layer_fluctuations)


def _relu_ratio_moments(n: int) -> tuple[float, float, float]:
    """E R, Var R and E ln R (given K >= 1) of R = (2/n) chi^2_K, K ~ Binomial(n, 1/2).

    Hanin & Nica 2019 (the ReLU layer law); scipy.stats binomial moments, E chi^2_k = k,
    Var chi^2_k = 2 k, E ln chi^2_k = ln 2 + digamma(k / 2).
    """
    b = stats.binom(n, 0.5)
    mean = 2.0 / n * b.mean()
    var = (2.0 / n) ** 2 * (2.0 * b.mean() + b.var())
    k = np.arange(1, n + 1)
    w = b.pmf(k) / b.sf(0)
    elog = float(np.sum(w * (math.log(2.0 / n) + math.log(2.0) + special.digamma(k / 2.0))))
    return float(mean), float(var), elog


@pytest.mark.parametrize("n", [32, 128, 1024])
def test_relu_layer_law_exact(n):
    # Hanin & Nica 2019: the per-layer relative variance of ReLU is exactly 5 / n
    mean, var, elog = _relu_ratio_moments(n)
    assert mean == pytest.approx(1.0, abs=1e-12)
    r = layer_fluctuations("relu", [0.3, 1.0, 7.0], 2.0, 0.0)
    for kappa, kappa_g in zip(r.relative_noise, r.gradient_noise):
        assert kappa / n == pytest.approx(var, rel=1e-10)
        assert kappa_g / n == pytest.approx(var, rel=1e-10)
    # first order in 1/n: E ln R = -kappa / (2 n) + O(1/n^2)
    assert abs(elog + r.relative_noise[0] / (2 * n)) < 10.0 / n ** 2


def test_identity_chi_square():
    # a linear layer: |h'|^2 / n = s chi^2_n / n, relative variance 2 / n (E z^4 = 3, closed form)
    r = layer_fluctuations("linear", 2.0, 1.0, 0.0)
    assert r.relative_noise[0] == pytest.approx(2.0, rel=1e-12)
    assert r.gradient_noise[0] == pytest.approx(2.0, rel=1e-12)


def test_tanh_coefficients_against_mpmath():
    # kappa = E[tanh^4] / E[tanh^2]^2 - 1 (sigma_b2 = 0), kappa_g = 3 E[sech^8] / E[sech^4]^2 - 1,
    # by mpmath quadrature of the Gaussian integrals
    q = 0.7
    mpmath.mp.dps = 30

    def gauss(f):
        return mpmath.quad(lambda z: f(mpmath.sqrt(q) * z) * mpmath.npdf(z), [-mpmath.inf, 0,
                                                                                   mpmath.inf])

    m2 = gauss(lambda x: mpmath.tanh(x) ** 2)
    m4 = gauss(lambda x: mpmath.tanh(x) ** 4)
    d2 = gauss(lambda x: mpmath.sech(x) ** 4)
    d4 = gauss(lambda x: mpmath.sech(x) ** 8)
    r = layer_fluctuations("tanh", q, 1.3, 0.0)
    assert r.relative_noise[0] == pytest.approx(float(m4 / m2 ** 2 - 1), rel=1e-10)
    assert r.gradient_noise[0] == pytest.approx(float(3 * d4 / d2 ** 2 - 1), rel=1e-10)
    assert r.variance_noise[0] == pytest.approx(float(1.3 ** 2 * (m4 - m2 ** 2)), rel=1e-10)


def test_erf_drift_two_layers_against_mpmath():
    # d_2 = V''(K_1) P_1 / 2 with P_1 = v(K_0) / n_0 (module docstring's recursion, by hand);
    # V(q) = sw (2/pi) arcsin(2q / (1 + 2q)) + sb for erf (Williams 1997), V'' by mpmath.diff
    mpmath.mp.dps = 30
    sw, sb, q0, n = 1.7, 0.2, 0.9, 64

    def vmap(q):
        return sw * 2 / mpmath.pi * mpmath.asin(2 * q / (1 + 2 * q)) + sb

    m4 = mpmath.quad(lambda z: mpmath.erf(mpmath.sqrt(q0) * z) ** 4 * mpmath.npdf(z),
                     [-mpmath.inf, 0, mpmath.inf])
    m2 = (vmap(q0) - sb) / sw
    p1 = sw ** 2 * (m4 - m2 ** 2) / n
    k1 = vmap(q0)
    k2 = vmap(k1)
    d2 = mpmath.diff(vmap, k1, 2) * p1 / 2
    r = finite_width("erf", sw, sb, [n, n, n], q0)
    assert r.q_mean_field[2] == pytest.approx(float(k2), rel=1e-12)
    assert r.top_drift == pytest.approx(float(d2 / k2), rel=1e-8)
    # the top spread: Var(s_2) = V'(K_1)^2 P_1 + v(K_1) / n
    m4b = mpmath.quad(lambda z: mpmath.erf(mpmath.sqrt(k1) * z) ** 4 * mpmath.npdf(z),
                      [-mpmath.inf, 0, mpmath.inf])
    m2b = (k2 - sb) / sw  # E[erf(sqrt(K_1) z)^2]
    p2 = mpmath.diff(vmap, k1) ** 2 * p1 + sw ** 2 * (m4b - m2b ** 2) / n
    assert r.top_log_sd == pytest.approx(float(mpmath.sqrt(p2) / k2), rel=1e-8)


def test_relu_beta_law_and_width_needed():
    # Hanin & Nica 2019: Var ln |J u|^2 = 5 beta for ReLU at first order; all corrections are
    # linear in 1/n, so the width that brings the spread to the limit is solved exactly
    r = finite_width("relu", 2.0, 0.0, [100] * 11)
    assert r.beta == pytest.approx(0.1)
    assert r.gradient_spread ** 2 == pytest.approx(5 * r.beta, rel=1e-12)
    assert r.top_log_sd ** 2 == pytest.approx(5 * r.beta, rel=1e-12)
    assert r.top_drift == pytest.approx(0.0, abs=1e-12)  # V is linear: no Jensen shift
    assert not r.spread_ok
    at = finite_width("relu", 2.0, 0.0, [r.width_needed] * 11)
    assert at.spread_ok and at.gradient_ok and at.drift_ok
    below = finite_width("relu", 2.0, 0.0, [r.width_needed - 2] * 11)
    assert not (below.spread_ok and below.drift_ok and below.gradient_ok)
    assert "width of about" in r.message


def _sim_logs(sim, reps):
    """Mean and standard deviation over networks of ln q_l and ln G_l from a Simulation."""
    out = []
    for lay in sim.layers:
        se_q = math.log(lay.q_geometric_band[1] / lay.q_geometric) / 2
        se_g = math.log(lay.gradient_geometric_band[1] / lay.gradient_geometric) / 2
        out.append((math.log(lay.q_geometric), se_q, math.log(lay.gradient_geometric), se_g))
    return out


CASES = [  # activation, plan depth, width, simulated depth, repetitions
    ("relu", None, 32, 6, 200),
    ("relu", None, 128, 20, 100),
    ("tanh", 20, 128, 20, 60),
    ("gelu", 16, 256, 16, 60),
    ("gelu", 8, 1024, 8, 24),
]


@pytest.mark.parametrize("name,plan_depth,width,depth,reps", CASES)
def test_against_seeded_networks(name, plan_depth, width, depth, reps):
    # seeded finite-width networks (propcalc.simulate, one input: c0 = 1) against the
    # first-order log-normal law: the mean of ln q_l and ln |g_l|^2 within 3 standard errors
    # plus 10% of the predicted correction; their spread within 25% (sampling of a standard
    # deviation over >= 24 networks, plus the first-order error)
    if plan_depth is None:
        sw, sb, q0 = 2.0, 0.0, 1.0
    else:
        plan = pc.recommend(name, depth=plan_depth)
        sw, sb, q0 = plan.sigma_w2, plan.sigma_b2, plan.q_star
    pred = finite_width(name, sw, sb, [width] * (depth + 1), q0)
    sim = simulate(pc.activation(name), sw, sb, width=width, depth=depth, q0=q0, c0=1.0,
                   repetitions=reps, n_pairs=1, seed=11)
    logs = _sim_logs(sim, reps)
    for layer in (depth // 2, depth):
        mq, se_q, _, _ = logs[layer]
        want = math.log(pred.q_typical[layer])
        corr = abs(want - math.log(pred.q_mean_field[layer]))
        assert abs(mq - want) <= 3 * se_q + 0.1 * corr + 1e-3, (layer, mq, want)
        assert se_q * math.sqrt(reps) == pytest.approx(pred.q_log_sd[layer], rel=0.25)
    for layer in (0, depth // 2):
        _, _, mg, se_g = logs[layer]
        want = math.log(pred.gradient_typical[layer])
        corr = abs(want - math.log(pred.gradient_mean_field[layer]))
        assert abs(mg - want) <= 3 * se_g + 0.1 * corr + 1e-3, (layer, mg, want)
        assert se_g * math.sqrt(reps) == pytest.approx(pred.gradient_log_sd[layer], rel=0.25)


def test_issue_gelu_plan_is_flagged():
    # issue 15: the GELU plan for 64 layers of width 128 (q* = 14.1, weakly attracting) lost
    # its second moment; the law flags spread and drift, and names a width that fixes them
    plan = pc.recommend("gelu", depth=64)
    assert plan.q_star == pytest.approx(14.1, abs=0.05)
    r = finite_width("gelu", plan.sigma_w2, plan.sigma_b2, [128] * 65, plan.q_star)
    assert r.top_log_sd > SPREAD_LIMIT and r.top_typical_drift < -DRIFT_LIMIT
    assert not r.within_expansion
    assert 300 < r.width_needed < 1000
    ok = finite_width("gelu", plan.sigma_w2, plan.sigma_b2, [r.width_needed] * 65, plan.q_star)
    assert ok.spread_ok and ok.drift_ok and ok.gradient_ok


def test_bad_input():
    with pytest.raises(InvalidParameterError, match="widths"):
        finite_width("tanh", 1.0, 0.0, [128])
    with pytest.raises(InvalidParameterError, match=r"widths\[1\]"):
        finite_width("tanh", 1.0, 0.0, [128, 1, 8])
    with pytest.raises(InvalidParameterError, match="widths"):
        finite_width("tanh", 1.0, 0.0, "128")
    with pytest.raises(InvalidParameterError, match="sigma_w2"):
        finite_width("tanh", -1.0, 0.0, [8, 8])
    with pytest.raises(InvalidParameterError, match="q"):
        layer_fluctuations("tanh", [1.0, float("nan")], 1.0)
    with pytest.raises(ComputationError, match="jumps"):
        finite_width("step", 1.0, 0.1, [8, 8])
    with pytest.raises(ComputationError, match="explodes|collapses"):
        finite_width("relu", 4.0, 0.0, [8] * 200, 1.0)


def test_result_dict_is_json_ready():
    r = finite_width("tanh", 1.5, 0.05, [64] * 5)
    d = pc.jsonable(r.to_dict())
    assert d["width_needed"] == r.width_needed and len(d["q_log_sd"]) == 5


def test_extremes_stay_finite_or_say_why():
    # chaotic tanh over 10000 layers: chi_1^L passes the double range (inf, no warning);
    # a collapsing ReLU (sigma_w2 = 1) is refused with the reason, not a domain error on q
    r = finite_width("tanh", 3.0, 0.0, [64] * 10001)
    assert r.gradient_mean_field[0] == math.inf and pc.jsonable(r.to_dict())
    with pytest.raises(ComputationError, match="collapses"):
        finite_width("relu", 1.0, 0.0, [64] * 3001)
    one_output = finite_width("sigmoid", 4.0, 0.1, [2] * 50 + [1])
    assert "width 2" in one_output.message


@pytest.mark.parametrize("width", [32])  # 64 and 128 in docs/finite_width.md (slower)
def test_jensen_drift_of_the_mean_against_seeded_networks(width):
    # tanh at sigma_w2 = 1.15, sigma_b2 = 0: q* = 0.079 attracts weakly (chi_q = 0.875) and V is
    # concave, so fluctuations lower the mean of q (Jensen; the 1/n shift of the mean metric,
    # Roberts, Yaida & Hanin 2022). 400 seeded networks (propcalc.simulate) over 60 layers:
    # measured -13.3% +- 2.6% (width 32) and -8.0% +- 1.7% (width 64) against -17.5% and -8.7%
    # predicted; the drift is clearly there (beyond 3 SE) and halves with twice the width
    sw = 1.15
    q_star = pc.propagation("tanh", sw, 0.0).q_star
    pred = finite_width("tanh", sw, 0.0, [width] * 61, q_star)
    sim = simulate(pc.activation("tanh"), sw, 0.0, width=width, depth=60, q0=q_star, c0=1.0,
                   repetitions=400, n_pairs=1, seed=3)
    top = sim.layers[-1]
    measured, se = top.q_mean / q_star - 1, top.q_se / q_star
    want = pred.q_mean[-1] / q_star - 1
    assert measured < -3 * se
    assert abs(measured - want) <= 3 * se + 0.1 * abs(want)
    assert pred.within_expansion
    typical = math.log(top.q_geometric / q_star)
    se_log = math.log(top.q_geometric_band[1] / top.q_geometric) / 2
    assert abs(typical - math.log(pred.q_typical[-1] / q_star)) <= 3 * se_log


def test_varying_widths_relu_bookkeeping_and_sampling():
    # ReLU, sigma_w2 = 2 (He et al. 2015): every layer adds 5 / n_l to Var ln s, n_l the width of
    # the layer whose units are averaged (Hanin & Nica 2019), and the top layer's own sampling
    # adds 2 / n_L to ln q_L. Checked against seeded numpy networks with these widths.
    widths = [16, 48, 24, 96, 32]
    r = finite_width("relu", 2.0, 0.0, widths)
    assert r.top_log_sd ** 2 == pytest.approx(5 * sum(1 / n for n in widths[:-1]), rel=1e-12)
    assert r.gradient_spread ** 2 == pytest.approx(5 * sum(1 / n for n in widths[:-1]), rel=1e-12)
    assert r.q_log_sd[2] ** 2 == pytest.approx(5 * (1 / 16 + 1 / 48) + 2 / 24, rel=1e-12)
    rng = np.random.default_rng(7)
    reps = 4000
    logs = np.empty(reps)
    for k in range(reps):
        h = rng.standard_normal(widths[0])
        h *= math.sqrt(widths[0]) / np.linalg.norm(h)  # mean square exactly q0 = 1
        for n_in, n_out in zip(widths[:-1], widths[1:]):
            w = rng.standard_normal((n_out, n_in)) * math.sqrt(2.0 / n_in)
            h = w @ np.maximum(h, 0.0)
        logs[k] = math.log(np.mean(h * h))
    sd, se_sd = logs.std(ddof=1), logs.std(ddof=1) / math.sqrt(2 * (reps - 1))
    # first order in 1/n at widths down to 16 (measured sd 0.857 vs 0.860, mean -0.338 vs
    # -0.370): within 3 SE plus 5% (sd) or 10% (mean) of the prediction
    assert abs(sd - r.q_log_sd[-1]) <= 3 * se_sd + 0.05 * r.q_log_sd[-1]
    se_mean = sd / math.sqrt(reps)
    want = math.log(r.q_typical[-1])
    assert abs(logs.mean() - want) <= 3 * se_mean + 0.1 * abs(want)


def test_variances_beyond_the_documented_q_domain_are_refused_by_name():
    # the project's error contract (PREAMBLE) and propcalc.domains' q range: q = 1e300 gave
    # gradient_noise 3.9e150 with an overflow warning, finite_width's q0 = 1e300 a refusal
    # naming 'q'
    with pytest.raises(InvalidParameterError, match=r"q must be 0 or in \[1e-200, 1e12\], got 1e\+300"):
        layer_fluctuations("tanh", 1e300, 1.5, 0.05)
    with pytest.raises(InvalidParameterError, match=r"q0 must be 0 or in \[1e-200, 1e12\]"):
        finite_width("tanh", 1.5, 0.05, [8, 8, 8], 1e300)
