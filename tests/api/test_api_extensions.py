"""Flask test-client tests of the dropout, maxout, self-normalisation, spectrum, softmax and
simulation endpoints.

Each 200 body must equal ``propcalc.jsonable(result.to_dict())`` of the same call made
in-process (the app loads every body back through its response schema as well); a few
published values and closed forms are checked on the way, with their sources beside them.
Every error path answers with problem details: a bad member is a 422 with a JSON pointer, a
request over the work budget or over MAX_SIMULATION_SIZE is a 422 ``work-budget-exceeded``
naming the limit, an input the engine cannot serve is a 422 ``computation-failed``.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import integrate, optimize, special, stats

import propcalc
from propcalc import jsonable

PROBLEM = "application/problem+json"
NEW_PATHS = ("/v1/dropout", "/v1/dropout/sweep", "/v1/maxout", "/v1/self-normalization",
             "/v1/alpha-dropout", "/v1/jacobian-spectrum", "/v1/dynamical-isometry",
             "/v1/softmax", "/v1/softmax/output-scale", "/v1/simulate")


def post(client, path, body, strict_json):
    resp = client.post(path, json=body)
    assert resp.status_code == 200, resp.get_data(as_text=True)
    assert resp.mimetype == "application/json"
    return strict_json(resp.data)


def problem(resp, status, kind=None):
    assert resp.status_code == status, resp.get_data(as_text=True)
    assert resp.mimetype == PROBLEM
    body = resp.get_json(force=True)
    assert body["status"] == status
    assert {"type", "title", "detail", "instance"} <= set(body)
    if kind is not None:
        assert body["type"] == "tag:propcalc,2025:problem:" + kind
    return body


def entries(body):
    return {e["pointer"]: e["detail"] for e in body["errors"]}


def act(name, **params):
    return propcalc.activation(name, **params)


# ---------------------------------------------------------------------------------------------
# the document and the limits
# ---------------------------------------------------------------------------------------------
def test_openapi_has_the_new_operations(client, strict_json):
    doc = strict_json(client.get("/openapi.json").data)
    for path in NEW_PATHS:
        op = doc["paths"][path]["post"]
        assert {"200", "400", "413", "415", "422", "500"} <= set(op["responses"]), path
        ref = op["requestBody"]["content"]["application/json"]["schema"]["$ref"]
        schema = doc["components"]["schemas"][ref.rsplit("/", 1)[1]]
        assert schema["additionalProperties"] is False, path
    schemas = doc["components"]["schemas"]
    # documented constraints: the keep rate range, the maxout rank, the simulation sizes
    keep = schemas["DropoutRequest"]["properties"]["keep_rate"]
    assert (keep["minimum"], keep["maximum"]) == (1e-3, 1)
    assert schemas["MaxoutRequest"]["properties"]["k"]["maximum"] == 1024
    assert schemas["MaxoutRequest"]["dependentRequired"] == {"fan_in": ["fan_out"],
                                                             "fan_out": ["fan_in"]}
    sim = schemas["SimulationRequest"]["properties"]
    assert sim["width"]["maximum"] == 4096 and sim["depth"]["maximum"] == 1000
    assert "MAX_SIMULATION_SIZE" in sim["width"]["description"]
    # the "inf" / null convention reaches the new responses too
    xi_c = schemas["DropoutPropagation"]["properties"]["xi_c"]
    assert {"type": "string", "enum": ["inf", "-inf"]} in xi_c["oneOf"]
    assert doc["info"]["x-limits"]["max_simulation_size"] == 20_000_000


def test_openapi_is_still_valid_openapi_31(client, strict_json):
    validator = pytest.importorskip("openapi_spec_validator")
    validator.validate(strict_json(client.get("/openapi.json").data))


def test_limits_include_the_simulation_size(make_client, strict_json):
    body = strict_json(make_client(MAX_SIMULATION_SIZE=12345).get("/v1/limits").data)
    assert body["max_simulation_size"] == 12345
    assert body["ranges"]["keep_rate_min"] == 1e-3
    assert body["ranges"]["simulation_max_width"] == 4096


def test_bad_simulation_size_setting_is_refused():
    from propcalc_api import create_app

    with pytest.raises(ValueError, match="config MAX_SIMULATION_SIZE must be >= 8, got 4"):
        create_app({"MAX_SIMULATION_SIZE": 4})


# ---------------------------------------------------------------------------------------------
# dropout
# ---------------------------------------------------------------------------------------------
@pytest.mark.parametrize("name, sw, sb, rho, depth", [
    ("tanh", 1.5, 0.05, 0.9, 50),
    ("relu", 2.0, 0.0, 0.5, None),
    ("erf", 1.0, 0.0, 0.8, 3),        # the variance collapses: C(c) = rho c, c* = 0
    ("relu", 4.0, 0.0, 0.5, 10),      # the variance explodes: q* is null
])
def test_dropout_equals_python_api(client, strict_json, name, sw, sb, rho, depth):
    body = {"activation": name, "sigma_w2": sw, "sigma_b2": sb, "keep_rate": rho}
    if depth is not None:
        body["depth"] = depth
    got = post(client, "/v1/dropout", body, strict_json)
    want = propcalc.dropout_propagation(act(name), sw, sb, rho, depth=depth)
    assert got == jsonable(want.to_dict())


def test_dropout_relu_closed_form(client, strict_json):
    # ReLU at sigma_w2 = 2 rho (scale_with_keep_rate), sigma_b2 = 0: C(c) = rho k_1(c) with
    # k_1 the normalised arc-cosine kernel of degree 1 (Cho & Saul 2009, eq. 6); c* solves
    # rho k_1(c) = c; no edge of chaos with dropout (Schoenholz et al. 2017)
    rho = 0.6
    got = post(client, "/v1/dropout", {"activation": "relu", "sigma_w2": 2, "keep_rate": rho,
                                       "scale_with_keep_rate": True}, strict_json)
    sweep = propcalc.dropout_sweep(act("relu"), 2.0, 0.0, [rho], scale_with_keep_rate=True)
    assert got == jsonable(sweep.reports[0].to_dict())

    def k1(c):
        return (math.sqrt(1 - c * c) + (math.pi - math.acos(c)) * c) / math.pi

    c_star = optimize.brentq(lambda c: rho * k1(c) - c, 0.0, 1.0 - 1e-12, xtol=1e-15)
    assert_allclose(got["c_star"], c_star, rtol=1e-9)
    assert got["xi_c"] != "inf" and got["xi_c"] > 0


def test_dropout_sweep_equals_python_api(client, strict_json):
    rates = [0.3, 0.7, 1.0]
    got = post(client, "/v1/dropout/sweep", {"activation": "tanh", "sigma_w2": 1.2,
                                             "sigma_b2": 0.1, "keep_rates": rates,
                                             "depth": 40}, strict_json)
    want = propcalc.dropout_sweep(act("tanh"), 1.2, 0.1, rates, depth=40)
    assert got == jsonable(want.to_dict())
    # more dropout, shorter correlation depth scale (Schoenholz et al. 2017)
    xi = [r["xi_c"] for r in got["reports"]]
    assert xi[0] < xi[1]


def test_dropout_formula_and_engine_parameter_pointer(client, strict_json):
    spec = {"formula": "x * sigmoid(beta * x)", "params": {"beta": 1.5}}
    got = post(client, "/v1/dropout", {"activation": spec, "sigma_w2": 1.8, "keep_rate": 0.9},
               strict_json)
    want = propcalc.dropout_propagation(act(spec["formula"], beta=1.5), 1.8, 0.0, 0.9)
    assert got == jsonable(want.to_dict())
    # a parameter the engine refuses is pointed at, through the one error handler
    body = problem(client.post("/v1/dropout", json={
        "activation": {"name": "leaky_relu", "params": {"alpha": 0.1}}, "sigma_w2": 2,
        "keep_rate": 0.5}), 422, "invalid-fields")
    assert entries(body)["/activation/params/alpha"].startswith("must be a parameter of")


def test_dropout_cache_and_etag(make_client):
    c = make_client()
    first = c.post("/v1/dropout", json={"activation": "tanh", "sigma_w2": 1.3,
                                        "keep_rate": 0.75})
    second = c.post("/v1/dropout", json={"activation": {"name": "tanh", "params": {}},
                                         "sigma_w2": 1.3, "sigma_b2": 0, "keep_rate": 0.75,
                                         "q_input": 1, "scale_with_keep_rate": False,
                                         "depth": None})
    assert first.headers["X-Propcalc-Cache"] == "miss"
    assert second.headers["X-Propcalc-Cache"] == "hit"
    assert first.data == second.data and first.headers["ETag"] == second.headers["ETag"]


# ---------------------------------------------------------------------------------------------
# maxout
# ---------------------------------------------------------------------------------------------
def test_maxout_equals_python_api_and_c3(client, strict_json):
    got = post(client, "/v1/maxout", {"k": 3, "depth": 10, "fan_in": 256, "fan_out": 128},
               strict_json)
    report = propcalc.maxout_propagation(3, depth=10)
    layer = propcalc.maxout_layer(3, 256, 128)
    assert got == jsonable({**report.to_dict(), "layer": layer.to_dict()})
    # Tseran & Montufar 2023: c_3 = 0.7839
    assert round(got["moments"]["recommended_sigma_w2"], 4) == 0.7839
    # the largest of 3 standard normals: E[X] = 3 / (2 sqrt(pi)) (David & Nagaraja 2003),
    # cross-checked with scipy.integrate.quad over the density 3 phi Phi^2
    m1 = integrate.quad(lambda z: 3 * z * stats.norm.pdf(z) * stats.norm.cdf(z) ** 2,
                        -np.inf, np.inf)[0]
    assert_allclose(got["moments"]["mean"], 3 / (2 * math.sqrt(math.pi)), rtol=1e-12)
    assert_allclose(got["moments"]["mean"], m1, rtol=1e-9)
    # k times the parameters of a plain layer (Goodfellow et al. 2013)
    assert got["layer"]["n_parameters"] == 3 * got["layer"]["plain_parameters"] == 3 * 32896
    assert any("3 times the weights and biases" in n for n in got["notes"])


@pytest.mark.parametrize("body", [
    {"k": 2, "sigma_w2": 1.0},                       # neutral: the edge of chaos (closed form)
    {"k": 5, "sigma_w2": 1.0, "depth": 3},           # chi_1 = 1, the variance grows
    {"k": 1, "sigma_w2": 0.5, "sigma_b2": 0.2, "q_input": 3},
])
def test_maxout_reports(client, strict_json, body):
    got = post(client, "/v1/maxout", body, strict_json)
    want = propcalc.maxout_propagation(body["k"], body["sigma_w2"], body.get("sigma_b2", 0.0),
                                       depth=body.get("depth"), q_input=body.get("q_input", 1.0))
    assert got == jsonable({**want.to_dict(), "layer": None})


# ---------------------------------------------------------------------------------------------
# self-normalisation and alpha dropout
# ---------------------------------------------------------------------------------------------
def test_self_normalization_selu_fixed_point(client, strict_json):
    got = post(client, "/v1/self-normalization", {"activation": "selu"}, strict_json)
    assert got == jsonable(propcalc.self_normalization(act("selu")).to_dict())
    # Klambauer et al. 2017: SELU with omega = 0, tau = 1 has the attracting fixed point (0, 1)
    near = got["nearest"]
    assert abs(near["mu"]) < 1e-9 and abs(near["nu"] - 1) < 1e-9
    assert got["self_normalizing"] is True and near["spectral_norm"] < 1


def test_self_normalization_with_omega_and_start(client, strict_json):
    body = {"activation": "selu", "omega": 0.5, "tau": 1.2, "start": {"mu": 0.1, "nu": 2}}
    got = post(client, "/v1/self-normalization", body, strict_json)
    want = propcalc.self_normalization(act("selu"), 0.5, 1.2, (0.1, 2.0))
    assert got == jsonable(want.to_dict())


def test_self_normalization_formula(client, strict_json):
    got = post(client, "/v1/self-normalization", {"activation": {"formula": "x * sigmoid(x)"},
                                                  "tau": 3.0}, strict_json)
    want = propcalc.self_normalization(act("x * sigmoid(x)"), 0.0, 3.0)
    assert got == jsonable(want.to_dict())


def test_alpha_dropout_published_formula(client, strict_json):
    got = post(client, "/v1/alpha-dropout", {"keep_rate": 0.95}, strict_json)
    assert got == jsonable(propcalc.alpha_dropout(0.95).to_dict())
    # Klambauer et al. 2017: alpha' = -lambda alpha, a = (q + alpha'^2 q (1 - q))^(-1/2),
    # b = -a (1 - q) alpha' keep mean 0 and variance 1
    q, ap = 0.95, -1.0507009873554805 * 1.6732632423543772
    a = (q + ap * ap * q * (1 - q)) ** -0.5
    assert_allclose([got["alpha_prime"], got["a"], got["b"]], [ap, a, -a * (1 - q) * ap],
                    rtol=1e-12)
    other = post(client, "/v1/alpha-dropout", {"keep_rate": 0.5, "mean": 1, "variance": 2,
                                               "alpha_prime": 0}, strict_json)
    assert other == jsonable(propcalc.alpha_dropout(0.5, 1.0, 2.0, 0.0).to_dict())


# ---------------------------------------------------------------------------------------------
# Jacobian spectrum and isometry
# ---------------------------------------------------------------------------------------------
def test_jacobian_spectrum_equals_python_api(client, strict_json):
    got = post(client, "/v1/jacobian-spectrum", {"activation": "tanh", "depth": 100,
                                                 "q_star": 0.5}, strict_json)
    want = propcalc.jacobian_spectrum(act("tanh"), 100, 0.5)
    assert got == jsonable(want.to_dict())
    # Gaussian weights add L to the normalised variance (Pennington, Schoenholz & Ganguli 2017)
    assert_allclose(got["normalized_variance_gaussian"] - got["normalized_variance_orthogonal"],
                    100.0, rtol=1e-12)
    off = post(client, "/v1/jacobian-spectrum", {"activation": "tanh", "depth": 10,
                                                 "sigma_w2": 3.0}, strict_json)
    assert off == jsonable(propcalc.jacobian_spectrum(act("tanh"), 10, 1.0, 3.0).to_dict())
    assert off["sigma_b2"] is None


def test_relu_has_no_isometry(client, strict_json):
    got = post(client, "/v1/dynamical-isometry", {"activation": "relu", "depth": 50}, strict_json)
    assert got == jsonable(propcalc.dynamical_isometry(act("relu"), 50).to_dict())
    # Pennington, Schoenholz & Ganguli 2017: ReLU's mu_2 / mu_1^2 = 2 at every q*, so no q*
    # gives dynamical isometry
    assert got["achievable"] is False and got["spectrum"] is None and got["q_star"] is None
    assert_allclose([got["ratio_at_small_q"], got["ratio_at_large_q"]], 2.0, rtol=1e-12)


def test_tanh_isometry_advice(client, strict_json):
    body = {"activation": "tanh", "depth": 100, "max_variance": 0.5, "q_star_min": 1e-4,
            "q_star_max": 10}
    got = post(client, "/v1/dynamical-isometry", body, strict_json)
    want = propcalc.dynamical_isometry(act("tanh"), 100, 0.5, (1e-4, 10.0))
    assert got == jsonable(want.to_dict())
    # tanh approaches isometry at small q* with orthogonal weights (Pennington et al. 2017)
    assert got["achievable"] is True and got["weights"] == "orthogonal"
    assert got["spectrum"]["normalized_variance_orthogonal"] <= 0.5 + 1e-9


# ---------------------------------------------------------------------------------------------
# the softmax output layer
# ---------------------------------------------------------------------------------------------
def test_softmax_equals_python_api(client, strict_json):
    got = post(client, "/v1/softmax", {"n_classes": 10, "logit_variance": 1.0, "seed": 5},
               strict_json)
    assert got == jsonable({"initial_loss": propcalc.initial_loss(10, 1.0).to_dict(),
                            "max_probability": propcalc.max_class_probability(
                                10, 1.0, 100_000, 5).to_dict()})
    # 1000 classes: the default draws are lowered to 5e7 / K = 50000
    got = post(client, "/v1/softmax", {"n_classes": 1000, "logit_variance": 0.5}, strict_json)
    assert got["max_probability"]["n_samples"] == 50_000
    assert got["max_probability"] == jsonable(propcalc.max_class_probability(
        1000, 0.5, 50_000, 0).to_dict())


def test_softmax_two_classes_closed_form(client, strict_json):
    # K = 2: loss = softplus(l_2 - l_1) and max p = expit(|l_1 - l_2|), l_2 - l_1 ~ N(0, 2 s2)
    # (closed forms), integrated with scipy.integrate.quad; s2 = 0 gives ln 2 exactly
    got = post(client, "/v1/softmax", {"n_classes": 2, "logit_variance": 2.5}, strict_json)
    sd = math.sqrt(5.0)
    loss = integrate.quad(lambda x: np.logaddexp(0.0, x) * stats.norm.pdf(x, scale=sd),
                          -np.inf, np.inf, epsabs=1e-13)[0]
    pmax = 2 * integrate.quad(lambda x: special.expit(x) * stats.norm.pdf(x, scale=sd),
                              0.0, np.inf, epsabs=1e-13)[0]
    assert_allclose(got["initial_loss"]["expected_loss"], loss, rtol=1e-9)
    assert_allclose(got["max_probability"]["value"], pmax, rtol=1e-9)
    zero = post(client, "/v1/softmax", {"n_classes": 2, "logit_variance": 0}, strict_json)
    assert zero["initial_loss"]["expected_loss"] == math.log(2)


def test_output_scale_equals_python_api(client, strict_json):
    body = {"n_classes": 1000, "margin": 0.05, "fan_in": 512, "current_sigma_w2": 1.0,
            "penultimate_second_moment": 0.4, "n_samples": 20_000}
    got = post(client, "/v1/softmax/output-scale", body, strict_json)
    want = propcalc.output_layer_scale(1000, 0.4, 0.05, 0.0, 512, 1.0, None, 20_000, 0)
    assert got == jsonable(want.to_dict())
    # by construction the loss at the recommended scale is ln K + margin
    assert_allclose(got["loss_at_scale"]["expected_loss"], math.log(1000) + 0.05, rtol=1e-10)
    default = post(client, "/v1/softmax/output-scale", {"n_classes": 10}, strict_json)
    assert default == jsonable(propcalc.output_layer_scale(10, 1.0).to_dict())


# ---------------------------------------------------------------------------------------------
# simulation
# ---------------------------------------------------------------------------------------------
def test_simulate_equals_python_api(client, strict_json):
    body = {"activation": "tanh", "sigma_w2": 1.5, "sigma_b2": 0.05, "width": 64, "depth": 6,
            "repetitions": 4, "n_pairs": 2, "seed": 3, "q0": 2.0, "c0": 0.3}
    got = post(client, "/v1/simulate", body, strict_json)
    want = propcalc.simulate(act("tanh"), 1.5, 0.05, width=64, depth=6, repetitions=4,
                             n_pairs=2, seed=3, q0=2.0, c0=0.3)
    assert got == jsonable(want.to_dict())
    assert len(got["layers"]) == 7


def test_simulate_relu_he_is_flat_and_deterministic(make_client, strict_json):
    # ReLU at sigma_w2 = 2, sigma_b2 = 0: q_l = q_0 and chi_1 = 1 at every layer (He et al.
    # 2015); the same seeded request gives the same bytes from two apps
    body = {"activation": "relu", "sigma_w2": 2, "width": 128, "depth": 5, "repetitions": 4}
    a = make_client(RESULT_CACHE_ENTRIES=0).post("/v1/simulate", json=body)
    b = make_client(RESULT_CACHE_ENTRIES=0).post("/v1/simulate", json=body)
    assert a.status_code == b.status_code == 200
    assert a.data == b.data and a.headers["ETag"] == b.headers["ETag"]
    layers = strict_json(a.data)["layers"]
    assert_allclose([m["q_predicted"] for m in layers], 1.0, rtol=1e-12)
    assert_allclose([m["gradient_predicted"] for m in layers], 1.0, rtol=1e-12)


# ---------------------------------------------------------------------------------------------
# 422: bad members, with pointers
# ---------------------------------------------------------------------------------------------
BAD_FIELDS = [
    ("/v1/dropout", {"activation": "tanh", "sigma_w2": 1}, "/keep_rate", "is required"),
    ("/v1/dropout", {"activation": "tanh", "sigma_w2": 1, "keep_rate": 0},
     "/keep_rate", "must be in [0.001, 1], got 0"),
    ("/v1/dropout", {"activation": "tanh", "sigma_w2": 1, "keep_rate": 0.5, "q_input": 0},
     "/q_input", "must be in [1e-12, 10000], got 0"),
    ("/v1/dropout", {"activation": "tanh", "sigma_w2": 1, "keep_rate": 0.5, "rate": 1},
     "/rate", ("is not a field here (allowed: activation, depth, keep_rate, q_input, "
               "scale_with_keep_rate, sigma_b2, sigma_w2)")),
    ("/v1/dropout/sweep", {"activation": "tanh", "sigma_w2": 1, "keep_rates": []},
     "/keep_rates", "must have at least 1 item, got []"),
    ("/v1/dropout/sweep", {"activation": "tanh", "sigma_w2": 1, "keep_rates": [0.5, 2]},
     "/keep_rates/1", "must be in [0.001, 1], got 2"),
    ("/v1/maxout", {"k": 0}, "/k", "must be in [1, 1024], got 0"),
    ("/v1/maxout", {"k": 2.5}, "/k", "must be an integer, got 2.5"),
    ("/v1/maxout", {"k": 3, "fan_in": 10}, "/fan_out", "is required when fan_in is given"),
    ("/v1/maxout", {"k": 3, "activation": "relu"}, "/activation", "is not a field here"),
    ("/v1/self-normalization", {"activation": "selu", "tau": 0}, "/tau",
     "must be in [1e-06, 10000], got 0"),
    ("/v1/self-normalization", {"activation": "selu", "start": {"mu": 0}}, "/start/nu",
     "is required"),
    ("/v1/self-normalization", {"activation": "selu", "omega": 101}, "/omega",
     "must be in [-100, 100], got 101"),
    ("/v1/alpha-dropout", {"keep_rate": 0.9, "variance": 0}, "/variance",
     "must be in [1e-06, 10000], got 0"),
    ("/v1/alpha-dropout", {"keep_rate": "0.9"}, "/keep_rate", 'must be a number, got "0.9"'),
    ("/v1/jacobian-spectrum", {"activation": "tanh"}, "/depth", "is required"),
    ("/v1/jacobian-spectrum", {"activation": "tanh", "depth": 3, "q_star": 0}, "/q_star",
     "must be in [1e-30, 1000000], got 0"),
    ("/v1/dynamical-isometry", {"activation": "tanh", "depth": 3, "q_star_min": 2,
                                "q_star_max": 1}, "/q_star_max", "must be > q_star_min (2), got 1"),
    ("/v1/softmax", {"n_classes": 1, "logit_variance": 1}, "/n_classes",
     "must be in [2, 10000000], got 1"),
    ("/v1/softmax", {"n_classes": 10, "logit_variance": 1e5}, "/logit_variance",
     "must be in [0, 10000], got 100000.0"),
    ("/v1/softmax", {"n_classes": 1000, "logit_variance": 1, "n_samples": 100000},
     "/n_samples", "must be <= 50000 for 1000 classes (n_samples * n_classes <= 5e7), got 100000"),
    ("/v1/softmax/output-scale", {"n_classes": 10, "margin": 0}, "/margin",
     "must be in [1e-06, 10], got 0"),
    ("/v1/simulate", {"activation": "tanh", "sigma_w2": 1, "width": 1, "depth": 3},
     "/width", "must be in [2, 4096], got 1"),
    ("/v1/simulate", {"activation": "tanh", "sigma_w2": 1, "width": 8, "depth": 3,
                      "repetitions": 1}, "/repetitions", "must be in [2, 1000], got 1"),
    ("/v1/simulate", {"activation": "tanh", "sigma_w2": 1, "width": 8, "depth": 3, "c0": 2},
     "/c0", "must be in [-1, 1], got 2"),
    ("/v1/simulate", {"activation": "tanhh", "sigma_w2": 1, "width": 8, "depth": 3},
     "/activation", "must be one of linear, step"),
]


@pytest.mark.parametrize("path, body, pointer, message", BAD_FIELDS,
                         ids=[f"{p} {ptr}" for p, _, ptr, _ in BAD_FIELDS])
def test_422_bad_member_with_pointer(client, path, body, pointer, message):
    got = entries(problem(client.post(path, json=body), 422, "invalid-fields"))
    assert got[pointer].startswith(message), got


# ---------------------------------------------------------------------------------------------
# 422: the work budget and the simulation size
# ---------------------------------------------------------------------------------------------
def test_dropout_sweep_over_budget(client, monkeypatch):
    import propcalc_api._service as service

    called = []
    monkeypatch.setattr(service, "dropout_sweep", lambda *a, **k: called.append(1))
    body = problem(client.post("/v1/dropout/sweep", json={
        "activation": "tanh", "sigma_w2": 1, "keep_rates": [0.5] * 11}), 422,
        "work-budget-exceeded")
    assert not called  # refused before any work
    assert body["limit"] == {"name": "WORK_BUDGET", "value": 3000.0}
    assert body["estimated_cost"] == 3300.0
    assert "send at most 10 keep rates" in body["detail"]
    assert entries(body)["/keep_rates"].startswith("too much work for one request")


def test_self_normalization_root_finder_budget(make_client):
    c = make_client(WORK_BUDGET=1000)
    assert c.post("/v1/self-normalization", json={"activation": "tanh"}).status_code == 200
    body = problem(c.post("/v1/self-normalization", json={"activation": "tanh", "omega": 1}),
                   422, "work-budget-exceeded")
    assert body["estimated_cost"] == 1500.0 and "omega = 0 costs far less" in body["detail"]
    assert "/omega" in entries(body)


@pytest.mark.parametrize("path, body, pointer", [
    ("/v1/maxout", {"k": 3}, None),
    ("/v1/alpha-dropout", {"keep_rate": 0.9}, None),
    ("/v1/jacobian-spectrum", {"activation": "tanh", "depth": 3}, None),
    ("/v1/dynamical-isometry", {"activation": "tanh", "depth": 3}, None),
    ("/v1/dropout", {"activation": "tanh", "sigma_w2": 1, "keep_rate": 0.5}, None),
    ("/v1/softmax", {"n_classes": 100, "logit_variance": 1}, "/n_samples"),
    ("/v1/softmax/output-scale", {"n_classes": 100}, "/n_samples"),
    ("/v1/simulate", {"activation": "tanh", "sigma_w2": 1, "width": 8, "depth": 3}, "/width"),
])
def test_every_new_endpoint_respects_the_budget(make_client, path, body, pointer):
    got = problem(make_client(WORK_BUDGET=0.5).post(path, json=body), 422,
                  "work-budget-exceeded")
    assert got["limit"] == {"name": "WORK_BUDGET", "value": 0.5}
    assert got["estimated_cost"] > 0.5 and "(WORK_BUDGET)" in got["detail"]
    if pointer is not None:
        assert pointer in entries(got)


def test_formula_costs_double(make_client):
    c = make_client(WORK_BUDGET=250)
    body = {"sigma_w2": 1.5, "keep_rate": 0.9}
    refused = problem(c.post("/v1/dropout", json={**body, "activation": "tanh"}), 422)
    assert refused["estimated_cost"] == 300.0
    refused = problem(c.post("/v1/dropout", json={**body, "activation": {"formula": "tanh(x)"}}),
                      422)
    assert refused["estimated_cost"] == 600.0


def test_simulation_size_limit_refused_before_computing(client, monkeypatch):
    import propcalc_api._service as service

    called = []
    monkeypatch.setattr(service, "simulate", lambda *a, **k: called.append(1))
    body = problem(client.post("/v1/simulate", json={
        "activation": "tanh", "sigma_w2": 1.5, "width": 4000, "depth": 5}), 422,
        "work-budget-exceeded")
    assert not called
    assert body["limit"] == {"name": "MAX_SIMULATION_SIZE", "value": 20_000_000}
    # 4000^2 x 5 x 8 = 6.4e8 > 2e7; sqrt(2e7 / 40) = 707
    assert "width^2 x depth x repetitions = 6.4e+08" in body["detail"]
    assert "the width can be at most 707" in body["detail"]
    assert entries(body)["/width"].startswith("too large a simulation")


def test_simulation_size_limit_is_configurable(make_client, strict_json):
    c = make_client(MAX_SIMULATION_SIZE=1000)
    base = {"activation": "tanh", "sigma_w2": 1.5, "depth": 2, "repetitions": 2}
    assert c.post("/v1/simulate", json={**base, "width": 15}).status_code == 200  # 900
    body = problem(c.post("/v1/simulate", json={**base, "width": 16}), 422)  # 1024
    assert body["limit"] == {"name": "MAX_SIMULATION_SIZE", "value": 1000}
    assert "at most 15" in body["detail"]
    body = problem(make_client(MAX_SIMULATION_SIZE=8).post("/v1/simulate", json={
        **base, "width": 2, "depth": 3}), 422)
    assert "even width 2 allows only depth x repetitions <= 2" in body["detail"]


def test_simulation_work_budget_names_a_width(make_client):
    c = make_client(WORK_BUDGET=100)
    body = problem(c.post("/v1/simulate", json={"activation": "tanh", "sigma_w2": 1.5,
                                                "width": 500, "depth": 4}), 422)
    assert body["limit"]["name"] == "WORK_BUDGET"
    assert "the width can be about" in body["detail"]


# ---------------------------------------------------------------------------------------------
# 422: the engine cannot serve the request
# ---------------------------------------------------------------------------------------------
@pytest.mark.parametrize("path, body, fragment", [
    ("/v1/jacobian-spectrum", {"activation": "step", "depth": 3}, "no Jacobian spectrum"),
    ("/v1/dynamical-isometry", {"activation": "step", "depth": 3}, "jumps"),
    ("/v1/softmax/output-scale", {"n_classes": 10, "margin": 0.01, "sigma_b2": 5},
     "lower the last layer's bias variance"),
    ("/v1/simulate", {"activation": "relu", "sigma_w2": 100, "width": 8, "depth": 20},
     "the network explodes"),
    ("/v1/simulate", {"activation": "step", "sigma_w2": 1, "width": 8, "depth": 2},
     "step jumps"),
])
def test_422_computation_failed(client, path, body, fragment):
    got = problem(client.post(path, json=body), 422, "computation-failed")
    assert fragment in got["detail"]


def test_dropout_step_with_a_dominant_bias_is_not_a_server_error(client):
    resp = client.post("/v1/dropout", json={"activation": "step", "sigma_w2": 1e-5,
                                            "sigma_b2": 1e4, "keep_rate": 1})
    assert resp.status_code in (200, 422)
