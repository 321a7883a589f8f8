"""Tests of the ``propcalc`` command (propcalc.cli).

The command is driven in-process through ``propcalc.cli.main(argv, out=..., err=...)`` and once
through the installed console script. Its numbers are checked against the public Python API
it wraps (the same ``to_dict()`` fields, the same values), whose own correctness is tested
against mpmath and the papers in test_recommend.py, test_activations.py and the engine tests.
JSON is parsed strictly: the tokens NaN / Infinity / -Infinity are not JSON (RFC 8259, section
6), so ``json.loads(parse_constant=...)`` raises on them.
"""

from __future__ import annotations

import io
import math
import shutil
import subprocess
import sys

import pytest

import propcalc
from propcalc import (
    ComputationError,
    activation,
    builtin_names,
    cli,
    edge_of_chaos_at_bias,
    edge_of_chaos_line,
    gains,
    jsonable,
    propagation,
    recommend,
)
from propcalc.cli.commands import propagation as propagation_commands
from cli_helpers import run, strict_json


def pairs(text: str) -> dict[str, str]:
    """The 'key  value' lines of a human report (two or more spaces separate them)."""
    import re

    out = {}
    for line in text.splitlines():
        m = re.match(r"^(\S.*?)\s{2,}(\S.*)$", line)
        if m and not line.startswith("note:"):
            out.setdefault(m.group(1), m.group(2))
    return out


def fmt(x) -> str:
    return cli.format_number(x)


# ---------------------------------------------------------------------------------------------
# activations
# ---------------------------------------------------------------------------------------------
def test_activations_human():
    code, out, err = run("activations")
    assert (code, err) == (0, "")
    lines = out.splitlines()
    assert lines[0].split()[:3] == ["activation", "range", "monotonic"]
    for name in builtin_names():
        assert any(line.startswith(activation(name).label) for line in lines), name
    relu = next(line for line in lines if line.startswith("relu "))
    # ReLU: forward = backward = common gain = sqrt 2 (He et al. 2015); P(dead) = 1/2
    assert relu.split()[-3:] == [fmt(math.sqrt(2))] * 3 and "0.5" in relu.split()
    assert "common practice, no source" in out


def test_activations_json():
    code, out, _ = run("activations", "--json")
    assert code == 0
    data = strict_json(out)
    assert [d["name"] for d in data] == list(builtin_names())
    for d in data:
        act = activation(d["name"])
        assert d == jsonable({**act.to_dict(), "gains": gains(act).to_dict()})
    relu = data[list(builtin_names()).index("relu")]
    assert relu["properties"]["output_range"] == [0.0, "inf"]  # documented spelling of infinity


# ---------------------------------------------------------------------------------------------
# show
# ---------------------------------------------------------------------------------------------
def test_show_human():
    code, out, err = run("show", "hard_tanh")
    assert (code, err) == (0, "")
    kv = pairs(out)
    act = activation("hard_tanh")
    g = gains(act)
    assert kv["activation"] == "hard_tanh"
    assert kv["breakpoints"] == "-1, 1"
    assert kv["parity"] == "odd" and kv["smoothness"] == "C0"
    # P(|z| > 1) = 2 Phi(-1) (closed form)
    assert kv["P(dead unit) at q = 1"] == fmt(math.erfc(1 / math.sqrt(2)))
    assert kv["forward gain"] == fmt(g.forward) and kv["backward gain"] == fmt(g.backward)


def test_show_with_a_parameter():
    code, out, _ = run("show", "leaky_relu", "--param", "slope=0.2")
    assert code == 0
    kv = pairs(out)
    assert kv["activation"] == "leaky_relu(slope=0.2)"
    # He et al. 2015: sqrt(2 / (1 + a^2))
    assert kv["common gain"] == fmt(math.sqrt(2 / 1.04))
    assert "He et al. 2015" in out


def test_show_json():
    code, out, _ = run("show", "tanh", "--json")
    assert code == 0
    act = activation("tanh")
    assert strict_json(out) == jsonable({**act.to_dict(), "gains": gains(act).to_dict()})


