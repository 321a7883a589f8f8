"""``propcalc network FILE``: the per-position table, the summary, the plan, --json, --plot.

The command is driven in-process (tests/cli_helpers.py). References: the Python API
(network_propagation, network_plan: the CLI must print the same numbers), and closed forms
for a plain ReLU stack at sigma_w2 = 2, sigma_b2 = 0: q is kept (He et al. 2015) and the
correlation follows the arc-cosine kernel of degree 1 (Cho & Saul 2009), normalised:
C(c) = (sqrt(1 - c^2) + (pi - arccos c) c) / pi. Errors are one line on stderr with exit
status 2 and no traceback.
"""

from __future__ import annotations

import io
import json
import math
import sys
from pathlib import Path

import numpy as np
import pytest

import propcalc
from propcalc.cli.commands import network as network_command
from cli_helpers import run, strict_json

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "demo" / "networks" / "otter-residual-mlp.json"
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # ISO/IEC 15948:2004, section 5.2


def relu_stack(times: int) -> dict:
    return {"blocks": [{"repeat": {"times": times, "blocks": [
        {"dense": {"sigma_w2": 2.0, "sigma_b2": 0.0}}, {"activation": "relu"}]}}]}


def arccos_map(c: float) -> float:
    """Normalised degree-1 arc-cosine kernel (Cho & Saul 2009): ReLU at sigma_w2 = 2."""
    return (math.sqrt(1.0 - c * c) + (math.pi - math.acos(c)) * c) / math.pi


def write(tmp_path: Path, obj, name: str = "net.json") -> str:
    path = tmp_path / name
    path.write_text(obj if isinstance(obj, str) else json.dumps(obj))
    return str(path)


def table_rows(text: str) -> dict[int, list[str]]:
    """Rows of the per-position table, by position (cells split on two or more spaces)."""
    import re

    lines = text.splitlines()
    start = next(i for i, ln in enumerate(lines) if ln.startswith("position  block"))
    rows = {}
    for ln in lines[start + 2:]:
        if not ln.strip() or not ln[0].isdigit():
            break
        cells = re.split(r"\s{2,}", ln.strip())
        rows[int(cells[0])] = cells
    return rows


def test_demo_table_agrees_with_the_api():
    code, out, err = run("network", str(DEMO), "--no-plan")
    assert code == 0, err
    r = propcalc.network_propagation(json.loads(DEMO.read_text()))
    rows = table_rows(out)
    assert sorted(rows) == list(range(len(r.q)))
    for i, cells in rows.items():
        q, c, g = (float(x) for x in cells[3:6])
        np.testing.assert_allclose([q, c, g], [r.q[i], r.c[i], r.gradient[i]], rtol=1e-5)
    for f in r.summary.findings:
        assert f.message in out
    verdict = propcalc.network_verdict(r)
    assert f"verdict: {verdict.summary}" in out
    for reason in verdict.reasons:
        assert reason.name in out
    assert "plan:" not in out


def test_plain_relu_against_the_arccos_kernel(tmp_path):
    code, out, err = run("network", write(tmp_path, relu_stack(10)), "--json", "--c0", "0.3")
    assert code == 0, err
    doc = strict_json(out)
    prop = doc["propagation"]
    c = 0.3
    expected = [c]
    for _ in range(10):
        expected += [c, arccos_map(c)]  # the dense block keeps c; relu applies the kernel
        c = expected[-1]
    np.testing.assert_allclose(prop["c"], expected, rtol=0, atol=1e-12)
    np.testing.assert_allclose(prop["q"][::2], [1.0] * 11, rtol=1e-12)  # He et al. 2015


