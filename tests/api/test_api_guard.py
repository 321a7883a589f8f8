"""Run-time limits (wall clock, CPU time), the expensive lane and the mapping of engine failures.

Sources: the behaviour is the service's own contract (docs/service.md, issue 11 section 4);
the limits are checked with plain Python workloads whose duration is known by construction.
"""

from __future__ import annotations

import os
import tempfile
import threading
import time
import types
from concurrent.futures import ThreadPoolExecutor

import pytest

import propcalc
from propcalc_api._budget import check_budget, first_nonfinite, run_guarded
from propcalc_api._guard import CPU_CLOCK_AVAILABLE, Guard, last_ticket
from propcalc_api._lane import Lane, LaneBusy
from propcalc_api._problems import Problem, WorkBudgetExceeded


def _spin(seconds: float) -> float:
    """Burn CPU in Python bytecode for about ``seconds`` of wall time."""
    end = time.monotonic() + seconds
    x = 0.0
    while time.monotonic() < end:
        x += 1.0
    return x


def _spin_cpu(seconds: float) -> float:
    """Burn ``seconds`` of this thread's CPU time (however loaded the machine is)."""
    end = time.thread_time() + seconds
    x = 0.0
    while time.thread_time() < end:
        x += 1.0
    return x


def _in_thread(fn):
    with ThreadPoolExecutor(1) as pool:
        return pool.submit(fn).result(timeout=60)


def test_wall_clock_limit_stops_a_computation_in_a_worker_thread():
    # a threaded server runs computations outside the main thread: the limit must hold there
    def call():
        t0 = time.monotonic()
        with pytest.raises(WorkBudgetExceeded) as info:
            run_guarded(Guard(0.2, 0.0), lambda: [time.sleep(0.01) for _ in range(1000)])
        return time.monotonic() - t0, info.value

    elapsed, exc = _in_thread(call)
    assert 0.15 < elapsed < 3.0
    assert exc.status == 422 and exc.extra["limit"] == {"name": "WALL_CLOCK_LIMIT", "value": 0.2}


@pytest.mark.skipif(not CPU_CLOCK_AVAILABLE, reason="no per-thread CPU clock here")
def test_cpu_limit_stops_a_busy_computation_and_spares_a_sleeping_one():
    def busy():
        with pytest.raises(WorkBudgetExceeded) as info:
            run_guarded(Guard(0.0, 0.2), lambda: _spin(30.0))
        return info.value

    exc = _in_thread(busy)
    assert exc.extra["limit"] == {"name": "CPU_TIME_LIMIT", "value": 0.2}
    assert "CPU time" in exc.detail
    # sleeping uses no CPU: 0.5 s of sleep passes a 0.2 s CPU limit
    assert _in_thread(lambda: run_guarded(Guard(0.0, 0.2), lambda: time.sleep(0.5) or 7)) == 7


def test_no_stop_escapes_after_a_computation_ends_near_its_limit():
    # many computations that end just around their limit: the exception is either raised
    # inside the guard (a 422) or never; code after the guard always runs undisturbed
    outcomes = []
    for i in range(30):
        try:
            run_guarded(Guard(0.02, 0.0), lambda: _spin(0.015 + 0.0005 * (i % 10)))
            outcomes.append("done")
        except WorkBudgetExceeded:
            outcomes.append("stopped")
        _spin(0.03)  # a pending stop would land here, outside the guard
    assert set(outcomes) <= {"done", "stopped"}


def test_ticket_records_the_estimate_and_the_cpu_time():
    def compute():
        check_budget(120.0, 3000.0, "a test request")
        check_budget(80.0, 3000.0, "a test request")
        return _spin_cpu(0.05)

    run_guarded(Guard(0.0, 0.0), compute)
    ticket = last_ticket()
    assert ticket is not None and ticket.estimate == 120.0
    assert 0.05 <= ticket.cpu_used < 2.0


def test_lane_queue_and_busy():
    lane = Lane(slots=1, queue=1, wait_seconds=5.0, retry_after=3)
    first = lane.admit(600)
    got = []
    waiter = threading.Thread(target=lambda: got.append(lane.admit(600)))
    waiter.start()
    time.sleep(0.2)  # the waiter is queued: the queue (1) is full now
    with pytest.raises(LaneBusy) as info:
        lane.admit(700)
    assert info.value.retry_after == 3 and "busy" in str(info.value)
    first.release()
    waiter.join(5)
    assert len(got) == 1
    got[0].release()
    got[0].release()  # idempotent
    lane.admit(1).release()


