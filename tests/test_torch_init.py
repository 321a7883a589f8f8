"""Tests of propcalc.init.torch_adapter: applying a plan to a PyTorch module.

Skipped cleanly where torch is absent (pytest.importorskip), except the check
that importing the module never needs torch.

Tolerances
----------
* Weight variance: the mean square of n independent entries has relative
  standard error sqrt((k - 1) / n), k the kurtosis (3 normal, 9/5 uniform;
  Kendall & Stuart vol. 1, section 10.5); 5 standard errors are allowed.
* Forward pass of a width-N, depth-20 tanh MLP at the planned edge point.
  The mean-field prediction is q_1 = sigma_w2,1 m_x + sigma_b2 (m_x the
  inputs' mean square) and q_{l+1} = V(q_l) (Poole et al. 2016, eq. 3). At
  finite width, layer l's measured mean square over N units is, given its
  input, a mean of N squared Gaussians: relative standard deviation
  sqrt(2 / N) (chi-square with N degrees of freedom; averaging over the batch
  helps little because deep-layer inputs become strongly correlated). Those
  fresh errors are carried forward through the map with slope chi_q = V'(q*)
  < 1, so they settle at sqrt(2 / N) / sqrt(1 - chi_q^2) (a first-order
  autoregression). Averaging R independent networks divides this by
  sqrt(R); 5 such standard deviations are allowed per layer. The mean-field
  bias itself is O(1 / N) (0.002 here), negligible against that.
"""

from __future__ import annotations

import math
import subprocess
import sys

import numpy as np
import pytest

import propcalc
from propcalc import Layer
from propcalc.meanfield.maps import variance_map, variance_map_slope

TANH = propcalc.activation("tanh")


def test_module_imports_without_torch():
    code = ("import sys; sys.modules['torch'] = None\n"
            "import propcalc.init.torch_adapter as t\n"
            "assert 'torch' not in [m for m in sys.modules if sys.modules[m] is not None]\n"
            "plan = __import__('propcalc').recommend(__import__('propcalc').activation('tanh'), "
            "depth=2)\n"
            "try:\n    t.apply_plan(object(), plan)\nexcept ImportError as e:\n"
            "    assert 'needs PyTorch' in str(e), e\nelse:\n    raise SystemExit('no error')\n")
    subprocess.run([sys.executable, "-c", code], check=True, timeout=120)


def _mlp(torch, widths, act=None, dtype=None, bias=True):
    act = act or torch.nn.Tanh
    mods = []
    for i, (a, b) in enumerate(zip(widths[:-1], widths[1:])):
        mods.append(torch.nn.Linear(a, b, bias=bias, dtype=dtype))
        if i < len(widths) - 2:
            mods.append(act())
    return torch.nn.Sequential(*mods)


@pytest.mark.parametrize("distribution, kurtosis", [
    ("normal", 3.0), ("uniform", 9.0 / 5.0), ("orthogonal", None)])
def test_applied_weights_have_the_planned_std(distribution, kurtosis):
    torch = pytest.importorskip("torch")
    from propcalc.init.torch_adapter import apply_plan, module_layers

    net = torch.nn.Sequential(torch.nn.Conv2d(3, 16, 3), torch.nn.Tanh(),
                              torch.nn.Conv2d(16, 32, (3, 5)), torch.nn.Tanh(),
                              torch.nn.Flatten(), torch.nn.Linear(800, 300), torch.nn.Tanh(),
                              torch.nn.Linear(300, 10))
    layers = module_layers(net)
    assert [la.weight_shape for la in layers] == [(16, 3, 3, 3), (32, 16, 3, 5), (300, 800),
                                                  (10, 300)]
    plan = propcalc.recommend(TANH, layers=layers, distribution=distribution)
    assert apply_plan(net, plan, seed=0) is net
    convs_and_linears = [m for m in net if isinstance(m, (torch.nn.Conv2d, torch.nn.Linear))]
    for m, init in zip(convs_and_linears, plan.layers):
        w = m.weight.detach().double().numpy()
        var = init.sigma_w2 / init.layer.fan_in  # W ~ (0, sigma_w2 / fan_in)
        ms = float(np.mean(w ** 2))
        if kurtosis is None:  # orthogonal: exact, a trace identity
            assert ms == pytest.approx(var, rel=1e-6)  # float32 storage
        else:
            assert abs(ms / var - 1) <= 5 * math.sqrt((kurtosis - 1) / w.size), (ms, var)
        b = m.bias.detach().double().numpy()
        assert b.shape == (init.layer.out_features,)
        assert abs(float(np.mean(b ** 2)) / init.sigma_b2 - 1) <= 5 * math.sqrt(2 / b.size)
    # a float32 module gets float32 parameters; the same seed gives the same parameters
    first = [p.detach().clone() for p in net.parameters()]
    apply_plan(net, plan, seed=0)
    assert net[0].weight.dtype == torch.float32
    assert all(torch.equal(a, b) for a, b in zip(first, net.parameters()))


def test_seeded_application_is_reproducible():
    torch = pytest.importorskip("torch")
    from propcalc.init.draw import draw_plan
    from propcalc.init.torch_adapter import apply_plan

    a, b = _mlp(torch, [20, 30, 5]), _mlp(torch, [20, 30, 5])
    plan = propcalc.recommend(TANH, widths=[20, 30, 5])
    apply_plan(a, plan, seed=42)
    apply_plan(b, plan, seed=42)
    for pa, pb in zip(a.parameters(), b.parameters()):
        assert torch.equal(pa, pb)
    ref = draw_plan(plan, seed=42)
    np.testing.assert_array_equal(a[0].weight.detach().numpy(),
                                  ref.layers[0].weight.astype(np.float32))