def test_json_is_the_results_dict_forms(tmp_path):
    desc = json.loads(DEMO.read_text())
    code, out, err = run("network", str(DEMO), "--json", "--q0", "2", "--c0", "0.1",
                         "--target", "0.9")
    assert code == 0, err
    doc = strict_json(out)
    r = propcalc.network_propagation(desc, 2.0, 0.1)
    plan = propcalc.network_plan(desc, q0=2.0, c0=0.1, target=0.9)
    assert doc["propagation"] == json.loads(json.dumps(propcalc.jsonable(r.to_dict())))
    assert doc["plan"] == json.loads(json.dumps(propcalc.jsonable(plan.to_dict())))
    assert doc["plan_error"] is None
    verdict = propcalc.network_verdict(r)
    assert doc["verdict"] == json.loads(json.dumps(propcalc.jsonable(verdict.to_dict())))
    assert doc["plan"]["branch_weight"]["weight"] == pytest.approx(plan.branch_weight.weight,
                                                                    rel=1e-12)


def test_plan_text_agrees_with_network_plan():
    code, out, err = run("network", str(DEMO), "--target", "0.9")
    assert code == 0, err
    plan = propcalc.network_plan(json.loads(DEMO.read_text()), target=0.9)
    section = out.split("\nplan:\n", 1)[1]
    for b in plan.blocks:
        assert b.path in section
    line = next(ln for ln in section.splitlines() if ln.startswith("residual branch weight"))
    assert float(line.split()[-1]) == pytest.approx(plan.branch_weight.weight, rel=1e-5)
    assert plan.branch_weight.message in section


def test_nothing_flagged_states_the_thresholds(tmp_path):
    code, out, err = run("network", write(tmp_path, relu_stack(3)), "--no-plan")
    assert code == 0, err
    assert propcalc.network_propagation(relu_stack(3)).summary.findings == ()
    assert "- nothing flagged (thresholds: inputs merge at 1 - c <= 0.001" in out


def test_reads_stdin(monkeypatch):
    monkeypatch.setattr(sys, "stdin", io.StringIO(json.dumps(relu_stack(3))))
    code, out, err = run("network", "-", "--json", "--no-plan")
    assert code == 0, err
    assert strict_json(out)["propagation"]["q"][-1] == pytest.approx(1.0, rel=1e-12)


def test_simulated_positions_show_their_band(tmp_path):
    post = {"blocks": [{"dense": {"sigma_w2": 1.0, "sigma_b2": 0.0}},
                       {"repeat": {"times": 3, "blocks": [
                           {"residual": {"branch": [{"dense": {"sigma_w2": 2.0,
                                                                "sigma_b2": 0.0}}]}},
                           {"activation": "relu"}]}}]}
    code, out, err = run("network", write(tmp_path, post), "--no-plan")
    assert code == 0, err
    r = propcalc.network_propagation(post)
    first = r.gaussian_positions + 1
    rows = table_rows(out)
    assert rows[first][6] == "simulation" and "+-" in rows[first][3]
    assert "not Gaussian from here" in rows[first][-1]
    assert r.notes[0] in out


def test_positions_without_numbers_say_so(tmp_path):
    # max pooling: the maximum of correlated units is not Gaussian; a 1-D pooling window after
    # 2-D convolutions fits no simulated grid, so those positions have no number
    conv = {"convolution": {"sigma_w2": 2.0, "sigma_b2": 0.0, "kernel": [3, 3]}}
    desc = {"blocks": [conv, {"activation": "relu"}, {"pooling": {"kind": "max", "window": 2}},
                       conv, {"activation": "relu"}]}
    code, out, err = run("network", write(tmp_path, desc))
    assert code == 0, err
    rows = table_rows(out)
    assert rows[2][6] == "mean field" and rows[3][6] == "no number" and rows[3][3] == "-"
    assert "nan" not in out and "the pooling window has 1 spatial dimensions" in out


def test_max_pooling_after_2d_convolutions_is_simulated(tmp_path):
    # the simulation's grid fits the 2-D kernels and windows (propcalc.networks.sim_grid)
    conv = {"convolution": {"sigma_w2": 2.0, "sigma_b2": 0.0, "kernel": [3, 3], "width": 32}}
    desc = {"input_width": 8, "blocks": [conv, {"activation": "relu"},
                                         {"pooling": {"kind": "max", "window": [2, 2]}},
                                         conv, {"activation": "relu"}]}
    code, out, err = run("network", write(tmp_path, desc), "--no-plan")
    assert code == 0, err
    rows = table_rows(out)
    assert rows[2][6] == "mean field"
    assert all(rows[i][6] == "simulation" and "+-" in rows[i][3] for i in (3, 4, 5))
    assert "no number" not in out and "nan" not in out


