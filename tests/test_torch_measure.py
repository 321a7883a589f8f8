"""Torch forward and backward passes of traced modules against the mean-field prediction.

Reference: seeded torch sampling. Each module is a fresh draw of its weights
(``torch.manual_seed``); its description is read with the scales measured from its own
tensors, so the comparison is of the mean-field maps, not of the weight scales. At every
stream position the measured q and gradient over the predicted ones, and the measured c minus
the predicted one, averaged over the modules, must lie within two standard errors over the
modules plus a tolerance (0.05; finite-width corrections are O(1/width): Yang &
Schoenholz 2017 section 5 for residual networks, and per-layer fluctuations sqrt(2 / width)
of chi-square type that the standard error carries). Batch norm's pair correlation at a
finite batch B is -1/(B - 1) where the large-batch mean field of Yang et al. 2019 has 0: the
batch-norm network uses B = 64 (0.016, inside the tolerance).
"""

from __future__ import annotations

import pytest

torch = pytest.importorskip("torch")
nn = torch.nn
F = torch.nn.functional
torch.set_num_threads(1)

import propcalc  # noqa: E402
from propcalc.init.torch_measure import measure_module  # noqa: E402
from propcalc.init.torch_network import plan_module  # noqa: E402


def _check(result, min_positions):
    compared = [p for p in result.positions if p.within is not None]
    assert len(compared) >= min_positions
    bad = [(p.index, p.node, p.q_ratio, p.c_difference, p.gradient_ratio, p.q_band, p.c_band,
            p.gradient_band) for p in compared if not p.within]
    assert not bad, bad
    assert result.within_bands


def test_planned_tanh_mlp():
    def build(seed):
        torch.manual_seed(seed)
        layers = [nn.Linear(128, 512), nn.Tanh()]
        for _ in range(6):
            layers += [nn.Linear(512, 512), nn.Tanh()]
        m = nn.Sequential(*layers, nn.Linear(512, 256))
        plan_module(m, (4, 128), seed=seed)  # the edge-of-chaos plan, written in place
        return m

    mods = [build(s) for s in range(4)]
    r = measure_module(mods, (4, 128), c0=0.3, inputs=16)
    _check(r, 16)
    q_star = propcalc.recommend("tanh", depth=8).q_star
    assert r.positions[1].predicted_q == pytest.approx(q_star, rel=0.02)  # starts at q*


def test_batch_norm_mlp():
    def build(seed):
        torch.manual_seed(seed)
        layers = [nn.Linear(64, 512)]
        for _ in range(4):
            layers += [nn.BatchNorm1d(512), nn.ReLU(), nn.Linear(512, 512)]
        return nn.Sequential(*layers)

    r = measure_module([build(s) for s in range(3)], (4, 64), c0=0.5, inputs=64)
    _check(r, 13)
    bn = [p for p in r.positions if p.node in ("_1", "_4", "_7", "_10")]
    # the large batch decorrelates the pair (Yang et al. 2019); a batch of 64 centred per unit
    # leaves exactly -1/63 (the sum over the batch is zero: closed form)
    assert len(bn) == 4 and all(abs(p.predicted_c) < 1e-9 for p in bn)
    assert all(p.c == pytest.approx(-1 / 63, abs=1e-9) for p in bn)


class ResCNN(nn.Module):
    """Pre-activation residual CNN without normalisation, circular padding, a pooled head."""

    def __init__(self, width=256, blocks=3, weight=0.5):
        super().__init__()
        self.weight = weight
        conv = lambda a, b: nn.Conv2d(a, b, 3, padding=1, padding_mode="circular")  # noqa
        self.stem = conv(3, width)
        self.blocks = nn.ModuleList(nn.Sequential(nn.ReLU(), conv(width, width), nn.ReLU(),
                                                  conv(width, width)) for _ in range(blocks))
        self.head = nn.Linear(width, 256)

    def forward(self, x):
        x = self.stem(x)
        for b in self.blocks:
            x = x + self.weight * b(x)
        return self.head(F.adaptive_avg_pool2d(F.relu(x), 1).flatten(1))


def test_residual_cnn():
    def build(seed):
        torch.manual_seed(seed)
        m = ResCNN()
        for mod in m.modules():
            if isinstance(mod, nn.Conv2d):  # He et al. 2015 scale for the ReLU branches
                nn.init.kaiming_normal_(mod.weight, nonlinearity="relu")
        return m

    r = measure_module([build(s) for s in range(3)], (8, 3, 4, 4), c0=0.4, inputs=8)
    _check(r, 7)
    q = [p.predicted_q for p in r.positions]
    assert q[1] < q[2] < q[3] < q[4]  # residual sums add the branches' second moments


class Layer(nn.Module):
    def __init__(self, d=256, heads=4, pre=True):
        super().__init__()
        self.pre = pre
        self.ln1, self.ln2 = nn.LayerNorm(d), nn.LayerNorm(d)
        self.att = nn.MultiheadAttention(d, heads, batch_first=True)
        self.ff = nn.Sequential(nn.Linear(d, 2 * d), nn.GELU(), nn.Linear(2 * d, d))

    def forward(self, x):
        if self.pre:
            y = self.ln1(x)
            x = x + self.att(y, y, y, need_weights=False)[0]
            return x + self.ff(self.ln2(x))
        x = self.ln1(x + self.att(x, x, x, need_weights=False)[0])
        return self.ln2(x + self.ff(x))


@pytest.mark.parametrize("pre", [True, False])
def test_transformer_stacks(pre):
    def build(seed):
        torch.manual_seed(seed)
        return nn.Sequential(nn.Linear(64, 256), Layer(pre=pre), Layer(pre=pre))

    r = measure_module([build(s) for s in range(3)], (4, 16, 64), c0=0.3, c0_within=0.2,
                       c0_between=0.1, inputs=8)
    _check(r, 5 if pre else 9)


def test_one_module_and_refusals():
    m = nn.Sequential(nn.Linear(32, 256), nn.ReLU(), nn.Linear(256, 256))
    r = measure_module(m, (2, 32), inputs=4)
    assert r.modules == 1 and r.positions[1].q_band == r.tolerance
    assert r.to_dict()["positions"][0]["index"] == 0
    with pytest.raises(propcalc.InvalidParameterError, match="inputs"):
        measure_module(m, (2, 32), inputs=1)
    with pytest.raises(propcalc.InvalidParameterError, match="c0"):
        measure_module(m, (2, 32), inputs=8, c0=-0.5)
    with pytest.raises(propcalc.InvalidParameterError, match="modules"):
        measure_module([], (2, 32))
