"""Flask test-client tests of every endpoint: the numbers are the Python API's.

Each response body must equal ``propcalc.jsonable(result.to_dict())`` of the
same call made in-process; a few published values are checked as well, with
their sources beside them.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from numpy.testing import assert_allclose

import propcalc
from propcalc import jsonable


def post(client, path, body, strict_json):
    resp = client.post(path, json=body)
    assert resp.status_code == 200, resp.get_data(as_text=True)
    assert resp.mimetype == "application/json"
    return strict_json(resp.data)


# ---------------------------------------------------------------------------------------------
# service endpoints
# ---------------------------------------------------------------------------------------------
def test_health(client, strict_json):
    resp = client.get("/health")
    assert resp.status_code == 200
    assert strict_json(resp.data) == {"status": "ok", "service": "propcalc",
                                      "version": propcalc.__version__}


def test_limits_reflect_config(make_client, strict_json):
    c = make_client(WORK_BUDGET=1234, MAX_ARRAY_LENGTH=77)
    body = strict_json(c.get("/v1/limits").data)
    assert body["work_budget"] == 1234
    assert body["max_array_length"] == 77
    assert body["max_body_bytes"] == 64 * 1024
    assert body["ranges"]["variance_max"] == 1e4


def test_openapi_document(client, strict_json):
    resp = client.get("/openapi.json")
    assert resp.status_code == 200
    doc = strict_json(resp.data)
    assert doc["openapi"] == "3.1.0"
    paths = doc["paths"]
    for path in ("/health", "/v1/activations", "/v1/activations/{name}", "/v1/describe",
                 "/v1/propagation", "/v1/critical-point", "/v1/edge-of-chaos", "/v1/plan",
                 "/v1/maps/variance", "/v1/maps/correlation", "/v1/limits", "/openapi.json"):
        assert path in paths
    # every POST documents its error statuses, all as problem details
    for path, ops in paths.items():
        for method, op in ops.items():
            codes = set(op["responses"])
            assert "200" in codes and "500" in codes and "405" in codes, (path, method)
            if method == "post":
                assert {"400", "413", "415", "422"} <= codes, path
    problem = doc["components"]["responses"]["Problem422"]["content"]
    assert "application/problem+json" in problem
    # every object schema refuses unknown members
    for name, schema in doc["components"]["schemas"].items():
        if schema.get("type") == "array":  # the list of blocks of a network description
            continue
        assert schema.get("additionalProperties") is False, name
    # the "inf" convention is in the document
    xi_c = doc["components"]["schemas"]["Propagation"]["properties"]["xi_c"]
    assert {"type": "string", "enum": ["inf", "-inf"]} in xi_c["oneOf"]
    assert {"type": "null"} in xi_c["oneOf"]
    # limits in the document are the app's
    q = doc["components"]["schemas"]["VarianceMapRequest"]["properties"]["q"]
    assert q["maxItems"] == 2000


def test_openapi_is_valid_openapi_31(client, strict_json):
    doc = strict_json(client.get("/openapi.json").data)
    validator = pytest.importorskip("openapi_spec_validator")
    validator.validate(doc)  # the OpenAPI 3.1 meta-schema
    # and it loads in a consumer
    import schemathesis

    schema = schemathesis.openapi.from_dict(doc)
    ops = {op.ok().label for op in schema.get_all_operations()}
    assert "POST /v1/plan" in ops and "GET /v1/propagation" in ops


# ---------------------------------------------------------------------------------------------
# activations
# ---------------------------------------------------------------------------------------------
def test_activation_list_equals_python_api(client, strict_json):
    body = strict_json(client.get("/v1/activations").data)
    names = [a["name"] for a in body["activations"]]
    assert names == list(propcalc.builtin_names())
    for item in body["activations"]:
        act = propcalc.activation(item["name"])
        assert item == jsonable({**act.to_dict(), "gains": propcalc.gains(act).to_dict()})


def test_relu_gains_match_he_init(client, strict_json):
    body = strict_json(client.get("/v1/activations/relu").data)
    # He et al. 2015, eq. (10): sigma_w2 = 2 for ReLU, i.e. gain sqrt(2) both ways
    assert_allclose(body["gains"]["forward"], math.sqrt(2.0), rtol=1e-12)
    assert_allclose(body["gains"]["backward"], math.sqrt(2.0), rtol=1e-12)
    # ReLU is unbounded above: the upper end of its range is the string "inf"
    assert body["properties"]["output_range"] == [0.0, "inf"]


def test_one_activation_equals_python_api(client, strict_json):
    body = strict_json(client.get("/v1/activations/leaky_relu").data)
    act = propcalc.activation("leaky_relu")
    assert body == jsonable({**act.to_dict(), "gains": propcalc.gains(act).to_dict()})


def test_describe_with_params(client, strict_json):
    body = post(client, "/v1/describe",
                {"activation": {"name": "leaky_relu", "params": {"slope": 0.2}}}, strict_json)
    act = propcalc.activation("leaky_relu", slope=0.2)
    assert body == jsonable({**act.to_dict(), "gains": propcalc.gains(act).to_dict()})
    # He et al. 2015, eq. (15) with a leaky slope a: gain sqrt(2 / (1 + a^2))
    assert_allclose(body["gains"]["common_gain"], math.sqrt(2 / 1.04), rtol=1e-12)


def test_describe_formula(client, strict_json):
    spec = {"formula": "x * sigmoid(beta * x)", "params": {"beta": 1.5}}
    body = post(client, "/v1/describe", {"activation": spec}, strict_json)
    act = propcalc.activation(spec["formula"], beta=1.5)
    assert body == jsonable({**act.to_dict(), "gains": propcalc.gains(act).to_dict()})
    assert body["derivative_formula"]


# ---------------------------------------------------------------------------------------------
# propagation
# ---------------------------------------------------------------------------------------------
@pytest.mark.parametrize("name, sw, sb, depth", [
    ("tanh", 1.5, 0.05, 20),
    ("tanh", 4.0, 0.1, None),       # chaotic
    ("relu", 2.0, 0.0, 10),         # neutral variance, edge of chaos
    ("relu", 3.0, 0.0, None),       # unbounded variance: q* is null
    ("erf", 1.0, 0.0, 5),           # collapse to q* = 0
    ("step", 1.0, 0.1, 3),          # chi_1 infinite
])
def test_propagation_equals_python_api(client, strict_json, name, sw, sb, depth):
    body = {"activation": name, "sigma_w2": sw, "sigma_b2": sb}
    if depth is not None:
        body["depth"] = depth
    got = post(client, "/v1/propagation", body, strict_json)
    want = propcalc.propagation(propcalc.activation(name), sw, sb, depth=depth).to_dict()
    assert got == jsonable(want)


def test_propagation_conventions_inf_and_null(client, strict_json):
    # Poole et al. 2016, fig. 2 / Schoenholz et al. 2017: tanh with sigma_b2 = 0 is critical
    # at sigma_w2 = 1 (q* = 0); exactly there xi_c is infinite -> "inf"
    edge = post(client, "/v1/propagation", {"activation": "tanh", "sigma_w2": 1.0}, strict_json)
    assert edge["phase"] == "edge of chaos"
    assert edge["xi_c"] == "inf" and edge["trainable_depth"] == "inf"
    # ReLU with sigma_w2 > 2 and no bias: the variance grows by sigma_w2 / 2 per layer
    # (He et al. 2015, eq. 10): no finite fixed point -> null
    up = post(client, "/v1/propagation", {"activation": "relu", "sigma_w2": 3.0}, strict_json)
    assert up["q_star"] is None and up["xi_c"] is None
    assert_allclose(up["variance_fixed_points"]["growth_rate"], 1.5, rtol=1e-9)


def test_propagation_get_form_equals_post(client, strict_json):
    get = client.get("/v1/propagation?activation=tanh&sigma_w2=1.5&sigma_b2=0.05&depth=20")
    post_resp = client.post("/v1/propagation", json={"activation": {"name": "tanh"},
                                                     "sigma_w2": 1.5, "sigma_b2": 0.05,
                                                     "depth": 20})
    assert get.status_code == post_resp.status_code == 200
    assert get.data == post_resp.data
    assert get.headers["ETag"] == post_resp.headers["ETag"]
    # without depth too, and the two forms share one cache entry
    get = client.get("/v1/propagation?activation=erf&sigma_w2=1.25")
    post_resp = client.post("/v1/propagation", json={"activation": "erf", "sigma_w2": 1.25})
    assert get.headers["X-Propcalc-Cache"] == "miss"
    assert post_resp.headers["X-Propcalc-Cache"] == "hit"
    assert get.data == post_resp.data


def test_formula_equals_builtin(client, strict_json):
    # the same function typed as a formula and as the built-in swish(beta) gives the same report
    base = {"sigma_w2": 1.8, "sigma_b2": 0.2, "depth": 30}
    f = post(client, "/v1/propagation", {**base, "activation": {
        "formula": "x * sigmoid(beta * x)", "params": {"beta": 1.5}}}, strict_json)
    b = post(client, "/v1/propagation", {**base, "activation": {
        "name": "swish", "params": {"beta": 1.5}}}, strict_json)
    for key in ("q_star", "chi_q", "chi_1", "c_star", "chi_c", "xi_c"):
        assert_allclose(f[key], b[key], rtol=1e-10, err_msg=key)
    assert f["phase"] == b["phase"]


# ---------------------------------------------------------------------------------------------
# edge of chaos
# ---------------------------------------------------------------------------------------------
def test_critical_point_equals_python_api(client, strict_json):
    got = post(client, "/v1/critical-point", {"activation": "tanh", "q_star": 0.5}, strict_json)
    assert got == jsonable(propcalc.edge_of_chaos(propcalc.activation("tanh"), 0.5).to_dict())


def test_relu_critical_point_is_he(client, strict_json):
    # He et al. 2015 / Hayou et al. 2019: ReLU's edge of chaos is sigma_w2 = 2, sigma_b2 = 0
    got = post(client, "/v1/critical-point", {"activation": "relu"}, strict_json)
    assert_allclose(got["sigma_w2"], 2.0, rtol=1e-12)
    assert abs(got["sigma_b2"]) < 1e-12


def test_edge_line_default_and_explicit(client, strict_json):
    act = propcalc.activation("tanh")
    got = post(client, "/v1/edge-of-chaos", {"activation": "tanh"}, strict_json)
    qs = [0.01, 0.03, 0.1, 0.3, 1.0, 3.0, 10.0, 30.0, 100.0]
    assert got == jsonable({"activation": "tanh", "mode": "q_star", "sigma_b2": None,
                            "points": [p.to_dict() for p in propcalc.edge_of_chaos_line(act, qs)]})
    got2 = post(client, "/v1/edge-of-chaos", {"activation": "tanh", "q_star": qs}, strict_json)
    assert got2 == got


def test_edge_line_grid(client, strict_json):
    got = post(client, "/v1/edge-of-chaos", {"activation": "gelu", "q_star_grid": {
        "start": 0.1, "stop": 10, "num": 5, "spacing": "log"}}, strict_json)
    qs = np.geomspace(0.1, 10, 5)
    want = propcalc.edge_of_chaos_line(propcalc.activation("gelu"), qs)
    assert got["points"] == jsonable([p.to_dict() for p in want])


def test_edge_at_bias_equals_python_api(client, strict_json):
    got = post(client, "/v1/edge-of-chaos", {"activation": "tanh", "sigma_b2": 0.05},
               strict_json)
    want = propcalc.edge_of_chaos_at_bias(propcalc.activation("tanh"), 0.05)
    assert got == jsonable({"activation": "tanh", "mode": "sigma_b2", "sigma_b2": 0.05,
                            "points": [p.to_dict() for p in want]})
    assert len(got["points"]) >= 1


# ---------------------------------------------------------------------------------------------
# plans
# ---------------------------------------------------------------------------------------------
def test_plan_widths_equals_python_api(client, strict_json):
    widths = [784, 512, 512, 256, 10]
    got = post(client, "/v1/plan", {"activation": "tanh", "widths": widths,
                                    "distribution": "uniform"}, strict_json)
    want = propcalc.recommend(propcalc.activation("tanh"), widths=widths, distribution="uniform")
    assert got == jsonable(want.to_dict())


def test_plan_conv_layers_equals_python_api(client, strict_json):
    layers = [{"kind": "conv", "in_channels": 3, "out_channels": 32, "kernel_size": [3, 3]},
              {"kind": "conv", "in_channels": 32, "out_channels": 64, "kernel_size": [3, 3]},
              {"kind": "dense", "in_features": 64, "out_features": 10}]
    got = post(client, "/v1/plan", {"activation": "relu", "layers": layers,
                                    "distribution": "orthogonal"}, strict_json)
    engine_layers = [propcalc.Layer.conv(3, 32, (3, 3)), propcalc.Layer.conv(32, 64, (3, 3)),
                     propcalc.Layer.dense(64, 10)]
    want = propcalc.recommend(propcalc.activation("relu"), layers=engine_layers,
                              distribution="orthogonal")
    assert got == jsonable(want.to_dict())
    assert got["layers"][0]["fan_in"] == 27  # 3 channels x 3 x 3


def test_plan_depth_bias_target(client, strict_json):
    got = post(client, "/v1/plan", {"activation": "tanh", "depth": 12, "sigma_b2": 0.05},
               strict_json)
    want = propcalc.recommend(propcalc.activation("tanh"), 12, sigma_b2=0.05)
    assert got == jsonable(want.to_dict())
    assert got["target"] == "bias"


def test_plan_relu_variance_is_he(client, strict_json):
    got = post(client, "/v1/plan", {"activation": "relu", "widths": [100, 100, 100],
                                    "target": "variance"}, strict_json)
    # He et al. 2015, eq. (10): std = sqrt(2 / fan_in) for ReLU
    assert_allclose(got["layers"][1]["weight_std"], math.sqrt(2 / 100), rtol=1e-10)


# ---------------------------------------------------------------------------------------------
# maps
# ---------------------------------------------------------------------------------------------
def test_variance_map_equals_python_api(client, strict_json):
    act = propcalc.activation("tanh")
    qs = [0.0, 0.1, 1.0, 10.0, 1e4]
    got = post(client, "/v1/maps/variance", {"activation": "tanh", "sigma_w2": 1.5,
                                             "sigma_b2": 0.1, "q": qs}, strict_json)
    q = np.asarray(qs)
    assert got["q"] == qs
    assert got["variance"] == jsonable(propcalc.variance_map(act, q, 1.5, 0.1))
    assert got["chi_1"] == jsonable(propcalc.chi_1(act, q, 1.5))
    assert got["slope"] == jsonable([float(propcalc.variance_map_slope(act, v, 1.5)) for v in qs])


def test_variance_map_relu_closed_form(client, strict_json):
    # ReLU: E[relu(sqrt(q) z)^2] = q / 2, so V(q) = sigma_w2 q / 2 + sigma_b2 and
    # V'(q) = sigma_w2 / 2
    # (Cho & Saul 2009, arc-cosine kernel of degree 1 at c = 1)
    got = post(client, "/v1/maps/variance", {"activation": "relu", "sigma_w2": 3.0,
                                             "sigma_b2": 0.5,
                                             "q_grid": {"start": 1e-3, "stop": 1e3, "num": 13,
                                                        "spacing": "log"}}, strict_json)
    q = np.asarray(got["q"])
    assert_allclose(q, np.geomspace(1e-3, 1e3, 13), rtol=1e-15)
    assert_allclose(got["variance"], 1.5 * q + 0.5, rtol=1e-10)
    assert_allclose(got["slope"], 1.5, rtol=1e-10)


def test_correlation_map_equals_python_api(client, strict_json):
    act = propcalc.activation("tanh")
    cs = [-1.0, -0.5, 0.0, 0.5, 0.9, 1.0]
    got = post(client, "/v1/maps/correlation", {"activation": "tanh", "sigma_w2": 1.5,
                                                "sigma_b2": 0.1, "c": cs, "q": 0.7,
                                                "with_slope": True}, strict_json)
    c = np.asarray(cs)
    assert got["q_source"] == "given"
    assert got["correlation"] == jsonable(propcalc.correlation_map(act, c, 1.5, 0.1, q=0.7))
    assert got["slope"] == jsonable(propcalc.correlation_map_slope(act, c, 1.5, 0.1, q=0.7))


def test_correlation_map_at_fixed_point_relu_closed_form(client, strict_json):
    # ReLU at sigma_w2 = 2, sigma_b2 = 0: C(c) is the normalised arc-cosine kernel of degree 1,
    # (sqrt(1 - c^2) + (pi - arccos c) c) / pi (Cho & Saul 2009, eq. 6)
    got = post(client, "/v1/maps/correlation", {"activation": "relu", "sigma_w2": 2.0,
                                                "c_grid": {"start": -1, "stop": 1, "num": 9}},
               strict_json)
    assert got["q_source"] == "fixed_point" and got["slope"] is None
    c = np.asarray(got["c"])
    want = (np.sqrt(1 - c * c) + (np.pi - np.arccos(c)) * c) / np.pi
    assert_allclose(got["correlation"], want, rtol=1e-9, atol=1e-12)


def test_correlation_slope_of_step_is_inf_at_one(client, strict_json):
    got = post(client, "/v1/maps/correlation", {"activation": "step", "sigma_w2": 1.0,
                                                "sigma_b2": 0.1, "c": [0.0, 1.0], "q": 1.0,
                                                "with_slope": True}, strict_json)
    assert got["slope"][1] == "inf"


# ---------------------------------------------------------------------------------------------
# determinism, ETags, caching
# ---------------------------------------------------------------------------------------------
def test_same_request_same_bytes_across_apps(make_client):
    body = {"activation": "gelu", "sigma_w2": 2.0, "sigma_b2": 0.3, "depth": 50}
    a = make_client(RESULT_CACHE_ENTRIES=0).post("/v1/propagation", json=body)
    b = make_client(RESULT_CACHE_ENTRIES=0).post("/v1/propagation", json=body)
    assert a.data == b.data and a.headers["ETag"] == b.headers["ETag"]
    # keys sorted, no spaces
    assert a.data.startswith(b'{"activation":"gelu","c_star":')


def test_equivalent_requests_share_a_cache_entry(make_client):
    c = make_client()
    first = c.post("/v1/propagation", json={"activation": "tanh", "sigma_w2": 1.2})
    second = c.post("/v1/propagation", json={"sigma_b2": 0, "activation": {"name": "tanh",
                                             "params": {}}, "sigma_w2": 1.2, "q_input": 1})
    assert first.headers["X-Propcalc-Cache"] == "miss"
    assert second.headers["X-Propcalc-Cache"] == "hit"
    assert first.data == second.data


def test_get_etag_and_304(client):
    first = client.get("/v1/activations/tanh")
    etag = first.headers["ETag"]
    assert first.headers["Cache-Control"].startswith("public")
    again = client.get("/v1/activations/tanh", headers={"If-None-Match": etag})
    assert again.status_code == 304 and again.data == b""
    other = client.get("/v1/activations/tanh", headers={"If-None-Match": '"nope"'})
    assert other.status_code == 200
    url = "/v1/propagation?activation=relu&sigma_w2=2"
    etag = client.get(url).headers["ETag"]
    assert client.get(url, headers={"If-None-Match": etag}).status_code == 304
    etag = client.get("/openapi.json").headers["ETag"]
    assert client.get("/openapi.json", headers={"If-None-Match": etag}).status_code == 304


def test_head_request(client):
    resp = client.head("/v1/activations/relu")
    assert resp.status_code == 200 and resp.data == b""
    assert resp.headers["ETag"]


def test_cache_bounded_in_bytes(make_client, app):
    c = make_client(RESULT_CACHE_BYTES=3000)
    for sw in (1.1, 1.2, 1.3, 1.4, 1.5):
        assert c.post("/v1/propagation", json={"activation": "relu", "sigma_w2": sw}
                      ).status_code == 200
    stats = c.application.extensions["propcalc_api"].results.stats()
    assert stats.bytes <= 3000 and stats.entries < 5
