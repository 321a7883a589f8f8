"""Every error status of the service, as RFC 9457 problem details."""

from __future__ import annotations

import logging

import pytest

import propcalc

PROBLEM = "application/problem+json"


def problem(resp, status):
    assert resp.status_code == status, resp.get_data(as_text=True)
    assert resp.mimetype == PROBLEM
    body = resp.get_json(force=True)
    assert body["status"] == status
    assert {"type", "title", "detail", "instance"} <= set(body)
    return body


def entries(body):
    return {e.get("pointer", e.get("parameter")): e["detail"] for e in body["errors"]}


def raw_post(client, path, data, content_type="application/json"):
    return client.post(path, data=data, content_type=content_type)


# ---------------------------------------------------------------------------------------------
# 400: the body is not acceptable JSON
# ---------------------------------------------------------------------------------------------
@pytest.mark.parametrize("data, fragment", [
    ('{"activation": "tanh", "sigma_w2": NaN}', "NaN is not valid JSON"),
    ('{"activation": "tanh", "sigma_w2": Infinity}', "Infinity is not valid JSON"),
    ('{"activation": "tanh", "sigma_w2": -Infinity}', "-Infinity is not valid JSON"),
    ('{"activation": "tanh", "sigma_w2": 1e400}', "too large for a 64-bit float"),
    ('{"activation": "tanh", "sigma_w2": 1, "sigma_w2": 2}', "duplicate key 'sigma_w2'"),
    ('{"activation": "tanh", ', "malformed JSON"),
    ("[1, 2]", "must be a JSON object, got an array"),
    ('"tanh"', "must be a JSON object, got a string"),
    ("null", "must be a JSON object, got null"),
    ("", "the body is empty"),
    ("[" * 5000 + "]" * 5000, "nested deeper than"),
    ('{"a": ' * 60 + "1" + "}" * 60, "nested deeper than"),  # the limit is 57 (api/_json.py)
])
def test_400_bad_json(client, data, fragment):
    body = problem(raw_post(client, "/v1/propagation", data), 400)
    assert body["type"] == "about:blank"
    assert fragment in body["detail"]


def test_400_invalid_utf8(client):
    body = problem(raw_post(client, "/v1/propagation", b'{"activation": "\xff"}'), 400)
    assert "UTF-8" in body["detail"]


# ---------------------------------------------------------------------------------------------
# 404, 405
# ---------------------------------------------------------------------------------------------
def test_404_unknown_path(client):
    body = problem(client.get("/v1/nothing-here"), 404)
    assert "/v1/nothing-here" in body["detail"]


def test_404_unknown_activation(client):
    body = problem(client.get("/v1/activations/tanhh"), 404)
    assert "tanhh" in body["detail"] and "tanh" in body["detail"]


@pytest.mark.parametrize("method, path, allowed", [
    ("delete", "/v1/propagation", {"GET", "POST"}),
    ("put", "/v1/plan", {"POST"}),
    ("post", "/v1/activations", {"GET"}),
    ("patch", "/health", {"GET"}),
])
def test_405_with_allow_header(client, method, path, allowed):
    resp = getattr(client, method)(path)
    body = problem(resp, 405)
    assert allowed <= {m.strip() for m in resp.headers["Allow"].split(",")}
    assert method.upper() in body["detail"]


# ---------------------------------------------------------------------------------------------
# 413, 415
# ---------------------------------------------------------------------------------------------
def test_413_body_too_large(client):
    data = '{"activation": "tanh", "sigma_w2": 1, "pad": "' + "x" * 70_000 + '"}'
    body = problem(raw_post(client, "/v1/propagation", data), 413)
    assert body["limit"] == {"name": "MAX_CONTENT_LENGTH", "value": 65536}
    assert "65536" in body["detail"]


def test_413_limit_is_configurable(make_client):
    c = make_client(MAX_CONTENT_LENGTH=2048)
    body = problem(c.post("/v1/maps/variance", json={"activation": "tanh", "sigma_w2": 1,
                                                     "q": [0.5] * 600}), 413)
    assert body["limit"]["value"] == 2048


