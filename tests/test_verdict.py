"""The trainability verdict (propcalc.training.verdict) and its place in recommend's plan.

Sources: the issue's measured cases (issue 15: the tanh plan at 100 layers of width 128 trained;
the GELU plan at 64 layers of width 128, q* = 14.1, lost its second moment), re-measured here in
seeded finite-width networks (propcalc.simulate, numpy default_rng); the 6 xi_c rule and chi_1^L
(Schoenholz et al. 2017) by mpmath; the initial cross-entropy for K = 2 classes as the closed
expectation E[softplus(sqrt(2 s2) z)] by scipy.integrate.quad.
"""

from __future__ import annotations

import math

import mpmath
import pytest
from scipy import integrate, special, stats

import propcalc as pc
from propcalc.init.layers import Layer
from propcalc.meanfield.simulate import simulate
from propcalc.training.finite_width import DRIFT_LIMIT, finite_width
from propcalc.training.verdict import REASONS, Reason, Verdict, trainability


def test_issue_gelu_plan_flags_drift_and_spread_with_the_width_that_fixes_it():
    plan = pc.recommend("gelu", widths=[64] + [128] * 63 + [10])
    v = plan.verdict
    assert isinstance(v, Verdict) and str(v) == v.summary
    assert plan.q_star == pytest.approx(14.1, abs=0.05)
    # finite width is a warning: reported with its fix and the depth it allows, while the
    # deciding reasons (correlation depth at the edge, gradient growth) pass
    assert v.trainable and not v.failing
    assert {"finite-width spread", "finite-width drift"} <= set(v.warnings)
    assert not v.reason("finite-width drift").decides and v.reason("correlation depth").decides
    assert v.limited_by.startswith("finite-width") and v.depth_limit < 64
    drift = v.reason("finite-width drift")
    fw = finite_width("gelu", plan.sigma_w2, plan.sigma_b2, [128] * 63 + [10], plan.q_star)
    assert f"about {fw.width_needed} units" in drift.fix
    assert "limits the depth to about" in v.summary and "with the warnings above" in v.summary
    # seeded networks at width 128: the typical network's q at layer 63 is clearly below q*
    # (issue 15 measured about a third of q* in training), and the predicted typical value lies
    # in the +-2 SE band of the measured geometric mean (48 networks: 8.8, band 7.3-10.6)
    sim = simulate(pc.activation("gelu"), plan.sigma_w2, plan.sigma_b2, width=128, depth=63,
                   q0=plan.q_star, c0=1.0, repetitions=48, n_pairs=1, seed=5)
    lo, hi = sim.layers[-1].q_geometric_band
    same = finite_width("gelu", plan.sigma_w2, plan.sigma_b2, [128] * 64, plan.q_star)
    assert hi < plan.q_star
    assert lo < same.q_typical[-1] < hi
    assert same.q_typical[-1] < (1 - DRIFT_LIMIT) * plan.q_star
    # at the width the verdict names, the reasons pass
    wide = pc.recommend("gelu", widths=[64] + [fw.width_needed] * 63 + [10])
    for name in ("finite-width spread", "finite-width drift", "finite-width gradient spread"):
        assert wide.verdict.reason(name).passes


def test_issue_tanh_plan_at_100_layers_passes():
    # issue 15: the plan trained at 100 layers, width 128; no reason computed here fails
    plan = pc.recommend("tanh", widths=[64] + [128] * 99 + [10])
    v = plan.verdict
    assert v.trainable and not v.failing
    assert set(v.not_computed) == {"learning rate", "output layer"}
    spread = v.reason("finite-width spread")
    assert spread.passes and spread.value < 0.1
    assert "no loss given" in v.reason("learning rate").detail


def test_reasons_in_order_and_json():
    plan = pc.recommend("relu", widths=[16, 32, 32, 4])
    d = pc.jsonable(plan.to_dict())
    names = [r["name"] for r in d["verdict"]["reasons"]]
    assert names == list(REASONS)
    assert d["verdict"]["reasons"][0]["value"] == "inf"  # xi_c at the edge of chaos
    assert set(d["verdict"]) == set(Verdict.dict_keys())
    assert set(d["verdict"]["reasons"][0]) == set(Reason.dict_keys())


def test_without_widths_finite_width_is_not_checked():
    v = pc.recommend("relu", depth=30).verdict
    for name in ("finite-width spread", "finite-width gradient spread", "finite-width drift"):
        r = v.reason(name)
        assert r.passes is None and "no widths given" in r.detail
    assert "finite width not checked" in v.summary
    assert v.trainable  # nothing computed fails


