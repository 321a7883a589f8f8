"""Network plans scale their readout for the loss (issue 15, part 3, for networks of blocks).

References
----------
* The target of the cross-entropy readout is stated by the plan: an expected initial loss
  within 1% of ln K (common practice, no source). It is checked by seeded torch sampling of the
  planned network (tests/torch_networks.py draws the planned description; torch's
  ``cross_entropy`` on random Gaussian inputs with uniformly drawn labels): the measured mean
  loss lies within the margin of ln K, up to 3 standard errors across the seeded networks plus
  0.005 nats for finite width (the logit variance moves by O(1/width); ours, no source).
* MSE: the output variance of a dense block without an activation after it is
  ``sigma_w2 q_in + sigma_b2`` (Poole et al. 2016, eq. 3); the plan states 0.01 per output
  (common practice, no source), checked in closed form and by seeded torch sampling within 3
  standard errors plus 5%.
* A layer norm (no gain) resets the second moment to 1 (Ba et al. 2016, its definition), so a
  readout after it has ``sigma_w2 = logit variance`` exactly.
* propcalc.recommend's plain plan: a plain stack written as blocks gets its readout and its
  learning-rate ceiling (the plain plan is the reference for plain stacks).
* Sampling error of a drawn weight variance: the mean square of n Gaussian entries has relative
  standard error sqrt(2 / n) (chi-square; Kendall & Stuart vol. 1, section 10.5); 5 allowed.
"""

from __future__ import annotations

import math

import pytest

import propcalc
from propcalc.training.network_ntk import network_learning_rate_ceiling

WIDTH = 256
K = 10


def dense(sw, sb=0.0, **kw):
    return {"dense": {"sigma_w2": sw, "sigma_b2": sb, **kw}}


def mlp(act="tanh", depth=4, width=WIDTH, classes=K):
    blocks = [dense(1.0, width=width)]
    for _ in range(depth - 1):
        blocks += [{"activation": act}, dense(1.0, width=width)]
    blocks += [{"activation": act}, dense(1.0, width=classes)]
    return {"input_width": 64, "blocks": blocks}


def residual_net(classes=K):
    branch = [{"norm": "layer"}, dense(2.0, width=128), {"activation": "relu"}, dense(1.0)]
    return {"input_width": 32, "blocks": [
        dense(1.0, width=128),
        {"repeat": {"times": 4, "blocks": [{"residual": {"branch": branch, "weight": 0.5}}]}},
        {"norm": "layer"}, dense(1.0, width=classes)]}


def readout(plan):
    return plan.blocks[-1]


def test_a_plain_stack_gets_the_plain_plans_readout_and_ceiling():
    # reference: propcalc.recommend on the same plain stack (module docstring)
    desc = mlp()
    widths = [64] + [WIDTH] * 4 + [K]
    for loss in ("cross_entropy", "mse"):
        plan = propcalc.network_plan(desc, loss=loss, n_classes=K, batch_size=32)
        ref = propcalc.recommend("tanh", widths=widths, loss=loss, n_classes=K, batch_size=32)
        got = [x for b in plan.blocks for x in (b.sigma_w2, b.sigma_b2)]
        want = [x for la in ref.layers for x in (la.sigma_w2, la.sigma_b2)]
        assert got == pytest.approx(want, rel=1e-12, abs=1e-15)
        assert plan.output_layer == ref.output_layer
        assert plan.learning_rate_ceiling == pytest.approx(ref.learning_rate_ceiling, rel=1e-9)
        assert f"output layer: {ref.output_layer}" in plan.notes
        assert readout(plan).rule == "readout " + ref.output_layer
        assert plan.description["blocks"][-1]["dense"]["sigma_w2"] == ref.layers[-1].sigma_w2
    assert plan.output_layer.startswith("scaled for MSE")


def test_the_ceiling_is_the_scaled_networks_and_opting_out_keeps_the_hidden_scale():
    # reference: network_learning_rate_ceiling of the planned description (the plain plan's
    # order: the readout first, then the ceiling)
    desc = residual_net()
    opts = {"loss": "cross_entropy", "n_classes": K, "batch_size": 16}
    scaled = propcalc.network_plan(desc, **opts)
    kept = propcalc.network_plan(desc, **opts, scale_output=False)
    bare = propcalc.network_plan(desc)
    for plan in (scaled, kept):
        ref = network_learning_rate_ceiling(plan.description, **opts)
        assert plan.learning_rate_ceiling == pytest.approx(ref.learning_rate_ceiling, rel=1e-12)
    assert kept.description == bare.description and kept.blocks == bare.blocks
    assert kept.output_layer == "as the hidden layers (scale_output=False)"
    assert kept.output_layer_scale is None
    # after a layer norm q_in = 1, so sigma_w2 is the logit variance the margin allows
    s = scaled.output_layer_scale
    assert readout(scaled).sigma_w2 == pytest.approx(s.max_logit_variance, rel=1e-12)
    assert readout(scaled).sigma_b2 == 0.0 and s.penultimate_second_moment == pytest.approx(1.0)
    assert s.loss_at_scale.excess == pytest.approx(0.01 * math.log(K), rel=1e-6)
    assert readout(scaled).weight_std == pytest.approx(math.sqrt(s.max_logit_variance / 128))
    # the smaller readout lowers every share of the kernel (measured: 0.545 against 0.238)
    assert scaled.learning_rate_ceiling > 2 * kept.learning_rate_ceiling
    # the verdict's output-layer reason, from the planned network's propagation
    for plan, passes in ((scaled, True), (kept, False)):
        result = propcalc.network_propagation(plan.description)
        verdict = propcalc.network_verdict(result, loss="cross_entropy", n_classes=K)
        reason = next(r for r in verdict.reasons if r.name == "output layer")
        assert reason.passes is passes, reason


