"""Network plans written into torch modules (propcalc.plan_module, apply_network_plan).

References
----------
* propcalc.recommend's plain plan: a plain MLP read from torch must get exactly it (the
  networks issue's requirement; recommend is the reference for plain stacks).
* Sampling error of a drawn weight variance: the mean square of n Gaussian entries has
  relative standard error sqrt(2 / n) (chi-square; Kendall & Stuart vol. 1, section 10.5);
  5 standard errors are allowed.
* Orthogonal matrices (Haar, Mezzadri 2007) and delta-orthogonal kernels (Xiao et al. 2018,
  section 4) are recognised by their defining property when read back.
* The residual target: two inputs at c0 = 0 measured through seeded torch networks (torch
  sampling) against the planned output correlation, within two standard errors plus 0.05.
"""

from __future__ import annotations

import math
import subprocess
import sys

import pytest

import propcalc

torch = pytest.importorskip("torch")
nn = torch.nn
F = torch.nn.functional
torch.set_num_threads(1)

from propcalc.init.torch_adapter import PlanMismatchError, module_layers  # noqa: E402
from propcalc.init.torch_measure import measure_module  # noqa: E402
from propcalc.init.torch_network import apply_network_plan, plan_module  # noqa: E402
from propcalc.init.torch_reader import read_module  # noqa: E402


def test_modules_import_without_torch():
    code = ("import sys; sys.modules['torch'] = None\n"
            "import propcalc.init.torch_network, propcalc.init.torch_measure\n"
            "from propcalc.init.torch_reader import read_module\n"
            "try:\n    read_module(object(), (2, 3))\nexcept ImportError as e:\n"
            "    assert 'needs PyTorch' in str(e), e\nelse:\n    raise SystemExit('no error')\n")
    subprocess.run([sys.executable, "-c", code], check=True, timeout=120)


@pytest.mark.parametrize("act, name", [(nn.Tanh, "tanh"), (nn.ReLU, "relu"), (nn.GELU, "gelu")])
def test_a_plain_mlp_gets_the_plain_plan(act, name):
    torch.manual_seed(0)
    mlp = nn.Sequential(nn.Linear(64, 256), act(), nn.Linear(256, 256), act(),
                        nn.Linear(256, 256), act(), nn.Linear(256, 10))
    done = plan_module(mlp, (8, 64), seed=0)
    ref = propcalc.recommend(name, layers=module_layers(mlp))
    got = [x for b in done.plan.blocks for x in (b.sigma_w2, b.sigma_b2)]
    want = [x for la in ref.layers for x in (la.sigma_w2, la.sigma_b2)]
    assert got == pytest.approx(want, rel=1e-12, abs=1e-15)
    assert [a.module for a in done.layers] == ["0", "2", "4", "6"]
    # the written weights have the planned variance, within sampling error
    for a, lin in zip(done.layers, [mlp[0], mlp[2], mlp[4], mlp[6]]):
        n = lin.weight.numel()
        measured = a.fan_in * float(lin.weight.detach().double().square().mean())
        assert measured == pytest.approx(a.sigma_w2, rel=5 * math.sqrt(2 / n))


def test_numbers_in_the_code_are_divided_out():
    class Net(nn.Module):
        def __init__(self):
            super().__init__()
            self.a, self.b = nn.Linear(128, 512), nn.Linear(512, 512)

        def forward(self, x):
            return self.b(torch.tanh(self.a(x)) / 2.0)

    torch.manual_seed(1)
    m = Net()
    done = plan_module(m, (4, 128), seed=1)
    again = read_module(m, (4, 128))
    planned = done.plan.blocks[1].sigma_w2
    assert again.network.blocks[2].sigma_w2 == pytest.approx(planned, rel=5 * math.sqrt(2 / 512**2))
    assert done.layers[1].sigma_w2 == pytest.approx(4 * planned, rel=1e-12)


