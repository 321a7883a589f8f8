"""The cost model against measured CPU time, endpoint by endpoint at its limits (run by hand).

    python tests/benchmarks/bench_costs.py

Sends every request of ``tests/api/cost_cases.py`` once through the app (no
result cache, no run-time limits) and prints its status, its estimate (for
metered sweeps: the projection from the first chunk), the CPU time of its
computation and the ratio measured / estimate, with CPU times in work units
through the reference measured in the same run (``cost_cases.reference_work``, a
fixed workload independent of propcalc, = ``REFERENCE_UNITS`` units): the
same numbers that ``tests/api/test_api_costs.py`` asserts (ratio <= 2).
In-process only: no network.
"""

from __future__ import annotations

import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "api"))

from cost_cases import CASES, REFERENCE_UNITS, reference_work  # noqa: E402
from propcalc_api import create_app  # noqa: E402
from propcalc_api._guard import last_ticket  # noqa: E402

__all__ = ["main"]


def main() -> int:
    c = create_app({"RESULT_CACHE_ENTRIES": 0, "PLOT_CACHE_ENTRIES": 0, "CPU_TIME_LIMIT": 0,
                    "WALL_CLOCK_LIMIT": 0}).test_client()
    c.post("/v1/plots/variance-map", json={"activation": "tanh", "sigma_w2": 1.5})
    ref_ms = reference_work()
    unit_ms = ref_ms / REFERENCE_UNITS
    print(f"reference: {ref_ms:.1f} ms of CPU = {REFERENCE_UNITS:g} units "
          f"(1 unit = {unit_ms:.3f} ms here)\n")
    print(f"{'request':<48} {'status':>6} {'estimate':>9} {'measured':>9} {'ratio':>6}")
    worst = 0.0
    for name, path, body in CASES:
        resp = c.post(path, json=body)
        t = last_ticket()
        units = 1e3 * t.cpu_used / unit_ms
        ratio = units / t.estimate if t.estimate else float("nan")
        if resp.status_code == 200:
            worst = max(worst, ratio)
        note = "  (refused after its first chunk)" if resp.status_code == 422 else ""
        print(f"{name:<48} {resp.status_code:>6} {t.estimate:>9.0f} {units:>9.0f} "
              f"{ratio:>6.2f}{note}", flush=True)
    print(f"\nlargest measured / estimate of an admitted request: {worst:.2f} (bound: 2)")
    return 0 if worst <= 2.0 else 1


if __name__ == "__main__":
    sys.exit(main())