# ---------------------------------------------------------------------------------------------
# report
# ---------------------------------------------------------------------------------------------
def test_report_human():
    code, out, err = run("report", "tanh", "-w", "2.5", "-b", "0.1", "--depth", "50")
    assert (code, err) == (0, "")
    p = propagation(activation("tanh"), 2.5, 0.1, depth=50)
    kv = pairs(out)
    assert kv["phase"] == p.phase == "chaotic"
    assert kv["q*"] == fmt(p.q_star)
    assert kv["chi_1"] == fmt(p.chi_1)
    assert kv["c*"] == fmt(p.c_star)
    assert kv["xi_c"] == fmt(p.xi_c)
    assert kv["trainable depth (6 xi_c)"] == fmt(p.trainable_depth)
    assert kv["gradient growth chi_1^L"] == fmt(p.gradient_growth)
    assert "Schoenholz et al. 2017" in out  # the empirical rule is named with its source


def test_report_json_has_the_fields_of_to_dict():
    code, out, _ = run("report", "tanh", "-w", "2.5", "-b", "0.1", "--depth", "50", "--json")
    assert code == 0
    data = strict_json(out)
    ref = propagation(activation("tanh"), 2.5, 0.1, depth=50).to_dict()
    assert set(data) == set(ref)
    assert data == jsonable(ref)


def test_report_json_writes_infinity_and_missing_values_as_documented():
    # At the edge of chaos xi_c is infinite -> "inf"; an exploding variance has no q* -> null
    # (propcalc.jsonable's documented convention). tanh at (1, 0) is critical (Poole et al. 2016)
    data = strict_json(run("report", "tanh", "-w", "1", "--json")[1])
    assert data["phase"] == "edge of chaos" and data["xi_c"] == "inf"
    # ReLU at sigma_w2 = 3 > 2: the variance grows by sigma_w2 / 2 = 1.5 per layer (closed form)
    data = strict_json(run("report", "relu", "-w", "3", "--json")[1])
    assert data["q_star"] is None and data["phase"] == "unbounded variance"
    assert data["variance_fixed_points"]["growth_rate"] == pytest.approx(1.5, rel=1e-9)
    # step: phi jumps, chi_1 is infinite
    data = strict_json(run("report", "step", "-w", "1", "--json")[1])
    assert data["chi_1"] == "inf"


def test_report_with_q_input_and_formula():
    code, out, _ = run("report", "x * sigmoid(x)", "-w", "1.5", "--q-input", "2", "--json")
    assert code == 0
    ref = propagation(activation("x * sigmoid(x)"), 1.5, 0.0, q_input=2.0).to_dict()
    assert strict_json(out) == jsonable(ref)


# ---------------------------------------------------------------------------------------------
# edge
# ---------------------------------------------------------------------------------------------
def test_edge_human_over_q_star():
    code, out, err = run("edge", "tanh", "--q-star", "0.5,1,2")
    assert (code, err) == (0, "")
    lines = out.splitlines()
    assert lines[0].split()[:4] == ["q*", "sigma_w2", "sigma_b2", "chi_q"]
    rows = [line.split() for line in lines[2:]]
    points = edge_of_chaos_line(activation("tanh"), [0.5, 1.0, 2.0])
    assert [r[0] for r in rows] == ["0.5", "1", "2"]
    for r, p in zip(rows, points):
        assert r[1] == fmt(p.sigma_w2) and r[2] == fmt(p.sigma_b2)


def test_edge_default_grid_json():
    code, out, _ = run("edge", "tanh", "--json")
    assert code == 0
    data = strict_json(out)
    qs = [0.01, 0.03, 0.1, 0.3, 1.0, 3.0, 10.0, 30.0, 100.0]
    assert data == jsonable([p.to_dict() for p in edge_of_chaos_line(activation("tanh"), qs)])


def test_edge_at_a_fixed_bias():
    code, out, _ = run("edge", "tanh", "--sigma-b2", "0.05", "--json")
    assert code == 0
    ref = [p.to_dict() for p in edge_of_chaos_at_bias(activation("tanh"), 0.05)]
    assert strict_json(out) == jsonable(ref) and len(ref) >= 1
    code, out, _ = run("edge", "tanh", "--sigma-b2", "0.05")
    assert code == 0 and fmt(ref[-1]["sigma_w2"]) in out


