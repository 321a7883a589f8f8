"""Flask test-client tests of POST /v1/network (issue 14: networks described block by block).

Every 200 body equals ``propcalc.jsonable`` of the same calls made in-process
(``network_propagation`` and ``network_plan``; the app also loads every body back
through its response schema); closed forms are checked on the way with their sources.
Bad blocks are 422 with the JSON pointer of the block inside the request
(``/network`` + the engine's pointer); the engine's limits on descriptions and the work
budget are 422 naming what to change; bodies over MAX_CONTENT_LENGTH are 413.
"""

from __future__ import annotations

import math

import jsonschema
import numpy as np
import pytest
from numpy.testing import assert_allclose

import propcalc
from propcalc import jsonable
from propcalc.networks import MAX_NESTING, MAX_POSITIONS
from propcalc_api._json import MAX_NESTING as JSON_MAX_NESTING
from propcalc_api._json import nesting_depth
from propcalc.networks.fields import MAX_REPEAT_TIMES

PROBLEM = "application/problem+json"
BUDGET = "tag:propcalc,2025:problem:work-budget-exceeded"
INVALID = "tag:propcalc,2025:problem:invalid-fields"


def dense(sw: float, sb: float = 0.0, **kw) -> dict:
    return {"dense": {"sigma_w2": sw, "sigma_b2": sb, **kw}}


def stack(act, times: int, sw: float = 2.0, sb: float = 0.0) -> dict:
    return {"blocks": [{"repeat": {"times": times, "blocks": [dense(sw, sb), {"activation": act}]}}]}


def residual_net(act: str, times: int, weight: float = 0.5) -> dict:
    return {"blocks": [dense(1.0), {"repeat": {"times": times, "blocks": [{"residual": {
        "weight": weight, "branch": [{"norm": "layer"}, dense(2.0), {"activation": act},
                                     dense(1.0)]}}]}}]}


def post(client, body, strict_json, path="/v1/network"):
    resp = client.post(path, json=body)
    assert resp.status_code == 200, resp.get_data(as_text=True)
    assert resp.mimetype == "application/json"
    return strict_json(resp.data)


def problem(resp, status, kind=None):
    assert resp.status_code == status, resp.get_data(as_text=True)
    assert resp.mimetype == PROBLEM
    body = resp.get_json(force=True)
    if kind is not None:
        assert body["type"] == kind, body
    return body


def pointers(body) -> list[str]:
    return [e.get("pointer") for e in body.get("errors", [])]


# ---------------------------------------------------------------------------------------------
# the numbers are the Python API's
# ---------------------------------------------------------------------------------------------
@pytest.mark.parametrize("description, q0, c0", [
    (stack("relu", 12), 1.0, 0.0),
    (stack("tanh", 8, 1.5, 0.05), 0.7, 0.3),
    (residual_net("gelu", 6), 1.0, 0.2),
    (stack({"formula": "x * tanh(softplus(x))"}, 4, 1.8, 0.02), 1.0, 0.5),
])
def test_network_equals_the_python_api(client, strict_json, description, q0, c0):
    body = post(client, {"network": description, "q0": q0, "c0": c0}, strict_json)
    expected = propcalc.network_propagation(description, q0, c0)
    assert body["propagation"] == jsonable(expected.to_dict())
    plan = propcalc.network_plan(description, q0=q0, c0=c0)
    assert body["plan"] == jsonable(plan.to_dict())
    # the contract names: q, c, gradient per stream position, 0 the input
    n = propcalc.network(description).n_positions
    assert len(body["propagation"]["q"]) == len(body["propagation"]["c"]) == n + 1
    assert body["propagation"]["gradient"][-1] == 1.0


