"""Tests of the ``propcalc`` subcommands dropout, maxout, selfnorm, isometry, softmax, simulate.

Driven in-process through ``propcalc.cli.main(argv, out=..., err=...)``. The ``--json`` output
must be exactly ``propcalc.jsonable(result.to_dict())`` of the same call to the public Python
API (whose own numerics are tested in test_dropout.py, test_maxout.py, test_selfnorm.py,
test_spectrum.py, test_output_layer.py and test_simulate.py); the human tables must show the
same numbers. A few published values and closed forms are checked on the way, each with its
source beside it. JSON is parsed strictly (NaN / Infinity are not JSON, RFC 8259 section 6).
"""

from __future__ import annotations

import io
import math
import re

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import integrate, optimize, special, stats

from propcalc import (
    activation,
    alpha_dropout,
    cli,
    dropout_propagation,
    dropout_sweep,
    dynamical_isometry,
    initial_loss,
    jacobian_spectrum,
    jsonable,
    max_class_probability,
    maxout_layer,
    maxout_propagation,
    output_layer_scale,
    propagation,
    self_normalization,
    simulate,
)
from cli_helpers import run, strict_json


def run_json(*argv: str):
    code, out, err = run(*argv, "--json")
    assert (code, err) == (0, ""), err
    return strict_json(out)


def pairs(text: str) -> dict[str, str]:
    """The 'key  value' lines of a human report (two or more spaces separate them)."""
    out = {}
    for line in text.splitlines():
        m = re.match(r"^(\S.*?)\s{2,}(\S.*)$", line)
        if m and not line.startswith(("note:", "verdict:", "-")):
            out.setdefault(m.group(1), m.group(2))
    return out


def fmt(x) -> str:
    return cli.format_number(x)


def table_rows(text: str, first_header: str) -> list[list[str]]:
    """Rows (split on 2+ spaces) of the table whose header starts with ``first_header``."""
    lines = text.splitlines()
    start = next(i for i, line in enumerate(lines) if line.startswith(first_header))
    rows = []
    for line in lines[start + 2:]:
        if not line.strip() or line.startswith("("):
            break
        rows.append(re.split(r"\s{2,}", line.strip()))
    return rows


# ---------------------------------------------------------------------------------------------
# dropout
# ---------------------------------------------------------------------------------------------
def test_dropout_report_json_equals_python_api():
    data = run_json("dropout", "tanh", "-w", "1.5", "-b", "0.05", "--keep-rate", "0.9",
                    "--depth", "50")
    ref = dropout_propagation(activation("tanh"), 1.5, 0.05, 0.9, depth=50).to_dict()
    assert set(data) == set(ref)
    assert data == jsonable(ref)


def test_dropout_report_human():
    code, out, err = run("dropout", "tanh", "-w", "1.5", "-b", "0.05", "--keep-rate", "0.9",
                         "--depth", "50")
    assert (code, err) == (0, "")
    r = dropout_propagation(activation("tanh"), 1.5, 0.05, 0.9, depth=50)
    kv = pairs(out)
    assert kv["keep rate"] == "0.9" and kv["variance"] == r.status
    for label, value in [("q*", r.q_star), ("chi_1", r.chi_1), ("c*", r.c_star),
                         ("chi_c", r.chi_c), ("xi_c", r.xi_c),
                         ("trainable depth (6 xi_c)", r.trainable_depth),
                         ("gradient growth chi_1^L", r.gradient_growth)]:
        assert kv[label] == fmt(value), label
    assert f"verdict: {r.verdict}\n" in out
    # Schoenholz et al. 2017: with dropout c* < 1 and there is no edge of chaos
    assert r.c_star < 1 and math.isfinite(r.xi_c)
    assert "no edge of chaos (Schoenholz et al. 2017)" in out
    assert "empirical rule of Schoenholz et al. 2017" in out