def test_orthogonal_and_delta_orthogonal_round_trip():
    torch.manual_seed(2)
    m = nn.Sequential(nn.Conv2d(3, 64, 3, padding=1, padding_mode="circular"), nn.ReLU(),
                      nn.Conv2d(64, 64, 3, padding=1, padding_mode="circular"), nn.ReLU(),
                      nn.Flatten(), nn.Linear(64 * 16, 128), nn.ReLU(), nn.Linear(128, 128))
    done = plan_module(m, (2, 3, 4, 4), distribution="orthogonal",
                       convolution="delta_orthogonal", seed=2)
    assert [a.weights for a in done.layers] == ["delta_orthogonal", "delta_orthogonal",
                                                "gaussian", "orthogonal"]
    again = read_module(m, (2, 3, 4, 4)).description["blocks"]
    assert again[2]["convolution"]["weights"] == "delta_orthogonal"
    assert again[6]["dense"]["weights"] == "orthogonal"
    assert again[2]["convolution"]["sigma_w2"] == pytest.approx(2.0, rel=1e-6)  # He et al.
    w = m[2].weight.detach()
    assert float(w[:, :, 1, 1].square().sum()) == pytest.approx(float(w.square().sum()))


class Residual(nn.Module):
    def __init__(self, width=256, blocks=8, weight=1.0, end="linear"):
        super().__init__()
        self.weight, self.end = weight, end
        self.stem = nn.Linear(64, width)
        self.fc = nn.ModuleList(nn.Linear(width, width) for _ in range(blocks))
        self.ln = nn.LayerNorm(width)

    def forward(self, x):
        x = self.stem(x)
        for fc in self.fc:
            f = fc(torch.relu(x))
            x = x + self.weight * (self.ln(f) if self.end == "norm" else f)
        return x


def test_branch_weight_for_a_target_is_applied_and_measured():
    def build(seed):
        torch.manual_seed(seed)
        m = Residual(width=512)  # at 256 the input's gradient is 8% low: finite width, O(1/n)
        return m, plan_module(m, (4, 64), target=0.5, c0=0.0, max_gradient=None, seed=seed)

    built = [build(s) for s in range(8)]  # q compounds over 8 sums: 8 draws
    plan = built[0][1].plan
    w = plan.branch_weight.weight
    assert 0.0 < w < 1.0 and plan.output_c == pytest.approx(0.5, abs=1e-9)
    # the weight is applied as a scale of each branch's last layer
    scales = [a.scale for a in built[0][1].layers if a.module.startswith("fc")]
    assert len(scales) == 8 and all(x == pytest.approx(w, rel=1e-12) for x in scales)
    r = measure_module([m for m, _ in built], (4, 64), c0=0.0, inputs=8)
    assert r.within_bands
    assert r.positions[-1].c == pytest.approx(0.5, abs=0.05)


def test_mismatches():
    torch.manual_seed(3)
    m = Residual(width=32, blocks=2, end="norm")
    reading = read_module(m, (4, 64))
    other = propcalc.network_plan({"blocks": [{"dense": {"sigma_w2": 1.0, "sigma_b2": 0.0}},
                                              {"activation": "relu"},
                                              {"dense": {"sigma_w2": 1.0, "sigma_b2": 0.0}},
                                              {"activation": "relu"},
                                              {"dense": {"sigma_w2": 1.0, "sigma_b2": 0.0}}]})
    with pytest.raises(PlanMismatchError, match="make the plan from reading.description"):
        apply_network_plan(m, other, reading)
    with pytest.raises(PlanMismatchError, match="does not end in a dense"):
        plan_module(m, (4, 64), target=0.3, max_gradient=None)
    with pytest.raises(PlanMismatchError, match="NetworkPlan"):
        apply_network_plan(m, reading, reading)
    nobias = nn.Sequential(nn.Linear(8, 32, bias=False), nn.Tanh(), nn.Linear(32, 32,
                                                                          bias=False))
    with pytest.raises(PlanMismatchError, match="no bias"):
        plan_module(nobias, (2, 8))
