"""Every block kind against seeded finite-width simulation (numpy), within bands.

Reference: seeded numpy networks of the described blocks (propcalc.networks.simulate, widths
256-512), whose backward passes are checked here against central finite differences. A
prediction matches when it lies within mean +- 2 standard errors of the repetitions, widened by
the tolerance (5% relative for q and the gradient, 0.05 absolute for c; the rule of
propcalc.simulate): finite-width corrections are O(1/width) per block.
"""

from __future__ import annotations

import numpy as np
import pytest

import propcalc
from propcalc.networks import network
from propcalc.networks.sim_blocks import Field, forward_block


def dense(sw, sb=0.0, **kw):
    return {"dense": {"sigma_w2": sw, "sigma_b2": sb, **kw}}


def act(name):
    return {"activation": name}


def residual(*branch, weight=1.0):
    return {"residual": {"branch": list(branch), "weight": weight}}


def repeat(times, *blocks):
    return {"repeat": {"times": times, "blocks": list(blocks)}}


def test_backward_passes_match_finite_differences():
    # reference: central differences of L = sum(v * block(x)) (step 1e-6)
    blocks = network({"blocks": [
        {"attention": {"tokens": 5, "heads": 2, "query_key_scale": 1.3}}, {"norm": "layer"},
        {"norm": {"kind": "rms", "gain": 1.3, "eps": 0.1}}, {"norm": {"kind": "batch", "eps": 0.01}},
        {"convolution": {"sigma_w2": 2.0, "sigma_b2": 0.1, "kernel": 3, "stride": 2}},
        {"pooling": {"kind": "average", "window": 2, "stride": 1}},
        {"pooling": {"kind": "max", "window": 2}},
        {"pooling": {"kind": "global_average", "positions": 5}}, dense(1.0, 0.1),
        {"dropout": {"keep_rate": 0.7}}, act("gelu")]}).blocks
    rng = np.random.default_rng(0)
    x = rng.standard_normal((3, 5, 6))
    for b in blocks:
        out, back = forward_block(b, Field(x, (5,)), np.random.default_rng(1), 6)
        v = rng.standard_normal(out.x.shape)
        g = back(v)
        num = np.zeros_like(x)
        for idx in np.ndindex(x.shape):
            xp, xm = x.copy(), x.copy()
            xp[idx] += 1e-6
            xm[idx] -= 1e-6
            fp = forward_block(b, Field(xp, (5,)), np.random.default_rng(1), 6)[0].x
            fm = forward_block(b, Field(xm, (5,)), np.random.default_rng(1), 6)[0].x
            num[idx] = (np.sum(v * fp) - np.sum(v * fm)) / 2e-6
        assert np.max(np.abs(num - g)) <= 1e-7 * np.max(np.abs(num)), b


def _check(description, **kw):
    sim = propcalc.simulate(description, **kw)
    assert sim.mismatches == (), [
        (p.index, p.q, p.q_predicted, p.c, p.c_predicted, p.gradient, p.gradient_predicted)
        for p in sim.positions if p.index in sim.mismatches]
    return sim


def test_dense_and_activations():
    sim = _check({"blocks": [repeat(4, dense(1.5, 0.05), act("tanh")), dense(2.0), act("relu"),
                             dense(1.0, 0.1), act("x * tanh(softplus(x))")]},
                 width=512, c0=0.3, repetitions=6)
    assert sim.positions[-1].q_in_band and len(sim.positions) == 13


def test_orthogonal_weights_have_the_gaussian_maps():
    # orthogonal and delta-orthogonal draws (QR factorisations: kept small, they are slow on a
    # loaded machine) against the same mean-field maps as Gaussian weights
    _check({"blocks": [dense(2.0, weights="orthogonal"), act("relu"),
                       {"convolution": {"sigma_w2": 1.5, "sigma_b2": 0.05, "kernel": 3,
                                        "weights": "delta_orthogonal"}}, act("tanh")]},
           width=128, grid=16, c0=0.3, repetitions=6)


def test_residual_blocks_with_and_without_a_mean():
    _check({"blocks": [dense(1.0), repeat(6, residual(act("relu"), dense(2.0), weight=0.5)),
                       repeat(3, residual(dense(1.5), act("relu"), weight=0.5))]},
           width=512, c0=0.3, repetitions=6)


