"""Connection and header limits on a real `capnote serve` process over 127.0.0.1 (issue 16,
section 1): the head's size and field count (431, and the server's memory does not follow
a header), the time for a head to arrive, the idle keep-alive timeout, and the bound on
connections per process. RFC 9110 section 15.5.9 (408), RFC 6585 section 5 (431) and
RFC 9110 section 15.6.4 (503 with Retry-After) name the answers."""

from __future__ import annotations

import re
import socket
import time
from collections.abc import Iterator
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import httpx
import orjson
import pytest

from tests.test_http_server import run_cli, server

Served = tuple[str, int, int, str]
LIMITS = {
    "CAPNOTE_MAX_HEAD_BYTES": "16384",
    "CAPNOTE_MAX_HEADERS": "40",
    "CAPNOTE_HEAD_TIMEOUT_S": "1.5",
    "CAPNOTE_BODY_TIMEOUT_S": "2",
    "CAPNOTE_IDLE_TIMEOUT_S": "1",
    "CAPNOTE_MAX_CONNECTIONS": "30",
}


@pytest.fixture(scope="module")
def served(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Served]:
    """One server for the module: (host, port, pid, an analyst's token)."""
    work = tmp_path_factory.mktemp("limits")
    url = f"sqlite:///{work / 'limits.sqlite3'}"
    token = run_cli(url, "token", "new", "--role", "analyst", "--label", "limits").split()[-1]
    with server(url, work, env=LIMITS) as base:
        port = int(base.rsplit(":", 1)[1])
        log = (work / f"server-{port}.log").read_text()
        pid = int(re.search(r"Started server process \[(\d+)\]", log).group(1))  # type: ignore[union-attr]
        yield "127.0.0.1", port, pid, token


def connect(served: Served) -> socket.socket:
    sock = socket.create_connection(served[:2], timeout=10)
    return sock


def answer(sock: socket.socket) -> tuple[int, dict[str, str], bytes]:
    """Read one whole answer (the server closes the connection after each refusal)."""
    data = b""
    while b"\r\n\r\n" not in data:
        chunk = sock.recv(65536)
        if not chunk:
            break
        data += chunk
    head, _, body = data.partition(b"\r\n\r\n")
    lines = head.decode("latin-1").split("\r\n")
    status = int(lines[0].split()[1])
    headers = dict(line.lower().split(": ", 1) for line in lines[1:])
    length = int(headers.get("content-length", "0"))
    while len(body) < length:
        chunk = sock.recv(65536)
        if not chunk:
            break
        body += chunk
    return status, headers, body


def closed(sock: socket.socket, within: float) -> float:
    """Seconds until the server closed the connection (fails if it does not, in time)."""
    start = time.monotonic()
    sock.settimeout(within)
    while True:
        try:
            if not sock.recv(65536):
                return time.monotonic() - start
        except ConnectionResetError:
            return time.monotonic() - start


def rss_kib(pid: int) -> int:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1])
    raise AssertionError("no VmRSS")


def test_a_head_under_the_limits_is_served(served: Served) -> None:
    host, port, *_ = served
    headers = {f"x-field-{i}": "v" * 200 for i in range(30)}  # 30 fields, about 7 KiB
    got = httpx.get(f"http://{host}:{port}/healthz", headers=headers)
    assert got.status_code == 200


def test_an_oversized_header_is_refused_431_and_memory_does_not_follow(
    served: Served,
) -> None:
    """Six connections each try to send a 50 MiB header (the tester's attack): each is
    answered 431 and closed after the first reads, and the server's resident size grows by
    far less than one header."""
    before = rss_kib(served[2])

    def attack(_: int) -> tuple[int, int]:
        with connect(served) as sock:
            return _attack(sock)

    def _attack(sock: socket.socket) -> tuple[int, int]:
        sock.sendall(b"GET /healthz HTTP/1.1\r\nHost: x\r\nX-Big: ")
        sent = 0
        chunk = b"a" * 65536
        try:
            while sent < 50 * 1024 * 1024:
                sock.sendall(chunk)
                sent += len(chunk)
        except (BrokenPipeError, ConnectionResetError):
            pass
        try:
            status, headers, body = answer(sock)
        except (ConnectionResetError, IndexError):
            status = 0  # the connection was reset before the answer could be read
        else:
            assert headers["connection"] == "close"
            assert headers["x-content-type-options"] == "nosniff"
            issue = orjson.loads(body)["issue"][0]
            assert issue["details"]["coding"][0]["code"] == "request-head-too-large"
            assert "16384 bytes" in issue["diagnostics"]
        return status, sent

    with ThreadPoolExecutor(6) as pool:
        results = list(pool.map(attack, range(6)))
    for status, sent in results:
        assert status in (431, 0)
        assert sent < 50 * 1024 * 1024  # the server stopped reading long before the end
    assert any(status == 431 for status, _ in results)
    grown = rss_kib(served[2]) - before
    assert grown < 20 * 1024, f"the server grew by {grown} KiB"