def test_relu_stack_follows_the_arc_cosine_kernel(client, strict_json):
    # ReLU at sigma_w2 = 2, sigma_b2 = 0: E[relu(u)^2] = q / 2 keeps q = q0, and the correlation
    # after each layer is the normalised arc-cosine kernel of degree 1 (Cho & Saul 2009, eq. 6):
    # c' = (sqrt(1 - c^2) + (pi - arccos c) c) / pi
    body = post(client, {"network": stack("relu", 10), "q0": 1.3, "c0": 0.1, "plan": None},
                strict_json)
    prop = body["propagation"]
    assert body["plan"] is None
    assert_allclose(prop["q"][::2], 1.3, rtol=1e-12)
    c = 0.1
    for layer in range(1, 11):
        c = (math.sqrt(1 - c * c) + (math.pi - math.acos(c)) * c) / math.pi
        assert_allclose(prop["c"][2 * layer], c, rtol=0, atol=1e-10)
    # the gradient is preserved from layer to layer (chi_1 = 2 E[relu'(u)^2] = 1: Schoenholz et
    # al. 2017); at the pre-activations it is E[relu'(u)^2] = 1/2 of the activations' (closed form)
    assert_allclose(prop["gradient"][::2], 1.0, rtol=1e-12)
    assert_allclose(prop["gradient"][1::2], 0.5, rtol=1e-12)


def test_layer_norm_resets_q(client, strict_json):
    # layer normalisation sets the per-unit second moment to gain^2 (here 1) whatever comes in,
    # and keeps the correlation (Ba et al. 2016, definition of the layer)
    description = {"blocks": [dense(3.0, 0.0), {"norm": "layer"}]}
    prop = post(client, {"network": description, "q0": 2.0, "c0": 0.4, "plan": None},
                strict_json)["propagation"]
    assert_allclose(prop["q"], [2.0, 6.0, 1.0], rtol=1e-12)
    assert_allclose(prop["c"], 0.4, rtol=1e-12)


def test_the_verdict_has_finite_width_numbers_for_residual_networks(client, strict_json):
    # issue 15 part 4: a pre-norm residual stack whose dense blocks give their widths gets the
    # finite-width reasons of propcalc.training.network_finite_width (checked against seeded
    # numpy networks in tests/test_network_finite_width_blocks.py), not "not computed"
    from propcalc.training import network_finite_width

    description = {"input_width": 48, "blocks": [dense(1.0, width=48), {"repeat": {
        "times": 12, "blocks": [{"residual": {"weight": 0.5, "branch": [
            {"norm": "layer"}, dense(2.0, width=96), {"activation": "gelu"},
            dense(1.0, width=48)]}}]}}]}
    body = post(client, {"network": description, "plan": None}, strict_json)
    result = propcalc.network_propagation(description)
    assert body["verdict"] == jsonable(propcalc.network_verdict(result).to_dict())
    reasons = {r["name"]: r for r in body["verdict"]["reasons"]}
    fw = network_finite_width(description)
    assert reasons["finite-width spread"]["value"] == fw.top_log_sd > 0
    assert reasons["finite-width gradient spread"]["value"] == fw.gradient_spread > 0
    assert reasons["finite-width drift"]["passes"] is fw.drift_ok


def test_plan_options_reach_the_engine(client, strict_json):
    description = residual_net("tanh", 8, weight=1.0)
    options = {"target": 0.9, "distribution": "orthogonal"}
    body = post(client, {"network": description, "plan": options}, strict_json)
    expected = propcalc.network_plan(description, target=0.9, distribution="orthogonal")
    assert body["plan"] == jsonable(expected.to_dict())
    assert body["plan"]["branch_weight"]["weight"] is not None


def test_non_gaussian_positions_come_from_the_simulation(client, strict_json):
    # relu applied after a residual sum: the stream is no longer Gaussian (issue 14)
    description = {"blocks": [{"repeat": {"times": 3, "blocks": [
        {"residual": {"branch": [dense(1.0)]}}, {"activation": "relu"},
        {"residual": {"branch": [dense(1.0)]}}]}}]}
    body = post(client, {"network": description, "plan": None}, strict_json)
    prop = body["propagation"]
    expected = propcalc.network_propagation(description)
    assert prop == jsonable(expected.to_dict())
    sources = [b["source"] for b in prop["blocks"]]
    assert "simulation" in sources and prop["simulation"] is not None
    off = post(client, {"network": description, "plan": None, "simulate": False},
               strict_json)["propagation"]
    assert off == jsonable(propcalc.network_propagation(description, simulate=False).to_dict())
    assert off["simulation"] is None and None in off["q"]


