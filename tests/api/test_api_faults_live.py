"""The production server under faults, live on 127.0.0.1 (issue 11 section 4).

Against ``propcalc serve --production`` (the session's server, 2 workers):
slow clients that hold partial requests, silent and idle keep-alive
connections, malformed framing, and the inputs that used to produce NaN.
Every loop is bounded (probes: 0.5 s apart for a few seconds; sockets: at most
a few hundred) and only loopback addresses are used. Sources: RFC 9112
(HTTP/1.1 message framing: sections 6.1 and 7.1 on chunked transfer coding,
6.3 on Transfer-Encoding with Content-Length); the expectations about
slow-client behaviour are the service's own contract (docs/service.md).
"""

from __future__ import annotations

import json
import socket
import time

import pytest
import requests

import faults

HOST = "127.0.0.1"


@pytest.mark.parametrize("kind", faults.KINDS)
def test_held_connections_never_block_health(live_server, kind):
    # 120 connections (more than the old sync workers could survive by a factor 60) hold a
    # partial request (or nothing, or an idle keep-alive) while /health is probed every 0.5 s
    # with a 1 s timeout: every probe answers 200
    with faults.held_connections(HOST, live_server.port, 120, kind) as socks:
        assert len(socks) >= 100
        probes = faults.probe(HOST, live_server.port, seconds=4.0, interval=0.5, timeout=1.0)
    assert [p.status for p in probes] == [200] * len(probes), probes


def test_computations_still_answer_while_connections_are_held(live_server):
    with faults.held_connections(HOST, live_server.port, 60, "partial_body"):
        resp = requests.post(live_server.url + "/v1/propagation", timeout=10,
                             json={"activation": "tanh", "sigma_w2": 1.4, "sigma_b2": 0.02})
    assert resp.status_code == 200 and resp.json()["phase"] in ("ordered", "chaotic")


def test_stalled_and_idle_connections_are_closed(live_server):
    # waitress closes a connection idle or stalled mid-request for channel_timeout (10 s),
    # looked for every cleanup_interval (2 s): each socket sees the close within 16 s
    with faults.held_connections(HOST, live_server.port, 4, "partial_body") as stalled, \
            faults.held_connections(HOST, live_server.port, 4, "idle_keepalive") as idle:
        socks = stalled + idle
        assert len(socks) == 8
        deadline = time.monotonic() + 16.0
        closed = set()
        while len(closed) < len(socks) and time.monotonic() < deadline:
            for i, sock in enumerate(socks):
                if i in closed:
                    continue
                sock.settimeout(0.05)
                try:
                    data = sock.recv(4096)
                except (TimeoutError, socket.timeout):
                    continue
                except OSError:
                    data = b""
                if not data:
                    closed.add(i)
            time.sleep(0.2)
    assert len(closed) == len(socks)


_CHUNKED = ("POST /v1/propagation HTTP/1.1\r\nHost: 127.0.0.1\r\n"
            "Content-Type: application/json\r\nTransfer-Encoding: chunked\r\n\r\n")
_FRAMING = {
    # RFC 9112 section 7.1: chunk-size = 1*HEXDIG
    "chunk size zz": (_CHUNKED + "zz\r\n{}\r\n0\r\n\r\n", 400),
    "negative chunk size": (_CHUNKED + "-5\r\n{}\r\n0\r\n\r\n", 400),
    # a chunk that does not end in CRLF
    "chunk without its CRLF": (_CHUNKED + "2\r\n{}XX0\r\n\r\n", 400),
    # chunk sizes far past the body limit: refused when the size line is read
    "chunk size 2^80": (_CHUNKED + "ffffffffffffffffffff\r\n{\"a", 413),
    "chunk size 2^40": (_CHUNKED + "10000000000\r\n{\"a", 413),
    # RFC 9112 section 6.3: both headers "ought to be handled as an error"
    "Transfer-Encoding and Content-Length": (
        "POST /v1/propagation HTTP/1.1\r\nHost: x\r\nContent-Type: application/json\r\n"
        "Content-Length: 4\r\nTransfer-Encoding: chunked\r\n\r\n2\r\n{}\r\n0\r\n\r\n", 400),
    "Content-Length zz": ("POST /v1/propagation HTTP/1.1\r\nHost: x\r\n"
                          "Content-Length: zz\r\n\r\n{}", 400),
    "Content-Length 1e14": ("POST /v1/propagation HTTP/1.1\r\nHost: x\r\n"
                            "Content-Length: 99999999999999\r\n\r\n{}", 413),
    "garbage request line": ("\x00\x01 garbage\r\n\r\n", 400),
    "70 kB header": ("GET /health HTTP/1.1\r\nHost: x\r\nX-A: " + "a" * 70000 + "\r\n\r\n", 431),
}


