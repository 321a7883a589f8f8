"""The service reads names as the engine and the CLI do, and refuses what it would ignore.

Sources: issue 12 section 2 ("the service rejects 'gleu' with no suggestion"; "accept case and
-/_ variants of built-in names; suggest the nearest name (difflib) everywhere"; "every option
either takes effect or is refused, in the CLI, the Python API and the service alike"). The
expected numbers are the Python API's on the same input (propcalc.propagation, recommend).
"""

from __future__ import annotations

import pytest

import propcalc


@pytest.mark.parametrize("spelled, name", [("Gelu", "gelu"), ("GELU", "gelu"),
                                           ("leaky-relu", "leaky_relu"), ("Hard Tanh", "hard_tanh")])
def test_spellings_of_builtin_names_are_accepted(client, spelled: str, name: str) -> None:
    r = client.post("/v1/propagation", json={"activation": spelled, "sigma_w2": 1.5})
    assert r.status_code == 200, r.get_json()
    body = r.get_json()
    expected = propcalc.propagation(name, 1.5, 0.0)
    assert body["activation"] == expected.activation
    assert body["chi_1"] == expected.chi_1
    r = client.post("/v1/propagation", json={"activation": {"name": spelled}, "sigma_w2": 1.5})
    assert r.status_code == 200 and r.get_json()["chi_1"] == expected.chi_1
    r = client.get(f"/v1/propagation?activation={spelled}&sigma_w2=1.5")
    assert r.status_code == 200 and r.get_json()["chi_1"] == expected.chi_1


def test_an_unknown_name_gets_the_nearest_as_a_hint(client) -> None:
    r = client.post("/v1/propagation", json={"activation": "gleu", "sigma_w2": 1.5})
    assert r.status_code == 422
    [entry] = r.get_json()["errors"]
    assert entry["pointer"] == "/activation"
    assert "(did you mean gelu?)" in entry["detail"] and entry["detail"].endswith('got "gleu"')


def test_an_unknown_member_gets_the_nearest_as_a_hint(client) -> None:
    r = client.post("/v1/propagation", json={"activation": "tanh", "sigma_w2": 1.5,
                                             "sigma_b": 0.1})
    [entry] = r.get_json()["errors"]
    assert entry["pointer"] == "/sigma_b"
    assert entry["detail"].endswith("; did you mean sigma_b2?")
    r = client.post("/v1/plan", json={"activation": "tanh", "depth": 3, "target": "varience"})
    [entry] = r.get_json()["errors"]
    assert entry["pointer"] == "/target" and "(did you mean variance?)" in entry["detail"]


@pytest.mark.parametrize("body, pointer, detail", [
    # answered 200 with sigma_b2 = 0 before: the bias variance was ignored
    ({"target": "variance", "sigma_b2": 0.1}, "/sigma_b2", "must be absent for target "
                                                           "'variance'"),
    ({"target": "variance", "q_star": 2.0}, "/q_star", "must be absent for target 'variance'"),
    ({"sigma_b2": 0.1, "q_star": 2.0}, "/q_star", "must be absent for target 'bias'"),
])
def test_plan_members_that_would_be_ignored_are_refused(client, body: dict, pointer: str,
                                                         detail: str) -> None:
    r = client.post("/v1/plan", json={"activation": "tanh", "depth": 5, **body})
    assert r.status_code == 422
    [entry] = r.get_json()["errors"]
    assert entry["pointer"] == pointer and entry["detail"].startswith(detail)


def test_zero_inputs_without_a_bias_are_refused(client) -> None:
    # answered 200 with "collapses to 0" at a repelling q = 0 before
    r = client.post("/v1/propagation", json={"activation": "tanh", "sigma_w2": 1.5,
                                             "q_input": 0})
    assert r.status_code == 422
    [entry] = r.get_json()["errors"]
    assert entry["pointer"] == "/q_input" and entry["detail"].startswith("must be > 0 when "
                                                                        "sigma_b2 = 0")
    r = client.post("/v1/propagation", json={"activation": "tanh", "sigma_w2": 1.5,
                                             "sigma_b2": 0.1, "q_input": 0})
    assert r.status_code == 200
    assert r.get_json()["q_star"] == propcalc.propagation("tanh", 1.5, 0.1, q_input=0.0).q_star


def test_engine_hints_reach_the_problem_entries(client) -> None:
    # the engine's "did you mean slope?" was dropped from the service's entry
    r = client.post("/v1/propagation", json={"activation": {"name": "leaky_relu",
                                                            "params": {"slop": 0.1}},
                                             "sigma_w2": 1.5})
    [entry] = r.get_json()["errors"]
    assert entry["pointer"] == "/activation/params/slop"
    assert entry["detail"].endswith("got 0.1; did you mean slope?")


def test_a_formula_sent_as_a_name_is_told_where_formulas_go(client) -> None:
    r = client.post("/v1/propagation", json={"activation": "x * tanh(x)", "sigma_w2": 1.5})
    [entry] = r.get_json()["errors"]
    assert entry["pointer"] == "/activation"
    assert '(a formula goes in {"formula": ...})' in entry["detail"]
    r = client.post("/v1/propagation", json={"activation": {"formula": "x * tanh(x)"},
                                             "sigma_w2": 1.5})
    assert r.status_code == 200
