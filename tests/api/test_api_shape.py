"""Flask test-client tests of POST /v1/shape (issue 16: an activation shaped for a depth).

Every 200 body equals ``propcalc.jsonable(propcalc.shape_activation(...).to_dict())``
of the same call (the app also loads every body back through its response schema);
the leaky-ReLU slope form is checked against its closed form (Zhang et al. 2022, from the
arc-cosine kernel of Cho & Saul 2009) and the deep-kernel-shaping conditions against
propcalc's own maps of the shaped activation. Bad members are 422 with their pointer;
an unreachable target is a 422 naming /target; a transform that does not exist is a 422
``computation-failed``.
"""

from __future__ import annotations

import math

import pytest
from numpy.testing import assert_allclose

import propcalc
from propcalc import jsonable

PROBLEM = "application/problem+json"
INVALID = "tag:propcalc,2025:problem:invalid-fields"
FAILED = "tag:propcalc,2025:problem:computation-failed"
BUDGET = "tag:propcalc,2025:problem:work-budget-exceeded"


def post(client, body, strict_json):
    resp = client.post("/v1/shape", json=body)
    assert resp.status_code == 200, resp.get_data(as_text=True)[:2000]
    return strict_json(resp.data)


def problem(resp, status, kind=None):
    assert resp.status_code == status, resp.get_data(as_text=True)[:2000]
    assert resp.mimetype == PROBLEM
    body = resp.get_json(force=True)
    if kind is not None:
        assert body["type"] == kind, body
    return body


@pytest.mark.parametrize("activation, depth, target, method", [
    ("relu", 100, None, "tat"),
    ("tanh", 60, 0.8, "tat"),
    ("gelu", 200, None, "dks"),
    ({"name": "leaky_relu", "params": {"slope": 0.2}}, 50, 0.9, "tat"),
    ({"formula": "x * sigmoid(b * x)", "params": {"b": 1.5}}, 40, 2.0, "dks"),
])
def test_shape_equals_the_python_api(client, strict_json, activation, depth, target, method):
    body = post(client, {"activation": activation, "depth": depth, "target": target,
                         "method": method}, strict_json)
    if isinstance(activation, str):
        act = propcalc.activation(activation)
    elif "name" in activation:
        act = propcalc.activation(activation["name"], **activation["params"])
    else:
        act = propcalc.activation(activation["formula"], **activation["params"])
    expected = propcalc.shape_activation(act, depth, target=target, method=method)
    assert body == jsonable(expected.to_dict())
    # used with sigma_w2 = 1 and sigma_b2 = 0 (Martens et al. 2021; Zhang et al. 2022)
    assert body["sigma_w2"] == 1.0 and body["sigma_b2"] == 0.0


def test_leaky_slope_meets_the_closed_form(client, strict_json):
    # Zhang et al. 2022: sqrt(2 / (1 + a^2)) leaky_relu_a has the normalised correlation map
    # C(c) = c + ((1 - a)^2 / (pi (1 + a^2))) (sqrt(1 - c^2) - c arccos c); composed L times
    # from c = 0 it must reach the target eta
    depth, eta = 80, 0.9
    body = post(client, {"activation": "relu", "depth": depth, "target": eta}, strict_json)
    a = body["params"]["slope"]
    k = (1 - a) ** 2 / (math.pi * (1 + a * a))
    c = 0.0
    for _ in range(depth):
        c = c + k * (math.sqrt(max(0.0, 1 - c * c)) - c * math.acos(min(1.0, c)))
    assert_allclose(c, eta, rtol=0, atol=1e-9)
    assert_allclose(body["network_map_at_0"], eta, rtol=0, atol=1e-9)


