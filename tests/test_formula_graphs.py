"""Formulas whose derivative would explode: shared graphs, bounded texts, linear evaluation.

Issue 11 section 1: the derivative of ``abs(u)`` is ``where(u < 0, -u', u')``, so spelled out,
the derivative of ``abs(abs(...(x)))`` doubles with each level (``"abs(" * 24 + "x" + ")" * 24``,
121 characters, built a 386 MB derivative text; 25 levels ran out of memory). The graph of the
derivative grows by a few nodes per level; the printed derivative names its shared parts; every
limit of the build is enforced.

References, named beside each check:

* the chain rule applied level by level in plain numpy (any calculus text), with the
  derivatives of the kinked functions from their papers: elu'(x) = 1 (x > 0), alpha e^x
  otherwise (Clevert et al. 2016, eq. 16); selu = scale * elu(alpha) with the constants of
  Klambauer et al. 2017, eq. 14; leaky_relu'(x) = 1 (x > 0), slope otherwise (Maas et al.
  2013); the tanh form of gelu and its derivative (Hendrycks & Gimpel 2016);
* points drawn from a seeded numpy generator.

The memory ceiling is an address-space limit (``resource.RLIMIT_AS``) on a subprocess that
builds every family at its limits, so the test fails if memory grows exponentially again,
instead of passing by luck.
"""

from __future__ import annotations

import json
import math
import os
import re
import subprocess
import sys
import textwrap

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import special

import propcalc
from propcalc.activations.formula import (LIMITS, FormulaLimits, formula_activation,
                                          formula_activation_within)
from propcalc.errors import FormulaError

# Klambauer et al. 2017, eq. 14
SELU_ALPHA = 1.6732632423543772848170429916717
SELU_SCALE = 1.0507009873554804934193349852946
POINTS = np.random.default_rng(20261204).normal(0.0, 2.0, 401)


def _nest(level, k: int, inner: str = "x") -> str:
    text = inner
    for _ in range(k):
        text = level(text)
    return text


# --- references: the chain rule level by level ------------------------------------------------
def _leaky(g, d, slope=0.01):
    return np.where(g > 0, g, slope * g), d * np.where(g > 0, 1.0, slope)


def _elu(g, d):
    return np.where(g > 0, g, np.expm1(np.minimum(g, 0))), d * np.where(g > 0, 1.0, np.exp(np.minimum(g, 0)))


def _selu(g, d):
    e, de = _elu(g, np.ones_like(g))
    # selu = scale * where(g > 0, g, alpha (e^g - 1))
    v = SELU_SCALE * np.where(g > 0, g, SELU_ALPHA * e)
    return v, d * SELU_SCALE * np.where(g > 0, 1.0, SELU_ALPHA * de)


def _gelu_tanh(g, d):
    # Hendrycks & Gimpel 2016: 0.5 x (1 + tanh(u)), u = sqrt(2/pi) (x + 0.044715 x^3), written
    # with the identities 0.5 (1 + tanh u) = expit(2u) and 1 - tanh(u)^2 = 4 expit(2u) expit(-2u)
    # (no cancellation in the negative tail)
    c = math.sqrt(2.0 / math.pi)
    u = c * (g + 0.044715 * g**3)
    du = c * (1.0 + 3 * 0.044715 * g**2)
    s, sm = special.expit(2 * u), special.expit(-2 * u)
    return g * s, d * (s + 2.0 * g * s * sm * du)


def _chain(step, k: int, x=None):
    def ref(xs):
        g, d = xs.copy(), np.ones_like(xs)
        for _ in range(k):
            g, d = step(g, d, xs)
        return g, d
    return ref