@pytest.mark.parametrize("content_type", ["text/plain", "application/x-www-form-urlencoded",
                                          "application/json; charset=latin-1", None])
def test_415_wrong_content_type(client, content_type):
    kwargs = {"data": '{"activation": "tanh", "sigma_w2": 1}'}
    if content_type is not None:
        kwargs["content_type"] = content_type
    body = problem(client.post("/v1/propagation", **kwargs), 415)
    assert "application/json" in body["detail"] or "UTF-8" in body["detail"]


def test_charset_utf8_accepted(client):
    resp = client.post("/v1/propagation", data='{"activation": "tanh", "sigma_w2": 1}',
                       content_type="application/json; charset=utf-8")
    assert resp.status_code == 200


# ---------------------------------------------------------------------------------------------
# 422: one entry per bad member, with a pointer, the constraint and the value
# ---------------------------------------------------------------------------------------------
def test_422_one_entry_per_field(client):
    body = problem(client.post("/v1/propagation", json={
        "activation": "tanh", "sigma_w2": -1, "sigma_b2": "big", "depth": 2.5, "colour": "red"}),
        422)
    assert body["type"].endswith("invalid-fields")
    got = entries(body)
    assert got["/sigma_w2"] == "must be in [1e-06, 10000], got -1"
    assert got["/sigma_b2"] == 'must be a number, got "big"'
    assert got["/depth"] == "must be an integer, got 2.5"
    assert got["/colour"].startswith("is not a field here (allowed: activation, depth")
    assert len(body["errors"]) == 4


def test_422_missing_required(client):
    got = entries(problem(client.post("/v1/propagation", json={}), 422))
    assert got == {"/activation": "is required", "/sigma_w2": "is required"}


@pytest.mark.parametrize("value, message", [
    (True, "must be a number, got true"),
    ("1.5", 'must be a number, got "1.5"'),
    (None, "must be a number, not null, got null"),
    (10001, "must be in [1e-06, 10000], got 10001"),
    (0, "must be in [1e-06, 10000], got 0"),
])
def test_422_sigma_w2_values(client, value, message):
    got = entries(problem(client.post("/v1/propagation", json={"activation": "tanh",
                                                                "sigma_w2": value}), 422))
    assert got["/sigma_w2"] == message


def test_422_subnormal_bias_refused(client):
    got = entries(problem(client.post("/v1/propagation", json={
        "activation": "tanh", "sigma_w2": 1, "sigma_b2": 5e-324}), 422))
    assert got["/sigma_b2"] == "must be 0 or in [1e-100, 10000], got 5e-324"


def test_integral_float_is_an_integer(client):
    resp = client.post("/v1/propagation", json={"activation": "tanh", "sigma_w2": 1, "depth": 3.0})
    assert resp.status_code == 200 and resp.get_json()["depth"] == 3


def test_422_nested_pointers(client):
    body = problem(client.post("/v1/plan", json={"activation": "relu", "layers": [
        {"kind": "dense", "in_features": 10, "out_features": 0},
        {"kind": "conv", "in_channels": 3, "out_channels": 8, "kernel_size": [3, 0]},
        {"kind": "conv", "in_channels": 3, "out_channels": 8, "kernel_size": [3, 3, 3, 3]},
        {"kind": "pool"}]}), 422)
    got = entries(body)
    assert got["/layers/0/out_features"] == "must be in [1, 10000000], got 0"
    assert got["/layers/1/kernel_size/1"] == "must be in [1, 1024], got 0"
    assert got["/layers/2/kernel_size"] == "must have at most 3 items, got [3,3,3,3]"
    assert got["/layers/3/kind"] == 'must be one of dense, conv, got "pool"'
    assert len(got) == 4