def test_forward_pass_follows_the_predicted_variances():
    torch = pytest.importorskip("torch")
    from propcalc.init.torch_adapter import apply_plan, module_layers

    width, depth, batch, repeats = 512, 20, 64, 8
    net = _mlp(torch, [width] * (depth + 1), dtype=torch.float64)
    plan = propcalc.recommend(TANH, layers=module_layers(net))  # edge of chaos, q* = 1
    assert plan.propagation.phase == "edge of chaos"
    sw, sb, sw1 = plan.sigma_w2, plan.sigma_b2, plan.layers[0].sigma_w2
    chi_q = float(variance_map_slope(TANH, plan.q_star, sw))
    sd = math.sqrt(2.0 / width) / math.sqrt(1.0 - chi_q ** 2) / math.sqrt(repeats)
    linears = [m for m in net if isinstance(m, torch.nn.Linear)]
    rel = np.zeros((repeats, depth))
    for r in range(repeats):
        apply_plan(net, plan, seed=100 + r)
        # inputs of mean square 4, so the variance also has a transient to follow
        x = 2.0 * torch.from_numpy(np.random.default_rng(r).standard_normal((batch, width)))
        seen = []
        hooks = [m.register_forward_hook(lambda mod, inp, out, store=seen: store.append(out))
                 for m in linears]
        with torch.no_grad():
            net(x)
        for h in hooks:
            h.remove()
        measured = np.array([float((h ** 2).mean()) for h in seen])
        q = sw1 * float((x ** 2).mean()) + sb
        predicted = [q]
        for _ in range(depth - 1):
            q = float(variance_map(TANH, q, sw, sb))
            predicted.append(q)
        rel[r] = measured / np.array(predicted) - 1.0
    assert predicted[0] > 3.0 and abs(predicted[-1] - 1.0) < 1e-6  # transient, then q* = 1
    worst = np.abs(rel.mean(axis=0))
    assert np.all(worst <= 5.0 * sd), (worst.max(), 5 * sd)


def test_depth_only_plan_takes_the_module_shapes():
    torch = pytest.importorskip("torch")
    from propcalc.init.torch_adapter import apply_plan

    net = _mlp(torch, [40, 60, 60, 3])
    plan = propcalc.recommend(TANH, depth=3)
    apply_plan(net, plan, seed=1)
    w = net[2].weight.detach().double().numpy()
    assert abs(float(np.mean(w ** 2)) / (plan.sigma_w2 / 60) - 1) <= 5 * math.sqrt(2 / w.size)


def test_mismatches_name_the_layer_and_both_shapes():
    torch = pytest.importorskip("torch")
    from propcalc.init.torch_adapter import PlanMismatchError, apply_plan

    net = _mlp(torch, [20, 30, 5])
    before = [p.detach().clone() for p in net.parameters()]
    with pytest.raises(PlanMismatchError, match=r"the module has 2 Linear/Conv layers \('0', "
                       r"'2'\) but the plan has 3 layers"):
        apply_plan(net, propcalc.recommend(TANH, widths=[20, 30, 30, 5]))
    with pytest.raises(PlanMismatchError, match=r"layer 2 \('2', Linear\) has dense weight shape "
                       r"\(5, 30\) \(fan_in 30, fan_out 5\) but the plan's layer 2 has dense "
                       r"weight shape \(5, 31\) \(fan_in 31, fan_out 5\)"):
        apply_plan(net, propcalc.recommend(TANH, layers=[Layer.dense(20, 30),
                                                         Layer.dense(31, 5)]))
    conv = torch.nn.Sequential(torch.nn.Conv1d(4, 8, 3))
    with pytest.raises(PlanMismatchError, match=r"layer 1 \('0', Conv1d\) has conv weight shape "
                       r"\(8, 4, 3\) \(fan_in 12, fan_out 24\) but the plan's layer 1 has dense"):
        apply_plan(conv, propcalc.recommend(TANH, widths=[12, 8]))
    nobias = _mlp(torch, [20, 30, 5], bias=False)
    with pytest.raises(PlanMismatchError, match=r"layer 1 \('0', Linear\) has no bias but the plan "
                       r"sets sigma_b2 = 0.15"):
        apply_plan(nobias, propcalc.recommend(TANH, widths=[20, 30, 5]))
    apply_plan(nobias, propcalc.recommend(TANH, widths=[20, 30, 5]), require_bias=False, seed=0)
    for p, q in zip(before, net.parameters()):  # refused plans changed nothing
        assert torch.equal(p, q)
    with pytest.raises(PlanMismatchError, match="module must be a torch.nn.Module"):
        apply_plan("net", propcalc.recommend(TANH, depth=1))


def test_grouped_and_3d_convolutions():
    torch = pytest.importorskip("torch")
    from propcalc.init.torch_adapter import apply_plan, module_layers

    net = torch.nn.Sequential(torch.nn.Conv3d(2, 4, 3), torch.nn.Conv2d(8, 16, 3, groups=4))
    layers = module_layers(net)
    assert layers[1].fan_in == 2 * 9 and layers[1].weight_shape == (16, 2, 3, 3)
    apply_plan(net, propcalc.recommend(TANH, layers=layers), seed=0)
