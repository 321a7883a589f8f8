"""Fairness under load: cheap requests stay fast while expensive ones run (run by hand).

    python tests/benchmarks/bench_fairness.py [--seconds 30] [--workers 2]

Starts ``propcalc serve --production`` on a free port of 127.0.0.1 and runs two
scenarios of ``--seconds`` each, every client sending one request after another
over its own keep-alive connection:

* baseline: 4 clients send propagation requests (a new sigma_w2 every time, so
  every answer is computed), nothing else;
* contended: the same 4 clients, plus 2 clients that send the most expensive
  requests the service admits (a rotation of phase diagrams, mean-variance
  fixed points with omega != 0, simulations and correlation maps at their
  limits, each with a new parameter every time so no cache answers).

Printed: for each scenario the cheap requests' count, p50, p99 and max latency,
the expensive requests' count and statuses, and every 5xx; then the contended
p99 against the 300 ms target and as a ratio to the baseline p99 measured in
the same run. Target (issue 11): cheap p99 < 300 ms with zero 5xx.

Only 127.0.0.1 traffic; bounded in time (at most 120 s per scenario) and in
clients (4 + 2). The server is always stopped at the end.
"""

from __future__ import annotations

import argparse
import http.client
import json
import sys
import threading
import time
from collections import Counter
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "api"))

import server_process  # noqa: E402

__all__ = ["main", "expensive_body", "cheap_body"]

CHEAP_CLIENTS = 4
EXPENSIVE_CLIENTS = 2


def cheap_body(i: int) -> tuple[str, dict]:
    """A propagation request with a sigma_w2 never asked before (tanh, one regime)."""
    return "/v1/propagation", {"activation": "tanh", "sigma_w2": 1.2 + 1e-7 * (i % 1_000_000),
                               "sigma_b2": 0.05, "depth": 20}


def expensive_body(i: int) -> tuple[str, dict]:
    """The i-th of a rotation of the most expensive admitted requests (never cached).

    Each is among the costliest requests the default WORK_BUDGET admits (see
    ``tests/benchmarks/bench_costs.py``): 1.2 to 2.5 s of CPU on the 2-core box.
    """
    e = 1e-6 * (i % 1_000_000)
    kind = i % 4
    if kind == 0:
        return "/v1/plots/phase-diagram", {"activation": "hard_tanh", "n_sigma_w2": 50,
                                           "n_sigma_b2": 48, "sigma_w2_min": 0.1,
                                           "sigma_w2_max": 4.0 + e, "format": "svg"}
    if kind == 1:
        return "/v1/softmax", {"n_classes": 10**7, "logit_variance": 1e4, "n_samples": 4,
                               "seed": i % 2**32}
    if kind == 2:
        return "/v1/softmax/output-scale", {"n_classes": 1000, "margin": 10.0 - e,
                                            "current_sigma_w2": 1e4, "n_samples": 17000}
    return "/v1/simulate", {"activation": "tanh", "sigma_w2": 1.5 + e, "width": 20,
                            "depth": 1000, "repetitions": 8, "n_pairs": 64}


def percentile(values: list[float], p: float) -> float:
    if not values:
        return float("nan")
    s = sorted(values)
    return s[min(len(s) - 1, max(0, int(round(p / 100.0 * (len(s) - 1)))))]


class Client(threading.Thread):
    """Sends ``body_of(i)`` requests one after another until ``stop_at``."""

    def __init__(self, port: int, body_of, first: int, stop_at: float) -> None:
        super().__init__(daemon=True)
        self.port, self.body_of, self.i, self.stop_at = port, body_of, first, stop_at
        self.latencies: list[float] = []
        self.statuses: Counter[int] = Counter()
        self.errors = 0
        self.stops = 0

    def run(self) -> None:
        conn = None
        while time.monotonic() < self.stop_at:
            path, body = self.body_of(self.i)
            self.i += 1
            payload = json.dumps(body).encode()
            t0 = time.perf_counter()
            try:
                if conn is None:
                    conn = http.client.HTTPConnection("127.0.0.1", self.port, timeout=60)
                conn.request("POST", path, payload, {"Content-Type": "application/json"})
                resp = conn.getresponse()
                data = resp.read()
                if resp.status == 422 and b"_LIMIT" in data:
                    self.stops += 1
                if resp.getheader("Connection", "").lower() == "close":
                    conn.close()
                    conn = None
                self.statuses[resp.status] += 1
            except OSError:
                self.errors += 1
                if conn is not None:
                    conn.close()
                conn = None
                continue
            self.latencies.append(time.perf_counter() - t0)
        if conn is not None:
            conn.close()