# ---------------------------------------------------------------------------------------------
# bad blocks: the JSON pointer inside the request
# ---------------------------------------------------------------------------------------------
@pytest.mark.parametrize("description, pointer, words", [
    ({"blocks": [dense(2.0), {"residual": {"branch": [dense(-1.0)]}}]},
     "/network/blocks/1/residual/branch/0/dense/sigma_w2", "must be > 0, got -1.0"),
    ({"blocks": [{"repeat": {"times": 0, "blocks": [dense(2.0)]}}]},
     "/network/blocks/0/repeat/times", "must be an integer >= 1"),
    ({"blocks": [dense(2.0), {"convolutional": {}}]}, "/network/blocks/1/convolutional",
     "must be"),
    ({"blocks": [dense(2.0), {"activation": "rleu"}]}, "/network/blocks/1/activation/formula",
     "must be a built-in activation or a"),
    ({"blocks": []}, "/network/blocks", "non-empty"),
    ({"layers": []}, "/network/layers", "top-level field"),
    # null is not an absent width: the description's JSON Schema says integer (found by fuzzing)
    ({"blocks": [dense(2.0)], "input_width": None}, "/network/input_width", "got None"),
])
def test_bad_blocks_name_their_json_pointer(client, description, pointer, words):
    body = problem(client.post("/v1/network", json={"network": description}), 422, INVALID)
    assert pointers(body) == [pointer], body
    assert words in body["errors"][0]["detail"], body


def test_bad_members_of_the_request(client):
    body = problem(client.post("/v1/network", json={"network": [dense(2.0)]}), 422, INVALID)
    assert pointers(body) == ["/network"]
    body = problem(client.post("/v1/network", json={"network": stack("relu", 2), "c0": 1.5,
                                                    "plan": {"target": 2.0}, "extra": 1}),
                   422, INVALID)
    assert pointers(body) == ["/c0", "/extra", "/plan/target"]


# ---------------------------------------------------------------------------------------------
# limits: the engine's, the work budget, the body size
# ---------------------------------------------------------------------------------------------
def test_the_engines_limits_are_the_services(client):
    body = problem(client.post("/v1/network", json={"network": {"blocks": [{"repeat": {
        "times": MAX_REPEAT_TIMES + 1, "blocks": [dense(2.0)]}}]}}), 422, INVALID)
    assert pointers(body) == ["/network/blocks/0/repeat/times"]
    nested = {"blocks": [{"repeat": {"times": 1000, "blocks": [{"repeat": {
        "times": 1000, "blocks": [dense(2.0)]}}]}}]}
    body = problem(client.post("/v1/network", json={"network": nested}), 422, INVALID)
    assert pointers(body) == ["/network/blocks"]
    assert f"at most {MAX_POSITIONS} stream positions" in body["errors"][0]["detail"]


def test_the_deepest_description_passes_the_json_framing(client):
    # Found by fuzzing /v1/network from its own OpenAPI document: a description nested
    # MAX_NESTING levels (valid for the engine) was refused with 400 "JSON nested deeper than
    # 16 levels" by the body's framing. The framing must admit every body the schema admits:
    # here the deepest nesting with the deepest innermost blocks (a formula with parameters, a
    # kernel list), JSON depth 54; one level more (57) is the engine's 422 naming the path.
    inner = [{"activation": {"formula": "a * tanh(x)", "params": {"a": 1.0}}},
             {"convolution": {"sigma_w2": 1.0, "sigma_b2": 0.0, "kernel": [3], "width": 8}},
             {"pooling": {"kind": "average", "window": 2}}, dense(1.0)]

    def nested(levels):
        blocks = inner
        for i in range(levels):
            blocks = ([{"repeat": {"times": 1, "blocks": blocks}}] if i % 2
                      else [{"residual": {"branch": blocks, "weight": 0.1}}])
        return {"network": {"blocks": blocks}}

    assert nesting_depth(nested(MAX_NESTING)) == 54
    assert nesting_depth(nested(MAX_NESTING + 1)) == JSON_MAX_NESTING
    assert client.post("/v1/network", json=nested(MAX_NESTING)).status_code == 200
    body = problem(client.post("/v1/network", json=nested(MAX_NESTING + 1)), 422, INVALID)
    assert "nested at most" in body["errors"][0]["detail"]


