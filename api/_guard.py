"""Run-time limits of one computation: wall-clock time, CPU time, and the expensive lane.

Every computation of the service runs inside :func:`run_guarded`, which gives
the request a :class:`Ticket` (kept in a thread-local while it runs). Three
things read or write the ticket:

* the cost model (:func:`propcalc_api._budget.check_budget`) records the
  estimate there, and asks for a slot of the expensive lane
  (:mod:`propcalc_api._lane`) when the estimate reaches
  ``EXPENSIVE_UNITS``; the slot is released when the computation ends;
* a watchdog thread (one per process, started on first use, again after a
  fork) stops a computation whose wall-clock time since it was admitted
  exceeds ``WALL_CLOCK_LIMIT``, or whose thread has used more than
  ``CPU_TIME_LIMIT`` seconds of CPU, by raising :class:`StopComputation` in
  its thread (``PyThreadState_SetAsyncExc``, CPython's C API for an exception
  in another thread: it is delivered between two bytecodes, like a signal
  handler's exception in the main thread). This works in any thread, so the
  limits hold under a threaded server as well as in the main thread;
* tests read the estimate and the CPU time of the last computation of the
  current thread (:func:`last_ticket`).

Stopping a computation this way is safe because the engine keeps no state
that an exception between two bytecodes could corrupt (its caches are single
dict and lru_cache assignments); the service's own locks are taken in
``with`` blocks, which release them on any exception. A computation stuck
inside one long C call cannot be interrupted: :func:`overdue` reports it, and
the production worker then exits so that the arbiter starts a fresh one.
"""

from __future__ import annotations

import ctypes
import logging
import os
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any, TypeVar

__all__ = ["StopComputation", "Guard", "Ticket", "run_guarded", "current_ticket",
           "last_ticket", "overdue", "thread_cpu_seconds", "CPU_CLOCK_AVAILABLE"]

T = TypeVar("T")
_log = logging.getLogger("propcalc_api")

#: True where another thread's CPU time can be read (Linux and most Unix systems)
CPU_CLOCK_AVAILABLE = hasattr(time, "pthread_getcpuclockid")

#: how often the watchdog looks at the CPU clocks of running computations (seconds)
_CPU_POLL = 0.05


class StopComputation(BaseException):
    """Raised inside a computation by the watchdog (a BaseException, so that no
    ``except Exception`` in the engine can swallow it)."""


def thread_cpu_seconds(ident: int) -> float | None:
    """CPU time used so far by the thread ``ident`` (None where it cannot be read)."""
    if not CPU_CLOCK_AVAILABLE:
        return None
    try:
        return time.clock_gettime(time.pthread_getcpuclockid(ident))
    except (OSError, ValueError, OverflowError):
        return None


@dataclass(frozen=True)
class Guard:
    """The run-time limits of one app (built by ``create_app``).

    Attributes
    ----------
    wall_seconds : float
        ``WALL_CLOCK_LIMIT``: wall-clock seconds from admission (0: off).
    cpu_seconds : float
        ``CPU_TIME_LIMIT``: CPU seconds of the computing thread (0: off).
    lane : Any
        The expensive lane (:class:`propcalc_api._lane.Lane`) or None.
    expensive_units : float
        Estimates at or above this take a slot of the lane.
    """

    wall_seconds: float
    cpu_seconds: float
    lane: Any = None
    expensive_units: float = float("inf")


@dataclass
class Ticket:
    """One computation in flight.

    Attributes
    ----------
    ident : int
        The computing thread.
    guard : Guard
    estimate : float
        The largest estimate (work units) checked so far.
    started, admitted : float
        time.monotonic() at the start and when the computation was admitted
        (after any wait for the expensive lane); the wall clock counts from
        ``admitted``.
    cpu_start : float
        The thread's CPU clock at the start.
    cpu_used : float
        CPU seconds used (set when the computation ends).
    waited : float
        Seconds spent waiting for the expensive lane.
    stopped : str
        "" while running; "wall" or "cpu" once the watchdog stopped it.
    """

    ident: int
    guard: Guard
    estimate: float = 0.0
    started: float = field(default_factory=time.monotonic)
    admitted: float = field(default_factory=time.monotonic)
    cpu_start: float = field(default_factory=time.thread_time)
    cpu_used: float = 0.0
    waited: float = 0.0
    stopped: str = ""
    slot: Any = None

    def record(self, estimate: float) -> None:
        """Note an estimate; take a lane slot when it reaches the expensive threshold."""
        self.estimate = max(self.estimate, estimate)
        if estimate >= self.guard.expensive_units:
            self.take_slot()

    def take_slot(self) -> None:
        """Take a slot of the expensive lane now (waiting if needed), whatever the estimate.

        For work whose cost is only known once it runs (metered sweeps): it
        takes its slot before it starts, and before any lock it will hold.
        """
        lane = self.guard.lane
        if self.slot is None and lane is not None:
            t0 = time.monotonic()
            self.slot = lane.admit(max(self.estimate, self.guard.expensive_units))
            self.waited += time.monotonic() - t0
            self.admitted = time.monotonic()  # the wall clock counts the work, not the queue

    def release(self) -> None:
        """Give the lane slot back (idempotent)."""
        slot, self.slot = self.slot, None
        if slot is not None:
            slot.release()