def test_edge_with_no_point():
    # ReLU's edge of chaos has sigma_b2 = 0 on the whole line (sigma_w2 = 2): none at 0.5
    code, out, err = run("edge", "relu", "--sigma-b2", "0.5")
    assert (code, err) == (0, "")
    assert "no edge-of-chaos point of relu has sigma_b2 = 0.5" in out
    assert strict_json(run("edge", "relu", "--sigma-b2", "0.5", "--json")[1]) == []


def test_edge_for_a_jumping_activation_lists_invalid_points():
    code, out, _ = run("edge", "step", "--q-star", "1")
    assert code == 0 and "jumps" in out
    data = strict_json(run("edge", "step", "--q-star", "1", "--json")[1])
    assert data[0]["valid"] is False and data[0]["sigma_w2"] is None


# ---------------------------------------------------------------------------------------------
# plan
# ---------------------------------------------------------------------------------------------
def test_plan_human_dense():
    code, out, err = run("plan", "tanh", "--widths", "20,64,64,64,10")
    assert (code, err) == (0, "")
    plan = recommend(activation("tanh"), widths=[20, 64, 64, 64, 10])
    kv = pairs(out)
    assert kv["sigma_w2"] == fmt(plan.sigma_w2) and kv["sigma_b2"] == fmt(plan.sigma_b2)
    assert kv["phase"] == "edge of chaos"
    assert "verdict: " + plan.verdict.summary in out
    table = out[out.index("layer  "):].splitlines()
    assert "weight std" in table[0] and "bias std" in table[0]
    # layers 2 and 3 are identical (64 -> 64) and share one row "2-3"
    assert any(line.startswith("2-3 ") for line in table)
    row1 = next(line for line in table if line.startswith("1 ")).split()
    assert row1[2:4] == ["20", "64"] and fmt(plan.layers[0].weight_std) in row1
    last = next(line for line in table if line.startswith("4 ")).split()
    assert fmt(math.sqrt(plan.sigma_w2 / 64)) in last  # std = sqrt(sigma_w2 / fan_in)


@pytest.mark.parametrize("dist,label", [("uniform", "uniform bound"),
                                        ("truncated_normal", "std before trunc."),
                                        ("orthogonal", "orthogonal scale")])
def test_plan_distributions(dist, label):
    code, out, _ = run("plan", "relu", "--widths", "8,16,4", "--distribution", dist)
    assert code == 0 and label in out
    plan = recommend(activation("relu"), widths=[8, 16, 4], distribution=dist)
    for li in plan.layers:
        assert fmt(li.value) in out


def test_plan_conv_json():
    code, out, _ = run("plan", "relu", "--conv", "3:16:3x3", "--conv", "16:32:5", "--json")
    assert code == 0
    data = strict_json(out)
    layers = [propcalc.Layer.conv(3, 16, (3, 3)), propcalc.Layer.conv(16, 32, 5)]
    ref = recommend(activation("relu"), layers=layers).to_dict()
    assert set(data) == set(ref)
    assert data == jsonable(ref)
    # He et al. 2015, section 2.2: fan_in = k^2 c = 27, then 5 x 16 = 80
    assert [li["fan_in"] for li in data["layers"]] == [27, 80]


def test_plan_depth_only_and_targets_json():
    for argv, kwargs in [
        (["--depth", "12"], dict(depth=12)),
        (["--depth", "12", "--target", "variance"], dict(depth=12, target="variance")),
        (["--depth", "12", "--sigma-b2", "0.2"], dict(depth=12, sigma_b2=0.2)),
        (["--depth", "12", "--q-star", "2", "--q-input", "3"], dict(depth=12, q_star=2.0,
                                                                   q_input=3.0)),
    ]:
        code, out, _ = run("plan", "tanh", *argv, "--json")
        assert code == 0, argv
        assert strict_json(out) == jsonable(recommend(activation("tanh"), **kwargs).to_dict())


def test_plan_depth_only_human_shows_gain_over_sqrt_fan_in():
    code, out, _ = run("plan", "tanh", "--depth", "6")
    assert code == 0 and "/sqrt(fan_in)" in out


# ---------------------------------------------------------------------------------------------
# demo
# ---------------------------------------------------------------------------------------------
def test_demo_human_and_json():
    code, out, err = run("demo")
    assert (code, err) == (0, "") and "fictional" in out
    code, out, _ = run("demo", "--json")
    assert code == 0
    data = strict_json(out)
    assert set(data) == {"scenario", "widths", "plans"}