def test_long_tables_are_thinned_but_keep_flagged_positions(tmp_path):
    desc = {"blocks": [{"repeat": {"times": 100, "blocks": [
        {"dense": {"sigma_w2": 1.5, "sigma_b2": 0.05}}, {"activation": "tanh"}]}}]}
    path = write(tmp_path, desc)
    code, out, err = run("network", path, "--c0", "0.5", "--no-plan", "--rows", "20")
    assert code == 0, err
    r = propcalc.network_propagation(desc, c0=0.5)
    rows = table_rows(out)
    assert 20 <= len(rows) <= 25 and 0 in rows and 200 in rows
    assert r.summary.indistinguishable_at in rows
    assert "inputs merge" in rows[r.summary.indistinguishable_at][-1]
    assert "--rows all" in out
    code, out, err = run("network", path, "--c0", "0.5", "--no-plan", "--rows", "all")
    assert len(table_rows(out)) == 201


def test_plot_png_deterministic(tmp_path):
    pytest.importorskip("matplotlib")
    a, b = tmp_path / "a.png", tmp_path / "b.png"
    for target in (a, b):
        code, out, err = run("network", str(DEMO), "--no-plan", "--plot", str(target))
        assert code == 0, err
        assert f"to {target}" in out
    assert a.read_bytes().startswith(PNG_SIGNATURE)
    assert a.read_bytes() == b.read_bytes()


def test_plot_with_json_keeps_stdout_json(tmp_path):
    pytest.importorskip("matplotlib")
    target = tmp_path / "n.svg"
    code, out, err = run("network", str(DEMO), "--no-plan", "--json", "--plot", str(target))
    assert code == 0, err
    strict_json(out)
    assert f"to {target}" in err and target.read_bytes().lstrip().startswith(b"<?xml")


BAD_BLOCK = {"blocks": [{"dense": {"sigma_w2": 2.0, "sigma_b2": 0.0}},
                        {"repeat": {"times": 3, "blocks": [
                            {"dense": {"sigma_w2": -1.0, "sigma_b2": 0.0}}]}}]}


@pytest.mark.parametrize("content, needle", [
    (BAD_BLOCK, "/blocks/1/repeat/blocks/0/dense/sigma_w2 must be > 0, got -1"),
    ({"blocks": [{"dense": {"sigma_w2": 2.0, "sigma_b2": 0.0}}, {"convolve": {}}]}, "/blocks/1"),
    ({"layers": []}, "/layers"),
    ([1, 2], "blocks"),
    ('{"blocks": [', "not valid JSON: Expecting value at line 1 column 13"),
    ('{"blocks": [{"dense": {"sigma_w2": NaN, "sigma_b2": 0}}]}', "NaN is not a JSON number"),
    ("", "empty"),
    ("[" * 200_000, "nested too deeply"),
])
def test_bad_files_are_one_line_errors(tmp_path, content, needle):
    path = write(tmp_path, content)
    code, out, err = run("network", path)
    assert code == 2
    assert out == ""
    assert err.startswith("propcalc: error: ") and err.count("\n") == 1, err
    assert needle in err and path in err
    assert "Traceback" not in err


def test_missing_file_directory_and_binary(tmp_path):
    code, _, err = run("network", str(tmp_path / "absent.json"))
    assert code == 2 and "absent.json: no such file" in err
    code, _, err = run("network", str(tmp_path))
    assert code == 2 and "is a directory" in err
    path = tmp_path / "bin.json"
    path.write_bytes(b"\xff\xfe\x00{")
    code, _, err = run("network", str(path))
    assert code == 2 and "not UTF-8" in err


def test_oversized_file_is_refused_before_parsing(tmp_path, monkeypatch):
    monkeypatch.setattr(network_command, "MAX_FILE_BYTES", 64)
    path = write(tmp_path, relu_stack(30))
    code, _, err = run("network", path)
    assert code == 2 and "larger than" in err


