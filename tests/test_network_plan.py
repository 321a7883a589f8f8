"""Plans for networks and the residual branch weight.

References: propcalc.recommend's plain plan (a plain stack must get exactly it); closed forms of
the ReLU residual recursion (Cho & Saul 2009 kernel through Yang & Schoenholz 2017's residual
sum, derived in tests/test_network_propagation.py): with F = W relu(x), sigma_w2 = 2 and weight
w, the gradient grows by 1 + w^2 per block, so the input's gradient is 10 at w = sqrt(10^(1/n) - 1);
the 1/sqrt(n) scaling of Hayou et al. 2021.
"""

from __future__ import annotations

import math

import pytest

import propcalc
from propcalc.networks.targets import branch_weight


def dense(sw, sb=0.0, **kw):
    return {"dense": {"sigma_w2": sw, "sigma_b2": sb, **kw}}


def act(name):
    return {"activation": name}


def repeat(times, *blocks):
    return {"repeat": {"times": times, "blocks": list(blocks)}}


def residual(*branch, weight=1.0):
    return {"residual": {"branch": list(branch), "weight": weight}}


def k1(c):
    return (math.sqrt(max(0.0, 1 - c * c)) + (math.pi - math.acos(c)) * c) / (2 * math.pi)


@pytest.mark.parametrize("name", ["tanh", "relu", "gelu"])
def test_a_plain_stack_gets_the_plain_plan(name):
    depth = 6
    net = {"input_width": 784, "blocks": [repeat(depth - 1, dense(1.0, width=256), act(name)),
                                          dense(1.0, width=10)]}
    plan = propcalc.network_plan(net)
    ref = propcalc.recommend(name, depth=depth)
    got = [x for b in plan.blocks for x in (b.sigma_w2, b.sigma_b2)]
    want = [x for i in (0, 1, -1) for x in (ref.layers[i].sigma_w2, ref.layers[i].sigma_b2)]
    assert got == pytest.approx(want, rel=1e-14, abs=1e-15)
    assert [b.copies for b in plan.blocks] == ["first", "rest", "all"]
    assert [b.fan_in for b in plan.blocks] == [784, 256, 256]
    assert plan.blocks[1].weight_std == pytest.approx(math.sqrt(ref.layers[1].sigma_w2 / 256))
    # the planned description writes the first copy out and repeats the rest
    blocks = plan.description["blocks"]
    assert blocks[0]["dense"]["sigma_w2"] == pytest.approx(ref.layers[0].sigma_w2, rel=1e-14)
    assert blocks[2]["repeat"]["times"] == depth - 2
    again = propcalc.network_propagation(plan.description, 1.0, 0.0)
    assert again.q[1] == pytest.approx(ref.q_star, rel=1e-12)  # starts at q*
    assert again.q[3] == pytest.approx(ref.q_star, rel=1e-12)


def test_delta_orthogonal_convolutions_and_orthogonal_dense():
    net = {"blocks": [repeat(4, {"convolution": {"sigma_w2": 1.0, "sigma_b2": 0.0,
                                                 "kernel": [3, 3]}}, act("relu")),
                      dense(1.0)]}
    plan = propcalc.network_plan(net, convolution="delta_orthogonal", distribution="orthogonal")
    conv = [b for b in plan.blocks if b.kind == "convolution"]
    assert {b.weights for b in conv} == {"delta_orthogonal"}
    assert plan.blocks[-1].weights == "orthogonal"
    assert conv[-1].sigma_w2 == pytest.approx(2.0)  # relu at the edge of chaos (He et al. 2015)
    damp = plan.summary.spatial
    assert damp is not None and damp.damping == damp.delta_orthogonal_damping
    with pytest.raises(propcalc.InvalidParameterError, match="convolution"):
        propcalc.network_plan(net, convolution="identity")


def _relu_residual(n, w):
    return {"blocks": [repeat(n, residual(act("relu"), dense(2.0), weight=w))]}