FAMILIES = {
    # name: (text at the limits, reference (value, derivative) at points)
    "abs": (_nest(lambda s: f"abs({s} - 1)", 29),  # 29 levels: tree depth 59 (limit 60)
            _chain(lambda g, d, x: (np.abs(g - 1), d * np.sign(g - 1)), 29)),
    "abs_bare": ("abs(" * 30 + "x" + ")" * 30,  # 30 brackets deep (limit 30)
                 _chain(lambda g, d, x: (np.abs(g), d * np.sign(g)), 30)),
    "leaky_relu": ("leaky_relu(" * 30 + "x - 0.1" + ")" * 30,
                   lambda xs: _chain(lambda g, d, x: _leaky(g, d), 30)(xs - 0.1)),
    "elu": ("elu(" * 30 + "x + 0.5" + ")" * 30,
            lambda xs: _chain(lambda g, d, x: _elu(g, d), 30)(xs + 0.5)),
    "selu": ("selu(" * 30 + "x" + ")" * 30, _chain(lambda g, d, x: _selu(g, d), 30)),
    "max_min": (_nest(lambda s: f"max(min({s}, 1), -0.5)", 15),  # 30 brackets deep
                _chain(lambda g, d, x: (np.clip(g, -0.5, 1.0), d * ((g > -0.5) & (g < 1))), 15)),
    "max_twice": (_nest(lambda s: f"max({s}, 0.5 * {s})", 5),  # 435 characters (limit 500)
                  _chain(lambda g, d, x: _leaky(g, d, 0.5), 5)),
    "where_twice": (_nest(lambda s: f"where({s} > 0, {s}, 0.5 * {s})", 3),
                    _chain(lambda g, d, x: _leaky(g, d, 0.5), 3)),
    "where_x": (_nest(lambda s: f"where(x > 0.5, {s}, 0.5 * {s})", 4),
                _chain(lambda g, d, x: (np.where(x > 0.5, g, 0.5 * g),
                                        np.where(x > 0.5, d, 0.5 * d)), 4)),
    "mixture": (_nest(lambda s: f"abs(leaky_relu(elu(selu({s}))))", 7),  # 28 brackets deep
                _chain(lambda g, d, x: (lambda v, dv: (np.abs(v), dv * np.sign(v)))(
                    *_leaky(*_elu(*_selu(g, d)))), 7)),
    "gelu_tanh": ("gelu_tanh(" * 29 + "x" + ")" * 29,  # the largest derivative template
                  _chain(lambda g, d, x: _gelu_tanh(g, d), 29)),
}

_SCRIPT = textwrap.dedent("""
    import json, resource, sys
    ceiling = int(sys.argv[1])
    resource.setrlimit(resource.RLIMIT_AS, (ceiling, ceiling))
    import numpy as np
    import propcalc
    from propcalc.activations.formula.build import FORMULA_CACHE
    job = json.load(sys.stdin)
    x = np.array(job["points"])
    out = {}
    for name, text in job["texts"].items():
        act = propcalc.activation(text)
        size = FORMULA_CACHE.get((text, ()))[1]
        out[name] = {"value": act.value(x).tolist(), "derivative": act.derivative(x).tolist(),
                     "derivative_length": len(act.derivative_formula),
                     "derivative_nodes": size.derivative_nodes, "value_nodes": size.value_nodes}
    # the peak resident set of this process's own memory map: ru_maxrss would also count the
    # parent's resident set at the fork (Linux keeps it across exec), i.e. pytest's, not ours
    try:
        with open("/proc/self/status") as status:
            peak = [line for line in status if line.startswith("VmHWM:")][0]
        out["maxrss_kb"] = int(peak.split()[1])
    except (OSError, IndexError):
        out["maxrss_kb"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    print(json.dumps(out))
""")

#: address space of the subprocess: numpy and scipy need about 300 MB of it here; the first
#: version needed several GB for the abs family at these sizes
MEMORY_CEILING = 640 * 2**20


@pytest.fixture(scope="module")
def built_under_a_ceiling() -> dict:
    env = dict(os.environ, OPENBLAS_NUM_THREADS="1", OMP_NUM_THREADS="1")
    job = {"points": POINTS.tolist(), "texts": {k: v[0] for k, v in FAMILIES.items()}}
    proc = subprocess.run([sys.executable, "-c", _SCRIPT, str(MEMORY_CEILING)],
                          input=json.dumps(job), capture_output=True, text=True, timeout=600,
                          env=env)
    assert proc.returncode == 0, proc.stderr[-2000:]
    return json.loads(proc.stdout)


@pytest.mark.slow
@pytest.mark.parametrize("name", list(FAMILIES))
def test_every_family_at_its_limits_builds_under_a_memory_ceiling(name: str,
                                                                  built_under_a_ceiling: dict) -> None:
    result = built_under_a_ceiling[name]
    value, derivative = FAMILIES[name][1](POINTS)
    # reference: the chain rule level by level (module docstring)
    assert_allclose(result["value"], value, rtol=1e-12, atol=1e-300)
    assert_allclose(result["derivative"], derivative, rtol=1e-11, atol=1e-300)
    assert result["derivative_length"] <= LIMITS.max_derivative_length
    assert result["derivative_nodes"] <= LIMITS.max_derivative_nodes
    # the graph grows with the formula (a few nodes per level), never exponentially
    assert result["derivative_nodes"] <= 30 * result["value_nodes"]


@pytest.mark.slow
def test_the_ceiling_process_stayed_small(built_under_a_ceiling: dict) -> None:
    assert built_under_a_ceiling["maxrss_kb"] * 1024 < MEMORY_CEILING


