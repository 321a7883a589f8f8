"""Tests of propcalc.variants.dropout: closed forms (arc-cosine kernel), limits and seeded networks."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import optimize

import propcalc
from propcalc.variants.dropout import (
    dropout_propagation,
    dropout_sweep,
    relu_dropout_correlation_map,
    relu_dropout_correlation_slope,
)


def _k1(c):
    # normalised arc-cosine kernel of degree 1 (Cho & Saul 2009, eq. 6):
    # J_1(theta) / pi with J_1 = sin theta + (pi - theta) cos theta, theta = arccos c
    theta = np.arccos(c)
    return (np.sin(theta) + (math.pi - theta) * np.cos(theta)) / math.pi


@pytest.mark.parametrize("rho", [0.3, 0.5, 0.8, 0.95, 0.99])
def test_relu_fixed_point_against_arc_cosine_closed_form(rho):
    # sigma_w2 = 2 rho keeps the diagonal map at V(q) = q; C(c) = rho k_1(c)
    # (derivation in relu_dropout_correlation_map), c* by brentq on the closed form
    c_ref = optimize.brentq(lambda c: rho * _k1(c) - c, 0.0, 1.0, xtol=1e-15, rtol=4e-15)
    # C'(c) = rho (pi - arccos c) / pi: the degree-0 arc-cosine kernel (Cho & Saul 2009)
    slope_ref = rho * (math.pi - math.acos(c_ref)) / math.pi
    rep = dropout_propagation(propcalc.activation("relu"), 2 * rho, 0.0, rho, depth=20)
    assert rep.status == "neutral"
    assert_allclose(rep.q_star, 2 * rho / rho * 1.0, rtol=1e-15)  # q_start = (sw/rho) q_input
    assert abs(rep.c_star - c_ref) < 1e-10
    assert abs(rep.chi_c - slope_ref) < 1e-10
    assert_allclose(rep.xi_c, -1.0 / math.log(slope_ref), rtol=1e-9)
    assert_allclose(rep.trainable_depth, 6 * rep.xi_c)
    # gradients: chi_1 = (sigma_w2 / rho) E[relu'^2] = 2 * 1/2 = 1
    assert_allclose(rep.chi_1, 1.0, rtol=1e-13)


def test_closed_form_helpers_match_the_kernel():
    c = np.linspace(-1, 1, 21)
    assert_allclose(relu_dropout_correlation_map(c, 0.7), 0.7 * _k1(c), atol=1e-15)
    assert_allclose(relu_dropout_correlation_map(1.0, 0.7), 0.7, atol=1e-15)
    h = 1e-6
    mid = c[1:-1]
    fd = (relu_dropout_correlation_map(mid + h, 0.7)
          - relu_dropout_correlation_map(mid - h, 0.7)) / (2 * h)
    assert_allclose(relu_dropout_correlation_slope(mid, 0.7), fd, atol=1e-8)


def test_no_edge_of_chaos_with_dropout():
    # Schoenholz et al. 2017: for every rho < 1, c* < 1 and xi_c is finite; xi_c grows
    # as rho -> 1 (at the edge-of-chaos point of the dropout-free network)
    tanh = propcalc.activation("tanh")
    cp = propcalc.edge_of_chaos(tanh, 1.0)
    xis = []
    for rho in (0.6, 0.8, 0.9, 0.97, 0.995):
        rep = dropout_propagation(tanh, cp.sigma_w2, cp.sigma_b2, rho, depth=400)
        assert rep.c_star < 1.0
        assert math.isfinite(rep.xi_c) and rep.chi_c < 1.0
        assert rep.depth_ok is False
        assert any("no edge of chaos" in n for n in rep.notes)
        xis.append(rep.xi_c)
    assert all(a < b for a, b in zip(xis, xis[1:]))


def test_keep_rate_one_reproduces_the_plain_report():
    # chaotic tanh point: c* < 1 is the same fixed point as propcalc.propagation finds
    tanh = propcalc.activation("tanh")
    plain = propcalc.propagation(tanh, 2.0, 0.05)
    rep = dropout_propagation(tanh, 2.0, 0.05, 1.0)
    assert_allclose(rep.q_star, plain.q_star, rtol=1e-13)
    assert_allclose(rep.c_star, plain.c_star, atol=1e-10)
    assert_allclose(rep.chi_c, plain.chi_c, rtol=1e-9)
    assert_allclose(rep.chi_1, plain.chi_1, rtol=1e-13)


def test_diagonal_map_uses_sigma_w2_over_rho():
    tanh = propcalc.activation("tanh")
    rep = dropout_propagation(tanh, 1.2, 0.1, 0.75)
    assert_allclose(float(propcalc.variance_map(tanh, rep.q_star, 1.2 / 0.75, 0.1)), rep.q_star,
                    rtol=1e-12)
    # off-diagonal unchanged: C(c*) = (sigma_w2 E[phi phi] + sigma_b2) / q* = c*
    from propcalc.meanfield.maps import pair_expectation
    c_map = (1.2 * float(pair_expectation(tanh, rep.c_star, rep.q_star)) + 0.1) / rep.q_star
    assert_allclose(c_map, rep.c_star, atol=1e-12)


def test_collapse_is_linear():
    rep = dropout_propagation(propcalc.activation("tanh"), 0.5, 0.0, 0.9)
    assert rep.status == "collapse" and rep.q_star == 0.0
    assert rep.c_star == 0.0 and rep.chi_c == 0.9


def test_sweep_with_scaled_weights_keeps_q_star():
    relu = propcalc.activation("relu")
    sweep = dropout_sweep(relu, 2.0, 0.0, [0.5, 0.9, 1.0], depth=10, scale_with_keep_rate=True)
    assert [r.sigma_w2 for r in sweep.reports] == [1.0, 1.8, 2.0]
    assert all(r.q_star == 2.0 for r in sweep.reports)
    assert sweep.reports[-1].c_star == 1.0  # no dropout: ReLU at sigma_w2 = 2 is critical
    json.dumps(propcalc.jsonable(sweep.to_dict()), allow_nan=False)


def test_seeded_network_with_dropout_follows_the_maps():
    """Seeded tanh networks (width 1000) with dropout: the mean square of the
    pre-activations stays at q*(rho), and the correlation of one input under two
    independent masks follows C(c) = (sigma_w2 E[phi phi] + sigma_b2) / q* from
    c = 1 down towards c* (Schoenholz et al. 2017)."""
    from propcalc.meanfield.maps import pair_expectation
    tanh = propcalc.activation("tanh")
    sw, sb, rho = 1.5, 0.05, 0.8
    rep = dropout_propagation(tanh, sw, sb, rho)
    q = rep.q_star
    n, depth, reps = 1000, 6, 6
    c_pred = [1.0]
    for _layer in range(depth):
        c_pred.append((sw * float(pair_expectation(tanh, c_pred[-1], q)) + sb) / q)
    rng = np.random.default_rng(5)
    qs, cs = np.empty((reps, depth)), np.empty((reps, depth))
    for r in range(reps):
        h = np.repeat(rng.standard_normal((n, 1)) * math.sqrt(q), 2, axis=1)
        for layer in range(depth):
            w = rng.standard_normal((n, n)) * math.sqrt(sw / n)
            b = rng.standard_normal((n, 1)) * math.sqrt(sb)
            masks = rng.random((n, 2)) < rho  # independent masks for the two copies
            h = w @ (masks * np.tanh(h) / rho) + b
            qs[r, layer] = float(np.mean(h * h))
            cs[r, layer] = float(h[:, 0] @ h[:, 1] / np.linalg.norm(h[:, 0])
                                 / np.linalg.norm(h[:, 1]))
    # Tolerances from the sample size: per network the relative sd of q is about
    # sqrt(2 / n) = 4.5% and the empirical correlation of n unit pairs has sd about
    # (1 - c^2) / sqrt(n) <= 0.03 per layer, accumulating to about 0.04 over the layers
    # (fluctuations persist for ~xi_c layers); 4 standard errors of a mean of 6 networks.
    tol_q = 4 * 0.045 * q / math.sqrt(reps)
    tol_c = 4 * 0.04 / math.sqrt(reps)
    assert np.all(np.abs(qs.mean(axis=0) - q) < tol_q)
    assert np.all(np.abs(cs.mean(axis=0) - np.array(c_pred[1:])) < tol_c)
    # the dropout signature: one input decorrelates from itself, C(1) < 1, beyond the noise
    assert 1.0 - cs[:, 0].mean() > 2 * tol_c


@pytest.mark.parametrize("kwargs, match", [
    ({"keep_rate": 0.0}, r"keep_rate must be in \(0, 1\], got 0.0"),
    ({"keep_rate": 1.5}, r"keep_rate must be in \(0, 1\], got 1.5"),
    ({"keep_rate": float("nan")}, r"keep_rate must be a finite real number"),
    ({"keep_rate": 0.5, "sigma_w2": -1.0}, r"sigma_w2 must be > 0, got -1.0"),
    ({"keep_rate": 0.5, "depth": 0}, r"depth must be an integer >= 1, got 0"),
])
def test_bad_input_names_the_field(kwargs, match):
    args = {"act": propcalc.activation("tanh"), "sigma_w2": 1.0, "sigma_b2": 0.0}
    args.update(kwargs)
    with pytest.raises(propcalc.InvalidParameterError, match=match):
        dropout_propagation(**args)


def test_sweep_names_the_bad_entry():
    with pytest.raises(propcalc.InvalidParameterError, match=r"keep_rates\[1\] must be in"):
        dropout_sweep(propcalc.activation("relu"), 2.0, 0.0, [0.5, 2.0])