def test_a_head_in_one_read_is_measured_and_a_body_beside_it_is_not(
    served: Served,
) -> None:
    """A 20 KiB header sent in one write is over the 16 KiB limit; a small head followed
    in the same write by a 200 KiB body is not (the body is not part of the head)."""
    with connect(served) as sock:
        sock.sendall(b"GET /healthz HTTP/1.1\r\nHost: x\r\nX-Big: " + b"a" * 20_000 + b"\r\n\r\n")
        assert answer(sock)[0] == 431
    body = b"{" + b" " * 200_000 + b"}"
    with connect(served) as sock:
        sock.sendall(
            b"POST /notes/check HTTP/1.1\r\nHost: x\r\nContent-Type: application/json\r\n"
            b"Content-Length: %d\r\n\r\n" % len(body) + body
        )
        assert answer(sock)[0] == 401  # past the connection's limits: the token is missing


def test_too_many_header_fields_are_refused_431(served: Served) -> None:
    with connect(served) as sock:
        fields = b"".join(b"X-%d: 1\r\n" % i for i in range(41))
        sock.sendall(b"GET /healthz HTTP/1.1\r\nHost: x\r\n" + fields + b"\r\n")
        status, _headers, body = answer(sock)
    assert status == 431
    assert "more than 40 header fields" in orjson.loads(body)["issue"][0]["diagnostics"]


def test_silent_trickling_and_idle_connections_are_closed(served: Served) -> None:
    """A connection that sends nothing, one that sends its head a byte at a time, and one
    left idle after an answer: all closed by the server, each at its limit."""

    def silent() -> float:
        with connect(served) as sock:
            return closed(sock, within=10)

    def trickle() -> tuple[int, float]:
        with connect(served) as sock:
            start = time.monotonic()
            try:
                for byte in b"GET /healthz HTTP/1.1\r\nHost: x\r\n":
                    sock.sendall(bytes([byte]))
                    time.sleep(0.25)
            except (BrokenPipeError, ConnectionResetError):
                pass
            status, _headers, _body = answer(sock)
            return status, time.monotonic() - start

    def idle() -> float:
        with connect(served) as sock:
            sock.sendall(b"GET /healthz HTTP/1.1\r\nHost: x\r\n\r\n")
            assert answer(sock)[0] == 200
            return closed(sock, within=10)

    with ThreadPoolExecutor(3) as pool:
        quiet, slow, after = pool.submit(silent), pool.submit(trickle), pool.submit(idle)
        assert 1.2 < quiet.result() < 4  # the head timer: 1.5 s
        status, took = slow.result()
        assert status == 408
        assert took < 4
        assert 0.7 < after.result() < 4  # the idle timer: 1 s


def test_a_trickled_body_is_answered_408_and_a_slow_whole_one_is_served(
    served: Served,
) -> None:
    """A body sent a byte every 0.25 s is cut at the body timer (2 s here); a body that
    comes in two parts within it is read whole (200: checked, an empty object with its
    findings)."""
    auth = b"Authorization: Bearer %s\r\n" % served[3].encode()

    def trickle() -> tuple[int, float]:
        with connect(served) as sock:
            start = time.monotonic()
            sock.sendall(
                b"POST /notes/check HTTP/1.1\r\nHost: x\r\nContent-Type: application/json\r\n"
                + auth
                + b"Content-Length: 100\r\n\r\n{"
            )
            try:
                for _ in range(40):
                    sock.sendall(b" ")
                    time.sleep(0.25)
            except (BrokenPipeError, ConnectionResetError):
                pass
            status, _headers, body = answer(sock)
            assert b"request-body-timeout" in body
            return status, time.monotonic() - start

    def in_two_parts() -> int:
        with connect(served) as sock:
            sock.sendall(
                b"POST /notes/check HTTP/1.1\r\nHost: x\r\nContent-Type: application/json\r\n"
                + auth
                + b"Content-Length: 2\r\n\r\n{"
            )
            time.sleep(0.5)
            sock.sendall(b"}")
            return answer(sock)[0]

    with ThreadPoolExecutor(2) as pool:
        slow, parts = pool.submit(trickle), pool.submit(in_two_parts)
        status, took = slow.result()
        assert status == 408
        assert 1.7 < took < 5
        assert parts.result() == 200


def test_connections_beyond_the_bound_are_answered_503_with_retry_after(
    served: Served,
) -> None:
    held = [connect(served) for _ in range(30)]
    try:
        time.sleep(0.2)
        with connect(served) as extra:
            status, headers, body = answer(extra)
        assert status == 503
        assert headers["retry-after"] == "1"
        assert orjson.loads(body)["issue"][0]["details"]["coding"][0]["code"] == (
            "too-many-connections"
        )
    finally:
        for sock in held:
            sock.close()
    time.sleep(0.3)  # the server has seen the closes: it serves again
    assert httpx.get(f"http://{served[0]}:{served[1]}/healthz").status_code == 200