# ---------------------------------------------------------------------------------------------
# errors and exit codes
# ---------------------------------------------------------------------------------------------
USAGE_ERRORS = [
    ([], "the following arguments are required: command"),
    (["nonsense"], "invalid choice: 'nonsense'"),
    (["report", "tanh"], "the following arguments are required: -w/--sigma-w2"),
    (["report", "tanh", "-w", "abc"], "argument -w/--sigma-w2: must be a number, got 'abc'"),
    (["report", "tanh", "-w", "nan"], "must be finite, got 'nan'"),
    (["report", "tanh", "-w", "-1"], "sigma_w2 must be > 0, got -1.0"),
    (["report", "tanh", "-w", "1", "-b", "-0.5"], "sigma_b2 must be >= 0, got -0.5"),
    (["report", "tanh", "-w", "1", "--depth", "0"], "depth must be an integer >= 1, got 0"),
    (["report", "tanh", "-w", "1", "--depth", "2.5"], "argument --depth: invalid int value"),
    (["report", "tanhh", "-w", "1"], "unknown activation 'tanhh'"),
    (["report", "tanh", "-w", "1", "--param", "slope=1"], "params.slope must be a parameter"),
    (["report", "leaky_relu", "-w", "1", "--param", "slope"], "--param must look like name=value"),
    (["report", "leaky_relu", "-w", "1", "--param", "slope=x"], "--param slope must be a number"),
    (["report", "leaky_relu", "-w", "1", "--param", "slope=inf"], "--param slope must be finite"),
    # issue 11 section 5: a repeated parameter was silently the last one
    (["report", "leaky_relu", "-w", "1", "--param", "slope=1", "--param", "slope=2"],
     "--param slope is given twice (1 and 2)"),
    (["report", "exp(x)", "-w", "1"], "exp"),        # refused formula: not finite on the range
    (["report", "tanh(", "-w", "1"], "column"),      # refused formula: syntax
    (["show"], "the following arguments are required: activation"),
    (["plan", "tanh"], "the network's size is missing: give --depth N"),  # issue 12 section 2
    (["plan", "tanh", "--widths", "3"], "widths must be a list of at least 2 sizes, got [3]"),
    (["plan", "tanh", "--widths", "a,b"], "argument --widths: must be comma-separated integers"),
    (["plan", "tanh", "--widths", "3,-4,5"], "widths[1] must be an integer >= 1, got -4"),
    (["plan", "tanh", "--widths", "3,4,5", "--depth", "3"],
     "depth must be equal to the number of layers (2), got 3"),
    (["plan", "tanh", "--conv", "3:4"], "--conv must look like IN:OUT:KERNEL"),
    (["plan", "tanh", "--conv", "3:4:0"], "kernel_size must be an integer >= 1, got 0"),
    (["plan", "tanh", "--conv", "3:4:3", "--widths", "3,4"], "widths must be absent"),
    (["plan", "tanh", "--depth", "3", "--distribution", "foo"], "argument --distribution"),
    (["plan", "tanh", "--depth", "3", "--target", "foo"], "argument --target"),
    (["plan", "tanh", "--depth", "3", "--q-star", "-1"], "q_star must be > 0, got -1.0"),
    (["plan", "tanh", "--depth", "3", "--target", "edge", "--sigma-b2", "0.1"],
     "sigma_b2 must be absent for target 'edge'"),
    (["edge", "tanh", "--q-star", "0"], "q_star must be > 0, got 0.0"),
    (["edge", "tanh", "--q-star", "a"], "argument --q-star: must be comma-separated numbers"),
    (["demo", "--extra"], "unrecognized arguments: --extra"),
]


@pytest.mark.parametrize("argv,needle", USAGE_ERRORS, ids=[" ".join(a) or "<none>"
                                                           for a, _ in USAGE_ERRORS])
def test_usage_errors_exit_2_with_one_line(argv, needle):
    code, out, err = run(*argv)
    assert code == 2
    assert out == ""
    assert err.endswith("\n") and err.count("\n") == 1, err
    assert err.startswith("propcalc: error: ")
    assert needle in err


