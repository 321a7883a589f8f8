"""Real training, reduced (issue 15 §5): a plan made for a loss trains at its recommended
learning rate and does not at 4 times its learning-rate ceiling.

The harness is tests/benchmarks/bench_training.py (the full runs, the trainability map, the
learning-rate sweeps and the plan against the customary defaults at three seeds, are in the
README, "Does it train?"). Here: scikit-learn's bundled digits (the harness's split and
standardisation), plain stacks of width 128 planned by ``propcalc.recommend(act, widths=...,
loss="cross_entropy", n_classes=10, batch_size=128, inputs=<512 training inputs>)`` and
initialised by ``apply_plan`` (readout scaled as planned), 200 steps of plain SGD (no momentum,
the optimiser the ceiling is for: lr < 2 / lambda_max, the stability bound of gradient descent on
a quadratic; beyond 4 / lambda_max not even the catapult phase converges, Lewkowycz et al. 2020),
batch 128, seed 0, torch with one thread.

Measured when written (200 steps, seed 0): tanh at depth 20 (ceiling 0.253) reaches 100 %
training accuracy at the recommended rate (half the ceiling) and 10.0 % at 4x the ceiling;
GELU at depth 20 (ceiling 0.0166), 88.0 % at the recommended rate. The thresholds (>= 60 %
trains, <= 30 % or diverged does not; chance is 10 %) leave a wide margin.

A gap is kept as a strict expected failure, so that a fix shows up as a failing test
(move the case into the passing list then):

* (closed) deep tanh: at depth 50 half the ceiling (0.0778) did not train (10.9 %, near chance;
  the loss stays finite), and the benchmark's sweep at depth 100 trained best at 1/32 of the
  ceiling; the recommended rate of a plan deeper than 20 hidden layers is now half the ceiling
  times (20 / L)^2 (propcalc.training.learning_rate.DEEP_FROM, a rule of ours fitted to those
  runs), and the depth-50 case moved to the passing list;
* GELU at depth 20 still trains at 4x its ceiling (91.2 %). A likely cause, not verified
  here: with cross-entropy a step past 2 / lambda_max raises the logits and the softmax's
  curvature falls as it saturates, so the bound of the quadratic model is not a hard wall.
"""

from __future__ import annotations

import importlib.util
from pathlib import Path

import pytest

pytest.importorskip("torch")
pytest.importorskip("sklearn")

HARNESS = Path(__file__).parent / "benchmarks" / "bench_training.py"
STEPS = 200
WIDTH = 128
BATCH = 128


def _harness():
    spec = importlib.util.spec_from_file_location("bench_training", HARNESS)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


@pytest.fixture(scope="module")
def bench():
    import torch

    torch.set_num_threads(1)
    module = _harness()
    module.DATA = module.digits_data()
    return module


def _run(bench, act: str, depth: int, lr_of) -> tuple[dict, object]:
    import numpy as np
    import torch

    data = bench.DATA
    x = data["x_train"][:512].numpy().astype(np.float64)
    plan = bench.plan_for(act, depth, WIDTH, data["q_input"], loss="cross_entropy",
                          n_classes=bench.N_CLASSES, batch_size=BATCH, inputs=x)
    torch.manual_seed(0)
    model = bench.init_plan(bench.plain_network(act, depth, WIDTH), plan, 0)
    res = bench.train(model, data, steps=STEPS, lr=lr_of(plan), momentum=0.0, batch=BATCH,
                      seed=0)
    return res, plan


def _summary(act: str, depth: int, plan, res) -> str:
    return (f"{act} depth {depth}: ceiling {plan.learning_rate_ceiling:.4g}, recommended "
            f"{plan.learning_rate:.4g}: {res}")


def _gap(reason: str):
    return pytest.mark.xfail(strict=True, reason=reason)


SHALLOW_GELU = ("cross-entropy: the GELU plan at depth 20 still trains at 4x its ceiling "
                "(README, 'Does it train?')")


@pytest.mark.slow
@pytest.mark.parametrize("act, depth", [("tanh", 20), ("gelu", 20), ("tanh", 50)])
def test_plan_trains_at_its_recommended_learning_rate(bench, act, depth):
    res, plan = _run(bench, act, depth, lambda p: p.learning_rate)
    assert bench.trains(res, 0.6), _summary(act, depth, plan, res)


@pytest.mark.slow
@pytest.mark.parametrize("act, depth", [("tanh", 20),
                                        pytest.param("gelu", 20, marks=_gap(SHALLOW_GELU))])
def test_plan_does_not_train_at_four_times_its_ceiling(bench, act, depth):
    res, plan = _run(bench, act, depth, lambda p: 4.0 * p.learning_rate_ceiling)
    assert not bench.trains(res, 0.3), _summary(act, depth, plan, res)