@pytest.mark.parametrize("name", sorted(_FRAMING))
def test_malformed_framing_is_4xx_and_the_connection_is_released(live_server, name):
    data, status = _FRAMING[name]
    t0 = time.monotonic()
    got, closed = faults.raw_exchange(HOST, live_server.port, data.encode("latin-1"), timeout=8)
    assert got == status, (name, got)
    assert closed and time.monotonic() - t0 < 5.0  # answered and closed, nothing held


def test_health_after_the_framing_faults(live_server):
    assert requests.get(live_server.url + "/health", timeout=5).status_code == 200


# the inputs of issue 11 that produced NaN (and 500s): now a finite result or a 4xx
_NAN_INPUTS = [
    ("/v1/maps/correlation", {"activation": "step", "sigma_w2": 1.5, "q": 5e-324,
                              "c": [-0.5, 0.0, 0.5]}),
    ("/v1/maps/variance", {"activation": "step", "sigma_w2": 1.5, "q": [5e-324, 1e-310]}),
    ("/v1/maps/correlation", {"activation": {"formula": "where(sin(x/100) > 0, x, 0.5*x)"},
                              "sigma_w2": 1.5, "c": [1.0], "with_slope": True}),
    ("/v1/maps/correlation", {"activation": {"formula": "where(sin(x/100) > 0, x, 0.5*x)"},
                              "sigma_w2": 1.5, "q": 1.0, "c": [0.5, 1.0], "with_slope": True}),
    ("/v1/propagation", {"activation": {"formula": "where(abs(x) > 9999.9, 1e300, x)"},
                         "sigma_w2": 1.5}),
    ("/v1/describe", {"activation": {"formula": "where(abs(x) > 9999.9, 1e300, x)"}}),
    ("/v1/maps/variance", {"activation": {"formula": "where(abs(x) > 9999.9, 1e300, x)"},
                           "sigma_w2": 1.5, "q": [1.0, 1e8]}),
]


@pytest.mark.parametrize("path, body", _NAN_INPUTS)
def test_nan_inputs_never_give_500(live_server, strict_json, path, body):
    resp = requests.post(live_server.url + path, json=body, timeout=30)
    assert resp.status_code < 500, (resp.status_code, resp.text[:300])
    assert "NaN" not in resp.text and "Infinity" not in resp.text
    parsed = strict_json(resp.content)  # finite numbers only
    if resp.status_code != 200:
        assert resp.headers["Content-Type"] == "application/problem+json"
        assert parsed["status"] == resp.status_code and parsed["detail"]


def test_no_500_for_a_burst_of_hostile_bodies(live_server):
    # a bounded burst of odd bodies; every answer is a 2xx or a 4xx problem document
    bodies = [b"", b"{", b"[]", b"null", b'{"activation": "tanh", "sigma_w2": 1e999}',
              b'{"activation": "tanh", "sigma_w2": NaN}', b'{"a": 1, "a": 2}',
              json.dumps({"activation": {"formula": "abs(" * 24 + "x" + ")" * 24},
                          "sigma_w2": 1.0}).encode(),
              b'{"activation": "tanh", "sigma_w2": 1.5, "depth": 1e300}',
              b"\xff\xfe{}"]
    for body in bodies:
        resp = requests.post(live_server.url + "/v1/propagation", data=body, timeout=30,
                             headers={"Content-Type": "application/json"})
        assert 200 <= resp.status_code < 500, (body[:40], resp.status_code, resp.text[:200])