def test_422_activation_pointers(client):
    got = entries(problem(client.post("/v1/describe", json={"activation": "tanhh"}), 422))
    assert got["/activation"].startswith("must be one of linear, step")
    got = entries(problem(client.post("/v1/describe", json={
        "activation": {"name": "relu", "formula": "x"}}), 422))
    assert "/activation/name" in got
    got = entries(problem(client.post("/v1/describe", json={"activation": 3}), 422))
    assert got["/activation"].startswith('must be a built-in name or an object')
    got = entries(problem(client.post("/v1/describe", json={
        "activation": {"formula": "x * sigmoid(b * x)", "params": {"b": float("1e7")}}}), 422))
    assert got["/activation/params/b"] == "must be in [-1000000, 1000000], got 10000000.0"
    got = entries(problem(client.post("/v1/describe", json={
        "activation": {"formula": "x", "params": {"9lives": 1}}}), 422))
    assert "/activation/params/9lives" in got
    got = entries(problem(client.post("/v1/describe", json={
        "activation": {"formula": "x * s", "params": {"spec": 1}}}), 422))
    assert got["/activation/params/spec"].startswith("is a reserved name")


def test_422_formula_limits(make_client):
    c = make_client(MAX_FORMULA_LENGTH=20, MAX_FORMULA_PARAMS=1)
    got = entries(problem(c.post("/v1/describe", json={
        "activation": {"formula": "x * sigmoid(x) + 0.5 * tanh(x)"}}), 422))
    assert got["/activation/formula"].startswith(
        "must have at most 20 characters (limit MAX_FORMULA_LENGTH)")
    got = entries(problem(c.post("/v1/describe", json={
        "activation": {"formula": "a * x + b", "params": {"a": 1, "b": 2}}}), 422))
    assert got["/activation/params"].startswith(
        "must have at most 1 items (limit MAX_FORMULA_PARAMS)")


def test_422_engine_parameter_error_points_at_params(client):
    got = entries(problem(client.post("/v1/propagation", json={
        "activation": {"name": "leaky_relu", "params": {"alpha": 0.1}}, "sigma_w2": 2}), 422))
    assert got["/activation/params/alpha"] == "must be a parameter of leaky_relu (slope), got 0.1"


def test_422_engine_formula_error(client):
    body = problem(client.post("/v1/propagation", json={
        "activation": {"formula": "x * sigmoid(x"}, "sigma_w2": 1}), 422)
    got = entries(body)
    assert "column" in got["/activation/formula"]


def test_422_formula_never_evaluated_as_code(client):
    for text in ("__import__('os').system('true')", "x.__class__", "open('x')", "lambda: x"):
        body = problem(client.post("/v1/describe", json={"activation": {"formula": text}}), 422)
        assert "/activation/formula" in entries(body)


def test_422_engine_cross_field_error(client):
    got = entries(problem(client.post("/v1/plan", json={
        "activation": "relu", "depth": 4, "widths": [10, 10]}), 422))
    assert got["/depth"] == "must be equal to the number of layers (1), got 4"


def test_422_exactly_one_of(client):
    got = entries(problem(client.post("/v1/maps/variance", json={
        "activation": "tanh", "sigma_w2": 1}), 422))
    assert got["/q"] == "one of q, q_grid is required"
    got = entries(problem(client.post("/v1/maps/variance", json={
        "activation": "tanh", "sigma_w2": 1, "q": [1], "q_grid": {"start": 0, "stop": 1,
                                                                   "num": 3}}), 422))
    assert got["/q_grid"].startswith("must be absent when q is given")


def test_422_grid_rules(client):
    got = entries(problem(client.post("/v1/maps/variance", json={
        "activation": "tanh", "sigma_w2": 1, "q_grid": {"start": 2, "stop": 1, "num": 3}}), 422))
    assert got["/q_grid/stop"] == "must be > start (2), got 1"
    got = entries(problem(client.post("/v1/maps/variance", json={
        "activation": "tanh", "sigma_w2": 1,
        "q_grid": {"start": 0, "stop": 1, "num": 3, "spacing": "log"}}), 422))
    assert got["/q_grid/start"] == "must be > 0 for log spacing, got 0"
    got = entries(problem(client.post("/v1/maps/correlation", json={
        "activation": "tanh", "sigma_w2": 1,
        "c_grid": {"start": -1, "stop": 1, "num": 3, "spacing": "log"}}), 422))
    assert got["/c_grid/spacing"] == 'must be one of linear, got "log"'


