"""The service behind ``propcalc serve --production`` (2 workers) on 127.0.0.1, driven with requests.

The numbers it returns must equal the Python API's (``to_dict()`` through
``propcalc.jsonable``), byte for byte after JSON parsing.
"""

from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor

import pytest
import requests

import propcalc
from propcalc import jsonable


@pytest.fixture(scope="module")
def http(live_server):
    with requests.Session() as s:
        s.base_url = live_server.url  # type: ignore[attr-defined]
        yield s


def call(http, method, path, **kw):
    return http.request(method, http.base_url + path, timeout=30, **kw)


def test_health_and_server(http):
    resp = call(http, "GET", "/health")
    assert resp.status_code == 200
    assert resp.headers["Server"] == "propcalc"  # waitress inside the gunicorn workers


@pytest.mark.parametrize("name, sw, sb, depth", [
    ("tanh", 1.5, 0.05, 20), ("relu", 2.0, 0.0, None), ("gelu", 3.0, 0.5, 64),
    ("relu", 3.0, 0.0, None), ("selu", 1.0, 0.0, 10),
])
def test_propagation_numbers_equal_python_api(http, strict_json, name, sw, sb, depth):
    body = {"activation": name, "sigma_w2": sw, "sigma_b2": sb}
    if depth is not None:
        body["depth"] = depth
    resp = call(http, "POST", "/v1/propagation", json=body)
    assert resp.status_code == 200
    want = propcalc.propagation(propcalc.activation(name), sw, sb, depth=depth)
    assert strict_json(resp.content) == jsonable(want.to_dict())


def test_plan_equals_python_api(http, strict_json):
    widths = [48] + [512] * 30 + [6]
    resp = call(http, "POST", "/v1/plan", json={"activation": "gelu", "widths": widths,
                                                 "target": "edge"})
    assert resp.status_code == 200
    want = propcalc.recommend(propcalc.activation("gelu"), widths=widths, target="edge")
    assert strict_json(resp.content) == jsonable(want.to_dict())


def test_edge_and_critical_point_equal_python_api(http, strict_json):
    act = propcalc.activation("erf")
    resp = call(http, "POST", "/v1/edge-of-chaos", json={"activation": "erf", "q_star": [0.5, 2]})
    assert strict_json(resp.content)["points"] == jsonable(
        [p.to_dict() for p in propcalc.edge_of_chaos_line(act, [0.5, 2])])
    resp = call(http, "POST", "/v1/critical-point", json={"activation": "erf", "q_star": 2})
    assert strict_json(resp.content) == jsonable(propcalc.edge_of_chaos(act, 2.0).to_dict())


def test_maps_equal_python_api(http, strict_json):
    act = propcalc.activation("softplus")
    resp = call(http, "POST", "/v1/maps/correlation", json={
        "activation": "softplus", "sigma_w2": 1.2, "sigma_b2": 0.1, "q": 2.0,
        "c": [-0.9, 0.0, 0.9], "with_slope": True})
    got = strict_json(resp.content)
    assert got["correlation"] == jsonable(propcalc.correlation_map(act, [-0.9, 0.0, 0.9], 1.2, 0.1,
                                                                   q=2.0))
    assert got["slope"] == jsonable(propcalc.correlation_map_slope(act, [-0.9, 0.0, 0.9], 1.2,
                                                                   0.1, q=2.0))
    resp = call(http, "POST", "/v1/maps/variance", json={"activation": "softplus",
                                                          "sigma_w2": 1.2, "q": [0.5, 5.0]})
    assert strict_json(resp.content)["variance"] == jsonable(
        propcalc.variance_map(act, [0.5, 5.0], 1.2, 0.0))


def test_activation_list_and_etag(http, strict_json):
    resp = call(http, "GET", "/v1/activations")
    assert resp.status_code == 200
    assert len(strict_json(resp.content)["activations"]) == len(propcalc.builtin_names())
    again = call(http, "GET", "/v1/activations", headers={"If-None-Match": resp.headers["ETag"]})
    assert again.status_code == 304 and again.content == b""


def test_same_bytes_from_both_workers(http):
    # 2 workers, each with its own cache: every answer to the same request has the same bytes
    body = {"activation": "mish", "sigma_w2": 1.7, "sigma_b2": 0.2, "depth": 40}
    with ThreadPoolExecutor(4) as pool:
        responses = list(pool.map(lambda _: call(http, "POST", "/v1/propagation", json=body),
                                  range(8)))
    assert {r.status_code for r in responses} == {200}
    assert len({r.content for r in responses}) == 1
    assert len({r.headers["ETag"] for r in responses}) == 1


def test_errors_over_the_wire(http):
    resp = call(http, "POST", "/v1/propagation", data=b'{"activation":"tanh","sigma_w2":NaN}',
                headers={"Content-Type": "application/json"})
    assert resp.status_code == 400 and resp.headers["Content-Type"] == "application/problem+json"
    resp = call(http, "DELETE", "/v1/plan")
    assert resp.status_code == 405 and "POST" in resp.headers["Allow"]
    resp = call(http, "POST", "/v1/plan", data=b"{}", headers={"Content-Type": "text/plain"})
    assert resp.status_code == 415
    resp = call(http, "POST", "/v1/plan", json={"activation": "relu"})
    assert resp.status_code == 422 and resp.json()["errors"][0]["pointer"] == "/depth"


def test_413_with_content_length_and_chunked(http):
    big = b'{"pad": "' + b"x" * 100_000 + b'"}'
    resp = call(http, "POST", "/v1/propagation", data=big,
                headers={"Content-Type": "application/json"})
    assert resp.status_code == 413

    def chunks():
        for _ in range(100):
            yield b"x" * 1000

    resp = call(http, "POST", "/v1/propagation", data=chunks(),
                headers={"Content-Type": "application/json"})
    assert resp.status_code == 413
    assert resp.json()["limit"]["name"] == "MAX_CONTENT_LENGTH"


def test_work_budget_refusal_is_fast(http):
    resp = call(http, "POST", "/v1/maps/correlation", json={
        "activation": "gelu_tanh", "sigma_w2": 1.5, "q": 1e8,
        "c_grid": {"start": -1, "stop": 1, "num": 2000}, "with_slope": True})
    assert resp.status_code == 422
    assert resp.json()["limit"]["name"] == "WORK_BUDGET"
    assert resp.elapsed.total_seconds() < 5  # refused before computing (generous: shared host)


def test_no_nan_or_infinity_tokens(http, strict_json):
    # responses that carry infinities: step (chi_1 infinite), tanh exactly critical (xi_c)
    for body in ({"activation": "step", "sigma_w2": 1.0, "sigma_b2": 0.1},
                 {"activation": "tanh", "sigma_w2": 1.0}):
        resp = call(http, "POST", "/v1/propagation", json=body)
        text = resp.text
        assert "NaN" not in text and "Infinity" not in text
        assert '"inf"' in text
        strict_json(resp.content)
