"""Network propagation against closed forms and the engine's own analyses.

References, each beside its check:
* the plain stack: propcalc's layer-by-layer trajectory (mean_field_trajectory) and
  propagation() (q*, c*, chi_1; Poole et al. 2016, Schoenholz et al. 2017);
* ReLU: the arc-cosine kernel of Cho & Saul 2009 (eq. 6, n = 1 and n = 0), typed out here as
  k1(c) = (sqrt(1 - c^2) + (pi - arccos c) c) / (2 pi) and k0(c) = (pi - arccos c) / (2 pi),
  pushed through the residual recursion of Yang & Schoenholz 2017 (closed forms derived below);
* layer norm: the reset q = gain^2 and the centred correlation (derived below from the
  definition of Ba et al. 2016);
* batch norm: the gradient rate E[phi'(u)^2] / Var[phi(u)] per block of the large-batch mean
  field (Yang et al. 2019), with scipy.integrate.quad for the expectations;
* the 1/sqrt(L) branch scaling (Hayou et al. 2021): the L -> infinity limit as an ODE solved
  with scipy.integrate.solve_ivp;
* dropout: propcalc.dropout_propagation's fixed point (Schoenholz et al. 2017);
* uniform attention: the rank-one output (Noci et al. 2022), closed forms derived below.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from scipy import integrate

import propcalc
from propcalc.meanfield.simulate import mean_field_trajectory
from propcalc.networks.propagate import network_propagation


def k1(c: float) -> float:
    return (math.sqrt(max(0.0, 1 - c * c)) + (math.pi - math.acos(c)) * c) / (2 * math.pi)


def dense(sw: float, sb: float = 0.0, **kw) -> dict:
    return {"dense": {"sigma_w2": sw, "sigma_b2": sb, **kw}}


def act(name: str) -> dict:
    return {"activation": name}


def repeat(times: int, *blocks: dict) -> dict:
    return {"repeat": {"times": times, "blocks": list(blocks)}}


def residual(*branch: dict, weight: float = 1.0, shortcut: float = 1.0) -> dict:
    return {"residual": {"branch": list(branch), "weight": weight, "shortcut": shortcut}}


@pytest.mark.parametrize(("name", "sw", "sb"), [("tanh", 1.5, 0.05), ("relu", 2.0, 0.0),
                                                  ("gelu", 1.7, 0.1), ("hard_tanh", 1.2, 0.01),
                                                  ("erf", 1.1, 0.02)])
def test_plain_stack_equals_the_engine_trajectory(name, sw, sb):
    # reference: propcalc's own layer-by-layer mean field (Poole et al. 2016; Schoenholz 2017)
    depth = 25
    r = network_propagation({"blocks": [repeat(depth, act(name), dense(sw, sb))]}, 1.0, 0.3)
    ref_q, ref_c, ref_g = mean_field_trajectory(propcalc.activation(name), sw, sb, depth, 1.0, 0.3)
    np.testing.assert_allclose(r.q[0::2], ref_q, rtol=1e-13)
    np.testing.assert_allclose(r.c[0::2], ref_c, rtol=0, atol=1e-14)
    np.testing.assert_allclose(r.gradient[0::2], ref_g, rtol=1e-13)
    chi = [b.jacobian for b in r.blocks]
    # a dense layer and its activation together: chi_1 = sigma_w2 E[phi'^2] at that layer
    np.testing.assert_allclose(np.array(chi[0::2]) * np.array(chi[1::2]),
                               ref_g[:-1] / ref_g[1:], rtol=1e-13)


def test_long_plain_stack_reaches_the_fixed_point_of_propagation():
    # reference: propagation()'s q*, c*, chi_1 (fixed points by root finding); xi_c = 10.3 here,
    # so 3000 layers are about 300 depth scales: converged to rounding
    p = propcalc.propagation("tanh", 3.0, 0.2)
    r = network_propagation({"blocks": [repeat(3000, act("tanh"), dense(3.0, 0.2))]}, 1.0, 0.0)
    assert len(r.q) == 6001
    assert r.q[-1] == pytest.approx(p.q_star, rel=1e-12)
    assert r.c[-1] == pytest.approx(p.c_star, abs=1e-10)
    assert r.blocks[-1].jacobian * r.blocks[-2].jacobian == pytest.approx(p.chi_1, rel=1e-11)


def test_relu_residual_network_closed_form():
    # x_{l+1} = x_l + w W relu(x_l): q' = q (1 + w^2 s / 2), k' = k + w^2 s q k1(c)
    # (Cho & Saul 2009 through the residual recursion of Yang & Schoenholz 2017); the gradient
    # factor per block is 1 + w^2 s E[relu'^2] = 1 + w^2 s / 2
    s0, s, w, depth, q0, c0 = 1.3, 2.0, 0.4, 60, 0.7, 0.1
    r = network_propagation({"blocks": [dense(s0), repeat(depth, residual(act("relu"), dense(s),
                                                                          weight=w))]}, q0, c0)
    q, k = s0 * q0, s0 * q0 * c0
    qs, cs = [q0, q], [c0, c0]
    for _ in range(depth):
        q, k = q * (1 + w * w * s / 2), k + w * w * s * q * k1(k / q)
        qs.append(q)
        cs.append(k / q)
    np.testing.assert_allclose(r.q, qs, rtol=1e-13)
    np.testing.assert_allclose(r.c, cs, rtol=0, atol=1e-14)
    assert r.gradient[0] == pytest.approx(s0 * (1 + w * w * s / 2) ** depth, rel=1e-13)
    assert all(b.law == "gaussian" for b in r.blocks)
    assert r.gaussian_positions == depth + 1


def test_residual_branch_ending_in_an_activation_carries_the_mean():
    # branch F(x) = relu(W x): E[F] = sqrt(s q / (2 pi)) (Cho & Saul 2009, n = 1 at c = 1 with
    # the mean of relu); the stream gains a mean m, and the next block's cross term is
    # 2 w m E[F] (independence of F_i and x_i at infinite width; derived in rules.residual)
    s, w, q0, c0 = 1.5, 0.5, 1.0, 0.2
    r = network_propagation({"blocks": [repeat(3, residual(dense(s), act("relu"), weight=w))]},
                            q0, c0)
    q, k, m = q0, q0 * c0, 0.0
    for i in range(3):
        qh, ch = s * q, k / q
        mf = math.sqrt(qh / (2 * math.pi))
        q, k, m = (q + w * w * qh / 2 + 2 * w * m * mf,
                   k + w * w * qh * k1(ch) + 2 * w * m * mf, m + w * mf)
        assert r.q[i + 1] == pytest.approx(q, rel=1e-13)
        assert r.c[i + 1] == pytest.approx(k / q, abs=1e-14)
        assert r.mean[i + 1] == pytest.approx(m, rel=1e-13)
    assert r.blocks[0].law == "general"


def test_layer_norm_resets_q_and_keeps_the_centred_correlation():
    # LN(relu(h)) with h at (qh, c): q = gain^2 exactly; c = (k1(c) - 1/(2 pi)) / (1/2 - 1/(2 pi))
    # (means over units: E relu = sqrt(qh / 2 pi), E relu^2 = qh / 2; definition of Ba et al.
    # 2016 at infinite width). Backward factor gain^2 / (qh (1/2 - 1/(2 pi))).
    sw, c0, gain = 2.5, 0.3, 1.7
    r = network_propagation({"blocks": [dense(sw), act("relu"),
                                        {"norm": {"kind": "layer", "gain": gain}}]}, 1.0, c0)
    qh = sw
    assert r.q[3] == pytest.approx(gain ** 2, rel=1e-14)
    assert r.c[3] == pytest.approx((k1(c0) - 1 / (2 * math.pi)) / (0.5 - 1 / (2 * math.pi)),
                                   abs=1e-14)
    assert r.mean[3] == 0.0
    assert r.blocks[2].jacobian == pytest.approx(gain ** 2 / (qh * (0.5 - 1 / (2 * math.pi))),
                                                 rel=1e-13)
    rms = network_propagation({"blocks": [dense(sw), act("relu"), {"norm": "rms"}]}, 1.0, c0)
    assert rms.q[3] == pytest.approx(1.0, rel=1e-14)
    assert rms.c[3] == pytest.approx(2 * k1(c0), abs=1e-14)  # c = E[relu relu] / E[relu^2]


@pytest.mark.parametrize("name", ["relu", "tanh"])
def test_batch_norm_gradient_rate(name):
    # Yang et al. 2019, large batch: per dense -> batch norm -> phi block the gradient grows by
    # E[phi'(u)^2] / Var[phi(u)], u ~ N(0, 1) (relu: pi / (pi - 1)); the expectations by quad
    phi = propcalc.activation(name)

    def gauss(f):
        return integrate.quad(lambda z: f(z) * math.exp(-z * z / 2) / math.sqrt(2 * math.pi),
                              -12, 12, points=[0.0], epsabs=1e-14, epsrel=1e-13, limit=200)[0]

    d2 = gauss(lambda z: float(phi.derivative(np.array([z]))[0]) ** 2)
    m1 = gauss(lambda z: float(phi.value(np.array([z]))[0]))
    m2 = gauss(lambda z: float(phi.value(np.array([z]))[0]) ** 2)
    rate = d2 / (m2 - m1 * m1)
    if name == "relu":
        assert rate == pytest.approx(math.pi / (math.pi - 1), rel=1e-12)
    r = network_propagation({"blocks": [repeat(8, dense(1.7), {"norm": "batch"}, act(name))]},
                            1.0, 0.4)
    g = np.array(r.gradient)
    np.testing.assert_allclose(g[3:-3:3] / g[6::3], rate, rtol=1e-10)
    assert r.c[2] == 0.0 and r.q[2] == pytest.approx(1.0, rel=1e-14)  # after the first norm
    if name == "relu":  # (pi / (pi - 1))^8 = 21.6 > the summary's factor 10
        assert any("Yang et al. 2019" in f.advice for f in r.summary.findings)


def test_one_over_sqrt_depth_limit():
    # Hayou et al. 2021: branch weight 1/sqrt(L) gives a limit as L -> infinity. With
    # F = W relu(x): q_L -> q0 exp(s / 2), gradient -> exp(s / 2), and c solves
    # dc/dt = s (k1(c) - c / 2) on t in [0, 1] (the continuum of the recursion above)
    s, q0, c0 = 2.0, 1.0, 0.2
    sol = integrate.solve_ivp(lambda t, c: [s * (k1(c[0]) - c[0] / 2)], (0.0, 1.0), [c0],
                              rtol=1e-12, atol=1e-14)
    c_limit = float(sol.y[0, -1])
    errors = []
    for depth in (250, 1000):
        r = network_propagation({"blocks": [repeat(depth, residual(
            act("relu"), dense(s), weight=1 / math.sqrt(depth)))]}, q0, c0)
        assert r.q[-1] == pytest.approx(q0 * (1 + s / (2 * depth)) ** depth, rel=1e-12)
        assert abs(r.q[-1] / (q0 * math.exp(s / 2)) - 1) < 2 * s * s / depth
        errors.append(abs(r.c[-1] - c_limit))
        assert errors[-1] < 2.0 / depth
    assert errors[1] < 0.35 * errors[0]  # first order in 1/L


def test_dropout_stack_reaches_the_dropout_fixed_point():
    # propcalc.dropout_propagation (Schoenholz et al. 2017): q* = (s / rho) E[phi^2] + sb, and
    # the correlation map unchanged off the diagonal
    p = propcalc.dropout_propagation(propcalc.activation("tanh"), 1.8, 0.05, 0.8)
    r = network_propagation({"blocks": [repeat(400, act("tanh"), {"dropout": {"keep_rate": 0.8}},
                                               dense(1.8, 0.05))]}, 1.0, 0.5)
    assert r.q[-1] == pytest.approx(p.q_star, rel=1e-10)
    assert r.c[-1] == pytest.approx(p.c_star, abs=1e-9)


def test_uniform_attention_closed_forms():
    # Noci et al. 2022: with uniform attention every output token is W_O W_V xbar:
    # q' = sv so (q + (T - 1) kw) / T, tokens identical (c_within = 1),
    # k' = sv so (k + (T - 1) kb) / T. With a residual branch of weight w:
    # 1 - cw' = (1 - cw) / (1 + w^2 sv so (1 + (T - 1) cw) / T) (derived from the sums above)
    t, sv, so, q0, c0, cw, cb = 8, 1.5, 0.8, 1.0, 0.4, 0.3, 0.1
    att = {"attention": {"tokens": t, "value_sigma_w2": sv, "output_sigma_w2": so,
                         "query_key_scale": 0.0}}
    r = network_propagation({"blocks": [att]}, q0, c0, c0_within=cw, c0_between=cb)
    q = sv * so * (q0 + (t - 1) * cw) / t
    assert r.q[1] == pytest.approx(q, rel=1e-14)
    assert r.c_within[1] == 1.0
    assert r.c[1] == pytest.approx(sv * so * (c0 + (t - 1) * cb) / t / q, rel=1e-13)
    assert any(f.topic == "attention" for f in r.summary.findings)
    w = 0.7
    r = network_propagation({"blocks": [residual(att, weight=w)]}, q0, c0, c0_within=cw,
                            c0_between=cb)
    assert 1 - r.c_within[1] == pytest.approx(
        (1 - cw) / (1 + w * w * sv * so * (1 + (t - 1) * cw) / t), rel=1e-13)
    # backward: each input token receives the mean of the output gradients (uncorrelated)
    assert r.gradient[0] == pytest.approx(1 + w * w * sv * so / t, rel=1e-13)


def test_average_pooling_closed_form():
    # exchangeable positions: q' = (q + (k - 1) kw) / k; gradient per unit / k^2 (derived)
    r = network_propagation({"blocks": [{"pooling": {"kind": "average", "window": [2, 2]}}]},
                            2.0, 0.5, c0_within=0.25, c0_between=0.125)
    assert r.q[1] == pytest.approx(2.0 * (1 + 3 * 0.25) / 4, rel=1e-14)
    assert r.c[1] == pytest.approx((0.5 + 3 * 0.125) / (1 + 3 * 0.25), rel=1e-14)
    assert r.gradient[0] == pytest.approx(1 / 16, rel=1e-14)


def test_convolution_follows_the_dense_maps_at_each_position():
    # Xiao et al. 2018: the diagonal of the spatial kernel follows the dense maps
    conv = network_propagation({"blocks": [repeat(6, {"convolution": {
        "sigma_w2": 1.7, "sigma_b2": 0.1, "kernel": [3, 3]}}, act("tanh"))]}, 1.0, 0.3)
    plain = network_propagation({"blocks": [repeat(6, dense(1.7, 0.1), act("tanh"))]}, 1.0, 0.3)
    assert conv.q == plain.q and conv.c == plain.c and conv.gradient == plain.gradient
    damp = conv.summary.spatial
    # uniform 3-tap profile: |sin(3k/2) / (3 sin(k/2))| per block at wavelength 4 (k = pi / 2)
    assert damp.damping[1] == pytest.approx(abs(math.sin(3 * math.pi / 4)
                                                / (3 * math.sin(math.pi / 4))) ** 6, rel=1e-12)
    assert damp.delta_orthogonal_damping[1] == 1.0


def test_fixed_point_copies_are_not_recomputed_and_match():
    r = network_propagation({"blocks": [repeat(20000, dense(1.0, 0.0), {"norm": "layer"})]},
                            1.0, 0.3)
    assert len(r.q) == 40001 and r.q[-1] == pytest.approx(1.0)
    assert r.blocks[-1].copy == (20000,) and r.blocks[-1].path == "/blocks/0/repeat/blocks/1"


def test_result_is_strict_json_and_names_its_sources():
    r = network_propagation({"blocks": [dense(2.0), act("relu"), {"dropout": {"keep_rate": 0.5}},
                                        dense(1.0), act("tanh")]}, 1.0, 0.0)
    text = json.dumps(propcalc.jsonable(r.to_dict()), allow_nan=False)
    d = json.loads(text)
    assert set(d) >= {"q", "c", "gradient", "blocks", "summary"}
    assert "trace" not in d and "network" not in d
    assert [b["kind"] for b in d["blocks"]] == ["dense", "activation", "dropout", "dense",
                                                "activation"]


@pytest.mark.parametrize(("kwargs", "field"), [
    ({"q0": -1.0}, "q0"), ({"c0": 1.5}, "c0"), ({"q0": float("nan")}, "q0"),
])
def test_bad_inputs_are_named(kwargs, field):
    with pytest.raises(propcalc.InvalidParameterError) as info:
        network_propagation({"blocks": [dense(1.0)]}, **kwargs)
    assert info.value.field == field


def test_position_correlations_must_be_compatible():
    net = {"blocks": [{"attention": {"tokens": 4}}]}
    with pytest.raises(propcalc.InvalidParameterError, match="c0_between"):
        network_propagation(net, 1.0, 0.0, c0_within=0.1, c0_between=0.5)
    with pytest.raises(propcalc.InvalidParameterError, match="c0_within"):
        network_propagation(net, 1.0, 0.0, c0_within=-0.5)
    with pytest.raises(propcalc.NetworkDescriptionError, match="several positions"):
        network_propagation({"blocks": [{"pooling": {"kind": "global_average", "positions": 4}},
                                        {"attention": {"tokens": 4}}]})


def test_exploding_and_vanishing_signals_stop_with_their_reason():
    # no NaN and no error from the maps' domain: the positions are reported as not computed
    for blocks, word in (([repeat(100, dense(1e4), act("relu"))], "exploded"),
                         ([repeat(400, dense(1e-6), act("tanh"))], "vanished"),
                         ([dense(1.0), act("x**3"), dense(1.0), act("x**3"), dense(1.0),
                           act("x**3")], "exploded")):
        r = network_propagation({"blocks": blocks}, 100.0 if "x**3" in str(blocks) else 1.0, 0.2)
        assert r.gaussian_positions < len(r.q) - 1
        assert r.q[-1] is None and r.gradient[0] is None and r.simulation is None
        assert word in r.notes[0] and "not run" in r.notes[1]
        assert r.summary.findings[0].topic == "validity"
        json.dumps(propcalc.jsonable(r.to_dict()), allow_nan=False)
    # relu is homogeneous: its closed forms hold at any variance, so it underflows to 0 cleanly
    r = network_propagation({"blocks": [repeat(100, dense(1e-6), act("relu"))]}, 1.0, 0.2)
    assert r.q[-1] == 0.0 and r.c[-1] == 1.0


def test_batch_norm_of_identical_inputs_is_refused_with_its_reason():
    r = network_propagation({"blocks": [dense(1.0), act("relu"), {"norm": "batch"}]}, 1.0, 1.0)
    assert r.gaussian_positions == 2 and "zero variance" in r.notes[0]
    assert r.q[3] is None


def test_summary_finds_merging_decorrelation_and_power_laws():
    # ordered phase (Poole et al. 2016): c -> 1, inputs merge
    r = network_propagation({"blocks": [repeat(60, dense(0.5, 0.1), act("tanh"))]}, 1.0, 0.0)
    merged = r.summary.indistinguishable_at
    assert merged is not None and 1 - r.c[merged] <= r.summary.distance < 1 - r.c[merged - 1]
    # chaotic tanh without bias: c* = 0 (odd phi), similar inputs decorrelate
    r = network_propagation({"blocks": [repeat(60, dense(4.0), act("tanh"))]}, 1.0, 0.99)
    lost = r.summary.decorrelated_at
    assert lost is not None and abs(r.c[lost]) <= 0.05 < abs(r.c[lost - 2])
    assert r.summary.distance_ratio > 10
    # ReLU residual network: 1 - c ~ 1/l^2 asymptotically (Yang & Schoenholz 2017: power laws,
    # no exponential depth scale); c' = c + w^2 (2 k1(c) - c) / (1 + w^2), 2 k1(c) - c ~ (1-c)^1.5
    r = network_propagation({"blocks": [repeat(3000, residual(act("relu"), dense(2.0)))]},
                            1.0, 0.0)
    law = next(x for x in r.summary.depth_laws if x.quantity == "1 - c")
    assert law.law == "power" and -2.3 < law.exponent < -1.7
