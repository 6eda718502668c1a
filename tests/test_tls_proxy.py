"""The production set-up over real processes (issue 16, section 1): Debian's nginx with
docker/nginx.conf terminating TLS (a self-signed certificate made here with openssl) in
front of a real `capnote serve`, the limit tests run through it, and capnote believing
X-Forwarded-For only from the proxy.

The file is docker/nginx.conf itself; only paths, addresses and ports are replaced, and the
two time limits are shortened (10 s and 5 s in the file) so the suite stays fast. nginx
connects to capnote from 127.0.0.2 (proxy_bind), the one address capnote trusts here, and
clients connect from 127.0.0.1 or 127.0.0.3, so who the proxy is can be told apart on one
machine. RFC 6585 section 5 (431) and RFC 9110 section 15.5.14 (413) name the answers.
"""

from __future__ import annotations

import json
import os
import shutil
import socket
import ssl
import subprocess
import time
from collections.abc import Iterator
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path

import httpx
import pytest

from tests.conftest import ROOT, routine
from tests.test_http_server import free_port, run_cli, server

CONF = ROOT / "docker" / "nginx.conf"
PROXY_SOURCE = "127.0.0.2"  # nginx's address towards capnote
CLIENT = "127.0.0.3"  # a client's address towards nginx


@dataclass(frozen=True)
class Proxied:
    """nginx in front of capnote: the proxy's URL and port, capnote's own URL, the context
    that trusts the test's certificate, and the database."""

    proxy: str
    port: int
    direct: str
    tls: ssl.SSLContext
    url: str
    pid: int  # nginx's master process


def nginx() -> str:
    """The nginx binary; skipped when absent outside CI, a failure in CI (.ci/run installs
    it), as tests/pg_fixtures.py does for PostgreSQL."""
    found = shutil.which("nginx") or (
        "/usr/sbin/nginx" if Path("/usr/sbin/nginx").exists() else None
    )
    if found is None or shutil.which("openssl") is None:
        reason = "nginx or openssl is not installed (apt-get install nginx openssl)"
        if os.environ.get("CI", "").lower() == "true":
            pytest.fail(f"{reason}; required because CI=true")
        pytest.skip(reason)
    return found


def replaced(text: str, old: str, new: str) -> str:
    """text with old replaced exactly once (the file changed under the test otherwise)."""
    assert text.count(old) == 1, old
    return text.replace(old, new)


def nginx_config(work: Path, nginx_port: int, capnote_port: int) -> str:
    text = CONF.read_text()
    user = "user root;" if os.geteuid() == 0 else ""  # workers write temp files under work/
    text = replaced(text, "user www-data;", user)
    text = replaced(text, "pid /run/nginx.pid;", f"pid {work}/nginx.pid;")
    text = replaced(text, "error_log /dev/stderr warn;", f"error_log {work}/error.log warn;")
    text = replaced(text, "listen 443 ssl;", f"listen 127.0.0.1:{nginx_port} ssl;")
    text = replaced(text, "server capnote:8000;", f"server 127.0.0.1:{capnote_port};")
    text = replaced(text, "/etc/nginx/tls/cert.pem", f"{work}/cert.pem")
    text = replaced(text, "/etc/nginx/tls/key.pem", f"{work}/key.pem")
    text = replaced(text, "client_header_timeout 10s;", "client_header_timeout 1500ms;")
    text = replaced(text, "keepalive_timeout 5s;", "keepalive_timeout 1s;")
    text = replaced(
        text,
        "proxy_pass http://capnote;",
        f"proxy_pass http://capnote;\n            proxy_bind {PROXY_SOURCE};",
    )
    temp = "".join(
        f"    {kind}_temp_path {work}/{kind};\n"
        for kind in ("client_body", "proxy", "fastcgi", "uwsgi", "scgi")
    )
    return replaced(text, "http {\n", "http {\n" + temp)


