"""The output-layer reason of the network verdict, for networks ending in a dense readout.

References, each beside its check:
* the readout's variance: sigma_w2 q_in + sigma_b2 (Poole et al. 2016, eq. 3, no activation);
* the expected initial cross-entropy: seeded numpy sampling of K logits N(0, s2),
  E[logsumexp(l) - l_0] (a Monte Carlo of the definition, 200,000 draws), against the reason's
  number (propcalc.variants.output_layer by quadrature);
* the fix: a readout scaled to the sigma_w2 the reason names passes (the margin of 1% of ln K,
  common practice, no source).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

import propcalc
from propcalc.training import network_verdict


def net(readout_sw: float, classes: int | None = 10, last_act: bool = False) -> dict:
    body = {"sigma_w2": readout_sw, "sigma_b2": 0.0}
    if classes is not None:
        body["width"] = classes
    blocks = [{"dense": {"sigma_w2": 1.0, "sigma_b2": 0.0, "width": 128}},
              {"repeat": {"times": 12, "blocks": [
                  {"activation": "gelu"}, {"dense": {"sigma_w2": 1.9, "sigma_b2": 0.1,
                                                     "width": 128}}]}},
              {"activation": "gelu"}, {"dense": body}]
    if last_act:
        blocks.append({"activation": "tanh"})
    return {"blocks": blocks}


def test_cross_entropy_reason_against_sampled_logits_and_its_fix():
    r = propcalc.network_propagation(net(2.0))
    assert r.q[-1] == pytest.approx(2.0 * r.q[-2], rel=1e-12)
    reason = network_verdict(r, loss="cross_entropy").reason("output layer")
    rng = np.random.default_rng(7)
    logits = rng.standard_normal((200_000, 10)) * math.sqrt(r.q[-1])
    top = logits.max(axis=1, keepdims=True)
    lse = (np.log(np.exp(logits - top).sum(axis=1)) + top[:, 0]) - logits[:, 0]
    excess = lse.mean() - math.log(10)
    assert reason.value == pytest.approx(excess, abs=4 * lse.std() / math.sqrt(lse.size))
    assert reason.passes is False and reason.limit == pytest.approx(0.01 * math.log(10))
    sw = float(reason.fix.split("sigma_w2 <= ")[1].split()[0])
    fixed = network_verdict(propcalc.network_propagation(net(sw * 0.999)),
                            loss="cross_entropy", n_classes=10).reason("output layer")
    assert fixed.passes is True and fixed.value <= fixed.limit


def test_mse_reason_reads_the_output_variance():
    r = propcalc.network_propagation(net(0.005, classes=None))
    reason = network_verdict(r, loss="mse").reason("output layer")
    assert reason.value == r.q[-1] and reason.passes is True
    assert network_verdict(propcalc.network_propagation(net(20.0, classes=None)),
                           loss="mse").reason("output layer").passes is False


def test_without_a_readout_or_a_loss_it_says_why():
    r = propcalc.network_propagation(net(1.0, last_act=True))
    reason = network_verdict(r, loss="cross_entropy").reason("output layer")
    assert reason.passes is None and "not a dense readout" in reason.detail
    reason = network_verdict(propcalc.network_propagation(net(1.0))).reason("output layer")
    assert reason.passes is None and "no loss given" in reason.detail
    no_width = propcalc.network_propagation(net(1.0, classes=None))
    assert "no n_classes" in network_verdict(no_width, loss="cross_entropy").reason(
        "output layer").detail
    with pytest.raises(propcalc.InvalidParameterError, match="n_classes"):
        network_verdict(propcalc.network_propagation(net(1.0)), loss="cross_entropy",
                        n_classes=5)
    with pytest.raises(propcalc.InvalidParameterError, match="loss"):
        network_verdict(propcalc.network_propagation(net(1.0)), loss="hinge")
