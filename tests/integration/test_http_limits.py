"""Limits that hold under abuse, against the service's own HTTP server on loopback: 2,000 half-open
connections (a request head never finished) are all dropped once the header timeout passes while a normal
read from another address is served throughout; connections over the caps (all, per address) and event
streams over theirs answer 503 with Retry-After; every refusal and timeout counted in /metrics.

The flood comes from 127.0.0.2 (all of 127.0.0.0/8 is this machine), the normal reader from 127.0.0.1, so the
per-address caps tell them apart as they would two hosts. The figures are printed (``-s`` shows them)."""

from __future__ import annotations

import selectors
import socket
import statistics
import time
from collections.abc import Iterator
from contextlib import ExitStack, contextmanager
from pathlib import Path

import httpx
import pytest

from tests.support.auth_tokens import auth_section
from tests.support.http_servers import RunningServer, running_server

pytestmark = pytest.mark.integration

CHANNELS = {"dp": {"terms": ["1", "u"]}}
FLOOD = 2000
HEADER_TIMEOUT = 1.0                 # seconds; small so that the test is quick (the default is 10 s)
ATTACKER = "127.0.0.2"


def _open(port: int, source: str) -> socket.socket:
    sock = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
    sock.bind((source, 0))
    sock.connect(("127.0.0.1", port))
    return sock


def _read(port: int) -> tuple[float, bytes]:
    """A normal read from 127.0.0.1 on a fresh connection: seconds to the whole answer, and the answer.

    (A raw socket with TCP_NODELAY: httpx's keep-alive requests wait out a 40 ms delayed acknowledgement on
    loopback, which would hide the server's own time.)"""
    t0 = time.perf_counter()
    with _open(port, "127.0.0.1") as sock:
        sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        sock.sendall(b"GET /api/v1/channels HTTP/1.1\r\nHost: x\r\nConnection: close\r\n\r\n")
        sock.settimeout(5.0)
        answer = b""
        while chunk := sock.recv(65536):
            answer += chunk
    return time.perf_counter() - t0, answer


def _metrics(served: RunningServer) -> dict[str, float]:
    text = httpx.get(served.url + "/metrics", timeout=5.0).text
    return {line.rsplit(" ", 1)[0]: float(line.rsplit(" ", 1)[1]) for line in text.splitlines()
            if line.startswith("rwls_") and not line.startswith("#")}


def _answer(sock: socket.socket, request: bytes) -> bytes:
    sock.sendall(request)
    sock.settimeout(5.0)
    answer = b""
    while chunk := sock.recv(65536):
        answer += chunk
        if b"\r\n\r\n" in answer and (b"text/event-stream" in answer or answer.endswith(b"}")):
            break
    return answer


def test_two_thousand_half_open_connections_are_dropped_after_the_header_timeout_while_reads_go_on(
        tmp_path: Path) -> None:
    http = {"header_timeout": HEADER_TIMEOUT, "max_connections": 3000, "max_connections_per_address": 2500}
    with running_server(CHANNELS, tmp_path / "store", http=http, auth=auth_section()) as served, \
            ExitStack() as sockets:
        quiet = []
        for _ in range(50):
            seconds, answer = _read(served.port)
            assert answer.startswith(b"HTTP/1.1 200")
            quiet.append(seconds)
        started = time.monotonic()
        flood = []
        for k in range(FLOOD):
            sock = sockets.enter_context(_open(served.port, ATTACKER))
            sock.sendall(b"GET /api/v1/channels HTTP/1.1\r\nHost: x\r\n")     # and never the blank line
            flood.append(sock)
            if k % 200 == 0:
                assert _read(served.port)[1].startswith(b"HTTP/1.1 200")
        opened = time.monotonic() - started
        selector = selectors.DefaultSelector()
        for sock in flood:
            sock.setblocking(False)
            selector.register(sock, selectors.EVENT_READ)
        latencies: list[float] = []
        dropped_at: list[float] = []
        held_at_peak = _metrics(served)["rwls_http_connections"]
        deadline = time.monotonic() + HEADER_TIMEOUT + 15.0
        while len(dropped_at) < FLOOD and time.monotonic() < deadline:
            seconds, answer = _read(served.port)
            assert answer.startswith(b"HTTP/1.1 200")
            latencies.append(seconds)
            for key, _ in selector.select(timeout=0.02):
                sock = key.fileobj
                assert isinstance(sock, socket.socket)
                try:
                    data = sock.recv(4096)
                except ConnectionResetError:
                    data = b""
                assert data == b""                      # closed without an answer
                selector.unregister(sock)
                dropped_at.append(time.monotonic() - started)
        selector.close()
        after = _metrics(served)
    assert len(dropped_at) == FLOOD, f"{FLOOD - len(dropped_at)} half-open connections still held"
    assert held_at_peak >= FLOOD
    assert after["rwls_http_header_timeouts_total"] >= FLOOD
    assert after["rwls_http_limit{name=\"header_timeout\"}"] == HEADER_TIMEOUT
    latencies.sort()
    print(f"\n{FLOOD} half-open connections opened in {opened:.2f} s; dropped {min(dropped_at):.2f} s to "
          f"{max(dropped_at):.2f} s after the first was opened (header timeout {HEADER_TIMEOUT:g} s); "
          f"{len(latencies)} reads meanwhile from another address: p50 "
          f"{statistics.median(latencies) * 1000:.1f} ms, p99 {latencies[int(0.99 * (len(latencies) - 1))] * 1000:.1f}"
          f" ms, max {latencies[-1] * 1000:.1f} ms; before the flood p50 {statistics.median(quiet) * 1000:.1f} ms "
          f"(server and client in one process)")