@pytest.mark.parametrize("name", list(FAMILIES))
def test_one_level_more_is_refused_by_a_limit(name: str) -> None:
    # each family above sits at a limit: one more level is refused by a limit, not by memory
    text = FAMILIES[name][0]
    deeper = {"abs": f"abs({text} - 1)", "abs_bare": f"abs({text})",
              "leaky_relu": f"leaky_relu({text})", "elu": f"elu({text})",
              "selu": f"selu({text})", "max_min": f"max(min({text}, 1), -0.5)",
              "max_twice": f"max({text}, 0.5 * {text})",
              "where_twice": f"where({text} > 0, {text}, 0.5 * {text})",
              "where_x": f"where(x > 0.5, {text}, 0.5 * {text})",
              "mixture": f"abs(leaky_relu(elu(selu({text}))))",
              "gelu_tanh": f"gelu_tanh(gelu_tanh({text}))"}[name]
    with pytest.raises(FormulaError, match=r"the limit is \d+"):
        propcalc.activation(deeper)


def test_the_failing_input_of_the_issue() -> None:
    # "abs(" * 24 + "x" + ")" * 24: 386 MB of derivative text in the first version
    for k in (24, 25):
        act = propcalc.activation("abs(" * k + "x" + ")" * k)
        assert len(act.derivative_formula) < 2000
        assert " with t1 = " in act.derivative_formula
        assert_allclose(act.derivative(POINTS), np.sign(POINTS), rtol=0)  # d|x|/dx = sign(x)


def test_printed_derivative_grows_linearly() -> None:
    lengths = [len(propcalc.activation("abs(" * k + "x" + ")" * k).derivative_formula)
               for k in (10, 20, 30)]
    # spelled out: 2^k; named: a few dozen characters per level
    assert lengths[2] - lengths[1] <= 1.2 * (lengths[1] - lengths[0])
    assert lengths[2] < 60 * 30


def test_named_form_reads_back_to_the_same_function() -> None:
    # "E with t1 = ...; t2 = ..." with the names substituted back is the derivative itself
    act = propcalc.activation("abs(" * 4 + "x - 0.3" + ")" * 4)
    expr, sep, defs = act.derivative_formula.partition(" with ")
    assert sep, act.derivative_formula  # short enough to spell out, but printed with names
    names = dict(d.split(" = ", 1) for d in defs.split("; "))
    pattern = re.compile(r"\b(" + "|".join(names) + r")\b")
    while pattern.search(expr):
        expr = pattern.sub(lambda m: f"({names[m.group(1)]})", expr)
    spelled = propcalc.activation(expr)
    # closed form: d|x - 0.3|/dx = sign(x - 0.3)
    assert_allclose(spelled.value(POINTS), np.sign(POINTS - 0.3), rtol=0)
    assert_allclose(act.derivative(POINTS), np.sign(POINTS - 0.3), rtol=0)


def test_small_derivatives_are_still_spelled_out() -> None:
    act = propcalc.activation("abs(abs(x))")
    assert act.derivative_formula == ("where(abs(x) < 0, -where(x < 0, -1, 1), "
                                      "where(x < 0, -1, 1))")


def test_named_parts_avoid_the_parameter_names() -> None:
    text = "abs(" * 10 + "t1 * x + t2" + ")" * 10
    act = propcalc.activation(text, t1=1.5, t2=0.25)
    assert " with s1 = " in act.derivative_formula and "t1 =" not in act.derivative_formula


def test_evaluation_is_linear_in_the_graph(monkeypatch: pytest.MonkeyPatch) -> None:
    # each distinct node is computed once per call: count np.where calls per evaluation
    # (spelled out, the derivative of 20 nested abs has about 2^20 of them)
    acts = {k: propcalc.activation("abs(" * k + "x" + ")" * k) for k in (10, 20)}
    calls = {}
    real_where = np.where
    for k, act in acts.items():
        count = [0]

        def counting(*args, _count=count):
            _count[0] += 1
            return real_where(*args)

        monkeypatch.setattr(np, "where", counting)
        act.derivative(POINTS)
        monkeypatch.setattr(np, "where", real_where)
        calls[k] = count[0]
    assert 0 < calls[10] <= 3 * 10 and calls[20] <= 2 * calls[10] + 3


def test_derivative_limits_are_enforced() -> None:
    text = "abs(" * 20 + "x" + ")" * 20
    small_graph = FormulaLimits(max_derivative_nodes=40)
    with pytest.raises(FormulaError, match=r"the derivative has \d+ distinct sub-expressions; "
                                           r"the limit is 40"):
        formula_activation_within(small_graph, "abs(" * 19 + "x" + ")" * 19)
    short_text = FormulaLimits(max_derivative_length=100)
    with pytest.raises(FormulaError, match=r"the derivative is \d+ characters long even with its "
                                           r"shared parts named; the limit is 100"):
        formula_activation_within(short_text, text)
    act = formula_activation(text)  # within the default limits
    with pytest.raises(FormulaError, match=r"the limit is 100"):  # re-checked from its size
        formula_activation_within(short_text, text)
    assert formula_activation_within(LIMITS, text) is act