def test_lane_wait_runs_out():
    lane = Lane(slots=1, queue=4, wait_seconds=0.2, retry_after=1)
    held = lane.admit(600)
    t0 = time.monotonic()
    with pytest.raises(LaneBusy, match="no slot came free within 0.2 s"):
        lane.admit(600)
    assert time.monotonic() - t0 >= 0.19
    held.release()


def test_lane_slots_are_shared_through_lock_files():
    # two lanes on one directory behave as one (flock conflicts between open file
    # descriptions, so this also holds between processes); a slot is freed on close
    with tempfile.TemporaryDirectory() as d:
        a = Lane(1, 0, 0.0, 1, lock_dir=d)
        b = Lane(1, 0, 0.0, 1, lock_dir=d)
        slot = a.admit(600)
        with pytest.raises(LaneBusy):
            b.admit(600)
        slot.release()
        b.admit(600).release()
        assert os.listdir(d) == ["expensive-0.lock"]


def test_expensive_requests_beyond_the_lane_get_503_with_retry_after(make_client, monkeypatch):
    import propcalc_api._service as service

    real = service.propagation

    def slow(*args, **kwargs):
        time.sleep(0.6)
        return real(*args, **kwargs)

    monkeypatch.setattr(service, "propagation", slow)
    c = make_client(EXPENSIVE_UNITS=100.0, EXPENSIVE_SLOTS=1, EXPENSIVE_QUEUE=0,
                    RESULT_CACHE_ENTRIES=0)
    app = c.application

    def post(i):
        return app.test_client().post("/v1/propagation", json={
            "activation": "tanh", "sigma_w2": 1.5 + 0.01 * i})

    with ThreadPoolExecutor(2) as pool:
        responses = list(pool.map(post, range(2)))
    codes = sorted(r.status_code for r in responses)
    assert codes == [200, 503]
    busy = next(r for r in responses if r.status_code == 503)
    assert busy.headers["Retry-After"] == "3" and busy.json["retry_after"] == 3
    assert busy.headers["Content-Type"] == "application/problem+json"
    # a cheap request (below EXPENSIVE_UNITS) never waits for the lane
    assert app.test_client().post("/v1/critical-point", json={"activation": "tanh"}).status_code \
        == 200


def test_engine_failures_are_422_never_500(make_client, monkeypatch):
    import propcalc.meanfield.maps as engine_module
    import propcalc_api._service as service

    def engine_raises(*args, **kwargs):
        raise ZeroDivisionError("deep inside a quadrature")

    # the same code with the engine module's globals: its frame is an engine frame
    fake = types.FunctionType(engine_raises.__code__, vars(engine_module), "propagation")
    monkeypatch.setattr(service, "propagation", fake)
    resp = make_client(RESULT_CACHE_ENTRIES=0).post(
        "/v1/propagation", json={"activation": "tanh", "sigma_w2": 1.5})
    assert resp.status_code == 422, resp.data
    body = resp.json
    assert body["type"].endswith("computation-failed") and "ZeroDivisionError" in body["detail"]
    assert "deep inside" not in body["detail"] and len(body["incident"]) == 16


def test_first_nonfinite():
    assert first_nonfinite({"a": [1.0, "inf", None], "b": {"c": 2}}) is None
    assert first_nonfinite({"a": [1.0, float("nan")]}) == "/a/1"
    assert first_nonfinite([{"x": float("-inf")}]) == "/0/x"


def test_memory_error_is_503(make_client, monkeypatch):
    import propcalc_api._service as service

    def hungry(*args, **kwargs):
        raise MemoryError

    monkeypatch.setattr(service, "propagation", hungry)
    resp = make_client(RESULT_CACHE_ENTRIES=0).post(
        "/v1/propagation", json={"activation": "tanh", "sigma_w2": 1.5})
    assert resp.status_code == 503 and "Retry-After" in resp.headers


def test_problem_is_not_wrapped():
    with pytest.raises(Problem) as info:
        run_guarded(Guard(0.0, 0.0), lambda: (_ for _ in ()).throw(Problem(404, "x")))
    assert info.value.status == 404
