"""The finite-width law against torch networks on a real dataset, at initialisation.

Sources: seeded torch networks (a reference library) built as a user would (nn.Linear + nn.GELU,
the plan written in by propcalc's apply_plan), fed scikit-learn's bundled handwritten digits
(load_digits, standardised: a real dataset that a package ships). Issue 15 measured the GELU plan
for 64 layers of width 128 (q* = 14.1) losing its second moment; here the spread of ln q between
seeded networks and the typical q at the last hidden layer are compared with
propcalc.finite_width.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

import propcalc as pc
from propcalc.init.torch_adapter import apply_plan
from propcalc.training.finite_width import SPREAD_LIMIT

torch = pytest.importorskip("torch")
pytest.importorskip("sklearn")


def test_gelu_plan_on_digits_spreads_as_predicted():
    from sklearn.datasets import load_digits
    from sklearn.preprocessing import StandardScaler

    torch.set_num_threads(1)
    x = StandardScaler().fit_transform(load_digits().data)
    x = torch.tensor(x[np.random.default_rng(0).choice(len(x), 256, replace=False)])
    widths = [64] + [128] * 63 + [10]
    plan = pc.recommend("gelu", widths=widths)
    logs = []
    for seed in range(12):
        torch.manual_seed(seed)
        mods: list = []
        for i, (a, b) in enumerate(zip(widths[:-1], widths[1:])):
            mods.append(torch.nn.Linear(a, b))
            if i < len(widths) - 2:
                mods.append(torch.nn.GELU())
        model = torch.nn.Sequential(*mods).double()
        apply_plan(model, plan, seed=seed)
        with torch.no_grad():
            pre = model[:-2](x)  # the last hidden layer's pre-activations (layer 63)
        assert pre.shape[1] == 128
        logs.append(math.log(float((pre ** 2).mean())))
    fw = pc.finite_width("gelu", plan.sigma_w2, plan.sigma_b2, [128] * 63, plan.q_star)
    mean, sd = float(np.mean(logs)), float(np.std(logs, ddof=1))
    se = sd / math.sqrt(len(logs))
    # the typical network's q (median over networks) against exp(E ln q), first order; the data
    # start the first layer at 0.95 q* (standardised digits have mean square 61/64), inside the band
    print(f"ln q typical: measured {mean:.3f} +- {se:.3f}, predicted "
          f"{math.log(fw.q_typical[-1]):.3f}; sd {sd:.3f} vs {fw.q_log_sd[-1]:.3f}")
    assert abs(mean - math.log(fw.q_typical[-1])) <= 3 * se + 0.1
    # the spread between networks is beyond the verdict's limit, as predicted
    assert sd > SPREAD_LIMIT and fw.top_log_sd > SPREAD_LIMIT
    assert not plan.verdict.reason("finite-width spread").passes