def test_422_array_length_limit(make_client):
    c = make_client(MAX_ARRAY_LENGTH=10, MAX_GRID_POINTS=5)
    got = entries(problem(c.post("/v1/maps/variance", json={
        "activation": "tanh", "sigma_w2": 1, "q": [1.0] * 11}), 422))
    assert got["/q"] == ("must have at most 10 items (limit MAX_ARRAY_LENGTH), got a list of 11 "
                         "items")
    got = entries(problem(c.post("/v1/maps/variance", json={
        "activation": "tanh", "sigma_w2": 1, "q_grid": {"start": 0, "stop": 1, "num": 6}}), 422))
    assert got["/q_grid/num"] == "must be in [2, 5], got 6"


def test_422_layers_limit(make_client):
    c = make_client(MAX_LAYERS=4)
    got = entries(problem(c.post("/v1/plan", json={"activation": "relu", "depth": 5}), 422))
    assert got["/depth"] == "must be in [1, 4], got 5"
    got = entries(problem(c.post("/v1/plan", json={"activation": "relu",
                                                   "widths": [8] * 6}), 422))
    assert got["/widths"].startswith("must have at most 5 items (limit MAX_LAYERS)")


def test_422_query_parameters(client):
    body = problem(client.get("/v1/propagation?activation=tanh&sigma_w2=abc&extra=1"), 422)
    got = entries(body)
    assert got["sigma_w2"] == 'must be a number, got "abc"'
    assert got["extra"].startswith("is not a field here")
    body = problem(client.get("/v1/propagation?activation=tanh&sigma_w2=1&sigma_w2=2"), 422)
    assert entries(body) == {"sigma_w2": "is given more than once"}
    body = problem(client.get("/v1/propagation?activation=tanh&sigma_w2=nan"), 422)
    assert entries(body)["sigma_w2"] == 'must be a number, got "nan"'
    body = problem(client.get("/v1/activations?verbose=1"), 422)
    assert "verbose" in entries(body)


def test_422_correlation_needs_q_when_unbounded(client):
    body = problem(client.post("/v1/maps/correlation", json={
        "activation": "relu", "sigma_w2": 3, "c": [0.5]}), 422)
    assert entries(body)["/q"].startswith("is required here: the variance has no finite fixed")


def test_422_computation_failed(client):
    # gelu has no critical point with sigma_b2 = 0 away from q* -> 0 ... but step has none at all
    body = problem(client.post("/v1/plan", json={"activation": "step", "depth": 3,
                                                 "target": "edge"}), 422)
    assert body["type"].endswith("computation-failed")
    assert "edge of chaos" in body["detail"]


# ---------------------------------------------------------------------------------------------
# 422: the work budget
# ---------------------------------------------------------------------------------------------
def test_422_work_budget_refused_before_computing(client, monkeypatch):
    called = []
    monkeypatch.setattr(propcalc, "correlation_map", lambda *a, **k: called.append(1))
    body = problem(client.post("/v1/maps/correlation", json={
        "activation": "tanh", "sigma_w2": 1.5, "sigma_b2": 0.1, "q": 1.0,
        "c_grid": {"start": -1, "stop": 1, "num": 2000}, "with_slope": True}), 422)
    assert not called
    assert body["type"].endswith("work-budget-exceeded")
    assert body["limit"] == {"name": "WORK_BUDGET", "value": 3000.0}
    assert body["estimated_cost"] > 3000
    assert "send at most 125 c values" in body["detail"]
    assert entries(body)["/c_grid/num"].startswith("too much work for one request")


def test_work_budget_is_configurable(make_client):
    body = {"activation": "tanh", "sigma_w2": 1.5, "q": [0.5, 1, 2]}
    assert make_client().post("/v1/maps/variance", json=body).status_code == 200
    small = make_client(WORK_BUDGET=1.0)
    got = problem(small.post("/v1/maps/variance", json=body), 422)
    assert got["limit"]["value"] == 1.0
    assert "send at most 2 q values" in got["detail"]


