"""Misbehaving HTTP clients for the live fault tests and the benchmarks (a helper, not tests).

Every function talks to a loopback address only (127.0.0.1 or ::1: :func:`loopback`
refuses anything else), every loop is bounded in count and in time, and every
socket is closed when the function (or the ``with`` block) ends.

* :func:`held_connections`: N sockets that each start a request and then stall
  (headers and 5 bytes of a 4000-byte body; half the headers; nothing at all;
  one finished request and then an idle keep-alive connection), kept open for
  the duration of a ``with`` block.
* :func:`probe`: ``GET /health`` every ``interval`` seconds for ``seconds``,
  each with its own timeout; returns every probe's outcome and latency.
* :func:`raw_exchange`: send raw bytes, read the answer until the server
  closes or the timeout passes; returns the status code (or None) and whether
  the server closed the connection.
"""

from __future__ import annotations

import socket
import time
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass

__all__ = ["KINDS", "loopback", "held_connections", "Probe", "probe", "raw_exchange",
           "status_of"]

#: the ways a held connection stalls
KINDS = ("partial_body", "partial_headers", "silent", "idle_keepalive")

_MAX_HELD = 500


def loopback(host: str) -> str:
    """Return ``host`` if it is a loopback address, else raise ValueError."""
    if host not in ("127.0.0.1", "::1", "localhost"):
        raise ValueError(f"fault clients talk to loopback addresses only, got {host!r}")
    return host


def _connect(host: str, port: int, timeout: float) -> socket.socket:
    family = socket.AF_INET6 if ":" in host else socket.AF_INET
    sock = socket.socket(family, socket.SOCK_STREAM)
    sock.settimeout(timeout)
    sock.connect((loopback(host), port))
    return sock


def _opening(kind: str, host: str) -> bytes:
    if kind == "partial_body":
        return (f"POST /v1/propagation HTTP/1.1\r\nHost: {host}\r\n"
                "Content-Type: application/json\r\nContent-Length: 4000\r\n\r\n{\"act").encode()
    if kind == "partial_headers":
        return f"POST /v1/propagation HTTP/1.1\r\nHost: {host}\r\nContent-Ty".encode()
    if kind == "silent":
        return b""
    if kind == "idle_keepalive":
        return f"GET /health HTTP/1.1\r\nHost: {host}\r\n\r\n".encode()
    raise ValueError(f"kind must be one of {KINDS}, got {kind!r}")


@contextmanager
def held_connections(host: str, port: int, count: int, kind: str = "partial_body",
                     timeout: float = 5.0) -> Iterator[list[socket.socket]]:
    """Open ``count`` connections that stall as ``kind`` says; close them on exit.

    Parameters
    ----------
    host, port : str, int
        A loopback address and the server's port.
    count : int
        Connections to hold, at most 500.
    kind : str
        One of :data:`KINDS`.
    timeout : float
        Seconds allowed for each connect (and, for ``idle_keepalive``, for the
        answer to its one request).

    Yields
    ------
    list of socket.socket
        The open sockets (a connection the server refused or reset is left out).
    """
    if not 0 <= count <= _MAX_HELD:
        raise ValueError(f"count must be in [0, {_MAX_HELD}], got {count}")
    opening = _opening(kind, host)
    socks: list[socket.socket] = []
    try:
        for _ in range(count):
            try:
                sock = _connect(host, port, timeout)
            except OSError:
                continue
            socks.append(sock)
            try:
                if opening:
                    sock.sendall(opening)
                if kind == "idle_keepalive":
                    sock.recv(65536)  # the answer; the connection then stays open, idle
            except OSError:
                pass
        yield socks
    finally:
        for sock in socks:
            sock.close()


@dataclass(frozen=True)
class Probe:
    """One health probe: when it was sent (s from the start), its status, its latency (s)."""

    at: float
    status: int | None
    latency: float

    @property
    def ok(self) -> bool:
        return self.status == 200


def status_of(data: bytes) -> int | None:
    """The status code of a raw HTTP response (None if it does not start with one)."""
    head = data.split(b"\r\n", 1)[0].split()
    if len(head) >= 2 and head[0].startswith(b"HTTP/") and head[1].isdigit():
        return int(head[1])
    return None


def _one_probe(host: str, port: int, timeout: float) -> int | None:
    request = f"GET /health HTTP/1.1\r\nHost: {host}\r\nConnection: close\r\n\r\n".encode()
    status, _ = raw_exchange(host, port, request, timeout)
    return status


def probe(host: str, port: int, seconds: float, interval: float = 0.5,
          timeout: float = 1.0) -> list[Probe]:
    """Probe ``GET /health`` every ``interval`` s for ``seconds`` s (at most 600 probes).

    Each probe is a new connection with its own ``timeout`` for connect, send
    and the whole answer; a probe that times out or is refused has status None.
    """
    probes: list[Probe] = []
    start = time.monotonic()
    for i in range(min(600, max(1, int(seconds / interval)))):
        due = start + i * interval
        pause = due - time.monotonic()
        if pause > 0:
            time.sleep(pause)
        t0 = time.monotonic()
        status = _one_probe(host, port, timeout)
        probes.append(Probe(t0 - start, status, time.monotonic() - t0))
    return probes


def raw_exchange(host: str, port: int, data: bytes, timeout: float = 5.0,
                 pause_after: float = 0.0, more: bytes = b"") -> tuple[int | None, bool]:
    """Send ``data`` (then, after ``pause_after`` s, ``more``) and read the answer.

    Returns
    -------
    status : int or None
        The status code of the first response, None if none came in time.
    closed : bool
        True if the server closed the connection within ``timeout`` seconds.
    """
    deadline = time.monotonic() + timeout
    received = b""
    closed = False
    try:
        sock = _connect(host, port, timeout)
    except OSError:
        return None, True
    with sock:
        try:
            sock.sendall(data)
            if more:
                time.sleep(pause_after)
                sock.sendall(more)
            while True:
                left = deadline - time.monotonic()
                if left <= 0:
                    break
                sock.settimeout(left)
                chunk = sock.recv(65536)
                if not chunk:
                    closed = True
                    break
                received += chunk
                if len(received) > 1 << 20:
                    break
        except (TimeoutError, socket.timeout):
            pass
        except OSError:
            closed = True
    return status_of(received), closed
