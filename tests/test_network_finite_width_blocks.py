"""Finite width through residual blocks and norms (propcalc.training.block_laws, network_laws).

Reference: seeded numpy sampling. ``_sample`` below draws each network with literal Gaussian
weight matrices (numpy default_rng, fresh per block), pushes one input of exact mean square q0
through it, and back-propagates a standard normal vector from the last recorded position with
the exact backward pass (no gradient-independence assumption): per network, q at every
recorded position (outputs of the stream's dense, residual and norm blocks) and
ln(|g_0|^2 / |g_top|^2) at the first. Over R networks the standard deviation of ln q and of
ln |g|^2 is compared with the first-order law within 3 sampling errors of an sd,
sd / sqrt(2 (R - 1)), plus 4 / n of the prediction (the first order's own error is of relative
order 1/n); the mean of q within 3 standard errors plus 16 q / n^2 (the next order; 1.6% at n = 32). The predicted variances are
of order 1/n, so the bands shrink like 1/n with them.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

import propcalc
from propcalc.networks.blocks import (
    ActivationBlock,
    Dense,
    Dropout,
    Norm,
    Repeat,
    Residual,
)
from propcalc.training import (
    FiniteWidthUnsupportedError,
    network_finite_width,
    network_verdict,
)
from propcalc.training.finite_width import GRADIENT_SPREAD_LIMIT


def dense(sw: float, sb: float = 0.0, width: int | None = None) -> dict:
    body = {"sigma_w2": sw, "sigma_b2": sb}
    if width is not None:
        body["width"] = width
    return {"dense": body}


def _expand(blocks):
    for b in blocks:
        if isinstance(b, Repeat):
            for _ in range(b.times):
                yield from _expand(b.blocks)
        else:
            yield b


def _one(net, q0: float, rng: np.random.Generator) -> tuple[list[float], float]:
    """One seeded network: q at the recorded positions, ln |g_0|^2 / |g_top|^2."""
    x = rng.standard_normal(net.input_width)
    x *= math.sqrt(q0 * x.size) / np.linalg.norm(x)
    qs: list[float] = []
    marks: list[int] = []
    dims: list[int] = []
    backs: list = []
    if not isinstance(next(_expand(net.blocks)), Dense):
        qs.append(q0), marks.append(0), dims.append(x.size)

    def forward(blocks, x, backs, main):
        for b in _expand(blocks):
            rec = False
            if isinstance(b, Dense):
                w = rng.standard_normal((b.width, x.size)) * math.sqrt(b.sigma_w2 / x.size)
                x = w @ x + rng.standard_normal(b.width) * math.sqrt(b.sigma_b2)
                backs.append(lambda g, w=w: w.T @ g)
                rec = main
            elif isinstance(b, ActivationBlock):
                d = b.activation.derivative(x)
                x = b.activation.value(x)
                backs.append(lambda g, d=d: g * d)
            elif isinstance(b, Norm):
                layer = b.kind == "layer"
                xc = x - (x.mean() if layer else 0.0)
                inv = 1.0 / math.sqrt(xc @ xc / x.size + b.eps)
                y = xc * inv

                def back(g, y=y, inv=inv, layer=layer, gain=b.gain):
                    gy = g * gain  # d y_i / d x_j = (delta_ij - [1/n] - y_i y_j / n) / s
                    return ((gy - gy.mean()) if layer else gy) * inv - (gy @ y) / y.size * y * inv

                x = b.gain * y
                backs.append(back)
                rec = main
            elif isinstance(b, Dropout):
                mask = (rng.random(x.size) < b.keep_rate) / b.keep_rate
                x = x * mask
                backs.append(lambda g, mask=mask: g * mask)
            elif isinstance(b, Residual):
                inner: list = []
                out = forward(b.branch, x, inner, False)

                def back(g, inner=inner, a=b.shortcut, w=b.weight):
                    h = g
                    for fn in reversed(inner):
                        h = fn(h)
                    return a * g + w * h

                x = b.shortcut * x + b.weight * out
                backs.append(back)
                rec = True
            if rec:
                qs.append(float(x @ x / x.size)), marks.append(len(backs)), dims.append(x.size)
        return x

    forward(net.blocks, x, backs, True)
    g = rng.standard_normal(dims[-1])
    top = g @ g
    for i in range(marks[-1], marks[0], -1):
        g = backs[i - 1](g)
    return qs, math.log(g @ g / top)


def _sample(desc: dict, reps: int, seed: int, q0: float = 1.0) -> tuple[np.ndarray, np.ndarray]:
    net = propcalc.network(desc)
    rng = np.random.default_rng(seed)
    runs = [_one(net, q0, rng) for _ in range(reps)]
    return np.array([r[0] for r in runs]), np.array([r[1] for r in runs])


def residual_tanh(n: int, times: int = 8) -> dict:
    """A residual stack without norms (tanh branch, weight 0.7)."""
    return {"input_width": n, "blocks": [dense(1.0, 0.0, n), {"repeat": {"times": times, "blocks": [
        {"residual": {"branch": [dense(1.5, 0.05, n), {"activation": "tanh"}, dense(1.2, 0.0, n)],
                      "weight": 0.7}}]}}]}


def pre_norm(n: int, times: int = 8) -> dict:
    """Pre-norm branches (layer norm, a hidden layer twice as wide, ReLU)."""
    return {"input_width": n, "blocks": [dense(1.0, 0.0, n), {"repeat": {"times": times, "blocks": [
        {"residual": {"branch": [{"norm": "layer"}, dense(2.0, 0.0, 2 * n), {"activation": "relu"},
                                 dense(1.0, 0.0, n)]}}]}}]}


def post_norm(n: int, times: int = 6) -> dict:
    """An RMS norm after every residual sum, then a dense readout."""
    return {"input_width": n, "blocks": [dense(1.0, 0.0, n), {"repeat": {"times": times, "blocks": [
        {"residual": {"branch": [dense(2.0, 0.0, n), {"activation": "relu"}, dense(1.0, 0.0, n)]}},
        {"norm": "rms"}]}}, dense(1.0, 0.0, n)]}


def with_eps(n: int, times: int = 6) -> dict:
    """Norms with gains and eps (their maps Q -> g^2 Q / (Q + eps)), an RMS norm after tanh."""
    return {"input_width": n, "blocks": [
        dense(1.0, 0.0, n), {"norm": {"kind": "rms", "gain": 1.2, "eps": 0.5}},
        {"repeat": {"times": times, "blocks": [
            {"residual": {"branch": [{"norm": {"kind": "layer", "eps": 0.3}}, dense(2.0, 0.0, n),
                                     {"activation": "gelu"}, dense(1.0, 0.0, n)], "weight": 0.8}},
            {"norm": {"kind": "rms", "gain": 1.5, "eps": 1.0}}]}},
        dense(1.0, 0.0, n), {"activation": "tanh"}, {"norm": "rms"}, dense(1.0, 0.1, n)]}


def dropout_mlp(n: int, times: int = 8) -> dict:
    """Inverted dropout after every activation of a plain stack (ReLU, keep rate 0.8)."""
    return {"input_width": n, "blocks": [dense(1.0, 0.0, n), {"repeat": {"times": times, "blocks": [
        {"activation": "relu"}, {"dropout": {"keep_rate": 0.8}}, dense(1.6, 0.0, n)]}}]}


def dropout_branches(n: int, times: int = 8) -> dict:
    """Pre-norm branches with dropout after GELU, and dropout after tanh before an RMS norm."""
    return {"input_width": n, "blocks": [dense(1.0, 0.0, n), {"repeat": {"times": times, "blocks": [
        {"residual": {"branch": [{"norm": "rms"}, dense(2.0, 0.0, 2 * n), {"activation": "gelu"},
                                 {"dropout": {"keep_rate": 0.7}}, dense(1.0, 0.0, n)],
                      "weight": 0.6}}]}},
        dense(1.0, 0.0, n), {"activation": "tanh"}, {"dropout": {"keep_rate": 0.5}},
        {"norm": "rms"}, dense(1.0, 0.0, n)]}


def dropout_outputs(n: int, times: int = 8) -> dict:
    """Dropout on dense outputs: at the end of every branch (keep 0.8) and before a dense block."""
    return {"input_width": n, "blocks": [dense(1.0, 0.0, n), {"repeat": {"times": times, "blocks": [
        {"residual": {"branch": [{"norm": "layer"}, dense(2.0, 0.0, n), {"activation": "tanh"},
                                 dense(1.0, 0.0, n), {"dropout": {"keep_rate": 0.8}}],
                      "weight": 0.7}}]}},
        {"norm": "rms"}, dense(1.0, 0.0, n), {"dropout": {"keep_rate": 0.6}}, dense(1.0, 0.0, n)]}


def norm_then_activation(n: int, times: int = 6) -> dict:
    """Dense, layer norm, GELU (an MLP's block), then residual branches dense, RMS norm, tanh."""
    return {"input_width": n, "blocks": [dense(1.0, 0.0, n), {"repeat": {"times": times, "blocks": [
        {"norm": {"kind": "layer", "gain": 1.3}}, {"activation": "gelu"}, dense(1.7, 0.05, n)]}},
        {"repeat": {"times": times, "blocks": [{"residual": {"branch": [
            dense(1.0, 0.0, 2 * n), {"norm": "rms"}, {"activation": "tanh"}, dense(1.2, 0.0, n)],
            "weight": 0.8}}]}}]}


def relu_on_input(n: int, times: int = 10) -> dict:
    """Residual blocks straight on the input (the input is the first position)."""
    return {"input_width": n, "blocks": [{"repeat": {"times": times, "blocks": [
        {"residual": {"branch": [dense(2.0, 0.0, n), {"activation": "relu"}, dense(1.0, 0.0, n)],
                      "weight": 0.5}}]}}]}


def _check(desc: dict, n: int, reps: int, seed: int) -> dict:
    pred = network_finite_width(desc)
    q, g = _sample(desc, reps, seed)
    assert q.shape[1] == len(pred.q_log_sd)
    sampling = 3.0 / math.sqrt(2.0 * (reps - 1))
    measured = {}
    for pos in range(1, q.shape[1]):
        sd = float(np.log(q[:, pos]).std(ddof=1))
        want = pred.q_log_sd[pos]
        assert abs(sd - want) <= want * (sampling + 4.0 / n) + 1e-12, (pos, sd, want)
        se = q[:, pos].std(ddof=1) / math.sqrt(reps)
        assert abs(q[:, pos].mean() - pred.q_mean[pos]) <= 3 * se + 16 * pred.q_mean[pos] / n ** 2
        measured[pos] = sd
    gsd = float(g.std(ddof=1))
    assert abs(gsd - pred.gradient_spread) <= pred.gradient_spread * (sampling + 4.0 / n)
    return {"q_sd": measured, "g_sd": gsd}


@pytest.mark.parametrize("make", [residual_tanh, pre_norm, post_norm, with_eps, relu_on_input,
                                  dropout_mlp, dropout_branches, dropout_outputs,
                                  norm_then_activation])
@pytest.mark.parametrize("n", [32, 128])
def test_residual_and_norm_networks_against_seeded_networks(make, n):
    _check(make(n), n, 400, seed=n + 7)


def test_wider_networks_against_seeded_networks():
    # widths 512 and 1024: fewer blocks and networks (literal matrices cost n^2 each)
    _check(relu_on_input(512, times=4), 512, 120, seed=3)
    _check(relu_on_input(1024, times=2), 1024, 60, seed=4)


def test_the_spread_of_q_is_zero_after_a_norm():
    desc = post_norm(64)
    pred = network_finite_width(desc)
    q, _ = _sample(desc, 50, seed=11)
    norms = [i for i in range(1, len(pred.widths) - 1) if i % 2 == 0]  # every norm's output
    for i in norms:
        assert pred.q_log_sd[i] == 0.0 and pred.q_mean[i] == 1.0
        assert np.ptp(q[:, i]) < 1e-12  # exactly 1 in every seeded network


def test_a_plain_chain_written_as_a_network_is_still_the_chain():
    # the tape reproduces finite_width.chain_laws (layer 0's own sampling apart) to rounding
    from propcalc.numerics.quadrature import DEFAULT_RULE
    from propcalc.training.network_laws import network_laws

    desc = {"input_width": 96, "blocks": [dense(1.3, 0.0, 96), {"repeat": {"times": 12, "blocks": [
        {"activation": "tanh"}, dense(1.5, 0.05, 96)]}}]}
    chain = network_finite_width(desc, 0.8)
    tape = network_laws(propcalc.network(desc), 0.8, DEFAULT_RULE)
    assert tape.q_log_sd[1:] == pytest.approx(chain.q_log_sd[1:], rel=1e-12)
    assert tape.gradient_log_sd == pytest.approx(chain.gradient_log_sd, rel=1e-12)
    assert tape.gradient_typical == pytest.approx(chain.gradient_typical, rel=1e-12)
    assert tape.q_mean == pytest.approx(chain.q_mean, rel=1e-12)
    assert (tape.width_needed, tape.depth_limit) == (chain.width_needed, chain.depth_limit)


def test_blocks_still_refused_name_their_path_and_reason():
    n = 32
    stream = [dense(1.0, 0.0, n)]
    branch = [dense(1.0, 0.0, n), {"activation": "relu"}, dense(1.0, 0.0, n)]
    cases = [
        ([*stream, {"norm": "batch"}], "/blocks/1", "batch"),
        ([*stream, {"residual": {"branch": branch}}, {"dropout": {"keep_rate": 0.9}},
          dense(1.0, 0.0, n)], "/blocks/2", "after an activation or a dense block only"),
        ([*stream, {"dropout": {"keep_rate": 0.9}}, {"activation": "relu"}], "/blocks/2",
         "masked units are not Gaussian"),
        ([*stream, {"residual": {"branch": [{"residual": {"branch": branch}}]}}],
         "/blocks/1/residual/branch/0", "inside a residual branch"),
        ([*stream, {"residual": {"branch": branch[:2]}}], "/blocks/1", "ends in an activation"),
        ([*stream, {"residual": {"branch": branch}}, {"activation": "tanh"}], "/blocks/2",
         "after a residual sum or a norm"),
        ([*stream, {"activation": "relu"}, {"norm": "layer"}], "/blocks/2", "centred variance"),
        ([*stream, {"norm": {"kind": "rms", "eps": 0.1}}, {"activation": "relu"}], "/blocks/2",
         "after a residual sum or a norm"),
        ([*stream, {"norm": "rms"}, {"activation": "relu"}, {"dropout": {"keep_rate": 0.9}}],
         "/blocks/3", "follows a norm and an activation"),
        ([*stream, {"norm": "rms"}, {"activation": "relu"}, {"residual": {"branch": branch}}],
         "/blocks/3", "without a dense block between"),
        ([*stream, {"residual": {"branch": [{"dense": {"sigma_w2": 1.0, "sigma_b2": 0.0, "width": n,
                                                       "weights": "orthogonal"}}]}}],
         "/blocks/1/residual/branch/0", "orthogonal"),
        ([{"residual": {"branch": branch}}], "/blocks/0", "input_width"),
    ]
    for blocks, path, why in cases:
        desc = {"blocks": blocks} if blocks[0].get("residual") else {"input_width": n,
                                                                     "blocks": blocks}
        with pytest.raises(FiniteWidthUnsupportedError, match=why) as info:
            network_finite_width(desc)
        assert path in str(info.value)


def test_a_residual_block_that_zeroes_the_stream_is_a_computation_error():
    n = 16
    desc = {"input_width": n, "blocks": [dense(1.0, 0.0, n), {"residual": {
        "branch": [dense(1.0, 0.0, n)], "weight": 0.0, "shortcut": 0.0}}, dense(1.0, 0.0, n)]}
    with pytest.raises(propcalc.PropcalcError, match="sets the stream to 0"):
        network_finite_width(desc)
    r = network_verdict(propcalc.network_propagation(desc)).reason("finite-width spread")
    assert r.passes is None and "sets the stream to 0" in r.detail



def test_a_norm_with_gain_0_is_a_computation_error_not_a_math_domain_error():
    # the error contract (DEVELOPERS.md): a layer norm of gain 0 raised ValueError("math domain
    # error") from ln(gain^2), in network_finite_width and in the network verdict
    n = 16
    desc = {"input_width": n, "blocks": [dense(1.0, 0.0, n), {"norm": {"kind": "layer",
                                                                       "gain": 0.0}},
                                         dense(1.0, 0.0, n)]}
    with pytest.raises(propcalc.PropcalcError, match="norm with gain 0 sets the stream to 0"):
        network_finite_width(desc)
    r = network_verdict(propcalc.network_propagation(desc)).reason("finite-width spread")
    assert r.passes is None and "gain 0" in r.detail


def test_the_network_verdict_has_the_finite_width_reasons_of_residual_networks():
    desc = pre_norm(64, times=24)
    fw = network_finite_width(desc)
    v = network_verdict(propcalc.network_propagation(desc))
    for name in ("finite-width spread", "finite-width gradient spread", "finite-width drift"):
        assert name not in v.not_computed
    assert v.reason("finite-width spread").value == fw.top_log_sd
    g = v.reason("finite-width gradient spread")
    assert g.value == fw.gradient_spread and g.passes is fw.gradient_ok
    # a deep post-norm stack at width 16: the gradient spread fails and the fix names a width
    narrow = post_norm(16, times=64)
    fw16 = network_finite_width(narrow)
    r = network_verdict(propcalc.network_propagation(narrow)).reason(
        "finite-width gradient spread")
    assert r.passes is False and f"about {fw16.width_needed} units" in r.fix
    assert fw16.width_needed > 16
    # at the width it names, the spread is within its limit (first order: linear in 1/n)
    wide = network_finite_width(post_norm(fw16.width_needed, times=64))
    assert wide.gradient_spread <= GRADIENT_SPREAD_LIMIT * (1 + 1e-9)