COMPUTATION_FAILURES = [
    # step jumps, so it has no edge of chaos at all
    (["plan", "step", "--depth", "3", "--target", "edge"], "no attracting point on the edge"),
    # ReLU's edge-of-chaos line lies at sigma_b2 = 0 (sigma_w2 = 2 for every q*)
    (["plan", "relu", "--depth", "3", "--sigma-b2", "0.5"], "no edge-of-chaos point of relu"),
]


@pytest.mark.parametrize("argv,needle", COMPUTATION_FAILURES,
                         ids=[" ".join(a) for a, _ in COMPUTATION_FAILURES])
def test_computation_failures_exit_1_with_one_line(argv, needle):
    code, out, err = run(*argv)
    assert code == 1
    assert out == ""
    assert err.count("\n") == 1 and err.startswith("propcalc: computation failed: ")
    assert needle in err


def test_a_computation_error_anywhere_exits_1(monkeypatch):
    def broken(*args, **kwargs):
        raise ComputationError("the quadrature did not converge (simulated)")

    monkeypatch.setattr(propagation_commands, "propagation", broken)
    code, out, err = run("report", "tanh", "-w", "1")
    assert (code, out) == (1, "")
    assert err == "propcalc: computation failed: the quadrature did not converge (simulated)\n"


@pytest.mark.parametrize("argv", [["-h"], ["--help"], ["report", "-h"], ["plan", "--help"],
                                  ["activations", "-h"], ["show", "-h"], ["edge", "-h"],
                                  ["demo", "-h"]])
def test_help(argv, capsys):
    # the help goes to the given stream and main returns 0 (argparse's SystemExit is caught)
    out = io.StringIO()
    assert cli.main(argv, out=out, err=io.StringIO()) == 0
    assert capsys.readouterr().out == ""
    text = out.getvalue()
    assert text.startswith("usage: propcalc")
    if argv[0] == "report":
        assert "--sigma-w2" in text and "--json" in text


def test_help_goes_to_the_given_stream():
    out = io.StringIO()
    assert cli.main(["-h"], out=out, err=io.StringIO()) == 0
    assert out.getvalue().startswith("usage: propcalc")


def test_format_number():
    assert fmt(None) == "-" and fmt(True) == "yes" and fmt(False) == "no"
    assert fmt(math.inf) == "inf" and fmt(-math.inf) == "-inf"
    assert fmt(3) == "3" and fmt(1 / 3) == "0.333333" and fmt("x") == "x"


# ---------------------------------------------------------------------------------------------
# the installed console script
# ---------------------------------------------------------------------------------------------
def _script() -> str:
    path = shutil.which("propcalc")
    if path is None:  # pragma: no cover - the package is installed with pip install -e .
        pytest.skip("the propcalc console script is not on PATH")
    return path


def _shell(*argv: str) -> subprocess.CompletedProcess:
    return subprocess.run(list(argv), capture_output=True, text=True, timeout=120, check=False)


def test_console_script():
    exe = _script()
    done = _shell(exe, "report", "relu", "-w", "2", "--json")
    assert done.returncode == 0, done.stderr
    data = strict_json(done.stdout)
    # ReLU at sigma_w2 = 2, sigma_b2 = 0: V(q) = q for every q, chi_1 = 1 (He et al. 2015)
    assert data["status"] == "neutral" and data["phase"] == "edge of chaos"
    assert data["chi_1"] == pytest.approx(1.0, rel=1e-12)

    done = _shell(exe, "report", "relu")
    assert done.returncode == 2
    assert done.stdout == "" and done.stderr.count("\n") == 1

    done = _shell(exe, "plan", "step", "--depth", "3", "--target", "edge")
    assert done.returncode == 1 and done.stderr.startswith("propcalc: computation failed:")

    done = _shell(exe, "-h")
    assert done.returncode == 0 and done.stdout.startswith("usage: propcalc")


def test_module_entry_point_matches_the_script():
    done = _shell(sys.executable, "-m", "propcalc.cli", "show", "relu", "--json")
    assert done.returncode == 0
    assert strict_json(done.stdout) == strict_json(run("show", "relu", "--json")[1])


def test_absurd_depth_is_a_usage_error():
    code, _, err = run("plan", "tanh", "--depth", "99999999999999999999")
    assert code == 2 and err.count("\n") == 1 and "depth" in err


def test_q_star_list_overflow_is_reported_as_typed():
    code, _, err = run("edge", "tanh", "--q-star", "1e400")
    assert code == 2 and "1e400" in err
