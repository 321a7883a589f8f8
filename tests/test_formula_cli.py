"""The command line with typed formulas: show, report, edge, plan, and refusals.

The CLI hands its ACT argument and ``--param name=value`` to
``propcalc.activation``. References: the built-in activations (a formula
spelling a built-in must print the same numbers), and the closed form of the
ReLU edge of chaos, sigma_w2 = 2, sigma_b2 = 0 (He et al. 2015, eq. 10).
"""

from __future__ import annotations

import json
import math

import pytest

from cli_helpers import run


def _numbers_equal(a, b, path: str = "") -> None:
    """JSON trees equal up to 1e-12 in floats, ignoring the activation label."""
    if isinstance(a, dict):
        assert set(a) == set(b), path
        for k in a:
            if k != "activation":
                _numbers_equal(a[k], b[k], f"{path}.{k}")
    elif isinstance(a, list):
        assert len(a) == len(b), path
        for i, (u, v) in enumerate(zip(a, b)):
            _numbers_equal(u, v, f"{path}[{i}]")
    elif isinstance(a, float) or isinstance(b, float):
        assert math.isclose(a, b, rel_tol=1e-12, abs_tol=1e-13), (path, a, b)
    else:
        assert a == b, (path, a, b)


def test_show_formula_with_parameter() -> None:
    code, out, err = run("show", "x * sigmoid(beta * x)", "--param", "beta=1.5")
    assert code == 0 and err == ""
    assert "formula                   x * sigmoid(beta * x)" in out
    assert "derivative                sigmoid(beta * x) + x * (sigmoid(beta * x)" in out
    assert "breakpoints               none" in out
    # min of x sigmoid(b x) is min(t sigmoid(t)) / b = -0.2784645427610738 / 1.5 (mpmath
    # findroot, see tests/test_formula.py::test_properties_of_silu_formula)
    assert "output range              [-0.185643, inf]" in out


def test_show_json_lists_breakpoints_and_derivative() -> None:
    code, out, err = run("show", "hard_tanh(x / 100) + relu(x - 0.5)", "--json")
    assert code == 0 and err == ""
    data = json.loads(out)
    assert data["formula"] == "hard_tanh(x / 100) + relu(x - 0.5)"
    assert data["derivative_formula"] == ("where(abs(x / 100) < 1, 0.01, 0) + "
                                          "where(x - 0.5 > 0, 1, 0)")
    assert data["breakpoints"] == pytest.approx([-100.0, 0.5, 100.0], rel=1e-15)
    assert data["properties"]["smoothness"] == "C0"


def test_report_formula_equals_builtin() -> None:
    code_f, out_f, _ = run("report", "max(x, 0)", "-w", "1.8", "-b", "0.05", "--json")
    code_b, out_b, _ = run("report", "relu", "-w", "1.8", "-b", "0.05", "--json")
    assert code_f == code_b == 0
    _numbers_equal(json.loads(out_f), json.loads(out_b))


def test_report_human_table() -> None:
    code, out, err = run("report", "x * tanh(softplus(x))", "-w", "1.5", "-b", "0.1", "--depth", "20")
    assert code == 0 and err == ""
    assert out.startswith("activation                x * tanh(softplus(x))")
    assert "chi_1" in out and "phase" in out


def test_edge_formula_with_parameter_equals_builtin() -> None:
    code_f, out_f, _ = run("edge", "x * sigmoid(beta * x)", "--param", "beta=1.5",
                           "--q-star", "0.3,1,3", "--json")
    code_b, out_b, _ = run("edge", "swish", "--param", "beta=1.5", "--q-star", "0.3,1,3", "--json")
    assert code_f == code_b == 0
    _numbers_equal(json.loads(out_f), json.loads(out_b))


def test_edge_relu_formula_closed_form() -> None:
    code, out, _ = run("edge", "max(x, 0)", "--q-star", "1", "--json")
    assert code == 0
    (point,) = json.loads(out)
    # He et al. 2015, eq. 10: the ReLU edge of chaos is sigma_w2 = 2, sigma_b2 = 0
    assert point["sigma_w2"] == pytest.approx(2.0, rel=1e-13)
    assert point["sigma_b2"] == pytest.approx(0.0, abs=1e-13)


def test_plan_formula_equals_builtin() -> None:
    code_f, out_f, _ = run("plan", "where(x > 0, x, exp(x) - 1)", "--widths", "784,256,256,10",
                           "--json")
    code_b, out_b, _ = run("plan", "elu", "--widths", "784,256,256,10", "--json")
    assert code_f == code_b == 0
    _numbers_equal(json.loads(out_f), json.loads(out_b))


def test_plan_human_output() -> None:
    code, out, err = run("plan", "x * tanh(softplus(x))", "--depth", "12")
    assert code == 0 and err == ""
    assert "verdict:" in out


@pytest.mark.parametrize("argv, pattern", [
    (["show", "x + exq(x)"], "propcalc: error: unknown function 'exq' at column 5"),
    (["report", "x.__class__", "-w", "1"], "propcalc: error: attribute access is not allowed at column 2"),
    (["edge", "__import__('os').system('true')"], "propcalc: error: strings are not allowed"),
    (["plan", "x * beta", "--depth", "3"], "propcalc: error: unknown name 'beta' at column 5"),
    (["show", "x * beta", "--param", "beta=1", "--param", "gamma=2"],
     "propcalc: error: parameter 'gamma' is given but the formula does not use it"),
    (["show", "log(1 + exp(x))"], "write softplus(x) instead of log(1 + exp(x))"),
    (["show", "9**9**9**9"], "propcalc: error: power towers"),
    (["show", "(" * 40 + "x" + ")" * 40], "propcalc: error: brackets nest more than 30 deep"),
    (["show", "tanhh"], "propcalc: error: unknown activation 'tanhh'"),
    (["show", "x * beta", "--param", "beta=oops"], "propcalc: error: --param beta must be a number"),
])
def test_refused_formula_exits_2_with_one_line(argv: list[str], pattern: str) -> None:
    code, out, err = run(*argv)
    assert code == 2
    assert out == ""
    assert err.count("\n") == 1 and err.endswith("\n")
    assert pattern in err
