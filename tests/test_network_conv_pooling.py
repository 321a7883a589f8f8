"""Convolution networks with max pooling: the non-Gaussian positions get simulated numbers.

Max pooling makes the stream non-Gaussian, so network_propagation fills the positions from
there on with its seeded numpy simulation. Its grid must fit the 2-D kernels and windows
(propcalc.networks.sim_grid.default_grid). References, each beside its check:
* seeded torch networks (torch.nn.Conv2d with circular padding, MaxPool2d, AdaptiveAvgPool2d,
  Linear; weights N(0, sigma_w2 / fan_in)), an implementation independent of propcalc's numpy
  simulation, sampled over 48 seeds: q, c and the gradient at every position;
* the order statistics of independent Gaussians (scipy.integrate.quad): after a Gaussian
  convolution of inputs whose positions are uncorrelated, positions are independent at
  infinite width, so max pooling over 4 relu units of variance q1 has second moment
  q1 * int_0^inf t^2 d(Phi(t)^4).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import integrate, stats

import propcalc
from propcalc.networks.description import network
from propcalc.networks.sim_grid import default_grid

torch = pytest.importorskip("torch")

CONV = {"convolution": {"sigma_w2": 2.0, "sigma_b2": 0.0, "kernel": [3, 3], "width": 64}}
NET = {"input_width": 16, "blocks": [
    CONV, {"activation": "relu"}, {"pooling": {"kind": "max", "window": [2, 2]}},
    CONV, {"activation": "relu"}, {"pooling": {"kind": "global_average", "positions": 16}},
    {"dense": {"sigma_w2": 1.0, "sigma_b2": 0.0, "width": 10}}]}


def _torch_measure(seeds: int = 48) -> np.ndarray:
    """(seeds, positions, 3): q, c (mean cosine over input pairs at one position), gradient."""
    torch.set_num_threads(1)
    out = []
    for seed in range(seeds):
        gen = torch.Generator().manual_seed(1000 + seed)

        def conv(c_in: int) -> torch.nn.Conv2d:
            m = torch.nn.Conv2d(c_in, 64, 3, padding=1, padding_mode="circular", bias=False)
            with torch.no_grad():
                m.weight.normal_(0.0, math.sqrt(2.0 / (c_in * 9)), generator=gen)
            return m

        lin = torch.nn.Linear(64, 10, bias=False)
        with torch.no_grad():
            lin.weight.normal_(0.0, math.sqrt(1.0 / 64), generator=gen)
        layers = [conv(16), torch.nn.ReLU(), torch.nn.MaxPool2d(2), conv(64), torch.nn.ReLU(),
                  torch.nn.AdaptiveAvgPool2d(1), torch.nn.Flatten(), lin]
        x = torch.randn(4, 16, 8, 8, generator=gen, dtype=torch.float32).requires_grad_(True)
        acts = [x]
        h = x
        for layer in layers:
            h = layer(h)
            if not isinstance(layer, torch.nn.Flatten):
                h.retain_grad()
                acts.append(h)
        g = torch.randn(h.shape, generator=gen)
        h.backward(g)
        rows = []
        for a in acts:
            v = a.detach().reshape(4, a.shape[1], -1).transpose(1, 2)  # (inputs, positions, units)
            q = float((v * v).mean())
            n = v / v.norm(dim=-1, keepdim=True).clamp_min(1e-30)
            cos = torch.einsum("apu,bpu->abp", n, n)
            iu = torch.triu_indices(4, 4, 1)
            c = float(cos[iu[0], iu[1]].mean())
            rows.append((q, c, float((a.grad * a.grad).mean())))
        rows = np.array(rows)
        rows[:, 2] /= rows[-1, 2]
        out.append(rows)
    return np.array(out)


def test_the_default_grid_fits_kernels_windows_and_the_global_average():
    assert default_grid(network(NET)) == (8, 8)  # 16 positions after the 2x2 pooling
    plain = {"blocks": [{"dense": {"sigma_w2": 2.0, "sigma_b2": 0.0}}, {"activation": "relu"}]}
    assert default_grid(network(plain)) == (1,)
    assert default_grid(network({"blocks": [{"attention": {"tokens": 6}}]})) == (6,)
    strided = {"blocks": [{"convolution": {"sigma_w2": 2.0, "sigma_b2": 0.0, "kernel": 5,
                                           "stride": 2}},
                          {"pooling": {"kind": "max", "window": 3}}]}
    grid = default_grid(network(strided))
    assert grid[0] % 6 == 0 and grid[0] // 6 >= 2  # stride 6 in all, two positions left
    shapes = {"blocks": [{"convolution": {"sigma_w2": 2.0, "sigma_b2": 0.0, "kernel": [3, 3]}},
                         {"pooling": {"kind": "global_average", "positions": 12}}]}
    assert default_grid(network(shapes)) == (4, 3)


def test_max_pooling_positions_are_simulated_and_match_torch():
    r = propcalc.network_propagation(NET, 1.0, 0.0)
    assert r.gaussian_positions == 2 and r.simulation is not None
    assert r.simulation.grid == (8, 8)
    assert all(v is not None for v in r.q + r.c + r.gradient)
    assert [b.source for b in r.blocks][2:] == ["simulation"] * 5
    ref = _torch_measure()
    mean = ref.mean(axis=0)
    se = ref.std(axis=0, ddof=1) / math.sqrt(ref.shape[0])
    for i in range(3, len(r.q)):
        p = r.simulation.positions[i]
        for k, (value, value_se) in enumerate(((r.q[i], p.q_se), (r.c[i], p.c_se),
                                               (r.gradient[i], p.gradient_se))):
            band = 3.0 * math.hypot(se[i, k], value_se)
            # relative 5% for q and the gradient, 0.02 absolute for c (practical size)
            slack = 0.02 if k == 1 else 0.05 * abs(mean[i, k])
            assert abs(value - mean[i, k]) <= band + slack, (i, k, value, mean[i, k], band)
    # the input gradient: torch's per-unit mean square, relative to the output's
    assert r.gradient[0] == pytest.approx(mean[0, 2], rel=0.15)


def test_max_pooling_second_moment_against_order_statistics():
    # q after conv -> relu is 1 (sigma_w2 = 2, q0 = 1); the pre-activation variance is 2
    r = propcalc.network_propagation(NET, 1.0, 0.0)
    second = integrate.quad(lambda t: t * t * 4 * stats.norm.pdf(t) * stats.norm.cdf(t) ** 3,
                            0.0, np.inf)[0] * 2.0
    p = r.simulation.positions[3]
    assert abs(r.q[3] - second) <= 3 * p.q_se + 0.05 * second


def test_a_grid_beyond_the_work_budget_falls_back_to_the_fewest_positions(monkeypatch):
    # two 3x3 convolutions and three 2x2 max poolings: the default grid is 16 x 16; with the
    # budget set between its work and the 8 x 8 grid's, the simulation takes 8 x 8 (each pooling
    # window still sees distinct positions) instead of giving no number
    import importlib

    simulate = importlib.import_module("propcalc.networks.simulate")

    conv = {"convolution": {"sigma_w2": 2.0, "sigma_b2": 0.0, "kernel": [3, 3], "width": 16}}
    pool = {"pooling": {"kind": "max", "window": [2, 2]}}
    desc = {"input_width": 8, "blocks": [conv, {"activation": "relu"}, pool, pool, conv,
                                         {"activation": "relu"}, pool]}
    net = network(desc)
    big, small = default_grid(net), default_grid(net, smallest=True)
    assert big == (16, 16) and small == (8, 8)
    work_big = simulate.simulation_work(net, 256, 4, 256) * 6
    work_small = simulate.simulation_work(net, 256, 4, 64) * 6
    monkeypatch.setattr(simulate, "MAX_NETWORK_SIMULATION_WORK", (work_big + work_small) / 2)
    r = propcalc.network_propagation(desc, 1.0, 0.0)
    assert r.simulation is not None and r.simulation.grid == small
    assert all(v is not None for v in r.q)
    with pytest.raises(propcalc.InvalidParameterError, match="multiply-adds"):
        simulate.measure_network(desc, grid=[16, 16], repetitions=6)  # a given grid is kept