@pytest.mark.parametrize("argv, needle", [
    (["--c0", "2"], "c0 must be in [-1, 1], got 2"),
    (["--q0", "-1"], "q0 must be > 0"),
    (["--rows", "1"], "--rows: must be 'all' or an integer >= 2"),
    (["--seed", "-1"], "--seed: must be an integer >= 0, got '-1'"),
    (["--q0", "nan"], "must be finite"),
    (["--plot", "out.gif"], "--plot FILE must end in .png or .svg"),
])
def test_bad_options(tmp_path, argv, needle):
    code, out, err = run("network", write(tmp_path, relu_stack(2)), *argv)
    assert code == 2 and needle in err and "Traceback" not in err


def test_check_against_seeded_networks():
    desc = json.loads(DEMO.read_text())
    code, out, err = run("network", str(DEMO), "--no-plan", "--check", "--json",
                         "--repetitions", "6", "--seed", "5")
    assert code == 0, err
    doc = strict_json(out)
    sim = propcalc.simulate(desc, c0=0.0, repetitions=6, seed=5)
    assert doc["check"] == json.loads(json.dumps(propcalc.jsonable(sim.to_dict())))
    # the mean-field prediction lies in the measured band (seeded numpy networks, widths 256
    # as described; mean +- 2 SE widened by the 5% tolerance) at all but a few of the 36
    # positions (each of q, c and the gradient has about a 5% chance to fall out at 2 SE)
    assert len(doc["check"]["mismatches"]) <= 2
    code, out, err = run("network", str(DEMO), "--no-plan", "--check", "--repetitions", "6",
                         "--seed", "5")
    assert code == 0, err
    assert "finite-width check (6 seeded networks" in out
    assert ("every prediction lies in its band" in out) == (not sim.mismatches)


@pytest.mark.parametrize("argv, needle", [
    (["--grid", "4"], "--grid only shape the finite-width check: give --check too"),
    (["--repetitions", "3"], "--repetitions only shape the finite-width check"),
    (["--width", "1"], "--width must be an integer >= 2, got 1"),
    (["--check", "--width", "1000000"], "at most 2e+10 multiply-adds"),
    (["--check", "--repetitions", "1"], "repetitions must be an integer >= 2, got 1"),
])
def test_check_errors(tmp_path, argv, needle):
    code, out, err = run("network", write(tmp_path, relu_stack(2)), "--no-plan", *argv)
    assert code == 2 and out == "" and needle in err and "Traceback" not in err


def test_help_lists_the_command():
    code, out, _ = run("--help")
    assert code == 0 and "network" in out and "shape" in out


NORMED = {"input_width": 16, "blocks": [
    {"dense": {"sigma_w2": 1.0, "sigma_b2": 0.0, "width": 64}},
    {"repeat": {"times": 3, "blocks": [{"residual": {"weight": 0.5, "branch": [
        {"norm": "layer"}, {"dense": {"sigma_w2": 2.0, "sigma_b2": 0.0, "width": 64}},
        {"activation": "relu"}, {"dense": {"sigma_w2": 1.0, "sigma_b2": 0.0, "width": 64}}]}}]}},
    {"norm": "rms"}, {"dense": {"sigma_w2": 1.0, "sigma_b2": 0.0, "width": 10}}]}


def test_loss_gives_the_verdict_its_learning_rate_ceiling(tmp_path):
    # the reference is the Python API: the ceiling of network_learning_rate_ceiling (itself
    # checked against seeded torch kernels in tests/test_network_ntk_blocks.py)
    from propcalc.training import network_learning_rate_ceiling
    path = write(tmp_path, NORMED)
    code, out, err = run("network", path, "--json", "--no-plan", "--c0", "0.2", "--loss",
                         "cross_entropy", "--batch-size", "32")
    assert code == 0, err
    ref = network_learning_rate_ceiling(NORMED, loss="cross_entropy", batch_size=32,
                                        input_correlation=0.2)
    lr = next(r for r in strict_json(out)["verdict"]["reasons"] if r["name"] == "learning rate")
    assert lr["value"] == pytest.approx(ref.learning_rate_ceiling, rel=1e-12)
    code, out, err = run("network", path, "--no-plan", "--c0", "0.2", "--loss", "mse",
                         "--batch-size", "32")
    assert code == 0, err
    assert "keep the learning rate below" in out