def test_dropout_keep_rate_one_is_no_dropout():
    # keep rate 1 is the ordinary network: q* and chi_1 are those of the propagation report
    # (Poole et al. 2016; Schoenholz et al. 2017), here in the ordered phase where c* = 1
    data = run_json("dropout", "tanh", "-w", "0.8", "-b", "0.05", "--keep-rate", "1")
    p = propagation(activation("tanh"), 0.8, 0.05)
    assert_allclose(data["q_star"], p.q_star, rtol=1e-10)
    assert_allclose(data["chi_1"], p.chi_1, rtol=1e-10)
    assert data["c_star"] == 1.0


def test_dropout_relu_closed_form():
    # ReLU with sigma_w2 = 2 rho, sigma_b2 = 0 keeps every q (sigma_w2 / rho = 2, He et al. 2015)
    # and C(c) = rho k_1(c), k_1 the normalised arc-cosine kernel of degree 1 (Cho & Saul
    # 2009, eq. 6): c* solves rho k_1(c) = c and chi_c = rho (pi - arccos c*) / pi
    rho = 0.8
    data = run_json("dropout", "relu", "-w", "2", "--keep-rate", str(rho),
                    "--scale-with-keep-rate")
    assert data["sigma_w2"] == pytest.approx(2 * rho, rel=1e-15)
    assert data["status"] == "neutral"

    def k1(c):
        return (math.sqrt(1 - c * c) + (math.pi - math.acos(c)) * c) / math.pi

    c_star = optimize.brentq(lambda c: rho * k1(c) - c, 0.0, 1.0 - 1e-12, xtol=1e-15)
    assert_allclose(data["c_star"], c_star, rtol=1e-9)
    assert_allclose(data["chi_c"], rho * (math.pi - math.acos(c_star)) / math.pi, rtol=1e-9)


def test_dropout_sweep_json_and_human():
    argv = ["dropout", "relu", "-w", "2", "--keep-rate", "0.5,0.8,1", "--depth", "20",
            "--scale-with-keep-rate"]
    ref = dropout_sweep(activation("relu"), 2.0, 0.0, [0.5, 0.8, 1.0], depth=20,
                        scale_with_keep_rate=True)
    assert run_json(*argv) == jsonable(ref.to_dict())
    code, out, err = run(*argv)
    assert (code, err) == (0, "")
    rows = table_rows(out, "keep rate")
    assert [r[0] for r in rows] == ["0.5", "0.8", "1"]
    for row, r in zip(rows, ref.reports):
        assert row[1] == fmt(r.sigma_w2) and row[5] == fmt(r.c_star) and row[7] == fmt(r.xi_c)
        assert row[-1] == ("yes" if r.depth_ok else "no")
    # no dropout with the He variance: the edge of chaos, xi_c infinite (Schoenholz et al. 2017)
    assert rows[-1][7] == "inf"


# ---------------------------------------------------------------------------------------------
# maxout
# ---------------------------------------------------------------------------------------------
def test_maxout_default_is_c_k_and_json_equals_python_api():
    data = run_json("maxout", "3", "--depth", "10")
    ref = maxout_propagation(3, depth=10)
    assert data == jsonable({**ref.to_dict(), "layer": None})
    # Tseran & Montufar 2023: c_3 = 0.7839 (four digits as published)
    assert round(data["moments"]["recommended_sigma_w2"], 4) == 0.7839
    assert data["sigma_w2"] == data["moments"]["recommended_sigma_w2"]
    # closed forms for the largest of 3 standard normals: E[X] = 3 / (2 sqrt(pi)) (David &
    # Nagaraja 2003, order statistics of small normal samples) and E[X^2] = 1 + sqrt(3) / (2 pi)
    # (from memory); both also by scipy.integrate.quad over the density 3 phi Phi^2
    m1 = integrate.quad(lambda z: 3 * z * stats.norm.pdf(z) * stats.norm.cdf(z) ** 2,
                        -np.inf, np.inf)[0]
    m2 = integrate.quad(lambda z: 3 * z * z * stats.norm.pdf(z) * stats.norm.cdf(z) ** 2,
                        -np.inf, np.inf)[0]
    assert_allclose(data["moments"]["mean"], 3 / (2 * math.sqrt(math.pi)), rtol=1e-12)
    assert_allclose(data["moments"]["mean"], m1, rtol=1e-9)
    assert_allclose(data["moments"]["second_moment"], 1 + math.sqrt(3) / (2 * math.pi),
                    rtol=1e-12)
    assert_allclose(data["moments"]["second_moment"], m2, rtol=1e-9)