@pytest.fixture(scope="module")
def proxied(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Proxied]:
    binary = nginx()
    work = tmp_path_factory.mktemp("proxy")
    subprocess.run(
        [
            *("openssl", "req", "-x509", "-newkey", "rsa:2048", "-nodes", "-days", "1"),
            *("-keyout", str(work / "key.pem"), "-out", str(work / "cert.pem")),
            *("-subj", "/CN=localhost", "-addext", "subjectAltName=DNS:localhost,IP:127.0.0.1"),
        ],
        check=True,
        capture_output=True,
        timeout=60,
    )
    url = f"sqlite:///{work / 'proxied.sqlite3'}"
    env = {"CAPNOTE_TRUSTED_PROXIES": json.dumps([PROXY_SOURCE])}
    with server(url, work, env=env) as base:
        capnote_port = int(base.rsplit(":", 1)[1])
        nginx_port = free_port()
        conf = work / "nginx.conf"
        conf.write_text(nginx_config(work, nginx_port, capnote_port))
        process = subprocess.Popen(
            [
                binary,
                "-p",
                str(work),
                "-e",
                str(work / "error.log"),
                "-c",
                str(conf),
                "-g",
                "daemon off;",
            ],
            stdout=subprocess.DEVNULL,
            stderr=subprocess.DEVNULL,
        )
        tls = ssl.create_default_context(cafile=str(work / "cert.pem"))
        proxy = f"https://127.0.0.1:{nginx_port}"
        try:
            deadline = time.monotonic() + 30
            while True:
                try:
                    if httpx.get(f"{proxy}/healthz", verify=tls, timeout=2).status_code == 200:
                        break
                except httpx.TransportError:
                    pass
                if process.poll() is not None or time.monotonic() > deadline:
                    log = (work / "error.log").read_text() if (work / "error.log").exists() else ""
                    raise RuntimeError(
                        f"nginx did not start: {log}{(work / 'nginx.out').read_text()}"
                    )
                time.sleep(0.2)
            yield Proxied(proxy, nginx_port, base, tls, url, process.pid)
        finally:
            process.terminate()
            process.wait(timeout=20)


def nginx_rss_kib(master: int) -> int:
    """Resident size of nginx's master and its workers."""
    total = 0
    for status in Path("/proc").glob("[0-9]*/status"):
        try:
            fields = dict(
                line.split(":", 1) for line in status.read_text().splitlines() if ":" in line
            )
        except OSError:
            continue
        if int(status.parent.name) == master or fields.get("PPid", "").strip() == str(master):
            total += int(fields.get("VmRSS", "0 kB").split()[0])
    return total


def tls_socket(proxied: Proxied) -> ssl.SSLSocket:
    raw = socket.create_connection(("127.0.0.1", proxied.port), timeout=10)
    return proxied.tls.wrap_socket(raw, server_hostname="localhost")


def read_all(sock: ssl.SSLSocket, within: float) -> tuple[bytes, float]:
    """Everything until the server closes the connection, and how long that took."""
    start = time.monotonic()
    sock.settimeout(within)
    data = b""
    while True:
        try:
            chunk = sock.recv(65536)
        except (ConnectionResetError, ssl.SSLError):
            break
        if not chunk:
            break
        data += chunk
    return data, time.monotonic() - start


def test_tls_is_verified_and_answers_carry_the_security_headers(
    proxied: Proxied,
) -> None:
    got = httpx.get(f"{proxied.proxy}/healthz", verify=proxied.tls)
    assert got.status_code == 200
    assert got.headers["x-content-type-options"] == "nosniff"
    with pytest.raises(httpx.ConnectError):  # a client that does not trust the certificate
        httpx.get(f"{proxied.proxy}/healthz")


def test_header_limits_hold_through_the_proxy(proxied: Proxied) -> None:
    """A line over 8 KiB is nginx's 431; 150 small fields pass nginx's buffers and are
    capnote's 431; a 60 MiB header is cut off long before its end."""
    proxy, tls = proxied.proxy, proxied.tls
    big = httpx.get(f"{proxy}/healthz", headers={"x-big": "a" * 9000}, verify=tls)
    assert big.status_code == 431
    assert big.headers["content-type"] == "application/fhir+json"
    assert "8 KiB" in big.json()["issue"][0]["diagnostics"]
    many = httpx.get(f"{proxy}/healthz", headers={f"x-{i}": "1" for i in range(150)}, verify=tls)
    assert many.status_code == 431
    assert "more than 100 header fields" in many.json()["issue"][0]["diagnostics"]

    before = nginx_rss_kib(proxied.pid)
    with tls_socket(proxied) as sock:
        sock.sendall(b"GET /healthz HTTP/1.1\r\nHost: localhost\r\nX-Big: ")
        sent = 0
        try:
            while sent < 60 * 1024 * 1024:
                sock.sendall(b"a" * 65536)
                sent += 65536
        except (BrokenPipeError, ConnectionResetError, ssl.SSLError):
            pass
        data, _took = read_all(sock, within=10)
    # nginx answers 431 and then reads on and discards what the client still sends (its
    # lingering close, at most 30 s), in its fixed buffers: memory does not follow.
    assert data.startswith(b"HTTP/1.1 431"), data[:200]
    grown = nginx_rss_kib(proxied.pid) - before
    assert grown < 8 * 1024, f"nginx grew by {grown} KiB"