def test_the_work_budget(client, strict_json):
    # 2000 tanh layers: about 2000 correlation-map evaluations, over the default budget
    body = problem(client.post("/v1/network", json={"network": stack("tanh", 2000, 1.5, 0.05),
                                                    "plan": None}), 422, BUDGET)
    assert body["limit"]["name"] == "WORK_BUDGET" and pointers(body) == ["/network"]
    assert body["estimated_cost"] > 3000
    # 800 layers fit without the plan, not with it: the problem says how to skip it
    body = problem(client.post("/v1/network", json={"network": stack("relu", 800)}), 422, BUDGET)
    assert pointers(body) == ["/plan"] and '"plan": null' in body["detail"]
    post(client, {"network": stack("relu", 800), "plan": None}, strict_json)


def test_an_expensive_simulation_is_refused_before_it_runs(client, strict_json):
    # attention over many tokens after a residual sum: the simulation would take minutes
    description = {"blocks": [{"repeat": {"times": 4, "blocks": [
        {"residual": {"branch": [{"attention": {"tokens": 4096, "width": 1024}}]}},
        {"activation": "relu"}]}}]}
    body = problem(client.post("/v1/network", json={"network": description, "plan": None}),
                   422, BUDGET)
    assert pointers(body) == ["/simulate"] and '"simulate": false' in body["detail"]
    prop = post(client, {"network": description, "plan": None, "simulate": False},
                strict_json)["propagation"]
    assert prop["simulation"] is None


def test_a_body_over_the_size_limit_is_413(client):
    huge = {"blocks": [dense(2.0, width=512)] * 2000}
    problem(client.post("/v1/network", json={"network": huge}), 413)


# ---------------------------------------------------------------------------------------------
# the OpenAPI document states the description format (recursive)
# ---------------------------------------------------------------------------------------------
def test_openapi_documents_the_description(client, strict_json):
    doc = strict_json(client.get("/openapi.json").data)
    schemas = doc["components"]["schemas"]
    request = schemas["NetworkRequest"]["properties"]["network"]
    assert request["$ref"] == "#/components/schemas/NetworkDescription"
    residual = schemas["NetworkDescriptionBlockResidual"]["properties"]["residual"]
    assert "#/components/schemas/NetworkDescriptionBlocks" in str(residual)
    repeat = schemas["NetworkDescriptionBlockRepeat"]["properties"]["repeat"]
    assert "#/components/schemas/NetworkDescriptionBlocks" in str(repeat)
    # the document's description schema accepts what the engine accepts and refuses the rest
    # (jsonschema, draft 2020-12, resolving the component references in the document)
    wrapper = {**doc, "$ref": "#/components/schemas/NetworkDescription"}
    validator = jsonschema.Draft202012Validator(wrapper)
    for good in (stack("relu", 3), residual_net("gelu", 2),
                 {"blocks": [{"attention": {"tokens": 8, "heads": 2, "width": 16}},
                             {"pooling": {"kind": "global_average", "positions": 8}}]}):
        propcalc.network(good)
        validator.validate(good)
    for bad in ({"blocks": [dense(-1.0)]}, {"blocks": [{"norm": "group"}]}, {"blocks": []}):
        with pytest.raises(propcalc.NetworkDescriptionError):
            propcalc.network(bad)
        assert not validator.is_valid(bad)
    assert np.all([p in doc["paths"] for p in ("/v1/network", "/v1/shape")])