def test_layer_rms_norm_and_dropout():
    _check({"blocks": [dense(2.0), act("relu"), {"norm": "layer"}, dense(1.0), act("gelu"),
                       {"norm": {"kind": "rms", "gain": 1.5}}, {"dropout": {"keep_rate": 0.8}},
                       dense(1.5), act("tanh")]}, width=512, c0=0.3, repetitions=6)


def test_batch_norm_in_a_large_batch():
    # a batch of 64 exchangeable inputs: the 1/batch corrections stay inside the tolerance
    _check({"blocks": [repeat(3, dense(1.7), {"norm": "batch"}, act("relu"))]},
           width=256, c0=0.4, inputs=64, repetitions=4)


@pytest.mark.slow
def test_convolutions_pooling_and_the_global_average():
    _check({"blocks": [
        {"convolution": {"sigma_w2": 2.0, "sigma_b2": 0.0, "kernel": [3, 3]}}, act("relu"),
        {"convolution": {"sigma_w2": 2.0, "sigma_b2": 0.1, "kernel": [3, 3]}}, act("tanh"),
        {"pooling": {"kind": "average", "window": [2, 2]}},
        {"pooling": {"kind": "global_average", "positions": 9}}, dense(1.0)]},
        width=256, grid=[6, 6], c0=0.3, c0_within=0.2, c0_between=0.1, repetitions=4)


@pytest.mark.slow
@pytest.mark.parametrize("scale", [0.0, 0.5])
def test_attention_with_residual_and_layer_norm(scale):
    att = {"attention": {"tokens": 16, "heads": 4, "query_key_scale": scale}}
    _check({"blocks": [repeat(2, residual({"norm": "layer"}, att, weight=0.7),
                              residual({"norm": "layer"}, dense(2.0), act("relu"), dense(1.0),
                                       weight=0.7))]},
           width=256, c0=0.3, c0_within=0.2, c0_between=0.1, repetitions=4)


def test_non_gaussian_positions_come_from_the_simulation():
    # relu(x + F(x)) with a relu stream x: not Gaussian after the first sum; the propagation
    # says so and reports the simulated numbers there, with bands
    post = {"blocks": [dense(1.0), act("relu"),
                       repeat(3, residual(dense(2.0), act("relu"), dense(2.0), weight=0.5),
                              act("relu"))]}
    r = propcalc.network_propagation(post, 1.0, 0.2, simulation_width=256)
    assert r.gaussian_positions == 3
    assert [b.source for b in r.blocks] == ["mean field"] * 3 + ["simulation"] * 5
    assert r.blocks[3].law == "unknown"
    assert any(f.topic == "validity" for f in r.summary.findings)
    sim = r.simulation
    assert sim is not None and sim.width == 256
    assert r.q[5] == sim.positions[5].q and r.c[8] == sim.positions[8].c
    # the gradient below the first unknown block: the recursion times the simulated value
    assert r.gradient[0] == pytest.approx(r.gradient[2] * r.blocks[0].jacobian
                                          * r.blocks[1].jacobian, rel=1e-12)
    assert r.gradient[3] == sim.positions[3].gradient
    none = propcalc.network_propagation(post, 1.0, 0.2, simulate=False)
    assert none.q[5] is None and none.simulation is None and none.gradient[-1] == 1.0


def test_max_pooling_is_simulated():
    r = propcalc.network_propagation({"blocks": [
        {"convolution": {"sigma_w2": 2.0, "sigma_b2": 0.0, "kernel": 3}}, act("relu"),
        {"pooling": {"kind": "max", "window": 2}}, dense(2.0)]}, 1.0, 0.3, c0_within=0.2,
        c0_between=0.1, simulation_width=128)
    assert r.gaussian_positions == 2 and r.blocks[2].source == "simulation"
    assert r.q[3] is not None and r.q[3] > 0


def test_simulation_limits_are_named():
    with pytest.raises(propcalc.InvalidParameterError) as info:
        propcalc.simulate({"blocks": [repeat(2000, dense(1.0))]}, width=4096)
    assert info.value.field == "width"
    with pytest.raises(propcalc.InvalidParameterError) as info:
        propcalc.simulate({"blocks": [{"attention": {"tokens": 8}}]}, grid=4, width=64)
    assert info.value.field == "grid"