def test_maxout_rank_2_closed_form():
    # max(a, b)^2 + min(a, b)^2 = a^2 + b^2 and max, -min have the same law: E[X_2^2] = 1, so
    # c_2 = 1 and with sigma_w2 = 1 the variance is neutral on the edge of chaos (closed form);
    # E[X_2] = 1 / sqrt(pi) (closed form)
    data = run_json("maxout", "2", "-w", "1")
    assert_allclose(data["moments"]["second_moment"], 1.0, rtol=1e-12)
    assert_allclose(data["moments"]["mean"], 1 / math.sqrt(math.pi), rtol=1e-12)
    assert data["status"] == "neutral" and data["phase"] == "edge of chaos"


def test_maxout_human_with_layer_shows_parameter_count():
    code, out, err = run("maxout", "3", "--depth", "10", "--fan-in", "256", "--fan-out", "128")
    assert (code, err) == (0, "")
    r = maxout_propagation(3, depth=10)
    layer = maxout_layer(3, 256, 128)
    kv = pairs(out)
    assert kv["c_k = 1 / E[X_k^2] (Tseran & Montufar 2023)"] == fmt(r.moments.recommended_sigma_w2)
    assert kv["sigma_w2"] == fmt(r.sigma_w2) + " (c_k)"
    assert kv["phase"] == r.phase == "ordered"
    assert kv["xi_c"] == fmt(r.xi_c)
    # k (fan_in fan_out + fan_out) parameters: 3 x (256 x 128 + 128) (Goodfellow et al. 2013)
    assert kv["parameters (maxout layer)"] == str(3 * (256 * 128 + 128)) == str(layer.n_parameters)
    assert kv["parameters (plain dense layer)"] == str(256 * 128 + 128)
    assert kv["weight std sqrt(sigma_w2 / fan_in)"] == fmt(math.sqrt(r.sigma_w2 / 256))
    assert "has 3 times the weights and biases of a plain layer" in out
    data = run_json("maxout", "3", "--depth", "10", "--fan-in", "256", "--fan-out", "128")
    assert data == jsonable({**r.to_dict(), "layer": layer.to_dict()})


def test_maxout_unbounded_variance():
    # k = 3 with sigma_w2 = 1 (chi_1 = 1): V(q) = E[X_3^2] q grows without bound
    data = run_json("maxout", "3", "-w", "1")
    assert data["status"] == "unbounded" and data["q_star"] is None
    assert_allclose(data["growth_rate"], 1 + math.sqrt(3) / (2 * math.pi), rtol=1e-12)


# ---------------------------------------------------------------------------------------------
# selfnorm
# ---------------------------------------------------------------------------------------------
def test_selfnorm_selu_fixed_point_and_alpha_dropout():
    data = run_json("selfnorm", "selu", "--keep-rate", "0.9")
    act = activation("selu")
    ref = {**self_normalization(act).to_dict(), "alpha_dropout": alpha_dropout(0.9).to_dict()}
    assert data == jsonable(ref)
    # Klambauer et al. 2017: SELU with omega = 0, tau = 1 has the attracting fixed point (0, 1)
    near = data["nearest"]
    assert abs(near["mu"]) < 1e-9 and abs(near["nu"] - 1) < 1e-9
    assert data["self_normalizing"] is True and near["spectral_norm"] < 1
    # alpha dropout at (0, 1): a = (q + alpha'^2 q (1 - q))^(-1/2), b = -a (1 - q) alpha'
    # (Klambauer et al. 2017, section "New dropout technique"), alpha' = -lambda alpha with
    # lambda, alpha the SELU constants of the same paper
    q, ap = 0.9, -1.0507009873554805 * 1.6732632423543772
    a = (q + ap * ap * q * (1 - q)) ** -0.5
    ad = data["alpha_dropout"]
    assert_allclose([ad["alpha_prime"], ad["a"], ad["b"]], [ap, a, -a * (1 - q) * ap],
                    rtol=1e-12)