def test_a_body_over_the_limit_is_413(proxied: Proxied) -> None:
    got = httpx.post(
        f"{proxied.proxy}/notes/check",
        content=b"{" + b" " * (1024 * 1024 + 10) + b"}",
        headers={"content-type": "application/json"},
        verify=proxied.tls,
    )
    assert got.status_code == 413
    assert got.json()["resourceType"] == "OperationOutcome"


def test_silent_trickling_and_idle_connections_are_closed_by_the_proxy(
    proxied: Proxied,
) -> None:
    def silent() -> float:
        with tls_socket(proxied) as sock:
            return read_all(sock, within=10)[1]

    def trickle() -> float:
        with tls_socket(proxied) as sock:
            start = time.monotonic()
            try:
                for byte in b"GET /healthz HTTP/1.1\r\nHost: localhost\r\n":
                    sock.sendall(bytes([byte]))
                    time.sleep(0.25)
            except (BrokenPipeError, ConnectionResetError, ssl.SSLError):
                pass
            read_all(sock, within=10)
            return time.monotonic() - start

    def idle() -> float:
        with tls_socket(proxied) as sock:
            sock.sendall(b"GET /healthz HTTP/1.1\r\nHost: localhost\r\n\r\n")
            sock.settimeout(10)
            assert sock.recv(65536).startswith(b"HTTP/1.1 200")
            return read_all(sock, within=10)[1]

    with ThreadPoolExecutor(3) as pool:
        quiet, slow, after = pool.submit(silent), pool.submit(trickle), pool.submit(idle)
        assert 1.2 < quiet.result() < 5  # client_header_timeout, 1.5 s here
        assert slow.result() < 5  # 40 bytes at 4 a second would take 10 s
        assert 0.7 < after.result() < 5  # keepalive_timeout, 1 s here


def test_forwarded_addresses_are_believed_from_the_proxy_only(
    proxied: Proxied,
) -> None:
    """The audit trail records the client: through the proxy, the address nginx saw (even
    when the client sends its own X-Forwarded-For); straight to capnote from an address
    that is not the proxy, the connection's address, whatever X-Forwarded-For says."""
    url = proxied.url
    submit = run_cli(url, "token", "new", "--role", "submitter", "--label", "proxy").split()[-1]
    audit = run_cli(url, "token", "new", "--role", "auditor", "--label", "audit").split()[-1]
    spoof = {"x-forwarded-for": "203.0.113.9", "content-type": "application/json"}
    transport = httpx.HTTPTransport(local_address=CLIENT, verify=proxied.tls)
    with httpx.Client(transport=transport) as via_proxy:
        note = routine()
        note["note_id"]["value"] = "LN-PROXY-001"
        got = via_proxy.post(
            f"{proxied.proxy}/notes",
            content=json.dumps(note),
            headers={**spoof, "authorization": f"Bearer {submit}"},
        )
        assert got.status_code == 201, got.text
    note["note_id"]["value"] = "LN-PROXY-002"
    direct = httpx.post(
        f"{proxied.direct}/notes",
        content=json.dumps(note),
        headers={**spoof, "authorization": f"Bearer {submit}"},
    )
    assert direct.status_code == 201, direct.text
    trail = httpx.get(
        f"{proxied.direct}/audit", headers={"authorization": f"Bearer {audit}"}
    ).json()
    # The two notes stored (the trail also holds the tokens made at the command line).
    remotes = {entry["remote"] for entry in trail["entries"] if entry["action"] == "create"}
    assert remotes == {CLIENT, "127.0.0.1"}, trail