def test_mse_gives_the_stated_output_variance():
    # reference: Poole et al. 2016, eq. 3: q_out = sigma_w2 q_in + sigma_b2
    for desc in (mlp("gelu"), residual_net(3)):
        plan = propcalc.network_plan(desc, loss="mse", batch_size=8)
        result = propcalc.network_propagation(plan.description)
        ro = readout(plan)
        assert ro.sigma_w2 * result.q[-2] + ro.sigma_b2 == pytest.approx(0.01, rel=1e-12)
        assert result.q[-1] == pytest.approx(0.01, rel=1e-12)
        assert plan.output_layer_scale is None and "output variance 0.01" in plan.output_layer
        reason = next(r for r in propcalc.network_verdict(result, loss="mse").reasons
                      if r.name == "output layer")
        assert reason.passes and reason.value == pytest.approx(0.01, rel=1e-12)


def test_no_dense_readout_says_why_and_changes_nothing():
    desc = mlp()
    desc["blocks"].append({"activation": "tanh"})
    plan = propcalc.network_plan(desc, loss="mse", batch_size=8)
    assert plan.output_layer == "not scaled: the last block is activation, not a dense readout"
    assert plan.blocks == propcalc.network_plan(desc).blocks
    shared = {"input_width": 16, "blocks": [{"repeat": {"times": 3, "blocks": [
        dense(1.0, width=16), {"activation": "tanh"}, dense(1.0, width=16)]}}]}
    plan = propcalc.network_plan(shared, loss="mse", batch_size=8)
    assert plan.output_layer.startswith("not scaled: the readout /blocks/0/repeat/blocks/2 is "
                                        "the last copy of the repeat at /blocks/0")
    assert plan.description == propcalc.network_plan(shared).description
    once = {"input_width": 16, "blocks": [{"repeat": {"times": 1, "blocks": [
        dense(1.0, width=16), {"activation": "tanh"}, dense(1.0, width=16)]}}]}
    plan = propcalc.network_plan(once, loss="mse", batch_size=8)
    assert plan.output_layer.startswith("scaled for MSE")
    assert plan.description["blocks"][0]["repeat"]["blocks"][2]["dense"]["sigma_w2"] == (
        readout(plan).sigma_w2)


def test_scale_output_is_refused_without_a_loss():
    with pytest.raises(propcalc.PropcalcError, match="scale_output"):
        propcalc.network_plan(mlp(), scale_output=False)
    plan = propcalc.network_plan(mlp())
    assert plan.output_layer is None and plan.output_layer_scale is None


def test_a_misspelt_loss_is_named_before_the_missing_batch_size():
    # the error contract: loss="cross-entropie" was answered "batch_size must be given"
    with pytest.raises(propcalc.PropcalcError, match="loss must be one of"):
        propcalc.network_plan(mlp(), loss="cross-entropie")


torch = pytest.importorskip("torch")


def _mean_loss(desc, loss, seeds=8, n=2048):
    """Mean initial loss per seeded torch network of ``desc`` (float64), on Gaussian inputs
    of unit second moment per coordinate and uniformly drawn labels."""
    from torch_networks import TorchNetwork

    values = []
    for seed in range(seeds):
        net = TorchNetwork(desc, seed)
        gen = torch.Generator().manual_seed(1000 + seed)
        x = torch.randn(n, 1, desc["input_width"], generator=gen, dtype=torch.float64)
        with torch.no_grad():
            out = net(x)[:, 0, :]
        if loss == "cross_entropy":
            y = torch.randint(0, out.shape[1], (n,), generator=gen)
            values.append(float(torch.nn.functional.cross_entropy(out, y)))
        else:
            values.append(float(out.square().mean()))
    mean = sum(values) / seeds
    se = math.sqrt(sum((v - mean) ** 2 for v in values) / (seeds - 1) / seeds)
    return mean, se


@pytest.mark.parametrize("desc", [mlp("tanh"), mlp("gelu"), residual_net()],
                         ids=["tanh", "gelu", "residual-layer-norm"])