def test_a_network_the_kernel_does_not_cover_says_why(tmp_path):
    desc = {"input_width": 16, "blocks": [
        {"dense": {"sigma_w2": 1.0, "sigma_b2": 0.0, "width": 32}}, {"activation": "tanh"},
        {"attention": {"tokens": 4, "query_key_scale": 20.0}},  # beyond the checked spread
        {"pooling": {"kind": "global_average", "positions": 4}},
        {"dense": {"sigma_w2": 1.0, "sigma_b2": 0.0, "width": 3}}]}
    code, out, err = run("network", write(tmp_path, desc), "--json", "--no-plan", "--loss", "mse",
                         "--batch-size", "8", "--c0-within", "0.2")
    assert code == 0, err
    lr = next(r for r in strict_json(out)["verdict"]["reasons"] if r["name"] == "learning rate")
    assert lr["value"] is None and "query-key logits spread" in lr["detail"]


@pytest.mark.parametrize("args,needle", [
    (["--batch-size", "8"], "--batch-size only matter with a loss"),
    (["--loss", "mse"], "--loss needs --batch-size"),
])
def test_loss_options_are_checked(tmp_path, args, needle):
    code, out, err = run("network", write(tmp_path, NORMED), "--no-plan", *args)
    assert code == 2 and needle in err

def test_the_verdict_has_finite_width_numbers_for_a_residual_network(tmp_path):
    # issue 15 part 4: the finite-width reasons of a post-norm residual stack at width 16, the
    # numbers of propcalc.training.network_finite_width (checked against seeded numpy networks
    # in tests/test_network_finite_width_blocks.py)
    from propcalc.training import network_finite_width

    n = 16
    desc = {"input_width": n, "blocks": [
        {"dense": {"sigma_w2": 1.0, "sigma_b2": 0.0, "width": n}},
        {"repeat": {"times": 64, "blocks": [
            {"residual": {"branch": [{"dense": {"sigma_w2": 2.0, "sigma_b2": 0.0, "width": n}},
                                     {"activation": "relu"},
                                     {"dense": {"sigma_w2": 1.0, "sigma_b2": 0.0, "width": n}}]}},
            {"norm": "rms"}]}},
        {"dense": {"sigma_w2": 1.0, "sigma_b2": 0.0, "width": n}}]}
    fw = network_finite_width(desc)
    path = write(tmp_path, desc)
    code, out, err = run("network", path, "--no-plan")
    assert code == 0, err
    line = next(ln for ln in out.splitlines() if ln.startswith("finite-width gradient spread"))
    assert "FAIL" in line and f"{fw.gradient_spread:g}" in line
    assert f"widen the hidden layers to about {fw.width_needed} units" in line
    code, out, err = run("network", path, "--no-plan", "--json")
    assert code == 0, err
    reasons = {r["name"]: r for r in strict_json(out)["verdict"]["reasons"]}
    assert reasons["finite-width gradient spread"]["value"] == fw.gradient_spread
    assert reasons["finite-width spread"]["value"] == fw.top_log_sd == 0.0  # the RMS norm: q = 1
    assert reasons["finite-width drift"]["passes"] is fw.drift_ok


TOKENS = {"input_width": 16, "blocks": [
    {"dense": {"sigma_w2": 1.0, "sigma_b2": 0.0, "width": 32}}, {"activation": "tanh"},
    {"residual": {"weight": 0.5, "branch": [{"norm": "layer"}, {"attention": {
        "tokens": 4, "width": 32, "query_key_scale": 0.0}}]}},
    {"pooling": {"kind": "global_average", "positions": 4}},
    {"dense": {"sigma_w2": 1.0, "sigma_b2": 0.0, "width": 4}}]}