def test_dks_conditions_hold_on_the_shaped_activation(client, strict_json):
    # deep kernel shaping (Martens et al. 2021): Q(1) = 1, C(0) = 0 and C'(1) = zeta^(1/L),
    # checked with propcalc's maps on the returned formula
    depth, zeta = 100, 1.5
    body = post(client, {"activation": "tanh", "depth": depth, "target": zeta, "method": "dks"},
                strict_json)
    act = propcalc.activation(body["formula"], **{k: v for k, v in body["params"].items()})
    assert_allclose(propcalc.variance_map(act, 1.0, 1.0, 0.0), 1.0, atol=1e-10)
    assert_allclose(propcalc.correlation_map(act, 0.0, 1.0, 0.0, q=1.0), 0.0, atol=1e-10)
    assert_allclose(propcalc.chi_1(act, 1.0, 1.0), zeta ** (1 / depth), atol=1e-10)
    assert all(root["max_deviation"] <= 1e-10 for root in body["roots"])
    assert sum(root["chosen"] for root in body["roots"]) == 1


@pytest.mark.parametrize("body, pointer", [
    ({"activation": "tanh", "depth": 0}, "/depth"),
    ({"activation": "tanh", "depth": 10, "method": "kernel"}, "/method"),
    ({"activation": "tanh", "depth": 10, "target": 1.5}, "/target"),
    ({"activation": "tanh", "depth": 10, "target": 0.5, "method": "dks"}, "/target"),
    ({"activation": "tnah", "depth": 10}, "/activation"),
    ({"depth": 10}, "/activation"),
])
def test_bad_members(client, body, pointer):
    got = problem(client.post("/v1/shape", json=body), 422, INVALID)
    assert [e["pointer"] for e in got["errors"]] == [pointer], got


def test_unreachable_and_impossible_targets(client):
    # one leaky layer cannot take orthogonal inputs to c = 0.99 (the map's C(0) is at most
    # 1 / pi for a = 0): the problem names the target and says how far it gets
    got = problem(client.post("/v1/shape", json={"activation": "relu", "depth": 1,
                                                 "target": 0.99}), 422, INVALID)
    assert [e["pointer"] for e in got["errors"]] == ["/target"]
    # hard_tanh has no deep-kernel-shaping transform at this depth: computation-failed, not 500
    got = problem(client.post("/v1/shape", json={"activation": "hard_tanh", "depth": 100,
                                                 "method": "dks"}), 422, FAILED)
    assert "hard_tanh" in got["detail"]


def test_the_work_budget(make_client):
    small = make_client(WORK_BUDGET=500)
    got = problem(small.post("/v1/shape", json={"activation": "softplus", "depth": 3000}), 422,
                  BUDGET)
    assert [e["pointer"] for e in got["errors"]] == ["/depth"]


def test_openapi_documents_shaping(client, strict_json):
    doc = strict_json(client.get("/openapi.json").data)
    req = doc["components"]["schemas"]["ShapeRequest"]
    assert req["properties"]["method"]["enum"] == ["tat", "dks"]
    res = doc["components"]["schemas"]["ShapedActivation"]
    assert {"params", "network_map_at_0", "network_slope_at_1", "roots",
            "depth_verdict"} <= set(res["properties"])


def test_shaping_image(client, make_client):
    body = {"activation": "tanh", "depth": 20, "n_points": 21, "format": "svg"}
    first = client.post("/v1/plots/shape", json=body)
    assert first.status_code == 200 and first.mimetype == "image/svg+xml"
    # deterministic: drawn again by another app without an image cache, the same bytes
    again = make_client(PLOT_CACHE_ENTRIES=0).post("/v1/plots/shape", json=body)
    assert again.headers["X-Propcalc-Cache"] == "miss"
    assert again.data == first.data and again.headers["ETag"] == first.headers["ETag"]
    png = client.post("/v1/plots/shape", json={"activation": "relu", "depth": 50, "dpi": 50},
                      headers={"Accept": "image/png"})
    assert png.status_code == 200 and png.data[:8] == b"\x89PNG\r\n\x1a\n"


def test_shaping_image_errors(client):
    got = problem(client.post("/v1/plots/shape", json={"activation": "tanh", "depth": 20,
                                                       "n_points": 4}), 422, INVALID)
    assert [e["pointer"] for e in got["errors"]] == ["/n_points"]
    # the composed maps of a formula are 2-D integrals per point and layer: refused up front
    got = problem(client.post("/v1/plots/shape", json={
        "activation": {"formula": "x * sigmoid(x)"}, "depth": 500}), 422, BUDGET)
    assert [e["pointer"] for e in got["errors"]] == ["/depth"]
