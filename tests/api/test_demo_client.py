"""The demo config generator (demo/config_client.py), end to end."""

from __future__ import annotations

import importlib.util
import io
import json
import subprocess
import sys
from pathlib import Path

import pytest

import propcalc
from propcalc import jsonable

DEMO = Path(__file__).resolve().parents[2] / "demo"


@pytest.fixture(scope="module")
def client_module():
    spec = importlib.util.spec_from_file_location("config_client", DEMO / "config_client.py")
    module = importlib.util.module_from_spec(spec)
    assert spec.loader is not None
    spec.loader.exec_module(module)
    return module


def _layers(network):
    out = []
    for d in network.get("layers", []):
        if d["kind"] == "dense":
            out.append(propcalc.Layer.dense(d["in_features"], d["out_features"]))
        else:
            out.append(propcalc.Layer.conv(d["in_channels"], d["out_channels"],
                                           tuple(d["kernel_size"])))
    return out or None


def _expected_plan(config):
    act = config["activation"]
    if isinstance(act, str):
        act = propcalc.activation(act)
    else:
        act = propcalc.activation(act.get("formula", act.get("name")), **act.get("params", {}))
    net, init = config["network"], config.get("init", {})
    return propcalc.recommend(act, net.get("depth"), widths=net.get("widths"),
                              layers=_layers(net), **init).to_dict()


def test_plans_written_against_live_server(client_module, live_server, tmp_path):
    out, err = io.StringIO(), io.StringIO()
    status = client_module.main(["--url", live_server.url, "--out", str(tmp_path / "plans")],
                                out=out, err=err)
    assert status == 0, err.getvalue()
    configs = sorted((DEMO / "configs").glob("*.json"))
    assert len(configs) >= 4
    for path in configs:
        config = json.loads(path.read_text())
        written = json.loads((tmp_path / "plans" / f"{config['model']}.json").read_text())
        assert written["model"] == config["model"] and written["config"] == path.name
        # the plan in the file is the Python API's plan for that config
        assert written["plan"] == jsonable(_expected_plan(config))
        assert config["model"] in out.getvalue()


def test_formula_config_matches_builtin_swish(tmp_path, client_module, live_server):
    # the typed swish of the demo equals the built-in swish(beta = 1.702)
    client_module.main(["--url", live_server.url, "--out", str(tmp_path)], out=io.StringIO(),
                       err=io.StringIO())
    typed = json.loads((tmp_path / "wren-swish-formula.json").read_text())["plan"]
    config = json.loads((DEMO / "configs" / "wren-swish-formula.json").read_text())
    builtin = propcalc.recommend(propcalc.activation("swish", beta=1.702),
                                 widths=config["network"]["widths"], distribution="uniform")
    assert abs(typed["sigma_w2"] - builtin.sigma_w2) <= 1e-9 * builtin.sigma_w2
    assert abs(typed["sigma_b2"] - builtin.sigma_b2) <= 1e-9 * max(builtin.sigma_b2, 1e-12)


def test_refused_config_reports_problem(client_module, live_server, tmp_path):
    configs = tmp_path / "configs"
    configs.mkdir()
    (configs / "bad.json").write_text(json.dumps({
        "model": "bad-owl", "activation": "tanh", "network": {"depth": 4},
        "init": {"distribution": "laplace"}}))
    err = io.StringIO()
    status = client_module.main(["--url", live_server.url, "--configs", str(configs),
                                 "--out", str(tmp_path / "plans")], out=io.StringIO(), err=err)
    assert status == 1
    assert "bad-owl" in err.getvalue() and "/distribution" in err.getvalue()
    assert not (tmp_path / "plans" / "bad-owl.json").exists()


def test_bad_config_file_is_a_usage_error(client_module, tmp_path):
    configs = tmp_path / "configs"
    configs.mkdir()
    (configs / "x.json").write_text('{"model": "x", "activation": "tanh"}')
    err = io.StringIO()
    status = client_module.main(["--url", "http://127.0.0.1:9", "--configs", str(configs)],
                                out=io.StringIO(), err=err)
    assert status == 2 and "missing 'network'" in err.getvalue()


def test_client_starts_its_own_service(tmp_path):
    # as a user runs it: no --url, so it starts `propcalc serve` itself and stops it afterwards
    result = subprocess.run([sys.executable, str(DEMO / "config_client.py"), "--out",
                             str(tmp_path / "plans")], capture_output=True, text=True,
                            timeout=120, cwd=tmp_path)
    assert result.returncode == 0, result.stderr
    assert "started propcalc serve at http://127.0.0.1:" in result.stdout
    assert len(list((tmp_path / "plans").glob("*.json"))) == len(
        list((DEMO / "configs").glob("*.json")))
