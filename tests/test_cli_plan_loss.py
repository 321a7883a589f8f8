"""``propcalc plan ... --loss``: the learning-rate ceiling, the learning rate and the output layer.

The command is driven in-process (tests/cli_helpers.py). References: propcalc.recommend with
the same arguments (the CLI must print its numbers), and the stability bound of gradient
descent on a quadratic, lr < 2 (1 + mu) / lambda_max for heavy-ball momentum mu (Polyak 1964;
the plain case in Nesterov 2004, from memory), checked on the printed numbers.
"""

from __future__ import annotations

import json
import re

import pytest

import propcalc
from cli_helpers import run, strict_json

WIDTHS = [64, 256, 256, 256, 10]
ARGS = ["plan", "relu", "--widths", ",".join(map(str, WIDTHS)), "--loss", "cross_entropy",
        "--n-classes", "10", "--batch-size", "128"]


def pairs(text: str) -> dict[str, str]:
    out = {}
    for ln in text.splitlines():
        parts = re.split(r"\s{2,}", ln.strip(), maxsplit=1)
        if len(parts) == 2 and not ln.startswith(("note:", "verdict:")):
            out.setdefault(parts[0], parts[1])
    return out


@pytest.mark.parametrize("momentum", [0.0, 0.9])
def test_text_agrees_with_recommend_and_the_bound(momentum):
    code, out, err = run(*ARGS, "--momentum", str(momentum))
    assert code == 0, err
    plan = propcalc.recommend("relu", widths=WIDTHS, loss="cross_entropy", n_classes=10,
                              batch_size=128, momentum=momentum)
    p = pairs(out)
    ceiling = float(p["learning-rate ceiling"].split()[0])
    lam = float(p["top curvature lambda_max"])
    assert ceiling == pytest.approx(plan.learning_rate_ceiling, rel=1e-5)
    assert float(p["learning rate"].split()[0]) == pytest.approx(plan.learning_rate, rel=1e-5)
    assert lam == pytest.approx(plan.learning_rate_details.lambda_max, rel=1e-5)
    assert ceiling * lam == pytest.approx(2 * (1 + momentum), rel=2e-5)  # Polyak 1964
    assert p["output layer"] == plan.output_layer
    assert plan.learning_rate_details.learning_rate_rule in out
    # the last layer is scaled for the loss: its sigma_w2 is the plan's
    last = [ln for ln in out.splitlines() if ln.startswith("4 ")][0]
    assert float(last.split()[4]) == pytest.approx(plan.layers[-1].sigma_w2, rel=1e-5)


def test_json_carries_the_fields():
    code, out, err = run(*ARGS, "--loss", "mse", "--no-scale-output", "--input-correlation",
                         "0.2", "--json")
    assert code == 0, err
    doc = strict_json(out)
    plan = propcalc.recommend("relu", widths=WIDTHS, loss="mse", n_classes=10, batch_size=128,
                              input_correlation=0.2, scale_output=False)
    assert doc == json.loads(json.dumps(propcalc.jsonable(plan.to_dict())))
    assert doc["learning_rate_ceiling"] == pytest.approx(plan.learning_rate_ceiling, rel=1e-12)
    assert doc["learning_rate"] == pytest.approx(plan.learning_rate, rel=1e-12)


def test_without_loss_nothing_changes():
    code, out, err = run("plan", "relu", "--widths", "64,256,10")
    assert code == 0, err
    assert "learning-rate ceiling" not in out


@pytest.mark.parametrize("argv, needle", [
    (["plan", "relu", "--widths", "64,256,10", "--batch-size", "12"],
     "--batch-size only matter with a loss"),
    (["plan", "relu", "--depth", "5", "--loss", "mse", "--batch-size", "12"], "widths"),
    (["plan", "relu", "--widths", "64,256,10", "--loss", "cross_entropy", "--batch-size", "12"],
     "n_classes must be given"),
    (["plan", "relu", "--widths", "64,256,10", "--loss", "cross_entropy", "--n-classes", "5",
      "--batch-size", "12"], "n_classes must be equal to the last layer's width (10), got 5"),
    (["plan", "relu", "--widths", "64,256,10", "--loss", "mse", "--batch-size", "0"],
     "batch_size must be an integer >= 1, got 0"),
    (["plan", "relu", "--widths", "64,256,10", "--loss", "mse", "--batch-size", "8",
      "--momentum", "1"], "momentum must be in [0, 1)"),
    (["plan", "relu", "--widths", "64,256,10", "--loss", "hinge"], "invalid choice: 'hinge'"),
])
def test_errors_exit_2(argv, needle):
    code, out, err = run(*argv)
    assert code == 2 and out == "" and needle in err and "Traceback" not in err
