"""Metered sweeps: the cost of a grid measured on its first part, before the rest is computed.

The cost of one point of a sweep (the phase diagram, the depth scales)
depends on where it lies: in the default window of the phase diagram a
point costs 0.1 to 1.3 ms, but in windows where c* lies very close to 1
(large sigma_b2, or sigma_w2 near 1e4) the same activation costs 10 to 35 ms
a point, so no fixed per-point cost is both a bound and useful. The sweep
(:func:`propcalc.sweep`) deals the grid's points to chunks in turn, so each
chunk samples the whole window evenly, and runs the chunks through an
executor. :class:`MeteredExecutor` runs them here, one after the other, and
after each chunk projects the CPU time of the whole grid from the share done
so far; when the projection passes the budget it stops the sweep with 422
``work-budget-exceeded``, having spent about one chunk (a 32nd of the
grid, at least 8 points: :func:`metered_chunk_size`) of the work. The projection after the first chunk is
recorded as the request's estimate (:class:`propcalc_api._guard.Ticket`).
"""

from __future__ import annotations

import time
from collections.abc import Callable
from concurrent.futures import Future, ThreadPoolExecutor
from typing import Any

from ._fields import format_number
from ._guard import current_ticket
from ._problems import WorkBudgetExceeded

__all__ = ["MeteredExecutor", "UNIT_SECONDS", "take_expensive_slot", "metered_chunk_size"]

#: CPU seconds of one work unit (units were measured as milliseconds of one core)
UNIT_SECONDS = 1e-3


def metered_chunk_size(total_points: int) -> int:
    """Points per chunk of a metered sweep: a 32nd of the grid, at least 8.

    Small chunks make the first projection cheap (a refused window costs one
    chunk), large enough ones keep the sweep's vectorised steps efficient.
    """
    return max(8, total_points // 32)


def take_expensive_slot() -> None:
    """Take a slot of the expensive lane for a metered sweep, whatever its static estimate.

    Its cost is known only once it runs, and it runs under the image render
    lock: waiting for a slot there could hold other images up, so the slot is
    taken first. Raises the lane's 503 problem when the lane is full.
    """
    from ._budget import busy_problem
    from ._lane import LaneBusy

    ticket = current_ticket()
    if ticket is not None:
        try:
            ticket.take_slot()
        except LaneBusy as busy:
            raise busy_problem(busy) from None


class MeteredExecutor(ThreadPoolExecutor):
    """An executor that runs each task at once, in the calling thread, and meters it.

    It subclasses ThreadPoolExecutor only so that the sweep passes activations
    as objects (as it does for threads) rather than by name; it never starts
    a thread.

    Parameters
    ----------
    total_points : int
        Grid points of the whole sweep.
    fixed_units : float
        Work units of the request besides the sweep (the figure, q*).
    budget : float
        ``WORK_BUDGET``.
    factor : float
        The formula factor (2 for a typed formula): the measured time is
        divided by it to compare in the same units as the static estimate,
        which is multiplied by it.
    what : str
        The request in words, for the refusal.
    pointer : str
        The member to shrink.
    """

    def __init__(self, total_points: int, fixed_units: float, budget: float, factor: float,
                 what: str, pointer: str) -> None:
        super().__init__(max_workers=1)
        self.total_points = max(1, total_points)
        self.fixed_units = fixed_units
        self.budget = budget
        self.factor = factor
        self.what = what
        self.pointer = pointer
        self.done_points = 0
        self.cpu_seconds = 0.0
        self.first_projection: float | None = None

    def submit(self, fn: Callable[..., Any], /, *args: Any, **kwargs: Any) -> Future[Any]:
        """Run ``fn(*args, **kwargs)`` now, then check the projected cost of the sweep."""
        t0 = time.thread_time()
        value = fn(*args, **kwargs)
        self.cpu_seconds += time.thread_time() - t0
        task = args[0] if args else None
        points = getattr(task, "sigma_w2", None)
        self.done_points += int(getattr(points, "size", 0) or 0)
        self._check()
        future: Future[Any] = Future()
        future.set_result(value)
        return future

    def projected_units(self) -> float | None:
        """Units of the whole request, projected from the points done (None before any)."""
        if self.done_points <= 0:
            return None
        share = min(1.0, self.done_points / self.total_points)
        return self.fixed_units * self.factor + self.cpu_seconds / share / UNIT_SECONDS

    def _check(self) -> None:
        projected = self.projected_units()
        if projected is None:
            return
        if self.first_projection is None:
            self.first_projection = projected
            ticket = current_ticket()
            if ticket is not None:  # the slot was taken before the sweep (take_expensive_slot)
                ticket.estimate = max(ticket.estimate, projected)
        if projected <= self.budget:
            return
        per_point = self.cpu_seconds / self.done_points / UNIT_SECONDS
        fits = max(0, int((self.budget - self.fixed_units * self.factor) // max(per_point, 1e-9)))
        advice = (f"in this window a point costs about {per_point:.3g} work units (measured on "
                  f"the first {self.done_points} of {self.total_points} points): ask for at most "
                  f"{fits} points, or a window nearer the default one")
        raise WorkBudgetExceeded(
            f"{self.what} needs an estimated {format_number(round(projected))} work units "
            f"(about {projected / 1000:.1f} s of CPU, projected from its first "
            f"{self.done_points} points); the limit is {format_number(self.budget)} "
            f"(WORK_BUDGET): {advice}", "WORK_BUDGET", self.budget, estimate=projected,
            pointer=self.pointer,
            entry=f"too much work for one request ({self.what}): {advice}")
