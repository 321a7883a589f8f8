"""A gunicorn worker that serves through waitress: whole requests before any thread sees them.

gunicorn's arbiter keeps the processes (it binds the socket, forks the
workers after loading the app once, restarts a worker that dies, exits or
stops sending heartbeats, and recycles workers after ``max_requests``). Each
worker runs waitress on the socket it inherits: waitress's event loop (one
thread) reads every request, headers and body, to the end before it hands
it to one of its threads, and closes connections that stay idle, so slow or
idle clients cost a file descriptor each, never a thread. The measurements
behind this choice are in docs/service.md ("Production server").

The worker's main thread runs the event loop in short steps, and between
steps sends gunicorn its heartbeat, checks that the arbiter is still its
parent, counts requests against ``max_requests``, and exits (so that the
arbiter starts a fresh worker) if a computation that the watchdog stopped
is still running long after (stuck inside one C call: see
:mod:`propcalc_api._guard`). On SIGTERM it stops accepting, lets the
requests in flight finish (at most ``graceful_timeout`` seconds) and exits.
"""

from __future__ import annotations

import os
import sys
import threading
import time
from collections.abc import Callable, Iterable
from typing import Any

from gunicorn.workers.base import Worker
from waitress.channel import HTTPChannel
from waitress.parser import HTTPRequestParser, ParsingError
from waitress.receiver import ChunkedReceiver
from waitress.server import BaseWSGIServer
from waitress.utilities import RequestEntityTooLarge

from ._guard import overdue

__all__ = ["BufferingWorker", "WAITRESS_SETTINGS", "STEP_SECONDS", "SWITCH_INTERVAL",
           "StrictFramingParser"]

#: seconds of one step of the event loop between two heartbeats
STEP_SECONDS = 0.25

#: waitress settings of every worker (see docs/service.md for why each)
WAITRESS_SETTINGS: dict[str, Any] = {
    "threads": 8,                 # computations at once per worker (cheap ones never wait)
    "connection_limit": 1000,     # open connections per worker before accepting pauses
    "channel_timeout": 10,        # close a connection idle (or stalled mid-request) for 10 s
    "cleanup_interval": 2,        # look for such connections every 2 s
    "asyncore_use_poll": True,    # poll(), not select(): no 1024-descriptor ceiling
    "max_request_header_size": 16 * 1024,
    "backlog": 2048,
    "ident": "propcalc",
    "expose_tracebacks": False,
    "log_socket_errors": False,
}

#: seconds between two hand-overs of the GIL in a worker (Python's default is 0.005)
SWITCH_INTERVAL = 0.001

#: a computation stopped by the watchdog but still running this long after is stuck
_STUCK_SECONDS = 30.0


class _BoundedChunks(ChunkedReceiver):  # type: ignore[misc]
    """Chunked body reader that refuses a chunk size past the body limit when it is read
    (waitress alone would wait for the bytes of a chunk of size ffffffffffff)."""

    def __init__(self, buf: Any, max_body: int) -> None:
        super().__init__(buf)
        self.max_body = max_body

    def received(self, s: bytes) -> int:
        consumed = int(super().received(s))
        if self.error is None and len(self.buf) + self.chunk_remainder >= self.max_body:
            self.error = RequestEntityTooLarge(f"a chunk runs past the body limit of "
                                               f"{self.max_body} bytes")
            self.all_chunks_received = True
        return consumed


class StrictFramingParser(HTTPRequestParser):  # type: ignore[misc]
    """waitress's request parser, stricter about framing.

    * A request with both ``Transfer-Encoding`` and ``Content-Length`` is refused
      with 400 (RFC 9112 section 6.3: such a message "ought to be handled as an
      error"; waitress would read it as chunked and keep the connection open).
    * A chunk size that runs past the body limit is refused with 413 as soon as
      its size line is read.

    waitress answers both, like every error of its parser, with
    ``Connection: close`` and closes the connection.
    """

    def parse_header(self, header_plus: bytes) -> None:
        super().parse_header(header_plus)
        if self.chunked and "CONTENT_LENGTH" in self.headers:
            raise ParsingError("a request may not have both Transfer-Encoding and "
                               "Content-Length")
        if self.chunked:
            self.body_rcv = _BoundedChunks(self.body_rcv.buf, self.adj.max_request_body_size)


