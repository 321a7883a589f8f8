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


# ---------------------------------------------------------------------------------------------
# with a loss (issue 15): the plan's learning rate, or why not by path. The reference is the
# Python API: propcalc.training.network_learning_rate_ceiling (itself checked against seeded
# torch kernels in tests/test_network_ntk_blocks.py) and the plan made without a loss.
# ---------------------------------------------------------------------------------------------
def attention(qk, tokens=4):
    return {"attention": {"tokens": tokens, "width": 32, "query_key_scale": qk}}


def mean_pool(positions=4):
    return {"pooling": {"kind": "global_average", "positions": positions}}


def conv(sw, width=8):
    return {"convolution": {"sigma_w2": sw, "sigma_b2": 0.0, "kernel": 3, "width": width}}


REFUSED = [
    # attention whose logits spread beyond logit std 2 (query_key_scale 30, distinct tokens)
    ([dense(1.0, width=32), act("tanh"), attention(30.0), mean_pool(), dense(1.0, width=3)],
     "block /blocks/2 (attention): the query-key logits spread"),
    # max pooling
    ([conv(1.0), act("relu"), {"pooling": {"kind": "max", "window": 2}}, mean_pool(2),
      dense(1.0, width=3)], "block /blocks/2 (pooling): the stream's law is not known there"),
    # batch norm of a stream with several positions
    ([conv(1.0), {"norm": "batch"}, act("relu"), mean_pool(), dense(1.0, width=3)],
     "block /blocks/1 (norm): batch norm of a stream with several positions"),
    # an output with several positions; the repeat's first copy is written out before it in the
    # planned description (its rule differs), the note keeps the given description's paths
    ([repeat(2, conv(1.0), act("relu")), conv(1.0, width=3)],
     "output has several positions (from block /blocks/0/repeat/blocks/0 (convolution) on"),
]


@pytest.mark.parametrize("blocks,needle", REFUSED)
def test_a_plan_whose_kernel_is_refused_still_comes_back_with_the_reason(blocks, needle):
    desc = {"input_width": 4, "blocks": blocks}
    plain = propcalc.network_plan(desc, c0=0.2, c0_within=0.3)
    # the readout is scaled for the loss whether or not the kernel is computed (issue 15 part
    # 3, tests/test_network_plan_readout.py); with the hidden scale kept, the plan is the same
    kept = propcalc.network_plan(desc, c0=0.2, c0_within=0.3, loss="mse", batch_size=8,
                                 scale_output=False)
    assert kept.blocks == plain.blocks and kept.description == plain.description
    plan = propcalc.network_plan(desc, c0=0.2, c0_within=0.3, loss="mse", batch_size=8)
    assert plan.blocks[:-1] == plain.blocks[:-1]
    assert plan.description["blocks"][:-1] == plain.description["blocks"][:-1]
    assert plan.learning_rate_ceiling is None and plan.learning_rate is None
    assert plan.learning_rate_details is None
    assert needle in plan.learning_rate_note
    assert plan.learning_rate_note.startswith("the tangent kernel is not computed")
    assert any(needle in n and n.startswith("learning rate not computed") for n in plan.notes)
    d = propcalc.jsonable(plan.to_dict())
    assert d["learning_rate_note"] == plan.learning_rate_note and d["learning_rate"] is None
    assert plain.learning_rate_note is None  # no loss, nothing to explain


def test_a_split_repeat_moves_the_planned_paths_not_the_notes():
    # the setting of the last case above: in the planned description the refused layout sits
    # at other paths (the repeat's first copy is written out before it)
    desc = {"input_width": 4, "blocks": REFUSED[-1][0]}
    plan = propcalc.network_plan(desc, loss="mse", batch_size=8)
    assert [b.copies for b in plan.blocks] == ["first", "rest", "all"]
    assert len(plan.description["blocks"]) == 4 and "repeat" in plan.description["blocks"][2]


def test_errors_of_the_request_are_still_refused_with_a_loss():
    desc = {"input_width": 4, "blocks": REFUSED[0][0]}
    with pytest.raises(propcalc.PropcalcError, match="batch_size must be given"):
        propcalc.network_plan(desc, loss="mse")
    ok = {"input_width": 4, "blocks": [dense(1.0, width=8), act("tanh"), dense(1.0, width=3)]}
    with pytest.raises(propcalc.PropcalcError, match=r"n_classes must be equal to the output"):
        propcalc.network_plan(ok, loss="mse", batch_size=8, n_classes=5)


TOKENS = {"input_width": 16, "blocks": [
    dense(1.0, width=32), act("tanh"),
    residual({"norm": "layer"}, attention(0.0), weight=0.5),
    residual({"norm": "layer"}, dense(2.0, width=32), act("relu"), dense(1.0, width=32),
             weight=0.5),
    mean_pool(), dense(1.0, width=4)]}


def test_the_plans_ceiling_takes_the_position_correlations():
    from propcalc.training import network_learning_rate_ceiling
    pos = {"c0_within": 0.4, "c0_between": 0.1}
    plan = propcalc.network_plan(TOKENS, c0=0.3, loss="cross_entropy", batch_size=16, **pos)
    ref = network_learning_rate_ceiling(plan.description, loss="cross_entropy", batch_size=16,
                                        input_correlation=0.3, **pos)
    assert plan.learning_rate_note is None
    assert plan.learning_rate_ceiling == pytest.approx(ref.learning_rate_ceiling, rel=1e-12)
    assert plan.learning_rate == pytest.approx(ref.learning_rate, rel=1e-12)
    # the planned propagation is made at the same inputs
    prop = propcalc.network_propagation(plan.description, 1.0, 0.3, simulate=False, **pos)
    assert plan.output_c == pytest.approx(prop.c[-1], rel=1e-12)
    # and they matter: at c0_within = c0_between = 0 the ceiling differs
    other = propcalc.network_plan(TOKENS, c0=0.3, loss="cross_entropy", batch_size=16)
    assert abs(other.learning_rate_ceiling / plan.learning_rate_ceiling - 1) > 1e-3
    with pytest.raises(propcalc.PropcalcError, match="c0_between must be at most c0_within"):
        propcalc.network_plan(TOKENS, c0_within=0.1, c0_between=0.5)
