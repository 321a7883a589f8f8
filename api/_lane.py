"""The expensive lane: a limit on how many expensive computations run at once.

A request whose estimated cost reaches ``EXPENSIVE_UNITS`` (see
:mod:`propcalc_api._budget`) must hold one of ``EXPENSIVE_SLOTS`` slots while
it computes. Cheap requests never wait for a slot, so they keep a core (and
their latency) while expensive ones run. A request that finds every slot
taken waits, at most ``EXPENSIVE_WAIT`` seconds and behind at most
``EXPENSIVE_QUEUE`` others of the same process; beyond either it is answered
503 with a ``Retry-After`` header (:class:`LaneBusy`).

The slots are per process, or shared by every process of a server when
``EXPENSIVE_LOCK_DIR`` names a directory (``propcalc serve --production``
makes one): slot i is then an exclusive ``flock`` on the file
``expensive-<i>.lock`` there, which the kernel releases if the process dies,
so a killed worker can never leak a slot.
"""

from __future__ import annotations

import logging
import math
import os
import threading
import time
from typing import Protocol

__all__ = ["Lane", "LaneBusy", "Slot"]

_log = logging.getLogger("propcalc_api")

#: how often a waiter looks at the shared slot files again (seconds)
_POLL = 0.01

try:  # POSIX only; elsewhere the slots are per process
    import fcntl
except ImportError:  # pragma: no cover - Windows
    fcntl = None  # type: ignore[assignment]


class Slot(Protocol):
    """A held slot of the lane."""

    def release(self) -> None:
        """Give the slot back (idempotent)."""


class LaneBusy(Exception):
    """Every slot is taken and the queue is full, or the wait ran out (answered 503).

    Attributes
    ----------
    retry_after : int
        Seconds after which a retry is likely to find a free slot.
    """

    def __init__(self, detail: str, retry_after: int) -> None:
        super().__init__(detail)
        self.retry_after = retry_after


class _LocalSlot:
    def __init__(self, sem: threading.Semaphore) -> None:
        self._sem: threading.Semaphore | None = sem

    def release(self) -> None:
        sem, self._sem = self._sem, None
        if sem is not None:
            sem.release()


class _FileSlot:
    def __init__(self, fd: int) -> None:
        self._fd = fd

    def release(self) -> None:
        fd, self._fd = self._fd, -1
        if fd >= 0:
            os.close(fd)  # closing the descriptor drops the flock


class Lane:
    """Slots for expensive computations.

    Parameters
    ----------
    slots : int
        Expensive computations that may run at once (>= 1).
    queue : int
        Expensive requests of one process that may wait for a slot (>= 0).
    wait_seconds : float
        Longest wait for a slot.
    retry_after : int
        The ``Retry-After`` seconds sent with a 503.
    lock_dir : str, optional
        Share the slots between processes through ``flock`` files there.
    """

    def __init__(self, slots: int, queue: int, wait_seconds: float, retry_after: int,
                 lock_dir: str | None = None) -> None:
        self.slots = slots
        self.queue = queue
        self.wait_seconds = wait_seconds
        self.retry_after = retry_after
        self.lock_dir = lock_dir if fcntl is not None else None
        self._sem = threading.Semaphore(slots)
        self._lock = threading.Lock()
        self._waiting = 0

    def _try_file(self) -> Slot | None:
        assert self.lock_dir is not None and fcntl is not None
        for i in range(self.slots):
            try:
                fd = os.open(os.path.join(self.lock_dir, f"expensive-{i}.lock"),
                             os.O_RDWR | os.O_CREAT, 0o600)
            except OSError as exc:  # the directory is gone: the slots are per process now
                _log.warning("expensive lane: %s; slots are now per process", exc)
                self.lock_dir = None
                return self._try(0.0)
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except OSError:
                os.close(fd)
                continue
            return _FileSlot(fd)
        return None

    def _try(self, timeout: float) -> Slot | None:
        if self.lock_dir is None:
            if timeout <= 0:
                ok = self._sem.acquire(blocking=False)
            else:
                ok = self._sem.acquire(timeout=timeout)
            return _LocalSlot(self._sem) if ok else None
        deadline = time.monotonic() + timeout
        while True:
            slot = self._try_file()
            if slot is not None or time.monotonic() >= deadline:
                return slot
            if self.lock_dir is None:
                return self._try(deadline - time.monotonic())
            time.sleep(_POLL)

    def _busy(self, why: str, estimate: float) -> LaneBusy:
        return LaneBusy(
            f"the service is busy with expensive requests ({why}); this request (an estimated "
            f"{math.ceil(estimate)} work units) was not started: retry in about "
            f"{self.retry_after} s", self.retry_after)

    def admit(self, estimate: float) -> Slot:
        """A slot, waiting for one if needed.

        Raises
        ------
        LaneBusy
            When ``queue`` requests of this process already wait, or no slot
            came free within ``wait_seconds``.
        """
        slot = self._try(0.0)
        if slot is not None:
            return slot
        with self._lock:
            if self._waiting >= self.queue:
                raise self._busy(f"{self.slots} running and {self._waiting} waiting", estimate)
            self._waiting += 1
        try:
            slot = self._try(self.wait_seconds)
        finally:
            with self._lock:
                self._waiting -= 1
        if slot is None:
            raise self._busy(f"no slot came free within {self.wait_seconds:g} s", estimate)
        return slot