def test_orthogonal_plans_say_why_finite_width_is_not_computed():
    # The laws are those of Gaussian weights (Hanin & Nica 2019); a Haar-orthogonal matrix keeps
    # its input's norm exactly, so its fluctuations differ. Measured (seeded numpy, 300 tanh
    # networks of 20 layers at width 64 at the plan's point): sd of ln mean(h_L^2) 0.197 with
    # Gaussian weights, 0.109 with scipy.stats.ortho_group weights: the Gaussian numbers would
    # overstate the spread of an orthogonal plan about twofold, so none is given.
    widths = [64] * 21
    orth = pc.recommend("relu", widths=widths, distribution="orthogonal").verdict
    gauss = pc.recommend("relu", widths=widths).verdict
    for name in ("finite-width spread", "finite-width gradient spread", "finite-width drift"):
        assert orth.reason(name).passes is None
        assert "orthogonal weights" in orth.reason(name).detail
        assert gauss.reason(name).value is not None
    assert orth.reason("correlation depth").value == gauss.reason("correlation depth").value


def test_relu_depth_limit_from_finite_width():
    # ReLU at the edge: the per-layer law 5/n (Hanin & Nica 2019) accumulates without bound, so
    # finite width sets the depth limit: sd of ln s_l = sqrt(5 l / n) reaches 0.5 at l = n / 20
    n = 100
    v = pc.recommend("relu", widths=[n] * 41).verdict
    assert v.limited_by in ("finite-width spread", "finite-width drift")
    # first layer past either limit: sqrt(5 l / n) > 0.5 at l = 6, typical drift
    # exp(-5 l / (2 n)) - 1 < -0.25 at l = 12
    assert v.depth_limit == 6
    assert "sets no depth limit by itself" in v.reason("correlation depth").detail
    assert v.warnings and v.trainable


def test_ordered_and_chaotic_plans_against_mpmath():
    # tanh, variance target: chaotic; 6 xi_c from chi_c = C'(c*) (Schoenholz et al. 2017),
    # gradient growth chi_1^L with chi_1 = sigma_w2 E[sech^4(z)] by mpmath
    plan = pc.recommend("tanh", depth=1000, target="variance")
    v = plan.verdict
    corr = v.reason("correlation depth")
    assert not corr.passes and corr.value == pytest.approx(plan.trainable_depth)
    sw = plan.sigma_w2
    mpmath.mp.dps = 30
    chi1 = sw * mpmath.quad(lambda z: mpmath.sech(z) ** 4 * mpmath.npdf(z),
                            [-mpmath.inf, mpmath.inf])
    g = v.reason("gradient growth")
    assert not g.passes
    # the limit e^6: 6 / ln chi_1 layers
    assert g.depth_limit == pytest.approx(6.0 / math.log(float(chi1)), rel=1e-8)
    assert "gradient growth" in v.failing and not v.trainable
    assert v.depth_limit == pytest.approx(min(g.depth_limit, corr.depth_limit))


def test_output_layer_reason_two_classes_against_quad():
    # K = 2: the loss is softplus(l_2 - l_1), l_2 - l_1 ~ N(0, 2 s2): E by scipy.integrate.quad
    s2 = 3.0
    a = math.sqrt(2 * s2)
    ref = integrate.quad(lambda z: float(special.logsumexp([0.0, a * z])) * stats.norm.pdf(z),
                         -12, 12, points=[0.0], limit=200)[0]
    act = pc.activation("tanh")
    p = pc.propagation(act, 1.5, 0.05, depth=3)
    v = trainability(act, p, 3, loss="cross_entropy", n_classes=2, logit_variance=s2)
    r = v.reason("output layer")
    assert r.value == pytest.approx(ref - math.log(2), rel=1e-8)
    assert not r.passes and "sigma_w2 <=" in r.fix
    assert r.limit == pytest.approx(0.01 * math.log(2))  # 1% of ln K (variants/output_layer)
    ok = trainability(act, p, 3, loss="cross_entropy", n_classes=2, logit_variance=1e-4)
    assert ok.reason("output layer").passes
    mse = trainability(act, p, 3, loss="mse", n_classes=1, logit_variance=4.0)
    assert mse.reason("output layer").passes is False


def test_learning_rate_reason_reads_a_ceiling():
    class Ceiling:  # the attributes the verdict reads from a LearningRateCeiling
        learning_rate_ceiling = 0.02
        learning_rate = 0.01
        learning_rate_rule = "half the ceiling"
        lambda_max = 100.0

    act = pc.activation("tanh")
    p = pc.propagation(act, 1.5, 0.05, depth=3)
    v = trainability(act, p, 3, learning_rate=Ceiling())
    r = v.reason("learning rate")
    assert r.passes and r.value == 0.02 and "0.01" in r.detail
    assert "below 0.02" in v.summary