def test_alpha_dropout_keeps_mean_and_variance_by_sampling():
    # seeded numpy sampling: x ~ N(0, 1), d ~ Bernoulli(0.8); a (x d + alpha' (1 - d)) + b has
    # mean 0 and variance 1 (the defining property, Klambauer et al. 2017)
    ad = run_json("selfnorm", "selu", "--keep-rate", "0.8")["alpha_dropout"]
    rng = np.random.default_rng(7)
    x = rng.standard_normal(2_000_000)
    d = rng.random(x.size) < 0.8
    y = ad["a"] * np.where(d, x, ad["alpha_prime"]) + ad["b"]
    assert abs(y.mean()) < 4e-3 and abs(y.var() - 1) < 4e-3


def test_selfnorm_human():
    code, out, err = run("selfnorm", "selu", "--omega", "0.5", "--tau", "1.2")
    assert (code, err) == (0, "")
    r = self_normalization(activation("selu"), 0.5, 1.2)
    kv = pairs(out)
    assert kv["self-normalising"] == ("yes" if r.self_normalizing else "no")
    rows = table_rows(out, "mu ")
    assert len(rows) == len(r.fixed_points)
    assert rows[0][:4] == [fmt(r.fixed_points[0].mu), fmt(r.fixed_points[0].nu),
                           fmt(r.fixed_points[0].spectral_radius),
                           fmt(r.fixed_points[0].spectral_norm)]
    (a, b), (c, d) = r.nearest.jacobian
    jac = table_rows(out, "     d/d mu")
    assert jac == [["mu~", fmt(a), fmt(b)], ["nu~", fmt(c), fmt(d)]]
    assert r.message in out and "alpha dropout" not in out
    assert run_json("selfnorm", "selu", "--omega", "0.5", "--tau", "1.2") == jsonable(
        {**r.to_dict(), "alpha_dropout": None})


def test_selfnorm_other_activation_and_start():
    data = run_json("selfnorm", "tanh", "--tau", "2", "--start", "0,0.5")
    assert data == jsonable({**self_normalization(activation("tanh"), 0.0, 2.0,
                                                  (0.0, 0.5)).to_dict(), "alpha_dropout": None})
    data = run_json("selfnorm", "relu", "--keep-rate", "0.9", "--alpha-prime", "0")
    assert data["alpha_dropout"] == jsonable(alpha_dropout(0.9, alpha_prime=0.0).to_dict())


# ---------------------------------------------------------------------------------------------
# isometry
# ---------------------------------------------------------------------------------------------
def test_isometry_relu_has_none():
    data = run_json("isometry", "relu", "--depth", "100")
    act = activation("relu")
    assert data == {"spectrum": jsonable(jacobian_spectrum(act, 100).to_dict()),
                    "advice": jsonable(dynamical_isometry(act, 100).to_dict())}
    # Pennington, Schoenholz & Ganguli 2017: phi'^2 of ReLU is 0 or 1 with probability 1/2, so
    # mu_2 / mu_1^2 = 2 at every q*; the normalised variance is L (orthogonal) or 2L (Gaussian)
    # and ReLU networks cannot reach dynamical isometry
    s = data["spectrum"]
    assert_allclose(s["moment_ratio"], 2.0, rtol=1e-12)
    assert_allclose([s["normalized_variance_orthogonal"], s["normalized_variance_gaussian"]],
                    [100.0, 200.0], rtol=1e-10)
    assert data["advice"]["achievable"] is False and data["advice"]["ratio_constant"] is True


