"""``propcalc shape ACT --depth L``: kernel shaping from the command line.

The command is driven in-process (tests/cli_helpers.py). References: the Python API
(shape_activation: the CLI prints the same numbers); for the leaky slope form the closed-form
map of Zhang et al. 2022, C(c) = c + k (sqrt(1 - c^2) - c arccos c) with
k = (1 - a)^2 / (pi (1 + a^2)), composed L times from c = 0 (it must give the target); for
deep kernel shaping of tanh, the per-layer slope C'(1) = E[phi_hat'(z)^2] (Schoenholz et al.
2017, eq. 8) by scipy.integrate.quad, raised to the power L, must give zeta (Martens et al.
2021). Errors are one line on stderr with exit status 2 and no traceback.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from scipy import integrate

import propcalc
from cli_helpers import run, strict_json

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # ISO/IEC 15948:2004, section 5.2


def pairs(text: str) -> dict[str, str]:
    """The key-value lines before the first blank line (keys and values split on 2+ spaces)."""
    import re

    out = {}
    for ln in text.split("\n\n", 1)[0].splitlines():
        key, value = re.split(r"\s{2,}", ln.strip(), maxsplit=1)
        out[key] = value
    return out


def test_relu_tat_text_agrees_with_api_and_closed_form():
    code, out, err = run("shape", "relu", "--depth", "100", "--target", "0.9")
    assert code == 0, err
    s = propcalc.shape_activation("relu", 100, target=0.9)
    p = pairs(out)
    slope = float(p["slope"])
    assert slope == pytest.approx(s.params["slope"], rel=1e-5)
    assert float(p["achieved C_L(0)"]) == pytest.approx(s.network_map_at_0, rel=1e-6)
    assert float(p["achieved C_L'(1)"]) == pytest.approx(1.0, rel=1e-12)
    # Zhang et al. 2022: the closed-form map composed 100 times takes c = 0 to the target
    a = s.params["slope"]
    k = (1 - a) ** 2 / (math.pi * (1 + a * a))
    c = 0.0
    for _ in range(100):
        c = c + k * (math.sqrt(1 - c * c) - c * math.acos(c))
    assert c == pytest.approx(0.9, abs=1e-12)
    assert "sigma_w2 = 1, sigma_b2 = 0" in p["use with"]
    assert s.depth_verdict.text in out
    assert "residual equivalent" in out
    assert f"C_L(0) = {s.reference.network_map_at_0:.6g}" in p["before shaping"]


def test_tanh_dks_json_and_scipy_slope():
    code, out, err = run("shape", "tanh", "--depth", "100", "--method", "dks", "--target",
                         "1.5", "--json")
    assert code == 0, err
    doc = strict_json(out)
    s = propcalc.shape_activation("tanh", 100, target=1.5, method="dks")
    assert doc == json.loads(json.dumps(propcalc.jsonable(s.to_dict())))
    alpha, beta, gamma = (doc["params"][k] for k in ("alpha", "beta", "gamma"))

    def integrand(z: float) -> float:  # phi_hat'(z)^2 times the Gaussian density
        d = gamma * alpha / math.cosh(alpha * z + beta) ** 2
        return d * d * math.exp(-z * z / 2) / math.sqrt(2 * math.pi)

    slope, _ = integrate.quad(integrand, -np.inf, np.inf, epsabs=1e-14, epsrel=1e-13)
    assert slope ** 100 == pytest.approx(1.5, rel=1e-8)  # Martens et al. 2021: C_L'(1) = zeta
    assert all(c["deviation"] <= 1e-10 for c in doc["conditions"])
    assert len(doc["roots"]) >= 2 and sum(r["chosen"] for r in doc["roots"]) == 1


def test_tanh_dks_text_lists_every_root():
    code, out, err = run("shape", "tanh", "--depth", "100", "--method", "dks")
    assert code == 0, err
    s = propcalc.shape_activation("tanh", 100, method="dks")
    assert f"roots ({len(s.roots)};" in out
    for key in ("alpha", "beta", "gamma", "delta"):
        assert float(pairs(out)[key]) == pytest.approx(s.params[key], rel=1e-5)
    assert "chosen" in out and s.choice_rule in out


def test_formula_with_param():
    code, out, err = run("shape", "x * tanh(softplus(k * x))", "--param", "k=1", "--depth",
                         "50", "--json")
    assert code == 0, err
    doc = strict_json(out)
    s = propcalc.shape_activation(propcalc.activation("x * tanh(softplus(k * x))", k=1.0), 50)
    assert doc["params"] == pytest.approx(dict(s.params), rel=1e-12)
    assert doc["network_map_at_0"] == pytest.approx(0.9, abs=1e-8)


def test_plot_png_deterministic(tmp_path):
    pytest.importorskip("matplotlib")
    a, b = tmp_path / "a.png", tmp_path / "b.png"
    for target in (a, b):
        code, out, err = run("shape", "relu", "--depth", "30", "--target", "0.8", "--plot",
                             str(target))
        assert code == 0, err
        assert f"to {target}" in out
    assert a.read_bytes().startswith(PNG_SIGNATURE) and a.read_bytes() == b.read_bytes()


def test_plot_with_json_keeps_stdout_json(tmp_path):
    pytest.importorskip("matplotlib")
    target = tmp_path / "s.svg"
    code, out, err = run("shape", "relu", "--depth", "30", "--json", "--plot", str(target))
    assert code == 0, err
    strict_json(out)
    assert f"to {target}" in err


@pytest.mark.parametrize("argv, needle", [
    (["relu", "--depth", "3"], "13 layers reach it"),
    (["relu", "--depth", "100", "--target", "1.5"], "target must be in (0, 1) for method 'tat'"),
    (["tanh", "--depth", "100", "--method", "dks", "--target", "0.5"], "target must be in (1,"),
    (["relu", "--depth", "0"], "depth must be"),
    (["relu"], "--depth"),
    (["relu", "--depth", "10", "--method", "kernel"], "invalid choice: 'kernel'"),
    (["step", "--depth", "10"], "without jumps"),
    (["relu", "--depth", "10", "--target", "inf"], "must be finite"),
    (["nosuchact", "--depth", "10"], "nosuchact"),
    (["relu", "--depth", "10", "--plot", "x.jpg"], "--plot FILE must end in .png or .svg"),
])
def test_errors_exit_2_with_one_line(argv, needle):
    code, out, err = run("shape", *argv)
    assert code == 2, (out, err)
    assert out == ""
    assert err.startswith("propcalc: error: ") and err.count("\n") == 1, err
    assert needle in err and "Traceback" not in err


def test_negative_slope_on_request():
    # depth 3: slopes in [0, 1) reach C_L(0) = 0.6048 at most, negative ones 0.8374
    code, out, err = run("shape", "relu", "--depth", "3", "--target", "0.7",
                         "--allow-negative-slope", "--json")
    assert code == 0, err
    doc = strict_json(out)
    s = propcalc.shape_activation("relu", 3, target=0.7, allow_negative_slope=True)
    assert doc["params"]["slope"] == pytest.approx(s.params["slope"], rel=1e-12)
    assert doc["params"]["slope"] < 0


def test_the_shaped_network_description_through_propcalc_network(monkeypatch):
    # the shaped plain network, described in blocks, analysed by the network command: its
    # output correlation for inputs at c0 = 0 is the target C_L(0) (Zhang et al. 2022)
    import io
    import sys

    code, out, err = run("shape", "relu", "--depth", "20", "--target", "0.8", "--json")
    assert code == 0, err
    desc = strict_json(out)["network_description"]
    monkeypatch.setattr(sys, "stdin", io.StringIO(json.dumps(desc)))
    code, out, err = run("network", "-", "--json", "--no-plan")
    assert code == 0, err
    prop = strict_json(out)["propagation"]
    assert prop["c"][-1] == pytest.approx(0.8, abs=1e-10)
    assert prop["q"][-1] == pytest.approx(1.0, rel=1e-10)


def test_deep_pictures_sample_c0_more_coarsely(tmp_path, monkeypatch):
    pytest.importorskip("matplotlib")
    from propcalc.output import shaping_plot

    seen = {}
    real = shaping_plot.plot_shaping

    def spy(shaped, **kwargs):
        seen.update(kwargs)
        return real(shaped, **kwargs)

    monkeypatch.setattr(shaping_plot, "plot_shaping", spy)
    code, out, err = run("shape", "relu", "--depth", "2000", "--plot", str(tmp_path / "d.png"))
    assert code == 0, err
    assert seen == {"n_points": 50}  # 101 samples up to 1000 layers, 101000 / depth beyond
    code, out, err = run("shape", "relu", "--depth", "40", "--plot", str(tmp_path / "s.png"))
    assert code == 0, err
    assert seen == {"n_points": 101}