def test_convolutions_and_exploding_plans():
    conv = pc.recommend("relu", layers=[Layer.conv(3, 16, (3, 3)), Layer.conv(16, 16, (3, 3))])
    assert "convolutional" in conv.verdict.reason("finite-width spread").detail
    boom = pc.recommend("gelu", widths=[32] * 20, sigma_b2=0.0)
    assert not boom.verdict.trainable and "explodes" in boom.verdict.summary
    assert boom.verdict.reason("finite-width spread").passes is None


def test_cli_shows_the_reasons():
    import io

    from propcalc.cli import main
    out = io.StringIO()
    code = main(["plan", "gelu", "--widths", ",".join(["64"] + ["128"] * 63 + ["10"])], out)
    text = out.getvalue()
    assert code == 0
    assert "finite-width drift" in text and "FAIL" in text and "widen the hidden layers" in text


def test_plan_for_a_loss_reads_the_ceiling_and_the_readout():
    # recommend(..., loss=...) (issue 15's contract): the verdict reads the plan's ceiling and
    # its readout; opting out of the readout scale brings back the issue's GELU logit variance
    # (q* = 14.1) and an initial loss far above ln 10, which the output reason flags
    widths = [64] + [128] * 63 + [10]
    plan = pc.recommend("gelu", widths=widths, loss="cross_entropy", n_classes=10,
                        batch_size=128)
    lr = plan.verdict.reason("learning rate")
    assert lr.passes and lr.value == plan.learning_rate_ceiling
    assert f"{plan.learning_rate_ceiling:.3g}" in plan.verdict.summary
    assert plan.verdict.reason("output layer").passes
    raw = pc.recommend("gelu", widths=widths, loss="cross_entropy", n_classes=10,
                       batch_size=128, scale_output=False)
    out = raw.verdict.reason("output layer")
    assert not out.passes and out.value > 3.0 and "scale the readout" in out.fix
    assert "14.1" in out.detail


def test_network_verdict_plain_chaotic_stack():
    # a plain tanh stack at sigma_w2 = 3 (chaotic): the same Verdict type; with inputs of mean
    # square q* / sigma_w2 every pre-activation sits at q*, and the input/output gradient is
    # chi_1^L (Schoenholz et al. 2017), chi_1 = sigma_w2 E[sech^4] at q*
    # by mpmath
    sw, depth = 3.0, 60
    q_star = pc.propagation("tanh", sw, 0.0).q_star
    stack = {"blocks": [{"repeat": {"times": depth, "blocks": [
        {"dense": {"sigma_w2": sw, "sigma_b2": 0.0}}, {"activation": "tanh"}]}}]}
    result = pc.network_propagation(pc.network(stack), q0=q_star / sw, c0=0.5)
    v = pc.network_verdict(result)
    assert isinstance(v, Verdict) and [r.name for r in v.reasons] == list(REASONS)
    mpmath.mp.dps = 30
    chi1 = sw * mpmath.quad(lambda z: mpmath.sech(mpmath.sqrt(q_star) * z) ** 4 * mpmath.npdf(z),
                            [-mpmath.inf, mpmath.inf])
    g = v.reason("gradient growth")
    assert g.value == pytest.approx(float(chi1) ** depth, rel=1e-6)
    assert not g.passes and not v.trainable
    corr = v.reason("correlation depth")
    assert not corr.passes and "lose their correlation" in corr.detail
    assert v.depth_limit == corr.depth_limit < 2 * depth
    assert v.reason("learning rate").passes is None
    assert "plain stacks" in v.reason("learning rate").detail
    assert v.reason("output layer").passes is None
    assert "no loss given" in v.reason("output layer").detail
    # no widths in the description: the finite-width laws (network_finite_width) say which block
    fw = v.reason("finite-width spread")
    assert fw.passes is None and "/blocks/0/repeat/blocks/0 gives no width" in fw.detail


def test_network_verdict_residual_demo_passes():
    # the invented residual MLP of demo/networks: layer-normalised residual branches keep two
    # inputs apart along a power law (Yang & Schoenholz 2017), gradients within a factor 100
    import json
    import pathlib

    path = (pathlib.Path(__file__).resolve().parents[1] / "demo" / "networks"
            / "otter-residual-mlp.json")
    result = pc.network_propagation(pc.network(json.loads(path.read_text())), q0=1.0, c0=0.5)
    v = pc.network_verdict(result)
    assert v.trainable and v.reason("correlation depth").passes
    assert "power law" in v.reason("correlation depth").detail
    assert pc.jsonable(v.to_dict())["reasons"][2]["passes"] is None