def test_isometry_tanh_human():
    code, out, err = run("isometry", "tanh", "--depth", "100", "--q-star", "0.5")
    assert (code, err) == (0, "")
    act = activation("tanh")
    spec = jacobian_spectrum(act, 100, 0.5)
    advice = dynamical_isometry(act, 100)
    kv = pairs(out)
    assert kv["sigma_w2"] == fmt(spec.sigma_w2) + " (edge of chaos through q*)"
    assert kv["mu_2 / mu_1^2"] == fmt(spec.moment_ratio)
    rows = {r[0]: r[1:] for r in table_rows(out, "weights")}
    assert rows["gaussian"][0] == fmt(spec.normalized_variance_gaussian)
    assert rows["orthogonal"][0] == fmt(spec.normalized_variance_orthogonal)
    # Pennington, Schoenholz & Ganguli 2017: Gaussian weights add L to the normalised variance
    assert_allclose(spec.normalized_variance_gaussian - spec.normalized_variance_orthogonal,
                    100.0, rtol=1e-12)
    assert advice.achievable and advice.message in out


def test_isometry_linear_network_closed_form():
    # phi(x) = x: D = I, so orthogonal weights are exactly isometric (variance 0) and a product
    # of L Gaussian matrices has normalised variance L (Fuss-Catalan moments; Pennington,
    # Schoenholz & Ganguli 2017)
    data = run_json("isometry", "linear", "--depth", "7", "--q-star", "2", "-w", "1")
    s = data["spectrum"]
    assert_allclose([s["mean"], s["normalized_variance_orthogonal"],
                     s["normalized_variance_gaussian"]], [1.0, 0.0, 7.0], atol=1e-12)


# ---------------------------------------------------------------------------------------------
# softmax
# ---------------------------------------------------------------------------------------------
def test_softmax_json_equals_python_api():
    data = run_json("softmax", "10", "--logit-variance", "1", "--margin", "0.05",
                    "--fan-in", "512", "--current-sigma-w2", "1")
    ref = {"initial_loss": initial_loss(10, 1.0).to_dict(),
           "max_probability": max_class_probability(10, 1.0, 100_000, 0).to_dict(),
           "output_layer": output_layer_scale(10, 1.0, 0.05, 0.0, 512, 1.0, None,
                                              100_000, 0).to_dict()}
    assert data == jsonable(ref)


def test_softmax_two_classes_closed_form():
    # K = 2: loss = softplus(l_2 - l_1), l_2 - l_1 ~ N(0, 2 s2), and max p = expit(|l_1 - l_2|)
    # (closed forms; integrated here with scipy.integrate.quad)
    s2 = 4.0
    data = run_json("softmax", "2", "--logit-variance", str(s2))
    sd = math.sqrt(2 * s2)
    loss = integrate.quad(lambda x: np.logaddexp(0.0, x) * stats.norm.pdf(x, scale=sd),
                          -np.inf, np.inf, epsabs=1e-13)[0]
    pmax = 2 * integrate.quad(lambda x: special.expit(x) * stats.norm.pdf(x, scale=sd),
                              0.0, np.inf, epsabs=1e-13)[0]  # |x| is symmetric about 0
    assert_allclose(data["initial_loss"]["expected_loss"], loss, rtol=1e-9)
    assert_allclose(data["max_probability"]["value"], pmax, rtol=1e-9)
    assert data["max_probability"]["method"] == "quadrature"
    assert data["output_layer"] is None