class _StrictChannel(HTTPChannel):  # type: ignore[misc]
    parser_class = StrictFramingParser


#: a connection accepted this recently that has sent nothing yet may be about to send a request
_FRESH_SECONDS = 2.0


def _idle_after_a_request(channel: Any) -> bool:
    """A keep-alive connection that has been served and now waits (safe to close at once)."""
    return (isinstance(channel, HTTPChannel) and not channel.requests
            and channel.request is None and not channel.total_outbufs_len
            and channel.last_activity > channel.creation_time)


def _in_use(channel: Any) -> bool:
    """A connection a stopping worker must still serve: a request read, being read or being
    answered, or just accepted (closing it with unread bytes would reset it)."""
    if not isinstance(channel, HTTPChannel):
        return False
    fresh = (channel.last_activity <= channel.creation_time
             and time.time() - channel.creation_time < _FRESH_SECONDS)
    return bool(channel.requests or channel.request is not None
                or channel.total_outbufs_len or fresh)


def _counting(app: Callable[..., Iterable[bytes]], counter: list[int],
              lock: threading.Lock) -> Callable[..., Iterable[bytes]]:
    def counted(environ: dict[str, Any], start_response: Callable[..., Any]) -> Iterable[bytes]:
        with lock:
            counter[0] += 1
        return app(environ, start_response)

    return counted


class BufferingWorker(Worker):
    """gunicorn worker class ``propcalc_api._worker.BufferingWorker`` (waitress inside).

    The body limit of waitress is four times the app's ``MAX_CONTENT_LENGTH``
    (bodies between the two get the app's 413 problem document; larger ones,
    and malformed chunked framing, get waitress's plain 413/400 and the
    connection is closed).
    """

    def run(self) -> None:
        """The worker's main loop (called by gunicorn after the app is loaded)."""
        from waitress import wasyncore
        from waitress.server import create_server

        # hand the GIL over every millisecond (default 5 ms): a cheap request's thread then
        # waits less for an expensive one computing in the same process
        sys.setswitchinterval(SWITCH_INTERVAL)
        try:  # numpy's BLAS must not start its own threads beside the workers'
            from threadpoolctl import threadpool_limits
            threadpool_limits(1)
        except ImportError:  # pragma: no cover - OMP_NUM_THREADS=1 does the same
            pass
        max_body = 4 * int(getattr(self.wsgi, "config", {}).get("MAX_CONTENT_LENGTH", 65536))
        served = [0]
        lock = threading.Lock()
        socket_map: dict[int, Any] = {}
        server = create_server(_counting(self.wsgi, served, lock), map=socket_map,
                               sockets=[s.sock for s in self.sockets],
                               max_request_body_size=max_body, **WAITRESS_SETTINGS)
        listeners = [d for d in socket_map.values() if isinstance(d, BaseWSGIServer)]
        for listener in listeners:
            listener.channel_class = _StrictChannel
        dispatcher = server.task_dispatcher
        reason = "stopping"
        while self.alive:
            self.notify()
            wasyncore.loop(timeout=STEP_SECONDS, map=socket_map, use_poll=True, count=1)
            if self.ppid != os.getppid():
                reason = "the arbiter is gone"
                break
            if served[0] >= self.max_requests:
                reason = f"{served[0]} requests served (max_requests): recycling"
                break
            if overdue(_STUCK_SECONDS):
                reason = "a stopped computation is stuck: restarting"
                break
        self.log.info("worker %s: %s", os.getpid(), reason)
        for listener in listeners:  # accept nothing more; the other workers take over
            listener.accepting = False
        for channel in list(socket_map.values()):  # idle keep-alive connections: close now
            if _idle_after_a_request(channel):
                channel.handle_close()
        deadline = time.monotonic() + self.cfg.graceful_timeout
        while time.monotonic() < deadline:
            self.notify()
            busy = dispatcher.active_count or dispatcher.queue or any(
                _in_use(ch) for ch in list(socket_map.values()))
            if not busy:
                break
            wasyncore.loop(timeout=0.05, map=socket_map, use_poll=True, count=1)
        dispatcher.shutdown(cancel_pending=True, timeout=1)
        wasyncore.close_all(socket_map)