def test_network_verdict_in_the_cli_and_the_service():
    # the same structure in the CLI's JSON and text, and in POST /v1/network
    import io
    import json
    import pathlib

    from propcalc.cli import main
    from propcalc_api import create_app

    path = (pathlib.Path(__file__).resolve().parents[1] / "demo" / "networks"
            / "otter-residual-mlp.json")
    out = io.StringIO()
    assert main(["network", str(path), "--json", "--no-plan"], out) == 0
    doc = json.loads(out.getvalue())
    want = pc.jsonable(pc.network_verdict(pc.network_propagation(
        pc.network(json.loads(path.read_text())))).to_dict())
    assert doc["verdict"] == want
    text = io.StringIO()
    assert main(["network", str(path), "--no-plan"], text) == 0
    assert "verdict: " in text.getvalue() and "trainable as planned" in text.getvalue()
    client = create_app({"TESTING": True}).test_client()
    resp = client.post("/v1/network", json={"network": json.loads(path.read_text()),
                                            "plan": None})
    assert resp.status_code == 200, resp.get_json()
    assert resp.get_json()["verdict"] == want
    # both responses agree with the service's OpenAPI document (jsonschema, draft 2020-12)
    import jsonschema

    doc = client.get("/openapi.json").get_json()
    plan = client.post("/v1/plan", json={"activation": "gelu",
                                         "widths": [64] + [128] * 63 + [10]}).get_json()
    assert plan["verdict"]["warnings"]
    # (the whole plan too: its nullable enums, such as loss, list null)
    for name, body in (("NetworkAnalysis", resp.get_json()), ("InitPlan", plan)):
        jsonschema.Draft202012Validator({**doc, "$ref": f"#/components/schemas/{name}"}
                                        ).validate(body)


@pytest.mark.parametrize("kwargs,needle", [
    ({"depth": 0}, "depth must be an integer >= 1, got 0"),
    ({"depth": float("nan")}, "depth must be an integer >= 1, got nan"),
    ({"depth": 5, "widths": [8, 8]}, "widths must be 5 widths"),
    ({"depth": 5, "loss": "hinge"}, "loss must be one of mse, cross_entropy"),
    ({"depth": 5, "loss": "cross_entropy", "n_classes": 1}, "n_classes must be an integer in"),
    ({"depth": 5, "loss": "mse", "logit_variance": float("nan")},
     "logit_variance must be a finite real number"),
    ({"depth": 5, "loss": "cross_entropy", "n_classes": 10, "logit_variance": 1.0,
      "output_margin": float("nan")}, "output_margin must be a finite real number"),
])
def test_trainability_refuses_bad_arguments_by_name(kwargs, needle):
    # the project's error contract (PREAMBLE): depth 0 read '0 layers is within ...', a NaN
    # depth raised TypeError, loss 'hinge' and n_classes 1 were ignored, a NaN logit variance
    # failed the output layer with 'nan'
    p = pc.propagation("tanh", 1.5, 0.05)
    with pytest.raises(pc.PropcalcError, match=needle):
        trainability("tanh", p, **kwargs)
    with pytest.raises(pc.PropcalcError, match="propagation must be a Propagation"):
        trainability("tanh", "tanh", 5)


def test_network_verdict_refuses_bad_arguments_by_name():
    # the project's error contract (PREAMBLE): a NaN or negative margin failed the output layer
    # silently, a wrong type raised AttributeError
    desc = {"input_width": 4, "blocks": [
        {"dense": {"sigma_w2": 1.5, "sigma_b2": 0.05, "width": 8}}, {"activation": "tanh"},
        {"dense": {"sigma_w2": 1.5, "sigma_b2": 0.0, "width": 3}}]}
    r = pc.network_propagation(desc, 1.0, 0.3)
    for kwargs, needle in (({"output_margin": float("nan")}, "output_margin must be a finite"),
                           ({"output_margin": -1.0}, "output_margin must be > 0"),
                           ({"learning_rate": "x"}, "learning_rate must be a LearningRate")):
        with pytest.raises(pc.PropcalcError, match=needle):
            pc.network_verdict(r, loss="cross_entropy", n_classes=3, **kwargs)
    with pytest.raises(pc.PropcalcError, match="result must be a NetworkPropagation"):
        pc.network_verdict("x")
    # every option takes effect or is refused (DEVELOPERS.md, "Input at the boundary"):
    # n_classes without a loss and momentum without batch_size were read and ignored
    for kwargs, needle in (({"n_classes": 3}, "n_classes must be absent when no loss is given"),
                           ({"loss": "mse", "momentum": 0.9},
                            "momentum must be 0 unless batch_size is given")):
        with pytest.raises(pc.PropcalcError, match=needle):
            pc.network_verdict(r, **kwargs)