# ---------------------------------------------------------------------------------------------
# the image: q, c and the gradient against the position (propcalc.output.network_plot)
# ---------------------------------------------------------------------------------------------
def test_network_image(client, make_client):
    body = {"network": residual_net("relu", 12), "c0": 0.1, "format": "svg"}
    first = client.post("/v1/plots/network", json=body)
    assert first.status_code == 200 and first.mimetype == "image/svg+xml"
    assert first.data.lstrip().startswith(b"<?xml") and b"<svg" in first.data
    # deterministic: the same request drawn again by another app without an image cache
    again = make_client(PLOT_CACHE_ENTRIES=0).post("/v1/plots/network", json=body)
    assert again.headers["X-Propcalc-Cache"] == "miss"
    assert again.data == first.data and again.headers["ETag"] == first.headers["ETag"]
    png = client.post("/v1/plots/network", json={**body, "format": "png", "dpi": 50})
    assert png.status_code == 200 and png.data[:8] == b"\x89PNG\r\n\x1a\n"
    assert png.headers["Content-Disposition"] == 'inline; filename="network.png"'


def test_network_image_errors(client):
    bad = {"blocks": [dense(2.0), {"residual": {"branch": [{"dense": {"sigma_w2": 1.0}}]}}]}
    got = problem(client.post("/v1/plots/network", json={"network": bad}), 422, INVALID)
    assert pointers(got) == ["/network/blocks/1/residual/branch/0/dense/sigma_b2"]
    got = problem(client.post("/v1/plots/network", json={"network": stack("relu", 2),
                                                         "plan": None}), 422, INVALID)
    assert pointers(got) == ["/plan"]  # the image has no plan
    got = problem(client.post("/v1/plots/network",
                              json={"network": stack("tanh", 2000, 1.5, 0.05)}), 422, BUDGET)
    assert pointers(got) == ["/network"]


# ---------------------------------------------------------------------------------------------
# with a loss: the verdict's learning-rate ceiling (issue 15) through norms and attention
# ---------------------------------------------------------------------------------------------
NORMED = {"input_width": 16, "blocks": [
    dense(1.0, width=64), {"repeat": {"times": 2, "blocks": [{"residual": {"weight": 0.5, "branch": [
        {"norm": "layer"}, dense(2.0, width=64), {"activation": "relu"}, dense(1.0, width=64)]}}]}},
    {"norm": "rms"}, dense(1.0, width=10)]}


def test_a_loss_gives_the_verdict_its_ceiling(client, strict_json):
    # the reference is the Python API (itself checked against seeded torch kernels in
    # tests/test_network_ntk_blocks.py)
    body = post(client, {"network": NORMED, "c0": 0.2, "plan": None, "loss": "cross_entropy",
                         "batch_size": 32}, strict_json)
    result = propcalc.network_propagation(NORMED, 1.0, 0.2)
    verdict = propcalc.network_verdict(result, loss="cross_entropy", batch_size=32)
    assert body["verdict"] == jsonable(verdict.to_dict())
    lr = next(r for r in body["verdict"]["reasons"] if r["name"] == "learning rate")
    assert lr["passes"] is True and lr["value"] > 0


def test_loss_members_are_checked(client):
    body = problem(client.post("/v1/network", json={"network": NORMED, "batch_size": 8,
                                                    "momentum": 0.5}), 422, INVALID)
    assert pointers(body) == ["/batch_size", "/momentum"]
    body = problem(client.post("/v1/network", json={"network": NORMED, "loss": "mse"}), 422,
                   INVALID)
    assert pointers(body) == ["/batch_size"]


def test_many_classes_are_refused_by_the_budget(client):
    # the softmax curvature of K = 2000 outputs: 20000 K draws, over the default budget
    wide = {"input_width": 16, "blocks": [dense(1.0, width=64), {"activation": "tanh"},
                                          dense(1.0, width=2000)]}
    body = problem(client.post("/v1/network", json={
        "network": wide, "plan": None, "loss": "cross_entropy", "batch_size": 8}), 422, BUDGET)
    assert pointers(body) == ["/n_classes"] and "learning-rate ceiling" in body["detail"]


# the plan with a loss: its learning rate at the position correlations, or why not by path
TOKENS = {"input_width": 16, "blocks": [
    dense(1.0, width=32), {"activation": "tanh"},
    {"residual": {"weight": 0.5, "branch": [{"norm": "layer"}, {"attention": {
        "tokens": 4, "width": 32, "query_key_scale": 0.0}}]}},
    {"pooling": {"kind": "global_average", "positions": 4}}, dense(1.0, width=4)]}