def test_formula_costs_more(make_client):
    c = make_client(WORK_BUDGET=300.0)
    ok = c.post("/v1/propagation", json={"activation": "tanh", "sigma_w2": 1.5})
    assert ok.status_code == 200
    refused = c.post("/v1/propagation", json={"activation": {"formula": "tanh(x)"},
                                              "sigma_w2": 1.5})
    assert problem(refused, 422)["estimated_cost"] == 400.0


def test_422_wall_clock_guard(make_client):
    c = make_client(WORK_BUDGET=1e9, WALL_CLOCK_LIMIT=0.02, RESULT_CACHE_ENTRIES=0)
    body = problem(c.post("/v1/maps/correlation", json={
        "activation": "gelu_tanh", "sigma_w2": 1.5, "q": 1e4,
        "c_grid": {"start": -1, "stop": 1, "num": 400}, "with_slope": True}), 422)
    assert body["limit"] == {"name": "WALL_CLOCK_LIMIT", "value": 0.02}
    assert "stopped after 0.02 s" in body["detail"]
    # the worker is fine afterwards, and an unarmed alarm never fires
    ok = c.post("/v1/critical-point", json={"activation": "tanh"})
    assert ok.status_code == 200
    import time

    time.sleep(0.05)  # past the 0.02 s of the last (disarmed) timer: nothing happens
    assert c.post("/v1/critical-point", json={"activation": "relu"}).status_code == 200


# ---------------------------------------------------------------------------------------------
# 500: logged, never leaked
# ---------------------------------------------------------------------------------------------
def test_500_logged_without_traceback(make_client, monkeypatch, caplog):
    c = make_client()
    comp = c.application.extensions["propcalc_api"].computations

    def broken(req):
        raise RuntimeError("secret internal detail")

    monkeypatch.setattr(comp, "propagation", broken)
    with caplog.at_level(logging.ERROR, logger="propcalc_api"):
        resp = c.post("/v1/propagation", json={"activation": "tanh", "sigma_w2": 1.0})
    body = problem(resp, 500)
    text = resp.get_data(as_text=True)
    assert "secret" not in text and "Traceback" not in text and "RuntimeError" not in text
    assert len(body["incident"]) == 16
    assert any(body["incident"] in r.getMessage() and r.exc_info for r in caplog.records)


def test_nan_never_leaves(make_client, monkeypatch, caplog):
    c = make_client()
    comp = c.application.extensions["propcalc_api"].computations
    monkeypatch.setattr(comp, "propagation",
                        lambda req: propcalc.jsonable({"chi_1": float("nan")}))
    with caplog.at_level(logging.ERROR, logger="propcalc_api"):
        resp = c.post("/v1/propagation", json={"activation": "tanh", "sigma_w2": 1.0})
    # issue 11: a failure of the engine on the client's input is a 422 (logged with an
    # incident id), never a 500; it was a 500 before
    body = problem(resp, 422)
    assert body["type"].endswith("computation-failed") and len(body["incident"]) == 16
    assert b"NaN" not in resp.data


def test_response_validation_catches_drift(make_client, monkeypatch, caplog):
    c = make_client()
    comp = c.application.extensions["propcalc_api"].computations
    real = comp.critical_point
    monkeypatch.setattr(comp, "critical_point", lambda req: {**real(req), "surprise": 1})
    with caplog.at_level(logging.ERROR, logger="propcalc_api"):
        problem(c.post("/v1/critical-point", json={"activation": "tanh"}), 500)


def test_bad_config_is_refused():
    from propcalc_api import create_app

    with pytest.raises(ValueError, match="config WORK_BUDGET must be > 0, got 0"):
        create_app({"WORK_BUDGET": 0})
    with pytest.raises(ValueError, match="config MAX_ARRAY_LENGTH must be an integer"):
        create_app({"MAX_ARRAY_LENGTH": "many"})


def test_config_from_environment(monkeypatch):
    from propcalc_api import create_app

    monkeypatch.setenv("PROPCALC_WORK_BUDGET", "1234")
    app = create_app()
    assert app.extensions["propcalc_api"].limits.work_budget == 1234.0
    # the mapping wins over the environment
    assert create_app({"WORK_BUDGET": 99}).extensions["propcalc_api"].limits.work_budget == 99.0