def scenario(port: int, seconds: float, expensive: bool) -> dict:
    stop_at = time.monotonic() + seconds
    cheap = [Client(port, cheap_body, 1_000_000 * k + int(time.time()) % 1000 * 1000, stop_at)
             for k in range(CHEAP_CLIENTS)]
    heavy = ([Client(port, expensive_body, 7 * k + int(time.time()) % 1000 * 100, stop_at)
              for k in range(EXPENSIVE_CLIENTS)] if expensive else [])
    for c in heavy + cheap:
        c.start()
    for c in heavy + cheap:
        c.join(seconds + 120)
    lat = [x for c in cheap for x in c.latencies]
    return {
        "cheap_n": len(lat), "p50": percentile(lat, 50), "p99": percentile(lat, 99),
        "max": max(lat) if lat else float("nan"),
        "cheap_status": sum((c.statuses for c in cheap), Counter()),
        "heavy_status": sum((c.statuses for c in heavy), Counter()),
        "heavy_cpu_stops": sum(c.stops for c in heavy),
        "heavy_n": sum(len(c.latencies) for c in heavy),
        "heavy_p50": percentile([x for c in heavy for x in c.latencies], 50),
        "errors": sum(c.errors for c in cheap + heavy),
    }


def show(label: str, r: dict) -> None:
    print(f"{label}")
    print(f"  cheap (propagation): {r['cheap_n']} requests, p50 {1e3 * r['p50']:.1f} ms, "
          f"p99 {1e3 * r['p99']:.1f} ms, max {1e3 * r['max']:.1f} ms, "
          f"statuses {dict(r['cheap_status'])}")
    if r["heavy_n"]:
        print(f"  expensive: {r['heavy_n']} requests, p50 {r['heavy_p50']:.2f} s, "
              f"statuses {dict(r['heavy_status'])} ({r['heavy_cpu_stops']} stopped by a "
              "run-time limit)")
    print(f"  connection errors: {r['errors']}")


def fives(r: dict) -> int:
    return sum(n for s, n in (r["cheap_status"] + r["heavy_status"]).items() if s >= 500)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--seconds", type=float, default=30.0)
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--slots", type=int, default=None,
                        help="EXPENSIVE_SLOTS of the server (default: the shipped 1), to "
                             "compare the lane with more slots")
    args = parser.parse_args(argv)
    seconds = min(max(args.seconds, 5.0), 120.0)
    env = {} if args.slots is None else {"PROPCALC_EXPENSIVE_SLOTS": str(max(1, args.slots))}
    server = server_process.LiveServer(workers=min(max(args.workers, 1), 8), env=env).start()
    try:
        warm = scenario(server.port, 2.0, expensive=False)  # imports, first-call caches
        del warm
        base = scenario(server.port, seconds, expensive=False)
        loaded = scenario(server.port, seconds, expensive=True)
    finally:
        server.stop()
    slots = "1 (shipped)" if args.slots is None else str(args.slots)
    print(f"propcalc serve --production, {args.workers} workers, expensive slots {slots}, "
          f"{seconds:g} s per scenario, "
          f"{CHEAP_CLIENTS} cheap + {EXPENSIVE_CLIENTS} expensive clients, 127.0.0.1")
    show("baseline: cheap requests alone", base)
    show("contended: cheap requests beside the most expensive admitted ones", loaded)
    n5 = fives(base) + fives(loaded)
    ok = loaded["p99"] < 0.300 and n5 == 0 and loaded["errors"] == 0
    print(f"\ncheap p99 beside expensive requests: {1e3 * loaded['p99']:.1f} ms "
          f"(target < 300 ms; {loaded['p99'] / base['p99']:.2f} x the baseline p99 of "
          f"{1e3 * base['p99']:.1f} ms measured in this run); 5xx: {n5}: "
          f"{'met' if ok else 'NOT met'}")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
