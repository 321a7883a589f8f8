"""Load test of the HTTP service on loopback, beside the same work done in-process (run by hand).

    python tests/benchmarks/bench_service.py [--seconds 20] [--clients 16] [--workers 2]

Starts ``propcalc serve --production`` on a free port of 127.0.0.1,
then for each scenario runs ``--clients`` threads for ``--seconds`` seconds,
each sending requests one after another over http.client:

* cached: the same propagation request every time (after the first, every
  answer comes from the workers' result caches);
* uncached: a different sigma_w2 in every request (every answer is computed).

Printed per scenario: requests/s, p50/p99 latency and the error count, next
to the in-process baseline measured in the same run on the same request
sequence (one thread: ``propcalc.propagation`` for the computed work, and the
Flask test client for the cached path), with the ratios. Targets: zero
errors, p99 under 100 ms for cached propagation requests.

Only 127.0.0.1 traffic; bounded in time (at most 60 s per scenario) and in
clients (at most 64). The server is always stopped at the end.
"""

from __future__ import annotations

import argparse
import http.client
import json
import sys
import threading
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "api"))

import propcalc  # noqa: E402
import server_process  # noqa: E402
from propcalc_api import create_app  # noqa: E402

__all__ = ["main"]

CACHED_BODY = {"activation": "tanh", "sigma_w2": 1.5, "sigma_b2": 0.05, "depth": 20}


def uncached_body(i: int) -> dict:
    # a distinct sigma_w2 per request (never in any cache), all in [1.2, 1.3): one regime
    return {"activation": "tanh", "sigma_w2": 1.2 + 1e-7 * (i % 1_000_000), "sigma_b2": 0.05,
            "depth": 20}


def percentile(values: list[float], p: float) -> float:
    if not values:
        return float("nan")
    s = sorted(values)
    k = min(len(s) - 1, max(0, int(round(p / 100.0 * (len(s) - 1)))))
    return s[k]


def load(port: int, seconds: float, clients: int, body_of) -> dict:
    """Run the load; body_of(i) gives the i-th request body (i unique across threads)."""
    latencies: list[list[float]] = [[] for _ in range(clients)]
    errors = [0] * clients
    counter = iter(range(10**12))
    lock = threading.Lock()
    stop_at = time.monotonic() + seconds

    def worker(k: int) -> None:
        while time.monotonic() < stop_at:
            with lock:
                i = next(counter)
            payload = json.dumps(body_of(i)).encode()
            t0 = time.perf_counter()
            try:
                conn = http.client.HTTPConnection("127.0.0.1", port, timeout=30)
                conn.request("POST", "/v1/propagation", payload,
                             {"Content-Type": "application/json"})
                resp = conn.getresponse()
                resp.read()
                conn.close()
                ok = resp.status == 200
            except OSError:
                ok = False
            latencies[k].append(time.perf_counter() - t0)
            if not ok:
                errors[k] += 1

    threads = [threading.Thread(target=worker, args=(k,)) for k in range(clients)]
    t_start = time.monotonic()
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    elapsed = time.monotonic() - t_start
    flat = [x for lat in latencies for x in lat]
    return {"requests": len(flat), "rps": len(flat) / elapsed, "p50": percentile(flat, 50),
            "p99": percentile(flat, 99), "errors": sum(errors)}


def in_process_engine(seconds: float, body_of) -> dict:
    """The computed work in-process: propcalc.propagation on the same sequence, one thread."""
    act = propcalc.activation("tanh")
    lat = []
    stop_at = time.monotonic() + seconds
    i = 500_000  # the same regime as the load run, other values: nothing warm from it
    t_start = time.monotonic()
    while time.monotonic() < stop_at:
        b = body_of(i)
        t0 = time.perf_counter()
        propcalc.jsonable(propcalc.propagation(act, b["sigma_w2"], b["sigma_b2"],
                                               depth=b["depth"]).to_dict())
        lat.append(time.perf_counter() - t0)
        i += 1
    elapsed = time.monotonic() - t_start
    return {"requests": len(lat), "rps": len(lat) / elapsed, "p50": percentile(lat, 50),
            "p99": percentile(lat, 99), "errors": 0}


def in_process_cached(seconds: float) -> dict:
    """The cached path in-process: the Flask test client answering from its cache, one thread."""
    client = create_app().test_client()
    client.post("/v1/propagation", json=CACHED_BODY)
    lat = []
    stop_at = time.monotonic() + seconds
    t_start = time.monotonic()
    while time.monotonic() < stop_at:
        t0 = time.perf_counter()
        r = client.post("/v1/propagation", json=CACHED_BODY)
        lat.append(time.perf_counter() - t0)
        assert r.status_code == 200
    elapsed = time.monotonic() - t_start
    return {"requests": len(lat), "rps": len(lat) / elapsed, "p50": percentile(lat, 50),
            "p99": percentile(lat, 99), "errors": 0}


def row(label: str, r: dict) -> str:
    return (f"  {label:<34} {r['requests']:>7} req  {r['rps']:>8.1f} req/s  "
            f"p50 {1e3 * r['p50']:>7.2f} ms  p99 {1e3 * r['p99']:>7.2f} ms  "
            f"errors {r['errors']}")


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--seconds", type=float, default=20.0)
    parser.add_argument("--clients", type=int, default=16)
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--baseline-seconds", type=float, default=5.0)
    args = parser.parse_args(argv)
    seconds = min(max(args.seconds, 1.0), 60.0)
    clients = min(max(args.clients, 1), 64)
    baseline_seconds = min(max(args.baseline_seconds, 1.0), 30.0)

    server = server_process.LiveServer(workers=args.workers)
    server.start()
    try:
        port = server.port
        for _ in range(2 * args.workers):  # warm both workers' caches for the cached scenario
            load(port, 0.5, 1, lambda i: CACHED_BODY)
        print(f"propcalc service: production server, {args.workers} workers, {clients} clients, "
              f"{seconds:g} s per scenario, 127.0.0.1:{port}")
        cached = load(port, seconds, clients, lambda i: CACHED_BODY)
        uncached = load(port, seconds, clients, uncached_body)
    finally:
        server.stop()
    base_cached = in_process_cached(baseline_seconds)
    base_engine = in_process_engine(baseline_seconds, uncached_body)

    print("\ncached propagation (same request)")
    print(row("HTTP, production server", cached))
    print(row("in-process Flask test client", base_cached))
    print(f"  ratio HTTP / in-process throughput: {cached['rps'] / base_cached['rps']:.2f}")
    print("\nuncached propagation (new sigma_w2 every request)")
    print(row("HTTP, production server", uncached))
    print(row("in-process propcalc.propagation", base_engine))
    print(f"  ratio HTTP / in-process throughput: {uncached['rps'] / base_engine['rps']:.2f} "
          f"({args.workers} workers; the clients share the same cores)")
    ok = cached["errors"] == 0 and uncached["errors"] == 0 and cached["p99"] < 0.100
    print(f"\ntargets: zero errors ({cached['errors'] + uncached['errors']} seen), cached p99 < "
          f"100 ms ({1e3 * cached['p99']:.1f} ms): {'met' if ok else 'NOT met'}")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