def test_softmax_human_and_small_variance():
    code, out, err = run("softmax", "1000", "--logit-variance", "1e-4")
    assert (code, err) == (0, "")
    kv = pairs(out)
    loss = initial_loss(1000, 1e-4)
    # E[loss] = ln K + s2 (K - 1) / (2K) + O(s2^2) (second-order expansion, closed form)
    assert_allclose(loss.expected_loss, math.log(1000) + 1e-4 * 999 / 2000, rtol=1e-7)
    assert kv["expected initial loss"] == fmt(loss.expected_loss)
    assert kv["ln K"] == fmt(math.log(1000))
    # 1000 classes: the default 100000 draws are lowered to 5e7 / K = 50000
    pm = max_class_probability(1000, 1e-4, 50_000, 0)
    assert kv["E[max_j p_j]"].startswith(fmt(pm.value) + " +- ")
    assert "50000 draws, seed 0" in kv["E[max_j p_j]"]
    assert "common practice, no source" in out


def test_softmax_margin_default_and_human():
    code, out, err = run("softmax", "100", "--margin")
    assert (code, err) == (0, "")
    scale = output_layer_scale(100, 1.0, None, n_samples=100_000, seed=0)
    kv = pairs(out)
    assert kv["largest sigma_w2"] == fmt(scale.sigma_w2)
    # the loss at the recommended scale is ln K + margin, margin = 1% of ln K by default
    assert_allclose(scale.loss_at_scale.expected_loss, 1.01 * math.log(100), rtol=1e-10)
    assert f"within {fmt(0.01 * math.log(100))} nats" in out
    assert run_json("softmax", "100", "--margin") == jsonable(
        {"initial_loss": None, "max_probability": None, "output_layer": scale.to_dict()})


# ---------------------------------------------------------------------------------------------
# simulate
# ---------------------------------------------------------------------------------------------
def test_simulate_json_equals_python_api():
    argv = ["simulate", "tanh", "-w", "1.5", "-b", "0.05", "--width", "64", "--depth", "6",
            "--repetitions", "4", "--pairs", "2", "--seed", "3", "--q0", "2", "--c0", "0.3"]
    data = run_json(*argv)
    ref = simulate(activation("tanh"), 1.5, 0.05, width=64, depth=6, repetitions=4, n_pairs=2,
                   seed=3, q0=2.0, c0=0.3)
    assert data == jsonable(ref.to_dict())
    assert run_json(*argv) == data  # seeded: the same numbers every time


def test_simulate_relu_he_and_human():
    # ReLU with sigma_w2 = 2, sigma_b2 = 0 keeps q_l = q_0 and chi_1 = 1 (He et al. 2015): the
    # predictions are flat; the measured means lie in their bands at width 256
    code, out, err = run("simulate", "relu", "-w", "2", "--width", "256", "--depth", "8",
                         "--repetitions", "6")
    assert (code, err) == (0, "")
    r = simulate(activation("relu"), 2.0, 0.0, width=256, depth=8, repetitions=6)
    assert_allclose([m.q_predicted for m in r.layers], 1.0, rtol=1e-12)
    assert_allclose([m.gradient_predicted for m in r.layers], 1.0, rtol=1e-12)
    rows = table_rows(out, "layer")
    assert len(rows) == 9 and [row[0] for row in rows] == [str(i) for i in range(9)]
    for row, m in zip(rows, r.layers):
        assert row[1] == fmt(m.q_predicted)
        assert row[2] == f"{fmt(m.q_mean)} +- {cli.format_number(2 * m.q_se, 2)}"
        assert row[7] == ("yes" if m.q_in_band else "no")
    assert sum(m.q_in_band for m in r.layers) >= 8
    assert f"verdict: {r.message}\n" in out


def test_simulate_long_table_is_thinned():
    code, out, _ = run("simulate", "tanh", "-w", "1", "--width", "16", "--depth", "60",
                       "--repetitions", "2", "--pairs", "1")
    assert code == 0
    rows = table_rows(out, "layer")
    assert rows[0][0] == "0" and rows[-1][0] == "60" and len(rows) <= 22
    assert f"({len(rows)} of 61 layers shown; --json has them all)" in out


