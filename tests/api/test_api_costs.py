"""The cost model bounds the measured cost of every endpoint at its limits (issue 11 section 4).

Each request of ``cost_cases.CASES`` (the largest or slowest request the default
WORK_BUDGET admits, one per endpoint and kind) is sent once through the app, and
the CPU time of its computation (the thread's CPU clock, read by the guard) is
compared with its estimate. To be robust to a loaded or slower machine, CPU
times are converted to work units through a reference measured in the same
test: ``cost_cases.reference_work``, a fixed workload independent of propcalc
that costs REFERENCE_UNITS units (calibrated against the earlier reference, 40
propagation reports of tanh = 105 units where the coefficients were measured), run
before and after the cases (the slower run sets the unit); a case measured
over the bound is measured once more and the smaller CPU time counts (the
load of a shared machine changes from one second to the next).

The stated factor: measured cost <= BOUND_FACTOR x estimate for every admitted
case (the estimate may be higher: most coefficients are bounds over the
slowest activations, so typical requests cost less). Sweeps (phase diagram,
depth scales) are metered: their estimate is the cost projected from the first
chunk of the grid, and a window that projects past the budget is refused after
that chunk, which the test checks is a small part of the budget.
Source of the rule: the service's own contract (docs/service.md, "Work
budget"); the coefficients are measurements (common practice, no source).
"""

from __future__ import annotations

import pytest

from cost_cases import CASES, REFERENCE_UNITS, reference_work
from propcalc_api import create_app
from propcalc_api._guard import last_ticket

#: measured <= BOUND_FACTOR * estimate
BOUND_FACTOR = 2.0
#: a refused metered sweep spends at most this share of the budget before it is refused
METER_SHARE = 0.35

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def measured():
    app = create_app({"RESULT_CACHE_ENTRIES": 0, "PLOT_CACHE_ENTRIES": 0,
                      "CPU_TIME_LIMIT": 0, "WALL_CLOCK_LIMIT": 0})
    c = app.test_client()
    # load matplotlib and first-call tables outside the measured requests
    assert c.post("/v1/plots/variance-map", json={"activation": "tanh", "sigma_w2": 1.5,
                                                  "format": "png"}).status_code == 200
    before = reference_work()

    def run(path: str, body: dict) -> tuple[int, dict, float, float]:
        resp = c.post(path, json=body)
        ticket = last_ticket()
        return resp.status_code, resp.get_json(silent=True), ticket.estimate, ticket.cpu_used

    runs = {name: run(path, body) for name, path, body in CASES}
    # the load of a shared machine changes during the test: the slower of two reference runs
    # (before and after the cases) sets the unit, and a case measured over the bound is
    # measured once more (the smaller CPU time counts)
    unit_ms = max(before, reference_work()) / REFERENCE_UNITS
    out = {}
    for name, path, body in CASES:
        status, got, estimate, cpu = runs[name]
        if status == 200 and 1e3 * cpu / unit_ms > BOUND_FACTOR * estimate:
            again = run(path, body)
            cpu = min(cpu, again[3])
        out[name] = (status, got, estimate, 1e3 * cpu / unit_ms)
    return out


@pytest.mark.parametrize("name", [name for name, _, _ in CASES])
def test_estimate_bounds_the_measured_cost(measured, name):
    status, body, estimate, units = measured[name]
    if status == 422 and body["type"].endswith("work-budget-exceeded"):
        # only metered sweeps may be refused here: after a small part of the work
        assert "projected from its first" in body["detail"], body["detail"]
        assert units <= METER_SHARE * 3000.0, (name, units)
        return
    assert status == 200, (name, body)
    assert 0 < estimate <= 3000.0
    assert units <= BOUND_FACTOR * estimate, (
        f"{name}: measured {units:.0f} units, estimated {estimate:.0f} "
        f"(ratio {units / estimate:.2f} > {BOUND_FACTOR})")


def test_the_wide_windows_are_refused_by_the_meter(measured):
    # the case: a hard_tanh phase diagram over sigma_w2 in [1e-6, 1e4] held a worker
    # for 8-10 s under an estimate of 2700 units; it is now refused after its first chunk
    for name in ("phase diagram, wide window", "phase diagram, step, biased window",
                 "depth-scales image, wide"):
        status, body, estimate, units = measured[name]
        assert status == 422 and body["estimated_cost"] > 3000, name
        assert "a point costs about" in body["detail"] and "/n_" in str(body["errors"])
