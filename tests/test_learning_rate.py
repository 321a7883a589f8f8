"""The learning-rate ceiling and the loss-dependent parts of a plan (issue 15, sections 1 and 3).

Sources: the bound lr < 2 / lambda_max of gradient descent on a quadratic and its heavy-ball form
2 (1 + mu) / lambda_max (Polyak 1964, from memory); the Gauss-Newton curvature as kernel times
output Hessian (Martens 2020, section 8); the softmax Hessian diag(p) - p p^T at p = 1/K (closed
form); the initial loss against ln K from propcalc.variants.output_layer (itself checked against
scipy and mpmath in tests/test_output_layer.py); seeded torch draws for the read-back.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

import propcalc
from propcalc import PropcalcError
from propcalc.training import learning_rate_ceiling, output_hessian, tangent_kernel

WIDTHS = [16, 32, 32, 32, 10]


def test_without_loss_the_fields_are_absent():
    plan = propcalc.recommend("tanh", widths=WIDTHS)
    assert plan.loss is None and plan.learning_rate_ceiling is None and plan.learning_rate is None
    d = plan.to_dict()
    assert d["learning_rate_ceiling"] is None and d["learning_rate"] is None


def test_contract_cross_entropy():
    plan = propcalc.recommend("tanh", widths=WIDTHS, loss="cross_entropy", n_classes=10,
                              batch_size=64)
    det = plan.learning_rate_details
    # lambda = h lambda(Theta_B) / B; h near 1/K at small logits (the softmax Hessian at
    # p = 1/K), raised a little by the logits' spread (planned logit variance 0.05)
    assert 0.1 <= det.output_hessian <= 0.13
    assert det.lambda_max == pytest.approx(det.output_hessian * det.kernel_top_eigenvalue / 64,
                                           rel=1e-14)
    assert plan.learning_rate_ceiling == pytest.approx(2.0 / det.lambda_max, rel=1e-14)
    assert plan.learning_rate == pytest.approx(plan.learning_rate_ceiling / 2, rel=1e-14)
    # the summary's eigenvalue Theta(x, x) + (B - 1) mean Theta(x, x')
    assert det.kernel_top_eigenvalue == pytest.approx(
        det.kernel_diagonal + 63 * det.kernel_off_diagonal, rel=1e-14)
    # section 3: the readout keeps the expected initial loss within 1% of ln K
    last = plan.layers[-1]
    assert last.sigma_b2 == 0.0
    m2 = float(propcalc.meanfield.maps.second_moment(propcalc.activation("tanh"), plan.q_star))
    loss = propcalc.initial_loss(10, last.sigma_w2 * m2)
    assert loss.excess == pytest.approx(0.01 * math.log(10), rel=1e-6)
    assert "scaled for cross-entropy" in plan.output_layer
    assert plan.to_dict()["learning_rate"] == plan.learning_rate


def test_opt_out_keeps_the_hidden_scale_and_lowers_the_ceiling():
    kw = dict(widths=WIDTHS, loss="cross_entropy", n_classes=10, batch_size=64)
    scaled = propcalc.recommend("tanh", **kw)
    hidden = propcalc.recommend("tanh", scale_output=False, **kw)
    assert hidden.layers[-1].sigma_w2 == pytest.approx(hidden.sigma_w2, rel=1e-15)
    assert hidden.output_layer_scale is None and "scale_output=False" in hidden.output_layer
    # the readout's sigma_w2 multiplies every lower layer's share of the kernel (ntk recursion)
    assert hidden.learning_rate_ceiling < scaled.learning_rate_ceiling


def test_mse_readout_variance_and_hessian():
    plan = propcalc.recommend("relu", widths=[8, 20, 20, 3], loss="mse", batch_size=5)
    m2 = plan.q_star / 2.0  # E[relu(sqrt(q) z)^2] = q / 2, closed form
    assert plan.layers[-1].sigma_w2 * m2 == pytest.approx(0.01, rel=1e-9)
    assert plan.learning_rate_details.output_hessian == pytest.approx(2.0 / 3.0, rel=1e-15)


def test_momentum_moves_the_ceiling_by_one_plus_mu():
    kw = dict(loss="cross_entropy", batch_size=32, n_classes=10)
    plain = learning_rate_ceiling("gelu", WIDTHS, 1.5, 0.1, **kw)
    heavy = learning_rate_ceiling("gelu", WIDTHS, 1.5, 0.1, momentum=0.9, **kw)
    assert heavy.learning_rate_ceiling == pytest.approx(1.9 * plain.learning_rate_ceiling,
                                                        rel=1e-14)
    assert "momentum 0.9" in heavy.optimiser


def test_softmax_hessian_at_a_planned_logit_variance():
    # 1/K at s2 = 0: diag(p) - p p^T with p = 1/K is (1/K)(I - 1 1^T / K) (closed form)
    assert output_hessian("cross_entropy", 10, 0.0) == 0.1
    # K = 2, uncorrelated logits, a large batch: the batch mean of H tends to E[H], whose top
    # eigenvalue is 2 E[p (1 - p)], p = expit(l1 - l2), l1 - l2 ~ N(0, 2 s2) (scipy quadrature)
    from scipy import integrate, special, stats
    ref = integrate.quad(lambda t: special.expit(t) * special.expit(-t)
                         * stats.norm.pdf(t, scale=math.sqrt(8.0)), -60, 60)[0]
    assert output_hessian("cross_entropy", 2, 4.0, 0.0, 10**6) == pytest.approx(2 * ref, rel=0.02)
    # K = 2, fully shared logits: every input has the same p; E[2 p (1 - p)] again
    assert output_hessian("cross_entropy", 2, 4.0, 1.0, 64) == pytest.approx(2 * ref, rel=0.15)
    # shared logits raise the top eigenvalue at K = 10 (one class's probability stands out)
    assert output_hessian("cross_entropy", 10, 1.0, 1.0, 64) > output_hessian(
        "cross_entropy", 10, 1.0, 0.0, 64)


def test_explicit_batch_builds_the_pair_matrix():
    # the construction of the module docstring, written out: per-input diagonals, pairs at the
    # correlation their first-layer pre-activations would have at the mean square coordinate
    rng = np.random.default_rng(3)
    x = rng.standard_normal((12, 16)) * rng.uniform(0.5, 1.5, (12, 1)) + 0.8 * rng.standard_normal(16)
    sw, sb = 1.8, 0.05
    lr = learning_rate_ceiling("tanh", WIDTHS, sw, sb, loss="mse", batch_size=12, inputs=x)
    sq = np.sum(x * x, axis=1) / 16
    q = float(np.mean(sq))
    u = x / np.linalg.norm(x, axis=1, keepdims=True)
    cos = np.clip(u @ u.T, -1, 1)
    q1 = sw * sq + sb
    c1 = (sw * np.sqrt(np.outer(sq, sq)) * cos + sb) / np.sqrt(np.outer(q1, q1))
    c_eff = (c1 * (sw * q + sb) - sb) / (sw * q)
    iu = np.triu_indices(12, 1)
    k = tangent_kernel("tanh", WIDTHS, sw, sb, q, c_eff[iu])
    diag = np.array([tangent_kernel("tanh", WIDTHS, sw, sb, float(v), 1.0).output_diagonal
                     for v in sq])
    mat = np.diag(diag)
    mat[iu] = k.output_off_diagonal / k.output_diagonal * np.sqrt(diag[iu[0]] * diag[iu[1]])
    mat[(iu[1], iu[0])] = mat[iu]
    # the interpolation over Chebyshev nodes (9 in the mean square, 33 in the correlation) is
    # the only difference
    assert lr.kernel_top_eigenvalue == pytest.approx(np.linalg.eigvalsh(mat)[-1], rel=1e-4)
    assert lr.inputs == "batch"


@pytest.mark.parametrize("kwargs,match", [
    ({"loss": "hinge", "batch_size": 4, "n_classes": 10}, "loss must be one of"),
    ({"loss": "cross_entropy", "n_classes": 10}, "batch_size must be given"),
    ({"loss": "cross_entropy", "batch_size": 4}, "n_classes must be given"),
    ({"loss": "cross_entropy", "batch_size": 4, "n_classes": 7}, "n_classes must be equal"),
    ({"loss": "cross_entropy", "batch_size": 0, "n_classes": 10}, "batch_size must be"),
    ({"loss": "cross_entropy", "batch_size": 4, "n_classes": 10, "momentum": 1.0},
     r"momentum must be in \[0, 1\)"),
    ({"batch_size": 4}, "batch_size must be absent when no loss"),
])
def test_bad_plans_name_the_field(kwargs, match):
    with pytest.raises(PropcalcError, match=match):
        propcalc.recommend("tanh", widths=WIDTHS, **kwargs)


def test_depth_only_plan_needs_widths():
    with pytest.raises(PropcalcError, match="widths must be given when a loss is given"):
        propcalc.recommend("tanh", 5, loss="mse", batch_size=4)


def test_apply_plan_sets_the_readout_as_planned():
    torch = pytest.importorskip("torch")
    torch.manual_seed(0)
    widths = [16, 256, 256, 10]
    net = torch.nn.Sequential(torch.nn.Linear(16, 256), torch.nn.Tanh(), torch.nn.Linear(256, 256),
                              torch.nn.Tanh(), torch.nn.Linear(256, 10))
    plan = propcalc.recommend("tanh", widths=widths, loss="cross_entropy", n_classes=10,
                              batch_size=32)
    from propcalc.init.torch_adapter import apply_plan
    apply_plan(net, plan, seed=1)
    w = net[4].weight.detach().double().numpy()
    planned = plan.layers[-1].sigma_w2 / 256
    # 2560 seeded normal entries: the sample variance is within 4 sd = 4 sqrt(2/2560) = 11%
    assert np.mean(w * w) == pytest.approx(planned, rel=0.11)
    assert float(net[4].bias.detach().abs().max()) == 0.0  # sigma_b2 = 0 for the readout
    hidden = net[2].weight.detach().double().numpy()
    assert np.mean(hidden * hidden) == pytest.approx(plan.sigma_w2 / 256, rel=0.05)


@pytest.mark.parametrize("kwargs,match", [
    ({"inputs": np.ones((2049, 16))}, "inputs must be a 2-D array of 2 to 2048 rows"),
    ({"inputs": np.ones((4, 15))}, r"inputs must be rows of 16 numbers"),
    ({"inputs": np.zeros((4, 16))}, "inputs must be rows that are not all zero"),
    ({"inputs": np.ones((3, 16))}, "inputs must be at least batch_size = 4 rows"),
    ({"input_correlation": np.zeros(1001)}, "input_correlation must be a correlation or at most"),
    ({"input_correlation": 1.5}, r"input_correlation must be in \[-1, 1\], got 1.5"),
    ({"input_correlation": []}, "input_correlation must be a correlation or at most"),
])
def test_bad_batches_are_refused_with_the_field_named(kwargs, match):
    with pytest.raises(PropcalcError, match=match):
        learning_rate_ceiling("tanh", WIDTHS, 1.5, 0.1, loss="mse", batch_size=4, **kwargs)


def test_dense_layers_give_the_widths_and_convolutions_are_refused():
    from propcalc.init.layers import Layer
    from propcalc.training import UnsupportedKernelError
    kw = dict(loss="cross_entropy", n_classes=10, batch_size=16)
    by_widths = propcalc.recommend("tanh", widths=WIDTHS, **kw)
    layers = [Layer.dense(a, b) for a, b in zip(WIDTHS[:-1], WIDTHS[1:])]
    by_layers = propcalc.recommend("tanh", layers=layers, **kw)
    assert by_layers.learning_rate_ceiling == pytest.approx(by_widths.learning_rate_ceiling,
                                                            rel=1e-14)
    with pytest.raises(UnsupportedKernelError, match=r"layers\[0\] is a convolution"):
        propcalc.recommend("tanh", layers=[Layer.conv(3, 8, 3), Layer.dense(72, 10)], **kw)