# ---------------------------------------------------------------------------------------------
# errors: one line, exit 2 for usage, 1 for computation failures
# ---------------------------------------------------------------------------------------------
USAGE_ERRORS = [
    (["dropout", "tanh", "-w", "1"], "the following arguments are required: --keep-rate"),
    (["dropout", "tanh", "--keep-rate", "0.5"], "the following arguments are required: -w"),
    (["dropout", "tanh", "-w", "1", "--keep-rate", "0"], "keep_rate must be in (0, 1], got 0.0"),
    (["dropout", "tanh", "-w", "1", "--keep-rate", "0.5,1.5"],
     "keep_rates[1] must be in (0, 1], got 1.5"),
    (["dropout", "tanh", "-w", "1", "--keep-rate", "1e400"], "must be finite numbers"),
    (["dropout", "tanh", "-w", "1", "--keep-rate", "a,b"], "must be comma-separated numbers"),
    (["dropout", "tanh", "-w", "1", "--keep-rate", ","], "must be at least one number"),
    (["dropout", "tanh", "-w", "1", "--keep-rate", "0.5", "--q-input", "0"],
     "--q-input must be >= 1e-12 with dropout, got 0"),
    (["dropout", "tanh", "-w", "1", "--keep-rate", "0.5", "--depth", "0"],
     "depth must be an integer >= 1, got 0"),
    (["maxout"], "the following arguments are required: k"),
    (["maxout", "0"], "k must be an integer >= 1, got 0"),
    (["maxout", "2000"], "k must be an integer <= 1024, got 2000"),
    (["maxout", "3", "-w", "-1"], "sigma_w2 must be > 0, got -1.0"),
    (["maxout", "3", "--fan-in", "10"], "--fan-in and --fan-out go together"),
    (["maxout", "3", "--fan-in", "0", "--fan-out", "3"], "fan_in must be an integer >= 1, got 0"),
    (["selfnorm", "selu", "--tau", "0"], "tau must be > 0, got 0.0"),
    (["selfnorm", "selu", "--start", "0"], "argument --start: must be two numbers A,B"),
    (["selfnorm", "selu", "--start", "0,-1"], "start[1] must be > 0, got -1.0"),
    (["selfnorm", "relu", "--keep-rate", "0.9"], "for relu give --alpha-prime"),
    (["selfnorm", "selu", "--keep-rate", "1.5"], "keep_rate must be in (0, 1], got 1.5"),
    (["selfnorm", "selu", "--alpha-prime", "1"],
     "--alpha-prime, --mean and --variance need --keep-rate"),
    (["isometry", "tanh"], "the following arguments are required: --depth"),
    (["isometry", "tanh", "--depth", "5", "--q-star", "0"], "q_star must be > 0, got 0.0"),
    (["isometry", "tanh", "--depth", "5", "--q-range", "2,1"],
     "q_range must be (lo, hi) with lo < hi"),
    (["isometry", "tanh", "--depth", "5", "--max-variance", "-1"],
     "max_variance must be >= 0, got -1.0"),
    (["softmax", "10"], "give --logit-variance (the initial loss), --margin"),
    (["softmax", "1", "--logit-variance", "1"], "n_classes must be an integer >= 2, got 1"),
    (["softmax", "10", "--logit-variance", "-1"], "logit_variance must be >= 0, got -1.0"),
    (["softmax", "10", "--logit-variance", "1e5"], "logit_variance must be <= 10000"),
    (["softmax", "10", "--logit-variance", "1", "--fan-in", "5"], "need --margin"),
    (["softmax", "10", "--margin", "-1"], "margin must be > 0, got -1.0"),
    (["softmax", "10", "--logit-variance", "1", "--samples", "10000000"],
     "n_samples must be <= 5000000 for 10 classes"),
    (["simulate", "tanh", "-w", "1", "--width", "1", "--depth", "3"],
     "--width must be in [2, 4096], got 1"),
    (["simulate", "tanh", "-w", "1", "--width", "8", "--depth", "5000"],
     "--depth must be in [1, 1000], got 5000"),
    (["simulate", "tanh", "-w", "1", "--width", "8", "--depth", "3", "--repetitions", "1"],
     "--repetitions must be in [2, 1000], got 1"),
    (["simulate", "tanh", "-w", "1", "--width", "8", "--depth", "3", "--pairs", "0"],
     "--pairs must be in [1, 256], got 0"),
    (["simulate", "tanh", "-w", "1", "--width", "4096", "--depth", "100"],
     ("width^2 x depth x repetitions must be <= 5e+08 (about 10 s of one core), got 1.34e+10; "
      "at depth 100 with 8 repetitions use --width <= 790")),
    (["simulate", "tanh", "-w", "1", "--width", "8", "--depth", "3", "--c0", "2"],
     "c0 must be in [-1, 1], got 2.0"),
    (["simulate", "tanhh", "-w", "1", "--width", "8", "--depth", "3"],
     "unknown activation 'tanhh'"),
]


