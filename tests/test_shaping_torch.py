"""The torch module of a shaped activation (torch evaluating the same functions; seeded torch
sampling of a shaped network's kernel)."""

from __future__ import annotations

import math

import numpy as np
import pytest

import propcalc

torch = pytest.importorskip("torch")


@pytest.mark.parametrize("spec,method", [("relu", "tat"), ("tanh", "dks"), ("gelu", "tat"),
                                         ("softplus", "dks"), ("elu", "tat"), ("selu", "tat"),
                                         ("x * tanh(softplus(x))", "dks")])
def test_torch_module_computes_the_shaped_activation(spec, method):
    torch.set_num_threads(1)
    shaped = propcalc.shape_activation(spec, 40, method=method)
    module = shaped.torch_module()
    x = torch.linspace(-8, 8, 801, dtype=torch.float64, requires_grad=True)
    y = module(x)
    y.sum().backward()
    xs = x.detach().numpy()
    keep = np.all(np.abs(xs[:, None] - np.asarray(shaped.activation.breakpoints)[None, :]) > 1e-9,
                  axis=1) if shaped.activation.breakpoints else np.ones(xs.size, bool)
    np.testing.assert_allclose(y.detach().numpy(), shaped.activation.value(xs), rtol=1e-13,
                               atol=1e-13)
    np.testing.assert_allclose(x.grad.numpy()[keep], shaped.activation.derivative(xs)[keep],
                               rtol=1e-12, atol=1e-13)


def test_torch_module_in_a_network_keeps_the_predicted_kernel():
    # a torch MLP with the shaped module, weights of variance 1 / fan_in, no bias:
    # seeded torch sampling of C_L(0) against the prediction
    torch.set_num_threads(1)
    depth, width = 20, 512
    shaped = propcalc.shape_activation("tanh", depth - 1, target=0.8)
    gen = torch.Generator().manual_seed(7)
    act = shaped.torch_module()
    x = torch.randn(width, 16, generator=gen, dtype=torch.float64)
    a, b = x[:, 0::2], x[:, 1::2]
    b = b - a * (a * b).sum(0) / (a * a).sum(0)
    x = torch.cat([a, b], dim=1)
    x = x * math.sqrt(width) / x.norm(dim=0)
    vals = []
    for _ in range(4):
        h = x
        for layer in range(depth):
            w = torch.randn(width, width, generator=gen, dtype=torch.float64) / math.sqrt(width)
            h = w @ (h if layer == 0 else act(h))
        a, b = h[:, :8], h[:, 8:]
        vals.append(float(((a * b).sum(0) / a.norm(dim=0) / b.norm(dim=0)).mean()))
    vals = np.array(vals)
    se = vals.std(ddof=1) / math.sqrt(vals.size)
    assert abs(vals.mean() - 0.8) <= 3 * se + 0.02, (vals.mean(), se)