def test_the_planned_readout_starts_within_the_margin_of_ln_k(desc):
    # reference: the plan's stated margin (1% of ln K, common practice), by seeded torch
    # sampling of the planned network (module docstring)
    margin = 0.01 * math.log(K)
    plan = propcalc.network_plan(desc, loss="cross_entropy", batch_size=32)
    mean, se = _mean_loss(plan.description, "cross_entropy")
    assert -3 * se - 0.005 <= mean - math.log(K) <= margin + 3 * se + 0.005, (mean, se)
    kept = propcalc.network_plan(desc, loss="cross_entropy", batch_size=32, scale_output=False)
    excess = _mean_loss(kept.description, "cross_entropy")[0] - math.log(K)
    assert excess > 5 * margin  # at the hidden scale the loss starts far above ln K


def test_the_planned_mse_readout_gives_its_output_variance_in_torch():
    # reference: Poole et al. 2016, eq. 3 (0.01 per output), by seeded torch sampling
    plan = propcalc.network_plan(residual_net(3), loss="mse", batch_size=8)
    mean, se = _mean_loss(plan.description, "mse")
    assert mean == pytest.approx(0.01, rel=0.05, abs=3 * se)


def test_the_torch_adapter_draws_the_planned_readout():
    # reference: chi-square sampling error of the drawn variance (module docstring), and the
    # plan's stated margin measured on the module itself (torch sampling)
    nn = torch.nn
    torch.manual_seed(0)
    module = nn.Sequential(nn.Linear(64, WIDTH), nn.Tanh(), nn.Linear(WIDTH, WIDTH), nn.Tanh(),
                           nn.Linear(WIDTH, K)).double()
    done = propcalc.plan_module(module, (8, 64), seed=0, loss="cross_entropy", batch_size=32)
    ro = done.plan.blocks[-1]
    assert ro.rule.startswith("readout scaled for cross-entropy")
    applied = done.layers[-1]
    assert applied.module == "4" and applied.sigma_w2 == ro.sigma_w2
    w = module[4].weight.detach()
    measured = WIDTH * float(w.square().mean())
    assert measured == pytest.approx(ro.sigma_w2, rel=5 * math.sqrt(2 / w.numel()))
    assert float(module[4].bias.detach().abs().max()) == 0.0
    gen = torch.Generator().manual_seed(7)
    x = torch.randn(4096, 64, generator=gen, dtype=torch.float64)
    y = torch.randint(0, K, (4096,), generator=gen)
    with torch.no_grad():
        loss = float(torch.nn.functional.cross_entropy(module(x), y))
    # one network: its logit variance varies by about sqrt(2 / (K fan_in)) relative
    assert loss - math.log(K) <= 0.01 * math.log(K) + 0.02
    hidden = propcalc.plan_module(module, (8, 64), seed=0, loss="cross_entropy", batch_size=32,
                                  scale_output=False)
    assert hidden.layers[-1].sigma_w2 == pytest.approx(
        propcalc.plan_module(module, (8, 64), seed=0).layers[-1].sigma_w2, rel=1e-12)


def test_plans_outside_the_weight_domain_are_refused_with_the_cause():
    # A plan must be usable as given: its description read back by propcalc.network (found in
    # review: q0 = 1e-8 planned layer 1 at sigma_w2 = 1e8, which the plan's own description then
    # failed). sigma_w2 = (q* - sigma_b2) / q_in (Poole et al. 2016, eq. 3): ReLU's plan aims at
    # q* = 1 with no bias, so inputs of mean square 1e-8 need 1e8, outside [1e-6, 1e4]
    stack = {"blocks": [dense(2.0, width=8), {"activation": "relu"}, dense(2.0, width=8)]}
    with pytest.raises(propcalc.ComputationError,
                       match=r"^/blocks/0: the planned sigma_w2 = 1e\+08 is outside its domain "
                             r"\(in \[1e-6, 10000\]\) because the stream entering it has second "
                             r"moment 1e-08"):
        propcalc.network_plan(stack, q0=1e-8)
    with pytest.raises(propcalc.ComputationError,
                       match=r"^layer 1: the planned sigma_w2 = 1e\+08 .* q_input = 1e-08"):
        propcalc.recommend("relu", widths=[8, 8, 8], q_input=1e-8)
    # a norm of tiny gain before the readout: the cross-entropy readout would need ~5e6
    tiny = {"blocks": [dense(2.0, width=8), {"activation": "relu"},
                       {"norm": {"kind": "rms", "gain": 1e-4}}, dense(2.0, width=10)]}
    with pytest.raises(propcalc.ComputationError, match=r"^/blocks/3: the planned sigma_w2"):
        propcalc.network_plan(tiny, loss="cross_entropy", batch_size=8)
    kept = propcalc.network_plan(tiny, loss="cross_entropy", batch_size=8, scale_output=False)
    propcalc.network(kept.description)  # usable as given
    # within the domain nothing changes: q0 = 1e-3 gives layer 1 sigma_w2 = 1000
    plan = propcalc.network_plan(stack, q0=1e-3)
    assert plan.description["blocks"][0]["dense"]["sigma_w2"] == pytest.approx(1000.0)