def test_the_plan_carries_its_learning_rate_at_the_position_correlations(tmp_path):
    # the reference is the Python API: network_plan at the same inputs, whose ceiling is
    # network_learning_rate_ceiling's (tests/test_network_plan.py)
    code, out, err = run("network", write(tmp_path, TOKENS), "--json", "--c0", "0.3",
                         "--c0-within", "0.4", "--c0-between", "0.1", "--loss", "mse",
                         "--batch-size", "16")
    assert code == 0, err
    ref = propcalc.network_plan(TOKENS, c0=0.3, c0_within=0.4, c0_between=0.1, loss="mse",
                                batch_size=16)
    plan = strict_json(out)["plan"]
    assert plan["learning_rate_ceiling"] == pytest.approx(ref.learning_rate_ceiling, rel=1e-12)
    assert plan["learning_rate"] == pytest.approx(ref.learning_rate, rel=1e-12)
    assert plan["learning_rate_note"] is None
    code, out, err = run("network", write(tmp_path, TOKENS), "--c0", "0.3", "--c0-within", "0.4",
                         "--c0-between", "0.1", "--loss", "mse", "--batch-size", "16")
    assert code == 0, err
    assert "planned: learning-rate ceiling" in out and "note: learning rate: ceiling" in out


def test_a_plan_whose_kernel_is_refused_says_why_and_stays(tmp_path):
    desc = json.loads(json.dumps(TOKENS))
    desc["blocks"][2]["residual"]["branch"][1]["attention"]["query_key_scale"] = 30.0  # logit std beyond 2
    path = write(tmp_path, desc)
    args = ("--c0-within", "0.4", "--target", "0.9", "--loss", "mse", "--batch-size", "16")
    code, out, err = run("network", path, "--json", *args)
    assert code == 0, err
    body = strict_json(out)
    assert body["plan_error"] is None and body["plan"]["blocks"]
    assert body["plan"]["learning_rate_ceiling"] is None and body["plan"]["learning_rate"] is None
    assert ("block /blocks/2/residual/branch/1 (attention): the query-key logits spread"
            in body["plan"]["learning_rate_note"])
    code, out, err = run("network", path, *args)
    assert code == 0, err
    assert "not computed (note below)" in out
    assert "note: learning rate not computed: the tangent kernel is not computed" in out
    assert "residual branch weight" in out


READOUT = {"input_width": 16, "blocks": [
    {"dense": {"sigma_w2": 1.0, "sigma_b2": 0.0, "width": 32}}, {"activation": "tanh"},
    {"dense": {"sigma_w2": 1.0, "sigma_b2": 0.0, "width": 4}}]}


def test_the_plan_shows_its_readout_scaled_for_the_loss(tmp_path):
    # the reference is the Python API, whose readout is checked by seeded torch sampling and
    # Poole et al. 2016, eq. 3 (tests/test_network_plan_readout.py)
    path = write(tmp_path, READOUT)
    code, out, err = run("network", path, "--json", "--loss", "cross_entropy",
                         "--batch-size", "8")
    assert code == 0, err
    ref = propcalc.network_plan(READOUT, loss="cross_entropy", batch_size=8)
    plan = strict_json(out)["plan"]
    assert plan["output_layer"] == ref.output_layer
    assert plan["blocks"][-1]["sigma_w2"] == pytest.approx(ref.blocks[-1].sigma_w2, rel=1e-12)
    code, out, err = run("network", path, "--loss", "mse", "--batch-size", "8")
    assert code == 0, err
    assert "planned: output layer" in out and "scaled for MSE: sigma_w2 = " in out
    code, out, err = run("network", path, "--loss", "mse", "--batch-size", "8",
                         "--no-scale-output")
    assert code == 0, err
    assert "as the hidden layers (scale_output=False)" in out
    code, out, err = run("network", path, "--no-scale-output")
    assert code == 2 and "--no-scale-output only matter with a loss" in err
    code, out, err = run("network", path, "--loss", "mse", "--batch-size", "8", "--no-plan",
                         "--no-scale-output")
    assert code == 2 and "--no-scale-output only shapes the plan" in err