def test_branch_weight_meets_the_correlation_target_exactly():
    # closed form of the recursion: c' = (c + w^2 2 k1(c)) / (1 + w^2)  (sigma_w2 = 2)
    n, target = 40, 0.8
    found = branch_weight(_relu_residual(n, 1.0), target)
    w2 = found.weight ** 2
    c = 0.0
    for _ in range(n):
        c = (c + w2 * 2 * k1(c)) / (1 + w2)
    assert c == pytest.approx(target, abs=1e-9)
    assert found.c_at_weight == pytest.approx(target, abs=1e-9)
    assert found.depth_constant == pytest.approx(found.weight * math.sqrt(n))
    assert found.gradient_at_weight == pytest.approx((1 + w2) ** n, rel=1e-9)


def test_branch_weight_with_a_gradient_bound_and_its_depth_scaling():
    # the gradient binds: (1 + w^2)^n = 10; and w sqrt(n) tends to sqrt(ln 10) (Hayou et al. 2021)
    constants = []
    for n in (25, 100, 400):
        found = branch_weight(_relu_residual(n, 1.0), 0.99, max_gradient=10.0)
        assert found.weight == pytest.approx(math.sqrt(10 ** (1 / n) - 1), rel=1e-8)
        constants.append(found.depth_constant)
    assert constants[-1] == pytest.approx(math.sqrt(math.log(10)), rel=2e-3)
    assert abs(constants[2] - constants[1]) < abs(constants[1] - constants[0])


def test_branch_weight_edge_cases():
    net = _relu_residual(10, 1.0)
    none = branch_weight(net, 0.5, c0=0.7)
    assert none.weight is None and "no branch weight" in none.message
    prenorm = {"blocks": [repeat(8, residual({"norm": "layer"}, dense(2.0), act("gelu"),
                                             dense(1.0)))]}
    assert branch_weight(prenorm, 0.95).unbounded
    with pytest.raises(propcalc.InvalidParameterError, match="residual blocks"):
        branch_weight({"blocks": [dense(1.0)]})
    with pytest.raises(propcalc.InvalidParameterError, match="target"):
        branch_weight(net, 1.0)
    with pytest.raises(propcalc.InvalidParameterError, match="max_gradient"):
        branch_weight(net, 0.9, max_gradient=0.5)


def test_plan_sets_the_branch_weight_after_the_layers():
    net = {"blocks": [dense(1.0), repeat(50, residual(act("relu"), dense(1.0)))]}
    plan = propcalc.network_plan(net, target=0.9)
    assert plan.blocks[-1].sigma_w2 == pytest.approx(2.0)
    assert plan.branch_weight is not None and plan.input_gradient == pytest.approx(10.0, rel=1e-8)
    assert plan.output_c <= 0.9 + 1e-12
    weight = plan.description["blocks"][1]["repeat"]["blocks"][0]["residual"]["weight"]
    assert weight == pytest.approx(plan.branch_weight.weight)


def test_a_block_after_an_unknown_stream_is_kept_not_nan():
    # max pooling leaves the Gaussian recursion (the maximum of correlated units is not
    # Gaussian), so the second moment entering the next convolution is unknown: the plan
    # keeps that block as described and says why, instead of sigma_w2 = NaN
    conv = {"convolution": {"sigma_w2": 2.0, "sigma_b2": 0.0, "kernel": [3, 3]}}
    net = {"blocks": [conv, act("relu"), {"pooling": {"kind": "max", "window": 2}},
                      {"convolution": {"sigma_w2": 1.7, "sigma_b2": 0.0, "kernel": [3, 3]}},
                      act("relu")]}
    plan = propcalc.network_plan(net)
    after = next(b for b in plan.blocks if b.path == "/blocks/3")
    assert after.sigma_w2 == 1.7 and "not known" in after.rule
    assert all(math.isfinite(b.sigma_w2) and math.isfinite(b.sigma_b2) for b in plan.blocks)


@pytest.mark.parametrize("bound", [0.0, 1.0, float("nan")])
def test_max_gradient_is_checked_even_without_a_target(bound):
    # every option takes effect or is refused (issue 12 section 2): max_gradient = 0 or NaN
    # without a target was read and ignored
    desc = {"input_width": 4, "blocks": [{"dense": {"sigma_w2": 1.0, "sigma_b2": 0.0, "width": 8}},
                                         {"activation": "tanh"}]}
    with pytest.raises(propcalc.PropcalcError, match="max_gradient must be"):
        propcalc.network_plan(desc, max_gradient=bound)