@pytest.mark.parametrize("argv,needle", USAGE_ERRORS, ids=[" ".join(a) for a, _ in USAGE_ERRORS])
def test_usage_errors_exit_2_with_one_line(argv, needle):
    code, out, err = run(*argv)
    assert code == 2, err
    assert out == ""
    assert err.endswith("\n") and err.count("\n") == 1, err
    assert err.startswith("propcalc: error: ")
    assert needle in err


COMPUTATION_FAILURES = [
    # step jumps: phi' has a Dirac mass, the spectrum moments are infinite
    (["isometry", "step", "--depth", "3"], "no Jacobian spectrum"),
    # step jumps: its mean-field chi_1 is infinite, nothing to compare
    (["simulate", "step", "-w", "1", "--width", "8", "--depth", "3"], "step jumps"),
    # the variance explodes: the mean-field prediction leaves (0, 1e12]
    (["simulate", "relu", "-w", "100", "--width", "8", "--depth", "20"], "the network explodes"),
    # a bias variance above the logit variance the margin allows
    (["softmax", "10", "--margin", "0.01", "-b", "5"], "lower the last layer's bias variance"),
]


@pytest.mark.parametrize("argv,needle", COMPUTATION_FAILURES,
                         ids=[" ".join(a) for a, _ in COMPUTATION_FAILURES])
def test_computation_failures_exit_1_with_one_line(argv, needle):
    code, out, err = run(*argv)
    assert code == 1, err
    assert out == ""
    assert err.count("\n") == 1 and err.startswith("propcalc: computation failed: ")
    assert needle in err


@pytest.mark.parametrize("command", ["dropout", "maxout", "selfnorm", "isometry", "softmax",
                                     "simulate"])
def test_help(command, capsys):
    # the help goes to the given stream and main returns 0 (see test_cli.py)
    out = io.StringIO()
    assert cli.main([command, "-h"], out=out, err=io.StringIO()) == 0
    assert capsys.readouterr().out == ""
    text = out.getvalue()
    assert text.startswith(f"usage: propcalc {command}") and "--json" in text


def test_module_docstring_lists_every_subcommand():
    parser = cli.build_parser()
    sub = next(a for a in parser._actions if a.dest == "command")
    for name in sub.choices:
        assert f"propcalc {name}" in cli.__doc__, name


# ---------------------------------------------------------------------------------------------
# engine problems seen from the command line (see the report)
# ---------------------------------------------------------------------------------------------
def test_dropout_step_with_a_dominant_bias_is_reported_not_raised():
    code, _, err = run("dropout", "step", "-w", "1e-5", "-b", "1e4", "--keep-rate", "1")
    assert code in (0, 1) and err.count("\n") <= 1


def test_selfnorm_linear_root_finder_is_warning_free():
    code, _, err = run("selfnorm", "linear", "--omega", "1", "--tau", "1.5")
    assert code == 0 and err == ""