def test_the_plan_carries_its_learning_rate_at_the_position_correlations(client, strict_json):
    # the reference is the Python API: network_plan at the same inputs, whose ceiling is
    # network_learning_rate_ceiling's (tests/test_network_plan.py)
    inputs = {"c0": 0.3, "c0_within": 0.4, "c0_between": 0.1}
    body = post(client, {"network": TOKENS, **inputs, "loss": "cross_entropy",
                         "batch_size": 16}, strict_json)
    ref = propcalc.network_plan(TOKENS, **inputs, loss="cross_entropy", batch_size=16)
    assert body["plan"] == jsonable(ref.to_dict())
    assert body["plan"]["learning_rate_ceiling"] > 0 and body["plan"]["learning_rate_note"] is None


def test_a_plan_whose_kernel_is_refused_says_why(client, strict_json):
    desc = {"input_width": 16, "blocks": [
        {"convolution": {"sigma_w2": 1.0, "sigma_b2": 0.0, "kernel": 3, "width": 8}},
        {"norm": "batch"}, {"activation": "relu"},
        {"pooling": {"kind": "global_average", "positions": 4}}, dense(1.0, width=3)]}
    body = post(client, {"network": desc, "c0_within": 0.3, "loss": "mse", "batch_size": 8},
                strict_json)
    ref = propcalc.network_plan(desc, c0_within=0.3, loss="mse", batch_size=8)
    assert body["plan"] == jsonable(ref.to_dict())
    plan = body["plan"]
    assert plan["blocks"] and plan["learning_rate_ceiling"] is None
    assert plan["learning_rate"] is None
    assert "block /blocks/1 (norm): batch norm of a stream with several positions" in (
        plan["learning_rate_note"])
    lr = next(r for r in body["verdict"]["reasons"] if r["name"] == "learning rate")
    assert lr["value"] is None and "/blocks/1 (norm)" in lr["detail"]


# the plan's readout scaled for the loss (issue 15 part 3); the reference is the Python API, whose
# readout is checked against the stated margin by seeded torch sampling and against Poole et al.
# 2016, eq. 3 for MSE (tests/test_network_plan_readout.py)
READOUT = {"input_width": 16, "blocks": [dense(1.0, width=32), {"activation": "tanh"},
                                         dense(1.0, width=32), {"activation": "tanh"},
                                         dense(1.0, width=4)]}


def test_the_plan_scales_its_readout_for_the_loss(client, strict_json):
    body = post(client, {"network": READOUT, "loss": "cross_entropy", "batch_size": 8},
                strict_json)
    ref = propcalc.network_plan(READOUT, loss="cross_entropy", batch_size=8)
    assert body["plan"] == jsonable(ref.to_dict())
    plan = body["plan"]
    assert plan["output_layer"].startswith("scaled for cross-entropy: sigma_w2 = ")
    assert plan["output_layer_scale"]["sigma_w2"] == plan["blocks"][-1]["sigma_w2"]
    assert plan["description"]["blocks"][-1]["dense"]["sigma_w2"] == plan["blocks"][-1]["sigma_w2"]
    body = post(client, {"network": READOUT, "loss": "mse", "batch_size": 8,
                         "scale_output": False}, strict_json)
    assert body["plan"]["output_layer"] == "as the hidden layers (scale_output=False)"
    assert body["plan"] == jsonable(propcalc.network_plan(
        READOUT, loss="mse", batch_size=8, scale_output=False).to_dict())


def test_scale_output_is_refused_where_it_is_not_read(client):
    body = problem(client.post("/v1/network", json={"network": READOUT, "scale_output": False}),
                   422, INVALID)
    assert pointers(body) == ["/scale_output"]
    body = problem(client.post("/v1/network", json={
        "network": READOUT, "plan": None, "loss": "mse", "batch_size": 8,
        "scale_output": False}), 422, INVALID)
    assert pointers(body) == ["/scale_output"] and "plan" in body["detail"] + str(body)