@contextmanager
def _held(port: int, source: str, n: int) -> Iterator[list[socket.socket]]:
    with ExitStack() as stack:
        yield [stack.enter_context(_open(port, source)) for _ in range(n)]


def _settled(served: RunningServer, name: str, value: float) -> None:
    deadline = time.monotonic() + 5.0
    while _metrics(served).get(name) != value and time.monotonic() < deadline:
        time.sleep(0.02)


def test_connections_over_the_caps_answer_503_with_retry_after_and_are_counted(tmp_path: Path) -> None:
    http = {"max_connections": 12, "max_connections_per_address": 5, "header_timeout": 30.0}
    get = b"GET /api/v1/health HTTP/1.1\r\nHost: x\r\nConnection: close\r\n\r\n"
    with running_server(CHANNELS, tmp_path / "store", http=http) as served:
        with _held(served.port, ATTACKER, 5):
            with _open(served.port, ATTACKER) as sixth:
                answer = _answer(sixth, get)
            assert answer.startswith(b"HTTP/1.1 503") and b"retry-after: 5" in answer.lower()
            assert b"too many connections" in answer and b"x-content-type-options: nosniff" in answer
            with _open(served.port, "127.0.0.1") as other:                  # another address: served
                assert _answer(other, get).startswith(b"HTTP/1.1 200")
            with _held(served.port, "127.0.0.3", 5), _held(served.port, "127.0.0.4", 2), \
                    _open(served.port, "127.0.0.5") as thirteenth:                     # 12 open already
                assert _answer(thirteenth, get).startswith(b"HTTP/1.1 503")
        _settled(served, "rwls_http_connections", 1.0)                      # the scrape's own connection
        metrics = _metrics(served)
        with _open(served.port, ATTACKER) as again:                           # slots given back
            assert _answer(again, get).startswith(b"HTTP/1.1 200")
    assert metrics['rwls_http_refused_total{reason="connections_per_address"}'] == 1.0
    assert metrics['rwls_http_refused_total{reason="connections"}'] >= 1.0
    assert metrics['rwls_http_limit{name="max_connections"}'] == 12.0


def test_a_request_head_that_stalls_midway_is_dropped_too(tmp_path: Path) -> None:
    with running_server(CHANNELS, tmp_path / "store", http={"header_timeout": 0.5}) as served, \
            _open(served.port, ATTACKER) as sock:
        sock.sendall(b"GET /api/v1/health HTTP/1.1\r\nHost: x\r\nConnection: keep-alive\r\n\r\n")
        sock.settimeout(5.0)
        assert sock.recv(65536).startswith(b"HTTP/1.1 200")
        sock.sendall(b"GET /api/v1/hea")                         # a second request on the connection, stalled
        started = time.monotonic()
        assert sock.recv(65536) == b""
        assert 0.4 <= time.monotonic() - started < 5.0


def test_event_streams_over_their_caps_answer_503_and_their_slots_come_back(tmp_path: Path) -> None:
    http = {"max_event_streams": 3, "max_event_streams_per_address": 2}
    stream = b"GET /api/v1/events HTTP/1.1\r\nHost: x\r\n\r\n"
    with running_server(CHANNELS, tmp_path / "store", http=http) as served, ExitStack() as open_streams:
        def listen(source: str) -> bytes:
            sock = open_streams.enter_context(_open(served.port, source))
            return _answer(sock, stream)

        assert listen("127.0.0.1").startswith(b"HTTP/1.1 200") and listen("127.0.0.1").startswith(b"HTTP/1.1 200")
        third = listen("127.0.0.1")
        assert third.startswith(b"HTTP/1.1 503") and b"retry-after: 5" in third.lower()
        assert b"per address" in third
        assert listen(ATTACKER).startswith(b"HTTP/1.1 200")                        # 3 open: the overall cap
        assert listen("127.0.0.3").startswith(b"HTTP/1.1 503")
        metrics = _metrics(served)
        assert metrics["rwls_event_streams"] == 3.0
        assert metrics['rwls_http_refused_total{reason="event_streams_per_address"}'] == 1.0
        assert metrics['rwls_http_refused_total{reason="event_streams"}'] == 1.0
        open_streams.close()                                    # the clients go; the streams notice within 1 s
        _settled(served, "rwls_event_streams", 0.0)
        with _open(served.port, "127.0.0.3") as sock:
            assert _answer(sock, stream).startswith(b"HTTP/1.1 200")