class _Watchdog:
    """One thread per process that stops computations past their limits."""

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self._wake = threading.Condition(self._lock)
        self._tickets: dict[int, Ticket] = {}
        self._pid = -1

    def _ensure_thread(self) -> None:
        # called with the lock held; a thread does not survive fork(), so start one per pid
        if self._pid != os.getpid():
            self._pid = os.getpid()
            threading.Thread(target=self._run, name="propcalc-watchdog", daemon=True).start()

    def register(self, ticket: Ticket) -> None:
        with self._lock:
            self._ensure_thread()
            self._tickets[id(ticket)] = ticket
            self._wake.notify()

    def unregister(self, ticket: Ticket) -> None:
        with self._lock:
            self._tickets.pop(id(ticket), None)
            if ticket.stopped:
                # the exception may still be pending: clear it, it must not escape the guard
                ctypes.pythonapi.PyThreadState_SetAsyncExc(ctypes.c_ulong(ticket.ident), None)

    def overdue(self, grace: float) -> list[Ticket]:
        now = time.monotonic()
        with self._lock:
            return [t for t in self._tickets.values() if t.stopped and t.guard.wall_seconds > 0
                    and now - t.admitted > t.guard.wall_seconds + grace]

    def _stop(self, ticket: Ticket, why: str) -> None:
        ticket.stopped = why
        ctypes.pythonapi.PyThreadState_SetAsyncExc(ctypes.c_ulong(ticket.ident),
                                                   ctypes.py_object(StopComputation))

    def _run(self) -> None:
        with self._lock:
            while True:
                now = time.monotonic()
                wait = 1.0
                for ticket in list(self._tickets.values()):
                    if ticket.stopped:
                        continue
                    g = ticket.guard
                    if g.wall_seconds > 0:
                        left = ticket.admitted + g.wall_seconds - now
                        if left <= 0:
                            self._stop(ticket, "wall")
                            continue
                        wait = min(wait, left)
                    if g.cpu_seconds > 0:
                        used = thread_cpu_seconds(ticket.ident)
                        if used is not None:
                            if used - ticket.cpu_start > g.cpu_seconds:
                                self._stop(ticket, "cpu")
                                continue
                            wait = min(wait, _CPU_POLL)
                self._wake.wait(max(wait, 0.001))


_WATCHDOG = _Watchdog()
_LOCAL = threading.local()


def current_ticket() -> Ticket | None:
    """The ticket of the computation running in this thread, if any."""
    return getattr(_LOCAL, "ticket", None)


def last_ticket() -> Ticket | None:
    """The ticket of the last computation that ended in this thread (for tests)."""
    return getattr(_LOCAL, "last", None)


def overdue(grace: float) -> int:
    """How many computations were stopped more than ``grace`` s ago and are still running."""
    return len(_WATCHDOG.overdue(grace))


def _thread_cpu_start() -> float:
    used = thread_cpu_seconds(threading.get_ident())
    return used if used is not None else time.thread_time()


def run_guarded(guard: Guard, fn: Callable[[], T],
                on_stop: Callable[[Ticket], BaseException] | None = None) -> T:
    """Run ``fn()`` under ``guard``'s limits, with a ticket for the cost model.

    Parameters
    ----------
    guard : Guard
    fn : callable
        The computation.
    on_stop : callable, optional
        Builds the exception raised when the watchdog stops the computation
        (default: :class:`StopComputation` itself).

    Returns
    -------
    The value of ``fn()``.
    """
    ticket = Ticket(threading.get_ident(), guard, cpu_start=_thread_cpu_start())
    watched = guard.wall_seconds > 0 or (guard.cpu_seconds > 0 and CPU_CLOCK_AVAILABLE)
    _LOCAL.ticket = ticket
    try:
        try:
            if watched:
                _WATCHDOG.register(ticket)
            return fn()
        finally:
            _finish(ticket, watched)
    except StopComputation:
        _finish(ticket, watched)
        if not ticket.stopped:  # not ours (cannot happen): pass it on unchanged
            raise
        if on_stop is None:
            raise
        raise on_stop(ticket) from None


def _finish(ticket: Ticket, watched: bool) -> None:
    """Unregister, release the lane, record the CPU time (idempotent)."""
    if watched:
        _WATCHDOG.unregister(ticket)
    ticket.release()
    if _LOCAL.__dict__.get("ticket") is ticket:
        ticket.cpu_used = max(0.0, _thread_cpu_start() - ticket.cpu_start)
        _LOCAL.last = ticket
        _LOCAL.ticket = None
