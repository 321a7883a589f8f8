"""The tangent kernel of a network of blocks (propcalc.training.network_ntk).

Sources: the plain-stack recursion (propcalc.training.ntk, itself checked against the arc-cosine
closed forms of Cho & Saul 2009 and torch) for a network written as blocks; seeded finite-width
residual networks in torch (a reference library: autograd gradients, 24 seeds; tolerance 4
standard errors of the mean plus 2% for the O(depth / width) finite-width bias).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

import propcalc
from propcalc.training import UnsupportedKernelError, tangent_kernel
from propcalc.training.network_ntk import (
    network_learning_rate_ceiling,
    network_tangent_kernel,
)


def test_a_plain_stack_written_as_blocks_gives_the_plain_kernel():
    desc = {"input_width": 16, "blocks": [
        {"dense": {"sigma_w2": 0.9, "sigma_b2": 0.1, "width": 64}},
        {"repeat": {"times": 3, "blocks": [
            {"activation": "tanh"}, {"dense": {"sigma_w2": 1.7, "sigma_b2": 0.1, "width": 64}}]}},
        {"activation": "tanh"},
        {"dense": {"sigma_w2": 0.3, "sigma_b2": 0.0, "width": 10}}]}
    k = network_tangent_kernel(desc, 1.3, 0.4)
    t = tangent_kernel("tanh", [16, 64, 64, 64, 64, 10], [0.9, 1.7, 1.7, 1.7, 0.3],
                       [0.1, 0.1, 0.1, 0.1, 0.0], 1.3, 0.4)
    assert k.diagonal == pytest.approx(t.output_diagonal, rel=1e-13)
    assert k.off_diagonal == pytest.approx(float(t.output_off_diagonal[0]), rel=1e-13)


RESIDUAL = {"input_width": 16, "blocks": [
    {"dense": {"sigma_w2": 1.0, "sigma_b2": 0.0, "width": 512}},
    {"repeat": {"times": 4, "blocks": [{"residual": {"weight": 0.5, "branch": [
        {"activation": "relu"}, {"dense": {"sigma_w2": 2.0, "sigma_b2": 0.0, "width": 512}}]}}]}},
    {"dense": {"sigma_w2": 1.0, "sigma_b2": 0.0, "width": 3}}]}


def test_residual_network_against_the_empirical_kernel():
    torch = pytest.importorskip("torch")
    torch.set_num_threads(1)
    q0, c0 = 1.3, 0.4
    from torch_helpers import kernel_pair, pair_inputs
    x = torch.tensor(pair_inputs(16, q0, c0))

    class Net(torch.nn.Module):
        def __init__(self) -> None:
            super().__init__()
            self.first = torch.nn.Linear(16, 512)
            self.branches = torch.nn.ModuleList(torch.nn.Linear(512, 512) for _ in range(4))
            self.last = torch.nn.Linear(512, 3)

        def forward(self, h):
            h = self.first(h)
            for lin in self.branches:
                h = h + 0.5 * lin(torch.relu(h))
            return self.last(h)

    diag, off = [], []
    for seed in range(24):
        torch.manual_seed(seed)
        net = Net().double()
        with torch.no_grad():
            for m in net.modules():
                if isinstance(m, torch.nn.Linear):
                    sw = 2.0 if m in net.branches else 1.0
                    m.weight.normal_(0.0, np.sqrt(sw / m.in_features))
                    m.bias.zero_()
        d, o = kernel_pair(net, x)
        diag.append(d)
        off.append(o)
    k = network_tangent_kernel(RESIDUAL, q0, c0)
    for emp, pred in ((diag, k.diagonal), (off, k.off_diagonal)):
        se = np.std(emp, ddof=1) / np.sqrt(len(emp))
        assert abs(np.mean(emp) - pred) <= 4 * se + 0.02 * abs(pred), (np.mean(emp), pred, se)


@pytest.mark.parametrize("blocks", [
    [{"dense": {"sigma_w2": 1.0, "sigma_b2": 0.0, "width": 8}}, {"norm": "layer"},
     {"dense": {"sigma_w2": 1.0, "sigma_b2": 0.0, "width": 3}}],
    [{"dense": {"sigma_w2": 1.0, "sigma_b2": 0.0, "width": 8}}, {"dropout": {"keep_rate": 0.9}}],
])
def test_norm_and_dropout_are_carried(blocks):
    # these two were refused before issue 15's block kinds were added; their kernels are
    # checked against seeded torch in tests/test_network_ntk_blocks.py, what is still refused
    # is tested there too
    k = network_tangent_kernel({"input_width": 4, "blocks": blocks})
    assert np.isfinite(k.diagonal) and k.diagonal > 0


def test_a_missing_width_is_refused():
    with pytest.raises(UnsupportedKernelError, match="width of its input is not given"):
        network_tangent_kernel({"blocks": [{"dense": {"sigma_w2": 1.0, "sigma_b2": 0.0}}]})


def test_network_ceiling_equals_the_plain_stack_ceiling():
    from propcalc.training import learning_rate_ceiling
    from propcalc.training.network_ntk import network_learning_rate_ceiling
    desc = {"input_width": 16, "blocks": [
        {"dense": {"sigma_w2": 0.9, "sigma_b2": 0.1, "width": 64}},
        {"repeat": {"times": 3, "blocks": [
            {"activation": "tanh"}, {"dense": {"sigma_w2": 1.7, "sigma_b2": 0.1, "width": 64}}]}},
        {"activation": "tanh"},
        {"dense": {"sigma_w2": 0.3, "sigma_b2": 0.0, "width": 10}}]}
    kw = dict(loss="cross_entropy", batch_size=32, q0=1.3, input_correlation=[0.1, 0.4],
              momentum=0.5)
    net = network_learning_rate_ceiling(desc, n_classes=10, **kw)
    plain = learning_rate_ceiling("tanh", [16, 64, 64, 64, 64, 10], [0.9, 1.7, 1.7, 1.7, 0.3],
                                  [0.1, 0.1, 0.1, 0.1, 0.0], **kw)
    assert net.lambda_max == pytest.approx(plain.lambda_max, rel=1e-12)
    assert net.learning_rate_ceiling == pytest.approx(plain.learning_rate_ceiling, rel=1e-12)
    with pytest.raises(Exception, match="n_classes must be equal to the output width"):
        network_learning_rate_ceiling(desc, n_classes=7, **kw)


def test_network_verdict_reads_the_network_ceiling():
    import propcalc as pc
    from propcalc.training.network_ntk import network_learning_rate_ceiling
    result = pc.network_propagation(pc.network(RESIDUAL), q0=1.0, c0=0.3)
    ceiling = network_learning_rate_ceiling(RESIDUAL, loss="mse", batch_size=16,
                                            input_correlation=0.3)
    v = pc.network_verdict(result, learning_rate=ceiling)
    r = v.reason("learning rate")
    assert r.passes is not None and r.value == pytest.approx(ceiling.learning_rate_ceiling)
    assert pc.network_verdict(result).reason("learning rate").passes is None


def test_network_plan_carries_the_learning_rate():
    import propcalc as pc
    from propcalc.training.network_ntk import network_learning_rate_ceiling
    desc = {"input_width": 16, "blocks": [
        {"dense": {"sigma_w2": 1.0, "sigma_b2": 0.0, "width": 64}},
        {"repeat": {"times": 3, "blocks": [{"residual": {"weight": 0.5, "branch": [
            {"activation": "tanh"},
            {"dense": {"sigma_w2": 1.0, "sigma_b2": 0.0, "width": 64}}]}}]}},
        {"activation": "tanh"},
        {"dense": {"sigma_w2": 1.0, "sigma_b2": 0.0, "width": 10}}]}
    plan = pc.network_plan(desc, q0=1.0, c0=0.2, loss="cross_entropy", n_classes=10,
                           batch_size=32)
    ref = network_learning_rate_ceiling(plan.description, loss="cross_entropy", batch_size=32,
                                        input_correlation=0.2)
    assert plan.learning_rate_ceiling == pytest.approx(ref.learning_rate_ceiling, rel=1e-14)
    assert plan.learning_rate == pytest.approx(ref.learning_rate_ceiling / 2, rel=1e-14)
    assert pc.jsonable(plan.to_dict())["learning_rate"] == plan.learning_rate
    assert plan.learning_rate_details.loss == "cross_entropy"
    assert pc.network_plan(desc).learning_rate_ceiling is None
    with pytest.raises(pc.PropcalcError, match="batch_size must be absent when no loss"):
        pc.network_plan(desc, batch_size=4)


@pytest.mark.parametrize("q0,c0,needle", [
    (-1.0, 0.3, "q0 must be > 0"), (float("nan"), 0.3, "q0 must be a finite real number"),
    (1.0, 2.0, r"c0 must be in \[-1, 1\], got 2.0"), (1.0, 1e300, r"c0 must be in \[-1, 1\]"),
    (1.0, float("nan"), "c0 must be a finite real number"),
])
def test_the_input_pair_is_checked_like_network_propagation(q0, c0, needle):
    # the project's error contract (PREAMBLE): c0 = 2 gave a kernel, a NaN a message about an
    # exploded signal at /blocks/0; now the refusal of propcalc.network_propagation
    desc = {"input_width": 4, "blocks": [{"dense": {"sigma_w2": 1.5, "sigma_b2": 0.05,
                                                    "width": 8}}, {"activation": "tanh"},
                                         {"dense": {"sigma_w2": 1.5, "sigma_b2": 0.0,
                                                    "width": 3}}]}
    with pytest.raises(propcalc.PropcalcError, match=needle):
        network_tangent_kernel(desc, q0, c0)
    if math.isfinite(q0) and q0 > 0:
        with pytest.raises(propcalc.PropcalcError, match="input_correlation must be in"):
            network_learning_rate_ceiling(desc, loss="mse", batch_size=4, input_correlation=c0)
